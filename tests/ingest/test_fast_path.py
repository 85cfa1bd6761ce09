"""The typed fast path of open-layout CSV files (``engine._fast_ingest``) stores exactly what the
per-field path stores: same rows, same counts, same rejects (line, field, value, reason), and a
file with any bad row goes through the per-field path."""

from __future__ import annotations

from datetime import datetime
from pathlib import Path

import pytest

from tubetrack import store
from tubetrack.ingest import engine, ingest_paths

from .conftest import BAD, DATA, assert_reconciles, rejects

NOW = datetime(2026, 1, 1)

H = (
    "timestamp_utc,system_id,tube_id,focal_spot,tube_voltage_kv,tube_current_ma,"
    "tube_current_measured_ma,exposure_time_s,exposure_mas,filament_current_a,"
    "filament_voltage_v,prep_time_s,arc_count"
)

SYSTEMS = (
    "system_id,site,modality,generator_type\n"
    "S1,North,radiographic,high_frequency\n"
    "FL1,North,fluoroscopy,high_frequency\n"
)


def _tables(con) -> dict[str, list[tuple]]:
    out = {}
    for t in ("exposures", "calibrations", "events", "downtime"):
        out[t] = con.execute(
            f"SELECT * EXCLUDE (source_file) FROM {t} ORDER BY ALL"
        ).fetchall()
    out["files"] = con.execute(
        "SELECT regexp_replace(path, '.*/', ''), table_kind, status, rows_read, rows_accepted, "
        "rows_rejected, rows_duplicate FROM ingest_files ORDER BY file_id"
    ).fetchall()
    out["rejects"] = con.execute(
        "SELECT regexp_replace(path, '.*/', ''), line, field, raw_value, reason FROM rejects "
        "ORDER BY ALL"
    ).fetchall()
    return out


def _run(paths, monkeypatch, fast: bool, calls: list | None = None):
    real = engine._fast_ingest

    def spy(*a, **k):
        res = real(*a, **k) if fast else None
        if calls is not None:
            calls.append(res is not None)
        return res

    with monkeypatch.context() as m:
        m.setattr(engine, "_fast_ingest", spy)
        con = store.connect(":memory:")
        reports = []
        for group in paths:
            reports += ingest_paths(con, group, now_utc=NOW).reports
    assert all(r.reconciles for r in reports)
    assert_reconciles(con)
    return con, reports


def _same(paths, monkeypatch) -> list[bool]:
    """Ingest with and without the fast path; assert identical stores; return which files
    the fast path took."""
    calls: list[bool] = []
    fast_con, fast_reps = _run(paths, monkeypatch, True, calls)
    slow_con, slow_reps = _run(paths, monkeypatch, False)
    assert [r.as_row() for r in fast_reps] == [r.as_row() for r in slow_reps]
    assert _tables(fast_con) == _tables(slow_con)
    return calls


def _write(tmp_path: Path, name: str, text: str) -> Path:
    p = tmp_path / name
    p.write_bytes(text.encode("utf-8"))
    return p


def test_bad_corpus_same_rejects_on_both_paths(monkeypatch):
    files = [
        p
        for p in sorted(BAD.iterdir())
        if p.name.startswith("exposures") and p.suffix in (".csv", ".gz")
    ]
    assert len(files) >= 10
    for p in files:
        _same([[p]], monkeypatch)


def test_clean_files_take_the_fast_path_with_equal_results(tmp_path, monkeypatch):
    rows = [
        # Z, offsets, a date only, surrounding blanks, quoted cells, case of the enum
        "2024-03-01T08:00:00.125Z,S1,T1,small,80,200,198.5,0.1,,4.1,9.5,0.5,0",
        "2024-03-01T10:00:00+02:00,S1,T1,LARGE,81.5,200,,,20,4.1,,1.25,2",
        "2024-03-01T09:30:00 ,S1,, Small ,1e2,  50 ,,0.2,,4.0,,,",
        '"2024-03-01T09:45:00-0100",S1,"T1","large",90,100,,0.05,,"4.2",,0,1.0',
        "2024-03-02,S1,T1,small,70,10,,0.01,,3.9,,,",
        # a named zone the per-field path ignores: both paths must agree
        "2024-03-02T09:00:00 CET,S1,T1,small,70,10,,0.01,,3.9,,,",
        # a long fluoroscopy run (allowed for a fluoroscopy system only)
        "2024-03-01T08:00:00Z,FL1,F1,small,70,2,,300,,3.5,,,",
    ]
    exp = _write(tmp_path, "exposures-a.csv", H + "\n" + "\n".join(rows) + "\n")
    calls = _same(
        [[_write(tmp_path, "systems.csv", SYSTEMS)], [exp]],
        monkeypatch,
    )
    assert calls == [True]


def test_duplicates_in_file_and_in_store(tmp_path, monkeypatch):
    base = [
        "2024-03-01T08:00:00Z,S1,T1,small,80,200,,0.1,,4.1,,,",
        "2024-03-01T08:00:01Z,S1,T1,small,80,200,,0.1,,4.1,,,",
        "2024-03-01T08:00:02Z,S2,T2,small,80,200,,0.1,,4.1,,,",
    ]
    first = _write(tmp_path, "exposures-1.csv", H + "\n" + "\n".join(base) + "\n")
    again = [
        # repeats within the file (not in time order) and of the first file's rows
        "2024-03-01T08:00:05Z,S1,T1,small,81,200,,0.1,,4.1,,,",
        "2024-03-01T08:00:01Z,S1,T1,small,82,200,,0.1,,4.1,,,",
        "2024-03-01T08:00:05Z,S1,T1,small,83,200,,0.1,,4.1,,,",
        "2024-03-01T08:00:05Z,S2,T2,small,84,200,,0.1,,4.1,,,",
        "2024-03-01T08:00:00Z,S1,T1,small,85,200,,0.1,,4.1,,,",
    ]
    second = _write(tmp_path, "exposures-2.csv", H + "\n" + "\n".join(again) + "\n")
    calls = _same([[first], [second]], monkeypatch)
    assert calls == [True, True]
    con, reps = _run([[first], [second]], monkeypatch, True)
    assert (reps[1].rows_read, reps[1].rows_accepted, reps[1].rows_duplicate) == (
        5,
        2,
        3,
    )
    # the first row of a repeated key wins, at its line
    assert con.execute(
        "SELECT tube_voltage_kv, source_line FROM exposures WHERE system_id = 'S1' "
        "AND timestamp_utc = TIMESTAMP '2024-03-01 08:00:05'"
    ).fetchall() == [(81.0, 2)]


def test_blank_lines_keep_true_line_numbers(tmp_path, monkeypatch):
    text = (
        H + "\n\n"
        "2024-03-01T08:00:00Z,S1,T1,small,80,200,,0.1,,4.1,,,\n\n\n"
        "2024-03-01T08:00:01Z,S1,T1,small,80,200,,0.1,,4.1,,,\n"
    )
    p = _write(tmp_path, "exposures-blank.csv", text)
    assert _same([[p]], monkeypatch) == [True]
    con, _ = _run([[p]], monkeypatch, True)
    assert con.execute(
        "SELECT source_line FROM exposures ORDER BY source_line"
    ).fetchall() == [(3,), (6,)]


@pytest.mark.parametrize(
    "bad_row, field",
    [
        ("2024-03-01T08:00:01Z,S1,T1,small,5000,200,,0.1,,4.1,,,", "tube_voltage_kv"),
        ("2024-03-01T08:00:01Z,S1,T1,small,80,200,,0.1,,4100,,,", "filament_current_a"),
        ("2024-03-01T08:00:01Z,S1,T1,medium,80,200,,0.1,,4.1,,,", "focal_spot"),
        ("2024-03-01T08:00:01Z,S1,T1,small,80,200,,0.1,,4.1,,,1.5", "arc_count"),
        ("2024-03-01T08:00:01Z,S1,T1,small,nan,200,,0.1,,4.1,,,", "tube_voltage_kv"),
        ("2024-03-01T08:00:01Z,S1,T1,small,80,200,,,,4.1,,,", "exposure_time_s"),
        ("2024-03-01T08:00:01Z,,T1,small,80,200,,0.1,,4.1,,,", "system_id"),
        ("1989-03-01T08:00:01Z,S1,T1,small,80,200,,0.1,,4.1,,,", "timestamp_utc"),
        ("2031-03-01T08:00:01Z,S1,T1,small,80,200,,0.1,,4.1,,,", "timestamp_utc"),
        ("2024-03-01 08:00:01+2,S1,T1,small,80,200,,0.1,,4.1,,,", "timestamp_utc"),
        ("2024-03-01T08:00:01Z,S1,T1,small,80,200,,0.1,,4.1,,,x", "arc_count"),
        ("2024-03-01T08:00:01Z,S1,T1,small,80,200,,40,,4.1,,,", "exposure_time_s"),
        ("2024-03-01T08:00:01Z,S1,T1,small,80,200,,0.1,,4.1,,,0,7", None),
    ],
)
def test_one_bad_row_sends_the_file_to_the_per_field_path(
    tmp_path, monkeypatch, bad_row, field
):
    good = "2024-03-01T08:00:00Z,S1,T1,small,80,200,,0.1,,4.1,,,"
    p = _write(tmp_path, "exposures-bad.csv", H + "\n" + good + "\n" + bad_row + "\n")
    assert _same([[p]], monkeypatch) == [False]
    con, (rep,) = _run([[p]], monkeypatch, True)
    assert (rep.rows_read, rep.rows_accepted, rep.rows_rejected) == (2, 1, 1)
    got = rejects(con)
    assert [(r[0], r[1]) for r in got] == [(3, field)]


def test_blank_numbers_and_a_trailing_delimiter_agree(tmp_path, monkeypatch):
    rows = [
        "2024-03-01T08:00:00Z,S1,T1,small,80,200,,0.1,,4.1,,, ",
        "2024-03-01T08:00:01Z,S1,T1,small,80,200,,0.1,,4.1,,,,",
    ]
    p = _write(tmp_path, "exposures-edge.csv", H + "\n" + "\n".join(rows) + "\n")
    _same([[p]], monkeypatch)


def test_other_kinds_and_sample_logs_agree(tmp_path, monkeypatch):
    events = _write(
        tmp_path,
        "events-a.csv",
        "timestamp_utc,system_id,tube_id,category,raw_code,raw_text\n"
        "2024-03-01T08:00:00Z,S1,T1,arc,,first\n"
        "2024-03-01T08:00:00Z,S1,T1,arc,,repeat with no code\n"
        '2024-03-01T09:00:00Z,S1,T1,ARC,E12,"text, with ""quotes""\nand a newline"\n',
    )
    downtime = _write(
        tmp_path,
        "downtime-a.csv",
        "system_id,start_utc,end_utc,cause,planned,severity,note\n"
        "S1,2024-03-01T08:00:00Z,2024-03-01T10:00:00Z,tube,yes,,n\n"
        "S1,2024-03-02T08:00:00Z,2024-03-02T10:00:00Z,generator,0,partial,\n",
    )
    calls = _same([[events], [downtime]], monkeypatch)
    assert calls == [True, True]
    sample = DATA.parents[1] / "sample_logs"
    if sample.exists():
        _same([[sample]], monkeypatch)


def test_bad_row_after_many_rows_rolls_back_the_typed_insert(tmp_path, monkeypatch):
    """The typed insert fails only at the last row, after whole row groups were appended: the
    per-field path then takes the file from a clean transaction."""
    import duckdb

    p = tmp_path / "exposures-long.csv"
    duckdb.connect().execute(
        f"COPY (SELECT strftime(TIMESTAMP '2024-01-01' + to_seconds(i), '%Y-%m-%dT%H:%M:%SZ') "
        "AS timestamp_utc, 'S1' AS system_id, 'T1' AS tube_id, 'small' AS focal_spot, "
        "CASE WHEN i = 149999 THEN 5000 ELSE 80 END AS tube_voltage_kv, 200 AS tube_current_ma, "
        "0.1 AS exposure_time_s, 4.1 AS filament_current_a FROM range(150000) t(i)) "
        f"TO '{p}' (HEADER)"
    )
    calls: list[bool] = []
    con, (rep,) = _run([[p]], monkeypatch, True, calls)
    assert calls == [False]
    assert (rep.rows_read, rep.rows_accepted, rep.rows_rejected) == (150000, 149999, 1)
    assert con.execute("SELECT count(*) FROM exposures").fetchone()[0] == 149999
    assert [(r[0], r[1]) for r in rejects(con)] == [(150001, "tube_voltage_kv")]
