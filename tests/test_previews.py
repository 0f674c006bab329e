"""Slice-viewer previews (app/traces/previews.py) against synthetic truths.

The synthetic cases come from demo_data/synth.py; each test states the truth it
built. The root-sum-of-squares reference is the formula of Roemer et al.,
Magn. Reson. Med. 16:192-225 (1990), computed here with numpy directly.
"""

from __future__ import annotations

import numpy as np
import pytest

from app.io.volume import Volume
from app.traces.previews import make_previews, preview_indices
from demo_data import synth


def test_indices_evenly_spaced_with_ends() -> None:
    """30 frames -> 12 evenly spaced indices including the first and the last."""
    idx = preview_indices(30)
    assert len(idx) == 12
    assert idx[0] == 0 and idx[-1] == 29
    assert np.all(np.diff(idx) >= 2) and np.all(np.diff(idx) <= 3)
    assert list(preview_indices(5)) == [0, 1, 2, 3, 4]


def test_zero_filled_spectrum_preview_shows_empty_band() -> None:
    """Truth: 64 x 64 acquired, zero-filled to 64 x 128, so columns outside the
    central 64 of the centred spectrum are empty (bottom grey level 0) while the
    central band is lit. Tolerance: the two columns next to each edge are excluded."""
    mag, _ = synth.zero_filled_magnitude((64, 64), (1.0, 2.0), n_coils=1, n_slices=2, seed=3)
    vol = Volume.from_array(mag)
    prev = make_previews(vol)
    assert prev["indices"] == [0, 1]
    spec = prev["spectra"][0]
    assert spec.shape == (64, 128) and spec.dtype == np.uint8
    # magnitude image: its spectrum is not exactly band-limited (|.| is nonlinear),
    # but the outer band is far below the centre: compare medians
    outer = np.concatenate([spec[:, :30], spec[:, 98:]], axis=1)
    inner = spec[:, 34:94]
    assert np.median(inner) - np.median(outer) > 40


def test_complex_zero_filled_band_is_exactly_empty() -> None:
    """Truth: complex image whose k-space is exactly zero outside columns 32..95
    of 128: the preview spectrum there is at the floor (0)."""
    img = synth.acquire((64, 64), n_coils=1, n_slices=1, seed=1)[0, 0]
    k = synth.zero_fill(synth.to_kspace(img), (64, 128))
    vol = Volume.from_array(synth.to_image(k))
    spec = make_previews(vol)["spectra"][0]
    assert int(spec[:, :31].max()) == 0 and int(spec[:, 97:].max()) == 0
    assert float(np.median(spec[:, 33:95])) > 80


def test_multicoil_image_is_rss_scaled() -> None:
    """Truth: the preview of a 4-coil complex volume is the root-sum-of-squares
    magnitude mapped linearly onto 0..255 (0 -> 0, 99.5th percentile -> 255);
    checked against numpy to within one grey level."""
    imgs = synth.acquire((48, 48), n_coils=4, n_slices=3, seed=2)
    vol = Volume.from_array(imgs, coil_axis=1)
    prev = make_previews(vol)
    ref = np.sqrt((np.abs(imgs[1].astype(np.complex128)) ** 2).sum(0))
    hi = np.percentile(ref, 99.5)
    expect = np.clip(np.round(ref / hi * 255), 0, 255)
    assert np.abs(prev["images"][1].astype(int) - expect).max() <= 1


def test_kspace_volume_shows_inverse_transform() -> None:
    """Truth: a k-space volume's preview image is |IFFT(k)| of the same frame."""
    img = synth.acquire((32, 32), n_coils=1, n_slices=2, seed=4)[:, 0]
    k = synth.to_kspace(img)
    vol = Volume.from_array(k, domain="kspace")
    prev = make_previews(vol)
    ref = np.abs(img[0])
    expect = np.clip(np.round(ref / np.percentile(ref, 99.5) * 255), 0, 255)
    assert np.abs(prev["images"][0].astype(int) - expect).max() <= 1


@pytest.mark.parametrize("side", [300, 512])
def test_large_frames_are_downsampled(side: int) -> None:
    """Frames larger than 256 per side are block-averaged to at most 256."""
    vol = Volume.from_array(np.ones((1, side, side), dtype=np.float32))
    prev = make_previews(vol)
    assert max(prev["images"][0].shape) <= 256
    assert max(prev["spectra"][0].shape) <= 256
