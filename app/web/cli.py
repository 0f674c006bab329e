"""The ``serve``, ``worker`` and ``users`` sub-commands of ``rawproof``.

    rawproof serve [--host 127.0.0.1] [--port 8000] [--data DIR] [--database-url URL]
                   [--workers N | --no-worker] [--max-upload-bytes N]
    rawproof worker [--data DIR] [--database-url URL] [--concurrency N] [--lease-seconds S]
    rawproof users add NAME [--admin] [--password PW] [--display-name TEXT]
    rawproof users list | disable NAME | enable NAME | token NAME [--label L] [--revoke ID]
"""

from __future__ import annotations

import argparse
import dataclasses
import getpass
import logging
import os
import signal
import subprocess
import sys
from pathlib import Path
from typing import Any

from app.cli import COMMANDS, EXIT_BAD_INPUT, EXIT_OK
from app.config import Settings
from app.errors import RawproofError

log = logging.getLogger("rawproof")

# How to start this rawproof's command in a child process, whatever PATH says
# (``python -m app.cli`` would not see the sub-commands registered here).
RAWPROOF_ARGV = [sys.executable, "-c", "import sys; from app.cli import main; sys.exit(main())"]


def _add_common(p: argparse.ArgumentParser, *, nested: bool = False) -> None:
    # nested: repeated on a sub-command (`users add NAME --data DIR`) without
    # overriding a value given before it (`users --data DIR add NAME`)
    extra = {"default": argparse.SUPPRESS} if nested else {}
    p.add_argument("--data", help="data folder (default $RAWPROOF_DATA or ./rawproof-data)",
                   **extra)
    p.add_argument("--database-url", help="SQLAlchemy URL (default SQLite in the data folder)",
                   **extra)
    p.add_argument("--max-upload-bytes", type=int, help="upper bound on one upload", **extra)


def settings_from(args: Any) -> Settings:
    """Settings from the environment, overridden by the common flags."""
    base = Settings()
    changes: dict[str, Any] = {}
    if getattr(args, "data", None):
        changes["data_dir"] = Path(args.data).resolve()
    if getattr(args, "database_url", None):
        changes["database_url"] = args.database_url
    if getattr(args, "max_upload_bytes", None):
        changes["max_upload_bytes"] = int(args.max_upload_bytes)
    return dataclasses.replace(base, **changes)


def _common_argv(settings: Settings) -> list[str]:
    argv = ["--data", str(settings.data_dir), "--max-upload-bytes",
            str(settings.max_upload_bytes)]
    if settings.database_url:
        argv += ["--database-url", settings.database_url]
    return argv


def _migrate(settings: Settings) -> int | None:
    from app.store.migrate import upgrade

    try:
        upgrade(settings)
    except RawproofError as exc:
        print(f"rawproof: {getattr(exc, 'message', exc)}", file=sys.stderr)
        return EXIT_BAD_INPUT
    return None


# ----------------------------------------------------------------- serve

def _add_serve(p: argparse.ArgumentParser) -> None:
    _add_common(p)
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
    rc = _migrate(settings)
    if rc is not None:
        return rc
    from app.store import files as filestore

    filestore.sweep_tmp(settings)  # what a killed server or worker left in tmp/
    worker = None
    if not args.no_worker:
        worker = subprocess.Popen([
            *RAWPROOF_ARGV, "worker", *_common_argv(settings),
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


# ----------------------------------------------------------------- worker

def _add_worker(p: argparse.ArgumentParser) -> None:
    _add_common(p)
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
    rc = _migrate(settings)
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


# ----------------------------------------------------------------- users

def _add_users(p: argparse.ArgumentParser) -> None:
    _add_common(p)
    sub = p.add_subparsers(dest="users_command", required=True)
    add = sub.add_parser("add", help="create an account")
    add.add_argument("name")
    add.add_argument("--admin", action="store_true", help="a lab admin (manages accounts)")
    add.add_argument("--password", help="for scripts; prompted when left out")
    add.add_argument("--display-name", default="")
    sub.add_parser("list", help="list accounts")
    for verb in ("disable", "enable"):
        sp = sub.add_parser(verb, help=f"{verb} an account")
        sp.add_argument("name")
    tok = sub.add_parser("token", help="create (or revoke) an API token for scripts")
    tok.add_argument("name")
    tok.add_argument("--label", default="")
    tok.add_argument("--revoke", type=int, metavar="ID", help="revoke token ID instead")
    for sp in sub.choices.values():
        _add_common(sp, nested=True)


def _run_users(args: Any) -> int:
    from app.store import service
    from app.store.db import session_scope
    from app.store.errors import StoreError
    from app.store.models import User

    settings = settings_from(args)
    rc = _migrate(settings)
    if rc is not None:
        return rc
    try:
        with session_scope(settings) as db:
            cmd = args.users_command
            if cmd == "add":
                password = args.password
                if password is None:
                    password = getpass.getpass(f"Password for {args.name}: ")
                    if getpass.getpass("Again: ") != password:
                        print("rawproof: the passwords differ", file=sys.stderr)
                        return EXIT_BAD_INPUT
                user = service.create_user(db, args.name, password, admin=args.admin,
                                           display_name=args.display_name)
                print(f"created {'admin ' if user.is_admin else ''}account {user.name}")
            elif cmd == "list":
                for u in db.query(User).order_by(User.name):
                    flags = ",".join(f for f, on in (("admin", u.is_admin),
                                                     ("disabled", not u.is_active)) if on)
                    print(f"{u.name:<24}{u.display_name:<32}{flags}")
            elif cmd in ("disable", "enable"):
                service.set_active(db, service.get_user(db, args.name), cmd == "enable",
                                   actor=None)
                print(f"{cmd}d {args.name}")
            elif cmd == "token":
                user = service.get_user(db, args.name)
                if args.revoke is not None:
                    service.revoke_api_token(db, user, args.revoke, actor=user)
                    print(f"revoked token {args.revoke}")
                else:
                    row, token = service.create_api_token(db, user, args.label)
                    print(token)
                    print(f"token id {row.id}; shown once, keep it secret", file=sys.stderr)
    except StoreError as exc:
        print(f"rawproof: {exc.message}", file=sys.stderr)
        return EXIT_BAD_INPUT
    return EXIT_OK


COMMANDS["serve"] = (_add_serve, _run_serve)
COMMANDS["worker"] = (_add_worker, _run_worker)
COMMANDS["users"] = (_add_users, _run_users)
