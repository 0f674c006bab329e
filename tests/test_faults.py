"""Faults injected into a real server, worker and SQLite file; afterwards nothing is lost.

What is checked against what:

- Workers killed with SIGKILL (POSIX: no clean-up runs; the whole process group,
  pool included) at seeded random moments after they claim a job, while reading,
  analysing or storing: every job ends ``done`` with exactly one report (the
  job's ``report_id``) or ``failed`` with a readable error, none is left queued
  or running.
- The server killed with SIGKILL in the middle of a streamed upload, then started
  again on the same folder: the upload was never accepted and left no dataset
  and nothing in the store; every stored file still matches its sha256 (hashlib,
  FIPS 180-4), accepted uploads are intact, the same file uploads afterwards.
- Another process holding SQLite's write lock (``BEGIN IMMEDIATE``; SQLite's
  documented locking, https://www.sqlite.org/lockingv3.html) while members
  comment and decide: every request waits for the busy timeout instead of
  failing, every comment and decision is stored exactly once.
- Write errors while storing: the server runs under a file-size ceiling
  (``RLIMIT_FSIZE``, POSIX setrlimit; the write fails with EFBIG as a full disk
  fails with ENOSPC): the upload is refused, leaves no partial file, and the
  server keeps serving.
- Hostile files (from the fuzzer's lies) uploaded for analysis: each job fails
  with a message naming the file, no traceback, the server keeps serving.
"""

from __future__ import annotations

import hashlib
import io
import os
import random
import signal
import sqlite3
import subprocess
import sys
import threading
import time
import zipfile
from pathlib import Path

import httpx
import numpy as np
import pytest

from app.config import Settings
from tests.server_harness import (
    REPO,
    Server,
    free_port,
    running_server,
    start_server,
    start_worker,
    stop_process_group,
    zero_filled_npy,
)

pytestmark = pytest.mark.server

PW = {"ada": "ada-password-1", "ben": "ben-password-1", "cy": "cy-password-1"}


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    with running_server(tmp_path_factory.mktemp("faults"), worker=False) as srv:
        srv.add_users(PW, admins=("ada",))
        yield srv


def _job(member, ds: int) -> dict | None:
    return member.get(f"/api/datasets/{ds}").json()["job"]


def _progress(data_dir: Path, job_id: int, since: float) -> tuple[int, int] | None:
    """(analysers done, analysers in all) from the progress file the analysis process of
    this attempt writes (``<data>/tmp/job-<id>-*/progress.jsonl``), or None before it starts."""
    import json

    dirs = [d for d in (data_dir / "tmp").glob(f"job-{job_id}-*")
            if d.is_dir() and d.stat().st_mtime >= since - 1.0]
    for d in sorted(dirs, key=lambda d: d.stat().st_mtime, reverse=True):
        try:
            lines = (d / "progress.jsonl").read_text().splitlines()
        except FileNotFoundError:
            continue
        total, done = 0, 0
        for line in lines:
            try:
                rec = json.loads(line)
            except ValueError:
                continue
            if "n_traces" in rec:
                total = int(rec["n_traces"])
            else:
                done += 1
        return done, total
    return None


def _phase(progress: tuple[int, int] | None) -> str:
    if progress is None:
        return "claimed, reading"
    done, total = progress
    return "analysers done, storing" if total and done >= total else f"analysing {done}/{total}"


def _verify_store(data_dir: Path) -> int:
    """Every blob in the store matches its name (its sha256); returns how many."""
    n = 0
    for blob in (data_dir / "store").rglob("*"):
        if blob.is_file():
            assert hashlib.sha256(blob.read_bytes()).hexdigest() == blob.name, blob
            n += 1
    return n


def _larger_npy(seed: int) -> bytes:
    """Truth (demo_data.synth.zero_filled_magnitude): 4 coils at 64 x 64 zero-filled 2x
    to 128 x 128, root-sum-of-squares, 3 slices, uint16: long enough to analyse that
    each phase of a job can be caught."""
    from demo_data import synth

    mag, _ = synth.zero_filled_magnitude((64, 64), (2.0, 2.0), n_coils=4, n_slices=3,
                                         seed=seed)
    buf = io.BytesIO()
    np.save(buf, np.round(mag / mag.max() * 4000).astype(np.uint16))
    return buf.getvalue()


def _wait_for_phase(member, data_dir: Path, ds_ids: list[int], target: str, worker,
                    log: Path, rng: random.Random, base: dict[int, int], since: float
                    ) -> tuple[int | None, str]:
    """Wait until a job claimed by this worker (more attempts than in ``base``) reaches
    ``target`` ("reading": just claimed, then a seeded random delay; "analysing": some
    analysers done; "late": the last third of the analysers or the report being stored,
    the step between being too short to see); returns (dataset id, phase at the kill)
    or (None, ...) when every job has finished."""
    deadline = time.monotonic() + 120
    kill_by = deadline
    watched: tuple[int, int] | None = None  # (dataset id, job id)
    while True:
        assert worker.poll() is None, log.read_text()[-2000:]
        assert time.monotonic() < deadline, f"no job reached {target}"
        if watched is None:
            jobs = {ds: _job(member, ds) for ds in ds_ids}
            if all(j and j["state"] in ("done", "failed") for j in jobs.values()):
                return None, "all finished"
            mine = [(ds, j["id"]) for ds, j in jobs.items()
                    if j and j["state"] == "running" and j["attempts"] > base[ds]]
            if not mine:
                time.sleep(0.02)
                continue
            watched = mine[0]
            kill_by = deadline
            if target == "reading":
                time.sleep(rng.uniform(0.0, 1.0))  # fault injection point, not a timing check
                return watched[0], _phase(_progress(data_dir, watched[1], since))
        prog = _progress(data_dir, watched[1], since)
        job = _job(member, watched[0])
        if not job or job["state"] != "running":
            watched = None
            continue
        if prog is None or prog[1] == 0:
            continue
        done, total = prog
        if kill_by == deadline:
            # analysis has begun; on a fast machine a phase may pass between two looks,
            # so kill anyway at a random moment within the next two seconds
            kill_by = time.monotonic() + rng.uniform(0.0, 2.0)
        if (time.monotonic() > kill_by or (target == "analysing" and 1 <= done < total)
                or (target == "late" and done >= (2 * total) // 3)):
            return watched[0], _phase(prog)


def test_workers_killed_at_random_points_leave_every_job_finished_once(server) -> None:
    """Six datasets; workers killed in turn while a job is being read, analysed, or
    finished and stored (the moment seeded-random within each phase); a last worker
    finishes the queue.
    Each job: done with exactly one report, or failed with a readable error."""
    ada = server.login("ada", PW["ada"])
    ids = [ada.upload_files(f"Kill set {k}", [("scan.npy", _larger_npy(200 + k))]
                            )["dataset_id"] for k in range(6)]
    rng = random.Random(9)
    phases: list[str] = []
    for n, target in enumerate(["reading", "analysing", "late", "analysing", "late"]):
        log = server.data_dir / f"kill-worker-{n}.log"
        # lease 1 s: the heartbeat (every lease/4) publishes progress often enough to see
        # each phase; a killed worker's lease runs out quickly
        base = {ds: (_job(ada, ds) or {}).get("attempts", 0) for ds in ids}
        since = time.time()
        worker = start_worker(server.data_dir, "--lease-seconds", "1", "--poll-seconds", "0.1",
                              log_name=log.name)
        try:
            ds, phase = _wait_for_phase(ada, server.data_dir, ids, target, worker, log, rng,
                                        base, since)
            if ds is not None:
                phases.append(phase)
        finally:
            stop_process_group(worker, signal.SIGKILL)
        if ds is None:
            break
    final = start_worker(server.data_dir, "--lease-seconds", "2", "--poll-seconds", "0.2",
                         log_name="final-worker.log")
    try:
        jobs = {ds: ada.wait_for_job(ds, timeout=180) for ds in ids}
    finally:
        stop_process_group(final)
    for ds, job in jobs.items():
        reports = ada.get(f"/api/datasets/{ds}/reports").json()["reports"]
        if job["state"] == "done":
            assert [r["id"] for r in reports] == [job["report_id"]], (ds, job, reports)
            assert ada.get(f"/api/datasets/{ds}/report").json()["schema"] == "rawproof.report/1"
        else:
            assert job["state"] == "failed" and job["error"] and "Traceback" not in job["error"]
            assert reports == []
            print(f"\njob of dataset {ds} failed: {job['error']}")
    print(f"\nworker SIGKILLs: {len(phases)} at {phases}; jobs "
          f"{sorted(j['state'] for j in jobs.values())}, attempts "
          f"{[j['attempts'] for j in jobs.values()]}")
    assert len(phases) >= 4
    assert sum(j["state"] == "done" for j in jobs.values()) >= 4


def _multipart_stream(fields: dict[str, str], filename: str, size: int, boundary: str,
                      sent: threading.Event, after: int):
    """A streamed multipart body: fields first, then ``size`` bytes of one file; sets
    ``sent`` once ``after`` file bytes have gone out."""
    def gen():
        for k, v in fields.items():
            yield (f"--{boundary}\r\nContent-Disposition: form-data; name=\"{k}\"\r\n\r\n"
                   f"{v}\r\n").encode()
        yield (f"--{boundary}\r\nContent-Disposition: form-data; name=\"files\"; "
               f"filename=\"{filename}\"\r\nContent-Type: application/octet-stream\r\n\r\n"
               ).encode()
        chunk = bytes(range(256)) * 256  # 64 KiB
        out = 0
        while out < size:
            yield chunk
            out += len(chunk)
            if out >= after:
                sent.set()
                time.sleep(0.02)  # let the kill land mid-stream
        yield f"\r\n--{boundary}--\r\n".encode()
    return gen()


def test_server_killed_during_an_upload_leaves_nothing_half_stored(tmp_path) -> None:
    data = tmp_path / "restart"
    srv = start_server(data, worker=False)
    try:
        srv.add_user("ada", PW["ada"])
        ada = srv.login("ada", PW["ada"])
        kept = zero_filled_npy(301)
        first = ada.upload_files("Accepted before the crash", [("scan.npy", kept)])
        token = ada.csrf("/upload")
        boundary = "rawproofboundary7"
        fields = {"csrf_token": token, "name": "Cut short", "source": "https://x.example/c",
                  "licence": "CC0", "intended_use": "testing", "relpath": "big.npy"}
        sent = threading.Event()
        body = _multipart_stream(fields, "big.npy", 64 << 20, boundary, sent, 4 << 20)
        outcome: dict[str, object] = {}

        def send() -> None:
            try:
                r = ada.post("/upload", content=body, headers={
                    "content-type": f"multipart/form-data; boundary={boundary}",
                    "accept": "application/json"})
                outcome["status"] = r.status_code
            except httpx.HTTPError as exc:
                outcome["error"] = type(exc).__name__

        t = threading.Thread(target=send, daemon=True)
        t.start()
        assert sent.wait(60), "the upload never got going"
        os.killpg(srv.proc.pid, signal.SIGKILL)
        srv.proc.wait(timeout=10)
        t.join(timeout=60)
        assert "status" not in outcome or outcome["status"] != 201, outcome
        partial = list((data / "tmp").glob("*")) if (data / "tmp").exists() else []
    finally:
        srv.stop()
    srv = start_server(data, worker=False)
    try:
        ada = srv.login("ada", PW["ada"])
        listing = ada.get("/api/datasets").json()["datasets"]
        assert [d["name"] for d in listing] == ["Accepted before the crash"]
        info = ada.get(f"/api/datasets/{first['dataset_id']}").json()
        (f,) = info["files"]
        assert f["sha256"] == hashlib.sha256(kept).hexdigest()
        assert ada.get(f"/files/{f['id']}/download").content == kept
        assert _verify_store(data) == 1
        # what the crash left in tmp/ is marked incomplete by its name, never in the store
        assert all(p.name.endswith(".part") for p in partial), partial
        again = ada.upload_files("Uploaded again", [("big.npy", bytes(range(256)) * 4096)])
        assert again["dataset_id"] != first["dataset_id"]
        assert _verify_store(data) == 2
    finally:
        srv.stop()
    print(f"\nserver SIGKILL mid-upload: client saw {outcome}; left in tmp/: "
          f"{[p.name for p in partial]}")


def test_database_locked_by_another_writer_delays_but_loses_nothing(server) -> None:
    """Hold SQLite's write lock for 3 s while three members post 5 comments each and one
    decision is recorded: every request completes, every item is stored once."""
    ada, ben, cy = (server.login(n, PW[n]) for n in ("ada", "ben", "cy"))
    ds = ada.upload_files("Locked set", [("scan.npy", zero_filled_npy(310))])["dataset_id"]
    tokens = {m: m.csrf() for m in (ada, ben, cy)}
    con = sqlite3.connect(Settings(data_dir=server.data_dir).db_url[len("sqlite:///"):],
                          isolation_level=None, timeout=30)
    con.execute("BEGIN IMMEDIATE")
    con.execute("CREATE TABLE IF NOT EXISTS fault_probe (x INTEGER)")
    statuses: list[int] = []
    lock = threading.Lock()

    def member_posts(member, name: str) -> None:
        for k in range(5):
            r = member.post(f"/datasets/{ds}/comments",
                            data={"body": f"{name} comment {k}", "csrf_token": tokens[member]})
            with lock:
                statuses.append(r.status_code)

    def decide() -> None:
        r = ben.post(f"/datasets/{ds}/decisions", data={
            "outcome": "rejected", "rationale": "masked background", "expected_current_id": "0",
            "csrf_token": tokens[ben]})
        with lock:
            statuses.append(r.status_code)

    threads = [threading.Thread(target=member_posts, args=(m, n))
               for m, n in ((ada, "ada"), (ben, "ben"), (cy, "cy"))]
    threads.append(threading.Thread(target=decide))
    for t in threads:
        t.start()
    time.sleep(3.0)  # the other writer keeps the lock for a while (fault, not a timing check)
    con.execute("ROLLBACK")
    con.close()
    for t in threads:
        t.join(timeout=90)
    assert statuses == [303] * 16 or sorted(statuses) == [303] * 16, statuses
    comments = ada.get(f"/api/datasets/{ds}/comments").json()["comments"]
    bodies = sorted(c["body"] for c in comments)
    assert bodies == sorted(f"{n} comment {k}" for n in ("ada", "ben", "cy") for k in range(5))
    decisions = ada.get(f"/api/datasets/{ds}/decisions").json()
    history = decisions.get("history", decisions.get("decisions", []))
    assert len(history) == 1 and history[0]["outcome"] == "rejected", decisions
    print(f"\nwrite lock held 3 s: {len(statuses)} requests answered {sorted(set(statuses))}")


def _start_with_fsize(data: Path, fsize: int) -> Server:
    """``rawproof serve`` with RLIMIT_FSIZE set (writes past ``fsize`` bytes fail)."""
    data.mkdir(parents=True, exist_ok=True)
    port = free_port()
    env = {**os.environ}
    env.pop("RAWPROOF_DATABASE_URL", None)
    log = data / "server.log"
    # CPython ignores SIGXFSZ, so a write past the ceiling fails with EFBIG (OSError)
    code = ("import resource, sys; "
            f"resource.setrlimit(resource.RLIMIT_FSIZE, ({fsize}, {fsize})); "
            "from app.cli import main; sys.exit(main())")
    args = [sys.executable, "-c", code, "serve", "--data", str(data),
            "--host", "127.0.0.1", "--port", str(port), "--no-worker"]
    with open(log, "ab") as fh:
        proc = subprocess.Popen(args, stdout=fh, stderr=subprocess.STDOUT, env=env,
                                start_new_session=True, cwd=REPO)
    srv = Server(data, port, proc, log, env)
    deadline = time.monotonic() + 60
    while True:
        assert proc.poll() is None, log.read_text()
        try:
            if httpx.get(f"{srv.base_url}/healthz", timeout=2).status_code == 200:
                return srv
        except httpx.HTTPError:
            pass
        assert time.monotonic() < deadline, log.read_text()
        time.sleep(0.1)


def test_write_errors_while_storing_refuse_the_upload_and_keep_serving(tmp_path) -> None:
    data = tmp_path / "full"
    srv = _start_with_fsize(data, 6 << 20)
    try:
        srv.add_user("ada", PW["ada"])
        ada = srv.login("ada", PW["ada"])
        small = zero_filled_npy(320)
        ok = ada.upload_files("Fits", [("scan.npy", small)])
        r = ada.post("/upload", data={
            "csrf_token": ada.csrf("/upload"), "name": "Does not fit", "source": "https://x.ex",
            "licence": "CC0", "intended_use": "testing", "relpath": "big.npy"},
            files=[("files", ("big.npy", bytes(12 << 20), "application/octet-stream"))],
            headers={"accept": "application/json"})
        assert r.status_code == 507, (r.status_code, r.text[:300])  # RFC 4918 11.5
        assert "nothing was stored" in r.json()["error"]["message"]
        print(f"\nwrite error while storing: HTTP {r.status_code}: {r.text[:200]}")
        assert "Traceback" not in r.text
        assert srv.client().get("/healthz").text == "ok"
        names = [d["name"] for d in ada.get("/api/datasets").json()["datasets"]]
        assert names == ["Fits"]
        assert list((data / "tmp").glob("*.part")) == []
        assert _verify_store(data) == 1
        info = ada.get(f"/api/datasets/{ok['dataset_id']}").json()
        assert ada.get(f"/files/{info['files'][0]['id']}/download").content == small
        after = ada.upload_files("Fits after", [("scan2.npy", zero_filled_npy(321))])
        assert after["dataset_id"] > ok["dataset_id"]
    finally:
        srv.stop()


def _hostile_files() -> list[tuple[str, bytes, str]]:
    """(file name, bytes, what the reader must say) built from the fuzzer's lies."""
    from tests.test_fuzz_readers import _dicom_with, _nifti, _npy_with_shape

    nested = io.BytesIO()
    with zipfile.ZipFile(nested, "w") as zf:
        zf.writestr("../../escape.npy", b"x")
    bomb = io.BytesIO()
    with zipfile.ZipFile(bomb, "w", compression=zipfile.ZIP_DEFLATED) as zf:
        zf.writestr("zeros.npy", bytes(300 << 20))
    return [
        ("forged.dcm", _dicom_with(length_lie=True), "forged.dcm"),
        ("huge.npy", _npy_with_shape("(100000, 100000, 100)"), "huge.npy"),
        ("lie.nii", _nifti([32767, 32767, 100]), "lie.nii"),
        ("escape.zip", nested.getvalue(), "escape.npy"),
        ("bomb.zip", bomb.getvalue(), "zeros.npy"),
        ("cut.png", b"\x89PNG\r\n\x1a\n" + bytes(40), "cut.png"),
    ]


def test_hostile_files_fail_readably_and_the_server_keeps_serving(server) -> None:
    ada = server.login("ada", PW["ada"])
    worker = start_worker(server.data_dir, "--lease-seconds", "5", "--poll-seconds", "0.2",
                          log_name="hostile-worker.log")
    try:
        ids = {}
        for name, payload, needle in _hostile_files():
            ids[name] = (ada.upload_files(f"Hostile {name}", [(name, payload)])["dataset_id"],
                         needle)
        good = ada.upload_files("Good after hostile", [("scan.npy", zero_filled_npy(330))])
        for name, (ds, needle) in ids.items():
            job = ada.wait_for_job(ds, timeout=120)
            assert job["state"] == "failed", (name, job)
            assert needle in job["error"] and "Traceback" not in job["error"], (name, job)
            assert job["attempts"] == 1, (name, job)  # an input error is not retried
            page = ada.get(f"/datasets/{ds}")
            assert page.status_code == 200 and "The analysis failed" in page.text
        assert ada.wait_for_job(good["dataset_id"])["state"] == "done"
        assert worker.poll() is None
        assert server.client().get("/healthz").text == "ok"
    finally:
        stop_process_group(worker)
    print(f"\nhostile uploads: {len(ids)} failed readably")
