"""Life data from the store, budget and spares, visit order."""

from __future__ import annotations

import warnings
from datetime import datetime

import numpy as np
import pandas as pd
import pytest

from tubetrack import store
from tubetrack.errors import InputError
from tubetrack.fleet.budget import load_price_list, spares_plan, spend_forecast
from tubetrack.fleet.forecast import poisson_binomial_pmf, replacement_forecast
from tubetrack.fleet.lifedata import (
    WAVEFORM_FACTORS,
    build_life_data,
    load_life_data,
    workload_by_tube,
)
from tubetrack.fleet.survival import fit_weibull
from tubetrack.fleet.visits import visit_order

from .conftest import AS_OF, TRUE_BETA, TRUE_ETA_DAYS


def _tiny_store():
    con = store.connect(":memory:")
    con.execute("""INSERT INTO systems (system_id, site, modality, generator_type) VALUES
        ('S1', 'a', 'radiographic', 'three_phase_6p'), ('S2', 'b', 'mobile', NULL)""")
    con.execute("""INSERT INTO tubes (tube_id, system_id, model_label, installed_at_utc,
        removed_at_utc, removal_reason) VALUES
        ('T1', 'S1', 'M', '2020-01-01', '2024-01-11', 'filament'),
        ('T2', 'S1', 'M', '2024-01-11', NULL, NULL),
        ('T3', 'S2', 'M', '2024-01-05', '2024-03-05', 'upgrade')""")
    con.execute("""INSERT INTO exposures (timestamp_utc, system_id, focal_spot, tube_voltage_kv,
        tube_current_ma, exposure_time_s, exposure_mas, prep_time_s) VALUES
        ('2024-01-01 10:00', 'S1', 'small', 80, 200, 0.1, 20, 1.5),
        ('2024-01-10 10:00', 'S1', 'large', 100, 400, 0.05, 20, 1.0),
        ('2024-02-01 10:00', 'S1', 'large', 70, 100, 0.2, NULL, NULL),
        ('2024-02-01 11:00', 'S2', 'small', 60, 100, 0.1, 10, 0.5)""")
    return con


def test_workload_sql_heat_units_and_hot_time_by_hand():
    con = _tiny_store()
    w = workload_by_tube(con).set_index("tube_id")
    f6 = WAVEFORM_FACTORS["three_phase_6p"]
    assert (
        f6 == 1.35
    )  # Bushong, Radiologic Science for Technologists: three-phase six-pulse
    # T1: two exposures before its removal: 80 kV x 20 mAs and 100 kV x 20 mAs
    assert w.loc["T1", "exposures"] == 2
    assert w.loc["T1", "mas"] == pytest.approx(40.0)
    assert w.loc["T1", "heat_units"] == pytest.approx((80 * 20 + 100 * 20) * 1.35)
    assert w.loc["T1", "hot_time_s"] == pytest.approx(0.1 + 1.5 + 0.05 + 1.0)
    # T2: mAs derived from mA x s when the log omits it; no prep time logged
    assert w.loc["T2", "mas"] == pytest.approx(20.0)
    assert w.loc["T2", "heat_units"] == pytest.approx(70 * 20 * 1.35)
    assert w.loc["T2", "hot_time_s"] == pytest.approx(0.2)
    # T3 on a system without generator type: heat units unknown, not guessed
    assert pd.isna(w.loc["T3", "heat_units"])
    con.close()


def test_life_data_censoring_truncation_and_causes():
    con = _tiny_store()
    life = load_life_data(con, datetime(2024, 3, 1))
    f = life.frame.set_index("tube_id")
    assert f.loc["T1", "status"] == "failed" and f.loc["T1", "cause"] == "filament"
    assert bool(f.loc["T1", "left_truncated"])
    # logs of S1 begin 2024-01-01 10:00: entry = that minus 2020-01-01
    expected_entry = (
        pd.Timestamp("2024-01-01 10:00") - pd.Timestamp("2020-01-01")
    ).total_seconds() / 86400
    assert f.loc["T1", "entry_days"] == pytest.approx(expected_entry)
    assert f.loc["T1", "exit_days"] == pytest.approx(
        (pd.Timestamp("2024-01-11") - pd.Timestamp("2020-01-01")).days
    )
    assert f.loc["T2", "status"] == "in_service" and not f.loc["T2", "failed"]
    # T3 removed for an upgrade after the as-of date: still in service at as_of
    assert f.loc["T3", "status"] == "in_service"
    life2 = load_life_data(con, datetime(2024, 6, 1))
    assert life2.frame.set_index("tube_id").loc["T3", "status"] == "withdrawn"
    assert not life2.frame.set_index("tube_id").loc["T3", "failed"]
    tab = life2.table("days", cause="other")
    assert not tab["event"].any()  # T1 failed of filament: censored for "other"
    con.close()


def test_removal_before_install_names_the_tube():
    tubes = pd.DataFrame(
        {
            "tube_id": ["OK", "BAD"],
            "system_id": ["S", "S"],
            "installed_at_utc": ["2020-01-01", "2021-05-01"],
            "removed_at_utc": ["2020-06-01", "2021-04-01"],
            "removal_reason": ["filament", "anode"],
        }
    )
    with pytest.raises(InputError, match="tube BAD: removed_at_utc 2021-04-01"):
        build_life_data(tubes, as_of=datetime(2022, 1, 1))


def test_recovery_on_simulated_fleet_store(fleet_store):
    # Seeded simulation (conftest): Weibull lives eta 900 d, beta 2.5, logs start 2022-01-01;
    # tubes installed before then are left-truncated.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        life = load_life_data(fleet_store, AS_OF.to_pydatetime())
    tab = life.table("days")
    assert life.frame["left_truncated"].sum() > 10
    fit = fit_weibull(tab["exit"], tab["event"], tab["entry"])
    assert fit.eta_interval(0.01)[0] < TRUE_ETA_DAYS < fit.eta_interval(0.01)[1]
    assert fit.beta_interval(0.01)[0] < TRUE_BETA < fit.beta_interval(0.01)[1]


def test_price_list_csv_and_toml(tmp_path):
    csv = tmp_path / "prices.csv"
    csv.write_text("model_label,price,currency\nTX-A,41000,EUR\nTX-B,52000.5,EUR\n")
    p = load_price_list(csv)
    assert list(p["price"]) == [41000.0, 52000.5]
    toml = tmp_path / "prices.toml"
    toml.write_text(
        'currency = "EUR"\n[prices]\n"TX-A" = 41000\n"TX-B" = { price = 52000, '
        'currency = "CHF" }\n'
    )
    p = load_price_list(toml).set_index("model_label")
    assert p.loc["TX-A", "currency"] == "EUR" and p.loc["TX-B", "currency"] == "CHF"
    bad = tmp_path / "bad.csv"
    bad.write_text("model_label,price\nTX-A,-5\n")
    with pytest.raises(InputError, match="'TX-A' is '-5'"):
        load_price_list(bad)


def _forecast(n=30, seed=1):
    rng = np.random.default_rng(seed)
    fit = fit_weibull(
        np.array([300.0, 420, 500, 610, 700, 800, 950, 1000, 1000, 1000]),
        np.array([1, 1, 1, 1, 1, 1, 1, 0, 0, 0], bool),
    )
    life = pd.DataFrame(
        {
            "tube_id": [f"T{i}" for i in range(n)],
            "system_id": [f"S{i % 10}" for i in range(n)],
            "site": np.where(np.arange(n) % 2 == 0, "north", "south"),
            "model_label": np.where(np.arange(n) % 3 == 0, "A", "B"),
            "status": "in_service",
            "exit_days": rng.uniform(10, 900, n),
            "price": 1000.0,
            "price_currency": "EUR",
        }
    )
    return replacement_forecast(life, fit, as_of=datetime(2025, 1, 1), months=12), life


def test_spend_expectation_exact_and_intervals_bracket_it():
    fc, _ = _forecast()
    prices = pd.DataFrame(
        {
            "model_label": ["A", "B"],
            "price": [10000.0, 25000.0],
            "currency": ["EUR", "EUR"],
        }
    )
    b = spend_forecast(fc, prices, n_sims=20000, seed=3)
    q = b.summary[b.summary["period_kind"] == "quarter"]
    t = fc.tubes.assign(c=np.where(fc.tubes["model_label"] == "A", 10000.0, 25000.0))
    assert q["expected_spend"].sum() == pytest.approx(
        (t["p_replace"] * t["c"]).sum(), rel=1e-9
    )
    m = b.summary[b.summary["period_kind"] == "month"]
    assert m["expected_spend"].sum() == pytest.approx(
        q["expected_spend"].sum(), rel=1e-9
    )
    assert (q["spend_lower_95"] <= q["expected_spend"]).all()
    assert (q["spend_upper_95"] >= q["expected_spend"]).all()
    # one price for everyone: spend = price x Poisson-binomial count (exact quantiles)
    b1 = spend_forecast(fc, None, n_sims=40000, seed=4)  # tube's own price 1000 EUR
    q1 = b1.summary[b1.summary["period_kind"] == "quarter"].iloc[0]
    tq = fc.tubes[
        pd.PeriodIndex(fc.tubes["month"], freq="Q").astype(str) == q1["period"]
    ]
    pmf = poisson_binomial_pmf(
        tq.groupby("tube_id")["p_replace"].sum().clip(0, 1).to_numpy()
    )
    from tubetrack.fleet.forecast import pmf_quantile

    assert q1["spend_upper_95"] == 1000 * pmf_quantile(pmf, 0.975)
    assert q1["spend_lower_95"] == 1000 * pmf_quantile(pmf, 0.025)


def test_spares_is_smallest_stock_meeting_the_service_level():
    fc, _ = _forecast()
    sp = spares_plan(fc, 0.9).summary.set_index("model_label")
    for label, g in fc.per_tube.groupby("model_label"):
        pmf = poisson_binomial_pmf(g["p_replace_horizon"].to_numpy())
        cdf = np.cumsum(pmf)
        s = sp.loc[label, "spares_needed"]
        assert cdf[s] >= 0.9 - 1e-12
        assert s == 0 or cdf[s - 1] < 0.9
    with pytest.raises(InputError, match="service-level"):
        spares_plan(fc, 1.5)


def test_visit_order_ranks_by_risk_times_impact():
    risk = pd.DataFrame(
        {
            "tube_id": ["a1", "b1", "c1", "c2"],
            "system_id": ["A", "B", "C", "C"],
            "age_days": [500.0, 900.0, 100.0, 50.0],
            "p_event": [0.2, 0.3, 0.1, 0.1],
            "p_filament": [np.nan, 0.25, np.nan, np.nan],
            "source": ["fleet", "health+fleet", "fleet", "fleet"],
        }
    )
    systems = pd.DataFrame(
        {
            "system_id": ["A", "B", "C"],
            "site": ["x", "y", "x"],
            "criticality_weight": [3.0, 1.0, 1.0],
            "uptime_target_pct": [np.nan, 99.0, np.nan],
            "scheduled_hours_per_week": [40.0, 40.0, 40.0],
        }
    )
    v = visit_order(risk, systems, horizon_days=30, tube_outage_h=24).summary.set_index(
        "system_id"
    )
    # hand computation: A 0.2 x 3 = 0.6; B: allowance 0.01 x 40 x 30/7 = 1.714 h, outage
    # 24 x 40/168 = 5.714 h -> share 3.333, impact 4.333, score 1.3; C: 1 - 0.9^2 = 0.19
    assert v.loc["A", "score"] == pytest.approx(0.6)
    assert v.loc["B", "contract_share"] == pytest.approx(5.714285714 / 1.714285714)
    assert v.loc["B", "score"] == pytest.approx(0.3 * (1 + 10 / 3))
    assert v.loc["C", "risk"] == pytest.approx(0.19)
    assert list(v.sort_values("rank").index) == ["B", "A", "C"]
    assert v.loc["C", "site_rank"] == 2 and v.loc["A", "site_rank"] == 1
    assert "filament end of life 25.0 %" in v.loc["B", "reason"]
    assert "no uptime target" in v.loc["A", "reason"]


def test_system_without_logs_is_truncated_at_the_fleet_log_start():
    tubes = pd.DataFrame(
        {
            "tube_id": ["A1", "B1"],
            "system_id": ["A", "B"],
            "installed_at_utc": ["2019-01-01", "2019-01-01"],
            "removed_at_utc": [None, None],
        }
    )
    starts = pd.DataFrame(
        {"system_id": ["A"], "log_start_utc": [pd.Timestamp("2022-01-01")]}
    )
    with pytest.warns(UserWarning, match="no logged exposures"):
        life = build_life_data(tubes, as_of=datetime(2023, 1, 1), log_start=starts)
    f = life.frame.set_index("tube_id")
    assert f.loc["B1", "entry_days"] == f.loc["A1", "entry_days"] == 1096.0


def test_spares_and_spend_with_parameter_draws():
    fc0, life = _forecast()
    fit = fit_weibull(
        np.array([300.0, 420, 500, 610, 700, 800, 950, 1000, 1000, 1000]),
        np.array([1, 1, 1, 1, 1, 1, 1, 0, 0, 0], bool),
    )
    fc = replacement_forecast(
        life, fit, as_of=datetime(2025, 1, 1), months=12, parameter_draws=50
    )
    plug = spares_plan(fc0, 0.95).summary.set_index("model_label")
    pred = spares_plan(fc, 0.95).summary.set_index("model_label")
    assert (pred["p_enough"] >= 0.95).all()
    np.testing.assert_allclose(
        pred["expected_replacements"], plug["expected_replacements"]
    )
    # seven failures only: the parameter uncertainty must widen the stock's count interval
    assert (pred["upper_95"] >= plug["upper_95"]).all()
    assert (pred["upper_95"] - pred["lower_95"]).sum() > (
        plug["upper_95"] - plug["lower_95"]
    ).sum()
    b = spend_forecast(fc, None, n_sims=4000, seed=2).summary
    b0 = spend_forecast(fc0, None, n_sims=4000, seed=2).summary
    np.testing.assert_allclose(b["expected_spend"], b0["expected_spend"])
    q, q0 = b[b["period_kind"] == "quarter"], b0[b0["period_kind"] == "quarter"]
    assert (q["spend_upper_95"].to_numpy() >= q0["spend_upper_95"].to_numpy()).all()
