"""The background (air) finder.

Sources:
- Otsu, "A threshold selection method from gray-level histograms", IEEE
  Trans. SMC 9:62-66, 1979: the threshold maximising the between-class
  variance, checked against a plain exhaustive reference implementation.
- Synthetic acquisitions from demo_data/synth.py whose object support is
  known (the noise-free phantom): the background must avoid the object.
- pydicom's bundled MR_small.dcm (pydicom.data.get_testdata_file): a 64 x 64
  DERIVED/SECONDARY brain crop whose lowest value is 127, tissue everywhere, so
  no air region should be found.
- nibabel's bundled anatomical.nii (nibabel/tests/data): a small processed
  head volume without air around it (its 1st percentile is about 1200 of a
  30000 range); no background should be found.
"""

from __future__ import annotations

import os

import numpy as np
import pytest
from scipy import ndimage

from app.io.volume import Volume
from app.traces import background as bgmod
from app.traces.plan import execute
from demo_data import synth


def _otsu_reference(values: np.ndarray, bins: int = 256) -> float:
    """Exhaustive between-class variance over every histogram cut (Otsu 1979)."""
    counts, edges = np.histogram(values, bins=bins)
    centres = 0.5 * (edges[:-1] + edges[1:])
    best, cut = -1.0, edges[1]
    for k in range(1, bins):
        w0, w1 = counts[:k].sum(), counts[k:].sum()
        if w0 == 0 or w1 == 0:
            continue
        mu0 = (counts[:k] * centres[:k]).sum() / w0
        mu1 = (counts[k:] * centres[k:]).sum() / w1
        between = w0 * w1 * (mu0 - mu1) ** 2
        if between > best:
            best, cut = between, edges[k]
    return float(cut)


def test_otsu_matches_exhaustive_reference() -> None:
    """Two Gaussian classes (means 1 and 6): same cut as the exhaustive reference."""
    rng = np.random.default_rng(0)
    v = np.concatenate([rng.normal(1, 0.5, 6000), rng.normal(6, 1.0, 3000)])
    t = bgmod.otsu_threshold(v)
    assert t == pytest.approx(_otsu_reference(v), abs=1e-9)
    assert 2.0 < t < 5.0


@pytest.mark.parametrize("n_coils", [1, 8])
def test_background_avoids_the_object(n_coils: int) -> None:
    """The found air lies outside the known object support (noise-free phantom > 0).

    Truth: the phantom's support, from the same seed with sigma = 0. At most
    0.5% of the background may fall inside the support dilated by 2 pixels, and
    at least 15% of the image must be found (the phantom leaves about 30-40% air).
    """
    clean = synth.rss(synth.acquire((128, 128), n_coils=n_coils, sigma=0.0, seed=3), axis=1)
    noisy = synth.rss(synth.acquire((128, 128), n_coils=n_coils, sigma=0.01, seed=3), axis=1)
    support = ndimage.binary_dilation(clean[0] > 1e-6, iterations=2)
    bg = bgmod.find_background(Volume.from_array(noisy))
    assert bg.usable and bg.method == "threshold"
    mask = bg.masks[0]
    assert (mask & support).sum() <= 0.005 * mask.sum()
    assert bg.fraction >= 0.15


def test_ghost_band_is_excluded() -> None:
    """A bright ghost band in the air (6 x the noise power) is left out of the background.

    Truth: an added band of rows 2-17, columns 2-33 (the top-left corner of the
    air, far from the object, so that only the block test can drop it) with
    amplitude 0.06 on a noise sigma of 0.01 per channel (8 channels).
    """
    img = synth.rss(synth.acquire((128, 128), n_coils=8, sigma=0.01, seed=5), axis=1)[0]
    band = np.zeros(img.shape, bool)
    band[2:18, 2:34] = True
    rng = np.random.default_rng(1)
    ghost = np.where(band, 0.06 * (1 + 0.1 * rng.standard_normal(img.shape)), 0)
    img = np.sqrt(img**2 + ghost**2).astype(np.float32)
    mask, method, excluded, _ = bgmod.frame_background(img)
    assert method == "threshold"
    assert excluded >= 1
    assert (mask & band).sum() <= 0.1 * band.sum()


def test_masked_background_is_found_as_one_constant() -> None:
    """Zeros outside a dilated object mask: the background is found and is all zero."""
    img = synth.rss(synth.acquire((128, 128), n_coils=4, sigma=0.01, seed=2), axis=1)
    obj = ndimage.binary_dilation(ndimage.gaussian_filter(img[0], 2) > 0.15, iterations=2)
    img[0][~obj] = 0
    bg = bgmod.find_background(Volume.from_array(img))
    assert bg.usable
    const = bgmod.constant_share(bg)
    assert const.value == 0.0 and const.share == 1.0 and const.masked


def test_quantised_noise_is_not_a_constant() -> None:
    """Rayleigh noise of sigma 0.8 steps, rounded: 0 is common, but so is 1, so not masked.

    Truth: for the Rayleigh law (Gudbjartsson and Patz 1995) with sigma = 0.8,
    P(round(x) = 0) = 1 - exp(-0.5^2 / 1.28) = 0.177, P(round(x) = 1) =
    exp(-0.195) - exp(-1.758) = 0.650, P(round(x) = 2) = 0.172: the mode is 1,
    and its lattice neighbours hold 0.349.
    """
    img = synth.rss(synth.acquire((128, 128), n_coils=1, sigma=0.01, seed=2), axis=1)
    u = np.round(img / 0.01 * 0.8).astype(np.uint16)
    bg = bgmod.find_background(Volume.from_array(u))
    const = bgmod.constant_share(bg)
    assert not const.masked
    assert const.value == 1.0
    assert const.share == pytest.approx(0.65, abs=0.03)
    assert const.neighbour_share == pytest.approx(0.177 + 0.172, abs=0.03)


def test_bounded_frames_and_stated_subset() -> None:
    """40 frames: the background is looked for in 10 evenly spaced ones, and the note says so."""
    img = synth.rss(synth.acquire((48, 48), n_coils=2, n_slices=40, sigma=0.01, seed=1), axis=1)
    vol = Volume.from_array(img)
    res = execute(vol, only=[], extra_steps=["background"])
    bg = res.steps["background"]
    # a quarter of the 40 frames (above the minimum of 8, below the cap of 16)
    assert bg.frames.size == 10
    assert bg.frames[0] == 0 and bg.frames[-1] == 39
    assert any("10 of 40 frames" in n for n in res.notes)


def test_kspace_background_is_found_on_its_images() -> None:
    """k-space (centred, or DC at index 0) is inverse-transformed first: same air as the images.

    Truth: the orthonormal transform of synth.to_kspace is undone exactly, so
    the background of the k-space equals that of the coil images (at least 99%
    of pixels agree) and the noise sigma (0.01) is kept.
    """
    import scipy.fft as sfft

    img = synth.acquire((96, 96), n_coils=2, sigma=0.01, seed=1)
    ref = bgmod.find_background(Volume.from_array(img, coil_axis=1))
    k = synth.to_kspace(img)
    for kk in (k, sfft.ifftshift(k, axes=(-2, -1))):
        bg = bgmod.find_background(Volume.from_array(kk, domain="kspace", coil_axis=1))
        assert bg.usable
        assert np.mean(bg.masks == ref.masks) >= 0.99
        comps = np.concatenate([bg.values.real.ravel(), bg.values.imag.ravel()])
        assert float(np.std(comps)) == pytest.approx(0.01, rel=0.05)


def test_pydicom_mr_small_has_no_air() -> None:
    """MR_small.dcm (pydicom test file): a brain crop, minimum 127, no air: too few samples."""
    pydicom = pytest.importorskip("pydicom")
    from pydicom.data import get_testdata_file

    ds = pydicom.dcmread(get_testdata_file("MR_small.dcm"))
    bg = bgmod.find_background(Volume.from_array(ds.pixel_array))
    assert not bg.usable
    assert "background samples" in bg.reason


def test_nibabel_anatomical_has_no_air() -> None:
    """anatomical.nii (nibabel test data): tissue fills the field of view; no background."""
    nib = pytest.importorskip("nibabel")
    img = nib.load(os.path.join(os.path.dirname(nib.__file__), "tests", "data", "anatomical.nii"))
    a = np.ascontiguousarray(np.asanyarray(img.dataobj).transpose(2, 1, 0))
    bg = bgmod.find_background(Volume.from_array(a))
    assert not bg.usable


def test_lattice_step() -> None:
    """Integer gcd lattice and a float lattice k * 1000/255 (common practice, no source)."""
    assert bgmod.lattice_step(np.array([0, 16, 48, 32, 160], np.uint16)) == 16.0
    f = (np.arange(256) * np.float32(1000 / 255)).astype(np.float32)
    assert bgmod.lattice_step(f) == pytest.approx(1000 / 255, rel=1e-5)
    rng = np.random.default_rng(0)
    assert bgmod.lattice_step(rng.random(5000).astype(np.float32)) is None


def test_blank_frames_are_left_out() -> None:
    """3 all-zero padding frames among 6 noisy RSS frames (L = 4): left out, with a note.

    Truth: the noisy frames' air is central chi with 2L = 8 (Constantinides 1997);
    zeros from blank frames would otherwise drag the moment estimate of L.
    """

    img = synth.rss(synth.acquire((96, 96), n_coils=4, n_slices=6, sigma=0.01, seed=4), axis=1)
    stack = np.concatenate([np.zeros((3, 96, 96), np.float32), img])
    vol = Volume.from_array(stack)
    res = execute(vol, only=["coil_combination", "background_masking"],
                  extra_steps=["background"])
    bg = res.steps["background"]
    assert any("3 blank frame(s)" in n for n in res.notes)
    assert not bg.masks[:3].any()
    cc = res.traces["coil_combination"]
    assert cc.status == "present" and abs(cc.estimates["effective_channels"] - 4) <= 1.0
    assert res.traces["background_masking"].status == "absent"


def test_zero_band_outside_field_of_view_is_set_aside() -> None:
    """Zeros outside a resampled field of view (top 12 rows) beside noisy air: the air is found.

    Truth: RSS of 4 channels, sigma 0.01; the chi law's L = 4 must come back
    within 1 from the air that remains (Constantinides 1997), and the zero band
    is not taken for a masked background.
    """

    img = synth.rss(synth.acquire((128, 128), n_coils=4, n_slices=2, sigma=0.01, seed=14), axis=1)
    img[:, :12, :] = 0
    vol = Volume.from_array(img)
    res = execute(vol, only=["coil_combination", "background_masking"],
                  extra_steps=["background"])
    bg = res.steps["background"]
    assert bg.usable and not bg.masks[:, :12, :].any()
    cc = res.traces["coil_combination"]
    assert cc.status == "present" and abs(cc.estimates["effective_channels"] - 4) <= 1.0
    assert res.traces["background_masking"].status == "absent"
