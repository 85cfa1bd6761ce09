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


# ---- several files in one scan (engine.ingest_batch) -----------------------------------------


def _run_batch(folder, monkeypatch, batch: bool):
    from tubetrack.ingest import pipeline

    taken: list[int] = []
    real = pipeline.ingest_batch

    def spy(con, items, **kw):
        reps, tried = real(con, items, **kw) if batch else ([], 0)
        taken.append(len(reps))
        return reps, tried

    with monkeypatch.context() as m:
        m.setattr(pipeline, "ingest_batch", spy)
        con = store.connect(":memory:")
        reports = list(ingest_paths(con, [folder], now_utc=NOW).reports)
        reports += ingest_paths(con, [folder], now_utc=NOW).reports  # a re-run: no-ops
    assert all(r.reconciles for r in reports)
    assert_reconciles(con)
    return con, reports, taken


def _same_batch(folder, monkeypatch) -> list[int]:
    b_con, b_reps, taken = _run_batch(folder, monkeypatch, True)
    s_con, s_reps, _ = _run_batch(folder, monkeypatch, False)
    strip = lambda rows: [r.as_row() for r in rows]  # noqa: E731
    assert strip(b_reps) == strip(s_reps)
    assert _tables(b_con) == _tables(s_con)
    return taken


def _rows(start: int, n: int, system: str = "S1", kv: int = 80) -> list[str]:
    return [
        f"2024-03-01T08:{(start + i) // 60:02d}:{(start + i) % 60:02d}Z,{system},T1,small,"
        f"{kv},200,,0.1,,4.1,,,"
        for i in range(n)
    ]


def test_batch_equals_file_by_file_with_overlaps_and_repeats(tmp_path, monkeypatch):
    d = tmp_path / "logs"
    d.mkdir()
    files = {
        "exposures-1.csv": _rows(0, 5),
        # overlaps file 1 (3 rows) and repeats a key within itself
        "exposures-2.csv": _rows(2, 5, kv=81) + _rows(6, 1, kv=82),
        "exposures-3.csv": [],  # header only
        "exposures-4.csv": _rows(0, 3, system="S2") + _rows(4, 2, kv=83),
        # same bytes as file 1 under another name: already ingested
        "exposures-5.csv": _rows(0, 5),
        "exposures-6.csv": _rows(40, 2, system="S3"),
    }
    for name, rows in files.items():
        _write(d, name, H + "\n" + "".join(r + "\n" for r in rows))
    taken = _same_batch(d, monkeypatch)
    assert taken[0] == 4  # files 1-4 in one scan; 5 is a repeat, then 6 alone
    con, reps, _ = _run_batch(d, monkeypatch, True)
    got = {
        Path(r.path).name: (r.status, r.rows_read, r.rows_duplicate) for r in reps[:6]
    }
    assert got["exposures-2.csv"] == ("ingested", 6, 4)
    assert got["exposures-4.csv"] == ("ingested", 5, 2)
    assert got["exposures-5.csv"][0] == "already_ingested"
    assert con.execute(
        "SELECT source_line, tube_voltage_kv FROM exposures WHERE source_file LIKE "
        "'%exposures-2.csv' ORDER BY source_line"
    ).fetchall() == [(5, 81.0), (6, 81.0)]


@pytest.mark.parametrize(
    "odd",
    [
        "2024-03-01T09:00:00Z,S1,T1,small,5000,200,,0.1,,4.1,,,\n",  # a bad row
        "2024-03-01T09:00:00Z,S1,T1,small,80,200,,0.1,,4.1,,,,9\n",  # malformed line
        '2024-03-01T09:00:00Z,S1,"T1",small,80,200,,0.1,,4.1,,,\n',  # a quote
        "\n2024-03-01T09:00:00Z,S1,T1,small,80,200,,0.1,,4.1,,,\n",  # a blank line
    ],
)
def test_batch_with_an_odd_file_equals_file_by_file(tmp_path, monkeypatch, odd):
    d = tmp_path / "logs"
    d.mkdir()
    for i in range(4):
        text = H + "\n" + "".join(r + "\n" for r in _rows(10 * i, 3, system=f"S{i}"))
        if i == 2:
            text += odd
        _write(d, f"exposures-{i}.csv", text)
    _same_batch(d, monkeypatch)


def test_batch_other_header_ends_the_run(tmp_path, monkeypatch):
    d = tmp_path / "logs"
    d.mkdir()
    short = "timestamp_utc,system_id,focal_spot,tube_voltage_kv,tube_current_ma,exposure_mas,filament_current_a"
    _write(d, "exposures-0.csv", H + "\n" + "\n".join(_rows(0, 3)) + "\n")
    _write(d, "exposures-1.csv", H + "\n" + "\n".join(_rows(3, 3)) + "\n")
    _write(
        d,
        "exposures-2.csv",
        short + "\n2024-03-01T09:00:00Z,S1,small,80,200,20,4.1\n",
    )
    _write(d, "exposures-3.csv", H + "\n" + "\n".join(_rows(0, 3, system="S9")) + "\n")
    _write(d, "exposures-4.csv", H + "\n" + "\n".join(_rows(3, 3, system="S9")) + "\n")
    taken = _same_batch(d, monkeypatch)
    assert taken[:3] == [2, 0, 2]  # 0-1 together, 2 alone (its header), 3-4 together


def test_batch_of_crlf_files_equals_file_by_file(tmp_path, monkeypatch):
    d = tmp_path / "logs"
    d.mkdir()
    for i in range(3):
        rows = _rows(10 * i, 3, system=f"S{i % 2}")
        (d / f"exposures-{i}.csv").write_bytes(
            (H + "\r\n" + "".join(r + "\r\n" for r in rows)).encode()
        )
    assert _same_batch(d, monkeypatch)[0] == 3


def test_batch_of_large_files_numbers_lines_in_scan_order(tmp_path, monkeypatch):
    """Files large enough that DuckDB reads them on several threads: each row's line number
    still follows its file's order (the batch numbers rows by the scan-ordered table's row ids)."""
    import pandas as pd

    d = tmp_path / "logs"
    d.mkdir()
    n = 60_000  # ~4 MB per file, several CSV buffers and row groups
    t0 = pd.Timestamp("2024-01-01T00:00:00")
    for f in range(4):
        i = pd.RangeIndex(n)
        stamps = (t0 + pd.to_timedelta(i + f * n, unit="s")).strftime("%Y-%m-%dT%H:%M:%SZ")
        kv = 40 + (i % 97)
        rows = stamps + f",S{f},T{f},small," + kv.astype(str) + ",200,,0.1,,4.1,,,"
        _write(d, f"exposures-{f}.csv", H + "\n" + "\n".join(rows) + "\n")
    taken = _same_batch(d, monkeypatch)
    assert taken[0] == 4
    con, _reps, _ = _run_batch(d, monkeypatch, True)
    # line k of every file holds its (k - 2)-th row: kV = 40 + (k - 2) mod 97
    bad = con.execute(
        "SELECT count(*) FROM exposures WHERE tube_voltage_kv <> 40 + (source_line - 2) % 97"
    ).fetchone()[0]
    assert bad == 0
    assert con.execute("SELECT count(*) FROM exposures").fetchone()[0] == 4 * n


def test_scan_ahead_gives_the_scan_of_each_file_and_its_errors(tmp_path):
    """Scans queued on the background thread equal scans made in place (hashlib's sha256 of
    the bytes, the line count), a file not queued is scanned on demand, a missing file raises."""
    import hashlib

    from tubetrack.ingest.reader import ScanAhead, scan_file

    paths = []
    for i in range(5):
        text = H + "\n" + "".join(r + "\n" for r in _rows(10 * i, 3 + i))
        paths.append(_write(tmp_path, f"exposures-{i}.csv", text))
    with ScanAhead() as ahead:
        ahead.prefetch(paths[:3] + [tmp_path / "gone.csv"])
        ahead.prefetch(paths[:2])  # queued once
        got = [ahead.get(p) for p in paths]
        with pytest.raises(OSError):
            ahead.get(tmp_path / "gone.csv")
    for p, scan, i in zip(paths, got, range(5), strict=True):
        assert scan == scan_file(p)
        assert scan.sha256 == hashlib.sha256(p.read_bytes()).hexdigest()
        assert scan.lines == 1 + 3 + i


def test_batch_repeats_within_and_across_files_equal_file_by_file(tmp_path, monkeypatch):
    """One duplicate pass in the batch: a key three times in one file, and keys repeated within
    a file that an earlier file also holds, counted per file as the file-by-file path counts
    them (keys already stored are covered by the re-run in ``_run_batch``)."""
    d = tmp_path / "logs"
    d.mkdir()
    files = {
        "exposures-1.csv": _rows(0, 4),
        # key 1 again (earlier file) twice; key 20 three times in this file
        "exposures-2.csv": _rows(1, 1, kv=90) + _rows(20, 1) + _rows(1, 1, kv=91)
        + _rows(20, 1, kv=92) + _rows(20, 1, kv=93),
        "exposures-3.csv": _rows(30, 2) + _rows(2, 1, kv=94) + _rows(30, 1, kv=95),
    }
    for name, rows in files.items():
        _write(d, name, H + "\n" + "".join(r + "\n" for r in rows))
    taken = _same_batch(d, monkeypatch)
    assert taken[0] == 3
    con, reps, _ = _run_batch(d, monkeypatch, True)
    got = {Path(r.path).name: (r.rows_read, r.rows_duplicate) for r in reps[:3]}
    assert got == {"exposures-1.csv": (4, 0), "exposures-2.csv": (5, 4), "exposures-3.csv": (4, 2)}
    # the first line of each key stays
    assert con.execute(
        "SELECT source_line, tube_voltage_kv FROM exposures WHERE source_file LIKE "
        "'%exposures-2.csv' ORDER BY source_line"
    ).fetchall() == [(3, 80.0)]
