"""Replacement forecast: per-tube monthly probabilities, Poisson-binomial fleet totals, renewal.

Rule for each tube in service (documented in docs/fleet.md):

* **With a health forecast** (table ``result_health_rul_cdf``): the tube's filament
  end-of-life CDF P_fil(t) comes from its own health forecast. Both focal spots' filaments are
  needed, so P_fil(t) = 1 - prod_spots (1 - p_spot(t)) (spots treated as independent, the
  cautious choice). Non-filament causes come from the fleet Weibull fitted to *non-filament*
  failures (filament failures censored), conditional on the tube's age:
  P_oth(t) = 1 - S_oth(a + t) / S_oth(a). Independent competing risks:
  P(t) = 1 - (1 - P_fil(t)) (1 - P_oth(t)).
* **Without a health forecast**: the fleet Weibull of all causes conditional on age,
  P(t) = 1 - S(a + t) / S(a).

On a workload clock the age is the tube's workload so far and the future workload grows at the
tube's recent daily rate (``age + rate x days``). The probability of a replacement in month m is
P(t_m) - P(t_{m-1}). The health CDF is given at 30, 60, ..., 365 days and is interpolated
linearly in days (0 at day 0) and held flat beyond its last horizon.

Renewal option: a replacement tube is new and follows the all-cause fleet Weibull, so the
expected number of replacements of one position within t is the delayed renewal function
M_D(t) = F_a(t) + int_0^t M(t - x) dF_a(x) (Cox, Renewal Theory, Methuen 1962, ch. 2), with M
the ordinary renewal function of the fleet Weibull computed by numerical convolution.
"""

from __future__ import annotations

import functools
import math
import warnings
from dataclasses import dataclass
from datetime import datetime
from typing import TYPE_CHECKING

import numpy as np

from tubetrack.errors import AnalysisError, InputError, TubetrackWarning

if TYPE_CHECKING:  # pragma: no cover
    import pandas as pd

    from tubetrack.fleet.survival import WeibullResult

_DAY_S = 86400.0


# ----------------------------------------------------------------------------------------------
# Distribution of a sum of independent counts
# ----------------------------------------------------------------------------------------------


def count_sum_pmf(pmfs, *, method: str = "auto") -> np.ndarray:
    """Exact distribution of the sum of independent counts.

    Parameters
    ----------
    pmfs
        Array (n, K): row i is the pmf of count i on {0, ..., K-1}. K = 2 gives the
        Poisson-binomial distribution.
    method
        ``dp`` (recursive convolution, one record at a time), ``fft`` (pairwise convolution tree
        with FFTs, O(n log^2 n), vectorised over each level) or ``auto`` (dp up to 200 records).

    Returns
    -------
    numpy.ndarray
        pmf of the sum on {0, ..., n (K-1)}.

    Notes
    -----
    ``dp`` is the recursive method of Chen & Liu, "Statistical applications of the
    Poisson-binomial and conditional Bernoulli distributions", Statistica Sinica 7 (1997)
    875-892. ``fft`` convolves pairs of partial pmfs level by level (the same distribution;
    round-off of order 1e-15, negative round-off clipped to 0).
    """
    from scipy.fft import irfft, next_fast_len, rfft

    pmfs = np.atleast_2d(np.asarray(pmfs, dtype=float))
    n, k = pmfs.shape
    if n == 0:
        return np.array([1.0])
    if np.any(pmfs < -1e-12) or np.any(np.abs(pmfs.sum(axis=1) - 1) > 1e-9):
        raise InputError("each count pmf must be non-negative and sum to 1.")
    pmfs = np.clip(pmfs, 0, 1)
    if method == "dp" or (method == "auto" and n <= 200):
        out = np.zeros(n * (k - 1) + 1)
        out[0] = 1.0
        top = 0
        for row in pmfs:
            new = np.zeros(top + k)
            for j in range(k):
                if row[j] > 0:
                    new[j : j + top + 1] += row[j] * out[: top + 1]
            top += k - 1
            out[: top + 1] = new
        return out
    a = pmfs
    while a.shape[0] > 1:
        if a.shape[0] % 2:
            pad = np.zeros((1, a.shape[1]))
            pad[0, 0] = 1.0
            a = np.vstack([a, pad])
        m = 2 * a.shape[1] - 1
        nfft = next_fast_len(m, real=True)
        prod = rfft(a[0::2], nfft, axis=1) * rfft(a[1::2], nfft, axis=1)
        a = np.clip(irfft(prod, nfft, axis=1)[:, :m], 0, None)
    out = a[0, : n * (k - 1) + 1]
    return out / out.sum()


def poisson_binomial_pmf(p) -> np.ndarray:
    """pmf of the number of successes among independent Bernoulli(p_i) trials (exact DP)."""
    p = np.asarray(p, dtype=float).ravel()
    if np.any((p < 0) | (p > 1)) or not np.all(np.isfinite(p)):
        raise InputError("probabilities must lie in [0, 1].")
    return count_sum_pmf(np.column_stack([1 - p, p]))


def pmf_quantile(pmf: np.ndarray, q: float) -> int:
    """Smallest k with P(N <= k) >= q."""
    cdf = np.cumsum(pmf)
    return int(np.searchsorted(cdf, q - 1e-12, side="left"))


def pmf_interval(pmf: np.ndarray, level: float) -> tuple[int, int]:
    """Equal-tailed interval [q(a/2), q(1 - a/2)] of a count distribution, a = 1 - level."""
    a = 1 - level
    return pmf_quantile(pmf, a / 2), pmf_quantile(pmf, 1 - a / 2)


# ----------------------------------------------------------------------------------------------
# Renewal function
# ----------------------------------------------------------------------------------------------


def renewal_function(
    cdf, t_max: float, n_steps: int = 2000
) -> tuple[np.ndarray, np.ndarray]:
    """Ordinary renewal function M(t) = F(t) + int_0^t M(t - x) dF(x) on a grid.

    Parameters
    ----------
    cdf
        Vectorised lifetime CDF F.
    t_max
        End of the grid [clock unit].
    n_steps
        Grid steps; the error falls as the square of the step (trapezoidal Stieltjes sums).

    Returns
    -------
    (t, M)
        Grid and renewal function values [expected renewals].

    Notes
    -----
    Riemann-Stieltjes scheme with the trapezoidal rule in M (M. Xie, "On the solution of renewal-
    type integral equations", Commun. Statist. Simul. 18 (1989) 281-293):
    M_n = [F_n + sum_{i=2}^n (M_{n-i+1} + M_{n-i}) dF_i / 2 + M_{n-1} dF_1 / 2] / (1 - dF_1 / 2).
    """
    t = np.linspace(0.0, float(t_max), n_steps + 1)
    f = np.asarray(cdf(t), dtype=float)
    f[0] = 0.0
    df = np.diff(f)  # dF_i for i = 1..n
    m = np.zeros_like(t)
    for n in range(1, n_steps + 1):
        # sum_{i=2}^{n} (M_{n-i+1} + M_{n-i}) dF_i / 2
        if n >= 2:
            i = np.arange(2, n + 1)
            s = np.dot(m[n - i + 1] + m[n - i], df[i - 1]) / 2
        else:
            s = 0.0
        m[n] = (f[n] + s + m[n - 1] * df[0] / 2) / (1 - df[0] / 2)
    return t, m


def delayed_renewal(first_cdf, renewal_m, t: np.ndarray) -> np.ndarray:
    """Expected renewals M_D(t) = F1(t) + int_0^t M(t - x) dF1(x) on the grid ``t``.

    ``first_cdf`` are F1 values on ``t`` (array, same length, F1(0) = 0) and ``renewal_m`` the
    ordinary renewal function on the same grid. Trapezoidal Stieltjes sums. Vectorised over
    leading axes of ``first_cdf`` (shape (..., len(t))).
    """
    f1 = np.asarray(first_cdf, dtype=float)
    d1 = np.diff(f1, axis=-1)  # (..., n): dF1 over cell i = 1..n
    n = len(t) - 1
    mm = np.asarray(renewal_m, dtype=float)
    # W[i-1, k] = (M(t_k - t_{i-1}) + M(t_k - t_i)) / 2 for cells i <= k, else 0
    i = np.arange(1, n + 1)[:, None]
    k = np.arange(0, n + 1)[None, :]
    j = k - i
    w = np.where(j >= 0, (mm[np.clip(j, 0, n)] + mm[np.clip(j + 1, 0, n)]) / 2, 0.0)
    return f1 + d1 @ w


# ----------------------------------------------------------------------------------------------
# Replacement forecast
# ----------------------------------------------------------------------------------------------


def month_edges(
    as_of: datetime, months: int = 12, horizon_days: float | None = None
) -> list:
    """Calendar month boundaries (UTC) from ``as_of``.

    The first period runs from ``as_of`` to the first of the next month (unless ``as_of`` is a
    month start); then whole calendar months. With ``horizon_days`` the periods stop at
    ``as_of + horizon_days`` (the last one may be partial) and ``months`` is ignored.
    """
    import pandas as pd

    start = pd.Timestamp(as_of)
    month_start = start.to_period("M").to_timestamp()
    first = start if start == month_start else month_start + pd.DateOffset(months=1)
    if horizon_days is None:
        if start == month_start:
            return [start + pd.DateOffset(months=i) for i in range(months + 1)]
        return [start] + [first + pd.DateOffset(months=i) for i in range(months)]
    if horizon_days <= 0:
        raise InputError(
            f"--horizon-days is {horizon_days!r}; give a positive number of days."
        )
    end = start + pd.Timedelta(days=float(horizon_days))
    edges = [start]
    k = 0 if first > start else 1
    while True:
        nxt = first + pd.DateOffset(months=k)
        if nxt >= end:
            break
        edges.append(nxt)
        k += 1
    edges.append(end)
    return edges


def health_filament_cdf(
    rul_cdf: pd.DataFrame, tube_ids, days: np.ndarray
) -> np.ndarray:
    """Per-tube filament end-of-life CDF at ``days`` from the health forecast.

    Returns an array (len(tube_ids), len(days)); rows are NaN for tubes without a forecast.
    Focal spots combined as 1 - prod(1 - p); linear interpolation in days from (0, 0); flat
    beyond the last horizon.
    """
    import pandas as pd

    ids = list(tube_ids)
    out = np.full((len(ids), len(days)), np.nan)
    if rul_cdf is None or rul_cdf.empty:
        return out
    pos = pd.Series(np.arange(len(ids)), index=pd.Index(ids))
    r = rul_cdf.dropna(subset=["p_end_of_life", "horizon_days"])
    r = r[r["tube_id"].isin(pos.index)]
    if r.empty:
        return out
    # one row per (tube, focal spot), one column per horizon; the usual case (every curve on
    # the same horizons) is interpolated for all curves at once
    wide = r.pivot_table(index=["tube_id", "focal_spot"], columns="horizon_days",
                         values="p_end_of_life", aggfunc="last", sort=True)
    complete = wide.notna().all(axis=1).to_numpy()
    tube_of = wide.index.get_level_values("tube_id")
    p = np.empty((len(wide), len(days)))
    if complete.any():
        x = np.concatenate([[0.0], wide.columns.to_numpy(dtype=float)])
        y = np.clip(wide.to_numpy(dtype=float)[complete], 0, 1)
        y = np.maximum.accumulate(np.concatenate([np.zeros((len(y), 1)), y], axis=1), axis=1)
        p[complete] = _interp_rows(np.asarray(days, float), x, y)
    for j in np.flatnonzero(~complete):  # curves with their own horizons
        row = wide.iloc[j].dropna()
        x = np.concatenate([[0.0], row.index.to_numpy(dtype=float)])
        y = np.maximum.accumulate(np.concatenate([[0.0], np.clip(row.to_numpy(dtype=float), 0, 1)]))
        p[j] = np.interp(days, x, y)
    # focal spots of one tube: 1 - prod(1 - p)
    surv = pd.DataFrame(1.0 - p).groupby(pos.loc[tube_of].to_numpy()).prod()
    out[surv.index.to_numpy()] = 1.0 - surv.to_numpy()
    return out


def _interp_rows(xq: np.ndarray, x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """``np.interp(xq, x, y[i])`` for every row i of ``y`` at once (x increasing; flat outside)."""
    j = np.clip(np.searchsorted(x, xq, side="right") - 1, 0, len(x) - 1)
    j1 = np.minimum(j + 1, len(x) - 1)
    span = x[j1] - x[j]
    w = np.where(span > 0, (np.clip(xq, x[0], x[-1]) - x[j]) / np.where(span > 0, span, 1.0), 0.0)
    return y[:, j] * (1.0 - w) + y[:, j1] * w


@dataclass(frozen=True)
class ForecastResult:
    """Replacement forecast.

    ``tubes``: one row per tube in service and month: ``tube_id``, ``system_id``, ``site``,
    ``model_label``, ``month`` (first day, UTC), ``month_index`` (1..12), ``period_start_utc``,
    ``period_end_utc``, ``p_replace`` (probability, or expected count with renewal, of a
    replacement in the month), ``p_replace_cum`` (cumulative from as_of), ``source``
    (health+fleet | fleet), ``age_days``.
    ``summary``: one row per month: ``month``, ``month_index``, ``expected_replacements``,
    ``lower_80``, ``upper_80``, ``lower_95``, ``upper_95`` (Poisson-binomial quantiles),
    ``cumulative_expected``, ``cumulative_lower_95``, ``cumulative_upper_95``, ``tubes``,
    ``renewal``, ``interval_basis`` (plug-in | predictive (N parameter draws)).
    ``cumulative_pmf``: per-tube pmf of the count over the whole horizon (n x 3 array, counts
    0, 1, 2+) used for spares. ``monthly``: per-tube expected counts (n x periods).
    ``draws_monthly`` (D x n x periods) and ``draws_cumulative_pmf`` (D x n x 3): the same under
    each parameter draw (``None`` without draws).
    """

    tubes: pd.DataFrame
    summary: pd.DataFrame
    per_tube: pd.DataFrame
    cumulative_pmf: np.ndarray
    as_of: datetime
    renewal: bool
    notes: tuple[str, ...]
    monthly: np.ndarray | None = None
    draws_monthly: np.ndarray | None = None
    draws_cumulative_pmf: np.ndarray | None = None


def tube_replacement_cdf(
    active: pd.DataFrame,
    fleet_fit: WeibullResult,
    grid_days: np.ndarray,
    *,
    other_fit: WeibullResult | None = None,
    health_rul_cdf: pd.DataFrame | None = None,
    clock: str = "days",
):
    """Per-tube probability of a first replacement within each of ``grid_days`` (module rule).

    Returns (cdf (n, g), source (n,), filament cdf (n, g) NaN without health, workload rate
    (n,), notes).
    """
    notes: list[str] = []
    grid = np.asarray(grid_days, dtype=float)
    if clock == "days":
        age = active["exit_days"].to_numpy(dtype=float)
        rate = np.ones(len(active))
    else:
        age = active[clock].to_numpy(dtype=float)
        rate = active[f"rate_{clock}"].to_numpy(dtype=float)
        bad = ~np.isfinite(age) | ~np.isfinite(rate)
        if bad.any():
            notes.append(
                f"{int(bad.sum())} tube(s) without logged workload forecast on calendar days "
                "at the fleet's median workload rate."
            )
            med_rate = float(np.nanmedian(rate)) if np.isfinite(rate).any() else 0.0
            age = np.where(np.isfinite(age), age, np.nan)
            rate = np.where(np.isfinite(rate), rate, med_rate)
            days_age = active["exit_days"].to_numpy(dtype=float)
            age = np.where(np.isfinite(age), age, days_age * med_rate)
    future = age[:, None] + rate[:, None] * grid[None, :]  # (n, g) clock values

    def cond_cdf(fit, ages, fut):
        # 1 - S(f)/S(a) = 1 - exp(-(H(f) - H(a))), H(t) = (t/eta)^beta: no underflow when old
        h_a = np.power(np.clip(ages, 0, None) / fit.eta, fit.beta)[:, None]
        h_f = np.power(np.clip(fut, 0, None) / fit.eta, fit.beta)
        return np.clip(-np.expm1(-(h_f - h_a)), 0, 1)

    all_cause = cond_cdf(fleet_fit, age, future)
    p_fil = health_filament_cdf(health_rul_cdf, active["tube_id"], grid)
    has_health = ~np.isnan(p_fil).all(axis=1)
    if health_rul_cdf is None:
        notes.append(
            "no health forecasts (result_health_rul_cdf) found: every tube uses the fleet "
            "Weibull model given its age."
        )
    if has_health.any():
        if other_fit is None:
            notes.append(
                "too few non-filament failures for a cause-specific fit: tubes with a health "
                "forecast combine it with the all-cause fleet model (conservative)."
            )
            oth = all_cause
        else:
            oth = cond_cdf(other_fit, age, future)
        combined = 1 - (1 - np.nan_to_num(p_fil)) * (1 - oth)
        first_cdf = np.where(has_health[:, None], combined, all_cause)
    else:
        first_cdf = all_cause
    source = np.where(has_health, "health+fleet", "fleet")
    return first_cdf, source, p_fil, rate, notes


def _draw_fits(fit: WeibullResult | None, n: int, rng: np.random.Generator) -> list:
    """Parameter sets drawn from the asymptotic normal of (log eta, log beta)."""
    from tubetrack.fleet.survival import WeibullResult

    if fit is None:
        return [None] * n
    z = rng.multivariate_normal(
        [math.log(fit.eta), math.log(fit.beta)], fit.cov, size=n
    )
    return [
        WeibullResult(
            eta=float(math.exp(u)),
            beta=float(math.exp(v)),
            log_likelihood=math.nan,
            cov=fit.cov,
            n=fit.n,
            n_failures=fit.n_failures,
            alpha=fit.alpha,
            clock=fit.clock,
        )
        for u, v in z
    ]


def _one_blas_thread():
    """Limit BLAS to one thread: the forecast's many small matrix products run far slower
    with thread hand-offs on a busy machine (threadpoolctl comes with scikit-learn)."""
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover
        import contextlib

        return contextlib.nullcontext()
    return threadpool_limits(limits=1, user_api="blas")


def _replacement_forecast(
    life: pd.DataFrame,
    fleet_fit: WeibullResult,
    *,
    as_of: datetime,
    months: int = 12,
    other_fit: WeibullResult | None = None,
    health_rul_cdf: pd.DataFrame | None = None,
    clock: str = "days",
    renewal: bool = False,
    grid_days: float = 1.0,
    horizon_days: float | None = None,
    parameter_draws: int = 0,
    seed: int = 20261202,
) -> ForecastResult:
    """Monthly replacement probabilities per tube and Poisson-binomial fleet totals.

    Parameters
    ----------
    life
        :attr:`LifeData.frame` (tubes in service are forecast; others ignored).
    fleet_fit
        All-cause Weibull on ``clock``.
    as_of
        Forecast origin (UTC).
    months
        Horizon in calendar months.
    other_fit
        Weibull of non-filament causes (used with health forecasts). ``None``: tubes with a
        health forecast still use the all-cause fleet model and a note says so.
    health_rul_cdf
        Health table ``result_health_rul_cdf`` or ``None``.
    clock
        Clock of the fits: ``days`` or a workload clock (future workload at the recent rate).
    renewal
        Count replacements of replacements inside the horizon (renewal function).
    grid_days
        Step of the internal day grid [d].
    horizon_days
        Horizon in days instead of ``months`` (the last period may be a partial month) [d].
    parameter_draws
        0: intervals are the plug-in Poisson-binomial quantiles (MLE parameters treated as
        known). N > 0: predictive intervals that also carry the uncertainty of the fitted
        Weibull parameters: N parameter sets drawn from the asymptotic normal of
        (log eta, log beta) (inverse observed information), the count pmf is the average of
        the N Poisson-binomial pmfs (a mixture), and intervals are its quantiles. The expected
        count stays the plug-in value. Health forecasts are used as given.
    seed
        Seed of the parameter draws.
    """
    import pandas as pd

    notes: list[str] = []
    active = life[life["status"] == "in_service"].reset_index(drop=True)
    edges = month_edges(as_of, months, horizon_days)
    as_of_ts = pd.Timestamp(as_of)
    edge_days = np.array([(e - as_of_ts).total_seconds() / _DAY_S for e in edges])
    horizon = float(edge_days[-1])
    n_grid = max(int(math.ceil(horizon / grid_days)), 1)
    grid = np.linspace(0.0, horizon, n_grid + 1)
    # linear interpolation weights from the day grid to the period edges (vectorised)
    hi_idx = np.clip(np.searchsorted(grid, edge_days, side="left"), 1, n_grid)
    lo_idx = hi_idx - 1
    w_hi = (edge_days - grid[lo_idx]) / (grid[hi_idx] - grid[lo_idx])

    def position_expectations(ff, of):
        first_cdf, source, _, rate, more = tube_replacement_cdf(
            active, ff, grid, other_fit=of, health_rul_cdf=health_rul_cdf, clock=clock
        )
        if renewal:
            if clock != "days":
                # the new tube's workload clock runs at the fleet's median rate
                med_rate = float(np.nanmedian(rate)) if len(rate) else 1.0
                new_cdf = lambda d: ff.cdf(np.asarray(d) * med_rate)  # noqa: E731
            else:
                new_cdf = ff.cdf
            _, m_new = renewal_function(new_cdf, horizon, n_grid)
            expected = delayed_renewal(first_cdf, m_new, grid)
            # P(N >= 2) within the horizon: int_0^h F(h - x) dF1(x)
            f_new = np.asarray(new_cdf(grid), dtype=float)
            d1 = np.diff(first_cdf, axis=1)
            p2 = d1 @ ((f_new[::-1][:-1] + f_new[::-1][1:]) / 2)
        else:
            expected = first_cdf
            p2 = np.zeros(len(active))
        at_edges = expected[:, lo_idx] * (1 - w_hi) + expected[:, hi_idx] * w_hi
        p_any = np.clip(first_cdf[:, -1], 0, 1)
        cum_pmf = np.clip(np.column_stack([1 - p_any, p_any - p2, p2]), 0, 1)
        cum_pmf = cum_pmf / np.where(
            cum_pmf.sum(axis=1, keepdims=True) > 0,
            cum_pmf.sum(axis=1, keepdims=True),
            1,
        )
        return at_edges, p2, cum_pmf, source, more

    at_edges, p2, cum_pmf, source, more = position_expectations(fleet_fit, other_fit)
    notes.extend(more)
    monthly = np.diff(at_edges, axis=1)  # (n, months)
    if renewal and np.any(monthly > 0.5):
        notes.append(
            "some monthly expected counts exceed 0.5; the per-month Bernoulli "
            "approximation of the renewal option is coarse for them."
        )
    n, k = monthly.shape

    # count distributions: plug-in, or the mixture over parameter draws
    draws_monthly = None
    draws_cum_pmf = None
    if parameter_draws > 0 and n:
        rng = np.random.default_rng(seed)
        fleet_draws = _draw_fits(fleet_fit, parameter_draws, rng)
        other_draws = _draw_fits(other_fit, parameter_draws, rng)
        dm, dc = [], []
        for ff, of in zip(fleet_draws, other_draws, strict=True):
            ae, _, cp, _, _ = position_expectations(ff, of)
            dm.append(np.diff(ae, axis=1))
            dc.append(cp)
        draws_monthly = np.stack(dm)
        draws_cum_pmf = np.stack(dc)
        cum_edges = np.concatenate(
            [np.zeros((parameter_draws, n, 1)), np.cumsum(draws_monthly, axis=2)],
            axis=2,
        )
        month_pmfs = [
            np.mean(
                [
                    poisson_binomial_pmf(np.clip(draws_monthly[d, :, j], 0, 1))
                    for d in range(parameter_draws)
                ],
                axis=0,
            )
            for j in range(k)
        ]
        cum_pmfs = [
            np.mean(
                [
                    poisson_binomial_pmf(np.clip(cum_edges[d, :, j + 1], 0, 1))
                    for d in range(parameter_draws)
                ],
                axis=0,
            )
            for j in range(k - 1)
        ] + [
            np.mean(
                [count_sum_pmf(draws_cum_pmf[d]) for d in range(parameter_draws)],
                axis=0,
            )
        ]
        basis = f"predictive ({parameter_draws} parameter draws)"
    else:
        monthly_p = np.clip(monthly, 0, 1)
        month_pmfs = [poisson_binomial_pmf(monthly_p[:, j]) for j in range(k)]
        cum_pmfs = [
            poisson_binomial_pmf(np.clip(at_edges[:, j + 1] - at_edges[:, 0], 0, 1))
            for j in range(k - 1)
        ] + [count_sum_pmf(cum_pmf)]
        basis = "plug-in"

    month_starts = [pd.Timestamp(e).to_period("M").to_timestamp() for e in edges[:-1]]
    tubes = pd.DataFrame(
        {
            "tube_id": np.repeat(active["tube_id"].to_numpy(), k),
            "system_id": np.repeat(active["system_id"].to_numpy(), k),
            "site": np.repeat(active["site"].to_numpy(), k),
            "model_label": np.repeat(active["model_label"].to_numpy(), k),
            "month": np.tile(np.array(month_starts, dtype="datetime64[ns]"), n),
            "month_index": np.tile(np.arange(1, k + 1), n),
            "period_start_utc": np.tile(
                np.array(edges[:-1], dtype="datetime64[ns]"), n
            ),
            "period_end_utc": np.tile(np.array(edges[1:], dtype="datetime64[ns]"), n),
            "p_replace": monthly.ravel(),
            "p_replace_cum": (at_edges[:, 1:] - at_edges[:, :1]).ravel(),
            "source": np.repeat(source, k),
            "age_days": np.repeat(active["exit_days"].to_numpy(dtype=float), k),
        }
    )
    rows = []
    for j in range(k):
        lo80, hi80 = pmf_interval(month_pmfs[j], 0.80)
        lo95, hi95 = pmf_interval(month_pmfs[j], 0.95)
        clo, chi = pmf_interval(cum_pmfs[j], 0.95)
        rows.append(
            {
                "month": month_starts[j],
                "month_index": j + 1,
                "period_start_utc": edges[j],
                "period_end_utc": edges[j + 1],
                "expected_replacements": float(monthly[:, j].sum()),
                "lower_80": lo80,
                "upper_80": hi80,
                "lower_95": lo95,
                "upper_95": hi95,
                "cumulative_expected": float(
                    (at_edges[:, j + 1] - at_edges[:, 0]).sum()
                ),
                "cumulative_lower_95": clo,
                "cumulative_upper_95": chi,
            }
        )
    summary = pd.DataFrame(rows)
    summary["tubes"] = n
    summary["renewal"] = renewal
    summary["interval_basis"] = basis
    per_tube = pd.DataFrame(
        {
            "tube_id": active["tube_id"],
            "system_id": active["system_id"],
            "site": active["site"],
            "model_label": active["model_label"],
            "age_days": active["exit_days"],
            "source": source,
            "p_replace_horizon": at_edges[:, -1] - at_edges[:, 0] if n else [],
            "p_two_or_more": p2,
            "price": active["price"],
            "price_currency": active["price_currency"],
        }
    )
    if n == 0:
        warnings.warn(
            "no tubes in service to forecast.", TubetrackWarning, stacklevel=2
        )
    return ForecastResult(
        tubes=tubes,
        summary=summary,
        per_tube=per_tube,
        cumulative_pmf=cum_pmf,
        as_of=as_of_ts.to_pydatetime(),
        renewal=renewal,
        notes=tuple(notes),
        monthly=monthly,
        draws_monthly=draws_monthly,
        draws_cumulative_pmf=draws_cum_pmf,
    )


@functools.wraps(_replacement_forecast)
def replacement_forecast(*args, **kwargs) -> ForecastResult:
    with _one_blas_thread():
        return _replacement_forecast(*args, **kwargs)


def expected_failures_next(
    fit: WeibullResult, ages, horizon: float, level: float = 0.95
):
    """Expected failures among survivors of the given ages within ``horizon``, with interval.

    Returns (expected, lower, upper, pmf): Poisson-binomial of the conditional probabilities
    1 - S(a + h) / S(a) (Meeker & Escobar 1998, sec. 12.? field-failure prediction; the bearing
    cage example).
    """
    p = fit.conditional_failure_probability(np.asarray(ages, dtype=float), horizon)
    pmf = poisson_binomial_pmf(p)
    lo, hi = pmf_interval(pmf, level)
    return float(p.sum()), lo, hi, pmf


def check_fit_available(fit) -> None:
    if fit is None:
        raise AnalysisError(
            "no fleet Weibull fit is available (fewer than 2 failures). A replacement forecast "
            "needs failures to learn from; pool more history or systems."
        )


def forecast_by_group(forecast: ForecastResult, by: str) -> pd.DataFrame:
    """Monthly Poisson-binomial totals per group (``by`` a column of ``forecast.tubes``).

    Columns: ``group_by``, ``group``, ``month``, ``month_index``, ``expected_replacements``,
    ``lower_80``, ``upper_80``, ``lower_95``, ``upper_95``, ``tubes``.
    """
    import pandas as pd

    t = forecast.tubes
    if by not in t.columns:
        raise InputError(f"cannot group the forecast by {by!r}.")
    rows = []
    keys = t[by].fillna("(unknown)")
    for (group, idx), g in t.groupby([keys, "month_index"], sort=True):
        p = np.clip(g["p_replace"].to_numpy(dtype=float), 0, 1)
        pmf = poisson_binomial_pmf(p)
        lo80, hi80 = pmf_interval(pmf, 0.80)
        lo95, hi95 = pmf_interval(pmf, 0.95)
        rows.append(
            {
                "group_by": by,
                "group": group,
                "month": g["month"].iloc[0],
                "month_index": idx,
                "expected_replacements": float(g["p_replace"].sum()),
                "lower_80": lo80,
                "upper_80": hi80,
                "lower_95": lo95,
                "upper_95": hi95,
                "tubes": len(g),
            }
        )
    return pd.DataFrame(rows)
