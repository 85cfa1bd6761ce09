"""Survival models for tube lives: Kaplan-Meier, cumulative incidence and the Weibull MLE.

All estimators accept right censoring and delayed entry (left truncation): a record with entry
``e`` and exit ``t`` is at risk on ``(e, t]``.

References
----------
- E. L. Kaplan, P. Meier, "Nonparametric estimation from incomplete observations", J. Am. Stat.
  Assoc. 53 (1958) 457-481.
- M. Greenwood, "The natural duration of cancer", Rep. Public Health Med. Subj. 33, HMSO 1926.
- J. P. Klein, M. L. Moeschberger, Survival Analysis, 2nd ed., Springer 2003: eq. 4.2.2 (Greenwood),
  4.3.1-4.3.3 (plain, log, log(-log) pointwise intervals; ``log`` here is the interval on log S),
  sec. 4.6 (left truncation), sec. 2.7 / 4.7 (competing risks, cumulative incidence).
- W. Q. Meeker, L. A. Escobar, Statistical Methods for Reliability Data, Wiley 1998: ch. 8
  (Weibull ML with censoring, Wald intervals on the log scale, delta method for F(t) and t_p).
- NIST/SEMATECH e-Handbook of Statistical Methods, sec. 8.4.1.3 (worked Weibull MLE).
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Literal

import numpy as np

from tubetrack.errors import AnalysisError, InputError, TubetrackWarning
from tubetrack.fleet.lifedata import validate_durations

if TYPE_CHECKING:  # pragma: no cover
    import pandas as pd

IntervalKind = Literal["plain", "log", "log-log"]


def _z(alpha: float) -> float:
    from scipy.stats import norm

    if not 0 < alpha < 1:
        raise InputError(
            f"alpha is {alpha!r}; it must be between 0 and 1 (0.05 for 95 %)."
        )
    return float(norm.ppf(1 - alpha / 2))


def _prepare(exit_, event, entry, ids):
    exit_ = np.asarray(exit_, dtype=float)
    event = np.asarray(event, dtype=bool)
    entry = np.zeros_like(exit_) if entry is None else np.asarray(entry, dtype=float)
    if not (exit_.shape == event.shape == entry.shape) or exit_.ndim != 1:
        raise InputError(
            "durations, events and entries must be 1-D arrays of equal length."
        )
    validate_durations(exit_, entry if np.any(entry != 0) else None, ids)
    return exit_, event, entry


# ----------------------------------------------------------------------------------------------
# Kaplan-Meier
# ----------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class KaplanMeierResult:
    """Kaplan-Meier estimate with Greenwood variance.

    ``table`` has one row per distinct event or censoring time: ``time``, ``at_risk`` (number
    in the risk set just before ``time``), ``events``, ``censored``, ``entered`` (delayed
    entries at or before ``time`` since the previous row), ``survival``, ``se`` (Greenwood
    standard error of S), ``lower``, ``upper`` (pointwise interval of kind ``interval``).
    """

    table: pd.DataFrame
    interval: str
    alpha: float
    n: int
    n_events: int

    @property
    def summary(self) -> pd.DataFrame:
        """Rows with at least one event (the steps of the curve)."""
        return self.table[self.table["events"] > 0].reset_index(drop=True)

    def survival_at(self, t) -> np.ndarray:
        """S(t) as a right-continuous step function (1 before the first event)."""
        times = self.table["time"].to_numpy()
        s = np.concatenate([[1.0], self.table["survival"].to_numpy()])
        return s[np.searchsorted(times, np.asarray(t, dtype=float), side="right")]

    def median(self) -> float:
        """Smallest time with S(t) <= 0.5 (NaN when the curve stays above 0.5)."""
        s = self.table["survival"].to_numpy()
        hit = np.flatnonzero(s <= 0.5)
        return float(self.table["time"].iloc[hit[0]]) if len(hit) else math.nan

    def at_risk_table(self, times) -> pd.DataFrame:
        """Numbers at risk, cumulative events and censored at the given times (for plots)."""
        import pandas as pd

        tab = self.table
        times = np.asarray(times, dtype=float)
        t = tab["time"].to_numpy()
        idx_after = np.searchsorted(t, times, side="left")
        n_total = np.concatenate([tab["at_risk"].to_numpy(), [0]])
        cum_ev = np.concatenate([[0], np.cumsum(tab["events"].to_numpy())])
        cum_c = np.concatenate([[0], np.cumsum(tab["censored"].to_numpy())])
        idx_upto = np.searchsorted(t, times, side="right")
        return pd.DataFrame(
            {
                "time": times,
                "at_risk": n_total[idx_after],
                "events": cum_ev[idx_upto],
                "censored": cum_c[idx_upto],
            }
        )


def kaplan_meier(
    exit_,
    event,
    entry=None,
    *,
    ids=None,
    alpha: float = 0.05,
    interval: IntervalKind = "log-log",
) -> KaplanMeierResult:
    """Kaplan-Meier product-limit estimate with Greenwood variance and delayed entry.

    Parameters
    ----------
    exit_
        End of follow-up (failure or censoring) [clock unit].
    event
        True where the record ended in a failure.
    entry
        Delayed entry (left truncation) [clock unit]; ``None`` = 0. A record is at risk at
        time ``t`` when ``entry < t <= exit``.
    ids
        Record names used in error messages.
    alpha
        1 - confidence level of the pointwise interval.
    interval
        ``plain`` (S +/- z se, clipped to [0, 1]), ``log`` (on log S) or ``log-log``
        (on log(-log S), the "exponential Greenwood" interval; never leaves [0, 1]).

    Notes
    -----
    S(t) = prod_{t_j <= t} (1 - d_j / n_j) (Kaplan & Meier 1958); Greenwood:
    Var S = S^2 sum d_j / (n_j (n_j - d_j)) (Klein & Moeschberger 2003, eq. 4.2.2);
    intervals as in Klein & Moeschberger eq. 4.3.1-4.3.3.
    """
    import pandas as pd

    exit_, event, entry = _prepare(exit_, event, entry, ids)
    if interval not in ("plain", "log", "log-log"):
        raise InputError(f"interval {interval!r} is not one of plain, log, log-log.")
    z = _z(alpha)
    times = np.unique(exit_)
    d = np.bincount(np.searchsorted(times, exit_[event]), minlength=len(times))
    c = np.bincount(np.searchsorted(times, exit_[~event]), minlength=len(times))
    # at risk at t: entry < t <= exit
    n_exit_ge = len(exit_) - np.searchsorted(np.sort(exit_), times, side="left")
    n_entry_ge = len(entry) - np.searchsorted(np.sort(entry), times, side="left")
    at_risk = n_exit_ge - n_entry_ge
    entered = np.diff(
        np.concatenate([[0], np.searchsorted(np.sort(entry), times, side="left")])
    )
    with np.errstate(divide="ignore", invalid="ignore"):
        q = np.where(at_risk > 0, d / np.where(at_risk > 0, at_risk, 1), 0.0)
        s = np.cumprod(1.0 - q)
        term = np.where(
            at_risk > d, d / (at_risk * (at_risk - d)), np.where(d > 0, np.inf, 0)
        )
        gw = np.cumsum(term)  # sum d/(n(n-d))
        se = s * np.sqrt(gw)
        if interval == "plain":
            lo, hi = s - z * se, s + z * se
        elif interval == "log":
            lo, hi = s * np.exp(-z * np.sqrt(gw)), s * np.exp(z * np.sqrt(gw))
        else:
            theta = np.sqrt(gw) / np.log(s)  # negative for 0 < S < 1
            lo, hi = s ** np.exp(-z * theta), s ** np.exp(z * theta)
            lo = np.where(s >= 1, 1.0, lo)
            hi = np.where(s >= 1, 1.0, hi)
            lo = np.where(s <= 0, 0.0, lo)
            hi = np.where(s <= 0, 0.0, hi)
    lo = np.clip(np.nan_to_num(lo, nan=0.0), 0, 1)
    hi = np.clip(np.nan_to_num(hi, nan=1.0), 0, 1)
    table = pd.DataFrame(
        {
            "time": times,
            "at_risk": at_risk.astype(int),
            "events": d.astype(int),
            "censored": c.astype(int),
            "entered": entered.astype(int),
            "survival": s,
            "se": se,
            "lower": lo,
            "upper": hi,
        }
    )
    return KaplanMeierResult(
        table=table,
        interval=interval,
        alpha=alpha,
        n=len(exit_),
        n_events=int(event.sum()),
    )


def cumulative_incidence(exit_, cause, entry=None, *, ids=None) -> pd.DataFrame:
    """Aalen-Johansen cumulative incidence of each competing cause.

    Parameters
    ----------
    exit_
        End of follow-up [clock unit].
    cause
        Cause label per record; empty string or None = censored.
    entry
        Delayed entry [clock unit].

    Returns
    -------
    pandas.DataFrame
        ``time``, ``at_risk``, ``cause``, ``events``, ``cumulative_incidence`` (long format, one
        row per event time and cause). The incidences of all causes add up to 1 - S_KM(t).

    Notes
    -----
    CIF_k(t) = sum_{t_j <= t} S(t_j-) d_kj / n_j, with S the all-cause Kaplan-Meier estimate
    (Klein & Moeschberger 2003, sec. 2.7 and Theorem/eq. 4.7.1; Aalen & Johansen 1978).
    """
    import pandas as pd

    cause = np.asarray(pd.Series(cause).fillna("").astype(str))
    event = cause != ""
    km = kaplan_meier(exit_, event, entry, ids=ids)
    tab = km.table
    s_prev = np.concatenate([[1.0], tab["survival"].to_numpy()[:-1]])
    times = tab["time"].to_numpy()
    exit_ = np.asarray(exit_, dtype=float)
    frames = []
    for k in sorted(set(cause[event])):
        dk = np.bincount(
            np.searchsorted(times, exit_[cause == k]), minlength=len(times)
        ).astype(float)
        n = tab["at_risk"].to_numpy()
        inc = np.cumsum(np.where(n > 0, s_prev * dk / np.where(n > 0, n, 1), 0.0))
        frames.append(
            pd.DataFrame(
                {
                    "time": times,
                    "at_risk": n,
                    "cause": k,
                    "events": dk.astype(int),
                    "cumulative_incidence": inc,
                }
            )
        )
    if not frames:
        return pd.DataFrame(
            columns=["time", "at_risk", "cause", "events", "cumulative_incidence"]
        )
    return pd.concat(frames, ignore_index=True)


# ----------------------------------------------------------------------------------------------
# Weibull
# ----------------------------------------------------------------------------------------------


def _weibull_terms(theta, lt, delta, le, has_entry):
    """Log-likelihood, gradient and Hessian on (u = log eta, v = log beta)."""
    u, v = theta
    b = math.exp(v)
    w = b * (lt - u)
    zz = np.exp(w)
    we = b * (le - u)
    ze = np.where(has_entry, np.exp(np.where(has_entry, we, 0.0)), 0.0)
    we = np.where(has_entry, we, 0.0)
    nd = delta.sum()
    # l = sum delta (v - log t + w) - sum z + sum z_e
    ll = nd * v + np.sum(delta * (w - lt)) - zz.sum() + ze.sum()
    g_u = -b * nd + b * zz.sum() - b * ze.sum()
    g_v = np.sum(delta * (1 + w)) - np.sum(w * zz) + np.sum(we * ze)
    h_uu = -b * b * zz.sum() + b * b * ze.sum()
    h_uv = (
        -b * nd + b * zz.sum() + b * np.sum(w * zz) - b * ze.sum() - b * np.sum(we * ze)
    )
    h_vv = np.sum(delta * w) - np.sum(w * zz * (1 + w)) + np.sum(we * ze * (1 + we))
    return ll, np.array([g_u, g_v]), np.array([[h_uu, h_uv], [h_uv, h_vv]])


@dataclass(frozen=True)
class WeibullResult:
    """Two-parameter Weibull fitted by maximum likelihood, S(t) = exp(-(t/eta)^beta).

    ``cov`` is the inverse observed information on (log eta, log beta).
    """

    eta: float
    beta: float
    log_likelihood: float
    cov: np.ndarray = field(repr=False)
    n: int
    n_failures: int
    alpha: float = 0.05
    clock: str = "days"

    @property
    def se_log_eta(self) -> float:
        return float(math.sqrt(self.cov[0, 0]))

    @property
    def se_log_beta(self) -> float:
        return float(math.sqrt(self.cov[1, 1]))

    @property
    def se_eta(self) -> float:
        """Delta-method standard error of eta [clock unit]."""
        return self.eta * self.se_log_eta

    @property
    def se_beta(self) -> float:
        return self.beta * self.se_log_beta

    def eta_interval(self, alpha: float | None = None) -> tuple[float, float]:
        """Wald interval of eta on the log scale."""
        z = _z(self.alpha if alpha is None else alpha)
        return self.eta * math.exp(-z * self.se_log_eta), self.eta * math.exp(
            z * self.se_log_eta
        )

    def beta_interval(self, alpha: float | None = None) -> tuple[float, float]:
        """Wald interval of beta on the log scale."""
        z = _z(self.alpha if alpha is None else alpha)
        return (
            self.beta * math.exp(-z * self.se_log_beta),
            self.beta * math.exp(z * self.se_log_beta),
        )

    @property
    def aic(self) -> float:
        return 4.0 - 2.0 * self.log_likelihood

    @property
    def mean(self) -> float:
        """Mean life eta Gamma(1 + 1/beta) [clock unit]."""
        return self.eta * math.gamma(1 + 1 / self.beta)

    def survival(self, t) -> np.ndarray:
        """S(t) [-]."""
        t = np.asarray(t, dtype=float)
        return np.exp(-np.power(np.clip(t, 0, None) / self.eta, self.beta))

    def cdf(self, t) -> np.ndarray:
        """F(t) = 1 - S(t) [-]."""
        return -np.expm1(
            -np.power(
                np.clip(np.asarray(t, dtype=float), 0, None) / self.eta, self.beta
            )
        )

    def survival_bounds(self, t, alpha: float | None = None) -> pd.DataFrame:
        """S(t) with delta-method bounds computed on log H(t) = beta (log t - log eta).

        Returns ``time``, ``survival``, ``lower``, ``upper`` (Meeker & Escobar 1998, sec. 8.4.3).
        """
        import pandas as pd

        z = _z(self.alpha if alpha is None else alpha)
        t = np.asarray(t, dtype=float)
        with np.errstate(divide="ignore"):
            w = self.beta * (np.log(t) - math.log(self.eta))
        gu, gv = -self.beta, w
        var = (
            gu * gu * self.cov[0, 0]
            + 2 * gu * gv * self.cov[0, 1]
            + gv * gv * self.cov[1, 1]
        )
        se = np.sqrt(var)
        return pd.DataFrame(
            {
                "time": t,
                "survival": np.exp(-np.exp(w)),
                "lower": np.exp(-np.exp(w + z * se)),
                "upper": np.exp(-np.exp(w - z * se)),
            }
        )

    def b_life(
        self, p: float, alpha: float | None = None
    ) -> tuple[float, float, float]:
        """Time by which a fraction ``p`` has failed (B10: p = 0.1), with delta-method bounds.

        log t_p = log eta + log(-log(1 - p)) / beta; bounds exp(log t_p +/- z se)
        (Meeker & Escobar 1998, sec. 8.4.2). Returns (estimate, lower, upper) [clock unit].
        """
        z = _z(self.alpha if alpha is None else alpha)
        c = math.log(-math.log1p(-p))
        log_tp = math.log(self.eta) + c / self.beta
        gu, gv = 1.0, -c / self.beta
        var = (
            gu * gu * self.cov[0, 0]
            + 2 * gu * gv * self.cov[0, 1]
            + gv * gv * self.cov[1, 1]
        )
        se = math.sqrt(max(var, 0.0))
        return math.exp(log_tp), math.exp(log_tp - z * se), math.exp(log_tp + z * se)

    def conditional_failure_probability(self, age, horizon) -> np.ndarray:
        """P(fail in (age, age + horizon] | alive at age) = 1 - S(age + h) / S(age) [-]."""
        age = np.clip(np.asarray(age, dtype=float), 0, None)
        h = np.asarray(horizon, dtype=float)
        za = np.power(age / self.eta, self.beta)
        zb = np.power((age + h) / self.eta, self.beta)
        return -np.expm1(-(zb - za))

    def mean_residual_life(self, age) -> np.ndarray:
        """E[T - a | T > a] = eta Gamma(1 + 1/beta) Q(1/beta, (a/eta)^beta) / S(a) [clock unit].

        Q is the regularised upper incomplete gamma function; for very old ages (S(a) below
        1e-300) the asymptotic a (a/eta)^-beta / beta is used.
        """
        from scipy.special import gammaincc

        age = np.clip(np.asarray(age, dtype=float), 0, None)
        za = np.power(age / self.eta, self.beta)
        k = 1.0 / self.beta
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            mrl = self.eta * math.gamma(1 + k) * gammaincc(k, za) * np.exp(za)
            asym = age / (self.beta * np.where(za > 0, za, 1.0))
        return np.where(za < 600, mrl, asym)

    @property
    def summary(self) -> pd.DataFrame:
        """One row: estimates, standard errors, Wald bounds, log-likelihood, B10 and median."""
        import pandas as pd

        e_lo, e_hi = self.eta_interval()
        b_lo, b_hi = self.beta_interval()
        b10 = self.b_life(0.10)
        b50 = self.b_life(0.50)
        return pd.DataFrame(
            [
                {
                    "clock": self.clock,
                    "n": self.n,
                    "failures": self.n_failures,
                    "eta": self.eta,
                    "eta_lower": e_lo,
                    "eta_upper": e_hi,
                    "eta_se": self.se_eta,
                    "beta": self.beta,
                    "beta_lower": b_lo,
                    "beta_upper": b_hi,
                    "beta_se": self.se_beta,
                    "log_likelihood": self.log_likelihood,
                    "aic": self.aic,
                    "mean_life": self.mean,
                    "b10_life": b10[0],
                    "b10_lower": b10[1],
                    "b10_upper": b10[2],
                    "median_life": b50[0],
                    "median_lower": b50[1],
                    "median_upper": b50[2],
                    "confidence": 1 - self.alpha,
                }
            ]
        )


def fit_weibull(
    exit_,
    event,
    entry=None,
    *,
    ids=None,
    alpha: float = 0.05,
    clock: str = "days",
) -> WeibullResult:
    """Two-parameter Weibull maximum-likelihood fit with right censoring and delayed entry.

    Parameters
    ----------
    exit_
        Failure or censoring times [clock unit].
    event
        True for failures.
    entry
        Delayed entry times [clock unit] (``None`` = 0): the likelihood is conditioned on
        survival to entry, L_i = f(t_i)^d_i S(t_i)^(1-d_i) / S(e_i).
    alpha
        1 - confidence level of the Wald bounds.

    Notes
    -----
    Maximised over (log eta, log beta) with scipy.optimize (trust-region Newton with the
    analytic gradient and Hessian); the covariance is the inverse observed information at the
    optimum on that scale, so the parameter bounds are eta exp(+/- z se(log eta)) and the same
    for beta (Meeker & Escobar 1998, sec. 8.3; the form NIST/SEMATECH 8.4.1.3 and the
    ``reliability`` package report).

    Raises
    ------
    AnalysisError
        Fewer than 2 failures, or the optimiser does not converge (with likely causes).
    """
    from scipy.optimize import minimize

    exit_, event, entry = _prepare(exit_, event, entry, ids)
    r = int(event.sum())
    if r < 2:
        raise AnalysisError(
            f"a Weibull fit needs at least 2 failures; this data has {r} among {len(exit_)} "
            "records. Pool groups (fewer --by levels) or wait for more failures."
        )
    lt = np.log(exit_)
    has_entry = entry > 0
    le = np.log(np.where(has_entry, entry, 1.0))
    delta = event.astype(float)
    # start: exponential MLE scale with beta = 1
    u0 = math.log((exit_ - entry).sum() / r)
    fun = lambda th: -_weibull_terms(th, lt, delta, le, has_entry)[0]  # noqa: E731
    jac = lambda th: -_weibull_terms(th, lt, delta, le, has_entry)[1]  # noqa: E731
    hess = lambda th: -_weibull_terms(th, lt, delta, le, has_entry)[2]  # noqa: E731
    best = None
    for start in ([u0, 0.0], [float(np.log(exit_).mean()) + 0.5, math.log(2.0)]):
        with np.errstate(over="ignore", invalid="ignore"):
            res = minimize(
                fun,
                np.array(start),
                jac=jac,
                hess=hess,
                method="trust-exact",
                options={"gtol": 1e-10, "maxiter": 500},
            )
        if np.all(np.isfinite(res.x)) and (best is None or res.fun < best.fun):
            best = res
    if (
        best is None
        or not np.isfinite(best.fun)
        or np.max(np.abs(jac(best.x))) > 1e-4 * max(1, r)
    ):
        raise AnalysisError(
            "the Weibull fit did not converge. Likely causes: all failures at (nearly) the same "
            "time, failures only at the very start, or almost no censored time. Check the "
            "durations, try another clock, or pool groups."
        )
    ll, _, h = _weibull_terms(best.x, lt, delta, le, has_entry)
    info = -h
    try:
        cov = np.linalg.inv(info)
    except np.linalg.LinAlgError as exc:
        raise AnalysisError(
            "the Weibull fit's information matrix is singular; the data cannot pin down both "
            "parameters (too few distinct failure times?)."
        ) from exc
    if np.any(np.diag(cov) <= 0):
        raise AnalysisError("the Weibull fit ended at a saddle point; check the data.")
    return WeibullResult(
        eta=float(math.exp(best.x[0])),
        beta=float(math.exp(best.x[1])),
        log_likelihood=float(ll - delta.sum() * 0.0),
        cov=cov,
        n=len(exit_),
        n_failures=r,
        alpha=alpha,
        clock=clock,
    )


GROUPINGS = {"model": "model_label", "modality": "modality", "site": "site"}


@dataclass(frozen=True)
class GroupSurvivalResult:
    """Weibull and Kaplan-Meier per group of a life table.

    ``summary``: one row per group with the Weibull summary columns (NaN where not fitted),
    ``group_by``, ``group``, ``n``, ``failures``, ``km_median``, ``message``.
    ``km``: the Kaplan-Meier table of every group (long format with ``group``).
    ``fits``: group -> :class:`WeibullResult` for groups that could be fitted.
    """

    summary: pd.DataFrame
    km: pd.DataFrame
    fits: dict


def survival_by_group(
    table: pd.DataFrame,
    by: str | None = None,
    *,
    min_failures: int = 3,
    alpha: float = 0.05,
    interval: IntervalKind = "log-log",
    clock: str = "days",
) -> GroupSurvivalResult:
    """Fit Kaplan-Meier and Weibull for the whole fleet (``by=None``) or per group.

    Parameters
    ----------
    table
        Output of :meth:`LifeData.table` (``entry``, ``exit``, ``event`` + group columns).
    by
        ``model``, ``modality``, ``site`` or ``None`` (fleet).
    min_failures
        Groups with fewer failures get no Weibull fit and a message saying so.
    """
    import pandas as pd

    if by is not None and by not in GROUPINGS:
        raise InputError(f"--by {by!r} is not one of {', '.join(GROUPINGS)}.")
    col = GROUPINGS.get(by) if by else None
    groups = (
        [("fleet", table)]
        if col is None
        else [
            (str(k), g)
            for k, g in table.groupby(table[col].fillna("(unknown)"), sort=True)
        ]
    )
    rows, kms, fits = [], [], {}
    for name, g in groups:
        ids = g["tube_id"].to_numpy() if "tube_id" in g else None
        entry = g["entry"].to_numpy()
        km = kaplan_meier(
            g["exit"], g["event"], entry, ids=ids, alpha=alpha, interval=interval
        )
        k = km.table.copy()
        k.insert(0, "group", name)
        kms.append(k)
        r = int(g["event"].sum())
        row = {
            "group_by": by or "fleet",
            "group": name,
            "n": len(g),
            "failures": r,
            "km_median": km.median(),
        }
        if r < min_failures:
            row["message"] = (
                f"only {r} failure(s) among {len(g)} tubes (need >= {min_failures}); "
                "no Weibull fit. Use the fleet-wide fit for this group."
            )
        else:
            try:
                fit = fit_weibull(
                    g["exit"], g["event"], entry, ids=ids, alpha=alpha, clock=clock
                )
            except AnalysisError as exc:
                row["message"] = f"Weibull fit failed: {exc}"
            else:
                fits[name] = fit
                row.update(fit.summary.iloc[0].drop(["n", "failures"]).to_dict())
                row["message"] = "ok"
                if r < 10:
                    row["message"] = f"ok (only {r} failures: wide intervals)"
        rows.append(row)
    summary = pd.DataFrame(rows)
    for c in ("eta", "beta", "b10_life", "median_life", "clock"):
        if c not in summary.columns:
            summary[c] = np.nan if c != "clock" else clock
    summary["clock"] = clock
    if any(summary["message"].str.startswith("only")) and by:
        warnings.warn(
            "some groups have too few failures for a Weibull fit; see the message column.",
            TubetrackWarning,
            stacklevel=2,
        )
    return GroupSurvivalResult(
        summary=summary, km=pd.concat(kms, ignore_index=True), fits=fits
    )
