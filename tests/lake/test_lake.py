"""The Parquet lake: export, read back through DuckDB views, atomic replace, CLI."""

from __future__ import annotations

import json
from datetime import datetime, timedelta
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from typer.testing import CliRunner

from tubetrack import store
from tubetrack.cli import app
from tubetrack.errors import InputError, NotFoundError
from tubetrack.lake import MANIFEST, attach_lake, export_lake, open_lake, read_manifest

# System ids chosen to break naive partition handling: leading zeros (type inference),
# a slash and a percent sign (path escaping), a quote and a non-ASCII letter.
SYSTEM_IDS = ["0042", "a/b", "x y=%", "é'q"]


def _fill(con) -> None:
    rng = np.random.default_rng(5)
    start = datetime(2023, 11, 20)
    for i, sid in enumerate(SYSTEM_IDS):
        con.execute(
            "INSERT INTO systems (system_id, site, modality) VALUES (?, ?, 'radiographic')",
            [sid, f"site-{i % 2}"],
        )
        con.execute(
            "INSERT INTO tubes (tube_id, system_id, installed_at_utc, removed_at_utc, removal_reason) "
            "VALUES (?, ?, ?, ?, 'filament'), (?, ?, ?, NULL, NULL)",
            [f"T{i}A", sid, start - timedelta(days=10), start + timedelta(days=40),
             f"T{i}B", sid, start + timedelta(days=40)],
        )
    n = 600
    frame = pd.DataFrame(
        {
            "timestamp_utc": pd.Timestamp(start) + pd.to_timedelta(rng.integers(0, 90 * 86400, n), unit="s"),
            "system_id": np.array(SYSTEM_IDS)[rng.integers(0, len(SYSTEM_IDS), n)],
            "tube_id": None,  # attributed by v_exposures from the tubes table
            "focal_spot": np.where(rng.random(n) < 0.5, "small", "large"),
            "tube_voltage_kv": rng.choice([60.0, 81.0, 102.0], n),
            "tube_current_ma": rng.choice([100.0, 200.0, 400.0], n),
            "exposure_time_s": 0.05,
            "filament_current_a": 4.0 + rng.normal(0, 0.01, n),
            "arc_count": rng.integers(0, 2, n).astype("int32"),
        }
    )
    frame.loc[:9, "filament_current_a"] = np.nan  # NULLs survive the trip
    con.register("f", frame)
    con.execute(
        "INSERT INTO exposures (timestamp_utc, system_id, tube_id, focal_spot, tube_voltage_kv, "
        "tube_current_ma, exposure_time_s, filament_current_a, arc_count) "
        "SELECT timestamp_utc, system_id, tube_id, focal_spot, tube_voltage_kv, tube_current_ma, "
        "exposure_time_s, filament_current_a, arc_count FROM f"
    )
    con.execute(
        "INSERT INTO events (timestamp_utc, system_id, category, raw_code, raw_text) "
        "VALUES (?, '0042', 'arc', 'E1', '=cmd|x')",
        [start + timedelta(days=3)],
    )


@pytest.fixture
def filled_store(tmp_path: Path):
    con = store.connect(tmp_path / "s.duckdb")
    _fill(con)
    yield con
    con.close()


def _sorted(frame: pd.DataFrame) -> pd.DataFrame:
    return frame.sort_values(list(frame.columns), ignore_index=True, na_position="first")


def _assert_same(con_store, con_lake, table: str) -> None:
    a = _sorted(con_store.execute(f"SELECT * FROM {table}").df())
    b = _sorted(con_lake.execute(f"SELECT * FROM {table}").df())
    assert list(a.columns) == list(b.columns)
    pd.testing.assert_frame_equal(a, b, check_dtype=True)


@pytest.mark.parametrize("partition_by", ["month", "system_id,month"])
def test_round_trip_equals_store(filled_store, tmp_path: Path, partition_by: str) -> None:
    lake = tmp_path / "lake"
    res = export_lake(filled_store, lake, partition_by=partition_by)
    assert res.rows["exposures"] == 600
    lake_con = open_lake(lake)
    for table in ("systems", "tubes", "exposures", "events", "calibrations", "downtime"):
        _assert_same(filled_store, lake_con, table)
    # the attributed view gives the same tube per exposure on both sides
    _assert_same(filled_store, lake_con, "v_exposures")
    n_attr = lake_con.execute("SELECT count(tube_id) FROM v_exposures").fetchone()[0]
    assert n_attr == 600


def test_partition_folders_present(filled_store, tmp_path: Path) -> None:
    lake = tmp_path / "lake"
    export_lake(filled_store, lake, partition_by="system_id,month")
    exp = lake / "exposures"
    sys_dirs = sorted(p.name for p in exp.iterdir() if p.is_dir())
    assert len(sys_dirs) == len(SYSTEM_IDS)
    assert all(d.startswith("system_id=") for d in sys_dirs)
    # the slash in "a/b" is escaped in the folder name, never a nested folder
    assert "system_id=a%2Fb" in sys_dirs
    months = {p.name for p in exp.glob("system_id=0042/month=*")}
    want = {
        "month=" + r[0]
        for r in filled_store.execute(
            "SELECT DISTINCT strftime(timestamp_utc, '%Y-%m') FROM exposures WHERE system_id = '0042'"
        ).fetchall()
    }
    assert months == want and len(want) >= 3
    assert (lake / "systems" / "data_0.parquet").is_file()
    manifest = read_manifest(lake)
    assert manifest["partition_by"] == ["system_id", "month"]
    assert manifest["rows"]["exposures"] == 600
    # the partition value inside the files is the exact system id (no type inference)
    lake_con = open_lake(lake)
    got = sorted(r[0] for r in lake_con.execute("SELECT DISTINCT system_id FROM exposures").fetchall())
    assert got == sorted(SYSTEM_IDS)


def test_default_partitions_by_month(filled_store, tmp_path: Path) -> None:
    lake = tmp_path / "lake"
    export_lake(filled_store, lake)
    dirs = sorted(p.name for p in (lake / "exposures").iterdir())
    want = sorted(
        "month=" + m
        for m in filled_store.execute(
            "SELECT DISTINCT strftime(timestamp_utc, '%Y-%m') FROM exposures"
        ).df().iloc[:, 0]
    )
    assert dirs == want


def test_replace_is_atomic_and_leaves_no_temp(filled_store, tmp_path: Path) -> None:
    lake = tmp_path / "lake"
    export_lake(filled_store, lake)
    filled_store.execute("DELETE FROM exposures WHERE system_id = '0042'")
    left = filled_store.execute("SELECT count(*) FROM exposures").fetchone()[0]
    export_lake(filled_store, lake)
    assert read_manifest(lake)["rows"]["exposures"] == left
    assert open_lake(lake).execute("SELECT count(*) FROM exposures").fetchone()[0] == left
    assert not [p.name for p in tmp_path.iterdir() if p.name.startswith(".lake")]


def test_refuses_foreign_folder_and_bad_column(filled_store, tmp_path: Path) -> None:
    other = tmp_path / "photos"
    other.mkdir()
    (other / "keep.txt").write_text("mine")
    with pytest.raises(InputError, match="refusing to replace"):
        export_lake(filled_store, other)
    assert (other / "keep.txt").read_text() == "mine"
    with pytest.raises(InputError, match="not an exposures column"):
        export_lake(filled_store, tmp_path / "l2", partition_by="system_id,colour")
    assert not (tmp_path / "l2").exists()
    with pytest.raises(NotFoundError, match="not a tubetrack lake"):
        attach_lake(store.connect(":memory:"), other)


def test_cli_export_lake(filled_store, tmp_path: Path) -> None:
    db = tmp_path / "s.duckdb"
    filled_store.close()
    lake = tmp_path / "cli_lake"
    result = CliRunner().invoke(
        app, ["export-lake", "--db", str(db), "--out", str(lake), "--format", "json", "--quiet"]
    )
    assert result.exit_code == 0, result.output
    rows = {r["table_name"]: r["rows"] for r in json.loads(result.stdout)}
    assert rows["exposures"] == 600 and rows["systems"] == len(SYSTEM_IDS)
    assert (lake / MANIFEST).is_file()
    bad = CliRunner().invoke(app, ["export-lake", "--db", str(db), "--out", str(lake), "--partition-by", "nope"])
    assert bad.exit_code == 1
    assert "not an exposures column" in bad.output
