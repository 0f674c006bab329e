"""Tests of the partial-Fourier analyser (app/traces/partial_fourier.py).

Outside references:
- Synthetic multi-coil acquisitions (demo_data/synth.py) with one side of k-space
  removed beyond k_c = (f - 1/2) n; the truth is the acquired fraction f. Typical
  fractions 5/8, 6/8, 7/8: common practice, no source.
- A real image's spectrum is Hermitian-symmetric (Bracewell, *The Fourier
  Transform and Its Applications*, 2000), so a raw magnitude image shows no
  one-sided support.
"""

from __future__ import annotations

import numpy as np
import pytest

from app.io.volume import Volume
from app.traces import partial_fourier as pf
from app.traces.plan import trace_of
from demo_data import synth


def _partial(shape, frac, axis, *, pad=1.0, coils=4, sigma=0.01, seed=0, side="low"):
    """Coil images with k-space beyond k_c removed on one side of ``axis`` (truth: frac)."""
    img = synth.acquire(shape, n_coils=coils, n_slices=4, sigma=sigma, seed=seed)
    k = synth.to_kspace(img)
    n = shape[axis]
    c, kc = n // 2, int(round((frac - 0.5) * n))
    sel = [slice(None)] * 4
    sel[2 + axis] = slice(0, c - kc) if side == "low" else slice(c + kc + 1, None)
    k[tuple(sel)] = 0
    out = (int(round(shape[0] * pad)), int(round(shape[1] * pad)))
    return synth.zero_fill(k, out)


@pytest.mark.parametrize("frac", [5 / 8, 6 / 8, 7 / 8])
@pytest.mark.parametrize("axis", [0, 1])
def test_complex_images_fraction(frac, axis):
    """Complex coil images: acquired fraction within 0.02 (truth: the removed side)."""
    k = _partial((96, 112), frac, axis, seed=int(frac * 8) + axis)
    vol = Volume.from_array(synth.to_image(k), coil_axis=1)
    trace = trace_of("partial_fourier", vol)
    ax = ("rows", "cols")[axis]
    other = ("rows", "cols")[1 - axis]
    assert trace.status == "present"
    assert abs(trace.estimates[ax]["fraction"] - frac) <= 0.02
    assert trace.estimates[other]["fraction"] == 1.0


@pytest.mark.parametrize("side", ["low", "high"])
def test_kspace_input_with_zero_filling(side):
    """k-space input, 6/8 partial Fourier then 2x zero-filling: fraction 0.75 within 0.02."""
    k = _partial((80, 80), 0.75, 0, pad=2.0, seed=5, side=side)
    vol = Volume.from_array(k, coil_axis=1, domain="kspace")
    trace = trace_of("partial_fourier", vol)
    assert trace.status == "present"
    assert abs(trace.estimates["rows"]["fraction"] - 0.75) <= 0.02
    lo, hi = trace.evidence["edges"]["rows"]
    # acquired rows: 60 full-side lines plus 20 past the centre, in a 160 grid (DC at 80)
    assert abs((hi - lo + 1) - 60) <= 1


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_full_acquisitions_are_not_called(seed):
    """Raw-like images (nothing removed): complex absent; magnitude never present.

    A magnitude image's power spectrum is Hermitian-symmetric whatever was acquired,
    so without a strong step the analyser says inconclusive, not absent.
    """
    img = synth.acquire((96, 96), n_coils=4, n_slices=4, sigma=0.01, seed=seed)
    trace = trace_of("partial_fourier", Volume.from_array(img, coil_axis=1))
    assert trace.status == "absent"
    assert trace.estimates["rows"]["fraction"] == 1.0
    assert trace.estimates["cols"]["fraction"] == 1.0
    mag = trace_of("partial_fourier", Volume.from_array(synth.rss(img, axis=1)))
    assert mag.status == "inconclusive"
    assert mag.estimates["rows"]["fraction"] == 1.0


def test_registered_analyser_contract():
    """Through the registry: required estimates and the agreed evidence keys."""
    k = _partial((64, 64), 5 / 8, 1, seed=7)
    vol = Volume.from_array(synth.to_image(k), coil_axis=1)
    trace = trace_of("partial_fourier", vol)
    assert set(pf.DEFAULT_ESTIMATES) <= set(trace.estimates)
    for key in ("profiles_db", "asymmetry_db", "edges"):
        assert key in trace.evidence
    # the missing (negative) side holds exact zeros, far below the acquired one
    assert trace.evidence["asymmetry_db"]["cols"] > 60.0


def _mirror_conj(k):
    """conj K(-k) of centred k-space (both in-plane axes reflected through n // 2)."""
    r, c = k.shape[-2:]
    return np.conj(k[..., (2 * (r // 2) - np.arange(r)) % r, :]
                   [..., (2 * (c // 2) - np.arange(c)) % c])


@pytest.mark.parametrize("frac", [5 / 8, 6 / 8, 7 / 8])
def test_conjugate_fill_is_found_as_processing(frac):
    """Missing side synthesised as conj K(-k) (Noll, Nishimura and Macovski 1991;
    McGibney et al. 1993): present, fill "conjugate", origin processing, fraction
    within 0.05 of the truth."""
    img = synth.acquire((96, 112), n_coils=4, n_slices=4, sigma=0.01, seed=int(frac * 80))
    k = synth.to_kspace(img)
    c, kc = 48, int(round((frac - 0.5) * 96))
    k[:, :, :c - kc] = _mirror_conj(k)[:, :, :c - kc]
    trace = trace_of("partial_fourier",
                     Volume.from_array(synth.to_image(k).astype(np.complex64), coil_axis=1))
    assert trace.status == "present"
    assert trace.estimates["fill"] == "conjugate" and trace.origin == "processing"
    assert abs(trace.estimates["rows"]["fraction"] - (96 - (c - kc)) / 96) <= 0.05


def test_zero_fill_is_an_acquisition_property():
    """Missing side left as zeros (truth 6/8): fill "zeros", origin acquisition, and the
    decision's p-value below its false-alarm rate."""
    k = _partial((96, 112), 6 / 8, 0, seed=5)
    trace = trace_of("partial_fourier",
                     Volume.from_array(synth.to_image(k).astype(np.complex64), coil_axis=1))
    assert trace.estimates["fill"] == "zeros" and trace.origin == "acquisition"
    d = trace.evidence["decision"]
    assert d["p_value"] <= d["false_alarm_rate"]
    assert trace.confidence == pytest.approx(1.0 - d["p_value"])


@pytest.mark.slow
def test_raw_complex_images_false_alarm_rate():
    """Raw complex coil images (truth: full k-space), 20 sizes / coil counts / SNRs:
    partial-Fourier calls within the binomial 99.9 % bound of the nominal 0.1 %
    (scipy.stats.binom)."""
    from scipy import stats

    rng = np.random.default_rng(23)
    calls = 0
    for _ in range(20):
        shape = (int(rng.integers(32, 97)), int(rng.integers(32, 97)))
        img = synth.acquire(shape, n_coils=int(rng.choice([1, 4, 8])), n_slices=2,
                            sigma=float(rng.uniform(0.003, 0.08)), seed=rng)
        vol = Volume.from_array(img.astype(np.complex64), coil_axis=1)
        calls += trace_of("partial_fourier", vol).status == "present"
    assert calls <= stats.binom.ppf(0.999, 20, pf.FALSE_ALARM_RATE)


def _phase_constrained_fill(k, n_missing, method, iterations=10):
    """An independent test-side fill of rows ``0..n_missing-1`` (axis -2) of centred 2-D
    k-space: low-resolution phase from a Hamming-weighted symmetric centre (the analyser
    uses Hann), then phase-corrected conjugate synthesis (Margosian et al. 1986) or POCS
    (Haacke et al. 1991, ``iterations`` rounds, the analyser runs 15)."""
    from scipy import fft as sfft
    from scipy.signal import windows

    def img(x):
        return sfft.fftshift(sfft.ifft2(sfft.ifftshift(x, axes=(-2, -1)), norm="ortho"),
                             axes=(-2, -1))

    def ksp(x):
        return sfft.fftshift(sfft.fft2(sfft.ifftshift(x, axes=(-2, -1)), norm="ortho"),
                             axes=(-2, -1))

    n = k.shape[-2]
    c = n // 2
    keep = (np.arange(n) >= n_missing)[:, None]
    kz = k * keep
    half = c - n_missing
    w = np.zeros(n)
    w[c - half:c + half] = windows.hamming(2 * half)
    phase = np.exp(1j * np.angle(img(kz * w[:, None])))
    if method == "conjugate":
        spec = ksp(img(kz) * phase.conj())
        spec = np.where(keep, spec, _mirror_conj(spec))
        full = ksp(img(spec).real * phase)
        return np.where(keep, k, full)
    out = kz
    for _ in range(iterations):
        out = np.where(keep, kz, ksp(np.abs(img(out)) * phase))
    return out


@pytest.mark.parametrize("method,frac", [("conjugate", 5 / 8), ("conjugate", 7 / 8),
                                         ("pocs", 6 / 8), ("pocs", 5 / 8)])
def test_phase_constrained_fill_is_found(method, frac):
    """Multi-coil k-space whose missing side was filled by a phase-constrained
    reconstruction of the test's own (Margosian et al. 1986; Haacke et al. 1991), with a
    different phase window and iteration count than the analyser's: present, origin
    processing, the fill named (conjugate or iterative), acquired fraction within 0.05 of
    the truth (rows kept / rows)."""
    img = synth.acquire((96, 112), n_coils=4, n_slices=2, sigma=0.02,
                        seed=int(frac * 64) + len(method))
    k = synth.to_kspace(img)
    n = 96
    n_missing = n - int(round(frac * n))
    filled = np.stack([np.stack([_phase_constrained_fill(k[s, c], n_missing, method)
                                 for c in range(k.shape[1])]) for s in range(k.shape[0])])
    trace = trace_of("partial_fourier",
                     Volume.from_array(filled.astype(np.complex64), coil_axis=1,
                                       domain="kspace"))
    assert trace.status == "present" and trace.origin == "processing"
    assert trace.estimates["fill"] == {"conjugate": "conjugate", "pocs": "iterative"}[method]
    assert abs(trace.estimates["rows"]["fraction"] - (n - n_missing) / n) <= 0.05
    d = trace.evidence["decision"]
    assert d["p_value"] <= d["false_alarm_rate"]


@pytest.mark.slow
def test_resynthesis_null_law_on_white_noise():
    """Pure complex white noise (truth: nothing filled, every column air): the residual
    over noise averages at least 1 and the test's p-values are conservative: at most the
    binomial 99.9 % bound of 5 % of 40 trials fall below 0.05 (scipy.stats.binom), the
    null law being the F lower tail (scipy.stats.f) the test states."""
    from scipy import stats

    from app.traces import pf_fill

    rng = np.random.default_rng(4)
    low = 0
    for _ in range(40):
        shape = (int(rng.integers(2, 6)), int(rng.integers(32, 97)), int(rng.integers(32, 97)))
        noise = rng.standard_normal(shape) + 1j * rng.standard_normal(shape)
        t = pf_fill.resynthesis_test(noise, int(rng.integers(0, 2)), alpha=1e-3)
        assert t.ran and t.ratio >= 0.8
        low += t.p_value <= 0.05
    assert low <= stats.binom.ppf(0.999, 40, 0.05)


def test_absent_confidence_is_the_stated_power():
    """Raw complex coil images (truth: full k-space): absent, and the confidence is the
    re-synthesis test's power, a probability below 1 stated in the evidence (not a
    constant), computed from the F law (scipy.stats.f)."""
    img = synth.acquire((64, 64), n_coils=2, n_slices=2, sigma=0.02, seed=11)
    trace = trace_of("partial_fourier", Volume.from_array(img.astype(np.complex64),
                                                          coil_axis=1))
    assert trace.status == "absent"
    powers = [v["power"] for v in trace.evidence["resynthesis"].values()]
    assert trace.confidence == pytest.approx(min(powers), rel=1e-3)
    assert 0.0 < trace.confidence <= 1.0
