"""The embedded DuckDB store: connection, schema, forward migrations, result tables.

Every column carries its unit in its name; every time is UTC, stored as a DuckDB ``TIMESTAMP``
(naive, UTC by convention, never local time). The schema is versioned in ``schema_version``;
:data:`MIGRATIONS` holds forward-only steps, applied in order inside one transaction each.

Analyses never open a connection: the CLI (or a caller of the Python API) opens the store with
:func:`connect`, runs SQL helpers here or in the analysis packages' SQL modules, and hands
DataFrames to the pure analysis functions. Their results come back through
:func:`write_results`, which replaces a results table atomically.
"""

from __future__ import annotations

import json
import os
import re
import sys
import time
from collections.abc import Callable, Iterator, Mapping
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any

from tubetrack import __version__
from tubetrack.errors import NotFoundError, StoreBusyError, StoreError

if TYPE_CHECKING:  # pragma: no cover
    import duckdb
    import pandas as pd

DEFAULT_DB_NAME = "tubetrack.duckdb"
ENV_DB = "TUBETRACK_DB"
ENV_WAIT = "TUBETRACK_WAIT_S"

#: Canonical tables, in dependency order. Column comments give meaning; units are in the names.
SCHEMA_V1 = """
CREATE TABLE IF NOT EXISTS schema_version (
    version INTEGER NOT NULL,
    applied_at_utc TIMESTAMP NOT NULL,
    code_version VARCHAR NOT NULL
);

-- One row per X-ray system (room, mobile unit, fluoroscopy suite, ...).
CREATE TABLE IF NOT EXISTS systems (
    system_id VARCHAR PRIMARY KEY,
    site VARCHAR,
    modality VARCHAR,                     -- radiographic | mobile | fluoroscopy | mammography | ct | ...
    generator_type VARCHAR,               -- single_phase | three_phase_6p | three_phase_12p | high_frequency
    criticality_weight DOUBLE,            -- relative clinical impact, 1 = typical
    uptime_target_pct DOUBLE,             -- contracted availability target [%]
    scheduled_hours_per_week DOUBLE,      -- hours the system is required per week [h]
    model_label VARCHAR,                  -- free text label of the system
    source_file VARCHAR
);

-- One row per X-ray tube ever installed; removed_at_utc NULL while the tube is in service.
CREATE TABLE IF NOT EXISTS tubes (
    tube_id VARCHAR PRIMARY KEY,          -- serial number
    system_id VARCHAR NOT NULL,
    model_label VARCHAR,
    installed_at_utc TIMESTAMP NOT NULL,
    removed_at_utc TIMESTAMP,
    removal_reason VARCHAR,               -- filament | arcing | bearing | anode | vacuum | housing | other | upgrade
    price DOUBLE,                         -- purchase price in price_currency, if known
    price_currency VARCHAR,
    source_file VARCHAR
);

-- One row per exposure. tube_id may be NULL in the log; v_exposures attributes it by dates.
CREATE TABLE IF NOT EXISTS exposures (
    timestamp_utc TIMESTAMP NOT NULL,
    system_id VARCHAR NOT NULL,
    tube_id VARCHAR,
    focal_spot VARCHAR NOT NULL,          -- small | large
    tube_voltage_kv DOUBLE NOT NULL,      -- set peak tube voltage [kV]
    tube_current_ma DOUBLE NOT NULL,      -- set tube current (mA station) [mA]
    tube_current_measured_ma DOUBLE,      -- measured tube current [mA], optional
    exposure_time_s DOUBLE,               -- [s]
    exposure_mas DOUBLE,                  -- current-time product [mA s]
    filament_current_a DOUBLE,            -- filament heating current during exposure [A]; NULL for DICOM workload
    filament_voltage_v DOUBLE,            -- filament voltage [V], optional
    prep_time_s DOUBLE,                   -- filament boost (prep) time before the exposure [s], optional
    arc_count INTEGER,                    -- arcs during the exposure [count]
    source_kind VARCHAR NOT NULL DEFAULT 'log',  -- log | dicom | rdsr
    dicom_uid VARCHAR,                    -- SOP Instance UID or irradiation event UID (DICOM only)
    source_file VARCHAR,
    source_line BIGINT
);

-- The generator's filament table after each calibration, when exported.
CREATE TABLE IF NOT EXISTS calibrations (
    timestamp_utc TIMESTAMP NOT NULL,
    system_id VARCHAR NOT NULL,
    tube_id VARCHAR,
    focal_spot VARCHAR NOT NULL,
    tube_voltage_kv DOUBLE NOT NULL,      -- [kV]
    tube_current_ma DOUBLE NOT NULL,      -- station [mA]
    filament_current_a DOUBLE NOT NULL,   -- [A]
    source_file VARCHAR,
    source_line BIGINT
);

-- Faults and notable events; category is our own normalised name, raw_* keep the original.
CREATE TABLE IF NOT EXISTS events (
    timestamp_utc TIMESTAMP NOT NULL,
    system_id VARCHAR NOT NULL,
    tube_id VARCHAR,
    category VARCHAR NOT NULL,            -- arc | kv_dropout | filament_fault | ma_out_of_tolerance | overload | rotor_fault | other
    raw_code VARCHAR,
    raw_text VARCHAR,
    source_file VARCHAR,
    source_line BIGINT
);

-- Periods a system was unavailable (or partly available).
CREATE TABLE IF NOT EXISTS downtime (
    system_id VARCHAR NOT NULL,
    start_utc TIMESTAMP NOT NULL,
    end_utc TIMESTAMP NOT NULL,
    cause VARCHAR NOT NULL,               -- tube | generator | detector | mechanical | software | external | preventive | other
    planned BOOLEAN NOT NULL DEFAULT FALSE,
    severity VARCHAR NOT NULL DEFAULT 'hard_down',  -- hard_down | partial
    note VARCHAR,
    source_file VARCHAR,
    source_line BIGINT
);

-- Map from DICOM device identity to systems (filled by the user or by ingest for unmapped devices).
CREATE TABLE IF NOT EXISTS dicom_devices (
    device_serial VARCHAR,
    station_name VARCHAR,
    system_id VARCHAR NOT NULL,
    mapped BOOLEAN NOT NULL DEFAULT TRUE  -- FALSE: created by ingest for a device no mapping names
);

CREATE SEQUENCE IF NOT EXISTS ingest_file_seq START 1;

-- One row per file ingested (or skipped as a re-sent copy).
CREATE TABLE IF NOT EXISTS ingest_files (
    file_id BIGINT PRIMARY KEY DEFAULT nextval('ingest_file_seq'),
    path VARCHAR NOT NULL,
    sha256 VARCHAR NOT NULL,
    table_kind VARCHAR,                   -- exposures | calibrations | events | downtime | systems | tubes | dicom
    profile VARCHAR,
    rows_read BIGINT NOT NULL DEFAULT 0,
    rows_accepted BIGINT NOT NULL DEFAULT 0,
    rows_rejected BIGINT NOT NULL DEFAULT 0,
    rows_duplicate BIGINT NOT NULL DEFAULT 0,
    status VARCHAR NOT NULL,              -- ingested | already_ingested | failed
    started_at_utc TIMESTAMP NOT NULL,
    finished_at_utc TIMESTAMP
);

-- Rows that failed validation, never silently dropped.
CREATE TABLE IF NOT EXISTS rejects (
    file_id BIGINT,
    path VARCHAR NOT NULL,
    line BIGINT,                          -- 1-based line in the file (header = line 1)
    field VARCHAR,
    raw_value VARCHAR,
    reason VARCHAR NOT NULL
);

-- One row per analysis run whose results are stored.
CREATE TABLE IF NOT EXISTS analysis_runs (
    run_id VARCHAR PRIMARY KEY,
    kind VARCHAR NOT NULL,                -- health | fleet_forecast | backtest | ...
    result_table VARCHAR NOT NULL,
    as_of_utc TIMESTAMP,
    started_at_utc TIMESTAMP NOT NULL,
    finished_at_utc TIMESTAMP NOT NULL,
    params_json VARCHAR,
    code_version VARCHAR NOT NULL,
    rows BIGINT NOT NULL
);
"""

#: Exposures with the tube attributed from the tubes table where the log did not name it.
VIEWS_V1 = """
CREATE OR REPLACE VIEW v_exposures AS
SELECT e.* REPLACE (COALESCE(e.tube_id, t.tube_id) AS tube_id)
FROM exposures e
LEFT JOIN tubes t
  ON e.tube_id IS NULL
 AND t.system_id = e.system_id
 AND e.timestamp_utc >= t.installed_at_utc
 AND (t.removed_at_utc IS NULL OR e.timestamp_utc < t.removed_at_utc);
"""


@dataclass(frozen=True)
class Migration:
    """One forward schema step."""

    version: int
    description: str
    sql: str


MIGRATIONS: tuple[Migration, ...] = (
    Migration(1, "canonical tables, ingest bookkeeping, results registry", SCHEMA_V1),
    Migration(2, "attributed exposure view", VIEWS_V1),
    Migration(
        3,
        "indexes for incremental dedupe and per-tube reads",
        "CREATE INDEX IF NOT EXISTS ingest_files_sha ON ingest_files(sha256);",
    ),
)
SCHEMA_VERSION = MIGRATIONS[-1].version

CANONICAL_TABLES = (
    "systems",
    "tubes",
    "exposures",
    "calibrations",
    "events",
    "downtime",
    "dicom_devices",
    "ingest_files",
    "rejects",
    "analysis_runs",
)

_IDENT = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")


def utcnow() -> datetime:
    """Current time, UTC, naive (the store's convention)."""
    return datetime.now(UTC).replace(tzinfo=None)


def default_db_path() -> Path:
    """The store used when ``--db`` is not given: ``$TUBETRACK_DB`` or ``./tubetrack.duckdb``."""
    return Path(os.environ.get(ENV_DB) or DEFAULT_DB_NAME)


#: DuckDB's own memory cap for every command (its default is 80 % of the machine's RAM, which
#: lets the buffer cache of a whole-fleet analysis grow with the fleet); work beyond it spills to
#: ``<store>.tmp``. Override: ``$TUBETRACK_MEMORY`` (ingest has its own, TUBETRACK_INGEST_MEMORY).
ENV_MEMORY = "TUBETRACK_MEMORY"
DEFAULT_MEMORY_LIMIT = "1GB"


def _apply_memory_limit(con: duckdb.DuckDBPyConnection) -> None:
    import duckdb

    raw = os.environ.get(ENV_MEMORY, "").strip() or DEFAULT_MEMORY_LIMIT
    try:
        con.execute(f"SET memory_limit = '{raw.replace(chr(39), '')}'")
    except duckdb.Error:
        con.close()
        raise StoreError(
            f"{ENV_MEMORY} is {raw!r}, not a memory size. Unset it or give e.g. 2GB or 512MB."
        ) from None


def release_memory(con: duckdb.DuckDBPyConnection) -> None:
    """Hand DuckDB's cached blocks and its allocator's spare memory back, keeping the cap.

    After a large aggregation DuckDB keeps what it used, up to its cap, for the next query: on
    the bench store the resident set of a whole-fleet health analysis was 2,026 MiB, of which
    the result frames were 617 MiB; lowering the cap for a moment took it to 1,097 MiB.
    Between phases that do not reuse the cached blocks (chunks of tubes reading other row
    groups) this bounds the process by one chunk's query instead of the cap. A no-op when the
    cap cannot be lowered (e.g. blocks still pinned by an open result). The cap afterwards is
    the store's configured one (``$TUBETRACK_MEMORY``, as :func:`connect` sets it).
    """
    import duckdb

    try:
        con.execute("SET memory_limit = '32MB'")
    except duckdb.Error:
        pass
    finally:
        _apply_memory_limit(con)


@contextmanager
def capped_memory(con: duckdb.DuckDBPyConnection, limit: str) -> Iterator[None]:
    """Run a block with DuckDB capped at ``limit`` (e.g. ``"256MB"``), then the store's cap again.

    For a large write from frames this process already holds: DuckDB flushes the new table's
    blocks to the store file sooner instead of growing its cache beside the frames (writing the
    bench fleet's health tables: +174 MiB resident under 256MB against +355 MiB under 1 GB,
    4.0 s against 3.8 s).
    """
    release_memory(con)
    con.execute(f"SET memory_limit = '{limit.replace(chr(39), '')}'")
    try:
        yield
    finally:
        _apply_memory_limit(con)


def _env_wait_s() -> float:
    """``$TUBETRACK_WAIT_S`` [s], the busy-store wait of every command; 30 s when unset."""
    raw = os.environ.get(ENV_WAIT, "").strip()
    if not raw:
        return 30.0
    try:
        value = float(raw)
    except ValueError:
        raise StoreError(
            f"{ENV_WAIT} is {raw!r}, not a number of seconds. Unset it or give e.g. 10."
        ) from None
    if value < 0:
        raise StoreError(f"{ENV_WAIT} is {raw!r}; give a wait of 0 s or more.")
    return value


def _is_lock_error(exc: Exception) -> bool:
    text = str(exc).lower()
    return "lock" in text and ("conflicting" in text or "could not set" in text)


def connect(
    path: str | Path | None = None,
    *,
    read_only: bool = False,
    wait_s: float | None = None,
    on_wait: Callable[[str], None] | None = None,
) -> duckdb.DuckDBPyConnection:
    """Open (and create or migrate) the store.

    Parameters
    ----------
    path
        DuckDB file, ``":memory:"`` for a throw-away store, or ``None`` for :func:`default_db_path`.
    read_only
        Open without the write lock (several readers may share a file no writer holds).
    wait_s
        How long to wait for another process to release the store's lock [s]. DuckDB allows one
        writing process per file; a second one waits here, then fails with a clear message.
        Default: ``$TUBETRACK_WAIT_S`` or 30 s.
    on_wait
        Called once with a message when the store is busy and we start waiting.

    Raises
    ------
    StoreBusyError
        Another process kept the store locked for longer than ``wait_s``.
    StoreError
        The file exists but is not a DuckDB database, or its schema is newer than this code.
    """
    import duckdb

    target = str(default_db_path() if path is None else path)
    if wait_s is None:
        wait_s = _env_wait_s()
    if target != ":memory:" and read_only and not Path(target).exists():
        raise StoreError(
            f"store {target} does not exist. Run `tubetrack ingest PATH` (or `make demo`) first, "
            "or point --db / TUBETRACK_DB at an existing store."
        )
    deadline = time.monotonic() + wait_s
    told = False
    while True:
        try:
            con = duckdb.connect(target, read_only=read_only)
            break
        except duckdb.IOException as exc:
            if not _is_lock_error(exc):
                raise StoreError(f"cannot open store {target}: {exc}") from exc
            if time.monotonic() >= deadline:
                raise StoreBusyError(
                    f"store {target} is in use by another tubetrack process (waited {wait_s:.0f} s). "
                    "Wait for it to finish and run the command again, or use another --db."
                ) from exc
            if not told:
                msg = f"store {target} is in use by another process; waiting up to {wait_s:.0f} s ..."
                (on_wait or (lambda m: print(m, file=sys.stderr)))(msg)
                told = True
            time.sleep(0.5)
        except duckdb.Error as exc:
            raise StoreError(f"cannot open store {target}: {exc}") from exc
    if _has_icu(con):
        con.execute("SET TimeZone = 'UTC'")
    _apply_memory_limit(con)
    if not read_only:
        migrate(con)
    else:
        _check_version(con, target)
    return con


def _has_icu(con: duckdb.DuckDBPyConnection) -> bool:
    try:
        rows = con.execute(
            "SELECT loaded FROM duckdb_extensions() WHERE extension_name = 'icu'"
        ).fetchall()
        return bool(rows and rows[0][0])
    except Exception:  # pragma: no cover - very old duckdb
        return False


def schema_version(con: duckdb.DuckDBPyConnection) -> int:
    """Current schema version of an open store (0 for an empty file)."""
    # fetchall(), not fetchone(): duckdb 2 keeps a half-read result open, which blocks a
    # later con.register() on the same connection.
    exists = _one(
        con,
        "SELECT count(*) FROM information_schema.tables "
        "WHERE table_name = 'schema_version'",
    )
    if not exists:
        return 0
    version = _one(con, "SELECT max(version) FROM schema_version")
    return int(version) if version is not None else 0


def _one(
    con: duckdb.DuckDBPyConnection, sql: str, params: list[Any] | None = None
) -> Any:
    """First column of the first row of ``sql`` (fully fetched), or None."""
    rows = con.execute(sql, params or []).fetchall()
    return rows[0][0] if rows else None


def _check_version(con: duckdb.DuckDBPyConnection, target: str) -> None:
    current = schema_version(con)
    if current > SCHEMA_VERSION:
        raise StoreError(
            f"store {target} has schema version {current}, newer than this tubetrack "
            f"({__version__}, schema {SCHEMA_VERSION}). Upgrade tubetrack."
        )


def migrate(con: duckdb.DuckDBPyConnection) -> int:
    """Apply pending forward migrations, each in its own transaction; return the new version."""
    current = schema_version(con)
    if current > SCHEMA_VERSION:
        _check_version(con, "(open store)")
    for m in MIGRATIONS:
        if m.version <= current:
            continue
        con.execute("BEGIN TRANSACTION")
        try:
            con.execute(m.sql)
            con.execute(
                "INSERT INTO schema_version VALUES (?, ?, ?)",
                [m.version, utcnow(), __version__],
            )
            con.execute("COMMIT")
        except Exception:
            con.execute("ROLLBACK")
            raise
        current = m.version
    return current


@contextmanager
def transaction(con: duckdb.DuckDBPyConnection) -> Iterator[duckdb.DuckDBPyConnection]:
    """``with transaction(con):`` commits on success, rolls back on any exception."""
    con.execute("BEGIN TRANSACTION")
    try:
        yield con
    except BaseException:
        con.execute("ROLLBACK")
        raise
    else:
        con.execute("COMMIT")


def quote_ident(name: str) -> str:
    """Quote an SQL identifier (column or table name from user data) for DuckDB."""
    return '"' + str(name).replace('"', '""') + '"'


def write_results(
    con: duckdb.DuckDBPyConnection,
    table: str,
    frame: pd.DataFrame,
    *,
    kind: str,
    as_of: datetime | None = None,
    params: dict[str, Any] | None = None,
    started_at: datetime | None = None,
) -> str:
    """Replace one results table atomically; see :func:`write_result_set`."""
    return write_result_set(
        con,
        {table: frame},
        kind=kind,
        as_of=as_of,
        params=params,
        started_at=started_at,
    )[table]


def write_result_set(
    con: duckdb.DuckDBPyConnection,
    frames: Mapping[str, pd.DataFrame],
    *,
    kind: str,
    as_of: datetime | None = None,
    params: dict[str, Any] | None = None,
    started_at: datetime | None = None,
) -> dict[str, str]:
    """Replace the results tables ``frames`` (name -> frame) in ONE transaction.

    An analysis writes its tables as a set: readers see either every old table or every new
    one, never a mix, and a run interrupted at any point (Ctrl-C, SIGKILL) leaves the previous
    set. Each table gets a row in ``analysis_runs``. Returns ``{table: run_id}``.
    """
    for table in frames:
        if not _IDENT.match(table) or not table.startswith("result_"):
            raise ValueError(
                f"results table name must look like result_<name>, got {table!r}"
            )
    started = started_at or utcnow()
    run_ids: dict[str, str] = {}
    registered: list[str] = []
    try:
        with transaction(con):
            for i, (table, frame) in enumerate(frames.items()):
                view = f"_tt_results_frame_{i}"
                con.register(view, frame)
                registered.append(view)
                con.execute(f"CREATE OR REPLACE TABLE {table} AS SELECT * FROM {view}")
                run_id = f"{kind}-{started:%Y%m%dT%H%M%S%f}-{table}"
                con.execute(
                    "INSERT INTO analysis_runs VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
                    [
                        run_id,
                        kind,
                        table,
                        as_of,
                        started,
                        utcnow(),
                        json.dumps(params or {}, default=str, sort_keys=True),
                        __version__,
                        len(frame),
                    ],
                )
                run_ids[table] = run_id
    finally:
        for view in registered:
            con.unregister(view)
    return run_ids


def read_results(con: duckdb.DuckDBPyConnection, table: str) -> pd.DataFrame:
    """Read a results table written by :func:`write_results`."""
    if not _IDENT.match(table):
        raise ValueError(f"bad table name {table!r}")
    exists = _one(
        con,
        "SELECT count(*) FROM information_schema.tables WHERE table_name = ?",
        [table],
    )
    if not exists:
        raise NotFoundError(f"no stored results {table}; run the analysis first.")
    return con.execute(f"SELECT * FROM {table}").df()


def load_systems(con: duckdb.DuckDBPyConnection) -> pd.DataFrame:
    """All systems, one row each."""
    return con.execute("SELECT * FROM systems ORDER BY system_id").df()


def load_tubes(con: duckdb.DuckDBPyConnection) -> pd.DataFrame:
    """All tubes with their system's site and modality."""
    return con.execute(
        """
        SELECT t.*, s.site, s.modality, s.generator_type
        FROM tubes t LEFT JOIN systems s USING (system_id)
        ORDER BY t.system_id, t.installed_at_utc
        """
    ).df()


def load_downtime(con: duckdb.DuckDBPyConnection) -> pd.DataFrame:
    """All downtime records."""
    return con.execute("SELECT * FROM downtime ORDER BY system_id, start_utc").df()


def data_span(
    con: duckdb.DuckDBPyConnection,
) -> tuple[datetime | None, datetime | None]:
    """First and last exposure time in the store (UTC), or (None, None) when empty."""
    rows = con.execute(
        "SELECT min(timestamp_utc), max(timestamp_utc) FROM exposures"
    ).fetchall()
    return (rows[0][0], rows[0][1]) if rows else (None, None)
