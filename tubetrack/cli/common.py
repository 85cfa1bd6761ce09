"""Shared CLI options, output formatting and error handling.

stdout carries results only (table, JSON array of objects keyed by canonical column names, or CSV
with a header row); progress, warnings and errors go to stderr.
"""

from __future__ import annotations

import functools
import json
import math
import sys
from collections.abc import Callable, Iterable
from datetime import date, datetime
from enum import StrEnum
from pathlib import Path
from typing import TYPE_CHECKING, Annotated, Any, TypeVar

import typer

from tubetrack.errors import TubetrackError

if TYPE_CHECKING:  # pragma: no cover
    import pandas as pd


class OutputFormat(StrEnum):
    """Result formats every analysis answers in."""

    table = "table"
    json = "json"
    csv = "csv"


DbOption = Annotated[
    Path | None,
    typer.Option(
        "--db",
        envvar="TUBETRACK_DB",
        help="DuckDB store file. Default: $TUBETRACK_DB or ./tubetrack.duckdb.",
        show_default=False,
    ),
]
FormatOption = Annotated[
    OutputFormat,
    typer.Option("--format", "-f", help="Result format on stdout: table, json or csv."),
]
QuietOption = Annotated[
    bool, typer.Option("--quiet", "-q", help="No progress bars or summaries on stderr.")
]
AsOfOption = Annotated[
    str | None,
    typer.Option(
        "--as-of",
        help="Analyse as of this date (YYYY-MM-DD, UTC): only data before it is used. "
        "Default: the last data in the store.",
        show_default=False,
    ),
]
OutOption = Annotated[
    Path,
    typer.Option("--out", help="Output folder for files this command writes."),
]

SAFETY_NOTE = (
    "tubetrack is decision support. Service, calibration and tube replacement are done by "
    "qualified personnel following the manufacturer's procedures, local codes and "
    "radiation-protection regulations. Never postpone a repair the equipment itself calls for."
)

F = TypeVar("F", bound=Callable[..., Any])


def handle_errors(func: F) -> F:
    """Turn :class:`TubetrackError` into ``Error: ...`` on stderr and exit code 1."""

    @functools.wraps(func)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        try:
            return func(*args, **kwargs)
        except TubetrackError as exc:
            typer.echo(f"Error: {exc}", err=True)
            raise typer.Exit(1) from None

    return wrapper  # type: ignore[return-value]


def parse_as_of(value: str | None) -> datetime | None:
    """Parse ``--as-of`` (a date or an ISO datetime, UTC) into a naive UTC datetime."""
    if value is None:
        return None
    from tubetrack.errors import InputError

    try:
        parsed = datetime.fromisoformat(value)
    except ValueError:
        raise InputError(
            f"--as-of is {value!r}, not a date. Give it as YYYY-MM-DD (UTC)."
        ) from None
    if parsed.tzinfo is not None:
        from datetime import UTC

        parsed = parsed.astimezone(UTC).replace(tzinfo=None)
    return parsed


def stderr(message: str, quiet: bool = False) -> None:
    """Print a progress or summary line on stderr unless quiet."""
    if not quiet:
        typer.echo(message, err=True)


_FORMULA_START = ("=", "+", "-", "@", "\t", "\r")


def csv_safe_cell(value: Any) -> Any:
    """Neutralise spreadsheet formula injection: text starting with = + - @ gets a leading '.

    Numbers are left alone (a negative number is data, not a formula).
    """
    if isinstance(value, str) and value.startswith(_FORMULA_START):
        return "'" + value
    return value


def _json_default(value: Any) -> Any:
    if isinstance(value, datetime | date):
        return value.isoformat()
    if hasattr(value, "isoformat"):
        return value.isoformat()
    if hasattr(value, "item"):
        return value.item()
    return str(value)


def _clean(value: Any) -> Any:
    if isinstance(value, float) and (math.isnan(value) or math.isinf(value)):
        return None
    if value is None or isinstance(value, str | int | float | bool):
        return value
    try:
        import pandas as pd

        if value is pd.NaT or (not isinstance(value, str | bytes) and pd.isna(value) is True):
            return None
    except (TypeError, ValueError):
        pass
    if hasattr(value, "item") and not isinstance(value, str | bytes):
        try:
            return _clean(value.item())
        except (AttributeError, ValueError):
            return value
    if hasattr(value, "to_pydatetime"):
        return value.to_pydatetime().isoformat()
    if isinstance(value, datetime | date):
        return value.isoformat()
    return value


def records(frame: pd.DataFrame) -> list[dict[str, Any]]:
    """DataFrame -> list of JSON-ready dicts (NaN/NaT -> null, times -> ISO 8601)."""
    cols = list(frame.columns)
    return [
        {str(c): _clean(v) for c, v in zip(cols, row, strict=True)}
        for row in frame.itertuples(index=False, name=None)
    ]


def emit(
    frame: pd.DataFrame,
    fmt: OutputFormat,
    *,
    title: str | None = None,
    columns: Iterable[str] | None = None,
    float_digits: int = 3,
) -> None:
    """Write a result table to stdout in the chosen format.

    ``columns`` limits the *table* view to the most useful columns; JSON and CSV always carry
    every column.
    """
    if fmt is OutputFormat.json:
        sys.stdout.write(json.dumps(records(frame), default=_json_default, indent=1) + "\n")
        return
    if fmt is OutputFormat.csv:
        safe = frame.copy()
        for col in safe.columns:
            if safe[col].dtype == object or str(safe[col].dtype).startswith("string"):
                safe[col] = safe[col].map(csv_safe_cell)
        safe.to_csv(sys.stdout, index=False)
        return
    view = frame if columns is None else frame[[c for c in columns if c in frame.columns]]
    _print_table(list(view.columns), view.itertuples(index=False, name=None), title, float_digits)


def emit_rows(
    rows: list[dict[str, Any]],
    all_columns: Iterable[str],
    fmt: OutputFormat,
    *,
    title: str | None = None,
    columns: Iterable[str] | None = None,
    float_digits: int = 3,
) -> None:
    """:func:`emit` for plain rows of str/int/float/None values, without importing pandas.

    For commands whose start-up matters (a one-day ingest); same JSON, CSV and table output as
    :func:`emit` of the equivalent DataFrame.
    """
    cols = list(all_columns)
    plain = [{c: _clean(r.get(c)) for c in cols} for r in rows]  # plain values: no pandas
    if fmt is OutputFormat.json:
        sys.stdout.write(json.dumps(plain, default=_json_default, indent=1) + "\n")
        return
    if fmt is OutputFormat.csv:
        import csv

        w = csv.writer(sys.stdout, lineterminator="\n")
        w.writerow(cols)
        w.writerows([["" if r[c] is None else csv_safe_cell(r[c]) for c in cols] for r in plain])
        return
    shown = cols if columns is None else [c for c in columns if c in cols]
    _print_table(shown, ([r[c] for c in shown] for r in plain), title, float_digits)


def _print_table(
    cols: list[Any], rows: Iterable[Iterable[Any]], title: str | None, float_digits: int
) -> None:
    from rich.console import Console
    from rich.table import Table
    from rich.text import Text

    table = Table(title=title, show_lines=False, header_style="bold")
    for col in cols:
        table.add_column(str(col), overflow="fold")
    for row in rows:
        cells = []
        for v in row:
            v = _clean(v)
            if v is None:
                cells.append(Text("-"))
            elif isinstance(v, float):
                cells.append(Text(f"{v:.{float_digits}g}" if abs(v) < 1e-3 or abs(v) >= 1e6 else f"{v:,.{float_digits}f}"))
            else:
                # Text(...) never interprets rich markup: strings from logs stay inert.
                cells.append(Text(str(v)))
        table.add_row(*cells)
    console = Console()
    # On a terminal use its width; piped or captured output gets room for wide tables.
    width = console.width if console.is_terminal else 200
    Console(soft_wrap=False, width=max(100, width)).print(table)
