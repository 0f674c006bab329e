"""The analysis worker: claims jobs from the database and runs the analysers.

One worker process claims jobs with a lease (:mod:`app.store.jobs`), keeps the
leases alive from a heartbeat thread, and runs each analysis in a
``concurrent.futures.ProcessPoolExecutor`` through
:func:`app.traces.report.analyse_path` -- the same function ``rawproof
analyse`` calls, so the web app shows the same numbers as the command line.
A worker that dies mid-job stops heartbeating; its lease expires and another
worker (or the same one restarted) takes the job again.

Per-file progress: the analysis process appends one JSON line per analyser
step to a progress file; the heartbeat copies a summary into the job row,
where the dataset page reads it.
"""

from __future__ import annotations

import concurrent.futures as cf
import json
import logging
import multiprocessing
import os
import shutil
import socket
import tempfile
import threading
import traceback
import uuid
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from app.config import Settings
from app.store import files as filestore
from app.store import jobs as jobq
from app.store.db import database
from app.store.models import Dataset, Job

log = logging.getLogger("rawproof.worker")

DEFAULT_LEASE = 30.0
DEFAULT_POLL = 1.0
# Fault injection for tests: when set, a claimed job waits until this file
# exists before its analysis starts (lets a test kill a worker mid-job).
GATE_ENV = "RAWPROOF_WORKER_GATE"


# ------------------------------------------------------------------ the analysis process

def _record_progress(progress_file: str, line: str) -> None:
    group, _, trace = line.rpartition(": ")
    with open(progress_file, "a", encoding="utf-8") as fh:
        fh.write(json.dumps({"group": group or line, "trace": trace}) + "\n")


def _n_analysers() -> int:
    from app.traces.report import analysers

    return len(analysers())


def _save_previews(previews: dict[str, Any], out: Path) -> None:
    arrays: dict[str, np.ndarray] = {"groups": np.array(list(previews), dtype=str)}
    for g, prev in enumerate(previews.values()):
        arrays[f"g{g}_indices"] = np.asarray(prev.get("indices", []), dtype=np.int64)
        for key in ("images", "spectra"):
            frames = [np.asarray(a, dtype=np.uint8) for a in prev.get(key, [])]
            arrays[f"g{g}_{key}"] = (np.stack(frames) if frames and
                                     len({f.shape for f in frames}) == 1
                                     else np.zeros((0, 0, 0), np.uint8))
    out.parent.mkdir(parents=True, exist_ok=True)
    np.savez_compressed(out, **arrays)


def analyse_job(path: str, progress_file: str, previews_out: str, limits: Any,
                fft_workers: int) -> dict[str, Any]:
    """Analyse one assembled dataset folder; runs in a pool process.

    Never raises (exceptions do not all cross process boundaries intact):
    returns ``{"ok": report}``, ``{"input_error": {...}}`` for unreadable
    input, or ``{"error": "...", "traceback": "..."}`` for anything else.
    """
    from app.errors import InputError
    from app.traces.report import analyse_path

    with open(progress_file, "a", encoding="utf-8") as fh:
        fh.write(json.dumps({"n_traces": _n_analysers()}) + "\n")

    def progress(line: str) -> None:
        _record_progress(progress_file, line)

    previews: dict[str, Any] = {}
    try:
        report = analyse_path(path, workers=fft_workers, limits=limits, progress=progress,
                              previews=previews)
    except InputError as exc:
        return {"input_error": exc.to_dict()}
    except Exception as exc:  # noqa: BLE001 - reported on the dataset page
        return {"error": f"{type(exc).__name__}: {exc}",
                "traceback": traceback.format_exc(limit=6)[-4000:]}
    if previews:
        _save_previews(previews, Path(previews_out))
    return {"ok": report}


def summarise_progress(progress_file: Path) -> dict[str, Any] | None:
    """Per-group (per-file) analyser progress from the progress file."""
    try:
        lines = progress_file.read_text(encoding="utf-8").splitlines()
    except FileNotFoundError:
        return None
    n_traces = 0
    groups: dict[str, int] = {}
    current = ""
    for raw in lines:
        try:
            rec = json.loads(raw)
        except ValueError:
            continue  # a line being written right now
        if "n_traces" in rec:
            n_traces = int(rec["n_traces"])
            continue
        groups[rec["group"]] = groups.get(rec["group"], 0) + 1
        current = f"{rec['group']}: {rec['trace']}"
    return {
        "n_traces": n_traces,
        "current": current,
        "files": [{"name": g, "done": n, "total": n_traces} for g, n in groups.items()],
    }


# ------------------------------------------------------------------ the job loop

@dataclass
class _Active:
    job_id: int
    dataset_id: int
    workdir: Path
    path: str
    future: cf.Future | None = None

    @property
    def progress_file(self) -> Path:
        return self.workdir / "progress.jsonl"

    @property
    def previews_out(self) -> Path:
        return self.workdir / "previews.npz"


def _owner_id() -> str:
    return f"{socket.gethostname()}:{os.getpid()}:{uuid.uuid4().hex[:6]}"


def _prepare(settings: Settings, job: Job, session) -> _Active:  # noqa: ANN001
    ds = session.get(Dataset, job.dataset_id)
    workdir = Path(tempfile.mkdtemp(prefix=f"job-{job.id}-", dir=filestore.tmp_dir(settings)))
    items = [(df.relative_name, df.file.sha256) for df in ds.files]
    target = filestore.assemble_folder(settings, items, workdir / "files")
    return _Active(job.id, job.dataset_id, workdir, str(target))


def _wait_for_gate(stop: threading.Event) -> bool:
    """False when the worker was stopped while waiting at the test gate."""
    gate = os.environ.get(GATE_ENV)
    while gate and not Path(gate).exists():
        if stop.wait(0.05):
            return False
    return True


def _relative(obj: Any, folder: str) -> Any:
    """Replace the job folder's absolute path by the dataset's own relative names."""
    if isinstance(obj, str):
        return obj.replace(folder + "/", "").replace(folder, ".")
    if isinstance(obj, dict):
        return {k: _relative(v, folder) for k, v in obj.items()}
    if isinstance(obj, list):
        return [_relative(v, folder) for v in obj]
    return obj


def _finish(settings: Settings, owner: str, act: _Active, result: dict[str, Any]) -> str:
    """Store the outcome of one analysis; returns the job's new state word.

    Paths inside the temporary job folder are written as the dataset's
    relative file names: the folder is gone once the job ends.
    """
    result = _relative(result, str(act.workdir / "files"))
    db = database(settings)
    with db.scope() as s:
        if "ok" in result:
            row = jobq.finish_job(s, act.job_id, owner, result["ok"],
                                  progress=summarise_progress(act.progress_file))
            if row is None:
                return "lost"
            if act.previews_out.exists():
                dest = filestore.previews_file(settings, row.id)
                dest.parent.mkdir(parents=True, exist_ok=True)
                shutil.move(str(act.previews_out), dest)
            return "done"
        if "input_error" in result:
            err = result["input_error"]
            where = f" ({err['path']})" if err.get("path") else ""
            msg = f"The files could not be read{where}: {err['message']} [{err['code']}]"
            ok = jobq.fail_job(s, act.job_id, owner, msg, permanent=True)
        else:
            msg = result.get("error", "unknown error")
            ok = jobq.fail_job(s, act.job_id, owner, msg, permanent=False)
        return "failed" if ok else "lost"


class Worker:
    """Claims jobs and runs them in a process pool until stopped.

    Parameters
    ----------
    settings : Settings
    concurrency : int
        Jobs analysed at once (pool processes).
    lease : float
        Seconds a claim lasts without a heartbeat.
    poll : float
        Seconds between looks at an empty queue.
    parent_pid : int, optional
        Stop when this process (the server that started us) is gone.
    fft_workers : int
        ``scipy.fft`` threads per analysis.
    """

    def __init__(self, settings: Settings, *, concurrency: int = 1, lease: float = DEFAULT_LEASE,
                 poll: float = DEFAULT_POLL, parent_pid: int | None = None,
                 fft_workers: int = 2) -> None:
        self.settings = settings
        self.concurrency = max(1, concurrency)
        self.lease = lease
        self.poll = poll
        self.parent_pid = parent_pid
        self.fft_workers = fft_workers
        self.owner = _owner_id()
        self.stop = threading.Event()
        self._active: dict[int, _Active] = {}
        self._lock = threading.Lock()
        self._pool: cf.ProcessPoolExecutor | None = None

    # -- heartbeat
    def _heartbeat_loop(self) -> None:
        db = database(self.settings)
        while not self.stop.wait(max(0.2, self.lease / 4)):
            with self._lock:
                active = list(self._active.values())
            for act in active:
                try:
                    with db.scope() as s:
                        alive = jobq.heartbeat(s, act.job_id, self.owner, lease=self.lease,
                                               progress=summarise_progress(act.progress_file))
                    if not alive:  # another worker took it; finish_job will store nothing
                        log.warning("lost the lease of job %s", act.job_id)
                except Exception:  # noqa: BLE001 - a missed beat is retried next time
                    log.exception("heartbeat failed for job %s", act.job_id)

    def _pool_get(self) -> cf.ProcessPoolExecutor:
        if self._pool is None:
            self._pool = cf.ProcessPoolExecutor(
                max_workers=self.concurrency, mp_context=multiprocessing.get_context("spawn"))
        return self._pool

    def _claim(self) -> _Active | None:
        db = database(self.settings)
        with db.scope() as s:
            job = jobq.claim_job(s, self.owner, lease=self.lease)
            if job is None:
                return None
            try:
                act = _prepare(self.settings, job, s)
            except Exception as exc:  # noqa: BLE001 - a missing blob fails this job only
                jobq.fail_job(s, job.id, self.owner, f"Cannot assemble the files: {exc}",
                              permanent=False)
                return None
        log.info("claimed job %s (dataset %s)", act.job_id, act.dataset_id)
        return act

    def _submit(self, act: _Active) -> None:
        act.future = self._pool_get().submit(
            analyse_job, act.path, str(act.progress_file), str(act.previews_out),
            self.settings.limits, self.fft_workers)

    def _collect(self, act: _Active) -> None:
        try:
            result = act.future.result()
        except cf.process.BrokenProcessPool as exc:
            self._pool = None
            result = {"error": f"The analysis process died: {exc}"}
        except Exception as exc:  # noqa: BLE001
            result = {"error": f"{type(exc).__name__}: {exc}"}
        state = _finish(self.settings, self.owner, act, result)
        log.info("job %s: %s", act.job_id, state)
        shutil.rmtree(act.workdir, ignore_errors=True)

    def _parent_gone(self) -> bool:
        return self.parent_pid is not None and os.getppid() != self.parent_pid

    def run(self, *, max_jobs: int | None = None) -> int:
        """Work until stopped (or after ``max_jobs``); returns the number of jobs finished."""
        swept = filestore.sweep_tmp(self.settings)
        if swept:
            log.info("removed %d upload or job file(s) left in tmp/ by killed processes", swept)
        beat = threading.Thread(target=self._heartbeat_loop, name="heartbeat", daemon=True)
        beat.start()
        from app import probe_jobs  # bias probes run on their own thread

        probe_jobs.start_thread(self.settings, self.stop, owner=self.owner)
        finished = 0
        try:
            while not self.stop.is_set() and not self._parent_gone():
                while (len(self._active) < self.concurrency
                       and (max_jobs is None or finished + len(self._active) < max_jobs)):
                    act = self._claim()
                    if act is None:
                        break
                    with self._lock:
                        self._active[act.job_id] = act
                    if not _wait_for_gate(self.stop):
                        break
                    self._submit(act)
                futures = {a.future: a for a in self._active.values() if a.future}
                if not futures:
                    if max_jobs is not None and finished >= max_jobs:
                        break
                    self.stop.wait(self.poll)
                    continue
                done, _ = cf.wait(futures, timeout=self.poll, return_when=cf.FIRST_COMPLETED)
                for fut in done:
                    act = futures[fut]
                    self._collect(act)
                    with self._lock:
                        self._active.pop(act.job_id, None)
                    finished += 1
                if max_jobs is not None and finished >= max_jobs and not self._active:
                    break
        finally:
            self.stop.set()
            if self._pool is not None:
                self._pool.shutdown(wait=False, cancel_futures=True)
            self._release_unfinished()
        return finished

    def _release_unfinished(self) -> None:
        """On a clean stop, hand unfinished jobs back at once instead of waiting for leases."""
        for act in list(self._active.values()):
            try:
                with database(self.settings).scope() as s:
                    jobq.release_job(s, act.job_id, self.owner)
            except Exception:  # noqa: BLE001 - the lease then simply expires
                log.exception("could not release job %s", act.job_id)
            shutil.rmtree(act.workdir, ignore_errors=True)
        self._active.clear()


def run_inline(settings: Settings, *, limit: int | None = None) -> int:
    """Process queued jobs one by one in this process (no pool); return how many ran.

    For ``rawproof worker --once``, the demo loader and tests: the same claim,
    lease and store path as :class:`Worker`, without a process pool.
    """
    owner = f"inline:{_owner_id()}"
    db = database(settings)
    ran = 0
    while limit is None or ran < limit:
        with db.scope() as s:
            job = jobq.claim_job(s, owner, lease=3600)
            if job is None:
                break
            act = _prepare(settings, job, s)
        result = analyse_job(act.path, str(act.progress_file), str(act.previews_out),
                             settings.limits, 2)
        _finish(settings, owner, act, result)
        shutil.rmtree(act.workdir, ignore_errors=True)
        ran += 1
    from app import probe_jobs

    probe_jobs.run_pending(settings, owner=owner)
    return ran
