"""An ingest running in one process while `status`, `tubes` and `report` start in others: each of
them waits with a message on stderr and then succeeds, or fails with a clear `Error:` and exit
code 1; never a Python traceback, never a corrupt store (issue 7, item 4; two ingests at once are
tested in tests/ingest/test_interrupt.py)."""

from __future__ import annotations

import subprocess
import time
from pathlib import Path

import pytest

from tubetrack import store

from .conftest import child_env, run_cli, tubetrack_cmd, write_hostile_logs

pytestmark = pytest.mark.slow

N_BULK = 2_000_000  # long enough that the others start while it holds the store
WAIT_MESSAGE = "is in use by another process; waiting up to"


def write_bulk_exposures(path: Path, n_rows: int) -> None:
    """A canonical exposures CSV of ``n_rows`` rows for 7 bulk systems, written by DuckDB COPY."""
    import duckdb

    target = str(path).replace("'", "''")
    con = duckdb.connect()
    try:
        con.execute(
            f"""COPY (
                SELECT strftime(TIMESTAMP '2019-01-01' + to_seconds(i * 7), '%Y-%m-%dT%H:%M:%SZ')
                         AS timestamp_utc,
                       'BULK-' || (i % 7) AS system_id,
                       CASE WHEN i % 3 = 0 THEN 'small' ELSE 'large' END AS focal_spot,
                       60 + i % 50 AS tube_voltage_kv,
                       100 + (i % 10) * 50 AS tube_current_ma,
                       0.01 + (i % 100) / 1000.0 AS exposure_time_s,
                       4 + (i % 100) / 100.0 AS filament_current_a,
                       0.8 + (i % 7) / 10.0 AS prep_time_s,
                       (i % 997 = 0)::INT AS arc_count
                FROM range({int(n_rows)}) t(i)
            ) TO '{target}' (HEADER)"""
        )
    finally:
        con.close()


def _reconciles(db: Path) -> tuple[int, int]:
    con = store.connect(db, read_only=True)
    try:
        bad = con.execute(
            "SELECT path FROM ingest_files "
            "WHERE rows_read <> rows_accepted + rows_rejected + rows_duplicate"
        ).fetchall()
        assert bad == []
        accepted = con.execute(
            "SELECT sum(rows_accepted) FROM ingest_files "
            "WHERE status = 'ingested' AND table_kind = 'exposures'"
        ).fetchall()[0][0]
        stored = con.execute("SELECT count(*) FROM exposures").fetchall()[0][0]
        tables = {r[0] for r in con.execute("SELECT table_name FROM information_schema.tables").fetchall()}
        assert set(store.CANONICAL_TABLES) <= tables
    finally:
        con.close()
    return int(accepted), int(stored)


def test_readers_and_analyses_wait_or_fail_cleanly_during_ingest(tmp_path):
    logs = tmp_path / "logs"
    write_hostile_logs(logs)
    db = tmp_path / "store.duckdb"
    r = run_cli("ingest", "--db", str(db), "--quiet", str(logs))
    assert r.returncode == 0, r.stderr
    r = run_cli("tubes", "--db", str(db), "--quiet", "-f", "json")  # stored results for report
    assert r.returncode == 0, r.stderr
    before_accepted, before_stored = _reconciles(db)
    assert before_accepted == before_stored

    bulk = tmp_path / "bulk"
    bulk.mkdir()
    write_bulk_exposures(bulk / "exposures-bulk.csv", N_BULK)

    ingest = subprocess.Popen(
        tubetrack_cmd("ingest", "--db", str(db), "--quiet", "-f", "json", str(bulk)),
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        env=child_env(),
    )
    # give the ingest time to import and take the store's lock (it holds it for many seconds)
    time.sleep(2.0)
    others = {
        "status": tubetrack_cmd("status", "--db", str(db), "-f", "json"),
        "tubes": tubetrack_cmd("tubes", "--db", str(db), "--quiet", "-f", "json"),
        "report": tubetrack_cmd(
            "report", "--db", str(db), "--quiet", "--no-images", "--out", str(tmp_path / "rep")
        ),
    }
    procs = {
        name: subprocess.Popen(
            argv, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=child_env()
        )
        for name, argv in others.items()
    }
    assert ingest.poll() is None, "the ingest finished before the others started; make it bigger"
    results = {name: (p, *p.communicate(timeout=600)) for name, p in procs.items()}
    _out, err = ingest.communicate(timeout=600)
    assert ingest.returncode == 0, err
    assert "Traceback" not in err

    waited = 0
    for name, (proc, _stdout, stderr) in results.items():
        assert "Traceback" not in stderr, (name, stderr[-3000:])
        print(f"\n{name}: exit {proc.returncode}, waited: {WAIT_MESSAGE in stderr}")
        if proc.returncode == 0:
            waited += WAIT_MESSAGE in stderr
        else:
            assert proc.returncode == 1, (name, proc.returncode, stderr[-2000:])
            # the wait message first, then one clear error line
            assert stderr.strip().splitlines()[-1].startswith(
                f"Error: store {db} is in use by another tubetrack process"
            ), (name, stderr[-2000:])
    # at least the command that ran into the ingest said it was waiting (or failed clearly)
    assert waited or any(p.returncode == 1 for p, _, _ in results.values())
    if results["report"][0].returncode == 0:
        assert (tmp_path / "rep" / "fleet.html").is_file()

    accepted, stored = _reconciles(db)
    assert accepted == stored == before_stored + N_BULK
    # and the store still takes writes: a re-run of everything works
    r = run_cli("status", "--db", str(db), "-f", "json")
    assert r.returncode == 0 and "Traceback" not in r.stderr


HOLD_LOCK = (
    "import sys, time, duckdb\n"
    "con = duckdb.connect(sys.argv[1])\n"
    "print('locked', flush=True)\n"
    "time.sleep(float(sys.argv[2]))\n"
)


def test_store_held_past_the_wait_gives_a_clear_error(tmp_path):
    """Another process keeps the store's write lock for longer than the 30 s the commands wait:
    each one prints the waiting message, then one `Error:` line, exit code 1, no traceback, and
    the store is unharmed."""
    import sys

    logs = tmp_path / "logs"
    write_hostile_logs(logs)
    db = tmp_path / "store.duckdb"
    r = run_cli("ingest", "--db", str(db), "--quiet", str(logs))
    assert r.returncode == 0, r.stderr
    before = _reconciles(db)
    holder = subprocess.Popen(
        [sys.executable, "-c", HOLD_LOCK, str(db), "75"],
        stdout=subprocess.PIPE,
        text=True,
        env=child_env(),
    )
    try:
        assert holder.stdout.readline().strip() == "locked"
        argvs = {
            "status": tubetrack_cmd("status", "--db", str(db), "-f", "json"),
            "tubes": tubetrack_cmd("tubes", "--db", str(db), "--quiet", "-f", "json"),
            "report": tubetrack_cmd(
                "report", "--db", str(db), "--quiet", "--no-images", "--out", str(tmp_path / "r")
            ),
            "ingest": tubetrack_cmd("ingest", "--db", str(db), "--quiet", str(logs)),
        }
        procs = {
            n: subprocess.Popen(a, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                                env=child_env())
            for n, a in argvs.items()
        }
        done = {n: (p, *p.communicate(timeout=300)) for n, p in procs.items()}
        assert holder.poll() is None, "the lock holder ended early; the test proves nothing"
    finally:
        holder.kill()
        holder.wait(timeout=30)
    for name, (proc, stdout, stderr) in done.items():
        assert "Traceback" not in stderr, (name, stderr[-3000:])
        assert proc.returncode == 1, (name, proc.returncode, stderr[-2000:])
        assert WAIT_MESSAGE in stderr, name
        last = stderr.strip().splitlines()[-1]
        assert last.startswith(f"Error: store {db} is in use by another tubetrack process"), (
            name, last,
        )
        assert stdout.strip() in ("", "[]"), (name, stdout[:500])
    assert _reconciles(db) == before
