"""Survival estimators against published worked examples and reference libraries.

Reference libraries (lifelines, reliability) are test-only: the package never imports them.
Versions these checks were written against: lifelines 0.30.3, reliability 0.9.0 (each
assertion against a library also prints the installed version when it fails).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from tubetrack.errors import AnalysisError, InputError
from tubetrack.fleet.forecast import expected_failures_next
from tubetrack.fleet.survival import (
    _weibull_terms,
    cumulative_incidence,
    fit_weibull,
    kaplan_meier,
)

# Source: NIST/SEMATECH e-Handbook of Statistical Methods, sec. 8.4.1.3 (Weibull MLE example).
NIST_FAILURES = [54, 187, 216, 240, 244, 335, 361, 373, 375, 386]
NIST_T = np.array(NIST_FAILURES + [500] * 10, dtype=float)
NIST_E = np.array([True] * 10 + [False] * 10)

# Source: W. Q. Meeker, L. A. Escobar, Statistical Methods for Reliability Data, Wiley 1998,
# bearing-cage field data (from Abernethy et al. 1983): 6 failures among 1703 engines, censored
# counts per 100-h bin as transcribed in the PyMC example "Reliability Statistics and Predictive
# Calibration" (2023).
BEARING_FAIL = np.array([230, 334, 423, 990, 1009, 1510], dtype=float)
BEARING_CENSORED = {
    50: 288,
    150: 148,
    250: 124,
    350: 111,
    450: 106,
    550: 99,
    650: 110,
    750: 114,
    850: 119,
    950: 127,
    1050: 123,
    1150: 93,
    1250: 47,
    1350: 41,
    1450: 27,
    1550: 11,
    1650: 6,
    1850: 1,
    2050: 2,
}


def bearing_cage():
    cens = np.repeat(list(BEARING_CENSORED), list(BEARING_CENSORED.values())).astype(
        float
    )
    t = np.concatenate([BEARING_FAIL, cens])
    e = np.concatenate([np.ones(6, bool), np.zeros(len(cens), bool)])
    return t, e, cens


def test_nist_8_4_1_3_weibull_mle():
    # Source: NIST/SEMATECH e-Handbook 8.4.1.3: eta 606.5280, beta 1.7208, logL -75.135,
    # AIC 154.27, mean 540.737 h.
    fit = fit_weibull(NIST_T, NIST_E)
    # The exact root of the score equations is 606.52756 (also lifelines 0.30); NIST's printed
    # 606.5280 carries their optimiser's last digit, so 1e-3 h on eta.
    assert fit.eta == pytest.approx(606.5280, abs=1e-3)
    assert fit.beta == pytest.approx(1.7208, abs=5e-5)  # printed to 4 decimals
    assert fit.log_likelihood == pytest.approx(
        -75.135, abs=5e-4
    )  # printed to 3 decimals
    assert fit.aic == pytest.approx(154.27, abs=5e-3)
    assert fit.mean == pytest.approx(540.737, abs=5e-3)


def test_automotive_matches_reliability_docs_and_library():
    # Source: Krivtsov & Case (1999), SAE 1999-01-3220, as shipped in reliability.Datasets;
    # reliability's docs print eta 134651, beta 1.15443, 95 % CI eta [72253, 250937],
    # beta [0.698, 1.909] (Wald on the log scale).
    reliability = pytest.importorskip("reliability")
    from reliability.Datasets import automotive
    from reliability.Fitters import Fit_Weibull_2P

    data = automotive()
    t = np.concatenate([data.failures, data.right_censored]).astype(float)
    e = np.concatenate(
        [np.ones(len(data.failures), bool), np.zeros(len(data.right_censored), bool)]
    )
    fit = fit_weibull(t, e)
    assert fit.eta == pytest.approx(134651, rel=5e-6)  # printed to 6 significant digits
    assert fit.beta == pytest.approx(1.15443, abs=5e-6)
    lo, hi = fit.eta_interval()
    assert lo == pytest.approx(72253, abs=1)
    assert hi == pytest.approx(250937, abs=1)
    blo, bhi = fit.beta_interval()
    assert blo == pytest.approx(0.698, abs=5e-4)
    assert bhi == pytest.approx(1.909, abs=5e-4)
    # The reference library itself (version recorded in the failure message).
    ref = Fit_Weibull_2P(
        failures=list(data.failures),
        right_censored=list(data.right_censored),
        show_probability_plot=False,
        print_results=False,
    )
    ver = reliability.__version__
    assert fit.eta == pytest.approx(ref.alpha, rel=1e-4), ver
    assert fit.beta == pytest.approx(ref.beta, rel=1e-4), ver
    assert fit.se_eta == pytest.approx(ref.alpha_SE, rel=1e-3), ver
    assert fit.se_beta == pytest.approx(ref.beta_SE, rel=1e-3), ver
    assert fit.log_likelihood == pytest.approx(ref.loglik, abs=1e-3), ver
    # Bounds on S(t) (delta method on log cumulative hazard) and on B-lives (time bounds).
    sf_lo, sf, sf_hi = ref.distribution.SF(
        CI_type="reliability", CI=0.95, CI_x=[20000.0, 80000.0], show_plot=False
    )
    sb = fit.survival_bounds([20000.0, 80000.0])
    np.testing.assert_allclose(sb["survival"], sf, rtol=1e-4)
    np.testing.assert_allclose(sb["lower"], sf_lo, rtol=1e-4)
    np.testing.assert_allclose(sb["upper"], sf_hi, rtol=1e-4)
    t_lo, t_p, t_hi = ref.distribution.SF(
        CI_type="time", CI=0.95, CI_y=[0.9, 0.5], show_plot=False
    )
    for k, p in enumerate((0.1, 0.5)):
        est, lo_p, hi_p = fit.b_life(p)
        assert est == pytest.approx(t_p[k], rel=1e-4)
        assert lo_p == pytest.approx(t_lo[k], rel=1e-4)
        assert hi_p == pytest.approx(t_hi[k], rel=1e-4)


def test_bearing_cage_heavy_censoring_and_field_forecast():
    # Source: Meeker & Escobar 1998, ch. 8 bearing cage: eta about 11792 h, beta about 2.035,
    # B10 about 3903 h [REFERENCES.md: M/C, soft check]; expected failures of the 1697
    # survivors in the next 300 h about 5.06, Poisson-binomial 95 % interval about [1, 10] [C].
    t, e, cens = bearing_cage()
    assert len(t) == 1703
    fit = fit_weibull(t, e)
    assert fit.eta == pytest.approx(11792, rel=1e-3)
    assert fit.beta == pytest.approx(2.035, abs=1e-3)
    assert fit.b_life(0.10)[0] == pytest.approx(3903, rel=1e-3)
    expected, lo, hi, pmf = expected_failures_next(fit, cens, 300.0)
    assert expected == pytest.approx(5.06, abs=0.01)
    assert (lo, hi) == (1, 10)
    assert pmf.sum() == pytest.approx(1.0)


def test_weibull_matches_lifelines_including_delayed_entry():
    lifelines = pytest.importorskip("lifelines")
    from lifelines import WeibullFitter

    ver = lifelines.__version__
    ref = WeibullFitter().fit(NIST_T, NIST_E)
    fit = fit_weibull(NIST_T, NIST_E)
    assert fit.eta == pytest.approx(ref.lambda_, rel=1e-5), ver
    assert fit.beta == pytest.approx(ref.rho_, rel=1e-5), ver
    assert fit.log_likelihood == pytest.approx(ref.log_likelihood_, abs=1e-6), ver
    se = ref.summary["se(coef)"]
    assert fit.se_eta == pytest.approx(se["lambda_"], rel=1e-3), ver
    assert fit.se_beta == pytest.approx(se["rho_"], rel=1e-3), ver
    # delayed entry on seeded data
    rng = np.random.default_rng(11)
    n = 400
    life = 1000 * rng.weibull(2.0, n)
    entry = rng.uniform(0, 600, n)
    keep = life > entry
    life, entry = life[keep], entry[keep]
    cens_at = entry + rng.uniform(100, 900, len(life))
    t = np.minimum(life, cens_at)
    ev = life <= cens_at
    ref = WeibullFitter().fit(t, ev, entry=entry)
    fit = fit_weibull(t, ev, entry)
    assert fit.eta == pytest.approx(ref.lambda_, rel=1e-4), ver
    assert fit.beta == pytest.approx(ref.rho_, rel=1e-4), ver
    assert fit.log_likelihood == pytest.approx(ref.log_likelihood_, abs=1e-4), ver
    se = ref.summary["se(coef)"]
    assert fit.se_eta == pytest.approx(se["lambda_"], rel=2e-3), ver
    assert fit.se_beta == pytest.approx(se["rho_"], rel=2e-3), ver


def test_weibull_recovers_simulated_parameters_with_truncation_and_censoring():
    # Recovery on seeded data: truth eta 800, beta 2.5; left truncation and right censoring.
    rng = np.random.default_rng(20261202)
    n = 6000
    life = 800 * rng.weibull(2.5, n)
    entry = np.where(rng.random(n) < 0.5, rng.uniform(0, 700, n), 0.0)
    keep = life > entry
    life, entry = life[keep], entry[keep]
    cens = entry + rng.uniform(50, 1200, len(life))
    t = np.minimum(life, cens)
    ev = life <= cens
    fit = fit_weibull(t, ev, entry)
    assert abs(math.log(fit.eta / 800)) < 3 * fit.se_log_eta
    assert abs(math.log(fit.beta / 2.5)) < 3 * fit.se_log_beta
    lo, hi = fit.eta_interval(0.01)
    assert lo < 800 < hi
    # ignoring the truncation biases the fit: the survivors look longer-lived
    naive = fit_weibull(t, ev)
    assert naive.eta > fit.eta * 1.03
    nlo, nhi = naive.eta_interval(0.01)
    assert not nlo < 800 < nhi


def test_analytic_gradient_and_hessian_agree_with_finite_differences():
    from scipy.optimize import approx_fprime

    rng = np.random.default_rng(3)
    t = rng.uniform(1, 10, 30)
    entry = np.where(rng.random(30) < 0.5, t * 0.3, 0.0)
    ev = rng.random(30) < 0.6
    lt, le, has = np.log(t), np.log(np.where(entry > 0, entry, 1)), entry > 0
    th = np.array([1.2, 0.3])
    ll, g, h = _weibull_terms(th, lt, ev.astype(float), le, has)
    f = lambda x: _weibull_terms(x, lt, ev.astype(float), le, has)[0]  # noqa: E731
    np.testing.assert_allclose(g, approx_fprime(th, f, 1e-7), rtol=1e-5, atol=1e-5)
    gf = lambda x: _weibull_terms(x, lt, ev.astype(float), le, has)[1]  # noqa: E731
    num_h = np.column_stack(
        [approx_fprime(th, lambda x, i=i: gf(x)[i], 1e-7) for i in (0, 1)]
    )
    np.testing.assert_allclose(h, num_h, rtol=1e-4, atol=1e-4)


def test_conditional_probability_and_mean_residual_life():
    from scipy.integrate import quad

    fit = fit_weibull(NIST_T, NIST_E)
    a, h = 300.0, 100.0
    expected = 1 - math.exp(
        -(((a + h) / fit.eta) ** fit.beta) + (a / fit.eta) ** fit.beta
    )
    assert fit.conditional_failure_probability(a, h) == pytest.approx(
        expected, rel=1e-12
    )
    # MRL by numerical integration of S(x)/S(a) (scipy.integrate.quad as the reference)
    num = quad(lambda x: math.exp(-((x / fit.eta) ** fit.beta)), a, np.inf)[0]
    assert fit.mean_residual_life(a) == pytest.approx(num / fit.survival(a), rel=1e-7)
    assert fit.mean_residual_life(0.0) == pytest.approx(fit.mean, rel=1e-10)


def test_gehan_6mp_kaplan_meier_table():
    # Source: Gehan (1965) / Freireich 6-MP group; lifelines ships it as load_leukemia (Rx = 0);
    # S = 0.8571, 0.8067, 0.7529, 0.6902, 0.6275, 0.5378, 0.4482 at t = 6, 7, 10, 13, 16, 22,
    # 23; Greenwood SE 0.0764 at t = 6 and 0.1346 at t = 23 (Klein & Moeschberger 2003 ch. 4).
    times = np.array(
        [6, 6, 6, 6, 7, 9, 10, 10, 11, 13, 16, 17, 19, 20, 22, 23, 25, 32, 32, 34, 35],
        dtype=float,
    )
    event = np.array(
        [1, 1, 1, 0, 1, 0, 1, 0, 0, 1, 1, 0, 0, 0, 1, 1, 0, 0, 0, 0, 0], bool
    )
    km = kaplan_meier(times, event)
    s = km.summary.set_index("time")
    np.testing.assert_allclose(
        s.loc[[6, 7, 10, 13, 16, 22, 23], "survival"],
        [0.8571, 0.8067, 0.7529, 0.6902, 0.6275, 0.5378, 0.4482],
        atol=5e-5,  # printed to 4 decimals
    )
    assert s.loc[6, "se"] == pytest.approx(0.0764, abs=5e-5)
    assert s.loc[23, "se"] == pytest.approx(0.1346, abs=5e-5)
    assert list(s["at_risk"]) == [21, 17, 15, 12, 11, 7, 6]
    # and the same data as lifelines ships it
    datasets = pytest.importorskip("lifelines.datasets")
    d = datasets.load_leukemia()
    d = d[d["Rx"] == 0]
    km2 = kaplan_meier(d["t"], d["status"].astype(bool))
    np.testing.assert_allclose(
        km2.summary["survival"], km.summary["survival"], rtol=1e-12
    )


@pytest.mark.parametrize("interval", ["plain", "log", "log-log"])
def test_km_intervals_match_closed_forms(interval):
    # Klein & Moeschberger 2003, eq. 4.3.1-4.3.3 on the Gehan data at t = 13:
    # S = 0.6902, sum d/(n(n-d)) recomputed by hand from the at-risk counts below.
    times = np.array(
        [6, 6, 6, 6, 7, 9, 10, 10, 11, 13, 16, 17, 19, 20, 22, 23, 25, 32, 32, 34, 35],
        dtype=float,
    )
    event = np.array(
        [1, 1, 1, 0, 1, 0, 1, 0, 0, 1, 1, 0, 0, 0, 1, 1, 0, 0, 0, 0, 0], bool
    )
    km = kaplan_meier(times, event, interval=interval)
    row = km.table.set_index("time").loc[13]
    s = (18 / 21) * (16 / 17) * (14 / 15) * (11 / 12)
    v = 3 / (21 * 18) + 1 / (17 * 16) + 1 / (15 * 14) + 1 / (12 * 11)
    z = 1.959963984540054
    if interval == "plain":
        lo, hi = s - z * s * math.sqrt(v), s + z * s * math.sqrt(v)
    elif interval == "log":
        lo, hi = s * math.exp(-z * math.sqrt(v)), s * math.exp(z * math.sqrt(v))
    else:
        theta = math.exp(z * math.sqrt(v) / math.log(s))
        lo, hi = s ** (1 / theta), s**theta
    assert row["survival"] == pytest.approx(s, rel=1e-12)
    assert row["lower"] == pytest.approx(lo, rel=1e-9)
    assert row["upper"] == pytest.approx(min(hi, 1.0), rel=1e-9)


def test_km_matches_lifelines_with_delayed_entry():
    lifelines = pytest.importorskip("lifelines")
    from lifelines import KaplanMeierFitter

    ver = lifelines.__version__
    rng = np.random.default_rng(5)
    n = 300
    life = 500 * rng.weibull(1.8, n)
    entry = np.where(rng.random(n) < 0.4, rng.uniform(0, 300, n), 0.0)
    keep = life > entry
    # continuous times: no entry coincides with an event or censoring time (at a tie we count
    # an entrant as at risk only after its entry, L < t <= T, Klein & Moeschberger 2003 sec. 4.6)
    life, entry = life[keep], entry[keep]
    cens = entry + rng.uniform(50, 700, len(life))
    t = np.minimum(life, cens)
    ev = life <= cens
    ref = KaplanMeierFitter().fit(t, ev, entry=entry)
    km = kaplan_meier(t, ev, entry)
    sf = ref.survival_function_.iloc[:, 0]
    tab = km.table.set_index("time")
    common = tab.index.intersection(sf.index)
    np.testing.assert_allclose(
        tab.loc[common, "survival"], sf.loc[common], rtol=1e-10, err_msg=ver
    )
    ci = ref.confidence_interval_survival_function_
    np.testing.assert_allclose(
        tab.loc[common, "lower"], ci.iloc[:, 0].loc[common], atol=1e-8, err_msg=ver
    )
    np.testing.assert_allclose(
        tab.loc[common, "upper"], ci.iloc[:, 1].loc[common], atol=1e-8, err_msg=ver
    )
    et = ref.event_table
    np.testing.assert_array_equal(tab.loc[common, "at_risk"], et.loc[common, "at_risk"])
    np.testing.assert_array_equal(tab.loc[common, "events"], et.loc[common, "observed"])


def test_km_at_risk_table_counts():
    km = kaplan_meier([2, 3, 3, 5, 8], [1, 0, 1, 1, 0])
    tab = km.at_risk_table([0, 3, 6])
    assert list(tab["at_risk"]) == [5, 4, 1]
    assert list(tab["events"]) == [0, 2, 3]
    assert list(tab["censored"]) == [0, 1, 1]


def test_cumulative_incidence_matches_lifelines_aalen_johansen():
    lifelines = pytest.importorskip("lifelines")
    from lifelines import AalenJohansenFitter

    rng = np.random.default_rng(9)
    n = 200
    t = np.round(rng.uniform(1, 100, n), 1) + rng.uniform(0, 1e-3, n)
    cause = rng.choice(["", "filament", "other"], n, p=[0.4, 0.35, 0.25])
    ci = cumulative_incidence(t, cause)
    code = np.select([cause == "filament", cause == "other"], [1, 2], 0)
    ref = AalenJohansenFitter(calculate_variance=False).fit(
        t, code, event_of_interest=1
    )
    mine = ci[ci["cause"] == "filament"].set_index("time")["cumulative_incidence"]
    theirs = ref.cumulative_density_.iloc[:, 0]
    common = mine.index.intersection(theirs.index)
    assert len(common) > 50
    np.testing.assert_allclose(
        mine.loc[common], theirs.loc[common], atol=1e-10, err_msg=lifelines.__version__
    )
    # the causes add up to 1 - S_KM
    km = kaplan_meier(t, cause != "")
    total = ci.groupby("time")["cumulative_incidence"].sum()
    np.testing.assert_allclose(
        total.to_numpy(), 1 - km.table["survival"].to_numpy(), atol=1e-12
    )


def test_bad_durations_name_the_record():
    with pytest.raises(InputError, match="tube T2: duration is 0.0"):
        kaplan_meier([5.0, 0.0], [True, False], ids=np.array(["T1", "T2"]))
    with pytest.raises(InputError, match="tube B: duration is -3.0"):
        fit_weibull(
            [5.0, -3.0, 4.0], [True, True, False], ids=np.array(["A", "B", "C"])
        )
    with pytest.raises(InputError, match="tube X: entry 9.0 is not before exit 5.0"):
        fit_weibull(
            [5.0, 6.0, 7.0],
            [True, True, True],
            [9.0, 0.0, 0.0],
            ids=np.array(["X", "Y", "Z"]),
        )


def test_too_few_failures_is_a_clear_error():
    with pytest.raises(AnalysisError, match="at least 2 failures"):
        fit_weibull([5.0, 6.0, 7.0], [True, False, False])
