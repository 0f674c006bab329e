"""A folder (or an extracted archive) analysed group by group.

Groups: one per DICOM series (and per multi-frame DICOM file), one per stack of
same-format images in one sub-folder, one per array or NIfTI file. A group that
cannot be read becomes a warning; the folder fails only when no group is left.
"""

from __future__ import annotations

import os
from collections import defaultdict
from pathlib import Path

from app.errors import InputError
from app.io.formats import family_of
from app.io.options import ReadOptions, one_line
from app.io.readers import read_file_family
from app.io.volume import Volume


def list_files(folder: Path, opts: ReadOptions) -> list[tuple[Path, int]]:
    """All regular files below ``folder`` with their sizes, in sorted order.

    Hidden entries, resource forks (``__MACOSX``) and symbolic links are left out.
    """
    out: list[tuple[Path, int]] = []
    stack = [folder]
    while stack:
        here = stack.pop()
        try:
            entries = sorted(os.scandir(here), key=lambda e: e.name)
        except OSError as exc:
            raise InputError("unreadable", f"{here.name} cannot be listed: {one_line(exc)}",
                             str(here)) from exc
        subdirs = []
        for e in entries:
            if e.name.startswith(".") or e.name == "__MACOSX" or e.is_symlink():
                continue
            if e.is_dir(follow_symlinks=False):
                subdirs.append(Path(e.path))
            elif e.is_file(follow_symlinks=False):
                out.append((Path(e.path), e.stat(follow_symlinks=False).st_size))
                if len(out) > opts.limits.max_files:
                    raise InputError("too_many_files", f"{folder.name} holds more than "
                                     f"{opts.limits.max_files} files (RAWPROOF_MAX_FILES).",
                                     str(folder))
        stack.extend(reversed(subdirs))
    return out


def read_folder(folder: Path, opts: ReadOptions) -> tuple[list[Volume], int]:
    """Read every group of a folder.

    Returns
    -------
    volumes : list of Volume
    n_files : int
        Files that belong to a readable family.

    Raises
    ------
    InputError
        ``empty`` (no files), ``no_readable_files`` (nothing rawproof reads),
        or the first group's error when no group could be read.
    """
    files = list_files(folder, opts)
    if not files:
        raise InputError("empty", f"The folder {folder.name} is empty.", str(folder))
    by_family: dict[str, list[Path]] = defaultdict(list)
    skipped = []
    for p, size in files:
        if size == 0:
            skipped.append(p.name)
            continue
        if p.name.upper() == "DICOMDIR":
            continue  # the media directory indexes the images; it holds none itself
        fam = family_of(p)
        if fam is None:
            if p.suffix.lower() != ".json":
                skipped.append(p.name)
            continue
        by_family[fam].append(p)
    if not by_family:
        raise InputError("no_readable_files", f"The folder {folder.name} holds no file rawproof "
                         f"reads ({len(files)} file(s) of other types or empty); give DICOM, "
                         "NIfTI, NumPy, HDF5, PNG, JPEG or TIFF files.", str(folder))
    if skipped:
        shown = ", ".join(skipped[:5]) + (" ..." if len(skipped) > 5 else "")
        opts.warnings.append(f"{len(skipped)} file(s) were skipped (empty or of unknown type): "
                             f"{shown}")
    groups: list[tuple[str, list[Path]]] = []
    if "dicom" in by_family:
        groups.append(("dicom", by_family.pop("dicom")))
    if "zip" in by_family:
        for p in by_family.pop("zip"):
            opts.warnings.append(f"{p.name} is a nested archive; it was not extracted.")
    for fam in ("png", "jpeg", "tiff"):
        stacks: dict[Path, list[Path]] = defaultdict(list)
        for p in by_family.pop(fam, []):
            stacks[p.parent].append(p)
        groups.extend((fam, ps) for _parent, ps in sorted(stacks.items()))
    for fam, ps in sorted(by_family.items()):
        groups.extend((fam, [p]) for p in ps)
    volumes: list[Volume] = []
    first_error: InputError | None = None
    n_files = 0
    for fam, ps in groups:
        try:
            vols = read_file_family(fam, ps, opts, folder=folder)
        except InputError as exc:
            first_error = first_error or exc
            opts.warnings.append(f"skipped: {exc.message}")
            continue
        volumes.extend(vols)
        n_files += len(ps)
    if not volumes:
        assert first_error is not None
        raise first_error
    return volumes, n_files
