"""Job queue queries: claim with a lease, heartbeat, finish, fail.

A job is claimed by one worker for ``lease`` seconds and the worker's heartbeat
keeps extending that lease. A worker that dies stops heartbeating; once its
lease expires any worker may claim the job again. Each claim counts one
attempt; after :data:`MAX_ATTEMPTS` the job is failed instead of claimed.
Finishing checks that the lease is still held, so a job taken over by another
worker is stored once.
"""

from __future__ import annotations

from collections.abc import Callable
from datetime import timedelta
from typing import Any

from sqlalchemy import and_, or_, select, update
from sqlalchemy.orm import Session

from app.store.analyses import store_report
from app.store.audit import audit
from app.store.models import Dataset, Job, Report, utcnow

MAX_ATTEMPTS = 3


def claim_job(session: Session, owner: str, *, lease: float) -> Job | None:
    """Claim the oldest runnable job (queued, or running with an expired lease).

    Call inside a write session (``BEGIN IMMEDIATE`` on SQLite); the update is
    also conditional on the row still being claimable, for other databases.
    """
    now = utcnow()
    claimable = or_(
        Job.state == "queued",
        and_(Job.state == "running", Job.lease_expires_at < now),
    )
    while True:
        job = session.scalar(select(Job).where(claimable).order_by(Job.id).limit(1))
        if job is None:
            return None
        if job.attempts >= MAX_ATTEMPTS:
            lost = job.error or "the worker running it stopped before finishing"
            _set_failed(session, job, f"Gave up after {job.attempts} attempts: {lost}")
            continue
        took = session.execute(
            update(Job)
            .where(Job.id == job.id, claimable)
            .values(
                state="running",
                lease_owner=owner,
                lease_expires_at=now + timedelta(seconds=lease),
                heartbeat_at=now,
                attempts=Job.attempts + 1,
                started_at=now,
                progress=None,
            )
            .execution_options(synchronize_session=False)
        ).rowcount
        if took == 1:
            session.refresh(job)
            audit(session, "job.claim", dataset_id=job.dataset_id, job_id=job.id, owner=owner,
                  attempt=job.attempts)
            return job


def expire_dead_leases(session: Session, host: str, is_alive: Callable[[int], bool]) -> int:
    """End at once the leases of workers on this host whose process is gone.

    Owner ids are ``host:pid:tag`` (app.worker). A worker killed with SIGKILL
    stops heartbeating; rather than wait for its lease to run out, a worker on
    the same host that sees the pid gone makes the job claimable now. Returns
    how many leases were ended.
    """
    rows = session.execute(
        select(Job.id, Job.lease_owner).where(Job.state == "running",
                                              Job.lease_owner.like(f"{host}:%"))
    ).all()
    dead = []
    for job_id, owner in rows:
        parts = (owner or "").split(":")
        if len(parts) == 3 and parts[1].isdigit() and not is_alive(int(parts[1])):
            dead.append(job_id)
    if dead:
        session.execute(update(Job).where(Job.id.in_(dead), Job.state == "running")
                        .values(lease_expires_at=utcnow() - timedelta(seconds=1))
                        .execution_options(synchronize_session=False))
    return len(dead)


def heartbeat(session: Session, job_id: int, owner: str, *, lease: float,
              progress: dict[str, Any] | None = None) -> bool:
    """Extend the lease (and record progress); False when the lease was lost."""
    now = utcnow()
    values: dict[str, Any] = {
        "heartbeat_at": now, "lease_expires_at": now + timedelta(seconds=lease)
    }
    if progress is not None:
        values["progress"] = progress
    n = session.execute(
        update(Job)
        .where(Job.id == job_id, Job.lease_owner == owner, Job.state == "running")
        .values(**values)
        .execution_options(synchronize_session=False)
    ).rowcount
    return n == 1


def _held(session: Session, job_id: int, owner: str) -> Job | None:
    job = session.get(Job, job_id)
    if job is None or job.state != "running" or job.lease_owner != owner:
        return None
    return job


def finish_job(session: Session, job_id: int, owner: str, report: dict[str, Any], *,
               progress: dict[str, Any] | None = None) -> Report | None:
    """Store the report and mark the job done; None (nothing stored) if the lease was lost."""
    job = _held(session, job_id, owner)
    if job is None:
        return None
    if progress is not None:
        job.progress = progress
    row = store_report(session, job, report)
    session.execute(update(Dataset).where(Dataset.id == job.dataset_id)
                    .values(updated_at=utcnow()).execution_options(synchronize_session=False))
    job.state = "done"
    job.report_id = row.id
    job.finished_at = utcnow()
    job.error = None
    job.lease_owner = None
    job.lease_expires_at = None
    audit(session, "job.done", dataset_id=job.dataset_id, job_id=job.id, report_id=row.id,
          verdict=row.verdict)
    return row


def fail_job(session: Session, job_id: int, owner: str, error: str, *, permanent: bool) -> bool:
    """Record a failed attempt: back to the queue, or failed for good.

    ``permanent`` (bad input: retrying reads the same bytes) or the last
    attempt marks the job failed; otherwise it is queued again.
    """
    job = _held(session, job_id, owner)
    if job is None:
        return False
    if permanent or job.attempts >= MAX_ATTEMPTS:
        _set_failed(session, job, error)
    else:
        job.state = "queued"
        job.error = error
        job.lease_owner = None
        job.lease_expires_at = None
        audit(session, "job.retry", dataset_id=job.dataset_id, job_id=job.id, error=error[:500])
    return True


def release_job(session: Session, job_id: int, owner: str) -> bool:
    """Give a claimed job back to the queue (a worker stopping cleanly).

    The attempt is not spent: a restart is not the job's fault, so three clean
    restarts during one analysis do not fail it.
    """
    job = _held(session, job_id, owner)
    if job is None:
        return False
    job.state = "queued"
    job.attempts = max(0, job.attempts - 1)
    job.lease_owner = None
    job.lease_expires_at = None
    audit(session, "job.release", dataset_id=job.dataset_id, job_id=job.id, owner=owner)
    return True


def _set_failed(session: Session, job: Job, error: str) -> None:
    job.state = "failed"
    job.error = error[:20_000]
    job.finished_at = utcnow()
    job.lease_owner = None
    job.lease_expires_at = None
    audit(session, "job.fail", dataset_id=job.dataset_id, job_id=job.id, error=error[:500])
