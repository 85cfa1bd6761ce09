"""Threshold learned from the fleet's past filament failures (random-effects pooling)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from tubetrack.health.threshold import learn_threshold, random_effects


def test_random_effects_equal_errors_closed_form():
    # Hand-derivable (DerSimonian & Laird 1986 with equal s_i = s): tau^2 = sample variance - s^2,
    # mean = arithmetic mean, se(mean)^2 = (tau^2 + s^2) / n.
    y = np.array([0.045, 0.050, 0.052, 0.041, 0.058])
    s = 0.002
    mu, tau, se = random_effects(y, np.full(y.size, s))
    assert mu == pytest.approx(y.mean(), rel=1e-12)
    assert tau**2 == pytest.approx(np.var(y, ddof=1) - s**2, rel=1e-9)
    assert se**2 == pytest.approx(np.var(y, ddof=1) / y.size, rel=1e-9)


def test_large_errors_are_not_mistaken_for_spread():
    y = np.array([0.049, 0.051, 0.050])
    mu, tau, _ = random_effects(y, np.full(3, 0.01))
    assert tau == 0.0 and mu == pytest.approx(0.05, abs=1e-9)


def test_default_until_three_failures_then_fleet():
    two = pd.DataFrame({"loss": [0.04, 0.045], "loss_se": [0.002, 0.002]})
    t = learn_threshold(two, 0.0513, 0.006, 3)
    assert (t.source, t.mean, t.sd, t.n_failures) == ("default", 0.0513, 0.006, 2)
    rng = np.random.default_rng(2)
    many = pd.DataFrame({"loss": rng.normal(0.045, 0.004, 40), "loss_se": 0.001})
    t = learn_threshold(many, 0.0513, 0.006, 3)
    assert t.source == "fleet" and t.mean == pytest.approx(0.045, abs=0.002)
    assert t.sd == pytest.approx(0.004, abs=0.0015)
