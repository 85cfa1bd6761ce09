"""End to end: `tubetrack ingest sample_logs` (what `make demo` runs) on the committed demo logs.

The demo's README lists its deliberately bad rows (file, line); the rejects must be exactly
those, at those lines, and every file must reconcile.
"""

from __future__ import annotations

import json
import re

import pytest
from typer.testing import CliRunner

from tubetrack import store
from tubetrack.cli import app

from .conftest import assert_reconciles

SAMPLE = __import__("pathlib").Path(__file__).resolve().parents[2] / "sample_logs"


def _readme_bad_rows() -> tuple[set[tuple[str, int]], set[tuple[str, int]]]:
    text = (SAMPLE / "README.md").read_text(encoding="utf-8")
    sec = text.split("## Deliberately bad rows", 1)[1]
    rejected, duplicated = set(), set()
    for m in re.finditer(r"^\| ([^|]+?) \| (\d+) \| ([^|]*?) \|", sec, re.M):
        key = (m.group(1).strip(), int(m.group(2)))
        (duplicated if "whole row" in m.group(3) else rejected).add(key)
    return rejected, duplicated


@pytest.mark.slow
@pytest.mark.skipif(
    not (SAMPLE / "inventory").exists(), reason="sample_logs not generated"
)
def test_ingest_sample_logs_end_to_end(tmp_path, monkeypatch):
    monkeypatch.chdir(SAMPLE.parent)
    db = tmp_path / "demo.duckdb"
    res = CliRunner().invoke(
        app, ["ingest", "--db", str(db), "--format", "json", "sample_logs"]
    )
    assert res.exit_code == 0, res.stderr
    out = json.loads(res.stdout)
    assert [o for o in out if o["status"] == "failed"] == []
    for o in out:
        assert (
            o["rows_read"]
            == o["rows_accepted"] + o["rows_rejected"] + o["rows_duplicate"]
        ), o
    genlogs = [o for o in out if "/genlog_" in o["path"]]
    assert genlogs and {o["profile"] for o in genlogs} == {"harrowgate"}

    con = store.connect(db, read_only=True)
    assert_reconciles(con)
    got = {
        (p.removeprefix("sample_logs/"), int(line))
        for p, line in con.execute(
            "SELECT path, line FROM rejects WHERE line IS NOT NULL"
        ).fetchall()
    }
    rejected, duplicated = _readme_bad_rows()
    assert got == rejected
    for path, _line in duplicated:
        dups = con.execute(
            "SELECT rows_duplicate FROM ingest_files WHERE path = ?",
            [f"sample_logs/{path}"],
        ).fetchone()[0]
        assert dups >= 1
    # the foreign site's rows are in time order, across the repeated autumn hour too: the UTC
    # times, read back in line order, never go back
    inversions = con.execute(
        "SELECT count(*) FROM (SELECT timestamp_utc < lag(timestamp_utc) OVER "
        "(PARTITION BY source_file ORDER BY source_line) AS back FROM exposures "
        "WHERE source_file LIKE '%genlog_%') WHERE back"
    ).fetchone()[0]
    assert inversions == 0
    inv = con.execute(
        "SELECT (SELECT count(*) FROM systems), (SELECT count(*) FROM tubes)"
    ).fetchone()
    assert inv[0] > 0 and inv[1] >= inv[0]
    con.close()

    again = CliRunner().invoke(
        app, ["ingest", "--db", str(db), "--format", "json", "-q", "sample_logs"]
    )
    assert again.exit_code == 0
    assert {o["status"] for o in json.loads(again.stdout)} <= {
        "already_ingested",
        "skipped",
    }
