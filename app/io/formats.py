"""Which reader a file needs, from its name (and the DICOM magic bytes).

The one place that maps file names to formats: the readers dispatch on
:func:`family_of`, and the store labels the files of a dataset with
:func:`format_label` (from the name alone, since it lists files it does not read).
"""

from __future__ import annotations

from pathlib import Path, PurePosixPath

#: Format names of the report contract, per reader family.
FAMILIES = ("dicom", "nifti", "npy", "npz", "hdf5", "png", "jpeg", "tiff", "zip")

#: Suffixes of the image files the raster reader opens, and their family.
RASTER_SUFFIXES = {".png": "png", ".jpg": "jpeg", ".jpeg": "jpeg", ".tif": "tiff",
                   ".tiff": "tiff"}

_SUFFIXES = {
    ".dcm": "dicom", ".dicom": "dicom", ".ima": "dicom",
    ".nii": "nifti", ".npy": "npy", ".npz": "npz",
    ".h5": "hdf5", ".hdf5": "hdf5", ".hdf": "hdf5", ".mrd": "hdf5",
    **RASTER_SUFFIXES,
    ".zip": "zip",
}
#: Side files rawproof never reads as data (sidecars, notes), with their listing label.
_SIDE_FILES = {".json": "json", ".txt": "text", ".csv": "text", ".md": "text"}


def family_from_name(name: str) -> str | None:
    """The reader family a file name declares by its suffix, or None.

    ``.nii.gz`` counts as NIfTI; case is ignored.
    """
    lower = name.lower()
    if lower.endswith(".nii.gz"):
        return "nifti"
    return _SUFFIXES.get(PurePosixPath(lower).suffix)


def is_dicom_file(path: Path) -> bool:
    """True when the file has the DICOM preamble magic ``DICM`` at byte 128.

    References
    ----------
    NEMA PS3.10, Section 7.1 (DICOM file meta information).
    """
    try:
        with open(path, "rb") as fh:
            head = fh.read(132)
    except OSError:
        return False
    return len(head) == 132 and head[128:132] == b"DICM"


def family_of(path: Path) -> str | None:
    """The reader family of one file, or None when rawproof does not read it.

    DICOM files are recognised by suffix (``.dcm``, ``.dicom``, ``.ima``) or, for
    any other name, by ``DICM`` at byte 128 (NEMA PS3.10, 7.1).
    """
    family = family_from_name(path.name)
    if family is not None:
        return family
    if path.suffix.lower() in _SIDE_FILES:
        return None
    return "dicom" if is_dicom_file(path) else None


def format_label(name: str) -> str:
    """A short format word for a stored file, from its (relative) name alone.

    The reader family where the suffix names one; ``"dicom"`` for a bare name
    inside a folder (DICOM series often have names without a suffix); the side
    files' labels (``"json"``, ``"text"``); else the suffix itself (at most 16
    characters), ``""`` for a bare top-level name.
    """
    family = family_from_name(name)
    if family is not None:
        return family
    lower = name.lower()
    suffix = PurePosixPath(lower).suffix
    if not suffix and "/" in lower:
        return "dicom"
    return _SIDE_FILES.get(suffix, suffix.lstrip(".")[:16])
