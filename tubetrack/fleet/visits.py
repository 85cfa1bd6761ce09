"""Visit order for service engineers: systems ranked by risk x impact, grouped by site.

risk
    P(at least one tube replacement on the system within the horizon)
    = 1 - prod over its tubes in service (1 - p_tube), with p_tube from the replacement rule of
    :mod:`tubetrack.fleet.forecast` (own health forecast + fleet model, or fleet model by age).
impact
    criticality_weight x (1 + contract_share), where contract_share is the fraction of the
    contract's downtime allowance over the horizon that one tube outage would use:
    (tube outage hours x scheduled/168) / ((1 - target/100) x scheduled hours in the horizon),
    capped at 10. Without a target the share is 0 (impact = criticality alone).
score
    risk x impact. Ranked over the fleet (``rank``) and within each site (``site_rank``); sites
    are ordered by their highest score.

The tube outage length is the median duration of past corrective tube episodes in the
``downtime`` table, or 24 h when there are none (common practice: a planned tube swap with
calibration takes about a working day).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

if TYPE_CHECKING:  # pragma: no cover
    import pandas as pd

DEFAULT_TUBE_OUTAGE_H = 24.0  # common practice
MAX_CONTRACT_SHARE = 10.0


@dataclass(frozen=True)
class VisitsResult:
    """Visit order.

    ``summary`` columns: ``rank``, ``site``, ``site_rank``, ``system_id``, ``score``, ``risk``,
    ``p_filament_event`` (NaN without a health forecast), ``impact``, ``criticality_weight``,
    ``uptime_target_pct``, ``contract_share``, ``tubes_in_service``, ``oldest_tube_id``,
    ``oldest_tube_age_days``, ``risk_source``, ``horizon_days``, ``reason``.
    """

    summary: pd.DataFrame
    tube_outage_h: float


def visit_order(
    tube_risk: pd.DataFrame,
    systems: pd.DataFrame,
    *,
    horizon_days: float,
    tube_outage_h: float = DEFAULT_TUBE_OUTAGE_H,
) -> VisitsResult:
    """Rank systems for a service visit.

    Parameters
    ----------
    tube_risk
        One row per tube in service: ``tube_id``, ``system_id``, ``age_days``, ``p_event``
        (replacement probability within the horizon), ``p_filament`` (NaN without health),
        ``source``.
    systems
        Store ``systems`` rows.
    horizon_days
        Horizon of ``p_event`` [d].
    tube_outage_h
        Expected wall-clock length of a tube outage [h].
    """
    tr = tube_risk.copy()
    tr["log_q"] = np.log1p(-np.clip(tr["p_event"].to_numpy(dtype=float), 0, 1 - 1e-15))
    tr["log_qf"] = np.log1p(
        -np.clip(tr["p_filament"].fillna(0).to_numpy(dtype=float), 0, 1 - 1e-15)
    )
    tr["has_fil"] = tr["p_filament"].notna()
    tr = tr.sort_values("age_days", ascending=False)
    g = tr.groupby("system_id", sort=False).agg(
        log_q=("log_q", "sum"),
        log_qf=("log_qf", "sum"),
        has_fil=("has_fil", "any"),
        tubes_in_service=("tube_id", "size"),
        oldest_tube_id=("tube_id", "first"),
        oldest_tube_age_days=("age_days", "first"),
        risk_source=("source", lambda s: "+".join(sorted(set(s)))),
    )
    # "+ 0.0" turns -expm1(0) = -0.0 into 0.0, so reasons never read "-0.0 %"
    g["risk"] = -np.expm1(g["log_q"]) + 0.0
    g["p_filament_event"] = np.where(g["has_fil"], -np.expm1(g["log_qf"]) + 0.0, np.nan)
    s = systems.set_index("system_id")
    out = g.join(
        s[
            [
                c
                for c in (
                    "site",
                    "criticality_weight",
                    "uptime_target_pct",
                    "scheduled_hours_per_week",
                )
                if c in s.columns
            ]
        ],
        how="left",
    )
    out = out.reset_index()
    for c in (
        "site",
        "criticality_weight",
        "uptime_target_pct",
        "scheduled_hours_per_week",
    ):
        if c not in out.columns:
            out[c] = np.nan
    crit = out["criticality_weight"].astype(float).fillna(1.0)
    sched = out["scheduled_hours_per_week"].astype(float).fillna(168.0)
    target = out["uptime_target_pct"].astype(float)
    allowed = (1 - target / 100) * sched * horizon_days / 7.0
    outage_req = tube_outage_h * sched / 168.0
    with np.errstate(divide="ignore", invalid="ignore"):
        share = np.where(allowed > 0, outage_req / allowed, MAX_CONTRACT_SHARE)
    share = np.where(target.notna(), np.minimum(share, MAX_CONTRACT_SHARE), 0.0)
    out["criticality_weight"] = crit
    out["contract_share"] = share
    out["impact"] = crit * (1 + share)
    out["score"] = out["risk"] * out["impact"]
    out["site"] = out["site"].fillna("(unknown site)")
    out["horizon_days"] = horizon_days
    out = out.sort_values(["score", "system_id"], ascending=[False, True]).reset_index(
        drop=True
    )
    out["rank"] = np.arange(1, len(out) + 1)
    out["site_rank"] = (
        out.groupby("site")["score"].rank(method="first", ascending=False).astype(int)
    )
    site_order = out.groupby("site")["score"].max().sort_values(ascending=False)
    out["_site_order"] = out["site"].map({k: i for i, k in enumerate(site_order.index)})
    out = out.sort_values(["_site_order", "site_rank"]).drop(columns="_site_order")

    def reason(r) -> str:
        parts = [
            f"P(tube replacement within {horizon_days:g} d) {100 * r['risk']:.1f} % "
            f"({r['risk_source']}; oldest tube {r['oldest_tube_id']} at "
            f"{r['oldest_tube_age_days']:.0f} d)"
        ]
        if not math.isnan(r["p_filament_event"]):
            parts.append(
                f"filament end of life {100 * r['p_filament_event']:.1f} % (health)"
            )
        parts.append(f"criticality {r['criticality_weight']:g}")
        if not math.isnan(r["uptime_target_pct"]):
            parts.append(
                f"one tube outage (~{tube_outage_h:.0f} h) uses {100 * r['contract_share']:.0f} % "
                f"of the {r['uptime_target_pct']:g} % contract's downtime allowance"
            )
        else:
            parts.append("no uptime target")
        return "; ".join(parts)

    out["reason"] = [reason(r) for r in out.to_dict("records")] if len(out) else []
    cols = [
        "rank",
        "site",
        "site_rank",
        "system_id",
        "score",
        "risk",
        "p_filament_event",
        "impact",
        "criticality_weight",
        "uptime_target_pct",
        "contract_share",
        "tubes_in_service",
        "oldest_tube_id",
        "oldest_tube_age_days",
        "risk_source",
        "horizon_days",
        "reason",
    ]
    return VisitsResult(
        summary=out[cols].reset_index(drop=True), tube_outage_h=tube_outage_h
    )


def typical_tube_outage_h(episodes: pd.DataFrame) -> float:
    """Median duration of past corrective tube episodes [h], or the default without any."""
    if episodes is None or len(episodes) == 0 or "tube" not in episodes:
        return DEFAULT_TUBE_OUTAGE_H
    d = episodes.loc[episodes["tube"].astype(bool), "duration_h"]
    return float(d.median()) if len(d) else DEFAULT_TUBE_OUTAGE_H
