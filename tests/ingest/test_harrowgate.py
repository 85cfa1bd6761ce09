"""The harrowgate foreign layout read through its profile: decimal comma, day-first local
times across both DST changes, filament current in mA, F1/F2 focus codes, BOM.

Reference for local time -> UTC is Python's zoneinfo (IANA tz database), never tubetrack code.
# Source: IANA tz database (zoneinfo), Europe/Berlin DST transition 2024-03-31 01:00 UTC /
# 2024-10-27 01:00 UTC
"""

from __future__ import annotations

import gzip
import shutil
from datetime import UTC, datetime
from zoneinfo import ZoneInfo

import pytest

from tubetrack import store
from tubetrack.ingest import ingest_paths

from .conftest import BAD, DATA, HARROWGATE_PROFILE, PROFILES, rejects

BERLIN = ZoneInfo("Europe/Berlin")
FIXTURE = DATA / "harrowgate" / "genlog_HG-T01_2024.csv"


def utc(y, mo, d, h, mi, s=0, fold=0) -> datetime:
    """Local Berlin wall time -> naive UTC via zoneinfo (fold=1: second pass of a repeated hour)."""
    local = datetime(y, mo, d, h, mi, s, tzinfo=BERLIN, fold=fold)
    return local.astimezone(UTC).replace(tzinfo=None)


def test_zoneinfo_reference_matches_the_cited_transitions():
    # Source: IANA tz database (zoneinfo), Europe/Berlin DST transition 2024-03-31 01:00 UTC /
    # 2024-10-27 01:00 UTC: the last CET second before spring is 01:59:59 local = 00:59:59 UTC,
    # the first CEST second is 03:00 local = 01:00 UTC; in autumn 02:59:59 CEST = 00:59:59 UTC
    # and the repeated 02:00 CET = 01:00 UTC.
    assert utc(2024, 3, 31, 3, 0) == datetime(2024, 3, 31, 1, 0)
    assert utc(2024, 3, 31, 1, 59, 59) == datetime(2024, 3, 31, 0, 59, 59)
    assert utc(2024, 10, 27, 2, 0, fold=1) == datetime(2024, 10, 27, 1, 0)
    assert utc(2024, 10, 27, 2, 59, 59, fold=0) == datetime(2024, 10, 27, 0, 59, 59)


# rows of tests/data/harrowgate/genlog_HG-T01_2024.csv (invented values), canonical expectation
EXPECTED = [
    # line, UTC (zoneinfo), focal, kV, mA, exposure s, filament A, prep s, arcs
    (2, utc(2024, 1, 15, 9, 30), "small", 70.0, 200.0, 0.100, 4.5125, 0.8, 0),
    (3, utc(2024, 3, 31, 1, 59, 59), "large", 81.0, 400.0, 0.0505, 5.1, 1.2, 1),
    (4, utc(2024, 3, 31, 3, 0), "small", 66.0, 250.0, 0.032, 4.62, 0.9, 0),
    (5, utc(2024, 7, 15, 14, 0), "large", 90.0, 500.0, 0.020, 5.30025, 1.0, 2),
    (6, utc(2024, 10, 27, 1, 30), "small", 70.0, 200.0, 0.100, 4.5, 0.8, 0),
    (7, utc(2024, 10, 27, 2, 15, fold=0), "small", 70.0, 200.0, 0.100, 4.5, 0.8, 0),
    (8, utc(2024, 10, 27, 2, 45, fold=0), "large", 70.0, 200.0, 0.100, 5.0, 0.8, 0),
    # the clock went back: same wall times again are the second (CET) pass
    (9, utc(2024, 10, 27, 2, 15, fold=1), "small", 70.0, 200.0, 0.100, 4.501, 0.8, 0),
    (10, utc(2024, 10, 27, 2, 45, fold=1), "large", 70.0, 200.0, 0.100, 5.001, 0.8, 0),
    (11, utc(2024, 10, 27, 3, 0), "small", 70.0, 200.0, 0.100, 4.502, 0.8, 0),
]


def _canonical(con):
    rows = con.execute(
        "SELECT source_line, timestamp_utc, focal_spot, tube_voltage_kv, tube_current_ma, "
        "exposure_time_s, filament_current_a, prep_time_s, arc_count, system_id "
        "FROM exposures ORDER BY source_line"
    ).fetchall()
    assert {r[-1] for r in rows} == {"HG-T01"}
    return [r[:-1] for r in rows]


def _check(rows):
    assert len(rows) == len(EXPECTED)
    for got, exp in zip(rows, EXPECTED, strict=True):
        assert got[:3] == exp[:3]
        # converted values: mA -> A and ms -> s are exact decimal shifts; 1e-12 covers the
        # binary representation of the product
        assert got[3:8] == pytest.approx(exp[3:8], rel=1e-12)
        assert got[8] == exp[8]


def test_profile_reads_the_foreign_layout_exactly():
    con = store.connect(":memory:")
    result = ingest_paths(con, [FIXTURE], profile=HARROWGATE_PROFILE)
    (rep,) = result.reports
    assert (
        rep.status,
        rep.profile,
        rep.rows_read,
        rep.rows_accepted,
        rep.rows_rejected,
    ) == ("ingested", "harrowgate", 10, 10, 0)
    _check(_canonical(con))


def test_folder_profiles_are_applied_by_glob_and_gzip_works(tmp_path):
    root = tmp_path / "logs"
    (root / "harrowgate").mkdir(parents=True)
    (root / "profiles").mkdir()
    shutil.copy(HARROWGATE_PROFILE, root / "profiles")
    (root / "harrowgate" / (FIXTURE.name + ".gz")).write_bytes(
        gzip.compress(FIXTURE.read_bytes())
    )
    con = store.connect(":memory:")
    (rep,) = ingest_paths(con, [root]).reports
    assert (rep.profile, rep.rows_accepted) == ("harrowgate", 10)
    _check(_canonical(con))


def test_builtin_profile_by_name():
    con = store.connect(":memory:")
    (rep,) = ingest_paths(con, [FIXTURE], profile="harrowgate").reports
    assert rep.rows_accepted == 10


def test_spring_gap_rejected_and_autumn_ambiguity_by_policy():
    path = BAD / "genlog_HG-T02_2024.csv"
    con = store.connect(":memory:")
    (rep,) = ingest_paths(con, [path], profile=HARROWGATE_PROFILE).reports
    # order policy: 02:30 on 27.10 has no earlier pass in the file -> first (CEST) pass
    assert (rep.rows_read, rep.rows_accepted, rep.rows_rejected) == (5, 4, 1)
    assert rejects(con) == [
        (
            3,
            "timestamp_utc",
            "31.03.2024 02:30:00",
            'non-existent local time: timestamp_utc is "31.03.2024 02:30:00", inside the '
            "spring-forward gap of Europe/Berlin (clocks skip this hour); fix the generator "
            "clock or the row",
        )
    ]
    got = [
        r[0]
        for r in con.execute(
            "SELECT timestamp_utc FROM exposures ORDER BY source_line"
        ).fetchall()
    ]
    assert got == [
        utc(2024, 3, 31, 1, 59),
        utc(2024, 3, 31, 3, 10),
        utc(2024, 10, 27, 2, 30, fold=0),
        utc(2024, 10, 27, 3, 30),
    ]


def test_ambiguous_policy_reject_names_the_row():
    path = BAD / "genlog_HG-T02_2024.csv"
    con = store.connect(":memory:")
    (rep,) = ingest_paths(
        con, [path], profile=PROFILES / "harrowgate_ambiguous_reject.toml"
    ).reports
    assert (rep.rows_read, rep.rows_accepted, rep.rows_rejected) == (5, 3, 2)
    assert rejects(con)[1] == (
        5,
        "timestamp_utc",
        "27.10.2024 02:30:00",
        'ambiguous local time: timestamp_utc is "27.10.2024 02:30:00", which occurs twice at '
        'the autumn change in Europe/Berlin; set time.ambiguous = "earlier" or "later" in the profile',
    )


@pytest.mark.parametrize(("policy", "fold"), [("earlier", 0), ("later", 1)])
def test_ambiguous_policy_earlier_later(policy, fold, tmp_path):
    prof = tmp_path / "p.toml"
    prof.write_text(
        HARROWGATE_PROFILE.read_text().replace(
            'ambiguous = "order"', f'ambiguous = "{policy}"'
        )
    )
    con = store.connect(":memory:")
    ingest_paths(con, [BAD / "genlog_HG-T02_2024.csv"], profile=prof)
    got = con.execute(
        "SELECT timestamp_utc FROM exposures WHERE source_line = 5"
    ).fetchone()[0]
    assert got == utc(2024, 10, 27, 2, 30, fold=fold)


def test_other_zone_new_york_matches_zoneinfo(tmp_path):
    # America/New_York: 2024-03-10 02:00 -> 03:00 and 2024-11-03 02:00 -> 01:00 local
    # (reference: zoneinfo, IANA tz database); month-first US dates, times in seconds
    prof = tmp_path / "ny.toml"
    prof.write_text(
        'name = "ny"\nkind = "exposures"\n[time]\nformats = ["%m/%d/%Y %I:%M:%S %p"]\n'
        'timezone = "America/New_York"\n[columns]\ntimestamp_utc = "when"\n'
        'exposure_time_s = "ms"\n[units]\nexposure_time_s = "ms"\n'
        '[constants]\nsystem_id = "NY-1"\nfocal_spot = "small"\ntube_voltage_kv = "70"\n'
        'tube_current_ma = "100"\n'
    )
    f = tmp_path / "ny.csv"
    f.write_text(
        "when,ms\n03/10/2024 01:59:59 AM,10\n03/10/2024 03:00:00 AM,10\n"
        "11/03/2024 01:30:00 AM,10\n11/03/2024 01:10:00 AM,10\n11/03/2024 02:00:00 AM,10\n"
    )
    con = store.connect(":memory:")
    (rep,) = ingest_paths(con, [f], profile=prof).reports
    assert rep.rows_accepted == 5, rep.message
    ny = ZoneInfo("America/New_York")

    def u(*a, fold=0):
        return datetime(*a, tzinfo=ny, fold=fold).astimezone(UTC).replace(tzinfo=None)

    got = [
        r[0]
        for r in con.execute(
            "SELECT timestamp_utc FROM exposures ORDER BY source_line"
        ).fetchall()
    ]
    assert got == [
        u(2024, 3, 10, 1, 59, 59),
        u(2024, 3, 10, 3, 0),
        u(2024, 11, 3, 1, 30),
        u(2024, 11, 3, 1, 10, fold=1),
        u(2024, 11, 3, 2, 0),
    ]
    assert con.execute(
        "SELECT min(exposure_time_s), max(exposure_time_s) FROM exposures"
    ).fetchone() == (0.01, 0.01)
