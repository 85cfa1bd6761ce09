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


def test_censored_mle_matches_scipy_censored_normal_fit():
    # Source: scipy.stats.norm.fit with scipy.stats.CensoredData (right censoring), the general-
    # purpose reference; with zero estimation errors the model is exactly the censored normal.
    from scipy import stats

    from tubetrack.health.threshold import censored_normal_mle

    rng = np.random.default_rng(11)
    point = rng.normal(0.048, 0.0055, 120)
    seen = rng.uniform(0.0, 0.06, 120)  # loss reached by the end of the logs
    fail = point <= seen
    y, c = point[fail], seen[~fail]
    mu, tau, se_mu = censored_normal_mle(y, np.zeros(y.size), c, np.zeros(c.size))
    ref_mu, ref_sd = stats.norm.fit(stats.CensoredData.right_censored(
        np.r_[y, c], np.r_[np.zeros(y.size, bool), np.ones(c.size, bool)]))
    assert mu == pytest.approx(ref_mu, rel=5e-4)
    assert tau == pytest.approx(ref_sd, rel=2e-3)

    def nll(m: float, s: float) -> float:
        return -(stats.norm.logpdf(y, m, s).sum() + stats.norm.logsf(c, m, s).sum())

    # and the optimum is at least as good as the reference optimiser's
    assert nll(mu, tau) <= nll(ref_mu, ref_sd) + 1e-9
    assert 0 < se_mu < tau


def test_survivors_remove_the_low_bias_of_failures_only():
    # Seeded simulation: only filaments with a low failure point fail within the window, so the
    # failures alone underestimate the mean; the survivors (right-censored) restore it.
    rng = np.random.default_rng(5)
    n = 300
    point = rng.normal(0.048, 0.0055, n)
    seen = rng.uniform(0.01, 0.052, n)
    fail = point <= seen
    se = np.full(n, 0.0008)
    noisy = point + rng.normal(0, 0.0008, n)
    failed = pd.DataFrame({"loss": noisy[fail], "loss_se": se[fail]})
    surv = pd.DataFrame({"loss": seen[~fail], "loss_se": se[~fail]})
    only = learn_threshold(failed, 0.0513, 0.006, 3)
    both = learn_threshold(failed, 0.0513, 0.006, 3, survivors=surv)
    assert only.mean < 0.048 - 0.003  # biased low: truncated at the losses reached
    assert both.mean == pytest.approx(0.048, abs=3 * np.sqrt(both.sd**2 / fail.sum()) + 0.0005)
    assert both.sd == pytest.approx(0.0055, rel=0.35)
    assert both.n_failures == int(fail.sum()) and both.source == "fleet"
