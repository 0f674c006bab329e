"""The support-cropped k-space and its export (app/crop.py)."""

from __future__ import annotations

import json

import numpy as np
import pytest

from app import crop
from app.io import open_input
from app.io.volume import Volume
from demo_data import synth


@pytest.fixture(scope="module")
def acquired() -> np.ndarray:
    """Truth: 2 single-coil complex phantom slices acquired at 96 x 96 (k-space noise)."""
    return synth.acquire((96, 96), n_coils=1, n_slices=2, sigma=0.01, seed=7)[:, 0]


def test_crop_of_complex_zero_filled_2x_recovers_acquired_kspace(acquired: np.ndarray) -> None:
    """Truth built: the acquired k-space zero-filled 2x per axis (96 -> 192, centred, the
    synth.zero_fill layout) and inverse-transformed to complex images. The crop, from
    the support the zero_filling analyser measures, must give back the acquired
    k-space to float32 rounding (orthonormal FFTs on both grids)."""
    k0 = synth.to_kspace(acquired)
    delivered = synth.to_image(synth.zero_fill(k0, (192, 192))).astype(np.complex64)
    traces = crop.traces_of_volume(Volume.from_array(delivered))
    spec = crop.crop_spec((192, 192), traces)
    assert spec.shape == (96, 96)
    got = crop.crop_kspace(crop.fft2c(delivered), spec)
    np.testing.assert_allclose(got, k0, atol=1e-5 * np.abs(k0).max())


def test_partial_fourier_crop_keeps_the_acquired_side() -> None:
    """Truth built: complex 160 x 160 slices with centred k-space rows 100-159 set to
    zero (62.5 % acquired, the demo's half-Fourier set). The crop keeps rows 0-99 (the
    side below DC acquired in full), all columns."""
    imgs = synth.acquire((160, 160), n_coils=1, n_slices=2, sigma=0.01, seed=3)[:, 0]
    k = synth.to_kspace(imgs)
    k[..., 100:, :] = 0
    delivered = synth.to_image(k).astype(np.complex64)
    traces = crop.traces_of_volume(Volume.from_array(delivered))
    spec = crop.crop_spec((160, 160), traces)
    assert (spec.rows.start, spec.rows.stop, spec.rows.side) == (0, 100, "low")
    assert (spec.cols.start, spec.cols.stop) == (0, 160)
    assert spec.rows.dc_index == 80


def test_crop_spec_from_report_entries_and_identity() -> None:
    """Truth stated: support fraction 0.5 on a 256-sample axis is the centred block
    128-sample block starting at 64 (central_slice's layout); no traces, no crop."""
    traces = {"zero_filling": {"estimates": {"rows": {"support_fraction": 0.5},
                                             "cols": {"support_fraction": 1.0}}}}
    spec = crop.crop_spec((256, 200), traces)
    assert (spec.rows.start, spec.rows.stop) == (64, 192)
    assert (spec.cols.start, spec.cols.stop) == (0, 200)
    assert crop.crop_spec((64, 64), None).is_identity


@pytest.mark.parametrize("suffix", [".npz", ".h5"])
def test_export_reloads_as_kspace_with_sidecar(tmp_path, suffix: str) -> None:
    """Truth built: 8-coil slices zero-filled 2x (64 -> 128) and combined by
    root-sum-of-squares. The export must reload through rawproof's own readers as
    k-space of the cropped shape, its sidecar must record the crop (each axis within 4
    samples of 64) and list the magnitude step a crop cannot undo, and its sampling
    table must give effective = nominal acceleration on the cropped grid."""
    mag, _ = synth.zero_filled_magnitude((64, 64), (2.0, 2.0), n_coils=8, n_slices=3,
                                         sigma=0.01, seed=2)
    src = tmp_path / "mag.npy"
    np.save(src, mag)
    meta = crop.export_path(str(src), tmp_path / f"out{suffix}")
    side = json.loads((tmp_path / "out.json").read_text())
    assert side["schema"] == "rawproof.crop/1" and side["domain"] == "kspace"
    assert side["input_shape"] == [128, 128]
    # the analyser measures a magnitude image's support to a few samples at this size
    assert abs(side["shape"][0] - 64) <= 4 and abs(side["shape"][1] - 64) <= 4
    assert any(s.startswith("magnitude") for s in side["cannot_undo"])
    rows = {r["family"]: r for r in side["sampling"] if "error" not in r}
    assert rows["uniform"]["effective_acceleration"] == pytest.approx(4.0, rel=0.05)
    with open_input(meta["files"][0]) as loaded:
        vol = loaded.volumes[0]
        assert vol.domain == "kspace"
        assert vol.shape == (3, *side["shape"])
