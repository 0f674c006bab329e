"""Tests of the noise reference step and the noise-floor decisions built on it.

Outside references:
- A periodogram bin of white Gaussian noise is exponential (chi-square with 2
  degrees of freedom over 2), so a mean of ``M`` bins is Gamma(M) distributed
  (Kay, *Fundamentals of Statistical Signal Processing II*, 1998): checked against
  scipy.stats.expon / scipy.stats.gamma.
- False-alarm rates on null data (pure complex white noise and synthetic raw
  acquisitions, demo_data/synth.py, many sizes, coil counts and SNRs) are compared
  with the nominal rate by a binomial bound (scipy.stats.binom).
- The median of a chi-square variable against scipy.stats.chi2.
- The truth of every synthetic case is stated where it is built.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from app.io.volume import Volume
from app.traces import noise_reference as nr
from app.traces import spectrum as sp
from app.traces import support as su
from app.traces.plan import execute, trace_of
from demo_data import synth


def test_periodogram_bins_of_white_noise_are_exponential():
    """|FFT|^2 of white complex Gaussian noise of variance v: exponential with mean N v
    (Kolmogorov-Smirnov against scipy.stats.expon, and the Gamma law of the mean)."""
    rng = np.random.default_rng(0)
    n, sigma = 64, 0.7
    x = (rng.standard_normal((40, n, n)) + 1j * rng.standard_normal((40, n, n))) * sigma
    p = np.abs(np.fft.fft2(x)) ** 2
    mean = n * n * 2 * sigma**2
    assert stats.kstest(p[:, 5, 7:20].ravel() / mean, stats.expon.cdf).pvalue > 0.001
    # the mean of M bins: Gamma(M, mean / M); its 0.1 % and 99.9 % quantiles hold
    m = p[:, 3, :].size
    lo, hi = stats.gamma.ppf([0.001, 0.999], m, scale=mean / m)
    assert lo < p[:, 3, :].mean() < hi


def test_median_to_mean_matches_scipy_chi2():
    """Mean over median of chi2(k) equals k / scipy.stats.chi2.median(k)."""
    for k in (10.0, 63.0, 126.0):
        assert nr._median_to_mean(k) == pytest.approx(k / stats.chi2.median(k), rel=1e-12)


@pytest.mark.parametrize(("coils", "sigma"), [(1, 0.01), (4, 0.02)])
def test_background_variance_of_complex_coil_images(coils, sigma):
    """Per-pixel noise variance summed over coils = coils * 2 sigma^2 (truth: the
    noise synth.acquire added, sigma per component), within 10 %."""
    img = synth.acquire((128, 128), n_coils=coils, n_slices=4, sigma=sigma, seed=4)
    res = execute(Volume.from_array(img.astype(np.complex64), coil_axis=1), only=[],
                  extra_steps=["noise_reference"])
    ref = res.steps["noise_reference"]
    assert ref.kind == "background", ref.reason
    assert ref.pixel_variance == pytest.approx(coils * 2 * sigma**2, rel=0.10)
    assert ref.floor == pytest.approx(128 * 128 * ref.pixel_variance)
    # a raw acquisition's background noise spectrum is white: about 1 in white units
    prof = ref.psd_profile(0)
    assert 0.7 < float(np.median(prof)) < 1.3


def test_masked_background_is_not_usable():
    """A background replaced by zeros (masking) gives no noise level, with a reason."""
    mag, _ = synth.zero_filled_magnitude((96, 96), (1.0, 1.0), n_coils=4, n_slices=4,
                                         sigma=0.01, seed=2)
    mag = np.where(mag > 0.15 * mag.max(), mag, 0.0)
    res = execute(Volume.from_array(mag), only=[], extra_steps=["noise_reference"])
    ref = res.steps["noise_reference"]
    assert not ref.usable
    assert ref.reason


def _null_volume(rng: np.random.Generator, i: int) -> Volume:
    shape = (int(rng.integers(24, 97)), int(rng.integers(24, 97)))
    coils = int(rng.choice([1, 2, 4, 8]))
    frames = int(rng.choice([1, 2, 4]))
    kind = i % 3
    if kind == 0:  # pure white noise
        x = synth.complex_noise((frames, coils) + shape, 1.0, rng)
        return Volume.from_array(x, coil_axis=1)
    img = synth.acquire(shape, n_coils=coils, n_slices=frames,
                        sigma=float(rng.uniform(0.003, 0.08)), seed=rng)
    if kind == 1:
        return Volume.from_array(img.astype(np.complex64), coil_axis=1)
    return Volume.from_array(synth.to_kspace(img).astype(np.complex64), coil_axis=1,
                             domain="kspace")


def test_zero_filling_false_alarm_rate_on_null_complex_data():
    """Null data (white noise, raw complex images, raw k-space; 24-96 samples, 1-8
    coils, SNR 12-300): zero-filling calls at most the binomial 99.9 % bound for the
    nominal 0.1 % per dataset (scipy.stats.binom)."""
    rng = np.random.default_rng(17)
    n = 60
    calls = sum(trace_of("zero_filling", _null_volume(rng, i)).status == "present"
                for i in range(n))
    assert calls <= stats.binom.ppf(0.999, n, su.FALSE_ALARM_RATE)


@pytest.mark.parametrize(("acq", "out"), [((64, 48), (128, 96)), ((40, 60), (100, 120))])
def test_complex_zero_fill_support_to_the_sample(acq, out):
    """Complex images zero-filled from ``acq`` to ``out`` (truth): the empty band is
    found against the thermal floor, width within one sample, p-value below the
    false-alarm rate."""
    img = synth.acquire(acq, n_coils=2, n_slices=3, sigma=0.02, seed=9)
    vol = Volume.from_array(synth.to_image(synth.zero_fill(synth.to_kspace(img), out))
                            .astype(np.complex64), coil_axis=1)
    trace = trace_of("zero_filling", vol)
    assert trace.status == "present"
    d = trace.evidence["decision"]
    assert d["p_value"] <= su.FALSE_ALARM_RATE and d["value"] > d["threshold"]
    for i, ax in enumerate(("rows", "cols")):
        assert abs(trace.estimates[ax]["support_fraction"] * out[i] - acq[i]) <= 1.0
    assert trace.confidence == pytest.approx(1.0 - d["p_value"])


def test_spectrum_floor_matches_parseval():
    """The white level per bin of the unnormalised FFT is rows * cols * variance
    (Parseval's theorem; Bracewell 2000): the spectrum of pure noise sits on it."""
    rng = np.random.default_rng(3)
    x = synth.complex_noise((6, 1, 64, 80), 0.5, rng)
    spec = sp.compute_spectrum(Volume.from_array(x, coil_axis=1))
    assert float(spec.mean_power.mean()) == pytest.approx(64 * 80 * 2 * 0.25, rel=0.05)
