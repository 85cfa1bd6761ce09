"""Change points: PELT with an O(1) piecewise-linear cost; level shifts with a common slope."""

from __future__ import annotations

import numpy as np
import pytest

from tubetrack.health import segments


def test_cost_equals_ruptures_linear_cost():
    # Reference: ruptures' own CostLinear (least-squares regression cost, ruptures 1.1.x) on the
    # design [1, t]; our prefix-sum cost must give the same residual sum of squares.
    from ruptures.costs import CostLinear

    rng = np.random.default_rng(11)
    t = np.arange(120.0)
    y = 0.01 * t + rng.normal(0, 0.3, t.size)
    ours = segments.CostPiecewiseLinear().fit(np.column_stack([t, y]))
    ref = CostLinear().fit(np.column_stack([y, np.ones_like(t), t]))
    for a, b in [(0, 120), (5, 40), (37, 101), (60, 64)]:
        assert ours.error(a, b) == pytest.approx(ref.error(a, b), rel=1e-8, abs=1e-9)


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_known_change_point_is_found_exactly(seed):
    # seeded simulation: slow drift, 1.5 % level shift at index 613, noise 0.3 %
    rng = np.random.default_rng(seed)
    t = np.arange(1000.0)
    y = -5e-5 * t + rng.normal(0, 0.003, t.size)
    y[613:] += 0.015
    assert segments.detect_breaks(t, y) == [613]


def test_no_change_point_in_a_straight_drift():
    rng = np.random.default_rng(7)
    t = np.arange(800.0)
    y = -4e-5 * t + rng.normal(0, 0.003, t.size)
    assert segments.detect_breaks(t, y) == []


def test_step_fit_recovers_shift_and_remove_keeps_wear():
    rng = np.random.default_rng(9)
    t = np.arange(400.0)
    slope = -6e-5
    y = slope * t + rng.normal(0, 0.002, t.size)
    y[t >= 200] += 0.02
    w = np.full(t.size, 1 / 0.002**2)
    delta, se = segments.step_fit(t, y, w, 200.0)
    assert abs(delta - 0.02) < 3 * se and se < 0.001
    corrected, deltas = segments.remove_shifts(t, y, w, [200.0])
    # the wear (slope) survives the correction: the whole series is one line again
    b = np.polyfit(t, corrected, 1)[0]
    assert b == pytest.approx(slope, rel=0.05)
    kept = segments.level_shifts(t, y, w, [(200.0, "detected"), (100.0, "calibration")])
    assert [k[0] for k in kept] == [200.0]


def test_vectorised_pelt_reproduces_ruptures():
    # the numpy PELT must give ruptures' own break points (same recursion, pruning, tie-breaking)
    import ruptures as rpt

    rng = np.random.default_rng(5)
    for _ in range(60):
        n = int(rng.integers(25, 130))
        ms = int(rng.integers(3, 12))
        t = np.sort(rng.uniform(0, 400, n))
        y = -1e-4 * t + rng.normal(0, 0.003, n)
        for k in rng.integers(0, n, 2):
            y[k:] += rng.normal(0, 0.01)
        pen = 3.0 * np.var(np.diff(y)) * np.log(n)
        sig = np.column_stack([t, y])
        ref = rpt.Pelt(custom_cost=segments.CostPiecewiseLinear(), min_size=ms, jump=1).fit(sig).predict(pen=pen)
        assert segments.pelt(segments.CostPiecewiseLinear().fit(sig), pen, ms) == ref
