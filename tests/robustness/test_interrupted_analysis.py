"""An analysis killed with SIGKILL while it computes or writes its results leaves every results
table either as it was before or equal to an uninterrupted run, never partial; the store opens
and a re-run completes (issue 7, item 3, second half).

`tubetrack tubes` writes the result_health* tables through store.write_results. The store starts
with results of an earlier run (--as-of a past date), so "old" and "new" contents differ.
"""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pandas as pd
import pytest

from tubetrack import store

from .conftest import child_env, run_cli, tubetrack_cmd, write_hostile_logs

pytestmark = pytest.mark.slow

EARLIER_AS_OF = "2024-03-01"
#: Columns that differ between two runs on the same data (the time of the run).
VOLATILE = ("analysed_at_utc",)


def _result_tables(con) -> list[str]:
    rows = con.execute(
        "SELECT table_name FROM information_schema.tables "
        "WHERE table_name LIKE 'result_health%' ORDER BY 1"
    ).fetchall()
    return [r[0] for r in rows]


def _snapshot(db: Path) -> dict[str, pd.DataFrame]:
    con = store.connect(db, read_only=True)
    try:
        return {t: store.read_results(con, t) for t in _result_tables(con)}
    finally:
        con.close()


def _latest_runs(db: Path) -> dict[str, tuple]:
    """Per results table: (as_of, params) of the run that wrote it last."""
    con = store.connect(db, read_only=True)
    try:
        rows = con.execute(
            "SELECT result_table, arg_max(as_of_utc, finished_at_utc), "
            "arg_max(params_json, finished_at_utc) FROM analysis_runs "
            "WHERE result_table LIKE 'result_health%' GROUP BY 1"
        ).fetchall()
    finally:
        con.close()
    return {r[0]: (r[1], r[2]) for r in rows}


def _same(a: pd.DataFrame, b: pd.DataFrame, *, ignore=()) -> bool:
    cols = [c for c in a.columns if c not in ignore]
    if list(a.columns) != list(b.columns) or len(a) != len(b):
        return False
    key = [c for c in cols if a[c].dtype != float][:4] or cols[:1]
    x = a[cols].sort_values(key, kind="stable").reset_index(drop=True)
    y = b[cols].sort_values(key, kind="stable").reset_index(drop=True)
    try:
        pd.testing.assert_frame_equal(x, y, check_exact=False, rtol=1e-12, atol=0)
    except AssertionError:
        return False
    return True


@pytest.fixture(scope="module")
def analysed_store(tmp_path_factory):
    """A store with earlier results, and the results of an uninterrupted later run."""
    root = tmp_path_factory.mktemp("interrupt")
    write_hostile_logs(root / "logs")
    base = root / "base.duckdb"
    r = run_cli("ingest", "--db", str(base), "--quiet", str(root / "logs"))
    assert r.returncode == 0, r.stderr
    r = run_cli("tubes", "--db", str(base), "--quiet", "--as-of", EARLIER_AS_OF, "-f", "json")
    assert r.returncode == 0, r.stderr
    before = _snapshot(base)
    reference_db = root / "reference.duckdb"
    shutil.copy(base, reference_db)
    r = run_cli("tubes", "--db", str(reference_db), "--quiet", "-f", "json")
    assert r.returncode == 0, r.stderr
    reference = _snapshot(reference_db)
    assert set(before) == set(reference) and len(before) >= 5
    # the earlier run really differs from the later one, so the check below can tell them apart
    assert not _same(before["result_health_diameter"], reference["result_health_diameter"])
    return base, before, reference


def _check_after_kill(db: Path, before, reference) -> dict[str, str]:
    after = _snapshot(db)  # the store opens read-only ...
    con = store.connect(db)  # ... and read-write (WAL replay)
    con.close()
    assert set(after) == set(before)
    state = {}
    for table, frame in after.items():
        if _same(frame, before[table]):
            state[table] = "old"
        elif _same(frame, reference[table], ignore=VOLATILE):
            state[table] = "new"
        else:
            pytest.fail(f"{table} is neither the old nor the new result: partial write")
    return state


@pytest.mark.parametrize("delay_s", [0.5, 2.0, 4.0])
def test_sigkill_during_tubes_leaves_old_or_new_tables(analysed_store, tmp_path, delay_s):
    base, before, reference = analysed_store
    db = tmp_path / "killed.duckdb"
    shutil.copy(base, db)
    proc = subprocess.Popen(
        tubetrack_cmd("tubes", "--db", str(db), "--quiet", "-f", "json"),
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
        env=child_env(),
    )
    time.sleep(delay_s)
    finished = proc.poll() is not None
    if not finished:
        os.kill(proc.pid, signal.SIGKILL)
    proc.wait(timeout=60)
    state = _check_after_kill(db, before, reference)
    if finished:
        assert set(state.values()) == {"new"}
    # a re-run completes and gives the uninterrupted results
    r = run_cli("tubes", "--db", str(db), "--quiet", "-f", "json")
    assert r.returncode == 0, r.stderr
    assert set(_check_after_kill(db, before, reference).values()) == {"new"}


KILL_AFTER_WRITES = textwrap.dedent(
    """
    import os, signal, sys
    from tubetrack import store

    # SIGKILL this process once argv[1] result tables have been written (CREATE OR REPLACE
    # done) inside the results transaction: the connection handed to store.write_result_set
    # is wrapped, and the kill lands when the next table's frame is registered.
    limit = int(sys.argv[1])
    created = [0]
    real = store.write_result_set

    class KillingConnection:
        def __init__(self, con):
            self._con = con

        def __getattr__(self, name):
            return getattr(self._con, name)

        def register(self, *args, **kwargs):
            if created[0] >= limit:
                os.kill(os.getpid(), signal.SIGKILL)
            return self._con.register(*args, **kwargs)

        def execute(self, sql, *args, **kwargs):
            out = self._con.execute(sql, *args, **kwargs)
            if str(sql).startswith("CREATE OR REPLACE TABLE result_"):
                created[0] += 1
            return out

    def write_then_die(con, *args, **kwargs):
        run_ids = real(KillingConnection(con), *args, **kwargs)
        if created[0] >= limit:
            os.kill(os.getpid(), signal.SIGKILL)
        return run_ids

    store.write_result_set = write_then_die
    from tubetrack.cli import app
    app(sys.argv[2:])
    """
)


def _kill_after_writes(db: Path, n_writes: int) -> int:
    proc = subprocess.run(
        [sys.executable, "-c", KILL_AFTER_WRITES, str(n_writes), "tubes", "--db", str(db),
         "--quiet", "-f", "json"],
        capture_output=True,
        env=child_env(),
        timeout=300,
    )
    return proc.returncode


def test_sigkill_between_result_tables_keeps_the_previous_set(analysed_store, tmp_path):
    """A kill that lands after 2 of the 6 result_health* tables were replaced inside the results
    transaction (a deterministic kill point): every table is still the previous run's, and all of
    them come from one run (they are read together by the tube pages and the report)."""
    base, before, reference = analysed_store
    db = tmp_path / "killed.duckdb"
    shutil.copy(base, db)
    assert _kill_after_writes(db, 2) == -signal.SIGKILL
    state = _check_after_kill(db, before, reference)
    assert set(state.values()) == {"old"}, state
    assert len(set(_latest_runs(db).values())) == 1


def _latest_as_of(db: Path, prefix: str) -> dict[str, object]:
    con = store.connect(db, read_only=True)
    try:
        rows = con.execute(
            "SELECT result_table, arg_max(as_of_utc, finished_at_utc) FROM analysis_runs "
            "WHERE starts_with(result_table, ?) GROUP BY 1",
            [prefix],
        ).fetchall()
    finally:
        con.close()
    return dict(rows)


def test_sigkill_between_fleet_forecast_tables_keeps_the_previous_set(
    analysed_store, tmp_path
):
    base, _, _ = analysed_store
    db = tmp_path / "forecast.duckdb"
    shutil.copy(base, db)
    r = run_cli("fleet", "forecast", "--db", str(db), "--quiet", "-f", "json",
                "--as-of", EARLIER_AS_OF)
    assert r.returncode == 0, r.stderr
    earlier = _latest_as_of(db, "result_fleet_forecast")
    assert len(earlier) >= 2 and len(set(earlier.values())) == 1
    rc = _kill_after_writes_argv(db, 1, ["fleet", "forecast", "--db", str(db), "--quiet",
                                        "-f", "json"])
    assert rc == -signal.SIGKILL
    store.connect(db).close()  # the store opens
    after = _latest_as_of(db, "result_fleet_forecast")
    assert after == earlier  # every table still from the earlier (--as-of) run


def _kill_after_writes_argv(db: Path, n_writes: int, argv: list[str]) -> int:
    proc = subprocess.run(
        [sys.executable, "-c", KILL_AFTER_WRITES, str(n_writes), *argv],
        capture_output=True,
        env=child_env(),
        timeout=300,
    )
    return proc.returncode
