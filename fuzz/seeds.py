"""Seed files for the reader fuzzer, one small valid file per reader family.

Sources: pydicom's bundled ``MR_small.dcm`` and ``CT_small.dcm``
(``pydicom.data.get_testdata_file``), nibabel's shipped ``standard.nii.gz``
(``nibabel/tests/data``); the others are written here by numpy, h5py, Pillow
and zipfile from a seeded random generator.
"""

from __future__ import annotations

import io
import zipfile
from functools import lru_cache
from pathlib import Path

import numpy as np


def _npy(arr: np.ndarray) -> bytes:
    buf = io.BytesIO()
    np.save(buf, arr)
    return buf.getvalue()


def _image() -> np.ndarray:
    rng = np.random.default_rng(9)
    y, x = np.mgrid[:32, :32]
    return (100 + 80 * np.exp(-((x - 16) ** 2 + (y - 14) ** 2) / 60)
            + rng.normal(0, 3, (32, 32))).clip(0, 255).astype(np.uint8)


def _pil(fmt: str, **kw: object) -> bytes:
    from PIL import Image

    buf = io.BytesIO()
    Image.fromarray(_image()).save(buf, format=fmt, **kw)
    return buf.getvalue()


def _hdf5() -> bytes:
    import h5py

    buf = io.BytesIO()
    with h5py.File(buf, "w") as f:
        f.create_dataset("kspace", data=np.fft.fft2(_image().astype(np.float32))[None]
                         .astype(np.complex64))
        f.attrs["note"] = "seed"
    return buf.getvalue()


def _nifti_plain() -> bytes:
    import nibabel as nib

    img = nib.Nifti1Image(np.stack([_image()] * 2, axis=-1).astype(np.int16), np.eye(4))
    return img.to_bytes()


def _zip() -> bytes:
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", compression=zipfile.ZIP_DEFLATED) as zf:
        zf.writestr("series/a.npy", _npy(_image()[None].astype(np.uint16)))
        zf.writestr("series/notes.txt", "seed archive")
    return buf.getvalue()


@lru_cache(maxsize=1)
def seeds() -> dict[str, tuple[str, bytes]]:
    """Seed name -> (file suffix, bytes)."""
    import nibabel
    from pydicom.data import get_testdata_file

    nib_data = Path(nibabel.__file__).parent / "tests" / "data"
    return {
        "dicom_mr": (".dcm", Path(get_testdata_file("MR_small.dcm")).read_bytes()),
        "dicom_ct": (".dcm", Path(get_testdata_file("CT_small.dcm")).read_bytes()),
        "nifti_gz": (".nii.gz", (nib_data / "standard.nii.gz").read_bytes()),
        "nifti": (".nii", _nifti_plain()),
        "npy": (".npy", _npy(_image()[None].astype(np.float32))),
        "npy_complex": (".npy", _npy(np.fft.fft2(_image())[None].astype(np.complex64))),
        "hdf5": (".h5", _hdf5()),
        "png": (".png", _pil("PNG")),
        "jpeg": (".jpg", _pil("JPEG", quality=75)),
        "zip": (".zip", _zip()),
    }
