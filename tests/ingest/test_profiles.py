"""Profiles are validated strictly and are data only."""

from __future__ import annotations

import pytest

from tubetrack import store
from tubetrack.errors import ProfileError
from tubetrack.ingest import ingest_paths
from tubetrack.ingest.profiles import builtin_profiles, load_profile, parse_profile

from .conftest import HARROWGATE_PROFILE, PROFILES


@pytest.mark.parametrize(
    ("name", "message"),
    [
        (
            "bad_unknown_field.toml",
            "separator = ',' is not a profile field; allowed: name, description, kind, files, "
            "format, delimiter, decimal, encoding, columns, units, values, constants, filename, "
            "time. Fix the profile file and run again.",
        ),
        (
            "bad_unit.toml",
            "units.filament_current_a = 'mAmp' is not a unit of filament_current_a; allowed: A, "
            "mA. Fix the profile file and run again.",
        ),
        (
            "bad_regex.toml",
            "filename.pattern = 'genlog_(?P<system_id>[A-Z' is not a valid regular expression "
            "(unterminated character set at position 21); allowed: Python regular expressions "
            "with named groups such as (?P<system_id>[A-Z0-9-]+). Fix the profile file and run again.",
        ),
        (
            "bad_timezone.toml",
            "time.timezone = 'Europe/Atlantis' is not an IANA time zone; allowed: names such as "
            "UTC, Europe/Berlin, America/New_York (see zoneinfo.available_timezones()). Fix the "
            "profile file and run again.",
        ),
    ],
)
def test_invalid_profile_names_file_key_value_and_allowed(name, message):
    path = PROFILES / name
    with pytest.raises(ProfileError) as info:
        load_profile(path)
    assert str(info.value) == f"profile {path}: {message}"


def test_unknown_column_lists_the_kinds_columns():
    with pytest.raises(
        ProfileError,
        match=r"columns\.kv = 'kVp' is not a column of exposures; allowed: timestamp_utc, system_id",
    ):
        load_profile(PROFILES / "bad_column.toml")


def test_invalid_profile_stops_ingest_with_its_message(tmp_path):
    con = store.connect(":memory:")
    with pytest.raises(ProfileError, match="bad_unit.toml"):
        ingest_paths(con, [tmp_path], profile=PROFILES / "bad_unit.toml")


def test_missing_profile_lists_builtins(tmp_path):
    with pytest.raises(ProfileError, match=r"does not exist.*harrowgate"):
        load_profile(tmp_path / "nope.toml")


@pytest.mark.parametrize(
    ("data", "fragment"),
    [
        (
            {"kind": "xrays"},
            "kind = 'xrays' is not a table kind; allowed: exposures, calibrations",
        ),
        (
            {"kind": "exposures", "decimal": ";"},
            "decimal = ';' is not a decimal mark; allowed: ., ,",
        ),
        (
            {"kind": "exposures", "time": {"ambiguous": "guess"}},
            "allowed: order, earlier, later, reject",
        ),
        (
            {"kind": "exposures", "time": {"formats": ["dd.mm.yyyy"]}},
            "time.formats = 'dd.mm.yyyy' is not a strptime format",
        ),
        (
            {"kind": "exposures", "values": {"focal_spot": {"F1": "tiny"}}},
            "values.focal_spot.F1 = 'tiny' is not a focal_spot; allowed: small, large",
        ),
        (
            {"kind": "exposures", "units": {"system_id": "A"}},
            "units.system_id = 'A' names a column without a unit",
        ),
        (
            {"kind": "exposures", "filename": {"pattern": "(?P<bogus>x)"}},
            "captures group 'bogus', not a column of exposures",
        ),
        (
            {"kind": "exposures", "columns": {"system_id": ["a", "b"]}},
            "may be a list (joined with a space) only for a timestamp column",
        ),
        (
            {"kind": "exposures", "encoding": "ebcdic"},
            "encoding = 'ebcdic' is not a supported encoding",
        ),
    ],
)
def test_parse_profile_rejects(data, fragment):
    with pytest.raises(ProfileError) as info:
        parse_profile(data, "p.toml")
    assert fragment in str(info.value)


def test_harrowgate_profile_is_the_builtin_one_and_valid():
    shipped = builtin_profiles()["harrowgate"]
    sample = load_profile(HARROWGATE_PROFILE)
    assert (sample.columns, sample.units, sample.values, sample.timezone) == (
        shipped.columns,
        shipped.units,
        shipped.values,
        shipped.timezone,
    )
    assert sample.unit_factor("filament_current_a") == 0.001
    assert sample.matches("harrowgate/genlog_HVC-R01_2024.csv.gz")
    assert not sample.matches("aldermere/exposures-ALG-R01.csv.gz")
    assert sample.captures("genlog_HVC-R01_2024.csv.gz") == {"system_id": "HVC-R01"}


def test_constants_and_file_name_captures(tmp_path):
    prof = tmp_path / "p.toml"
    prof.write_text(
        'name = "cap"\nkind = "exposures"\nfiles = "room_*.csv"\n'
        "[filename]\npattern = 'room_(?P<system_id>[A-Z0-9]+)_(?P<focal_spot>small|large)'\n"
        '[constants]\ntube_id = "T-77"\n'
        '[columns]\ntimestamp_utc = "t"\ntube_voltage_kv = "kv"\ntube_current_ma = "ma"\n'
        'exposure_mas = "mas"\n[units]\nexposure_mas = "uAs"\n'
    )
    f = tmp_path / "room_R5_large.csv"
    f.write_text("t,kv,ma,mas\n2024-02-01T10:00:00Z,80,500,25000\n")
    con = store.connect(":memory:")
    (rep,) = ingest_paths(con, [f], profile=prof).reports
    assert rep.rows_accepted == 1, rep.message
    row = con.execute(
        "SELECT system_id, focal_spot, tube_id, exposure_mas, exposure_time_s FROM exposures"
    ).fetchone()
    # 25000 uAs = 25 mAs; time = 25 mAs / 500 mA = 0.05 s
    assert row[:3] == ("R5", "large", "T-77")
    assert row[3] == pytest.approx(25.0, rel=1e-12)
    assert row[4] == pytest.approx(0.05, rel=1e-12)


def test_profile_strings_are_data_not_sql(tmp_path):
    # a hostile column name and value map stay data (quoted identifier, bound parameters)
    prof = tmp_path / "p.toml"
    prof.write_text(
        'name = "hostile"\nkind = "exposures"\n'
        '[columns]\ntimestamp_utc = "t\\"; DROP TABLE exposures; --"\nsystem_id = "sys"\n'
        'focal_spot = "f"\ntube_voltage_kv = "kv"\ntube_current_ma = "ma"\nexposure_time_s = "s"\n'
        '[values.focal_spot]\n"x\'); DELETE FROM systems; --" = "small"\n'
    )
    f = tmp_path / "h.csv"
    f.write_text(
        '"t""; DROP TABLE exposures; --",sys,f,kv,ma,s\n'
        "2024-02-01T10:00:00Z,<b>R1</b>,x'); DELETE FROM systems; --,80,500,0.1\n"
    )
    con = store.connect(":memory:")
    (rep,) = ingest_paths(con, [f], profile=prof).reports
    assert rep.rows_accepted == 1, rep.message
    assert con.execute("SELECT system_id, focal_spot FROM exposures").fetchone() == (
        "<b>R1</b>",
        "small",
    )
