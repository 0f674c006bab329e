"""The analysis worker as separate processes against a real server and SQLite file.

What is checked against what: a worker killed with SIGKILL mid-job (POSIX
signal semantics: no clean-up runs) leaves a lease that expires, and a second
worker finishes the job with exactly one stored report; a corrupt file gives
a failed job with the reader's message while the server keeps serving; a
re-analysis keeps the old report in history. The stored per-file progress
must count one step per analyser that the report lists.
"""

from __future__ import annotations

import os
import signal
import time

import numpy as np
import pytest

from app.store.files import previews_file
from app.worker import GATE_ENV
from tests.server_harness import running_server, start_worker, stop_process_group, zero_filled_npy

pytestmark = pytest.mark.server

PW = {"uma": "uma-password-1", "rei": "rei-password-1"}


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    with running_server(tmp_path_factory.mktemp("worker"), worker=False) as srv:
        srv.add_users(PW)
        yield srv


@pytest.fixture(scope="module")
def uma(server):
    return server.login("uma", PW["uma"])


def _job(member, ds: int) -> dict:
    return member.get(f"/api/datasets/{ds}").json()["job"]


def _wait_until_running(member, ds: int, proc, log) -> None:  # noqa: ANN001
    """Poll until the gated worker ``proc`` has claimed the dataset's job."""
    deadline = time.monotonic() + 90
    while _job(member, ds)["state"] != "running":
        assert proc.poll() is None, log.read_text()
        assert time.monotonic() < deadline, "the worker never claimed the job"
        time.sleep(0.1)


def test_killed_worker_job_is_finished_by_the_next_with_one_report(server, uma) -> None:
    ds = uma.upload_files("Kill test", [("scan.npy", zero_filled_npy(71))])["dataset_id"]
    gate = server.data_dir / "gate-never-opens"
    first = start_worker(server.data_dir, "--lease-seconds", "2", env={GATE_ENV: str(gate)},
                         log_name="worker1.log")
    second = None
    try:
        _wait_until_running(uma, ds, first, server.data_dir / "worker1.log")
        os.killpg(first.pid, signal.SIGKILL)
        first.wait(timeout=10)
        assert _job(uma, ds)["state"] == "running"  # the dead worker's lease is still there
        second = start_worker(server.data_dir, "--lease-seconds", "2", log_name="worker2.log")
        job = uma.wait_for_job(ds, timeout=150)
    finally:
        stop_process_group(first, signal.SIGKILL)
        if second is not None:
            stop_process_group(second)
    assert job["state"] == "done", job
    assert job["attempts"] == 2
    reports = uma.get(f"/api/datasets/{ds}/reports").json()["reports"]
    assert len(reports) == 1 and reports[0]["id"] == job["report_id"]
    report = uma.get(f"/api/datasets/{ds}/report").json()
    assert report["schema"] == "rawproof.report/1"
    assert report["input"]["path"] == "scan.npy"  # not the worker's temporary folder
    # per-file progress: one step per analyser in the report
    files = job["progress"]["files"]
    assert [f["name"] for f in files] == ["scan"]
    assert files[0]["done"] == files[0]["total"] == len(report["traces"])


def test_stopped_worker_hands_its_job_back_at_once(server, uma) -> None:
    """SIGTERM (a clean stop) releases the claimed job instead of leaving its lease to expire.

    The attempt is handed back too (attempts 0): a clean stop is the operator's
    doing, not the job's, and three restarts during one analysis must not leave
    the job failed (issue 21, finding 14). Only a crash or an expired lease
    spends an attempt.
    """
    ds = uma.upload_files("Stop test", [("scan.npy", zero_filled_npy(74))])["dataset_id"]
    gate = server.data_dir / "gate-never-opens"
    proc = start_worker(server.data_dir, "--lease-seconds", "600", env={GATE_ENV: str(gate)},
                        log_name="worker-stop.log")
    try:
        _wait_until_running(uma, ds, proc, server.data_dir / "worker-stop.log")
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(timeout=30) == 0
    finally:
        stop_process_group(proc, signal.SIGKILL)
    job = _job(uma, ds)
    assert (job["state"], job["attempts"]) == ("queued", 0)


@pytest.fixture(scope="module")
def worker(server):
    proc = start_worker(server.data_dir, "--lease-seconds", "5", log_name="worker3.log")
    yield proc
    stop_process_group(proc)


def test_corrupt_file_fails_with_a_readable_error_and_the_server_keeps_serving(
        server, uma, worker) -> None:
    ds = uma.upload_files("Corrupt set", [("broken.npy", b"\x93NUMPY garbage, truncated")]
                          )["dataset_id"]
    job = uma.wait_for_job(ds)
    assert job["state"] == "failed"
    assert "broken.npy" in job["error"] and "Traceback" not in job["error"]
    assert str(server.data_dir) not in job["error"]  # no server paths, the file's own name
    page = uma.get(f"/datasets/{ds}")
    assert page.status_code == 200
    assert "The analysis failed" in page.text and "broken.npy" in page.text
    assert uma.get("/").status_code == 200
    assert server.client().get("/healthz").text == "ok"
    registry = uma.get("/").text
    assert "analysis failed" in registry
    # The worker is still alive and analyses the next dataset.
    good = uma.upload_files("Good after bad", [("scan.npy", zero_filled_npy(72))])["dataset_id"]
    assert uma.wait_for_job(good)["state"] == "done"
    assert worker.poll() is None


def test_reanalysis_keeps_the_old_report_in_history(server, uma, worker) -> None:
    ds = uma.upload_files("Twice analysed", [("scan.npy", zero_filled_npy(73))])["dataset_id"]
    first = uma.wait_for_job(ds)
    assert first["state"] == "done"
    r = uma.post_form(f"/datasets/{ds}/reanalyse", {})
    assert r.status_code == 303
    second = uma.wait_for_job(ds)
    assert second["state"] == "done" and second["id"] != first["id"]
    reports = uma.get(f"/api/datasets/{ds}/reports").json()["reports"]
    assert [rep["id"] for rep in reports] == [second["report_id"], first["report_id"]]
    old = uma.get(f"/datasets/{ds}/reports/{first['report_id']}").text
    assert "not the latest" in old
    assert f"/datasets/{ds}/reports/{first['report_id']}.json" in uma.get(f"/datasets/{ds}").text
    # previews of the slice viewer are stored beside each report, uint8 stacks per group
    from app.config import Settings

    settings = Settings(data_dir=server.data_dir)
    with np.load(previews_file(settings, second["report_id"])) as npz:
        assert list(npz["groups"]) == ["scan"]
        images = npz["g0_images"]
        assert images.dtype == np.uint8 and images.ndim == 3
        assert len(npz["g0_indices"]) == images.shape[0] >= 1
