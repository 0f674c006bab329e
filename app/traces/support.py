"""The acquired region of k-space per axis (a shared step).

Interpolation by zero-filling pads the acquired k-space with zeros before the
inverse FFT. A complex image keeps exact zeros outside the acquired region; a
magnitude or root-sum-of-squares image does not, because the magnitude step is
nonlinear and spreads a low, structured echo (up to twice the acquired width)
outside it. Either way the mean log-power of the spectrum falls in a sharp step
at the edge of the acquired region and stays below the in-band level beyond it.

Method: the frame-averaged log-power map (one FFT pass, :mod:`app.traces.spectrum`)
is read line by line along the axis, over a band of the other axis's frequencies
inside its acquired region that avoids its DC line (where the object's straight
edges put ripples), and the lines are combined by their median. Each outward side
of that profile is scored for a sustained level drop: the median level after a
candidate edge against the median before it, less the decay that a line fitted
before it predicts (a smooth decay scores low, a ripple that recovers scores
low). An edge must also show in the inner and the outer half of the band at the
same place (the edge of zero-filled k-space is a straight line in the map, a ring
of the object's spectrum is not) and, when its drop is below 9 dB (what smooth
roll-offs of the object reach), at the same distance within 2 samples or 4 % in
both halves (a ring sits closer to DC in the outer half). It is placed where the
profile has fallen
30 % of the drop, with sub-sample interpolation. The support fraction is the width
between the two edges over the axis size, the padding factor its inverse. A second
edge at twice the distance (the end of the magnitude echo) is recognised as such.
Magnitude images broaden the visible support by the bandwidth of the object's
phase (about a sample per side); complex data give it to the sample.

References
----------
.. [1] Bernstein, M. A., Fain, S. B. and Riederer, S. J. "Effect of windowing and
   zero-filled reconstruction of MRI data on spatial resolution and acquisition
   strategy", J. Magn. Reson. Imaging 14(3):270-280, 2001.
.. [2] Canny, J. "A computational approach to edge detection", IEEE Trans. PAMI
   8(6):679-698, 1986 (step detection against a local model).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from app.traces import noise_reference as noise_reference_mod
from app.traces import spectrum as sp

#: a step of at least this many dB (median over the band) marks an edge
STEP_THRESHOLD_DB = 4.5
#: band of the other axis assumed before it is measured (fraction of its size)
DEFAULT_BAND_SUPPORT = 0.4
#: an edge at half the distance of the best one is the true edge (the best one the end
#: of the magnitude echo) when its score reaches this fraction of the best score
HALF_RULE_RATIO = 0.6
#: the edge may sit this many samples apart in the two halves of the band (at most)
HALVES_TOLERANCE = 2.0
HALVES_RELATIVE = 0.04
#: drops at least this large skip that check (no smooth roll-off seen reaches it)
RING_CHECK_BELOW_DB = 9.0
#: the edge is where the profile has fallen this fraction of the drop
CROSSING_LEVEL = 0.3
#: support fractions below this are not searched (padding above 5x)
MIN_SUPPORT = 0.2
#: an axis counts as zero-filled when its acquired region is below this share
FOUND_SUPPORT = 0.985


@dataclass
class AxisSupport:
    """The acquired region found along one axis.

    Attributes
    ----------
    axis : str
    size : int
        Samples along the axis.
    found : bool
        Whether a step edge was found.
    support_fraction : float
        Width of the acquired region over ``size`` (1.0 when none was found).
    edges : tuple of int or None
        First and last index (centred order) inside the region.
    drop_db : float or None
        Level drop across the edge.
    score_db : float
        Strongest step score (dB) on this axis.
    noise_floor_db : float or None
        Level (mean power, dB) of the outer part of the region.
    asymmetry : float
        For complex input: positive-side minus negative-side extent, in samples.
    x_pos, x_neg : float or None
        Distance from DC of the edge on the positive / negative side (None: no edge
        on that side), each side judged on its own.
    """

    axis: str
    size: int
    found: bool
    support_fraction: float
    edges: tuple[int, int] | None
    drop_db: float | None
    score_db: float
    noise_floor_db: float | None
    asymmetry: float = 0.0
    x_pos: float | None = None
    x_neg: float | None = None
    decision: dict | None = None
    method: str = "step"
    noise_fit: Any = None

    @property
    def padding_factor(self) -> float:
        return 1.0 / self.support_fraction


def line_window(n: int) -> int:
    """Samples per fitted line: 4 to 8, fewer on short axes so that the windows fit."""
    w = int(np.clip(round(n / 40), 4, 8))
    return int(max(2, min(w, (n // 2 - 2) // 6)))


def band_lines(mean_log: np.ndarray, axis: int, other_support: float = 0.4) -> np.ndarray:
    """Lines along ``axis`` over a band of the other axis that avoids its DC line.

    The band spans ``|k| / m`` from ``other_support / 16`` to ``0.4 * other_support``,
    inside the other axis's acquired region (assumed 0.4 until it is measured). Lines
    that are empty (more than 40 dB below the strongest line of the band: the missing
    side of partial-Fourier complex data) are left out.
    """
    a = mean_log if axis == 0 else mean_log.T
    m = a.shape[1]
    cm = m // 2
    lo = max(1, int(round(m * other_support / 16)))
    hi = max(lo + 1, int(round(m * other_support * 0.4)))
    cols = np.r_[cm - hi:cm - lo + 1, cm + lo:min(m, cm + hi + 1)]
    cols = cols[(cols >= 0) & (cols < m)]
    level = np.median(a[:, cols], axis=0)
    keep = cols[level >= level.max() - 40.0]
    return a[:, keep]


def edge_scores(prof: np.ndarray, w: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Sustained, trend-corrected level drop after each sample of an outward side.

    ``drop[d]`` is the median level of the ``v = 2 w`` samples ending at ``d`` minus
    that of the ``v`` samples starting at ``d + 2``: a zero-filled edge keeps the level
    low beyond it, while a ripple of the object's spectrum recovers within a few
    samples. The decay that a line fitted to the ``2 v`` samples before ``d`` predicts
    over the same distance is subtracted, so that a steep natural decay scores low.

    Returns ``(score, inside, outside)``, NaN where the windows do not fit.
    """
    n = len(prof)
    v = 2 * w
    score = np.full(n, np.nan)
    inside = np.full(n, np.nan)
    outside = np.full(n, np.nan)
    if n < 3 * v + 2:
        return score, inside, outside
    med = np.median(np.lib.stride_tricks.sliding_window_view(prof, v), axis=1)
    fit = np.lib.stride_tricks.sliding_window_view(prof, 2 * v)
    xc = np.arange(2 * v) - (2 * v - 1) / 2.0
    slope = fit @ xc / float((xc**2).sum())  # slope[k] over [k, k + 2v - 1]
    d = np.arange(2 * v - 1, n - v - 1)
    inside[d] = med[d - v + 1]
    outside[d] = med[d + 2]
    trend = np.maximum(0.0, -slope[d - 2 * v + 1] * (v + 1.5))
    score[d] = inside[d] - outside[d] - trend
    return score, inside, outside


def crossing(prof: np.ndarray, d: int, w: int, mid: float) -> float:
    """Sub-sample distance from DC where the profile first falls below ``mid`` near ``d``.

    The profile is smoothed by a 3-sample median first; the crossing is interpolated
    linearly between the last sample above and the first below.
    """
    n = len(prof)
    v = 2 * w
    sm = prof.copy()
    sm[1:-1] = np.median(np.stack([prof[:-2], prof[1:-1], prof[2:]]), axis=0)
    lo, hi = max(1, d - v), min(n - 1, d + v)
    below = np.nonzero(sm[lo:hi + 1] < mid)[0]
    if len(below) == 0:
        return d + 0.5
    k = lo + int(below[0])
    a, b = sm[k - 1], sm[k]
    frac = (a - mid) / (a - b) if a > b else 0.5
    return k - 1 + float(np.clip(frac, 0.0, 1.0))


def _side_scores(
    prof: np.ndarray, n: int, w: int, halves: tuple[np.ndarray, np.ndarray] | None
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Edge scores of one outward side (NaN where not searched), inside and outside levels.

    With ``halves`` (the profiles of the inner and outer halves of the band), an edge
    must show in both at the same place: the edge of zero-filled k-space is a straight
    line across the band, a ring of the object's spectrum is not.
    """
    dmin = max(w, int(np.ceil(MIN_SUPPORT * n / 2)))
    score, inside, outside = edge_scores(prof, w)
    if halves is not None:
        near = [np.fmax(np.fmax(h, np.roll(h, 1)), np.roll(h, -1))
                for h in (edge_scores(hp, w)[0] for hp in halves)]
        score = np.minimum(score, 2.0 * np.minimum(near[0], near[1]))
    score[:dmin] = np.nan
    return score, inside, outside


def _side_edge(
    prof: np.ndarray, n: int, w: int, halves: tuple[np.ndarray, np.ndarray] | None = None
) -> tuple[float | None, float, float | None]:
    """Best edge on one outward side: (crossing distance or None, best score, drop)."""
    score, inside, outside = _side_scores(prof, n, w, halves)
    if not np.any(np.isfinite(score)):
        return None, float("-inf"), None
    d = int(np.nanargmax(score))
    best = float(score[d])
    if best < STEP_THRESHOLD_DB:
        return None, best, None
    # the magnitude echo ends at twice the acquired extent: prefer the inner edge
    half = (d + 1) // 2
    lo, hi = max(0, half - 3), min(len(score), half + 3)
    if hi > lo and np.any(np.isfinite(score[lo:hi])):
        j = lo + int(np.nanargmax(score[lo:hi]))
        if score[j] >= max(STEP_THRESHOLD_DB, HALF_RULE_RATIO * best):
            d = j
    # the echo just outside a magnitude image's region is strongest near the edge, so
    # the crossing level sits nearer the in-band level than the mid-point
    level = inside[d] - CROSSING_LEVEL * (inside[d] - outside[d])
    x = crossing(prof, d, w, level)
    if halves is not None and inside[d] - outside[d] < RING_CHECK_BELOW_DB:
        # a straight edge sits at the same distance in both halves of the band; a ring
        # of the object's spectrum sits closer to DC in the outer half (checked for
        # the weaker drops a smooth roll-off of the object can produce)
        xs = []
        for hp in halves:
            _, h_in, h_out = edge_scores(hp, w)
            if not (np.isfinite(h_in[d]) and np.isfinite(h_out[d])):
                return None, best, None
            xs.append(crossing(hp, d, w, h_in[d] - CROSSING_LEVEL * (h_in[d] - h_out[d])))
        if abs(xs[0] - xs[1]) > max(HALVES_TOLERANCE, HALVES_RELATIVE * x):
            return None, best, None
    return x, best, float(inside[d] - outside[d])


def axis_support(
    lines_db: np.ndarray, power_profile: np.ndarray, *, axis: str, symmetric: bool
) -> AxisSupport:
    """Find the acquired region along one axis.

    Parameters
    ----------
    lines_db : ndarray
        ``(n,)`` or ``(n, m)``: log-power (dB) lines along the axis, centred order.
    power_profile : ndarray
        ``(n,)`` mean power profile (for the noise-floor evidence).
    axis : str
    symmetric : bool
        Whether the spectrum is Hermitian-symmetric (real-valued images), so one side
        describes both.

    Returns
    -------
    AxisSupport

    References
    ----------
    .. [1] Bernstein, Fain and Riederer, J. Magn. Reson. Imaging 14:270-280, 2001.
    """
    lines = lines_db if lines_db.ndim == 2 else lines_db[:, None]
    n = lines.shape[0]
    c = n // 2
    w = line_window(n)
    pos, neg = lines[c:], lines[c::-1]
    p_pos, p_neg = np.median(pos, axis=1), np.median(neg, axis=1)
    h_pos = h_neg = None
    if lines.shape[1] >= 8:
        # band columns run from the outer negative end to the outer positive end
        order = np.argsort(np.abs(np.arange(lines.shape[1]) - (lines.shape[1] - 1) / 2))
        inner, outer = order[: len(order) // 2], order[len(order) // 2:]
        h_pos = (np.median(pos[:, inner], axis=1), np.median(pos[:, outer], axis=1))
        h_neg = (np.median(neg[:, inner], axis=1), np.median(neg[:, outer], axis=1))
    if symmetric:
        # one side holds everything; the positive side is one sample shorter for even n
        p_neg, h_neg = p_pos, h_pos
    x_pos, s_pos, drop_pos = _side_edge(p_pos, n, w, h_pos)
    x_neg, s_neg, drop_neg = (x_pos, s_pos, drop_pos) if symmetric else _side_edge(
        p_neg, n, w, h_neg)
    score = max(s_pos, s_neg)
    prof_db = sp.to_db(power_profile)
    if x_pos is None or x_neg is None or drop_pos is None or drop_neg is None:
        return AxisSupport(axis, n, False, 1.0, None, None, score,
                           sp.noise_floor_db(power_profile), x_pos=x_pos, x_neg=x_neg)
    width = min(float(n), x_pos + x_neg)
    hi = min(n - 1, c + int(np.floor(x_pos)))
    lo = max(0, c - int(np.floor(x_neg)))
    inner = prof_db[max(lo, c - int(0.9 * x_neg)):min(hi, c + int(0.9 * x_pos)) + 1]
    edge = max(1, (hi - lo) // 20)
    band = np.r_[prof_db[lo:lo + edge], prof_db[hi - edge + 1:hi + 1]]
    noise_floor = float(np.median(band)) if band.size else float(np.median(inner))
    return AxisSupport(
        axis,
        n,
        True,
        width / n,
        (lo, hi),
        min(drop_pos, drop_neg),
        score,
        noise_floor,
        asymmetry=float(x_pos - x_neg),
        x_pos=x_pos,
        x_neg=x_neg,
    )


def detect(spec: sp.Spectrum) -> dict[str, AxisSupport]:
    """Per-axis acquired regions from a :class:`~app.traces.spectrum.Spectrum`.

    Returns
    -------
    dict
        ``rows``, ``cols`` (and ``slices`` when the spectrum has a through-plane
        profile) -> :class:`AxisSupport`.

    References
    ----------
    .. [1] Bernstein, Fain and Riederer, J. Magn. Reson. Imaging 14:270-280, 2001.
    """
    symmetric = not spec.complex_input and spec.domain == "image"
    out: dict[str, AxisSupport] = {}
    # the band of the other axis must sit inside that axis's acquired region, which
    # is not known yet: a first pass assumes a band that fits padding up to 2.5x, a
    # second uses what the first found (the whole axis where nothing was: a wide band
    # keeps the object's rings out), a third retries an axis still without an edge
    # inside a narrower region found on the other axis
    def run(i: int, ax: str, other_support: float) -> AxisSupport:
        return axis_support(band_lines(spec.mean_log, i, other_support), spec.profiles[ax],
                            axis=ax, symmetric=symmetric)

    names = ("rows", "cols")
    first = {ax: run(i, ax, DEFAULT_BAND_SUPPORT) for i, ax in enumerate(names)}
    for i, ax in enumerate(names):
        out[ax] = run(i, ax, first[names[1 - i]].support_fraction)
    for i, ax in enumerate(names):
        other = out[names[1 - i]]
        if not out[ax].found and other.found and other.support_fraction < DEFAULT_BAND_SUPPORT:
            retry = run(i, ax, other.support_fraction)
            if retry.found:
                out[ax] = retry
    if "slices" in spec.log_profiles:
        out["slices"] = axis_support(
            spec.log_profiles["slices"], spec.profiles["slices"], axis="slices",
            symmetric=symmetric,
        )
    return out


#: a k-space line counts as empty below this share of the thermal noise floor (complex
#: data): receiver roll-off and coil correlation lower raw noise by far less
EMPTY_SHARE = 0.25
#: without a background noise level, a line is empty below this share of the weakest
#: in-band line (a stricter margin for a weaker reference)
EMPTY_SHARE_FALLBACK = 1e-3
#: false-alarm rate of the empty-band test per dataset (split over the axis sides)
FALSE_ALARM_RATE = 1e-3
#: the drop of a magnitude step is tested against at most this much smooth decay
STEP_NULL_DB = 3.0


def _line_levels(spec: sp.Spectrum, axis: int) -> tuple[np.ndarray, int]:
    """Mean power of each k-space line along ``axis`` over the other axis's occupied bins.

    Returns the levels (centred order) and the number of bins averaged per line.
    """
    p = spec.mean_power if axis == 0 else spec.mean_power.T
    col = p.mean(axis=0)
    occupied = col > 1e-9 * float(np.median(col[col > 0])) if np.any(col > 0) else col >= 0
    if not occupied.any():
        occupied[:] = True
    return p[:, occupied].mean(axis=1), int(occupied.sum()) * spec.n_frames


class _Scaled:
    """A noise reference with its floor rescaled (another FFT normalisation)."""

    usable = True

    def __init__(self, noise: Any, factor: float) -> None:
        self.floor = float(noise.floor) * factor


def _empty_run(levels: np.ndarray, limit: float) -> int:
    """Number of outermost samples of an outward side that all lie below ``limit``."""
    below = levels[::-1] < limit
    return int(np.argmin(below)) if not below.all() else len(levels)


def complex_axis_support(spec: sp.Spectrum, axis: int, noise: Any = None, *,
                         slices: bool = False) -> AxisSupport:
    """Acquired region of complex data (complex images, k-space) along one axis.

    Complex data keep zero-filled k-space exactly empty: the thermal noise floor ends
    at the edge of the acquired region. Each outward side's outermost run of lines
    below ``EMPTY_SHARE`` of the white noise level (``noise.floor``; without a
    background, ``EMPTY_SHARE_FALLBACK`` of the weakest in-band line) is tested as a
    whole: under the null hypothesis (raw data: white noise of at least that level
    in every line) the mean of its ``M`` periodogram bins is Gamma(M, level / M)
    distributed (each bin is exponential: chi-square with 2 degrees of freedom over
    2), and the run is called empty when that mean is below the Gamma quantile at
    the per-side false-alarm rate.

    References
    ----------
    .. [1] Kay, S. M. *Fundamentals of Statistical Signal Processing II: Detection
       Theory*, 1998 (periodogram statistics of white Gaussian noise).
    .. [2] Bernstein, Fain and Riederer, J. Magn. Reson. Imaging 14:270-280, 2001.
    """
    from scipy import stats

    if slices:
        # the through-plane profile: mean power over all rows and the sampled columns
        name = "slices"
        levels = np.asarray(spec.profiles["slices"], dtype=np.float64)
        bins = spec.shape[0] * min(spec.shape[1], sp.SLICE_PROFILE_COLUMNS)
        if noise is not None and getattr(noise, "usable", False):
            # a white floor per in-plane bin is floor / (rows * cols) per pixel; the
            # slice FFT of one pixel column carries slices * pixel variance
            noise = _Scaled(noise, len(levels) / (spec.shape[0] * spec.shape[1]))
    else:
        name = ("rows", "cols")[axis]
        levels, bins = _line_levels(spec, axis)
    n = len(levels)
    c = n // 2
    usable = noise is not None and getattr(noise, "usable", False)
    positive = levels[levels > 0]
    if usable:
        ref, share = float(noise.floor), EMPTY_SHARE
    else:
        ref = float(np.min(positive)) if positive.size else 0.0
        inner = levels[max(0, c - n // 8):c + n // 8 + 1]
        ref, share = float(np.min(inner)) if inner.size else ref, EMPTY_SHARE_FALLBACK
    alpha = FALSE_ALARM_RATE / 4.0
    sides = {}
    for side, prof in (("pos", levels[c + 1:]), ("neg", levels[c - 1::-1])):
        run = _empty_run(prof, share * ref) if ref > 0 else 0
        if run:
            m = run * bins
            tail = float(prof[len(prof) - run:].mean())
            p = float(stats.gamma.cdf(tail * m / (share * ref), m))
            thr = float(stats.gamma.ppf(alpha, m)) * share * ref / m
        else:
            m, tail, p, thr = bins, float(prof[-1]) if len(prof) else ref, 1.0, 0.0
        sides[side] = {"extent": len(prof) - run, "run": run, "tail": tail, "p": p,
                       "threshold": thr, "bins": m}
    found_sides = [s for s in sides.values() if s["run"] and s["p"] <= alpha]
    # the decision statistic: zero-filling pads both sides, so the call rests on the
    # less empty side (an intersection-union test: its p-value is the larger one); a
    # single empty side is partial Fourier, the partial_fourier trace's finding
    weaker = max(sides.values(), key=lambda s: s["p"])
    value = float(10 * np.log10(share * ref / max(weaker["tail"], 1e-300))) if ref > 0 \
        else 0.0
    threshold = float(10 * np.log10(share * ref / weaker["threshold"])) if \
        weaker["threshold"] > 0 else float("inf")
    decision = {"statistic": "emptier-than-noise band on both sides (dB)",
                "value": value, "threshold": threshold, "false_alarm_rate": FALSE_ALARM_RATE,
                "p_value": min(1.0, 4.0 * weaker["p"]),
                "reference": "background noise" if usable else "weakest in-band line"}
    xp, xn = sides["pos"]["extent"] + 0.5, sides["neg"]["extent"] + 0.5
    if not found_sides:
        return AxisSupport(name, n, False, 1.0, None, None, 0.0, sp.to_db(ref).item(),
                           x_pos=None, x_neg=None, decision=decision, method="noise_floor")
    if sides["pos"]["p"] > alpha:
        xp = n - c - 0.5
    if sides["neg"]["p"] > alpha:
        xn = c + 0.5
    # a partial-Fourier side is shorter: the zero-filled matrix is twice the longer side
    width = min(float(n), xp + xn if abs(xp - xn) <= 1.0 else 2.0 * max(xp, xn))
    lo, hi = c - int(np.floor(xn)), c + int(np.floor(xp))
    return AxisSupport(name, n, width / n < FOUND_SUPPORT, width / n, (max(0, lo), min(n - 1, hi)),
                       value, value, sp.to_db(ref).item(), asymmetry=float(xp - xn),
                       x_pos=xp, x_neg=xn, decision=decision, method="noise_floor")


def step_decision(a: AxisSupport, spec: sp.Spectrum, axis: int) -> dict:
    """Decision record of a magnitude step edge: an F-test of the level drop.

    The mean power of the ``v`` lines inside the edge over that of the ``v`` lines
    beyond it is, for Gaussian periodogram bins of equal means, F(2M, 2M)
    distributed; the null hypothesis allows a smooth decay of up to
    ``STEP_NULL_DB`` over that distance (the object's own roll-off), so the
    p-value is that of the observed ratio over ``10**(STEP_NULL_DB / 10)``.

    References
    ----------
    .. [1] Snedecor, G. W. and Cochran, W. G. *Statistical Methods*, 8th ed., 1989
       (the variance-ratio F test).
    """
    from scipy import stats

    score = a.score_db if np.isfinite(a.score_db) else 0.0
    m = max(1, spec.n_frames * max(1, spec.shape[1 - axis] // 10) * line_window(a.size))
    drop = a.drop_db if a.drop_db is not None else score
    ratio = 10 ** ((drop - STEP_NULL_DB) / 10.0)
    p = float(stats.f.sf(ratio, 2 * m, 2 * m)) if a.found else 1.0
    return {"statistic": "step score of the log-power profile (dB)", "value": float(score),
            "threshold": STEP_THRESHOLD_DB, "false_alarm_rate": None,
            "p_value": p, "reference": "step against the in-band level"}


def support_step(spectrum: sp.Spectrum, noise_reference: Any = None) -> dict[str, AxisSupport]:
    """The shared step: per-axis acquired regions of the dataset's spectrum.

    Complex data (complex images, k-space) are judged against the thermal noise
    floor (:func:`complex_axis_support`); magnitude and real images by the step of
    their log-power profile (:func:`detect`), whose non-linear echo beyond the edge
    keeps the floor test from applying. Computed once by the analysis plan and
    handed to ``zero_filling``, ``kspace_filtering``, ``partial_fourier`` and
    ``resampling``.

    References
    ----------
    .. [1] Bernstein, Fain and Riederer, J. Magn. Reson. Imaging 14:270-280, 2001.
    """
    if spectrum.complex_input or spectrum.domain == "kspace":
        out = {ax: complex_axis_support(spectrum, i, noise_reference)
               for i, ax in enumerate(("rows", "cols"))}
        if noise_reference_mod.USE_NOISE_SPECTRUM:
            for i, ax in enumerate(("rows", "cols")):
                out[ax].noise_fit = noise_shape_fit(noise_reference, i)
        if "slices" in spectrum.profiles:
            out["slices"] = complex_axis_support(spectrum, 0, noise_reference, slices=True)
        return out
    fits = {ax: noise_shape_fit(noise_reference if noise_reference_mod.USE_NOISE_SPECTRUM
                               else None, i)
            for i, ax in enumerate(("rows", "cols"))}
    misfit = [f for f in fits.values() if f is not None and f.dispersion > FAMILY_DISPERSION]
    if all(f is not None for f in fits.values()) and not misfit:
        out = {ax: noise_axis_support(f) for ax, f in fits.items()}
        if "slices" in spectrum.log_profiles:
            # the through-plane axis has no background spectrum: the step locator
            sl = detect(spectrum).get("slices")
            if sl is not None:
                sl.decision = _fallback(step_decision(sl, spectrum, 1))
                out["slices"] = sl
        return out
    out = detect(spectrum)
    why = (noise_reference.reason if noise_reference is not None and noise_reference.reason
           else "no background noise spectrum")
    if misfit:
        why = (f"no support-and-window model describes the background noise spectrum "
               f"(dispersion {max(f.dispersion for f in misfit):.1f} on {misfit[0].axis})")
    for i, ax in enumerate(("rows", "cols", "slices")):
        if ax in out:
            out[ax].decision = _fallback(step_decision(out[ax], spectrum, min(i, 1)), why)
    return out


#: without a background noise spectrum, the step locator's p-value is never taken below
#: this (its null model, a bounded smooth decay, is not measured on the dataset)
FALLBACK_MIN_P = 0.2


def _fallback(decision: dict, why: str = "through-plane axis") -> dict:
    """The step locator's record, its p-value floored: a weaker reference."""
    d = dict(decision)
    d["p_value"] = max(float(d["p_value"]), FALLBACK_MIN_P)
    d["reference"] = f"step of the log-power profile (no noise spectrum: {why})"
    return d


def noise_axis_support(fit: NoiseShapeFit) -> AxisSupport:
    """An :class:`AxisSupport` from the joint support-and-window fit of one axis.

    References
    ----------
    .. [1] Isserlis, Biometrika 12:134-139, 1918.
    """
    n = fit.size
    c = n // 2
    found = fit.zero_fill["p_value"] <= NOISE_FALSE_ALARM / 4 and \
        fit.support_fraction < FOUND_SUPPORT
    width = fit.width if found else n
    lo = c - width // 2
    hi = lo + width - 1
    drop = float(10 * np.log10(max(fit.deviance["best_unpadded"], 1e-300)
                               / max(fit.deviance["best"], 1e-300)))
    a = AxisSupport(fit.axis, n, found, width / n, (lo, hi) if found else None,
                    drop if found else None, float(fit.zero_fill["value"]), None,
                    x_pos=hi - c + 0.5 if found else None,
                    x_neg=c - lo + 0.5 if found else None,
                    decision=dict(fit.zero_fill, reference="background noise spectrum"),
                    method="noise_spectrum")
    a.noise_fit = fit
    return a


# ----- the joint support-and-window fit to the background noise spectrum -----------------
# Whether the support step uses the joint support-and-window fit to the background
# noise spectrum is noise_reference.USE_NOISE_SPECTRUM (one switch: the noise reference
# skips the intensity periodogram of magnitude images while it is off).
#: false-alarm rate per dataset of the noise-spectrum tests (zero-fill, window)
NOISE_FALSE_ALARM = 1e-3
#: bins this close to DC (share of the axis) are left out of the noise-spectrum fit:
#: the background's slowly varying level and the object's leakage sit there
NOISE_DC_SHARE = 1 / 16
#: candidate support widths tried per axis (at most; evenly spaced integers)
MAX_WIDTHS = 160
#: smallest support fraction tried (padding up to 5x)
NOISE_MIN_SUPPORT = 0.18
#: the quasi-likelihood dispersion is estimated from the best model's deviance (it is
#: below 1 where masked-periodogram bins are more independent than counted); this floor
#: keeps a near-perfect fit from inflating the statistics
MIN_DISPERSION = 0.25
#: a family is named only when the best window model leaves at most this much
#: overdispersion (deviance per degree of freedom) over the periodogram's own scatter
FAMILY_DISPERSION = 4.0


@dataclass
class NoiseShapeFit:
    """The joint support-and-window fit to one axis of the background noise spectrum.

    Attributes
    ----------
    axis : str
    size : int
    width : int
        Acquired support in samples (``size`` when nothing was padded).
    family, param
        Best window family (``"box"``: none) and its parameter.
    kind : {"complex", "intensity"}
        Whether the model is ``|W|**2`` on the support (complex data) or its
        autocorrelation (magnitude and real images: the intensity's spectrum).
    deviance : dict
        ``white``, ``best``, ``best_unpadded`` (width = size), ``best_box`` (no window)
        and ``best_other_family`` (best of the other families): Whittle deviances.
    dispersion : float
        Best model's deviance per degree of freedom (1 for a perfect model).
    zero_fill, window, family_test : dict
        Decision records (statistic, value, threshold, false_alarm_rate, p_value).
    k, profile, model : ndarray
        Fitted distances from DC, the measured one-sided profile and the best model.
    """

    axis: str
    size: int
    width: int
    family: str
    param: float | None
    kind: str
    deviance: dict
    dispersion: float
    zero_fill: dict
    window: dict
    family_test: dict
    k: np.ndarray
    profile: np.ndarray
    model: np.ndarray

    @property
    def support_fraction(self) -> float:
        return self.width / self.size

    @property
    def family_identified(self) -> bool:
        return bool(self.family_test["p_value"] <= NOISE_FALSE_ALARM
                    and self.dispersion <= FAMILY_DISPERSION)


def _widths(n: int) -> np.ndarray:
    lo = max(4, int(np.ceil(NOISE_MIN_SUPPORT * n)))
    w = np.unique(np.linspace(lo, n, min(MAX_WIDTHS, n - lo + 1)).round().astype(int))
    return w


def noise_models(n: int, widths: np.ndarray, kind: str, kernel: np.ndarray | None,
                 highpass: np.ndarray | None = None
                 ) -> tuple[np.ndarray, list[tuple[int, str, float | None]]]:
    """Expected background noise spectra along one axis, unshifted, one row per model.

    Complex data: ``|w|**2`` on a support of each width; intensity (magnitude and real
    images): its circular autocorrelation over ``n`` samples (the Isserlis theorem).
    Each is convolved with the background mask's own spectrum ``kernel`` (centred,
    length ``n``), as a masked periodogram is.

    References
    ----------
    .. [1] Isserlis, Biometrika 12:134-139, 1918.
    .. [2] Harris, Proc. IEEE 66(1):51-83, 1978.
    """
    labels = []
    g = []
    for m in widths:
        for fam, par in sp.WINDOW_CANDIDATES:
            labels.append((int(m), fam, par))
            g.append(sp.support_window(n, int(m), fam, par) ** 2)
    G = np.fft.fft(np.fft.ifftshift(np.asarray(g), axes=-1), axis=-1)
    F = (np.abs(G) ** 2 / n) if kind == "intensity" else G
    if highpass is not None:
        F = F * np.fft.ifftshift(highpass)
    if kernel is not None:
        F = F * np.fft.fft(np.fft.ifftshift(kernel / kernel.sum()))
    E = np.fft.ifft(F, axis=-1).real
    return np.maximum(E, 0.0), labels


def _whittle_fit(P: np.ndarray, E: np.ndarray, n_eff: np.ndarray
                 ) -> tuple[np.ndarray, np.ndarray]:
    """Fit ``a E + b`` (``a, b >= 0``) to periodogram means ``P`` for every row of ``E``.

    Iteratively reweighted least squares with weights ``n / mu**2`` (a mean of ``n``
    exponential bins has variance ``mu**2 / n``), then the Whittle (Gamma) deviance
    ``2 sum n (P / mu - log(P / mu) - 1)``. Returns ``(deviance, mu)``.

    References
    ----------
    .. [1] Whittle, P. "Curve and periodogram smoothing", J. R. Stat. Soc. B
       19(1):38-63, 1957.
    .. [2] McCullagh, P. and Nelder, J. A. *Generalized Linear Models*, 2nd ed.,
       Chapman and Hall, 1989 (Gamma deviance, quasi-likelihood dispersion).
    """
    K = E.shape[0]
    mu = np.full((K, len(P)), float(P.mean()))
    for _ in range(4):
        w = n_eff[None, :] / np.maximum(mu, 1e-300) ** 2
        s_ee = (w * E * E).sum(1)
        s_e = (w * E).sum(1)
        s_1 = w.sum(1)
        r_e = (w * E * P).sum(1)
        r_1 = (w * P).sum(1)
        det = s_ee * s_1 - s_e**2
        with np.errstate(divide="ignore", invalid="ignore"):
            a = (r_e * s_1 - s_e * r_1) / det
            b = (s_ee * r_1 - s_e * r_e) / det
        a_only = np.where(s_ee > 0, r_e / np.maximum(s_ee, 1e-300), 0.0)
        b_only = r_1 / s_1
        bad_b = ~np.isfinite(b) | (b < 0)
        bad_a = ~np.isfinite(a) | (a < 0)
        a = np.where(bad_b, a_only, np.where(bad_a, 0.0, a))
        b = np.where(bad_b, 0.0, np.where(bad_a, b_only, b))
        mu = np.maximum(a[:, None] * E + b[:, None], 1e-12 * float(P.mean()))
    ratio = np.maximum(P[None, :], 1e-300) / mu
    dev = 2.0 * (n_eff[None, :] * (ratio - np.log(ratio) - 1.0)).sum(1)
    return dev, mu


def _nested_record(statistic: str, delta: float, dispersion: float, n_tests: int,
                   alpha: float) -> dict:
    """Decision record of a nested deviance comparison (one extra parameter searched
    over ``n_tests`` values: Bonferroni), scaled by the quasi-likelihood dispersion."""
    from scipy import stats

    value = max(0.0, delta) / max(dispersion, MIN_DISPERSION)
    p = min(1.0, n_tests * float(stats.chi2.sf(value, 1)))
    thr = float(stats.chi2.isf(alpha / max(n_tests, 1), 1))
    return {"statistic": statistic, "value": value, "threshold": thr,
            "false_alarm_rate": alpha, "p_value": p}


def noise_shape_fit(noise: Any, axis: int, *, alpha: float = NOISE_FALSE_ALARM / 4
                    ) -> NoiseShapeFit | None:
    """Fit support width and window family jointly to the background noise spectrum.

    Before any processing the thermal noise of k-space is white. A raw filter ``W``
    and zero-filling make the noise spectrum of a complex image ``|W|**2`` on the
    acquired support and zero outside; the intensity of a magnitude image (squared
    magnitude, summed over channels) has, by the Isserlis theorem, the
    autocorrelation of that as its spectrum (apart from DC): a triangle-like profile
    whose half-width is the support width, wrapped around the axis (flat when
    nothing was padded). The one-sided profile of the background's masked
    periodogram (mean over the other axis) is fitted, away from DC, by ``a E + b``
    for every support width and window family (the model ``E`` blurred by the
    mask's spectrum), with Gamma (Whittle) likelihood. Three nested tests at the
    stated false-alarm rate, each scaled by the best model's overdispersion
    (quasi-likelihood) and Bonferroni-corrected over the values searched:
    zero-filling (best width below the axis against the best unpadded model), a
    window (best windowed model against the best unwindowed one), and the family
    (best family against the best of the others).

    Returns None when the noise reference has no background spectrum.

    References
    ----------
    .. [1] Isserlis, Biometrika 12:134-139, 1918.
    .. [2] Whittle, J. R. Stat. Soc. B 19:38-63, 1957.
    .. [3] Harris, Proc. IEEE 66(1):51-83, 1978.
    .. [4] McCullagh and Nelder, *Generalized Linear Models*, 1989.
    """
    if noise is None or not getattr(noise, "usable", False) or noise.psd is None:
        return None
    name = ("rows", "cols")[axis]
    psd = noise.psd if axis == 0 else noise.psd.T
    n, m = psd.shape
    c = n // 2
    kind = noise.psd_of
    # the other axis's bins near DC hold the background's slow variations: left out
    cm = m // 2
    dc_other = max(1, int(round(m * NOISE_DC_SHARE)))
    keep_cols = np.abs(np.arange(m) - cm) > dc_other
    prof = psd[:, keep_cols].mean(axis=1)
    ker = None
    if noise.mask_kernel is not None:
        kk = noise.mask_kernel if axis == 0 else noise.mask_kernel.T
        ker = kk.sum(axis=1)
    half = n - c - 1
    k = np.arange(max(2, int(round(n * NOISE_DC_SHARE))), half + 1)
    if len(k) < 8:
        return None
    side = 0.5 * (prof[c + k] + prof[c - k])
    # independent bins per profile sample: the background's share of the plane times
    # the columns averaged (intensity: a real field, its halves mirror each other)
    share = min(1.0, noise.area / max(1, noise.psd_frames) / (n * m)) \
        if noise.area else 1.0
    frames = max(1, noise.psd_frames)
    per = frames * keep_cols.sum() * share * (1.0 if kind == "intensity" else 2.0)
    n_eff = np.full(len(k), max(1.0, per))
    widths = _widths(n)
    # the local-mean removal's high-pass factor (1 - G_y G_x)**2, averaged over the
    # other axis's kept bins
    sig = float(getattr(noise, "highpass_sigma", 0.0) or 0.0)
    hp = None
    if sig > 0:
        gy = np.exp(-2 * np.pi**2 * sig**2 * ((np.arange(n) - c) / n) ** 2)
        gx = np.exp(-2 * np.pi**2 * sig**2 * ((np.arange(m) - cm) / m) ** 2)[keep_cols]
        hp = ((1 - gy[:, None] * gx[None, :]) ** 2).mean(axis=1)
    E_all, labels = noise_models(n, widths, kind, ker, hp)
    E = np.fft.fftshift(E_all, axes=-1)[:, c + k]
    dev, mu = _whittle_fit(side, E, n_eff)
    white = float(_whittle_fit(side, np.zeros((1, len(k))), n_eff)[0][0])
    lab_w = np.array([lab[0] for lab in labels])
    lab_f = [lab[1] for lab in labels]
    is_box = np.array([f == "box" for f in lab_f])
    best = int(np.argmin(dev))
    df = max(1, len(k) - 4)
    dispersion = float(dev[best] / df)
    unpadded = lab_w == n
    padded = lab_w < n * FOUND_SUPPORT
    d_unp = float(dev[unpadded].min())
    d_pad = float(dev[padded].min()) if padded.any() else d_unp
    d_box = float(dev[is_box].min())
    d_win = float(dev[~is_box].min())
    fam = lab_f[best]
    other = np.array([f != fam for f in lab_f])
    d_other = float(dev[other].min())
    n_windows = len(sp.WINDOW_CANDIDATES) - 1
    zf_rec = _nested_record("zero-fill fit gain over the unpadded noise spectrum "
                            "(deviance / dispersion)", d_unp - d_pad, dispersion,
                            int(padded.sum() // len(sp.WINDOW_CANDIDATES)) or 1, alpha)
    win_rec = _nested_record("window fit gain over the unwindowed noise spectrum "
                             "(deviance / dispersion)", d_box - d_win, dispersion,
                             n_windows, alpha)
    fam_rec = _nested_record("best window family's gain over the other families "
                             "(deviance / dispersion)", d_other - float(dev[best]),
                             dispersion, n_windows, alpha)
    # the simplest model the tests do not reject: unpadded unless the zero-fill test
    # rejects that, no window unless the window test rejects that
    allowed = np.ones(len(labels), bool)
    if zf_rec["p_value"] > alpha:
        allowed &= unpadded
    if win_rec["p_value"] > alpha:
        allowed &= is_box
    best = int(np.flatnonzero(allowed)[np.argmin(dev[allowed])])
    width, fam, par = labels[best]
    if fam != lab_f[int(np.argmin(dev))]:
        fam_rec = dict(fam_rec, p_value=1.0)
    return NoiseShapeFit(name, n, int(width), fam, par, kind,
                         {"white": white, "best": float(dev[best]), "best_unpadded": d_unp,
                          "best_box": d_box, "best_other_family": d_other},
                         dispersion, zf_rec, win_rec, fam_rec, k, side, mu[best])
