"""``tubetrack report`` through the CLI, on a store holding stored result tables."""

from __future__ import annotations

import json
import re

import pandas as pd
import pytest
from typer.testing import CliRunner

from tubetrack import store
from tubetrack.cli import app
from tubetrack.report import page_stem

runner = CliRunner()


@pytest.fixture
def result_store(tmp_path, results):
    """A store with systems, tubes, a little exposure/event/downtime data and health results."""
    db = tmp_path / "rep.duckdb"
    con = store.connect(db)
    try:
        sys_ = results["systems"]
        con.register("s", sys_)
        con.execute("INSERT INTO systems BY NAME SELECT * FROM s")
        tubes = results["tubes"].drop(columns=["site"])
        con.register("t", tubes)
        con.execute("INSERT INTO tubes BY NAME SELECT * FROM t")
        ex = pd.DataFrame({
            "timestamp_utc": pd.date_range("2023-01-05", periods=60, freq="D"),
            "system_id": sys_["system_id"].iloc[0], "focal_spot": "large", "tube_voltage_kv": 80.0,
            "tube_current_ma": 200.0, "exposure_time_s": 0.1, "exposure_mas": 20.0,
            "filament_current_a": 4.0, "arc_count": [1 if i % 10 == 0 else 0 for i in range(60)],
        })
        con.register("e", ex)
        con.execute("INSERT INTO exposures BY NAME SELECT * FROM e")
        ev = pd.DataFrame({"timestamp_utc": [pd.Timestamp("2023-01-20")], "system_id": [sys_["system_id"].iloc[0]],
                           "category": ["kv_dropout"], "raw_code": ["E1"], "raw_text": ["<b>drop</b>"]})
        con.register("v", ev)
        con.execute("INSERT INTO events BY NAME SELECT * FROM v")
        con.execute("INSERT INTO rejects VALUES (1, 'logs/x.csv', 7, 'tube_voltage_kv', '12O', 'not a number')")
        for name, key in (("result_health", "health"), ("result_health_rul_cdf", "rul_cdf"),
                          ("result_health_drift", "drift"), ("result_health_diameter", "diameter"),
                          ("result_health_projection", "projection"),
                          ("result_health_changepoints", "changepoints")):
            frame = results[key]
            if key == "health":
                frame = frame.assign(threshold_pct=4.8)
            store.write_results(con, name, frame, kind="health")
        store.write_results(con, "result_fleet_forecast", results["forecast"], kind="fleet_forecast")
    finally:
        con.close()
    return db


def test_report_command_writes_pages(result_store, tmp_path, results):
    out = tmp_path / "rep"
    res = runner.invoke(app, ["report", "--db", str(result_store), "--out", str(out), "--no-images", "-q"])
    assert res.exit_code == 0, res.output
    assert res.stdout.strip() == str(out / "fleet.html")
    fleet = (out / "fleet.html").read_text(encoding="utf-8")
    assert len(list((out / "tubes").glob("*.html"))) == results["health"]["tube_id"].nunique()
    # stored threshold, rejects and reconciliation reach the page
    assert "4.80 %" in fleet
    assert "not a number" in fleet
    assert "exposures without a tube" in fleet
    # the forecast came from the store, the fault rates from SQL
    specs = [json.loads(b) for b in re.findall(r'data-chart="[^"]*">(.*?)</script>', fleet, re.S)]
    forecast = next(s for s in specs if "forecast" in s.get("datasets", {}))
    assert len(forecast["datasets"]["forecast"]) == len(results["forecast"])
    rates = next(s for s in specs if "fault_rates" in s.get("datasets", {}))
    cats = {r["category"] for r in rates["datasets"]["fault_rates"]}
    assert {"kv_dropout", "arcs in exposure records"} <= cats
    assert not list(out.glob("img/*.png"))


def test_report_command_single_tube(result_store, tmp_path):
    out = tmp_path / "one"
    res = runner.invoke(app, ["report", "--db", str(result_store), "--out", str(out), "--no-images", "-q",
                              "--tube", "T00003"])
    assert res.exit_code == 0, res.output
    assert [p.name for p in (out / "tubes").glob("*.html")] == [page_stem("T00003") + ".html"]


def test_report_command_errors(result_store, tmp_path):
    res = runner.invoke(app, ["report", "--db", str(result_store), "--out", str(tmp_path / "x"), "--tube", "NOPE"])
    assert res.exit_code == 1
    assert "NOPE" in res.output and "tubetrack tubes" in res.output
    res = runner.invoke(app, ["report", "--db", str(result_store), "--js", "cdn"])
    assert res.exit_code == 1 and "--js" in res.output
    res = runner.invoke(app, ["report", "--db", str(tmp_path / "missing.duckdb")])
    assert res.exit_code == 1 and "does not exist" in res.output


def test_report_help_mentions_safety():
    res = runner.invoke(app, ["report", "--help"])
    assert res.exit_code == 0
    assert "qualified" in res.output and "--no-images" in res.output


@pytest.mark.parametrize("table", ["result_health_diameter", "result_health_projection"])
def test_stored_series_thinned_in_sql_like_the_pages(tmp_path, table):
    """The report reads daily series thinned in SQL; it must keep exactly the rows the tube pages
    would keep from the whole table (``_thin_groups``), evenly spaced, first and last day kept."""
    import numpy as np

    from tubetrack.charts.health import MAX_POINTS_PER_SERIES
    from tubetrack.cli.report_cmd import _read_thinned
    from tubetrack.report import _thin_groups

    lengths = {"A": 1, "B": MAX_POINTS_PER_SERIES - 1, "C": MAX_POINTS_PER_SERIES,
               "D": MAX_POINTS_PER_SERIES + 1, "E": 517, "F": 3001}
    rng = np.random.default_rng(3)
    parts = []
    for tube, n in lengths.items():
        for focal in ("large", "small"):
            days = pd.date_range("2022-01-01", periods=n, freq="D")
            parts.append(pd.DataFrame({"tube_id": tube, "focal_spot": focal, "day": days,
                                       "diameter_loss_pct": rng.normal(size=n),
                                       "diameter_loss_pct_lo": 0.0, "diameter_loss_pct_hi": 1.0}))
    whole = pd.concat(parts, ignore_index=True).sample(frac=1.0, random_state=1)  # stored unordered
    con = store.connect(tmp_path / "thin.duckdb")
    try:
        store.write_results(con, table, whole, kind="health")
        got = _read_thinned(con, table)
        stored = store.read_results(con, table)
    finally:
        con.close()
    want = _thin_groups(stored, ["tube_id", "focal_spot"], MAX_POINTS_PER_SERIES)
    cols = ["tube_id", "focal_spot", "day", "diameter_loss_pct"]
    pd.testing.assert_frame_equal(got[cols].reset_index(drop=True), want[cols].reset_index(drop=True))
    for (tube, _focal), g in got.groupby(["tube_id", "focal_spot"]):
        n = lengths[tube]
        pos = ((g["day"] - pd.Timestamp("2022-01-01")).dt.days).to_numpy()
        assert len(g) == min(n, MAX_POINTS_PER_SERIES)
        assert pos[0] == 0 and pos[-1] == n - 1
        gaps = np.diff(pos[:-1])  # the last row is always kept, so its gap may be short
        if len(gaps):
            assert gaps.max() - gaps.min() <= 1
