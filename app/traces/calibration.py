"""Calibration maps: a trace's decision statistic -> probability that the trace is present.

Analysers put a scalar decision statistic in each trace's evidence,
``evidence["decision"] = {"statistic": name, "value": v, "threshold": t, ...}``
(larger = more evidence of the trace). ``bench/calibrate.py`` fits a monotone
map from that value to the observed frequency of "present" on the development
data (the in-sample generator and the second simulator's development split,
never the held-out split or the real shelf) and stores it in
``calibration_maps.json`` beside this module. :func:`confidence_for` turns the
map into the probability that a reported status is right.

Pure: nothing is read at import; the packaged JSON is loaded once, lazily.
"""

from __future__ import annotations

import functools
import json
import math
from collections.abc import Sequence
from dataclasses import dataclass
from importlib import resources
from typing import Any

import numpy as np

__all__ = ["CalibrationMap", "confidence_for", "fit_isotonic", "fit_map", "load_maps",
           "map_key", "probability_present"]

MAPS_FILE = "calibration_maps.json"


def fit_isotonic(x: Sequence[float], y: Sequence[float],
                 sample_weight: Sequence[float] | None = None
                 ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Non-decreasing least-squares fit of ``y`` on ``x`` by pool-adjacent-violators.

    Parameters
    ----------
    x, y : sequences of float
        Statistic values and targets (0/1 outcomes for calibration).
    sample_weight : sequence of float, optional
        Non-negative weights (default 1).

    Returns
    -------
    lo, hi : ndarray
        The smallest and largest ``x`` of each block (blocks are the steps).
    value : ndarray
        The weighted mean of ``y`` in each block: non-decreasing.
    weight : ndarray
        The total weight of each block.

    Ties in ``x`` are pooled first (their targets averaged), as scikit-learn does;
    adjacent blocks with equal values are merged, so the values strictly increase.

    References
    ----------
    M. Ayer, H. D. Brunk, G. M. Ewing, W. T. Reid, E. Silverman, "An empirical
    distribution function for sampling with incomplete information", Ann. Math.
    Stat. 26 (1955) 641-647; R. E. Barlow, D. J. Bartholomew, J. M. Bremner,
    H. D. Brunk, "Statistical inference under order restrictions", Wiley, 1972.
    """
    xa = np.asarray(x, dtype=np.float64).ravel()
    ya = np.asarray(y, dtype=np.float64).ravel()
    wa = (np.ones_like(xa) if sample_weight is None
          else np.asarray(sample_weight, dtype=np.float64).ravel())
    if not (xa.size == ya.size == wa.size) or xa.size == 0:
        raise ValueError("x, y and sample_weight must be non-empty and of equal length")
    if np.any(wa < 0) or not np.all(np.isfinite(xa)) or not np.all(np.isfinite(ya)):
        raise ValueError("weights must be non-negative and values finite")
    keep = wa > 0
    xa, ya, wa = xa[keep], ya[keep], wa[keep]
    order = np.argsort(xa, kind="mergesort")
    xa, ya, wa = xa[order], ya[order], wa[order]
    # pool ties in x
    ux, start = np.unique(xa, return_index=True)
    wsum = np.add.reduceat(wa, start)
    ysum = np.add.reduceat(wa * ya, start)
    # pool adjacent violators on the tie-pooled points (a stack of blocks)
    lo: list[float] = []
    hi: list[float] = []
    val: list[float] = []
    wt: list[float] = []
    for xi, ws, ys in zip(ux, wsum, ysum, strict=True):
        lo.append(float(xi))
        hi.append(float(xi))
        wt.append(float(ws))
        val.append(float(ys / ws))
        while len(val) > 1 and val[-2] >= val[-1]:  # equal neighbours pooled too
            w = wt[-2] + wt[-1]
            v = (val[-2] * wt[-2] + val[-1] * wt[-1]) / w
            hi[-2] = hi[-1]
            val[-2], wt[-2] = v, w
            del lo[-1], hi[-1], val[-1], wt[-1]
    return np.array(lo), np.array(hi), np.array(val), np.array(wt)


@dataclass(frozen=True)
class CalibrationMap:
    """A monotone map from a decision statistic to a probability, never 0 or 1.

    ``x`` are the ends of the blocks of an isotonic fit, ``p`` the block frequencies
    (Laplace-smoothed at the two end blocks): constant over each block's range,
    linear across the gaps between blocks, and held constant beyond the ends;
    every output is clipped to ``[eps, 1 - eps]``.
    """

    statistic: str
    x: tuple[float, ...]
    p: tuple[float, ...]
    eps: float
    n: int
    n_present: int

    def __call__(self, value: float) -> float:
        """Probability that the trace is present at statistic ``value``."""
        v = float(value)
        if math.isnan(v):
            return float("nan")
        if math.isinf(v):
            v = self.x[-1] if v > 0 else self.x[0]
        out = float(np.interp(v, self.x, self.p))
        return min(max(out, self.eps), 1.0 - self.eps)

    def to_json(self) -> dict[str, Any]:
        """A JSON-able dict (round-trips through :meth:`from_json`)."""
        return {"statistic": self.statistic, "x": list(self.x), "p": list(self.p),
                "eps": self.eps, "n": self.n, "n_present": self.n_present}

    @classmethod
    def from_json(cls, d: dict[str, Any]) -> CalibrationMap:
        """Rebuild a map written by :meth:`to_json`."""
        x = tuple(float(v) for v in d["x"])
        p = tuple(float(v) for v in d["p"])
        if len(x) != len(p) or not x or any(b < a for a, b in zip(x, x[1:], strict=False)):
            raise ValueError("calibration map: x must be non-decreasing and match p")
        return cls(str(d.get("statistic", "")), x, p, float(d["eps"]), int(d.get("n", 0)),
                   int(d.get("n_present", 0)))


def fit_map(values: Sequence[float], present: Sequence[bool], *, statistic: str = ""
            ) -> CalibrationMap:
    """Fit a :class:`CalibrationMap` from statistic values and true present/absent labels.

    The two end blocks get the Laplace (rule of succession) estimate
    ``(k + 1) / (n + 2)`` instead of ``k / n``, and ``eps`` is the smaller of
    ``1 / (n + 2)`` over those two blocks, so the map never states certainty the
    data cannot support.

    References
    ----------
    B. Zadrozny, C. Elkan, "Transforming classifier scores into accurate
    multiclass probability estimates", KDD 2002 (isotonic calibration);
    P. S. Laplace, rule of succession (1814).
    """
    v = np.asarray(values, dtype=np.float64)
    y = np.asarray(present, dtype=np.float64)
    ok = np.isfinite(v)
    v, y = v[ok], y[ok]
    lo, hi, val, wt = fit_isotonic(v, y)
    p = val.copy()
    k_first, n_first = val[0] * wt[0], wt[0]
    k_last, n_last = val[-1] * wt[-1], wt[-1]
    p[0] = (k_first + 1) / (n_first + 2)
    p[-1] = (k_last + 1) / (n_last + 2)
    p = np.maximum.accumulate(p)  # smoothing the ends must not break monotonicity
    eps = float(min(1.0 / (n_first + 2), 1.0 / (n_last + 2)))
    # each block holds its value over its whole range [lo, hi]; only the gaps between
    # blocks are interpolated (as scikit-learn's IsotonicRegression predicts)
    xs: list[float] = []
    ps: list[float] = []
    for a, b, q in zip(lo, hi, p, strict=True):
        xs.append(float(a))
        ps.append(float(q))
        if b > a:
            xs.append(float(b))
            ps.append(float(q))
    return CalibrationMap(statistic, tuple(xs), tuple(ps), eps, int(v.size), int(y.sum()))


def map_key(trace_id: str, statistic: str) -> str:
    """The key of a trace's map for one decision statistic in the maps file."""
    return f"{trace_id}|{statistic}"


@functools.cache
def load_maps() -> dict[str, CalibrationMap]:
    """The packaged maps, trace id -> map (empty when the file is absent or has none)."""
    try:
        text = resources.files("app.traces").joinpath(MAPS_FILE).read_text(encoding="utf-8")
    except (FileNotFoundError, OSError):
        return {}
    data = json.loads(text)
    return {tid: CalibrationMap.from_json(m) for tid, m in (data.get("maps") or {}).items()}


def probability_present(trace_id: str, statistic_value: float | None, *,
                        statistic: str | None = None,
                        maps: dict[str, CalibrationMap] | None = None) -> float | None:
    """Calibrated probability that ``trace_id`` is present, or None.

    None when there is no map for the trace, no statistic value, or the map was
    fitted on a different statistic than ``statistic`` (when given).
    """
    if statistic_value is None:
        return None
    table = load_maps() if maps is None else maps
    m = table.get(map_key(trace_id, statistic)) if statistic is not None else None
    if m is None:
        m = table.get(trace_id)
    if m is None or (statistic is not None and m.statistic and statistic != m.statistic):
        return None
    p = m(float(statistic_value))
    return None if math.isnan(p) else p


def confidence_for(trace_id: str, status: str, statistic_value: float | None,
                   fallback: float, *, statistic: str | None = None,
                   maps: dict[str, CalibrationMap] | None = None) -> float:
    """The probability that ``status`` is right for this trace.

    ``present`` -> p, ``absent`` -> 1 - p, where p is :func:`probability_present`;
    ``inconclusive``, or no map or statistic, -> ``fallback`` (the analyser's own
    model-based probability).
    """
    if status not in ("present", "absent"):
        return float(fallback)
    p = probability_present(trace_id, statistic_value, statistic=statistic, maps=maps)
    if p is None:
        return float(fallback)
    return p if status == "present" else 1.0 - p
