"""The store layer in-process: schema, file store, decisions, job leases, inline analysis.

Outside references: Alembic's ``compare_metadata`` (the migration must build
exactly the models' schema), Python's ``hashlib.sha256`` (content addresses),
SQLite's documented pragmas (``journal_mode``, ``busy_timeout``), and
:func:`app.analysis.analyse_path` (the headless report the stored one
must equal).
"""

from __future__ import annotations

import dataclasses
import hashlib
import subprocess
from datetime import timedelta
from pathlib import Path

import pytest
from alembic.autogenerate import compare_metadata
from alembic.runtime.migration import MigrationContext
from alembic.script import ScriptDirectory
from sqlalchemy import text

from app.config import Settings
from app.store import files as filestore
from app.store import jobs as jobq
from app.store import migrate, service
from app.store.db import database, session_scope
from app.store.errors import DecisionConflictError, SchemaError, SelfDecisionError
from app.store.models import Base, Job, Report, User, utcnow
from app.store.registry import filter_rows, registry_rows
from app.worker import run_inline
from tests.server_harness import RAWPROOF, REPO, zero_filled_npy


@pytest.fixture
def settings(tmp_path: Path) -> Settings:
    s = dataclasses.replace(Settings(), data_dir=tmp_path / "data", database_url="")
    migrate.upgrade(s)
    return s


def _people(settings: Settings) -> tuple[int, int, int]:
    with session_scope(settings) as db:
        a = service.create_user(db, "uma", "uploader-pw-1")
        b = service.create_user(db, "rei", "reviewer-pw-1")
        c = service.create_user(db, "kit", "reviewer-pw-2")
        return a.id, b.id, c.id


def _dataset(settings: Settings, uploader_id: int, content: bytes, name: str = "Set") -> int:
    with session_scope(settings) as db:
        user = db.get(User, uploader_id)
        ds = service.create_dataset(
            db, settings, uploader=user, name=name, source="https://data.example.org/x",
            licence="CC BY 4.0", description="", intended_use="", files=[("scan.npy", content)])
        return ds.id


def test_migration_builds_exactly_the_models_schema(settings: Settings) -> None:
    """Alembic's autogenerate comparison finds no difference after ``upgrade head``."""
    with database(settings).engine.connect() as conn:
        diff = compare_metadata(MigrationContext.configure(conn), Base.metadata)
    assert diff == []
    head = ScriptDirectory.from_config(migrate.alembic_config(settings)).get_current_head()
    assert migrate.current_revision(settings) == head


def test_sqlite_runs_in_wal_mode_with_busy_timeout(settings: Settings) -> None:
    """SQLite pragmas (sqlite.org/pragma.html): WAL journal, 30 s busy timeout, foreign keys."""
    with database(settings).engine.connect() as conn:
        assert conn.exec_driver_sql("PRAGMA journal_mode").scalar() == "wal"
        assert conn.exec_driver_sql("PRAGMA busy_timeout").scalar() == 30000
        assert conn.exec_driver_sql("PRAGMA foreign_keys").scalar() == 1


@pytest.mark.server
def test_newer_schema_refuses_to_start(settings: Settings) -> None:
    """A database stamped with a revision this code does not know is refused, clearly."""
    with database(settings).engine.begin() as conn:
        conn.execute(text("UPDATE alembic_version SET version_num = '9999_future'"))
    with pytest.raises(SchemaError, match="newer than this rawproof"):
        migrate.upgrade(settings)
    res = subprocess.run([*RAWPROOF, "serve", "--data", str(settings.data_dir), "--no-worker"],
                         capture_output=True, text=True, timeout=60, cwd=REPO)
    assert res.returncode == 2
    assert "9999_future" in res.stderr and "Upgrade rawproof" in res.stderr
    assert "Traceback" not in res.stderr


@pytest.mark.parametrize(("given", "safe"), [
    ("../../etc/passwd", "etc/passwd"),
    ("C:\\Users\\lab\\scan.dcm", "Users/lab/scan.dcm"),
    ("/abs/series/IM0001", "abs/series/IM0001"),
    ("series/./a/../IM2.dcm", "series/a/IM2.dcm"),
    ("scan\x00<>.npy", "scan.npy"),
    ("..", "file"),
    ("", "file"),
])
def test_relative_names_are_sanitised(given: str, safe: str) -> None:
    """No uploaded name can leave the job folder or carry control characters."""
    assert filestore.sanitise_relative_name(given) == safe


def test_files_are_stored_once_by_sha256(settings: Settings) -> None:
    """The content address is hashlib's sha256 of the bytes; a second copy adds nothing."""
    data = b"rawproof content-addressed store\n" * 100
    first = filestore.store_bytes(settings, data)
    second = filestore.store_bytes(settings, data)
    sha = hashlib.sha256(data).hexdigest()
    assert first.sha256 == second.sha256 == sha
    assert (first.created, second.created) == (True, False)
    assert first.path == settings.data_dir / "store" / sha[:2] / sha
    assert first.path.read_bytes() == data
    assert list((settings.data_dir / "tmp").iterdir()) == []


def test_decisions_keep_history_and_refuse_self_and_stale(settings: Settings) -> None:
    """Uploader cannot decide; a stale expected id is a conflict; history is never rewritten."""
    uma, rei, kit = _people(settings)
    ds_id = _dataset(settings, uma, zero_filled_npy(11))
    with session_scope(settings) as db:
        ds = service.get_dataset(db, ds_id)
        with pytest.raises(SelfDecisionError):
            service.record_decision(db, dataset=ds, reviewer=db.get(User, uma),
                                    outcome="rejected", rationale="mine", expected_current_id=0)
        first = service.record_decision(db, dataset=ds, reviewer=db.get(User, rei),
                                        outcome="downstream_only", rationale="zero-filled 2x",
                                        expected_current_id=0)
        first_id = first.id
    with session_scope(settings) as db:
        ds = service.get_dataset(db, ds_id)
        with pytest.raises(DecisionConflictError) as info:
            service.record_decision(db, dataset=ds, reviewer=db.get(User, kit),
                                    outcome="rejected", rationale="saw nothing",
                                    expected_current_id=0)
        assert info.value.current.id == first_id
        second = service.record_decision(db, dataset=ds, reviewer=db.get(User, kit),
                                         outcome="rejected", rationale="magnitude only",
                                         expected_current_id=first_id)
        second_id = second.id
    with session_scope(settings, write=False) as db:
        history = service.list_decisions(db, ds_id)
        assert [d.id for d in history] == [second_id, first_id]
        assert history[0].previous_id == first_id and history[1].previous_id is None
        assert service.get_dataset(db, ds_id).current_decision_id == second_id
        assert [d.outcome for d in history] == ["rejected", "downstream_only"]


def test_expired_lease_is_taken_over_and_stored_once(settings: Settings) -> None:
    """A dead worker's lease expires; the next worker claims; the dead one cannot store."""
    uma, _, _ = _people(settings)
    ds_id = _dataset(settings, uma, zero_filled_npy(12))
    with session_scope(settings) as db:
        job = jobq.claim_job(db, "worker-a", lease=60)
        job_id = job.id
        assert job.attempts == 1
    with session_scope(settings) as db:
        assert jobq.claim_job(db, "worker-b", lease=60) is None  # lease still live
        # worker-a dies: no heartbeat; its lease runs out.
        db.get(Job, job_id).lease_expires_at = utcnow() - timedelta(seconds=1)
    with session_scope(settings) as db:
        taken = jobq.claim_job(db, "worker-b", lease=60)
        assert (taken.id, taken.attempts, taken.lease_owner) == (job_id, 2, "worker-b")
    report = {"tool_version": "t", "verdict": "inconclusive", "traces": {}}
    with session_scope(settings) as db:
        assert jobq.heartbeat(db, job_id, "worker-a", lease=60) is False
        assert jobq.finish_job(db, job_id, "worker-a", report) is None
        assert jobq.finish_job(db, job_id, "worker-b", report) is not None
    with session_scope(settings, write=False) as db:
        assert db.query(Report).filter(Report.dataset_id == ds_id).count() == 1
        assert db.get(Job, job_id).state == "done"


def test_third_lost_attempt_fails_the_job(settings: Settings) -> None:
    """After three claims that never finished, the job is failed with its reason."""
    uma, _, _ = _people(settings)
    _dataset(settings, uma, zero_filled_npy(13))
    for attempt in (1, 2, 3):
        with session_scope(settings) as db:
            job = jobq.claim_job(db, f"w{attempt}", lease=60)
            assert job.attempts == attempt
            job.lease_expires_at = utcnow() - timedelta(seconds=1)
    with session_scope(settings) as db:
        assert jobq.claim_job(db, "w4", lease=60) is None
        failed = db.query(Job).one()
        assert failed.state == "failed"
        assert "Gave up after 3 attempts" in failed.error


def test_inline_run_stores_the_headless_report(settings: Settings, tmp_path: Path) -> None:
    """The stored report's traces equal ``analyse_path`` on the same bytes (same numbers)."""
    from app.analysis import analyse_path

    uma, _, _ = _people(settings)
    content = zero_filled_npy(14)
    ds_id = _dataset(settings, uma, content)
    assert run_inline(settings) == 1
    direct_path = tmp_path / "scan.npy"
    direct_path.write_bytes(content)
    direct = analyse_path(str(direct_path))
    with session_scope(settings, write=False) as db:
        row = service.get_current_report(db, ds_id)
        stored = row.data
        assert stored["traces"] == direct["traces"]
        assert stored["verdict"] == direct["verdict"] == row.verdict
        assert row.analyser_versions == direct["analyser_versions"]
        assert row.trace_status == {t: v["status"] for t, v in direct["traces"].items()}


def test_unreadable_file_fails_at_once_with_the_readers_message(settings: Settings) -> None:
    """Bad input is not retried: the job fails on its first attempt with a readable reason."""
    uma, _, _ = _people(settings)
    _dataset(settings, uma, b"this is not a NumPy file")
    run_inline(settings)
    with session_scope(settings, write=False) as db:
        job = db.query(Job).one()
        assert (job.state, job.attempts) == ("failed", 1)
        assert "scan.npy" in job.error and "Traceback" not in job.error


def test_registry_search_filter_and_sort(settings: Settings) -> None:
    """Text search needs every word; decision and uploader filters; sorting by name."""
    uma, rei, _ = _people(settings)
    a = _dataset(settings, uma, zero_filled_npy(15), name="Knee archive")
    b = _dataset(settings, rei, zero_filled_npy(16), name="Brain scans")
    with session_scope(settings) as db:
        service.record_decision(db, dataset=service.get_dataset(db, a),
                                reviewer=db.get(User, rei), outcome="rejected",
                                rationale="8-bit")
    with session_scope(settings, write=False) as db:
        rows = registry_rows(db)
    assert [r.id for r in filter_rows(rows, q="knee ARCHIVE")] == [a]
    assert [r.id for r in filter_rows(rows, q="knee brain")] == []
    assert [r.id for r in filter_rows(rows, decision="rejected")] == [a]
    assert [r.id for r in filter_rows(rows, decision="none")] == [b]
    assert [r.id for r in filter_rows(rows, uploader="rei")] == [b]
    assert [r.id for r in filter_rows(rows, sort="name", descending=False)] == [b, a]


def test_a_cleanly_stopped_worker_hands_its_job_back(settings: Settings) -> None:
    """Released at stop: claimable at once by another worker, and the clean stop does
    not spend the job's attempt (issue 21, finding 14: three restarts used to leave a
    job failed), so the next claim is its first attempt again."""
    uma, _, _ = _people(settings)
    _dataset(settings, uma, zero_filled_npy(17))
    with session_scope(settings) as db:
        job_id = jobq.claim_job(db, "stopping", lease=600).id
    with session_scope(settings) as db:
        assert jobq.release_job(db, job_id, "someone-else") is False
        assert jobq.release_job(db, job_id, "stopping") is True
    with session_scope(settings) as db:
        again = jobq.claim_job(db, "next", lease=600)
        assert (again.id, again.attempts) == (job_id, 1)


def test_sweep_removes_only_stale_uploads_and_job_folders(settings: Settings) -> None:
    """What a killed server or worker leaves in tmp/ (an upload's .part file, a job's
    work folder) goes once untouched for STALE_TMP_SECONDS; live ones and anything
    else stay (common practice, no source: age-based cleanup of spool folders)."""
    import os
    import time

    tmp = filestore.tmp_dir(settings)
    old = time.time() - filestore.STALE_TMP_SECONDS - 60
    stale_part = tmp / "upload-0a.part"
    live_part = tmp / "upload-0b.part"
    stale_job = tmp / "job-7-x1"
    live_job = tmp / "job-8-x2"
    other = tmp / "notes.txt"
    for f in (stale_part, live_part, other):
        f.write_bytes(b"x")
    for d in (stale_job, live_job):
        (d / "files").mkdir(parents=True)
        (d / "files" / "scan.npy").write_bytes(b"y")
    for path in (stale_part, other, stale_job, stale_job / "files",
                 stale_job / "files" / "scan.npy", live_job, live_job / "files"):
        os.utime(path, (old, old))
    # live_job's progress file was just written: the folder is in use
    assert filestore.sweep_tmp(settings) == 2
    assert not stale_part.exists() and not stale_job.exists()
    assert live_part.exists() and live_job.exists() and other.exists()
