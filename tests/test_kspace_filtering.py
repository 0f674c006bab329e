"""Tests of the k-space filtering analyser (app/traces/kspace_filtering.py).

Outside references:
- scipy.signal.windows (hann, hamming, tukey, gaussian) as the reference window
  definitions (Harris, Proc. IEEE 66:51-83, 1978).
- Synthetic multi-coil acquisitions (demo_data/synth.py) whose k-space was
  multiplied by a known window before the inverse FFT; the truth is the window.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.signal import windows

from app.io.volume import Volume
from app.traces import kspace_filtering as kf
from app.traces.plan import step_of, trace_of
from demo_data import synth


@pytest.mark.parametrize(("family", "param", "reference"), [
    ("hann", None, lambda m: windows.hann(m, sym=True)),
    ("hamming", None, lambda m: windows.hamming(m, sym=True)),
    ("tukey", 0.5, lambda m: windows.tukey(m, 0.5, sym=True)),
    ("gaussian", 0.4, lambda m: windows.gaussian(m, 0.4 * (m - 1) / 2, sym=True)),
])
def test_windows_match_scipy_signal(family, param, reference):
    """Window curves equal scipy.signal.windows on the same symmetric grid."""
    m = 65
    u = (np.arange(m) - (m - 1) / 2) / ((m - 1) / 2)
    np.testing.assert_allclose(kf.window_curve(family, param, u), reference(m), atol=1e-12)


def _windowed(family, param, *, pad=1.0, shape=(112, 96), seed=2, complex_out=True):
    """Coil images whose centred k-space was multiplied by a separable window (the truth)."""
    img = synth.acquire(shape, n_coils=4, n_slices=4, sigma=0.01, seed=seed)
    k = synth.to_kspace(img)
    if family is not None:
        wy = kf.window_curve(family, param, (np.arange(shape[0]) - shape[0] // 2) / (shape[0] / 2))
        wx = kf.window_curve(family, param, (np.arange(shape[1]) - shape[1] // 2) / (shape[1] / 2))
        k = k * (wy[:, None] * wx[None, :])
    out = (int(shape[0] * pad), int(shape[1] * pad))
    im = synth.to_image(synth.zero_fill(k, out))
    return Volume.from_array(im, coil_axis=1) if complex_out else Volume.from_array(
        synth.rss(im, axis=1))


@pytest.mark.parametrize(("family", "param", "pad"), [
    ("hann", None, 1.0), ("hann", None, 2.0), ("hamming", None, 1.0), ("hamming", None, 2.0),
    ("tukey", 0.5, 1.0), ("tukey", 0.5, 2.0), ("fermi", 0.7, 1.0), ("fermi", 0.8, 2.0),
])
def test_windowed_complex_data_is_present(family, param, pad):
    """Complex coil images with a window applied (truth): present, unpadded and 2x padded.

    A Fermi window of radius 0.8 on unpadded data (it attenuates only the outer fifth
    of k-space) falls below the conservative call (gain 1.3 dB), chosen so that raw
    data are called absent in at least 98 % of cases; the bench measures such misses.
    """
    trace = trace_of("kspace_filtering", _windowed(family, param, pad=pad))
    assert trace.status == "present"
    # from the image spectrum's profile the family is not named (it cannot be told
    # apart there: see the next test); the closest fit stays in the evidence
    assert trace.estimates["window"] is None
    assert trace.evidence["window_label"] == "smooth roll-off, family not identified"
    assert trace.evidence["closest_family"]["window"] in {name for name, _ in kf.CANDIDATES}
    assert "family not identified" in trace.summary


def test_profile_fit_does_not_identify_families():
    """Why the profile path names no family: over the five families (Harris 1978;
    Tukey; Fermi; Gaussian), applied to the same acquisition, the closest profile fit
    is one and the same family for most of them, so it does not track the window.
    If this ever fails, the profile fit has learnt to tell families apart and naming
    the family can be reconsidered (with the bench's figures)."""
    closest = [trace_of("kspace_filtering", _windowed(fam, par, pad=1.0, seed=3))
               .evidence["closest_family"]["window"]
               for fam, par in (("hann", None), ("hamming", None), ("tukey", 0.5),
                                ("fermi", 0.7), ("gaussian", 0.4))]
    right = sum(c == f for c, f in zip(closest, ("hann", "hamming", "tukey", "fermi",
                                                   "gaussian"), strict=True))
    assert right <= 2, closest


def test_hann_on_rss_magnitude_is_present():
    """Root-sum-of-squares magnitude of Hann-windowed data (truth: Hann): present."""
    vol = _windowed("hann", None, seed=4, complex_out=False)
    assert trace_of("kspace_filtering", vol).status == "present"


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
@pytest.mark.parametrize("complex_out", [True, False])
def test_unfiltered_data_is_absent(seed, complex_out):
    """Unfiltered acquisitions (truth: no window), complex and RSS: absent."""
    vol = _windowed(None, None, seed=seed, complex_out=complex_out)
    trace = trace_of("kspace_filtering", vol)
    assert trace.status == "absent"
    assert trace.estimates["window"] is None


def test_registered_analyser_contract():
    """Through the registry: the window estimate and the agreed evidence keys."""
    vol = _windowed("hann", None, shape=(64, 64), seed=5)
    trace = trace_of("kspace_filtering", vol)
    assert "window" in trace.estimates
    fits = trace.evidence["fits"]
    for ax in ("rows", "cols"):
        assert set(fits[ax]) >= {"window", "param", "curve_db", "error"}
        assert len(fits[ax]["curve_db"]) == len(fits[ax]["k"])
    assert "profiles_db" in trace.evidence


@pytest.mark.parametrize(("family", "param", "complex_out"), [
    ("hann", None, True), ("tukey", 0.5, False), (None, None, True), (None, None, False)])
def test_decision_value_is_the_call_margin(family, param, complex_out):
    """The decision record's value is non-negative exactly when a window is called
    (one statistic, one threshold at 0), so a calibration map of it stays consistent
    with the call."""
    trace = trace_of("kspace_filtering", _windowed(family, param, seed=7,
                                                   complex_out=complex_out))
    dec = trace.evidence["decision"]
    assert dec["threshold"] == 0.0
    assert (dec["value"] >= 0.0) is (trace.status == "present")


def test_axis_margin_matches_called():
    """AxisFit.margin_db >= 0 if and only if AxisFit.called, on fits of both kinds."""
    for family in ("hann", None):
        vol = _windowed(family, None, seed=11)
        spec = step_of("spectrum", vol)
        fits = kf.detect(spec, step_of("support", vol))
        for f in fits.values():
            assert (f.margin_db >= 0.0) is f.called
