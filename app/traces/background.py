"""The signal-free background (air) of each image, found once per Volume.

Several analysers read the background: the noise-law fit (coil combination),
the constant-background test (masking), the sign test (magnitude only). It is
found here once, on a bounded, evenly spaced subset of frames, and shared
through the analysis plan's ``background`` step.

K-space volumes are first brought to the image domain (centred orthonormal
inverse FFT of the analysed frames), so a fake k-space made from processed
images shows the processing. Method, per frame: the magnitude image
(root-sum-of-squares over channels) is smoothed with a box filter; a
threshold is chosen from the histogram of the smoothed image (Otsu's
between-class variance, lowered to a few times the air level); the low region
is opened (morphology), only its connected parts that touch the image border are kept
(air surrounds the object; dark tissue inside it does not touch the border),
and the result is eroded away from the object's edge. Blocks of the background
whose mean power stands far above the rest (ghosting bands, ringing, stray
signal) are dropped. A background that is not flat (its smoothed values vary
like tissue, not like noise) is refused and the four image corners are tried
instead.

References
----------
.. [1] N. Otsu, "A threshold selection method from gray-level histograms",
   IEEE Transactions on Systems, Man, and Cybernetics 9(1):62-66, 1979.
.. [2] H. Gudbjartsson and S. Patz, "The Rician distribution of noisy MRI data",
   Magnetic Resonance in Medicine 34(6):910-914, 1995 (signal-free background
   as the region where the noise law is measured).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import scipy.fft as sfft
from scipy import ndimage

from app.io.volume import Volume
from app.traces.context import evenly_spaced

MAX_FRAMES = 16
#: at most this share of the frames (but at least MIN_FRAMES) is examined
FRAME_SHARE = 0.25
MIN_FRAMES = 8
FFT_TOLERANCE = 1e-5
MAX_PIXELS = 1_500_000
_WORK_SIDE = 128
MAX_SAMPLES_PER_FRAME = 32768
MIN_SAMPLES = 500
_FLATNESS_LIMIT = 0.6
_CONTRAST_LIMIT = 0.4
_GHOST_Z = 3.5
_BLOCK = 8


@dataclass
class Background:
    """Background samples of the analysed frames.

    Attributes
    ----------
    frames : ndarray of int
        Flat frame indices the background was looked for in.
    masks : ndarray of bool
        ``(len(frames), rows, cols)``: the background of each analysed frame.
    magnitude : ndarray of float64
        Background magnitudes (root-sum-of-squares over channels when multi-coil),
        at most :data:`MAX_SAMPLES_PER_FRAME` per frame.
    values : ndarray or None
        The physical values at the same positions: complex or real, shape ``(n,)``,
        or ``(coils, n)`` for multi-coil data.
    stored : ndarray or None
        The stored (unscaled) values at the same positions, single-channel data only.
    n_background : int
        Background samples found (before the per-frame sample cap).
    n_pixels : int
        Pixels in the analysed frames.
    method : {"threshold", "corners", "none"}
    reason : str or None
        Why the background is unusable (too few samples), else None.
    object_level : float
        Median magnitude of the pixels above the threshold (the object).
    signal_peak : float
        99.5th percentile of the magnitude in the analysed frames.
    nan_fraction : float
        Fraction of non-finite pixels (outside a resampled field of view).
    excluded_blocks : int
        Background blocks dropped as ghosting or stray signal.
    tolerance : float
        Values closer than this count as equal (round-off of the inverse FFT of
        k-space; 0 for stored image values).
    """

    frames: np.ndarray
    masks: np.ndarray
    magnitude: np.ndarray
    values: np.ndarray | None
    stored: np.ndarray | None
    n_background: int
    n_pixels: int
    method: str
    reason: str | None
    object_level: float
    signal_peak: float
    nan_fraction: float
    excluded_blocks: int = 0
    notes: list[str] = field(default_factory=list)
    tolerance: float = 0.0

    @property
    def usable(self) -> bool:
        """Whether enough background samples were found to measure noise."""
        return self.reason is None

    @property
    def fraction(self) -> float:
        """Fraction of the analysed pixels that are background."""
        return self.n_background / self.n_pixels if self.n_pixels else 0.0


def otsu_threshold(values: np.ndarray, bins: int = 256) -> float:
    """Otsu's threshold: the cut that maximises the between-class variance.

    References
    ----------
    N. Otsu, IEEE Trans. SMC 9(1):62-66, 1979.
    """
    v = np.asarray(values, dtype=np.float64).ravel()
    v = v[np.isfinite(v)]
    if v.size == 0:
        return 0.0
    lo, hi = float(v.min()), float(v.max())
    if hi <= lo:
        return hi
    counts, edges = np.histogram(v, bins=bins, range=(lo, hi))
    centres = 0.5 * (edges[:-1] + edges[1:])
    w0 = np.cumsum(counts).astype(np.float64)
    w1 = w0[-1] - w0
    s0 = np.cumsum(counts * centres)
    mu0 = s0 / np.maximum(w0, 1)
    mu1 = (s0[-1] - s0) / np.maximum(w1, 1)
    between = w0 * w1 * (mu0 - mu1) ** 2
    k = int(np.argmax(between[:-1]))
    return float(edges[k + 1])


def _box_size(shape: tuple[int, int]) -> int:
    k = max(5, min(shape) // 24)
    return k if k % 2 else k + 1


def _flatness(m: np.ndarray, sm: np.ndarray, mask: np.ndarray) -> float:
    """Spread of the box-smoothed background relative to the raw one.

    White noise gives about ``1/k`` for a ``k x k`` box (more for spatially
    correlated noise); tissue structure gives values near 1. A constant
    background gives 0.
    """
    raw = m[mask]
    if raw.size < 16:
        return 1.0
    s_raw = float(np.std(raw))
    if s_raw == 0:
        return 0.0
    return float(np.std(sm[mask]) / s_raw)


def _acceptable(m: np.ndarray, sm: np.ndarray, mask: np.ndarray, obj_level: float) -> bool:
    """Whether a candidate background is large, flat like noise and darker than the object.

    Air is far darker than the object: its median must stay below
    :data:`_CONTRAST_LIMIT` of the object's median (dark tissue of a cropped
    image with no air does not).
    """
    if mask.sum() < 64:
        return False
    if _flatness(m, sm, mask) >= _FLATNESS_LIMIT:
        return False
    return float(np.median(m[mask])) <= _CONTRAST_LIMIT * obj_level


def _drop_bright_blocks(m2: np.ndarray, mask: np.ndarray) -> tuple[np.ndarray, int]:
    """Drop background blocks whose mean power stands far above the others (ghosts)."""
    rows, cols = mask.shape
    by, bx = -(-rows // _BLOCK), -(-cols // _BLOCK)
    pad = ((0, by * _BLOCK - rows), (0, bx * _BLOCK - cols))
    mk = np.pad(mask, pad).reshape(by, _BLOCK, bx, _BLOCK)
    pw = np.pad(np.where(mask, m2, 0.0), pad).reshape(by, _BLOCK, bx, _BLOCK)
    cnt = mk.sum(axis=(1, 3))
    tot = pw.sum(axis=(1, 3))
    ok = cnt >= _BLOCK * _BLOCK // 4
    if ok.sum() < 8:
        return mask, 0
    mean = tot[ok] / cnt[ok]
    if np.all(mean <= 0):
        return mask, 0
    logm = np.log(np.maximum(mean, np.max(mean) * 1e-12))
    med = float(np.median(logm))
    mad = float(np.median(np.abs(logm - med))) * 1.4826
    mad = max(mad, 0.05)
    bad_vals = (logm - med) / mad > _GHOST_Z
    bad_vals &= (logm - med) > np.log(1.5)
    if not bad_vals.any():
        return mask, 0
    bad = np.zeros_like(ok)
    bad[ok] = bad_vals
    bad_px = np.repeat(np.repeat(bad, _BLOCK, axis=0), _BLOCK, axis=1)[:rows, :cols]
    return mask & ~bad_px, int(bad_vals.sum())


def _threshold(sm: np.ndarray) -> float:
    """A cut below the object: Otsu's threshold, lowered to a few times the air level.

    Otsu's cut separates the darkest class, which under strong coil shading can
    hold dark parts of the object; the air forms the lowest mode of the smoothed
    histogram, and smoothed noise stays well within 2.5 times that level (the
    relative spread of a box mean of noise is about ``0.5 / k``). A constant
    background (masking, no noise) is cut just above that constant.
    """
    v = sm.ravel()
    if v.size == 0:
        return 0.0
    lo, hi = float(v.min()), float(v.max())
    if hi <= lo:
        return hi
    t = otsu_threshold(v)
    below = v[v < t]
    if below.size < 64:
        return t
    try:
        # float64 edges: a float32 range spanning many decades (a flipped exponent
        # bit) leaves no room for 64 distinct float32 edges in the low part
        counts, edges = np.histogram(below.astype(np.float64), bins=64)
    except ValueError:
        return t
    j = int(np.argmax(counts))
    mode = 0.5 * (edges[j] + edges[j + 1])
    return float(min(t, 2.5 * mode)) if mode > 0 else t


def _far_half(mask: np.ndarray) -> np.ndarray:
    """Keep the half of the background farthest from the object.

    Ringing and blurring of the object's edge reach into the air and decay
    slowly with distance; the image border is not an edge here.
    """
    if mask.sum() < 256:
        return mask
    d = ndimage.distance_transform_edt(np.pad(mask, 1, constant_values=True))[1:-1, 1:-1]
    cut = float(np.median(d[mask]))
    return mask & (d >= cut)


def _corner_mask(shape: tuple[int, int]) -> np.ndarray:
    rows, cols = shape
    h, w = max(4, rows // 8), max(4, cols // 8)
    mask = np.zeros(shape, dtype=bool)
    mask[:h, :w] = mask[:h, -w:] = mask[-h:, :w] = mask[-h:, -w:] = True
    return mask


def frame_background(m: np.ndarray) -> tuple[np.ndarray, str, int, float]:
    """Find the background of one magnitude frame.

    When no background is found and a region of one constant value (the
    frame's minimum) covers part of the frame, that region is set aside like
    non-finite pixels (zeros outside a resampled field of view) and the noisy
    air around it is looked for instead.

    Parameters
    ----------
    m : ndarray
        2D magnitude image (non-finite pixels are never background).

    Returns
    -------
    mask : ndarray of bool
    method : {"threshold", "corners", "none"}
    excluded_blocks : int
    threshold : float
        The histogram threshold on the smoothed image.

    References
    ----------
    Otsu 1979 (threshold); Gudbjartsson and Patz 1995 (background as the
    signal-free region).
    """
    found = _frame_background_any(m)
    if found[1] != "none":
        return found
    fin = np.isfinite(m)
    if not fin.any():
        return found
    const = fin & (m == np.min(m[fin]))
    share = float(const.sum() / fin.sum())
    if not 0.02 <= share <= 0.9:
        return found
    retry = _frame_background_any(np.where(const, np.nan, m))
    return retry if retry[1] != "none" else found


def _frame_background_any(m: np.ndarray) -> tuple[np.ndarray, str, int, float]:
    factor = min(m.shape) // _WORK_SIDE
    if factor >= 2:
        return _frame_background_reduced(m, factor)
    return _frame_background_full(m)


def _frame_background_full(m: np.ndarray) -> tuple[np.ndarray, str, int, float]:
    finite = np.isfinite(m)
    m = np.where(finite, m, 0.0).astype(np.float64, copy=False)
    k = _box_size(m.shape)
    sm = ndimage.uniform_filter(m, size=k, mode="nearest")
    t = _threshold(sm[finite])
    low = (sm <= t) & finite
    low = ndimage.binary_opening(low, structure=np.ones((3, 3), bool))
    lab, n = ndimage.label(low)
    mask = np.zeros(m.shape, dtype=bool)
    if n:
        border = np.unique(np.concatenate([lab[0], lab[-1], lab[:, 0], lab[:, -1]]))
        border = border[border > 0]
        mask = np.isin(lab, border)
    erode = max(2, k // 2)
    mask = ndimage.binary_erosion(mask, iterations=erode, border_value=1) & finite
    mask = _far_half(mask)
    m2 = m * m
    excluded = 0
    obj = finite & (sm > t)
    obj_level = float(np.median(m[obj])) if obj.any() else float("inf")
    kept, excluded = _drop_bright_blocks(m2, mask) if mask.sum() >= 64 else (mask, 0)
    if _acceptable(m, sm, kept, obj_level):
        return kept, "threshold", excluded, t
    corners = _corner_mask(m.shape) & finite & (sm <= t)
    if _acceptable(m, sm, corners, obj_level):
        return corners, "corners", 0, t
    return np.zeros(m.shape, dtype=bool), "none", 0, t


def _frame_background_reduced(m: np.ndarray, factor: int) -> tuple[np.ndarray, str, int, float]:
    """:func:`frame_background` on a ``factor x factor`` block mean, mask expanded back.

    Large frames are segmented at a reduced size to bound the cost; a block
    containing a non-finite pixel is not background.
    """
    rows, cols = m.shape
    ny, nx = rows // factor, cols // factor
    crop = m[:ny * factor, :nx * factor].astype(np.float64)
    small = crop.reshape(ny, factor, nx, factor).mean(axis=(1, 3))
    mask_s, method, excluded, t = _frame_background_full(small)
    mask = np.zeros((rows, cols), dtype=bool)
    mask[:ny * factor, :nx * factor] = np.repeat(np.repeat(mask_s, factor, 0), factor, 1)
    return mask & np.isfinite(m), method, excluded, t


def analysed_frames(n_frames: int, base: np.ndarray | None = None,
                    max_frames: int = MAX_FRAMES) -> np.ndarray:
    """At most ``max_frames`` evenly spaced frame indices (from ``base`` if given)."""
    return evenly_spaced(np.arange(n_frames) if base is None else base, max_frames)


def kspace_is_centred(block: np.ndarray) -> bool:
    """Whether k-space has its largest power near the centre (DC at ``n // 2``).

    Common practice, no source: raw files store k-space either centred or with
    DC at index 0.
    """
    p = np.abs(np.asarray(block).reshape(-1, *block.shape[-2:])) ** 2
    mean = p.mean(axis=0)
    rows, cols = mean.shape
    r, c = np.unravel_index(int(np.argmax(mean)), mean.shape)
    to_centre = abs(r - rows // 2) + abs(c - cols // 2)
    to_corner = min(r, rows - r) + min(c, cols - c)
    return bool(to_centre <= to_corner)


def image_blocks(volume: Volume, indices: np.ndarray, *, batch: int = 8,
                 workers: int = 2) -> Any:
    """Yield ``(frame_indices, block)`` in the image domain.

    Image volumes are passed through; k-space volumes are transformed by a
    centred orthonormal inverse 2D FFT (noise sigma is kept), with DC taken at
    the centre or at index 0, whichever holds the peak power.

    References
    ----------
    J. W. Cooley and J. W. Tukey, Math. Comp. 19:297-301, 1965 (the FFT).
    """
    centred = None
    for idx, block in volume.iter_slices(batch, indices=indices):
        if volume.domain != "kspace":
            yield idx, block
            continue
        k = np.nan_to_num(np.asarray(block).astype(np.complex64, copy=False))
        if centred is None:
            centred = kspace_is_centred(k)
        if centred:
            k = sfft.ifftshift(k, axes=(-2, -1))
        img = sfft.fftshift(sfft.ifft2(k, axes=(-2, -1), norm="ortho", workers=workers),
                            axes=(-2, -1))
        yield idx, img.astype(np.complex64, copy=False)


def _magnitude(block: np.ndarray, multi: bool) -> np.ndarray:
    if multi:
        return np.sqrt((np.abs(block.astype(np.complex128 if np.iscomplexobj(block)
                                            else np.float64)) ** 2).sum(axis=1))
    return np.abs(block).astype(np.float64)


@dataclass
class _Accumulator:
    """Per-volume sums of the frames examined (blank frames are kept apart)."""

    frames: list[int] = field(default_factory=list)
    methods: set[str] = field(default_factory=set)
    excluded: int = 0
    n_px: int = 0
    n_nan: int = 0
    n_bg: int = 0
    peaks: list[float] = field(default_factory=list)
    obj_levels: list[float] = field(default_factory=list)
    mags: list[np.ndarray] = field(default_factory=list)
    vals: list[np.ndarray] = field(default_factory=list)
    stored: list[np.ndarray] = field(default_factory=list)


def find_background(volume: Volume, *, frames: Any = None,
                    max_frames: int = MAX_FRAMES) -> Background:
    """Find the background of a Volume on a bounded, evenly spaced subset of frames.

    Parameters
    ----------
    volume : Volume
    frames : sequence of int, optional
        Frames to choose from (the context's stated subset); default all.
    max_frames : int
        Upper bound on frames examined; fewer when the frames are large (at most
        :data:`MAX_PIXELS` pixels in all) and at most a quarter of the frames
        (:data:`FRAME_SHARE`) once there are more than :data:`MIN_FRAMES`.

    Returns
    -------
    Background

    References
    ----------
    Otsu 1979; Gudbjartsson and Patz, MRM 1995.
    """
    rows, cols = volume.image_shape
    share = max(MIN_FRAMES, int(np.ceil(FRAME_SHARE * volume.n_slices)))
    max_frames = max(1, min(max_frames, share, MAX_PIXELS // max(1, rows * cols)))
    idx = analysed_frames(volume.n_slices, frames, max_frames)
    notes = []
    if idx.size < volume.n_slices:
        notes.append(f"background found on {idx.size} of {volume.n_slices} frames, "
                     "evenly spaced")
    if volume.domain == "kspace":
        notes.append("noise and background measured on the inverse FFT of the k-space")
    multi = volume.coil_axis is not None
    acc = {True: _Accumulator(), False: _Accumulator()}
    masks = []
    single = not multi and volume.domain == "image"
    stored_iter = volume.iter_slices(8, scaled=False, indices=idx) if single else None
    for _, block in image_blocks(volume, idx):
        mag = _magnitude(block, multi)
        sblock = next(stored_iter)[1] if stored_iter is not None else None
        for j in range(mag.shape[0]):
            m = mag[j]
            fin = np.isfinite(m)
            all_fin = bool(fin.all())
            m_fin = m.ravel() if all_fin else m[fin]  # no copy in the common case
            blank = m_fin.size == 0 or float(m_fin.min()) == float(m_fin.max())
            mask, method, exc, t = frame_background(m)
            masks.append(mask)
            a = acc[blank]
            a.frames.append(len(masks) - 1)
            a.methods.add(method)
            a.excluded += exc
            a.n_px += m.size
            a.n_nan += 0 if all_fin else int((~fin).sum())
            if m_fin.size:
                a.peaks.append(float(np.percentile(m_fin, 99.5)))
                obj = m[~mask] if all_fin else m[fin & ~mask]
                above = obj[obj >= t]
                a.obj_levels.append(float(np.median(above)) if above.size else
                                    float(np.median(obj)) if obj.size else 0.0)
            pos = np.flatnonzero(mask)
            a.n_bg += pos.size
            if pos.size > MAX_SAMPLES_PER_FRAME:
                pos = pos[np.linspace(0, pos.size - 1, MAX_SAMPLES_PER_FRAME).astype(np.int64)]
            a.mags.append(m.ravel()[pos])
            if multi:
                a.vals.append(block[j].reshape(block.shape[1], -1)[:, pos])
            else:
                a.vals.append(block[j].ravel()[pos])
                if sblock is not None:
                    a.stored.append(sblock[j].ravel()[pos])
    use = acc[False] if acc[False].frames else acc[True]
    if acc[False].frames and acc[True].frames:
        notes.append(f"{len(acc[True].frames)} blank frame(s) (one value throughout) left out "
                     "of the background")
        for k in acc[True].frames:
            masks[k] = np.zeros_like(masks[k])
    methods, excluded = use.methods, use.excluded
    n_bg, n_px, n_nan = use.n_bg, use.n_px, use.n_nan
    peaks, obj_levels = use.peaks, use.obj_levels
    magnitude = np.concatenate(use.mags) if use.mags else np.zeros(0)
    values = (np.concatenate(use.vals, axis=-1) if use.vals else None)
    stored = np.concatenate(use.stored) if use.stored else None
    reason = None
    if n_bg < MIN_SAMPLES:
        reason = (f"only {n_bg} background samples found (at least {MIN_SAMPLES} needed): "
                  "the images hold no signal-free air region")
    method = "threshold" if "threshold" in methods else (
        "corners" if "corners" in methods else "none")
    return Background(
        frames=idx,
        masks=np.asarray(masks, dtype=bool),
        magnitude=magnitude,
        values=values,
        stored=stored,
        n_background=int(n_bg),
        n_pixels=int(n_px),
        method=method,
        reason=reason,
        object_level=float(np.median(obj_levels)) if obj_levels else 0.0,
        signal_peak=float(np.median(peaks)) if peaks else 0.0,
        nan_fraction=n_nan / n_px if n_px else 0.0,
        excluded_blocks=int(excluded),
        notes=notes,
        tolerance=FFT_TOLERANCE * max(peaks) if volume.domain == "kspace" and peaks else 0.0,
    )


def background_step(volume: Volume, scope: Any, notes: Any) -> Background:
    """The shared step: the background (air) of the analysed frames.

    Adds the stated frame subsampling to ``notes``.
    """
    bg = find_background(volume, frames=scope.frames)
    for note in bg.notes:
        notes.add(note)
    return bg


LATTICE_TOL = 0.01


def lattice_step(values: np.ndarray, *, tol: float = LATTICE_TOL) -> float | None:
    """The step ``d`` of a lattice ``v0 + k d`` that holds all ``values``, or None.

    Integers: the greatest common divisor of the gaps between distinct values.
    Floats: the smallest gap between distinct values, accepted when every value
    lies within ``tol * d`` of the lattice (float images quantised to a few
    levels and then scaled). Common practice, no source.
    """
    v = np.asarray(values).ravel()
    if v.dtype.kind == "f":
        v = v[np.isfinite(v)]
    u = np.unique(v)
    if u.size < 2:
        return None
    if u.dtype.kind in "iub":
        return float(np.gcd.reduce(np.diff(u.astype(np.int64)))) or None
    if u.size > 1_000_000:
        return None
    u = u.astype(np.float64)
    d = float(np.diff(u).min())
    span = float(u[-1] - u[0])
    if d <= 0 or span / d > 1e7:
        return None
    d = span / round(span / d)
    r = (u - u[0]) / d
    return d if float(np.max(np.abs(r - np.round(r)))) <= tol else None


@dataclass
class ConstantShare:
    """The most common exact background value.

    Attributes
    ----------
    value : float or None
        The value (stored units where stored values exist).
    share : float
        Share of background samples holding exactly that value.
    neighbour_share : float
        Share holding the next lattice values either side (data on a lattice
        only; 0 for continuous data).
    masked : bool
        Whether the background is one constant rather than noise (see
        :func:`constant_share`).
    at_bottom : bool
        Whether the constant is the lowest background value.
    isolated : bool
        Whether the value stands alone on its lattice (its neighbours hold less
        than half as much, or it holds 90%); always True for continuous data.
    """

    value: float | None
    share: float
    neighbour_share: float
    masked: bool
    at_bottom: bool = True
    isolated: bool = True

    @property
    def flattened(self) -> bool:
        """Half or more of the background on one value: masked, or flattened otherwise.

        Compression or coarse quantisation can flatten noisy air onto one level
        with a few values below it; the noise law cannot be measured either way.
        Quantised noise of a sigma near one step is not flat: its neighbouring
        levels are busy.
        """
        return self.masked or (self.share >= FLATTENED_SHARE and self.isolated)


MASKED_SHARE = 0.3
FLATTENED_SHARE = 0.5
PURE_SHARE = 0.999


def constant_share(bg: Background) -> ConstantShare:
    """The most common exact background value and whether it means a constant background.

    Continuous noise never repeats one value in a large share of samples;
    masking, thresholding and noise-free synthesis do. Integer-stored noise with
    a sigma of a step or two does repeat values, but then the next lattice
    values either side are nearly as common, whereas a masked background stands
    alone (its neighbours are empty). The background counts as masked when at
    least :data:`MASKED_SHARE` of it holds one value (values within the
    background's round-off tolerance counting as one), that value is the
    lowest of the background (masks and thresholds set the air to the bottom;
    compression that flattens air leaves values below the flat level) unless it
    holds at least 99.9%, and, for data on a lattice (integers, or floats on few
    levels), it holds at least 90% or its two lattice neighbours together hold
    less than half as much (quantised noise of a sigma near one step has busy
    neighbours).
    Common practice, no source.
    """
    use_stored = bg.stored is not None and not np.iscomplexobj(bg.stored)
    v = np.asarray(bg.stored if use_stored else bg.magnitude).ravel()
    v = v[np.isfinite(v)] if v.dtype.kind == "f" else v
    if bg.tolerance > 0 and not use_stored:
        v = np.round(v / bg.tolerance) * bg.tolerance
    if v.size == 0:
        return ConstantShare(None, 0.0, 0.0, False)
    vals, counts = np.unique(v, return_counts=True)
    j = int(np.argmax(counts))
    share = float(counts[j] / v.size)
    neighbour = 0.0
    step = lattice_step(vals) if vals.size > 1 else None
    if step is not None:
        c = float(vals[j])
        gap = np.abs(vals.astype(np.float64) - c)
        near = np.abs(gap - step) <= LATTICE_TOL * step
        neighbour = float(counts[near].sum() / v.size)
    at_bottom = bool(vals[j] == vals[0])
    lattice_ok = step is None or share >= 0.9 or neighbour < 0.5 * share
    masked = share >= MASKED_SHARE and lattice_ok and (at_bottom or share >= PURE_SHARE)
    return ConstantShare(float(vals[j]), share, neighbour, masked, at_bottom, lattice_ok)
