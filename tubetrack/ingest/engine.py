"""Ingest one log file into the store: read, convert, validate, deduplicate, write.

Everything row-wise happens inside DuckDB: the file is read by DuckDB's own reader as text cells
(``read_csv(all_varchar=true)``, ``read_ndjson_objects``, ``read_parquet``), converted with
``TRY_CAST``/``try_strptime`` and checked with SQL ``CASE`` expressions built from
:mod:`tubetrack.ingest.layout` and :mod:`tubetrack.ingest.validate`. One staging table per file
holds the converted values and one reason column per field; rows with any reason go to
``rejects`` (one reject row per bad field), the others are deduplicated on the kind's natural key
and inserted. The whole file is one transaction.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any

from tubetrack.ingest import reader as rd
from tubetrack.ingest.layout import KINDS, Kind, kind_from_header, kind_from_name
from tubetrack.ingest.profiles import Profile
from tubetrack.ingest.report import (
    STATUS_ALREADY,
    STATUS_DRY_RUN,
    STATUS_FAILED,
    STATUS_INGESTED,
    FileReport,
)
from tubetrack.ingest.source import (
    CSV_REJ,
    CSV_SCAN,
    MAX_LINE_BYTES,
    STAGE,
    FileFailure,
    Params,
    Source,
    list_columns,
    open_source,
    resolve_columns,
    short_error,
    typed_csv_sql,
)
from tubetrack.ingest.stage_sql import (
    build_fast_select,
    build_stage,
    fast_types,
    line_expr,
    sql_text,
)
from tubetrack.store import quote_ident as qi
from tubetrack.store import utcnow

if TYPE_CHECKING:  # pragma: no cover
    import duckdb


@dataclass(frozen=True)
class Preview:
    """Dry-run extras: first canonical rows and first rejects (pandas DataFrames)."""

    rows: Any
    rejects: Any


# --------------------------------------------------------------------------------------------
# one file
# --------------------------------------------------------------------------------------------


def decide_kind(
    path: Path,
    profile: Profile | None,
    kind_opt: str | None,
    columns: tuple[str, ...] | None,
) -> str | None:
    """Kind of a file: the profile's, the file-name prefix, ``--kind``, then the header."""
    if profile is not None:
        return profile.kind
    by_name = kind_from_name(path.name)
    if by_name:
        return by_name
    if kind_opt:
        return kind_opt
    if columns is not None:
        return kind_from_header(list(columns))
    return None


def ingest_file(
    con: duckdb.DuckDBPyConnection,
    path: Path,
    *,
    shown: str | None = None,
    profile: Profile | None = None,
    kind: str | None = None,
    dry_run: bool = False,
    now_utc: datetime | None = None,
    preview_rows: int = 0,
) -> tuple[FileReport, Preview | None]:
    """Ingest one file in one transaction; never raises for a bad file (returns a failed report).

    Parameters
    ----------
    con
        Open store connection.
    path
        The file.
    shown
        Path as shown to the user and stored in ``source_file`` (default ``str(path)``).
    profile
        Layout profile, or ``None`` for the open layout.
    kind
        Table kind when neither the profile nor the file name decides it.
    dry_run
        Parse and validate only; nothing is written.
    now_utc
        "Now" for the future-timestamp check (default: the current UTC time).
    preview_rows
        On a dry run, keep this many canonical rows and rejects for display.
    """
    shown = shown or str(path)
    now_utc = now_utc or utcnow()
    pname = profile.name if profile else None
    started = utcnow()
    try:
        scan = rd.scan_file(path)
    except OSError as exc:
        return _failed(
            con,
            shown,
            None,
            pname,
            "",
            started,
            None,
            f"cannot read the file ({exc.strerror}). Check the path and permissions.",
            dry_run,
        ), None
    # the kind a failed file is reported under, before its header is read
    named_kind = profile.kind if profile else kind_from_name(path.name) or kind
    if scan.size == 0:
        return _failed(
            con,
            shown,
            named_kind,
            pname,
            scan.sha256,
            started,
            None,
            "the file is empty (0 bytes). Export it again.",
            dry_run,
        ), None
    if scan.truncated:
        return _failed(
            con,
            shown,
            named_kind,
            pname,
            scan.sha256,
            started,
            scan.lines or None,
            f"the gzip data is truncated or corrupt ({scan.gzip_error}); the whole file is "
            "rejected, nothing was stored from it. Copy the file again from its source.",
            dry_run,
            None,
            _row_estimate(path, scan),
        ), None
    if not dry_run:
        prev = con.execute(
            "SELECT path, finished_at_utc FROM ingest_files WHERE sha256 = ? AND status = ? "
            "AND profile IS NOT DISTINCT FROM ? ORDER BY file_id LIMIT 1",
            [scan.sha256, STATUS_INGESTED, pname],
        ).fetchone()
        if prev:
            known_kind = (
                profile.kind if profile else (kind_from_name(path.name) or kind)
            )
            msg = f"same content as {prev[0]}, already ingested; nothing to do"
            con.execute(
                "INSERT INTO ingest_files (path, sha256, table_kind, profile, status, "
                "started_at_utc, finished_at_utc) VALUES (?, ?, ?, ?, ?, ?, ?)",
                [
                    shown,
                    scan.sha256,
                    known_kind,
                    pname,
                    STATUS_ALREADY,
                    started,
                    utcnow(),
                ],
            )
            return FileReport(
                shown,
                known_kind,
                pname,
                STATUS_ALREADY,
                message=msg,
                sha256=scan.sha256,
            ), None
    try:
        if not dry_run:
            con.execute("BEGIN TRANSACTION")
        try:
            report, preview = _ingest_in_txn(
                con,
                path,
                shown,
                scan,
                profile,
                kind,
                dry_run,
                now_utc,
                started,
                preview_rows,
            )
        except BaseException:
            if not dry_run:
                con.execute("ROLLBACK")
            raise
        else:
            if not dry_run:
                con.execute("COMMIT")
        return report, preview
    except FileFailure as exc:
        guess = profile.kind if profile else (kind_from_name(path.name) or kind)
        return _failed(
            con,
            shown,
            guess,
            pname,
            scan.sha256,
            started,
            exc.line,
            exc.detail,
            dry_run,
            exc.field,
            _row_estimate(path, scan),
        ), None
    finally:
        _drop_temps(con)


_TEMPS = (
    STAGE,
    CSV_REJ,
    CSV_SCAN,
    "_tt_skip",
    "_tt_good",
    "_tt_new",
    "_tt_existing",
    "_tt_rep",
    "_tt_batch",
    "_tt_rows",
)


def _drop_temps(con: duckdb.DuckDBPyConnection) -> None:
    """Drop this module's temporary tables that exist (one catalog query, then only the drops
    needed: seven unconditional DROPs twice per file were a visible share of a small file)."""
    try:
        rows = con.execute(
            "SELECT table_name FROM duckdb_tables() WHERE temporary AND table_name IN "
            f"({', '.join(sql_text(t) for t in _TEMPS)})"
        ).fetchall()
    except Exception:  # pragma: no cover
        rows = [(t,) for t in _TEMPS]
    for (t,) in rows:
        try:
            con.execute(f"DROP TABLE IF EXISTS {qi(t)}")
        except Exception:  # pragma: no cover
            pass


def _failed(
    con: duckdb.DuckDBPyConnection,
    shown: str,
    kind: str | None,
    pname: str | None,
    sha: str,
    started: datetime,
    line: int | None,
    message: str,
    dry_run: bool,
    field_name: str | None = None,
    rows: int = 0,
) -> FileReport:
    """Record a file rejected whole: its rows count as read and rejected (nothing vanishes),
    and one ``rejects`` row (field = the column at fault, if any) carries the message."""
    where = f"{shown} line {line}" if line else shown
    full = f"{where}: {message}"
    file_id = None
    if not dry_run:
        row = con.execute(
            "INSERT INTO ingest_files (path, sha256, table_kind, profile, status, started_at_utc, "
            "finished_at_utc) VALUES (?, ?, ?, ?, ?, ?, ?) RETURNING file_id",
            [shown, sha, kind, pname, STATUS_FAILED, started, utcnow()],
        ).fetchone()
        file_id = int(row[0]) if row else None
        con.execute(
            "INSERT INTO rejects VALUES (?, ?, ?, ?, ?, ?)",
            [file_id, shown, line, field_name, None, "file rejected: " + message],
        )
        con.execute(
            "UPDATE ingest_files SET rows_read = ?, rows_rejected = ? WHERE file_id = ?",
            [rows, rows, file_id],
        )
    return FileReport(
        shown,
        kind,
        pname,
        STATUS_FAILED,
        rows_read=rows,
        rows_rejected=rows,
        message=full,
        sha256=sha,
        file_id=file_id,
    )


def _row_estimate(path: Path, scan: rd.FileScan) -> int:
    """Data rows of a file rejected whole: its non-blank lines, less the CSV header."""
    fmt = rd.detect_format(path, scan.head)
    if fmt == "parquet" or scan.lines == 0:
        return 0
    n = scan.lines - len(scan.blank_lines) - (1 if fmt == "csv" else 0)
    return max(n, 0)


def _ingest_in_txn(
    con: duckdb.DuckDBPyConnection,
    path: Path,
    shown: str,
    scan: rd.FileScan,
    profile: Profile | None,
    kind_opt: str | None,
    dry_run: bool,
    now_utc: datetime,
    started: datetime,
    preview_rows: int,
) -> tuple[FileReport, Preview | None]:
    _drop_temps(con)
    p = Params()
    src = open_source(con, path, shown, scan, profile, p)
    kind_name = decide_kind(path, profile, kind_opt, src.columns)
    if kind_name is None:
        raise FileFailure(
            shown,
            1 if src.fmt == "csv" else None,
            f"cannot tell which table this file feeds: its name does not start with one of "
            f"{', '.join(KINDS)} and its columns ({list_columns(src.columns)}) match no table. Rename it, "
            "give --kind, or read it with a profile.",
        )
    kind = KINDS[kind_name]
    mapped, constants, ignored = resolve_columns(kind, src, profile, shown, path.name)
    if not dry_run and profile is None and src.fmt == "csv" and not kind.upsert:
        fast = _fast_ingest(
            con,
            shown,
            scan,
            src,
            kind,
            mapped,
            ignored,
            Params(dict(p.values)),
            now_utc,
            started,
        )
        if fast is not None:
            return fast, None
        # some row needs the per-field path: it starts again in a fresh transaction
        _drop_temps(con)
    stage_sql = build_stage(kind, src, mapped, constants, profile, p, now_utc)
    try:
        con.execute(stage_sql, p.values)
    except Exception as exc:
        import duckdb

        if isinstance(exc, duckdb.Error):
            if "invalid state" in str(exc):
                raise FileFailure(
                    shown,
                    None,
                    "the CSV reader cannot follow the file's structure, typically mixed line "
                    "endings (CRLF and LF lines in one file) or a quote that is never closed; "
                    "the whole file is rejected. Save it with one kind of line ending and "
                    "balanced quotes.",
                ) from None
            raise FileFailure(
                shown,
                None,
                f"cannot be read ({short_error(exc)}). Check the file's format, delimiter and encoding.",
            ) from None
        raise
    join, line = line_expr(con, src, scan)
    n_stage, n_bad = con.execute(
        f"SELECT count(*), count(*) FILTER (WHERE _bad) FROM {STAGE}"
    ).fetchone()
    csv_rej = []
    if src.fmt == "csv":
        csv_rej = con.execute(
            f"SELECT line, any_value(column_name), any_value(error_type), any_value(csv_line) "
            f"FROM {CSV_REJ} GROUP BY line ORDER BY line"
        ).fetchall()
    rows_read = int(n_stage) + len(csv_rej)
    if rows_read == 0 and not src.columns:
        raise FileFailure(shown, 1, "no header and no rows. Export the file again.")

    file_id = None
    if not dry_run:
        row = con.execute(
            "INSERT INTO ingest_files (path, sha256, table_kind, profile, status, started_at_utc) "
            "VALUES (?, ?, ?, ?, ?, ?) RETURNING file_id",
            [
                shown,
                scan.sha256,
                kind.name,
                profile.name if profile else None,
                STATUS_INGESTED,
                started,
            ],
        ).fetchone()
        file_id = int(row[0])

    # rejects: one row per failing check
    err_cols = [
        c
        for c in _stage_columns(con)
        if c.startswith(("e__", "x")) and "__" in c or c == "e___row"
    ]
    unions = []
    for c in err_cols:
        fname = None if c == "e___row" else c.split("__", 1)[1]
        raw = f"left(s.{qi('r__' + fname)}, 1000)" if fname else "CAST(NULL AS VARCHAR)"
        fexpr = "CAST(NULL AS VARCHAR)" if fname is None else sql_text(fname)
        unions.append(
            f"SELECT {line} AS line, {fexpr} AS field, {raw} AS raw_value, s.{qi(c)} AS reason "
            f"FROM {STAGE} s {join} WHERE s._bad AND s.{qi(c)} IS NOT NULL"
            + ("" if fname is None else " AND s.e___row IS NULL")
        )
    reject_sql = " UNION ALL ".join(unions)
    csv_reasons = {
        "MISSING COLUMNS": "malformed line: too few fields for the header; fix the line",
        "TOO MANY COLUMNS": "malformed line: more fields than the header (a stray delimiter?); fix the line",
        "INVALID ENCODING": "invalid encoding: the line has bytes that are not UTF-8; re-export as UTF-8 or set encoding in a profile",
        "LINE SIZE OVER MAXIMUM": f"line too long: over {MAX_LINE_BYTES} bytes; fix the line",
        "UNQUOTED VALUE": "malformed line: text after a closing quote; fix the quoting",
        "INVALID UNICODE": "invalid encoding: not UTF-8; re-export as UTF-8 or set encoding in a profile",
    }
    if not dry_run:
        con.execute(
            f"INSERT INTO rejects SELECT {file_id}, ?, line, field, raw_value, reason FROM ({reject_sql})",
            [shown],
        )
        if csv_rej:
            con.executemany(
                "INSERT INTO rejects VALUES (?, ?, ?, ?, ?, ?)",
                [
                    [
                        file_id,
                        shown,
                        int(r[0]),
                        None,
                        (r[3] or "")[:1000],
                        _csv_reason(csv_reasons, r[2]),
                    ]
                    for r in csv_rej
                ],
            )

    # good rows -> dedupe -> insert
    key = kind.key
    key_cols = ", ".join(qi(k) for k in key)
    cols = [f.name for f in kind.fields]
    sel = _derived_select(kind)
    # rank within the file only among keys that repeat (a hash aggregate finds them; the
    # common case of no repeats then needs no sort)
    con.execute(
        f"CREATE OR REPLACE TEMP TABLE _tt_good AS SELECT {line} AS _line, s._rec, {sel}, "
        f"1 AS _rank FROM {STAGE} s {join} WHERE NOT s._bad"
    )
    has_rep = con.execute(
        "SELECT count(*) FROM (SELECT 1 FROM _tt_good GROUP BY ALL_KEYS HAVING count(*) > 1)".replace(
            "ALL_KEYS", key_cols
        )
    ).fetchone()[0]
    if has_rep:
        con.execute(
            f"UPDATE _tt_good SET _rank = r.rk FROM (SELECT _rec, row_number() OVER "
            f"(PARTITION BY {key_cols} ORDER BY _rec) AS rk FROM _tt_good WHERE ({key_cols}) IN "
            f"(SELECT ({key_cols}) FROM _tt_good GROUP BY {key_cols} HAVING count(*) > 1)) r "
            f"WHERE _tt_good._rec = r._rec"
        )
    n_good, n_dup_in = con.execute(
        "SELECT count(*), count(*) FILTER (WHERE _rank > 1) FROM _tt_good"
    ).fetchone()
    target = kind.table
    match = " AND ".join(f"e.{qi(k)} IS NOT DISTINCT FROM g.{qi(k)}" for k in key)
    if kind.upsert:
        same = " AND ".join(
            f"(g.{qi(c)} IS NULL OR e.{qi(c)} IS NOT DISTINCT FROM g.{qi(c)})"
            for c in cols
        )
        n_same = con.execute(
            f"SELECT count(*) FROM _tt_good g JOIN {target} e ON {match} WHERE g._rank = 1 AND {same}"
        ).fetchone()[0]
        con.execute(
            f"CREATE OR REPLACE TEMP TABLE _tt_new AS SELECT g.* FROM _tt_good g WHERE g._rank = 1 "
            f"AND NOT EXISTS (SELECT 1 FROM {target} e WHERE {match} AND {same})"
        )
        n_dup_store = int(n_same)
    else:
        prune = _prune_clause(con, kind.time_column, key, "_tt_good")
        con.execute(
            f"CREATE OR REPLACE TEMP TABLE _tt_existing AS SELECT {key_cols} FROM {target} e "
            f"WHERE true{prune}"
        )
        con.execute(
            f"CREATE OR REPLACE TEMP TABLE _tt_new AS SELECT g.* FROM _tt_good g WHERE g._rank = 1 "
            f"AND NOT EXISTS (SELECT 1 FROM _tt_existing e WHERE {match})"
        )
        n_dup_store = (
            con.execute("SELECT count(*) FROM _tt_good WHERE _rank = 1").fetchone()[0]
            - con.execute("SELECT count(*) FROM _tt_new").fetchone()[0]
        )
    n_new = con.execute("SELECT count(*) FROM _tt_new").fetchone()[0]
    n_dup = int(n_dup_in) + int(n_dup_store)
    assert int(n_good) == int(n_new) + n_dup

    if not dry_run:
        col_list = ", ".join(qi(c) for c in cols)
        extra_cols, extra_vals = _provenance_columns(kind, "?")
        order = f" ORDER BY {qi(kind.time_column)}" if kind.time_column else ""
        conflict = ""
        if kind.upsert:
            sets = ", ".join(
                f"{qi(c)} = COALESCE(excluded.{qi(c)}, {target}.{qi(c)})"
                for c in cols
                if c not in key
            )
            conflict = f" ON CONFLICT ({key_cols}) DO UPDATE SET {sets}, source_file = excluded.source_file"
        con.execute(
            f"INSERT INTO {target} ({col_list}{extra_cols}) SELECT {col_list}{extra_vals} "
            f"FROM _tt_new{order}{conflict}",
            [shown],
        )
        con.execute(
            "UPDATE ingest_files SET rows_read = ?, rows_accepted = ?, rows_rejected = ?, "
            "rows_duplicate = ?, finished_at_utc = ? WHERE file_id = ?",
            [
                rows_read,
                int(n_new),
                int(n_bad) + len(csv_rej),
                n_dup,
                utcnow(),
                file_id,
            ],
        )
    message = _file_message(ignored, rows_read)
    preview = None
    if dry_run and preview_rows:
        rows = con.execute(
            f"SELECT _line AS line, {', '.join(qi(c) for c in cols)} FROM _tt_good WHERE _rank = 1 ORDER BY _line LIMIT {int(preview_rows)}"
        ).df()
        rows = rows[[c for c in rows.columns if rows[c].notna().any()]]
        rej = con.execute(
            f"SELECT * FROM ({reject_sql}) ORDER BY line LIMIT {int(preview_rows)}"
        ).df()
        if csv_rej:
            import pandas as pd

            extra = pd.DataFrame(
                [
                    (
                        int(r[0]),
                        None,
                        (r[3] or "")[:1000],
                        _csv_reason(csv_reasons, r[2]),
                    )
                    for r in csv_rej[: int(preview_rows)]
                ],
                columns=["line", "field", "raw_value", "reason"],
            )
            rej = pd.concat([rej, extra], ignore_index=True).sort_values(
                "line", kind="stable"
            )
            rej = rej.head(int(preview_rows)).reset_index(drop=True)
        preview = Preview(rows, rej)
    report = FileReport(
        shown,
        kind.name,
        profile.name if profile else None,
        STATUS_DRY_RUN if dry_run else STATUS_INGESTED,
        rows_read=rows_read,
        rows_accepted=int(n_new),
        rows_rejected=int(n_bad) + len(csv_rej),
        rows_duplicate=n_dup,
        message=message,
        sha256=scan.sha256,
        file_id=file_id,
    )
    return report, preview


def _file_message(ignored: list[str], rows_read: int) -> str:
    """A file's report note: columns it carried that we ignore, and a header-only file."""
    message = ""
    if ignored:
        message = f"ignored columns: {', '.join(ignored[:10])}" + (
            " ..." if len(ignored) > 10 else ""
        )
    if rows_read == 0:
        message = (message + "; " if message else "") + "header only: no data rows"
    return message


def _provenance_columns(kind: Kind, file_value: str) -> tuple[str, str]:
    """(column list, select list) appended to an INSERT: the source file (``file_value``, a
    parameter ``?`` or a column), its line where the kind keeps one, and ``'log'`` as the
    exposure source."""
    cols, vals = ", source_file", f", {file_value}"
    if kind.has_line:
        cols += ", source_line"
        vals += ", _line"
    if kind.name == "exposures":
        cols += ", source_kind"
        vals += ", 'log'"
    return cols, vals


def _prune_clause(
    con: duckdb.DuckDBPyConnection, time_column: str | None, key: Any, new_rows: str
) -> str:
    """SQL ``AND ...`` restricting stored rows ``e`` to the new rows' systems and time range.

    A semi join on the systems (DuckDB pushes the build side's min/max into the scan) and a
    constant time range (zone maps), so an incremental file never rescans the whole table.
    Measured on 10,000,000 stored rows of 20 systems: 0.11 s instead of 1.49 s for one system's
    file. ``new_rows`` is a FROM target (``_tt_good``, or ``table WHERE rowid > N``).
    """
    prune = ""
    if time_column:
        lo, hi = con.execute(
            f"SELECT min({qi(time_column)}), max({qi(time_column)}) FROM {new_rows}"
        ).fetchone()
        if lo is not None:
            # literal bounds (our own datetimes, not user text) so DuckDB prunes by zone maps
            prune = (
                f" AND e.{qi(time_column)} BETWEEN TIMESTAMP '{lo:%Y-%m-%d %H:%M:%S.%f}' "
                f"AND TIMESTAMP '{hi:%Y-%m-%d %H:%M:%S.%f}'"
            )
    if "system_id" in key:
        prune += f" AND e.system_id IN (SELECT DISTINCT system_id FROM {new_rows})"
    return prune


def _stage_columns(con: duckdb.DuckDBPyConnection) -> list[str]:
    return [r[0] for r in con.execute(f"DESCRIBE {STAGE}").fetchall()]


def _csv_reason(reasons: dict[str, str], error_type: object) -> str:
    """Our reason text for one of DuckDB's CSV error types."""
    return reasons.get(
        str(error_type), f"malformed line: {str(error_type).lower()}; fix the line"
    )


def _derived_select(kind: Kind) -> str:
    """Canonical columns as stored: the fields, with the kind's derived values filled in."""
    cols = [f.name for f in kind.fields]
    derived = {c: qi(c) for c in cols}
    if kind.name == "exposures":
        derived["exposure_mas"] = (
            "COALESCE(exposure_mas, tube_current_ma * exposure_time_s)"
        )
        derived["exposure_time_s"] = (
            "COALESCE(exposure_time_s, exposure_mas / tube_current_ma)"
        )
        derived["arc_count"] = "COALESCE(arc_count, 0)"
    if kind.name == "downtime":
        derived["severity"] = "COALESCE(severity, 'hard_down')"
    return ", ".join(f"{derived[c]} AS {qi(c)}" for c in cols)


_PARAM = re.compile(r"\$(p[0-9]+)\b")


def _used(sql: str, p: Params) -> dict[str, Any]:
    """The bound values a statement refers to (DuckDB refuses unused named parameters)."""
    names = set(_PARAM.findall(sql))
    return {k: v for k, v in p.values.items() if k in names}


def _fast_ingest(
    con: duckdb.DuckDBPyConnection,
    shown: str,
    scan: rd.FileScan,
    src: Source,
    kind: Kind,
    mapped: dict[str, tuple[str, ...]],
    ignored: list[str],
    p: Params,
    now_utc: datetime,
    started: datetime,
) -> FileReport | None:
    """Ingest an open-layout CSV in one typed pass straight into its table, or return ``None``.

    The file is read with DuckDB types (numbers as DOUBLE) and strictly, and every check of the
    per-field path is one boolean per row (:func:`build_fast_select`); the rows go straight into
    the target table with no staging copy. The first malformed line, cell that does not convert
    or row failing a check raises inside DuckDB: the transaction is rolled back, a new one begun,
    and ``None`` returned, so the caller reads the file on the per-field path, which gives every
    reject its line, field, value and reason. So a file either goes in whole here, with no
    rejects, or exactly as the per-field path would take it.

    Duplicates are removed after the insert, among the rows this transaction appended (row ids
    above the table's largest before it): later repeats of a key within the file, then rows whose
    key is already stored (restricted to the new rows' systems and time range, as on the per-field
    path). Counts are exact: rows read = inserted = accepted + duplicate.
    """
    import duckdb

    target = kind.table
    typed_from = typed_csv_sql(src, fast_types(kind, mapped), p)
    join, line = line_expr(con, src, scan, csv_rejects=False)
    before, n_fluoro = con.execute(
        f"SELECT (SELECT max(rowid) FROM {target}), "
        "(SELECT count(*) FROM systems WHERE modality = 'fluoroscopy')"
    ).fetchone()
    fluoro = kind.name == "exposures" and bool(n_fluoro)
    sel = build_fast_select(kind, mapped, typed_from, join, line, now_utc, fluoro)
    cols = [f.name for f in kind.fields]
    col_list = ", ".join(qi(c) for c in cols)
    extra_cols, extra_vals = _provenance_columns(kind, p.add(shown))
    last = -1 if before is None else int(before)
    sql = (
        f"INSERT INTO {target} ({col_list}{extra_cols}) SELECT {_derived_select(kind)}"
        f"{extra_vals} FROM ({sel}) f"
    )
    try:
        n_read = int(con.execute(sql, _used(sql, p)).fetchone()[0])
    except duckdb.Error:
        con.execute("ROLLBACK")
        con.execute("BEGIN TRANSACTION")
        return None

    new = f"rowid > {last}"
    key = kind.key
    key_cols = ", ".join(qi(k) for k in key)
    n_dup_in = 0
    has_rep = 1
    tc = kind.time_column
    if tc and tc in key:
        # times strictly increasing in any order are all distinct, and so are keys holding
        # them: one streaming pass (0.07 s on 10 M rows) instead of a hash aggregate (1.6 s)
        rising = con.execute(
            f"SELECT bool_and(d) FROM (SELECT {qi(tc)} > lag({qi(tc)}) OVER () AS d "
            f"FROM {target} WHERE {new})"
        ).fetchone()[0]
        has_rep = 0 if rising is None or rising else 1
    if has_rep:
        has_rep = con.execute(
            f"SELECT count(*) FROM (SELECT 1 FROM {target} WHERE {new} GROUP BY {key_cols} "
            "HAVING count(*) > 1)"
        ).fetchone()[0]
    if has_rep:
        # keep the first row of each repeated key in file order, as the per-field path does
        order = "source_line" if kind.has_line else "rowid"
        n_dup_in = int(
            con.execute(
                f"DELETE FROM {target} WHERE rowid IN (SELECT rowid FROM (SELECT rowid, "
                f"row_number() OVER (PARTITION BY {key_cols} ORDER BY {order}) AS rk FROM "
                f"{target} WHERE {new}) WHERE rk > 1)"
            ).fetchone()[0]
        )
    n_dup_store = 0
    if last >= 0 and n_read > n_dup_in:
        prune = _prune_clause(con, tc, key, f"{target} WHERE {new}")
        con.execute(
            f"CREATE OR REPLACE TEMP TABLE _tt_existing AS SELECT {key_cols} FROM {target} e "
            f"WHERE e.rowid <= {last}{prune}"
        )
        match = " AND ".join(f"e.{qi(k)} IS NOT DISTINCT FROM g.{qi(k)}" for k in key)
        n_dup_store = int(
            con.execute(
                f"DELETE FROM {target} WHERE rowid IN (SELECT g.rowid FROM {target} g WHERE "
                f"g.{new} AND EXISTS (SELECT 1 FROM _tt_existing e WHERE {match}))"
            ).fetchone()[0]
        )
    n_dup = n_dup_in + n_dup_store
    n_new = n_read - n_dup
    row = con.execute(
        "INSERT INTO ingest_files (path, sha256, table_kind, profile, status, started_at_utc, "
        "rows_read, rows_accepted, rows_rejected, rows_duplicate, finished_at_utc) "
        "VALUES (?, ?, ?, NULL, ?, ?, ?, ?, 0, ?, ?) RETURNING file_id",
        [
            shown,
            scan.sha256,
            kind.name,
            STATUS_INGESTED,
            started,
            n_read,
            n_new,
            n_dup,
            utcnow(),
        ],
    ).fetchone()
    message = _file_message(ignored, n_read)
    return FileReport(
        shown,
        kind.name,
        None,
        STATUS_INGESTED,
        rows_read=n_read,
        rows_accepted=n_new,
        rows_rejected=0,
        rows_duplicate=n_dup,
        message=message,
        sha256=scan.sha256,
        file_id=int(row[0]),
    )


# --------------------------------------------------------------------------------------------
# several small files of one kind and header in one scan
# --------------------------------------------------------------------------------------------

#: Files larger than this are not batched (their own scan already amortises the fixed work).
BATCH_MAX_BYTES = 64 << 20
#: Most files in one batch (bounds the work redone file by file when one row is bad). On the
#: bench's 2,684 files (891 MiB, 2 cores), runs took 39-47 s with 64 files per batch (peak
#: 906-914 MiB) and 28-40 s with 256 (peak 715-745 MiB); 2,048 took 30 s but peaked at
#: 1,243 MiB. Each batch pays a fixed round of statements and holds its scan's buffers.
BATCH_MAX_FILES = 256
#: Most bytes of CSV in one batch (bounds the batch's memory whatever the file sizes).
BATCH_MAX_TOTAL_BYTES = 256 << 20


def ingest_batch(
    con: duckdb.DuckDBPyConnection,
    items: list[tuple[Path, str]],
    *,
    now_utc: datetime | None = None,
    scans_from: rd.ScanAhead | None = None,
) -> tuple[list[FileReport], int]:
    """Ingest a leading run of ``items`` (path, shown) in one scan and one transaction.

    For open-layout CSV files of one kind (by file name) and one header line: each file is
    hashed as on the per-file path; the run stops before the first file that is empty, gzip,
    has a blank line or a quote character (its record numbers would not follow from its line
    count), a different header, content already ingested (or repeated in the run), or is large.
    The run's files are read by one strict typed ``read_csv([...])`` straight into their table,
    with the checks of :func:`build_fast_select`. Row counts are verified per file against its
    line count; duplicates are removed as the per-file path would in this file order (a key
    repeated within a file keeps its first line; a key already stored or in an earlier file of
    the run is a duplicate). Each file gets its own ``ingest_files`` row and report.

    ``scans_from``: take the files' hash passes from there (scanned ahead while the previous
    batch was in DuckDB) instead of scanning them here.

    Returns the reports of the files taken, in order, and how many files were tried. No
    reports when fewer than two files qualify (tried = 0) or anything failed (bad row, malformed
    line, a count that does not match; tried = the run's length): nothing is then written, and
    the caller ingests those files one by one, which gives every reject.
    """
    import duckdb

    now_utc = now_utc or utcnow()
    started = utcnow()
    if len(items) < 2:
        return [], 0
    kind_name = kind_from_name(items[0][0].name)
    if kind_name is None or KINDS[kind_name].upsert:
        return [], 0
    kind = KINDS[kind_name]
    scans: list[rd.FileScan] = []
    header = None
    total_bytes = 0
    for path, _shown in items[:BATCH_MAX_FILES]:
        if kind_from_name(path.name) != kind_name or rd.base_suffix(path) != ".csv":
            break
        try:
            size = path.stat().st_size
            total_bytes += size
            if size > BATCH_MAX_BYTES or scans and total_bytes > BATCH_MAX_TOTAL_BYTES:
                break
            scan = scans_from.get(path) if scans_from is not None else rd.scan_file(path)
        except OSError:
            break
        first = scan.head.split(b"\n", 1)[0]
        if (
            scan.size == 0
            or scan.gzip
            or scan.truncated
            or scan.blank_lines
            or scan.has_quote
            or scan.lines < 1
            or len(scan.head) >= 65536
            and b"\n" not in scan.head
            or rd.detect_format(path, scan.head) != "csv"
            or header is not None
            and first != header
        ):
            break
        header = first
        scans.append(scan)
    shas = [s.sha256 for s in scans]
    if len(set(shas)) < len(shas):
        # the first repeat ends the run (it is "already ingested" after the first one)
        seen: set[str] = set()
        for i, sha in enumerate(shas):
            if sha in seen:
                scans = scans[:i]
                break
            seen.add(sha)
    if len(scans) >= 2:
        done = {
            r[0]
            for r in con.execute(
                "SELECT DISTINCT sha256 FROM ingest_files WHERE status = ? AND profile IS NULL "
                "AND list_contains(?, sha256)",
                [STATUS_INGESTED, [s.sha256 for s in scans]],
            ).fetchall()
        }
        for i, s in enumerate(scans):
            if s.sha256 in done:
                scans = scans[:i]
                break
    if len(scans) < 2:
        return [], 0
    items = items[: len(scans)]
    p = Params()
    try:
        src = open_source(con, items[0][0], items[0][1], scans[0], None, p)
        mapped, _constants, ignored = resolve_columns(
            kind, src, None, items[0][1], items[0][0].name
        )
    except FileFailure:
        return [], 0
    counts = [
        s.lines - 1 for s in scans
    ]  # no blank lines and no quotes: one line, one row
    offsets = [sum(counts[:i]) for i in range(len(counts))]
    target = kind.table
    _drop_temps(con)
    # The strict scan goes into a scan-ordered temporary table of its own (committed, so its
    # row ids count 0, 1, ... in scan order) and the rows are numbered by row id: a
    # row_number() OVER () on the scan kept the whole insert on one thread (1.25 s for a batch
    # of 930,177 rows on the bench, of which the CSV read was 0.41 s).
    scan_sql = typed_csv_sql(src, fast_types(kind, mapped), p, [path for path, _ in items],
                             numbered=False)
    scan_sql = f"CREATE OR REPLACE TEMP TABLE _tt_rows AS SELECT * FROM {scan_sql}"
    try:
        con.execute(scan_sql, _used(scan_sql, p))
    except duckdb.Error:
        _drop_temps(con)
        return [], len(items)
    con.execute("BEGIN TRANSACTION")
    try:
        con.execute(
            "CREATE OR REPLACE TEMP TABLE _tt_batch (idx INTEGER, fname VARCHAR, shown VARCHAR, "
            "off BIGINT, n BIGINT)"
        )
        # one statement from list parameters (executemany ran one insert per file: 0.14 s per
        # batch of 256 files on the bench, 1.5 s over its 2,684 files)
        con.execute(
            "INSERT INTO _tt_batch SELECT unnest(?::INTEGER[]), unnest(?::VARCHAR[]), "
            "unnest(?::VARCHAR[]), unnest(?::BIGINT[]), unnest(?::BIGINT[])",
            [list(range(len(items))), [str(path) for path, _ in items],
             [shown for _, shown in items], offsets, counts],
        )
        typed_from = "(SELECT rowid - (SELECT min(rowid) FROM _tt_rows) + 1 AS _rec, * FROM _tt_rows)"
        before, n_fluoro = con.execute(
            f"SELECT (SELECT max(rowid) FROM {target}), "
            "(SELECT count(*) FROM systems WHERE modality = 'fluoroscopy')"
        ).fetchone()
        last = -1 if before is None else int(before)
        sel = build_fast_select(
            kind,
            mapped,
            typed_from,
            "JOIN _tt_batch o ON o.fname = s._fname",
            f"(s._rec - o.off + {src.header_lines})",
            now_utc,
            kind.name == "exposures" and bool(n_fluoro),
            carry="o.shown",
        )
        cols = [f.name for f in kind.fields]
        col_list = ", ".join(qi(c) for c in cols)
        extra_cols, extra_vals = _provenance_columns(kind, "_file")
        sql = (
            f"INSERT INTO {target} ({col_list}{extra_cols}) SELECT {_derived_select(kind)}"
            f"{extra_vals} FROM ({sel}) f"
        )
        n_all = int(con.execute(sql, _used(sql, p)).fetchone()[0])
        con.execute("DROP TABLE _tt_rows")
        # every file gave exactly its lines' rows, numbered 2..n+1 (the scan kept file order)
        got = (
            {
                r[0]: (int(r[1]), r[2], r[3])
                for r in con.execute(
                    f"SELECT source_file, count(*), min(source_line), max(source_line) "
                    f"FROM {target} WHERE rowid > {last} GROUP BY source_file"
                ).fetchall()
            }
            if kind.has_line
            else None
        )
        h = src.header_lines
        if n_all != sum(counts) or got is None:
            raise _BatchMiss
        for (_path, shown), n in zip(items, counts, strict=True):
            if n and got.get(shown) != (n, h + 1, h + n) or not n and shown in got:
                raise _BatchMiss
        new = f"rowid > {last}"
        # A row is a duplicate, as the per-file path finds them in this file order, when its
        # key is already stored or comes earlier in the run (an earlier file, or an earlier line
        # of its own file). Only keys seen more than once can hold one: a grouping of the stored
        # (pruned) and new keys finds them (none in a usual batch), and the exact rule runs on
        # their rows alone. Probing every new row against every stored and new key took 1.7 s of
        # the bench's 15 s ingest; the grouping 0.65 s.
        prune = _prune_clause(con, kind.time_column, kind.key, f"{target} WHERE {new}")
        ekeys = ", ".join(f"e.{qi(k)}" for k in kind.key)
        keys = ", ".join(qi(k) for k in kind.key)
        stored = f"FROM {target} e WHERE e.rowid <= {last}{prune}"
        con.execute(
            f"CREATE OR REPLACE TEMP TABLE _tt_rep AS SELECT {keys} FROM (SELECT {ekeys} {stored} "
            f"UNION ALL SELECT {ekeys} FROM {target} e WHERE e.{new}) GROUP BY ALL "
            f"HAVING count(*) > 1"
        )

        def match(a: str, b: str) -> str:
            return " AND ".join(f"{a}.{qi(k)} IS NOT DISTINCT FROM {b}.{qi(k)}" for k in kind.key)

        dup_of: dict[str, int] = {}
        if con.execute("SELECT count(*) FROM _tt_rep").fetchone()[0]:
            con.execute(
                f"CREATE OR REPLACE TEMP TABLE _tt_existing AS SELECT * FROM (SELECT {ekeys}, "
                f"-1 AS _idx, -1 AS _line {stored} UNION ALL "
                f"SELECT {ekeys}, b.idx AS _idx, e.source_line AS _line FROM {target} e JOIN "
                f"_tt_batch b ON b.shown = e.source_file WHERE e.{new}) e SEMI JOIN _tt_rep r "
                f"ON {match('r', 'e')}"
            )
            for (f,) in con.execute(
                f"DELETE FROM {target} WHERE rowid IN (SELECT g.rowid FROM {target} g JOIN "
                f"_tt_batch b ON b.shown = g.source_file SEMI JOIN _tt_rep r ON {match('r', 'g')} "
                f"WHERE g.{new} AND EXISTS (SELECT 1 FROM _tt_existing e WHERE {match('e', 'g')} "
                f"AND (e._idx < b.idx OR e._idx = b.idx AND e._line < g.source_line))) "
                f"RETURNING source_file"
            ).fetchall():
                dup_of[f] = dup_of.get(f, 0) + 1
        finished = utcnow()
        shown_all = [shown for _, shown in items]
        dups = [dup_of.get(shown, 0) for shown in shown_all]
        # one statement for the batch's files (one insert per file took 2.3 s over the bench's
        # 2,684 files); ids are drawn in file order, as one insert per file drew them
        file_ids = dict(
            con.execute(
                "INSERT INTO ingest_files (path, sha256, table_kind, profile, status, "
                "started_at_utc, rows_read, rows_accepted, rows_rejected, rows_duplicate, "
                "finished_at_utc) SELECT path, sha, ?, NULL, ?, ?, n_read, n_read - n_dup, 0, "
                "n_dup, ? FROM (SELECT unnest(?::VARCHAR[]) AS path, unnest(?::VARCHAR[]) AS sha, "
                "unnest(?::BIGINT[]) AS n_read, unnest(?::BIGINT[]) AS n_dup, "
                "unnest(?::INTEGER[]) AS i) ORDER BY i RETURNING path, file_id",
                [kind.name, STATUS_INGESTED, started, finished, shown_all,
                 [s.sha256 for s in scans], counts, dups, list(range(len(items)))],
            ).fetchall()
        )
        reports = [
            FileReport(
                shown,
                kind.name,
                None,
                STATUS_INGESTED,
                rows_read=n,
                rows_accepted=n - dup,
                rows_rejected=0,
                rows_duplicate=dup,
                message=_file_message(ignored, n),
                sha256=scan.sha256,
                file_id=int(file_ids[shown]),
            )
            for shown, scan, n, dup in zip(shown_all, scans, counts, dups, strict=True)
        ]
    except (duckdb.Error, _BatchMiss):
        con.execute("ROLLBACK")
        _drop_temps(con)
        return [], len(items)
    except BaseException:
        con.execute("ROLLBACK")
        raise
    con.execute("COMMIT")
    _drop_temps(con)
    return reports, len(items)


class _BatchMiss(Exception):
    """The batch does not hold as planned; its files go one by one."""
