"""NumPy (.npy, .npz + JSON sidecar) and HDF5 readers on files written by numpy and h5py.

Sources: numpy's ``np.save``/``np.savez`` (NEP 1 format) and h5py as writers;
the multi-coil data come from ``demo_data.synth.acquire`` (truth: the complex
coil images it returns, coils on axis 1).
"""

from __future__ import annotations

import json

import h5py
import numpy as np
import pytest

from app.errors import InputError
from app.io import open_input
from demo_data import synth


@pytest.fixture(scope="module")
def coils() -> np.ndarray:
    return synth.acquire((32, 32), n_coils=4, n_slices=3, seed=3)


def test_npy_memory_mapped_complex_with_sidecar(tmp_path, coils):
    """Truth: (3, 4, 32, 32) complex64 k-space, coils on axis 1 (sidecar says so)."""
    ksp = synth.to_kspace(coils).astype(np.complex64)
    np.save(tmp_path / "scan.npy", ksp)
    (tmp_path / "scan.json").write_text(json.dumps({"domain": "kspace", "coil_axis": 1}))
    with open_input(tmp_path / "scan.npy") as loaded:
        (vol,) = loaded.volumes
        assert isinstance(vol.data, np.memmap)
        assert vol.domain == "kspace" and vol.value_type == "complex"
        assert vol.axes == ("slices", "coils", "rows", "cols") and vol.n_coils == 4
        np.testing.assert_array_equal(vol.frame(1), ksp[1])


def test_arguments_override_sidecar(tmp_path):
    """The ``domain`` and ``coil_axis`` arguments win over the sidecar."""
    np.save(tmp_path / "x.npy", np.zeros((2, 5, 8, 8), dtype=np.float32))
    (tmp_path / "x.json").write_text(json.dumps({"domain": "kspace", "coil_axis": 1}))
    with open_input(tmp_path / "x.npy", domain="image", coil_axis=0) as loaded:
        vol = loaded.volumes[0]
        assert vol.domain == "image" and vol.coil_axis == 0 and vol.n_coils == 2


def test_npz_key_names_the_domain(tmp_path, coils):
    """An npz key ``kspace`` means k-space; other arrays are listed in a warning."""
    ksp = synth.to_kspace(coils[0]).astype(np.complex64)
    np.savez(tmp_path / "d.npz", kspace=ksp, mask=np.ones((32, 32)))
    with open_input(tmp_path / "d.npz", coil_axis=0) as loaded:
        vol = loaded.volumes[0]
        assert loaded.format == "npz" and vol.domain == "kspace" and vol.n_coils == 4
        np.testing.assert_array_equal(np.asarray(vol.data), ksp)
        assert any("mask" in w for w in loaded.warnings)
    np.savez_compressed(tmp_path / "i.npz", image=np.abs(coils[0, 0]))
    with open_input(tmp_path / "i.npz") as loaded:
        assert loaded.volumes[0].domain == "image"
    with pytest.raises(InputError) as info:
        with open_input(tmp_path / "d.npz", dataset="nope"):
            pass
    assert info.value.code == "no_such_dataset" and "kspace" in info.value.message


def test_npy_header_checked_before_mapping(tmp_path):
    """A .npy whose header declares more data than the file holds, or more than the
    limit, is refused before mapping; object arrays are refused."""
    from app.config import Limits

    path = tmp_path / "a.npy"
    np.save(path, np.zeros((64, 64), dtype=np.float64))
    with pytest.raises(InputError) as info:
        with open_input(path, limits=Limits(max_array_bytes=1000)):
            pass
    assert info.value.code == "too_large"
    path.write_bytes(path.read_bytes()[:2000])
    with pytest.raises(InputError) as info:
        with open_input(path):
            pass
    assert info.value.code == "truncated" and "[64, 64]" in info.value.message
    np.save(tmp_path / "o.npy", np.array([[{"a": 1}]], dtype=object), allow_pickle=True)
    with pytest.raises(InputError) as info:
        with open_input(tmp_path / "o.npy"):
            pass
    assert info.value.code == "unsupported_dtype"


def test_hdf5_lazy_kspace_dataset(tmp_path, coils):
    """h5py file with ``kspace`` (3, 4, 32, 32) and a larger ``reconstruction_rss``:
    the k-space one is chosen by name, read lazily, file closed on exit."""
    ksp = synth.to_kspace(coils).astype(np.complex64)
    path = tmp_path / "case.h5"
    with h5py.File(path, "w") as f:
        f["kspace"] = ksp
        f["reconstruction_rss"] = np.zeros((3, 64, 64), dtype=np.float64)
        f.attrs["acquisition"] = "invented"
    with open_input(path, coil_axis=1) as loaded:
        vol = loaded.volumes[0]
        assert loaded.format == "hdf5" and vol.domain == "kspace"
        # read errors surface as InputError through a thin wrapper of the h5py Dataset
        assert isinstance(vol.data.dataset, h5py.Dataset)
        np.testing.assert_array_equal(vol.frame(2), ksp[2])
        dset = vol.data.dataset
    assert not dset.id.valid  # the file was closed when the context exited


def test_hdf5_dataset_key_and_largest(tmp_path):
    """``dataset=KEY`` picks that array; without a k-space name the largest is used."""
    path = tmp_path / "imgs.hdf5"
    with h5py.File(path, "w") as f:
        f["small"] = np.ones((4, 4), dtype=np.float32)
        f.create_group("g")["big"] = np.full((2, 16, 16), 7, dtype=np.uint16)
    with open_input(path) as loaded:
        vol = loaded.volumes[0]
        assert vol.header.fields["dataset"] == "g/big" and vol.domain == "image"
    with open_input(path, dataset="small") as loaded:
        assert loaded.volumes[0].shape == (4, 4)
    with pytest.raises(InputError) as info:
        with open_input(path, dataset="missing"):
            pass
    assert info.value.code == "no_such_dataset" and "g/big" in info.value.message


def test_npy_map_is_copy_on_write(tmp_path):
    """Blocks handed to analysers may be modified in place; the file on disk never is."""
    path = tmp_path / "w.npy"
    np.save(path, np.ones((2, 8, 8), dtype=np.float32))
    with open_input(path) as loaded:
        vol = loaded.volumes[0]
        for _idx, block in vol.iter_slices(2):
            block *= 0
        assert vol.data.flags.writeable
    np.testing.assert_array_equal(np.load(path), np.ones((2, 8, 8), dtype=np.float32))


def test_hdf5_coil_axis_first_is_moved_lazily(tmp_path, coils):
    """Truth: a (4 coils, 3 slices, 32, 32) dataset with coil_axis 0; frame s must be
    written[:, s] (coils x rows x cols), read lazily from the file."""
    arr = np.ascontiguousarray(np.moveaxis(coils, 1, 0))
    path = tmp_path / "c.h5"
    with h5py.File(path, "w") as f:
        f["kspace"] = arr
    with open_input(path, coil_axis=0) as loaded:
        vol = loaded.volumes[0]
        assert vol.axes == ("slices", "coils", "rows", "cols") and vol.shape == (3, 4, 32, 32)
        np.testing.assert_array_equal(vol.frame(1), arr[:, 1])
        np.testing.assert_array_equal(vol.to_array(), np.moveaxis(arr, 0, 1))


def test_real_imaginary_pairs_in_last_axis(tmp_path, coils):
    """Truth: complex k-space stored as float32 (..., 2) real/imaginary pairs, as several
    public k-space collections do (common practice, no source): .npy is viewed as
    complex without a copy, HDF5 (coil axis 0 in the file) lazily."""
    ksp = synth.to_kspace(coils).astype(np.complex64)  # (3, 4, 32, 32)
    pairs = np.stack([ksp.real, ksp.imag], axis=-1).astype(np.float32)
    np.save(tmp_path / "p.npy", pairs)
    with open_input(tmp_path / "p.npy", domain="kspace", coil_axis=1) as loaded:
        vol = loaded.volumes[0]
        assert vol.value_type == "complex" and vol.shape == (3, 4, 32, 32)
        assert isinstance(vol.data, np.memmap)
        np.testing.assert_array_equal(vol.frame(2), ksp[2])
        assert any("real and imaginary" in w for w in loaded.warnings)
    path = tmp_path / "p.h5"
    with h5py.File(path, "w") as f:
        f["kspace"] = np.ascontiguousarray(np.moveaxis(pairs, 1, 0))  # (4, 3, 32, 32, 2)
    with open_input(path, coil_axis=0) as loaded:
        vol = loaded.volumes[0]
        assert vol.shape == (3, 4, 32, 32) and vol.axes == ("slices", "coils", "rows", "cols")
        np.testing.assert_array_equal(vol.frame(1), ksp[1])
