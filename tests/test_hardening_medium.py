"""Issue 21, findings 5, 6, 12 and 14, replayed as sent against a real server on 127.0.0.1.

Status codes: RFC 9110 (403 15.5.4, 413 15.5.14). Memory: ``VmHWM`` of
/proc/<pid>/status (proc(5)); the bound is the issue's 2 x upload limit + 300 MB.
"""

from __future__ import annotations

import io
import os
import signal
import socket
import tempfile
import time
import zipfile

import pytest

from tests.server_harness import running_server, zero_filled_npy
from tests.test_hardening_high import (
    BOUND,
    LIMIT,
    PASSWORD,
    _raw_post,
    cmdline,
    status_kib,
    worker_pid,
)

pytestmark = pytest.mark.server


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    with running_server(tmp_path_factory.mktemp("medium"),
                        extra_args=["--max-upload-bytes", str(LIMIT), "--lease-seconds", "4"],
                        env={"RAWPROOF_BODY_IDLE_TIMEOUT": "3",
                             "RAWPROOF_HEADER_TIMEOUT": "3"}) as srv:
        srv.add_users({"ada": PASSWORD})
        yield srv


def _fields(boundary: str, first: dict[str, str]) -> bytes:
    out = b""
    for k, v in first.items():
        out += (f"--{boundary}\r\nContent-Disposition: form-data; name=\"{k}\"\r\n\r\n{v}\r\n"
                ).encode()
    return out


def test_finding_5_fields_without_csrf_and_fields_past_the_limit(server) -> None:
    """Finding 5: a member without a CSRF token sends 939 MiB of form fields.

    Without the token as first field: 403 after at most a few kB are read.
    With it, fields count against the upload limit: 413 near the limit.
    """
    ada = server.login("ada", PASSWORD)
    cookie = "; ".join(f"{k}={v}" for k, v in ada.cookies.items())
    boundary = "attackerBoundary"
    field = f"--{boundary}\r\nContent-Disposition: form-data; name=\"x\"\r\n\r\n{'a' * 60000}\r\n"
    ctype = f"multipart/form-data; boundary={boundary}"
    st, answer, sent = _raw_post(server.port, "/upload", {"Cookie": cookie}, 939 * 1024**2,
                                 chunked=True, ctype=ctype, piece=field.encode())
    assert st == 403, answer[:300]
    token = ada.csrf("/upload")
    first = _fields(boundary, {"csrf_token": token, "name": "n", "source": "s"})
    st2, answer2, sent2 = _raw_post(server.port, "/upload", {"Cookie": cookie}, 939 * 1024**2,
                                    chunked=True, ctype=ctype, piece=first + field.encode() * 16)
    assert st2 == 413, answer2[:300]
    peak = status_kib(server.proc.pid, "VmHWM") * 1024
    print(f"finding 5: sent {sent // 2**20} MiB (no token) and {sent2 // 2**20} MiB (token) "
          f"before the answer; server peak {peak // 2**20} MiB")
    assert sent2 < 2 * LIMIT + 64 * 1024**2
    assert peak < BOUND
    assert not list((server.data_dir / "tmp").glob("upload-*.part"))


def junk_zip(total: int = 869 * 1024**2) -> bytes:
    """A zip of one junk member at deflate ratio about 174 (under the 200 check).

    Each 1 MiB block: 4.1 kB of pseudo-random bytes then zeros.
    """
    rng = __import__("numpy").random.default_rng(7)
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w") as zf:
        info = zipfile.ZipInfo("junk.bin")
        info.compress_type = zipfile.ZIP_DEFLATED
        with zf.open(info, "w", force_zip64=True) as out:
            for _ in range(total >> 20):
                out.write(rng.integers(0, 256, 4100, dtype="uint8").tobytes()
                          + bytes((1 << 20) - 4100))
    return buf.getvalue()


def test_finding_6_junk_zip_is_not_extracted_anywhere(server) -> None:
    """Finding 6: a zip that expands 869 MiB of junk. Its member is of no readable type,
    so nothing is extracted (not in the system temporary folder, not in the data
    folder), and the message shows no server path."""
    ada = server.login("ada", PASSWORD)
    blob = junk_zip()
    ratio = 869 * 1024**2 / len(blob)
    assert 150 < ratio < 200, ratio
    before = set(os.listdir(tempfile.gettempdir()))
    ds = ada.upload_files("junk zip", [("junk.zip", blob)])["dataset_id"]
    job = ada.wait_for_job(ds, timeout=120)
    assert job["state"] == "failed"
    page = ada.get(f"/datasets/{ds}").text
    assert str(server.data_dir) not in page and "/tmp/" not in page
    new = set(os.listdir(tempfile.gettempdir())) - before
    assert not [n for n in new if n.startswith("rawproof-zip-")]
    print(f"finding 6: zip of {len(blob) / 1e6:.1f} MB, ratio {ratio:.0f}: {job['error'][:120]}")


def test_finding_12_slow_headers_are_dropped(server) -> None:
    """Finding 12: 200 anonymous connections sending headers slowly are closed by
    the server after the header timeout (3 s here), not held."""
    conns = []
    for _ in range(200):
        s = socket.create_connection(("127.0.0.1", server.port), timeout=10)
        s.sendall(b"GET / HTTP/1.1\r\nHost: 127.0.0.1\r\n")
        conns.append(s)
    closed = 0
    for s in conns:
        try:
            closed += s.recv(1) == b""  # blocks until the server closes (timeout 10 s)
        except OSError:
            closed += 1
        s.close()
    assert closed == 200


def test_finding_14_clean_restarts_spend_no_attempt(tmp_path) -> None:
    """Finding 14: three SIGTERMs of the worker during one analysis; the job still ends
    done (the attempt is handed back on a clean stop)."""
    gate = tmp_path / "gate"
    with running_server(tmp_path / "data", extra_args=["--lease-seconds", "4"],
                        env={"RAWPROOF_WORKER_GATE": str(gate)}) as srv:
        srv.add_user("ada", PASSWORD)
        ada = srv.login("ada", PASSWORD)
        ds = ada.upload_files("restarts", [("a.npy", zero_filled_npy(5))])["dataset_id"]
        for _ in range(3):
            ada.wait_for_job(ds, states=("running",))
            w = worker_pid(srv.proc.pid)
            assert w and "worker" in cmdline(w)
            os.kill(w, signal.SIGTERM)
            deadline = time.monotonic() + 60
            while worker_pid(srv.proc.pid) in (None, w) and time.monotonic() < deadline:
                time.sleep(0.2)
        gate.touch()
        assert ada.wait_for_job(ds, timeout=90)["state"] == "done"


def test_finding_12_stalled_uploads_end_with_408_and_leave_no_part_file(server) -> None:
    """Finding 12: 20 uploads that stop sending held open ``.part`` files for 75 s.

    Each sends its headers, the CSRF field and 64 kB of a file, then stalls: the
    server answers 408 (RFC 9110 15.5.9) once no byte came for the body timeout
    (3 s here) and removes the partial file; nothing is stored.
    """
    ada = server.login("ada", PASSWORD)
    cookie = "; ".join(f"{k}={v}" for k, v in ada.cookies.items())
    token = ada.csrf("/upload")
    boundary = "stalledBoundary"
    head = _fields(boundary, {"csrf_token": token, "name": "stalled", "source": "s"})
    head += (f"--{boundary}\r\nContent-Disposition: form-data; name=\"files\"; "
             f"filename=\"big.npy\"\r\nContent-Type: application/octet-stream\r\n\r\n"
             ).encode() + b"\0" * 65536
    tmp = server.data_dir / "tmp"
    before = {p.name for p in tmp.glob("upload-*.part")}
    conns = []
    for _ in range(20):
        s = socket.create_connection(("127.0.0.1", server.port), timeout=30)
        s.sendall((f"POST /upload HTTP/1.1\r\nHost: 127.0.0.1\r\nCookie: {cookie}\r\n"
                   f"Accept: application/json\r\nContent-Length: {10_000_000}\r\n"
                   f"Content-Type: multipart/form-data; boundary={boundary}\r\n\r\n"
                   ).encode() + head)
        conns.append(s)
    statuses = []
    for s in conns:
        answer = b""
        try:
            while b"\r\n\r\n" not in answer:
                more = s.recv(65536)  # blocks until the server answers (30 s socket timeout)
                if not more:
                    break
                answer += more
        finally:
            s.close()
        statuses.append(int(answer.split(b" ", 2)[1]) if answer.startswith(b"HTTP/1.1") else 0)
    assert statuses == [408] * 20, statuses
    deadline = time.monotonic() + 10
    while {p.name for p in tmp.glob("upload-*.part")} - before and time.monotonic() < deadline:
        time.sleep(0.1)
    assert not {p.name for p in tmp.glob("upload-*.part")} - before
    assert all(d["name"] != "stalled" for d in ada.get("/api/datasets").json()["datasets"])
