"""`tubetrack tubes --engine spark --lake PATH` answers like the local engine on the store."""

from __future__ import annotations

import json

import pytest
from typer.testing import CliRunner

from tubetrack import store
from tubetrack.cli import app

KEYS = ("tube_id", "focal_spot", "health_level", "rul_days_p50", "p_end_of_life_180d")


@pytest.mark.spark
@pytest.mark.slow
def test_cli_spark_engine_matches_local(spark_session, demo_store_and_lake, tmp_path):
    db, lake = demo_store_and_lake
    runner = CliRunner()
    local = runner.invoke(app, ["tubes", "--db", str(db), "-q", "-f", "json"])
    assert local.exit_code == 0, local.output
    results_db = tmp_path / "results.duckdb"
    # the session fixture's Spark session is active; the engine reuses it (getOrCreate)
    spark = runner.invoke(
        app,
        ["tubes", "--engine", "spark", "--lake", str(lake), "--db", str(results_db),
         "-q", "-f", "json"],
    )
    assert spark.exit_code == 0, spark.output
    a, b = json.loads(local.stdout), json.loads(spark.stdout)
    assert len(a) == len(b) > 0
    for ra, rb in zip(a, b, strict=True):
        for k in KEYS:
            if isinstance(ra[k], float):
                assert rb[k] == pytest.approx(ra[k], rel=1e-9)
            else:
                assert rb[k] == ra[k]
    # the results were stored for `tubetrack report`
    con = store.connect(results_db, read_only=True)
    n = con.execute("SELECT count(*) FROM result_health").fetchall()[0][0]
    con.close()
    assert n == len(b)


def test_cli_spark_needs_a_lake(tmp_path):
    res = CliRunner().invoke(
        app, ["tubes", "--engine", "spark", "--db", str(tmp_path / "s.duckdb"), "-q"]
    )
    assert res.exit_code == 1
    assert "--lake PATH" in res.output and "export-lake" in res.output
