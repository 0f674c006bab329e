"""Rounding of evidence numbers: one rule for every analyser.

Evidence is for people and for figures: a few significant digits say everything
a reviewer can read, keep the reports small and make them compare equal across
runs whose last bits differ.
"""

from __future__ import annotations

from typing import Any

import numpy as np


def round_sig(values: Any, digits: int = 4) -> Any:
    """Round floats (a scalar, a sequence or an array) to ``digits`` significant digits.

    ``None`` stays ``None``; NaN and infinities become ``None`` (JSON has no such
    numbers); denormal-scale values round to 0. Arrays and sequences come back as
    (nested) lists.

    Examples
    --------
    >>> round_sig(3.14159265)
    3.142
    >>> round_sig([0.000123456, None, float("nan")], digits=2)
    [0.00012, None, None]
    """
    if values is None:
        return None
    if isinstance(values, list | tuple) and any(v is None for v in values):
        return [round_sig(v, digits) for v in values]
    a = np.asarray(values, dtype=np.float64)
    a = np.where(np.abs(a) < 1e-200, 0.0, a)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        mag = np.where(a == 0, 0, np.floor(np.log10(np.abs(np.where(a == 0, 1, a)))))
        factor = 10.0 ** (digits - 1 - mag)
        out = np.round(a * factor) / factor
    out = np.where(np.isfinite(a), out, np.nan)
    if out.ndim == 0:
        f = float(out)
        return None if not np.isfinite(f) else f
    if np.isfinite(out).all():
        return out.tolist()
    return np.where(np.isfinite(out), out, None).tolist()


def round_record(record: dict[str, Any] | None, digits: int = 4) -> dict[str, Any] | None:
    """A decision record (or any flat dict) with its float values rounded."""
    if record is None:
        return None
    return {k: (round_sig(v, digits) if isinstance(v, float) else v) for k, v in record.items()}
