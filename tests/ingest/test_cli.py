"""`tubetrack ingest`, `peek`, `profiles` and `status` through typer's CliRunner."""

from __future__ import annotations

import csv
import io
import json

from typer.testing import CliRunner

from tubetrack.cli import app

from .conftest import BAD, DATA, HARROWGATE_PROFILE

runner = CliRunner()
FIXTURE = DATA / "harrowgate" / "genlog_HG-T01_2024.csv"


def _ingest(db, *args):
    return runner.invoke(app, ["ingest", "--db", str(db), *map(str, args)])


def test_ingest_json_output_is_one_object_per_file(tmp_path):
    db = tmp_path / "s.duckdb"
    res = _ingest(db, "--format", "json", "--profile", HARROWGATE_PROFILE, FIXTURE)
    assert res.exit_code == 0, res.output
    out = json.loads(res.stdout)
    assert out == [
        {
            "path": str(FIXTURE),
            "kind": "exposures",
            "profile": "harrowgate",
            "status": "ingested",
            "rows_read": 10,
            "rows_accepted": 10,
            "rows_rejected": 0,
            "rows_duplicate": 0,
            "message": "",
        }
    ]
    # the one-line summary goes to stderr, never stdout
    assert res.stderr.strip().endswith(
        "1 files (1 ingested): rows read 10 = accepted 10 + rejected 0 + duplicate 0"
    )
    again = json.loads(
        _ingest(db, "-f", "json", "-p", HARROWGATE_PROFILE, FIXTURE).stdout
    )
    assert again[0]["status"] == "already_ingested"


def test_ingest_csv_and_quiet(tmp_path):
    res = _ingest(
        tmp_path / "s.duckdb",
        "--format",
        "csv",
        "--quiet",
        BAD / "exposures_text_in_numeric.csv",
    )
    assert res.exit_code == 0
    rows = list(csv.DictReader(io.StringIO(res.stdout)))
    assert [(r["rows_read"], r["rows_accepted"], r["rows_rejected"]) for r in rows] == [
        ("3", "1", "2")
    ]
    assert res.stderr == ""


def test_dry_run_shows_rows_and_rejects_and_writes_nothing(tmp_path):
    db = tmp_path / "s.duckdb"
    res = _ingest(db, "--dry-run", "-f", "json", BAD / "exposures_text_in_numeric.csv")
    assert res.exit_code == 0
    (out,) = json.loads(res.stdout)
    assert out["status"] == "dry_run"
    assert [r["line"] for r in out["preview_rows"]] == [2]
    assert [(r["line"], r["field"]) for r in out["preview_rejects"]] == [
        (3, "tube_voltage_kv"),
        (4, "tube_current_ma"),
    ]
    assert not db.exists()
    assert "dry run, nothing written" in res.stderr


def test_peek_with_profile_shows_utc_rows(tmp_path):
    res = runner.invoke(
        app,
        [
            "peek",
            str(FIXTURE),
            "--profile",
            "harrowgate",
            "-n",
            "2",
            "-f",
            "json",
            "--db",
            str(tmp_path / "x.duckdb"),
        ],
    )
    assert res.exit_code == 0, res.output
    (out,) = json.loads(res.stdout)
    assert [r["timestamp_utc"] for r in out["preview_rows"]] == [
        "2024-01-15T08:30:00",
        "2024-03-31T00:59:59",
    ]
    assert out["preview_rows"][0]["filament_current_a"] == 4.5125


def test_profiles_lists_builtin_and_folder_profiles(tmp_path):
    (tmp_path / "profiles").mkdir()
    (tmp_path / "profiles" / "site.toml").write_text(
        'name = "site-x"\nkind = "events"\n'
    )
    res = runner.invoke(app, ["profiles", str(tmp_path), "-f", "json"])
    assert res.exit_code == 0, res.output
    names = {p["name"]: p["kind"] for p in json.loads(res.stdout)}
    assert names == {"harrowgate": "exposures", "site-x": "events"}


def test_unknown_kind_is_a_usage_error(tmp_path):
    res = _ingest(tmp_path / "s.duckdb", "--kind", "xrays", FIXTURE)
    assert res.exit_code == 2


def test_missing_path_is_an_error(tmp_path):
    res = _ingest(tmp_path / "s.duckdb", tmp_path / "nope")
    assert res.exit_code == 1
    assert (
        res.stderr.strip()
        == f"Error: {tmp_path / 'nope'}: no such file or folder. Check the path."
    )


def test_status_json_has_every_section(tmp_path):
    db = tmp_path / "s.duckdb"
    inv = tmp_path / "inv"
    inv.mkdir()
    (inv / "systems.csv").write_text(
        "system_id,site,modality\nHG-T01,harrowgate,radiographic\nR-01,north,mobile\n"
    )
    (inv / "tubes.csv").write_text(
        "tube_id,system_id,installed_at_utc,removed_at_utc,removal_reason\n"
        "T-1,HG-T01,2023-01-01,2024-05-01,filament\nT-2,HG-T01,2024-05-01,,\n"
    )
    assert _ingest(db, "-q", inv).exit_code == 0
    assert _ingest(db, "-q", "-p", HARROWGATE_PROFILE, FIXTURE).exit_code == 0
    assert _ingest(db, "-q", BAD / "exposures_text_in_numeric.csv").exit_code == 0
    res = runner.invoke(app, ["status", "--db", str(db), "--format", "json"])
    assert res.exit_code == 0, res.output
    st = json.loads(res.stdout)
    assert list(st) == [
        "overview",
        "systems",
        "tubes",
        "exposures_by_month",
        "files",
        "rejects_by_reason",
        "unmapped_dicom_devices",
    ]
    ov = st["overview"]
    assert (
        ov["systems"],
        ov["tubes_active"],
        ov["tubes_removed"],
        ov["exposures"],
    ) == (2, 1, 1, 11)
    assert ov["first_exposure_utc"] == "2024-01-15T08:30:00"
    months = {m["month"]: m["exposures"] for m in st["exposures_by_month"]}
    assert months == {"2024-01": 1, "2024-03": 3, "2024-07": 1, "2024-10": 6}
    assert st["rejects_by_reason"] == [
        {
            "reason": "not a number",
            "field": "tube_current_ma",
            "rejects": 1,
            "files": 1,
        },
        {
            "reason": "not a number",
            "field": "tube_voltage_kv",
            "rejects": 1,
            "files": 1,
        },
    ]
    assert st["unmapped_dicom_devices"] == []
    table = runner.invoke(app, ["status", "--db", str(db)])
    assert table.exit_code == 0 and "exposures by month" in table.stdout
    long = runner.invoke(app, ["status", "--db", str(db), "-f", "csv"])
    rows = list(csv.DictReader(io.StringIO(long.stdout)))
    assert {"section", "item", "metric", "value"} == set(rows[0])
    assert {
        "section": "overview",
        "item": "",
        "metric": "exposures",
        "value": "11",
    } in rows


def test_status_without_store_is_a_clear_error(tmp_path):
    res = runner.invoke(app, ["status", "--db", str(tmp_path / "none.duckdb")])
    assert res.exit_code == 1
    assert res.stderr.startswith(
        f"Error: store {tmp_path / 'none.duckdb'} does not exist."
    )
