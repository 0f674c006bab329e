"""Opening an input: a file, folder or zip archive -> groups of Volumes."""

from __future__ import annotations

import contextlib
import tempfile
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path

from app.config import Limits
from app.errors import InputError
from app.io.archive import extract_zip
from app.io.folder import read_folder
from app.io.formats import family_of
from app.io.options import ReadOptions
from app.io.readers import read_file_family
from app.io.volume import Volume

__all__ = ["Loaded", "open_input"]


@dataclass
class Loaded:
    """What :func:`open_input` yields: the Volumes of one input, one per group."""

    volumes: list[Volume]
    format: str
    n_files: int
    warnings: list[str] = field(default_factory=list)


def _single_format(volumes: list[Volume], fallback: str) -> str:
    formats = {v.format for v in volumes}
    return formats.pop() if len(formats) == 1 else fallback


@contextlib.contextmanager
def open_input(
    path: str | Path,
    *,
    domain: str | None = None,
    coil_axis: int | None = None,
    dataset: str | None = None,
    limits: Limits | None = None,
) -> Iterator[Loaded]:
    """Open a file, folder or zip archive as groups of Volumes.

    A context manager: temporary extractions (zip) and open HDF5 files live
    until it exits.

    Parameters
    ----------
    path : str or Path
        A file (``.dcm``, ``.nii``, ``.nii.gz``, ``.npy``, ``.npz``, ``.h5``,
        ``.png``, ``.jpg``, ``.tif``), a folder, or a ``.zip``.
    domain : {"image", "kspace"}, optional
        Overrides what the file or its sidecar says.
    coil_axis : int, optional
        Axis of a multi-coil array that holds receive channels.
    dataset : str, optional
        HDF5 dataset (or npz array) to analyse.
    limits : Limits, optional

    Yields
    ------
    Loaded
        ``format`` is the file's format, ``"zip"`` for an archive, ``"folder"``
        for a folder of mixed content (a folder of one kind has that kind).

    Raises
    ------
    InputError
        For anything that cannot be read, with a code and a message a person can act on.
    """
    p = Path(path)
    if domain is not None and domain not in ("image", "kspace"):
        raise InputError("bad_option", f"domain must be 'image' or 'kspace', not {domain!r}")
    if not p.exists():
        raise InputError("not_found", f"No such file or folder: {p}", str(p))
    with contextlib.ExitStack() as stack:
        opts = ReadOptions(domain=domain, coil_axis=coil_axis, dataset=dataset,
                           limits=limits or Limits(), stack=stack)
        if p.is_dir():
            volumes, n_files = read_folder(p, opts)
            fmt = _single_format(volumes, "folder")
            yield Loaded(volumes, fmt, n_files, opts.warnings)
            return
        loaded = _open_file(p, opts, stack)
        yield loaded


def _open_file(p: Path, opts: ReadOptions, stack: contextlib.ExitStack) -> Loaded:
    try:
        size = p.stat().st_size
    except OSError as exc:
        raise InputError("unreadable", f"{p.name} cannot be read: {exc}", str(p)) from exc
    if size == 0:
        raise InputError("empty_file", f"{p.name} is empty (0 bytes).", str(p))
    family = family_of(p)
    if family is None:
        raise InputError("unsupported_format", f"rawproof does not read {p.name}: give a .dcm, "
                         ".nii, .nii.gz, .npy, .npz, .h5, .png, .jpg, .tif file, a folder or "
                         "a .zip.", str(p))
    if family == "zip":
        tmp = Path(stack.enter_context(tempfile.TemporaryDirectory(prefix="rawproof-zip-")))
        opts.warnings.extend(extract_zip(p, tmp, opts.limits))
        if not any(tmp.iterdir()):
            raise InputError("empty", f"{p.name} holds no file to analyse.", str(p))
        volumes, n_files = read_folder(tmp, opts)
        for v in volumes:
            v.source_files = [_relabel(f, tmp, p) for f in v.source_files]
        return Loaded(volumes, "zip", n_files, opts.warnings)
    volumes = read_file_family(family, [p], opts)
    return Loaded(volumes, volumes[0].format, 1, opts.warnings)


def _relabel(f: str, tmp: Path, archive: Path) -> str:
    try:
        return f"{archive}:{Path(f).relative_to(tmp).as_posix()}"
    except ValueError:
        return f
