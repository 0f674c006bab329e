"""magnitude_only: complex, magnitude or signed real values.

Sources:
- Gudbjartsson and Patz, Magnetic Resonance in Medicine 34:910-914, 1995: a
  magnitude image is non-negative and its air is Rayleigh distributed; the
  real and imaginary parts carry zero-mean Gaussian noise (so a phase-corrected
  real image has about half of its air negative).
- scipy.stats.circstd as the reference for the circular phase spread
  (Mardia and Jupp, Directional Statistics, 2000, sec. 2.3).
- scipy.ndimage.zoom (cubic spline) as the reference resampler whose overshoot
  leaves sparse negative values in a magnitude image.
- pydicom's bundled MR_small.dcm and emri_small.dcm: stored MR magnitude images
  (int16 / uint16, no negative values): magnitude.
- nibabel's bundled anatomical.nii: its header says "spm - 3D normalized", a
  resampled magnitude volume; a handful of negative values from interpolation
  overshoot (0.08% of voxels, down to -610 of a 30000 range) must not make it
  real_signed.
"""

from __future__ import annotations

import os

import numpy as np
import pytest
from scipy import ndimage, stats

from app.io.volume import Header, Volume
from app.traces import magnitude_only as mo
from app.traces.plan import trace_of
from app.traces.value_kind import circular_spread
from demo_data import synth


def _run(arr: np.ndarray, **kw) -> mo.Trace:
    vol = Volume.from_array(arr, **kw)
    return trace_of("magnitude_only", vol)


def test_complex_single_coil_is_complex() -> None:
    """Simulated complex image with a smooth phase: complex, absent; spread well above 0."""
    img = synth.acquire((96, 96), n_coils=1, sigma=0.01, seed=1)[:, 0]
    t = _run(img)
    assert t.estimates["domain"] == "complex" and t.status == "absent"
    assert t.evidence["phase_spread"] > 0.5
    assert t.evidence["imag_energy_fraction"] > 0.1


def test_complex_multicoil_is_complex() -> None:
    """Complex data with a coil axis (8 channels): complex, absent."""
    img = synth.acquire((96, 96), n_coils=8, n_slices=2, sigma=0.01, seed=2)
    t = _run(img, coil_axis=1)
    assert t.estimates["domain"] == "complex" and t.status == "absent"
    assert "8 receive channels" in t.summary


@pytest.mark.parametrize("n_coils", [1, 8])
def test_magnitude_is_present(n_coils: int) -> None:
    """|x| and root-sum-of-squares images: magnitude, present, no negative values."""
    img = synth.rss(synth.acquire((96, 96), n_coils=n_coils, sigma=0.01, seed=3), axis=1)
    t = _run(img)
    assert t.estimates["domain"] == "magnitude" and t.status == "present"
    assert t.evidence["negative_fraction"] == 0.0


def test_complex_dtype_with_zero_imaginary_part_is_magnitude() -> None:
    """A magnitude image stored as complex64 (imaginary part 0): magnitude, present."""
    img = synth.rss(synth.acquire((96, 96), n_coils=4, sigma=0.01, seed=4), axis=1)
    t = _run(img.astype(np.complex64))
    assert t.estimates["domain"] == "magnitude" and t.status == "present"
    assert t.evidence["imag_energy_fraction"] == 0.0
    assert "zero imaginary part" in t.summary


def test_phase_corrected_real_is_real_signed() -> None:
    """Real part of (real object + complex Gaussian noise): real_signed, present, says real-valued.

    Truth: the air holds N(0, sigma) noise, so about 50% of it is negative
    (Gudbjartsson and Patz 1995); asserted within 0.4-0.6. The FFT of any real
    image is Hermitian-symmetric (common practice, no source), so the trace is
    present (processing) and its decision statistic, the Hermitian-to-anti-
    Hermitian energy in decades, reaches the float32 rounding floor:
    ``-log10(eps^2 / 12)`` with eps = 2^-23 (numpy.finfo), within 0.01.
    """
    rng = np.random.default_rng(5)
    obj = synth.phantom((96, 96), seed=rng, smooth_phase=False).real
    real = (obj + synth.complex_noise(obj.shape, 0.01, rng)).real.astype(np.float32)
    t = _run(real)
    assert t.estimates["domain"] == "real_signed" and t.status == "present"
    assert t.origin == "processing"
    eps = float(np.finfo(np.float32).eps)
    assert abs(t.evidence["decision"]["value"] + np.log10(eps * eps / 12)) < 0.01
    assert 0.4 <= t.evidence["negative_background_fraction"] <= 0.6
    assert "real-valued" in t.summary
    t2 = _run(real.astype(np.complex64))
    assert t2.estimates["domain"] == "real_signed"


def test_spline_overshoot_stays_magnitude() -> None:
    """A magnitude image upsampled by scipy.ndimage.zoom (cubic): sparse negatives, magnitude."""
    img = synth.rss(synth.acquire((64, 64), n_coils=1, sigma=0.002, seed=6), axis=1)[0]
    up = ndimage.zoom(img.astype(np.float64), 2.0, order=3).astype(np.float32)
    assert (up < 0).any()
    t = _run(up)
    assert t.estimates["domain"] == "magnitude" and t.status == "present"
    assert 0 < t.evidence["negative_fraction"] < 0.05


def test_circular_spread_matches_scipy() -> None:
    """circular_spread equals scipy.stats.circstd for von Mises phases."""
    rng = np.random.default_rng(7)
    ph = stats.vonmises(kappa=3.0).rvs(5000, random_state=rng)
    z = 2.0 * np.exp(1j * ph)
    assert circular_spread(z) == pytest.approx(stats.circstd(ph), rel=1e-9)


@pytest.mark.parametrize("name", ["MR_small.dcm", "emri_small.dcm"])
def test_pydicom_mr_images_are_magnitude(name: str) -> None:
    """pydicom's bundled MR images (stored magnitudes, no negatives): magnitude, present."""
    pydicom = pytest.importorskip("pydicom")
    from pydicom.data import get_testdata_file

    ds = pydicom.dcmread(get_testdata_file(name))
    vol = Volume.from_array(ds.pixel_array,
                            header=Header(fields={"bits_stored": int(ds.BitsStored)}))
    t = trace_of("magnitude_only", vol)
    assert t.estimates["domain"] == "magnitude" and t.status == "present"


def test_nibabel_normalised_anatomical_is_magnitude() -> None:
    """anatomical.nii ("spm - 3D normalized"): interpolation overshoot only, magnitude."""
    nib = pytest.importorskip("nibabel")
    img = nib.load(os.path.join(os.path.dirname(nib.__file__), "tests", "data", "anatomical.nii"))
    a = np.ascontiguousarray(np.asanyarray(img.dataobj).transpose(2, 1, 0))
    assert a.min() < 0
    vol = Volume.from_array(a)
    t = trace_of("magnitude_only", vol)
    assert t.estimates["domain"] == "magnitude" and t.status == "present"
    assert t.evidence["negative_fraction"] < 0.01


def test_measured_kspace_is_complex() -> None:
    """Multi-coil k-space of a complex acquisition: its images are complex, absent."""
    k = synth.to_kspace(synth.acquire((96, 96), n_coils=4, sigma=0.01, seed=8))
    t = _run(k, domain="kspace", coil_axis=1)
    assert t.estimates["domain"] == "complex" and t.status == "absent"


@pytest.mark.parametrize("centred", [True, False])
def test_kspace_made_from_magnitude_images_is_caught(centred: bool) -> None:
    """The FFT of a root-sum-of-squares magnitude image posing as k-space: magnitude, present.

    Truth: the images behind the k-space are real and non-negative, so the
    imaginary energy of the inverse FFT is round-off only (below 1e-8 of the
    total); checked for centred k-space and with DC at index 0.
    """
    import scipy.fft as sfft

    mag = synth.rss(synth.acquire((96, 96), n_coils=8, sigma=0.01, seed=9), axis=1)
    k = synth.to_kspace(mag.astype(np.complex64))
    if not centred:
        k = sfft.ifftshift(k, axes=(-2, -1))
    t = _run(k, domain="kspace")
    assert t.estimates["domain"] == "magnitude" and t.status == "present"
    assert t.evidence["imag_energy_fraction"] < 1e-8
    assert "synthesised" in t.summary


def test_all_nan_is_inconclusive() -> None:
    """No finite value: inconclusive, not magnitude (common practice, no source)."""
    t = _run(np.full((2, 32, 32), np.nan, np.float32))
    assert t.status == "inconclusive" and t.estimates["domain"] is None


def test_decision_statistic_is_graded_by_storage_precision() -> None:
    """The Hermitian-to-anti-Hermitian statistic follows the rounding energy of the stored values.

    Truth: a real, non-negative image stored as uint8 (values about 100) and
    as uint16 (values about 25600). Its imaginary part is zero, so the
    statistic is ``-log10`` of the rounding energy fraction ``(1 / 12) /
    mean(x^2)`` (W. F. Sheppard 1898, uniform rounding over a step; recalled
    from memory), within 0.01 decade; the uint16 image stands about
    ``2 log10(256)`` = 4.8 decades higher, and both confidences differ.
    """
    rng = np.random.default_rng(12)
    base = 100.0 + 10.0 * rng.standard_normal((2, 64, 64))
    img8 = np.clip(np.round(base), 0, 255).astype(np.uint8)
    img16 = np.clip(np.round(base * 256), 0, 65535).astype(np.uint16)
    t8, t16 = _run(img8), _run(img16)
    expect8 = -np.log10((1 / 12) / np.mean(img8.astype(float) ** 2))
    assert t8.status == t16.status == "present"
    assert abs(t8.evidence["decision"]["value"] - expect8) < 0.01
    gap = t16.evidence["decision"]["value"] - t8.evidence["decision"]["value"]
    assert abs(gap - 2 * np.log10(256)) < 0.05
    assert t8.confidence != t16.confidence
    assert t8.evidence["decision"]["value"] > t8.evidence["decision"]["threshold"]
