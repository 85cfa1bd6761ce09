"""Reconciliation, idempotent re-ingest, overlapping exports, natural keys, inventory upserts."""

from __future__ import annotations

import shutil
from datetime import datetime

from tubetrack import store
from tubetrack.ingest import ingest_paths

from .conftest import BAD, DATA, assert_reconciles, rejects

OVERLAP = DATA / "overlap"
OWN = DATA / "formats" / "exposures-own.csv"


def _count(con, table="exposures"):
    return con.execute(f"SELECT count(*) FROM {table}").fetchone()[0]


def test_reingest_same_file_is_a_reported_noop():
    con = store.connect(":memory:")
    first = ingest_paths(con, [OWN])
    again = ingest_paths(con, [OWN])
    assert first.reports[0].rows_accepted == 3
    (rep,) = again.reports
    assert rep.status == "already_ingested"
    assert rep.message == f"same content as {OWN}, already ingested; nothing to do"
    assert (rep.rows_read, rep.rows_accepted) == (0, 0)
    assert _count(con) == 3
    assert con.execute(
        "SELECT status, count(*) FROM ingest_files GROUP BY 1 ORDER BY 1"
    ).fetchall() == [("already_ingested", 1), ("ingested", 1)]


def test_duplicated_file_under_another_name(tmp_path):
    copy = tmp_path / "exposures-copy-of-own.csv"
    shutil.copy(OWN, copy)
    con = store.connect(":memory:")
    result = ingest_paths(con, [OWN, copy])
    first, second = result.reports
    assert [first.status, second.status] == ["ingested", "already_ingested"]
    assert (
        second.message
        == f"same content as {first.path}, already ingested; nothing to do"
    )
    assert _count(con) == 3


def test_overlapping_exports_do_not_double_count():
    con = store.connect(":memory:")
    a, b = OVERLAP / "exposures-R-09-jan.csv", OVERLAP / "exposures-R-09-jan-resent.csv"
    ra = ingest_paths(con, [a]).reports[0]
    rb = ingest_paths(con, [b]).reports[0]
    assert (ra.rows_read, ra.rows_accepted, ra.rows_duplicate) == (4, 4, 0)
    # Jan 3 and Jan 4 are in both files
    assert (rb.rows_read, rb.rows_accepted, rb.rows_duplicate) == (4, 2, 2)
    days = [
        r[0].day
        for r in con.execute(
            "SELECT timestamp_utc FROM exposures ORDER BY 1"
        ).fetchall()
    ]
    assert days == [1, 2, 3, 4, 5, 6]
    assert_reconciles(con)


def test_duplicates_within_one_file_keep_the_first(tmp_path):
    f = tmp_path / "exposures-dup.csv"
    f.write_text(
        "timestamp_utc,system_id,focal_spot,tube_voltage_kv,tube_current_ma,exposure_time_s\n"
        "2024-01-01T08:00:00Z,R-1,small,70,100,0.1\n"
        "2024-01-01T08:00:00Z,R-1,large,90,500,0.2\n"
        "2024-01-01T08:00:00Z,R-2,large,90,500,0.2\n"
    )
    con = store.connect(":memory:")
    (rep,) = ingest_paths(con, [f]).reports
    assert (rep.rows_read, rep.rows_accepted, rep.rows_duplicate) == (3, 2, 1)
    assert con.execute(
        "SELECT system_id, tube_voltage_kv, source_line FROM exposures ORDER BY system_id"
    ).fetchall() == [("R-1", 70.0, 2), ("R-2", 90.0, 4)]


def test_bad_rows_have_file_line_field_raw_value_and_reason():
    con = store.connect(":memory:")
    path = BAD / "exposures_malformed_rows.csv"
    (rep,) = ingest_paths(con, [path]).reports
    # line 5 is blank (skipped, not a row); lines 3 and 4 have the wrong number of fields
    assert (rep.rows_read, rep.rows_accepted, rep.rows_rejected) == (4, 2, 2)
    assert rejects(con) == [
        (
            3,
            None,
            "2024-03-05T08:16:02Z,R-01,T-100,small,70,200,0.1,4.5,extra",
            "malformed line: more fields than the header (a stray delimiter?); fix the line",
        ),
        (
            4,
            None,
            "2024-03-05T08:17:02Z,R-01,T-100,small",
            "malformed line: too few fields for the header; fix the line",
        ),
    ]
    assert [
        r[0]
        for r in con.execute("SELECT source_line FROM exposures ORDER BY 1").fetchall()
    ] == [2, 6]
    assert_reconciles(con)


def test_line_numbers_survive_blank_lines_and_rejects(tmp_path):
    head = "timestamp_utc,system_id,focal_spot,tube_voltage_kv,tube_current_ma,exposure_time_s\n"
    good = "2024-01-01T08:{m:02d}:00Z,R-1,small,70,100,0.1\n"
    text = head
    text += good.format(m=1)  # line 2
    text += "\n\n"  # lines 3, 4 blank
    text += "x,y\n"  # line 5 malformed
    text += good.format(m=2)  # line 6
    text += good.format(m=3).replace("70", "abc")  # line 7 reject (not a number)
    text += "\n"  # line 8 blank
    text += good.format(m=4)  # line 9
    f = tmp_path / "exposures-lines.csv"
    f.write_text(text)
    con = store.connect(":memory:")
    (rep,) = ingest_paths(con, [f]).reports
    assert (rep.rows_read, rep.rows_accepted, rep.rows_rejected) == (5, 3, 2)
    assert [r[0] for r in rejects(con)] == [5, 7]
    assert [
        r[0]
        for r in con.execute("SELECT source_line FROM exposures ORDER BY 1").fetchall()
    ] == [2, 6, 9]
    # the same file with CRLF line endings gives the same lines
    g = tmp_path / "exposures-lines-crlf.csv"
    g.write_bytes(text.replace("\n", "\r\n").encode())
    (rep,) = ingest_paths(con, [g]).reports
    assert (
        rep.rows_read,
        rep.rows_accepted,
        rep.rows_rejected,
        rep.rows_duplicate,
    ) == (5, 0, 2, 3)
    assert [r[0] for r in rejects(con, g)] == [5, 7]


def test_mixed_line_endings_reject_the_file_whole(tmp_path):
    f = tmp_path / "exposures-mixed.csv"
    f.write_bytes(
        b"timestamp_utc,system_id,focal_spot,tube_voltage_kv,tube_current_ma,exposure_time_s\n"
        b"2024-01-01T08:01:00Z,R-1,small,70,100,0.1\n\r\n2024-01-01T08:02:00Z,R-1,small,70,100,0.1\n"
    )
    con = store.connect(":memory:")
    (rep,) = ingest_paths(con, [f]).reports
    assert rep.status == "failed"
    assert rep.message == (
        f"{f}: the CSV reader cannot follow the file's structure, typically mixed line endings "
        "(CRLF and LF lines in one file) or a quote that is never closed; the whole file is "
        "rejected. Save it with one kind of line ending and balanced quotes."
    )
    assert _count(con) == 0
    assert (rep.rows_read, rep.rows_rejected) == (2, 2)
    assert_reconciles(con)


def test_dry_run_writes_nothing_and_previews(tmp_path):
    con = store.connect(":memory:")
    result = ingest_paths(
        con, [BAD / "exposures_text_in_numeric.csv"], dry_run=True, preview_rows=5
    )
    (rep,) = result.reports
    assert (rep.status, rep.rows_read, rep.rows_accepted, rep.rows_rejected) == (
        "dry_run",
        3,
        1,
        2,
    )
    for t in ("exposures", "rejects", "ingest_files"):
        assert _count(con, t) == 0
    ((path, prev),) = result.previews
    assert prev.rows["line"].tolist() == [2]
    assert prev.rejects["line"].tolist() == [3, 4]


def test_inventory_upserts_by_key_and_keeps_known_values(tmp_path):
    inv1 = tmp_path / "a" / "tubes.csv"
    inv1.parent.mkdir()
    inv1.write_text(
        "tube_id,system_id,model_label,installed_at_utc,removed_at_utc,removal_reason,price,price_currency\n"
        "T-1,R-1,Model A,2022-01-10,,,25000,EUR\n"
        "T-2,R-2,Model A,2022-02-10,,,,\n"
    )
    inv2 = tmp_path / "b" / "tubes.csv"
    inv2.parent.mkdir()
    inv2.write_text(
        "tube_id,system_id,model_label,installed_at_utc,removed_at_utc,removal_reason,price,price_currency\n"
        "T-1,R-1,Model A,2022-01-10,2024-06-01T12:00:00Z,filament,,\n"
        "T-2,R-2,Model A,2022-02-10,,,,\n"
        "T-3,R-1,Model B,2024-06-01T15:00:00Z,,,31000,EUR\n"
    )
    con = store.connect(":memory:")
    ingest_paths(con, [inv1])
    (rep,) = ingest_paths(con, [inv2]).reports
    # T-1 changed (removal added), T-2 identical (duplicate), T-3 new
    assert (rep.rows_read, rep.rows_accepted, rep.rows_duplicate) == (3, 2, 1)
    rows = con.execute(
        "SELECT tube_id, removed_at_utc, removal_reason, price FROM tubes ORDER BY tube_id"
    ).fetchall()
    assert rows == [
        (
            "T-1",
            datetime(2024, 6, 1, 12),
            "filament",
            25000.0,
        ),  # price kept from the first export
        ("T-2", None, None, None),
        ("T-3", None, None, 31000.0),
    ]


def test_systems_calibrations_events_downtime(tmp_path):
    root = tmp_path / "site"
    root.mkdir()
    (root / "systems.csv").write_text(
        "system_id,site,modality,generator_type,criticality_weight,uptime_target_pct,scheduled_hours_per_week,model_label\n"
        "F-1,north,fluoroscopy,high_frequency,2,97.5,60,Room F\n"
    )
    (root / "exposures-F-1.csv").write_text(
        "timestamp_utc,system_id,focal_spot,tube_voltage_kv,tube_current_ma,exposure_time_s\n"
        "2024-01-01T08:00:00Z,F-1,small,70,2.5,120\n"  # a 2-minute fluoroscopy run: valid here
        "2024-01-01T09:00:00Z,F-1,small,70,2.5,1000000\n"  # over the fluoroscopy limit
    )
    (root / "calibrations-F-1.csv").write_text(
        "timestamp_utc,system_id,tube_id,focal_spot,tube_voltage_kv,tube_current_ma,filament_current_a\n"
        "2024-01-01T07:00:00Z,F-1,T-1,small,70,100,4.1\n"
        "2024-01-01T07:00:00Z,F-1,T-1,small,70,200,4.4\n"
        "2024-01-01T07:00:00Z,F-1,T-1,small,70,200,4.4\n"
    )
    (root / "events.csv").write_text(
        "timestamp_utc,system_id,tube_id,category,raw_code,raw_text\n"
        '2024-01-01T08:30:00Z,F-1,,arc,E-17,"<script>alert(1)</script>, tube arc"\n'
        "2024-01-01T08:31:00Z,F-1,,flux_capacitor,E-99,?\n"
    )
    (root / "downtime.csv").write_text(
        "system_id,start_utc,end_utc,cause,planned,severity,note\n"
        "F-1,2024-01-02T08:00:00Z,2024-01-02T12:00:00Z,tube,no,,tube change\n"
        "F-1,2024-01-03T08:00:00Z,2024-01-03T07:00:00Z,preventive,yes,partial,\n"
    )
    con = store.connect(":memory:")
    result = ingest_paths(con, [root])
    by_kind = {r.kind: r for r in result.reports}
    assert list(by_kind) == [
        "systems",
        "exposures",
        "calibrations",
        "events",
        "downtime",
    ]
    assert (by_kind["exposures"].rows_accepted, by_kind["exposures"].rows_rejected) == (
        1,
        1,
    )
    assert rejects(con, root / "exposures-F-1.csv")[0][3] == (
        'out of range: exposure_time_s is "1000000" (= 1000000.0 s), outside 0.0005-600 (fluoroscopy) s; '
        "fix the row or check the unit"
    )
    assert (
        by_kind["calibrations"].rows_accepted,
        by_kind["calibrations"].rows_duplicate,
    ) == (2, 1)
    assert (by_kind["events"].rows_accepted, by_kind["events"].rows_rejected) == (1, 1)
    assert (
        con.execute("SELECT raw_text FROM events").fetchone()[0]
        == "<script>alert(1)</script>, tube arc"
    )
    assert (by_kind["downtime"].rows_accepted, by_kind["downtime"].rows_rejected) == (
        1,
        1,
    )
    assert con.execute("SELECT planned, severity FROM downtime").fetchone() == (
        False,
        "hard_down",
    )
    assert_reconciles(con)


def test_same_times_on_another_system_are_not_duplicates(tmp_path):
    head = "timestamp_utc,system_id,focal_spot,tube_voltage_kv,tube_current_ma,exposure_time_s\n"
    rows = "".join(f"2024-01-01T08:0{m}:00Z,{{s}},small,70,100,0.1\n" for m in range(3))
    (tmp_path / "exposures-1.csv").write_text(head + rows.format(s="R-1"))
    (tmp_path / "exposures-2.csv").write_text(
        head + rows.format(s="R-2") + rows.format(s="R-1")
    )
    con = store.connect(":memory:")
    r1, r2 = ingest_paths(con, [tmp_path]).reports
    assert (r1.rows_accepted, r2.rows_accepted, r2.rows_duplicate) == (3, 3, 3)
    assert con.execute(
        "SELECT system_id, count(*) FROM exposures GROUP BY 1 ORDER BY 1"
    ).fetchall() == [("R-1", 3), ("R-2", 3)]


def test_dry_run_preview_includes_malformed_lines():
    con = store.connect(":memory:")
    result = ingest_paths(
        con, [BAD / "exposures_malformed_rows.csv"], dry_run=True, preview_rows=5
    )
    ((_, prev),) = result.previews
    assert prev.rejects["line"].tolist() == [3, 4]
    assert prev.rejects["reason"].str.startswith("malformed line").all()
    assert _count(con, "rejects") == 0
