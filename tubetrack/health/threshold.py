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
    failed: pd.DataFrame, default: float, default_sd: float, min_failures: int = 3
) -> Threshold:
    """Threshold from per-failure diameter losses.

    Parameters
    ----------
    failed
        One row per filament failure and focal spot that failed: loss (diameter loss at
        removal [1]) and loss_se [1].
    default, default_sd
        Fallback threshold and spread [1].
    min_failures
        Minimum failures to use the fleet's own value [count].
    """
    f = failed[np.isfinite(failed["loss"]) & (failed["loss"] > 0)] if len(failed) else failed
    n = int(len(f))
    if n < min_failures:
        return Threshold(float(default), float(default_sd), n, "default")
    mu, tau, se_mu = random_effects(
        f["loss"].to_numpy(float), f["loss_se"].to_numpy(float)
    )
    sd = max(float(np.sqrt(tau**2 + se_mu**2)), 0.05 * mu)
    return Threshold(mu, sd, n, "fleet", float(n - 1))


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
