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

from tubetrack import __version__, store
from tubetrack.health import sql
from tubetrack.health.drift import as_datetime
from tubetrack.health.forecast import (
    CDF_HORIZONS_DAYS,
    analyse_tube_task,
    forecast_task,
    update_state,
)
from tubetrack.health.levels import assign_levels
from tubetrack.health.params import HealthParams
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
    "days_with_current", "pre_log_gap_days", "unlogged_days_at_end", "logs_stopped", "current_drop_pct", "current_drop_station_ma",
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
    if not states:
        return out
    frame = pd.DataFrame([{k: st[k] for k in ("focal_spot", "flat_k", "flat_k_se", "span_days")} for st in states])
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


#: Tubes per chunk of :func:`analyse_fleet`: the daily statistics of one chunk are queried,
#: analysed and dropped before the next (peak memory bounded by the chunk, not the fleet).
CHUNK_TUBES = 200

#: Result keys the fleet step needs from each tube (the rest is not kept).
_KEEP = ("summary", "states", "drift", "diameter", "changepoints")


#: Columns of the per-tube diameter frame kept until the fleet step (the total loss columns are
#: recomputed there with the refitted k).
_DIAMETER_KEEP = ("tube_id", "focal_spot", "day", "loss_since_baseline_pct",
                  "loss_since_baseline_pct_lo", "loss_since_baseline_pct_hi")


def _columns(frame: pd.DataFrame) -> dict[str, np.ndarray] | pd.DataFrame:
    """A non-empty result frame as plain column arrays (no per-tube pandas overhead)."""
    if not len(frame):
        return frame
    return {c: frame[c].to_numpy() for c in frame.columns}


def _compact(result: dict[str, Any]) -> dict[str, Any]:
    """The parts of one tube's result the fleet step uses (per-tube projections are redone).

    The drift, diameter and change-point frames are kept as column arrays and joined column by
    column at the end (:func:`_join`), so the fleet's result tables are built without holding
    every tube's frames and their concatenation at once.
    """
    out = {k: result[k] for k in _KEEP}
    dm = out["diameter"]
    if len(dm) and "loss_since_baseline_pct" in dm.columns:
        out["diameter"] = dm[list(_DIAMETER_KEEP)]
    for key in ("drift", "diameter", "changepoints"):
        out[key] = _columns(out[key])
    return out


def _analyse_compact(args: tuple) -> dict[str, Any]:
    """Process-pool entry point of :func:`analyse_fleet`: one tube, compacted in the worker (the
    column arrays pickle faster than the frames, and the parent's serial share shrinks)."""
    return _compact(analyse_tube_task(args))


def _join(results: list[dict[str, Any]], key: str) -> tuple[dict[str, np.ndarray], pd.DataFrame | None]:
    """Concatenate one result table's column arrays over the tubes, releasing the parts.

    Returns the columns (in the order ``pd.concat`` would give: the first non-empty part's) and,
    when no tube has rows, the first tube's empty frame (or None without results).
    """
    parts = [r[key] for r in results if isinstance(r[key], dict)]
    if not parts:
        return {}, (results[0][key] if results else None)
    names = list(parts[0])
    for part in parts[1:]:
        names += [c for c in part if c not in names]
    for r in results:
        r[key] = None
    out = {}
    for c in names:
        out[c] = np.concatenate([part.pop(c) for part in parts])
    return out, None


def _cut_inputs(
    daily: pd.DataFrame | None,
    tubes: pd.DataFrame,
    cut: pd.Timestamp,
    calibrations: pd.DataFrame | None,
    events: pd.DataFrame | None,
) -> tuple[pd.DataFrame | None, pd.DataFrame, dict, dict]:
    """Rows before ``cut`` (no copy when nothing is cut), known tubes, calibrations/events by tube."""
    d = _before(daily, cut) if daily is not None else None
    cal = calibrations if calibrations is not None else pd.DataFrame(columns=["tube_id", "focal_spot", "day"])
    cal = cal[as_datetime(cal["day"]) < cut] if len(cal) else cal
    ev = events if events is not None else pd.DataFrame(columns=["tube_id", "category", "day", "n_events"])
    ev = ev[as_datetime(ev["day"]) < cut] if len(ev) else ev
    known = tubes_as_of(tubes, cut)
    cal_by = {k: g for k, g in cal.groupby("tube_id")} if len(cal) else {}
    ev_by = {k: g for k, g in ev.groupby("tube_id")} if len(ev) else {}
    return d, known, cal_by, ev_by


def _before(daily: pd.DataFrame, cut: pd.Timestamp) -> pd.DataFrame:
    converted = daily["day"].dtype.kind != "M"
    day = as_datetime(daily["day"])
    keep = (day < cut).to_numpy()
    if keep.all():
        return daily.assign(day=day) if converted else daily  # no copy in the usual case
    return daily[keep].assign(day=day[keep])


def _split_by_tube(d: pd.DataFrame) -> dict[str, pd.DataFrame]:
    """Each tube's rows as a slice of the tube-sorted frame (views; rows keep their order)."""
    if d.empty:
        return {}
    codes, uniques = pd.factorize(d["tube_id"], sort=True)
    if codes.size > 1 and not (codes[1:] >= codes[:-1]).all():
        order = np.argsort(codes, kind="stable")
        d, codes = d.take(order), codes[order]
    present = codes >= 0  # missing tube ids sort first as -1
    first = int(np.argmax(present)) if present.any() else codes.size
    bounds = np.searchsorted(codes, np.arange(len(uniques) + 1), side="left")
    bounds[0] = max(bounds[0], first)
    return {str(u): d.iloc[bounds[i]:bounds[i + 1]] for i, u in enumerate(uniques)}


def _tasks(
    by_tube: dict[str, pd.DataFrame],
    known: pd.DataFrame,
    cut: pd.Timestamp,
    p: HealthParams,
    cal_by: dict,
    ev_by: dict,
    metas: dict[str, dict[str, Any]],
) -> list[tuple]:
    tasks = []
    for t in known.itertuples(index=False):
        tid = str(t.tube_id)
        if tid not in by_tube:
            continue
        removed = pd.notna(t.removed_at_utc)
        t_as_of = pd.Timestamp(t.removed_at_utc).normalize() + pd.Timedelta(days=1) if removed else cut
        meta = {"tube_id": tid, "system_id": t.system_id, "site": getattr(t, "site", None),
                "installed_at_utc": t.installed_at_utc, "as_of": min(t_as_of, cut),
                "removal_reason": t.removal_reason if removed else None, "removed": bool(removed),
                # the fleet step forecasts with the learned threshold; skip the per-tube one
                "forecast": False}
        metas[tid] = meta
        tasks.append((by_tube[tid], meta, p, cal_by.get(tid), ev_by.get(tid)))
    return tasks


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
    d, known, cal_by, ev_by = _cut_inputs(daily, tubes, cut, calibrations, events)
    metas: dict[str, dict[str, Any]] = {}
    tasks = _tasks(_split_by_tube(d), known, cut, p, cal_by, ev_by, metas)
    del d
    results = [_compact(r) for r in (runner or _run)(tasks, p)]
    del tasks
    return _fleet_step(results, metas, known, cut, p, analysed_at)


def _fleet_step(
    results: list[dict[str, Any]],
    metas: dict[str, dict[str, Any]],
    known: pd.DataFrame,
    cut: pd.Timestamp,
    p: HealthParams,
    analysed_at: datetime | None,
    mapper: Callable[[Callable[[Any], Any], list[Any]], Any] | None = None,
) -> HealthResult:
    """Empirical-Bayes prior, threshold, forecasts, levels and result tables from per-tube results.

    ``mapper(function, items)`` runs the per-state forecasts (in order), e.g. a process pool's
    ``map``; default the built-in ``map``.
    """
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
    # removed = a removal date before the analysis date (the reason may be missing)
    in_service = {tid for tid, m in metas.items() if not m["removed"]}
    # diameter series: total loss = loss since baseline + k x_b with the refitted k
    shift = {(st["tube_id"], st["focal_spot"]): 100.0 * st["k"] * st["x_b"] for st in states}
    summaries, served = [], []
    for r in results:
        if r["summary"].empty or str(r["summary"]["tube_id"].iloc[0]) not in in_service:
            continue
        summaries.append(r["summary"])
        served.extend(r["states"])
    fc_keys = ("rul_days_p10", "rul_days_p50", "rul_days_p90", "rul_exposures_p10",
               "rul_exposures_p50", "rul_exposures_p90", "p_end_of_life_30d",
               "p_end_of_life_90d", "p_end_of_life_180d")
    cols: dict[str, list[float]] = {k: [] for k in (*fc_keys, "diameter_loss_pct", "diameter_loss_pct_se",
                                                    "wear_factor_k", "wear_factor_k_se",
                                                    "wear_rate_pct_per_day", "rul_days_p50_wiener",
                                                    "p_end_of_life_180d_wiener")}
    cdfs, pq10, pq50, pq90, ids, focals = [], [], [], [], [], []
    proj_offsets = None
    # the Monte Carlo forecasts are independent given the threshold: the pool's map when given
    forecasts = (mapper or map)(forecast_task, [(st, thr.mean, thr.sd, p, thr.df) for st in served])
    for st, (fc, cdf, offsets, quantiles) in zip(served, forecasts, strict=True):
        for key in (*fc_keys, "rul_days_p50_wiener", "p_end_of_life_180d_wiener"):
            cols[key].append(fc[key])
        cols["diameter_loss_pct"].append(100.0 * st["loss_now"])
        cols["diameter_loss_pct_se"].append(100.0 * st["loss_se"])
        cols["wear_factor_k"].append(st["k"])
        cols["wear_factor_k_se"].append(float(np.sqrt(st["cov"][1, 1])))
        cols["wear_rate_pct_per_day"].append(100.0 * max(st["k"], 0.0) * st["rate_phys_per_day"])
        if proj_offsets is None:
            proj_offsets = offsets
        cdfs.append(cdf)
        pq10.append(quantiles[0])
        pq50.append(quantiles[1])
        pq90.append(quantiles[2])
        ids.append(st["tube_id"])
        focals.append(st["focal_spot"])
    if summaries:
        summary = pd.concat(summaries, ignore_index=True)
        for key, values in cols.items():
            summary[key] = np.asarray(values, float)
    else:
        summary = pd.DataFrame(
            columns=[c for c in (*SUMMARY_COLUMNS, *EXTRA_COLUMNS) if c not in (
                "health_level", "health_rank", "reason", "signals", "as_of", "analysed_at_utc",
                "code_version", "threshold_pct", "threshold_sd_pct", "threshold_source")]
            + ["signature_level", "signature_reasons", "signals_list"])
    summary = assign_levels(summary, thr.mean, p.min_history_days, p.max_rul_days)
    summary["as_of"] = cut
    summary["analysed_at_utc"] = pd.Timestamp(analysed_at) if analysed_at else pd.Timestamp.now("UTC").tz_localize(None)
    summary["code_version"] = __version__
    summary["threshold_pct"] = 100.0 * thr.mean
    summary["threshold_sd_pct"] = 100.0 * thr.sd  # spread of the failure point [% of diameter]
    summary["threshold_source"] = thr.source
    cols_out = [c for c in (*SUMMARY_COLUMNS, *EXTRA_COLUMNS) if c in summary.columns]
    summary = summary[cols_out].sort_values(
        ["health_rank", "p_end_of_life_180d", "rul_days_p50", "tube_id", "focal_spot"],
        ascending=[False, False, True, True, True], ignore_index=True)

    if cdfs:
        nh = len(CDF_HORIZONS_DAYS)
        rul_cdf = pd.DataFrame({
            "tube_id": np.repeat(np.asarray(ids, object), nh),
            "focal_spot": np.repeat(np.asarray(focals, object), nh),
            "horizon_days": np.tile(np.asarray(CDF_HORIZONS_DAYS, int), len(cdfs)),
            "p_end_of_life": np.concatenate(cdfs)})
        npj = len(proj_offsets)
        days = (cut + pd.to_timedelta(proj_offsets, unit="D")).to_numpy()
        projection = pd.DataFrame({
            "tube_id": np.repeat(np.asarray(ids, object), npj),
            "focal_spot": np.repeat(np.asarray(focals, object), npj),
            "day": np.tile(days, len(cdfs)),
            "diameter_loss_pct_p10": np.concatenate(pq10),
            "diameter_loss_pct_p50": np.concatenate(pq50),
            "diameter_loss_pct_p90": np.concatenate(pq90)})
    else:
        rul_cdf = pd.DataFrame(columns=["tube_id", "focal_spot", "horizon_days", "p_end_of_life"])
        projection = pd.DataFrame(columns=["tube_id", "focal_spot", "day", "diameter_loss_pct_p10",
                                           "diameter_loss_pct_p50", "diameter_loss_pct_p90"])

    def cat(key: str) -> pd.DataFrame:
        cols, empty = _join(results, key)
        if not cols:
            return empty if empty is not None else pd.DataFrame()
        return pd.DataFrame(cols, copy=False)

    dcols, dempty = _join(results, "diameter")
    if dcols:
        keys = pd.MultiIndex.from_arrays([dcols["tube_id"], dcols["focal_spot"]])
        add = pd.Series(shift, dtype=float).reindex(keys).to_numpy(float) if shift else np.full(
            len(dcols["tube_id"]), np.nan)
        diameter = pd.DataFrame({
            "tube_id": dcols.pop("tube_id"), "focal_spot": dcols.pop("focal_spot"), "day": dcols.pop("day"),
            "diameter_loss_pct": dcols.pop("loss_since_baseline_pct") + add,
            "diameter_loss_pct_lo": dcols.pop("loss_since_baseline_pct_lo") + add,
            "diameter_loss_pct_hi": dcols.pop("loss_since_baseline_pct_hi") + add,
        }, copy=False)
    else:
        diameter = dempty if dempty is not None else pd.DataFrame()
    return HealthResult(
        summary=summary,
        rul_cdf=rul_cdf,
        drift=cat("drift"),
        diameter=diameter,
        projection=projection,
        changepoints=cat("changepoints"),
        threshold=thr,
        as_of=cut.to_pydatetime(),
        params=p.to_dict(),
    )


def analysis_date(first: datetime | None, last: datetime | None, as_of: datetime | None,
                  empty_message: str) -> datetime:
    """The analysis date from the span of the exposures: ``as_of`` as given, else the day after
    the last exposure.

    Raises :class:`~tubetrack.errors.AnalysisError` with ``empty_message`` when there are no
    exposures, and for an ``as_of`` on or before the first exposure (nothing to analyse), naming
    the span.
    """
    from tubetrack.errors import AnalysisError

    if last is None:
        raise AnalysisError(empty_message)
    if as_of is None:
        return (pd.Timestamp(last).normalize() + pd.Timedelta(days=1)).to_pydatetime()
    if pd.Timestamp(as_of) <= pd.Timestamp(first):
        raise AnalysisError(
            f"no exposures before {pd.Timestamp(as_of):%Y-%m-%d}: the exposures run from "
            f"{pd.Timestamp(first):%Y-%m-%d} to {pd.Timestamp(last):%Y-%m-%d}. Choose a later --as-of."
        )
    return as_of


def effective_as_of(con: duckdb.DuckDBPyConnection, as_of: datetime | None) -> datetime:
    """The store's analysis date (:func:`analysis_date` over its exposures)."""
    first, last = con.execute(sql.DATA_SPAN_SQL).fetchone()
    return analysis_date(first, last, as_of,
                         "the store holds no exposures. Ingest logs first (`tubetrack ingest PATH`).")


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
    progress: Callable[[int, int], None] | None = None,
) -> HealthResult:
    """Analyse every tube in the store as of a date.

    The same analysis as :func:`analyse_frames` on :func:`load_inputs`, run a chunk of
    :data:`CHUNK_TUBES` tubes at a time: each chunk's daily statistics are aggregated in DuckDB,
    handed to the process pool as per-tube slices and dropped, and only the compact per-tube
    results are kept (the next chunk is queried while the pool works on the current one).

    Parameters
    ----------
    con
        Open store.
    as_of
        Only data strictly before this time (UTC) are used, and removals on or after it are not
        known. Default: the day after the last exposure.
    params
        :class:`HealthParams` (defaults documented in docs/health.md).
    progress
        Called as ``progress(tubes_done, tubes_total)`` after each chunk of tubes is analysed.

    Returns
    -------
    HealthResult
        ``.summary`` (result_health), ``.rul_cdf``, ``.drift``, ``.diameter``, ``.projection``,
        ``.changepoints``, ``.threshold``.
    """
    p = params or HealthParams()
    cut = effective_as_of(con, as_of)
    cut_ts = pd.Timestamp(cut)
    _, known, cal_by, ev_by = _cut_inputs(
        None, sql.load_tubes(con, None), cut_ts, sql.load_calibrations(con, cut), sql.load_events(con, cut))
    ids = [str(t) for t in known["tube_id"]]
    starts = list(range(0, max(len(ids), 1), CHUNK_TUBES))
    metas: dict[str, dict[str, Any]] = {}

    def chunk_tasks(i: int) -> list[tuple]:
        lo = ids[i] if i > 0 else None
        hi = ids[i + CHUNK_TUBES] if i + CHUNK_TUBES < len(ids) else None
        d = _before(sql.load_daily_tubes(con, cut, lo, hi), cut_ts)
        store.release_memory(con)  # the next chunk reads other row groups: keep one query's worth
        return _tasks(_split_by_tube(d), known.iloc[i:i + CHUNK_TUBES], cut_ts, p, cal_by, ev_by, metas)

    results: list[dict[str, Any]] = []
    if p.workers <= 1 or len(ids) < p.serial_below:
        for i in starts:
            results.extend(_analyse_compact(t) for t in chunk_tasks(i))
            if progress is not None:
                progress(min(i + CHUNK_TUBES, len(ids)), len(ids))
    else:
        with ProcessPoolExecutor(max_workers=p.workers) as pool:
            tasks = chunk_tasks(starts[0])
            for k in range(len(starts)):
                running = pool.map(_analyse_compact, tasks,
                                   chunksize=max(1, len(tasks) // (p.workers * 8)))
                tasks = chunk_tasks(starts[k + 1]) if k + 1 < len(starts) else []
                results.extend(running)
                if progress is not None:
                    progress(min(starts[k] + CHUNK_TUBES, len(ids)), len(ids))

            def mapper(function: Callable[[Any], Any], items: list[Any]) -> Any:
                # the workers were forked before the results arrived: they hold none of them.
                # Their last job: the pool is shut down before the result tables are joined.
                out = list(pool.map(function, items, chunksize=max(1, len(items) // (p.workers * 8))))
                pool.shutdown(wait=True)
                return out

            return _fleet_step(results, metas, known, cut_ts, p, None, mapper)
    return _fleet_step(results, metas, known, cut_ts, p, None)
