"""Backtest: replay history at a series of cut-off dates and score the forecasts.

At each cut-off the whole analysis runs on data strictly before it (removals after it unknown);
each tube in service at the cut-off becomes a *case*, compared with what really happened.

Tube-level forecast from its focal spots: P(EOL within h) = 1 - prod(1 - p_focal) (either
filament ends the tube; independence assumed), remaining life from the focal spot with the
smallest median.

Metrics (``result_backtest``):

* ``auc_90d``, ``auc_180d``: ROC AUC of P(EOL within h) for "removed for a filament failure within
  h days" (sklearn.metrics.roc_auc_score). Cases whose follow-up ends before h without a removal,
  or that were removed for a planned upgrade within h, are censored (left out).
* ``brier_90d``, ``brier_180d``: mean squared error of the same probabilities (Brier 1950).
* ``coverage_p10_p90``: share of cases with an observed filament failure within 365 days whose
  true remaining life lies in [P10, P90].
* ``median_relative_rul_error``: median |P50 - true| / true over the same cases.
* ``alpha_lambda_accuracy``: Saxena et al. (2008) alpha-lambda accuracy with alpha = 0.2 and
  lambda = 0.5, per filament-failed tube: with t_P the first cut-off within 365 days of the
  failure and t_EOL the failure, the forecast at the cut-off nearest to
  t_lambda = t_P + lambda (t_EOL - t_P) must lie within (1 +- alpha) x true remaining life.
* ``prognostic_horizon_days``: median over filament-failed tubes of t_EOL - t_i, t_i the first
  cut-off from which every later median forecast stays within +- alpha x (t_EOL - t_P) of the
  truth (Saxena et al. 2010, alpha-bounds proportional to the prediction span).
* ``false_alerts_per_tube_year``: cases at level "prepare" or worse with no filament failure in
  the next 180 days (and 180 days of follow-up), per tube-year of monitoring (each case stands for
  ``every_days`` of monitoring).
* Failures the filament cannot foresee (arcing, bearing, other, anode, vacuum) are counted and
  shown separately (``nonfilament_*``): they are never successes of the filament forecast, and the
  share of them that a signature flagged beforehand is reported on its own.

References
----------
Saxena A., Celaya J., Balaban E., Goebel K., Saha B., Saha S., Schwabacher M., "Metrics for
evaluating performance of prognostic techniques", International Conference on Prognostics and
Health Management, 2008. Saxena A., Celaya J., Saha B., Saha S., Goebel K., "Metrics for offline
evaluation of prognostic performance", International Journal of Prognostics and Health
Management 1 (2010) 001.
Brier G.W., "Verification of forecasts expressed in terms of probability", Monthly Weather
Review 78 (1950) 1-3.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, replace
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from tubetrack.health import sql
from tubetrack.health.api import analyse_frames
from tubetrack.health.levels import ALERT_RANK, FORECAST_SIGNALS
from tubetrack.health.params import HealthParams

if TYPE_CHECKING:  # pragma: no cover
    import duckdb

ALPHA = 0.2
LAMBDA = 0.5
NON_FILAMENT = ("arcing", "bearing", "anode", "vacuum", "housing", "other")


@dataclass(frozen=True)
class BacktestResult:
    """Backtest metrics (one row per metric) and the per-case forecasts."""

    summary: pd.DataFrame
    cases: pd.DataFrame


def brier_score(y_true, p) -> float:
    """Mean squared difference of probabilities and 0/1 outcomes (Brier 1950)."""
    y = np.asarray(y_true, float)
    q = np.asarray(p, float)
    return float(np.mean((q - y) ** 2)) if y.size else float("nan")


def auc_score(y_true, p) -> float:
    """ROC AUC (sklearn.metrics.roc_auc_score); NaN when only one class is present."""
    from sklearn.metrics import roc_auc_score

    y = np.asarray(y_true, int)
    if y.size == 0 or y.min() == y.max():
        return float("nan")
    return float(roc_auc_score(y, np.asarray(p, float)))


def cutoff_dates(
    start: pd.Timestamp,
    end: pd.Timestamp,
    every_days: int,
    warmup_days: int = 180,
    min_followup_days: int = 30,
) -> list[pd.Timestamp]:
    """Cut-off dates: from ``start + warmup_days`` every ``every_days`` while follow-up remains."""
    first = start.normalize() + pd.Timedelta(days=warmup_days)
    last = end.normalize() - pd.Timedelta(days=min_followup_days)
    if first > last:
        return []
    return list(pd.date_range(first, last, freq=f"{int(every_days)}D"))


def tube_cases(summary: pd.DataFrame, cut: pd.Timestamp) -> pd.DataFrame:
    """Collapse per focal spot forecasts to one case per tube."""
    if summary.empty:
        return pd.DataFrame()
    s = summary.sort_values(["tube_id", "rul_days_p50"])
    g = s.groupby("tube_id", sort=True)
    first = g.head(1).set_index("tube_id")
    out = pd.DataFrame(
        {
            "cut_off": cut,
            "tube_id": first.index,
            "system_id": first["system_id"].to_numpy(),
            "focal_spot": first["focal_spot"].to_numpy(),
            "p_end_of_life_90d": (
                1 - g["p_end_of_life_90d"].apply(lambda x: np.prod(1 - x))
            ).to_numpy(),
            "p_end_of_life_180d": (
                1 - g["p_end_of_life_180d"].apply(lambda x: np.prod(1 - x))
            ).to_numpy(),
            "rul_days_p10": first["rul_days_p10"].to_numpy(),
            "rul_days_p50": first["rul_days_p50"].to_numpy(),
            "rul_days_p90": first["rul_days_p90"].to_numpy(),
            "health_rank": g["health_rank"].max().to_numpy(),
            "signature_flag": (
                g["signals"].apply(
                    lambda x: any(
                        sig not in ("", *FORECAST_SIGNALS)
                        for v in x
                        for sig in str(v).split(",")
                    )
                )
            ).to_numpy(),
            "history_days": g["history_days"].max().to_numpy(),
        }
    )
    for col in ("diameter_loss_pct", "wear_rate_pct_per_day", "threshold_pct"):
        out[col] = first[col].to_numpy() if col in first.columns else np.nan
    return out


def _one_cut(args: tuple) -> pd.DataFrame:
    daily, tubes, cut, params, calib, events = args
    res = analyse_frames(
        daily, tubes, cut.to_pydatetime(), params, calibrations=calib, events=events
    )
    return tube_cases(res.summary, cut)


def failure_cases(scored: pd.DataFrame) -> pd.DataFrame:
    """Scored cases of tubes removed for a filament failure within 365 days after the cut-off."""
    rul = scored["true_rul_days"]
    return scored[scored["removal_reason"].eq("filament") & rul.notna() & (rul > 0) & (rul <= 365)]


def alpha_lambda_per_tube(ev: pd.DataFrame) -> pd.DataFrame:
    """Alpha-lambda hit and prognostic horizon of each filament-failed tube.

    Parameters
    ----------
    ev
        Cases of filament-failed tubes within 365 days of the failure: tube_id, cut_off,
        true_rul_days, rul_days_p50 [days].

    Returns
    -------
    pandas.DataFrame
        tube_id, alpha_lambda_hit (the forecast at the cut-off nearest t_lambda lies within
        (1 +- alpha) x true remaining life), prognostic_horizon_days [days] (see module docstring).
    """
    tube_ids, ok_al, ph = [], [], []
    for tid, g in ev.sort_values("cut_off").groupby("tube_id"):
        t_p = g["cut_off"].iloc[0]
        t_eol = t_p + pd.Timedelta(days=float(g["true_rul_days"].iloc[0]))
        t_lam = t_p + LAMBDA * (t_eol - t_p)
        j = int(np.argmin(np.abs((g["cut_off"] - t_lam).dt.total_seconds().to_numpy())))
        r = g.iloc[j]
        ok_al.append(
            bool(abs(r["rul_days_p50"] - r["true_rul_days"]) <= ALPHA * r["true_rul_days"])
        )
        band = ALPHA * float(g["true_rul_days"].iloc[0])
        inb = ((g["rul_days_p50"] - g["true_rul_days"]).abs() <= band).to_numpy()
        # first index from which all later forecasts stay inside the band
        tail_ok = np.flip(np.logical_and.accumulate(np.flip(inb)))
        idx = np.flatnonzero(tail_ok)
        ph.append(float(g["true_rul_days"].iloc[idx[0]]) if idx.size else 0.0)
        tube_ids.append(tid)
    return pd.DataFrame({"tube_id": tube_ids, "alpha_lambda_hit": ok_al,
                         "prognostic_horizon_days": ph})


def score_cases(
    cases: pd.DataFrame, tubes: pd.DataFrame, data_end: pd.Timestamp, every_days: int
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Attach the truth to the cases and compute the metrics (see module docstring)."""
    t = tubes.set_index("tube_id")
    c = cases.copy()
    removed = pd.to_datetime(c["tube_id"].map(t["removed_at_utc"]))
    c["removal_reason"] = c["tube_id"].map(t["removal_reason"])
    c["true_rul_days"] = (removed - c["cut_off"]).dt.total_seconds() / 86400.0
    c["followup_days"] = (data_end - c["cut_off"]).dt.total_seconds() / 86400.0
    fil = c["removal_reason"].eq("filament")
    for h in (90, 180):
        within = c["true_rul_days"].le(h) & c["true_rul_days"].notna()
        c[f"filament_within_{h}d"] = (fil & within).astype(int)
        c[f"any_within_{h}d"] = (within & ~c["removal_reason"].eq("upgrade")).astype(
            int
        )
        c[f"censored_{h}d"] = (~within & (c["followup_days"] < h)) | (
            within & c["removal_reason"].eq("upgrade")
        )
    rows: list[dict[str, Any]] = []

    def add(metric: str, value: float, n: int, note: str) -> None:
        rows.append(
            {"metric": metric, "value": float(value), "n": int(n), "note": note}
        )

    for h in (90, 180):
        u = c[~c[f"censored_{h}d"]]
        y, p = u[f"filament_within_{h}d"], u[f"p_end_of_life_{h}d"]
        add(
            f"auc_{h}d",
            auc_score(y, p),
            len(u),
            f"filament failure within {h} days; {int(y.sum())} positives",
        )
        add(
            f"brier_{h}d",
            brier_score(y, p),
            len(u),
            f"filament failure within {h} days",
        )
        ya = u[f"any_within_{h}d"]
        add(
            f"auc_{h}d_all_causes",
            auc_score(ya, p),
            len(u),
            "same probabilities scored against failures of any cause (filament forecast cannot see the others)",
        )
    ev = failure_cases(c)
    inside = (ev["rul_days_p10"] <= ev["true_rul_days"]) & (
        ev["true_rul_days"] <= ev["rul_days_p90"]
    )
    add(
        "coverage_p10_p90",
        inside.mean() if len(ev) else np.nan,
        len(ev),
        "cases with a filament failure within 365 days",
    )
    rel = (ev["rul_days_p50"] - ev["true_rul_days"]).abs() / ev["true_rul_days"]
    add(
        "median_relative_rul_error",
        rel.median() if len(ev) else np.nan,
        len(ev),
        "|P50 - true| / true",
    )
    per_tube = alpha_lambda_per_tube(ev)
    ok_al, ph = per_tube["alpha_lambda_hit"].tolist(), per_tube["prognostic_horizon_days"].tolist()
    add(
        "alpha_lambda_accuracy",
        np.mean(ok_al) if ok_al else np.nan,
        len(ok_al),
        f"alpha = {ALPHA}, lambda = {LAMBDA}; filament-failed tubes",
    )
    add(
        "prognostic_horizon_days",
        np.median(ph) if ph else np.nan,
        len(ph),
        f"median over filament-failed tubes; alpha = {ALPHA} x prediction span",
    )
    follow = c[(c["followup_days"] >= 180) | c["true_rul_days"].notna()]
    false = follow[
        (follow["health_rank"] >= ALERT_RANK)
        & (follow["filament_within_180d"] == 0)
        & ~follow["censored_180d"]
    ]
    tube_years = len(follow) * every_days / 365.25
    add(
        "false_alerts_per_tube_year",
        len(false) / tube_years if tube_years else np.nan,
        len(follow),
        "level 'prepare' or worse without a filament failure within 180 days",
    )
    tubes_fail = tubes[tubes["removal_reason"].notna()]
    nf_tubes = tubes_fail[tubes_fail["removal_reason"].isin(NON_FILAMENT)]
    nf_cases = c[c["removal_reason"].isin(NON_FILAMENT) & (c["true_rul_days"] <= 90)]
    add(
        "nonfilament_failures",
        len(nf_tubes),
        len(nf_tubes),
        "tubes removed for arcing, bearing, anode, vacuum or other: not foreseeable from the filament, not scored as successes",
    )
    add(
        "nonfilament_flagged_by_signature_90d",
        nf_cases.groupby("tube_id")["signature_flag"].any().mean()
        if len(nf_cases)
        else np.nan,
        nf_cases["tube_id"].nunique(),
        "share of those tubes with a non-filament signature within 90 days before removal",
    )
    add(
        "filament_failures",
        int((tubes["removal_reason"] == "filament").sum()),
        len(tubes),
        "tubes removed for filament failure",
    )
    add("cases", len(c), c["tube_id"].nunique(), "tube x cut-off forecasts")
    return pd.DataFrame(rows), c


@dataclass(frozen=True)
class BacktestInputs:
    """What every cut-off of a backtest reads: the store's aggregated history, read once."""

    daily: pd.DataFrame
    calibrations: pd.DataFrame
    events: pd.DataFrame
    tubes: pd.DataFrame
    end: pd.Timestamp  # the day after the last exposure
    cuts: list[pd.Timestamp]

    def task(self, cut: pd.Timestamp, params: HealthParams) -> tuple:
        """The arguments of one cut-off's analysis (:func:`_one_cut`)."""
        return (self.daily, self.tubes, cut, params, self.calibrations, self.events)


def backtest_inputs(
    con: duckdb.DuckDBPyConnection, every_days: int, warmup_days: int
) -> BacktestInputs:
    """Read the store once and choose the cut-offs (clear errors when there is nothing to replay)."""
    from tubetrack.errors import AnalysisError

    daily = sql.load_daily(con)
    if daily.empty:
        raise AnalysisError(
            "the store holds no exposures; ingest logs before running a backtest."
        )
    start = pd.Timestamp(pd.to_datetime(daily["day"]).min())
    end = pd.Timestamp(pd.to_datetime(daily["day"]).max()) + pd.Timedelta(days=1)
    cuts = cutoff_dates(start, end, every_days, warmup_days)
    if not cuts:
        raise AnalysisError(
            f"history from {start:%Y-%m-%d} to {end:%Y-%m-%d} is too short for a backtest with "
            f"{warmup_days} days of warm-up; load more history or lower the warm-up."
        )
    return BacktestInputs(daily, sql.load_calibrations(con), sql.load_events(con),
                          sql.load_tubes(con, None), end, cuts)


def score_parts(parts: list[pd.DataFrame], inputs: BacktestInputs, every_days: int) -> BacktestResult:
    """Join the cut-offs' cases and score them (:func:`score_cases`)."""
    from tubetrack.errors import AnalysisError

    cases = (
        pd.concat([x for x in parts if len(x)], ignore_index=True)
        if any(len(x) for x in parts)
        else pd.DataFrame()
    )
    if cases.empty:
        raise AnalysisError("no tube was in service at any cut-off; nothing to score.")
    summary, scored = score_cases(cases, inputs.tubes, inputs.end, every_days)
    return BacktestResult(summary=summary, cases=scored)


def run_backtest(
    con: duckdb.DuckDBPyConnection,
    every_days: int = 60,
    params: HealthParams | None = None,
    warmup_days: int = 180,
    workers: int | None = None,
    progress: Callable[[int, int, pd.Timestamp], None] | None = None,
) -> BacktestResult:
    """Replay the store's history at cut-offs every ``every_days`` and score the forecasts.

    Parameters
    ----------
    con
        Open store (read once: one aggregation query for all cut-offs).
    every_days
        Spacing of the cut-off dates [days].
    params
        Analysis parameters.
    warmup_days
        First cut-off this long after the first exposure [days].
    workers
        Processes over cut-offs (default ``params.workers``).
    progress
        Called as ``progress(cut_offs_done, cut_offs_total, cut_off)`` as each cut-off's analysis
        comes back (in date order).
    """
    p = params or HealthParams()
    inputs = backtest_inputs(con, every_days, warmup_days)
    inner = replace(p, workers=1)
    tasks = [inputs.task(cut, inner) for cut in inputs.cuts]
    n_workers = p.workers if workers is None else workers
    parts: list[pd.DataFrame] = []

    def collect(results: Iterable[pd.DataFrame]) -> None:
        for cut, part in zip(inputs.cuts, results, strict=True):
            parts.append(part)
            if progress is not None:
                progress(len(parts), len(tasks), cut)

    if n_workers <= 1 or len(tasks) < 2:
        collect(_one_cut(t) for t in tasks)
    else:
        with ProcessPoolExecutor(max_workers=n_workers) as pool:
            collect(pool.map(_one_cut, tasks))
    return score_parts(parts, inputs, every_days)
