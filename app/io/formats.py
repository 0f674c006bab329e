"""Which reader a file needs, from its name (and the DICOM magic bytes)."""

from __future__ import annotations

from pathlib import Path

from app.io.dicom import is_dicom_file
from app.io.raster import RASTER_SUFFIXES

#: Format names of the report contract, per reader family.
FAMILIES = ("dicom", "nifti", "npy", "npz", "hdf5", "png", "jpeg", "tiff", "zip")


def family_of(path: Path) -> str | None:
    """The reader family of one file, or None when rawproof does not read it.

    DICOM files are recognised by suffix (``.dcm``, ``.dicom``, ``.ima``) or, for
    any other name, by ``DICM`` at byte 128 (NEMA PS3.10, 7.1).
    """
    name = path.name.lower()
    if name.endswith(".nii") or name.endswith(".nii.gz"):
        return "nifti"
    suffix = path.suffix.lower()
    if suffix in (".dcm", ".dicom", ".ima"):
        return "dicom"
    if suffix == ".npy":
        return "npy"
    if suffix == ".npz":
        return "npz"
    if suffix in (".h5", ".hdf5", ".hdf"):
        return "hdf5"
    if suffix in RASTER_SUFFIXES:
        return RASTER_SUFFIXES[suffix]
    if suffix == ".zip":
        return "zip"
    if suffix in (".json", ".txt", ".csv", ".md"):
        return None
    return "dicom" if is_dicom_file(path) else None
