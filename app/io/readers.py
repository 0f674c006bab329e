"""The readers of each family: a file family -> the reader that opens it.

The written list of readers (a new reader is one module of ``app/io`` and one
branch here). Readers are imported when first asked for, so opening a NumPy file
never loads pydicom or h5py.
"""

from __future__ import annotations

from pathlib import Path

from app.errors import InputError
from app.io.options import ReadOptions
from app.io.volume import Volume

__all__ = ["read_file_family"]


def read_file_family(family: str, paths: list[Path], opts: ReadOptions, *,
                     folder: Path | None = None) -> list[Volume]:
    """Read files of one reader family (several only for DICOM and image stacks)."""
    if family == "dicom":
        from app.io.dicom import read_dicom

        return read_dicom(paths, opts)
    if family in ("png", "jpeg", "tiff"):
        from app.io.raster import read_raster

        name = None
        if len(paths) > 1 and folder is not None:
            rel = paths[0].parent.relative_to(folder) if paths[0].parent != folder else None
            name = str(rel) if rel is not None else folder.name
        return read_raster(paths, opts, name=name)
    (p,) = paths
    if family == "nifti":
        from app.io.nifti import read_nifti

        return read_nifti(p, opts)
    if family == "npy":
        from app.io.arrays import read_npy

        return read_npy(p, opts)
    if family == "npz":
        from app.io.arrays import read_npz

        return read_npz(p, opts)
    if family == "hdf5":
        from app.io.hdf5 import read_hdf5

        return read_hdf5(p, opts)
    raise InputError("unsupported_format", f"rawproof does not read {p.name}.", str(p))
