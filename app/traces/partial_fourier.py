"""Partial Fourier: one side of k-space missing (zero-filled) or synthesised, per axis.

Partial Fourier acquisitions sample one side of k-space fully and the other only
up to a small distance ``k_c`` past the centre; the acquired fraction is
``f = 1/2 + k_c / n`` (typical values 5/8, 6/8, 7/8: common practice, no source).

What the pixels show:

* Complex images and k-space (phase kept): the missing side holds exact zeros
  (more than ``EMPTY_DB`` below the strongest line), so the support of the power
  spectrum is asymmetric about DC. Each side's extent is found on its own, and the
  fraction is the acquired extent over twice the longer side. A mere step in level
  is not taken as a missing side: the spectrum of a complex image need not be
  symmetric about DC.
* Magnitude images (real): a real image's power spectrum is symmetric, so the
  missing side cannot show as asymmetry. But ``|x| ~ Re(x e^{-i phi})`` doubles the
  spectrum into ``(F(k) + F*(-k)) / 2``: inside ``|k| < k_c`` both terms add, beyond
  only one remains, so the level falls by 6 dB for the object (3 dB for noise) at
  ``+/- k_c``. This symmetric step inside the support is searched for with the
  same line-pair step score as zero-filling edges, and must show in both halves of
  the band of the other axis (a straight edge, not a ring). The step is weak
  (below what raw images show in most cases, measured by
  bench/accuracy_spectral.py), so only a strong one (``MAGNITUDE_STEP_DB``) is
  called, and a magnitude image without one is *inconclusive*, not absent.
  Conjugate synthesis (homodyne, POCS) of magnitude output fills the missing side
  and leaves no trace that a power spectrum can see; it is not claimed.

References
----------
.. [1] Noll, D. C., Nishimura, D. G. and Macovski, A. "Homodyne detection in
   magnetic resonance imaging", IEEE Trans. Med. Imaging 10(2):154-163, 1991.
.. [2] Haacke, E. M., Lindskog, E. D. and Lin, W. "A fast, iterative,
   partial-Fourier technique capable of local phase recovery", J. Magn. Reson.
   94:307-311, 1991 (POCS).
.. [3] McGibney, G. et al. "Quantitative evaluation of several partial Fourier
   reconstruction algorithms used in MRI", Magn. Reson. Med. 30:51-59, 1993.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from app.io.volume import Volume
from app.traces import pf_fill
from app.traces import spectrum as sp
from app.traces import support as zf
from app.traces.base import Trace, register
from app.traces.rounding import round_record

TRACE_ID = "partial_fourier"
#: complex data: fractions below this are called partial Fourier
ASYMMETRY_FRACTION = 0.95
#: complex data: samples this far (dB) below the strongest are exact zeros
EMPTY_DB = 60.0
#: magnitude data: the symmetric inner step must reach this (dB, line-pair score)
MAGNITUDE_STEP_DB = 7.0
#: magnitude data: the inner step is searched between these fractions of the half-support
SEARCH = (0.1, 0.85)
DEFAULT_ESTIMATES: dict[str, Any] = {"rows": {"fraction": None}, "cols": {"fraction": None},
                                     "fill": None}


@dataclass
class AxisFraction:
    """What one axis shows.

    Attributes
    ----------
    axis : str
    fraction : float
        Acquired fraction (1.0 when nothing is missing).
    found : bool
    method : str
        ``"asymmetric_support"``, ``"magnitude_step"`` or ``"none"``.
    edges : tuple of int or None
        First and last index (centred order) of the acquired region (complex) or of
        the fully (two-sided) sampled centre (magnitude).
    asymmetry_db : float or None
        Complex: mean level of the positive minus the negative side between the
        shorter and the longer extent, in dB. Magnitude: the inner step, in dB.
    score_db : float
    """

    axis: str
    fraction: float
    found: bool
    method: str
    edges: tuple[int, int] | None
    asymmetry_db: float | None
    score_db: float
    fill: str | None = None
    decision: dict | None = None
    fill_test: pf_fill.FillTest | None = None


def _empty_extent(side_db: np.ndarray) -> float | None:
    """Distance from DC where a side of exact (rounding-level) zeros starts, or None.

    Complex data keep exact zeros where k-space was not acquired; they sit more than
    ``EMPTY_DB`` below the strongest sample of the side.
    """
    empty = side_db < side_db.max() - EMPTY_DB
    if not empty.any():
        return None
    first = int(np.argmax(empty))
    return first - 0.5 if first > 0 else None


def _complex_axis(spec: sp.Spectrum, i: int, ax: str, other: float) -> AxisFraction:
    lines = zf.band_lines(spec.mean_log, i, other)
    n = lines.shape[0]
    c = n // 2
    support = zf.axis_support(lines, spec.profiles[ax], axis=ax, symmetric=False)
    prof_band = np.median(lines, axis=1)
    e_pos = _empty_extent(prof_band[c:])
    e_neg = _empty_extent(prof_band[c::-1])
    # only exact zeros mark a missing side: a step in the level is not enough, since
    # the spectrum of a complex image need not be symmetric about DC
    x_pos = e_pos if e_pos is not None else n - c - 0.5
    x_neg = e_neg if e_neg is not None else c + 0.5
    longer = max(x_pos, x_neg)
    frac = float(min(1.0, (x_pos + x_neg) / (2.0 * longer)))
    # level of the positive minus the negative side where only one side can be acquired
    pos_side, neg_side = prof_band[c:], prof_band[c::-1]
    k0 = int(np.ceil(min(x_pos, x_neg)))
    k1 = int(min(np.floor(max(x_pos, x_neg)), len(pos_side) - 1, len(neg_side) - 1))
    asym = float(np.mean(pos_side[k0:k1 + 1] - neg_side[k0:k1 + 1])) if k1 >= k0 else None
    lo, hi = c - int(np.floor(x_neg)), c + int(np.floor(x_pos))
    found = frac < ASYMMETRY_FRACTION
    return AxisFraction(ax, frac if found else 1.0, found,
                        "asymmetric_support" if found else "none",
                        (max(0, lo), min(n - 1, hi)), asym, support.score_db)


def _magnitude_axis(spec: sp.Spectrum, i: int, ax: str, other: float,
                    half_support: float) -> AxisFraction:
    lines = zf.band_lines(spec.mean_log, i, other)
    n = lines.shape[0]
    c = n // 2
    pos = lines[c:]
    v = int(np.clip(round(half_support / 10), 3, 6))
    prof = np.median(pos, axis=1)
    score = sp.step_scores(prof, v, gap=1)
    if pos.shape[1] >= 8:
        order = np.argsort(np.abs(np.arange(pos.shape[1]) - (pos.shape[1] - 1) / 2))
        halves = [np.median(pos[:, h], axis=1) for h in
                  (order[: len(order) // 2], order[len(order) // 2:])]
        hs = [sp.step_scores(h, v, gap=1) for h in halves]
        near = [np.fmax(np.fmax(h, np.roll(h, 1)), np.roll(h, -1)) for h in hs]
        score = np.minimum(score, 2.0 * np.minimum(near[0], near[1]))
    lo, hi = int(SEARCH[0] * half_support), int(SEARCH[1] * half_support)
    seg = score[lo:hi]
    if hi <= lo or not np.any(np.isfinite(seg)):
        return AxisFraction(ax, 1.0, False, "none", None, None, float("-inf"))
    d = lo + int(np.nanargmax(seg))
    best = float(score[d])
    if best < MAGNITUDE_STEP_DB:
        return AxisFraction(ax, 1.0, False, "none", None, best, best)
    k_c = d + 0.5  # the skipped sample d + 1 holds the transition
    frac = float(0.5 + 0.5 * min(1.0, k_c / half_support))
    return AxisFraction(ax, frac, True, "magnitude_step", (c - d, c + d), best, best)


#: at most this many frames go into the conjugate-symmetry test
SYMMETRY_FRAMES = 8
#: false-alarm rate per dataset of the complex-data tests (split over axes and tests)
FALSE_ALARM_RATE = 1e-3
#: a correlation of mirrored outer bands at least this high is a conjugate copy
CONJUGATE_R = 0.9
#: the mirrored-band F-test allows raw outer bands to differ by this factor in power
#: (object asymmetry, receiver roll-off)
LEVEL_NULL_RATIO = 2.0
#: raw complex data: outer-band conjugate correlation seen up to about 0.45 on the
#: in-sample generator; the null hypothesis allows up to this
RAW_R = 0.6
#: the conjugate test reads the lines beyond this share of the axis from DC
OUTER_START = 0.42


def _kspace_frames(volume: Volume, spec: sp.Spectrum, frames: Any) -> np.ndarray:
    """Centred complex k-space of a few frames, ``(frames * coils, rows, cols)``."""
    from app.traces.context import evenly_spaced

    idx = evenly_spaced(np.asarray(frames), SYMMETRY_FRAMES)
    out = []
    for _, block in volume.iter_slices(8, indices=idx):
        b = np.nan_to_num(np.asarray(block)).astype(np.complex128)
        b = b.reshape(-1, *b.shape[-2:])
        if volume.domain == "kspace":
            k = np.fft.fftshift(b, axes=(-2, -1)) if spec.kspace_shifted else b
        else:
            k = np.fft.fftshift(np.fft.fft2(b), axes=(-2, -1))
        out.append(k)
    return np.concatenate(out)


def _mirror(k: np.ndarray, axis: int) -> np.ndarray:
    """``K(-k)``: both in-plane axes reflected through DC at ``n // 2`` (centred order)."""
    r = k
    for ax in (-2, -1):
        n = k.shape[ax]
        idx = (2 * (n // 2) - np.arange(n)) % n
        r = np.take(r, idx, axis=ax)
    return r


def conjugate_symmetry(k: np.ndarray, axis: int) -> dict[str, Any]:
    """Correlation of ``K(k)`` with ``conj K(-k)`` per distance from DC along ``axis``.

    ``r(d) = |sum K(k) K(-k)| / sqrt(sum |K(k)|^2 sum |K(-k)|^2)`` over the lines at
    ``+d`` (all frames, coils and bins of the other axis). Independent complex
    Gaussian noise gives ``M r^2`` about exponential with mean 1 (``M`` the bins
    summed); a conjugate-synthesised side gives ``r`` near 1.

    References
    ----------
    .. [1] Noll, Nishimura and Macovski, IEEE Trans. Med. Imaging 10:154-163, 1991.
    .. [2] McGibney et al., Magn. Reson. Med. 30:51-59, 1993.
    """
    km = _mirror(k, axis)
    a = np.moveaxis(k, -2 + axis, 0)
    b = np.moveaxis(km, -2 + axis, 0)
    n = a.shape[0]
    c = n // 2
    prod = (a * b).reshape(n, -1).sum(axis=1)
    pa = (np.abs(a) ** 2).reshape(n, -1).sum(axis=1)
    pb = (np.abs(b) ** 2).reshape(n, -1).sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        r = np.abs(prod) / np.sqrt(pa * pb)
    r = np.nan_to_num(r)
    d = np.arange(1, n - c)
    return {"r": r[c + d], "bins": int(a[0].size), "d": d}


def _complex_filled_axis(spec: sp.Spectrum, k: np.ndarray, i: int, ax: str) -> AxisFraction:
    """A partial-Fourier side filled by synthesis: conjugate copy or an iterative fill."""
    from scipy import stats

    n = spec.shape[i]
    sym = conjugate_symmetry(k, i)
    r, m, d = sym["r"], sym["bins"], sym["d"]
    alpha = FALSE_ALARM_RATE / 8.0
    # the outer sixth of each side: noise-dominated in raw data, synthesised for every
    # fraction up to 7/8
    outer = d >= OUTER_START * n
    if not outer.any():
        return AxisFraction(ax, 1.0, False, "none", None, None, 0.0)
    # Fisher's z of the correlation, one unit per line pair (lines of one object are
    # not independent, so this is conservative), tested against the highest
    # correlation an object's own near-Hermitian spectrum gives raw data
    lines = int(outer.sum())
    r_out = float(np.sqrt(np.mean(r[outer] ** 2)))
    z = np.arctanh(min(r_out, 0.999999))
    p_corr = float(stats.norm.sf((z - np.arctanh(RAW_R)) * np.sqrt(lines)))
    del m
    found = r_out >= CONJUGATE_R and p_corr <= alpha
    rec = {"statistic": "conjugate-symmetry correlation of the outer bands", "value": r_out,
           "threshold": CONJUGATE_R, "false_alarm_rate": FALSE_ALARM_RATE,
           "p_value": min(1.0, 8.0 * p_corr)}
    if not found:
        return AxisFraction(ax, 1.0, False, "none", None, r_out, r_out, decision=rec)
    # the synthesised region starts where the correlation stays high outwards
    high = r >= 0.5 * (1.0 + CONJUGATE_R) - 0.2
    start = len(high)
    for j in range(len(high) - 1, -1, -1):
        if not high[j]:
            break
        start = j
    kc = float(d[start]) - 0.5 if start < len(d) else n / 2.0
    frac = float(min(1.0, 0.5 + kc / n))
    return AxisFraction(ax, frac, True, "conjugate_symmetry", None, r_out, r_out,
                        fill="conjugate", decision=rec)


def _resynthesis_axis(k: np.ndarray, i: int, ax: str, plain: AxisFraction) -> AxisFraction:
    """A side computed by a phase-constrained fill (see :mod:`app.traces.pf_fill`).

    The plain conjugate test above only sees an un-phase-corrected copy; this one
    re-runs phase-corrected conjugate synthesis and POCS from the rows each hypothesis
    calls acquired and compares, in the air, with the delivered rows in units of the
    measured thermal noise.

    References
    ----------
    .. [1] Margosian, Schmitt and Purdy, Health Care Instrum. 1:195-197, 1986.
    .. [2] Haacke, Lindskog and Lin, J. Magn. Reson. 94:307-311, 1991.
    """
    alpha = FALSE_ALARM_RATE / 8.0
    t = pf_fill.resynthesis_test(k, i, alpha=alpha)
    if not t.ran:
        plain.fill_test = t
        return plain
    p = min(1.0, 8.0 * t.p_value)
    rec = {"statistic": "re-synthesis residual of the missing side (-log10 p)",
           "value": float(min(300.0, -np.log10(max(p, 1e-300)))),
           "threshold": float(-np.log10(FALSE_ALARM_RATE)),
           "false_alarm_rate": FALSE_ALARM_RATE, "p_value": p,
           "residual_over_noise": t.ratio, "power": t.power}
    found = p <= FALSE_ALARM_RATE
    if not found:
        return AxisFraction(ax, 1.0, False, "none", None, plain.asymmetry_db, plain.score_db,
                            decision=rec, fill_test=t)
    return AxisFraction(ax, float(t.fraction), True, "resynthesis", None, plain.asymmetry_db,
                        t.ratio, fill=t.fill, decision=rec, fill_test=t)


def _zeros_decision(spec: sp.Spectrum, a: AxisFraction, i: int) -> dict[str, Any]:
    """F-test of the mirrored outer bands' noise levels (acquired over missing side)."""
    from scipy import stats

    if a.asymmetry_db is None or not np.isfinite(a.asymmetry_db):
        return {"statistic": "mirrored outer band level ratio (dB)", "value": 0.0,
                "threshold": float("nan"), "false_alarm_rate": FALSE_ALARM_RATE,
                "p_value": 1.0}
    m = max(1, spec.n_frames * spec.shape[1 - i])
    ratio_db = abs(float(a.asymmetry_db))
    f = 10 ** (ratio_db / 10.0) / LEVEL_NULL_RATIO
    p = float(stats.f.sf(f, 2 * m, 2 * m))
    thr = 10 * np.log10(LEVEL_NULL_RATIO * stats.f.isf(FALSE_ALARM_RATE / 8, 2 * m, 2 * m))
    return {"statistic": "mirrored outer band level ratio (dB)", "value": ratio_db,
            "threshold": float(thr), "false_alarm_rate": FALSE_ALARM_RATE,
            "p_value": min(1.0, 8.0 * p)}


def detect(spec: sp.Spectrum, support: dict[str, zf.AxisSupport],
           kspace: np.ndarray | None = None) -> dict[str, AxisFraction]:
    """Acquired fraction per axis (``rows``, ``cols``) from a spectrum.

    ``kspace`` (centred complex k-space of a few frames, complex data only) enables
    the conjugate-symmetry test of a synthesised side.

    References
    ----------
    .. [1] Noll, Nishimura and Macovski, IEEE Trans. Med. Imaging 10:154-163, 1991.
    """
    zf_axes = support
    complex_like = spec.complex_input or spec.domain == "kspace"
    out = {}
    for i, ax in enumerate(("rows", "cols")):
        other = zf_axes["cols" if ax == "rows" else "rows"].support_fraction
        if complex_like:
            a = _complex_axis(spec, i, ax, other)
            a.decision = _zeros_decision(spec, a, i)
            if a.found:
                a.fill = "zeros"
            elif kspace is not None:
                a = _complex_filled_axis(spec, kspace, i, ax)
                if not a.found:
                    a = _resynthesis_axis(kspace, i, ax, a)
            out[ax] = a
        else:
            a = zf_axes[ax]
            n = spec.shape[i]
            half = a.x_pos if a.found and a.x_pos is not None else n / 2.0
            out[ax] = _magnitude_axis(spec, i, ax, other, half)
            out[ax].decision = _magnitude_decision(out[ax], spec, i)
    return out


def _magnitude_decision(a: AxisFraction, spec: sp.Spectrum, i: int) -> dict[str, Any]:
    """F-test record of the magnitude inner step (drop over a 3 dB smooth-decay null)."""
    from scipy import stats

    score = float(a.score_db) if np.isfinite(a.score_db) else 0.0
    m = max(1, spec.n_frames * max(1, spec.shape[1 - i] // 10) * 3)
    p = float(stats.f.sf(10 ** ((score - 3.0) / 10.0), 2 * m, 2 * m)) if a.found else 1.0
    return {"statistic": "symmetric inner step of the magnitude spectrum (dB)",
            "value": score, "threshold": MAGNITUDE_STEP_DB, "false_alarm_rate": None,
            "p_value": p}


def _fill_test_evidence(t: pf_fill.FillTest | None) -> dict | None:
    if t is None:
        return None
    if not t.ran:
        return {"ran": False}
    return {"ran": True, "residual_over_noise": sp.round_sig(t.ratio),
            "fraction": round(float(t.fraction), 4), "side": t.side, "fill": t.fill,
            "air_columns": t.air_columns, "hypotheses": t.n_tests,
            "power": sp.round_sig(t.power)}


def trace_from(spec: sp.Spectrum, support: dict[str, zf.AxisSupport],
               kspace: np.ndarray | None = None) -> Trace:
    """Build the ``partial_fourier`` trace from a spectrum."""
    axes = detect(spec, support, kspace)
    estimates: dict[str, Any] = {ax: {"fraction": round(a.fraction, 4)}
                                 for ax, a in axes.items()}
    found = [a for a in axes.values() if a.found]
    decisions = [a.decision for a in (found or list(axes.values())) if a.decision]
    decision = min(decisions, key=lambda d: d["p_value"]) if decisions else None
    fill = found[0].fill if found else None
    estimates["fill"] = fill
    evidence = {
        "profiles_db": sp.profile_db_evidence(spec),
        "asymmetry_db": {ax: sp.round_sig(a.asymmetry_db) if a.asymmetry_db is not None
                         and np.isfinite(a.asymmetry_db) else None for ax, a in axes.items()},
        "edges": {ax: list(a.edges) if a.edges else None for ax, a in axes.items()},
        "method": {ax: a.method for ax, a in axes.items()},
        "score_db": {ax: sp.round_sig(a.score_db) if np.isfinite(a.score_db) else None
                     for ax, a in axes.items()},
        "decisions": {ax: round_record(a.decision) for ax, a in axes.items()},
        "decision": round_record(decision),
        "resynthesis": {ax: _fill_test_evidence(a.fill_test) for ax, a in axes.items()},
    }
    p = float(decision["p_value"]) if decision else 1.0
    complex_like = spec.complex_input or spec.domain == "kspace"
    if found:
        parts = ", ".join(f"{a.axis} {a.fraction:.3f}" for a in found)
        how = {"asymmetric_support": "one side of k-space is missing (zeros)",
               "conjugate_symmetry": "one side of k-space is a conjugate copy of the other",
               "resynthesis": "one side of k-space agrees with a phase-constrained fill of "
                              "the other far better than thermal noise allows",
               "magnitude_step": "the magnitude spectrum steps down symmetrically inside its "
                                 "support"}[found[0].method]
        summary = f"Partial Fourier: {how}; acquired fraction {parts}."
        origin = "acquisition" if fill == "zeros" else "processing"
        if fill == "zeros":
            summary += (" Zeros in place of the missing side are what a scanner delivers "
                        "from a partial-Fourier acquisition.")
        return Trace(TRACE_ID, "present", 1.0 - p, summary, estimates, evidence,
                     origin=origin)
    if complex_like:
        # absent: no test found its trace. The call is as good as the re-synthesis test's
        # power against a fill (pf_fill.POWER_RATIO) on the weaker axis; an axis where it
        # could not run (no air) leaves a fill there unseen, so the call is inconclusive.
        tests = {ax: a.fill_test for ax, a in axes.items()}
        blind = [ax for ax, t in tests.items() if t is None or not t.ran]
        if blind:
            summary = ("No side of k-space is missing, and the outer bands are no plain "
                       "conjugate copy; but a phase-corrected conjugate or iterative fill "
                       f"could not be tested along {' and '.join(blind)}: the image holds "
                       "no air columns in which computed rows could be told from measured "
                       "noise.")
            return Trace(TRACE_ID, "inconclusive", 0.0, summary, estimates, evidence)
        power = min(t.power for t in tests.values() if t is not None)
        summary = ("k-space is symmetric about its centre on every axis, its outer bands hold "
                   "independent noise, and no side agrees with a phase-constrained fill of "
                   "the other beyond what thermal noise allows: no partial Fourier.")
        return Trace(TRACE_ID, "absent", float(power), summary, estimates, evidence)
    # a magnitude image's power spectrum is symmetric; the weak step partial Fourier
    # leaves in it is often below what raw images show (bench/accuracy_spectral.py)
    summary = ("Magnitude image: its power spectrum is symmetric about DC, so a missing "
               "k-space side cannot show as asymmetry and a conjugate or iterative fill "
               "leaves nothing a power spectrum can see; only a strong symmetric step at "
               "the partial-Fourier boundary could show it, and none was found. Partial "
               "Fourier cannot be ruled out.")
    tr = Trace(TRACE_ID, "inconclusive", 0.0, summary, estimates, evidence)
    return tr


@register(TRACE_ID, version="2", order=60, default_estimates=DEFAULT_ESTIMATES)
def analyse(volume: Volume, *, scope: Any, spectrum: sp.Spectrum,
            support: dict[str, zf.AxisSupport]) -> Trace:
    """Measure partial Fourier sampling (see module docstring).

    References
    ----------
    .. [1] Noll, Nishimura and Macovski, IEEE Trans. Med. Imaging 10:154-163, 1991.
    .. [2] McGibney et al., Magn. Reson. Med. 30:51-59, 1993.
    """
    kspace = None
    if spectrum.complex_input or spectrum.domain == "kspace":
        kspace = _kspace_frames(volume, spectrum, scope.frames)
    return trace_from(spectrum, support, kspace)
