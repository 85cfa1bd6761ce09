"""The ``tubetrack fleet`` commands end to end on the seeded simulated fleet store."""

from __future__ import annotations

import json
import shutil

import duckdb
import pandas as pd
import pytest
from typer.testing import CliRunner

from tubetrack.cli import app
from tubetrack.cli.common import SAFETY_NOTE

runner = CliRunner()


def run(*args):
    result = runner.invoke(app, ["fleet", *args])
    return result


@pytest.fixture
def db(fleet_db, tmp_path):
    path = tmp_path / "copy.duckdb"
    shutil.copy(fleet_db, path)
    return path


@pytest.mark.parametrize("cmd", ["forecast", "spares", "visits"])
def test_recommending_commands_carry_the_safety_note(cmd):
    out = run(cmd, "--help").output
    assert "qualified" in out and "personnel" in out
    assert SAFETY_NOTE.split()[0] in out


def test_survival_json_and_stored_tables(db):
    r = run("survival", "--db", str(db), "--format", "json", "--by", "model")
    assert r.exit_code == 0, r.output
    rows = json.loads(r.stdout)
    assert {row["group"] for row in rows} == {"TX-A", "TX-B"}
    assert all(
        row["eta"] > 0 and row["beta_lower"] < row["beta"] < row["beta_upper"]
        for row in rows
    )
    con = duckdb.connect(str(db), read_only=True)
    km = con.execute("SELECT * FROM result_fleet_km").df()
    assert {"time", "at_risk", "survival", "lower", "upper", "group"} <= set(km.columns)
    assert (
        con.execute("SELECT count(*) FROM result_fleet_survival_curve").fetchall()[0][0]
        > 0
    )
    con.close()


def test_survival_km_csv_has_header(db):
    r = run(
        "survival", "--db", str(db), "--format", "csv", "--show", "km", "--no-store"
    )
    assert r.exit_code == 0, r.output
    assert r.stdout.splitlines()[0].startswith("group_by,group,time,at_risk")


def test_forecast_falls_back_without_health_and_uses_it_when_present(db):
    r = run("forecast", "--db", str(db), "--format", "json", "--parameter-draws", "10")
    assert r.exit_code == 0, r.output
    assert "no health forecasts" in r.stderr
    months = json.loads(r.stdout)
    assert len(months) == 12
    base_total = sum(m["expected_replacements"] for m in months)
    assert all(
        m["lower_95"] <= m["expected_replacements"] <= m["upper_95"] + 1 for m in months
    )
    con = duckdb.connect(str(db))
    tubes = con.execute(
        "SELECT DISTINCT tube_id FROM result_fleet_forecast_tubes ORDER BY tube_id"
    ).df()
    # a health forecast that says every tube's small filament ends within 30 days
    rul = pd.DataFrame(
        {
            "tube_id": tubes["tube_id"],
            "focal_spot": "small",
            "horizon_days": 30,
            "p_end_of_life": 0.99,
        }
    )
    con.register("r", rul)
    con.execute("CREATE TABLE result_health_rul_cdf AS SELECT * FROM r")
    con.close()
    r2 = run("forecast", "--db", str(db), "--format", "json", "--parameter-draws", "0")
    assert r2.exit_code == 0, r2.output
    assert "no health forecasts" not in r2.stderr
    total = sum(m["expected_replacements"] for m in json.loads(r2.stdout))
    assert total > 0.99 * len(tubes) > base_total


def test_forecast_budget_and_groups(db, tmp_path):
    prices = tmp_path / "prices.csv"
    prices.write_text(
        "model_label,price,currency\nTX-A,41000,EUR\n"
    )  # TX-B: inventory price
    r = run(
        "forecast",
        "--db",
        str(db),
        "--price-list",
        str(prices),
        "--show",
        "budget",
        "--format",
        "json",
        "--renewal",
        "--parameter-draws",
        "10",
    )
    assert r.exit_code == 0, r.output
    rows = json.loads(r.stdout)
    assert {row["period_kind"] for row in rows} == {"month", "quarter"}
    assert all(row["currency"] == "EUR" for row in rows)
    r = run(
        "forecast", "--db", str(db), "--by", "site", "--format", "json", "--no-store"
    )
    assert r.exit_code == 0, r.output
    assert {row["group"] for row in json.loads(r.stdout)} == {"north", "south"}


def test_spares_visits_uptime(db):
    r = run(
        "spares",
        "--db",
        str(db),
        "--format",
        "json",
        "--service-level",
        "0.9",
        "--parameter-draws",
        "10",
    )
    assert r.exit_code == 0, r.output
    sp = json.loads(r.stdout)
    assert {row["group"] for row in sp} == {"TX-A", "TX-B"}
    assert all(row["p_enough"] >= 0.9 for row in sp)
    r = run("visits", "--db", str(db), "--format", "json", "--horizon-days", "60")
    assert r.exit_code == 0, r.output
    v = json.loads(r.stdout)
    assert sorted(row["rank"] for row in v) == list(range(1, len(v) + 1))
    assert all(row["reason"] for row in v)
    r = run("uptime", "--db", str(db), "--format", "json", "--by", "systems")
    assert r.exit_code == 0, r.output
    up = json.loads(r.stdout)
    assert all(0 <= row["availability_pct"] <= 100 for row in up)
    assert sum(row["tube_failures"] for row in up) > 0
    r = run(
        "uptime",
        "--db",
        str(db),
        "--format",
        "csv",
        "--period",
        "quarter",
        "--no-store",
    )
    assert r.exit_code == 0, r.output
    assert "availability_pct" in r.stdout.splitlines()[0]


def test_errors_are_clean(db, tmp_path):
    r = run("forecast", "--db", str(db), "--price-list", str(tmp_path / "missing.csv"))
    assert r.exit_code == 1
    assert "Error: price list" in r.stderr
    r = run("spares", "--db", str(db), "--service-level", "2")
    assert r.exit_code == 1 and "service-level" in r.stderr
    r = run("survival", "--db", str(tmp_path / "none.duckdb"), "--no-store")
    assert r.exit_code == 1 and "does not exist" in r.stderr
