"""The broken-input corpus (tests/data/bad/, one file per failure mode): exact user-facing
messages, exit codes and the reconciliation (read = accepted + rejected + duplicate)."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pytest
from typer.testing import CliRunner

from tubetrack import store
from tubetrack.cli import app
from tubetrack.ingest import ingest_paths

from .conftest import BAD, HARROWGATE_PROFILE, assert_reconciles, rejects

H = "timestamp_utc,system_id,tube_id,focal_spot,tube_voltage_kv,tube_current_ma,exposure_time_s,filament_current_a"


def _one(path: Path, **kw):
    con = store.connect(":memory:")
    (rep,) = ingest_paths(con, [path], **kw).reports
    assert rep.reconciles
    if rep.status != "dry_run":
        assert_reconciles(con)
    return con, rep


def _counts(rep):
    return (
        rep.status,
        rep.rows_read,
        rep.rows_accepted,
        rep.rows_rejected,
        rep.rows_duplicate,
    )


# ---- files rejected whole (exit 1, one message naming file, line and next step) ----------


def _cli(tmp_path: Path, *paths: Path, extra: tuple[str, ...] = ()):
    res = CliRunner().invoke(
        app,
        [
            "ingest",
            "--db",
            str(tmp_path / "s.duckdb"),
            "--format",
            "json",
            *extra,
            *map(str, paths),
        ],
    )
    return res, json.loads(res.stdout)


def test_wrong_delimiter(tmp_path):
    path = BAD / "exposures_wrong_delimiter.csv"
    res, out = _cli(tmp_path, path)
    assert res.exit_code == 1
    msg = (
        f'{path} line 1: only one column found, the header is "{H.replace(",", ":")}"; the '
        'delimiter looks like ":", which was not detected. Give it in a profile (delimiter = ":").'
    )
    assert f"Error: {msg}" in res.stderr
    assert out[0]["message"] == msg
    assert (out[0]["status"], out[0]["rows_read"], out[0]["rows_rejected"]) == (
        "failed",
        1,
        1,
    )


def test_missing_required_column(tmp_path):
    path = BAD / "exposures_missing_column.csv"
    con, rep = _one(path)
    assert _counts(rep) == ("failed", 1, 0, 1, 0)
    assert rep.message == (
        f'{path} line 1: missing required column "tube_voltage_kv" for the exposures table; '
        'columns found: "timestamp_utc", "system_id", "tube_id", "focal_spot", '
        '"tube_current_ma", "exposure_time_s", "filament_current_a". Add the column, or rename '
        'the file\'s column to "tube_voltage_kv", or map it with a profile ([columns] '
        'tube_voltage_kv = "...").'
    )
    # the store keeps the failure: one ingest_files row (failed) and one reject naming the field
    assert con.execute(
        "SELECT status, rows_read, rows_rejected FROM ingest_files"
    ).fetchall() == [("failed", 1, 1)]
    assert rejects(con)[0][:2] == (1, "tube_voltage_kv")


def test_empty_file(tmp_path):
    path = BAD / "exposures_empty.csv"
    res, out = _cli(tmp_path, path)
    assert res.exit_code == 1
    assert f"Error: {path}: the file is empty (0 bytes). Export it again." in res.stderr
    assert (out[0]["rows_read"], out[0]["rows_rejected"]) == (0, 0)


def test_truncated_gzip(tmp_path):
    path = BAD / "exposures_truncated.csv.gz"
    con, rep = _one(path)
    assert rep.status == "failed"
    assert rep.message == (
        f"{path} line 2: the gzip data is truncated or corrupt (the gzip stream ends before its "
        "end marker); the whole file is rejected, nothing was stored from it. Copy the file "
        "again from its source."
    )
    assert con.execute("SELECT count(*) FROM exposures").fetchone()[0] == 0


def test_one_failed_file_does_not_stop_the_others(tmp_path):
    good = BAD / "exposures_bom.csv"
    res, out = _cli(tmp_path, BAD / "exposures_empty.csv", good)
    assert res.exit_code == 1
    assert [o["status"] for o in out] == [
        "ingested",
        "failed",
    ]  # processed in path order
    assert out[0]["rows_accepted"] == 1


# ---- files read, bad rows kept in rejects ---------------------------------------------------


def test_header_only_is_not_an_error(tmp_path):
    res, out = _cli(tmp_path, BAD / "exposures_header_only.csv")
    assert res.exit_code == 0
    assert out[0]["message"] == "header only: no data rows"
    assert (out[0]["status"], out[0]["rows_read"]) == ("ingested", 0)


def test_extra_and_reordered_columns():
    con, rep = _one(BAD / "exposures_extra_reordered_columns.csv")
    assert _counts(rep) == ("ingested", 2, 2, 0, 0)
    assert rep.message == "ignored columns: room_note, operator"
    assert con.execute(
        "SELECT system_id, tube_id, tube_voltage_kv, tube_current_ma, exposure_time_s, "
        "filament_current_a FROM exposures ORDER BY timestamp_utc"
    ).fetchall() == [
        ("R-01", "T-100", 70.0, 200.0, 0.1, 4.5),
        ("R-01", "T-100", 81.0, 400.0, 0.05, 5.5),
    ]


def test_text_in_numeric_fields():
    path = BAD / "exposures_text_in_numeric.csv"
    con, rep = _one(path)
    assert _counts(rep) == ("ingested", 3, 1, 2, 0)
    assert rejects(con) == [
        (
            3,
            "tube_voltage_kv",
            "12O",
            'not a number: tube_voltage_kv is "12O"; fix the row',
        ),
        (
            4,
            "tube_current_ma",
            "two hundred",
            'not a number: tube_current_ma is "two hundred"; fix the row',
        ),
    ]


def test_decimal_comma_without_profile():
    con, rep = _one(BAD / "exposures_decimal_comma.csv")
    assert _counts(rep) == ("ingested", 1, 0, 1, 0)
    assert rejects(con) == [
        (
            2,
            "exposure_time_s",
            "0,1",
            'not a number: exposure_time_s is "0,1", which looks like a decimal comma; use a point, '
            'or read the file with a profile that sets decimal = ","',
        ),
        (
            2,
            "filament_current_a",
            "4,5",
            'not a number: filament_current_a is "4,5", which looks like a decimal comma; use a '
            'point, or read the file with a profile that sets decimal = ","',
        ),
    ]


def test_nan_and_inf():
    con, rep = _one(BAD / "exposures_nan_inf.csv")
    assert _counts(rep) == ("ingested", 4, 1, 3, 0)
    assert rejects(con) == [
        (
            3,
            "tube_voltage_kv",
            "NaN",
            'not finite: tube_voltage_kv is "NaN"; give a finite number or leave it empty',
        ),
        (
            4,
            "tube_current_ma",
            "inf",
            'not finite: tube_current_ma is "inf"; give a finite number or leave it empty',
        ),
        (
            5,
            "filament_current_a",
            "-Infinity",
            'not finite: filament_current_a is "-Infinity"; give a finite number or leave it empty',
        ),
    ]


def test_negative_zero_and_absurd_values():
    con, rep = _one(BAD / "exposures_absurd_values.csv")
    assert _counts(rep) == ("ingested", 5, 0, 5, 0)
    assert rejects(con) == [
        (
            2,
            "tube_voltage_kv",
            "5000",
            'out of range: tube_voltage_kv is "5000" (= 5000.0 kV), outside 20-160 kV; fix the row or check the unit',
        ),
        (
            3,
            "tube_voltage_kv",
            "-70",
            'out of range: tube_voltage_kv is "-70" (= -70.0 kV), outside 20-160 kV; fix the row or check the unit',
        ),
        (
            4,
            "tube_current_ma",
            "0",
            'out of range: tube_current_ma is "0" (= 0.0 mA), outside 0.1-2000 mA; fix the row or check the unit',
        ),
        (
            5,
            "filament_current_a",
            "80",
            'out of range: filament_current_a is "80" (= 80.0 A), outside 1-12 A; fix the row or check the unit',
        ),
        (
            6,
            "exposure_time_s",
            "0",
            'out of range: exposure_time_s is "0" (= 0.0 s), outside 0.0005-30 s; fix the row or check the unit',
        ),
    ]


def test_filament_current_in_ma_given_as_a():
    con, rep = _one(BAD / "exposures_filament_in_ma.csv")
    assert _counts(rep) == ("ingested", 2, 1, 1, 0)
    assert rejects(con) == [
        (
            3,
            "filament_current_a",
            "4512",
            'unit mix-up: filament_current_a is "4512" (= 4512.0 A), which looks like mA given as A; '
            'set the profile\'s unit (units.filament_current_a = "mA")',
        ),
    ]


def test_unparseable_future_and_pre_1990_timestamps():
    con, rep = _one(BAD / "exposures_bad_timestamps.csv")
    assert _counts(rep) == ("ingested", 4, 1, 3, 0)
    assert rejects(con) == [
        (
            3,
            "timestamp_utc",
            "05/03/2024 08:16",
            'bad timestamp: timestamp_utc is "05/03/2024 08:16"; expected ISO 8601 (YYYY-MM-DDTHH:MM:SS[.fff][Z])',
        ),
        (
            4,
            "timestamp_utc",
            "2099-03-05T08:17:02Z",
            'in the future: timestamp_utc is "2099-03-05T08:17:02Z" (UTC 2099-03-05 08:17:02), later '
            "than now; check the generator clock or the profile's time zone",
        ),
        (
            5,
            "timestamp_utc",
            "1985-03-05T08:18:02Z",
            'too early: timestamp_utc is "1985-03-05T08:18:02Z", before 1990-01-01; check the generator clock',
        ),
    ]


def test_non_utf8_bytes_reject_the_line():
    con, rep = _one(BAD / "exposures_non_utf8.csv")
    assert _counts(rep) == ("ingested", 3, 2, 1, 0)
    ((line, field, raw, reason),) = rejects(con)
    assert (line, field) == (3, None)
    assert reason == (
        "invalid encoding: the line has bytes that are not UTF-8; re-export as UTF-8 or set "
        "encoding in a profile"
    )


def test_latin1_file_reads_with_encoding_in_profile(tmp_path):
    prof = tmp_path / "latin.toml"
    prof.write_text(
        'name = "latin"\nkind = "exposures"\nencoding = "latin-1"\n'
        '[columns]\ntimestamp_utc = "Zeitstempel"\nsystem_id = "Gerät"\nfocal_spot = "focal_spot"\n'
        'tube_voltage_kv = "tube_voltage_kv"\ntube_current_ma = "tube_current_ma"\n'
        'exposure_time_s = "exposure_time_s"\n'
    )
    f = tmp_path / "l.csv"
    f.write_bytes(
        "Zeitstempel,Gerät,focal_spot,tube_voltage_kv,tube_current_ma,exposure_time_s\n"
        "2024-03-05T08:15:02Z,Röntgen-1,small,70,200,0.1\n".encode("latin-1")
    )
    con, rep = _one(f, profile=prof)
    assert _counts(rep) == ("ingested", 1, 1, 0, 0)
    assert con.execute("SELECT system_id FROM exposures").fetchone()[0] == "Röntgen-1"


def test_bom_just_works():
    con, rep = _one(BAD / "exposures_bom.csv")
    assert _counts(rep) == ("ingested", 1, 1, 0, 0)
    assert rep.message == ""


def test_very_long_line(tmp_path):
    # generated here (2 MiB line) rather than committed; the reader's limit is 1 MiB per line
    f = tmp_path / "exposures_long_line.csv"
    f.write_text(
        H + "\n"
        "2024-03-05T08:15:02Z,R-01,T-100,small,70,200,0.1,4.5\n"
        "2024-03-05T08:16:02Z,R-01,T-100,small,70,200,0.1," + "9" * (2 << 20) + "\n"
        "2024-03-05T08:17:02Z,R-01,T-100,small,70,200,0.1,4.5\n"
    )
    con, rep = _one(f)
    assert _counts(rep) == ("ingested", 3, 2, 1, 0)
    ((line, field, raw, reason),) = rejects(con)
    assert (line, reason) == (3, "line too long: over 1048576 bytes; fix the line")
    assert len(raw) == 1000  # stored raw text is cut to 1000 characters


def test_malformed_json_lines():
    con, rep = _one(BAD / "exposures_malformed.jsonl")
    assert _counts(rep) == ("ingested", 4, 2, 2, 0)
    assert [(r[0], r[3]) for r in rejects(con)] == [
        (2, "malformed line: not valid JSON; fix or remove the line"),
        (3, "malformed line: not a JSON object; each line must be one {...} object"),
    ]
    assert [
        r[0]
        for r in con.execute("SELECT source_line FROM exposures ORDER BY 1").fetchall()
    ] == [1, 5]


def test_dst_gap_and_ambiguous_with_profile():
    con, rep = _one(BAD / "genlog_HG-T02_2024.csv", profile=HARROWGATE_PROFILE)
    assert _counts(rep) == ("ingested", 5, 4, 1, 0)
    assert rejects(con)[0][3].startswith(
        'non-existent local time: timestamp_utc is "31.03.2024 02:30:00"'
    )


def test_foreign_file_without_profile_cannot_be_placed(tmp_path):
    path = BAD / "genlog_HG-T02_2024.csv"
    res, out = _cli(tmp_path, path)
    assert res.exit_code == 1
    assert out[0]["message"].startswith(
        f"{path} line 1: cannot tell which table this file feeds: its name does not start with one of "
        "exposures, calibrations, events, downtime, systems, tubes"
    )
    assert out[0]["message"].endswith(
        "Rename it, give --kind, or read it with a profile."
    )


def test_duplicate_file_under_another_name_and_overlap(tmp_path):
    a = tmp_path / "exposures-a.csv"
    b = tmp_path / "exposures-b.csv"
    shutil.copy(BAD / "exposures_text_in_numeric.csv", a)
    shutil.copy(a, b)
    res, out = _cli(tmp_path, a, b)
    assert res.exit_code == 0
    assert [o["status"] for o in out] == ["ingested", "already_ingested"]
    # an overlapping export: same rows plus one new -> only the new one is added
    c = tmp_path / "exposures-c.csv"
    c.write_text(
        a.read_text() + "2024-03-05T09:00:00Z,R-01,T-100,small,70,200,0.1,4.5\n"
    )
    res, out = _cli(tmp_path, c)
    assert (
        out[0]["rows_read"],
        out[0]["rows_accepted"],
        out[0]["rows_rejected"],
        out[0]["rows_duplicate"],
    ) == (4, 1, 2, 1)


@pytest.mark.parametrize(
    ("name", "fragment"),
    [
        ("bad_unknown_field.toml", "separator = ',' is not a profile field"),
        (
            "bad_unit.toml",
            "units.filament_current_a = 'mAmp' is not a unit of filament_current_a; allowed: A, mA",
        ),
        (
            "bad_regex.toml",
            "filename.pattern = 'genlog_(?P<system_id>[A-Z' is not a valid regular expression",
        ),
        (
            "bad_timezone.toml",
            "time.timezone = 'Europe/Atlantis' is not an IANA time zone",
        ),
    ],
)
def test_bad_profiles_exit_1_with_message(tmp_path, name, fragment):
    prof = BAD.parent / "profiles" / name
    res = CliRunner().invoke(
        app,
        [
            "ingest",
            "--db",
            str(tmp_path / "s.duckdb"),
            "--profile",
            str(prof),
            str(BAD / "exposures_bom.csv"),
        ],
    )
    assert res.exit_code == 1
    assert res.stderr.startswith(f"Error: profile {prof}: {fragment}")
    assert res.stdout == ""


def test_corrupt_parquet_is_rejected_whole(tmp_path):
    f = tmp_path / "exposures-broken.parquet"
    f.write_bytes(b"PAR1" + b"\x00garbage" * 10)
    con, rep = _one(f)
    assert rep.status == "failed"
    assert rep.message.startswith(f"{f}: not a readable Parquet file (")
    assert rep.message.endswith("). Re-export the file.")


def test_unsupported_file_named_explicitly_is_reported_skipped(tmp_path):
    f = tmp_path / "exposures.xlsx"
    f.write_bytes(b"PK\x03\x04 not really a workbook")
    res, out = _cli(tmp_path, f)
    assert res.exit_code == 0
    assert out[0]["status"] == "skipped"
    assert out[0]["message"].startswith(f"{f}: not a log format tubetrack reads")
