"""Analysis jobs as a dataset sees them (queue one, find the latest) and stored reports.

The queue's own mechanics (claim, lease, heartbeat, finish) are in
:mod:`app.store.jobs`.
"""

from __future__ import annotations

import json
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from app.store.audit import audit
from app.store.models import Dataset, Job, Report, User

__all__ = ["enqueue_job", "get_current_report", "latest_job", "report_history",
           "request_reanalysis", "store_report"]


def enqueue_job(session: Session, dataset: Dataset, *, requested_by: User | None = None) -> Job:
    """Queue an analysis of ``dataset`` unless one is already queued or running."""
    open_job = session.scalar(
        select(Job).where(Job.dataset_id == dataset.id, Job.state.in_(("queued", "running")))
    )
    if open_job is not None:
        return open_job
    job = Job(dataset_id=dataset.id, state="queued",
              requested_by_id=requested_by.id if requested_by else None)
    session.add(job)
    session.flush()
    audit(session, "job.queue", actor=requested_by, dataset_id=dataset.id, job_id=job.id)
    return job


def request_reanalysis(session: Session, dataset: Dataset, *, user: User) -> Job:
    """Queue a new analysis (one button after a new rawproof); old reports stay in history."""
    job = enqueue_job(session, dataset, requested_by=user)
    audit(session, "dataset.reanalyse", actor=user, dataset_id=dataset.id, job_id=job.id)
    return job


def latest_job(session: Session, dataset_id: int) -> Job | None:
    return session.scalar(select(Job).where(Job.dataset_id == dataset_id).order_by(Job.id.desc()))


def get_current_report(session: Session, dataset_id: int) -> Report | None:
    """The newest stored report row of a dataset (``.data`` is the contract dict), or None."""
    return session.scalar(
        select(Report).where(Report.dataset_id == dataset_id).order_by(Report.id.desc())
    )


def report_history(session: Session, dataset_id: int) -> list[Report]:
    return list(session.scalars(
        select(Report).where(Report.dataset_id == dataset_id).order_by(Report.id.desc())
    ))


def store_report(session: Session, job: Job, report: dict[str, Any]) -> Report:
    """Keep a finished report with the versions that made it (never replaces an old one)."""
    row = Report(
        dataset_id=job.dataset_id,
        job_id=job.id,
        tool_version=str(report.get("tool_version", "")),
        analyser_versions=dict(report.get("analyser_versions") or {}),
        verdict=str(report.get("verdict", "")),
        trace_status={tid: t.get("status") for tid, t in (report.get("traces") or {}).items()},
        body=json.dumps(report),
    )
    session.add(row)
    session.flush()
    return row
