"""Tube-health commands: ``tubes`` (fleet listing), ``tube TUBE_ID`` (one tube), ``backtest``."""

from __future__ import annotations

import json
import sys
from pathlib import Path
from typing import Annotated, Any

import typer

from tubetrack.cli.common import (
    SAFETY_NOTE,
    AsOfOption,
    DbOption,
    FormatOption,
    OutputFormat,
    QuietOption,
    handle_errors,
    parse_as_of,
    stderr,
)

LISTING_COLUMNS = (
    "tube_id",
    "system_id",
    "focal_spot",
    "health_level",
    "diameter_loss_pct",
    "rul_days_p10",
    "rul_days_p50",
    "rul_days_p90",
    "p_end_of_life_90d",
    "p_end_of_life_180d",
    "reason",
)

TUBES_HELP = (
    "List every tube in service, one row per tube and focal spot, sorted by risk: health level, "
    "estimated filament diameter loss, remaining life (days, P10/P50/P90) and the probability of "
    "end of life within 30/90/180 days, each with a one-line reason. Results are stored in the "
    "result_health* tables.\n\n" + SAFETY_NOTE
)
TUBE_HELP = (
    "Single-tube view: per focal spot the diameter loss with its uncertainty, filament-current "
    "drift per mA station, change points, other signatures (arcs, faults, mA regulation, "
    "filament resistance) and the end-of-life forecast.\n\n" + SAFETY_NOTE
)
BACKTEST_HELP = (
    "Replay history: at cut-off dates every --every-days, forecast with earlier data only and "
    "compare with the real removals. Reports AUC and Brier score (90/180 days), P10-P90 coverage, "
    "relative RUL error, alpha-lambda accuracy, prognostic horizon, false alerts per tube-year; "
    "non-filament failures are reported separately. Stored in result_backtest and "
    "result_backtest_cases.\n\n" + SAFETY_NOTE
)


#: DuckDB's cap while the health tables are written (the frames are already in this process).
HEALTH_WRITE_MEMORY = "256MB"


def _analyse(db: Any, as_of: str | None, quiet: bool):
    from tubetrack import store
    from tubetrack.health.api import analyse_fleet
    from tubetrack.health.params import HealthParams

    cut = parse_as_of(as_of)
    con = store.connect(db)
    params = HealthParams()
    stderr("analysing tubes ...", quiet)
    result = analyse_fleet(
        con, as_of=cut, params=params,
        progress=lambda done, total: stderr(f"  {done:,} of {total:,} tubes analysed", quiet),
    )
    # one transaction for the whole set: an interrupted run leaves the previous results
    with store.capped_memory(con, HEALTH_WRITE_MEMORY):
        store.write_result_set(
            con, result.tables(), kind="health", as_of=result.as_of, params=result.params
        )
    return con, result


def _json_frame(frame: Any) -> list[dict[str, Any]]:
    from tubetrack.cli.common import records

    return records(frame)


EngineOption = Annotated[
    str,
    typer.Option(
        "--engine",
        help="Where the analysis runs: local (DuckDB SQL + a process pool on this machine) or "
        "spark (Spark SQL + applyInPandas over a Parquet lake; needs tubetrack[spark] and "
        "--lake).",
    ),
]
LakeOption = Annotated[
    Path | None,
    typer.Option(
        "--lake",
        help="Read a Parquet lake written by `tubetrack export-lake` instead of the store's "
        "tables. Results are still stored in --db for `tubetrack report`.",
        show_default=False,
    ),
]
MasterOption = Annotated[
    str | None,
    typer.Option(
        "--master",
        help="Spark master URL (local[4], spark://host:7077, yarn, ...). Default: "
        "SPARK_REMOTE or the spark-submit configuration, else local[2].",
        show_default=False,
    ),
]


def _analyse_engine(
    db: Any,
    as_of: str | None,
    quiet: bool,
    engine: str,
    lake: Path | None,
    master: str | None,
):
    """Run the health analysis on the chosen engine and store its result set in ``db``."""
    from tubetrack import store
    from tubetrack.engines import run_health
    from tubetrack.health.params import HealthParams

    stderr(f"analysing tubes on the {engine} engine ...", quiet)
    result = run_health(
        engine,
        lake=lake,
        as_of=parse_as_of(as_of),
        params=HealthParams(),
        master=master,
    )
    con = store.connect(db)
    store.write_result_set(
        con, result.tables(), kind="health", as_of=result.as_of, params=result.params
    )
    return con, result


def tubes_command(
    db: DbOption = None,
    fmt: FormatOption = OutputFormat.table,
    as_of: AsOfOption = None,
    quiet: QuietOption = False,
    engine: EngineOption = "local",
    lake: LakeOption = None,
    master: MasterOption = None,
) -> None:
    if engine == "local" and lake is None and master is None:
        con, result = _analyse(db, as_of, quiet)
    else:
        con, result = _analyse_engine(db, as_of, quiet, engine, lake, master)
    con.close()
    from tubetrack.cli.common import emit

    s = result.summary
    emit(
        s,
        fmt,
        title=f"tube health as of {result.as_of:%Y-%m-%d}",
        columns=LISTING_COLUMNS,
        float_digits=2,
    )
    th = result.threshold
    stderr(
        f"{s['tube_id'].nunique()} tubes, {len(s)} focal spots; end-of-life threshold "
        f"{100 * th.mean:.2f} +- {100 * th.sd:.2f} % diameter loss ({th.source}, "
        f"{th.n_failures} past filament failures)",
        quiet,
    )


def _station_drift(drift: Any) -> Any:
    import numpy as np
    import pandas as pd

    d = drift[drift["series"] == "exposures"]
    if d.empty:
        return pd.DataFrame(
            columns=[
                "focal_spot",
                "tube_current_ma",
                "days",
                "first_a",
                "last_a",
                "change_pct",
                "segments",
            ]
        )
    rows = []
    for (focal, ma), g in d.groupby(["focal_spot", "tube_current_ma"]):
        g = g.sort_values("day")
        first = float(np.median(g["filament_current_norm_a"].iloc[:10]))
        last = float(np.median(g["filament_current_norm_a"].iloc[-10:]))
        rows.append(
            {
                "focal_spot": focal,
                "tube_current_ma": ma,
                "days": len(g),
                "first_a": first,
                "last_a": last,
                "change_pct": 100.0 * (last / first - 1.0),
                "segments": int(g["segment"].max()) + 1,
            }
        )
    return pd.DataFrame(rows)


def tube_command(
    tube_id: Annotated[str, typer.Argument(help="Tube serial number (tube_id).")],
    db: DbOption = None,
    fmt: FormatOption = OutputFormat.table,
    as_of: AsOfOption = None,
    quiet: QuietOption = False,
) -> None:
    from tubetrack.errors import NotFoundError

    con, result = _analyse(db, as_of, quiet)
    known = con.execute(
        "SELECT tube_id, system_id, installed_at_utc, removed_at_utc, removal_reason FROM tubes "
        "WHERE tube_id = ?",
        [tube_id],
    ).df()
    con.close()
    if known.empty:
        raise NotFoundError(
            f"tube {tube_id!r} is not in the store. List tubes with `tubetrack tubes`, or ingest the "
            "inventory (tubes.csv) that names it."
        )
    sel = {
        name: frame[frame["tube_id"] == tube_id]
        if "tube_id" in frame.columns
        else frame
        for name, frame in result.tables().items()
    }
    summary = sel["result_health"]
    stations = _station_drift(sel["result_health_drift"])
    cps = sel["result_health_changepoints"]
    diam = sel["result_health_diameter"]
    proj = sel["result_health_projection"]
    cdf = sel["result_health_rul_cdf"]
    removed = known["removed_at_utc"].iloc[0]
    note = None
    if summary.empty:
        note = (
            f"tube {tube_id} is not in service as of {result.as_of:%Y-%m-%d}"
            + (
                f" (removed {removed:%Y-%m-%d}, reason {known['removal_reason'].iloc[0]})"
                if removed is not None and str(removed) != "NaT"
                else ""
            )
            + "; history only, no forecast."
        )
    if fmt is OutputFormat.json:
        out = []
        focal_spots = (
            sorted(set(stations["focal_spot"]) | set(summary["focal_spot"]))
            if len(stations) or len(summary)
            else []
        )
        for focal in focal_spots:
            row = _json_frame(summary[summary["focal_spot"] == focal])
            obj: dict[str, Any] = (
                row[0]
                if row
                else {"tube_id": tube_id, "focal_spot": focal, "note": note}
            )
            obj["stations"] = _json_frame(stations[stations["focal_spot"] == focal])
            obj["changepoints"] = _json_frame(cps[cps["focal_spot"] == focal])
            obj["diameter"] = _json_frame(diam[diam["focal_spot"] == focal])
            obj["projection"] = _json_frame(proj[proj["focal_spot"] == focal])
            obj["rul_cdf"] = _json_frame(cdf[cdf["focal_spot"] == focal])
            out.append(obj)
        sys.stdout.write(json.dumps(out, indent=1, default=str) + "\n")
        return
    from tubetrack.cli.common import emit

    if fmt is OutputFormat.csv:
        emit(summary, fmt)
        return
    if note:
        stderr(note, False)
    emit(
        summary,
        fmt,
        title=f"tube {tube_id}: forecast per focal spot",
        columns=(
            "focal_spot",
            "health_level",
            "diameter_loss_pct",
            "diameter_loss_pct_se",
            "rul_days_p10",
            "rul_days_p50",
            "rul_days_p90",
            "rul_exposures_p50",
            "p_end_of_life_30d",
            "p_end_of_life_90d",
            "p_end_of_life_180d",
        ),
        float_digits=2,
    )
    for r in summary.itertuples(index=False):
        typer.echo(f"{r.health_level}: {r.reason}")  # the reason names its focal spot
    emit(
        stations,
        fmt,
        title="filament current per mA station (kV-normalised)",
        float_digits=3,
    )
    emit(
        cps,
        fmt,
        title="change points (level shifts removed; wear carried over)",
        float_digits=2,
    )
    sig_cols = (
        "focal_spot",
        "arc_rate_per_1000",
        "arc_rate_recent_per_1000",
        "arc_trend_p",
        "ma_miss_fraction",
        "resistance_change_pct",
        "signals",
    )
    emit(summary, fmt, title="other signatures", columns=sig_cols, float_digits=3)


def backtest_command(
    db: DbOption = None,
    fmt: FormatOption = OutputFormat.table,
    every_days: Annotated[
        int,
        typer.Option(
            "--every-days", min=7, help="Spacing of the cut-off dates [days]."
        ),
    ] = 60,
    warmup_days: Annotated[
        int,
        typer.Option(
            "--warmup-days",
            min=30,
            help="First cut-off this long after the first exposure [days].",
        ),
    ] = 180,
    quiet: QuietOption = False,
) -> None:
    from tubetrack import store
    from tubetrack.cli.common import emit
    from tubetrack.health.backtest import run_backtest

    con = store.connect(db)
    started = store.utcnow()
    stderr(f"backtest: cut-offs every {every_days} days ...", quiet)
    res = run_backtest(
        con, every_days=every_days, warmup_days=warmup_days,
        progress=lambda done, total, cut: stderr(
            f"  cut-off {cut:%Y-%m-%d} analysed ({done} of {total})", quiet),
    )
    params = {"every_days": every_days, "warmup_days": warmup_days}
    store.write_result_set(
        con,
        {"result_backtest": res.summary, "result_backtest_cases": res.cases},
        kind="backtest",
        params=params,
        started_at=started,
    )
    con.close()
    emit(
        res.summary, fmt, title="backtest of the end-of-life forecasts", float_digits=3
    )
    stderr(
        f"{len(res.cases)} tube x cut-off cases scored; stored in result_backtest, result_backtest_cases",
        quiet,
    )


def register(app: typer.Typer) -> None:
    """Add the health commands to ``app``."""
    app.command("tubes", help=TUBES_HELP)(handle_errors(tubes_command))
    app.command("tube", help=TUBE_HELP)(handle_errors(tube_command))
    app.command("backtest", help=BACKTEST_HELP)(handle_errors(backtest_command))
