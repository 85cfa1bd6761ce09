"""``tubetrack fleet ...``: tube life statistics, replacement forecast, spares, visits, uptime.

Heavy libraries are imported inside the command bodies so ``tubetrack --help`` stays fast.
"""

from __future__ import annotations

import dataclasses
from enum import StrEnum
from pathlib import Path
from typing import Annotated

import typer

from tubetrack.cli.common import (
    SAFETY_NOTE,
    AsOfOption,
    DbOption,
    FormatOption,
    OutputFormat,
    QuietOption,
    emit,
    handle_errors,
    parse_as_of,
    stderr,
)

fleet_app = typer.Typer(
    name="fleet",
    help="Fleet planning: tube life statistics (Kaplan-Meier, Weibull), 12-month replacement "
    "forecast with budget, spares, service visit order and uptime against contracts.",
    no_args_is_help=True,
    rich_markup_mode=None,
)


class GroupBy(StrEnum):
    model = "model"
    modality = "modality"
    site = "site"


class ClockChoice(StrEnum):
    days = "days"
    exposures = "exposures"
    mas = "mas"
    heat_units = "heat_units"
    hot_time_s = "hot_time_s"


class IntervalChoice(StrEnum):
    plain = "plain"
    log = "log"
    log_log = "log-log"


class SurvivalView(StrEnum):
    summary = "summary"
    km = "km"
    incidence = "incidence"
    curve = "curve"


class Period(StrEnum):
    month = "month"
    quarter = "quarter"


class UptimeView(StrEnum):
    periods = "periods"
    systems = "systems"


ByOption = Annotated[
    GroupBy | None,
    typer.Option(
        "--by",
        help="Group by tube model label, system modality or site. "
        "Default: the whole fleet.",
    ),
]
ClockOption = Annotated[
    ClockChoice,
    typer.Option(
        "--clock",
        help="Life clock: calendar days [d], exposures [count], mAs "
        "[mA s], heat units [HU] or filament hot time [s].",
    ),
]
NoStoreOption = Annotated[
    bool, typer.Option("--no-store", help="Do not write result tables into the store.")
]


def _warn_notes(notes, quiet: bool) -> None:
    for n in notes:
        stderr(f"Note: {n}", quiet)


def _open(db: Path | None, write: bool):
    from tubetrack import store

    return store.connect(db, read_only=not write) if not write else store.connect(db)


def _life(con, as_of_str: str | None, quiet: bool):
    import warnings

    from tubetrack.errors import TubetrackWarning
    from tubetrack.fleet.lifedata import load_life_data
    from tubetrack.fleet.models import default_as_of

    as_of = default_as_of(con, parse_as_of(as_of_str))
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", TubetrackWarning)
        life = load_life_data(con, as_of)
    _warn_notes([str(w.message) for w in caught], quiet)
    return life, as_of


@fleet_app.command("survival")
@handle_errors
def survival_cmd(
    db: DbOption = None,
    fmt: FormatOption = OutputFormat.table,
    as_of: AsOfOption = None,
    by: ByOption = None,
    clock: ClockOption = ClockChoice.days,
    interval: Annotated[
        IntervalChoice,
        typer.Option(
            "--interval",
            help="Kaplan-Meier pointwise interval: plain, log or "
            "log-log (Greenwood variance).",
        ),
    ] = IntervalChoice.log_log,
    confidence: Annotated[
        float,
        typer.Option("--confidence", help="Confidence level of all intervals [-]."),
    ] = 0.95,
    min_failures: Annotated[
        int,
        typer.Option(
            "--min-failures", help="Fewest failures for a group's Weibull fit."
        ),
    ] = 3,
    show: Annotated[
        SurvivalView,
        typer.Option(
            "--show",
            help="summary (Weibull per group), km (Kaplan-Meier table with "
            "numbers at risk), incidence (cumulative incidence by cause) or curve "
            "(Weibull S(t) with bounds).",
        ),
    ] = SurvivalView.summary,
    age: Annotated[
        float | None,
        typer.Option(
            "--age",
            help="Age of a tube on the chosen clock: adds its mean residual "
            "life and P(failure within --horizon-days) per group [clock unit].",
            show_default=False,
        ),
    ] = None,
    horizon_days: Annotated[
        float,
        typer.Option(
            "--horizon-days",
            help="Horizon for --age on the chosen clock "
            "[clock unit; days on the calendar clock].",
        ),
    ] = 90.0,
    quiet: QuietOption = False,
    no_store: NoStoreOption = False,
) -> None:
    """Tube life statistics: Kaplan-Meier and Weibull (censoring, delayed entry) per group."""
    import warnings

    import numpy as np
    import pandas as pd

    from tubetrack import store
    from tubetrack.errors import TubetrackWarning
    from tubetrack.fleet.survival import cumulative_incidence, survival_by_group

    con = _open(db, not no_store)
    try:
        life, as_of_ts = _life(con, as_of, quiet)
        alpha = 1 - confidence
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", TubetrackWarning)
            tab = life.table(clock.value)
            res = survival_by_group(
                tab,
                by.value if by else None,
                min_failures=min_failures,
                alpha=alpha,
                interval=interval.value,
                clock=clock.value,
            )
        _warn_notes([str(w.message) for w in caught], quiet)
        summary = res.summary.copy()
        summary.insert(0, "as_of", as_of_ts)
        if age is not None:
            fits = [res.fits.get(g) for g in summary["group"]]
            summary["age"] = age
            summary["horizon"] = horizon_days
            summary["p_fail_within_horizon"] = [
                float(f.conditional_failure_probability(age, horizon_days))
                if f
                else np.nan
                for f in fits
            ]
            summary["mean_residual_life"] = [
                float(f.mean_residual_life(age)) if f else np.nan for f in fits
            ]
        km = res.km.copy()
        km.insert(0, "group_by", by.value if by else "fleet")
        km["clock"] = clock.value
        inc_frames = []
        curve_frames = []
        col = _group_columns().get(by.value if by else "", None)
        groups = (
            [("fleet", tab)]
            if col is None
            else [
                (str(k), g)
                for k, g in tab.groupby(tab[col].fillna("(unknown)"), sort=True)
            ]
        )
        cause_map = life.frame.set_index("tube_id")["cause"]
        for name, g in groups:
            ci = cumulative_incidence(
                g["exit"], g["tube_id"].map(cause_map).where(g["event"], ""), g["entry"]
            )
            ci.insert(0, "group", name)
            inc_frames.append(ci)
            fit = res.fits.get(name)
            if fit is not None:
                t_max = float(g["exit"].max())
                grid = np.linspace(t_max / 200, t_max * 1.5, 150)
                cb = fit.survival_bounds(grid)
                cb.insert(0, "group", name)
                curve_frames.append(cb)
        # groups without events give empty incidence frames: leave them out of the concat
        kept = [f for f in inc_frames if len(f)]
        incidence = (
            pd.concat(kept, ignore_index=True) if kept else
            (inc_frames[0] if inc_frames else pd.DataFrame())
        )
        curve = (
            pd.concat(curve_frames, ignore_index=True)
            if curve_frames
            else pd.DataFrame()
        )
        if not no_store:
            params = {
                "by": by.value if by else None,
                "clock": clock.value,
                "interval": interval.value,
                "confidence": confidence,
            }
            tables = {"result_fleet_survival": summary, "result_fleet_km": km}
            if len(incidence):
                incidence["clock"] = clock.value
                tables["result_fleet_incidence"] = incidence
            if len(curve):
                curve["clock"] = clock.value
                tables["result_fleet_survival_curve"] = curve
            # one transaction: readers never see tables of two different runs
            store.write_result_set(
                con, tables, kind="fleet_survival", as_of=as_of_ts, params=params
            )
    finally:
        con.close()
    view = {"summary": summary, "km": km, "incidence": incidence, "curve": curve}[
        show.value
    ]
    emit(
        view,
        fmt,
        title=f"Tube survival ({clock.value}) as of {as_of_ts:%Y-%m-%d}",
        columns=[
            "group",
            "n",
            "failures",
            "eta",
            "eta_lower",
            "eta_upper",
            "beta",
            "beta_lower",
            "beta_upper",
            "b10_life",
            "median_life",
            "km_median",
            "p_fail_within_horizon",
            "mean_residual_life",
            "message",
        ]
        if show is SurvivalView.summary
        else None,
    )
    n_fail = int(tab["event"].sum())
    stderr(
        f"{len(tab)} tubes, {n_fail} failures, {int(life.frame['left_truncated'].sum())} "
        "left-truncated (installed before their logs began).",
        quiet,
    )


def _forecast(
    con, life, as_of_ts, *, clock, renewal, months, horizon_days, quiet, draws=0
):
    from tubetrack.fleet.forecast import replacement_forecast
    from tubetrack.fleet.models import fit_fleet_models, read_health_rul_cdf

    models = fit_fleet_models(life, clock)
    health = read_health_rul_cdf(con)
    if health is None:
        stderr(
            "Note: no health forecasts in the store (result_health_rul_cdf): using the "
            "fleet Weibull model for every tube. Run `tubetrack health` first to use them.",
            quiet,
        )
    if draws is None:
        n_active = int((life.frame["status"] == "in_service").sum())
        draws = min(100, max(20, 250_000 // max(n_active, 1)))
    fc = replacement_forecast(
        life.frame,
        models.all_cause,
        as_of=as_of_ts,
        months=months,
        other_fit=models.other,
        health_rul_cdf=health,
        clock=clock,
        renewal=renewal,
        horizon_days=horizon_days,
        parameter_draws=draws,
    )
    _warn_notes(
        [n for n in (*models.notes, *fc.notes) if "result_health_rul_cdf" not in n],
        quiet,
    )
    return fc, models, health


DrawsOption = Annotated[
    int | None,
    typer.Option(
        "--parameter-draws",
        help="Weibull parameter sets drawn from the fit's uncertainty for predictive "
        "intervals (0: plug-in intervals that treat the fit as exact). Run time grows with "
        "draws x tubes. Default: 100, fewer for large fleets (at most 250,000 tube-draws, "
        "at least 20 draws).",
        min=0,
        show_default=False,
    ),
]
RenewalOption = Annotated[
    bool,
    typer.Option(
        "--renewal/--no-renewal",
        help="Also count replacements of replacement tubes "
        "inside the horizon (renewal function).",
    ),
]


@fleet_app.command(
    "forecast",
    help=(
        "Replacement forecast for the next months: per-tube probabilities, fleet totals with "
        "80 % / 95 % intervals, and expected spend when a price list is given.\n\n"
        + SAFETY_NOTE
    ),
)
@handle_errors
def forecast_cmd(
    db: DbOption = None,
    fmt: FormatOption = OutputFormat.table,
    as_of: AsOfOption = None,
    by: ByOption = None,
    months: Annotated[
        int, typer.Option("--months", help="Horizon in calendar months.")
    ] = 12,
    horizon_days: Annotated[
        float | None,
        typer.Option(
            "--horizon-days",
            help="Horizon in days instead of --months [d].",
            show_default=False,
        ),
    ] = None,
    price_list: Annotated[
        Path | None,
        typer.Option(
            "--price-list",
            help="CSV (model_label,price,currency) or TOML price list; "
            "tubes not in it use their own inventory price.",
            show_default=False,
        ),
    ] = None,
    renewal: RenewalOption = False,
    parameter_draws: DrawsOption = None,
    clock: ClockOption = ClockChoice.days,
    show: Annotated[
        str,
        typer.Option(
            "--show", help="months (fleet totals), tubes (per tube), or budget."
        ),
    ] = "months",
    quiet: QuietOption = False,
    no_store: NoStoreOption = False,
) -> None:
    from tubetrack import store
    from tubetrack.errors import InputError
    from tubetrack.fleet.budget import load_price_list, spend_forecast
    from tubetrack.fleet.forecast import forecast_by_group

    if show not in ("months", "tubes", "budget"):
        raise InputError(f"--show is {show!r}; use months, tubes or budget.")
    prices = load_price_list(price_list) if price_list else None
    con = _open(db, not no_store)
    try:
        life, as_of_ts = _life(con, as_of, quiet)
        fc, models, _ = _forecast(
            con,
            life,
            as_of_ts,
            clock=clock.value,
            renewal=renewal,
            months=months,
            horizon_days=horizon_days,
            quiet=quiet,
            draws=parameter_draws,
        )
        summary = fc.summary
        if by is not None:
            col = _group_columns()[by.value]
            tubes = fc.tubes
            if col == "modality":
                tubes = tubes.merge(life.frame[["tube_id", "modality"]], on="tube_id")
            summary = forecast_by_group(dataclasses.replace(fc, tubes=tubes), col)
        budget = None
        if prices is not None or show == "budget":
            import warnings

            from tubetrack.errors import TubetrackWarning

            with warnings.catch_warnings(record=True) as caught:
                warnings.simplefilter("always", TubetrackWarning)
                budget = spend_forecast(fc, prices)
            _warn_notes([str(w.message) for w in caught], quiet)
        if not no_store:
            params = {
                "months": months,
                "horizon_days": horizon_days,
                "renewal": renewal,
                "clock": clock.value,
                "price_list": str(price_list) if price_list else None,
                "parameter_draws": parameter_draws,
                "eta": models.all_cause.eta,
                "beta": models.all_cause.beta,
            }
            tables = {
                "result_fleet_forecast": fc.summary,
                "result_fleet_forecast_tubes": fc.tubes,
            }
            if by is not None:
                tables["result_fleet_forecast_groups"] = summary
            if budget is not None:
                tables["result_fleet_budget"] = budget.summary
            # one transaction: the forecast and its per-tube rows always belong together
            store.write_result_set(
                con, tables, kind="fleet_forecast", as_of=as_of_ts, params=params
            )
    finally:
        con.close()
    if show == "tubes":
        emit(
            fc.per_tube, fmt, title="Replacement probability per tube over the horizon"
        )
    elif show == "budget" and budget is not None:
        emit(budget.summary, fmt, title="Expected tube spend")
    else:
        if fmt is OutputFormat.table:
            summary = summary.assign(month=summary["month"].dt.strftime("%Y-%m"))
        emit(
            summary,
            fmt,
            title=f"Expected tube replacements from {as_of_ts:%Y-%m-%d}"
            + (" (with renewals)" if renewal else ""),
            columns=[
                "group",
                "month",
                "month_index",
                "expected_replacements",
                "lower_80",
                "upper_80",
                "lower_95",
                "upper_95",
                "cumulative_expected",
            ],
        )
    f = models.all_cause
    stderr(
        f"Fleet Weibull ({clock.value}): eta {f.eta:,.0f}, beta {f.beta:.2f} from "
        f"{f.n_failures} failures among {f.n} tubes; {len(fc.per_tube)} tubes in service; "
        f"expected replacements over the horizon {fc.summary['expected_replacements'].sum():.2f}.",
        quiet,
    )
    if budget is not None and show != "budget":
        tot = budget.summary[budget.summary["period_kind"] == "quarter"]
        for cur, g in tot.groupby("currency"):
            stderr(
                f"Expected spend over the horizon: {g['expected_spend'].sum():,.0f} {cur} "
                "(see --show budget).",
                quiet,
            )


@fleet_app.command(
    "spares",
    help=(
        "Spare tubes per model for a service level: smallest stock s with P(replacements <= s) >= "
        "level over the horizon.\n\n" + SAFETY_NOTE
    ),
)
@handle_errors
def spares_cmd(
    db: DbOption = None,
    fmt: FormatOption = OutputFormat.table,
    as_of: AsOfOption = None,
    by: ByOption = GroupBy.model,
    service_level: Annotated[
        float,
        typer.Option(
            "--service-level",
            help="Probability the stock covers the horizon's replacements [-].",
        ),
    ] = 0.95,
    horizon_days: Annotated[
        float, typer.Option("--horizon-days", help="Horizon [d].")
    ] = 365.0,
    renewal: RenewalOption = True,
    parameter_draws: DrawsOption = None,
    clock: ClockOption = ClockChoice.days,
    quiet: QuietOption = False,
    no_store: NoStoreOption = False,
) -> None:
    from tubetrack import store
    from tubetrack.errors import InputError
    from tubetrack.fleet.budget import spares_plan

    if not 0 < service_level < 1:
        raise InputError(
            f"--service-level is {service_level!r}; give a probability between 0 and 1 "
            "(e.g. 0.95)."
        )
    con = _open(db, not no_store)
    try:
        life, as_of_ts = _life(con, as_of, quiet)
        fc, _, _ = _forecast(
            con,
            life,
            as_of_ts,
            clock=clock.value,
            renewal=renewal,
            months=12,
            horizon_days=horizon_days,
            quiet=quiet,
            draws=parameter_draws,
        )
        col = _group_columns()[(by or GroupBy.model).value]
        per = fc.per_tube
        if col == "modality":
            per = per.merge(life.frame[["tube_id", "modality"]], on="tube_id")
        res = spares_plan(dataclasses.replace(fc, per_tube=per), service_level, by=col)
        out = res.summary.rename(columns={"model_label": "group"})
        out.insert(0, "group_by", (by or GroupBy.model).value)
        out["renewal"] = renewal
        if not no_store:
            store.write_results(
                con,
                "result_fleet_spares",
                out,
                kind="fleet_spares",
                as_of=as_of_ts,
                params={
                    "service_level": service_level,
                    "horizon_days": horizon_days,
                    "renewal": renewal,
                },
            )
    finally:
        con.close()
    emit(
        out,
        fmt,
        title=f"Spare tubes for {100 * service_level:g} % service level over "
        f"{horizon_days:g} d",
        columns=[
            "group",
            "tubes_in_service",
            "expected_replacements",
            "lower_95",
            "upper_95",
            "spares_needed",
            "p_enough",
        ],
    )


@fleet_app.command(
    "visits",
    help=(
        "Service visit order: systems ranked by risk (tube replacement within the horizon) x "
        "impact (criticality, contracted uptime at risk), grouped by site, with reasons.\n\n"
        + SAFETY_NOTE
    ),
)
@handle_errors
def visits_cmd(
    db: DbOption = None,
    fmt: FormatOption = OutputFormat.table,
    as_of: AsOfOption = None,
    horizon_days: Annotated[
        float, typer.Option("--horizon-days", help="Risk horizon [d].")
    ] = 30.0,
    site: Annotated[
        str | None, typer.Option("--site", help="Only this site.", show_default=False)
    ] = None,
    clock: ClockOption = ClockChoice.days,
    quiet: QuietOption = False,
    no_store: NoStoreOption = False,
) -> None:
    from tubetrack import store
    from tubetrack.errors import InputError
    from tubetrack.fleet.models import fit_fleet_models, read_health_rul_cdf, tube_risk
    from tubetrack.fleet.uptime import uptime
    from tubetrack.fleet.visits import typical_tube_outage_h, visit_order

    if horizon_days <= 0:
        raise InputError(
            f"--horizon-days is {horizon_days!r}; give a positive number of days."
        )
    con = _open(db, not no_store)
    try:
        life, as_of_ts = _life(con, as_of, quiet)
        models = fit_fleet_models(life, clock.value)
        health = read_health_rul_cdf(con)
        if health is None:
            stderr(
                "Note: no health forecasts in the store (result_health_rul_cdf): risk from "
                "the fleet Weibull model by tube age.",
                quiet,
            )
        risk = tube_risk(life, models, horizon_days=horizon_days, health_rul_cdf=health)
        systems = store.load_systems(con)
        down = store.load_downtime(con)
        outage_h = 24.0
        if len(down):
            start = down["start_utc"].min()
            if start < as_of_ts:
                up = uptime(down, systems, start=start, end=as_of_ts)
                outage_h = typical_tube_outage_h(up.episodes)
        res = visit_order(
            risk, systems, horizon_days=horizon_days, tube_outage_h=outage_h
        )
        out = res.summary
        if site is not None:
            out = out[out["site"] == site].reset_index(drop=True)
        if not no_store:
            store.write_results(
                con,
                "result_fleet_visits",
                res.summary,
                kind="fleet_visits",
                as_of=as_of_ts,
                params={"horizon_days": horizon_days, "tube_outage_h": outage_h},
            )
    finally:
        con.close()
    emit(
        out,
        fmt,
        title=f"Visit order, risk over {horizon_days:g} d from {as_of_ts:%Y-%m-%d}",
        columns=[
            "rank",
            "site",
            "site_rank",
            "system_id",
            "score",
            "risk",
            "impact",
            "reason",
        ],
    )
    stderr(f"Typical tube outage used for impact: {outage_h:.1f} h.", quiet)


@fleet_app.command("uptime")
@handle_errors
def uptime_cmd(
    db: DbOption = None,
    fmt: FormatOption = OutputFormat.table,
    as_of: AsOfOption = None,
    start: Annotated[
        str | None,
        typer.Option(
            "--start",
            help="Window start (YYYY-MM-DD, UTC). Default: first logged "
            "exposure or downtime.",
            show_default=False,
        ),
    ] = None,
    period: Annotated[
        Period, typer.Option("--period", help="Report per month or quarter.")
    ] = Period.month,
    partial_weight: Annotated[
        float,
        typer.Option("--partial-weight", help="Weight of partially-down time [-]."),
    ] = 0.5,
    confidence: Annotated[
        float,
        typer.Option("--confidence", help="Two-sided level of the MTBF bounds [-]."),
    ] = 0.90,
    by: Annotated[
        UptimeView,
        typer.Option(
            "--by",
            help="periods: one row per system and period; systems: one row "
            "per system with MTBF, MTTR and bounds.",
        ),
    ] = UptimeView.periods,
    quiet: QuietOption = False,
    no_store: NoStoreOption = False,
) -> None:
    """Availability per system and month/quarter against targets; MTBF and MTTR with bounds."""
    from tubetrack import store
    from tubetrack.errors import AnalysisError
    from tubetrack.fleet.models import default_as_of
    from tubetrack.fleet.uptime import uptime

    con = _open(db, not no_store)
    try:
        end = default_as_of(con, parse_as_of(as_of))
        begin = parse_as_of(start)
        if begin is None:
            rows = con.execute(
                "SELECT least((SELECT min(timestamp_utc) FROM exposures), "
                "(SELECT min(start_utc) FROM downtime))"
            ).fetchall()
            begin = rows[0][0] if rows else None
        if begin is None:
            raise AnalysisError(
                "no exposures or downtime in the store; ingest logs first."
            )
        res = uptime(
            store.load_downtime(con),
            store.load_systems(con),
            start=begin,
            end=end,
            period=period.value,
            partial_weight=partial_weight,
            confidence=confidence,
        )
        if not no_store:
            params = {
                "period": period.value,
                "partial_weight": partial_weight,
                "confidence": confidence,
                "start": begin,
            }
            store.write_result_set(
                con,
                {"result_fleet_uptime": res.periods, "result_fleet_mtbf": res.summary},
                kind="fleet_uptime",
                as_of=end,
                params=params,
            )
    finally:
        con.close()
    _warn_notes(res.notes, quiet)
    if by is UptimeView.systems:
        emit(
            res.summary,
            fmt,
            title=f"Uptime {begin:%Y-%m-%d} to {end:%Y-%m-%d}",
            columns=[
                "system_id",
                "site",
                "availability_pct",
                "uptime_target_pct",
                "meets_target",
                "tube_down_h",
                "other_down_h",
                "failures",
                "mtbf_h",
                "mtbf_lower_h",
                "mtbf_upper_h",
                "mttr_h",
            ],
        )
    else:
        emit(
            res.periods,
            fmt,
            title=f"Availability per {period.value}",
            columns=[
                "system_id",
                "period",
                "required_h",
                "corrective_down_h",
                "preventive_h",
                "external_h",
                "tube_down_h",
                "availability_pct",
                "uptime_target_pct",
                "meets_target",
            ],
        )


def _group_columns() -> dict[str, str]:
    """--by choice -> column (the one map, in tubetrack.fleet.survival)."""
    from tubetrack.fleet.survival import GROUPINGS

    return GROUPINGS


def register(app: typer.Typer) -> None:
    """Add the ``fleet`` command group to ``app``."""
    app.add_typer(fleet_app, name="fleet")
