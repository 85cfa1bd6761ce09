"""End-of-life threshold learned from the fleet's own past filament failures.

For every tube removed with ``removal_reason = 'filament'`` before the analysis date, the wear
model fitted on its whole history (which ends at the removal) gives the diameter loss at failure,
``L_i`` with standard error ``s_i``. With at least ``min_failures`` such tubes the threshold is
their mean and its spread the sample standard deviation (between-tube spread, which includes the
estimation error), floored at the root-mean-square of the ``s_i`` (so a few coincidentally equal
values never claim a sharp threshold). With fewer failures the default (10 % mass loss,
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
    source
        ``"fleet"`` or ``"default"``.
    """

    mean: float
    sd: float
    n_failures: int
    source: str


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
    loss = f["loss"].to_numpy(float)
    se = f["loss_se"].to_numpy(float)
    sd = float(np.std(loss, ddof=1))
    floor = float(np.sqrt(np.mean(se**2)))
    return Threshold(float(np.mean(loss)), max(sd, floor), n, "fleet")


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
