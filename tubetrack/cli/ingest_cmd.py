"""``tubetrack ingest``, ``peek``, ``profiles`` and ``status``: logs into the store, and what it holds."""

from __future__ import annotations

import sys
from enum import Enum
from pathlib import Path
from typing import TYPE_CHECKING, Annotated, Any

import typer

from tubetrack.cli.common import (
    DbOption,
    FormatOption,
    OutputFormat,
    QuietOption,
    emit,
    emit_rows,
    handle_errors,
    stderr,
)
from tubetrack.ingest.report import REPORT_COLUMNS

if TYPE_CHECKING:  # pragma: no cover
    from tubetrack.ingest.pipeline import IngestSummary
    from tubetrack.ingest.report import FileReport


class KindChoice(str, Enum):  # noqa: UP042  (same pattern as OutputFormat)
    """Table kinds a log file can feed."""

    exposures = "exposures"
    calibrations = "calibrations"
    events = "events"
    downtime = "downtime"
    systems = "systems"
    tubes = "tubes"


ProfileOption = Annotated[
    str | None,
    typer.Option(
        "--profile",
        "-p",
        help="Layout profile: a TOML file or a built-in profile name (see `tubetrack profiles`). "
        "Default: the open layout, plus FOLDER/profiles/*.toml for files their globs match.",
        show_default=False,
    ),
]
KindOption = Annotated[
    KindChoice | None,
    typer.Option(
        "--kind",
        help="Table kind for files whose name does not start with one "
        "(exposures, calibrations, events, downtime, systems, tubes). Default: from the header.",
        show_default=False,
    ),
]

_TABLE_COLUMNS = (
    "path",
    "kind",
    "profile",
    "status",
    "rows_read",
    "rows_accepted",
    "rows_rejected",
    "rows_duplicate",
)


class _RichProgress:
    """Files and rows bars on stderr (rich); used only when stderr is a terminal."""

    def __init__(self) -> None:
        from rich.console import Console
        from rich.progress import (
            BarColumn,
            DownloadColumn,
            Progress,
            TextColumn,
            TimeElapsedColumn,
        )

        self._progress = Progress(
            TextColumn("{task.description}"),
            BarColumn(),
            DownloadColumn(),
            TextColumn("{task.fields[files]}"),
            TextColumn("{task.fields[rows]}"),
            TimeElapsedColumn(),
            console=Console(file=sys.stderr),
            transient=True,
        )
        self._task: Any = None
        self._files = 0
        self._total_files = 0
        self._rows = 0
        self._sizes: dict[str, int] = {}
        self._order: list[str] = []  # paths in the order they were started
        self._advanced = 0  # how many of them the bar has already counted

    def __enter__(self) -> _RichProgress:
        self._progress.__enter__()
        return self

    def __exit__(self, *exc: Any) -> None:
        self._progress.__exit__(*exc)

    def start(self, total_files: int, total_bytes: int) -> None:
        self._total_files = total_files
        self._task = self._progress.add_task(
            "ingest", total=max(total_bytes, 1), files="", rows=""
        )
        self._update("")

    def file_started(self, path: str, size_bytes: int) -> None:
        self._sizes[path] = size_bytes
        self._order.append(path)
        self._update(Path(path).name)

    def dicom_advance(self, done: int, total: int) -> None:
        """The DICOM reader calls this as it starts each file of a batch (``done`` files read
        so far; their reports come back only when the batch is stored): move the bar by the
        bytes of every file started before this one."""
        if self._task is None:
            return
        while self._advanced < len(self._order) - 1:
            path = self._order[self._advanced]
            self._advanced += 1
            self._progress.advance(self._task, self._sizes.pop(path, 0))
        self._progress.update(
            self._task, files=f"files {self._files + done}/{self._total_files}"
        )

    def file_done(self, report: FileReport) -> None:
        self._files += 1
        self._rows += int(report.rows_read)
        self._progress.advance(self._task, self._sizes.pop(report.path, 0))
        self._update("")

    def _update(self, name: str) -> None:
        if self._task is None:
            return
        self._progress.update(
            self._task,
            description=f"ingest {name[:40]}".strip(),
            files=f"files {self._files}/{self._total_files}",
            rows=f"rows {self._rows:,}",
        )


def _progress_for(quiet: bool) -> Any:
    if quiet or not sys.stderr.isatty():
        return None
    return _RichProgress()


#: DuckDB memory limit for an ingest run: staging tables beyond it spill to ``<store>.tmp``, so a
#: file larger than memory streams. Measured: a 2,000,000-row (127 MB) CSV peaks at 0.72 GB RSS
#: with a 600 MB limit and 1.5 GB without one, at the same speed. Override: TUBETRACK_INGEST_MEMORY.
INGEST_MEMORY_LIMIT = "1GB"


def _open_for(db: Path | None, dry_run: bool) -> Any:
    import os

    from tubetrack import store

    if dry_run:
        target = store.default_db_path() if db is None else db
        if str(target) == ":memory:" or not Path(target).exists():
            con = store.connect(":memory:")
        else:
            con = store.connect(target, read_only=True)
    else:
        con = store.connect(db)
    limit = os.environ.get("TUBETRACK_INGEST_MEMORY", INGEST_MEMORY_LIMIT)
    try:
        con.execute("SELECT current_setting('memory_limit')")
        con.execute(f"SET memory_limit = {store_literal(limit)}")
    except Exception as exc:  # a malformed override
        con.close()
        from tubetrack.errors import InputError

        raise InputError(
            f"TUBETRACK_INGEST_MEMORY is {limit!r}, not a memory size. Give it like 2GB or 512MB."
        ) from exc
    return con


def store_literal(text: str) -> str:
    """SQL string literal (SET takes no bound parameters)."""
    return "'" + text.replace("'", "''") + "'"


_MAX_TABLE_FILES = 20


_COUNTS = ("files", "rows_read", "rows_accepted", "rows_rejected", "rows_duplicate")
_BY_FOLDER_COLUMNS = ("folder", "kind", "status", *_COUNTS)


def _by_folder(rows: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """Per-file ingest rows -> one row per (folder, kind, status) with summed counts, sorted
    (a missing kind last)."""
    out: dict[tuple[str, Any, str], dict[str, Any]] = {}
    for r in rows:
        key = (str(Path(r["path"]).parent), r.get("kind"), r.get("status"))
        acc = out.setdefault(key, {"folder": key[0], "kind": key[1], "status": key[2],
                                   **dict.fromkeys(_COUNTS, 0)})
        acc["files"] += 1
        for c in _COUNTS[1:]:
            acc[c] += int(r.get(c) or 0)

    def order(k: tuple[str, Any, str]) -> tuple:
        return (k[0], k[1] is None, k[1] or "", k[2] is None, k[2] or "")

    return [out[k] for k in sorted(out, key=order)]


def _emit_summary(
    result: IngestSummary, fmt: OutputFormat, quiet: bool, previews: bool = False
) -> None:
    if not previews:
        # plain rows: a one-day ingest should not pay for importing pandas
        rows = [r.as_row() for r in result.reports]
        if fmt is OutputFormat.table and len(rows) > _MAX_TABLE_FILES:
            # Many files: one row per folder, kind and status keeps the terminal readable;
            # json/csv still carry one row per file.
            emit_rows(_by_folder(rows), _BY_FOLDER_COLUMNS, fmt,
                      title=f"ingest ({len(rows)} files, by folder)")
        else:
            emit_rows(rows, REPORT_COLUMNS, fmt,
                      title="ingest" if fmt is OutputFormat.table else None, columns=_TABLE_COLUMNS)
        _report_messages(result, quiet, previews)
        return
    # dry run: the previews are DataFrames anyway
    frame = result.summary
    if fmt is OutputFormat.json:
        import json

        from tubetrack.cli.common import _json_default, records

        pv = dict(result.previews)
        rows = records(frame)
        for row in rows:
            p = pv.get(row["path"])
            row["preview_rows"] = records(p.rows) if p is not None else []
            row["preview_rejects"] = records(p.rejects) if p is not None else []
        sys.stdout.write(json.dumps(rows, default=_json_default, indent=1) + "\n")
    else:
        emit(
            frame,
            fmt,
            title="ingest" if fmt is OutputFormat.table else None,
            columns=_TABLE_COLUMNS,
        )
        if fmt is OutputFormat.table:
            for path, p in result.previews:
                emit(p.rows, fmt, title=f"{path}: first canonical rows (UTC)")
                if not p.rejects.empty:
                    emit(p.rejects, fmt, title=f"{path}: first rejects it would make")
    _report_messages(result, quiet, previews)


def _report_messages(result: IngestSummary, quiet: bool, previews: bool) -> None:
    """Per-file errors and notes, then the one-line summary, on stderr."""
    for rep in result.reports:
        if rep.status == "failed":
            typer.echo(f"Error: {rep.message}", err=True)
        elif rep.message and not quiet:
            if rep.status == "already_ingested" and len(result.reports) > _MAX_TABLE_FILES:
                continue  # the summary line counts them
            typer.echo(f"{rep.path}: {rep.message}", err=True)
    stderr(("dry run, nothing written: " if previews else "") + result.line(), quiet)


def _run_ingest(
    paths: list[Path],
    profile: str | None,
    kind: KindChoice | None,
    dry_run: bool,
    db: Path | None,
    fmt: OutputFormat,
    quiet: bool,
    preview_rows: int,
) -> None:
    from tubetrack.ingest.pipeline import ingest_paths

    con = _open_for(db, dry_run)
    try:
        prog = _progress_for(quiet)
        kwargs: dict[str, Any] = {
            "profile": profile,
            "kind": kind.value if kind else None,
            "dry_run": dry_run,
            "preview_rows": preview_rows if dry_run else 0,
        }
        if prog is not None:
            with prog:
                result = ingest_paths(con, paths, progress=prog, **kwargs)
        else:
            result = ingest_paths(con, paths, **kwargs)
    finally:
        con.close()
    _emit_summary(result, fmt, quiet, previews=dry_run)
    if not result.ok:
        raise typer.Exit(1)


def register(app: typer.Typer) -> None:
    """Add ``ingest``, ``peek``, ``profiles`` and ``status``."""

    @app.command("ingest")
    @handle_errors
    def ingest(
        paths: Annotated[
            list[Path],
            typer.Argument(
                help="Log files or folders (walked recursively): CSV/TSV (any delimiter), "
                "JSON Lines, Parquet, each optionally .gz; DICOM files are handed to the DICOM reader."
            ),
        ],
        profile: ProfileOption = None,
        kind: KindOption = None,
        dry_run: Annotated[
            bool,
            typer.Option(
                "--dry-run",
                help="Read and validate, show the first canonical rows, the rejects and the "
                "reconciliation; write nothing.",
            ),
        ] = False,
        db: DbOption = None,
        fmt: FormatOption = OutputFormat.table,
        quiet: QuietOption = False,
    ) -> None:
        """Ingest generator logs into the store: one transaction per file, bad rows kept in
        rejects, re-sent files and overlapping exports never double-counted.

        Prints one row per file (rows read = accepted + rejected + duplicate) and exits 1 if
        any file failed as a whole (the other files are still ingested)."""
        _run_ingest(paths, profile, kind, dry_run, db, fmt, quiet, preview_rows=5)

    @app.command("peek")
    @handle_errors
    def peek(
        path: Annotated[Path, typer.Argument(help="One log file.")],
        profile: ProfileOption = None,
        kind: KindOption = None,
        rows: Annotated[
            int,
            typer.Option(
                "--rows", "-n", min=1, help="Canonical rows and rejects to show [rows]."
            ),
        ] = 10,
        db: DbOption = None,
        fmt: FormatOption = OutputFormat.table,
        quiet: QuietOption = False,
    ) -> None:
        """Show what a file reads as (with a profile): first canonical rows in UTC, the rejects
        it would make and the reconciliation. Writes nothing."""
        _run_ingest([path], profile, kind, True, db, fmt, quiet, preview_rows=rows)

    @app.command("profiles")
    @handle_errors
    def profiles(
        folder: Annotated[
            Path | None,
            typer.Argument(
                help="Also list (and validate) FOLDER/profiles/*.toml.",
                show_default=False,
            ),
        ] = None,
        fmt: FormatOption = OutputFormat.table,
    ) -> None:
        """List layout profiles: the built-in ones, and a folder's own profiles/*.toml."""
        import pandas as pd

        from tubetrack.ingest.profiles import builtin_profiles, folder_profiles

        found = list(builtin_profiles().values())
        if folder is not None:
            found += folder_profiles(folder)
        frame = pd.DataFrame(
            [
                {
                    "name": p.name,
                    "kind": p.kind,
                    "files": " ".join(p.files),
                    "timezone": p.timezone,
                    "description": p.description,
                    "path": p.path,
                }
                for p in found
            ],
            columns=["name", "kind", "files", "timezone", "description", "path"],
        )
        emit(frame, fmt, title="layout profiles")

    @app.command("status")
    @handle_errors
    def status(
        db: DbOption = None,
        fmt: FormatOption = OutputFormat.table,
    ) -> None:
        """What the store holds: systems, tubes (active/removed), exposures by month, date span,
        files ingested, rejects by reason, unmapped DICOM devices."""
        from tubetrack import store
        from tubetrack.ingest.status import SECTIONS, store_status

        con = store.connect(db, read_only=True)
        try:
            st = store_status(con)
        finally:
            con.close()
        if fmt is OutputFormat.json:
            import json

            from tubetrack.cli.common import _json_default

            sys.stdout.write(
                json.dumps(st.as_json(), default=_json_default, indent=1) + "\n"
            )
        elif fmt is OutputFormat.csv:
            emit(st.long(), fmt)
        else:
            ov = st.sections["overview"]
            emit(
                ov.T.reset_index()
                .set_axis(["item", "value"], axis=1)
                .astype({"value": str}),
                fmt,
                title="store",
            )
            for name in SECTIONS[1:]:
                frame = st.sections[name]
                if not frame.empty:
                    emit(frame, fmt, title=name.replace("_", " "))

    @app.command("map-device")
    @handle_errors
    def map_device_cmd(
        system_id: Annotated[
            str, typer.Argument(help="System (in the store) the device is.")
        ],
        serial: Annotated[
            str | None,
            typer.Option("--serial", help="DICOM DeviceSerialNumber of the device."),
        ] = None,
        station: Annotated[
            str | None,
            typer.Option("--station", help="DICOM StationName of the device."),
        ] = None,
        db: DbOption = None,
        fmt: FormatOption = OutputFormat.table,
    ) -> None:
        """Map a DICOM device (serial number and/or station name) to a system: its exposures,
        so far kept under an unmapped placeholder system, move to SYSTEM_ID. `tubetrack status`
        lists the unmapped devices."""
        import pandas as pd

        from tubetrack import store
        from tubetrack.ingest.dicom import map_device

        con = store.connect(db)
        try:
            moved = map_device(
                con, system_id, device_serial=serial, station_name=station
            )
        finally:
            con.close()
        emit(
            pd.DataFrame(
                [
                    {
                        "system_id": system_id,
                        "device_serial": serial,
                        "station_name": station,
                        **moved,
                    }
                ]
            ),
            fmt,
        )
