"""Fleet entry point: one SQL aggregation, a per-tube step over a process pool, fleet threshold.

:func:`analyse_fleet` reads the store (the only function here that touches a connection) and
hands plain DataFrames to :func:`analyse_frames`, which the backtest calls directly with the same
daily statistics cut at each date (whole days, so cutting the aggregate equals aggregating the cut
data).
"""

from __future__ import annotations

from collections.abc import Callable
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field
from datetime import datetime
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from tubetrack import __version__
from tubetrack.health import sql
from tubetrack.health.forecast import (
    CDF_HORIZONS_DAYS,
    analyse_tube_task,
    forecast_from_state,
    update_state,
    wiener_cross_check,
)
from tubetrack.health.levels import assign_levels
from tubetrack.health.params import HealthParams
from tubetrack.health.drift import as_datetime
from tubetrack.health.threshold import (
    Threshold,
    failed_focal_losses,
    learn_threshold,
    surviving_focal_losses,
)

if TYPE_CHECKING:  # pragma: no cover
    import duckdb

#: Column order of ``result_health``, extra diagnostic columns follow.
SUMMARY_COLUMNS = (
    "tube_id", "system_id", "site", "focal_spot", "health_level", "health_rank", "reason",
    "diameter_loss_pct", "diameter_loss_pct_se", "rul_days_p10", "rul_days_p50", "rul_days_p90",
    "rul_exposures_p10", "rul_exposures_p50", "rul_exposures_p90", "p_end_of_life_30d",
    "p_end_of_life_90d", "p_end_of_life_180d", "arc_rate_per_1000", "signals", "as_of",
    "analysed_at_utc", "code_version",
)
EXTRA_COLUMNS = (
    "threshold_pct", "threshold_sd_pct", "threshold_source", "wear_rate_pct_per_day", "wear_factor_k", "wear_factor_k_se", "history_days",
    "days_with_current", "pre_log_gap_days", "current_drop_pct", "current_drop_station_ma",
    "arc_rate_recent_per_1000", "arc_trend_p", "ma_miss_fraction", "resistance_change_pct",
    "unforeseeable", "rul_days_p50_wiener", "p_end_of_life_180d_wiener", "kv_model",
    "kv_slope_per_kv", "exposures_per_day",
)


@dataclass(frozen=True)
class HealthResult:
    """Tube-health results at one analysis date."""

    summary: pd.DataFrame
    rul_cdf: pd.DataFrame
    drift: pd.DataFrame
    diameter: pd.DataFrame
    projection: pd.DataFrame
    changepoints: pd.DataFrame
    threshold: Threshold
    as_of: datetime
    params: dict[str, Any] = field(default_factory=dict)

    def tables(self) -> dict[str, pd.DataFrame]:
        """Result table name -> frame, as written by the CLI."""
        return {
            "result_health": self.summary,
            "result_health_rul_cdf": self.rul_cdf,
            "result_health_drift": self.drift,
            "result_health_diameter": self.diameter,
            "result_health_projection": self.projection,
            "result_health_changepoints": self.changepoints,
        }


def tubes_as_of(tubes: pd.DataFrame, as_of: pd.Timestamp) -> pd.DataFrame:
    """Tubes installed before ``as_of``; removals on or after it are hidden (not known yet)."""
    t = tubes[pd.to_datetime(tubes["installed_at_utc"]) < as_of].copy()
    late = pd.to_datetime(t["removed_at_utc"]) >= as_of
    t.loc[late, "removed_at_utc"] = pd.NaT
    t.loc[late, "removal_reason"] = None
    return t


def fleet_k_priors(states: list[dict[str, Any]], params: HealthParams) -> dict[str, tuple[float, float]]:
    """Empirical-Bayes prior of the physics calibration factor k per focal spot.

    From filaments with at least ``fleet_prior_min_days`` of history and a well-determined k
    (flat-prior standard error below 30 % of k): the median of k and its robust spread
    1.4826 x MAD, floored at 5 % of the median (Efron & Morris, "Data analysis using Stein's
    estimator and its generalizations", J. Am. Stat. Assoc. 70 (1975) 311, the idea of estimating
    a prior from the ensemble). Focal spots with fewer than ``fleet_prior_min_tubes`` such
    filaments keep the configured prior.
    """
    out: dict[str, tuple[float, float]] = {}
    frame = pd.DataFrame([{k: st[k] for k in ("focal_spot", "flat_k", "flat_k_se", "span_days")} for st in states]) \
        if states else pd.DataFrame(columns=["focal_spot", "flat_k", "flat_k_se", "span_days"])
    ok = frame[(frame["span_days"] >= params.fleet_prior_min_days) & np.isfinite(frame["flat_k"])
               & (frame["flat_k"] > 0) & (frame["flat_k_se"] < 0.3 * frame["flat_k"].abs())]
    for focal, g in ok.groupby("focal_spot"):
        if len(g) < params.fleet_prior_min_tubes:
            continue
        k = g["flat_k"].to_numpy(float)
        med = float(np.median(k))
        sd = max(1.4826 * float(np.median(np.abs(k - med))), 0.05 * med)
        out[str(focal)] = (med, sd)
    return out


def _run(tasks: list[tuple], params: HealthParams) -> list[dict[str, Any]]:
    if params.workers <= 1 or len(tasks) < params.serial_below:
        return [analyse_tube_task(t) for t in tasks]
    chunk = max(1, len(tasks) // (params.workers * 8))
    with ProcessPoolExecutor(max_workers=params.workers) as pool:
        return list(pool.map(analyse_tube_task, tasks, chunksize=chunk))


def analyse_frames(
    daily: pd.DataFrame,
    tubes: pd.DataFrame,
    as_of: datetime,
    params: HealthParams | None = None,
    calibrations: pd.DataFrame | None = None,
    events: pd.DataFrame | None = None,
    analysed_at: datetime | None = None,
    runner: Callable[[list[tuple], HealthParams], list[dict[str, Any]]] | None = None,
) -> HealthResult:
    """Pure fleet analysis on aggregated frames (see :func:`analyse_fleet`).

    Parameters
    ----------
    daily
        ``sql.DAILY_SQL`` rows; rows on or after ``as_of`` are ignored.
    tubes
        tube_id, system_id, site, installed_at_utc, removed_at_utc, removal_reason (all known,
        removals after ``as_of`` are hidden here).
    as_of
        Analysis date (a day boundary, UTC): only data before it is used.
    runner
        Runs the per-tube tasks ``(daily, meta, params, calibrations, events)`` through
        :func:`tubetrack.health.forecast.analyse_tube_task` and returns their results in order;
        default: the local process pool (another engine, e.g. Spark, passes its own).
    """
    p = params or HealthParams()
    cut = pd.Timestamp(as_of)
    day = as_datetime(daily["day"])
    d = daily[day < cut].assign(day=day[day < cut])
    cal = calibrations if calibrations is not None else pd.DataFrame(columns=["tube_id", "focal_spot", "day"])
    cal = cal[as_datetime(cal["day"]) < cut] if len(cal) else cal
    ev = events if events is not None else pd.DataFrame(columns=["tube_id", "category", "day", "n_events"])
    ev = ev[as_datetime(ev["day"]) < cut] if len(ev) else ev
    known = tubes_as_of(tubes, cut)
    by_tube = {k: g for k, g in d.groupby("tube_id", sort=True)}
    cal_by = {k: g for k, g in cal.groupby("tube_id")} if len(cal) else {}
    ev_by = {k: g for k, g in ev.groupby("tube_id")} if len(ev) else {}
    tasks, metas = [], {}
    for t in known.itertuples(index=False):
        tid = str(t.tube_id)
        if tid not in by_tube:
            continue
        removed = pd.notna(t.removed_at_utc)
        t_as_of = pd.Timestamp(t.removed_at_utc).normalize() + pd.Timedelta(days=1) if removed else cut
        meta = {"tube_id": tid, "system_id": t.system_id, "site": getattr(t, "site", None),
                "installed_at_utc": t.installed_at_utc, "as_of": min(t_as_of, cut),
                "removal_reason": t.removal_reason if removed else None}
        metas[tid] = meta
        tasks.append((by_tube[tid], meta, p, cal_by.get(tid), ev_by.get(tid)))
    results = (runner or _run)(tasks, p)
    # --- empirical-Bayes prior of the physics calibration factor k, per focal spot
    priors = fleet_k_priors([st for r in results for st in r["states"]], p)
    for r in results:
        r["states"] = [update_state(st, *priors.get(st["focal_spot"], (p.prior_k_mean, p.prior_k_sd)))
                       for st in r["states"]]
    states = [st for r in results for st in r["states"]]
    removed_tubes = known[known["removed_at_utc"].notna()]
    failed = failed_focal_losses(states, removed_tubes)
    thr = learn_threshold(
        failed, p.eol_diameter_loss, p.eol_diameter_loss_sd, p.min_failures_for_threshold,
        survivors=surviving_focal_losses(states, failed),
    )
    in_service = {tid for tid, m in metas.items() if m["removal_reason"] is None}
    summaries, cdf_rows, proj_rows = [], [], []
    for r in results:
        # diameter series: total loss = loss since baseline + k x_b with the refitted k
        if len(r["diameter"]):
            shift = {st["focal_spot"]: 100.0 * st["k"] * st["x_b"] for st in r["states"]}
            dm = r["diameter"]
            add = dm["focal_spot"].map(shift).to_numpy(float)
            for col in ("diameter_loss_pct", "diameter_loss_pct_lo", "diameter_loss_pct_hi"):
                dm[col] = dm["loss_since_baseline_pct" if col == "diameter_loss_pct" else
                             col.replace("diameter_loss_pct", "loss_since_baseline_pct")] + add
            r["diameter"] = dm[["tube_id", "focal_spot", "day", "diameter_loss_pct", "diameter_loss_pct_lo",
                                "diameter_loss_pct_hi"]]
        if r["summary"].empty or str(r["summary"]["tube_id"].iloc[0]) not in in_service:
            continue
        s = r["summary"].copy()
        for i, st in enumerate(r["states"]):
            fc = forecast_from_state(st, thr.mean, thr.sd, p, thr.df)
            row = s.index[i]
            for key in ("rul_days_p10", "rul_days_p50", "rul_days_p90", "rul_exposures_p10",
                        "rul_exposures_p50", "rul_exposures_p90", "p_end_of_life_30d",
                        "p_end_of_life_90d", "p_end_of_life_180d"):
                s.loc[row, key] = fc[key]
            s.loc[row, "diameter_loss_pct"] = 100.0 * st["loss_now"]
            s.loc[row, "diameter_loss_pct_se"] = 100.0 * st["loss_se"]
            s.loc[row, "wear_factor_k"] = st["k"]
            s.loc[row, "wear_factor_k_se"] = float(np.sqrt(st["cov"][1, 1]))
            s.loc[row, "wear_rate_pct_per_day"] = 100.0 * max(st["k"], 0.0) * st["rate_phys_per_day"]
            w50, w180 = wiener_cross_check(st, thr.mean, p.max_rul_days)
            s.loc[row, "rul_days_p50_wiener"] = w50
            s.loc[row, "p_end_of_life_180d_wiener"] = w180
            cdf, proj = fc["cdf"], fc["projection"]
            cdf_rows.append(pd.DataFrame({"tube_id": st["tube_id"], "focal_spot": st["focal_spot"],
                                          "horizon_days": np.asarray(CDF_HORIZONS_DAYS, int),
                                          "p_end_of_life": cdf}))
            proj_rows.append(pd.DataFrame({
                "tube_id": st["tube_id"], "focal_spot": st["focal_spot"],
                "day": cut + pd.to_timedelta(proj["offset_days"], unit="D"),
                "diameter_loss_pct_p10": proj["diameter_loss_pct_p10"].to_numpy(),
                "diameter_loss_pct_p50": proj["diameter_loss_pct_p50"].to_numpy(),
                "diameter_loss_pct_p90": proj["diameter_loss_pct_p90"].to_numpy()}))
        summaries.append(s)
    summary = pd.concat(summaries, ignore_index=True) if summaries else pd.DataFrame(
        columns=[c for c in (*SUMMARY_COLUMNS, *EXTRA_COLUMNS) if c not in ("health_level", "health_rank",
                                                                          "reason", "signals", "as_of",
                                                                          "analysed_at_utc", "code_version",
                                                                          "threshold_pct", "threshold_sd_pct",
                                                                          "threshold_source")]
        + ["signature_level", "signature_reasons", "signals_list"])
    summary = assign_levels(summary, thr.mean, p.min_history_days, p.max_rul_days)
    summary["as_of"] = cut
    summary["analysed_at_utc"] = pd.Timestamp(analysed_at) if analysed_at else pd.Timestamp.now("UTC").tz_localize(None)
    summary["code_version"] = __version__
    summary["threshold_pct"] = 100.0 * thr.mean
    summary["threshold_sd_pct"] = 100.0 * thr.sd  # spread of the failure point [% of diameter]
    summary["threshold_source"] = thr.source
    cols = [c for c in (*SUMMARY_COLUMNS, *EXTRA_COLUMNS) if c in summary.columns]
    summary = summary[cols].sort_values(
        ["health_rank", "p_end_of_life_180d", "rul_days_p50", "tube_id", "focal_spot"],
        ascending=[False, False, True, True, True], ignore_index=True)

    def cat(key: str) -> pd.DataFrame:
        parts = [r[key] for r in results if len(r[key])]
        return pd.concat(parts, ignore_index=True) if parts else results[0][key] if results else pd.DataFrame()

    return HealthResult(
        summary=summary,
        rul_cdf=pd.concat(cdf_rows, ignore_index=True) if cdf_rows else pd.DataFrame(
            columns=["tube_id", "focal_spot", "horizon_days", "p_end_of_life"]),
        drift=cat("drift"),
        diameter=cat("diameter"),
        projection=pd.concat(proj_rows, ignore_index=True) if proj_rows else pd.DataFrame(
            columns=["tube_id", "focal_spot", "day", "diameter_loss_pct_p10", "diameter_loss_pct_p50",
                     "diameter_loss_pct_p90"]),
        changepoints=cat("changepoints"),
        threshold=thr,
        as_of=cut.to_pydatetime(),
        params=p.to_dict(),
    )


def effective_as_of(con: duckdb.DuckDBPyConnection, as_of: datetime | None) -> datetime:
    """The analysis date: ``as_of`` as given, else the day after the last exposure."""
    from tubetrack.errors import AnalysisError

    if as_of is not None:
        return as_of
    end = sql.data_end(con)
    if end is None:
        raise AnalysisError(
            "the store holds no exposures. Ingest logs first (`tubetrack ingest PATH`)."
        )
    return (pd.Timestamp(end).normalize() + pd.Timedelta(days=1)).to_pydatetime()


def load_inputs(con: duckdb.DuckDBPyConnection, as_of: datetime | None, params: HealthParams) -> dict:
    """The aggregated inputs of the analysis (one SQL query for the exposures)."""
    return {
        "daily": sql.load_daily(con, as_of),
        "calibrations": sql.load_calibrations(con, as_of),
        "events": sql.load_events(con, as_of),
        "tubes": sql.load_tubes(con, None),
    }


def analyse_fleet(
    con: duckdb.DuckDBPyConnection,
    as_of: datetime | None = None,
    params: HealthParams | None = None,
) -> HealthResult:
    """Analyse every tube in the store as of a date.

    Parameters
    ----------
    con
        Open store.
    as_of
        Only data strictly before this time (UTC) are used, and removals on or after it are not
        known. Default: the day after the last exposure.
    params
        :class:`HealthParams` (defaults documented in docs/health.md).

    Returns
    -------
    HealthResult
        ``.summary`` (result_health), ``.rul_cdf``, ``.drift``, ``.diameter``, ``.projection``,
        ``.changepoints``, ``.threshold``.
    """
    p = params or HealthParams()
    cut = effective_as_of(con, as_of)
    inputs = load_inputs(con, cut, p)
    return analyse_frames(inputs["daily"], inputs["tubes"], cut, p,
                          calibrations=inputs["calibrations"], events=inputs["events"])
