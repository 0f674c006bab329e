"""Tests of the resampling analyser (app/traces/resampling.py; Kirchner 2008).

Outside references:
- scipy.ndimage.zoom and scipy.ndimage.rotate (orders 1 and 3) as the reference
  resamplers; the truth is the zoom factor / rotation applied.
- nibabel's bundled test data: anatomical.nii (zoomed here with scipy.ndimage) and
  resampled_anat_moved.nii (resliced with trilinear interpolation, interp 1, by the
  SPM script resample_using_spm.m shipped beside it; NaN outside the field of view).
- Popescu and Farid (IEEE Trans. Signal Processing 53:758-767, 2005): the
  interpolation phase of a scaling by s repeats with frequency |1/s - round(1/s)|.
"""

from __future__ import annotations

import os

import nibabel as nib
import numpy as np
import pytest
from scipy import ndimage

from app.io.volume import Volume
from app.traces import resampling as rs
from app.traces.plan import execute, trace_of
from demo_data import synth

NIB_DATA = os.path.join(os.path.dirname(nib.__file__), "tests", "data")


def _raw(seed=0, shape=(128, 128)):
    """Raw-like root-sum-of-squares magnitude frames (no resampling: the negative truth)."""
    return synth.rss(synth.acquire(shape, n_coils=4, n_slices=4, sigma=0.01, seed=seed), axis=1)


def _trace(frames):
    vol = Volume.from_array(np.asarray(frames, dtype=np.float32))
    return trace_of("resampling", vol)


@pytest.mark.parametrize("order", [1, 3])
@pytest.mark.parametrize(("zoom", "expect"), [((1.5, 1.5), (1.5, 1.5)),
                                              ((1.0, 1.25), (1.0, 1.25)),
                                              ((1.2, 2.0), (1.2, 2.0))])
def test_scipy_zoom_factors(order, zoom, expect):
    """scipy.ndimage.zoom by a known factor per axis: factor within 2 % (truth: the zoom).

    ndimage.zoom maps the corner samples onto each other, so the realised factor is
    (out - 1) / (in - 1); the tolerance covers that and the sub-bin peak estimate.
    """
    frames = [ndimage.zoom(f, zoom, order=order) for f in _raw(seed=order)]
    trace = _trace(frames)
    assert trace.status == "present"
    for ax, want in zip(("rows", "cols"), expect, strict=True):
        assert abs(trace.estimates[ax]["factor"] - want) <= 0.02 * want, (ax, trace.estimates)


@pytest.mark.parametrize(("angle", "order"), [(10, 1), (20, 1), (30, 3)])
def test_scipy_rotation_is_found(angle, order):
    """scipy.ndimage.rotate (no reshape): resampling present (truth: rotated).

    Cubic-spline rotation leaves weaker traces than linear: at 10-20 degrees it stays
    below the conservative threshold (a known limit, measured in the bench); 30
    degrees is found.
    """
    frames = [ndimage.rotate(f, angle, order=order, reshape=False) for f in _raw(seed=angle)]
    assert _trace(frames).status == "present"


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_raw_and_zero_filled_images_are_absent(seed):
    """Raw-like and zero-filled (sinc-interpolated) images: absent (truth: no grid resampling).

    Zero-filling is shift-invariant interpolation and is the zero_filling trace's job.
    """
    assert _trace(_raw(seed=seed)).status == "absent"
    mag, _ = synth.zero_filled_magnitude((64, 64), (2.0, 2.0), n_coils=4, n_slices=4, seed=seed)
    assert _trace(mag).status == "absent"


def test_nibabel_anatomical_zoomed_trilinear():
    """nibabel anatomical.nii, zoomed by 1.5 with trilinear interpolation: factor 1.5 +- 3 %.

    The unzoomed file is called absent (its own history is not known to be resampled).
    """
    a = nib.load(os.path.join(NIB_DATA, "anatomical.nii")).get_fdata()
    assert _trace(a.transpose(2, 0, 1)).status == "absent"
    z = ndimage.zoom(a, 1.5, order=1).transpose(2, 0, 1)
    trace = _trace(z)
    assert trace.status == "present"
    assert abs(trace.estimates["rows"]["factor"] - 1.5) <= 0.045
    assert abs(trace.estimates["cols"]["factor"] - 1.5) <= 0.045


def test_nibabel_resliced_file_with_nans():
    """nibabel resampled_anat_moved.nii: NaN outside the field of view is handled.

    The file was resliced (rotation 0.1, 0.2, 0.3 rad, translation) with trilinear
    interpolation from 2 mm to a 4 x 4 x 8 mm grid of 17 x 21 x 3 voxels: a 2x
    decimation, whose interpolation phase does not repeat, on slices too small for
    the rotation's periodicity to stand out. The NaN border must not fake a peak:
    the p-maps stay finite and the call is not "present" (a known limit: stated).
    """
    a = nib.load(os.path.join(NIB_DATA, "resampled_anat_moved.nii")).get_fdata()
    assert np.isnan(a).any()
    frames = list(a.transpose(2, 0, 1))
    assert all(np.isfinite(rs.pmap(f)).all() for f in frames)
    result = rs.detect(frames)
    assert np.isfinite(result.peak_ratio)
    assert rs.trace_from(result).status != "present"


def test_factor_aliases():
    """Popescu-Farid aliasing: frequency f <-> factors 1/(1-f) and 1/f (published relation)."""
    assert rs.factor_from_frequency(1 / 3) == pytest.approx((1.5, 3.0))
    assert rs.factor_from_frequency(0.5) == pytest.approx((2.0, 2.0))


def test_evidence_periodicity_keys():
    """The agreed evidence key: periodicity per axis with freq in 0..0.5 and peaks."""
    frames = [ndimage.zoom(f, (1.0, 1.5), order=1) for f in _raw(seed=9)]
    ev = _trace(frames).evidence["periodicity"]
    assert max(ev["cols"]["freq"]) <= 0.5
    assert len(ev["cols"]["freq"]) == len(ev["cols"]["power"])
    assert any(abs(p - 1 / 3) < 0.01 for p in ev["cols"]["peaks"])
    assert ev["rows"]["peaks"] == []


def test_siemens_dicom_interpolated_grid():
    """pydicom-data MR-SIEMENS-DICOM-WithOverlays.dcm: the pixels show a 484/256 grid scaling.

    The header declares AcquisitionMatrix [256, 0, 0, 134] (256 frequency samples)
    and 484 x 484 pixels: a 256-sample grid shown on 484 pixels implies a scaling by
    484 / 256 = 1.89 (the phase axis, reconstructed first to 256 with zero-filling,
    scaled the same). Tolerance 2 %: the sub-bin estimate of the peak frequency.
    """
    import pydicom
    from pydicom.data import get_testdata_file

    ds = pydicom.dcmread(get_testdata_file("MR-SIEMENS-DICOM-WithOverlays.dcm"))
    expected = ds.Columns / ds.AcquisitionMatrix[0]
    trace = _trace(ds.pixel_array[None].astype(np.float32))
    assert trace.status == "present"
    for ax in ("rows", "cols"):
        assert abs(trace.estimates[ax]["factor"] - expected) <= 0.02 * expected, trace.estimates


def test_bounded_subset_is_stated():
    """A long volume is tested on a bounded, evenly spaced subset, stated in the notes."""
    frames = np.concatenate([_raw(seed=s) for s in range(4)])  # 16 frames
    zoomed = np.stack([ndimage.zoom(f, (1.0, 1.5), order=1) for f in frames])
    vol = Volume.from_array(zoomed.astype(np.float32))
    res = execute(vol, only=["resampling"])
    trace = res.traces["resampling"]
    assert trace.status == "present"
    # one frame in eight, at least MIN_FRAMES (4 here), at most MAX_FRAMES
    assert trace.evidence["n_frames"] == rs.MIN_FRAMES
    assert any("resampling analysed 4 of 16 frames" in n for n in res.notes)



def test_jpeg_block_peaks_are_not_called_resampling():
    """Pillow's JPEG encoder (libjpeg) at quality 50 on an unresampled phantom: the
    8 x 8 block grid leaves p-map peaks at multiples of 1/8 cycles/sample, which the
    resampling trace sets aside once the lossy analyser has found the grid; an image
    zoomed by 1.25 (scipy.ndimage, order 1; peak at 1 - 1/1.25 = 0.2 cycles/sample,
    not a multiple of 1/8) before the same JPEG step is still called resampled."""
    from scipy import ndimage

    from app.io.volume import Volume
    from app.traces.report import analyse_volume
    from demo_data import synth

    rng = np.random.default_rng(11)
    mag = np.abs(synth.acquire((256, 256), n_coils=1, n_slices=2, sigma=0.01, seed=rng))[:, 0]
    img8 = [np.clip(m / m.max() * 255, 0, 255).astype(np.uint8) for m in mag]
    plain = np.stack([synth.jpeg_round_trip(i, 50) for i in img8])
    rep = analyse_volume(Volume.from_array(plain))
    assert rep["traces"]["lossy_compression"]["status"] == "present"
    assert rep["traces"]["resampling"]["status"] == "absent", rep["traces"]["resampling"]
    assert rep["traces"]["resampling"]["evidence"]["block_grid_excluded"] is True

    # the exclusion is selective: a zoom by 1.25 (peak at 0.2 cycles/sample, not a
    # multiple of 1/8) is still found with the block-grid bins left out. (After a
    # later JPEG step the zoom's peak is gone even at quality 95: rounding to the
    # quantiser lattice erases it, a limit of the method noted in the module.)
    zoomed = [ndimage.zoom(m, 1.25, order=1)[:256, :256].astype(float) for m in mag]
    found = rs.detect(zoomed, exclude_block_grid=True)
    assert found.axis_freq["cols"] is not None
    assert abs(found.axis_freq["cols"] - 0.2) < 0.01


@pytest.mark.parametrize("shape", [(256, 256), (255, 257), (64, 33), (31, 40), (8, 9)])
def test_centrosymmetric_median_equals_scipy_median_filter(shape):
    """The half-plane local median equals scipy.ndimage.median_filter (reference: scipy)
    on the magnitude spectrum of real frames, odd and even sides."""
    rng = np.random.default_rng(sum(shape))
    frames = rng.random((3,) + shape).astype(np.float32)
    mag = np.fft.fftshift(np.abs(np.fft.fft2(frames)).mean(axis=0)).astype(np.float32)
    mag = 0.5 * (mag + np.roll(mag[::-1, ::-1], (1 - shape[0] % 2, 1 - shape[1] % 2), (0, 1)))
    ref = ndimage.median_filter(mag, size=7, mode="wrap")
    np.testing.assert_array_equal(rs.centrosymmetric_median(mag, 7), ref)


def test_zero_fill_frequency_follows_popescu_farid():
    """Interpolation by s repeats at |1/s - round(1/s)| cycles/sample (Popescu and Farid
    2005): 2 -> 0.5, 4 -> 0.25, 1.5 -> 1/3, 1.25 -> 0.2."""
    for s, f in ((2.0, 0.5), (4.0, 0.25), (1.5, 1 / 3), (1.25, 0.2)):
        assert rs.zero_fill_frequency(s) == pytest.approx(f, abs=1e-9)


def _zero_filled(seed=0):
    """8-coil RSS frames zero-filled 2x in k-space (truth: zero-filled, not resampled)."""
    mag, _ = synth.zero_filled_magnitude((96, 96), (2.0, 2.0), n_coils=8, n_slices=6,
                                         sigma=0.01, seed=seed)
    return mag


def test_zero_filling_periodicity_is_not_counted_as_resampling():
    """Zero-filling by 2 is sinc interpolation by 2: its Nyquist periodicity is set aside
    (zero_filling reports it), so resampling is absent and the evidence says why."""
    vol = Volume.from_array(_zero_filled().astype(np.float32))
    trace = trace_of("resampling", vol)
    explained = trace.evidence["zero_fill_explained"]
    assert set(explained) == {"rows", "cols"}
    assert all(abs(f - 0.5) < 0.02 for f in explained.values())
    assert trace.status == "absent", trace.summary


def test_resampling_after_zero_filling_is_still_found():
    """Zero-filled 2x, then scipy.ndimage.zoom by 1.25 (order 3): the zoom's periodicity
    (0.2 cycles/sample, Popescu and Farid) is not the one the overall band limit (2.5x,
    0.4) explains, and is reported. (A zoom by 1.5 after 2x is the one factor in (1, 2)
    where both fall at 1/3 and the zoom is set aside too: 1 - 1/s = 1/(2 s).)"""
    frames = [ndimage.zoom(f, 1.25, order=3) for f in _zero_filled(seed=1)]
    trace = _trace(frames)
    assert trace.status == "present", trace.summary
    for ax in ("rows", "cols"):
        assert abs(trace.estimates[ax]["factor"] - 1.25) <= 0.03, trace.estimates


def _noisy_object(shape, seed, sigma=0.05):
    """A smooth positive object plus white Gaussian noise (truth: no resampling)."""
    rng = np.random.default_rng(seed)
    obj = ndimage.gaussian_filter(rng.random(shape), 6)
    obj = (obj - obj.min()) / np.ptp(obj) + 0.2
    return obj + sigma * rng.standard_normal(shape)


def test_interpolated_weights_are_not_resampling():
    """Weights interpolated from a coarse grid (scipy.ndimage.zoom, order 1, of a
    smooth 32 x 32 weight map to 128 x 128, a 4-sample knot grid) multiplied into a
    noisy object: no sample was moved, so resampling is not ``present`` (truth: the
    grid was not resampled; Walsh et al. 2000 compute adaptive coil-combination
    weights on such a decimated grid). The weights scale each sample's noise but do
    not correlate neighbours, which the neighbour-correlation test reads."""
    rng = np.random.default_rng(5)
    frames = []
    for k in range(4):
        coarse = ndimage.gaussian_filter(rng.random((32, 32)), 3, mode="wrap")
        coarse = 0.5 + (coarse - coarse.min()) / np.ptp(coarse)  # smooth, as coil weights are
        w = ndimage.zoom(coarse, 4, order=1)[:128, :128]
        frames.append(w * _noisy_object((128, 128), seed=k))
    trace = _trace(frames)
    assert trace.status != "present", trace.summary
    assert trace.evidence["tests"]["neighbour_correlation"]["peaks"] == 0


@pytest.mark.parametrize("order", [1, 3])
def test_pixel_centre_2x_scaling_is_found(order):
    """scipy.ndimage.zoom by 2 with grid_mode=True (the pixel-centre convention image
    libraries use): the output phases 1/4 and 3/4 mirror each other, so a symmetric
    predictor residual has one variance on both; the neighbour correlation alternates
    (for linear interpolation 9/16 and 3/8 of the variance, from the weights 3/4, 1/4;
    derived by hand). Truth: factor 2 on both axes, within 5 %."""
    frames = [ndimage.zoom(_noisy_object((64, 64), seed=s), 2, order=order, grid_mode=True,
                           mode="grid-constant") for s in range(4)]
    trace = _trace(frames)
    assert trace.status == "present", trace.summary
    for ax in ("rows", "cols"):
        assert abs(trace.estimates[ax]["factor"] - 2.0) <= 0.1, trace.estimates


def test_kspace_input_is_tested_on_its_image():
    """k-space input: the test runs on the image the k-space makes (numpy's FFT as the
    reference transform). The k-space of raw-like frames is not called present; the
    k-space of frames zoomed by 1.5 (scipy.ndimage.zoom, order 1) is, with factor 1.5
    within 3 %; the confidences differ (no constant)."""
    raw = _raw(seed=21)
    k_raw = np.fft.fft2(raw).astype(np.complex64)
    zoomed = np.stack([ndimage.zoom(f, 1.5, order=1) for f in raw])
    k_zoom = np.fft.fft2(zoomed).astype(np.complex64)
    t_raw = trace_of("resampling", Volume.from_array(k_raw, domain="kspace"))
    t_zoom = trace_of("resampling", Volume.from_array(k_zoom, domain="kspace"))
    assert t_raw.status != "present"
    assert t_zoom.status == "present", t_zoom.summary
    assert abs(t_zoom.estimates["cols"]["factor"] - 1.5) <= 0.045
    assert t_raw.confidence != t_zoom.confidence


@pytest.mark.parametrize("side", [16, 24])
def test_thumbnail_too_small_is_inconclusive(side):
    """A frame under rs.MIN_SIDE samples gets no pixel call, whatever it holds: here a
    2x linear zoom (scipy.ndimage.zoom, order 1) of white noise, which a larger frame
    shows (test_zoom_* above); below the minimum the call is inconclusive, not absent."""
    rng = np.random.default_rng(side)
    frames = np.stack([ndimage.zoom(rng.standard_normal((side // 2, side // 2)), 2.0, order=1)
                       for _ in range(4)])
    trace = trace_of("resampling", Volume.from_array(frames.astype(np.float32)))
    assert trace.status == "inconclusive"
    assert trace.evidence["too_small"]["min_side"] == rs.MIN_SIDE == 32
    assert "too small" in trace.summary


def _smooth_volume(seed: int, n: int = 32) -> np.ndarray:
    rng = np.random.default_rng(seed)
    base = np.abs(synth.phantom((96, 96), seed=seed))
    z = np.linspace(-1, 1, n)
    return (np.stack([base * (1 - 0.3 * zz ** 2) for zz in z])
            + 0.02 * rng.standard_normal((n, 96, 96)))


@pytest.mark.parametrize("seed", [0, 1])
def test_through_plane_reslicing_by_two_is_found(seed):
    """A volume resliced 2x along its slice axis (scipy.ndimage.zoom, order 1) gets
    resampling present with a ``slices`` factor of 2 from the through-plane test (the
    periodicity at 1/2 cycle per slice; Popescu and Farid 2005: frequency 1/2 <->
    factor 2); the same volume unresliced gets neither the call nor a slices factor."""
    vol = _smooth_volume(seed)
    resliced = ndimage.zoom(vol, (2.0, 1, 1), order=1).astype(np.float32)
    t = trace_of("resampling", Volume.from_array(resliced))
    assert t.status == "present"
    assert t.estimates["slices"]["factor"] == pytest.approx(2.0, rel=0.05)
    assert t.evidence["tests"]["through_plane"]["frequency"] == pytest.approx(0.5, abs=0.02)
    raw = trace_of("resampling", Volume.from_array(vol.astype(np.float32)))
    assert raw.status == "absent" and "slices" not in raw.estimates
    assert raw.evidence["tests"]["through_plane"]["frequency"] is None
