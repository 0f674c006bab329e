"""JPEG 2000 from pixels: the deadzone its quantiser leaves in the 9/7 wavelet subbands.

A JPEG 2000 image has no 8 x 8 block grid; where :mod:`app.traces.dct_grid` finds
none, :func:`wavelet_deadzone` re-transforms the decoded grey levels with the CDF
9/7 wavelet (:func:`dwt97_2d`) and measures how empty the range just above zero
is in each detail subband.

References
----------
ITU-T Recommendation T.800 | ISO/IEC 15444-1, Annexes E and F (JPEG 2000 deadzone
quantisation and the 9/7 wavelet transform).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

#: CDF 9/7 lifting constants of the JPEG 2000 irreversible transform (ITU-T T.800,
#: Annex F, Table F.4; values written from memory, checked by the vanishing-moment
#: test in tests/test_jpeg_grid.py).
_ALPHA = -1.586134342059924
_BETA = -0.052980118572961
_GAMMA = 0.882911075530934
_DELTA = 0.443506852043971
_KAPPA = 1.230174104914001


def _lift97(x: np.ndarray, axis: int) -> tuple[np.ndarray, np.ndarray]:
    """One level of the 1D CDF 9/7 analysis along ``axis`` (whole-sample symmetric
    extension), returning the low- and high-pass halves."""
    y = np.moveaxis(np.asarray(x, dtype=np.float64), axis, -1).copy()
    n = y.shape[-1]

    def ext(i: np.ndarray) -> np.ndarray:
        i = np.abs(i)
        return np.where(i > n - 1, 2 * (n - 1) - i, i)

    odd, even = np.arange(1, n, 2), np.arange(0, n, 2)
    for idx, c in ((odd, _ALPHA), (even, _BETA), (odd, _GAMMA), (even, _DELTA)):
        y[..., idx] += c * (y[..., ext(idx - 1)] + y[..., ext(idx + 1)])
    lo = y[..., even] / _KAPPA
    hi = y[..., odd] * _KAPPA
    return np.moveaxis(lo, -1, axis), np.moveaxis(hi, -1, axis)


def dwt97_2d(image: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """One level of the separable 2D CDF 9/7 wavelet transform over the last two axes.

    Returns
    -------
    ll, lh, hl, hh : ndarray
        Low-low, and the three detail subbands (rows high-pass in ``hl`` and ``hh``).

    References
    ----------
    ITU-T T.800 | ISO/IEC 15444-1, Annex F (irreversible 9/7 lifting);
    A. Cohen, I. Daubechies, J.-C. Feauveau, Comm. Pure Appl. Math. 45:485-560 (1992).
    """
    lo, hi = _lift97(image, -1)
    ll, lh = _lift97(lo, -2)
    hl, hh = _lift97(hi, -2)
    return ll, lh, hl, hh


@dataclass
class DeadzoneEvidence:
    """How empty the range just above zero is in each wavelet detail subband.

    Attributes
    ----------
    bands : list of dict
        ``{"level", "band", "n_small", "n_above", "zero_fraction", "gap_ratio"}`` per
        detail subband with enough coefficients above the gap.
    min_gap_ratio : float or None
        The smallest ``gap_ratio`` over those subbands.
    """

    bands: list[dict]
    min_gap_ratio: float | None


def wavelet_deadzone(levels: np.ndarray, *, n_levels: int = 3, low: float = 1.0,
                     high: float = 4.0, min_above: int = 100) -> DeadzoneEvidence:
    """Look for the deadzone that JPEG 2000's quantiser leaves in the wavelet subbands.

    JPEG 2000 (irreversible path) quantises each 9/7 subband with a deadzone scalar
    quantiser: coefficients below the (bit-plane truncated) step become zero and the
    others are rebuilt at 1.5, 2.5, ... steps. Re-transforming the decoded grey
    levels shows, in such a subband, a cluster at zero (rounding noise) and almost no
    coefficients between ``low`` and ``high`` grey levels. The coefficient density of
    an uncompressed image is unimodal at zero, so its density on ``[low, high)`` is
    at least about that on ``[high, 4 high)``, whatever the noise level.
    ``gap_ratio`` is the first density over the second (about 1 or more without
    compression, near 0 in a deadzone).

    Parameters
    ----------
    levels : ndarray
        ``(frames, rows, cols)`` integer grey levels (lattice indices).
    n_levels : int
        Decomposition levels examined.
    low, high : float
        The range (grey levels) that a deadzone leaves empty.
    min_above : int
        Subbands with fewer coefficients on ``[high, 4 high)`` are not scored.

    Returns
    -------
    DeadzoneEvidence

    References
    ----------
    ITU-T T.800 | ISO/IEC 15444-1, Annex E (deadzone scalar quantisation, E.1.1, and
    reconstruction, E.1.1.2) and Annex F (9/7 transform). Common practice, no source:
    reading the deadzone back from decoded pixels.
    """
    x = np.asarray(levels, dtype=np.float64)
    if x.ndim == 2:
        x = x[None]
    bands = []
    ll = x
    for lev in range(1, n_levels + 1):
        if min(ll.shape[-2:]) < 16:
            break
        ll, lh, hl, hh = dwt97_2d(ll)
        for name, b in (("LH", lh), ("HL", hl), ("HH", hh)):
            m = np.abs(b)
            n_small = int(np.sum((m >= low) & (m < high)))
            n_above = int(np.sum((m >= high) & (m < 4 * high)))
            if n_above >= min_above:
                ratio = (n_small / (high - low)) / (n_above / (3 * high))
                bands.append({"level": lev, "band": name, "n_small": n_small,
                              "n_above": n_above, "zero_fraction": float(np.mean(m < low)),
                              "gap_ratio": float(ratio)})
    gaps = [b["gap_ratio"] for b in bands]
    return DeadzoneEvidence(bands, float(min(gaps)) if gaps else None)
