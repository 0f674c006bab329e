"""Uploads against a real server: content addresses, duplicates, the streaming size limit.

Outside references: ``hashlib.sha256`` for the content address; RFC 7578
(multipart/form-data) for the request bodies built by hand here; RFC 6266
(Content-Disposition ``attachment``) for downloads; RFC 9112 chunked transfer
coding, which lets a client send a body whose size the server cannot know
in advance (so the limit must be enforced while streaming).
"""

from __future__ import annotations

import hashlib
import io
import zipfile

import pytest

from tests.server_harness import running_server, zero_filled_npy

pytestmark = pytest.mark.server

LIMIT = 300_000
PW = {"uma": "uma-password-1", "rei": "rei-password-1"}


@pytest.fixture(scope="module")
def server(tmp_path_factory):
    with running_server(tmp_path_factory.mktemp("uploads"), worker=False,
                        extra_args=["--max-upload-bytes", str(LIMIT)]) as srv:
        srv.add_users(PW)
        yield srv


@pytest.fixture(scope="module")
def uma(server):
    return server.login("uma", PW["uma"])


def _blobs(server) -> list[str]:
    store = server.data_dir / "store"
    return sorted(p.name for p in store.glob("*/*")) if store.exists() else []


def _partials(server) -> list[str]:
    tmp = server.data_dir / "tmp"
    return sorted(p.name for p in tmp.iterdir()) if tmp.exists() else []


def test_same_files_are_stored_once_and_the_page_says_where(server, uma) -> None:
    scan = zero_filled_npy(61)
    notes = b"acquired on an invented 3 T system\n"
    a = uma.upload_files("First copy", [("scan.npy", scan), ("notes.txt", notes)])
    before = _blobs(server)
    assert hashlib.sha256(scan).hexdigest() in before
    b = uma.upload_files("Second copy", [("renamed.npy", scan)])
    assert _blobs(server) == before  # nothing new on disk
    assert b["duplicates"] == [{"file": "renamed.npy", "dataset_id": a["dataset_id"],
                                "dataset_name": "First copy", "as": "scan.npy",
                                "decision": None, "withdrawn": False}]
    page = uma.get(b["url"]).text
    assert "Other datasets hold some of these files" in page and "First copy" in page
    assert "not decided yet" in page
    assert f'href="/datasets/{a["dataset_id"]}"' in page
    assert "Second copy" in uma.get(a["url"]).text  # and the other way round


def _chunked_body(boundary: str, token: str, file_bytes: int, chunk: int = 16_384):
    head = (
        f"--{boundary}\r\nContent-Disposition: form-data; name=\"csrf_token\"\r\n\r\n{token}\r\n"
        f"--{boundary}\r\nContent-Disposition: form-data; name=\"name\"\r\n\r\nToo big\r\n"
        f"--{boundary}\r\nContent-Disposition: form-data; name=\"source\"\r\n\r\nhere\r\n"
        f"--{boundary}\r\nContent-Disposition: form-data; name=\"files\"; filename=\"big.npy\""
        "\r\nContent-Type: application/octet-stream\r\n\r\n"
    ).encode()
    yield head
    sent = 0
    while sent < file_bytes:
        n = min(chunk, file_bytes - sent)
        yield b"\x07" * n
        sent += n
    yield f"\r\n--{boundary}--\r\n".encode()


def test_size_limit_hit_mid_stream_leaves_no_partial_file(server, uma) -> None:
    """A chunked body (no Content-Length) past the limit is stopped; nothing stays on disk."""
    n_before = len(uma.get("/api/datasets").json()["datasets"])
    blobs_before = _blobs(server)
    boundary = "rawproofTestBoundary7f3a"
    r = uma.post("/upload", content=_chunked_body(boundary, uma.csrf("/upload"), 2 * LIMIT),
                 headers={"content-type": f"multipart/form-data; boundary={boundary}",
                          "accept": "application/json"})
    assert "content-length" not in r.request.headers
    assert r.status_code == 413
    assert str(LIMIT) in r.json()["error"]["message"]
    assert _blobs(server) == blobs_before
    assert _partials(server) == []
    assert len(uma.get("/api/datasets").json()["datasets"]) == n_before
    # Just under the limit is accepted.
    ok = uma.post("/upload", content=_chunked_body(boundary, uma.csrf("/upload"), LIMIT - 10),
                  headers={"content-type": f"multipart/form-data; boundary={boundary}",
                           "accept": "application/json"})
    assert ok.status_code == 201
    assert _partials(server) == []


def test_declared_length_over_the_limit_is_refused_before_reading(server, uma) -> None:
    r = uma.post("/upload", files={"files": ("big.npy", b"\0" * (LIMIT + 2 * 1024**2))},
                 data={"csrf_token": uma.csrf("/upload"), "name": "x", "source": "y"},
                 headers={"accept": "application/json"})
    assert r.status_code == 413
    assert _partials(server) == []


def test_missing_fields_store_nothing(server, uma) -> None:
    blobs_before = _blobs(server)
    content = b"unique bytes for the missing-field test"
    r = uma.post("/upload", data={"csrf_token": uma.csrf("/upload"), "name": "",
                                  "source": "somewhere"},
                 files={"files": ("a.npy", content)}, headers={"accept": "application/json"})
    assert r.status_code == 422 and "dataset name is required" in r.json()["error"]["message"]
    assert _blobs(server) == blobs_before and _partials(server) == []


def test_folder_names_are_kept_but_sanitised_and_downloads_are_attachments(server, uma) -> None:
    files = [("series/IM0001", b"first slice bytes"), ("series/IM0002", b"second slice"),
             ("../../escape.npy", b"tries to climb out"), ('we"ird name;.npy', b"odd name")]
    info = uma.upload_files("Folder set", files)
    meta = uma.get(f"/api/datasets/{info['dataset_id']}").json()
    names = sorted(f["name"] for f in meta["files"])
    # '..' parts and the quote (reserved on common file systems) are dropped
    assert names == ["escape.npy", "series/IM0001", "series/IM0002", "weird name;.npy"]
    stored_as = {"escape.npy": "../../escape.npy", "weird name;.npy": 'we"ird name;.npy'}
    for f in meta["files"]:
        content = dict(files)[stored_as.get(f["name"], f["name"])]
        assert f["sha256"] == hashlib.sha256(content).hexdigest()
    odd = next(f for f in meta["files"] if f["name"].startswith("we"))
    r = uma.get(f"/files/{odd['id']}/download")
    assert r.status_code == 200 and r.content == b"odd name"
    assert r.headers["content-type"] == "application/octet-stream"
    assert r.headers["content-disposition"] == 'attachment; filename="weird_name_.npy"'
    assert r.headers["x-content-type-options"] == "nosniff"
    assert not (server.data_dir / "escape.npy").exists()
    assert not (server.data_dir.parent / "escape.npy").exists()


def test_one_zip_is_stored_as_one_file(server, uma) -> None:
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w") as zf:
        zf.writestr("set/scan.npy", zero_filled_npy(62))
    info = uma.upload_files("Zipped set", [("set.zip", buf.getvalue())])
    meta = uma.get(f"/api/datasets/{info['dataset_id']}").json()
    assert [(f["name"], f["format"]) for f in meta["files"]] == [("set.zip", "zip")]
    assert meta["job"]["state"] == "queued"


def test_scripts_upload_with_a_token_and_no_csrf(server) -> None:
    token = server.cli("users", "token", "rei").stdout.strip()
    api = server.client(headers={"authorization": f"Bearer {token}"})
    r = api.post("/api/uploads", data={"name": "Scripted set", "source": "lab script"},
                 files={"files": ("s.npy", zero_filled_npy(63))})
    assert r.status_code == 201
    assert api.get(r.json()["url"].replace("/datasets/", "/api/datasets/")).json()[
        "uploader"] == "rei"


def test_a_plain_form_post_is_redirected_to_the_new_dataset(server, uma) -> None:
    """Without JavaScript the browser posts the form itself and follows a 303 (RFC 9110)."""
    r = uma.post("/upload", data={"csrf_token": uma.csrf("/upload"), "name": "No-JS set",
                                  "source": "a printed catalogue"},
                 files={"files": ("plain.npy", zero_filled_npy(64))})
    assert r.status_code == 303
    page = uma.get(r.headers["location"])
    assert page.status_code == 200 and "No-JS set" in page.text and "plain.npy" in page.text
