"""Per-tube pipeline on seeded simulations with closed-form physics (known truth)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from tubetrack.health import sql
from tubetrack.health.degradation import PowerLawPhysics
from tubetrack.health.forecast import analyse_tube
from tubetrack.health.levels import assign_levels
from tubetrack.health.params import HealthParams

RATE = 1.2e-6  # the analysis' physics: relative diameter loss per hot second at 400 mA [1/s]


def _run(mem_store, sim, load, *, k_true=1.0, n_days=500, shift_day=None, params=None, seed=1):
    exp, truth = sim(seed, n_days=n_days, k_true=k_true, rate_at_400ma_per_s=RATE, shift_day=shift_day)
    tubes = pd.DataFrame({"tube_id": ["T1"], "system_id": ["S1"],
                          "installed_at_utc": [pd.Timestamp("2024-01-01")],
                          "removed_at_utc": [pd.NaT], "removal_reason": [None]})
    load(mem_store, exp, tubes)
    daily = sql.load_daily(mem_store)
    as_of = pd.Timestamp("2024-01-01") + pd.Timedelta(days=n_days)
    meta = {"tube_id": "T1", "system_id": "S1", "installed_at_utc": "2024-01-01", "as_of": as_of}
    out = analyse_tube(daily, meta, params or HealthParams(prior_k_sd=5.0), physics=PowerLawPhysics(RATE))
    return out, truth


def test_recovers_known_wear_slope(mem_store, sim, load):
    # seeded simulation: the wire thins 1.4x faster than the analysis' physics predicts
    out, truth = _run(mem_store, sim, load, k_true=1.4)
    st = out["states"][0]
    k_se = np.sqrt(st["cov"][1, 1])
    assert abs(st["k"] - 1.4) < 3 * k_se and k_se < 0.1
    assert abs(st["loss_now"] - truth["loss"].iloc[-1]) < 3 * st["loss_se"] + 0.001


def test_known_threshold_crossing_time_inside_interval(mem_store, sim, load):
    out, truth = _run(mem_store, sim, load, params=HealthParams(prior_k_sd=5.0, eol_diameter_loss_sd=1e-4))
    rate_per_day = float(truth["loss"].diff().iloc[-200:].mean())
    true_t = (0.0513 - float(truth["loss"].iloc[-1])) / rate_per_day
    s = out["summary"].iloc[0]
    assert s["rul_days_p10"] <= true_t <= s["rul_days_p90"]
    assert s["rul_days_p50"] == pytest.approx(true_t, rel=0.1)
    # the exposure-count forecast is the day forecast times the recent exposures per day
    assert s["rul_exposures_p50"] == pytest.approx(s["rul_days_p50"] * s["exposures_per_day"], rel=1e-9)


def test_known_change_point_found_and_wear_carried_over(mem_store, sim, load):
    out, truth = _run(mem_store, sim, load, n_days=600, shift_day=300)
    cp = out["changepoints"]
    assert set(cp["day"]) == {pd.Timestamp("2024-01-01") + pd.Timedelta(days=300)}
    assert len(cp) == 3 and (cp["jump_pct"].between(1.5, 2.5)).all()
    st = out["states"][0]
    # the 2 % sensor step is removed, the wear is not reset
    assert abs(st["loss_now"] - truth["loss"].iloc[-1]) < 3 * st["loss_se"] + 0.001


def test_short_history_gives_wide_interval_and_reason(mem_store, sim, load):
    short, _ = _run(mem_store, sim, load, n_days=40, params=HealthParams(), seed=3)
    s = assign_levels(short["summary"], 0.0513, 90, 3650)
    assert "too little history" in s["reason"].iloc[0]
    assert s["health_rank"].iloc[0] >= 1
    row = s.iloc[0]
    assert (row["rul_days_p90"] - row["rul_days_p10"]) / max(row["rul_days_p50"], 1) > 0.5


def test_tube_without_filament_current_uses_workload_and_physics_only(mem_store, sim, load):
    # a DICOM-only tube: workload known, filament current never logged
    exp, _ = sim(4, n_days=200, rate_at_400ma_per_s=RATE)
    exp["filament_current_a"] = np.nan
    tubes = pd.DataFrame({"tube_id": ["T1"], "system_id": ["S1"],
                          "installed_at_utc": [pd.Timestamp("2024-01-01")],
                          "removed_at_utc": [pd.NaT], "removal_reason": [None]})
    load(mem_store, exp, tubes)
    daily = sql.load_daily(mem_store)
    meta = {"tube_id": "T1", "system_id": "S1", "installed_at_utc": "2024-01-01",
            "as_of": pd.Timestamp("2024-07-19")}
    out = analyse_tube(daily, meta, HealthParams(), physics=PowerLawPhysics(RATE))
    s = assign_levels(out["summary"], 0.0513, 90, 3650)
    assert "no filament current logged" in s["reason"].iloc[0]
    st = out["states"][0]
    # prior-only wear factor (k ~ N(1, 0.5^2)): the loss is the physics prediction, widely uncertain
    assert st["k"] == pytest.approx(1.0) and np.sqrt(st["cov"][1, 1]) == pytest.approx(0.5)
    assert s["rul_days_p90"].iloc[0] > 2 * s["rul_days_p10"].iloc[0]


def test_threshold_draws_are_conditional_on_survival():
    # Source: scipy.stats.truncnorm (the normal truncated below at the present loss) as the
    # reference distribution; Kolmogorov-Smirnov test of the draws against it.
    from scipy import stats

    from tubetrack.health.forecast import threshold_given_survival

    rng = np.random.default_rng(3)
    mu, sd, now = 0.048, 0.0055, 0.050
    d = threshold_given_survival(np.full(20_000, now), mu, sd, np.inf, rng.random(20_000))
    assert d.min() >= now
    ref = stats.truncnorm((now - mu) / sd, np.inf, loc=mu, scale=sd)
    assert stats.kstest(d, ref.cdf).pvalue > 0.01
    # Student t: the conditional CDF is (F(x) - F(now)) / (1 - F(now))
    dt = threshold_given_survival(np.full(20_000, now), mu, sd, 6.0, rng.random(20_000))
    f = stats.t(6.0, loc=mu, scale=sd)
    assert stats.kstest(dt, lambda x: (f.cdf(x) - f.cdf(now)) / f.sf(now)).pvalue > 0.01


def test_tube_past_the_fleet_median_threshold_is_not_forecast_dead():
    # A running filament whose loss already exceeds the threshold mean: its own failure point is
    # above its present loss, so the median remaining life is (median of the truncated threshold
    # - loss) / wear rate (deterministic wear, no workload spread), not zero.
    from dataclasses import replace

    from scipy import stats

    from tubetrack.health.forecast import forecast_from_state
    from tubetrack.health.params import HealthParams

    p = replace(HealthParams(), n_samples=40_000, workload_sd=1e-9, workload_sd_unknown=1e-9)
    state = {"tube_id": "T", "focal_spot": "large", "a": 0.0, "k": 1.0, "cov": np.eye(2) * 1e-20,
             "x_now": 0.050, "x_pre_sd": 0.0, "rate_phys_per_day": 1e-4, "exposures_per_day": 40.0,
             "workload_cv": float("nan")}
    fc = forecast_from_state(state, 0.048, 0.0055, p)
    med = stats.truncnorm((0.050 - 0.048) / 0.0055, np.inf, loc=0.048, scale=0.0055).median()
    assert fc["rul_days_p50"] == pytest.approx((med - 0.050) / 1e-4, rel=0.03)
    assert fc["rul_days_p10"] > 0


def _analyse_at(mem_store, sim, load, n_days, as_of_day, params=None, seed=11, meta_extra=None,
                shift_day=None):
    """One simulated tube logged for n_days, analysed as of day ``as_of_day`` after its start."""
    exp, truth = sim(seed, n_days=n_days, rate_at_400ma_per_s=RATE, shift_day=shift_day)
    tubes = pd.DataFrame({"tube_id": ["T1"], "system_id": ["S1"],
                          "installed_at_utc": [pd.Timestamp("2024-01-01")],
                          "removed_at_utc": [pd.NaT], "removal_reason": [None]})
    load(mem_store, exp, tubes)
    daily = sql.load_daily(mem_store)
    mem_store.execute("DELETE FROM exposures; DELETE FROM tubes")
    meta = {"tube_id": "T1", "system_id": "S1", "installed_at_utc": "2024-01-01",
            "as_of": pd.Timestamp("2024-01-01") + pd.Timedelta(days=as_of_day), "removal_reason": None,
            **(meta_extra or {})}
    p = params or HealthParams(prior_k_sd=5.0, eol_diameter_loss_sd=1e-4, stale_after_days=14)
    return analyse_tube(daily, meta, p, physics=PowerLawPhysics(RATE)), truth


def test_stopped_logs_carry_the_recent_wear_on_to_the_analysis_date(mem_store, sim, load):
    # logs end after day 400; analysed at the end of the logs and 120 days later
    at_end, truth = _analyse_at(mem_store, sim, load, 400, 400)
    later, _ = _analyse_at(mem_store, sim, load, 400, 520)
    e, s = at_end["summary"].iloc[0], later["summary"].iloc[0]
    assert not e["logs_stopped"] and e["unlogged_days_at_end"] == 0
    assert s["logs_stopped"] and s["unlogged_days_at_end"] == 120
    # the same recent workload per day (the window ends with the logs), carried over the 120
    # silent days: loss = a + k (x_end + 120 r)
    se, ss = at_end["states"][0], later["states"][0]
    assert ss["rate_phys_per_day"] == pytest.approx(se["rate_phys_per_day"], rel=1e-12)
    assert ss["k"] == pytest.approx(se["k"], rel=1e-12)
    assert ss["loss_now"] == pytest.approx(se["loss_now"] + se["k"] * 120 * se["rate_phys_per_day"], rel=1e-9)
    assert s["diameter_loss_pct"] == pytest.approx(100 * ss["loss_now"], rel=1e-12)
    # and more uncertain (the workload's spread over the gap)
    assert s["diameter_loss_pct_se"] > e["diameter_loss_pct_se"]
    # the linear projection at that rate: 120 days less to go (Monte Carlo, 2000 draws)
    assert s["rul_days_p50"] == pytest.approx(e["rul_days_p50"] - 120, rel=0.03)
    # the same tube without the rule (the old behaviour) would be forecast as never wearing
    off, _ = _analyse_at(mem_store, sim, load, 400, 520,
                         params=HealthParams(prior_k_sd=5.0, eol_diameter_loss_sd=1e-4, stale_after_days=10_000))
    assert off["summary"].iloc[0]["rul_days_p50"] == HealthParams().max_rul_days


def test_a_short_pause_is_not_stopped_logs(mem_store, sim, load):
    at_end, _ = _analyse_at(mem_store, sim, load, 400, 400)
    pause, _ = _analyse_at(mem_store, sim, load, 400, 410)
    e, s = at_end["summary"].iloc[0], pause["summary"].iloc[0]
    assert not s["logs_stopped"] and s["unlogged_days_at_end"] == 10
    assert s["diameter_loss_pct"] == e["diameter_loss_pct"]


@pytest.mark.parametrize(("silent_days", "stopped"), [(13, False), (14, True)])
def test_stopped_logs_start_at_the_configured_number_of_silent_days(mem_store, sim, load, silent_days, stopped):
    # logs on days 0..399: analysed as of day 400 + n, the n days before it have no exposure
    out, _ = _analyse_at(mem_store, sim, load, 400, 400 + silent_days)
    s = out["summary"].iloc[0]
    assert s["unlogged_days_at_end"] == silent_days and bool(s["logs_stopped"]) is stopped


def test_a_removed_tube_without_a_reason_is_not_stopped_logs(mem_store, sim, load):
    out, _ = _analyse_at(mem_store, sim, load, 400, 520, meta_extra={"removed": True})
    assert not out["summary"].iloc[0]["logs_stopped"]


def test_stopped_logs_fit_the_same_span_as_at_the_end_of_the_logs(mem_store, sim, load):
    # a 2 % sensor step 30 days before the logs end: the fit reaches back min_fit_days from the
    # newest log, not from the analysis date (120 silent days would leave it 60 days of data)
    p = HealthParams(prior_k_sd=5.0, eol_diameter_loss_sd=1e-4)
    at_end, truth = _analyse_at(mem_store, sim, load, 400, 400, params=p, shift_day=370)
    later, _ = _analyse_at(mem_store, sim, load, 400, 520, params=p, shift_day=370)
    se, sl = at_end["states"][0], later["states"][0]
    assert sl["n_days"] == se["n_days"] >= 150
    assert sl["k"] == pytest.approx(se["k"], rel=1e-12)
    assert abs(se["loss_now"] - truth["loss"].iloc[-1]) < 3 * se["loss_se"] + 0.001
    assert sl["loss_now"] > se["loss_now"]
