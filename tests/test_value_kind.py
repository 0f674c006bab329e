"""value_kind helpers against published definitions."""

from __future__ import annotations

import numpy as np
import pytest

from app.traces import value_kind as vk


def test_circular_spread_of_identical_phases_is_zero():
    """Mardia and Jupp 2000, sec. 2.3: equal phases have R = 1 and circular standard
    deviation 0. Float rounding of the mean phasor can leave R a hair above 1, which
    must not give NaN (seeded draws; without the clamp one of them does)."""
    import warnings

    rng = np.random.default_rng(0)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        for _ in range(20000):
            n = int(rng.integers(2, 50))
            z = np.full(n, np.exp(1j * rng.uniform(-3.14, 3.14))) * rng.uniform(0.1, 10, n)
            assert vk.circular_spread(z) == pytest.approx(0.0, abs=1e-7)
