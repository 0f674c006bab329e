"""Calibration maps (app/traces/calibration.py) against outside references."""

from __future__ import annotations

import json

import numpy as np
import pytest

from app.traces import calibration as cal


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
@pytest.mark.parametrize("ties", [False, True])
def test_isotonic_matches_scikit_learn(seed: int, ties: bool) -> None:
    """Pool-adjacent-violators (Ayer et al. 1955) gives scikit-learn's IsotonicRegression
    fit (reference library output) at every sample, with and without ties and weights."""
    from sklearn.isotonic import IsotonicRegression

    rng = np.random.default_rng(seed)
    n = 300
    x = rng.normal(size=n)
    if ties:
        x = np.round(x, 1)
    y = (rng.random(n) < 1 / (1 + np.exp(-2 * x))).astype(float)
    w = rng.uniform(0.2, 3.0, n)
    lo, hi, val, _ = cal.fit_isotonic(x, y, sample_weight=w)
    ours = np.empty(n)
    for a, b, v in zip(lo, hi, val, strict=True):
        ours[(x >= a) & (x <= b)] = v
    ref = IsotonicRegression(increasing=True).fit(x, y, sample_weight=w).predict(x)
    np.testing.assert_allclose(ours, ref, atol=1e-10)
    assert np.all(np.diff(val) > 0)  # blocks are strictly increasing after pooling


def test_isotonic_textbook_example() -> None:
    """Hand-worked PAVA (Barlow et al. 1972): y = 1, 3, 2, 4 -> 1, 2.5, 2.5, 4."""
    lo, hi, val, wt = cal.fit_isotonic([1, 2, 3, 4], [1, 3, 2, 4])
    assert list(val) == [1.0, 2.5, 4.0]
    assert list(lo) == [1, 2, 4] and list(hi) == [1, 3, 4] and list(wt) == [1, 2, 1]


def test_map_never_certain_and_monotone() -> None:
    """Perfectly separated labels: the Laplace rule of succession (k+1)/(n+2) keeps the
    ends off 0 and 1 (Laplace 1814; common practice for calibration, no source)."""
    x = np.r_[np.linspace(0, 1, 20), np.linspace(2, 3, 30)]
    y = np.r_[np.zeros(20), np.ones(30)]
    m = cal.fit_map(x, y, statistic="s")
    assert m(-10) == pytest.approx(1 / 22)
    assert m(10) == pytest.approx(31 / 32)
    assert m.eps == pytest.approx(1 / 32)
    grid = np.linspace(-1, 4, 200)
    vals = [m(g) for g in grid]
    assert all(b >= a for a, b in zip(vals, vals[1:], strict=False))
    assert 0 < min(vals) and max(vals) < 1
    # midway between the two block centres (0.5 and 2.5) the linear interpolation is halfway
    assert m(1.5) == pytest.approx((1 / 22 + 31 / 32) / 2)


def test_map_json_round_trip_and_confidence(tmp_path) -> None:
    """JSON round trip; confidence_for: present -> p, absent -> 1 - p, inconclusive or no
    map -> the analyser's fallback (the rule stated in REPORT_CONTRACT.md)."""
    rng = np.random.default_rng(5)
    x = rng.normal(size=400)
    y = rng.random(400) < 1 / (1 + np.exp(-3 * x))
    m = cal.fit_map(x, y, statistic="z")
    back = cal.CalibrationMap.from_json(json.loads(json.dumps(m.to_json())))
    assert back == m
    maps = {"zero_filling": back}
    p = cal.probability_present("zero_filling", 0.7, maps=maps)
    assert p == pytest.approx(m(0.7))
    assert cal.confidence_for("zero_filling", "present", 0.7, 0.5, maps=maps) == pytest.approx(p)
    assert cal.confidence_for("zero_filling", "absent", 0.7, 0.5, maps=maps) == pytest.approx(
        1 - p)
    assert cal.confidence_for("zero_filling", "inconclusive", 0.7, 0.33, maps=maps) == 0.33
    assert cal.confidence_for("resampling", "present", 0.7, 0.61, maps=maps) == 0.61
    assert cal.confidence_for("zero_filling", "present", None, 0.61, maps=maps) == 0.61
    assert cal.probability_present("zero_filling", 0.7, statistic="other", maps=maps) is None
    # the fitted map's probabilities follow the logistic truth it was drawn from (n = 400)
    assert abs(m(1.0) - 1 / (1 + np.exp(-3.0))) < 0.15


def test_packaged_maps_load() -> None:
    """The packaged JSON loads, and every map in it is monotone and inside (0, 1)."""
    for tid, m in cal.load_maps().items():
        assert tid
        assert all(0 < v < 1 for v in m.p)
        assert all(b >= a for a, b in zip(m.p, m.p[1:], strict=False))


def test_one_map_per_trace_and_statistic():
    """A trace that measures complex data and magnitude images with different statistics
    gets one map for each, looked up by the statistic the report states; a statistic with
    no map of its own keeps the analyser's probability (None here). Truth built: for "a"
    present above 0, for "b" present only above 10 (isotonic calibration, Zadrozny and
    Elkan 2002)."""
    from app.traces.calibration import fit_map, map_key, probability_present

    up = fit_map([-1.0] * 20 + [1.0] * 20, [False] * 20 + [True] * 20, statistic="a")
    down = fit_map([1.0] * 20 + [20.0] * 20, [False] * 20 + [True] * 20, statistic="b")
    maps = {map_key("t", "a"): up, map_key("t", "b"): down}
    assert probability_present("t", 1.0, statistic="a", maps=maps) > 0.9
    assert probability_present("t", 1.0, statistic="b", maps=maps) < 0.1
    assert probability_present("t", 1.0, statistic="c", maps=maps) is None


def test_map_predicts_as_scikit_learn_isotonic_regression_inside_the_data():
    """Between the two end blocks (which get the rule-of-succession estimate), the map
    equals scikit-learn's IsotonicRegression(out_of_bounds="clip").predict at the fitted
    values and at points inside and between blocks: constant over a block's range,
    linear across gaps (scikit-learn is the outside reference)."""
    from sklearn.isotonic import IsotonicRegression

    from app.traces.calibration import fit_map

    rng = np.random.default_rng(5)
    x = np.sort(rng.uniform(-3, 3, 300))
    y = rng.random(300) < 1 / (1 + np.exp(-2 * x))
    cmap = fit_map(x, y)
    ref = IsotonicRegression(out_of_bounds="clip").fit(x, y.astype(float))
    # from the second block's start to the second-last block's end: the end blocks
    # and the gaps next to them carry the smoothed end values
    ends = sorted(set(cmap.x))
    probe = np.concatenate([x, np.linspace(-3, 3, 97)])
    inner = probe[(probe >= ends[2]) & (probe <= ends[-3])]
    assert inner.size > 100
    np.testing.assert_allclose([cmap(v) for v in inner], ref.predict(inner), atol=1e-12)
