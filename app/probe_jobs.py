"""The bias probe as a worker job: requested from a dataset page, run by the worker.

A member asks for a probe of a dataset's current report (:func:`request_probe`);
a ``probe_runs`` row is queued. The worker runs queued probes on a thread of its
own (:func:`start_thread`, so a probe never holds up the analysis queue), one
at a time: it claims the oldest queued run with a lease, lays out the dataset's
files, runs :func:`app.probe.probe_path` cropped by the stored report's traces,
writes the probe's progress into the row as it goes, and stores the
``rawproof.probe/1`` object (and its NRMSE gap, which the registry sorts by).
Tests and ``rawproof worker --once`` call :func:`run_pending`.
"""

from __future__ import annotations

import logging
import shutil
import tempfile
import threading
import time
from datetime import timedelta
from pathlib import Path
from typing import Any

from sqlalchemy import and_, or_, select, update
from sqlalchemy.orm import Session

from app.config import Settings
from app.store import files as filestore
from app.store.audit import audit
from app.store.db import database
from app.store.errors import ValidationError
from app.store.models import Dataset, ProbeRun, Report, User, utcnow

log = logging.getLogger(__name__)

FAMILIES = ("polynomial", "gaussian", "uniform", "equispaced")
ACCELERATIONS = (2.0, 3.0, 4.0, 6.0, 8.0)
MAX_SLICES = 16
LEASE_SECONDS = 600.0
#: seconds between progress writes (the page polls about once a second)
PROGRESS_EVERY = 0.5


# ------------------------------------------------------------------ store side
def request_probe(session: Session, dataset: Dataset, *, user: User, acceleration: float = 4.0,
                  family: str = "polynomial", slices: int = 8) -> ProbeRun:
    """Queue a probe of ``dataset``'s current report (one queued or running at a time).

    Raises
    ------
    ValidationError
        For parameters outside the panel's choices, a dataset without a report, a
        withdrawn or purged dataset, or a probe already queued or running.
    """
    if family not in FAMILIES:
        raise ValidationError("Choose a mask family the form offers: " + ", ".join(FAMILIES)
                              + ".")
    try:
        acceleration = float(acceleration)
        slices = int(slices)
    except (TypeError, ValueError) as exc:
        raise ValidationError("The acceleration and the number of slices are numbers.") from exc
    if acceleration not in ACCELERATIONS:
        raise ValidationError("Choose a nominal acceleration of "
                              + ", ".join(f"{a:g}" for a in ACCELERATIONS) + ".")
    if not 1 <= slices <= MAX_SLICES:
        raise ValidationError(f"Probe between 1 and {MAX_SLICES} slices.")
    if dataset.files_purged_at is not None:
        raise ValidationError("This dataset's files were purged: there is nothing to probe.")
    report = session.scalar(select(Report).where(Report.dataset_id == dataset.id)
                            .order_by(Report.id.desc()).limit(1))
    if report is None:
        raise ValidationError("The probe crops by the measured support: wait for the "
                              "analysis report first.")
    busy = session.scalar(select(ProbeRun.id).where(
        ProbeRun.dataset_id == dataset.id, ProbeRun.state.in_(("queued", "running"))).limit(1))
    if busy is not None:
        raise ValidationError("A probe of this dataset is already queued or running.")
    run = ProbeRun(dataset_id=dataset.id, report_id=report.id, requested_by_id=user.id,
                   acceleration=acceleration, family=family, slices=slices, state="queued")
    session.add(run)
    session.flush()
    audit(session, "probe.request", actor=user, dataset_id=dataset.id, probe_id=run.id,
          acceleration=acceleration, family=family, slices=slices)
    return run


def latest_probe(session: Session, dataset_id: int) -> ProbeRun | None:
    """The dataset's newest probe run (any state)."""
    return session.scalar(select(ProbeRun).where(ProbeRun.dataset_id == dataset_id)
                          .order_by(ProbeRun.id.desc()).limit(1))


def latest_result(session: Session, dataset_id: int) -> dict[str, Any] | None:
    """The ``rawproof.probe/1`` object of the dataset's newest finished probe."""
    run = session.scalar(select(ProbeRun).where(ProbeRun.dataset_id == dataset_id,
                                                ProbeRun.state == "done")
                         .order_by(ProbeRun.id.desc()).limit(1))
    return run.result if run is not None else None


def probe_json(run: ProbeRun | None) -> dict[str, Any] | None:
    """A probe run as JSON for the page's live view and the API."""
    if run is None:
        return None
    return {"id": run.id, "state": run.state, "acceleration": run.acceleration,
            "family": run.family, "slices": run.slices, "progress": run.progress,
            "error": run.error, "report_id": run.report_id, "gap": run.gap,
            "result": run.result,
            "created_at": run.created_at.isoformat() + "Z",
            "finished_at": run.finished_at.isoformat() + "Z" if run.finished_at else None}


def _claim(session: Session, owner: str) -> ProbeRun | None:
    now = utcnow()
    claimable = or_(ProbeRun.state == "queued",
                    and_(ProbeRun.state == "running", ProbeRun.lease_expires_at < now))
    run = session.scalar(select(ProbeRun).where(claimable).order_by(ProbeRun.id).limit(1))
    if run is None:
        return None
    took = session.execute(
        update(ProbeRun).where(ProbeRun.id == run.id, claimable).values(
            state="running", lease_owner=owner, updated_at=now,
            lease_expires_at=now + timedelta(seconds=LEASE_SECONDS),
            progress={"fraction": 0.0, "text": "starting"})).rowcount
    if not took:
        return None
    session.refresh(run)
    return run


def _set(settings: Settings, run_id: int, owner: str, **values: Any) -> bool:
    values.setdefault("updated_at", utcnow())
    with database(settings).scope() as s:
        return bool(s.execute(update(ProbeRun).where(ProbeRun.id == run_id,
                                                     ProbeRun.lease_owner == owner)
                              .values(**values)).rowcount)


# ------------------------------------------------------------------ worker side
def run_one(settings: Settings, owner: str) -> bool:
    """Claim and run one queued probe; False when none was waiting."""
    from app.errors import InputError
    from app.probe import probe_path

    with database(settings).scope() as s:
        run = _claim(s, owner)
        if run is None:
            return False
        ds = s.get(Dataset, run.dataset_id)
        report = s.get(Report, run.report_id) if run.report_id else None
        items = [(df.relative_name, df.file.sha256) for df in ds.files]
        traces = report.data.get("traces", {}) if report is not None else None
        run_id, params = run.id, {"acceleration": run.acceleration, "family": run.family,
                                  "slices": run.slices}
    workdir = Path(tempfile.mkdtemp(prefix=f"probe-{run_id}-", dir=filestore.tmp_dir(settings)))
    last = [0.0]

    def progress(fraction: float, text: str) -> None:
        now = time.monotonic()
        if now - last[0] >= PROGRESS_EVERY or fraction >= 1.0:
            last[0] = now
            _set(settings, run_id, owner, progress={"fraction": round(float(fraction), 3),
                                                    "text": str(text)},
                 lease_expires_at=utcnow() + timedelta(seconds=LEASE_SECONDS))

    try:
        target = filestore.assemble_folder(settings, items, workdir / "files")
        result = probe_path(str(target), traces=traces, progress=progress, **params)
        if isinstance(result.get("group"), str):  # the job folder is gone afterwards
            result["group"] = result["group"].replace(str(target), ".")
        gap = (result.get("gap") or {}).get("nrmse")
        _set(settings, run_id, owner, state="done", result=result, finished_at=utcnow(),
             gap=float(gap) if isinstance(gap, int | float) else None,
             progress={"fraction": 1.0, "text": "done"})
    except InputError as exc:
        _set(settings, run_id, owner, state="failed", finished_at=utcnow(),
             error=f"The files could not be probed: {exc.message} [{exc.code}]")
    except Exception as exc:  # noqa: BLE001 - a failed probe is recorded, the worker goes on
        log.exception("probe %s failed", run_id)
        _set(settings, run_id, owner, state="failed", finished_at=utcnow(),
             error=f"{type(exc).__name__}: {exc}")
    finally:
        shutil.rmtree(workdir, ignore_errors=True)
    return True


def run_pending(settings: Settings, *, owner: str = "inline-probe",
                limit: int | None = None) -> int:
    """Run queued probes in this thread until none is left (or ``limit``); how many ran."""
    n = 0
    while (limit is None or n < limit) and run_one(settings, owner):
        n += 1
    return n


def start_thread(settings: Settings, stop: threading.Event, *, owner: str,
                 poll: float = 1.0) -> threading.Thread:
    """Run queued probes on a daemon thread until ``stop`` is set (the worker's loop)."""

    def loop() -> None:
        while not stop.is_set():
            try:
                ran = run_one(settings, f"{owner}:probe")
            except Exception:  # noqa: BLE001 - a database hiccup: try again later
                log.exception("probe loop")
                ran = False
            if not ran:
                stop.wait(poll)

    t = threading.Thread(target=loop, name="probe", daemon=True)
    t.start()
    return t
