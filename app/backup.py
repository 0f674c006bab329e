"""Consistent backups of a rawproof data folder, and their verified restore.

A backup is a folder::

    DEST/rawproof.sqlite3     the database, copied with SQLite's online backup API
    DEST/store/ab/abcd...     every stored file the copied database refers to
    DEST/reports/...          stored previews beside the reports
    DEST/manifest.json        sha256 and size of each file above, written last

Consistency while the server runs: the database is copied first, as one
snapshot (``sqlite3.Connection.backup`` copies a consistent image even while
other connections write; a WAL database is read at one point in time). Stored
files are content-addressed and never change once stored, and a file reaches
the store before the database row that names it is committed, so every file
the snapshot names is already on disk when the copy of the store begins. Each
copied file is hashed on the way and must match its content address. The
manifest is written last through a rename: a backup without a manifest is
incomplete and restore refuses it.

Restore checks every file of the manifest (size and sha256) before anything is
written, names the first file that does not match, and then fills a fresh data
folder through a temporary sibling renamed into place, so a failed restore
leaves no half-filled data folder.

References
----------
SQLite Online Backup API, https://www.sqlite.org/backup.html (exposed in
Python as ``sqlite3.Connection.backup``); FIPS 180-4 (SHA-256).
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import sqlite3
import tempfile
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path

import app
from app.config import Settings
from app.errors import RawproofError

MANIFEST = "manifest.json"
SCHEMA = "rawproof.backup/1"
DB_NAME = "rawproof.sqlite3"
_CHUNK = 1 << 20


class BackupError(RawproofError):
    """A backup or restore that cannot be done; ``message`` says why, ``path`` names the file."""

    def __init__(self, message: str, path: str | None = None) -> None:
        super().__init__(message)
        self.message = message
        self.path = path


@dataclass
class BackupSummary:
    """What a backup or restore handled."""

    folder: Path
    n_files: int = 0
    n_bytes: int = 0
    counts: dict[str, int] = field(default_factory=dict)


def sqlite_path(settings: Settings) -> Path:
    """The SQLite database file of ``settings`` (refuses other databases)."""
    url = settings.db_url
    if not url.startswith("sqlite:///"):
        raise BackupError("rawproof backup copies SQLite databases; for another database use "
                          "its own tools (for PostgreSQL, pg_dump) and back up the data "
                          "folder's store/ beside it.")
    return Path(url[len("sqlite:///"):])


def _sha256_file(path: Path) -> tuple[str, int]:
    h = hashlib.sha256()
    n = 0
    with open(path, "rb") as fh:
        while chunk := fh.read(_CHUNK):
            h.update(chunk)
            n += len(chunk)
    return h.hexdigest(), n


def _copy_hashed(src: Path, dest: Path) -> tuple[str, int]:
    """Copy ``src`` to ``dest``, hashing the bytes as they are written; fsync the copy."""
    dest.parent.mkdir(parents=True, exist_ok=True)
    h = hashlib.sha256()
    n = 0
    with open(src, "rb") as fin, open(dest, "wb") as fout:
        while chunk := fin.read(_CHUNK):
            fout.write(chunk)
            h.update(chunk)
            n += len(chunk)
        fout.flush()
        os.fsync(fout.fileno())
    return h.hexdigest(), n


def _empty_target(dest: Path, what: str) -> None:
    if dest.exists() and (not dest.is_dir() or any(dest.iterdir())):
        raise BackupError(f"{dest} already exists and is not an empty folder; give a new "
                          f"folder for the {what}.", str(dest))


def _snapshot_database(src_db: Path, dest_db: Path) -> None:
    if not src_db.exists():
        raise BackupError(f"no database at {src_db}: is this a rawproof data folder?",
                          str(src_db))
    dest_db.parent.mkdir(parents=True, exist_ok=True)
    src = sqlite3.connect(f"file:{src_db}?mode=ro", uri=True, timeout=30)
    dst = sqlite3.connect(dest_db)
    try:
        src.execute("PRAGMA busy_timeout=30000")
        src.backup(dst)
        dst.execute("PRAGMA journal_mode=DELETE")  # one self-contained file in the backup
        dst.commit()
    finally:
        dst.close()
        src.close()


def _referenced_blobs(db: Path) -> list[str]:
    con = sqlite3.connect(f"file:{db}?mode=ro", uri=True)
    try:
        return [row[0] for row in con.execute("SELECT sha256 FROM files ORDER BY id")]
    finally:
        con.close()


def _report_ids(db: Path) -> list[int]:
    con = sqlite3.connect(f"file:{db}?mode=ro", uri=True)
    try:
        return [int(row[0]) for row in con.execute("SELECT id FROM reports ORDER BY id")]
    finally:
        con.close()


def _counts(db: Path) -> dict[str, int]:
    con = sqlite3.connect(f"file:{db}?mode=ro", uri=True)
    try:
        names = [r[0] for r in con.execute(
            "SELECT name FROM sqlite_master WHERE type='table' AND name NOT LIKE 'sqlite_%'")]
        wanted = ["users", "datasets", "files", "jobs", "reports", "comments", "decisions"]
        return {t: int(con.execute(f'SELECT COUNT(*) FROM "{t}"').fetchone()[0])
                for t in wanted if t in names}
    finally:
        con.close()


def _write_manifest(folder: Path, entries: list[dict], counts: dict[str, int]) -> None:
    doc = {
        "schema": SCHEMA,
        "created": datetime.now(timezone.utc).isoformat(timespec="seconds"),
        "tool_version": app.__version__,
        "counts": counts,
        "files": entries,
    }
    tmp = folder / (MANIFEST + ".part")
    with open(tmp, "w", encoding="utf-8") as fh:
        json.dump(doc, fh, indent=1)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, folder / MANIFEST)


def backup(settings: Settings, dest: Path) -> BackupSummary:
    """Write a consistent copy of the data folder of ``settings`` into ``dest``.

    Parameters
    ----------
    settings : Settings
        The running (or stopped) installation to copy.
    dest : Path
        A folder that does not exist yet, or an empty one.

    Returns
    -------
    BackupSummary

    Raises
    ------
    BackupError
        ``dest`` not empty, no SQLite database, or a stored file whose bytes no
        longer match its content address (named).

    References
    ----------
    SQLite Online Backup API (https://www.sqlite.org/backup.html).
    """
    dest = Path(dest).resolve()
    _empty_target(dest, "backup")
    src_db = sqlite_path(settings)
    dest.mkdir(parents=True, exist_ok=True)
    db_copy = dest / DB_NAME
    _snapshot_database(src_db, db_copy)
    entries: list[dict] = []
    sha, size = _sha256_file(db_copy)
    entries.append({"path": DB_NAME, "sha256": sha, "size": size})
    summary = BackupSummary(dest, counts=_counts(db_copy))
    for blob in _referenced_blobs(db_copy):
        rel = Path("store") / blob[:2] / blob
        src = settings.data_dir / rel
        if not src.exists():
            raise BackupError(f"the stored file {rel} named by the database is missing from "
                              f"{settings.data_dir}; the data folder is damaged.", str(src))
        sha, size = _copy_hashed(src, dest / rel)
        if sha != blob:
            raise BackupError(f"the stored file {rel} does not match its sha256 (its bytes "
                              "changed on disk); the data folder is damaged.", str(src))
        entries.append({"path": rel.as_posix(), "sha256": sha, "size": size})
    for rid in _report_ids(db_copy):
        folder = settings.data_dir / "reports" / str(rid)
        if not folder.is_dir():
            continue
        for f in sorted(folder.rglob("*")):
            # figure caches are written to hidden temporaries and renamed into place
            if (f.is_file() and not f.is_symlink() and not f.name.startswith(".")
                    and not f.name.endswith(".part")):
                rel = f.relative_to(settings.data_dir)
                sha, size = _copy_hashed(f, dest / rel)
                entries.append({"path": rel.as_posix(), "sha256": sha, "size": size})
    _write_manifest(dest, entries, summary.counts)
    summary.n_files = len(entries)
    summary.n_bytes = sum(e["size"] for e in entries)
    return summary


def read_manifest(src: Path) -> dict:
    """The manifest of backup folder ``src``, checked for its shape."""
    path = Path(src) / MANIFEST
    try:
        doc = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError as exc:
        raise BackupError(f"{src} has no {MANIFEST}: not a rawproof backup, or one that did "
                          "not finish.", str(path)) from exc
    except (OSError, ValueError) as exc:
        raise BackupError(f"{path} cannot be read: {exc}", str(path)) from exc
    if not isinstance(doc, dict) or doc.get("schema") != SCHEMA or not isinstance(
            doc.get("files"), list):
        raise BackupError(f"{path} is not a {SCHEMA} manifest.", str(path))
    return doc


def _safe_rel(rel: str) -> Path:
    p = Path(rel)
    if p.is_absolute() or ".." in p.parts or not p.parts:
        raise BackupError(f"the manifest names {rel!r}, which is outside the backup folder.",
                          rel)
    return p


def verify(src: Path) -> dict:
    """Check every file the manifest of ``src`` lists; return the manifest.

    Raises
    ------
    BackupError
        Naming the first file that is missing or whose size or sha256 differs.
    """
    src = Path(src).resolve()
    doc = read_manifest(src)
    listed = set()
    for entry in doc["files"]:
        rel = _safe_rel(str(entry.get("path", "")))
        listed.add(rel.as_posix())
        f = src / rel
        if not f.is_file() or f.is_symlink():
            raise BackupError(f"{rel.as_posix()} is listed in the manifest but missing from "
                              f"{src}; refusing to restore.", rel.as_posix())
        sha, size = _sha256_file(f)
        if size != entry.get("size") or sha != entry.get("sha256"):
            raise BackupError(f"{rel.as_posix()} does not match the manifest (sha256 {sha[:12]}"
                              f"... size {size}, expected {str(entry.get('sha256'))[:12]}... "
                              f"size {entry.get('size')}); refusing to restore.", rel.as_posix())
    if DB_NAME not in listed:
        raise BackupError(f"the manifest of {src} lists no {DB_NAME}.", str(src / MANIFEST))
    return doc


def restore(src: Path, data_dir: Path) -> BackupSummary:
    """Restore backup folder ``src`` into the fresh data folder ``data_dir``.

    Parameters
    ----------
    src : Path
        A folder written by :func:`backup`.
    data_dir : Path
        A data folder that does not exist yet, or an empty one.

    Raises
    ------
    BackupError
        A file that does not match the manifest (named), a target that is not
        empty, or a restored database that fails SQLite's integrity check.
    """
    src = Path(src).resolve()
    data_dir = Path(data_dir).resolve()
    _empty_target(data_dir, "restore")
    doc = verify(src)
    data_dir.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{data_dir.name}-restoring-", dir=data_dir.parent))
    try:
        n_bytes = 0
        for entry in doc["files"]:
            rel = _safe_rel(entry["path"])
            sha, size = _copy_hashed(src / rel, tmp / rel)
            if sha != entry["sha256"]:
                raise BackupError(f"{rel.as_posix()} changed while it was restored; "
                                  "refusing to restore.", rel.as_posix())
            if rel.parts[0] == "store":
                os.chmod(tmp / rel, 0o444)
            n_bytes += size
        con = sqlite3.connect(tmp / DB_NAME)
        try:
            result = con.execute("PRAGMA integrity_check").fetchone()[0]
        finally:
            con.close()
        if result != "ok":
            raise BackupError(f"the restored database fails SQLite's integrity check: {result}",
                              DB_NAME)
        if data_dir.exists():
            data_dir.rmdir()
        os.replace(tmp, data_dir)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return BackupSummary(data_dir, n_files=len(doc["files"]), n_bytes=n_bytes,
                         counts=dict(doc.get("counts", {})))
