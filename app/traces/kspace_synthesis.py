"""K-space synthesis: were the k-space samples measured, or computed from other samples?

A measured k-space sample carries its own thermal noise, independent of every
other sample. A computed one does not: a line filled by a parallel-imaging
kernel is a linear function of its acquired neighbours (GRAPPA), an unfolded
image couples the noise of the pixels that were folded onto each other (SENSE),
and a partial-Fourier fill copies the conjugate of the opposite side. Three
tests, each against the thermal noise of the data themselves:

1. **Self-consistency of multi-coil k-space** (k-space with a coil axis, or
   complex coil images, transformed to k-space). The coils are whitened with the
   noise covariance of the outer k-space and compressed to at most
   :data:`MAX_VIRTUAL_COILS` virtual coils (a unitary map of white noise keeps it
   white). For each line class modulo a period (3 and 4, which cover
   accelerations 2, 3 and 4), one shift-invariant kernel is fitted by least
   squares that predicts each phase-encode line from the lines within the period
   on either side (the line itself excluded) and three readout neighbours, as
   GRAPPA and SPIRiT kernels do [1]_ [2]_. A measured line keeps its own noise,
   which no neighbour predicts: its residual per sample is at least the noise
   variance (1 after whitening, times ``1 - p/n`` for ``p`` fitted weights on
   ``n`` samples). A filled line is predicted far below it. Lines whose
   normalised residual is below :data:`FILLED_RESIDUAL` are counted as filled;
   their period gives the acceleration.
2. **Noise coupled across the folding distance** (one complex image, or one
   channel's k-space). The noise is isolated by Immerkaer's 3 x 3 Laplacian-
   difference operator [5]_; its products with the same operator's output
   ``N/R`` pixels away (``R`` = 2..6, rows and columns) are averaged in blocks.
   Thermal noise of a measured image is white, so the block means scatter around
   zero with a variance known from the operator's own autocorrelation; SENSE
   unfolding (and any parallel-imaging reconstruction) couples the noise of
   pixels one reduced field of view apart [3]_ [4]_. The local noise-variance
   map (the g-factor pattern) is kept as evidence.
3. Partial-Fourier fills are left to the ``partial_fourier`` trace.

Magnitude and real images: their k-space is synthetic by construction (Hermitian
symmetric), which is ``magnitude_only``'s finding; this trace then says it
cannot measure anything.

References
----------
.. [1] M. A. Griswold, P. M. Jakob, R. M. Heidemann, M. Nittka, V. Jellus, J. Wang,
   B. Kiefer and A. Haase, "Generalized autocalibrating partially parallel
   acquisitions (GRAPPA)", Magnetic Resonance in Medicine 47(6):1202-1210, 2002.
.. [2] M. Lustig and J. M. Pauly, "SPIRiT: iterative self-consistent parallel
   imaging reconstruction from arbitrary k-space", Magnetic Resonance in Medicine
   64(2):457-471, 2010.
.. [3] K. P. Pruessmann, M. Weiger, M. B. Scheidegger and P. Boesiger, "SENSE:
   sensitivity encoding for fast MRI", Magnetic Resonance in Medicine
   42(5):952-962, 1999.
.. [4] P. M. Robson, A. K. Grant, A. J. Madhuranthakam, R. Lattanzi, D. K.
   Sodickson and C. A. McKenzie, "Comprehensive quantification of signal-to-noise
   ratio and g-factor for image-based and k-space-based parallel imaging
   reconstructions", Magnetic Resonance in Medicine 60(4):895-907, 2008.
.. [5] J. Immerkaer, "Fast noise variance estimation", Computer Vision and Image
   Understanding 64(2):300-302, 1996.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import scipy.fft as sfft
from scipy import ndimage, stats

from app.io.volume import Volume
from app.traces.base import Trace, inconclusive, register
from app.traces.rounding import round_sig
from app.traces.value_kind import ValueKind

TRACE_ID = "kspace_synthesis"
DEFAULTS = {"method": None, "acceleration": None, "filled_fraction": None}

MAX_VIRTUAL_COILS = 8
PERIODS = (3, 4)
READOUT_HALF_WIDTH = 1
FIT_COLUMNS = 64
MAX_REACH = 3
#: a line predicted below this share of the thermal noise variance was computed
FILLED_RESIDUAL = 0.25
#: present when at least this share of the non-zero lines is filled
FILLED_SHARE = 0.08
ZERO_LINE = 1e-8
#: lines whose energy per sample is below this share of the noise variance were attenuated
FAINT_LINE = 0.25
MIN_LINES = 16
#: single-image test
FOLDS = (2, 3, 4, 5, 6)
BLOCK = 16
FALSE_ALARM = 1e-3
MIN_COUPLING = 1.5
_LAPLACE = np.array([[1.0, -2.0, 1.0], [-2.0, 4.0, -2.0], [1.0, -2.0, 1.0]])


def decision(statistic: str, value: float, threshold: float, *,
             false_alarm_rate: float | None, p_value: float | None) -> dict[str, Any]:
    """The decision record every trace puts in ``evidence["decision"]`` (larger = present)."""
    return {"statistic": statistic, "value": round_sig(value), "threshold": round_sig(threshold),
            "false_alarm_rate": round_sig(false_alarm_rate), "p_value": round_sig(p_value)}


# ----------------------------------------------------------------------------------------
# multi-coil self-consistency


def centre_kspace(kspace: np.ndarray) -> np.ndarray:
    """Roll ``(..., lines, readout)`` k-space so that its peak power sits at the centre.

    K-space files store DC at the centre or at index 0; the FFT of an image puts
    it at index 0. The outer samples (the noise reference) are only outer once
    DC is central. A circular roll keeps every line's neighbours (one seam at
    the edge, where the signal is weakest). Common practice, no source.
    """
    k = np.asarray(kspace)
    p = np.abs(k.reshape(-1, *k.shape[-2:])) ** 2
    prof_y = p.sum(axis=(0, 2))
    prof_x = p.sum(axis=(0, 1))
    ny, nx = k.shape[-2:]
    sy = ny // 2 - int(np.argmax(prof_y))
    sx = nx // 2 - int(np.argmax(prof_x))
    if sy == 0 and sx == 0:
        return k
    return np.roll(k, (sy, sx), axis=(-2, -1))


def whiten_coils(kspace: np.ndarray, *, max_virtual: int = MAX_VIRTUAL_COILS
                 ) -> tuple[np.ndarray, np.ndarray]:
    """Whiten ``(coils, lines, readout)`` k-space by the outer samples' noise covariance.

    The noise covariance is taken from the quietest of the four corners (the
    outer eighth of the non-zero support along both axes; signal leaks into
    some corners, never below the noise), non-zero samples only; the data are multiplied by
    the inverse Cholesky factor and compressed to the ``max_virtual`` strongest
    singular components (a unitary map keeps white noise white).

    Returns
    -------
    whitened : ndarray
        ``(virtual coils, lines, readout)``, unit noise variance per sample.
    covariance : ndarray
        The estimated ``(coils, coils)`` noise covariance.

    References
    ----------
    P. B. Roemer, W. A. Edelstein, C. E. Hayes, S. P. Souza and O. M. Mueller, "The
    NMR phased array", Magnetic Resonance in Medicine 16(2):192-225, 1990 (noise
    covariance of receive channels); coil compression by the singular value
    decomposition is common practice, no source.
    """
    k = centre_kspace(np.asarray(kspace, dtype=np.complex128))
    c, ny, nx = k.shape
    # the outer eighth of the measured support: zero-padded rows and columns are no noise
    # (rows and columns at round-off level of the peak count as zeros: the FFT of images
    # made from zero-padded k-space leaves 1e-14 there, not exact zeros)
    power = np.abs(k) ** 2
    py, px = power.sum(axis=(0, 2)), power.sum(axis=(0, 1))
    ry = np.flatnonzero(py > ZERO_LINE * np.median(py[py > 0]) if np.any(py > 0) else py > 0)
    rx = np.flatnonzero(px > ZERO_LINE * np.median(px[px > 0]) if np.any(px > 0) else px > 0)
    y0, y1 = (int(ry[0]), int(ry[-1]) + 1) if ry.size else (0, ny)
    x0, x1 = (int(rx[0]), int(rx[-1]) + 1) if rx.size else (0, nx)
    ey, ex = max(2, (y1 - y0) // 8), max(2, (x1 - x0) // 8)
    # each corner separately; the quietest one is the noise (a bright object's edges or
    # ghosts leak signal into some corners, never below the noise)
    best = None
    for rows in (np.r_[y0:y0 + ey], np.r_[y1 - ey:y1]):
        for cols in (np.r_[x0:x0 + ex], np.r_[x1 - ex:x1]):
            corner = k[:, rows][:, :, cols].reshape(c, -1)
            corner = corner[:, np.sum(np.abs(corner) ** 2, axis=0)
                            > ZERO_LINE * float(np.median(py)) / max(1, nx)]
            if corner.shape[1] < 4 * c:
                continue
            cv = corner @ corner.conj().T / corner.shape[1]
            if best is None or np.trace(cv).real < np.trace(best).real:
                best = cv
    if best is None:
        flat = k.reshape(c, -1)
        best = flat @ flat.conj().T / max(1, flat.shape[1])
    cov = best + np.eye(c) * (1e-9 * np.trace(best).real / c + 1e-300)
    chol = np.linalg.cholesky(cov)
    w = np.linalg.solve(chol, k.reshape(c, -1))
    if c > max_virtual:
        u, _, _ = np.linalg.svd(w[:, :: max(1, w.shape[1] // 20000)], full_matrices=False)
        w = u[:, :max_virtual].conj().T @ w
    return w.reshape(-1, ny, nx), cov


@dataclass
class LineResiduals:
    """Per-line prediction residuals of one k-space axis.

    Attributes
    ----------
    residual : ndarray
        Residual per sample of each line over the thermal noise variance (NaN for
        all-zero lines); about 1 or more for measured lines.
    zero : ndarray of bool
        Lines that hold only zeros (padding, not synthesis).
    parameters : int
        Fitted weights per virtual coil.
    """

    residual: np.ndarray
    zero: np.ndarray
    parameters: int


def _regressors(k: np.ndarray, lines: np.ndarray, cols: np.ndarray, reach: int,
                half: int) -> np.ndarray:
    c, ny, nx = k.shape
    pad = np.pad(k, ((0, 0), (reach, reach), (half, half)))
    feats = []
    for d in range(-reach, reach + 1):
        if d == 0:
            continue
        for s in range(-half, half + 1):
            feats.append(pad[:, lines[:, None] + reach + d, cols[None, :] + half + s])
    a = np.stack(feats, axis=1)  # (c, features, lines, cols)
    return a.reshape(c * len(feats), -1).T


def line_residuals(kspace: np.ndarray, *, period: int, reach: int | None = None,
                   half_width: int = READOUT_HALF_WIDTH,
                   fit_columns: int = FIT_COLUMNS) -> LineResiduals:
    """Predict every line of whitened multi-coil k-space from its neighbours.

    Parameters
    ----------
    kspace : ndarray
        ``(coils, lines, readout)``, whitened (unit noise variance per sample).
    period : int
        Lines are split into classes ``line mod period``; one shift-invariant
        kernel is fitted per class.
    reach : int, optional
        Neighbouring lines used on either side (default ``min(period, 3)``).
    half_width : int
        Readout neighbours on either side.
    fit_columns : int
        Readout samples (the central ones) used to fit and to score.

    Returns
    -------
    LineResiduals

    References
    ----------
    Griswold et al., MRM 2002 (GRAPPA kernels); Lustig and Pauly, MRM 2010
    (SPIRiT: calibration consistency of every sample with its neighbours).
    """
    k = np.asarray(kspace, dtype=np.complex128)
    c, ny, nx = k.shape
    reach = min(period, MAX_REACH) if reach is None else reach
    power = np.mean(np.abs(k) ** 2, axis=(0, 2))
    zero = power <= ZERO_LINE * max(float(np.median(power[power > 0])) if np.any(power > 0)
                                    else 0.0, 1e-300)
    zero |= power == 0
    nfit = min(nx, fit_columns)
    cols = np.arange(nx // 2 - nfit // 2, nx // 2 - nfit // 2 + nfit)
    p = c * 2 * reach * (2 * half_width + 1)
    out = np.full(ny, np.nan)
    for o in range(period):
        lines = np.arange(o, ny, period)
        lines = lines[~zero[lines]]
        if lines.size * nfit < 3 * p:
            continue
        a = _regressors(k, lines, cols, reach, half_width)
        b = k[:, lines][:, :, cols].reshape(c, -1).T
        use = np.ones(lines.size, bool)
        for _ in range(2):
            rows_fit = np.repeat(use, nfit)
            aa = a[rows_fit]
            gram = aa.conj().T @ aa
            gram += np.eye(p) * 1e-6 * np.trace(gram).real / p
            w = np.linalg.solve(gram, aa.conj().T @ b[rows_fit])
            r = np.abs(b - a @ w) ** 2
            dof = max(1e-3, 1.0 - p / max(1, rows_fit.sum()))
            res = r.reshape(lines.size, nfit, c).sum(axis=(1, 2)) / (c * nfit * dof)
            med = float(np.median(res))
            keep = res <= 3.0 * med + 1e-12
            if keep.all() or keep.sum() * nfit < 3 * p:
                break
            use = keep
        out[lines] = res
    return LineResiduals(out, zero, p)


def _calibration_centre(measured: np.ndarray) -> np.ndarray:
    """The longest run (at least 4 lines) of lines that look measured: a calibration centre."""
    runs, start = [], None
    for i, f in enumerate(np.append(measured, False)):
        if f and start is None:
            start = i
        elif not f and start is not None:
            runs.append((i - start, start))
            start = None
    out = np.zeros(measured.size, bool)
    if runs:
        length, s0 = max(runs)
        if length >= 4:
            out[s0:s0 + length] = True
    return out


@dataclass
class LinePeriod:
    """A periodic pattern of prediction residuals: one class of lines measured, the rest filled."""

    period: int
    measured_class: int
    separation: float
    p_value: float
    centre: np.ndarray


def period_from_levels(residual: np.ndarray, valid: np.ndarray, *,
                       periods: tuple[int, ...] = (2, 3, 4, 5, 6)) -> LinePeriod | None:
    """The acceleration of a regular undersampling pattern filled by a reconstruction.

    A measured line keeps its own noise; a filled line is a function of the
    measured ones, so its prediction residual lies far below. The acquired lines
    of a filled data set are predicted from the filled ones too (they share
    the same information), but less well: the residual level is periodic with
    the acceleration ``R``, one class of lines ``mod R`` standing above the
    others. The fully sampled calibration centre (the longest run of lines at
    the measured level) is left out. For each candidate period, the
    separation is the difference of log residual medians between the highest
    class and the next; the period with the largest separation wins (a
    multiple of ``R`` holds two high classes and a divisor mixes them, so both
    separate less). Its p-value is the one-sided Mann-Whitney test of the high
    class against the rest (scipy.stats), times the classes and periods tried.

    Returns
    -------
    LinePeriod or None
        None when no period separates its classes by at least a factor 3.

    References
    ----------
    Griswold et al., MRM 2002 (regular undersampling with a calibration centre,
    filled lines as linear functions of the acquired ones); H. B. Mann and D. R.
    Whitney, Ann. Math. Statist. 18(1):50-60, 1947.
    """
    res = np.asarray(residual, dtype=np.float64)
    ok = np.asarray(valid, bool) & np.isfinite(res)
    if ok.sum() < 12:
        return None
    logr = np.full(res.size, np.nan)
    # an exact fill predicts to rounding: floor the residual at 1e-12 of the noise
    logr[ok] = np.log(np.maximum(res[ok], 1e-12))
    centre = _calibration_centre(ok & (res >= 0.5))
    idx = np.flatnonzero(ok & ~centre)
    best: LinePeriod | None = None
    n_tests = sum(periods)
    for r in periods:
        cls = [logr[idx[(idx % r) == o]] for o in range(r)]
        if any(c.size < 3 for c in cls):
            continue
        med = np.array([np.median(c) for c in cls])
        hi = int(np.argmax(med))
        sep = float(med[hi] - np.max(np.delete(med, hi)))
        if sep < np.log(3.0):
            continue
        rest = np.concatenate([c for o, c in enumerate(cls) if o != hi])
        pv = float(stats.mannwhitneyu(cls[hi], rest, alternative="greater").pvalue)
        cand = LinePeriod(r, hi, sep, min(1.0, pv * n_tests), centre)
        if best is None or cand.separation > best.separation:
            best = cand
    return best


@dataclass
class SelfConsistency:
    """The multi-coil self-consistency finding of one frame."""

    axis: str
    residual: np.ndarray
    filled: np.ndarray
    zero: np.ndarray
    filled_fraction: float
    acceleration: int | None
    p_value: float
    n_lines: int
    parameters: int


def self_consistency(kspace: np.ndarray) -> SelfConsistency:
    """Count the phase-encode lines predicted below the thermal noise (rows and columns tried).

    Parameters
    ----------
    kspace : ndarray
        ``(coils, rows, cols)`` k-space of one frame.

    Returns
    -------
    SelfConsistency
        For the axis with more filled lines. ``p_value`` is the probability,
        under the null model of measured lines (the residual sum of squares of a
        least-squares fit to white complex Gaussian noise follows a scaled
        chi-square law with ``2 c (n - p)`` degrees of freedom), of seeing this
        many lines or more below :data:`FILLED_RESIDUAL` (binomial tail).

    References
    ----------
    Griswold et al., MRM 2002; Lustig and Pauly, MRM 2010.
    """
    w, _ = whiten_coils(kspace)
    best: SelfConsistency | None = None
    for axis in ("rows", "cols"):
        kk = w if axis == "rows" else np.swapaxes(w, 1, 2)
        fits = [line_residuals(kk, period=m) for m in PERIODS]
        res = np.fmin.reduce([f.residual for f in fits])
        zero = fits[0].zero
        # a measured line never holds less energy than its own noise: lines far below it
        # were attenuated (a k-space window), which is not synthesis
        faint = np.mean(np.abs(kk) ** 2, axis=(0, 2)) < FAINT_LINE
        valid = ~zero & ~faint & np.isfinite(res)
        n = int(valid.sum())
        filled = valid & (res < FILLED_RESIDUAL)
        frac = float(filled.sum() / n) if n else 0.0
        c = kk.shape[0]
        nfit = min(kk.shape[2], FIT_COLUMNS)
        p = max(f.parameters for f in fits)
        dof = 2.0 * c * max(1.0, nfit - p / max(1, kk.shape[1] // max(PERIODS)))
        # per line: P(residual < FILLED_RESIDUAL) for chi2(dof)/dof, the noise-only null
        pi0 = float(stats.chi2.cdf(FILLED_RESIDUAL * dof, dof))
        pv = float(stats.binom.sf(int(filled.sum()) - 1, max(n, 1), min(max(pi0, 1e-300), 1.0)))
        per = period_from_levels(res, valid)
        acc = None
        if per is not None and per.p_value < FALSE_ALARM:
            lines = np.arange(res.size)
            low = valid & ~per.centre & (lines % per.period != per.measured_class)
            acc = per.period
            filled = low
            frac = float(filled.sum() / n) if n else 0.0
            pv = min(pv, per.p_value)
        cand = SelfConsistency(axis, res, filled, zero, frac, acc, pv, n, p)
        if best is None or cand.filled_fraction > best.filled_fraction:
            best = cand
    assert best is not None
    return best


# ----------------------------------------------------------------------------------------
# single complex image: noise coupled across the folding distance


def noise_operator(image: np.ndarray) -> np.ndarray:
    """Immerkaer's 3 x 3 operator (a difference of Laplacians): noise kept, smooth signal removed.

    For white noise of variance ``s2`` per sample the output has variance ``36 s2``.

    References
    ----------
    J. Immerkaer, "Fast noise variance estimation", CVIU 64(2):300-302, 1996.
    """
    z = np.asarray(image)
    if np.iscomplexobj(z):
        return (ndimage.convolve(z.real.astype(np.float64), _LAPLACE, mode="wrap")
                + 1j * ndimage.convolve(z.imag.astype(np.float64), _LAPLACE, mode="wrap"))
    return ndimage.convolve(z.astype(np.float64), _LAPLACE, mode="wrap")


def noise_variance_map(image: np.ndarray, *, block: int = BLOCK) -> np.ndarray:
    """Local noise variance per ``block x block`` tile (Immerkaer's operator, edges trimmed).

    Returns a ``(rows // block, cols // block)`` map of the per-sample noise
    variance (complex: ``E|n|^2``); a SENSE reconstruction shows its g-factor
    pattern here (variance proportional to ``g^2``; Pruessmann et al. 1999).

    References
    ----------
    Immerkaer, CVIU 1996; Pruessmann et al., MRM 1999.
    """
    h = noise_operator(image)
    e = np.abs(h) ** 2 / 36.0
    ny, nx = e.shape[0] // block, e.shape[1] // block
    tiles = e[: ny * block, : nx * block].reshape(ny, block, nx, block)
    # the median of each tile, scaled to the mean of an exponential law (complex) or chi2(1)
    scale = np.log(2.0) if np.iscomplexobj(h) else 0.4549364
    return np.median(tiles, axis=(1, 3)) / scale


@dataclass
class FoldCoupling:
    """The strongest noise coupling across a folding distance in one image."""

    axis: str
    fold: int
    statistic: float
    p_value: float
    statistics: dict[str, list[float]]


def fold_coupling(image: np.ndarray, *, block: int = BLOCK) -> FoldCoupling:
    """Test whether the noise at pixels ``N/R`` apart is coupled (R = 2..6, both axes).

    The noise operator's output ``h`` is made robust by zeroing samples beyond
    the 99.9% point of the noise law (edges of the object). For each shift ``s``
    the products ``h(x) conj(h(x + s))`` are averaged in ``block x block`` tiles;
    under white noise each tile mean has expected squared magnitude
    ``E|h|^2 E|h|^2 sum(rho^2) / m`` (``rho``: the operator output's own
    autocorrelation at small lags, measured; ``m`` tile pixels), so the statistic
    ``T`` (mean over tiles of the squared tile mean over that expectation)
    is about 1, following a gamma law with shape equal to the number of tiles.
    Coupled noise (parallel-imaging reconstructions) gives ``T`` well above 1.

    Returns
    -------
    FoldCoupling
        The largest ``T`` over axes and folds, with its p-value (gamma tail,
        Bonferroni-corrected for the shifts tried).

    References
    ----------
    Pruessmann et al., MRM 1999 (unfolding couples the noise of superimposed
    pixels); Robson et al., MRM 2008; Immerkaer, CVIU 1996.
    """
    z = np.asarray(image)
    h = noise_operator(z)
    e = np.abs(h) ** 2
    mu = float(np.median(e)) / (np.log(2.0) if np.iscomplexobj(h) else 0.4549364)
    h = np.where(e > -np.log(1e-3) * mu * (1.0 if np.iscomplexobj(h) else 2.0), 0.0, h)
    ny, nx = h.shape
    m = block * block
    # the operator output's own correlation at lags up to 3 (includes any interpolation)
    e2 = float(np.mean(np.abs(h) ** 2))
    rho2 = 0.0
    for dy in range(-3, 4):
        for dx in range(-3, 4):
            r = np.mean(h * np.conj(np.roll(h, (dy, dx), axis=(0, 1)))) / e2
            rho2 += float(np.abs(r) ** 2)
    stats_: dict[str, list[float]] = {}
    best = (0.0, "rows", 2)
    n_tests = 0
    ty, tx = ny // block, nx // block
    for axis, size in (("rows", ny), ("cols", nx)):
        vals = []
        for fold in FOLDS:
            s = int(round(size / fold))
            if s < 4 or size < 2 * block:
                vals.append(float("nan"))
                continue
            shifted = np.roll(h, s, axis=0 if axis == "rows" else 1)
            prod = h * np.conj(shifted)
            tiles = prod[: ty * block, : tx * block].reshape(ty, block, tx, block).mean(axis=(1, 3))
            loc_e = (np.abs(h) ** 2)[: ty * block, : tx * block].reshape(ty, block, tx, block)
            loc_s = (np.abs(shifted) ** 2)[: ty * block, : tx * block].reshape(ty, block, tx,
                                                                              block)
            expect = loc_e.mean(axis=(1, 3)) * loc_s.mean(axis=(1, 3)) * rho2 / m
            ok = expect > 0
            t = float(np.mean(np.abs(tiles[ok]) ** 2 / expect[ok])) if ok.any() else float("nan")
            vals.append(t)
            n_tests += 1
            if np.isfinite(t) and t > best[0]:
                best = (t, axis, fold)
        stats_[axis] = vals
    n_tiles = max(1, ty * tx)
    t = best[0]
    # mean of n_tiles unit exponentials (complex) or chi2(1) (real): gamma law
    shape = n_tiles if np.iscomplexobj(h) else n_tiles / 2.0
    p = float(stats.gamma.sf(t, a=shape, scale=1.0 / shape)) * max(1, n_tests)
    return FoldCoupling(best[1], best[2], t, min(1.0, p), stats_)


# ----------------------------------------------------------------------------------------
# the analyser


def _frames(volume: Volume, scope: Any) -> list[np.ndarray]:
    """Up to two frames near the middle of the analysed ones (k-space centre slices)."""
    idx = np.asarray(getattr(scope, "frames", np.arange(volume.n_slices)))
    if idx.size == 0:
        return []
    mid = idx[len(idx) // 2: len(idx) // 2 + 1]
    out = []
    for _, block in volume.iter_slices(1, indices=mid):
        out.extend(np.asarray(b) for b in block)
    return out


def _to_kspace(frame: np.ndarray) -> np.ndarray:
    return sfft.fft2(frame.astype(np.complex128), axes=(-2, -1), norm="ortho")


def _to_image(frame: np.ndarray) -> np.ndarray:
    return sfft.ifft2(frame.astype(np.complex128), axes=(-2, -1), norm="ortho")


def _present_confidence(p: float) -> float:
    return float(min(0.999, max(0.5, 1.0 - p)))


@register(TRACE_ID, version="1", order=65, default_estimates=dict(DEFAULTS))
def analyse(volume: Volume, *, scope: Any, value_kind: ValueKind) -> Trace:
    """Say whether k-space samples were computed rather than measured.

    References
    ----------
    Griswold et al., MRM 2002; Lustig and Pauly, MRM 2010; Pruessmann et al.,
    MRM 1999; Robson et al., MRM 2008; Immerkaer, CVIU 1996.
    """
    kind = value_kind.domain
    if kind in ("magnitude", "real_signed", "unknown"):
        what = {"magnitude": "magnitude images", "real_signed": "real-valued images",
                "unknown": "data without finite values"}[kind]
        return inconclusive(TRACE_ID, f"Not measurable on {what}: the phase is gone, so their "
                            "k-space is Hermitian-symmetric by construction (the "
                            "magnitude-only trace reports that).", value_kind=kind)
    frames = _frames(volume, scope)
    if not frames:
        return inconclusive(TRACE_ID, "No frame to examine.")
    frame = frames[0]
    kspace = volume.domain == "kspace"
    multi = volume.coil_axis is not None and frame.ndim == 3 and frame.shape[0] >= 2
    if multi:
        return _multi_coil(frame if kspace else _to_kspace(frame), kspace)
    img = _to_image(frame) if kspace else frame.astype(np.complex128)
    if img.ndim == 3:
        img = img[0]
    return _single_image(img, kspace)


def _multi_coil(k: np.ndarray, kspace: bool) -> Trace:
    rows, cols = k.shape[-2:]
    if min(rows, cols) < MIN_LINES:
        return inconclusive(TRACE_ID, f"Too few lines ({rows} x {cols}) to predict each from "
                            "its neighbours.")
    sc = self_consistency(k)
    stat = sc.filled_fraction
    present = stat >= FILLED_SHARE and sc.p_value < FALSE_ALARM
    res = sc.residual
    evidence: dict[str, Any] = {
        "test": "self_consistency",
        "measured_on": "k-space" if kspace else "FFT of the coil images",
        "phase_encode_axis": sc.axis,
        "line_residual_over_noise": round_sig(np.where(np.isfinite(res), res, np.nan)),
        "filled_lines": [int(i) for i in np.flatnonzero(sc.filled)][:512],
        "zero_lines": int(sc.zero.sum()),
        "n_lines": sc.n_lines,
        "filled_residual_threshold": FILLED_RESIDUAL,
        "kernel_weights_per_coil": sc.parameters,
        "decision": decision("filled_line_fraction", stat, FILLED_SHARE,
                             false_alarm_rate=FALSE_ALARM, p_value=sc.p_value),
    }
    med = float(np.nanmedian(res)) if np.isfinite(res).any() else float("nan")
    if present:
        acc = sc.acceleration
        method = "parallel_imaging" if acc is not None else "other"
        pattern = (f"every line but one in {acc} outside a fully measured centre, the pattern "
                   f"of acceleration {acc}" if acc is not None else "with no periodic pattern")
        summary = (f"{100 * stat:.0f}% of the {sc.axis} lines are predicted from their "
                   f"neighbours below {FILLED_RESIDUAL:g} of the thermal noise ({pattern}): "
                   "those samples were computed by a reconstruction, not measured.")
        est = {"method": method, "acceleration": acc, "filled_fraction": round_sig(stat)}
        return Trace(TRACE_ID, "present", _present_confidence(sc.p_value), summary, est,
                     evidence)
    # absent: the chance that a fill of at least FILLED_SHARE of the lines would show as
    # few filled lines as seen (binomial, filled lines being found with probability 1)
    k_obs = int(sc.filled.sum())
    conf = 1.0 - float(stats.binom.cdf(k_obs, max(sc.n_lines, 1), FILLED_SHARE))
    summary = (f"Every phase-encode line carries its own noise: predicted from its neighbours, "
               f"the median line leaves {med:.2f} of the thermal noise variance "
               f"({k_obs} of {sc.n_lines} lines below {FILLED_RESIDUAL:g}): measured samples.")
    return Trace(TRACE_ID, "absent", max(0.5, conf), summary, dict(DEFAULTS), evidence)


def _single_image(img: np.ndarray, kspace: bool) -> Trace:
    rows, cols = img.shape
    if min(rows, cols) < 4 * BLOCK:
        return inconclusive(TRACE_ID, f"The image ({rows} x {cols}) is too small for the "
                            "noise-coupling test.")
    fc = fold_coupling(img)
    vmap = noise_variance_map(img)
    positive = vmap[vmap > 0]
    spread = (float(np.percentile(positive, 95) / np.percentile(positive, 5))
              if positive.size >= 8 else None)
    present = fc.p_value < FALSE_ALARM and fc.statistic >= MIN_COUPLING
    evidence: dict[str, Any] = {
        "test": "fold_coupling",
        "measured_on": "inverse FFT of the k-space" if kspace else "stored complex values",
        "coupling_by_fold": {"folds": list(FOLDS), **{a: round_sig(v) for a, v in
                                                       fc.statistics.items()}},
        "noise_variance_map": round_sig(vmap / (np.median(positive) if positive.size else 1.0)),
        "noise_variance_spread_95_5": round_sig(spread),
        "decision": decision("fold_noise_coupling", fc.statistic, MIN_COUPLING,
                             false_alarm_rate=FALSE_ALARM, p_value=fc.p_value),
    }
    if present:
        summary = (f"The noise of pixels 1/{fc.fold} of the field of view apart along the "
                   f"{fc.axis} is coupled ({fc.statistic:.1f} times what independent noise "
                   f"gives; local noise variance varies {spread or float('nan'):.1f}-fold): "
                   f"the image was unfolded by a parallel-imaging reconstruction at about "
                   f"R = {fc.fold}.")
        est = {"method": "parallel_imaging", "acceleration": fc.fold,
               "filled_fraction": round_sig(1.0 - 1.0 / fc.fold)}
        return Trace(TRACE_ID, "present", _present_confidence(fc.p_value), summary, est,
                     evidence)
    # model-based: logistic in the statistic's distance below the threshold, in units of
    # the null law's standard deviation (until a calibration map is fitted)
    n_tiles = max(1, (rows // BLOCK) * (cols // BLOCK))
    sd = 1.0 / np.sqrt(n_tiles)
    conf = float(1.0 / (1.0 + np.exp(-(MIN_COUPLING - fc.statistic) / (4 * sd))))
    summary = (f"The noise of pixels one reduced field of view apart is independent "
               f"(largest coupling {fc.statistic:.2f} times that of independent noise, at "
               f"1/{fc.fold} along the {fc.axis}): no sign of parallel-imaging unfolding.")
    return Trace(TRACE_ID, "absent", conf, summary, dict(DEFAULTS), evidence)
