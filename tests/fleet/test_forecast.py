"""Poisson-binomial totals, renewal function and the replacement forecast rule."""

from __future__ import annotations

import dataclasses
import itertools
import math
from datetime import datetime

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from tubetrack.fleet.forecast import (
    count_sum_pmf,
    delayed_renewal,
    health_filament_cdf,
    month_edges,
    pmf_interval,
    pmf_quantile,
    poisson_binomial_pmf,
    renewal_function,
    replacement_forecast,
)
from tubetrack.fleet.survival import fit_weibull


def test_poisson_binomial_equals_brute_force_enumeration():
    p = np.array([0.05, 0.3, 0.5, 0.77, 0.9, 0.12, 0.01, 0.6, 0.45, 0.33])
    brute = np.zeros(len(p) + 1)
    for outcome in itertools.product([0, 1], repeat=len(p)):  # 1024 cases
        o = np.array(outcome)
        brute[o.sum()] += np.prod(np.where(o == 1, p, 1 - p))
    np.testing.assert_allclose(poisson_binomial_pmf(p), brute, atol=1e-15)


def test_poisson_binomial_equal_probabilities_is_binomial():
    # Reference: scipy.stats.binom
    pmf = poisson_binomial_pmf(np.full(40, 0.137))
    np.testing.assert_allclose(
        pmf, stats.binom.pmf(np.arange(41), 40, 0.137), atol=1e-14
    )


def test_poisson_binomial_against_seeded_simulation():
    rng = np.random.default_rng(42)
    p = rng.uniform(0, 0.2, 300)
    pmf = poisson_binomial_pmf(p)
    draws = (rng.random((40000, len(p))) < p).sum(axis=1)
    emp = np.bincount(draws, minlength=len(pmf))[: len(pmf)] / len(draws)
    # binomial sampling error of each frequency: <= 4.5 sd with sd = sqrt(q(1-q)/40000)
    sd = np.sqrt(pmf * (1 - pmf) / len(draws))
    assert np.all(np.abs(emp - pmf) <= 4.5 * sd + 1e-4)
    assert (np.arange(len(pmf)) * pmf).sum() == pytest.approx(p.sum(), rel=1e-12)


def test_count_sum_with_three_point_pmfs_matches_enumeration():
    pmfs = np.array([[0.5, 0.3, 0.2], [0.1, 0.6, 0.3], [0.7, 0.2, 0.1]])
    brute = np.zeros(7)
    for a, b, c in itertools.product(range(3), repeat=3):
        brute[a + b + c] += pmfs[0, a] * pmfs[1, b] * pmfs[2, c]
    np.testing.assert_allclose(count_sum_pmf(pmfs), brute, atol=1e-15)


def test_quantiles_and_intervals():
    pmf = np.array([0.1, 0.2, 0.4, 0.2, 0.1])
    assert pmf_quantile(pmf, 0.3) == 1
    assert pmf_quantile(pmf, 0.31) == 2
    assert pmf_interval(pmf, 0.8) == (0, 3)  # q(0.1) = 0 since P(N <= 0) = 0.1
    assert pmf_interval(pmf, 0.6) == (1, 3)


def test_renewal_function_weibull_beta_2():
    # Source: REFERENCES.md [C]: Weibull beta = 2, eta = 1: M(1) = 0.753691, M(2) = 1.894039.
    t, m = renewal_function(
        lambda x: stats.weibull_min.cdf(x, 2.0, scale=1.0), 2.0, 2000
    )
    assert m[1000] == pytest.approx(
        0.753691, abs=2e-6
    )  # 6 decimals printed; O(h^2) scheme
    assert m[2000] == pytest.approx(1.894039, abs=2e-6)


def test_renewal_function_exponential_is_linear():
    # Poisson process: M(t) = t / mean exactly (Cox, Renewal Theory 1962, ch. 2)
    t, m = renewal_function(lambda x: stats.expon.cdf(x, scale=2.0), 6.0, 1200)
    np.testing.assert_allclose(m, t / 2.0, atol=2e-5)


def test_delayed_renewal_with_ordinary_first_life_is_ordinary_renewal():
    cdf = lambda x: stats.weibull_min.cdf(x, 2.0, scale=1.0)  # noqa: E731
    t, m = renewal_function(cdf, 2.0, 1000)
    md = delayed_renewal(cdf(t)[None, :], m, t)[0]
    np.testing.assert_allclose(md, m, atol=2e-5)


def test_month_edges_split_calendar_months():
    e = month_edges(datetime(2025, 3, 15, 12), 3)
    assert [str(x) for x in e] == [
        "2025-03-15 12:00:00",
        "2025-04-01 00:00:00",
        "2025-05-01 00:00:00",
        "2025-06-01 00:00:00",
    ]
    e = month_edges(datetime(2025, 1, 1), 2)
    assert [str(x) for x in e] == [
        "2025-01-01 00:00:00",
        "2025-02-01 00:00:00",
        "2025-03-01 00:00:00",
    ]
    e = month_edges(datetime(2025, 1, 20), horizon_days=30)
    assert [str(x) for x in e] == [
        "2025-01-20 00:00:00",
        "2025-02-01 00:00:00",
        "2025-02-19 00:00:00",
    ]


def _life(ages, ids=None):
    n = len(ages)
    return pd.DataFrame(
        {
            "tube_id": ids or [f"T{i}" for i in range(n)],
            "system_id": [f"S{i}" for i in range(n)],
            "site": "a",
            "model_label": "M",
            "status": "in_service",
            "exit_days": np.asarray(ages, float),
            "price": 1000.0,
            "price_currency": "EUR",
        }
    )


def _fit():
    # NIST/SEMATECH 8.4.1.3 data used as a convenient fitted model (days as the clock)
    t = np.array([54, 187, 216, 240, 244, 335, 361, 373, 375, 386] + [500] * 10, float)
    return fit_weibull(t, np.arange(20) < 10)


def test_forecast_without_health_uses_conditional_weibull():
    fit = _fit()
    life = _life([100.0, 400.0])
    fc = replacement_forecast(life, fit, as_of=datetime(2025, 1, 1), months=12)
    per = fc.per_tube.set_index("tube_id")
    horizon = (pd.Timestamp("2026-01-01") - pd.Timestamp("2025-01-01")).days
    for tid, age in (("T0", 100.0), ("T1", 400.0)):
        expected = 1 - math.exp(
            -(((age + horizon) / fit.eta) ** fit.beta) + (age / fit.eta) ** fit.beta
        )
        assert per.loc[tid, "p_replace_horizon"] == pytest.approx(expected, rel=1e-9)
    assert fc.summary["expected_replacements"].sum() == pytest.approx(
        per["p_replace_horizon"].sum(), rel=1e-9
    )
    assert any("no health forecasts" in n for n in fc.notes)
    assert (fc.summary["lower_95"] <= fc.summary["upper_95"]).all()


def test_forecast_combines_health_filament_and_fleet_other_causes():
    fit = _fit()
    other = fit_weibull(
        np.array([300.0, 500, 800, 900, 1200, 1500]), np.array([1, 1, 0, 1, 0, 0], bool)
    )
    life = _life([200.0, 200.0])
    rul = pd.DataFrame(
        {
            "tube_id": ["T0"] * 4,
            "focal_spot": ["small", "small", "large", "large"],
            "horizon_days": [30, 60, 30, 60],
            "p_end_of_life": [0.1, 0.2, 0.05, 0.3],
        }
    )
    fc = replacement_forecast(
        life,
        fit,
        as_of=datetime(2025, 1, 1),
        horizon_days=60,
        other_fit=other,
        health_rul_cdf=rul,
    )
    per = fc.per_tube.set_index("tube_id")
    # rule: P = 1 - (1 - P_fil)(1 - P_other); P_fil = 1 - (1 - p_small)(1 - p_large)
    p_fil = 1 - (1 - 0.2) * (1 - 0.3)
    p_oth = other.conditional_failure_probability(200.0, 60.0)
    assert per.loc["T0", "p_replace_horizon"] == pytest.approx(
        1 - (1 - p_fil) * (1 - p_oth), rel=1e-9
    )
    assert per.loc["T0", "source"] == "health+fleet"
    assert per.loc["T1", "source"] == "fleet"
    assert per.loc["T1", "p_replace_horizon"] == pytest.approx(
        fit.conditional_failure_probability(200.0, 60.0), rel=1e-9
    )


def test_health_cdf_interpolates_linearly_and_holds_flat():
    rul = pd.DataFrame(
        {
            "tube_id": ["A", "A"],
            "focal_spot": ["small", "small"],
            "horizon_days": [30, 60],
            "p_end_of_life": [0.3, 0.6],
        }
    )
    out = health_filament_cdf(rul, ["A", "B"], np.array([0.0, 15.0, 45.0, 90.0]))
    np.testing.assert_allclose(out[0], [0.0, 0.15, 0.45, 0.6])
    assert np.isnan(out[1]).all()


def test_renewal_option_adds_replacements_of_replacements():
    fit = fit_weibull(np.array([20.0, 30, 35, 40, 50, 60, 70]), np.ones(7, bool))
    life = _life([45.0] * 5)
    base = replacement_forecast(life, fit, as_of=datetime(2025, 1, 1), months=12)
    ren = replacement_forecast(
        life, fit, as_of=datetime(2025, 1, 1), months=12, renewal=True
    )
    assert (
        ren.summary["expected_replacements"].sum()
        > base.summary["expected_replacements"].sum() + 1.0
    )
    # nearly every old tube fails once; with a ~45 d mean life the position renews many times
    assert base.summary["expected_replacements"].sum() == pytest.approx(5.0, abs=1e-6)


@pytest.mark.parametrize("k", [2, 3])
def test_fft_tree_equals_recursive_dp(k):
    rng = np.random.default_rng(17)
    pm = rng.dirichlet(np.ones(k) * 0.3, 777)  # odd count exercises the padding
    dp = count_sum_pmf(pm, method="dp")
    fft = count_sum_pmf(pm, method="fft")
    # double-precision FFT round-off over ~10 levels: absolute error well below 1e-13
    np.testing.assert_allclose(fft, dp, atol=1e-13)
    assert fft.sum() == pytest.approx(1.0, abs=1e-12)


def _scaled(fit, factor):
    return dataclasses.replace(fit, cov=fit.cov * factor)


def test_parameter_draws_widen_intervals_and_vanish_with_a_sharp_fit():
    fit = _fit()
    rng = np.random.default_rng(4)
    life = _life(list(rng.uniform(50, 450, 40)))
    plug = replacement_forecast(life, fit, as_of=datetime(2025, 1, 1), months=12)
    pred = replacement_forecast(
        life, fit, as_of=datetime(2025, 1, 1), months=12, parameter_draws=200
    )
    # the expected counts stay the plug-in values
    np.testing.assert_allclose(
        pred.summary["expected_replacements"], plug.summary["expected_replacements"]
    )
    width = lambda s: s["cumulative_upper_95"] - s["cumulative_lower_95"]  # noqa: E731
    assert (width(pred.summary) >= width(plug.summary)).all()
    assert width(pred.summary).iloc[-1] > width(plug.summary).iloc[-1]
    assert pred.summary["interval_basis"].iloc[0].startswith("predictive")
    # with (almost) no parameter uncertainty the mixture is the plug-in distribution
    sharp = replacement_forecast(
        life,
        _scaled(fit, 1e-12),
        as_of=datetime(2025, 1, 1),
        months=12,
        parameter_draws=20,
    )
    cols = [
        "lower_80",
        "upper_80",
        "lower_95",
        "upper_95",
        "cumulative_lower_95",
        "cumulative_upper_95",
    ]
    pd.testing.assert_frame_equal(sharp.summary[cols], plug.summary[cols])


def test_predictive_mixture_matches_simulation_of_parameters_and_outcomes():
    # Independent check of the mixture: draw parameters from the same normal, then Bernoulli
    # outcomes of every tube, and compare the distribution of the 12-month total.
    fit = _fit()
    life = _life([100.0, 200.0, 300.0, 400.0] * 5)
    pred = replacement_forecast(
        life, fit, as_of=datetime(2025, 1, 1), months=12, parameter_draws=400, seed=1
    )
    rng = np.random.default_rng(99)
    z = rng.multivariate_normal([math.log(fit.eta), math.log(fit.beta)], fit.cov, 20000)
    eta, beta = np.exp(z[:, :1]), np.exp(z[:, 1:])
    age = life["exit_days"].to_numpy()[None, :]
    h = (pd.Timestamp("2026-01-01") - pd.Timestamp("2025-01-01")).days
    p = -np.expm1(-(((age + h) / eta) ** beta - (age / eta) ** beta))
    totals = (rng.random(p.shape) < p).sum(axis=1)
    lo, hi = np.quantile(totals, [0.025, 0.975])
    last = pred.summary.iloc[-1]
    # quantiles of integer counts from 400 vs 20000 parameter draws agree within one count
    assert abs(last["cumulative_lower_95"] - lo) <= 1
    assert abs(last["cumulative_upper_95"] - hi) <= 1


def test_health_cdf_all_curves_at_once_equal_numpy_interp_per_curve():
    # Reference: numpy.interp curve by curve, focal spots combined as 1 - prod(1 - p); one curve
    # on its own horizons takes the per-curve path.
    rng = np.random.default_rng(4)
    hz = np.array([30, 60, 90, 180, 365])
    rows = []
    for t in ("A", "B", "C"):
        for f in ("small", "large"):
            h = hz if (t, f) != ("C", "large") else np.array([45, 120])
            p = np.sort(rng.random(h.size))
            rows += [{"tube_id": t, "focal_spot": f, "horizon_days": int(a), "p_end_of_life": b}
                     for a, b in zip(h, p, strict=True)]
    rul = pd.DataFrame(rows)
    days = np.array([0.0, 10.0, 30.0, 75.0, 200.0, 400.0])
    out = health_filament_cdf(rul, ["C", "A", "D", "B"], days)
    for i, t in enumerate(["C", "A", "D", "B"]):
        g = rul[rul["tube_id"] == t]
        if g.empty:
            assert np.isnan(out[i]).all()
            continue
        surv = np.ones(days.size)
        for _, c in g.groupby("focal_spot"):
            x = np.r_[0.0, c["horizon_days"].to_numpy(float)]
            y = np.maximum.accumulate(np.r_[0.0, c["p_end_of_life"].to_numpy(float)])
            surv *= 1 - np.interp(days, x, y)
        np.testing.assert_allclose(out[i], 1 - surv, rtol=1e-12, atol=1e-15)
