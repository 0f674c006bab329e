"""Backup while the server runs, verified restore into a fresh folder, refusal on tampering.

What is checked against what: the source server's own API answers (datasets,
files with their sha256, reports, comments, decisions) are compared with a
second server started on the restored folder; the restored downloads are
hashed with hashlib (FIPS 180-4 SHA-256) against the sha256 the source
recorded at upload. The backup runs while a client keeps commenting
(SQLite's online backup API copies one consistent snapshot,
https://www.sqlite.org/backup.html): every comment acknowledged before the
backup started is in it, and each restored comment is identical to its
source. A manifest mismatch must be refused with the file named.
"""

from __future__ import annotations

import hashlib
import json
import subprocess
import threading
from pathlib import Path

import pytest

from app.cli import RAWPROOF_ARGV
from tests.server_harness import REPO, running_server, zero_filled_npy

pytestmark = pytest.mark.server

PW = {"ada": "ada-password-1", "ben": "ben-password-1"}


def _rawproof(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([*RAWPROOF_ARGV, *args], capture_output=True, text=True, timeout=120,
                          cwd=REPO)


@pytest.fixture(scope="module")
def source(tmp_path_factory):
    with running_server(tmp_path_factory.mktemp("source"), worker=True) as srv:
        srv.add_users(PW, admins=("ada",))
        yield srv


def _snapshot(member, ids: list[int]) -> dict:
    out = {}
    for ds in ids:
        info = member.get(f"/api/datasets/{ds}").json()
        out[ds] = {
            "name": info["name"], "source": info["source"], "licence": info["licence"],
            "files": [(f["name"], f["sha256"], f["size"]) for f in info["files"]],
            "file_ids": [f["id"] for f in info["files"]],
            "verdict": info["verdict"], "report_id": info["report_id"],
            "report": member.get(f"/api/datasets/{ds}/report").json(),
            "reports": [r["id"] for r in member.get(f"/api/datasets/{ds}/reports").json()
                        ["reports"]],
            "comments": member.get(f"/api/datasets/{ds}/comments").json()["comments"],
            "decisions": member.get(f"/api/datasets/{ds}/decisions").json(),
        }
    return out


@pytest.fixture(scope="module")
def backed_up(source, tmp_path_factory):
    """Two analysed datasets with comments and decisions, then a backup taken while a
    client keeps adding comments."""
    ada, ben = source.login("ada", PW["ada"]), source.login("ben", PW["ben"])
    ids = [ada.upload_files(f"Backup set {k}", [("scan.npy", zero_filled_npy(90 + k))],
                            source=f"https://data.example.org/backup-{k}")["dataset_id"]
           for k in range(2)]
    for ds in ids:
        assert ada.wait_for_job(ds)["state"] == "done"
        assert ben.post_form(f"/datasets/{ds}/comments", {"body": f"checked set {ds}"}
                             ).status_code == 303
        r = ben.post_form(f"/datasets/{ds}/decisions", {
            "outcome": "downstream_only", "rationale": "zero-filled 2x; magnitude only",
            "expected_current_id": "0"}, page=f"/datasets/{ds}")
        assert r.status_code == 303, r.text[:300]
    before = _snapshot(ada, ids)

    acknowledged: list[int] = []
    stop = threading.Event()

    def keep_commenting() -> None:
        token = ben.csrf()
        k = 0
        while not stop.is_set() and k < 400:
            r = ben.post(f"/datasets/{ids[0]}/comments",
                         data={"body": f"during backup {k}", "csrf_token": token})
            assert r.status_code == 303
            acknowledged.append(k)
            k += 1

    writer = threading.Thread(target=keep_commenting, daemon=True)
    writer.start()
    dest = tmp_path_factory.mktemp("backups") / "b1"
    try:
        res = source.cli("backup", str(dest), check=False)
    finally:
        stop.set()
        writer.join(timeout=60)
    assert res.returncode == 0, res.stderr
    after = _snapshot(ada, ids)
    return {"ids": ids, "before": before, "after": after, "dest": dest,
            "acknowledged": len(acknowledged)}


def test_backup_manifest_lists_every_file_with_its_sha256(backed_up, source) -> None:
    dest: Path = backed_up["dest"]
    manifest = json.loads((dest / "manifest.json").read_text())
    listed = {e["path"]: e for e in manifest["files"]}
    assert "rawproof.sqlite3" in listed
    for snap in backed_up["before"].values():
        for _name, sha, size in snap["files"]:
            entry = listed[f"store/{sha[:2]}/{sha}"]
            assert entry["size"] == size
            assert hashlib.sha256((dest / entry["path"]).read_bytes()).hexdigest() == sha
    for path, entry in listed.items():
        assert hashlib.sha256((dest / path).read_bytes()).hexdigest() == entry["sha256"]
    assert manifest["counts"]["datasets"] == 2 and manifest["counts"]["reports"] >= 2


def test_restore_into_a_fresh_folder_serves_everything(backed_up, tmp_path_factory) -> None:
    target = tmp_path_factory.mktemp("restored-parent") / "data"
    res = _rawproof("restore", str(backed_up["dest"]), "--data", str(target))
    assert res.returncode == 0, res.stderr
    with running_server(target, worker=False) as restored:
        ada = restored.login("ada", PW["ada"])
        got = _snapshot(ada, backed_up["ids"])
        listing = {d["id"]: d for d in ada.get("/api/datasets").json()["datasets"]}
        for ds, want in backed_up["before"].items():
            have = got[ds]
            for key in ("name", "source", "licence", "files", "verdict", "report_id",
                        "report", "reports", "decisions"):
                assert have[key] == want[key], (ds, key)
            # comments: everything acknowledged before the backup, each one unchanged,
            # nothing the source does not have (a consistent prefix of the source's)
            src_after = {c["id"]: c for c in backed_up["after"][ds]["comments"]}
            ids_have = [c["id"] for c in have["comments"]]
            assert [c["id"] for c in want["comments"]] == ids_have[:len(want["comments"])]
            for c in have["comments"]:
                assert c == src_after[c["id"]]
            assert ids_have == sorted(ids_have)
            assert listing[ds]["decision"] == "downstream_only"
            assert "checked set" in ada.get(f"/datasets/{ds}").text
            for link_id, (_name, sha, _size) in zip(have["file_ids"], want["files"],
                                                    strict=True):
                body = ada.get(f"/files/{link_id}/download").content
                assert hashlib.sha256(body).hexdigest() == sha
        n_restored = len(got[backed_up["ids"][0]]["comments"])
        n_before = len(backed_up["before"][backed_up["ids"][0]]["comments"])
        n_after = len(backed_up["after"][backed_up["ids"][0]]["comments"])
        assert n_before <= n_restored <= n_after
        print(f"\nbackup during writes: {backed_up['acknowledged']} comments acknowledged while "
              f"it ran; {n_restored - n_before} of them are in the snapshot")


def test_tampered_backup_is_refused_naming_the_file(backed_up, tmp_path) -> None:
    import shutil

    copy = tmp_path / "copy"
    shutil.copytree(backed_up["dest"], copy)
    sha = backed_up["before"][backed_up["ids"][1]]["files"][0][1]
    blob = copy / "store" / sha[:2] / sha
    blob.chmod(0o644)
    raw = bytearray(blob.read_bytes())
    raw[-1] ^= 0x01
    blob.write_bytes(bytes(raw))
    target = tmp_path / "data"
    res = _rawproof("restore", str(copy), "--data", str(target))
    assert res.returncode == 2
    assert f"store/{sha[:2]}/{sha}" in res.stderr and "refusing to restore" in res.stderr
    assert not target.exists()
    assert not [p for p in tmp_path.iterdir() if "restoring" in p.name]


def test_incomplete_or_foreign_backups_and_used_folders_are_refused(backed_up, tmp_path) -> None:
    import shutil

    copy = tmp_path / "copy"
    shutil.copytree(backed_up["dest"], copy)
    (copy / "manifest.json").unlink()
    res = _rawproof("restore", str(copy), "--data", str(tmp_path / "d1"))
    assert res.returncode == 2 and "no manifest.json" in res.stderr
    used = tmp_path / "used"
    used.mkdir()
    (used / "something").write_text("x")
    res = _rawproof("restore", str(backed_up["dest"]), "--data", str(used))
    assert res.returncode == 2 and "not an empty folder" in res.stderr
    assert (used / "something").read_text() == "x"
    res = _rawproof("backup", str(backed_up["dest"]), "--data", str(tmp_path / "d2"))
    assert res.returncode == 2 and "not an empty folder" in res.stderr


def test_missing_database_file_in_manifest_is_named(backed_up, tmp_path) -> None:
    import shutil

    copy = tmp_path / "copy"
    shutil.copytree(backed_up["dest"], copy)
    (copy / "rawproof.sqlite3").unlink()
    res = _rawproof("restore", str(copy), "--data", str(tmp_path / "d"))
    assert res.returncode == 2 and "rawproof.sqlite3 is listed in the manifest but missing" \
        in res.stderr


def test_other_databases_are_left_to_their_own_tools(tmp_path) -> None:
    """A PostgreSQL URL: the command says to use pg_dump instead of copying half."""
    from app.backup import BackupError, backup
    from app.config import Settings

    settings = Settings(data_dir=tmp_path / "data",
                        database_url="postgresql://lab@db.example/rawproof")
    with pytest.raises(BackupError, match="pg_dump"):
        backup(settings, tmp_path / "b")
    assert not (tmp_path / "b").exists()


def test_backup_of_a_damaged_store_is_refused_naming_the_file(backed_up, tmp_path) -> None:
    """A stored file whose bytes no longer match its sha256 name stops the backup."""
    data = tmp_path / "data"
    assert _rawproof("restore", str(backed_up["dest"]), "--data", str(data)).returncode == 0
    sha = backed_up["before"][backed_up["ids"][0]]["files"][0][1]
    blob = data / "store" / sha[:2] / sha
    blob.chmod(0o644)
    blob.write_bytes(blob.read_bytes() + b"!")
    res = _rawproof("backup", str(tmp_path / "b"), "--data", str(data))
    assert res.returncode == 2
    assert f"store/{sha[:2]}/{sha} does not match its sha256" in res.stderr
    assert not (tmp_path / "b" / "manifest.json").exists()
