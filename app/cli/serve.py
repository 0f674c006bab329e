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


def _run_serve(args: Any) -> int:
    import uvicorn

    from app.web.app import create_app

    settings = settings_from(args)
    rc = migrate(settings)
    if rc is not None:
        return rc
    from app.store import files as filestore

    filestore.sweep_tmp(settings)  # what a killed server or worker left in tmp/
    worker = None
    if not args.no_worker:
        worker = subprocess.Popen([
            *RAWPROOF_ARGV, "worker", *common_argv(settings),
            "--concurrency", str(max(1, args.workers)), "--lease-seconds",
            str(args.lease_seconds), "--parent-pid", str(os.getpid()),
        ])
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
                        host=args.host, port=args.port, log_level="warning", access_log=False)
        else:
            uvicorn.run(create_app(settings), host=args.host, port=args.port,
                        log_level="warning", access_log=False)
    finally:
        if worker is not None and worker.poll() is None:
            worker.send_signal(signal.SIGTERM)
            try:
                worker.wait(timeout=10)
            except subprocess.TimeoutExpired:
                worker.kill()
    return EXIT_OK


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
