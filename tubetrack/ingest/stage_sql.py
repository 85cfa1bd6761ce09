"""The SQL that converts text cells to canonical values and gives one reason column per check.

Built from :mod:`tubetrack.ingest.layout` (types, required columns), the profile (units, value
maps, decimal comma, time formats and zone) and :mod:`tubetrack.ingest.validate` (ranges). Values
from files and profiles are bound parameters (:class:`Params`); identifiers are quoted.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime
from typing import TYPE_CHECKING

from tubetrack.ingest import reader as rd
from tubetrack.ingest.layout import Field, Kind
from tubetrack.ingest.profiles import Profile
from tubetrack.ingest.source import CSV_REJ, STAGE, Params, Source
from tubetrack.ingest.validate import range_reason_sql, time_reason_sql
from tubetrack.store import quote_ident as qi

if TYPE_CHECKING:  # pragma: no cover
    import duckdb

#: Cell texts read as true / false in a bool column (lower-cased).
_TRUE = ("true", "t", "yes", "y", "1", "ja", "x")
_FALSE = ("false", "f", "no", "n", "0", "nein", "")

# --------------------------------------------------------------------------------------------
# SQL builders
# --------------------------------------------------------------------------------------------


def _raw_expr(
    f: Field,
    src: Source,
    mapped: dict[str, tuple[str, ...]],
    constants: dict[str, str],
    p: Params,
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
        expr = (
            parts[0]
            if len(parts) == 1
            else f"NULLIF(concat_ws(' ', {', '.join(parts)}), '')"
        )
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


def _mapped_expr(f: Field, raw: str, profile: Profile | None, p: Params) -> str:
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


def sql_text(text: str) -> str:
    """SQL string literal for text WE wrote (messages), never for data."""
    return "'" + text.replace("'", "''") + "'"


@dataclass
class _Plan:
    """SQL pieces per field, filled by :func:`build_stage`."""

    selects_a: list[str] = field(default_factory=list)  # raw + mapped text
    selects_b: list[str] = field(default_factory=list)  # typed values
    errs: dict[str, str] = field(
        default_factory=dict
    )  # field -> reason SQL (over typed cols)
    extra_errs: list[tuple[str, str]] = field(
        default_factory=list
    )  # (field, reason SQL)
    local_ts: list[str] = field(
        default_factory=list
    )  # timestamp fields needing tz resolution


def build_stage(
    kind: Kind,
    src: Source,
    mapped: dict[str, tuple[str, ...]],
    constants: dict[str, str],
    profile: Profile | None,
    p: Params,
    now_utc: datetime,
) -> str:
    """The CREATE TEMP TABLE statement for the staging table of one file."""
    decimal = profile.decimal if profile else "."
    tz = profile.timezone if profile else "UTC"
    formats = profile.time_formats if profile else ()
    plan = _Plan()
    present = (
        set(mapped)
        | {k for k in constants if not k.startswith("__capture__")}
        | {
            k.removeprefix("__capture__")
            for k in constants
            if k.startswith("__capture__")
        }
    )
    for f in kind.fields:
        raw = _raw_expr(f, src, mapped, constants, p)
        plan.selects_a.append(f"{raw} AS {qi('r__' + f.name)}")
        plan.selects_a.append(
            f"{_mapped_expr(f, raw, profile, p)} AS {qi('m__' + f.name)}"
        )
        m = qi("m__" + f.name)
        r = qi("r__" + f.name)
        v = qi("v__" + f.name)
        shown_raw = f"'\"' || {r} || '\"'"
        required = f"WHEN {m} IS NULL THEN " + (
            sql_text(
                f"required: {f.name} is empty; fill it in or the row stays in rejects"
            )
            if f.required
            else "NULL"
        )
        if f.type == "number":
            factor = profile.unit_factor(f.name) if profile else 1.0
            val = _number_expr(m, decimal)
            if factor != 1.0:
                val = f"({val} * {factor!r})"
            plan.selects_b.append(f"{val} AS {v}")
            if decimal == ",":
                nan_hint = (
                    sql_text(f"not a number: {f.name} is ")
                    + f" || {shown_raw} || "
                    + sql_text("; fix the row")
                )
            else:
                nan_hint = (
                    f"CASE WHEN regexp_matches({m}, '^[+-]?[0-9]+,[0-9]+$') THEN "
                    + sql_text(f"not a number: {f.name} is ")
                    + f" || {shown_raw} || "
                    + sql_text(
                        ', which looks like a decimal comma; use a point, or read the file with a profile that sets decimal = ","'
                    )
                    + " ELSE "
                    + sql_text(f"not a number: {f.name} is ")
                    + f" || {shown_raw} || "
                    + sql_text("; fix the row")
                    + " END"
                )
            rng = range_reason_sql(kind, f.name, v, shown_raw)
            plan.errs[f.name] = (
                f"CASE {required} WHEN {v} IS NULL THEN {nan_hint} ELSE {rng} END"
            )
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
                + sql_text(f"not a number: {f.name} is ")
                + f" || {shown_raw} || "
                + sql_text("; give a whole number")
                + f" WHEN {v} IS NULL THEN "
                + sql_text(f"not a whole number: {f.name} is ")
                + f" || {shown_raw} || "
                + sql_text("; give a whole number")
                + f" ELSE {rng} END"
            )
        elif f.type == "bool":
            trues = ", ".join(sql_text(x) for x in _TRUE)
            falses = ", ".join(sql_text(x) for x in _FALSE if x)
            plan.selects_b.append(
                f"(CASE WHEN {m} IS NULL THEN false WHEN lower({m}) IN ({trues}) THEN true "
                f"WHEN lower({m}) IN ({falses}) THEN false END) AS {v}"
            )
            plan.errs[f.name] = (
                f"CASE WHEN {m} IS NOT NULL AND {v} IS NULL THEN "
                + sql_text(f"bad value: {f.name} is ")
                + f" || {shown_raw} || "
                + sql_text("; allowed: true, false (also yes/no, 1/0)")
                + " END"
            )
        elif f.type == "enum":
            choices = ", ".join(sql_text(c) for c in f.choices)
            plan.selects_b.append(f"lower({m}) AS {v}")
            hint = (
                f"; map the file's codes to these in the profile ([values.{f.name}])"
                if f.name in (profile.values if profile else {}) or profile
                else f"; map other codes with a profile ([values.{f.name}])"
            )
            plan.errs[f.name] = (
                f"CASE {required} WHEN {v} NOT IN ({choices}) THEN "
                + sql_text(f"bad value: {f.name} is ")
                + f" || {shown_raw} || "
                + sql_text(f"; allowed: {', '.join(f.choices)}{hint}")
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
                + sql_text(
                    "required: neither exposure_time_s nor exposure_mas is given; give one of them"
                )
                + " END",
            )
        )
    if kind.name == "downtime":
        plan.extra_errs.append(
            (
                "end_utc",
                f"CASE WHEN {qi('v__end_utc')} < {qi('v__start_utc')} THEN "
                + sql_text("end before start: end_utc ")
                + f" || '\"' || {qi('r__end_utc')} || '\"' || "
                + sql_text(" is before start_utc ")
                + f" || '\"' || {qi('r__start_utc')} || '\"' || "
                + sql_text("; fix the row")
                + " END",
            )
        )
    if kind.name == "tubes":
        plan.extra_errs.append(
            (
                "removed_at_utc",
                f"CASE WHEN {qi('v__removed_at_utc')} < {qi('v__installed_at_utc')} THEN "
                + sql_text("removed before installed: removed_at_utc ")
                + f" || '\"' || {qi('r__removed_at_utc')} || '\"' || "
                + sql_text(" is before installed_at_utc; fix the row")
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
    err_names = (
        ["e___row"]
        + [f"e__{n}" for n in plan.errs]
        + [f"x{i}__{n}" for i, (n, _) in enumerate(plan.extra_errs)]
    )
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
        f"CREATE OR REPLACE TEMP TABLE {STAGE} AS WITH {', '.join(ctes)} "
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
    p: Params,
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
            + sql_text(f"non-existent local time: {f.name} is ")
            + f" || {shown_raw} || "
            + sql_text(
                f", inside the spring-forward gap of {tz} (clocks skip this hour); fix the generator clock or the row"
            )
            + f" WHEN {qi('a__' + f.name)} THEN "
            + sql_text(f"ambiguous local time: {f.name} is ")
            + f" || {shown_raw} || "
            + sql_text(
                f', which occurs twice at the autumn change in {tz}; set time.ambiguous = "earlier" or "later" in the profile'
            )
        )
        # the parse check must look at the local value, v__ is NULL for gaps
    parse_col = qi("l__" + f.name) if local_err else v
    plan.errs[f.name] = (
        f"CASE {required} WHEN {parse_col} IS NULL THEN "
        + sql_text(f"bad timestamp: {f.name} is ")
        + f" || {shown_raw} || "
        + sql_text(f"; expected {expect}")
        + f" {local_err} ELSE {time_reason_sql(f.name, v, shown_raw, now_utc)} END"
    )


def _tz_ctes(name: str, prev: str, profile: Profile | None, p: Params) -> list[str]:
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


def line_expr(
    con: duckdb.DuckDBPyConnection,
    src: Source,
    scan: rd.FileScan,
    csv_rejects: bool = True,
) -> tuple[str, str]:
    """(join clause, line expression) turning record numbers into 1-based file lines.

    DuckDB's CSV reader skips blank lines and takes malformed lines out of the stream; both are
    counted back: with the sorted skipped lines s_1 < s_2 < ... (all after the header's h lines),
    record i sits on line ``h + i + #{j : i >= s_j - j - h + 1}``. ``csv_rejects=False``: the
    file was read strictly (no reject table), only blank lines are skipped.
    """
    if src.fmt == "parquet":
        return "", "s._rec"
    skipped = set(scan.blank_lines)
    if src.fmt == "csv" and csv_rejects:
        try:
            rows = con.execute(f"SELECT DISTINCT line FROM {CSV_REJ}").fetchall()
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
# fast path: our open layout read typed, checked by one filter expression
# --------------------------------------------------------------------------------------------

#: Message of the error the fast path raises on the first row that needs the per-field path.
FAST_MISS = "tubetrack-fast-path: a row needs the per-field check"


def fast_types(kind: Kind, mapped: dict[str, tuple[str, ...]]) -> dict[str, str]:
    """DuckDB type per file column for the typed read (numbers as DOUBLE, the rest as text)."""
    out = {}
    for f in kind.fields:
        cols = mapped.get(f.name)
        if cols and len(cols) == 1 and f.type in ("number", "integer"):
            out[cols[0]] = "DOUBLE"
    return out


def build_fast_select(
    kind: Kind,
    mapped: dict[str, tuple[str, ...]],
    typed_from: str,
    join: str,
    line: str,
    now_utc: datetime,
    fluoro: bool,
    carry: str = "",
) -> str:
    """SELECT of the canonical values of an open-layout CSV read with :func:`fast_types`.

    The values are exactly those :func:`build_stage` gives (same conversions, the text cells
    trimmed the same way); every check of :func:`build_stage` is folded into one boolean, and a row
    failing it raises ``FAST_MISS`` (``error()``), so the caller redoes the file on the per-field
    path, which names each reason. Columns: ``_line`` then the kind's fields (then ``_file``, the
    SQL expression ``carry``, when given).

    Three levels: the cells (trimmed text, numbers as read), the converted values, then the check.
    A range test also rejects NaN and infinities (DuckDB orders NaN above every number), and a
    NULL anywhere in the check (a required value missing) fails it too.
    """
    from tubetrack.ingest.validate import (
        FLUORO_MAX_EXPOSURE_TIME_S,
        FUTURE_SLACK_H,
        MIN_TIMESTAMP_UTC,
        RANGES,
    )

    cells: list[str] = []  # level 1: m__ (trimmed text) / d__ (number as read)
    vals: list[str] = []  # level 2: v__
    oks: list[str] = []  # level 3: one boolean per check
    limit = now_utc.replace(microsecond=0)
    for f in kind.fields:
        cols = mapped.get(f.name)
        raw = f"s.{qi(cols[0])}" if cols else "CAST(NULL AS VARCHAR)"
        v = qi("v__" + f.name)
        if f.type in ("number", "integer"):
            d = qi("d__" + f.name)
            cells.append(f"{raw if cols else 'CAST(NULL AS DOUBLE)'} AS {d}")
            rng = RANGES.get(f.name)
            if rng is not None:
                high = repr(float(rng.high))
                if f.name == "exposure_time_s" and kind.name == "exposures" and fluoro:
                    high = (
                        f"(CASE WHEN COALESCE({qi('v__system_id')} IN (SELECT system_id FROM "
                        f"systems WHERE modality = 'fluoroscopy'), false) THEN "
                        f"{float(FLUORO_MAX_EXPOSURE_TIME_S)!r} ELSE {high} END)"
                    )
                good = f"{v} >= {float(rng.low)!r} AND {v} <= {high}"
            else:
                good = f"isfinite({v})"
            if f.type == "number":
                vals.append(f"{d} AS {v}")
            else:
                vals.append(
                    f"(CASE WHEN isfinite({d}) AND {d} = round({d}) AND abs({d}) < 2147483647 "
                    f"THEN CAST({d} AS INTEGER) END) AS {v}"
                )
                good = f"{v} IS NOT NULL AND {good}"
            oks.append(f"({good})" if f.required else f"({d} IS NULL OR ({good}))")
            continue
        m = qi("m__" + f.name)
        cells.append(f"NULLIF(trim({raw}), '') AS {m}")
        if f.type == "bool":
            trues = ", ".join(sql_text(x) for x in _TRUE)
            falses = ", ".join(sql_text(x) for x in _FALSE if x)
            vals.append(
                f"(CASE WHEN {m} IS NULL THEN false WHEN lower({m}) IN ({trues}) THEN true "
                f"WHEN lower({m}) IN ({falses}) THEN false END) AS {v}"
            )
            oks.append(f"({m} IS NULL OR {v} IS NOT NULL)")
        elif f.type == "enum":
            choices = ", ".join(sql_text(c) for c in f.choices)
            vals.append(f"lower({m}) AS {v}")
            good = f"{v} IN ({choices})"
            oks.append(f"({good})" if f.required else f"({v} IS NULL OR {good})")
        elif f.type in ("id", "text"):
            vals.append(f"{m} AS {v}")
            if f.required:
                oks.append(f"({v} IS NOT NULL)")
        elif f.type == "timestamp":
            # the per-field path's expression; a trailing Z cannot match its offset pattern,
            # so those cells go straight to the cast
            vals.append(
                f"(CASE WHEN ends_with({m}, 'Z') THEN TRY_CAST({m} AS TIMESTAMP) "
                f"WHEN length({m}) > 10 AND regexp_matches({m}, '[+-][0-9]{{2}}(:?[0-9]{{2}})?$') "
                f"THEN timezone('UTC', TRY_CAST({m} AS TIMESTAMPTZ)) "
                f"ELSE TRY_CAST({m} AS TIMESTAMP) END) AS {v}"
            )
            good = (
                f"{v} >= TIMESTAMP '{MIN_TIMESTAMP_UTC:%Y-%m-%d %H:%M:%S}' AND "
                f"{v} <= TIMESTAMP '{limit:%Y-%m-%d %H:%M:%S}' + INTERVAL "
                f"{int(FUTURE_SLACK_H * 3600)} SECOND"
            )
            oks.append(f"({good})" if f.required else f"({m} IS NULL OR ({good}))")
        else:  # pragma: no cover
            raise AssertionError(f.type)
    if kind.name == "exposures":
        oks.append(
            f"({qi('v__exposure_time_s')} IS NOT NULL OR {qi('v__exposure_mas')} IS NOT NULL)"
        )
    if kind.name == "downtime":
        oks.append(f"COALESCE(NOT ({qi('v__end_utc')} < {qi('v__start_utc')}), true)")
    if kind.name == "tubes":
        oks.append(
            f"COALESCE(NOT ({qi('v__removed_at_utc')} < {qi('v__installed_at_utc')}), true)"
        )
    ok = " AND ".join(oks) or "true"
    if carry:
        cells.append(f"{carry} AS _file")
    level1 = f"SELECT {line} AS _line0, {', '.join(cells)} FROM {typed_from} s {join}"
    level2 = f"SELECT _line0, {', '.join(vals)}, * EXCLUDE (_line0) FROM ({level1}) c"
    outs = ", ".join(f"{qi('v__' + f.name)} AS {qi(f.name)}" for f in kind.fields)
    if carry:
        outs += ", _file"
    return (
        f"SELECT CASE WHEN {ok} THEN _line0 ELSE error({sql_text(FAST_MISS)}) END AS _line, "
        f"{outs} FROM ({level2}) t"
    )
