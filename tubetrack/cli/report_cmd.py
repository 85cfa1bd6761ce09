"""``tubetrack report``: offline HTML reports (fleet page, one page per tube, PNG/SVG charts).

The command reads the stored result tables (``result_health*``, ``result_fleet_*``,
``result_backtest*``); where a table is missing, or ``--as-of`` asks for another date, it runs the
analysis in memory through the health and fleet Python APIs (nothing is written to the store). It
then hands plain DataFrames to :func:`tubetrack.report.write_report`, which never runs SQL.
"""

from __future__ import annotations

import math
from datetime import datetime
from pathlib import Path
from typing import TYPE_CHECKING, Annotated, Any

import typer

from tubetrack.cli.common import (
    SAFETY_NOTE,
    AsOfOption,
    DbOption,
    QuietOption,
    handle_errors,
    parse_as_of,
    stderr,
)

if TYPE_CHECKING:  # pragma: no cover
    import duckdb
    import pandas as pd

    from tubetrack.report import ReportInputs

#: Horizons of the health results' probability columns [days].
HORIZONS_DAYS = (30, 90, 180)


def _exists(con: duckdb.DuckDBPyConnection, table: str) -> bool:
    row = con.execute(
        "SELECT count(*) FROM information_schema.tables WHERE table_name = ?", [table]
    ).fetchone()
    return bool(row and row[0])


def _read(con: duckdb.DuckDBPyConnection, table: str) -> pd.DataFrame | None:
    from tubetrack import store

    if not _exists(con, table):
        return None
    frame = store.read_results(con, table)
    return frame if len(frame) else None


def _scalar(con: duckdb.DuckDBPyConnection, sql: str, params: list[Any] | None = None) -> Any:
    row = con.execute(sql, params or []).fetchone()
    return row[0] if row else None


# ----------------------------------------------------------------------------------------------
# SQL summaries the report shows (aggregated here, in the store; the report gets small frames)

DRIFT_BINNED_SQL = """
SELECT tube_id, focal_spot, tube_current_ma,
       time_bucket(to_days(CAST(? AS INTEGER)), CAST(day AS TIMESTAMP), TIMESTAMP '1970-01-05') AS day,
       segment,
       median(filament_current_norm_a) AS filament_current_norm_a,
       min(filament_current_norm_a) AS filament_current_lo_a,
       max(filament_current_norm_a) AS filament_current_hi_a,
       avg(fitted_a) AS fitted_a,
       count(*) AS n_days
FROM result_health_drift
WHERE filament_current_norm_a IS NOT NULL {where}
GROUP BY ALL
ORDER BY tube_id, focal_spot, tube_current_ma, day
"""

# Per (tube, focal spot) series, keep at most ``?`` evenly spaced days: the rule of
# ``report._thin_groups`` (row k of n is kept where floor(k / step) changes, step =
# max(1, (n - 1) / (max_points - 1)), and the last row always), so the tube pages get the
# same rows as from the whole table while the report reads ~160 rows per series, not millions.
THINNED_SERIES_SQL = """
SELECT * EXCLUDE (pos_, n_, step_) FROM (
    SELECT *, greatest(1.0, (n_ - 1) / CAST(? - 1 AS DOUBLE)) AS step_ FROM (
        SELECT *, row_number() OVER (PARTITION BY tube_id, focal_spot ORDER BY day) - 1 AS pos_,
               count(*) OVER (PARTITION BY tube_id, focal_spot) AS n_
        FROM {table}
    )
)
WHERE pos_ = n_ - 1 OR floor(pos_ / step_) <> floor((pos_ - 1) / step_)
ORDER BY tube_id, focal_spot, day
"""

FAULT_RATES_SQL = """
WITH tubes_t AS (SELECT tube_id, system_id, installed_at_utc, removed_at_utc FROM tubes),
ev AS (
    SELECT COALESCE(e.tube_id, t.tube_id) AS tube_id, e.system_id,
           date_trunc('month', e.timestamp_utc) AS month, e.category, count(*) AS events
    FROM events e
    LEFT JOIN tubes_t t
      ON e.tube_id IS NULL AND t.system_id = e.system_id
     AND e.timestamp_utc >= t.installed_at_utc
     AND (t.removed_at_utc IS NULL OR e.timestamp_utc < t.removed_at_utc)
    WHERE (CAST(? AS TIMESTAMP) IS NULL OR e.timestamp_utc < CAST(? AS TIMESTAMP))
    GROUP BY ALL
),
ex AS (
    SELECT tube_id, system_id, date_trunc('month', timestamp_utc) AS month,
           count(*) AS exposures, sum(COALESCE(arc_count, 0)) AS arcs
    FROM v_exposures
    WHERE tube_id IS NOT NULL
      AND (CAST(? AS TIMESTAMP) IS NULL OR timestamp_utc < CAST(? AS TIMESTAMP))
    GROUP BY ALL
)
SELECT ev.tube_id, ev.system_id, ev.month, ev.category, ev.events, COALESCE(ex.exposures, 0) AS exposures
FROM ev LEFT JOIN ex USING (tube_id, system_id, month)
WHERE ev.tube_id IS NOT NULL
UNION ALL
SELECT tube_id, system_id, month, 'arcs in exposure records' AS category, arcs AS events, exposures
FROM ex WHERE arcs > 0
"""

REJECTS_SQL = """
SELECT reason, field, count(*) AS rows, min(path) AS example_file, min(line) AS example_line
FROM rejects GROUP BY reason, field ORDER BY rows DESC, reason LIMIT 100
"""

INGEST_SQL = """
SELECT COALESCE(table_kind, '(undecided)') AS table_kind, status, count(*) AS files,
       sum(rows_read) AS rows_read, sum(rows_accepted) AS rows_accepted,
       sum(rows_rejected) AS rows_rejected, sum(rows_duplicate) AS rows_duplicate
FROM ingest_files GROUP BY ALL ORDER BY table_kind, status
"""

RECONCILIATION_SQL = """
SELECT 'exposures without a tube (no tube id and no installed tube at that time)' AS check_name,
       count(*) AS rows FROM v_exposures WHERE tube_id IS NULL
UNION ALL
SELECT 'exposures of systems missing from the systems table',
       count(*) FROM exposures e WHERE NOT EXISTS (SELECT 1 FROM systems s WHERE s.system_id = e.system_id)
UNION ALL
SELECT 'tubes without any exposure',
       count(*) FROM tubes t WHERE NOT EXISTS (SELECT 1 FROM v_exposures v WHERE v.tube_id = t.tube_id)
UNION ALL
SELECT 'rows read = accepted + rejected + duplicate (files where this fails)',
       count(*) FROM ingest_files
       WHERE status = 'ingested' AND rows_read <> rows_accepted + rows_rejected + rows_duplicate
"""

DOWNTIME_SQL = """
SELECT cause, planned, sum(epoch(end_utc - start_utc)) / 3600.0 AS downtime_h
FROM downtime
WHERE end_utc > start_utc AND (CAST(? AS TIMESTAMP) IS NULL OR start_utc < CAST(? AS TIMESTAMP))
GROUP BY ALL
"""


# ----------------------------------------------------------------------------------------------
# Loading (or computing) the results


def _health_tables(con: duckdb.DuckDBPyConnection, as_of: datetime | None, say: Any,
                   notes: list[str]) -> dict[str, pd.DataFrame | None]:
    names = ("result_health", "result_health_rul_cdf", "result_health_diameter",
             "result_health_projection", "result_health_changepoints")
    stored = as_of is None and _exists(con, "result_health")
    if stored:
        out: dict[str, pd.DataFrame | None] = {n: _read(con, n) for n in names if n not in _THINNED}
        out.update({n: _read_thinned(con, n) for n in _THINNED})
        out["result_health_drift"] = None  # binned in SQL below
        out["_drift_from_store"] = True  # type: ignore[assignment]
        return out
    say("health results not stored (or --as-of given): running the health analysis in memory ...")
    try:
        from tubetrack.health import analyse_fleet

        result = analyse_fleet(con, as_of=as_of)
    except Exception as exc:  # the report notes a failed section and goes on
        notes.append(f"Tube health analysis could not run: {type(exc).__name__}: {exc}")
        say(f"Note: health analysis failed: {type(exc).__name__}: {exc}")
        return {n: None for n in (*names, "result_health_drift")}
    tables = result.tables
    tables = tables() if callable(tables) else tables
    out = {n: tables.get(n) for n in (*names, "result_health_drift")}
    sd = getattr(getattr(result, "threshold", None), "sd", None)
    if sd is not None:
        out["_threshold_sd_pct"] = 100.0 * float(sd)  # type: ignore[assignment]
    return out


_THINNED = ("result_health_diameter", "result_health_projection")


def _read_thinned(con: duckdb.DuckDBPyConnection, table: str) -> pd.DataFrame | None:
    """A stored daily series table thinned in SQL to the points the charts draw per series."""
    from tubetrack.charts.health import MAX_POINTS_PER_SERIES

    if not _exists(con, table):
        return None
    frame = con.execute(THINNED_SERIES_SQL.format(table=table), [MAX_POINTS_PER_SERIES]).df()
    return frame if len(frame) else None


def _binned_drift(con: duckdb.DuckDBPyConnection, tube_ids: list[str] | None) -> pd.DataFrame | None:
    """``result_health_drift`` binned in time in SQL (so huge fleets never load daily rows)."""
    from tubetrack.charts.health import MAX_POINTS_PER_SERIES, bin_days_for
    from tubetrack.report import MAX_DRIFT_POINTS_TOTAL

    if not _exists(con, "result_health_drift"):
        return None
    where, params = "", []
    if tube_ids:
        where = "AND tube_id IN (SELECT unnest(CAST(? AS VARCHAR[])))"
        params = [list(tube_ids)]
    row = con.execute(
        "SELECT epoch(max(CAST(day AS TIMESTAMP)) - min(CAST(day AS TIMESTAMP))) / 86400.0, "
        f"count(DISTINCT (tube_id, focal_spot, tube_current_ma)) FROM result_health_drift WHERE true {where}",
        params,
    ).fetchone()
    if not row or row[0] is None:
        return None
    span_days, n_series = float(row[0]), max(1, int(row[1]))
    max_points = int(min(MAX_POINTS_PER_SERIES, max(30, MAX_DRIFT_POINTS_TOTAL // n_series)))
    width = bin_days_for(span_days, max_points)
    return con.execute(DRIFT_BINNED_SQL.format(where=where), [width, *params]).df()


def _fleet_tables(con: duckdb.DuckDBPyConnection, as_of: datetime | None, rul_cdf: pd.DataFrame | None,
                  say: Any, notes: list[str]) -> dict[str, Any]:
    import numpy as np

    out: dict[str, Any] = {}
    use_store = as_of is None
    km = _read(con, "result_fleet_km") if use_store else None
    if km is not None and "group_by" in km.columns and (km["group_by"] != "fleet").any():
        km = None  # stored by group: compute the fleet-wide curve below
    curve = _read(con, "result_fleet_survival_curve") if km is not None else None
    surv = _read(con, "result_fleet_survival") if km is not None else None
    forecast = _read(con, "result_fleet_forecast") if use_store else None
    budget = _read(con, "result_fleet_budget") if use_store else None
    spares = _read(con, "result_fleet_spares") if use_store else None
    mtbf = _read(con, "result_fleet_mtbf") if use_store else None
    visits = _read(con, "result_fleet_visits") if use_store else None

    life = None
    as_of_ts = None

    def life_data() -> Any:
        nonlocal life, as_of_ts
        if life is None:
            from tubetrack.fleet.lifedata import load_life_data
            from tubetrack.fleet.models import default_as_of

            as_of_ts = default_as_of(con, as_of)
            life = load_life_data(con, as_of_ts)
        return life

    def attempt(what: str, func: Any) -> Any:
        import warnings

        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                return func()
        except Exception as exc:  # the report notes a failed section and goes on
            notes.append(f"{what} could not be computed: {type(exc).__name__}: {exc}")
            say(f"Note: {what} skipped: {type(exc).__name__}: {exc}")
            return None

    if km is None:
        say("fleet survival not stored: computing it in memory ...")

        def run_survival() -> tuple[Any, Any, Any]:
            from tubetrack.fleet.survival import survival_by_group

            tab = life_data().table("days")
            res = survival_by_group(tab, None)
            fit = next(iter(res.fits.values()), None)
            grid_curve = None
            if fit is not None:
                t_max = float(tab["exit"].max())
                grid_curve = fit.survival_bounds(np.linspace(t_max / 200, t_max * 1.5, 150))
            return res.km, grid_curve, res.summary

        got = attempt("Tube survival", run_survival)
        if got is not None:
            km, curve, surv = got
    fc_obj = None
    if forecast is None or spares is None:
        say("fleet forecast not stored: computing it in memory ...")

        def run_forecast() -> Any:
            from tubetrack.fleet.forecast import replacement_forecast
            from tubetrack.fleet.models import fit_fleet_models

            lf = life_data()
            models = fit_fleet_models(lf, "days")
            health = rul_cdf[["tube_id", "focal_spot", "horizon_days", "p_end_of_life"]] if rul_cdf is not None else None
            return replacement_forecast(lf.frame, models.all_cause, as_of=as_of_ts, months=12,
                                        other_fit=models.other, health_rul_cdf=health, clock="days")

        fc_obj = attempt("Replacement forecast", run_forecast)
        if fc_obj is not None:
            forecast = fc_obj.summary if forecast is None else forecast
    if budget is None and fc_obj is not None:
        def run_budget() -> Any:
            from tubetrack.fleet.budget import spend_forecast

            return spend_forecast(fc_obj, None, n_sims=5000).summary

        budget = attempt("Spend forecast", run_budget)
    if spares is None and fc_obj is not None:
        def run_spares() -> Any:
            from tubetrack.fleet.budget import spares_plan

            return spares_plan(fc_obj, 0.95).summary

        spares = attempt("Spares", run_spares)
    if mtbf is None:
        say("uptime not stored: computing it in memory ...")

        def run_uptime() -> Any:
            from tubetrack import store
            from tubetrack.fleet.models import default_as_of
            from tubetrack.fleet.uptime import uptime

            end = default_as_of(con, as_of)
            begin = _scalar(con, "SELECT least((SELECT min(timestamp_utc) FROM exposures), "
                                 "(SELECT min(start_utc) FROM downtime))")
            if begin is None:
                return None
            return uptime(store.load_downtime(con), store.load_systems(con), start=begin, end=end).summary

        mtbf = attempt("Uptime", run_uptime)

    # Shapes the charts take (docs/reports.md).
    if km is not None:
        if "group" in km.columns and km["group"].nunique() > 1:
            km = km[km["group"] == km["group"].iloc[0]]
        out["km"] = km.drop(columns=[c for c in ("group", "group_by") if c in km.columns])
    if curve is not None and len(curve):
        if "group" in curve.columns:
            curve = curve[curve["group"] == curve["group"].iloc[0]]
        out["weibull_curve"] = curve
    if surv is not None and len(surv) and {"eta", "beta"} <= set(surv.columns):
        params = surv.dropna(subset=["eta", "beta"])
        if len(params):
            keep = [c for c in ("eta", "eta_lower", "eta_upper", "beta", "beta_lower", "beta_upper",
                                "b10_life", "median_life", "n", "failures") if c in params.columns]
            out["weibull_params"] = params[keep].head(1).reset_index(drop=True)
    if forecast is not None:
        out["forecast"] = forecast
    if budget is not None and len(budget):
        b = budget
        if "period_kind" in b.columns:
            b = b[b["period_kind"] == "month"]
        b = b.rename(columns={"period_start": "month"})
        if "month" in b.columns:
            out["budget"] = b
    if spares is not None and len(spares):
        s = spares.rename(columns={"group": "model_label", "expected_replacements": "expected_demand"})
        if {"model_label", "spares_needed", "expected_demand"} <= set(s.columns):
            out["spares"] = s
    if mtbf is not None and len(mtbf):
        out["uptime"] = mtbf
    if visits is not None:
        keep = [c for c in ("rank", "site", "system_id", "score", "risk", "impact", "reason") if c in visits.columns]
        out["visits"] = visits[keep]
    return out


def _backtest_frames(con: duckdb.DuckDBPyConnection) -> dict[str, Any]:
    """Backtest metrics, cases and (horizon, probability, outcome) pairs, as stored."""
    import pandas as pd

    out: dict[str, Any] = {}
    metrics = _read(con, "result_backtest")
    if metrics is not None:
        out["backtest"] = metrics
    cases = _read(con, "result_backtest_cases")
    if cases is None:
        return out
    rename = {}
    for want, options in {
        "true_rul_days": ("true_rul_days", "rul_true_days", "actual_rul_days"),
        "cutoff": ("cutoff", "cut_off", "cutoff_utc", "as_of", "cut_off_utc"),
        "cause": ("cause", "removal_reason", "true_cause"),
    }.items():
        for o in options:
            if o in cases.columns:
                rename[o] = want
                break
    c = cases.rename(columns=rename)
    if {"true_rul_days", "rul_days_p10", "rul_days_p50", "rul_days_p90"} <= set(c.columns):
        known = c["true_rul_days"].notna()
        if "cause" in c.columns:
            # Forecast against actual is drawn for the failures the filament can foresee.
            known &= c["cause"].eq("filament")
        out["backtest_cases"] = c[known]
    pairs = []
    for h in HORIZONS_DAYS:
        p_col = f"p_end_of_life_{h}d"
        if p_col not in c.columns:
            continue
        outcome = next((o for o in (f"filament_within_{h}d", f"failed_within_{h}d", f"event_{h}d",
                                    f"outcome_{h}d") if o in c.columns), None)
        usable = c[p_col].notna()
        if f"censored_{h}d" in c.columns:
            usable &= ~c[f"censored_{h}d"].astype(bool)
        if outcome is not None:
            pairs.append(pd.DataFrame({"horizon_days": h, "p_predicted": c.loc[usable, p_col],
                                       "outcome": c.loc[usable, outcome].astype(float)}))
    if pairs:
        out["backtest_outcomes"] = pd.concat(pairs, ignore_index=True)
    return out


def load_report_inputs(
    con: duckdb.DuckDBPyConnection,
    *,
    as_of: datetime | None = None,
    tube_ids: list[str] | None = None,
    say: Any = None,
) -> ReportInputs:
    """Collect every frame the report shows from an open store (see module docstring)."""
    from tubetrack import __version__, store
    from tubetrack.report import ReportInputs

    say = say or (lambda _m: None)
    notes: list[str] = []
    health = _health_tables(con, as_of, say, notes)
    threshold_sd_mem = health.pop("_threshold_sd_pct", None)
    if health.pop("_drift_from_store", False):  # type: ignore[arg-type]
        drift = _binned_drift(con, tube_ids)
    else:
        drift = health.get("result_health_drift")
    summary = health.get("result_health")
    fleet = _fleet_tables(con, as_of, health.get("result_health_rul_cdf"), say, notes)
    bt = _backtest_frames(con) if as_of is None else {}
    as_of_param = [as_of, as_of]
    fault_rates = con.execute(FAULT_RATES_SQL, [*as_of_param, *as_of_param]).df()
    downtime = con.execute(DOWNTIME_SQL, as_of_param).df()
    data_start, data_end = store.data_span(con)
    threshold, threshold_sd = 5.13, threshold_sd_mem
    analysed_at, code_version, result_as_of = None, __version__, as_of
    if summary is not None and len(summary):
        if "threshold_pct" in summary.columns and summary["threshold_pct"].notna().any():
            threshold = float(summary["threshold_pct"].dropna().iloc[0])
        if "threshold_sd_pct" in summary.columns and summary["threshold_sd_pct"].notna().any():
            threshold_sd = float(summary["threshold_sd_pct"].dropna().iloc[0])
        if "analysed_at_utc" in summary.columns:
            analysed_at = summary["analysed_at_utc"].max()
        if "code_version" in summary.columns and summary["code_version"].notna().any():
            code_version = str(summary["code_version"].dropna().iloc[0])
        if result_as_of is None and "as_of" in summary.columns:
            result_as_of = summary["as_of"].max()
    else:
        notes.append("No tube health results: the tube sections are empty.")
        from tubetrack.physics import END_OF_LIFE_DIAMETER_LOSS

        threshold = 100.0 * float(END_OF_LIFE_DIAMETER_LOSS)
    if result_as_of is None:
        result_as_of = data_end
    if analysed_at is None:
        analysed_at = _scalar(con, "SELECT max(finished_at_utc) FROM analysis_runs")
    systems = store.load_systems(con)
    tubes = store.load_tubes(con)
    if threshold_sd is not None and not math.isfinite(threshold_sd):
        threshold_sd = None
    return ReportInputs(
        health=summary,
        rul_cdf=health.get("result_health_rul_cdf"),
        drift=drift,
        diameter=health.get("result_health_diameter"),
        projection=health.get("result_health_projection"),
        changepoints=health.get("result_health_changepoints"),
        systems=systems,
        tubes=tubes,
        fault_rates=fault_rates,
        downtime=downtime if len(downtime) else None,
        rejects=con.execute(REJECTS_SQL).df(),
        ingest_files=con.execute(INGEST_SQL).df(),
        reconciliation=con.execute(RECONCILIATION_SQL).df(),
        threshold_pct=threshold,
        threshold_sd_pct=threshold_sd,
        as_of=result_as_of,
        data_start=data_start,
        data_end=data_end,
        analysed_at_utc=analysed_at,
        code_version=code_version,
        notes=tuple(notes),
        **fleet,
        **bt,
    )


def register(app: typer.Typer) -> None:
    """Add ``tubetrack report`` to ``app``."""

    @app.command(
        "report",
        help=(
            "Write offline HTML reports: a fleet report (reports/fleet.html), one page per tube "
            "(reports/tubes/) and PNG + SVG of every chart (reports/img/). Uses the stored results "
            "and runs missing analyses in memory. The pages open from a file with no network.\n\n"
            + SAFETY_NOTE
        ),
    )
    @handle_errors
    def report_cmd(
        db: DbOption = None,
        out: Annotated[
            Path, typer.Option("--out", help="Output folder for the report files. Default: reports.")
        ] = Path("reports"),
        as_of: AsOfOption = None,
        tube: Annotated[
            list[str] | None,
            typer.Option("--tube", help="Write pages only for this tube id (repeat the option for more). "
                         "Default: every tube with health results.", show_default=False),
        ] = None,
        no_images: Annotated[
            bool, typer.Option("--no-images", help="Skip the PNG and SVG files (faster).")
        ] = False,
        tube_images: Annotated[
            int, typer.Option("--tube-images", min=0,
                              help="Also write PNG + SVG drift charts for this many tubes, riskiest first "
                              "[tubes]. Default: 6.")
        ] = 6,
        js: Annotated[
            str, typer.Option("--js", help="JavaScript in tube pages: inline (every page self-contained), "
                              "shared (one local file under assets/), or auto (inline up to 200 tube "
                              "pages). Default: auto.")
        ] = "auto",
        quiet: QuietOption = False,
    ) -> None:
        import time

        from tubetrack import store
        from tubetrack.errors import InputError
        from tubetrack.report import write_report

        if js not in ("auto", "inline", "shared"):
            raise InputError(f"--js is {js!r}; use auto, inline or shared.")
        started = time.perf_counter()
        as_of_dt = parse_as_of(as_of)
        con = store.connect(db, read_only=True)
        try:
            inputs = load_report_inputs(con, as_of=as_of_dt, tube_ids=list(tube) if tube else None,
                                        say=lambda m: stderr(m, quiet))
        finally:
            con.close()
        if tube:
            known = set() if inputs.health is None else set(inputs.health["tube_id"].astype(str))
            missing = [t for t in tube if t not in known]
            if missing:
                raise InputError(
                    f"--tube {missing[0]!r} has no health results. Check the id with `tubetrack tubes`."
                )
        for note in inputs.notes:
            stderr(f"Note: {note}", quiet)
        files = write_report(inputs, out, images=not no_images, tube_ids=list(tube) if tube else None,
                             tube_images=tube_images, js=js, progress=lambda m: stderr(m, quiet))
        typer.echo(f"{files.fleet_html}")
        stderr(
            f"Wrote {files.fleet_html}, {len(files.tube_pages):,} tube page(s) under {Path(out) / 'tubes'} and "
            f"{len(files.images):,} image(s) in {time.perf_counter() - started:.1f} s. "
            "Open the HTML files from disk; they need no network.",
            quiet,
        )
