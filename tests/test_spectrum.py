"""Tests of the shared spectral pass (app/traces/spectrum.py).

References: the discrete Fourier transform's Parseval relation and Hermitian
symmetry of the spectrum of a real signal (Bracewell, *The Fourier Transform and
Its Applications*, 2000); numpy.fft as the reference implementation.
"""

from __future__ import annotations

import numpy as np
import pytest

from app.io.volume import Volume
from app.traces import spectrum as sp
from app.traces.base import StepUnavailableError
from app.traces.plan import step_of, trace_of


def test_profiles_match_numpy_fft_reference():
    """Per-axis profiles equal the mean of |numpy.fft.fft2|^2, fftshift-ed (reference: numpy)."""
    rng = np.random.default_rng(0)
    data = rng.standard_normal((5, 24, 30)).astype(np.float32)
    spec = sp.compute_spectrum(Volume.from_array(data), batch=2)
    ref = np.fft.fftshift(np.abs(np.fft.fft2(data.astype(np.float64))) ** 2, axes=(-2, -1))
    np.testing.assert_allclose(spec.profiles["rows"], ref.mean(axis=(0, 2)), rtol=1e-4)
    np.testing.assert_allclose(spec.profiles["cols"], ref.mean(axis=(0, 1)), rtol=1e-4)
    np.testing.assert_allclose(spec.mean_log, (10 * np.log10(ref)).mean(axis=0), atol=1e-3)
    assert spec.map_index == 2
    np.testing.assert_allclose(spec.map_power, ref[2], rtol=1e-4)


def test_half_plane_accumulation_matches_full_reference_odd_sizes_and_coils():
    """Real frames are summed over the ``rfft2`` half and expanded; odd and even sides
    and real coil images give the full-plane numpy.fft result (Hermitian symmetry)."""
    rng = np.random.default_rng(4)
    for shape, coil_axis in (((3, 23, 31), None), ((4, 17, 16), None), ((3, 2, 15, 12), 1)):
        data = np.abs(rng.standard_normal(shape)).astype(np.float32)
        spec = sp.compute_spectrum(Volume.from_array(data, coil_axis=coil_axis), batch=2)
        p = np.abs(np.fft.fft2(data.astype(np.float64))) ** 2
        if coil_axis is not None:
            p = p.sum(axis=1)
        ref = np.fft.fftshift(p, axes=(-2, -1))
        np.testing.assert_allclose(spec.mean_power, ref.mean(axis=0), rtol=1e-4)
        np.testing.assert_allclose(spec.mean_log, (10 * np.log10(ref)).mean(axis=0), atol=1e-3)
        np.testing.assert_allclose(spec.map_power, ref[spec.map_index], rtol=1e-4)


def test_multicoil_power_is_summed_over_coils():
    """Coil power adds (Parseval; reference: numpy.fft on each coil)."""
    rng = np.random.default_rng(1)
    data = (rng.standard_normal((3, 4, 16, 16)) + 1j * rng.standard_normal((3, 4, 16, 16)))
    spec = sp.compute_spectrum(Volume.from_array(data.astype(np.complex64), coil_axis=1))
    ref = np.fft.fftshift((np.abs(np.fft.fft2(data)) ** 2).sum(axis=1), axes=(-2, -1))
    np.testing.assert_allclose(spec.mean_power, ref.mean(axis=0), rtol=1e-4)
    assert spec.complex_input


def test_uncentred_kspace_is_shifted():
    """k-space stored with DC at the corner gives the same profiles as centred k-space."""
    rng = np.random.default_rng(2)
    img = 5.0 + rng.standard_normal((2, 32, 32))  # DC holds the peak
    k_centred = np.fft.fftshift(np.fft.fft2(img), axes=(-2, -1)).astype(np.complex64)
    k_corner = np.fft.fft2(img).astype(np.complex64)
    a = sp.compute_spectrum(Volume.from_array(k_centred, domain="kspace"))
    b = sp.compute_spectrum(Volume.from_array(k_corner, domain="kspace"))
    assert a.kspace_shifted is False and b.kspace_shifted is True
    np.testing.assert_allclose(a.profiles["rows"], b.profiles["rows"], rtol=1e-5)


def test_slice_profile_of_a_3d_volume():
    """A through-plane band limit shows in the slice profile (truth: 32 of 64 slice frequencies).

    The volume is white noise low-passed along the slice axis by zeroing all but the
    central 32 of 64 slice frequencies, so the profile beyond them is 0 (up to rounding).
    """
    rng = np.random.default_rng(3)
    vol = rng.standard_normal((64, 20, 20))
    k = np.fft.fftshift(np.fft.fft(vol, axis=0), axes=0)
    k[:16] = 0
    k[48:] = 0
    vol = np.fft.ifft(np.fft.ifftshift(k, axes=0), axis=0).real.astype(np.float32)
    spec = sp.compute_spectrum(Volume.from_array(vol), batch=7)
    prof = spec.profiles["slices"]
    assert prof[16:48].min() > 1e6 * prof[:16].max()


def test_too_small_frames_make_the_spectrum_step_unavailable():
    """A 6 x 6 frame is below the spectral analysers' minimum: the shared step says
    why, and every analyser that needs it is inconclusive with that reason (common
    practice, no source: no honest support edge can be read off 3 samples a side)."""
    vol = Volume.from_array(np.ones((2, 6, 6), dtype=np.float32))
    with pytest.raises(StepUnavailableError) as err:
        step_of("spectrum", vol)
    t = trace_of("zero_filling", vol)
    assert t.status == "inconclusive" and t.summary == err.value.reason


def test_step_scores_find_a_step_and_ignore_a_slope():
    """A 10 dB step scores 10 dB; a straight decay scores 0 (construction of the estimator)."""
    x = np.arange(60, dtype=float)
    ramp = -0.5 * x
    step = ramp - 10.0 * (x > 30)
    s_ramp = sp.step_scores(ramp, 5)
    s_step = sp.step_scores(step, 5, gap=0)
    assert np.nanmax(np.abs(s_ramp)) < 1e-9
    assert abs(s_step[30] - 10.0) < 1e-9
    assert int(np.nanargmax(s_step)) == 30


def test_evidence_helpers_bound_sizes():
    """Evidence arrays stay short: profiles <= 1024, maps <= 128 x 128 (team agreement)."""
    assert len(sp.downsample_mean(np.arange(3000.0))) <= 1024
    m, steps = sp.block_average(np.ones((300, 520)), 128)
    assert m.shape[0] <= 128 and m.shape[1] <= 128 and steps == [3, 5]
    assert sp.round_sig(123456.0) == 123500.0


def test_nan_input_is_not_modified_and_noise_floor():
    """NaNs are zeroed on a copy (the caller's array is untouched); white noise floor level.

    White Gaussian noise of variance 1 on N samples has an unnormalised FFT power of
    N per frequency (Parseval), so the floor is 10 log10(N) dB.
    """
    rng = np.random.default_rng(4)
    data = rng.standard_normal((8, 32, 32)).astype(np.float32)
    data[0, 0, 0] = np.nan
    spec = sp.compute_spectrum(Volume.from_array(data))
    assert np.isnan(data[0, 0, 0])
    assert abs(spec.noise_floor_db["rows"] - 10 * np.log10(32 * 32)) < 0.5
