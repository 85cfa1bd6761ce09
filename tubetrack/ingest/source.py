"""Reading a file's cells: the DuckDB table function per format, the header, and which file
column feeds which canonical column (our open layout or a profile's ``[columns]``).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

from tubetrack.errors import InputError
from tubetrack.ingest import reader as rd
from tubetrack.ingest.layout import Kind
from tubetrack.ingest.profiles import Profile
from tubetrack.store import quote_ident as qi

if TYPE_CHECKING:  # pragma: no cover
    import duckdb

#: Largest line the CSV reader accepts [bytes]; longer lines become rejects.
MAX_LINE_BYTES = 1 << 20
#: Temporary tables of one file's ingest (dropped after each file).
STAGE = "_tt_stage"
CSV_REJ = "_tt_csv_rej"
CSV_SCAN = "_tt_csv_scan"


class FileFailure(InputError):
    """The whole file cannot be read; ``line`` and ``field`` say where."""

    def __init__(
        self, path: str, line: int | None, message: str, field: str | None = None
    ):
        where = f"{path} line {line}" if line else path
        super().__init__(f"{where}: {message}")
        self.path, self.line, self.field, self.detail = path, line, field, message


@dataclass
class Params:
    """Named SQL parameters collected while building a statement (values always bound)."""

    values: dict[str, Any] = field(default_factory=dict)

    def add(self, value: Any) -> str:
        name = f"p{len(self.values)}"
        self.values[name] = value
        return f"${name}"


# --------------------------------------------------------------------------------------------
# source: the DuckDB table function that reads the file as text cells
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Source:
    sql: str  # FROM-clause item yielding _rec (1-based record number) + text columns
    columns: tuple[str, ...]  # column names in the file (JSON: keys)
    fmt: str
    header_lines: int  # lines before the first record (CSV header = 1)
    json: bool = False
    csv_path: str = ""  # bound parameter holding the path (CSV only)
    csv_opts: tuple[
        str, ...
    ] = ()  # read_csv options shared by the text and typed readers


def open_source(
    con: duckdb.DuckDBPyConnection,
    path: Path,
    shown: str,
    scan: rd.FileScan,
    profile: Profile | None,
    p: Params,
) -> Source:
    fmt = rd.detect_format(path, scan.head, profile.format if profile else None)
    ppath = p.add(str(path))
    if fmt == "parquet":
        sql = f"(SELECT file_row_number + 1 AS _rec, * EXCLUDE (file_row_number) FROM read_parquet({ppath}, file_row_number=true))"
        try:
            cols = [
                r[0]
                for r in con.execute(
                    f"DESCRIBE SELECT * FROM {sql}", p.values
                ).fetchall()
            ]
        except Exception as exc:
            raise FileFailure(
                shown,
                None,
                f"not a readable Parquet file ({short_error(exc)}). Re-export the file.",
            ) from None
        cols = [c for c in cols if c != "_rec"]
        return Source(sql, tuple(cols), fmt, 0)
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
            raise FileFailure(
                shown,
                None,
                f"not readable as JSON Lines ({short_error(exc)}). Check the file.",
            ) from None
        return Source(sql, tuple(sorted(k[0] for k in keys)), fmt, 0, json=True)
    # CSV / TSV / text: header and delimiter decided here, rows parsed by DuckDB (RFC 4180
    # quoting) with the sniffer off, so a malformed or over-long line becomes a reject row
    # instead of stopping the file.
    enc = profile.encoding if profile else "utf-8"
    header = _header_text(scan.head, enc)
    if not header.strip():
        raise FileFailure(
            shown,
            1,
            "the first line is empty; it must be the header row with the column names. Remove the empty lines at the top.",
        )
    if profile is not None and profile.delimiter:
        delim = profile.delimiter
    elif rd.base_suffix(path) == ".tsv":
        delim = "\t"
    else:
        delim = _guess_delimiter(header)
    cols = _split_header(header, delim)
    internal = {f"c{i}": "VARCHAR" for i in range(len(cols))}
    base = [
        f"delim={p.add(delim)}",
        "quote='\"'",
        "escape='\"'",
        "header=true",
        "auto_detect=false",
        f"max_line_size={MAX_LINE_BYTES}",
        f"compression='{'gzip' if scan.gzip else 'none'}'",
    ]
    if enc != "utf-8":
        base.append(f"encoding={p.add(enc)}")
    opts = [
        *base,
        f"columns={p.add(internal)}",
        "ignore_errors=true",
        "store_rejects=true",
        f"rejects_table='{CSV_REJ}'",
        f"rejects_scan='{CSV_SCAN}'",
    ]
    inner = f"read_csv({ppath}, {', '.join(opts)})"
    renames = ", ".join(f"c{i} AS {qi(c)}" for i, c in enumerate(_dedupe(cols)))
    sql = f"(SELECT row_number() OVER () AS _rec, {renames} FROM {inner})"
    return Source(
        sql, tuple(_dedupe(cols)), "csv", 1, csv_path=ppath, csv_opts=tuple(base)
    )


def typed_csv_sql(
    src: Source,
    types: dict[str, str],
    p: Params,
    paths: list[Path] | None = None,
    numbered: bool = True,
) -> str:
    """FROM item reading a CSV source with DuckDB types per column (``types``: file column ->
    SQL type, VARCHAR when absent), strictly: any malformed line or cell that does not convert
    raises instead of becoming a reject (the caller then takes the per-field path).

    ``p`` must be the :class:`Params` the source was opened with (its path and options are bound
    there). ``paths``: read these files (all with the source's header) instead, in this order,
    with their path in column ``_fname`` and ``_rec`` counting across them. ``numbered=False``
    leaves out ``_rec``: its ``row_number() OVER ()`` keeps the whole scan on one thread, so a
    caller that can number the rows otherwise (a scan-ordered table's row ids) reads in parallel.
    """
    assert src.fmt == "csv" and src.csv_path
    internal = {f"c{i}": types.get(c, "VARCHAR") for i, c in enumerate(src.columns)}
    opts = [*src.csv_opts, f"columns={p.add(internal)}", "ignore_errors=false"]
    renames = ", ".join(f"c{i} AS {qi(c)}" for i, c in enumerate(src.columns))
    where = src.csv_path
    cols = ["row_number() OVER () AS _rec"] if numbered else []
    if paths is not None:
        # several files of one header in one scan; _fname tells which file a row came from
        where = p.add([str(x) for x in paths])
        opts.append("filename=true")
        cols.append("filename AS _fname")
    cols.append(renames)
    return f"(SELECT {', '.join(cols)} FROM read_csv({where}, {', '.join(opts)}))"


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


def short_error(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0][:300] if text else type(exc).__name__


# --------------------------------------------------------------------------------------------
# mapping: which source feeds each canonical field
# --------------------------------------------------------------------------------------------


def resolve_columns(
    kind: Kind, src: Source, profile: Profile | None, shown: str, file_name: str
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
                        shown,
                        1 if src.fmt == "csv" else None,
                        f'column "{c}" (mapped to {name} by profile {profile.name}) is not in the '
                        f"file; columns found: {list_columns(src.columns)}. Fix [columns] in {profile.path}, "
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
        have = (
            f.name in mapped
            or f.name in constants
            or f"__capture__{f.name}" in constants
        )
        if f.required and not have:
            raise FileFailure(
                shown,
                1 if src.fmt == "csv" else None,
                _missing_msg(kind, f.name, src, profile),
                f.name,
            )
    for group in kind.one_of:
        if not any(g in mapped or g in constants for g in group):
            names = " or ".join(group)
            raise FileFailure(
                shown,
                1 if src.fmt == "csv" else None,
                f"missing required column {names} (one of them is needed); columns found: "
                f"{list_columns(src.columns)}. Add the column, or map it in a profile.",
                group[0],
            )
    used = {c for cols in mapped.values() for c in cols}
    ignored = [c for c in src.columns if c not in used]
    return mapped, constants, ignored


def list_columns(cols: tuple[str, ...] | list[str], limit: int = 12) -> str:
    shown = ", ".join(f'"{c}"' for c in list(cols)[:limit])
    return (
        shown + (f", ... ({len(cols)} in all)" if len(cols) > limit else "")
        if cols
        else "(none)"
    )


def _missing_msg(kind: Kind, name: str, src: Source, profile: Profile | None) -> str:
    if len(src.columns) == 1 and src.fmt == "csv":
        col = src.columns[0]
        for d in (";", "|", "\t", ",", ":"):
            if d in col:
                shown = "\\t" if d == "\t" else d
                return (
                    f'only one column found, the header is "{col[:120]}"; the delimiter looks like '
                    f'"{shown}", which was not detected. Give it in a profile (delimiter = "{shown}").'
                )
        return (
            f'only one column found ("{col[:120]}"); missing required column "{name}". '
            "Check the delimiter and the header row."
        )
    hint = (
        f'map it in {profile.path} ([columns] {name} = "<column in the file>")'
        if profile
        else f'rename the file\'s column to "{name}", or map it with a profile ([columns] {name} = "...")'
    )
    return (
        f'missing required column "{name}" for the {kind.name} table; columns found: '
        f"{list_columns(src.columns)}. Add the column, or {hint}."
    )
