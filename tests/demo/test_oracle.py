"""The information-bound diagnostic: truth read right, substituted right, the rest the backtest."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from tests.conftest import SAMPLE_LOGS
from tubetrack import store
from tubetrack.demo import oracle
from tubetrack.health import api
from tubetrack.health.forecast import forecast_from_state
from tubetrack.health.params import HealthParams


def test_failure_point_is_the_mean_loss_at_burn_through():
    # the demo's rule (tubetrack.demo.aging): the wire burns through when hot-spot factor x mean
    # loss reaches the drawn threshold, so for the filament that failed, its failure point is the
    # mean loss it had at the end
    truth = pd.read_csv(SAMPLE_LOGS / "truth.csv")
    fp = oracle.failure_points(truth).set_index(["tube_id", "focal_spot"])["failure_point"]
    failed = truth[truth["true_cause"].eq("filament")]
    assert len(failed) >= 10
    for row in failed.itertuples():
        focal = row.failed_focal_spot
        at_end = getattr(row, f"diameter_loss_{focal}_at_end")
        # burnt through at that point or just past it (the last exposure's wear; < 0.1 %)
        assert fp[(row.tube_id, focal)] <= at_end + 1e-6
        assert at_end == pytest.approx(fp[(row.tube_id, focal)], rel=1e-3)
        other = "small" if focal == "large" else "large"
        assert fp[(row.tube_id, other)] > getattr(row, f"diameter_loss_{other}_at_end")


def test_true_loss_is_interpolated_in_time_and_absent_outside_the_series():
    days = pd.date_range("2024-01-01", periods=5, freq="7D")
    diameter = pd.DataFrame({
        "tube_id": ["A"] * 5 + ["B"] * 2,
        "focal_spot": ["large"] * 5 + ["small"] * 2,
        "day": list(days) + [pd.Timestamp("2024-03-01"), pd.Timestamp("2024-03-08")],
        "diameter_loss": [0.01, 0.012, 0.013, 0.017, 0.02, 0.001, 0.002],
    })
    cut = pd.Timestamp("2024-01-20")  # the day before is 2024-01-19, between weeks 2 and 3
    got = oracle.true_loss_at(diameter, cut)
    # by hand: 2024-01-19 is 4 of the 7 days from 2024-01-15 (0.013) to 2024-01-22 (0.017)
    assert got[("A", "large")] == pytest.approx(0.013 + 4 / 7 * 0.004, rel=1e-12)
    assert ("B", "small") not in got  # its series starts later


def test_known_loss_and_failure_point_give_the_lognormal_of_the_workload():
    # With the loss and the failure point known and k fixed, the remaining life is
    # (D - L) / (k r w) with w log-normal(0, s): itself log-normal with median (D - L) / (k r).
    state = {"tube_id": "A", "focal_spot": "large", "a": 0.0, "k": 1.2,
             "cov": np.array([[1e-8, 0.0], [0.0, 1e-16]]), "x_now": 0.01, "x_pre_sd": 0.002,
             "rate_phys_per_day": 2e-5, "exposures_per_day": 40.0, "workload_cv": 0.25}
    known = oracle.state_with_loss(state, 0.031)
    p = replace(HealthParams(), n_samples=200_000)
    fc = forecast_from_state(known, 0.045, oracle.KNOWN_POINT_SD, p)
    c = (0.045 - 0.031) / (1.2 * 2e-5)
    # Source: scipy.stats.lognorm (quantiles of c / w, w ~ LogNormal(0, 0.25))
    ref = stats.lognorm(s=0.25, scale=c).ppf([0.1, 0.5, 0.9])
    got = [fc["rul_days_p10"], fc["rul_days_p50"], fc["rul_days_p90"]]
    np.testing.assert_allclose(got, ref, rtol=0.01)
    # the shipped state (loss uncertain before the logs) is wider
    wide = forecast_from_state(state | {"a": 0.031 - 1.2 * 0.01}, 0.045, oracle.KNOWN_POINT_SD, p)
    assert wide["rul_days_p90"] - wide["rul_days_p10"] > 1.2 * (ref[2] - ref[0])


def test_substitution_is_applied_per_filament_and_undone():
    shipped = api.forecast_task
    state = {"tube_id": "A", "focal_spot": "large", "a": 0.0, "k": 1.0,
             "cov": np.array([[1e-8, 0.0], [0.0, 1e-4]]), "x_now": 0.02, "x_pre_sd": 0.003,
             "rate_phys_per_day": 2e-5, "exposures_per_day": 40.0, "workload_cv": 0.2}
    p = replace(HealthParams(), n_samples=4000)
    args = (state, 0.05, 0.006, p, np.inf)
    with oracle._substituted("both", {("A", "large"): 0.04}, {("A", "large"): 0.03}, (0.05, 0.005)):
        got = api.forecast_task(args)[0]
        other = api.forecast_task(({**state, "tube_id": "B"}, 0.05, 0.006, p, np.inf))[0]
    assert api.forecast_task is shipped
    direct = forecast_from_state(oracle.state_with_loss(state, 0.03), 0.04, oracle.KNOWN_POINT_SD, p)
    assert got["rul_days_p50"] == direct["rul_days_p50"]
    # each mode routes only its own inputs
    expected = {
        "true_failure_point": forecast_from_state(state, 0.04, oracle.KNOWN_POINT_SD, p),
        "true_loss": forecast_from_state(oracle.state_with_loss(state, 0.03), 0.05, 0.006, p),
        "true_loss_population": forecast_from_state(oracle.state_with_loss(state, 0.03), 0.05, 0.005, p),
        "shipped": forecast_from_state(state, 0.05, 0.006, p),
    }
    for mode, want in expected.items():
        with oracle._substituted(mode, {("A", "large"): 0.04}, {("A", "large"): 0.03}, (0.05, 0.005)):
            assert api.forecast_task(args)[0]["rul_days_p50"] == want["rul_days_p50"], mode
    # and the shipped function is back even when the replay fails
    with pytest.raises(RuntimeError):
        with oracle._substituted("both", {}, {}, (0.05, 0.005)):
            raise RuntimeError("a cut-off failed")
    assert api.forecast_task is shipped
    # a filament without truth keeps the shipped inputs
    assert other["rul_days_p50"] == shipped(({**state, "tube_id": "B"}, 0.05, 0.006, p, np.inf))[0]["rul_days_p50"]


@pytest.mark.slow
def test_shipped_mode_is_the_backtest_and_the_truth_sharpens_it(tmp_path):
    from tubetrack.health.backtest import run_backtest
    from tubetrack.ingest import ingest_paths

    con = store.connect(tmp_path / "s.duckdb")
    try:
        ingest_paths(con, [SAMPLE_LOGS])
        truth = pd.read_csv(SAMPLE_LOGS / "truth.csv")
        diameter = pd.read_csv(SAMPLE_LOGS / "truth_diameter.csv.gz")
        table = oracle.oracle_backtest(con, truth, diameter, every_days=180,
                                       modes=("shipped", "both"))
        ref = run_backtest(con, every_days=180, workers=1).summary.set_index("metric")["value"]
    finally:
        con.close()
    pd.testing.assert_series_equal(table["shipped"].reindex(ref.index), ref, check_names=False)
    assert table.loc["median_relative_rul_error", "both"] < table.loc["median_relative_rul_error", "shipped"]
    assert table.loc["alpha_lambda_accuracy", "both"] >= table.loc["alpha_lambda_accuracy", "shipped"]


def test_a_store_without_exposures_is_a_clear_error(tmp_path, capsys):
    store.connect(tmp_path / "empty.duckdb").close()
    assert oracle.main(["--logs", str(SAMPLE_LOGS), "--db", str(tmp_path / "empty.duckdb")]) == 2
    assert "no exposures" in capsys.readouterr().err


def test_a_folder_without_the_demo_truth_is_refused_with_its_names(tmp_path, capsys):
    assert oracle.main(["--logs", str(tmp_path)]) == 2
    err = capsys.readouterr().err
    assert "truth.csv" in err and "truth_diameter.csv.gz" in err and "tubetrack demo" in err
