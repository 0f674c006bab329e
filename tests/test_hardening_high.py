"""Issue 21, High findings 1-3, replayed as the attacker sent them against a real server.

The server runs with the upload limit the attacker faced (20 MB). The bound
on memory is the issue's: peak resident memory (``VmHWM`` in
``/proc/<pid>/status``, proc(5)) of the server and of every process it started
stays under 2 x the upload limit + 300 MB. Status codes: RFC 9110 (401 15.5.2,
413 15.5.14); 507 RFC 4918 11.5.
"""

from __future__ import annotations

import contextlib
import io
import json
import os
import signal
import socket
import subprocess
import threading
import time
import zipfile
import zlib
from pathlib import Path

import numpy as np
import pytest

from tests.server_harness import running_server, zero_filled_npy

LIMIT = 20_000_000
BOUND = 2 * LIMIT + 300 * 1024**2
PASSWORD = "quiet lattice of kelp at noon"

pytestmark = pytest.mark.server


# ------------------------------------------------------------------ /proc helpers

def status_kib(pid: int, key: str) -> int:
    """A ``VmHWM``/``VmRSS`` line of /proc/<pid>/status in KiB (0 when gone)."""
    try:
        for line in Path(f"/proc/{pid}/status").read_text().splitlines():
            if line.startswith(key + ":"):
                return int(line.split()[1])
    except (OSError, ValueError):
        pass
    return 0


def descendants(pid: int) -> list[int]:
    """Every live process below ``pid`` (by the parent field of /proc/<p>/stat)."""
    parent: dict[int, int] = {}
    for entry in Path("/proc").iterdir():
        if entry.name.isdigit():
            with contextlib.suppress(OSError, IndexError, ValueError):
                stat = (entry / "stat").read_text()
                parent[int(entry.name)] = int(stat.rsplit(")", 1)[1].split()[1])
    found, frontier = [], [pid]
    while frontier:
        p = frontier.pop()
        kids = [c for c, pp in parent.items() if pp == p]
        found += kids
        frontier += kids
    return found


def cmdline(pid: int) -> str:
    try:
        return Path(f"/proc/{pid}/cmdline").read_bytes().replace(b"\0", b" ").decode()
    except OSError:
        return ""


def peak_bytes(root: int) -> dict[int, int]:
    """VmHWM in bytes of ``root`` and each of its descendants."""
    return {p: status_kib(p, "VmHWM") * 1024 for p in [root, *descendants(root)]}


def worker_pid(server_pid: int) -> int | None:
    for p in descendants(server_pid):
        if " worker " in cmdline(p) and "multiprocessing" not in cmdline(p):
            return p
    return None


# ------------------------------------------------------------------ the attacker's files

def zeros_npz(shape: tuple[int, ...] = (64, 4096, 1024)) -> bytes:
    """An ``.npz`` of float64 zeros (2 GiB expanded, 2.09 MB deflated), built by streaming."""
    head = io.BytesIO()
    np.lib.format.write_array_header_1_0(head, {"descr": "<f8", "fortran_order": False,
                                                "shape": shape})
    n = int(np.prod(shape)) * 8
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w") as zf:
        info = zipfile.ZipInfo("image.npy")
        info.compress_type = zipfile.ZIP_DEFLATED
        with zf.open(info, "w", force_zip64=True) as out:
            out.write(head.getvalue())
            block = bytes(1 << 24)
            for _ in range(n // len(block)):
                out.write(block)
    return buf.getvalue()


def zeros_nii_gz(shape: tuple[int, int, int, int] = (1024, 4096, 64, 1)) -> bytes:
    """A NIfTI-1 of float64 zeros, gzipped (RFC 1952), header by nibabel, built by streaming."""
    import nibabel as nib

    hdr = nib.Nifti1Header()
    hdr.set_data_shape(shape)
    hdr.set_data_dtype(np.float64)
    hdr["vox_offset"] = 352
    head = hdr.binaryblock + b"\0" * 4
    n = int(np.prod(shape)) * 8
    comp = zlib.compressobj(6, zlib.DEFLATED, -15)
    crc = zlib.crc32(head)
    parts = [b"\x1f\x8b\x08\x00\0\0\0\0\0\xff", comp.compress(head)]
    block = bytes(1 << 24)
    for _ in range(n // len(block)):
        parts.append(comp.compress(block))
        crc = zlib.crc32(block, crc)
    parts.append(comp.flush())
    size = (len(head) + n) % 2**32
    parts.append(crc.to_bytes(4, "little") + size.to_bytes(4, "little"))
    return b"".join(parts)


# ------------------------------------------------------------------ the server

@pytest.fixture(scope="module")
def server(tmp_path_factory):
    with running_server(tmp_path_factory.mktemp("high"),
                        extra_args=["--max-upload-bytes", str(LIMIT), "--lease-seconds", "4"],
                        env={"RAWPROOF_BODY_IDLE_TIMEOUT": "3"}) as srv:
        srv.add_users({"ada": PASSWORD, "bea": PASSWORD})
        yield srv


def test_finding_1_zero_npz_and_nii_gz_refused_within_memory_bound(server) -> None:
    """Finding 1: a 2.09 MB .npz of zeros (and the same as .nii.gz) asks for 2 GiB.

    Truth built: float64 zeros of shape 64 x 4096 x 1024 (2 GiB), deflated.
    Both are refused before allocation (the array ceiling follows the upload
    limit) and no process of the server peaks above the bound.
    """
    ada = server.login("ada", PASSWORD)
    npz = zeros_npz()
    assert 2_000_000 < len(npz) < 2_200_000
    gz = zeros_nii_gz()
    for name, blob in (("zeros.npz", npz), ("zeros.nii.gz", gz)):
        ds = ada.upload_files(f"bomb {name}", [(name, blob)])["dataset_id"]
        job = ada.wait_for_job(ds, timeout=120)
        assert job["state"] == "failed", job
        page = ada.get(f"/datasets/{ds}").text
        assert "too_large" in page or "more than the limit" in page
        assert str(server.data_dir) not in page
    peaks = peak_bytes(server.proc.pid)
    print("finding 1 peak VmHWM MiB:", {p: round(v / 2**20) for p, v in peaks.items()})
    assert max(peaks.values()) < BOUND


def _raw_post(port: int, path: str, headers: dict[str, str], body_bytes: int, *,
              chunked: bool, chunk: int = 1 << 20, ctype: str = "application/json",
              piece: bytes = b" ") -> tuple[int, bytes, int]:
    """Send a POST with ``body_bytes`` of JSON-ish filler; stop when the server answers.

    Returns (status, response head+body, bytes sent).
    """
    s = socket.create_connection(("127.0.0.1", port), timeout=30)
    lines = [f"POST {path} HTTP/1.1", "Host: 127.0.0.1", f"Content-Type: {ctype}",
             *(f"{k}: {v}" for k, v in headers.items())]
    lines.append("Transfer-Encoding: chunked" if chunked else f"Content-Length: {body_bytes}")
    s.sendall(("\r\n".join(lines) + "\r\n\r\n").encode())
    sent = 0
    data = (piece * (chunk // len(piece) + 1))[:chunk]
    s.setblocking(False)
    answer = b""
    try:
        while sent < body_bytes:
            try:
                answer += s.recv(65536)
                if answer:
                    break
            except BlockingIOError:
                pass
            piece = (f"{len(data):x}\r\n".encode() + data + b"\r\n") if chunked else data
            try:
                s.setblocking(True)
                s.sendall(piece)
                s.setblocking(False)
            except (BrokenPipeError, ConnectionResetError):
                break
            sent += len(data)
        s.setblocking(True)
        s.settimeout(30)
        with contextlib.suppress(OSError):
            while b"\r\n\r\n" not in answer or len(answer) < 40:
                more = s.recv(65536)
                if not more:
                    break
                answer += more
    finally:
        s.close()
    status = int(answer.split(b" ", 2)[1]) if answer.startswith(b"HTTP/1.1") else 0
    return status, answer, sent


def test_finding_2_big_json_bodies_are_refused_before_reading(server) -> None:
    """Finding 2: 1 GiB JSON without a session, then three parallel 200 MiB bodies.

    Anonymous: 401 before the body is read. Signed in (cookie and CSRF
    header, as a script of the page would send): 413 at the route's cap
    (RFC 9110 15.5.14), and server memory stays under the bound.
    """
    before = status_kib(server.proc.pid, "VmRSS")
    status, answer, sent = _raw_post(server.port, "/api/datasets/1/comments", {},
                                     1024**3, chunked=False)
    assert status == 401, answer[:300]
    assert json.loads(answer.split(b"\r\n\r\n", 1)[1])["error"]["code"] == "not_signed_in"
    assert sent < 256 * 1024**2  # the answer came long before the body could have

    ada = server.login("ada", PASSWORD)
    token = ada.csrf()
    cookie = "; ".join(f"{k}={v}" for k, v in ada.cookies.items())
    results: list[tuple[int, int]] = []

    def one() -> None:
        st, _a, n = _raw_post(server.port, "/api/datasets/1/comments",
                              {"Cookie": cookie, "X-CSRF-Token": token}, 200 * 1024**2,
                              chunked=True)
        results.append((st, n))

    threads = [threading.Thread(target=one) for _ in range(3)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(120)
    assert [st for st, _ in results] == [413, 413, 413], results
    peak = status_kib(server.proc.pid, "VmHWM") * 1024
    print(f"finding 2: server RSS before {before // 1024} MiB, peak {peak // 2**20} MiB, "
          f"sent per body {[n // 2**20 for _, n in results]} MiB")
    assert peak < BOUND


def test_finding_3_worker_killed_is_restarted_and_its_job_finishes(tmp_path) -> None:
    """Finding 3 (SIGKILL): the worker and its analysis process die; serve restarts the
    worker, the job is taken up again within one lease (4 s) and ends done; no
    analysis process of the killed worker is left."""
    gate = tmp_path / "gate"
    with running_server(tmp_path / "data", extra_args=["--lease-seconds", "4"],
                        env={"RAWPROOF_WORKER_GATE": str(gate)}) as srv:
        srv.add_user("ada", PASSWORD)
        ada = srv.login("ada", PASSWORD)
        gate.touch()
        first = ada.upload_files("warm-up", [("a.npy", zero_filled_npy(1))])["dataset_id"]
        assert ada.wait_for_job(first)["state"] == "done"
        old_worker = worker_pid(srv.proc.pid)
        pool = [p for p in descendants(old_worker) if "multiprocessing" in cmdline(p)]
        assert old_worker and pool
        gate.unlink()
        ds = ada.upload_files("killed", [("b.npy", zero_filled_npy(2))])["dataset_id"]
        ada.wait_for_job(ds, states=("running",))
        os.kill(old_worker, signal.SIGKILL)
        killed_at = time.monotonic()
        gate.touch()
        job = ada.wait_for_job(ds, timeout=60)
        took = time.monotonic() - killed_at
        assert job["state"] == "done"
        assert all(not Path(f"/proc/{p}").exists() or "multiprocessing" not in cmdline(p)
                   for p in pool)  # the orphaned analysis process is gone
        new_worker = worker_pid(srv.proc.pid)
        assert new_worker and new_worker != old_worker
        print(f"finding 3: job done {took:.1f} s after the worker's SIGKILL")
        assert took < 4 + 2 + 10  # one lease, the first restart back-off, the analysis


@contextlib.contextmanager
def small_disk(path: Path, size_mb: int):
    path.mkdir(parents=True)
    r = subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size_mb}m", "tmpfs", str(path)],
                       capture_output=True)
    if r.returncode != 0:
        pytest.skip("a small file system for the full-disk test needs mount (root)")
    try:
        yield path
    finally:
        subprocess.run(["umount", "-l", str(path)], capture_output=True)


def fill(path: Path) -> Path:
    """Write a file until the file system has no byte left."""
    filler = path / "filler.bin"
    fd = os.open(filler, os.O_WRONLY | os.O_CREAT, 0o600)
    try:
        for size in (1 << 20, 4096, 1):
            with contextlib.suppress(OSError):
                while os.write(fd, b"\1" * size):
                    pass
    finally:
        os.close(fd)
    return filler


def test_finding_3_and_7_full_disk_answers_cleanly_and_the_worker_recovers(tmp_path) -> None:
    """Findings 3 and 7 (full disk): with the data folder's disk full, uploads and
    comments answer 507 with the JSON error object (RFC 4918 11.5), the worker
    keeps running; once space is freed, the queued job is analysed."""
    gate = tmp_path / "gate"
    with small_disk(tmp_path / "disk", 96) as disk, \
            running_server(disk / "data", extra_args=["--lease-seconds", "4"],
                           env={"RAWPROOF_WORKER_GATE": str(gate)}) as srv:
        srv.add_users({"ada": PASSWORD, "bea": PASSWORD})
        ada = srv.login("ada", PASSWORD)
        bea = srv.login("bea", PASSWORD)
        worker = worker_pid(srv.proc.pid)
        ds = ada.upload_files("queued", [("a.npy", zero_filled_npy(3))])["dataset_id"]
        bea_csrf, ada_csrf = bea.csrf(), ada.csrf()
        filler = fill(disk)
        gate.touch()  # the worker now meets the full disk
        r = ada.post("/upload", data={"csrf_token": ada.csrf("/upload"), "name": "n",
                                      "source": "s"},
                     files={"files": ("c.npy", zero_filled_npy(4))},
                     headers={"accept": "application/json"})
        assert r.status_code == 507, r.text[:300]
        assert r.json()["error"]["message"]
        c = ada.post(f"/api/datasets/{ds}/comments", json={"body": "a comment " * 100},
                     headers={"x-csrf-token": ada.csrf()})
        assert c.status_code == 507, c.text[:300]
        assert c.headers["content-type"].startswith("application/json")
        assert c.json()["error"]["code"] == "storage_full"
        # the other writes of finding 7: never a bare 500, JSON for API callers
        api = {"x-csrf-token": bea_csrf, "accept": "application/json"}
        for r in (bea.post(f"/api/datasets/{ds}/reanalyse", headers=api),
                  bea.post(f"/api/datasets/{ds}/decisions", headers=api,
                           json={"outcome": "rejected", "rationale": "disk full test"}),
                  ada.post("/account/tokens", data={"csrf_token": ada_csrf, "label": "t"},
                           headers={"accept": "application/json"})):
            assert r.status_code == 507, (r.request.url, r.status_code, r.text[:200])
            assert r.json()["error"]["code"] == "storage_full"
        page = bea.post(f"/datasets/{ds}/reanalyse", data={"csrf_token": bea_csrf})
        assert page.status_code == 507 and "text/html" in page.headers["content-type"]
        with srv.client() as c2:  # signing in writes a session: a readable 507 too
            c2.cookies.set("rawproof_login_csrf", "t")
            r = c2.post("/login", data={"name": "bea", "password": PASSWORD,
                                        "csrf_token": "t"})
            assert r.status_code == 507 and "text/html" in r.headers["content-type"]
        assert ada.get("/healthz").status_code == 200
        filler.unlink()
        job = ada.wait_for_job(ds, timeout=90)
        assert job["state"] == "done", job
        assert worker_pid(srv.proc.pid) is not None
        print(f"full disk: worker {worker} -> {worker_pid(srv.proc.pid)}, job {job['state']}")


def test_finding_7_orphaned_store_files_removed_at_start_and_by_check(tmp_path) -> None:
    """Finding 7: a file whose upload's database commit failed stayed in the store
    forever. A stored file no dataset refers to, older than the grace period, is
    removed by ``rawproof check`` and at the next start; a referenced one stays."""
    import hashlib

    def plant(data_dir: Path, content: bytes) -> Path:
        sha = hashlib.sha256(content).hexdigest()
        path = data_dir / "store" / sha[:2] / sha
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(content)
        old = time.time() - 3600  # past the 15-minute grace of an upload still committing
        os.utime(path, (old, old))
        return path

    data = tmp_path / "data"
    with running_server(data, worker=False) as srv:
        srv.add_user("ada", PASSWORD)
        ada = srv.login("ada", PASSWORD)
        ds = ada.upload_files("kept", [("a.npy", zero_filled_npy(7))])["dataset_id"]
        sha = ada.get(f"/api/datasets/{ds}").json()["files"][0]["sha256"]
        kept = data / "store" / sha[:2] / sha
        os.utime(kept, (time.time() - 3600, time.time() - 3600))
        orphan = plant(data, b"bytes of an upload whose commit failed")
        out = srv.cli("check").stdout
        assert not orphan.exists() and kept.exists(), out
        assert "removed 1 stored file" in out
    orphan = plant(data, b"another upload whose commit failed")
    with running_server(data, worker=False):
        assert not orphan.exists() and kept.exists()
