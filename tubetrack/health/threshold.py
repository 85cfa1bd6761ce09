"""End-of-life threshold learned from the fleet's own past filament failures.

For every tube removed with ``removal_reason = 'filament'`` before the analysis date, the wear
model fitted on its whole history (which ends at the removal) gives the diameter loss at failure,
``L_i`` with standard error ``s_i``. With at least ``min_failures`` such tubes the losses are
pooled as a random-effects model L_i = mu + u_i + e_i, u_i ~ N(0, tau^2) the real tube-to-tube
spread of the failure point, e_i ~ N(0, s_i^2) the estimation error, with the method-of-moments
tau^2 of DerSimonian & Laird (1986). The threshold for a new tube is mu with the predictive
spread sqrt(tau^2 + se(mu)^2), floored at 5 % of mu, drawn from a Student t with n - 1 degrees
of freedom (the predictive distribution of a new member of a normal population whose mean and
variance are both estimated from n values; Gelman et al., Bayesian Data Analysis, 3rd ed.,
section 3.2) (a handful of failures never claims a sharp
threshold). Estimation error is thus not mistaken for tube-to-tube spread. With fewer failures the default (10 % mass loss,
5.13 % diameter loss) with its assumed spread is used. The spread enters the Monte Carlo of the
remaining life, so the uncertainty of the threshold widens every interval.

Survivors count too. Within a few years of logs only the filaments with a low failure point have
failed yet; pooling the failures alone is biased low. Every filament that has not burnt out (in
service, the intact filament of a tube whose other filament failed, tubes removed for other
reasons) tells that its own failure point lies above its present loss: a right-censored
observation. With survivors given, mu is the maximum-likelihood estimate of the normal model
with right censoring (Tobit; the censored-normal likelihood of Klein & Moeschberger, Survival
Analysis, 2nd ed., section 3.5, with each observation's variance tau^2 + s_i^2), started from
the DerSimonian-Laird values; tau and se(mu) are the wider of the censored fit's (observed
information) and the DerSimonian-Laird ones, because the maximum-likelihood spread of a handful
of failures is biased low.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd


@dataclass(frozen=True)
class Threshold:
    """End-of-life diameter loss in use.

    Attributes
    ----------
    mean, sd
        Threshold and its spread [1].
    n_failures
        Filament failures it was learned from (0 = default) [count].
    df
        Degrees of freedom of its Student-t predictive distribution (n - 1; inf = normal).
    source
        ``"fleet"`` or ``"default"``.
    """

    mean: float
    sd: float
    n_failures: int
    source: str
    df: float = float("inf")


def learn_threshold(
    failed: pd.DataFrame, default: float, default_sd: float, min_failures: int = 3,
    survivors: pd.DataFrame | None = None,
) -> Threshold:
    """Threshold from per-failure diameter losses, and from survivors' losses when given.

    Parameters
    ----------
    failed
        One row per filament failure and focal spot that failed: loss (diameter loss at
        removal [1]) and loss_se [1].
    default, default_sd
        Fallback threshold and spread [1].
    min_failures
        Minimum failures to use the fleet's own value [count].
    survivors
        Filaments known intact at their last analysed day: loss [1] and loss_se [1]
        (right-censored failure points); None or empty = failures only.
    """
    f = failed[np.isfinite(failed["loss"]) & (failed["loss"] > 0)] if len(failed) else failed
    n = int(len(f))
    if n < min_failures:
        return Threshold(float(default), float(default_sd), n, "default")
    y, se = f["loss"].to_numpy(float), f["loss_se"].to_numpy(float)
    mu, tau, se_mu = random_effects(y, se)
    if survivors is not None and len(survivors):
        ok = np.isfinite(survivors["loss"].to_numpy(float)) & np.isfinite(survivors["loss_se"].to_numpy(float))
        sv = survivors[ok]
        if len(sv):
            mu_c, tau_c, se_c = censored_normal_mle(
                y, se, sv["loss"].to_numpy(float), sv["loss_se"].to_numpy(float), start=(mu, tau)
            )
            # the location from the censored model (failures alone are biased low); the spread
            # is the wider of the two estimates: with a handful of failures the maximum-
            # likelihood tau is biased low, and an underestimated spread makes every interval
            # overconfident
            mu, tau, se_mu = mu_c, max(tau, tau_c), max(se_mu, se_c)
    sd = max(float(np.sqrt(tau**2 + se_mu**2)), 0.05 * mu)
    return Threshold(mu, sd, n, "fleet", float(n - 1))


def censored_normal_mle(
    y: np.ndarray, se: np.ndarray, c: np.ndarray, c_se: np.ndarray,
    start: tuple[float, float] | None = None,
) -> tuple[float, float, float]:
    """Normal failure-point model with right censoring: (mean, tau, standard error of the mean).

    Log-likelihood: sum_i log phi((y_i - mu)/v_i)/v_i over the failures plus
    sum_j log(1 - Phi((c_j - mu)/w_j)) over the survivors, v_i^2 = tau^2 + se_i^2,
    w_j^2 = tau^2 + c_se_j^2 (tau = the real tube-to-tube spread, se the estimation errors).
    Maximised over (mu, log tau) from ``start``; se(mu) is the square root of the (mu, mu)
    element of the inverse observed information (central finite differences).

    Parameters
    ----------
    y, se
        Losses at failure and their standard errors [1].
    c, c_se
        Losses of intact filaments (failure point above them) and their standard errors [1].
    start
        Starting (mu, tau); default the mean and SD of ``y``.
    """
    from scipy import optimize, stats

    y, se = np.asarray(y, float), np.asarray(se, float)
    c, c_se = np.asarray(c, float), np.asarray(c_se, float)
    mu0, tau0 = start if start is not None else (float(np.mean(y)), float(np.std(y, ddof=1)))
    scale = max(float(np.std(y, ddof=1)) if y.size > 1 else abs(mu0) * 0.1, 1e-6)
    tau_floor = 1e-4 * scale

    def nll(theta: np.ndarray) -> float:
        m, lt = theta
        t2 = np.exp(2.0 * lt)
        v = np.sqrt(t2 + se**2)
        w = np.sqrt(t2 + c_se**2)
        ll = stats.norm.logpdf(y, m, v).sum() + stats.norm.logsf(c, m, w).sum()
        return -float(ll) if np.isfinite(ll) else 1e300

    x0 = np.array([mu0, np.log(max(tau0, scale * 0.1, tau_floor))])
    res = optimize.minimize(nll, x0, method="Nelder-Mead",
                            options={"xatol": 1e-8 * scale, "fatol": 1e-10, "maxiter": 4000})
    m, lt = res.x
    tau = float(np.exp(lt))
    # observed information of mu at the optimum (log tau held at its optimum)
    h = 1e-3 * scale
    f0, fp, fm = nll(res.x), nll(res.x + [h, 0.0]), nll(res.x - [h, 0.0])
    curv = (fp - 2.0 * f0 + fm) / h**2
    se_mu = float(1.0 / np.sqrt(curv)) if curv > 0 else float(scale / np.sqrt(max(y.size, 1)))
    return float(m), tau, se_mu


def random_effects(y: np.ndarray, se: np.ndarray) -> tuple[float, float, float]:
    """DerSimonian-Laird random-effects pooling: (mean, tau, standard error of the mean).

    References
    ----------
    DerSimonian R., Laird N., "Meta-analysis in clinical trials", Controlled Clinical Trials 7
    (1986) 177-188, eqs. for Q and tau^2 (method of moments).
    """
    y = np.asarray(y, float)
    w = 1.0 / np.maximum(np.asarray(se, float), 1e-9) ** 2
    mean_fixed = float(np.sum(w * y) / np.sum(w))
    q = float(np.sum(w * (y - mean_fixed) ** 2))
    c = float(np.sum(w) - np.sum(w**2) / np.sum(w))
    tau2 = max(0.0, (q - (y.size - 1)) / c) if c > 0 else 0.0
    ws = 1.0 / (1.0 / w + tau2)
    mean = float(np.sum(ws * y) / np.sum(ws))
    return mean, float(np.sqrt(tau2)), float(np.sqrt(1.0 / np.sum(ws)))


def surviving_focal_losses(states: list[dict], failed: pd.DataFrame) -> pd.DataFrame:
    """Losses of every analysed filament that has not burnt out (right-censored failure points).

    All focal-spot states with at least 10 days of current data except the failed filaments in
    ``failed`` (:func:`failed_focal_losses`): filaments in service, the intact filament of a
    filament-failed tube and the filaments of tubes removed for other reasons.
    """
    gone = set(zip(failed["tube_id"].astype(str), failed["focal_spot"].astype(str), strict=True)) \
        if len(failed) else set()
    rows = [
        {"tube_id": s["tube_id"], "focal_spot": s["focal_spot"], "loss": s["loss_now"],
         "loss_se": s["loss_se"]}
        for s in states
        if s["n_days"] >= 10 and (str(s["tube_id"]), str(s["focal_spot"])) not in gone
    ]
    return pd.DataFrame(rows, columns=["tube_id", "focal_spot", "loss", "loss_se"])


def failed_focal_losses(states: list[dict], removed: pd.DataFrame) -> pd.DataFrame:
    """Diameter loss at removal of the failed filament of each filament-failed tube.

    The failed filament is taken as the focal spot with the larger estimated loss relative to its
    uncertainty-free estimate (a burnt-out filament is the one that thinned most).
    """
    ids = set(removed.loc[removed["removal_reason"] == "filament", "tube_id"].astype(str))
    rows = [
        {"tube_id": s["tube_id"], "focal_spot": s["focal_spot"], "loss": s["loss_now"], "loss_se": s["loss_se"],
         "n_days": s["n_days"]}
        for s in states if s["tube_id"] in ids and s["n_days"] >= 10
    ]
    if not rows:
        return pd.DataFrame(columns=["tube_id", "focal_spot", "loss", "loss_se", "n_days"])
    f = pd.DataFrame(rows)
    return f.sort_values("loss", ascending=False).drop_duplicates("tube_id").reset_index(drop=True)
