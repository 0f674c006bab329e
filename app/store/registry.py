"""The lab's registry: one row per dataset with its latest report, decision and job.

Filtering and sorting happen in Python over the lab's datasets (a lab keeps
hundreds, not millions); the database does the joins.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass, field
from datetime import datetime

from sqlalchemy import func, select
from sqlalchemy.orm import Session, aliased

from app.store.models import (
    AuditEvent,
    Dataset,
    DatasetFile,
    Decision,
    Job,
    ProbeRun,
    Report,
    StoredFile,
    User,
)

SORTS = ("updated", "created", "name", "size", "decision", "uploader", "gap")


@dataclass
class RegistryRow:
    id: int
    name: str
    source: str
    licence: str
    description: str
    uploader: str
    uploader_label: str
    created_at: datetime
    updated_at: datetime
    size: int
    n_files: int
    formats: list[str] = field(default_factory=list)
    verdict: str | None = None
    report_format: str | None = None
    traces: dict[str, str] = field(default_factory=dict)
    decision: str | None = None
    decided_by: str | None = None
    decided_at: datetime | None = None
    job_state: str | None = None
    withdrawn: bool = False
    #: the NRMSE gap of the latest finished bias probe (None when never probed)
    gap: float | None = None

    @property
    def found(self) -> list[tuple[str, str]]:
        """Traces that are present or unclear, present first."""
        order = {"present": 0, "inconclusive": 1}
        items = [(t, s) for t, s in self.traces.items() if s in order]
        return sorted(items, key=lambda ts: (order[ts[1]], ts[0]))


#: Registry rows of the last read, per database, with the change key they were read at.
_CACHE: dict[str, tuple[tuple, list[RegistryRow]]] = {}
_CACHE_LOCK = threading.Lock()


def change_key(session: Session) -> tuple:
    """A value that changes whenever anything the registry or a dataset page shows may
    have changed.

    Every user-made change writes an audit event; reports, job state changes and
    job heartbeats (the worker's progress) are counted directly.
    """
    return tuple(session.execute(select(
        select(func.max(AuditEvent.id)).scalar_subquery(),
        select(func.max(Report.id)).scalar_subquery(),
        select(func.max(Job.id)).scalar_subquery(),
        select(func.count(Job.id)).where(Job.state.in_(("queued", "running")))
        .scalar_subquery(),
        select(func.count(Job.id)).where(Job.state == "failed").scalar_subquery(),
        select(func.max(Job.heartbeat_at)).where(Job.state == "running").scalar_subquery(),
        select(func.count(Dataset.id)).scalar_subquery(),
        select(func.max(User.id)).scalar_subquery(),
        select(func.max(ProbeRun.updated_at)).scalar_subquery(),
        select(func.count(ProbeRun.id)).scalar_subquery(),
    )).one())


def registry_rows(session: Session) -> list[RegistryRow]:
    """Every dataset with uploader, file summary, latest report, current decision, latest job.

    Read once per change of the database (see :func:`change_key`) and shared by
    every request until the next change; callers must not modify the rows.
    """
    url = str(session.get_bind().url)
    key = change_key(session)
    with _CACHE_LOCK:
        hit = _CACHE.get(url)
    if hit is not None and hit[0] == key:
        return hit[1]
    rows = _read_rows(session)
    with _CACHE_LOCK:
        _CACHE[url] = (key, rows)
    return rows


def _read_rows(session: Session) -> list[RegistryRow]:
    latest_report = (select(Report.dataset_id, func.max(Report.id).label("rid"))
                     .group_by(Report.dataset_id).subquery())
    latest_job = (select(Job.dataset_id, func.max(Job.id).label("jid"))
                  .group_by(Job.dataset_id).subquery())
    latest_probe = (select(ProbeRun.dataset_id, func.max(ProbeRun.id).label("pid"))
                    .where(ProbeRun.state == "done").group_by(ProbeRun.dataset_id).subquery())
    reviewer = aliased(User)
    # Plain columns, not ORM entities: the registry reads ~20 values per dataset and
    # building six mapped objects per row dominated the page's time.
    stmt = (
        select(
            Dataset.id, Dataset.name, Dataset.source, Dataset.licence, Dataset.description,
            Dataset.created_at, Dataset.updated_at, Dataset.total_size,
            User.name, User.display_name,
            Report.verdict, Report.trace_status,
            Decision.outcome, Decision.created_at,
            reviewer.name, reviewer.display_name,
            Job.state, Dataset.withdrawn_at, ProbeRun.gap,
        )
        .join(User, User.id == Dataset.uploader_id)
        .outerjoin(latest_report, latest_report.c.dataset_id == Dataset.id)
        .outerjoin(Report, Report.id == latest_report.c.rid)
        .outerjoin(Decision, Decision.id == Dataset.current_decision_id)
        .outerjoin(reviewer, reviewer.id == Decision.reviewer_id)
        .outerjoin(latest_job, latest_job.c.dataset_id == Dataset.id)
        .outerjoin(Job, Job.id == latest_job.c.jid)
        .outerjoin(latest_probe, latest_probe.c.dataset_id == Dataset.id)
        .outerjoin(ProbeRun, ProbeRun.id == latest_probe.c.pid)
    )
    formats: dict[int, set[str]] = {}
    counts: dict[int, int] = {}
    for ds_id, fmt in session.execute(
        select(DatasetFile.dataset_id, StoredFile.format).join(
            StoredFile, StoredFile.id == DatasetFile.file_id)
    ):
        counts[ds_id] = counts.get(ds_id, 0) + 1
        if fmt:
            formats.setdefault(ds_id, set()).add(fmt)
    rows = []
    for (ds_id, name, source, licence, description, created, updated, size, up_name,
         up_display, verdict, trace_status, outcome, decided_at, rev_name, rev_display,
         job_state, withdrawn_at, gap) in session.execute(stmt):
        rows.append(RegistryRow(
            id=ds_id, name=name, source=source, licence=licence,
            description=description, uploader=up_name, uploader_label=up_display or up_name,
            created_at=created, updated_at=updated, size=size,
            n_files=counts.get(ds_id, 0), formats=sorted(formats.get(ds_id, ())),
            verdict=verdict,
            traces=dict(trace_status) if trace_status else {},
            decision=outcome,
            decided_by=(rev_display or rev_name) if rev_name else None,
            decided_at=decided_at,
            job_state=job_state,
            withdrawn=withdrawn_at is not None,
            gap=gap,
        ))
    return rows


def filter_rows(
    rows: list[RegistryRow],
    *,
    q: str = "",
    decision: str = "",
    trace: str = "",
    uploader: str = "",
    sort: str = "updated",
    descending: bool = True,
    withdrawn: bool = False,
) -> list[RegistryRow]:
    """Search, filter and sort registry rows.

    Parameters
    ----------
    q : str
        Words that must all appear in the name, source, licence, description or uploader.
    decision : str
        An outcome key, ``"none"`` for undecided datasets, or empty for all.
    trace : str
        A trace id: keep datasets where that trace was found (present).
    uploader : str
        A user name.
    sort : str
        One of :data:`SORTS`; ``gap`` orders by the bias probe's NRMSE gap, datasets
        never probed last in either direction.
    withdrawn : bool
        Include withdrawn datasets (hidden by default).
    """
    words = q.lower().split()
    out = []
    for r in rows:
        if r.withdrawn and not withdrawn:
            continue
        if words:
            hay = " ".join((r.name, r.source, r.licence, r.description, r.uploader,
                            r.uploader_label)).lower()
            if not all(w in hay for w in words):
                continue
        if decision == "none" and r.decision is not None:
            continue
        if decision and decision != "none" and r.decision != decision:
            continue
        if trace and r.traces.get(trace) != "present":
            continue
        if uploader and r.uploader != uploader:
            continue
        out.append(r)
    keys = {
        "updated": lambda r: r.updated_at,
        "created": lambda r: r.created_at,
        "name": lambda r: r.name.lower(),
        "size": lambda r: r.size,
        "decision": lambda r: (r.decision or "", r.decided_at or datetime.min),
        "uploader": lambda r: r.uploader,
    }
    if sort == "gap":
        probed = sorted((r for r in out if r.gap is not None), key=lambda r: r.gap,
                        reverse=descending)
        return probed + [r for r in out if r.gap is None]
    out.sort(key=keys.get(sort, keys["updated"]), reverse=descending)
    return out
