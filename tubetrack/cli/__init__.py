"""The ``tubetrack`` command: a thin shell over the Python API.

Each command group lives in its own module with a ``register(app)`` function; heavy libraries are
imported inside the command bodies so that ``tubetrack --help`` starts fast.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Annotated

import typer

from tubetrack import __version__

app = typer.Typer(
    name="tubetrack",
    help=(
        "X-ray generator logs in, X-ray tube decisions out: filament drift, physics-based wear, "
        "end-of-life forecasts with uncertainty, fleet planning and offline reports.\n\n"
        "Decision support only: service, calibration and tube replacement are done by qualified "
        "personnel following the manufacturer's procedures, local codes and radiation-protection "
        "regulations. Never postpone a repair the equipment itself calls for."
    ),
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
    rich_markup_mode=None,
)


def _version_callback(value: bool) -> None:
    if value:
        typer.echo(f"tubetrack {__version__}")
        raise typer.Exit()


@app.callback()
def main(
    db: Annotated[
        Path | None,
        typer.Option(
            "--db",
            help="DuckDB store for every command (same as each command's --db; sets "
            "TUBETRACK_DB). Default: $TUBETRACK_DB or ./tubetrack.duckdb.",
            show_default=False,
        ),
    ] = None,
    version: Annotated[
        bool,
        typer.Option(
            "--version", callback=_version_callback, is_eager=True, help="Show version and exit."
        ),
    ] = False,
) -> None:
    """tubetrack command-line interface."""
    if db is not None:
        # Sub-commands parse their options after this callback, so their --db (envvar
        # TUBETRACK_DB) picks the global choice up unless given again.
        os.environ["TUBETRACK_DB"] = str(db)


from tubetrack.cli import (  # noqa: E402  (registration order = help order)
    demo_cmd,
    fleet_cmd,
    health_cmd,
    ingest_cmd,
    lake_cmd,
    physics_cmd,
    report_cmd,
)

for _module in (ingest_cmd, demo_cmd, health_cmd, physics_cmd, fleet_cmd, report_cmd, lake_cmd):
    _module.register(app)
