"""The demo's sample logs through `tubetrack ingest`: reconciliation and UTC times land exactly."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import duckdb
import pandas as pd
import pytest
from typer.testing import CliRunner

from tubetrack.cli import app

PROFILE = Path(__file__).resolve().parents[2] / "sample_logs" / "profiles" / "harrowgate.toml"


@pytest.fixture(scope="module")
def ingested(small_logs, tmp_path_factory):
    out, _ = small_logs
    if not PROFILE.exists():
        pytest.skip("harrowgate profile not present")
    (out / "profiles").mkdir(exist_ok=True)
    shutil.copy(PROFILE, out / "profiles" / "harrowgate.toml")
    db = tmp_path_factory.mktemp("store") / "demo.duckdb"
    res = CliRunner().invoke(app, ["ingest", str(out), "--db", str(db), "--format", "json", "--quiet"])
    assert res.exit_code == 0, res.output
    return json.loads(res.stdout), db


def test_reconciliation_and_deliberate_rejects(ingested, small_fleet):
    rows, db = ingested
    logs = [r for r in rows if r["status"] == "ingested"]
    for r in logs:
        assert r["rows_read"] == r["rows_accepted"] + r["rows_rejected"] + r["rows_duplicate"], r
    exp = [r for r in logs if r["kind"] == "exposures"]
    gen = small_fleet.meta["systems_gen"].set_index("system_id")
    e = small_fleet.exposures
    logged = e[e["system_id"].astype(str).map(gen["gen_site_exports_logs"])]
    assert sum(r["rows_accepted"] for r in exp) == len(logged)
    con = duckdb.connect(str(db), read_only=True)
    try:
        n_rejects = con.execute("SELECT count(*) FROM rejects").fetchone()[0]
    finally:
        con.close()
    # every deliberate bad row that landed in this small fleet's files is rejected
    text = (Path(rows[0]["path"]).parent.parent / "README.md").read_text()
    listed = [
        ln for ln in text.splitlines()
        if ln.startswith("| ") and ".csv" in ln.split("|")[1] and ln.split("|")[2].strip().isdigit()
    ]
    n_dup = sum(1 for ln in listed if "(whole row)" in ln)
    assert n_rejects == len(listed) - n_dup


def test_foreign_rows_land_at_their_utc_times(ingested, small_fleet):
    _, db = ingested
    gen = small_fleet.meta["systems_gen"]
    foreign = gen.loc[gen["gen_foreign_layout"], "system_id"].tolist()
    con = duckdb.connect(str(db), read_only=True)
    try:
        st = con.execute(
            "SELECT system_id, timestamp_utc, filament_current_a FROM exposures "
            "WHERE system_id IN (SELECT unnest(?::VARCHAR[]))",
            [foreign],
        ).df()
    finally:
        con.close()
    e = small_fleet.exposures
    f = e[e["system_id"].astype(str).isin(foreign)]
    want = pd.DataFrame({"system_id": f["system_id"].astype(str), "ts": f["timestamp_utc"].dt.floor("s").astype("datetime64[s]"),
                         "a": f["filament_current_a"].to_numpy()})
    got = pd.DataFrame({"system_id": st["system_id"], "ts": st["timestamp_utc"].astype("datetime64[s]"), "a2": st["filament_current_a"]})
    m = want.merge(got, on=["system_id", "ts"], how="outer", indicator=True)
    assert (m["_merge"] == "both").all(), m["_merge"].value_counts()
    assert (m["a"] - m["a2"]).abs().max() < 1e-9  # mA -> A exactly
    # the repeated autumn hour (00:00-02:00 UTC on the last Sunday of October) is in there
    autumn = m[(m["ts"].dt.month == 10) & (m["ts"].dt.day >= 25) & (m["ts"].dt.hour < 2)]
    assert len(autumn) >= 4
