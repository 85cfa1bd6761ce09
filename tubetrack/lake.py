"""The exposure lake: the store's canonical tables as Hive-partitioned Parquet.

A lake is a folder any Parquet reader understands (DuckDB, Spark, pyarrow, object storage)::

    LAKE/_tubetrack_lake.json                  manifest: format, schema version, row counts
    LAKE/exposures/month=<YYYY-MM>/data_0.parquet     (default; or system_id=<id>/month=...)
    LAKE/systems/data_0.parquet                small tables: one unpartitioned file each
    LAKE/tubes/data_0.parquet
    LAKE/calibrations/data_0.parquet
    LAKE/events/data_0.parquet
    LAKE/downtime/data_0.parquet
    LAKE/dicom_devices/data_0.parquet

Partition folder names follow the Hive convention (``column=value``, value URL-encoded by
DuckDB). The partition columns are ALSO written inside every file, and readers take them from
the files, never from folder names: a system id such as ``0042`` or ``a/b`` therefore comes back
exactly (no type inference, no path unescaping differences between engines). ``month`` is a
derived column (``strftime(timestamp_utc, '%Y-%m')``, UTC) that readers drop.

:func:`export_lake` writes through a temporary sibling folder and renames it into place, so a
reader sees the old lake or the new one, never half of one. :func:`attach_lake` makes a DuckDB
connection read a lake through views with the store's table names (plus ``v_exposures``), so
the local analyses run on it unchanged. See ``docs/lake.md``.
"""

from __future__ import annotations

import json
import os
import shutil
import uuid
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

from tubetrack import __version__
from tubetrack.errors import InputError, NotFoundError

if TYPE_CHECKING:  # pragma: no cover
    import duckdb

MANIFEST = "_tubetrack_lake.json"
LAKE_FORMAT = 1

#: Tables written to the lake, in the store's dependency order.
LAKE_TABLES = ("systems", "tubes", "exposures", "calibrations", "events", "downtime", "dicom_devices")

#: Table partitioned by default and its default partition columns.
PARTITIONED_TABLE = "exposures"
DEFAULT_PARTITION_BY = ("month",)

#: Derived partition columns (computed from ``timestamp_utc``, UTC) and their SQL.
DERIVED_PARTITIONS = {
    "year": "CAST(year(timestamp_utc) AS VARCHAR)",
    "month": "strftime(timestamp_utc, '%Y-%m')",
    "day": "strftime(timestamp_utc, '%Y-%m-%d')",
}


@dataclass(frozen=True)
class LakeExport:
    """What :func:`export_lake` wrote."""

    path: Path
    partition_by: tuple[str, ...]
    rows: dict[str, int]  #: rows per table
    files: int  #: Parquet files written
    bytes: int  #: total size of the Parquet files [bytes]


def _sql_str(value: str | Path) -> str:
    return "'" + str(value).replace("'", "''") + "'"


def _quote(name: str) -> str:
    from tubetrack.store import quote_ident

    return quote_ident(name)


def _columns(con: duckdb.DuckDBPyConnection, table: str) -> list[tuple[str, str]]:
    rows = con.execute(
        "SELECT column_name, data_type FROM information_schema.columns "
        "WHERE table_name = ? AND table_schema = 'main' ORDER BY ordinal_position",
        [table],
    ).fetchall()
    return [(str(r[0]), str(r[1])) for r in rows]


def parse_partition_by(text: str | Sequence[str] | None) -> tuple[str, ...]:
    """``"system_id,month"`` -> ``("system_id", "month")``; ``None``/empty -> the default."""
    if text is None:
        return DEFAULT_PARTITION_BY
    items = [p.strip() for p in (text.split(",") if isinstance(text, str) else text)]
    items = [p for p in items if p]
    if not items:
        return ()
    if len(set(items)) != len(items):
        raise InputError(f"--partition-by {','.join(items)!r} names a column twice. Name each once.")
    return tuple(items)


def _is_lake(path: Path) -> bool:
    return (path / MANIFEST).is_file()


def export_lake(
    con: duckdb.DuckDBPyConnection,
    out: str | Path,
    *,
    partition_by: str | Sequence[str] | None = None,
    compression: str = "zstd",
) -> LakeExport:
    """Write the store's canonical tables as a Hive-partitioned Parquet lake at ``out``.

    Parameters
    ----------
    con
        Open store.
    out
        Lake folder. It must not exist, be empty, or be a lake written earlier (then it is
        replaced atomically); any other folder is refused.
    partition_by
        Partition columns of ``exposures``: any of its columns or the derived ``year``,
        ``month``, ``day`` (UTC). Default ``month``: a few large files per month. ``system_id,month``
        is allowed, but gives one small file per system and month (130,000 files of ~80 rows
        for 5,000 tubes over 3 years), slow to write and slow for Spark to list; see
        docs/lake.md. An empty sequence writes
        ``exposures`` unpartitioned.
    compression
        Parquet codec (``zstd``, ``snappy``, ``gzip``, ``uncompressed``).

    Returns
    -------
    LakeExport
        Folder, partition columns, rows per table, number and size of Parquet files [bytes].

    Raises
    ------
    InputError
        ``out`` is a non-empty folder that is not a lake, or a partition column is unknown.
    """
    from tubetrack.store import SCHEMA_VERSION, utcnow

    out = Path(out)
    parts = parse_partition_by(partition_by)
    if compression not in ("zstd", "snappy", "gzip", "uncompressed"):
        raise InputError(f"compression {compression!r} is not one of zstd, snappy, gzip, uncompressed.")
    if out.exists() and not out.is_dir():
        raise InputError(f"--out {out} is a file, not a folder. Give a folder path for the lake.")
    if out.is_dir() and any(out.iterdir()) and not _is_lake(out):
        raise InputError(
            f"--out {out} is a folder that holds other files and no {MANIFEST}; refusing to "
            "replace it. Give a new or empty folder."
        )
    exp_cols = [c for c, _ in _columns(con, PARTITIONED_TABLE)]
    for p in parts:
        if p not in exp_cols and p not in DERIVED_PARTITIONS:
            raise InputError(
                f"--partition-by column {p!r} is not an exposures column nor one of "
                f"{', '.join(DERIVED_PARTITIONS)}. Use e.g. system_id,month."
            )
    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = out.parent / f".{out.name}.tmp-{uuid.uuid4().hex[:8]}"
    tmp.mkdir()
    rows: dict[str, int] = {}
    schema: dict[str, list[list[str]]] = {}
    codec = f"COMPRESSION {compression}"
    try:
        for table in LAKE_TABLES:
            cols = _columns(con, table)
            if not cols:
                continue
            schema[table] = [[c, t] for c, t in cols]
            n = con.execute(f"SELECT count(*) FROM {_quote(table)}").fetchone()
            rows[table] = int(n[0]) if n else 0
            dest = tmp / table
            dest.mkdir()
            if table == PARTITIONED_TABLE and parts and rows[table] > 0:
                derived = [f"{DERIVED_PARTITIONS[p]} AS {_quote(p)}" for p in parts if p in DERIVED_PARTITIONS and p not in exp_cols]
                select = ", ".join(["*", *derived])
                # no ORDER BY: sorting 10 M rows costs more than the whole write (bench/RESULTS.md);
                # rows keep the store's insertion order (file by file, i.e. system by system)
                con.execute(
                    f"COPY (SELECT {select} FROM {_quote(table)}) "
                    f"TO {_sql_str(dest)} (FORMAT parquet, {codec}, "
                    f"PARTITION_BY ({', '.join(_quote(p) for p in parts)}), "
                    "WRITE_PARTITION_COLUMNS true, FILENAME_PATTERN 'data_{i}')"
                )
            else:
                con.execute(
                    f"COPY (SELECT * FROM {_quote(table)}) TO "
                    f"{_sql_str(dest / 'data_0.parquet')} (FORMAT parquet, {codec})"
                )
        files = [p for p in tmp.rglob("*.parquet")]
        manifest = {
            "format": "tubetrack-lake",
            "format_version": LAKE_FORMAT,
            "schema_version": SCHEMA_VERSION,
            "code_version": __version__,
            "exported_at_utc": utcnow().isoformat(timespec="seconds"),
            "partitioned_table": PARTITIONED_TABLE,
            "partition_by": list(parts),
            "partition_columns_in_files": True,
            "rows": rows,
            "columns": schema,
        }
        (tmp / MANIFEST).write_text(json.dumps(manifest, indent=1) + "\n")
        nbytes = sum(p.stat().st_size for p in files)
        _swap_into_place(tmp, out)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return LakeExport(path=out, partition_by=parts, rows=rows, files=len(files), bytes=nbytes)


def _swap_into_place(tmp: Path, out: Path) -> None:
    """Rename ``tmp`` to ``out``; an existing lake at ``out`` is moved aside first, then removed."""
    old: Path | None = None
    if out.exists():
        if not any(out.iterdir()):
            out.rmdir()
        else:
            old = out.parent / f".{out.name}.old-{uuid.uuid4().hex[:8]}"
            os.replace(out, old)
    os.replace(tmp, out)
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)


def read_manifest(path: str | Path) -> dict:
    """The manifest of the lake at ``path``.

    Raises
    ------
    NotFoundError
        ``path`` holds no lake.
    """
    path = Path(path)
    f = path / MANIFEST
    if not f.is_file():
        raise NotFoundError(
            f"{path} is not a tubetrack lake (no {MANIFEST}). Write one with "
            "`tubetrack export-lake --out PATH`."
        )
    data = json.loads(f.read_text())
    if data.get("format") != "tubetrack-lake" or int(data.get("format_version", 0)) > LAKE_FORMAT:
        raise InputError(
            f"{f} is lake format {data.get('format_version')!r}, newer than this tubetrack "
            f"reads ({LAKE_FORMAT}). Upgrade tubetrack."
        )
    return data


def table_glob(path: str | Path, table: str) -> str:
    """Glob of every Parquet file of ``table`` in the lake (all partition levels)."""
    return str(Path(path) / table / "**" / "*.parquet")


def table_files(path: str | Path, table: str) -> list[str]:
    """Every Parquet file of ``table`` in the lake, sorted."""
    return sorted(str(p) for p in (Path(path) / table).rglob("*.parquet"))


def attach_lake(con: duckdb.DuckDBPyConnection, path: str | Path) -> dict:
    """Make ``con`` read the lake at ``path``: one view per table, plus ``v_exposures``.

    The views carry the store's table names and column order (from the manifest), so SQL
    written for the store (``tubetrack.health.sql`` ...) runs on the lake unchanged. Use a
    connection without those tables (e.g. ``duckdb.connect()``, see :func:`open_lake`).

    Returns
    -------
    dict
        The lake's manifest.
    """
    from tubetrack.store import VIEWS_V1

    manifest = read_manifest(path)
    for table, cols in manifest["columns"].items():
        files = table_files(path, table)
        names = ", ".join(_quote(c) for c, _ in cols)
        if files:
            src = f"read_parquet({_sql_str(table_glob(path, table))}, hive_partitioning = false, union_by_name = true)"
            con.execute(f"CREATE OR REPLACE VIEW {_quote(table)} AS SELECT {names} FROM {src}")
        else:  # pragma: no cover - every export writes at least one file per table
            typed = ", ".join(f"CAST(NULL AS {t}) AS {_quote(c)}" for c, t in cols)
            con.execute(f"CREATE OR REPLACE VIEW {_quote(table)} AS SELECT {typed} WHERE false")
    if "exposures" in manifest["columns"] and "tubes" in manifest["columns"]:
        con.execute(VIEWS_V1)
    return manifest


def open_lake(path: str | Path) -> duckdb.DuckDBPyConnection:
    """An in-memory DuckDB connection (TimeZone UTC) reading the lake at ``path``."""
    import duckdb

    con = duckdb.connect()
    try:
        con.execute("SET TimeZone = 'UTC'")
    except duckdb.Error:  # pragma: no cover - without icu
        pass
    attach_lake(con, path)
    return con
