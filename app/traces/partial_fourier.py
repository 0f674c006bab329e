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
from app.traces import spectrum as sp
from app.traces import support as zf
from app.traces.base import Trace, register

TRACE_ID = "partial_fourier"
#: complex data: fractions below this are called partial Fourier
ASYMMETRY_FRACTION = 0.95
#: complex data: samples this far (dB) below the strongest are exact zeros
EMPTY_DB = 60.0
#: magnitude data: the symmetric inner step must reach this (dB, line-pair score)
MAGNITUDE_STEP_DB = 7.0
#: magnitude data: the inner step is searched between these fractions of the half-support
SEARCH = (0.1, 0.85)
DEFAULT_ESTIMATES: dict[str, Any] = {"rows": {"fraction": None}, "cols": {"fraction": None}}


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


def detect(spec: sp.Spectrum, support: dict[str, zf.AxisSupport]) -> dict[str, AxisFraction]:
    """Acquired fraction per axis (``rows``, ``cols``) from a spectrum.

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
            out[ax] = _complex_axis(spec, i, ax, other)
        else:
            a = zf_axes[ax]
            n = spec.shape[i]
            half = a.x_pos if a.found and a.x_pos is not None else n / 2.0
            out[ax] = _magnitude_axis(spec, i, ax, other, half)
    return out


def trace_from(spec: sp.Spectrum, support: dict[str, zf.AxisSupport]) -> Trace:
    """Build the ``partial_fourier`` trace from a spectrum."""
    axes = detect(spec, support)
    estimates = {ax: {"fraction": round(a.fraction, 4)} for ax, a in axes.items()}
    evidence = {
        "profiles_db": sp.profile_db_evidence(spec),
        "asymmetry_db": {ax: sp.round_sig(a.asymmetry_db) if a.asymmetry_db is not None
                         and np.isfinite(a.asymmetry_db) else None for ax, a in axes.items()},
        "edges": {ax: list(a.edges) if a.edges else None for ax, a in axes.items()},
        "method": {ax: a.method for ax, a in axes.items()},
        "score_db": {ax: sp.round_sig(a.score_db) if np.isfinite(a.score_db) else None
                     for ax, a in axes.items()},
    }
    found = [a for a in axes.values() if a.found]
    if found:
        parts = ", ".join(f"{a.axis} {a.fraction:.3f}" for a in found)
        how = ("one side of k-space is missing" if found[0].method == "asymmetric_support"
               else "the magnitude spectrum steps down symmetrically inside its support")
        summary = f"Partial Fourier: {how}; acquired fraction {parts}."
        conf = 0.9 if found[0].method == "asymmetric_support" else 0.6
        return Trace(TRACE_ID, "present", conf, summary, estimates, evidence)
    complex_like = spec.complex_input or spec.domain == "kspace"
    if complex_like:
        summary = "k-space is symmetric about its centre on every axis: no partial Fourier."
        return Trace(TRACE_ID, "absent", 0.8, summary, estimates, evidence)
    # a magnitude image's power spectrum is symmetric; the weak step partial Fourier
    # leaves in it is often below what raw images show (bench/accuracy_spectral.py)
    summary = ("No strong partial-Fourier step in the magnitude spectrum; partial Fourier "
               "(zero-filled or conjugate-synthesised) cannot be ruled out from a "
               "magnitude image.")
    return Trace(TRACE_ID, "inconclusive", 0.0, summary, estimates, evidence)


@register(TRACE_ID, version="1", order=60, default_estimates=DEFAULT_ESTIMATES)
def analyse(volume: Volume, *, spectrum: sp.Spectrum,
            support: dict[str, zf.AxisSupport]) -> Trace:
    """Measure partial Fourier sampling (see module docstring).

    References
    ----------
    .. [1] Noll, Nishimura and Macovski, IEEE Trans. Med. Imaging 10:154-163, 1991.
    .. [2] McGibney et al., Magn. Reson. Med. 30:51-59, 1993.
    """
    return trace_from(spectrum, support)
