"""Store: schema creation, migrations, atomic results, lock handling."""

from __future__ import annotations

import contextlib
import subprocess
import sys

import duckdb
import pandas as pd
import pytest

from tubetrack import store
from tubetrack.errors import NotFoundError, StoreBusyError, StoreError


def test_schema_created_at_latest_version(mem_store):
    assert store.schema_version(mem_store) == store.SCHEMA_VERSION
    tables = {r[0] for r in mem_store.execute("SHOW TABLES").fetchall()}
    assert set(store.CANONICAL_TABLES) <= tables


def test_every_measurement_column_carries_a_unit(mem_store):
    cols = mem_store.execute(
        "SELECT column_name FROM information_schema.columns "
        "WHERE table_name IN ('exposures','calibrations') AND data_type = 'DOUBLE'"
    ).fetchall()
    units = ("_kv", "_ma", "_s", "_mas", "_a", "_v")
    assert cols and all(c[0].endswith(units) for c in cols), cols


def test_reopen_does_not_reapply_migrations(db_path):
    con = store.connect(db_path)
    n = con.execute("SELECT count(*) FROM schema_version").fetchone()[0]
    con.close()
    con = store.connect(db_path)
    assert con.execute("SELECT count(*) FROM schema_version").fetchone()[0] == n
    con.close()


def test_newer_schema_is_refused(db_path):
    con = store.connect(db_path)
    con.execute("INSERT INTO schema_version VALUES (999, now()::TIMESTAMP, 'future')")
    con.close()
    with pytest.raises(StoreError, match="newer than this tubetrack"):
        store.connect(db_path)


def test_read_only_missing_store_says_next_step(tmp_path):
    with pytest.raises(StoreError, match="tubetrack ingest"):
        store.connect(tmp_path / "nope.duckdb", read_only=True)


def test_view_attributes_tube_by_install_dates(mem_store):
    mem_store.execute(
        "INSERT INTO tubes (tube_id, system_id, installed_at_utc, removed_at_utc) VALUES "
        "('T1','S1','2020-01-01','2021-01-01'), ('T2','S1','2021-01-01', NULL)"
    )
    mem_store.execute(
        "INSERT INTO exposures (timestamp_utc, system_id, focal_spot, tube_voltage_kv, "
        "tube_current_ma) VALUES ('2020-06-01','S1','large',80,200), "
        "('2021-06-01','S1','large',80,200)"
    )
    got = mem_store.execute(
        "SELECT tube_id FROM v_exposures ORDER BY timestamp_utc"
    ).fetchall()
    assert got == [("T1",), ("T2",)]


def test_write_results_replaces_and_registers(mem_store):
    store.write_results(mem_store, "result_demo", pd.DataFrame({"x": [1, 2, 3]}), kind="t")
    store.write_results(mem_store, "result_demo", pd.DataFrame({"x": [7]}), kind="t")
    assert store.read_results(mem_store, "result_demo")["x"].tolist() == [7]
    runs = mem_store.execute("SELECT rows FROM analysis_runs ORDER BY started_at_utc").fetchall()
    assert [r[0] for r in runs] == [3, 1]


def test_write_results_failure_keeps_old_table(mem_store):
    store.write_results(mem_store, "result_demo", pd.DataFrame({"x": [1]}), kind="t")
    with pytest.raises(ValueError):
        store.write_results(mem_store, "bad name; drop", pd.DataFrame({"x": [2]}), kind="t")
    assert store.read_results(mem_store, "result_demo")["x"].tolist() == [1]


def test_missing_results_table_is_not_found(mem_store):
    with pytest.raises(NotFoundError, match="run the analysis first"):
        store.read_results(mem_store, "result_nothing")


@contextlib.contextmanager
def _lock_held(db_path):
    """Another process holds the store's write lock for the duration of the block."""
    store.connect(db_path).close()
    holder = subprocess.Popen(
        [sys.executable, "-c",
         "import sys,time,duckdb; c=duckdb.connect(sys.argv[1]); print('held', flush=True); "
         "time.sleep(30)", str(db_path)],
        stdout=subprocess.PIPE, text=True,
    )
    try:
        assert holder.stdout.readline().strip() == "held"
        yield
    finally:
        holder.kill()
        holder.wait()


def test_second_writer_waits_then_fails_clearly(db_path):
    with _lock_held(db_path):
        messages = []
        with pytest.raises(StoreBusyError, match="in use by another tubetrack process"):
            store.connect(db_path, wait_s=1.0, on_wait=messages.append)
        assert messages and "waiting" in messages[0]


def test_result_set_is_replaced_as_one(mem_store):
    store.write_result_set(mem_store, {"result_a": pd.DataFrame({"x": [1]})}, kind="t")
    # a view squatting on the second name makes its CREATE OR REPLACE TABLE fail mid-set
    mem_store.execute("CREATE VIEW result_b AS SELECT 1 AS y")
    with pytest.raises(duckdb.Error):
        store.write_result_set(
            mem_store,
            {"result_a": pd.DataFrame({"x": [2]}), "result_b": pd.DataFrame({"y": [2]})},
            kind="t",
        )
    # the first table of the failed set was rolled back with the rest
    assert store.read_results(mem_store, "result_a")["x"].tolist() == [1]
    assert mem_store.execute("SELECT count(*) FROM analysis_runs").fetchall()[0][0] == 1


def test_busy_wait_comes_from_the_environment(db_path, monkeypatch):
    with _lock_held(db_path):
        monkeypatch.setenv("TUBETRACK_WAIT_S", "0.2")
        with pytest.raises(StoreBusyError, match=r"waited 0 s"):
            store.connect(db_path, on_wait=lambda m: None)
        monkeypatch.setenv("TUBETRACK_WAIT_S", "soon")
        with pytest.raises(StoreError, match="TUBETRACK_WAIT_S is 'soon'"):
            store.connect(db_path)


def test_every_connection_caps_duckdb_memory(monkeypatch, tmp_path):
    # DuckDB's default cap is 80 % of the machine's RAM; the store sets 1 GB, or TUBETRACK_MEMORY.
    from tubetrack import store
    from tubetrack.errors import StoreError

    monkeypatch.delenv("TUBETRACK_MEMORY", raising=False)
    con = store.connect(tmp_path / "a.duckdb")
    assert con.execute("SELECT current_setting('memory_limit')").fetchone()[0] == "953.6 MiB"
    con.close()
    monkeypatch.setenv("TUBETRACK_MEMORY", "512MB")
    con = store.connect(tmp_path / "a.duckdb", read_only=True)
    assert con.execute("SELECT current_setting('memory_limit')").fetchone()[0] == "488.2 MiB"
    con.close()
    monkeypatch.setenv("TUBETRACK_MEMORY", "lots")
    with pytest.raises(StoreError, match="TUBETRACK_MEMORY is 'lots'"):
        store.connect(tmp_path / "a.duckdb")


def _duckdb_bytes(con) -> int:
    return int(con.execute("SELECT sum(memory_usage_bytes) FROM duckdb_memory()").fetchone()[0])


def test_release_memory_drops_cached_blocks_and_keeps_the_cap(db_path, monkeypatch):
    monkeypatch.setenv(store.ENV_MEMORY, "512MB")
    con = store.connect(db_path)
    cap = con.execute("SELECT current_setting('memory_limit')").fetchone()[0]
    con.execute("CREATE TABLE big AS SELECT range AS i, random() AS x FROM range(12000000)")
    con.execute("CHECKPOINT")
    con.execute("SELECT sum(x), sum(i) FROM big").fetchall()  # pulls its blocks into the cache
    held = _duckdb_bytes(con)
    store.release_memory(con)
    assert held > 64 << 20 and _duckdb_bytes(con) <= 32 << 20  # the 32MB of the moment
    assert con.execute("SELECT current_setting('memory_limit')").fetchone()[0] == cap
    with store.capped_memory(con, "64MB"):
        assert con.execute("SELECT current_setting('memory_limit')").fetchone()[0] == "61.0 MiB"
        con.execute("CREATE TABLE copy AS SELECT * FROM big")
    assert con.execute("SELECT count(*) FROM copy").fetchone()[0] == 12_000_000
    assert con.execute("SELECT current_setting('memory_limit')").fetchone()[0] == cap
    con.close()
