"""The one rounding rule of evidence numbers (app/traces/rounding.py)."""

from __future__ import annotations

import math

import numpy as np
import pytest

from app.traces.rounding import round_record, round_sig


@pytest.mark.parametrize("x", [3.14159265, -2.718281828, 1234567.0, 0.000123456789, 1e-12,
                               6.02214076e23, 0.5, 0.0])
@pytest.mark.parametrize("digits", [2, 3, 4, 6])
def test_matches_pythons_significant_digit_format(x: float, digits: int) -> None:
    """round_sig(x, d) equals float(format(x, '.{d}g')): Python's own significant-digit
    formatting (the language reference's format specification mini-language) is the
    outside reference the analysers' inline roundings used before."""
    assert round_sig(x, digits) == pytest.approx(float(format(x, f".{digits}g")), rel=1e-12,
                                                 abs=0.0)


def test_none_nan_and_infinity_become_none_and_arrays_become_lists() -> None:
    """JSON has no NaN or infinity: such evidence values are reported as null."""
    assert round_sig(None) is None
    assert round_sig(math.nan) is None and round_sig(math.inf) is None
    assert round_sig([1.23456, None, math.nan]) == [1.235, None, None]
    assert round_sig(np.array([[1.23456, 2.0]])) == [[1.235, 2.0]]
    assert round_record({"value": 0.123456, "name": "x", "n": 3}) == {
        "value": 0.1235, "name": "x", "n": 3}
    assert round_record(None) is None
