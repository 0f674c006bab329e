"""The 8 x 8 block grid of a decoded JPEG, and its quantiser steps, from pixels alone.

Pure functions (arrays in, dataclasses out): :func:`blocking_signature` measures
the blocking artefact per phase offset along each axis, :func:`find_block_origin`
locates the 8 x 8 grid (the data may have been cropped after compression), and
:func:`analyse_grid` chains them with the per-frequency step estimation of
:mod:`app.traces.dct_quantiser` on the blocks of that grid.

References
----------
Z. Fan and R. L. de Queiroz, "Identification of bitmap compression history: JPEG
detection and quantizer estimation", IEEE Trans. Image Processing 12(2):230-235,
2003.
ITU-T Recommendation T.81 (1992) | ISO/IEC 10918-1, A.3.3 (the 8 x 8 forward DCT
with the level shift of A.3.1, equal to the orthonormal 2D DCT-II).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import scipy.fft as sfft

from app.traces.dct_quantiser import estimate_steps

#: Frequency indices (u, v) of an 8 x 8 block, and its high frequencies u + v >= 4.
_U, _V = np.meshgrid(np.arange(8), np.arange(8), indexing="ij")
_HIGH = ((_U + _V) >= 4).reshape(64)


@dataclass
class GridEstimate:
    """The block grid and the per-frequency quantisation steps.

    Attributes
    ----------
    origin : tuple of int
        ``(row, col)``, 0-7: first row and column at which a block starts.
    signature_rows, signature_cols : ndarray
        Blocking signature per phase offset 0-7 along each axis (mean ratio 1).
    steps : ndarray
        8 x 8 estimated steps in natural order; NaN where not measurable, 1 where the
        coefficients are measurable but show no step above 1.
    support : ndarray
        8 x 8 count of informative (non-zero) coefficients per frequency.
    fit : ndarray
        8 x 8 share of the informative coefficients that lie on multiples of the step.
    z : ndarray
        8 x 8 one-sided z score of that share against chance (0 where no step > 1).
    n_blocks : int
        Blocks used (not flat, not touching the clipping levels).
    origin_scores : ndarray
        8 x 8 grid-search score per candidate origin (lower is more JPEG-like).
    """

    origin: tuple[int, int]
    signature_rows: np.ndarray
    signature_cols: np.ndarray
    steps: np.ndarray
    support: np.ndarray
    fit: np.ndarray
    z: np.ndarray
    n_blocks: int
    origin_scores: np.ndarray = field(default_factory=lambda: np.zeros((8, 8)))

    @property
    def n_measured(self) -> int:
        """Frequencies whose step (> 1) was measured with significance."""
        return int(np.sum(np.isfinite(self.steps) & (self.steps > 1)))

    @property
    def n_measured_low(self) -> int:
        """Measured steps (> 1) among the low frequencies ``u + v <= 4``.

        The low frequencies carry most of the non-zero coefficients of a decoded
        JPEG, so a real quantiser shows there first; lattice-like coincidences of
        interpolated images were seen only at high frequencies.
        """
        low = (_U + _V) <= 4
        return int(np.sum(np.isfinite(self.steps) & (self.steps > 1) & low))


def blocking_signature(images: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Blocking artefact strength per phase offset 0-7 along rows and columns.

    For each phase ``p`` along an axis, the mean absolute difference between
    neighbouring pixels across the boundary at index ``i`` with ``i % 8 == p``, with
    differences clipped at their 99th percentile so that object edges do not
    dominate; divided by the mean over the eight phases. A JPEG-compressed image
    shows a peak at the phase where its blocks start.

    Parameters
    ----------
    images : ndarray
        ``(frames, rows, cols)`` or ``(rows, cols)``.

    Returns
    -------
    rows, cols : ndarray
        Eight values each (ratio to the mean; 1 everywhere for no blocking).

    References
    ----------
    Fan and de Queiroz (2003), section II: the blocking signature (pixel
    differences across block boundaries against those inside blocks).
    """
    x = np.asarray(images, dtype=np.float64)
    if x.ndim == 2:
        x = x[None]
    out = []
    for axis in (1, 2):
        d = np.abs(np.diff(x, axis=axis))
        if d.size == 0:
            out.append(np.ones(8))
            continue
        cap = np.percentile(d, 99)
        if cap > 0:
            d = np.minimum(d, cap)
        prof = d.mean(axis=(0, 2) if axis == 1 else (0, 1))
        # the difference d[i] is between i and i + 1: a boundary where a block starts at i + 1
        phase = (np.arange(prof.size) + 1) % 8
        sig = np.array([prof[phase == p].mean() if np.any(phase == p) else 0.0
                        for p in range(8)])
        m = sig.mean()
        out.append(sig / m if m > 0 else np.ones(8))
    return out[0], out[1]


def block_dct(images: np.ndarray, origin: tuple[int, int], *, workers: int = 1
              ) -> tuple[np.ndarray, np.ndarray]:
    """Orthonormal 8 x 8 DCT-II of every whole block on the grid starting at ``origin``.

    Parameters
    ----------
    images : ndarray
        ``(frames, rows, cols)`` float64 grey levels.
    origin : (int, int)
        First row and column of the grid.

    Returns
    -------
    coefs : ndarray
        ``(n_blocks, 8, 8)`` DCT coefficients (JPEG's FDCT of T.81 A.3.3).
    pixels : ndarray
        ``(n_blocks, 8, 8)`` the blocks themselves.

    References
    ----------
    ITU-T T.81, A.3.3: the FDCT with C(0) = 1/sqrt(2) and the factor 1/4 is the
    orthonormal 2D DCT-II of an 8 x 8 block.
    """
    r0, c0 = origin
    x = images[:, r0:, c0:]
    f, h, w = x.shape
    h8, w8 = h // 8, w // 8
    x = x[:, :h8 * 8, :w8 * 8].reshape(f, h8, 8, w8, 8).transpose(0, 1, 3, 2, 4)
    blocks = x.reshape(-1, 8, 8)
    coefs = sfft.dctn(blocks, type=2, axes=(1, 2), norm="ortho", workers=workers)
    return coefs, blocks


def usable_blocks(blocks: np.ndarray, low: float, high: float) -> np.ndarray:
    """Blocks that carry quantiser information: not flat, not touching ``low``/``high``.

    Flat blocks have all AC coefficients zero, which fits every step; blocks with
    a pixel at a clipping level had their decoded values clipped, which moves their
    coefficients off the lattice (Fan and de Queiroz 2003, section III).
    """
    flat = np.ptp(blocks.reshape(len(blocks), -1), axis=1) == 0
    clipped = np.any((blocks <= low) | (blocks >= high), axis=(1, 2))
    return ~flat & ~clipped


def _origin_score(coefs: np.ndarray) -> float:
    """Share of high-frequency coefficients away from zero (JPEG zeroes most of them)."""
    hf = coefs.reshape(len(coefs), 64)[:, _HIGH]
    return float(np.mean(np.abs(hf) > 0.75))


def find_block_origin(images: np.ndarray, low: float, high: float, *, workers: int = 1,
                      max_blocks: int = 4096) -> tuple[tuple[int, int], np.ndarray]:
    """Locate the 8 x 8 grid: the origin whose blocks leave the most zeroed coefficients.

    On the grid the quantiser left them, most high-frequency DCT coefficients of a
    decoded JPEG are zero up to rounding noise; blocks straddling two JPEG blocks see
    the discontinuity at the block boundary (the blocking artefact) as
    high-frequency energy.

    Returns
    -------
    origin : (int, int)
    scores : ndarray
        8 x 8 score per candidate origin (share of high-frequency coefficients with
        magnitude above 0.75; lower is more JPEG-like).

    References
    ----------
    Fan and de Queiroz (2003): the blocking signature is strongest on the grid.
    """
    scores = np.ones((8, 8))
    for r in range(8):
        for c in range(8):
            coefs, blocks = block_dct(images, (r, c), workers=workers)
            ok = usable_blocks(blocks, low, high)
            coefs = coefs[ok][:max_blocks]
            if len(coefs):
                scores[r, c] = _origin_score(coefs)
    r, c = np.unravel_index(int(np.argmin(scores)), scores.shape)
    return (int(r), int(c)), scores


#: Side of the central region (per frame) searched for the grid origin.
_SEARCH_SIZE = 256


def central_region(x: np.ndarray, size: int) -> np.ndarray:
    """Central ``size + 8`` square of each frame, cut at multiples of 8.

    Cutting at multiples of 8 keeps the block phase (and, being even, the wavelet
    subband phase of the first three levels when ``size`` is a multiple of 8).
    """
    out = x
    for axis in (1, 2):
        n = x.shape[axis]
        if n > size + 8:
            start = ((n - size) // 2) // 8 * 8
            out = np.take(out, np.arange(start, start + size + 8), axis=axis)
    return out


def analyse_grid(levels: np.ndarray, *, low: float, high: float, workers: int = 1,
                 max_blocks: int = 4096, max_step: int = 255) -> GridEstimate:
    """Block grid, blocking signature and quantiser steps of integer grey levels.

    Parameters
    ----------
    levels : ndarray
        ``(frames, rows, cols)`` lattice indices (decoded JPEG grey levels).
    low, high : float
        Clipping levels (blocks touching them are left out).
    workers : int
        ``scipy.fft`` workers.
    max_blocks : int
        At most this many usable blocks (evenly spaced) enter the estimation.
    max_step : int
        Largest quantisation step tried.

    Returns
    -------
    GridEstimate

    References
    ----------
    Fan and de Queiroz (2003).
    """
    x = np.asarray(levels, dtype=np.float64)
    if x.ndim == 2:
        x = x[None]
    sig_r, sig_c = blocking_signature(x)
    origin, scores = find_block_origin(central_region(x, _SEARCH_SIZE), low, high,
                                       workers=workers, max_blocks=max_blocks)
    coefs, blocks = block_dct(x, origin, workers=workers)
    ok = usable_blocks(blocks, low, high)
    coefs, blocks = coefs[ok], blocks[ok]
    # identical blocks (repeated patterns of piecewise-constant images) would count
    # one coefficient value many times: keep each distinct block once
    flat = blocks.reshape(len(blocks), 64)
    _, first = np.unique(flat - flat.min(axis=1, keepdims=True), axis=0, return_index=True)
    coefs = coefs[np.sort(first)]
    if len(coefs) > max_blocks:
        coefs = coefs[np.linspace(0, len(coefs) - 1, max_blocks).round().astype(int)]
    steps, support, fit, z = estimate_steps(coefs, max_step=max_step)
    return GridEstimate(origin, sig_r, sig_c, steps, support, fit, z, int(len(coefs)), scores)
