"""The content-addressed file store under the data folder.

A file's bytes live once at ``<data_dir>/store/ab/abcdef...`` (its sha256);
datasets link to them under their original, sanitised relative names. Uploads
are written to ``<data_dir>/tmp`` while they are hashed, then moved into place
in one rename, so a half-written upload never appears in the store.
"""

from __future__ import annotations

import hashlib
import os
import re
import shutil
import time
import unicodedata
import uuid
from dataclasses import dataclass
from pathlib import Path, PurePosixPath

from app.config import Settings
from app.store.errors import ValidationError

CHUNK = 1 << 20

_UNSAFE_CHARS = re.compile(r"[\x00-\x1f\x7f<>:\"|?*]")


class UploadTooLargeError(ValidationError):
    """An upload went past the configured size limit while streaming."""

    status_code = 413
    title = "Upload too large"


def blob_path(settings: Settings, sha256: str) -> Path:
    """Where the bytes with this sha256 live."""
    if not re.fullmatch(r"[0-9a-f]{64}", sha256):
        raise ValueError(f"not a sha256 hex digest: {sha256!r}")
    return settings.store_dir / sha256[:2] / sha256


def tmp_dir(settings: Settings) -> Path:
    path = settings.data_dir / "tmp"
    path.mkdir(parents=True, exist_ok=True)
    return path


#: an upload's ``.part`` file or a job's work folder untouched this long is left over
#: from a process that was killed (a live upload writes, a live job logs progress)
STALE_TMP_SECONDS = 6 * 3600


def _newest_mtime(path: Path) -> float:
    newest = path.lstat().st_mtime
    if path.is_dir() and not path.is_symlink():
        for child in path.rglob("*"):
            try:
                newest = max(newest, child.lstat().st_mtime)
            except OSError:
                continue
    return newest


def sweep_tmp(settings: Settings, *, older_than: float = STALE_TMP_SECONDS,
              now: float | None = None) -> int:
    """Remove uploads and job folders in ``tmp/`` that a killed process left behind.

    Only ``upload-*.part`` files and ``job-*`` folders whose newest entry is older
    than ``older_than`` seconds; returns how many were removed.
    """
    now = time.time() if now is None else now
    removed = 0
    for entry in tmp_dir(settings).iterdir():
        is_upload = entry.name.startswith("upload-") and entry.name.endswith(".part")
        is_job = entry.name.startswith("job-") and entry.is_dir() and not entry.is_symlink()
        if not (is_upload or is_job):
            continue
        try:
            if now - _newest_mtime(entry) < older_than:
                continue
            if is_job:
                shutil.rmtree(entry)
            else:
                entry.unlink()
            removed += 1
        except OSError:
            continue
    return removed


def previews_file(settings: Settings, report_id: int) -> Path:
    """The ``previews.npz`` stored beside report ``report_id`` (it may not exist)."""
    return settings.data_dir / "reports" / str(int(report_id)) / "previews.npz"


#: longest part of a stored relative name, in UTF-8 bytes (file systems count
#: NAME_MAX = 255 bytes, and a 200-character non-ASCII name can take 800)
PART_BYTES = 180
_DRIVE = re.compile(r"[A-Za-z]:")
_SUFFIX = re.compile(r"(\.[A-Za-z0-9]{1,8}){1,2}$")


def _shorten(part: str) -> str:
    """``part`` if it fits :data:`PART_BYTES`, else its start, a hash of the whole and
    its suffix (``.nii.gz`` kept, so that the reader is still chosen by it)."""
    raw = part.encode("utf-8")
    if len(raw) <= PART_BYTES:
        return part
    m = _SUFFIX.search(part)
    suffix = m.group(0) if m else ""
    digest = hashlib.sha256(raw).hexdigest()[:16]
    room = PART_BYTES - len(suffix.encode()) - len(digest) - 1
    head = part[: len(part) - len(suffix)].encode("utf-8")[:room].decode("utf-8", "ignore")
    return f"{head}-{digest}{suffix}"


def sanitise_relative_name(name: str) -> str:
    """Turn a browser- or archive-supplied relative name into a safe relative path.

    Backslashes become slashes; empty, ``.`` and ``..`` parts, a drive letter
    (``C:``, with its colon, in front), control and reserved characters are
    dropped; a one-letter folder (``A/IM1.npy``) is a folder. A part longer than
    :data:`PART_BYTES` bytes of UTF-8 is shortened with a hash of the whole, so
    different long names stay different. The result is never absolute and
    never empty.
    """
    name = unicodedata.normalize("NFC", str(name)).replace("\\", "/")
    parts = []
    for i, raw in enumerate(name.split("/")):
        if i == 0 and _DRIVE.fullmatch(raw.strip()):
            continue  # "C:/scans/a.dcm" or "C:\\scans\\a.dcm"
        part = _UNSAFE_CHARS.sub("", raw).strip().strip(".") if raw not in (".", "..") else ""
        if part:
            parts.append(_shorten(part))
    return str(PurePosixPath(*parts)) if parts else "file"


@dataclass
class StoredBlob:
    sha256: str
    size: int
    path: Path
    created: bool


class HashingWriter:
    """Write a stream to a temporary file while hashing it; commit into the store.

    Parameters
    ----------
    settings : Settings
    budget : callable, optional
        Called with the number of bytes about to be written; raises
        :class:`UploadTooLargeError` to stop the stream (the partial file is removed).
    """

    def __init__(self, settings: Settings, budget=None) -> None:  # noqa: ANN001
        self.settings = settings
        self.budget = budget
        self.tmp = tmp_dir(settings) / f"upload-{uuid.uuid4().hex}.part"
        self._fh = open(self.tmp, "wb")  # noqa: SIM115 - closed in commit/abort
        self._hash = hashlib.sha256()
        self.size = 0

    def write(self, chunk: bytes) -> None:
        if self.budget is not None:
            self.budget(len(chunk))
        self._fh.write(chunk)
        self._hash.update(chunk)
        self.size += len(chunk)

    def abort(self) -> None:
        """Close and remove the partial file."""
        if not self._fh.closed:
            self._fh.close()
        self.tmp.unlink(missing_ok=True)

    def commit(self) -> StoredBlob:
        """Move the finished file to its content address (or drop it if already there)."""
        self._fh.flush()
        os.fsync(self._fh.fileno())
        self._fh.close()
        sha = self._hash.hexdigest()
        dest = blob_path(self.settings, sha)
        if dest.exists():
            self.tmp.unlink(missing_ok=True)
            return StoredBlob(sha, self.size, dest, created=False)
        dest.parent.mkdir(parents=True, exist_ok=True)
        os.replace(self.tmp, dest)
        os.chmod(dest, 0o444)
        return StoredBlob(sha, self.size, dest, created=True)


def store_bytes(settings: Settings, data: bytes) -> StoredBlob:
    """Put ``data`` into the store."""
    writer = HashingWriter(settings)
    try:
        writer.write(data)
    except BaseException:
        writer.abort()
        raise
    return writer.commit()


def store_path(settings: Settings, path: Path) -> StoredBlob:
    """Copy the file at ``path`` into the store, hashing it on the way."""
    writer = HashingWriter(settings)
    try:
        with open(path, "rb") as fh:
            while chunk := fh.read(CHUNK):
                writer.write(chunk)
    except BaseException:
        writer.abort()
        raise
    return writer.commit()


def assemble_folder(settings: Settings, items: list[tuple[str, str]], dest: Path) -> Path:
    """Lay out a dataset's files under their relative names in ``dest``.

    Hard links where the file system allows, copies otherwise, so that readers
    that group a folder by file names see the original layout.

    Parameters
    ----------
    items : list of (relative_name, sha256)
    dest : Path
        An empty folder.

    Returns
    -------
    Path
        The path to analyse: the single file itself for a one-file dataset, else ``dest``.
    """
    dest.mkdir(parents=True, exist_ok=True)
    placed = []
    for rel, sha in items:
        target = dest / sanitise_relative_name(rel)
        target.parent.mkdir(parents=True, exist_ok=True)
        src = blob_path(settings, sha)
        try:
            os.link(src, target)
        except OSError:
            shutil.copyfile(src, target)
        placed.append(target)
    return placed[0] if len(placed) == 1 else dest


#: a stored file no database row refers to is removed once it is this old; younger
#: ones may belong to an upload whose database commit is still on its way
ORPHAN_GRACE_SECONDS = 15 * 60


def remove_orphans(settings: Settings, *, older_than: float = ORPHAN_GRACE_SECONDS,
                   now: float | None = None) -> tuple[int, int]:
    """Remove files in the store that no ``files`` row refers to.

    Such a file is left when an upload's bytes reached the store but its
    database commit failed (a full disk, a killed server). Returns (files
    removed, bytes freed).
    """
    from sqlalchemy import select

    from app.store.db import database
    from app.store.models import StoredFile

    if not settings.store_dir.is_dir():
        return 0, 0
    now = time.time() if now is None else now
    with database(settings).scope(write=False) as s:
        known = set(s.scalars(select(StoredFile.sha256)))
    removed = freed = 0
    for sub in settings.store_dir.iterdir():
        if not sub.is_dir() or sub.is_symlink() or not re.fullmatch(r"[0-9a-f]{2}", sub.name):
            continue
        for entry in sub.iterdir():
            if entry.name in known or not re.fullmatch(r"[0-9a-f]{64}", entry.name):
                continue
            try:
                st = entry.lstat()
                if now - st.st_mtime < older_than:
                    continue
                entry.unlink()
            except OSError:
                continue
            removed += 1
            freed += st.st_size
    return removed, freed
