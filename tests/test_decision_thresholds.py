"""Decision thresholds of the analysers, each pinned from both sides.

Every test puts an input, or the statistics a decision function reads, just on
each side of one decision threshold and checks that the call flips there and only
there. Together with the analysers' own test modules they kill every mutant of
``python -m bench.mutation_probe`` (a threshold moved, a comparison flipped).

Where the threshold is a published law's quantile, the statistic is built from that
law (scipy.stats: the Gamma law of a mean of exponential periodogram bins, the
central chi law of root-sum-of-squares noise, the exponential tail of a spectrum's
bins). Where it is the analyser's own stated design value (named in its module's
docstring or comment), the test pins that documented value with a statistic built
from a known truth, and says so.
"""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest
from scipy import stats

from app.io.volume import Volume
from app.traces import calibration
from app.traces import coil_combination as cc
from app.traces import jpeg_pixels as jp
from app.traces import kspace_filtering as kf
from app.traces import kspace_synthesis as ks
from app.traces import partial_fourier as pf
from app.traces import resampling as rs
from app.traces import support as su
from app.traces import value_kind as vk
from app.traces import zero_filling as zf
from app.traces.base import Trace
from app.traces.declared import Declaration, combine, declarations
from app.traces.jpeg_tables import scaled_table
from app.traces.lossy_compression import HeaderFinding
from app.traces.lossy_compression import combine as lossy_combine
from app.traces.plan import step_of, trace_of
from app.traces.report import calibrated

# ----------------------------------------------------------------------------- support


def _complex_spec(levels: np.ndarray, columns: int) -> SimpleNamespace:
    """The fields of a Spectrum that the complex support test reads: every k-space line
    (centred order) at the given mean power over ``columns`` bins, one frame."""
    levels = np.asarray(levels, dtype=np.float64)
    return SimpleNamespace(mean_power=np.repeat(levels[:, None], columns, axis=1), n_frames=1,
                           shape=(levels.size, columns), profiles={})


#: a background noise reference of white noise at mean power 1 per periodogram bin
_FLOOR = SimpleNamespace(usable=True, floor=1.0)


@pytest.mark.parametrize("n,found", [(128, True), (256, False)])
def test_zero_filled_support_threshold_one_empty_line_each_side(n: int, found: bool) -> None:
    """One exactly empty line on each side: support 126/128 is zero-filled, 254/256 not.

    Truth: k-space zero-filled by one line per side holds exact zeros there (Bernstein,
    Fain and Riederer, JMRI 14:270-280, 2001). The analyser's stated rule
    (support.FOUND_SUPPORT): an axis counts as zero-filled below 98.5 % support, so
    126/128 = 0.984 is a call and 254/256 = 0.992 is not; both support fractions are
    measured to the line.
    """
    levels = np.ones(n)
    levels[0] = levels[-1] = 0.0
    a = su.complex_axis_support(_complex_spec(levels, 64), 0, _FLOOR)
    assert a.support_fraction == pytest.approx((n - 2) / n, abs=1e-9)
    assert a.found is found
    assert a.decision["p_value"] < 1e-12  # both sides are empty beyond doubt either way


@pytest.mark.parametrize("fraction,status", [(0.98, "present"), (0.99, "absent")])
def test_zero_filling_counts_only_axes_below_the_found_support(fraction: float,
                                                               status: str) -> None:
    """The zero_filling trace calls an axis only when its support is below 98.5 %.

    Direct call of ``zero_filling.trace_from`` with an axis whose edge was found
    (strong evidence, p = 1e-9) at support 0.98 and at 0.99 (the analyser's stated
    rule, support.FOUND_SUPPORT = 0.985). The spectrum is that of a 64 x 64 noise image
    (its evidence only).
    """
    rng = np.random.default_rng(3)
    spec = step_of("spectrum", Volume.from_array(rng.standard_normal((1, 64, 64))
                                                 .astype(np.float32)))
    decision = {"statistic": "s", "value": 20.0, "threshold": 4.5, "false_alarm_rate": None,
                "p_value": 1e-9}
    axes = {"rows": su.AxisSupport("rows", 256, True, fraction, (3, 252), 20.0, 20.0, -30.0,
                                   x_pos=125.0, x_neg=125.0, decision=decision),
            "cols": su.AxisSupport("cols", 256, False, 1.0, None, None, 0.0, -30.0,
                                   decision=dict(decision, value=0.0, p_value=1.0))}
    assert zf.trace_from(spec, axes).status == status


@pytest.mark.parametrize("level,found", [(0.1, True), (0.4, False)])
def test_empty_line_share_of_the_noise_floor(level: float, found: bool) -> None:
    """Outer lines at 0.1 of the thermal noise power are empty; at 0.4 they are not.

    Truth: 4 outer lines per side at the stated share of a white noise floor of mean
    power 1, 64 bins each. The analyser's stated rule (support.EMPTY_SHARE): a line is
    empty below a quarter of the floor (receiver roll-off lowers raw noise by far
    less). At 0.1 the Gamma test of 256 bins is decisive (scipy.stats.gamma.cdf of
    0.4 * 256 with shape 256 is below 1e-30).
    """
    levels = np.ones(128)
    levels[:4] = levels[-4:] = level
    a = su.complex_axis_support(_complex_spec(levels, 64), 0, _FLOOR)
    assert a.found is found
    if found:
        assert a.support_fraction == pytest.approx(120 / 128)


@pytest.mark.parametrize("q,found", [(1e-2, False), (1e-5, True)])
def test_empty_band_false_alarm_rate_from_the_gamma_law(q: float, found: bool) -> None:
    """An empty-band test at the Gamma quantile q: called at q = 1e-5, not at q = 1e-2.

    Truth: one outer line per side whose mean over M = 8 bins sits at the q-quantile of
    its null law, the mean of M exponential periodogram bins of mean ``0.25 * floor``
    (Gamma with shape M and scale ``0.25 / M``: Kay, *Fundamentals of Statistical
    Signal Processing II*, 1998; quantile from scipy.stats.gamma.ppf). The per-side
    rate is the stated 1e-3 per dataset over 4 (support.FALSE_ALARM_RATE), 2.5e-4:
    q = 1e-2 is above it, 1e-5 below. The decision p-value is 4 q (Bonferroni).
    """
    m = 8
    tail = 0.25 * stats.gamma.ppf(q, m) / m
    levels = np.ones(64)
    levels[0] = levels[-1] = tail
    a = su.complex_axis_support(_complex_spec(levels, m), 0, _FLOOR)
    assert a.found is found
    assert a.decision["p_value"] == pytest.approx(4 * q, rel=1e-6)


def test_zero_filling_rests_on_the_less_empty_side() -> None:
    """One empty side is no evidence of zero-filling (p = 1); two empty sides are.

    Zero-filling pads both sides; a single empty side is partial Fourier. The call is
    an intersection-union test, whose p-value is the larger of the two sides' (R. L.
    Berger, "Multiparameter hypothesis testing and acceptance sampling",
    Technometrics 24:295-300, 1982; from memory).
    """
    one = np.ones(128)
    one[-8:] = 0.0
    a = su.complex_axis_support(_complex_spec(one, 64), 0, _FLOOR)
    assert not a.found and a.decision["p_value"] == 1.0
    both = one.copy()
    both[:8] = 0.0
    b = su.complex_axis_support(_complex_spec(both, 64), 0, _FLOOR)
    assert b.found and b.decision["p_value"] < 1e-12


@pytest.mark.parametrize("drop_db,found", [(4.0, False), (5.0, True)])
def test_magnitude_step_threshold(drop_db: float, found: bool) -> None:
    """A clean 5 dB step of the log-power profile is an edge; a 4 dB step is not.

    Truth: a flat profile out to 40 samples from DC, ``drop_db`` lower beyond (16 equal
    band lines, so the halves agree); its step score is the drop itself. The
    analyser's stated rule (support.STEP_THRESHOLD_DB): an edge needs 4.5 dB.
    """
    k = np.abs(np.arange(128) - 64)
    prof = np.where(k <= 40, 0.0, -drop_db)
    a = su.axis_support(np.repeat(prof[:, None], 16, axis=1), 10 ** (prof / 10), axis="rows",
                        symmetric=True)
    assert a.score_db == pytest.approx(drop_db)
    assert a.found is found
    if found:
        assert a.support_fraction == pytest.approx(81 / 128, abs=1.5 / 128)


# ---------------------------------------------------------------------- coil combination


@pytest.mark.parametrize("channels,is_chi", [(1.3, False), (1.7, True)])
def test_rayleigh_chi_split_between_effective_channels(channels: float, is_chi: bool) -> None:
    """Effective L = 1.3 is not called a root-sum-of-squares; L = 1.7 is.

    Truth: 20000 samples of the central chi law with 2L degrees of freedom, sigma 3
    (scipy.stats.chi; Constantinides, Atalar and McVeigh, MRM 38:852-857, 1997);
    correlated channels give a non-integer effective L (Aja-Fernandez and
    Tristan-Vega, MRM 67:580-585, 2012; from memory). The stated split
    (coil_combination.L_SPLIT) is L = 1.5; the moment estimate must be within 0.05.
    """
    x = stats.chi(df=2 * channels, scale=3.0).rvs(20000, random_state=4)
    res = cc.fit_magnitude_background(x)
    assert abs(res["channels"] - channels) < 0.05
    assert (res["chosen"] == "noncentral_chi") is is_chi


def _rss_frames(channels: int, seed: int) -> np.ndarray:
    """Two 128 x 128 frames: a disc, root-sum-of-squares of ``channels`` noisy channels."""
    rng = np.random.default_rng(seed)
    y, x = np.mgrid[:128, :128]
    obj = 40.0 * (((y - 64) ** 2 + (x - 64) ** 2) < 30 ** 2)
    noise = rng.standard_normal((2, channels, 128, 128)) + 1j * rng.standard_normal(
        (2, channels, 128, 128))
    return np.sqrt((np.abs(obj / np.sqrt(channels) + noise) ** 2).sum(axis=1)).astype(
        np.float32)


@pytest.mark.parametrize("channels,status,combination", [(1, "absent", "single"),
                                                         (4, "present", "rss")])
def test_combination_is_named_by_the_law(channels: int, status: str, combination: str) -> None:
    """One channel's air is Rayleigh (single); four channels' air is chi (rss).

    Truth: root-sum-of-squares of ``channels`` complex Gaussian channels of sigma 1
    over a disc; the air then follows the central chi law with 2L degrees of freedom
    (Constantinides et al. 1997), Rayleigh for L = 1 (Gudbjartsson and Patz, MRM
    34:910-914, 1995).
    """
    t = trace_of("coil_combination", Volume.from_array(_rss_frames(channels, 30 + channels)))
    assert t.status == status
    assert t.estimates["combination"] == combination


def _linear_test_result(p: float) -> dict:
    return {"p_value": p, "p_evenness": p, "p_ratio": p, "ratio_z": -3.0, "kappa": 1.0,
            "spread": 1.5, "blocks": 32}


@pytest.mark.parametrize("p,status,combination", [(2e-3, "absent", "single"),
                                                  (5e-4, "present", "linear")])
def test_linear_combination_false_alarm_rate(monkeypatch: pytest.MonkeyPatch, p: float,
                                             status: str, combination: str) -> None:
    """A varying noise sigma at p = 5e-4 is a linear combination; at p = 2e-3 it is not.

    Direct check of the decision on one complex image: the test of one common sigma
    (``linear_combination_test``, Fisher's combination of the tile analysis of
    variance and the moment ratio) is replaced by its result at p on each side of the
    stated false-alarm rate 1e-3 (coil_combination.FALSE_ALARM).
    """
    monkeypatch.setattr(cc, "linear_combination_test",
                        lambda frames, masks, *, law, **kw: _linear_test_result(p))
    rng = np.random.default_rng(8)
    y, x = np.mgrid[:128, :128]
    obj = 40.0 * (((y - 64) ** 2 + (x - 64) ** 2) < 30 ** 2)
    z = obj + rng.standard_normal((2, 128, 128)) + 1j * rng.standard_normal((2, 128, 128))
    t = trace_of("coil_combination", Volume.from_array(z.astype(np.complex64)))
    assert t.status == status and t.estimates["combination"] == combination
    assert t.evidence["decision"]["p_value"] == pytest.approx(p)


# --------------------------------------------------------------------------- value kind

def _no_background() -> SimpleNamespace:
    """A background step result with no background found (frame 0 examined)."""
    return SimpleNamespace(frames=np.array([0]), values=None, usable=False)


@pytest.mark.parametrize("share,domain", [(0.03, "magnitude"), (0.08, "real_signed")])
def test_negative_share_makes_values_signed(share: float, domain: str) -> None:
    """8 % negative values make an image real-valued signed; 3 % do not.

    Truth: a 64 x 64 image of values in [1, 2] with the stated share set to -1 (no
    background found, so only the overall share decides). The analyser's stated rule
    (value_kind.NEG_OVERALL_SHARE): 5 %; sparse negatives are interpolation overshoot
    of magnitudes, a substantial share is a signed real image (Haacke et al. 1999,
    from memory).
    """
    rng = np.random.default_rng(12)
    img = rng.uniform(1.0, 2.0, (1, 64, 64))
    flat = img.reshape(-1)
    flat[rng.choice(flat.size, int(round(share * flat.size)), replace=False)] = -1.0
    v = vk.classify_values(Volume.from_array(img.astype(np.float32)), _no_background())
    assert v.domain == domain
    assert v.negative_fraction == pytest.approx(share, abs=1e-3)


@pytest.mark.parametrize("ratio,domain", [(1e-3, "complex"), (1e-6, "magnitude")])
def test_imaginary_energy_share_keeps_values_complex(ratio: float, domain: str) -> None:
    """An imaginary part carrying 1e-6 of the energy is a phase; 1e-12 is zero.

    Truth: a complex128 image ``r (1 + i s ratio)`` with ``r`` in [1, 2] and random
    signs ``s``: the imaginary energy share is ``ratio**2 / (1 + ratio**2)`` exactly
    (Parseval). The stated rule (value_kind.IMAG_ZERO): above 1e-10 the values are
    complex.
    """
    rng = np.random.default_rng(13)
    r = rng.uniform(1.0, 2.0, (1, 64, 64))
    s = rng.choice([-1.0, 1.0], r.shape)
    v = vk.classify_values(Volume.from_array(r * (1 + 1j * s * ratio)), _no_background())
    assert v.imag_energy_fraction == pytest.approx(ratio ** 2 / (1 + ratio ** 2), rel=1e-6)
    assert v.domain == domain


def test_signed_real_values_are_a_confident_present_call() -> None:
    """A signed real image is present (a real image's FFT is Hermitian) with confidence > 0.9.

    Truth: a disc in zero-mean Gaussian noise stored as float32: half of the air is
    negative, and the FFT of any real image satisfies F(-k) = conj F(k) (Bracewell,
    *The Fourier Transform and Its Applications*, 2000; from memory), so the
    statistic lies decades above its threshold and the model probability is near 1.
    """
    rng = np.random.default_rng(14)
    y, x = np.mgrid[:64, :64]
    img = 10.0 * (((y - 32) ** 2 + (x - 32) ** 2) < 15 ** 2) + rng.standard_normal((2, 64, 64))
    t = trace_of("magnitude_only", Volume.from_array(img.astype(np.float32)))
    assert t.status == "present" and t.estimates["domain"] == "real_signed"
    assert t.confidence > 0.9


# ---------------------------------------------------------------- intensity quantisation

@pytest.mark.parametrize("levels,dtype,status", [(256, np.uint8, "present"),
                                                 (300, np.uint16, "absent")])
def test_eight_bits_of_grey_levels(levels: int, dtype: type, status: str) -> None:
    """All 256 values of 8 bits are squeezed; 300 levels are not.

    Truth: 4 x 64 x 64 samples drawn uniformly from ``levels`` consecutive integers
    (every level used, no pile-up at the ends). 8 bits hold 256 levels (common
    practice, no source); the stated rule (intensity_quantization.SQUEEZED_LEVELS)
    calls 256 or fewer in a set of at least 4096 samples.
    """
    rng = np.random.default_rng(15)
    arr = rng.integers(0, levels, (4, 64, 64)).astype(dtype)
    t = trace_of("intensity_quantization", Volume.from_array(arr))
    assert t.estimates["distinct_levels"] == levels
    assert t.status == status


@pytest.mark.parametrize("share,status", [(0.001, "absent"), (0.004, "present")])
def test_clipping_share(share: float, status: str) -> None:
    """0.4 % of the samples piled on the top value is clipping; 0.1 % is not.

    Truth: 65536 integers uniform over 0..19999 (about 3 per level), the stated share
    set to 20000 (a pile-up far above its neighbours either way). The stated rule
    (intensity_quantization.CLIP_FRACTION): 0.2 %.
    """
    rng = np.random.default_rng(16)
    flat = rng.integers(0, 20000, 4 * 128 * 128)
    flat[rng.choice(flat.size, int(round(share * flat.size)), replace=False)] = 20000
    t = trace_of("intensity_quantization",
                 Volume.from_array(flat.reshape(4, 128, 128).astype(np.uint16)))
    assert t.evidence["high_pile_up"] is True
    assert t.estimates["clipped_fraction"] == pytest.approx(share, rel=0.05)
    assert t.status == status


# --------------------------------------------------------------------- lossy compression

def _grid(n_measured: int, n_low: int, steps: np.ndarray) -> SimpleNamespace:
    """The fields of a block-grid estimate the JPEG decision and the trace read."""
    return SimpleNamespace(n_blocks=200, n_measured=n_measured, n_measured_low=n_low,
                           steps=steps, origin=(0, 0), signature_rows=[0.0] * 8,
                           signature_cols=[0.0] * 8, support=np.ones((8, 8), bool),
                           origin_scores=np.zeros((8, 8)))


@pytest.mark.parametrize("stored,disagree", [(55, False), (45, False), (56, True), (44, True)])
def test_stored_and_pixel_quality_disagreement(stored: int, disagree: bool) -> None:
    """Pixel quality 50 against a stored table at 55 or 45 agrees; at 56 or 44 it does not.

    Direct call of ``lossy_compression.combine`` with a pixel finding at IJG quality 50
    and a header whose stored table matches ``stored``: qualities more than the
    stated tolerance of 5 apart mean a second compression or a rescale (IJG quality
    scale of ITU-T T.81 Annex K; the tolerance is the analyser's own).
    """
    pix = jp.PixelFinding("present", "r", grid=_grid(20, 10, scaled_table(50).astype(float)),
                          quality=50, matched_quality=50, fit_error=0.01, bits=8)
    t = lossy_combine(pix, HeaderFinding(lossy=True, stored_quality=stored))
    assert t.status == "present"
    assert (t.evidence["disagreement"] is not None) is disagree


def _uint8_frames() -> np.ndarray:
    return np.random.default_rng(17).integers(0, 256, (2, 64, 64)).astype(np.uint8)


@pytest.mark.parametrize("n_measured,n_low,status", [(2, 2, "absent"), (3, 2, "present"),
                                                     (5, 1, "absent"), (6, 0, "present")])
def test_quantised_frequencies_needed_for_jpeg(monkeypatch: pytest.MonkeyPatch, n_measured: int,
                                               n_low: int, status: str) -> None:
    """JPEG from the pixels needs 3 quantised DCT frequencies with 2 low ones, or 6.

    Direct check of the decision: the block-grid estimate is replaced by counts on
    each side of the stated rule (jpeg_pixels.MIN_MEASURED, MIN_MEASURED_LOW,
    MIN_MEASURED_ANY, set from uncompressed interpolated images that showed up to two
    coincidental high frequencies); the wavelet check is told there is no deadzone.
    """
    monkeypatch.setattr(jp.jpeg_grid, "analyse_grid", lambda levels, **kw: _grid(
        n_measured, n_low, scaled_table(50).astype(float)))
    monkeypatch.setattr(jp.jpeg_grid, "wavelet_deadzone",
                        lambda x: SimpleNamespace(min_gap_ratio=None, bands=[]))
    assert jp.pixel_finding(_uint8_frames()).status == status


@pytest.mark.parametrize("error,named", [(0.08, True), (0.3, False)])
def test_ijg_quality_named_only_for_a_close_table(monkeypatch: pytest.MonkeyPatch,
                                                  error: float, named: bool) -> None:
    """A table 8 % from an Annex K scaling is named quality 50; one 30 % away is not.

    Truth: the ITU-T T.81 Annex K luminance table scaled to IJG quality 50, every
    entry moved by the stated relative error in a checkerboard of signs (its
    root-mean-square relative error is that error). The stated rule
    (jpeg_pixels.MAX_FIT_ERROR): a quality is named up to 0.15.
    """
    sign = np.where(np.add.outer(np.arange(8), np.arange(8)) % 2 == 0, 1.0, -1.0)
    steps = scaled_table(50).astype(float) * (1 + error * sign)
    monkeypatch.setattr(jp.jpeg_grid, "analyse_grid", lambda levels, **kw: _grid(20, 10, steps))
    pix = jp.pixel_finding(_uint8_frames())
    assert pix.status == "present"
    assert pix.fit_error == pytest.approx(error, abs=0.02)
    assert (pix.quality is not None) is named


# ---------------------------------------------------------------------------- resampling

def _ratio_map(peak: tuple[int, int], value: float, n: int = 64) -> np.ndarray:
    """A flat p-map spectrum ratio (1 everywhere) with one bin at ``value``, offsets from DC."""
    r = np.ones((n, n))
    r[n // 2 + peak[0], n // 2 + peak[1]] = value
    return r


@pytest.mark.parametrize("value,found", [(7.0, False), (9.0, True)])
def test_on_axis_peak_ratio(value: float, found: bool) -> None:
    """A peak on the frequency axis 9 times its median is interpolation; 7 times is not.

    Truth: one bin at 0.25 cycles/sample along the columns (a 4/3 scaling, Popescu
    and Farid, IEEE TSP 53:758-767, 2005) on a flat ratio map. The stated rule
    (resampling.PEAK_RATIO): 8 on the axes.
    """
    res = rs.find_peaks(_ratio_map((0, 16), value), 4)
    assert bool(res.peaks) is found
    if found:
        assert res.axis_freq["cols"] == pytest.approx(0.25)


@pytest.mark.parametrize("frames,value,found", [(4, 4.5, False), (4, 5.5, True),
                                                (6, 4.5, False), (6, 5.5, True),
                                                (1, 7.5, False), (1, 8.5, True)])
def test_off_axis_peak_ratio_falls_with_frames(frames: int, value: float, found: bool) -> None:
    """Off the axes a peak needs 5 times its median over four or six frames, 8 over one.

    Truth: one bin at (10, 16) bins from DC (a rotation's periodicity, Kirchner,
    MM&Sec 2008) on a flat ratio map. The stated rule (resampling.OFF_AXIS_RATIO):
    the off-axis threshold falls from 8 for one frame to 5 for four or more.
    """
    assert bool(rs.find_peaks(_ratio_map((10, 16), value), frames).peaks) is found


@pytest.mark.parametrize("p_true,status", [(1e-3, "inconclusive"), (1e-6, "present")])
def test_pmap_peak_confirmation_rate(p_true: float, status: str) -> None:
    """A p-map peak that the neighbour correlation confirms at p = 1e-6 counts; at 1e-3 not.

    Truth: the correlation spectrum's bins are exponential with mean 1
    (scipy.stats.expon, seeded), one bin under the p-map peak set to the value whose
    family-wise p-value over the 9 bins searched is ``p_true`` under that law
    (``1 - (1 - exp(-v))**9``). The stated rate (resampling.CONFIRM_ALPHA) is 1e-4;
    an unconfirmed p-map periodicity is inconclusive.
    """
    n = 64
    pm = rs.find_peaks(_ratio_map((0, 16), 20.0, n), 4)
    cr = rs.find_peaks(np.ones((n, n)), 4)
    cratio = stats.expon.rvs(size=(n, n), random_state=7)
    cratio[n // 2, n // 2 + 16] = -np.log1p(-(1 - p_true) ** (1 / 9))
    t = rs.trace_from_tests(pm, cr, cratio)
    assert t.status == status
    p_seen = t.evidence["tests"]["pmap_peak_correlation_p_value"]
    assert (p_seen <= 1e-4) is (status == "present")


# --------------------------------------------------------------------- k-space filtering

def _window_profile(power: float, ripple_db: float) -> np.ndarray:
    """16 equal lines of a power-law spectrum over a noise floor, rolled off by a Hann
    window raised to ``2 * power`` (1: a Hann apodization of k-space), with a ripple of
    period 16 samples and the given amplitude in dB (the object's ringing)."""
    n = 256
    k = np.abs(np.arange(n) - n // 2).astype(float)
    k[n // 2] = 0.5
    hann = 0.5 * (1 + np.cos(np.pi * np.clip(k / (n / 2), 0, 1)))
    prof = (10 * np.log10((1e4 * k ** -2.0 + 1.0) * np.maximum(hann, 1e-3) ** (2 * power))
            + ripple_db * np.sin(2 * np.pi * k / 16))
    return np.repeat(prof[:, None], 16, axis=1)


def _window_fit(power: float, ripple_db: float) -> tuple[kf.AxisFit, float, float]:
    f = kf.fit_axis(_window_profile(power, ripple_db), 128.0, axis="rows", scale_free=False)
    return f, f.rms_window_db / f.rms_plain_db, f.rms_plain_db - f.rms_window_db


@pytest.mark.parametrize("ripple_db,called", [(2.0, True), (4.0, False)])
def test_window_must_explain_most_of_the_residual(ripple_db: float, called: bool) -> None:
    """The same roll-off is a window under a 2 dB ripple and not under a 4 dB ripple.

    Truth: a power law over a floor (van der Schaaf and van Hateren, Vision Res.
    36:2759-2770, 1996) rolled off by the amplitude of a Hann window (Harris, Proc.
    IEEE 66:51-83, 1978). Both fits gain over the unfiltered model by more than 1.5 dB
    and the best window attenuates by more than 5 dB; only the residual ratio decides:
    the stated rule (kspace_filtering.RATIO) needs the window's residual below 0.6 of
    the unfiltered one (about 0.5 and 0.66 here).
    """
    f, ratio, gain = _window_fit(0.5, ripple_db)
    assert gain >= 1.5 and f.attenuation_db >= 5.0
    assert (ratio < 0.55) is called and (ratio > 0.62) is (not called)
    assert f.called is called


@pytest.mark.parametrize("power,ripple_db,called", [(0.5, 2.0, True), (0.3, 1.0, False)])
def test_window_must_gain_enough_over_the_unfiltered_model(power: float, ripple_db: float,
                                                          called: bool) -> None:
    """A window fit 2 dB better than the unfiltered model is a call; 1.1 dB better is not.

    Truth as above, with a weaker roll-off (the Hann amplitude to the power 0.6) for
    the second case. Both residual ratios are below 0.55 and both windows attenuate by
    more than 5 dB; the stated rule (kspace_filtering.MIN_GAIN_DB) needs a gain of
    1.3 dB rms.
    """
    f, ratio, gain = _window_fit(power, ripple_db)
    assert ratio < 0.55 and f.attenuation_db >= 5.0
    assert (gain >= 1.5) is called and (gain <= 1.2) is (not called)
    assert f.called is called


# ----------------------------------------------------------------------- partial Fourier

@pytest.mark.parametrize("r,found", [(0.85, False), (0.95, True)])
def test_conjugate_copy_correlation(r: float, found: bool) -> None:
    """Outer bands that correlate at 0.95 with their conjugate mirror are a copy; 0.85 not.

    Truth: 2 frames of 256 x 256 complex Gaussian k-space whose rows beyond 8 lines
    from DC on one side are ``conj K(-k) + a n`` with independent noise ``n``: the
    correlation is ``1 / sqrt(1 + a**2)`` (a = 0.33 for 0.95, 0.62 for 0.85). The
    stated rule (partial_fourier.CONJUGATE_R): 0.9 (Noll, Nishimura and Macovski,
    IEEE TMI 10:154-163, 1991: conjugate synthesis copies the opposite side).
    """
    rng = np.random.default_rng(18)
    n = 256
    k = rng.standard_normal((2, n, n)) + 1j * rng.standard_normal((2, n, n))
    mirror = pf._mirror(k, 0)
    a = np.sqrt(1 / r ** 2 - 1)
    rows = np.arange(n // 2 + 8, n)
    noise = rng.standard_normal((2, rows.size, n)) + 1j * rng.standard_normal((2, rows.size, n))
    k[:, rows] = np.conj(mirror[:, rows]) + a * noise
    out = pf._complex_filled_axis(SimpleNamespace(shape=(n, n)), k, 0, "rows")
    assert out.decision["value"] == pytest.approx(r, abs=0.01)
    assert out.found is found


@pytest.mark.parametrize("p,found", [(5e-4, True), (5e-3, False)])
def test_resynthesis_false_alarm_rate(monkeypatch: pytest.MonkeyPatch, p: float,
                                      found: bool) -> None:
    """A re-synthesised side is called at p = 5e-4 and not at 5e-3.

    Direct check of the decision: the re-synthesis test (pf_fill.resynthesis_test) is
    replaced by its result with a Bonferroni-corrected p-value (8 times the axis
    test's) on each side of the stated false-alarm rate 1e-3
    (partial_fourier.FALSE_ALARM_RATE).
    """
    res = pf.pf_fill.FillTest(True, ratio=0.1, p_value=p / 8, fraction=0.75, side="low",
                              fill="conjugate", n_tests=18, power=0.9, air_columns=20)
    monkeypatch.setattr(pf.pf_fill, "resynthesis_test", lambda k, i, *, alpha: res)
    plain = pf.AxisFraction("rows", 1.0, False, "none", None, None, 0.0)
    out = pf._resynthesis_axis(np.zeros((1, 32, 32), complex), 0, "rows", plain)
    assert out.found is found
    assert out.decision["p_value"] == pytest.approx(p)


# ---------------------------------------------------------------------- k-space synthesis

@pytest.mark.parametrize("statistic,p,status", [(2.0, 1e-6, "present"), (1.3, 1e-6, "absent"),
                                                (3.0, 2e-3, "absent")])
def test_fold_coupling_needs_strength_and_significance(monkeypatch: pytest.MonkeyPatch,
                                                       statistic: float, p: float,
                                                       status: str) -> None:
    """Noise coupled at 2 times independent noise (p = 1e-6) is unfolding; 1.3 is not,
    nor is 3 times at p = 2e-3.

    Direct check of the decision: the fold-coupling test (Pruessmann et al., MRM
    42:952-962, 1999: unfolding couples the noise of superimposed pixels) is replaced
    by its result on each side of the stated rules, coupling at least 1.5
    (kspace_synthesis.MIN_COUPLING) and p below 1e-3 (FALSE_ALARM).
    """
    res = ks.FoldCoupling("rows", 2, statistic, p, {"rows": [statistic] * 5, "cols": [1.0] * 5})
    monkeypatch.setattr(ks, "fold_coupling", lambda image, **kw: res)
    rng = np.random.default_rng(19)
    img = rng.standard_normal((128, 128)) + 1j * rng.standard_normal((128, 128))
    assert ks._single_image(img, False).status == status


# ------------------------------------------------------------------- header and pixels

@pytest.mark.parametrize("strength,side", [(0.6, "present"), (0.7, "present"),
                                           (0.6, "absent"), (0.7, "absent")])
def test_declaration_alone_needs_the_decision_posterior(strength: float, side: str) -> None:
    """A declaration of strength 0.7 decides on its own; one of 0.6 leaves it inconclusive.

    With an inconclusive pixel call (probability 1/2) the posterior is the
    declaration's own probability (Bayes' rule in log-odds from even prior odds;
    common practice, no source). The stated rule (declared.DECIDE): a side is called
    at a posterior of 0.65.
    """
    d = Declaration(side, strength, "a rule", "PS3.3 C.8.3.1")
    out = combine(d, Trace("resampling", "inconclusive", 0.0, "No call.", {}, {}))
    want = side if strength >= 0.65 else "inconclusive"
    assert out.status == want
    p_present = strength if side == "present" else 1 - strength
    assert out.evidence["p_present"] == pytest.approx(p_present, abs=1e-4)


@pytest.mark.parametrize("factor,declared", [(1.04, False), (1.25, True)])
def test_declared_zero_filling_factor(factor: float, declared: bool) -> None:
    """An AcquisitionMatrix shown on 1.25 times the pixels declares zero-filling; 1.04 not.

    Truth: a 256-line acquisition shown on 320 rows (1.25) and one shown on 266 rows
    (1.04: rounding of a rectangular field of view). DICOM PS3.3 C.8.3.1
    (AcquisitionMatrix against Rows and Columns); the stated rule (declared.py): more
    than 1.05.
    """
    out = declarations({"interpolation_factor": {"rows": factor, "cols": 1.0},
                        "acquired": [256, 0, 0, 256]})
    assert ("zero_filling" in out) is declared
    if declared:
        assert out["zero_filling"].estimates["rows"]["padding_factor"] == factor


# ----------------------------------------------------------------- calibration rule

@pytest.mark.parametrize("status,p_present,final", [("present", 0.45, "inconclusive"),
                                                    ("present", 0.55, "present"),
                                                    ("absent", 0.55, "inconclusive"),
                                                    ("absent", 0.45, "absent")])
def test_calibrated_call_below_one_half_is_not_made(monkeypatch: pytest.MonkeyPatch,
                                                    status: str, p_present: float,
                                                    final: str) -> None:
    """A call the calibration map says is right 45 % of the time is inconclusive; 55 % stands.

    A flat map (``p_present`` at every statistic value) for one trace and statistic;
    the report's rule (report.calibrated): a definite call whose calibrated
    probability of being right is below one half is not made (a call more often wrong
    than right on the development data).
    """
    stat = "a statistic"
    flat = calibration.CalibrationMap(stat, (0.0, 1.0), (p_present, p_present), 0.01, 100, 50)
    monkeypatch.setattr(calibration, "load_maps",
                        lambda: {calibration.map_key("zero_filling", stat): flat})
    t = Trace("zero_filling", status, 0.9, "Call.", {},
              {"decision": {"statistic": stat, "value": 0.5}})
    out = calibrated(t)
    right = p_present if status == "present" else 1 - p_present
    assert out.status == final
    assert out.confidence == pytest.approx(right if final != "inconclusive"
                                           else min(right, 1 - right))
    assert ("uncalibrated_call" in out.evidence) is (final == "inconclusive")
