"""An ingest killed mid-file (SIGKILL) leaves a consistent store; a re-run completes it with the
same totals as an uninterrupted run."""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from tubetrack import store

N_BIG = 600_000


def _write_logs(root: Path) -> None:
    import duckdb

    root.mkdir(parents=True)
    (root / "exposures-a-small.csv").write_text(
        "timestamp_utc,system_id,focal_spot,tube_voltage_kv,tube_current_ma,exposure_time_s\n"
        "2019-06-01T08:00:00Z,S-1,small,70,100,0.1\n2019-06-01T08:01:00Z,S-1,large,80,400,0.05\n"
    )
    big = str(root / "exposures-b-big.csv").replace("'", "''")
    con = duckdb.connect()
    con.execute(
        f"""COPY (SELECT strftime(TIMESTAMP '2020-01-01' + to_seconds(i * 30), '%Y-%m-%dT%H:%M:%SZ')
                   AS timestamp_utc, 'R-' || (i % 5) AS system_id,
                   CASE WHEN i % 3 = 0 THEN 'small' ELSE 'large' END AS focal_spot,
                   60 + i % 50 AS tube_voltage_kv, 100 + (i % 10) * 50 AS tube_current_ma,
                   0.01 + (i % 100) / 1000.0 AS exposure_time_s,
                   CASE WHEN i % 100000 = 7 THEN '99' ELSE CAST(4 + (i % 100) / 100.0 AS VARCHAR) END
                   AS filament_current_a
            FROM range({N_BIG}) t(i)) TO '{big}' (HEADER)"""
    )
    con.close()


def _run(db: Path, logs: Path) -> subprocess.Popen:
    env = dict(os.environ, PYTHONUNBUFFERED="1")
    return subprocess.Popen(
        [
            sys.executable,
            "-m",
            "tubetrack",
            "ingest",
            "--db",
            str(db),
            "--quiet",
            "--format",
            "json",
            str(logs),
        ],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        env=env,
    )


def _totals(db: Path):
    con = store.connect(db, read_only=True)
    try:
        files = con.execute(
            "SELECT path, rows_read, rows_accepted, rows_rejected, rows_duplicate FROM ingest_files "
            "WHERE status = 'ingested' ORDER BY path"
        ).fetchall()
        counts = con.execute(
            "SELECT source_file, count(*) FROM exposures GROUP BY 1 ORDER BY 1"
        ).fetchall()
        rejects = con.execute("SELECT count(*) FROM rejects").fetchone()[0]
        checksum = con.execute(
            # integer sums: exact whatever order the parallel aggregation adds rows in
            "SELECT sum(epoch_ms(timestamp_utc)::HUGEINT), "
            "sum(round(filament_current_a * 1e6)::HUGEINT) FROM exposures"
        ).fetchone()
    finally:
        con.close()
    return files, counts, rejects, checksum


KILL_BEFORE_COMMIT = """
import os, signal, sys
from tubetrack.ingest import engine
real = engine._ingest_in_txn
def write_then_die(con, path, *args, **kwargs):
    result = real(con, path, *args, **kwargs)
    if path.name == sys.argv[1]:
        os.kill(os.getpid(), signal.SIGKILL)  # rows written, transaction not committed
    return result
engine._ingest_in_txn = write_then_die
from tubetrack.cli import app
app(sys.argv[2:])
"""


@pytest.mark.slow
def test_sigkill_mid_file_then_rerun(tmp_path):
    logs = tmp_path / "logs"
    _write_logs(logs)

    reference_db = tmp_path / "reference.duckdb"
    ref = _run(reference_db, logs)
    out, err = ref.communicate(timeout=600)
    assert ref.returncode == 0, err.decode()
    ref_totals = _totals(reference_db)
    # 2 + 600,000 rows, 6 of them with a filament current of 99 A (rejected)
    assert [f[1:] for f in ref_totals[0]] == [(2, 2, 0, 0), (N_BIG, N_BIG - 6, 6, 0)]

    db = tmp_path / "killed.duckdb"
    # Deterministic kill point: the child SIGKILLs itself once every row of the big file is
    # written inside the file's transaction, before COMMIT (a wall-clock kill raced a fast
    # machine, which sometimes finished the file first).
    proc = subprocess.run(
        [sys.executable, "-c", KILL_BEFORE_COMMIT, "exposures-b-big.csv", "ingest", "--db",
         str(db), "--quiet", "--format", "json", str(logs)],
        capture_output=True,
        env=dict(os.environ, PYTHONUNBUFFERED="1"),
        timeout=600,
    )
    assert proc.returncode == -signal.SIGKILL, proc.stderr.decode()

    # the store opens, and holds no partial file: every stored row belongs to a file recorded as
    # ingested, with exactly its accepted count
    files, counts, _, _ = _totals(db)
    accepted = {f[0]: f[2] for f in files}
    assert dict(counts) == {p: n for p, n in accepted.items() if n}
    assert str(logs / "exposures-b-big.csv") not in accepted

    rerun = _run(db, logs)
    out, err = rerun.communicate(timeout=600)
    assert rerun.returncode == 0, err.decode()
    assert _totals(db) == ref_totals


@pytest.mark.slow
def test_two_ingests_at_once_second_waits_or_fails_cleanly(tmp_path):
    logs = tmp_path / "logs"
    _write_logs(logs)
    db = tmp_path / "shared.duckdb"
    first = _run(db, logs)
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline and not db.exists():
        time.sleep(0.05)
    time.sleep(0.5)
    second = _run(db, logs)
    out2, err2 = second.communicate(timeout=600)
    out1, err1 = first.communicate(timeout=600)
    assert first.returncode == 0, err1.decode()
    text = err2.decode()
    assert "Traceback" not in text
    if second.returncode == 0:
        # it waited for the first one (or, on a fast machine, started after it), then found
        # every file already ingested: nothing counted twice either way
        assert {o["status"] for o in json.loads(out2)} == {"already_ingested"}
    else:
        assert second.returncode == 1
        assert text.strip().splitlines()[-1].startswith(
            f"Error: store {db} is in use by another tubetrack process"
        )
    # nothing counted twice
    files, counts, _, _ = _totals(db)
    assert sum(n for _, n in counts) == 2 + N_BIG - 6
