"""NIfTI reader against files written by nibabel and nibabel's bundled test data.

Sources: nibabel (writer and ``nibabel/tests/data``: anatomical.nii,
example4d.nii.gz, resampled_anat_moved.nii, example_nifti2.nii.gz); axis order
and scaling fields from the NIfTI-1 header definition (``nifti1.h``).
"""

from __future__ import annotations

from pathlib import Path

import nibabel as nib
import numpy as np
import pytest

from app.errors import InputError
from app.io import open_input

DATA = Path(nib.__file__).parent / "tests" / "data"


def test_roundtrip_3d_with_scaling(tmp_path):
    """Truth: int16 (x, y, z) = (20, 30, 5), zooms (1.5, 2, 3), slope 2, inter 10."""
    rng = np.random.default_rng(1)
    arr = rng.integers(0, 1000, size=(20, 30, 5)).astype(np.int16)
    img = nib.Nifti1Image(arr, np.diag([1.5, 2.0, 3.0, 1.0]))
    img.header.set_slope_inter(2.0, 10.0)
    img.header.set_data_dtype(np.int16)
    path = tmp_path / "vol.nii"
    nib.save(img, path)
    with open_input(path) as loaded:
        (vol,) = loaded.volumes
        assert loaded.format == "nifti"
        assert vol.axes == ("slices", "rows", "cols") and vol.shape == (5, 30, 20)
        assert isinstance(vol.data, np.memmap)
        np.testing.assert_array_equal(np.asarray(vol.data), arr.T)
        assert (vol.scale, vol.offset) == (2.0, 10.0)
        np.testing.assert_allclose(vol.to_array(), arr.T * 2.0 + 10.0)
        assert vol.spacing == (3.0, 2.0, 1.5)
        np.testing.assert_allclose(vol.affine, img.affine)
        assert vol.header.fields["nifti_version"] == 1


def test_roundtrip_4d_gz_axis_order(tmp_path):
    """Truth: data[t, z, y, x] == written[x, y, z, t] for a (6, 7, 3, 4) float32 image."""
    arr = np.arange(6 * 7 * 3 * 4, dtype=np.float32).reshape(6, 7, 3, 4)
    path = tmp_path / "run.nii.gz"
    nib.save(nib.Nifti1Image(arr, np.eye(4)), path)
    with open_input(path) as loaded:
        vol = loaded.volumes[0]
        assert vol.axes == ("time", "slices", "rows", "cols") and vol.shape == (4, 3, 7, 6)
        assert vol.data[2, 1, 5, 3] == arr[3, 5, 1, 2]
        assert vol.n_slices == 12


def test_nifti2_roundtrip(tmp_path):
    """A NIfTI-2 file written by nibabel is read with nifti_version 2 and its codes kept."""
    arr = np.ones((8, 9, 2), dtype=np.uint8)
    img = nib.Nifti2Image(arr, np.eye(4))
    img.set_sform(np.eye(4), code=4)
    path = tmp_path / "v2.nii"
    nib.save(img, path)
    with open_input(path) as loaded:
        f = loaded.volumes[0].header.fields
        assert f["nifti_version"] == 2 and f["sform_code"] == 4


@pytest.mark.parametrize("name,shape", [
    ("anatomical.nii", (25, 41, 33)),
    ("example4d.nii.gz", (2, 24, 96, 128)),
    ("example_nifti2.nii.gz", (2, 12, 20, 32)),
])
def test_bundled_files_match_nibabel(name, shape):
    """nibabel's test data: shape is nibabel's reversed; physical values equal get_fdata().T."""
    img = nib.load(DATA / name)
    with open_input(DATA / name) as loaded:
        vol = loaded.volumes[0]
        assert vol.shape == shape == img.shape[::-1]
        first = vol.frame(0)
        ref = np.asarray(img.get_fdata()).T.reshape((-1,) + vol.image_shape)[0]
        np.testing.assert_allclose(first, ref, rtol=1e-6)


def test_nan_outside_field_of_view_is_accepted():
    """resampled_anat_moved.nii holds NaN outside its field of view (ENVIRONMENT-NOTES):
    the reader keeps them; analysers decide what they mean."""
    with open_input(DATA / "resampled_anat_moved.nii") as loaded:
        arr = loaded.volumes[0].to_array()
        assert np.isnan(arr).any() and np.isfinite(arr).any()


def test_header_that_lies_about_dims(tmp_path):
    """A header whose dims need more bytes than the file holds is refused, naming sizes."""
    arr = np.zeros((16, 16, 4), dtype=np.int16)
    path = tmp_path / "lie.nii"
    nib.save(nib.Nifti1Image(arr, np.eye(4)), path)
    raw = bytearray(path.read_bytes())
    dims = np.frombuffer(bytes(raw[40:56]), dtype="<i2").copy()
    dims[3] = 400  # claim 400 slices where the file has 4
    raw[40:56] = dims.tobytes()
    path.write_bytes(bytes(raw))
    with pytest.raises(InputError) as info:
        with open_input(path):
            pass
    assert info.value.code == "truncated" and "400" in info.value.message


def test_truncated_gz(tmp_path):
    """A .nii.gz cut short (gzip ISIZE and stream disagree with the header) is refused."""
    arr = np.random.default_rng(0).normal(size=(32, 32, 8)).astype(np.float32)
    path = tmp_path / "cut.nii.gz"
    nib.save(nib.Nifti1Image(arr, np.eye(4)), path)
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    with pytest.raises(InputError) as info:
        with open_input(path):
            pass
    assert info.value.code in ("truncated", "unreadable")
