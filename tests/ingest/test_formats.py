"""Each input format of the open layout reads to the same canonical rows."""

from __future__ import annotations

import gzip
import shutil
from datetime import datetime
from pathlib import Path

import pytest

from tubetrack import store
from tubetrack.ingest import ingest_paths

from .conftest import DATA

FORMATS = DATA / "formats"

# Hand-written fixture rows (tests/data/formats/exposures-own.*), expected canonical values.
EXPECTED = [
    # timestamp_utc, system_id, tube_id, focal_spot, kV, mA, s, mAs, filament A, prep s, arcs, line
    (
        datetime(2024, 3, 5, 8, 15, 2, 123000),
        "R-01",
        "T-100",
        "small",
        70.0,
        200.0,
        0.1,
        20.0,
        4.5,
        0.8,
        0,
    ),
    # +01:00 offset -> 08:00 UTC; mAs given, time derived = 20 mAs / 400 mA = 0.05 s
    (
        datetime(2024, 3, 5, 8, 0, 0),
        "R-01",
        None,
        "large",
        81.0,
        400.0,
        0.05,
        20.0,
        5.25,
        1.2,
        2,
    ),
    # no offset = UTC; "LARGE" normalised; mAs derived = 630 mA x 0.016 s = 10.08 mAs; arcs empty -> 0
    (
        datetime(2024, 3, 5, 10, 30, 0),
        "R-02",
        "T-200",
        "large",
        125.0,
        630.0,
        0.016,
        10.08,
        5.75,
        None,
        0,
    ),
]

COLS = (
    "timestamp_utc, system_id, tube_id, focal_spot, tube_voltage_kv, tube_current_ma, "
    "exposure_time_s, exposure_mas, filament_current_a, prep_time_s, arc_count"
)


def _rows(con):
    rows = con.execute(
        f"SELECT {COLS} FROM exposures ORDER BY system_id, timestamp_utc"
    ).fetchall()
    return [tuple(round(v, 9) if isinstance(v, float) else v for v in r) for r in rows]


def _expected():
    return sorted(
        [
            tuple(round(v, 9) if isinstance(v, float) else v for v in r)
            for r in EXPECTED
        ],
        key=lambda r: (r[1], r[0]),
    )


def _parquet(tmp: Path) -> Path:
    import duckdb

    out = tmp / "exposures-own.parquet"
    con = duckdb.connect()
    con.execute(
        "COPY (SELECT * FROM read_csv(?, all_varchar=true)) TO '"
        + str(out).replace("'", "''")
        + "' (FORMAT parquet)",
        [str(FORMATS / "exposures-own.csv")],
    )
    con.close()
    return out


def _gz(src: Path, tmp: Path) -> Path:
    out = tmp / (src.name + ".gz")
    out.write_bytes(gzip.compress(src.read_bytes()))
    return out


def _pipe(tmp: Path) -> Path:
    out = tmp / "exposures-own-pipe.csv"
    out.write_text((FORMATS / "exposures-own.csv").read_text().replace(",", "|"))
    return out


def _semicolon_crlf(tmp: Path) -> Path:
    out = tmp / "exposures-own-crlf.txt"
    out.write_bytes(
        (FORMATS / "exposures-own.csv")
        .read_bytes()
        .replace(b",", b";")
        .replace(b"\n", b"\r\n")
    )
    return out


MAKERS = {
    "csv": lambda tmp: FORMATS / "exposures-own.csv",
    "tsv": lambda tmp: FORMATS / "exposures-own.tsv",
    "jsonl": lambda tmp: FORMATS / "exposures-own.jsonl",
    "csv.gz": lambda tmp: _gz(FORMATS / "exposures-own.csv", tmp),
    "tsv.gz": lambda tmp: _gz(FORMATS / "exposures-own.tsv", tmp),
    "jsonl.gz": lambda tmp: _gz(FORMATS / "exposures-own.jsonl", tmp),
    "parquet": _parquet,
    "pipe-delimited": _pipe,
    "semicolon-crlf": _semicolon_crlf,
}


@pytest.mark.parametrize("fmt", list(MAKERS))
def test_each_format_gives_the_same_canonical_rows(fmt, tmp_path):
    path = MAKERS[fmt](tmp_path)
    con = store.connect(":memory:")
    result = ingest_paths(con, [path])
    (rep,) = result.reports
    assert (
        rep.status,
        rep.kind,
        rep.rows_read,
        rep.rows_accepted,
        rep.rows_rejected,
    ) == ("ingested", "exposures", 3, 3, 0), rep.message
    assert _rows(con) == _expected()
    lines = [
        r[0]
        for r in con.execute(
            "SELECT source_line FROM exposures ORDER BY source_line"
        ).fetchall()
    ]
    # CSV: header is line 1; JSON Lines and Parquet have no header (row 1 = line 1)
    assert lines == (
        [2, 3, 4] if fmt not in ("jsonl", "jsonl.gz", "parquet") else [1, 2, 3]
    )


def test_folder_is_walked_recursively_and_truth_and_readme_skipped(tmp_path):
    site = tmp_path / "logs" / "site-a" / "deeper"
    site.mkdir(parents=True)
    shutil.copy(FORMATS / "exposures-own.csv", site)
    (tmp_path / "logs" / "truth.csv").write_text("tube_id,fails\nT-1,2024-01-01\n")
    (tmp_path / "logs" / "README.md").write_text("# not a log\n")
    (tmp_path / "logs" / "notes.pdf").write_bytes(b"%PDF-1.4")
    con = store.connect(":memory:")
    result = ingest_paths(con, [tmp_path / "logs"])
    assert [Path(r.path).name for r in result.reports] == ["exposures-own.csv"]
    assert con.execute("SELECT count(*) FROM exposures").fetchone()[0] == 3


def test_kind_from_header_when_the_name_does_not_say(tmp_path):
    path = tmp_path / "export_0001.csv"
    shutil.copy(FORMATS / "exposures-own.csv", path)
    con = store.connect(":memory:")
    (rep,) = ingest_paths(con, [path]).reports
    assert (rep.kind, rep.rows_accepted) == ("exposures", 3)


def test_kind_option_decides_for_an_unnamed_file(tmp_path):
    path = tmp_path / "gen.csv"
    path.write_text(
        "timestamp_utc,system_id,focal_spot,tube_voltage_kv,tube_current_ma,filament_current_a\n"
        "2024-05-01T06:00:00Z,R-01,small,70,100,4.25\n"
    )
    con = store.connect(":memory:")
    (rep,) = ingest_paths(con, [path], kind="calibrations").reports
    assert (rep.kind, rep.rows_accepted) == ("calibrations", 1)
    assert (
        con.execute("SELECT filament_current_a FROM calibrations").fetchone()[0] == 4.25
    )
