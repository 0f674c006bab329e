"""Periodic neighbour correlation of the noise: the second resampling test.

Interpolating onto a new grid makes every output sample a weighted sum of a few
input samples, with weights that repeat with the interpolation phase. Two
neighbouring output samples share input samples, so the *correlation* of their
noise depends on where they fall between input samples: it repeats with the
same period as the phase (Popescu and Farid 2005, section II; the periodic
correlations behind their EM detector). This module measures that directly:

1. a high-pass residual ``y = x - mean_5x5(x)`` (the noise and the finest
   texture), divided by its local root-mean-square over 9 x 9 samples, so that a
   spatially varying noise *level* (coil weights, a bias field) cancels;
2. the products of horizontal neighbours ``y[r, c] y[r, c+1]`` and of vertical
   neighbours ``y[r, c] y[r+1, c]``, two maps of the local lag-1 correlation;
3. the magnitude of the 2D DFT of each map, averaged over frames, divided by its
   7 x 7 local median.

Why a second test, and why this one. The predictor residual that Kirchner's
p-map uses also grows wherever the *image* has a kink; an image multiplied by
weights that were themselves interpolated from a coarse grid (an adaptive coil
combination computing its weights on a decimated grid, Walsh et al. 2000, as
reconstruction code often does) has kinks on that grid, and the p-map shows
its periodicity although no sample was moved. Such weights scale each sample's
noise but do not mix neighbouring samples, so the normalised lag-1 correlation
of the noise stays zero everywhere, and this test stays quiet: it is immune to
spatially varying weights by construction. A stationary filter (a k-space
window, zero-filling) correlates neighbours by the same amount everywhere,
which leaves no peak either. A 2x scaling whose two output phases mirror each
other (pixel-centre conventions put them at 1/4 and 3/4) leaves the symmetric
predictor residual with the same variance on both phases, so the p-map misses
it, while the neighbour correlation alternates (3/8 and 9/16 of the variance for
linear interpolation) and shows a peak at 1/2 cycles/sample.

What it cannot see: an integer decimation (every output sample the same
combination of inputs) is a stationary filter, and leaves no periodicity at all.

References
----------
.. [1] Popescu, A. C. and Farid, H. "Exposing digital forgeries by detecting traces
   of resampling", IEEE Trans. Signal Processing 53(2):758-767, 2005.
.. [2] Gardner, W. A. "Exploitation of spectral redundancy in cyclostationary
   signals", IEEE Signal Processing Magazine 8(2):14-36, 1991 (periodically
   correlated processes and their cyclic spectra).
.. [3] Walsh, D. O., Gmitro, A. F. and Marcellin, M. W. "Adaptive reconstruction of
   phased array MR imagery", Magn. Reson. Med. 43:682-690, 2000.
"""

from __future__ import annotations

import numpy as np
import scipy.fft as sfft
from scipy import ndimage

from app.traces import spectrum as sp

#: side of the local mean removed before the products (samples)
HIGHPASS = 5
#: side of the window of the local root-mean-square normalisation (samples)
NORM_WINDOW = 9
#: a product map needs this many valid samples per frame to count
MIN_VALID = 256


def normalised_residual(image: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """High-pass residual over its local RMS, and where it is defined.

    Parameters
    ----------
    image : ndarray
        2D real image; NaN marks samples outside a resliced field of view.

    Returns
    -------
    residual : ndarray
        ``(x - mean_5x5(x)) / rms_9x9``, 0 where undefined.
    valid : ndarray of bool
        Finite samples whose neighbourhood is finite and not constant (an exact
        fill outside a field of view holds no noise).
    """
    x = np.asarray(image, dtype=np.float64)
    finite = np.isfinite(x)
    x0 = np.where(finite, x, 0.0)
    y = x0 - ndimage.uniform_filter(x0, HIGHPASS, mode="reflect")
    power = np.maximum(ndimage.uniform_filter(y * y, NORM_WINDOW, mode="reflect"), 0.0)
    near_finite = ndimage.minimum_filter(finite.astype(np.uint8), NORM_WINDOW,
                                         mode="nearest") > 0
    pos = power[near_finite & (power > 0)]
    floor = 1e-6 * float(np.median(pos)) if pos.size else np.inf
    valid = near_finite & (power > floor)
    out = np.zeros_like(y)
    np.divide(y, np.sqrt(power), out=out, where=valid)
    return out, valid


def product_maps(image: np.ndarray) -> tuple[list[np.ndarray], list[int]]:
    """The lag-1 product maps of :func:`normalised_residual` (vertical, horizontal).

    Each map is mean-removed over its valid samples and 0 elsewhere; the counts
    of valid samples are returned beside them.
    """
    y, valid = normalised_residual(image)
    maps, counts = [], []
    for axis in (0, 1):
        z = y * np.roll(y, -1, axis=axis)
        ok = valid & np.roll(valid, -1, axis=axis)
        if axis == 0:
            ok[-1] = False
        else:
            ok[:, -1] = False
        n = int(np.count_nonzero(ok))
        maps.append(np.where(ok, z - (z[ok].mean() if n else 0.0), 0.0))
        counts.append(n)
    return maps, counts


def correlation_ratio(frames: list[np.ndarray], *, workers: int = 1,
                      median_size: int = 7) -> np.ndarray:
    """Spectrum of the periodic neighbour correlation over its local median, centred.

    Parameters
    ----------
    frames : list of ndarray
        Equally sized 2D real frames.
    workers : int
        FFT threads.
    median_size : int
        Side of the local median the magnitude is divided by.

    Returns
    -------
    ndarray
        ``(rows, cols)`` ratio, DC at ``n // 2``: the larger of the vertical and
        horizontal product maps' ratios at each frequency (a scaling along rows
        modulates the vertical neighbours' correlation, one along columns the
        horizontal ones). Zeros when no frame has enough valid samples.

    References
    ----------
    .. [1] Popescu and Farid, IEEE Trans. Signal Processing 53(2):758-767, 2005.
    """

    per_axis: list[list[np.ndarray]] = [[], []]
    for f in frames:
        maps, counts = product_maps(f)
        for axis in (0, 1):
            if counts[axis] >= MIN_VALID:
                per_axis[axis].append(maps[axis])
    shape = np.shape(frames[0])
    out = np.zeros(shape)
    for stack in per_axis:
        if not stack:
            continue
        arr = np.stack(stack).astype(np.float32)
        half = np.abs(sfft.rfft2(arr, workers=workers)).mean(axis=0)
        mag = sfft.fftshift(sp.expand_half(half, arr.shape[-1]))
        top = float(mag.max())
        if not np.isfinite(top) or top <= 0:
            continue
        bg = centrosymmetric_median(mag, median_size)
        out = np.maximum(out, mag / np.maximum(bg, 1e-12 * top))
    return out


def through_plane_frames(volume_frames: np.ndarray, *, max_frames: int = 6) -> list[np.ndarray]:
    """Planes that contain the slice axis: ``(slices, cols)`` sections at evenly spaced rows.

    A volume resliced along its slice axis (through-plane interpolation) carries
    the periodic correlation along that axis; these sections put it on their
    first (``rows``) axis, where :func:`correlation_ratio` reads it.
    """
    v = np.asarray(volume_frames)
    rows = v.shape[1]
    picks = np.unique(np.linspace(rows * 0.2, rows * 0.8, max_frames).astype(int))
    return [np.ascontiguousarray(v[:, r, :], dtype=np.float64) for r in picks]


def centrosymmetric_median(mag: np.ndarray, size: int = 7) -> np.ndarray:
    """``scipy.ndimage.median_filter(mag, size, mode="wrap")`` of a centred, centrosymmetric map.

    The magnitude spectrum of real frames is centrosymmetric (Hermitian symmetry),
    and so is its wrapped local median: the median is taken over half of the
    rows (sliding windows, one partition) and mirrored onto the other half.
    """
    n, m = mag.shape
    h = size // 2
    lo = n // 2
    if n < size or m < size:
        return ndimage.median_filter(mag, size=size, mode="wrap")
    # filtered rows lo .. n - 1, then row 0 (index n, wrapped)
    rows = np.arange(lo - h, n + 1 + h) % n
    sub = np.pad(mag[rows], ((0, 0), (h, h)), mode="wrap")
    win = np.lib.stride_tricks.sliding_window_view(sub, (size, size))
    win = win.reshape(win.shape[0], win.shape[1], size * size)
    k = (size * size) // 2
    med = np.partition(win, k, axis=-1)[..., k]
    out = np.empty_like(mag)
    out[lo:] = med[:-1]
    out[0] = med[-1]
    if lo > 1:
        src_r = (2 * lo - np.arange(1, lo)) % n
        src_c = (2 * (m // 2) - np.arange(m)) % m
        out[1:lo] = out[src_r][:, src_c]
    return out
