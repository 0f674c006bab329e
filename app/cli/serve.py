"""The ``serve`` and ``worker`` sub-commands of ``rawproof``.

    rawproof serve [--host 127.0.0.1] [--port 8000] [--data DIR] [--database-url URL]
                   [--workers N | --no-worker] [--max-upload-bytes N]
    rawproof worker [--data DIR] [--database-url URL] [--concurrency N] [--lease-seconds S]
"""

from __future__ import annotations

import argparse
import logging
import os
import signal
import subprocess
import sys
from typing import Any

from app.cli.common import (
    EXIT_OK,
    RAWPROOF_ARGV,
    Command,
    add_common,
    common_argv,
    migrate,
    settings_from,
)


def _add_serve(p: argparse.ArgumentParser) -> None:
    add_common(p)
    p.add_argument("--host", default="127.0.0.1", help="address to listen on (default 127.0.0.1)")
    p.add_argument("--port", type=int, default=8000, help="port (default 8000)")
    p.add_argument("--workers", type=int, default=1,
                   help="analysis jobs run at once by the worker started beside the server")
    p.add_argument("--no-worker", action="store_true", help="start no worker beside the server")
    p.add_argument("--processes", type=int, default=1,
                   help="web server processes (default 1); more serve concurrent readers "
                        "faster on a multi-core machine")
    p.add_argument("--lease-seconds", type=float, default=30.0, help="the worker's job lease")
    p.add_argument("--forwarded-allow-ips", default=None,
                   help="addresses of reverse proxies whose X-Forwarded-For/-Proto headers are "
                        "trusted (comma-separated); by default no forwarded header is trusted")


def _run_serve(args: Any) -> int:
    import uvicorn

    from app.web.app import create_app

    settings = settings_from(args)
    rc = migrate(settings)
    if rc is not None:
        return rc
    from app.store import files as filestore

    filestore.sweep_tmp(settings)  # what a killed server or worker left in tmp/
    filestore.remove_orphans(settings)  # stored files no database row refers to
    from app.store import queue_health

    queue_health.remove_dead(settings)  # status files of killed servers and workers
    supervisor = None
    if not args.no_worker:
        supervisor = WorkerSupervisor([
            *RAWPROOF_ARGV, "worker", *common_argv(settings),
            "--concurrency", str(max(1, args.workers)), "--lease-seconds",
            str(args.lease_seconds), "--parent-pid", str(os.getpid()),
        ], settings, lease=args.lease_seconds)
        supervisor.start()
    server_options = _uvicorn_options(args)
    print(f"rawproof: serving {settings.data_dir} at http://{args.host}:{args.port}",
          file=sys.stderr, flush=True)
    try:
        if args.processes > 1:
            # each process builds its own app from the same settings, passed by the
            # environment that app.config.Settings reads
            os.environ.update({
                "RAWPROOF_DATA": str(settings.data_dir),
                "RAWPROOF_DATABASE_URL": settings.database_url,
                "RAWPROOF_MAX_UPLOAD_BYTES": str(settings.max_upload_bytes),
                "RAWPROOF_SECURE_COOKIES": "1" if settings.secure_cookies else "",
            })
            uvicorn.run("app.web.app:create_app", factory=True, workers=args.processes,
                        host=args.host, port=args.port, **server_options)
        else:
            uvicorn.run(create_app(settings), host=args.host, port=args.port, **server_options)
    finally:
        if supervisor is not None:
            supervisor.stop()
    return EXIT_OK


def _uvicorn_options(args: Any) -> dict[str, Any]:
    """uvicorn settings: forwarded headers only from named proxies, short idle timeouts.

    uvicorn trusts ``X-Forwarded-For`` from 127.0.0.1 unless told otherwise,
    which lets any local client choose the address the sign-in limit counts;
    here no forwarded header is trusted unless ``--forwarded-allow-ips`` names
    the proxies. Connections slow to send their headers are closed
    (:class:`app.web.limits.HeaderTimeoutH11Protocol`).
    """
    from app.web.limits import HeaderTimeoutH11Protocol

    trusted = args.forwarded_allow_ips
    return {
        "log_level": "warning", "access_log": False,
        "proxy_headers": bool(trusted), "forwarded_allow_ips": trusted or "",
        "timeout_keep_alive": 5, "http": HeaderTimeoutH11Protocol,
        "limit_concurrency": 1000,
    }


class WorkerSupervisor:
    """Runs the worker beside the server and starts it again when it dies.

    Back-off between restarts doubles from 1 s to :attr:`max_backoff` s and
    starts again at 1 s once a worker has run for a minute. A worker that
    exits cleanly is also restarted: only :meth:`stop` ends the supervision.
    The supervisor's status file (:mod:`app.store.queue_health`) says when the
    worker died and when it is started again, for the registry and dataset pages.
    """

    max_backoff = 30.0
    #: fault injection for tests: a restart waits until this file exists
    GATE_ENV = "RAWPROOF_RESTART_GATE"

    def __init__(self, argv: list[str], settings: Any = None, *, lease: float = 30.0) -> None:
        import threading

        self.argv = argv
        self.proc: subprocess.Popen | None = None
        self.restarts = 0
        self.lease = lease
        self._status = None
        if settings is not None:
            from app.store import queue_health

            self._status = queue_health.supervisor_file(settings)
        self._last_exit: dict[str, Any] | None = None
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._watch, name="worker-supervisor",
                                        daemon=True)

    def _record(self, state: str, **extra: Any) -> None:
        if self._status is None:
            return
        import socket
        import time

        self._status.write({
            "role": "supervisor", "host": socket.gethostname(), "pid": os.getpid(),
            "state": state, "lease": self.lease, "restarts": self.restarts,
            "worker_pid": self.proc.pid if self.proc else None,
            "last_exit": self._last_exit, "written_at": time.time(), **extra})

    def _spawn(self) -> None:
        import time

        self.proc = subprocess.Popen(self.argv)
        self._record("running", started_at=time.time())

    def start(self) -> None:
        self._spawn()
        self._thread.start()

    def _wait_for_gate(self) -> bool:
        from pathlib import Path

        gate = os.environ.get(self.GATE_ENV)
        while gate and not Path(gate).exists():
            if self._stop.wait(0.05):
                return False
        return True

    def _watch(self) -> None:
        import time

        backoff = 1.0
        while not self._stop.is_set():
            started = time.monotonic()
            proc = self.proc
            while proc is not None and proc.poll() is None:
                if self._stop.wait(0.5):
                    return
            if time.monotonic() - started > 60:
                backoff = 1.0
            code = proc.returncode if proc else None
            self._last_exit = {"code": code, "at": time.time()}
            self._record("waiting", next_start_at=time.time() + backoff)
            print(f"rawproof: the worker exited ({code if proc else '?'}); "
                  f"starting it again in {backoff:.0f} s", file=sys.stderr, flush=True)
            if self._stop.wait(backoff) or not self._wait_for_gate():
                return
            backoff = min(self.max_backoff, backoff * 2)
            self.restarts += 1
            self._spawn()
            if self._stop.is_set():
                self.proc.terminate()

    def stop(self) -> None:
        self._stop.set()
        proc = self.proc
        if proc is not None and proc.poll() is None:
            proc.send_signal(signal.SIGTERM)
            try:
                proc.wait(timeout=10)
            except subprocess.TimeoutExpired:
                proc.kill()
        if self._status is not None:
            self._status.remove()


def _add_worker(p: argparse.ArgumentParser) -> None:
    add_common(p)
    p.add_argument("--concurrency", type=int, default=1, help="jobs analysed at once")
    p.add_argument("--lease-seconds", type=float, default=30.0,
                   help="seconds a claimed job stays ours without a heartbeat")
    p.add_argument("--poll-seconds", type=float, default=1.0, help="queue polling interval")
    p.add_argument("--parent-pid", type=int, help="stop when this process is gone")
    p.add_argument("--once", action="store_true", help="run the queued jobs, then stop")


def _run_worker(args: Any) -> int:
    from app.worker import Worker

    logging.basicConfig(level=logging.WARNING, format="rawproof worker: %(message)s")
    logging.getLogger("rawproof").setLevel(logging.INFO)
    settings = settings_from(args)
    rc = migrate(settings)
    if rc is not None:
        return rc
    if args.once:
        from app.worker import run_inline

        run_inline(settings)
        return EXIT_OK
    worker = Worker(settings, concurrency=args.concurrency, lease=args.lease_seconds,
                    poll=args.poll_seconds, parent_pid=args.parent_pid)

    def _stop(_sig, _frm) -> None:  # noqa: ANN001
        worker.stop.set()

    signal.signal(signal.SIGTERM, _stop)
    signal.signal(signal.SIGINT, _stop)
    worker.run()
    return EXIT_OK


SERVE = Command("serve", "the lab web app (with a worker beside it)", _add_serve, _run_serve)
WORKER = Command("worker", "the analysis worker: claims queued jobs and runs them",
                 _add_worker, _run_worker)


def _add_check(p: argparse.ArgumentParser) -> None:
    add_common(p)
    p.add_argument("--grace-seconds", type=float, default=None,
                   help="leave stored files younger than this alone (default 900: an upload "
                        "may still be committing)")


def _run_check(args: Any) -> int:
    from app.store import files as filestore

    settings = settings_from(args)
    rc = migrate(settings)
    if rc is not None:
        return rc
    grace = filestore.ORPHAN_GRACE_SECONDS if args.grace_seconds is None else args.grace_seconds
    swept = filestore.sweep_tmp(settings)
    removed, freed = filestore.remove_orphans(settings, older_than=grace)
    print(f"rawproof check: removed {removed} stored file(s) no dataset refers to "
          f"({freed} bytes) and {swept} leftover temporary item(s).")
    return EXIT_OK


CHECK = Command("check", "remove stored files no dataset refers to and leftover temporary files",
                _add_check, _run_check)
