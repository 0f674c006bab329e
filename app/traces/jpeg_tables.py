"""The standard JPEG quantisation tables and libjpeg's quality scaling.

Sources
-------
- ITU-T Recommendation T.81 (1992) | ISO/IEC 10918-1, Annex K, Tables K.1
  (luminance) and K.2 (chrominance): the example quantisation tables.
- The Independent JPEG Group's libjpeg, ``jcparam.c``: ``jpeg_quality_scaling``
  (quality < 50: scale = 5000 / quality, else scale = 200 - 2 * quality) and
  ``jpeg_add_quant_table`` (entry = (base * scale + 50) // 100, clamped to
  1..255 for baseline). Written here from memory of that file; the tests check
  it against Pillow's encoder, which links libjpeg.
"""

from __future__ import annotations

import numpy as np

from app.io.jpeg_markers import ZIGZAG, natural_from_zigzag

#: ITU-T T.81 Annex K, Table K.1, in natural (row-major) order.
ANNEX_K_LUMINANCE = np.array(
    [
        [16, 11, 10, 16, 24, 40, 51, 61],
        [12, 12, 14, 19, 26, 58, 60, 55],
        [14, 13, 16, 24, 40, 57, 69, 56],
        [14, 17, 22, 29, 51, 87, 80, 62],
        [18, 22, 37, 56, 68, 109, 103, 77],
        [24, 35, 55, 64, 81, 104, 113, 92],
        [49, 64, 78, 87, 103, 121, 120, 101],
        [72, 92, 95, 98, 112, 100, 103, 99],
    ],
    dtype=np.int32,
)

#: ITU-T T.81 Annex K, Table K.2, in natural (row-major) order.
ANNEX_K_CHROMINANCE = np.full((8, 8), 99, dtype=np.int32)
ANNEX_K_CHROMINANCE[:4, :4] = [
    [17, 18, 24, 47],
    [18, 21, 26, 66],
    [24, 26, 56, 99],
    [47, 66, 99, 99],
]

def quality_scale(quality: int) -> int:
    """libjpeg's percentage scale factor for an IJG quality 1-100.

    References
    ----------
    IJG libjpeg, ``jcparam.c``, ``jpeg_quality_scaling``.
    """
    q = int(min(100, max(1, quality)))
    return 5000 // q if q < 50 else 200 - 2 * q


def scaled_table(quality: int, *, base: np.ndarray = ANNEX_K_LUMINANCE,
                 baseline: bool = True) -> np.ndarray:
    """The quantisation table libjpeg writes at ``quality`` (natural order, 8 x 8).

    Parameters
    ----------
    quality : int
        IJG quality, 1 to 100.
    base : ndarray
        The Annex K table to scale (luminance by default).
    baseline : bool
        Clamp entries to 255 as libjpeg does with ``force_baseline``.

    References
    ----------
    ITU-T T.81 Annex K; IJG libjpeg ``jpeg_add_quant_table``.
    """
    scale = quality_scale(quality)
    t = (base.astype(np.int64) * scale + 50) // 100
    t = np.clip(t, 1, 255 if baseline else 32767)
    return t.astype(np.int32)


def match_quality(
    table: np.ndarray, *, base: np.ndarray = ANNEX_K_LUMINANCE, weights: np.ndarray | None = None,
    baseline: bool = True,
) -> tuple[int, float, bool]:
    """The IJG quality whose scaled table is closest to ``table``.

    Parameters
    ----------
    table : ndarray
        8 x 8 table in natural order; NaN marks entries that could not be measured.
    base : ndarray
        Annex K table the candidate was scaled from.
    weights : ndarray, optional
        Per-entry weights (for example confidence of an estimate).
    baseline : bool
        Compare with tables clamped to 255 (8-bit baseline); ``False`` for the
        16-bit tables of 12-bit extended JPEG.

    Returns
    -------
    quality : int
        Best IJG quality 1-100.
    error : float
        Root-mean-square relative difference between ``table`` and the matched table
        over the measured entries.
    exact : bool
        True when every measured entry equals the matched table.

    References
    ----------
    ITU-T T.81 Annex K with libjpeg's quality scaling (see :func:`scaled_table`).
    """
    t = np.asarray(table, dtype=float).reshape(8, 8)
    ok = np.isfinite(t)
    if not ok.any():
        raise ValueError("no measured table entries to match")
    w = np.ones((8, 8)) if weights is None else np.asarray(weights, dtype=float).reshape(8, 8)
    best = (1, np.inf, False)
    for q in range(1, 101):
        ref = scaled_table(q, base=base, baseline=baseline).astype(float)
        rel = (t[ok] - ref[ok]) / ref[ok]
        err = float(np.sqrt(np.sum(w[ok] * rel**2) / np.sum(w[ok])))
        if err < best[1] - 1e-12:
            best = (q, err, bool(np.all(t[ok] == ref[ok])))
    return best


__all__ = ["ANNEX_K_CHROMINANCE", "ANNEX_K_LUMINANCE", "ZIGZAG", "match_quality",
           "natural_from_zigzag", "quality_scale", "scaled_table"]
