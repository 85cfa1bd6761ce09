"""Property tests (hypothesis): random valid and corrupted rows written to a file and ingested.

Invariants: rows read = accepted + rejected + duplicate; every corrupted row and only those land
in rejects, at their line; accepted rows round-trip exactly; a re-ingest is a no-op.
"""

from __future__ import annotations

import csv
import io
from datetime import datetime, timedelta

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tubetrack import store
from tubetrack.ingest import ingest_paths

COLS = [
    "timestamp_utc",
    "system_id",
    "focal_spot",
    "tube_voltage_kv",
    "tube_current_ma",
    "exposure_time_s",
    "filament_current_a",
]
BASE = datetime(2023, 5, 1, 6, 0, 0)

ids = st.text(
    alphabet=st.characters(blacklist_categories=("Cc", "Cs", "Zs", "Zl", "Zp")),
    min_size=1,
    max_size=12,
)


@st.composite
def valid_row(draw, i):
    return {
        "timestamp_utc": (BASE + timedelta(seconds=37 * i)).isoformat() + "Z",
        "system_id": draw(ids),
        "focal_spot": draw(st.sampled_from(["small", "large", "SMALL", "Large"])),
        "tube_voltage_kv": round(draw(st.floats(20, 160)), 2),
        "tube_current_ma": round(draw(st.floats(0.1, 2000)), 3),
        "exposure_time_s": round(draw(st.floats(0.001, 30)), 4),
        "filament_current_a": draw(
            st.one_of(st.none(), st.floats(1, 12).map(lambda x: round(x, 4)))
        ),
    }


CORRUPTIONS = {
    "timestamp_utc": ["yesterday", "1980-01-01T00:00:00Z", "2024-13-01T00:00:00Z", ""],
    "system_id": [""],
    "focal_spot": ["medium", "F1", ""],
    "tube_voltage_kv": ["abc", "", "nan", "5000", "-1", "1,5e"],
    "tube_current_ma": ["0", "inf", "x", "-200"],
    "exposure_time_s": ["", "-0.1", "ten"],
    "filament_current_a": ["80", "4500", "-1", "NaN"],
}


@st.composite
def rows(draw):
    n = draw(st.integers(1, 25))
    out, bad = [], []
    for i in range(n):
        r = draw(valid_row(i))
        if draw(st.booleans()) and draw(st.booleans()):  # about a quarter corrupted
            field = draw(st.sampled_from(sorted(CORRUPTIONS)))
            r[field] = draw(st.sampled_from(CORRUPTIONS[field]))
            bad.append(i)
        out.append(r)
    return out, bad


def _write(path, data):
    buf = io.StringIO()
    w = csv.DictWriter(buf, fieldnames=COLS, lineterminator="\n")
    w.writeheader()
    for r in data:
        w.writerow(
            {
                k: ("" if v is None else (repr(v) if isinstance(v, float) else v))
                for k, v in r.items()
            }
        )
    path.write_text(buf.getvalue(), encoding="utf-8")


@settings(
    max_examples=30,
    deadline=None,
    suppress_health_check=[HealthCheck.function_scoped_fixture],
)
@given(data=rows())
def test_reconciliation_roundtrip_and_idempotence(tmp_path_factory, data):
    rows_, bad = data
    path = tmp_path_factory.mktemp("prop") / "exposures-prop.csv"
    _write(path, rows_)
    con = store.connect(":memory:")
    (rep,) = ingest_paths(con, [path]).reports
    assert rep.reconciles
    assert rep.rows_read == len(rows_)
    assert rep.rows_rejected == len(bad)
    assert rep.rows_duplicate == 0  # timestamps are distinct by construction
    reject_lines = sorted(
        {r[0] for r in con.execute("SELECT line FROM rejects").fetchall()}
    )
    assert reject_lines == [i + 2 for i in bad]
    got = con.execute(
        "SELECT source_line, timestamp_utc, system_id, focal_spot, tube_voltage_kv, "
        "tube_current_ma, exposure_time_s, filament_current_a FROM exposures ORDER BY source_line"
    ).fetchall()
    want = [
        (
            i + 2,
            BASE + timedelta(seconds=37 * i),
            r["system_id"],
            r["focal_spot"].lower(),
            r["tube_voltage_kv"],
            r["tube_current_ma"],
            r["exposure_time_s"],
            r["filament_current_a"],
        )
        for i, r in enumerate(rows_)
        if i not in bad
    ]
    assert got == want  # exact: floats written with repr() read back bit for bit
    (again,) = ingest_paths(con, [path]).reports
    assert again.status == "already_ingested"
    assert con.execute("SELECT count(*) FROM exposures").fetchone()[0] == len(want)
    con.close()
