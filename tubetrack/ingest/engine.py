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
from dataclasses import dataclass, field
from datetime import datetime, timedelta
from pathlib import Path
from typing import TYPE_CHECKING, Any

from tubetrack.errors import InputError
from tubetrack.ingest import reader as rd
from tubetrack.ingest.layout import KINDS, Field, Kind, kind_from_header, kind_from_name
from tubetrack.ingest.profiles import Profile
from tubetrack.ingest.report import (
    STATUS_ALREADY,
    STATUS_DRY_RUN,
    STATUS_FAILED,
    STATUS_INGESTED,
    FileReport,
)
from tubetrack.ingest.validate import range_reason_sql, time_reason_sql
from tubetrack.store import quote_ident as qi
from tubetrack.store import utcnow

if TYPE_CHECKING:  # pragma: no cover
    import duckdb

#: Largest line the CSV reader accepts [bytes]; longer lines become rejects.
MAX_LINE_BYTES = 1 << 20
_TRUE = ("true", "t", "yes", "y", "1", "ja", "x")
_FALSE = ("false", "f", "no", "n", "0", "nein", "")
_STAGE = "_tt_stage"
_CSV_REJ = "_tt_csv_rej"
_CSV_SCAN = "_tt_csv_scan"


class FileFailure(InputError):
    """The whole file cannot be read; ``line`` and ``field`` say where."""

    def __init__(self, path: str, line: int | None, message: str, field: str | None = None):
        where = f"{path} line {line}" if line else path
        super().__init__(f"{where}: {message}")
        self.path, self.line, self.field, self.detail = path, line, field, message


@dataclass
class _Params:
    """Named SQL parameters collected while building a statement (values always bound)."""

    values: dict[str, Any] = field(default_factory=dict)

    def add(self, value: Any) -> str:
        name = f"p{len(self.values)}"
        self.values[name] = value
        return f"${name}"


@dataclass(frozen=True)
class Preview:
    """Dry-run extras: first canonical rows and first rejects (pandas DataFrames)."""

    rows: Any
    rejects: Any


# --------------------------------------------------------------------------------------------
# source: the DuckDB table function that reads the file as text cells
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class _Source:
    sql: str  # FROM-clause item yielding _rec (1-based record number) + text columns
    columns: tuple[str, ...]  # column names in the file (JSON: keys)
    fmt: str
    header_lines: int  # lines before the first record (CSV header = 1)
    json: bool = False


def _open_source(
    con: duckdb.DuckDBPyConnection,
    path: Path,
    shown: str,
    scan: rd.FileScan,
    profile: Profile | None,
    p: _Params,
) -> _Source:
    fmt = rd.detect_format(path, scan.head, profile.format if profile else None)
    ppath = p.add(str(path))
    if fmt == "parquet":
        sql = f"(SELECT file_row_number + 1 AS _rec, * EXCLUDE (file_row_number) FROM read_parquet({ppath}, file_row_number=true))"
        try:
            cols = [r[0] for r in con.execute(f"DESCRIBE SELECT * FROM {sql}", p.values).fetchall()]
        except Exception as exc:
            raise FileFailure(shown, None, f"not a readable Parquet file ({_short(exc)}). Re-export the file.") from None
        cols = [c for c in cols if c != "_rec"]
        return _Source(sql, tuple(cols), fmt, 0)
    if fmt == "jsonl":
        comp = "'gzip'" if scan.gzip else "'none'"
        sql = (
            f"(SELECT row_number() OVER () AS _rec, json FROM read_ndjson_objects({ppath}, "
            f"ignore_errors=true, compression={comp}))"
        )
        try:
            keys = con.execute(
                f"SELECT DISTINCT unnest(json_keys(json)) FROM {sql} WHERE json_type(json) = 'OBJECT'",
                p.values,
            ).fetchall()
        except Exception as exc:
            raise FileFailure(shown, None, f"not readable as JSON Lines ({_short(exc)}). Check the file.") from None
        return _Source(sql, tuple(sorted(k[0] for k in keys)), fmt, 0, json=True)
    # CSV / TSV / text: header and delimiter decided here, rows parsed by DuckDB (RFC 4180
    # quoting) with the sniffer off, so a malformed or over-long line becomes a reject row
    # instead of stopping the file.
    enc = profile.encoding if profile else "utf-8"
    header = _header_text(scan.head, enc)
    if not header.strip():
        raise FileFailure(shown, 1, "the first line is empty; it must be the header row with the column names. Remove the empty lines at the top.")
    if profile is not None and profile.delimiter:
        delim = profile.delimiter
    elif rd.base_suffix(path) == ".tsv":
        delim = "\t"
    else:
        delim = _guess_delimiter(header)
    cols = _split_header(header, delim)
    internal = {f"c{i}": "VARCHAR" for i in range(len(cols))}
    opts = [
        f"delim={p.add(delim)}",
        "quote='\"'",
        "escape='\"'",
        "header=true",
        "auto_detect=false",
        f"columns={p.add(internal)}",
        f"max_line_size={MAX_LINE_BYTES}",
        "ignore_errors=true",
        "store_rejects=true",
        f"rejects_table='{_CSV_REJ}'",
        f"rejects_scan='{_CSV_SCAN}'",
        f"compression='{'gzip' if scan.gzip else 'none'}'",
    ]
    if enc != "utf-8":
        opts.append(f"encoding={p.add(enc)}")
    inner = f"read_csv({ppath}, {', '.join(opts)})"
    renames = ", ".join(f"c{i} AS {qi(c)}" for i, c in enumerate(_dedupe(cols)))
    sql = f"(SELECT row_number() OVER () AS _rec, {renames} FROM {inner})"
    return _Source(sql, tuple(_dedupe(cols)), "csv", 1)


def _header_text(head: bytes, encoding: str) -> str:
    codec = {"utf-8": "utf-8-sig", "latin-1": "latin-1", "utf-16": "utf-16"}[encoding]
    text = head.decode(codec, errors="replace")
    return text.split("\n", 1)[0].rstrip("\r")


def _guess_delimiter(header: str) -> str:
    """The candidate delimiter that splits the header into the most fields (comma on ties)."""
    best, best_n = ",", 1
    for d in (",", ";", "\t", "|"):
        n = len(_split_header(header, d))
        if n > best_n:
            best, best_n = d, n
    return best


def _split_header(header: str, delim: str) -> list[str]:
    import csv

    row = next(csv.reader([header], delimiter=delim, quotechar='"'), [])
    return [c.strip().lstrip("\ufeff") for c in row]


def _dedupe(cols: list[str]) -> list[str]:
    seen: dict[str, int] = {}
    out = []
    for c in cols:
        name = c or "column"
        if name in seen:
            seen[name] += 1
            name = f"{name}_{seen[name]}"
        else:
            seen[name] = 0
        out.append(name)
    return out


def _short(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0][:300] if text else type(exc).__name__


# --------------------------------------------------------------------------------------------
# mapping: which source feeds each canonical field
# --------------------------------------------------------------------------------------------


def _resolve_columns(
    kind: Kind, src: _Source, profile: Profile | None, shown: str, file_name: str
) -> tuple[dict[str, tuple[str, ...]], dict[str, str], list[str]]:
    """Map canonical fields to source columns; return (mapped, constants, ignored columns)."""
    by_lower = {c.strip().lower().lstrip("\ufeff"): c for c in src.columns}
    mapped: dict[str, tuple[str, ...]] = {}
    constants: dict[str, str] = {}
    if profile is None:
        for f in kind.fields:
            if f.name in by_lower:
                mapped[f.name] = (by_lower[f.name],)
    else:
        for name, cols in profile.columns.items():
            found = []
            for c in cols:
                hit = c if c in src.columns else by_lower.get(c.strip().lower())
                if hit is None:
                    raise FileFailure(
                        shown, 1 if src.fmt == "csv" else None,
                        f'column "{c}" (mapped to {name} by profile {profile.name}) is not in the '
                        f"file; columns found: {_list(src.columns)}. Fix [columns] in {profile.path}, "
                        "or check the delimiter.",
                        name,
                    )
                found.append(hit)
            mapped[name] = tuple(found)
        constants.update(profile.constants)
        caps = profile.captures(file_name)
        for k, v in caps.items():
            constants.setdefault(f"__capture__{k}", v)
    for f in kind.fields:
        have = f.name in mapped or f.name in constants or f"__capture__{f.name}" in constants
        if f.required and not have:
            raise FileFailure(shown, 1 if src.fmt == "csv" else None, _missing_msg(kind, f.name, src, profile), f.name)
    for group in kind.one_of:
        if not any(g in mapped or g in constants for g in group):
            names = " or ".join(group)
            raise FileFailure(
                shown, 1 if src.fmt == "csv" else None,
                f"missing required column {names} (one of them is needed); columns found: "
                f"{_list(src.columns)}. Add the column, or map it in a profile.",
                group[0],
            )
    used = {c for cols in mapped.values() for c in cols}
    ignored = [c for c in src.columns if c not in used]
    return mapped, constants, ignored


def _list(cols: tuple[str, ...] | list[str], limit: int = 12) -> str:
    shown = ", ".join(f'"{c}"' for c in list(cols)[:limit])
    return shown + (f", ... ({len(cols)} in all)" if len(cols) > limit else "") if cols else "(none)"


def _missing_msg(kind: Kind, name: str, src: _Source, profile: Profile | None) -> str:
    if len(src.columns) == 1 and src.fmt == "csv":
        col = src.columns[0]
        for d in (";", "|", "\t", ",", ":"):
            if d in col:
                shown = "\\t" if d == "\t" else d
                return (
                    f"only one column found, the header is \"{col[:120]}\"; the delimiter looks like "
                    f"\"{shown}\", which was not detected. Give it in a profile (delimiter = \"{shown}\")."
                )
        return (
            f"only one column found (\"{col[:120]}\"); missing required column \"{name}\". "
            "Check the delimiter and the header row."
        )
    hint = (
        f'map it in {profile.path} ([columns] {name} = "<column in the file>")'
        if profile
        else f'rename the file\'s column to "{name}", or map it with a profile ([columns] {name} = "...")'
    )
    return (
        f'missing required column "{name}" for the {kind.name} table; columns found: '
        f"{_list(src.columns)}. Add the column, or {hint}."
    )


# --------------------------------------------------------------------------------------------
# SQL builders
# --------------------------------------------------------------------------------------------


def _raw_expr(
    f: Field, src: _Source, mapped: dict[str, tuple[str, ...]], constants: dict[str, str], p: _Params
) -> str:
    """Text of the cell for field ``f`` (VARCHAR, NULL when absent)."""
    cols = mapped.get(f.name)
    if cols:
        if src.json:
            parts = [
                f"json_extract_string(json, {p.add('$.' + _json_key(c))})" for c in cols
            ]
        else:
            parts = [f"CAST(src.{qi(c)} AS VARCHAR)" for c in cols]
        expr = parts[0] if len(parts) == 1 else f"NULLIF(concat_ws(' ', {', '.join(parts)}), '')"
        cap = constants.get(f"__capture__{f.name}")
        if cap is not None:
            expr = f"COALESCE(NULLIF(trim({expr}), ''), {p.add(cap)})"
        return expr
    if f.name in constants:
        return f"CAST({p.add(constants[f.name])} AS VARCHAR)"
    cap = constants.get(f"__capture__{f.name}")
    if cap is not None:
        return f"CAST({p.add(cap)} AS VARCHAR)"
    return "CAST(NULL AS VARCHAR)"


def _json_key(key: str) -> str:
    return '"' + key.replace("\\", "\\\\").replace('"', '\\"') + '"'


def _mapped_expr(f: Field, raw: str, profile: Profile | None, p: _Params) -> str:
    """Trimmed cell with the profile's value map applied (NULL when empty)."""
    t = f"NULLIF(trim({raw}), '')"
    vmap = profile.values.get(f.name) if profile else None
    if vmap:
        whens = " ".join(f"WHEN {p.add(k)} THEN {p.add(v)}" for k, v in vmap.items())
        t = f"(CASE {t} {whens} ELSE {t} END)"
    return t


def _number_expr(m: str, decimal: str) -> str:
    s = f"replace({m}, ',', '.')" if decimal == "," else m
    return f"TRY_CAST({s} AS DOUBLE)"


def _qs(text: str) -> str:
    """SQL string literal for text WE wrote (messages), never for data."""
    return "'" + text.replace("'", "''") + "'"


@dataclass
class _Plan:
    """SQL pieces per field, filled by :func:`_build_stage`."""

    selects_a: list[str] = field(default_factory=list)  # raw + mapped text
    selects_b: list[str] = field(default_factory=list)  # typed values
    errs: dict[str, str] = field(default_factory=dict)  # field -> reason SQL (over typed cols)
    extra_errs: list[tuple[str, str]] = field(default_factory=list)  # (field, reason SQL)
    local_ts: list[str] = field(default_factory=list)  # timestamp fields needing tz resolution


def _build_stage(
    kind: Kind,
    src: _Source,
    mapped: dict[str, tuple[str, ...]],
    constants: dict[str, str],
    profile: Profile | None,
    p: _Params,
    now_utc: datetime,
) -> str:
    """The CREATE TEMP TABLE statement for the staging table of one file."""
    decimal = profile.decimal if profile else "."
    tz = profile.timezone if profile else "UTC"
    formats = profile.time_formats if profile else ()
    plan = _Plan()
    present = set(mapped) | {k for k in constants if not k.startswith("__capture__")} | {
        k.removeprefix("__capture__") for k in constants if k.startswith("__capture__")
    }
    for f in kind.fields:
        raw = _raw_expr(f, src, mapped, constants, p)
        plan.selects_a.append(f"{raw} AS {qi('r__' + f.name)}")
        plan.selects_a.append(f"{_mapped_expr(f, raw, profile, p)} AS {qi('m__' + f.name)}")
        m = qi("m__" + f.name)
        r = qi("r__" + f.name)
        v = qi("v__" + f.name)
        shown_raw = f"'\"' || {r} || '\"'"
        required = (
            f"WHEN {m} IS NULL THEN "
            + (_qs(f"required: {f.name} is empty; fill it in or the row stays in rejects") if f.required else "NULL")
        )
        if f.type == "number":
            factor = profile.unit_factor(f.name) if profile else 1.0
            val = _number_expr(m, decimal)
            if factor != 1.0:
                val = f"({val} * {factor!r})"
            plan.selects_b.append(f"{val} AS {v}")
            if decimal == ",":
                nan_hint = _qs(f"not a number: {f.name} is ") + f" || {shown_raw} || " + _qs("; fix the row")
            else:
                nan_hint = (
                    f"CASE WHEN regexp_matches({m}, '^[+-]?[0-9]+,[0-9]+$') THEN "
                    + _qs(f"not a number: {f.name} is ")
                    + f" || {shown_raw} || "
                    + _qs(", which looks like a decimal comma; use a point, or read the file with a profile that sets decimal = \",\"")
                    + " ELSE "
                    + _qs(f"not a number: {f.name} is ")
                    + f" || {shown_raw} || "
                    + _qs("; fix the row")
                    + " END"
                )
            rng = range_reason_sql(kind, f.name, v, shown_raw)
            plan.errs[f.name] = f"CASE {required} WHEN {v} IS NULL THEN {nan_hint} ELSE {rng} END"
        elif f.type == "integer":
            d = _number_expr(m, decimal)
            plan.selects_b.append(
                f"(CASE WHEN isfinite({d}) AND {d} = round({d}) AND abs({d}) < 2147483647 "
                f"THEN CAST({d} AS INTEGER) END) AS {v}"
            )
            plan.selects_b.append(f"{d} AS {qi('d__' + f.name)}")
            dq = qi("d__" + f.name)
            rng = range_reason_sql(kind, f.name, v, shown_raw)
            plan.errs[f.name] = (
                f"CASE {required} WHEN {dq} IS NULL THEN "
                + _qs(f"not a number: {f.name} is ")
                + f" || {shown_raw} || "
                + _qs("; give a whole number")
                + f" WHEN {v} IS NULL THEN "
                + _qs(f"not a whole number: {f.name} is ")
                + f" || {shown_raw} || "
                + _qs("; give a whole number")
                + f" ELSE {rng} END"
            )
        elif f.type == "bool":
            trues = ", ".join(_qs(x) for x in _TRUE)
            falses = ", ".join(_qs(x) for x in _FALSE if x)
            plan.selects_b.append(
                f"(CASE WHEN {m} IS NULL THEN false WHEN lower({m}) IN ({trues}) THEN true "
                f"WHEN lower({m}) IN ({falses}) THEN false END) AS {v}"
            )
            plan.errs[f.name] = (
                f"CASE WHEN {m} IS NOT NULL AND {v} IS NULL THEN "
                + _qs(f"bad value: {f.name} is ")
                + f" || {shown_raw} || "
                + _qs("; allowed: true, false (also yes/no, 1/0)")
                + " END"
            )
        elif f.type == "enum":
            choices = ", ".join(_qs(c) for c in f.choices)
            plan.selects_b.append(f"lower({m}) AS {v}")
            hint = (
                f"; map the file's codes to these in the profile ([values.{f.name}])"
                if f.name in (profile.values if profile else {}) or profile
                else f"; map other codes with a profile ([values.{f.name}])"
            )
            plan.errs[f.name] = (
                f"CASE {required} WHEN {v} NOT IN ({choices}) THEN "
                + _qs(f"bad value: {f.name} is ")
                + f" || {shown_raw} || "
                + _qs(f"; allowed: {', '.join(f.choices)}{hint}")
                + " END"
            )
        elif f.type in ("id", "text"):
            plan.selects_b.append(f"{m} AS {v}")
            if f.required:
                plan.errs[f.name] = f"CASE {required} END"
        elif f.type == "timestamp":
            _timestamp(plan, f, m, v, shown_raw, required, tz, formats, p, now_utc)
        else:  # pragma: no cover
            raise AssertionError(f.type)

    # cross-field checks
    if kind.name == "exposures":
        plan.extra_errs.append(
            (
                "exposure_time_s",
                f"CASE WHEN {qi('m__exposure_time_s')} IS NULL AND {qi('m__exposure_mas')} IS NULL THEN "
                + _qs("required: neither exposure_time_s nor exposure_mas is given; give one of them")
                + " END",
            )
        )
    if kind.name == "downtime":
        plan.extra_errs.append(
            (
                "end_utc",
                f"CASE WHEN {qi('v__end_utc')} < {qi('v__start_utc')} THEN "
                + _qs("end before start: end_utc ")
                + f" || '\"' || {qi('r__end_utc')} || '\"' || "
                + _qs(" is before start_utc ")
                + f" || '\"' || {qi('r__start_utc')} || '\"' || "
                + _qs("; fix the row")
                + " END",
            )
        )
    if kind.name == "tubes":
        plan.extra_errs.append(
            (
                "removed_at_utc",
                f"CASE WHEN {qi('v__removed_at_utc')} < {qi('v__installed_at_utc')} THEN "
                + _qs("removed before installed: removed_at_utc ")
                + f" || '\"' || {qi('r__removed_at_utc')} || '\"' || "
                + _qs(" is before installed_at_utc; fix the row")
                + " END",
            )
        )
    del present

    fluoro = ""
    if kind.name == "exposures":
        fluoro = (
            f", COALESCE({qi('v__system_id')} IN (SELECT system_id FROM systems "
            "WHERE modality = 'fluoroscopy'), false) AS _fluoro"
        )
    row_err = "CAST(NULL AS VARCHAR)"
    if src.json:
        row_err = (
            "CASE WHEN json IS NULL THEN 'malformed line: not valid JSON; fix or remove the line' "
            "WHEN json_type(json) <> 'OBJECT' THEN 'malformed line: not a JSON object; each line "
            "must be one {...} object' END"
        )
    ctes = [
        f"a AS (SELECT src._rec, {row_err} AS e___row, {', '.join(plan.selects_a)} FROM {src.sql} AS src)",
        f"b AS (SELECT a.*, {', '.join(plan.selects_b)} FROM a)",
    ]
    last = "b"
    for name in plan.local_ts:
        ctes.extend(_tz_ctes(name, last, profile, p))
        last = f"tz_{name}"
    ctes.append(f"c AS (SELECT {last}.* {fluoro} FROM {last})")
    err_cols = []
    for name, sql in plan.errs.items():
        err_cols.append(f"{sql} AS {qi('e__' + name)}")
    for i, (name, sql) in enumerate(plan.extra_errs):
        err_cols.append(f"{sql} AS {qi(f'x{i}__' + name)}")
    ctes.append(f"d AS (SELECT c.*, {', '.join(err_cols)} FROM c)")
    err_names = ["e___row"] + [f"e__{n}" for n in plan.errs] + [
        f"x{i}__{n}" for i, (n, _) in enumerate(plan.extra_errs)
    ]
    any_err = " OR ".join(f"{qi(e)} IS NOT NULL" for e in err_names)
    keep = ["_rec", f"({any_err}) AS _bad"]
    for f in kind.fields:
        keep.append(f"{qi('v__' + f.name)} AS {qi(f.name)}")
    for e in err_names:
        keep.append(qi(e))
    for f in kind.fields:
        # raw text only where some check failed (keeps the staging table small)
        keep.append(
            f"CASE WHEN {any_err} THEN {qi('r__' + f.name)} END AS {qi('r__' + f.name)}"
        )
    if kind.name == "exposures":
        keep.append("_fluoro")
    return (
        f"CREATE OR REPLACE TEMP TABLE {_STAGE} AS WITH {', '.join(ctes)} "
        f"SELECT {', '.join(keep)} FROM d"
    )


def _timestamp(
    plan: _Plan,
    f: Field,
    m: str,
    v: str,
    shown_raw: str,
    required: str,
    tz: str,
    formats: tuple[str, ...],
    p: _Params,
    now_utc: datetime,
) -> None:
    """Timestamp parsing: ISO 8601 UTC, or the profile's formats in its time zone."""
    has_offset = bool(formats) and all(("%z" in x or "%Z" in x) for x in formats)
    if formats:
        parsed = f"try_strptime({m}, {p.add(list(formats))})"
        if has_offset:
            parsed = f"timezone('UTC', {parsed})"
        expect = "one of the profile's time formats " + " | ".join(formats)
    else:
        parsed = None
        expect = "ISO 8601 (YYYY-MM-DDTHH:MM:SS[.fff][Z])"
    if tz == "UTC" or has_offset:
        if parsed is None:
            # fast path without a UTC offset ("Z" or none); an explicit offset goes through ICU
            parsed = (
                f"(CASE WHEN length({m}) > 10 AND regexp_matches({m}, '[+-][0-9]{{2}}(:?[0-9]{{2}})?$') "
                f"THEN timezone('UTC', TRY_CAST({m} AS TIMESTAMPTZ)) ELSE TRY_CAST({m} AS TIMESTAMP) END)"
            )
        plan.selects_b.append(f"{parsed} AS {v}")
        local_err = ""
    else:
        if parsed is None:
            parsed = f"TRY_CAST({m} AS TIMESTAMP)"
        plan.selects_b.append(f"{parsed} AS {qi('l__' + f.name)}")
        plan.local_ts.append(f.name)
        # v__ is added by the tz CTE; its reason column:
        local_err = (
            f"WHEN {qi('g__' + f.name)} THEN "
            + _qs(f"non-existent local time: {f.name} is ")
            + f" || {shown_raw} || "
            + _qs(f", inside the spring-forward gap of {tz} (clocks skip this hour); fix the generator clock or the row")
            + f" WHEN {qi('a__' + f.name)} THEN "
            + _qs(f"ambiguous local time: {f.name} is ")
            + f" || {shown_raw} || "
            + _qs(f", which occurs twice at the autumn change in {tz}; set time.ambiguous = \"earlier\" or \"later\" in the profile")
        )
        # the parse check must look at the local value, v__ is NULL for gaps
    parse_col = qi("l__" + f.name) if local_err else v
    plan.errs[f.name] = (
        f"CASE {required} WHEN {parse_col} IS NULL THEN "
        + _qs(f"bad timestamp: {f.name} is ")
        + f" || {shown_raw} || "
        + _qs(f"; expected {expect}")
        + f" {local_err} ELSE {time_reason_sql(f.name, v, shown_raw, now_utc)} END"
    )


def _tz_ctes(name: str, prev: str, profile: Profile | None, p: _Params) -> list[str]:
    """Local time -> UTC with DST: gap rows rejected, repeated autumn hour by policy or order.

    For a local time L the two candidate UTC instants are L - offset(L - 1 day) and
    L - offset(L + 1 day) (the offsets in force before and after any change near L). A candidate
    is valid when converting it back to local time gives L again. Two different valid candidates:
    L is ambiguous (autumn); none: L is in the spring gap.
    """
    assert profile is not None
    tzp = p.add(profile.timezone)
    L = qi("l__" + name)

    def off(instant: str) -> str:
        return f"(timezone({tzp}, timezone('UTC', {instant})) - {instant})"

    u1 = f"({L} - {off(f'({L} - INTERVAL 1 DAY)')})"
    u2 = f"({L} - {off(f'({L} + INTERVAL 1 DAY)')})"
    back = lambda u: f"(timezone({tzp}, timezone('UTC', {u})) = {L})"  # noqa: E731
    cand = (
        f"tzc_{name} AS (SELECT {prev}.*, {u1} AS _u1, {u2} AS _u2 FROM {prev})",
        f"tzv_{name} AS (SELECT tzc_{name}.*, {back('_u1')} AS _ok1, {back('_u2')} AS _ok2 FROM tzc_{name})",
    )
    policy = profile.ambiguous
    amb_flag = "(_ok1 AND _ok2 AND _u1 <> _u2)"
    # second pass through a repeated hour: the local clock went back among ambiguous rows
    order = (
        f"tzo_{name} AS (SELECT _rec, bool_or(_back) OVER (PARTITION BY _day ORDER BY _rec "
        f"ROWS BETWEEN UNBOUNDED PRECEDING AND CURRENT ROW) AS _second FROM (SELECT _rec, "
        f"CAST({L} AS DATE) AS _day, COALESCE({L} < lag({L}) OVER (PARTITION BY CAST({L} AS DATE) "
        f"ORDER BY _rec), false) AS _back FROM tzv_{name} WHERE {amb_flag}))"
    )
    if policy == "earlier":
        pick = "least(_u1, _u2)"
    elif policy == "later":
        pick = "greatest(_u1, _u2)"
    elif policy == "order":
        pick = "CASE WHEN COALESCE(o._second, false) THEN greatest(_u1, _u2) ELSE least(_u1, _u2) END"
    else:
        pick = "NULL"
    v = qi("v__" + name)
    g = qi("g__" + name)
    a = qi("a__" + name)
    final = (
        f"tz_{name} AS (SELECT t.* EXCLUDE (_u1, _u2, _ok1, _ok2), "
        f"CASE WHEN {amb_flag} THEN {pick} WHEN _ok1 THEN _u1 WHEN _ok2 THEN _u2 END AS {v}, "
        f"({L} IS NOT NULL AND NOT _ok1 AND NOT _ok2) AS {g}, "
        f"{'(' + amb_flag + ')' if policy == 'reject' else 'false'} AS {a} "
        f"FROM tzv_{name} t"
        + (f" LEFT JOIN tzo_{name} o USING (_rec))" if policy == "order" else ")")
    )
    out = list(cand)
    if policy == "order":
        out.append(order)
    out.append(final)
    return out


def _line_expr(con: duckdb.DuckDBPyConnection, src: _Source, scan: rd.FileScan) -> tuple[str, str]:
    """(join clause, line expression) turning record numbers into 1-based file lines.

    DuckDB's CSV reader skips blank lines and takes malformed lines out of the stream; both are
    counted back: with the sorted skipped lines s_1 < s_2 < ... (all after the header's h lines),
    record i sits on line ``h + i + #{j : i >= s_j - j - h + 1}``.
    """
    if src.fmt == "parquet":
        return "", "s._rec"
    skipped = set(scan.blank_lines)
    if src.fmt == "csv":
        try:
            rows = con.execute(f"SELECT DISTINCT line FROM {_CSV_REJ}").fetchall()
            skipped |= {int(r[0]) for r in rows}
        except Exception:
            pass
    h = src.header_lines
    skipped = {s for s in skipped if s > h}
    if not skipped:
        return "", f"(s._rec + {h})"
    ordered = sorted(skipped)
    thresholds = [(s - j - h + 1, j) for j, s in enumerate(ordered, start=1)]
    con.execute("CREATE OR REPLACE TEMP TABLE _tt_skip (t BIGINT, k BIGINT)")
    con.executemany("INSERT INTO _tt_skip VALUES (?, ?)", thresholds)
    return (
        " ASOF LEFT JOIN (SELECT t, max(k) AS k FROM _tt_skip GROUP BY t) sk ON s._rec >= sk.t",
        f"(s._rec + {h} + COALESCE(sk.k, 0))",
    )


# --------------------------------------------------------------------------------------------
# one file
# --------------------------------------------------------------------------------------------


def decide_kind(
    path: Path, profile: Profile | None, kind_opt: str | None, columns: tuple[str, ...] | None
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
        return _failed(con, shown, None, pname, "", started, None, f"cannot read the file ({exc.strerror}). Check the path and permissions.", dry_run), None
    if scan.size == 0:
        return _failed(con, shown, profile.kind if profile else kind_from_name(path.name) or kind, pname, scan.sha256, started, None, "the file is empty (0 bytes). Export it again.", dry_run), None
    if scan.truncated:
        return _failed(
            con, shown, profile.kind if profile else kind_from_name(path.name) or kind, pname,
            scan.sha256, started, scan.lines or None,
            f"the gzip data is truncated or corrupt ({scan.gzip_error}); the whole file is "
            "rejected, nothing was stored from it. Copy the file again from its source.",
            dry_run, None, _row_estimate(path, scan),
        ), None
    if not dry_run:
        prev = con.execute(
            "SELECT path, finished_at_utc FROM ingest_files WHERE sha256 = ? AND status = ? "
            "AND profile IS NOT DISTINCT FROM ? ORDER BY file_id LIMIT 1",
            [scan.sha256, STATUS_INGESTED, pname],
        ).fetchone()
        if prev:
            known_kind = profile.kind if profile else (kind_from_name(path.name) or kind)
            msg = f"same content as {prev[0]}, already ingested; nothing to do"
            con.execute(
                "INSERT INTO ingest_files (path, sha256, table_kind, profile, status, "
                "started_at_utc, finished_at_utc) VALUES (?, ?, ?, ?, ?, ?, ?)",
                [shown, scan.sha256, known_kind, pname, STATUS_ALREADY, started, utcnow()],
            )
            return FileReport(shown, known_kind, pname, STATUS_ALREADY, message=msg, sha256=scan.sha256), None
    try:
        if not dry_run:
            con.execute("BEGIN TRANSACTION")
        try:
            report, preview = _ingest_in_txn(con, path, shown, scan, profile, kind, dry_run, now_utc, started, preview_rows)
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
        return _failed(con, shown, guess, pname, scan.sha256, started, exc.line, exc.detail, dry_run, exc.field, _row_estimate(path, scan)), None
    finally:
        _drop_temps(con)


def _drop_temps(con: duckdb.DuckDBPyConnection) -> None:
    for t in (_STAGE, _CSV_REJ, _CSV_SCAN, "_tt_skip", "_tt_good", "_tt_new", "_tt_existing"):
        try:
            con.execute(f"DROP TABLE IF EXISTS {t}")
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
        shown, kind, pname, STATUS_FAILED, rows_read=rows, rows_rejected=rows, message=full,
        sha256=sha, file_id=file_id,
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
    p = _Params()
    src = _open_source(con, path, shown, scan, profile, p)
    kind_name = decide_kind(path, profile, kind_opt, src.columns)
    if kind_name is None:
        raise FileFailure(
            shown, 1 if src.fmt == "csv" else None,
            f"cannot tell which table this file feeds: its name does not start with one of "
            f"{', '.join(KINDS)} and its columns ({_list(src.columns)}) match no table. Rename it, "
            "give --kind, or read it with a profile.",
        )
    kind = KINDS[kind_name]
    mapped, constants, ignored = _resolve_columns(kind, src, profile, shown, path.name)
    stage_sql = _build_stage(kind, src, mapped, constants, profile, p, now_utc)
    try:
        con.execute(stage_sql, p.values)
    except Exception as exc:
        import duckdb

        if isinstance(exc, duckdb.Error):
            if "invalid state" in str(exc):
                raise FileFailure(
                    shown, None,
                    "the CSV reader cannot follow the file's structure, typically mixed line "
                    "endings (CRLF and LF lines in one file) or a quote that is never closed; "
                    "the whole file is rejected. Save it with one kind of line ending and "
                    "balanced quotes.",
                ) from None
            raise FileFailure(shown, None, f"cannot be read ({_short(exc)}). Check the file's format, delimiter and encoding.") from None
        raise
    join, line = _line_expr(con, src, scan)
    n_stage, n_bad = con.execute(f"SELECT count(*), count(*) FILTER (WHERE _bad) FROM {_STAGE}").fetchone()
    csv_rej = []
    if src.fmt == "csv":
        csv_rej = con.execute(
            f"SELECT line, any_value(column_name), any_value(error_type), any_value(csv_line) "
            f"FROM {_CSV_REJ} GROUP BY line ORDER BY line"
        ).fetchall()
    rows_read = int(n_stage) + len(csv_rej)
    if rows_read == 0 and not src.columns:
        raise FileFailure(shown, 1, "no header and no rows. Export the file again.")

    file_id = None
    if not dry_run:
        row = con.execute(
            "INSERT INTO ingest_files (path, sha256, table_kind, profile, status, started_at_utc) "
            "VALUES (?, ?, ?, ?, ?, ?) RETURNING file_id",
            [shown, scan.sha256, kind.name, profile.name if profile else None, STATUS_INGESTED, started],
        ).fetchone()
        file_id = int(row[0])

    # rejects: one row per failing check
    err_cols = [c for c in _stage_columns(con) if c.startswith(("e__", "x")) and "__" in c or c == "e___row"]
    unions = []
    for c in err_cols:
        fname = None if c == "e___row" else c.split("__", 1)[1]
        raw = f"left(s.{qi('r__' + fname)}, 1000)" if fname else "CAST(NULL AS VARCHAR)"
        fexpr = "CAST(NULL AS VARCHAR)" if fname is None else _qs(fname)
        unions.append(
            f"SELECT {line} AS line, {fexpr} AS field, {raw} AS raw_value, s.{qi(c)} AS reason "
            f"FROM {_STAGE} s {join} WHERE s._bad AND s.{qi(c)} IS NOT NULL"
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
                    [file_id, shown, int(r[0]), None, (r[3] or "")[:1000],
                     csv_reasons.get(str(r[2]), f"malformed line: {str(r[2]).lower()}; fix the line")]
                    for r in csv_rej
                ],
            )

    # good rows -> dedupe -> insert
    key = kind.key
    key_cols = ", ".join(qi(k) for k in key)
    cols = [f.name for f in kind.fields]
    derived = {c: qi(c) for c in cols}
    if kind.name == "exposures":
        derived["exposure_mas"] = "COALESCE(exposure_mas, tube_current_ma * exposure_time_s)"
        derived["exposure_time_s"] = "COALESCE(exposure_time_s, exposure_mas / tube_current_ma)"
        derived["arc_count"] = "COALESCE(arc_count, 0)"
    if kind.name == "downtime":
        derived["severity"] = "COALESCE(severity, 'hard_down')"
    sel = ", ".join(f"{derived[c]} AS {qi(c)}" for c in cols)
    # rank within the file only among keys that repeat (a hash aggregate finds them; the
    # common case of no repeats then needs no sort)
    con.execute(
        f"CREATE OR REPLACE TEMP TABLE _tt_good AS SELECT {line} AS _line, s._rec, {sel}, "
        f"1 AS _rank FROM {_STAGE} s {join} WHERE NOT s._bad"
    )
    has_rep = con.execute(
        f"SELECT count(*) FROM (SELECT 1 FROM _tt_good GROUP BY ALL_KEYS HAVING count(*) > 1)".replace(
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
    n_good, n_dup_in = con.execute("SELECT count(*), count(*) FILTER (WHERE _rank > 1) FROM _tt_good").fetchone()
    target = kind.table
    match = " AND ".join(f"e.{qi(k)} IS NOT DISTINCT FROM g.{qi(k)}" for k in key)
    if kind.upsert:
        same = " AND ".join(
            f"(g.{qi(c)} IS NULL OR e.{qi(c)} IS NOT DISTINCT FROM g.{qi(c)})" for c in cols
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
        prune = ""
        tc = kind.time_column
        if tc:
            lo, hi = con.execute(f"SELECT min({qi(tc)}), max({qi(tc)}) FROM _tt_good").fetchone()
            if lo is not None:
                # literal bounds (our own datetimes, not user text) so DuckDB prunes by zone maps
                prune = (
                    f" AND e.{qi(tc)} BETWEEN TIMESTAMP '{lo:%Y-%m-%d %H:%M:%S.%f}' "
                    f"AND TIMESTAMP '{hi:%Y-%m-%d %H:%M:%S.%f}'"
                )
        con.execute(
            f"CREATE OR REPLACE TEMP TABLE _tt_existing AS SELECT {key_cols} FROM {target} e "
            f"WHERE true{prune}"
        )
        con.execute(
            f"CREATE OR REPLACE TEMP TABLE _tt_new AS SELECT g.* FROM _tt_good g WHERE g._rank = 1 "
            f"AND NOT EXISTS (SELECT 1 FROM _tt_existing e WHERE {match})"
        )
        n_dup_store = con.execute(
            "SELECT count(*) FROM _tt_good WHERE _rank = 1"
        ).fetchone()[0] - con.execute("SELECT count(*) FROM _tt_new").fetchone()[0]
    n_new = con.execute("SELECT count(*) FROM _tt_new").fetchone()[0]
    n_dup = int(n_dup_in) + int(n_dup_store)
    assert int(n_good) == int(n_new) + n_dup

    if not dry_run:
        col_list = ", ".join(qi(c) for c in cols)
        extra_cols, extra_vals = ", source_file", ", ?"
        if kind.has_line:
            extra_cols += ", source_line"
            extra_vals += ", _line"
        if kind.name == "exposures":
            extra_cols += ", source_kind"
            extra_vals += ", 'log'"
        order = f" ORDER BY {qi(kind.time_column)}" if kind.time_column else ""
        conflict = ""
        if kind.upsert:
            sets = ", ".join(
                f"{qi(c)} = COALESCE(excluded.{qi(c)}, {target}.{qi(c)})" for c in cols if c not in key
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
            [rows_read, int(n_new), int(n_bad) + len(csv_rej), n_dup, utcnow(), file_id],
        )
    message = ""
    if ignored:
        message = f"ignored columns: {', '.join(ignored[:10])}" + (" ..." if len(ignored) > 10 else "")
    if rows_read == 0:
        message = (message + "; " if message else "") + "header only: no data rows"
    preview = None
    if dry_run and preview_rows:
        rows = con.execute(
            f"SELECT _line AS line, {', '.join(qi(c) for c in cols)} FROM _tt_good WHERE _rank = 1 ORDER BY _line LIMIT {int(preview_rows)}"
        ).df()
        rows = rows[[c for c in rows.columns if rows[c].notna().any()]]
        rej = con.execute(f"SELECT * FROM ({reject_sql}) ORDER BY line LIMIT {int(preview_rows)}").df()
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


def _stage_columns(con: duckdb.DuckDBPyConnection) -> list[str]:
    return [r[0] for r in con.execute(f"DESCRIBE {_STAGE}").fetchall()]


_ = (re, timedelta)
