"""The background (air) of one magnitude frame: a threshold, morphology and checks.

Method, per frame: the magnitude image is smoothed with a box filter; a
threshold is chosen from the histogram of the smoothed image (Otsu's
between-class variance, lowered to a few times the air level); the low region
is opened (morphology), only its connected parts that touch the image border are kept
(air surrounds the object; dark tissue inside it does not touch the border),
and the result is eroded away from the object's edge. Blocks of the background
whose mean power stands far above the rest (ghosting bands, ringing, stray
signal) are dropped. A background that is not flat (its smoothed values vary
like tissue, not like noise) is refused and the four image corners are tried
instead. Large frames are segmented at a reduced size.

:func:`app.traces.background.find_background` runs :func:`frame_background` on
the analysed frames of a volume.

References
----------
.. [1] N. Otsu, "A threshold selection method from gray-level histograms",
   IEEE Transactions on Systems, Man, and Cybernetics 9(1):62-66, 1979.
.. [2] H. Gudbjartsson and S. Patz, "The Rician distribution of noisy MRI data",
   Magnetic Resonance in Medicine 34(6):910-914, 1995 (signal-free background
   as the region where the noise law is measured).
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage

#: frames whose shorter side is at least twice this are segmented on block means
_WORK_SIDE = 128
#: a candidate whose smoothed spread reaches this share of its raw spread is refused
_FLATNESS_LIMIT = 0.6
#: the air's median must stay below this share of the object's median
_CONTRAST_LIMIT = 0.4
#: robust z score (log block power) above which a background block is dropped
_GHOST_Z = 3.5
#: side of those blocks
_BLOCK = 8


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
