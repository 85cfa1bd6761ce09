"""CLI: tubes / tube / backtest on a small seeded store (JSON keys, --as-of, stored results)."""

from __future__ import annotations

import json

import pandas as pd
import pytest
from typer.testing import CliRunner

from tubetrack import store
from tubetrack.cli import app

LISTING_KEYS = {"tube_id", "system_id", "focal_spot", "health_level", "reason", "diameter_loss_pct",
                "rul_days_p10", "rul_days_p50", "rul_days_p90", "p_end_of_life_30d",
                "p_end_of_life_90d", "p_end_of_life_180d", "as_of"}



def _build(path, sim, load):
    con = store.connect(path)
    e1, _ = sim(21, tube_id="T1", system_id="S1", start="2024-01-01", n_days=600, rate_at_400ma_per_s=1.2e-6)
    e2, _ = sim(22, tube_id="T2", system_id="S2", start="2024-01-01", n_days=425, rate_at_400ma_per_s=3e-6)
    e3, _ = sim(23, tube_id="T3", system_id="S3", start="2024-09-01", n_days=350, rate_at_400ma_per_s=1.2e-6)
    tubes = pd.DataFrame({
        "tube_id": ["T1", "T2", "T3"], "system_id": ["S1", "S2", "S3"],
        "installed_at_utc": pd.to_datetime(["2024-01-01", "2024-01-01", "2024-09-01"]),
        "removed_at_utc": pd.to_datetime([None, "2025-03-01", None]),
        "removal_reason": [None, "filament", None]})
    systems = pd.DataFrame({"system_id": ["S1", "S2", "S3"], "site": ["north", "north", "south"]})
    load(con, pd.concat([e1, e2, e3], ignore_index=True), tubes, systems)
    con.close()


@pytest.fixture
def db(tmp_path, sim, load):
    path = tmp_path / "h.duckdb"
    _build(path, sim, load)
    return path


def _json(result):
    assert result.exit_code == 0, result.output
    return json.loads(result.stdout)


def test_tubes_json_keys_sorted_and_stored(db):
    runner = CliRunner()
    rows = _json(runner.invoke(app, ["tubes", "--db", str(db), "--format", "json", "-q"]))
    assert rows and LISTING_KEYS <= set(rows[0])
    assert {r["tube_id"] for r in rows} == {"T1", "T3"}  # T2 was removed
    ranks = [r["health_rank"] for r in rows]
    assert ranks == sorted(ranks, reverse=True)
    con = store.connect(db, read_only=True)
    assert store.read_results(con, "result_health").shape[0] == len(rows)
    cdf = store.read_results(con, "result_health_rul_cdf")
    assert set(cdf["horizon_days"]) >= {30, 90, 180, 365}
    runs = con.execute("SELECT DISTINCT kind FROM analysis_runs").fetchall()
    assert ("health",) in runs
    con.close()


def test_as_of_uses_only_earlier_data(db):
    runner = CliRunner()
    rows = _json(runner.invoke(app, ["tubes", "--db", str(db), "--format", "json", "--as-of", "2024-08-01", "-q"]))
    assert {r["tube_id"] for r in rows} == {"T1", "T2"}  # T3 not installed yet, T2 not yet removed
    assert all(r["as_of"].startswith("2024-08-01") for r in rows)
    out = _json(runner.invoke(app, ["tube", "T1", "--db", str(db), "--format", "json", "--as-of", "2024-08-01", "-q"]))
    days = [d["day"] for fs in out for d in fs["diameter"]]
    assert days and max(days) < "2024-08-01"
    assert {"stations", "changepoints", "diameter", "projection", "rul_cdf", "reason"} <= set(out[0])


def test_tube_unknown_is_a_clear_error(db):
    r = CliRunner().invoke(app, ["tube", "NOPE", "--db", str(db), "-q"])
    assert r.exit_code == 1 and "not in the store" in r.output


@pytest.mark.parametrize("command", [["tubes"], ["tube", "T1"]])
def test_as_of_before_the_first_exposure_is_a_clear_error(db, command):
    # the store's exposures start on 2024-01-01 (see _build)
    r = CliRunner().invoke(app, [*command, "--db", str(db), "--as-of", "2023-06-01", "-q"])
    assert r.exit_code == 1 and r.exception is not None and isinstance(r.exception, SystemExit), r.output
    assert "no exposures before 2023-06-01" in r.output and "2024-01-01" in r.output


def test_help_carries_safety_note():
    from tubetrack.cli.common import SAFETY_NOTE

    for cmd in ("tubes", "tube", "backtest"):
        r = CliRunner().invoke(app, [cmd, "--help"])
        assert r.exit_code == 0
        assert " ".join(SAFETY_NOTE.split()[:6]) in " ".join(r.output.split())


@pytest.mark.slow
def test_backtest_command_reports_metrics(db):
    r = CliRunner().invoke(app, ["backtest", "--db", str(db), "--every-days", "120", "--format", "json", "-q"])
    rows = _json(r)
    metrics = {x["metric"] for x in rows}
    assert {"auc_180d", "brier_180d", "coverage_p10_p90", "alpha_lambda_accuracy",
            "prognostic_horizon_days", "false_alerts_per_tube_year", "nonfilament_failures"} <= metrics


def test_long_analyses_report_progress(db):
    from tubetrack.health.api import analyse_fleet
    from tubetrack.health.backtest import run_backtest

    con = store.connect(db, read_only=True)
    try:
        for workers in (1, 2):
            calls: list[tuple] = []
            res = run_backtest(con, every_days=60, workers=workers,
                               progress=lambda *call, seen=calls: seen.append(call))
            n = len(calls)
            assert n >= 3 and [c[0] for c in calls] == list(range(1, n + 1))
            assert {c[1] for c in calls} == {n}
            cuts = [c[2] for c in calls]
            assert cuts == sorted(cuts) and set(res.cases["cut_off"]) <= set(cuts)
        seen = []
        analyse_fleet(con, progress=lambda done, total: seen.append((done, total)))
        assert seen[-1] == (3, 3)  # every known tube, removed ones included
    finally:
        con.close()
