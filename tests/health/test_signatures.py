"""Poisson trend test (Newton-Raphson GLM) against closed forms and scipy.optimize."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy.optimize import minimize

from tubetrack.health.signatures import poisson_trend, tube_signatures


def test_two_point_closed_form():
    # Hand-derivable: with two time points the MLE reproduces both observed rates, so
    # b1 = ln((y1/n1)/(y0/n0)) / (t1 - t0) and var(b1) = 1/y0 + 1/y1 (McCullagh & Nelder 1989,
    # saturated log-linear model).
    r = poisson_trend([0.0, 1.0], [10, 30], [1000, 1500])
    assert r.slope == pytest.approx(np.log((30 / 1500) / (10 / 1000)), rel=1e-9)
    assert r.slope_se == pytest.approx(np.sqrt(1 / 10 + 1 / 30), rel=1e-9)
    assert r.intercept == pytest.approx(np.log(10 / 1000), rel=1e-9)


def test_matches_scipy_optimize_on_random_data():
    rng = np.random.default_rng(5)
    t = np.arange(52.0) * 7
    n = rng.integers(50, 200, t.size).astype(float)
    y = rng.poisson(n * np.exp(-4 + 0.004 * t))
    r = poisson_trend(t, y, n)

    def nll(b):  # Poisson negative log-likelihood (constant dropped)
        eta = np.log(n) + b[0] + b[1] * t
        return float(np.sum(np.exp(eta) - y * eta))

    ref = minimize(nll, x0=[np.log(y.sum() / n.sum()), 0.0], method="Nelder-Mead",
                   options={"xatol": 1e-10, "fatol": 1e-12, "maxiter": 20000})
    assert r.converged
    assert r.intercept == pytest.approx(ref.x[0], abs=1e-4)
    assert r.slope == pytest.approx(ref.x[1], abs=1e-6)
    assert r.p_increase < 0.01  # the simulated rate rises


def test_flat_rate_is_not_flagged():
    rng = np.random.default_rng(6)
    t = np.arange(60.0) * 7
    n = np.full(t.size, 100.0)
    r = poisson_trend(t, rng.poisson(n * 0.002), n)
    assert r.p_increase > 0.001


def test_rising_arcs_raise_a_concern_with_reason():
    days = pd.date_range("2024-01-01", periods=300, freq="D")
    arcs = np.where(np.arange(300) > 240, 3, 0)
    daily = pd.DataFrame({"day": days, "tube_current_ma": 400.0, "n_exposures": 100, "arc_sum": arcs,
                          "n_measured": 0, "n_ma_miss": 0, "n_voltage": 0,
                          "filament_resistance_med_ohm": np.nan})
    ev = pd.DataFrame(columns=["tube_id", "category", "day", "n_events"])
    s = tube_signatures(daily, ev, pd.Timestamp("2024-10-27"))
    assert "arc_rising" in s["signals"] and s["level"] == 2 and s["unforeseeable"]
    assert "arc rate rising" in s["reasons"][0]
