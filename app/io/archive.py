"""Safe extraction of ZIP archives into a temporary folder.

Refused, with the offending member named: absolute paths and ``..`` members,
symbolic links (Unix mode in ``external_attr``), encrypted members, more members
than ``Limits.max_zip_members``, declared sizes or compression ratios beyond the
limits (zip bombs). Declared sizes are checked first; bytes are also counted
while extracting, so a member whose header lies is stopped too. Nested archives
are not extracted (a warning says so).

References
----------
PKWARE, APPNOTE.TXT .ZIP File Format Specification, 4.4.15 (external file
attributes), 4.4.8-4.4.9 (sizes). Zip-bomb checks: common practice, no source.
"""

from __future__ import annotations

import stat
import zipfile
import zlib
from pathlib import Path, PurePosixPath

from app.config import Limits
from app.errors import InputError
from app.io.formats import family_from_name
from app.io.options import one_line

_CHUNK = 1 << 20
#: Ratio checks start above this uncompressed size: small files of zeros
#: compress far beyond any bomb ratio without being a danger.
_RATIO_MIN_BYTES = 1 << 20


def _safe_name(name: str) -> PurePosixPath | None:
    """The member's relative path, or None when it escapes the target folder."""
    n = name.replace("\\", "/")
    if n.startswith("/") or (len(n) > 1 and n[1] == ":"):
        return None
    p = PurePosixPath(n)
    if any(part == ".." for part in p.parts):
        return None
    return p


#: side files extracted beside the data they describe (JSON sidecars), and their size cap
_SIDE_SUFFIXES = (".json",)
_SIDE_MAX_BYTES = 1 << 20


def _wanted(zf: zipfile.ZipFile, info: zipfile.ZipInfo, rel: PurePosixPath) -> bool:
    """Whether a member is of a type the readers open, decided before it is extracted.

    By name (:func:`app.io.formats.family_from_name`), small JSON sidecars, and
    for names without a known suffix the DICOM magic ``DICM`` at byte 128 of the
    member's first bytes (NEMA PS3.10, 7.1), read from the archive stream.
    """
    name = rel.name
    if family_from_name(name) is not None:
        return True
    if rel.suffix.lower() in _SIDE_SUFFIXES:
        return info.file_size <= _SIDE_MAX_BYTES
    if info.file_size < 132:
        return False
    try:
        with zf.open(info) as src:
            head = src.read(132)
    except (zipfile.BadZipFile, OSError, EOFError, RuntimeError, zlib.error,
            NotImplementedError, ValueError):
        return False
    return head[128:132] == b"DICM"


def extract_zip(archive: Path, target: Path, limits: Limits) -> list[str]:
    """Extract ``archive`` into ``target`` after checking every member.

    Parameters
    ----------
    archive : Path
    target : Path
        An empty folder (a temporary directory the caller removes).
    limits : Limits

    Returns
    -------
    list of str
        Warnings (skipped nested archives, resource forks and members of a type
        no reader opens: those are never written).

    Raises
    ------
    InputError
        ``unsafe_archive`` (path traversal, links, encrypted members),
        ``zip_bomb`` (sizes or ratios beyond the limits), ``unreadable``.
    """
    try:
        zf = zipfile.ZipFile(archive)
    except (zipfile.BadZipFile, OSError, NotImplementedError, ValueError, EOFError) as exc:
        raise InputError("unreadable", f"{archive.name} is not a readable ZIP archive: "
                         f"{one_line(exc)}", str(archive)) from exc
    warnings: list[str] = []
    with zf:
        infos = zf.infolist()
        if len(infos) > limits.max_zip_members:
            raise InputError("zip_bomb", f"{archive.name} has {len(infos)} members, more than "
                             f"the limit of {limits.max_zip_members}.", str(archive))
        plan: list[tuple[zipfile.ZipInfo, PurePosixPath]] = []
        total = 0
        skipped = 0
        for info in infos:
            where = f"{archive.name}:{info.filename}"
            if not info.filename.strip("/\\"):
                raise InputError("unreadable", f"{archive.name} has a member without a name "
                                 "(a damaged archive); refusing to extract.", str(archive))
            rel = _safe_name(info.filename)
            if rel is None:
                raise InputError("unsafe_archive", f"{where}: the member's path is absolute or "
                                 "climbs out of the archive with '..'; refusing to extract.",
                                 where)
            mode = (info.external_attr >> 16) & 0xFFFF
            if stat.S_ISLNK(mode):
                raise InputError("unsafe_archive", f"{where} is a symbolic link; archives with "
                                 "links are refused.", where)
            if info.flag_bits & 0x1:
                raise InputError("unsafe_archive", f"{where} is encrypted; give an "
                                 "unencrypted archive.", where)
            if info.is_dir():
                continue
            if info.file_size > limits.max_zip_member_bytes:
                raise InputError("zip_bomb", f"{where} declares {info.file_size} bytes, more "
                                 f"than the per-member limit of {limits.max_zip_member_bytes}.",
                                 where)
            if info.file_size >= _RATIO_MIN_BYTES and info.file_size > limits.max_zip_ratio * max(
                    info.compress_size, 1):
                raise InputError("zip_bomb", f"{where} expands {info.file_size} bytes from "
                                 f"{info.compress_size} (ratio "
                                 f"{info.file_size / max(info.compress_size, 1):.0f}, limit "
                                 f"{limits.max_zip_ratio:.0f}); looks like a zip bomb.", where)
            total += info.file_size
            if total > limits.max_zip_total_bytes:
                raise InputError("zip_bomb", f"{archive.name} declares more than "
                                 f"{limits.max_zip_total_bytes} bytes in total.", str(archive))
            parts = rel.parts
            if parts and (parts[0] == "__MACOSX" or parts[-1].startswith("._")):
                continue
            if rel.suffix.lower() == ".zip":
                warnings.append(f"{archive.name}:{info.filename} is a nested archive; it was "
                                "not extracted (unpack it and analyse it separately).")
                continue
            if not _wanted(zf, info, rel):
                skipped += 1
                continue
            plan.append((info, rel))
        if skipped:
            warnings.append(f"{archive.name}: {skipped} member(s) of a type rawproof does not "
                            "read were not extracted.")
        written = 0
        for info, rel in plan:
            where = f"{archive.name}:{info.filename}"
            dest = target.joinpath(*rel.parts)
            count = 0
            try:
                dest.parent.mkdir(parents=True, exist_ok=True)
                with zf.open(info) as src, open(dest, "wb") as out:
                    while True:
                        chunk = src.read(_CHUNK)
                        if not chunk:
                            break
                        count += len(chunk)
                        written += len(chunk)
                        if count > info.file_size or count > limits.max_zip_member_bytes or \
                                written > limits.max_zip_total_bytes:
                            raise InputError("zip_bomb", f"{where} expands beyond its declared "
                                             "size or the limits; extraction stopped.", where)
                        out.write(chunk)
            except (zipfile.BadZipFile, OSError, EOFError, RuntimeError, zlib.error,
                    NotImplementedError, ValueError) as exc:
                # an OSError names the extraction folder: say only what went wrong
                reason = (exc.strerror or type(exc).__name__) if isinstance(exc, OSError) \
                    and exc.filename else one_line(exc)
                raise InputError("unreadable", f"{where} could not be extracted: {reason}",
                                 where) from exc
    return warnings
