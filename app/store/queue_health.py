"""Is the analysis queue moving, and if not, why: the worker's and the supervisor's status.

The worker and the server's worker supervisor each keep one small status file
in ``<data_dir>/status/``; pages and the API read them to say why queued jobs
wait (a worker restarting after a crash, a full disk or database, a worker
that stopped sending heartbeats).

Files, not a table: the commonest stall is a full disk or database, where a
database write fails. A status file is created at a fixed size when the
process starts and afterwards only overwritten in place (``os.pwrite`` over
blocks it already owns), which still works when the file system has no free
block left. Readers tolerate a half-written record (it reads as absent).
"""

from __future__ import annotations

import errno
import json
import os
import socket
import time
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from app.config import Settings
from app.store.models import Job

#: bytes of one status record; the file keeps this size for its whole life
RECORD_BYTES = 2048

_STORAGE_ERRNOS = {errno.ENOSPC, errno.EDQUOT}


def status_dir(settings: Settings) -> Path:
    """The folder of the status files."""
    return settings.data_dir / "status"


class StatusFile:
    """One process's status record, overwritten in place.

    Parameters
    ----------
    path : Path
        The file; created (and sized) by :meth:`open`.
    """

    def __init__(self, path: Path) -> None:
        self.path = path
        self._fd: int | None = None

    def open(self) -> bool:
        """Create the file at its full size; False when that is impossible (disk full)."""
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
        except OSError:
            return False
        try:
            os.pwrite(fd, b" " * RECORD_BYTES, 0)
        except OSError:
            os.close(fd)
            return False
        self._fd = fd
        return True

    def write(self, record: dict[str, Any]) -> bool:
        """Overwrite the record; False when it could not be written."""
        if self._fd is None and not self.open():
            return False
        data = json.dumps(record, separators=(",", ":")).encode("utf-8")
        if len(data) > RECORD_BYTES:
            record = {**record, "message": str(record.get("message", ""))[:300]}
            data = json.dumps(record, separators=(",", ":")).encode("utf-8")[:RECORD_BYTES]
        try:
            os.pwrite(self._fd, data.ljust(RECORD_BYTES), 0)
        except OSError:
            return False
        return True

    def remove(self) -> None:
        """Close and delete the file (a clean stop)."""
        if self._fd is not None:
            os.close(self._fd)
            self._fd = None
        try:
            self.path.unlink()
        except OSError:
            pass


def _read(path: Path) -> dict[str, Any] | None:
    try:
        text = path.read_bytes().decode("utf-8", "replace").strip()
        rec = json.loads(text)
    except (OSError, ValueError):
        return None
    return rec if isinstance(rec, dict) else None


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except (PermissionError, OverflowError):
        return True
    return True


def _gone(rec: dict[str, Any]) -> bool:
    """A record of a process on this host that no longer exists."""
    pid = rec.get("pid")
    return (rec.get("host") == socket.gethostname() and isinstance(pid, int)
            and not _pid_alive(pid))


def worker_file(settings: Settings) -> StatusFile:
    """This process's worker status file."""
    return StatusFile(status_dir(settings) /
                      f"worker-{socket.gethostname()}-{os.getpid()}.json")


def supervisor_file(settings: Settings) -> StatusFile:
    """This process's (the server's) supervisor status file."""
    return StatusFile(status_dir(settings) /
                      f"supervisor-{socket.gethostname()}-{os.getpid()}.json")


def remove_dead(settings: Settings) -> int:
    """Delete status files of processes on this host that are gone; returns how many."""
    n = 0
    folder = status_dir(settings)
    if not folder.is_dir():
        return 0
    for path in folder.glob("*.json"):
        rec = _read(path)
        if rec is not None and _gone(rec):
            path.unlink(missing_ok=True)
            n += 1
    return n


def classify(exc: BaseException) -> tuple[str, str]:
    """(reason code, sentence) for an error that stops the queue.

    A full disk reaches the worker either as ``OSError(ENOSPC)`` from the
    store or as SQLite's "database or disk is full".
    """
    text = f"{exc}".lower()
    if (isinstance(exc, OSError) and exc.errno in _STORAGE_ERRNOS) or "disk is full" in text \
            or "no space left" in text:
        return ("storage_full", "The disk of the data folder or the database is full: no "
                "analysis can start until space is freed (an administrator can remove old "
                "files or move the data folder).")
    if (isinstance(exc, OSError) and exc.errno == errno.EROFS) or "readonly" in text \
            or "read-only" in text:
        return ("read_only", "The data folder or the database is read-only: no analysis can "
                "start until it is writable again.")
    if "locked" in text or "busy" in text:
        return ("database_busy", "The database stays locked by another program: analyses "
                "wait until it is released.")
    return ("queue_error", f"The worker cannot reach the database or the store "
            f"({type(exc).__name__}); it keeps retrying.")


@dataclass
class QueueHealth:
    """What the pages and the API say about the queue.

    ``stalled`` is true when jobs wait and no worker is serving them;
    ``reason`` is a stable snake_case code, ``message`` a sentence for people.
    """

    pending: int
    stalled: bool = False
    reason: str | None = None
    message: str = ""
    since: str | None = None
    details: dict[str, Any] = field(default_factory=dict)

    def to_json(self) -> dict[str, Any]:
        return {"pending": self.pending, "stalled": self.stalled, "reason": self.reason,
                "message": self.message, "since": self.since}

    @property
    def key(self) -> tuple:
        """A value that changes when what a page shows about the queue changes."""
        return (self.stalled, self.reason, self.since)


def _utc(ts: float | None) -> str | None:
    if ts is None:
        return None
    return datetime.fromtimestamp(ts, timezone.utc).replace(tzinfo=None).isoformat(
        timespec="seconds") + "Z"


def _clock(ts: float) -> str:
    return datetime.fromtimestamp(ts, timezone.utc).strftime("%H:%M:%S UTC")


def _exit_words(code: Any) -> str:
    if isinstance(code, int) and code < 0:
        import signal

        try:
            name = signal.Signals(-code).name
        except ValueError:
            name = f"signal {-code}"
        return f"was killed ({name})"
    if code == 0:
        return "exited"
    return f"crashed (exit code {code})"


def queue_health(settings: Settings, session: Session, *,
                 now: float | None = None) -> QueueHealth:
    """Read the status files and the job counts: is the queue moving?

    Rules, first match wins, and only when jobs are queued or running:
    a worker with a heartbeat younger than its lease and no trouble -> moving;
    the supervisor restarting a worker that died -> ``worker_restarting``;
    a live worker reporting trouble -> its reason (``storage_full``, ...);
    a worker whose heartbeat is older than its lease -> ``no_heartbeat``;
    no worker ever reported -> ``no_worker``.
    """
    now = time.time() if now is None else now
    pending = int(session.scalar(select(func.count(Job.id)).where(
        Job.state.in_(("queued", "running")))) or 0)
    health = QueueHealth(pending=pending)
    if pending == 0:
        return health
    workers: list[dict[str, Any]] = []
    supervisors: list[dict[str, Any]] = []
    folder = status_dir(settings)
    if folder.is_dir():
        for path in folder.glob("*.json"):
            rec = _read(path)
            if rec is None or _gone(rec):
                continue
            (supervisors if path.name.startswith("supervisor-") else workers).append(rec)
    fresh = [w for w in workers
             if now - float(w.get("heartbeat_at", 0)) <= float(w.get("lease", 30))]
    if any(w.get("state") == "ok" for w in fresh):
        return health
    latest_beat = max((float(w.get("heartbeat_at", 0)) for w in workers), default=0.0)
    for sup in supervisors:
        exit_info = sup.get("last_exit") or {}
        if sup.get("state") == "waiting":
            return _stalled(health, "worker_restarting",
                            f"The analysis worker {_exit_words(exit_info.get('code'))} at "
                            f"{_clock(exit_info.get('at', now))}; the server starts it again "
                            f"(restart {sup.get('restarts', 0) + 1}). Queued analyses wait "
                            "until it runs.", exit_info.get("at"))
        started = float(sup.get("started_at", 0))
        if exit_info and started > latest_beat:
            return _stalled(health, "worker_restarting",
                            f"The analysis worker {_exit_words(exit_info.get('code'))} at "
                            f"{_clock(exit_info.get('at', now))} and was started again at "
                            f"{_clock(started)}; queued analyses wait until it reports.",
                            exit_info.get("at"))
        if started > latest_beat and now - started <= float(sup.get("lease", 30)):
            return health  # a worker just started and has not reported yet
    troubled = [w for w in fresh if w.get("state") == "stalled"]
    if troubled:
        w = troubled[0]
        return _stalled(health, str(w.get("reason") or "queue_error"),
                        str(w.get("message") or ""), w.get("since"))
    if workers:
        lease = max(float(w.get("lease", 30)) for w in workers)
        return _stalled(health, "no_heartbeat",
                        f"No heartbeat from the analysis worker since {_clock(latest_beat)}, "
                        f"longer than its lease of {lease:.0f} s: it may be hung or stopped. "
                        "An administrator can restart the server or run `rawproof worker`.",
                        latest_beat)
    for sup in supervisors:
        started = float(sup.get("started_at", 0))
        return _stalled(health, "no_heartbeat",
                        f"The analysis worker started at {_clock(started)} has not reported "
                        f"for longer than its lease of {float(sup.get('lease', 30)):.0f} s.",
                        started)
    return _stalled(health, "no_worker",
                    "No analysis worker is running for this data folder: start one with "
                    "`rawproof worker`, or run `rawproof serve` without --no-worker.", None)


def _stalled(health: QueueHealth, reason: str, message: str, since: Any) -> QueueHealth:
    health.stalled = True
    health.reason = reason
    health.message = message
    health.since = _utc(float(since)) if isinstance(since, (int, float)) else (
        since if isinstance(since, str) else None)
    return health
