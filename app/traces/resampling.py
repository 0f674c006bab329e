"""Resampling: spline or linear interpolation onto a new grid (reslicing, rotation, zoom).

Interpolating samples onto a new grid makes each output sample a fixed linear
combination of its input neighbours, with weights that repeat with the grid's
phase; the residual of a linear predictor is then periodically small, and the
spectrum of a map of "how predictable is this sample" shows peaks at the
periodicity (Popescu and Farid 2005). Kirchner (2008) showed that a *fixed*
predictor suffices, which makes the test fast and vectorised; this module follows
Kirchner's variant:

1. residual ``e = x - sum(alpha * neighbours)`` of a linear predictor over the 5 x 5
   neighbourhood, fitted once by least squares over the analysed frames (the
   maximisation step of Popescu and Farid's EM with uniform weights; Kirchner's
   fixed 3 x 3 predictor, 0.5 for the 4-neighbours and -0.25 for the diagonals, is
   used as well). The fitted predictor adapts to cubic-spline kernels, whose
   traces the fixed one barely sees; the fixed one keeps exact 2x linear
   interpolation, whose midpoints the compromise fit blurs; the larger of the two
   peak ratios below counts;
2. p-map ``p = exp(-(e / (2 s))**2)``, ``s`` the median absolute residual (a scale-free
   version of Kirchner's ``lambda exp(-|e|**tau / sigma)`` with ``tau = 2``);
3. the magnitude of the 2D DFT of ``p`` averaged over a bounded, stated subset of
   frames, divided by its local median (7 x 7) so that a peak stands out from the
   image's own spectrum;
4. a peak of that ratio above ``PEAK_RATIO`` on the frequency axes, or off them
   above a threshold falling from ``PEAK_RATIO`` for one frame to ``OFF_AXIS_RATIO``
   for four or more (averaging frames thins the noise tail), away from the lowest
   frequencies, calls resampling.
   A peak on the ``f_rows = 0`` line at ``f`` cycles/sample means the columns were
   scaled: the interpolation phase ``frac(n / s)`` repeats with
   frequency ``|1/s - round(1/s)|``, so ``s = 1 / (1 - f)`` for ``1 < s <= 2`` (reported;
   ``1 / f`` is the alias for ``s >= 2``, listed in the evidence: the two cannot be told
   apart, as Popescu and Farid note). Peaks off both axes (rotation, oblique
   reslicing) call resampling with factor 1 on the axes.

A second test (:mod:`app.traces.neighbour_correlation`) reads the periodic
correlation between neighbouring samples of the normalised noise residual, which
interpolation creates and spatially varying weights do not. It calls resampling
on its own; a p-map peak counts only where that spectrum is raised beyond its own
null (``CONFIRM_ALPHA``), or when every p-map peak lies off the axes (rotation).
A p-map periodicity it does not confirm (weights interpolated on a coarse grid,
as adaptive coil combination computes them) makes the call ``inconclusive``. The
same test along the slice axis of a volume (``(slices, cols)`` sections) reports
through-plane reslicing as a ``slices`` factor. k-space input is tested on the
image its inverse FFT makes.

Zero-filling is interpolation too (by sinc, shift-invariant): it leaves no periodic
predictor residual, and is left to the ``zero_filling`` trace. It does leave a weak
line of raised p-map spectrum at twice its band edge (the residual of a band-limited
image is narrow-band near the band edge, and its square doubles that frequency),
which is why ``PEAK_RATIO`` (on the axes, where those lines cross) is set well
above what raw images show. Other periodic processing leaves peaks too. JPEG's
8 x 8 blocks leave them at multiples of 1/8; when the lossy analyser (which runs
first) found a block grid in the pixels, those bins are set aside. A later JPEG
step also erases the peaks of an earlier resampling (rounding to the quantiser
lattice), so resampling before JPEG goes unseen. A peak at the
Nyquist frequency that reads as a 2x scaling, seen on pydicom's MR2_UNCI.dcm and
MR2_J2KI.dcm but not on MR2_UNCR.dcm (by the names, from memory: the irreversible
JPEG 2000 image and its uncompressed counterpart, so likely the wavelet's dyadic
structure rather than a grid scaling). NaN samples (outside
a resliced field of view) are excluded from the p-map.

References
----------
.. [1] Popescu, A. C. and Farid, H. "Exposing digital forgeries by detecting traces
   of resampling", IEEE Trans. Signal Processing 53(2):758-767, 2005.
.. [2] Kirchner, M. "Fast and reliable resampling detection by spectral analysis of
   fixed linear predictor residue", Proc. 10th ACM Workshop on Multimedia and
   Security (MM&Sec), 11-20, 2008.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import scipy.fft as sfft
from scipy import ndimage

from app.io.volume import Volume
from app.traces import neighbour_correlation as nc
from app.traces import spectrum as sp
from app.traces.base import Trace, inconclusive, register
from app.traces.context import Notes, Scope, evenly_spaced
from app.traces.header import HeaderFacts
from app.traces.jpeg_pixels import PixelFinding
from app.traces.neighbour_correlation import centrosymmetric_median
from app.traces.rounding import round_sig
from app.traces.support import FOUND_SUPPORT, AxisSupport

TRACE_ID = "resampling"
#: Kirchner's fixed linear predictor (MM&Sec 2008, section 4), the fallback
KIRCHNER_PREDICTOR = np.array([[-0.25, 0.5, -0.25], [0.5, 0.0, 0.5], [-0.25, 0.5, -0.25]])
#: neighbourhood radius of the fitted predictor (5 x 5)
PREDICTOR_RADIUS = 2
PEAK_RATIO = 8.0
OFF_AXIS_RATIO = 5.0
LOW_FREQ = 0.04
MAX_FRAMES = 6
MIN_FRAMES = 4
#: frequency tolerance (cycles/sample) around a periodicity explained by zero-filling
EXPLAINED_TOL = 0.015
MAX_SIDE = 256
#: a p-map peak counts only where the neighbour-correlation spectrum is raised beyond
#: what its own bins reach by chance at this family-wise false-alarm rate (the
#: exponential tail of :func:`_confirm_p_value` is lighter than the texture-driven
#: tail of real correlation spectra, so the level is strict: set on the second
#: simulator's development split, where adaptive coil combinations reached 7e-4)
CONFIRM_ALPHA = 1e-4
#: contiguous slices read for the through-plane test (and the fewest it needs)
THROUGH_SLICES = 64
MIN_THROUGH_SLICES = 16
#: frames narrower than this (samples, either side) are not tested: the p-map spectrum's
#: 7 x 7 local median and the low-frequency exclusion leave too few bins per axis for a
#: periodic peak to stand out, so a pixel call there would be a guess (our own power
#: argument, no source; 16 x 16 thumbnails downsized from 256 x 256 were called
#: absent with confidence)
MIN_SIDE = 32
DEFAULT_ESTIMATES: dict[str, Any] = {"rows": {"factor": None}, "cols": {"factor": None}}


@dataclass
class ResamplingResult:
    """The p-map spectrum and the peaks found in it.

    Attributes
    ----------
    ratio : ndarray
        ``(rows, cols)`` p-map spectrum over its local median, centred (DC at ``n // 2``).
    peak_ratio : float
        Strongest ratio away from the lowest frequencies.
    peaks : list of (float, float, float)
        ``(f_rows, f_cols, ratio)`` of peaks above ``PEAK_RATIO`` (cycles/sample).
    axis_freq : dict
        ``rows``/``cols`` -> frequency of the strongest on-axis peak, or None.
    n_frames : int
    """

    ratio: np.ndarray
    peak_ratio: float
    peaks: list[tuple[float, float, float]]
    axis_freq: dict[str, float | None]
    n_frames: int
    n_tested: int = 0
    off_axis_threshold: float = OFF_AXIS_RATIO
    on_axis_threshold: float = PEAK_RATIO
    excess: float = 0.0
    n_on_axis: int = 0
    tail: tuple[float, float, float] = (1.0, 1.0, 0.1)
    notes: list[str] = field(default_factory=list)


def _offsets(radius: int) -> list[tuple[int, int]]:
    return [(dy, dx) for dy in range(-radius, radius + 1) for dx in range(-radius, radius + 1)
            if (dy, dx) != (0, 0)]


def fit_predictor(frames: list[np.ndarray], *, radius: int = PREDICTOR_RADIUS,
                  max_samples: int = 40_000, seed: int = 0) -> np.ndarray:
    """Least-squares linear predictor of each sample from its neighbours, over all frames.

    This is the maximisation step of Popescu and Farid's EM with uniform weights:
    one global predictor, fitted on a random subset of samples whose neighbours are
    all finite. It adapts to the interpolation kernel (linear or cubic spline)
    better than a fixed predictor.

    Returns
    -------
    ndarray
        ``(2 r + 1, 2 r + 1)`` kernel with 0 at the centre, for ``scipy.ndimage.correlate``.

    References
    ----------
    .. [1] Popescu and Farid, IEEE Trans. Signal Processing 53(2):758-767, 2005.
    """
    rng = np.random.default_rng(seed)
    offs = _offsets(radius)
    xs, ys = [], []
    per = max(1, max_samples // max(1, len(frames)))
    for f in frames:
        x = np.ascontiguousarray(f, dtype=np.float64)
        rows, cols = x.shape
        finite = np.isfinite(x)
        if finite.all():  # the interior, in the row-major order np.nonzero gives
            iy = np.repeat(np.arange(radius, rows - radius), max(0, cols - 2 * radius))
            ix = np.tile(np.arange(radius, cols - radius), max(0, rows - 2 * radius))
        else:
            ok = ndimage.minimum_filter(finite.astype(np.uint8), size=2 * radius + 1,
                                        mode="constant", cval=0)
            iy, ix = np.nonzero(ok)
        if len(iy) > per:
            pick = rng.choice(len(iy), per, replace=False)
            iy, ix = iy[pick], ix[pick]
        flat = iy * cols + ix
        steps = np.array([dy * cols + dx for dy, dx in offs])
        xs.append(x.ravel()[flat[:, None] + steps[None, :]])
        ys.append(x.ravel()[flat])
    X, y = np.concatenate(xs), np.concatenate(ys)
    k = (2 * radius + 1) ** 2
    if len(y) < 4 * k or not np.any(X):
        return _pad_kernel(KIRCHNER_PREDICTOR, radius)
    coef, *_ = np.linalg.lstsq(X.T @ X, X.T @ y, rcond=None)
    full = np.insert(coef, (k - 1) // 2, 0.0)
    return full.reshape(2 * radius + 1, 2 * radius + 1)


def _pad_kernel(kernel: np.ndarray, radius: int) -> np.ndarray:
    pad = radius - kernel.shape[0] // 2
    return np.pad(kernel, pad) if pad > 0 else kernel


def pmap(image: np.ndarray, predictor: np.ndarray | None = None) -> np.ndarray:
    """Kirchner's p-map of one image (NaN-safe): near 1 where the predictor is exact.

    Parameters
    ----------
    image : ndarray
    predictor : ndarray, optional
        Correlation kernel with 0 at the centre; Kirchner's fixed 3 x 3 by default.

    References
    ----------
    .. [1] Kirchner, M. Proc. ACM MM&Sec, 11-20, 2008.
    """
    kernel = KIRCHNER_PREDICTOR if predictor is None else predictor
    x = np.asarray(image, dtype=np.float64)
    finite = np.isfinite(x)
    if finite.all():  # the common case: no masking of the residual needed
        e = x - ndimage.correlate(x, kernel, mode="reflect")
        ae = np.abs(e).ravel()
        scale = float(np.median(ae, overwrite_input=True))  # ae is scratch
        if not np.isfinite(scale) or scale <= 0:
            nz = ae[ae != 0]
            scale = float(np.median(nz)) if nz.size else 1.0
        e *= 1.0 / (2.0 * scale)
        np.square(e, out=e)
        np.negative(e, out=e)
        return np.exp(e, out=e)
    x0 = np.where(finite, x, 0.0)
    e = x0 - ndimage.correlate(x0, kernel, mode="reflect")
    valid = ndimage.minimum_filter(finite.astype(np.uint8), size=kernel.shape[0],
                                   mode="nearest") > 0
    scale = np.median(np.abs(e[valid])) if valid.any() else 0.0
    if not np.isfinite(scale) or scale <= 0:
        nz = np.abs(e[valid & (e != 0)])
        scale = float(np.median(nz)) if nz.size else 1.0
    p = np.exp(-((e / (2.0 * scale)) ** 2))
    fill = float(p[valid].mean()) if valid.any() else 0.0
    return np.where(valid, p, fill)


def _frames(volume: Volume, scope: Scope) -> tuple[list[np.ndarray], list[str]]:
    idx = np.asarray(scope.frames)
    notes = []
    # one frame in eight, at least MIN_FRAMES, at most MAX_FRAMES
    keep = min(MAX_FRAMES, max(MIN_FRAMES, int(np.ceil(len(idx) / 8))))
    if len(idx) > keep:
        idx = evenly_spaced(idx, keep)
        notes.append(f"resampling analysed {len(idx)} of {volume.n_slices} frames, evenly spaced")
    frames = []
    for _, block in volume.iter_slices(scope.batch, indices=idx):
        for f in block:
            if volume.domain == "kspace":
                # the image the k-space makes (a circular shift of it when the k-space
                # is not centred, which leaves the periodicities unchanged)
                f = sfft.ifft2(np.asarray(f), axes=(-2, -1), workers=scope.workers)
            img = np.abs(f) if np.iscomplexobj(f) else f
            if img.ndim == 3:  # coils: root-sum-of-squares
                img = np.sqrt((np.abs(img) ** 2).sum(axis=0))
            frames.append(img)
    rows, cols = frames[0].shape
    if rows > MAX_SIDE or cols > MAX_SIDE:
        r0, c0 = max(0, (rows - MAX_SIDE) // 2), max(0, (cols - MAX_SIDE) // 2)
        frames = [f[r0:r0 + MAX_SIDE, c0:c0 + MAX_SIDE] for f in frames]
        notes.append(f"resampling analysed the central {MAX_SIDE} x {MAX_SIDE} samples")
    return frames, notes


def _ratio(frames: list[np.ndarray], predictor: np.ndarray, workers: int) -> np.ndarray:
    """Mean p-map spectrum magnitude over its 7 x 7 local median, centred."""
    stack = np.stack([pmap(f, predictor) for f in frames]).astype(np.float32)
    stack -= stack.mean(axis=(1, 2), keepdims=True)
    half = np.abs(sfft.rfft2(stack, workers=workers)).mean(axis=0)
    mag = sfft.fftshift(sp.expand_half(half, stack.shape[-1]))
    bg = centrosymmetric_median(mag, 7)
    top = float(mag.max())
    if not np.isfinite(top) or top <= 0:  # a constant image: no p-map structure at all
        return np.zeros_like(mag)
    return mag / np.maximum(bg, 1e-12 * top)


def zero_fill_frequency(factor: float) -> float:
    """Frequency (cycles/sample, folded to [0, 0.5]) of the p-map periodicity that an
    interpolation by ``factor`` leaves: ``|1/s - round(1/s)|`` (Popescu and Farid 2005).
    Zero-filling k-space by ``factor`` is such an interpolation (by a sinc kernel)."""
    inv = 1.0 / float(factor)
    return float(abs(inv - np.round(inv)))


def detect(frames: list[np.ndarray], *, workers: int = 2,
           exclude_block_grid: bool = False,
           explained: dict[str, float] | None = None) -> ResamplingResult:
    """Kirchner's spectral test on a list of equally sized 2D frames.

    With ``exclude_block_grid``, frequencies within one bin of multiples of 1/8
    cycles/sample on both axes are left out: an 8 x 8 block transform (JPEG)
    leaves periodic peaks there that are not interpolation. ``explained`` maps
    ``rows``/``cols`` to a frequency that another finding already accounts for
    (zero-filling, see :func:`zero_fill_frequency`): peaks whose coordinate on
    each axis is near 0 or near that axis's explained frequency are left out.

    References
    ----------
    .. [1] Kirchner, M. Proc. ACM MM&Sec, 11-20, 2008.
    .. [2] Popescu and Farid, IEEE Trans. Signal Processing 53(2):758-767, 2005.
    """
    return find_peaks(spectrum_ratio(frames, workers=workers), len(frames),
                      exclude_block_grid=exclude_block_grid, explained=explained)


def spectrum_ratio(frames: list[np.ndarray], *, workers: int = 2) -> np.ndarray:
    """The p-map spectrum over its local median, the larger of Kirchner's fixed
    predictor's and the fitted predictor's (the costly half of :func:`detect`)."""
    return np.maximum(_ratio(frames, KIRCHNER_PREDICTOR, workers),
                      _ratio(frames, fit_predictor(frames), workers))


def find_peaks(ratio: np.ndarray, n_frames: int, *, exclude_block_grid: bool = False,
               explained: dict[str, float] | None = None,
               exclude_dyadic: bool = False) -> ResamplingResult:
    """The peaks of :func:`spectrum_ratio` that count as interpolation (see :func:`detect`).

    With ``exclude_dyadic``, bins whose coordinates are both within one bin of 0,
    1/4 or 1/2 cycles/sample are set aside: the dyadic wavelet decomposition of
    JPEG 2000 (ISO/IEC 15444-1 Annex F), with its deadzone quantiser zeroing
    high-band coefficients, leaves periodicities at those frequencies.
    """
    rows, cols = ratio.shape
    fy = (np.arange(rows) - rows // 2) / rows
    fx = (np.arange(cols) - cols // 2) / cols
    far = np.sqrt(fy[:, None] ** 2 + fx[None, :] ** 2) >= LOW_FREQ
    r = np.where(far, ratio, 0.0)
    if exclude_block_grid:
        def on_grid(f: np.ndarray, n: int) -> np.ndarray:
            return np.abs(f * 8 - np.round(f * 8)) <= 8.0 / n + 1e-9
        r = np.where(on_grid(fy, rows)[:, None] & on_grid(fx, cols)[None, :], 0.0, r)
    if exclude_dyadic:
        def dyadic(f: np.ndarray, n: int) -> np.ndarray:
            return np.abs(np.abs(f) * 4 - np.round(np.abs(f) * 4)) <= 4.0 / n + 1e-9
        r = np.where(dyadic(fy, rows)[:, None] & dyadic(fx, cols)[None, :], 0.0, r)
    if explained:
        def near(f: np.ndarray, n: int, ax: str) -> np.ndarray:
            out = np.abs(f) <= 1.0 / n + 1e-9
            if explained.get(ax) is not None:
                tol = max(2.0 / n, EXPLAINED_TOL)
                out |= np.abs(np.abs(f) - explained[ax]) <= tol
            return out
        r = np.where(near(fy, rows, "rows")[:, None] & near(fx, cols, "cols")[None, :], 0.0, r)
    peak_ratio = float(r.max())
    # local maxima above the threshold, one half-plane (the spectrum is symmetric);
    # off the axes a lower threshold holds (band-limited images raise only axis lines)
    on_axis = (np.abs(np.arange(rows) - rows // 2)[:, None] <= 1) | (
        np.abs(np.arange(cols) - cols // 2)[None, :] <= 1)
    # fewer averaged frames leave a heavier noise tail: off-axis threshold from 8 (one
    # frame) down to OFF_AXIS_RATIO (four or more)
    off = max(OFF_AXIS_RATIO, PEAK_RATIO - (n_frames - 1))
    threshold = np.where(on_axis, PEAK_RATIO, off)
    locmax = (r == ndimage.maximum_filter(r, size=3, mode="wrap")) & (r >= threshold)
    # the half-plane f_rows > 0 (plus its edge lines, Nyquist included)
    locmax &= ((fy[:, None] > 0) | (fy[:, None] == -0.5)
               | ((fy[:, None] == 0) & ((fx[None, :] > 0) | (fx[None, :] == -0.5))))
    iy, ix = np.nonzero(locmax)
    order = np.argsort(-r[iy, ix])
    peaks = [(float(fy[iy[i]]), float(fx[ix[i]]), float(r[iy[i], ix[i]])) for i in order[:20]]
    axis_freq: dict[str, float | None] = {"rows": None, "cols": None}
    for i in order[:20]:
        y, x = int(iy[i]), int(ix[i])
        if abs(y - rows // 2) <= 1 and axis_freq["cols"] is None:
            axis_freq["cols"] = _refine(r[y], x, cols)
        if abs(x - cols // 2) <= 1 and axis_freq["rows"] is None:
            axis_freq["rows"] = _refine(r[:, x], y, rows)
    # the same half-plane as the peaks, Nyquist lines included (a 2x scaling peaks there)
    half = far & ((fy[:, None] > 0) | (fy[:, None] == -0.5)
                  | ((fy[:, None] == 0) & ((fx[None, :] > 0) | (fx[None, :] == -0.5))))
    n_tested = int(np.count_nonzero(half))
    n_on = int(np.count_nonzero(half & on_axis))
    norm = (r / threshold)[half]
    excess = float(norm.max()) if norm.size else 0.0
    tail = _tail_model(norm)
    return ResamplingResult(ratio, peak_ratio, peaks, axis_freq, n_frames, n_tested,
                            float(off), float(PEAK_RATIO), excess, n_on, tail=tail)


def _tail_model(values: np.ndarray) -> tuple[float, float, float]:
    """An exponential tail fitted to the bins' own threshold-normalised ratios.

    Returns ``(u, beta, share)``: above the 90th percentile ``u`` a bin exceeds
    ``v`` with probability ``share * exp(-(v - u) / beta)``, ``beta`` the mean
    excess over ``u`` of the bins between the 90th and 99.5th percentiles (the top
    half-percent, where interpolation peaks sit, is left out of the fit). A
    peaks-over-threshold model of the spectrum's own background (common practice,
    no source), so the null follows each image's texture rather than white noise.
    """
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v)]
    if v.size < 50:
        return (1.0, 1.0, 0.1)
    u, top = np.percentile(v, [90.0, 99.5])
    body = v[(v > u) & (v <= top)]
    beta = float(np.mean(body - u)) if body.size else 0.0
    return (float(u), max(beta, 1e-3), 0.1)


def _refine(line: np.ndarray, i: int, n: int) -> float:
    """Sub-bin peak frequency |f| by a parabola through the peak and its neighbours."""
    a, b, c = line[(i - 1) % n], line[i], line[(i + 1) % n]
    den = a - 2 * b + c
    delta = 0.5 * (a - c) / den if den < 0 else 0.0
    f = abs((i - n // 2 + float(np.clip(delta, -0.5, 0.5))) / n)
    return float(min(0.5, 1.0 - f if f > 0.5 else f))


def factor_from_frequency(f: float) -> tuple[float, float]:
    """Scale factors explaining a periodicity at ``f`` cycles/sample: ``(1/(1-f), 1/f)``.

    The first lies in (1, 2], the second in [2, inf); they alias to the same
    frequency (Popescu and Farid 2005).
    """
    f = float(np.clip(f, 1e-6, 0.5))
    return 1.0 / (1.0 - f), 1.0 / f


def _axis_evidence(ratio: np.ndarray, axis: str, peaks: list) -> dict[str, Any]:
    rows, cols = ratio.shape
    if axis == "cols":
        line = ratio[rows // 2 - 1:rows // 2 + 2, cols // 2:].max(axis=0)
        freq = np.arange(len(line)) / cols
        pk = [abs(p[1]) for p in peaks if abs(p[0]) <= 1.5 / rows]
    else:
        line = ratio[rows // 2:, cols // 2 - 1:cols // 2 + 2].max(axis=1)
        freq = np.arange(len(line)) / rows
        pk = [abs(p[0]) for p in peaks if abs(p[1]) <= 1.5 / cols]
    line = sp.downsample_mean(line, 512)
    freq = sp.downsample_mean(freq, 512)
    return {"freq": sp.round_sig(freq), "power": sp.round_sig(line),
            "peaks": sp.round_sig(np.asarray(pk)) if pk else []}


def decision_of(result: ResamplingResult) -> dict[str, Any]:
    """The trace's decision: statistic, threshold, false-alarm rate and p-value.

    The statistic is the largest ratio of a p-map spectrum bin to its threshold
    (on the axes ``PEAK_RATIO``, off them the frame-dependent off-axis threshold),
    so ``1.0`` is the threshold. The p-value is family-wise over the ``M`` bins
    tested, ``1 - (1 - q(v)) ** M``, with ``q`` the exponential tail fitted to the
    image's own bins (:func:`_tail_model`); the false-alarm rate is the same at
    the threshold.

    References
    ----------
    Kirchner 2008 (the p-map spectrum); peaks over threshold with an exponential
    tail (common practice, no source).
    """
    u, beta, share = result.tail
    m = max(1, result.n_tested)

    def family(v: float) -> float:
        q = share * float(np.exp(-(v - u) / beta)) if v > u else 1.0
        q = min(q, 1.0 - 1e-12)
        return float(-np.expm1(m * np.log1p(-q)))

    return {"statistic": "peak_ratio_over_threshold", "value": round(result.excess, 4),
            "threshold": 1.0, "false_alarm_rate": family(1.0),
            "p_value": family(max(result.excess, 0.0))}


def _confidence(status: str, decision: dict[str, Any]) -> float:
    """The probability that ``status`` is right: a calibration map on the decision
    statistic when one is fitted, else from the p-value (present: ``1 - p``;
    absent: ``(1 + p) / 2``, the chance of the null at even prior odds when the
    test's power is unknown, never above what the data allow)."""
    from app.traces.calibration import confidence_for

    p = float(decision["p_value"])
    fallback = 1.0 - p if status == "present" else 0.5 * (1.0 + p)
    return confidence_for(TRACE_ID, status, decision["value"], fallback,
                          statistic=decision["statistic"])


def factor_candidates(f: float) -> list[float]:
    """Every scale factor whose interpolation leaves a periodicity at ``f``.

    ``|1/s - round(1/s)| = f`` holds for the upsampling factors ``1/(1-f)`` and
    ``1/f`` and the downsampling factors ``1/(1+f)`` and ``1/(2-f)`` (the aliases
    Popescu and Farid 2005 and Kirchner 2008 note cannot be told apart by the
    periodicity alone).
    """
    f = float(np.clip(f, 1e-6, 0.5))
    vals = [1.0 / (1.0 - f), 1.0 / f, 1.0 / (1.0 + f), 1.0 / (2.0 - f)]
    out: list[float] = []
    for v in vals:
        if all(abs(v - o) > 1e-3 for o in out):
            out.append(round(v, 4))
    return out


def trace_from(result: ResamplingResult) -> Trace:
    """Build the ``resampling`` trace from a detection result."""
    estimates: dict[str, Any] = {}
    alternatives: dict[str, Any] = {}
    for ax in ("rows", "cols"):
        f = result.axis_freq[ax]
        if f is None:
            estimates[ax] = {"factor": 1.0}
            alternatives[ax] = None
        else:
            s1, _ = factor_from_frequency(f)
            estimates[ax] = {"factor": round(s1, 4)}
            alternatives[ax] = factor_candidates(f)
    evidence = {
        "periodicity": {ax: _axis_evidence(result.ratio, ax, result.peaks)
                        for ax in ("rows", "cols")},
        "peak_ratio": sp.round_sig(result.peak_ratio),
        "threshold": PEAK_RATIO,
        "peaks_2d": [[sp.round_sig(a), sp.round_sig(b), sp.round_sig(c)]
                     for a, b, c in result.peaks],
        "factor_alternatives": alternatives,
        "n_frames": result.n_frames,
        "decision": decision_of(result),
    }
    if result.peaks:
        on_axis = [ax for ax in ("rows", "cols") if result.axis_freq[ax] is not None]
        if on_axis:
            parts = ", ".join(f"{ax} x{estimates[ax]['factor']:.3g}" for ax in on_axis)
            alias = "; ".join(f"{ax}: {', '.join(f'{v:.3g}' for v in alternatives[ax])}"
                              for ax in on_axis)
            summary = (f"Periodic interpolation correlations: the grid was scaled ({parts}); "
                       f"the periodicity fits these factors alike, up or down ({alias}).")
        else:
            summary = ("Periodic interpolation correlations off the grid axes: the image "
                       "was rotated or resliced obliquely.")
        conf = _confidence("present", evidence["decision"])
        return Trace(TRACE_ID, "present", conf, summary, estimates, evidence)
    summary = "No periodic interpolation correlations: no spline or linear resampling found."
    conf = _confidence("absent", evidence["decision"])
    return Trace(TRACE_ID, "absent", conf, summary, estimates, evidence)


def _peak_support(cratio: np.ndarray, peaks: list[tuple[float, float, float]]) -> float:
    """The largest neighbour-correlation ratio within one bin of the given peaks."""
    rows, cols = cratio.shape
    best = 0.0
    for fy, fx, _ in peaks:
        for sy in (1, -1):  # the spectrum is centrosymmetric; look at both copies
            iy = int(round(sy * fy * rows)) + rows // 2
            ix = int(round(sy * fx * cols)) + cols // 2
            win = cratio[np.ix_(np.arange(iy - 1, iy + 2) % rows,
                                np.arange(ix - 1, ix + 2) % cols)]
            best = max(best, float(win.max()))
    return best


def _confirm_p_value(cratio: np.ndarray, value: float, m: int) -> float:
    """Family-wise p-value of the largest of ``m`` correlation-spectrum bins reaching ``value``.

    The null is the spectrum's own bins away from the lowest frequencies: an
    exponential tail above their 90th percentile (peaks over threshold, common
    practice, no source), as in :func:`_tail_model`.
    """
    rows, cols = cratio.shape
    fy = (np.arange(rows) - rows // 2) / rows
    fx = (np.arange(cols) - cols // 2) / cols
    far = np.sqrt(fy[:, None] ** 2 + fx[None, :] ** 2) >= LOW_FREQ
    u, beta, share = _tail_model(cratio[far & (fy[:, None] >= 0)])
    q = share * float(np.exp(-(value - u) / beta)) if value > u else 1.0
    q = min(q, 1.0 - 1e-12)
    return float(-np.expm1(max(1, m) * np.log1p(-q)))


def _through_plane(volume: Volume, scope: Scope, notes: Notes) -> ResamplingResult | None:
    """The neighbour-correlation test along the slice axis of a volume, or None.

    Reads up to ``THROUGH_SLICES`` contiguous slices around the middle (an image
    stack needs at least ``MIN_THROUGH_SLICES``), cuts ``(slices, cols)``
    sections and keeps only the frequencies along the slice axis, so a periodic
    correlation between slices (a volume resliced along that axis) is what counts.
    """
    n = volume.n_slices
    if volume.domain != "image" or n < MIN_THROUGH_SLICES:
        return None
    take = min(THROUGH_SLICES, n)
    start = (n - take) // 2
    idx = np.arange(start, start + take)
    parts = []
    for _, block in volume.iter_slices(scope.batch, indices=idx):
        for f in block:
            img = np.abs(f) if np.iscomplexobj(f) else np.asarray(f, dtype=np.float64)
            if img.ndim == 3:
                img = np.sqrt((np.abs(img) ** 2).sum(axis=0))
            rows, cols = img.shape
            r0, c0 = max(0, (rows - MAX_SIDE) // 2), max(0, (cols - MAX_SIDE) // 2)
            parts.append(img[r0:r0 + MAX_SIDE, c0:c0 + MAX_SIDE])
    stack = np.stack(parts)
    if take < n:
        notes.add(f"resampling tested the slice axis on {take} contiguous of {n} slices")
    sections = nc.through_plane_frames(stack)
    ratio = nc.correlation_ratio(sections, workers=scope.workers)
    cols = ratio.shape[1]
    keep = np.zeros_like(ratio)
    keep[:, cols // 2 - 1:cols // 2 + 2] = ratio[:, cols // 2 - 1:cols // 2 + 2]
    return find_peaks(keep, len(sections))


def trace_from_tests(pm: ResamplingResult, cr: ResamplingResult, cratio: np.ndarray,
                     through: ResamplingResult | None = None) -> Trace:
    """Join the p-map test, the neighbour-correlation test and the through-plane test.

    In-plane, the neighbour-correlation test (:mod:`app.traces.neighbour_correlation`)
    calls resampling on its own. A p-map peak counts only where the correlation
    spectrum is raised too (``CONFIRM_ALPHA``), or where every p-map peak lies off
    the frequency axes (a rotation; see below): spatially varying weights that were
    themselves interpolated (an adaptive coil combination on a coarse grid) give
    p-map peaks without any correlation between neighbours, and are not a
    resampling of the grid. A p-map periodicity left unconfirmed makes the call
    ``inconclusive`` (said in the summary), never ``present``. The through-plane
    test reports the factor along the slice axis as ``slices``.

    References
    ----------
    .. [1] Kirchner, M. Proc. ACM MM&Sec, 11-20, 2008.
    .. [2] Popescu and Farid, IEEE Trans. Signal Processing 53(2):758-767, 2005.
    """
    support_value = _peak_support(cratio, pm.peaks) if pm.peaks else 0.0
    confirm_p = _confirm_p_value(cratio, support_value, 9 * len(pm.peaks)) if pm.peaks else 1.0
    # weights interpolated on a rectangular grid put their strongest periodicity on the
    # frequency axes; a rotation puts every peak off them, where the p-map alone counts
    rows, cols = pm.ratio.shape
    rotation_only = bool(pm.peaks) and all(
        abs(fy) > 1.5 / rows and abs(fx) > 1.5 / cols for fy, fx, _ in pm.peaks)
    confirmed = bool(pm.peaks) and (confirm_p <= CONFIRM_ALPHA or rotation_only)
    if cr.peaks:
        primary, basis = cr, "neighbour correlation"
    elif confirmed:
        primary, basis = pm, "p-map, confirmed by the neighbour correlation"
    else:
        primary, basis = (cr, "neighbour correlation")
    axis_freq = dict(primary.axis_freq)
    if confirmed:
        for ax in ("rows", "cols"):
            if axis_freq[ax] is None:
                axis_freq[ax] = pm.axis_freq[ax]
    merged = ResamplingResult(primary.ratio, primary.peak_ratio,
                              list(primary.peaks) if (cr.peaks or confirmed) else [],
                              axis_freq if (cr.peaks or confirmed) else
                              {"rows": None, "cols": None},
                              primary.n_frames, primary.n_tested, primary.off_axis_threshold,
                              primary.on_axis_threshold, primary.excess, primary.n_on_axis,
                              tail=primary.tail)
    if confirmed and pm.excess > cr.excess:
        merged.excess, merged.tail, merged.n_tested = pm.excess, pm.tail, pm.n_tested
    if not (cr.peaks or confirmed):
        merged.excess = min(cr.excess, 0.999) if pm.peaks else cr.excess
    slice_found = through is not None and through.axis_freq["rows"] is not None
    if slice_found and not merged.peaks:
        merged.excess, merged.tail, merged.n_tested = through.excess, through.tail, \
            through.n_tested
    trace = trace_from(merged)
    ev = trace.evidence
    ev["periodicity"] = {ax: _axis_evidence(pm.ratio, ax, pm.peaks) for ax in ("rows", "cols")}
    ev["neighbour_correlation"] = {
        ax: _axis_evidence(cr.ratio, ax, cr.peaks) for ax in ("rows", "cols")}
    ev["tests"] = {
        "pmap": {"value": round(pm.excess, 4), "peaks": len(pm.peaks)},
        "neighbour_correlation": {"value": round(cr.excess, 4), "peaks": len(cr.peaks)},
        "pmap_peak_correlation_ratio": round(support_value, 3),
        "pmap_peak_correlation_p_value": round_sig(confirm_p, 3),
        "pmap_peaks_off_axes_only": rotation_only,
        "confirm_alpha": CONFIRM_ALPHA,
        "through_plane": None if through is None else {
            "value": round(through.excess, 4),
            "frequency": None if through.axis_freq["rows"] is None
            else round(through.axis_freq["rows"], 4)},
        "basis": basis,
    }
    if slice_found:
        f = through.axis_freq["rows"]
        s1, _ = factor_from_frequency(f)
        trace.estimates["slices"] = {"factor": round(s1, 4)}
        ev["factor_alternatives"]["slices"] = factor_candidates(f)
        alias = ", ".join(f"{v:.3g}" for v in factor_candidates(f))
        text = (f"The noise of neighbouring slices is periodically correlated: the volume "
                f"was resliced along its slice axis (slices x{s1:.3g}; the periodicity fits "
                f"{alias} alike).")
        if trace.status == "present":
            trace.summary += " " + text
        else:
            trace.status = "present"
            trace.summary = text
            trace.confidence = _confidence("present", ev["decision"])
    elif pm.peaks and not confirmed and trace.status != "present":
        trace.status = "inconclusive"
        trace.summary = (
            "The linear-predictor residual is periodic (p-map peaks) but the noise of "
            "neighbouring samples is not periodically correlated: spatially varying weights "
            "interpolated from a coarse grid (for example an adaptive coil combination) "
            "leave this pattern without any resampling of the grid, so no call is made.")
        # as the reconciler does for an inconclusive call: the less likely side's probability
        p_absent = _confidence("absent", ev["decision"])
        trace.confidence = float(min(p_absent, 1.0 - p_absent))
    return trace


@register(TRACE_ID, version="1", order=55, default_estimates=DEFAULT_ESTIMATES)
def analyse(volume: Volume, *, scope: Scope, notes: Notes,
            jpeg_pixels: PixelFinding | None = None,
            support: dict[str, AxisSupport] | None = None,
            header: HeaderFacts | None = None) -> Trace:
    """Detect grid resampling (Kirchner 2008; see module docstring).

    References
    ----------
    .. [1] Kirchner, M. Proc. ACM MM&Sec, 11-20, 2008.
    .. [2] Popescu and Farid, IEEE Trans. Signal Processing 53(2):758-767, 2005.
    """
    small = sp.too_small(volume)
    if small:
        return inconclusive(TRACE_ID, small)
    frames, subset = _frames(volume, scope)
    for note in subset:
        notes.add(note)
    if min(frames[0].shape) < MIN_SIDE:
        return Trace(TRACE_ID, "inconclusive", 0.0,
                     f"The image ({frames[0].shape[0]} x {frames[0].shape[1]}) is too small "
                     f"to test for resampling: at least {MIN_SIDE} samples per side are "
                     "needed for a periodic interpolation pattern to stand out.",
                     dict(DEFAULT_ESTIMATES), {"too_small": {"shape": list(frames[0].shape),
                                                             "min_side": MIN_SIDE}})
    # when the JPEG test found 8 x 8 blocks in the pixels (the shared step the lossy
    # analyser reports), their 1/8-periodic peaks are not counted as interpolation;
    # zero-filling k-space by s is interpolation by s (a sinc kernel): its
    # periodicity is already reported by the zero_filling trace, not counted twice
    explained = _zero_fill_explained(support)
    blocks = bool(jpeg_pixels is not None and jpeg_pixels.status == "present")
    wavelet = lossy_jpeg2000(header)
    kw = {"exclude_block_grid": blocks, "explained": explained, "exclude_dyadic": wavelet}
    pm = find_peaks(spectrum_ratio(frames, workers=scope.workers), len(frames), **kw)
    cratio = nc.correlation_ratio(frames, workers=scope.workers)
    cr = find_peaks(cratio, len(frames), **kw)
    through = _through_plane(volume, scope, notes)
    trace = trace_from_tests(pm, cr, cratio, through)
    trace.evidence["dyadic_excluded"] = wavelet
    if wavelet:
        trace.summary += (" Peaks at 1/4 and 1/2 cycles/sample were set aside: the header "
                          "declares lossy JPEG 2000, whose dyadic wavelet leaves them (a 2x "
                          "or 4/3x scaling cannot be told from it here).")
    trace.evidence["block_grid_excluded"] = blocks
    trace.evidence["zero_fill_explained"] = {ax: sp.round_sig(f) for ax, f in explained.items()}
    if blocks:
        trace.summary += (" Peaks at multiples of 1/8 cycles/sample were set aside: the "
                          "pixels carry an 8 x 8 JPEG block grid.")
    if explained:
        parts = ", ".join(f"{ax} {f:.3g}" for ax, f in explained.items())
        trace.summary += (f" Peaks at the frequency that the zero-filling found in k-space "
                          f"explains ({parts} cycles/sample) were set aside.")
    return trace


def lossy_jpeg2000(header: HeaderFacts | None) -> bool:
    """Whether the header declares irreversible JPEG 2000 in the image's history.

    LossyImageCompression 01 with LossyImageCompressionMethod ISO_15444_1, or a
    JPEG 2000 transfer syntax (PS3.3 C.7.6.1.1.5; PS3.5 8.2.4), or a derivation
    description naming JPEG 2000.
    """
    if header is None or not isinstance(header, HeaderFacts):
        return False
    d = header.declared
    if not d.get("lossy_compression"):
        return False
    text = " ".join(str(d.get(k) or "") for k in ("lossy_method", "derivation_description",
                                                   "transfer_syntax_name")).upper()
    ts = str(d.get("transfer_syntax") or "")
    return ("15444" in text or "JPEG 2000" in text or "JPEG2000" in text
            or ts in ("1.2.840.10008.1.2.4.91", "1.2.840.10008.1.2.4.93",
                      "1.2.840.10008.1.2.4.203"))


def _zero_fill_explained(support: dict[str, AxisSupport] | None) -> dict[str, float]:
    """``rows``/``cols`` -> p-map frequency explained by the zero-filling found, if any."""
    if support is None:
        return {}
    out = {}
    for ax in ("rows", "cols"):
        a = support.get(ax)
        if a is not None and a.found and a.support_fraction < FOUND_SUPPORT \
                and a.padding_factor > 1.05:
            out[ax] = zero_fill_frequency(a.padding_factor)
    return out
