"""The analysis worker: claims jobs from the database and runs the analysers.

One worker process claims jobs with a lease (:mod:`app.store.jobs`), keeps the
leases alive from a heartbeat thread, and runs each analysis in a
``concurrent.futures.ProcessPoolExecutor`` through
:func:`app.analysis.analyse_path` -- the same function ``rawproof
analyse`` calls, so the web app shows the same numbers as the command line.
A worker that dies mid-job stops heartbeating; its lease expires and another
worker (or the same one restarted) takes the job again.

Per-file progress: the analysis process appends one JSON line per analyser
step to a progress file; the heartbeat copies a summary into the job row,
where the dataset page reads it.
"""

from __future__ import annotations

import concurrent.futures as cf
import errno
import json
import logging
import multiprocessing
import os
import shutil
import socket
import tempfile
import threading
import time
import traceback
import uuid
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from app.config import Settings
from app.store import files as filestore
from app.store import jobs as jobq
from app.store import queue_health
from app.store.db import database
from app.store.models import Dataset, Job

log = logging.getLogger("rawproof.worker")

DEFAULT_LEASE = 30.0
DEFAULT_POLL = 1.0
#: errors of a full or read-only disk: the job waits in the queue, its attempt unspent
_STORAGE_ERRNOS = {errno.ENOSPC, errno.EDQUOT, errno.EROFS}
#: longest wait between retries while the database or the store fails
MAX_BACKOFF = 30.0
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


def init_analysis_process(vm_bytes: int) -> None:
    """Set up a pool process: die with the worker, and cap its address space.

    ``PR_SET_PDEATHSIG`` (prctl(2)) makes the kernel kill this process when the
    worker that spawned it dies, even by SIGKILL, so no analysis outlives its
    worker. ``RLIMIT_AS`` (setrlimit(2)) turns a runaway allocation into a
    ``MemoryError`` that fails this job instead of exhausting the machine.
    """
    import ctypes
    import resource
    import signal as _signal

    pr_set_pdeathsig = 1
    try:
        ctypes.CDLL(None, use_errno=True).prctl(pr_set_pdeathsig, int(_signal.SIGKILL), 0, 0, 0)
    except (OSError, AttributeError):  # not Linux: the pool notices a dead worker itself
        pass
    if vm_bytes > 0:
        try:
            resource.setrlimit(resource.RLIMIT_AS, (vm_bytes, vm_bytes))
        except (ValueError, OSError):
            log.warning("could not cap the analysis process's address space")


def analyse_job(path: str, progress_file: str, previews_out: str, limits: Any,
                fft_workers: int) -> dict[str, Any]:
    """Analyse one assembled dataset folder; runs in a pool process.

    Never raises (exceptions do not all cross process boundaries intact):
    returns ``{"ok": report}``, ``{"input_error": {...}}`` for unreadable
    input, or ``{"error": "...", "traceback": "..."}`` for anything else.
    Temporary files of the readers (an archive's extracted members) go into
    the job's own folder inside the data folder, removed with the job.
    """
    # temporary files of this analysis go inside its job folder; restored afterwards,
    # because run_inline calls this in the caller's own process
    before = tempfile.tempdir
    tempfile.tempdir = str(Path(progress_file).parent)
    try:
        return _analyse_job(path, progress_file, previews_out, limits, fft_workers)
    finally:
        tempfile.tempdir = before


def _analyse_job(path: str, progress_file: str, previews_out: str, limits: Any,
                 fft_workers: int) -> dict[str, Any]:
    from app.analysis import analyse_path
    from app.errors import InputError

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
    except MemoryError:
        return {"input_error": {
            "code": "too_large", "path": None,
            "message": "the analysis needed more memory than the limit of one analysis "
                       f"process ({getattr(limits, 'max_analysis_vm_bytes', 0) / 1024**2:.0f} "
                       "MiB of address space)"}}
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


def _pid_alive(pid: int) -> bool:
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def _owner_id() -> str:
    return f"{socket.gethostname()}:{os.getpid()}:{uuid.uuid4().hex[:6]}"


def _prepare(settings: Settings, job: Job, session) -> _Active:  # noqa: ANN001
    ds = session.get(Dataset, job.dataset_id)
    workdir = Path(tempfile.mkdtemp(prefix=f"job-{job.id}-", dir=filestore.tmp_dir(settings)))
    items = [(df.relative_name, df.file.sha256) for df in ds.files]
    try:
        target = filestore.assemble_folder(settings, items, workdir / "files")
    except BaseException:
        shutil.rmtree(workdir, ignore_errors=True)
        raise
    return _Active(job.id, job.dataset_id, workdir, str(target))


def _without_paths(settings: Settings, exc: BaseException) -> str:
    """An error's message with no absolute path of this machine in it.

    Members see job errors: an ``OSError`` is told by its reason and the file's
    name inside the dataset; other messages lose the data folder's path.
    """
    if isinstance(exc, OSError) and exc.strerror:
        name = Path(str(exc.filename)).name if exc.filename else ""
        return f"{exc.strerror}" + (f" ({name})" if name else "")
    text = str(exc)
    for folder in {str(settings.data_dir), str(Path(settings.data_dir).resolve())}:
        text = text.replace(folder + "/", "").replace(folder, ".")
    return text


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
    result = _relative(_relative(result, str(act.workdir / "files")), str(act.workdir))
    result = _relative(result, str(settings.data_dir))
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
        self._status = queue_health.worker_file(settings)
        self._trouble: tuple[str, str, float] | None = None

    # -- status (read by pages and the API: app.store.queue_health)
    def _write_status(self) -> None:
        rec: dict[str, Any] = {"role": "worker", "host": socket.gethostname(),
                               "pid": os.getpid(), "lease": self.lease,
                               "heartbeat_at": time.time(), "state": "ok"}
        if self._trouble is not None:
            reason, message, since = self._trouble
            rec.update(state="stalled", reason=reason, message=message, since=since)
        self._status.write(rec)

    def _set_trouble(self, exc: BaseException | None) -> None:
        if exc is None:
            changed, self._trouble = self._trouble is not None, None
        else:
            reason, message = queue_health.classify(exc)
            since = self._trouble[2] if self._trouble else time.time()
            changed = self._trouble is None or self._trouble[0] != reason
            self._trouble = (reason, message, since)
        if changed:
            self._write_status()

    # -- heartbeat
    def _heartbeat_loop(self) -> None:
        db = database(self.settings)
        while not self.stop.wait(max(0.2, self.lease / 4)):
            self._write_status()
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
                max_workers=self.concurrency, mp_context=multiprocessing.get_context("spawn"),
                initializer=init_analysis_process,
                initargs=(self.settings.analysis_limits.max_analysis_vm_bytes,))
        return self._pool

    def _claim(self) -> _Active | None:
        db = database(self.settings)
        with db.scope() as s:
            jobq.expire_dead_leases(s, socket.gethostname(), _pid_alive)
            job = jobq.claim_job(s, self.owner, lease=self.lease)
            if job is None:
                return None
            try:
                act = _prepare(self.settings, job, s)
            except OSError as exc:
                if exc.errno in _STORAGE_ERRNOS:
                    raise  # the claim is rolled back: a full disk spends no attempt
                jobq.fail_job(s, job.id, self.owner, "Cannot assemble the files: "
                              + _without_paths(self.settings, exc), permanent=False)
                return None
            except Exception as exc:  # noqa: BLE001 - a missing blob fails this job only
                jobq.fail_job(s, job.id, self.owner, "Cannot assemble the files: "
                              + _without_paths(self.settings, exc), permanent=False)
                return None
        log.info("claimed job %s (dataset %s)", act.job_id, act.dataset_id)
        return act

    def _submit(self, act: _Active) -> None:
        act.future = self._pool_get().submit(
            analyse_job, act.path, str(act.progress_file), str(act.previews_out),
            self.settings.analysis_limits, self.fft_workers)

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
        """Work until stopped (or after ``max_jobs``); returns the number of jobs finished.

        A failing database or store (a full disk, a locked or read-only
        database) does not end the loop: the worker logs it, waits with a
        growing back-off (up to :data:`MAX_BACKOFF` seconds) and tries again,
        so queued jobs run once space is freed.
        """
        queue_health.remove_dead(self.settings)
        self._status.open()
        self._write_status()
        swept = filestore.sweep_tmp(self.settings)
        if swept:
            log.info("removed %d upload or job file(s) left in tmp/ by killed processes", swept)
        beat = threading.Thread(target=self._heartbeat_loop, name="heartbeat", daemon=True)
        beat.start()
        from app import probe_jobs  # bias probes run on their own thread

        probe_jobs.start_thread(self.settings, self.stop, owner=self.owner)
        finished = 0
        backoff = 0.0
        try:
            while not self.stop.is_set() and not self._parent_gone():
                try:
                    finished, idle = self._step(finished, max_jobs)
                    backoff = 0.0
                    if self._trouble is not None:
                        self._set_trouble(None)
                except Exception as exc:  # noqa: BLE001 - database or disk trouble: retry
                    self._set_trouble(exc)
                    backoff = min(MAX_BACKOFF, max(self.poll, backoff * 2))
                    log.error("the queue is stalled (%s: %s); retrying in %.0f s",
                              type(exc).__name__, str(exc)[:200], backoff)
                    self.stop.wait(backoff)
                    continue
                if idle is None:
                    break
                if idle:
                    self.stop.wait(self.poll)
        finally:
            self.stop.set()
            if self._pool is not None:
                self._pool.shutdown(wait=False, cancel_futures=True)
            self._release_unfinished()
            self._status.remove()
        return finished

    def _step(self, finished: int, max_jobs: int | None) -> tuple[int, bool | None]:
        """One pass: claim what fits, collect what ended. Returns (finished, idle or None
        when ``max_jobs`` is reached)."""
        while (len(self._active) < self.concurrency
               and (max_jobs is None or finished + len(self._active) < max_jobs)):
            act = self._claim()
            if act is None:
                break
            with self._lock:
                self._active[act.job_id] = act
            if not _wait_for_gate(self.stop):
                return finished, None
            self._submit(act)
        futures = {a.future: a for a in self._active.values() if a.future}
        if not futures:
            if max_jobs is not None and finished >= max_jobs:
                return finished, None
            return finished, True
        done, _ = cf.wait(futures, timeout=self.poll, return_when=cf.FIRST_COMPLETED)
        for fut in done:
            act = futures[fut]
            try:
                self._collect(act)
            finally:
                # a result that could not be stored: the lease runs out and the job
                # is claimed again once the database or disk works again
                with self._lock:
                    self._active.pop(act.job_id, None)
                shutil.rmtree(act.workdir, ignore_errors=True)
            finished += 1
        if max_jobs is not None and finished >= max_jobs and not self._active:
            return finished, None
        return finished, False

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
                             settings.analysis_limits, 2)
        _finish(settings, owner, act, result)
        shutil.rmtree(act.workdir, ignore_errors=True)
        ran += 1
    from app import probe_jobs

    probe_jobs.run_pending(settings, owner=owner)
    return ran
