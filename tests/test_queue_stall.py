"""A stalled queue says so, and why (issue 21, finding 3, last part).

What is checked against what: the worker's and the server's supervisor's
status files (app.store.queue_health) read back into the reason the pages and
the API show; on a real server on 127.0.0.1 (tests/server_harness.py), a
worker stopped with SIGSTOP shows "no heartbeat" once its lease has passed
and recovers on SIGCONT, a worker killed with SIGKILL shows "restarting"
(POSIX signal semantics: no clean-up runs in the killed process) until the
supervisor's restart reports, and a data folder whose file system is full
(a tmpfs filled to ENOSPC, as in tests/test_hardening_high.py) shows "full"
until space is freed. Lease and heartbeat semantics are the project's own
(DESIGN.md: "worker claims the job (lease + heartbeat)").
"""

from __future__ import annotations

import dataclasses
import errno
import json
import os
import re
import signal
import sqlite3
import time
from pathlib import Path

import pytest

from app.config import Settings
from app.store import migrate, service
from app.store import queue_health as qh
from app.store.db import session_scope
from app.store.models import User
from app.worker import GATE_ENV
from tests.server_harness import running_server, zero_filled_npy

PASSWORD = "queue-stall-test-pass-7"
RESTART_GATE = "RAWPROOF_RESTART_GATE"


# ------------------------------------------------------------------ in-process rules

@pytest.fixture
def settings(tmp_path: Path) -> Settings:
    s = dataclasses.replace(Settings(), data_dir=tmp_path / "data", database_url="")
    migrate.upgrade(s)
    with session_scope(s) as db:
        uma = service.create_user(db, "uma", PASSWORD)
        service.create_dataset(db, s, uploader=db.get(User, uma.id), name="Set",
                               source="https://data.example.org/x", licence="CC BY 4.0",
                               description="", intended_use="",
                               files=[("scan.npy", zero_filled_npy(5))])
    return s


def _health(settings: Settings, now: float) -> qh.QueueHealth:
    with session_scope(settings) as db:
        return qh.queue_health(settings, db, now=now)


def _write(settings: Settings, name: str, rec: dict) -> None:
    f = qh.StatusFile(qh.status_dir(settings) / name)
    assert f.write({"host": "another-host", "pid": 1, **rec})


def test_status_rules_give_each_reason(settings: Settings) -> None:
    """One queued job; each status-file state gives the documented reason.
    Truth built: the records written; times relative to a fixed ``now``."""
    now = 1_900_000_000.0
    assert _health(settings, now).reason == "no_worker"
    _write(settings, "worker-a.json", {"lease": 4, "heartbeat_at": now - 1, "state": "ok"})
    assert not _health(settings, now).stalled
    h = _health(settings, now + 10)  # 11 s without a beat, lease 4 s
    assert (h.stalled, h.reason, h.pending) == (True, "no_heartbeat", 1)
    assert "lease of 4 s" in h.message
    reason, message = qh.classify(OSError(errno.ENOSPC, "No space left on device"))
    _write(settings, "worker-a.json", {"lease": 4, "heartbeat_at": now, "state": "stalled",
                                       "reason": reason, "message": message,
                                       "since": now - 5})
    h = _health(settings, now)
    assert h.reason == "storage_full" and "full" in h.message and h.since.endswith("Z")
    _write(settings, "supervisor-s.json", {"state": "waiting", "lease": 4, "restarts": 0,
                                           "last_exit": {"code": -9, "at": now - 2}})
    h = _health(settings, now)
    assert h.reason == "worker_restarting" and "SIGKILL" in h.message


def test_sqlite_full_message_counts_as_storage_full() -> None:
    """SQLite's own SQLITE_FULL text (sqlite.org/rescode.html: "database or disk is full")."""
    assert qh.classify(sqlite3.OperationalError("database or disk is full"))[0] == "storage_full"
    assert qh.classify(OSError(errno.EROFS, "Read-only file system"))[0] == "read_only"


def test_status_record_is_rewritten_in_place(tmp_path: Path) -> None:
    """The file keeps one size (so a rewrite needs no new block on a full disk)."""
    f = qh.StatusFile(tmp_path / "s.json")
    assert f.open()
    f.write({"state": "ok", "message": "x" * 5000})
    f.write({"state": "stalled"})
    assert (tmp_path / "s.json").stat().st_size == qh.RECORD_BYTES
    assert json.loads((tmp_path / "s.json").read_text())["state"] == "stalled"


# ------------------------------------------------------------------ a real server

def _notice(html: str) -> tuple[bool, str, str]:
    """(shown, reason, text) of the queue notice on a page."""
    m = re.search(r'<section class="notice warn queue-stalled"[^>]*?data-reason="([^"]*)"'
                  r'([^>]*)>(.*?)</section>', html, re.S)
    assert m, "no queue notice on the page"
    return ("hidden" not in m.group(2), m.group(1), re.sub(r"\s+", " ", m.group(3)))


def _wait_for(member, ds: int, want, timeout: float = 30.0) -> dict:  # noqa: ANN001
    deadline = time.monotonic() + timeout
    while True:
        q = member.get(f"/datasets/{ds}/status").json()["queue"]
        if want(q):
            return q
        assert time.monotonic() < deadline, f"queue still {q}"
        time.sleep(0.2)


def _worker_pid(server_pid: int) -> int:
    from tests.test_hardening_high import worker_pid

    pid = worker_pid(server_pid)
    assert pid
    return pid


def _both_pages_say(member, ds: int, reason: str, words: str) -> None:  # noqa: ANN001
    for page in ("/", f"/datasets/{ds}"):
        shown, got, text = _notice(member.get(page).text)
        assert shown and got == reason, (page, got, text)
        assert words in text, (page, text)


@pytest.mark.server
def test_stopped_and_killed_worker_are_shown_then_recover(tmp_path: Path) -> None:
    gate, restart_gate = tmp_path / "gate", tmp_path / "restart-gate"
    with running_server(tmp_path / "data", extra_args=["--lease-seconds", "4"],
                        env={GATE_ENV: str(gate), RESTART_GATE: str(restart_gate)}) as srv:
        srv.add_user("ada", PASSWORD)
        ada = srv.login("ada", PASSWORD)
        ds = ada.upload_files("waits", [("a.npy", zero_filled_npy(11))])["dataset_id"]
        ada.wait_for_job(ds, states=("running",))  # claimed, held at the gate
        q = _wait_for(ada, ds, lambda q: q["pending"] == 1)
        assert not q["stalled"]
        assert not _notice(ada.get("/").text)[0]
        worker = _worker_pid(srv.proc.pid)

        os.kill(worker, signal.SIGSTOP)  # alive, but no heartbeat
        try:
            q = _wait_for(ada, ds, lambda q: q["stalled"])
            assert q["reason"] == "no_heartbeat", q
            _both_pages_say(ada, ds, "no_heartbeat", "No heartbeat from the analysis worker")
        finally:
            os.kill(worker, signal.SIGCONT)
        _wait_for(ada, ds, lambda q: not q["stalled"])
        assert not _notice(ada.get(f"/datasets/{ds}").text)[0]

        os.kill(worker, signal.SIGKILL)  # the supervisor restarts it after the restart gate
        q = _wait_for(ada, ds, lambda q: q["stalled"])
        assert q["reason"] == "worker_restarting", q
        _both_pages_say(ada, ds, "worker_restarting", "was killed (SIGKILL)")
        api = ada.get(f"/api/datasets/{ds}").json()["job"]["queue"]
        assert api["reason"] == "worker_restarting" and api["pending"] == 1

        restart_gate.touch()
        gate.touch()
        assert ada.wait_for_job(ds, timeout=60)["state"] == "done"
        assert _worker_pid(srv.proc.pid) != worker
        for page in ("/", f"/datasets/{ds}"):
            assert not _notice(ada.get(page).text)[0], page
        assert ada.get(f"/datasets/{ds}/status").json()["queue"]["stalled"] is False


@pytest.mark.server
def test_full_disk_is_shown_then_recovers(tmp_path: Path) -> None:
    from tests.test_hardening_high import fill, small_disk

    gate = tmp_path / "gate"
    with small_disk(tmp_path / "disk", 96) as disk, \
            running_server(disk / "data", extra_args=["--lease-seconds", "4"],
                           env={GATE_ENV: str(gate)}) as srv:
        srv.add_user("ada", PASSWORD)
        ada = srv.login("ada", PASSWORD)
        ds = ada.upload_files("full", [("a.npy", zero_filled_npy(12))])["dataset_id"]
        ada.wait_for_job(ds, states=("running",))
        filler = fill(disk)
        gate.touch()  # the worker meets the full disk
        try:
            q = _wait_for(ada, ds, lambda q: q["stalled"], timeout=60)
            assert q["reason"] == "storage_full", q
            _both_pages_say(ada, ds, "storage_full", "is full")
        finally:
            filler.unlink()
        assert ada.wait_for_job(ds, timeout=90)["state"] == "done"
        q = _wait_for(ada, ds, lambda q: not q["stalled"])
        assert q["pending"] == 0
        assert not _notice(ada.get("/").text)[0]
