"""Signatures other than filament thinning: arcs, fault events, mA regulation, filament resistance.

Arc trend test: Poisson regression of weekly arc counts with the number of exposures as exposure
(offset), ``log E[arcs_w] = log n_w + b0 + b1 t_w``, fitted by Newton-Raphson (iteratively
reweighted least squares, McCullagh & Nelder 1989, section 2.5 and 6.2). ``b1`` is tested with the
Wald statistic z = b1 / se(b1) against a one-sided alternative b1 > 0 (arcing increases).

These signatures raise a tube's concern level with a stated reason even when its filament looks
healthy; none of them forecasts a date.

References
----------
McCullagh P., Nelder J.A., Generalized Linear Models, 2nd ed., Chapman & Hall 1989.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.stats import norm

from tubetrack.health.drift import as_datetime


@dataclass(frozen=True)
class PoissonTrend:
    """Result of :func:`poisson_trend`.

    Attributes
    ----------
    intercept
        b0, log rate per unit exposure at t = 0 [ln(1/exposure)].
    slope
        b1 [1/time unit of ``t``].
    slope_se
        Standard error of b1 from the observed information [1/time unit].
    z
        Wald statistic b1 / se [1].
    p_increase
        One-sided p-value for b1 > 0 [1].
    converged
        Newton-Raphson converged.
    """

    intercept: float
    slope: float
    slope_se: float
    z: float
    p_increase: float
    converged: bool


def poisson_trend(t, counts, exposure, max_iter: int = 50, tol: float = 1e-10) -> PoissonTrend:
    """Poisson log-linear trend of ``counts`` over ``t`` with ``exposure`` as offset.

    Parameters
    ----------
    t
        Time of each bin (any unit; centred internally).
    counts
        Event counts per bin [count].
    exposure
        Opportunities per bin, > 0 (e.g. exposures) [count].

    Returns
    -------
    PoissonTrend
    """
    t = np.asarray(t, float)
    y = np.asarray(counts, float)
    n = np.asarray(exposure, float)
    ok = np.isfinite(t) & np.isfinite(y) & (n > 0)
    t, y, n = t[ok], y[ok], n[ok]
    nan = float("nan")
    if y.size < 2 or y.sum() == 0 or np.ptp(t) == 0:
        return PoissonTrend(nan, 0.0 if y.size else nan, nan, 0.0, 1.0 if y.size else nan, False)
    tc = t.mean()
    X = np.column_stack([np.ones_like(t), t - tc])
    beta = np.array([np.log(y.sum() / n.sum()), 0.0])
    converged = False
    for _ in range(max_iter):
        mu = n * np.exp(X @ beta)
        grad = X.T @ (y - mu)
        info = X.T @ (X * mu[:, None])
        try:
            step = np.linalg.solve(info, grad)
        except np.linalg.LinAlgError:
            break
        # step halving keeps the log-likelihood increasing on nearly separated data
        ll0 = float(np.sum(y * (X @ beta) - mu))
        for _half in range(30):
            cand = beta + step
            mu_c = n * np.exp(X @ cand)
            if np.all(np.isfinite(mu_c)) and np.sum(y * (X @ cand) - mu_c) >= ll0 - 1e-12:
                break
            step = step / 2.0
        beta = beta + step
        if np.max(np.abs(step)) < tol:
            converged = True
            break
    mu = n * np.exp(X @ beta)
    cov = np.linalg.pinv(X.T @ (X * mu[:, None]))
    se = float(np.sqrt(max(cov[1, 1], 0.0)))
    b0 = float(beta[0] - beta[1] * tc)
    z = float(beta[1] / se) if se > 0 else 0.0
    return PoissonTrend(b0, float(beta[1]), se, z, float(norm.sf(z)), converged)


@dataclass(frozen=True)
class SignatureParams:
    """Thresholds of the non-filament signatures (all documented in docs/health.md).

    Attributes
    ----------
    recent_days
        Window for recent rates [days].
    arc_rate_high_per_1000
        Recent arc rate that by itself is a concern [per 1000 exposures]  # common practice
    arc_trend_p
        One-sided p-value below which a rising arc rate is a concern [1].
    ma_miss_fraction_high
        Fraction of exposures with measured mA off by more than the tolerance [1].
    resistance_rise_pct
        Rise of filament hot resistance V/I over the baseline that is a concern [%].
    fault_rate_high_per_1000
        Recent rate of kv_dropout / overload / rotor_fault / filament_fault / ma_out_of_tolerance
        events [per 1000 exposures].
    """

    recent_days: int = 90
    arc_rate_high_per_1000: float = 5.0
    arc_trend_p: float = 0.001
    ma_miss_fraction_high: float = 0.05
    resistance_rise_pct: float = 8.0
    fault_rate_high_per_1000: float = 2.0


FAULT_CATEGORIES = ("filament_fault", "kv_dropout", "overload", "rotor_fault", "ma_out_of_tolerance")


def tube_signatures(
    daily: pd.DataFrame,
    events: pd.DataFrame,
    as_of: pd.Timestamp,
    params: SignatureParams | None = None,
) -> dict:
    """Signatures of one tube and focal spot.

    Parameters
    ----------
    daily
        Daily statistics of one tube and focal spot (all stations).
    events
        Event counts of the tube (tube_id, category, day, n_events); events are per tube.
    as_of
        Analysis date [day].

    Returns
    -------
    dict
        arc_rate_per_1000, arc_rate_recent_per_1000, arc_trend_per_year, arc_trend_p,
        ma_miss_fraction, resistance_change_pct, fault_counts_recent (dict), level (0, 1, 2),
        signals (list of short codes), reasons (list of one-line texts), unforeseeable (bool: the
        concern is of a kind the filament signal cannot foresee).
    """
    p = params or SignatureParams()
    out: dict = {"signals": [], "reasons": [], "level": 0}
    days = as_datetime(daily["day"]).to_numpy()
    recent = days >= np.datetime64(as_of - pd.Timedelta(days=p.recent_days))
    n_exp = daily["n_exposures"].to_numpy(float)
    arc = daily["arc_sum"].to_numpy(float)
    n_all = float(n_exp.sum())
    n_recent = float(n_exp[recent].sum())
    arcs = float(arc.sum())
    out["arc_rate_per_1000"] = 1000.0 * arcs / n_all if n_all else float("nan")
    out["arc_rate_recent_per_1000"] = (
        1000.0 * float(arc[recent].sum()) / n_recent if n_recent else float("nan")
    )
    if days.size:
        weeks, inv = np.unique((days - days.min()) // np.timedelta64(7, "D"), return_inverse=True)
        week_arcs = np.bincount(inv, weights=arc, minlength=weeks.size)
        week_n = np.bincount(inv, weights=n_exp, minlength=weeks.size)
    else:
        weeks, week_arcs, week_n = np.zeros(0), np.zeros(0), np.zeros(0)
    trend = poisson_trend(weeks.astype(float) * 7.0, week_arcs, week_n)
    out["arc_trend_per_year"] = (
        float(np.expm1(min(trend.slope * 365.25, 50.0))) if np.isfinite(trend.slope) else float("nan")
    )
    out["arc_trend_p"] = trend.p_increase
    if trend.p_increase < p.arc_trend_p and trend.slope > 0 and out["arc_rate_recent_per_1000"] > 0.5:
        out["signals"].append("arc_rising")
        out["reasons"].append(
            f"arc rate rising ({out['arc_rate_recent_per_1000']:.1f} per 1,000 exposures in the last "
            f"{p.recent_days} days; Poisson trend p {_fmt_p(trend.p_increase)})"
        )
        out["level"] = max(out["level"], 2)
    elif out["arc_rate_recent_per_1000"] > p.arc_rate_high_per_1000:
        out["signals"].append("arc_high")
        out["reasons"].append(
            f"arc rate {out['arc_rate_recent_per_1000']:.1f} per 1,000 exposures in the last "
            f"{p.recent_days} days"
        )
        out["level"] = max(out["level"], 1)
    n_meas = float(daily["n_measured"].to_numpy(float)[recent].sum())
    out["ma_miss_fraction"] = (
        float(daily["n_ma_miss"].to_numpy(float)[recent].sum()) / n_meas if n_meas else float("nan")
    )
    if n_meas >= 50 and out["ma_miss_fraction"] > p.ma_miss_fraction_high:
        out["signals"].append("ma_regulation")
        out["reasons"].append(
            f"measured tube current off its set value in {100 * out['ma_miss_fraction']:.1f} % of "
            f"recent exposures"
        )
        out["level"] = max(out["level"], 1)
    out["resistance_change_pct"] = _resistance_change_pct(daily, days, recent)
    if np.isfinite(out["resistance_change_pct"]) and out["resistance_change_pct"] > p.resistance_rise_pct:
        out["signals"].append("resistance_up")
        out["reasons"].append(
            f"filament hot resistance (V/I) up {out['resistance_change_pct']:.1f} % since the baseline"
        )
        out["level"] = max(out["level"], 1)
    counts: dict[str, int] = {}
    if len(events):
        ev_recent = events[as_datetime(events["day"]) >= as_of - pd.Timedelta(days=p.recent_days)]
        counts = ev_recent.groupby("category")["n_events"].sum().astype(int).to_dict()
    out["fault_counts_recent"] = counts
    for cat in FAULT_CATEGORIES:
        k = counts.get(cat, 0)
        if k and n_recent and (1000.0 * k / n_recent > p.fault_rate_high_per_1000 or cat == "filament_fault"):
            out["signals"].append(cat)
            out["reasons"].append(f"{k} {cat.replace('_', ' ')} event(s) in the last {p.recent_days} days")
            out["level"] = max(out["level"], 2 if cat in ("filament_fault", "rotor_fault") else 1)
    out["unforeseeable"] = any(s in out["signals"] for s in ("arc_rising", "arc_high", "rotor_fault", "kv_dropout"))
    return out


def _fmt_p(p: float) -> str:
    return "< 0.0001" if p < 1e-4 else f"= {p:.2g}"


def _resistance_change_pct(daily: pd.DataFrame, days: np.ndarray, recent: np.ndarray) -> float:
    """Relative change of the median hot resistance, last window vs the first 30 days, per station."""
    have = daily["n_voltage"].to_numpy() > 0
    if not have.any():
        return float("nan")
    dd = days[have]
    first = dd < dd.min() + np.timedelta64(30, "D")
    rec = recent[have]
    ma = daily["tube_current_ma"].to_numpy(float)[have]
    res = daily["filament_resistance_med_ohm"].to_numpy(float)[have]
    base = _station_medians(ma[first], res[first])
    now = _station_medians(ma[rec & ~first], res[rec & ~first])
    both = sorted(set(base) & set(now))
    if not both:
        return float("nan")
    return float(100.0 * np.median(np.array([now[k] / base[k] - 1.0 for k in both])))


def _station_medians(ma: np.ndarray, values: np.ndarray) -> dict[float, float]:
    """Median of ``values`` per station, NaN skipped (as a pandas groupby median)."""
    out = {}
    for k in np.unique(ma):
        v = values[ma == k]
        v = v[~np.isnan(v)]
        out[float(k)] = float(np.median(v)) if v.size else float("nan")
    return out
