"""Fleet models shared by the forecast, spares and visit commands.

:func:`fit_fleet_models` fits the all-cause Weibull and the cause-specific (filament / other)
Weibulls on one clock; :func:`read_health_rul_cdf` reads the health worker's per-tube
end-of-life CDF when it exists; :func:`tube_risk` gives each tube in service its
replacement probability within a horizon.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from datetime import datetime
from typing import TYPE_CHECKING

import numpy as np

from tubetrack.errors import AnalysisError, TubetrackWarning
from tubetrack.fleet.forecast import tube_replacement_cdf
from tubetrack.fleet.survival import WeibullResult, fit_weibull

if TYPE_CHECKING:  # pragma: no cover
    import duckdb
    import pandas as pd

    from tubetrack.fleet.lifedata import LifeData

HEALTH_RUL_TABLE = "result_health_rul_cdf"


@dataclass(frozen=True)
class FleetModels:
    """All-cause and cause-specific Weibull fits on one clock (``None`` where not fittable)."""

    all_cause: WeibullResult
    filament: WeibullResult | None
    other: WeibullResult | None
    clock: str
    notes: tuple[str, ...]


def fit_fleet_models(
    life: LifeData, clock: str = "days", alpha: float = 0.05
) -> FleetModels:
    """Fit the fleet Weibull models (cause-specific fits censor the other cause).

    Raises
    ------
    AnalysisError
        Fewer than 2 failures in the whole fleet.
    """
    notes: list[str] = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", TubetrackWarning)
        tab = life.table(clock)
    fits: dict[str, WeibullResult | None] = {}
    for cause in (None, "filament", "other"):
        t = tab if cause is None else life.table(clock, cause)
        try:
            fits[cause or "all"] = fit_weibull(
                t["exit"],
                t["event"],
                t["entry"],
                ids=t["tube_id"].to_numpy(),
                alpha=alpha,
                clock=clock,
            )
        except AnalysisError as exc:
            if cause is None:
                raise
            fits[cause] = None
            notes.append(f"no {cause}-cause Weibull: {exc}")
    return FleetModels(
        all_cause=fits["all"],
        filament=fits["filament"],
        other=fits["other"],
        clock=clock,
        notes=tuple(notes),
    )


def read_health_rul_cdf(con: duckdb.DuckDBPyConnection) -> pd.DataFrame | None:
    """The health worker's ``result_health_rul_cdf`` table, or ``None`` when it does not exist."""
    exists = con.execute(
        "SELECT count(*) FROM information_schema.tables WHERE table_name = ?",
        [HEALTH_RUL_TABLE],
    ).fetchall()
    if not exists or not exists[0][0]:
        return None
    frame = con.execute(
        f"SELECT tube_id, focal_spot, horizon_days, p_end_of_life FROM {HEALTH_RUL_TABLE}"
    ).df()
    return frame if len(frame) else None


def tube_risk(
    life: LifeData,
    models: FleetModels,
    *,
    horizon_days: float,
    health_rul_cdf: pd.DataFrame | None = None,
) -> pd.DataFrame:
    """Replacement probability within ``horizon_days`` for every tube in service.

    Returns ``tube_id``, ``system_id``, ``site``, ``model_label``, ``age_days``, ``p_event``,
    ``p_filament`` (health forecast, NaN without), ``source``.
    """
    active = life.frame[life.frame["status"] == "in_service"].reset_index(drop=True)
    grid = np.array([0.0, float(horizon_days)])
    cdf, source, p_fil, _, _ = tube_replacement_cdf(
        active,
        models.all_cause,
        grid,
        other_fit=models.other,
        health_rul_cdf=health_rul_cdf,
        clock=models.clock,
    )
    out = active[["tube_id", "system_id", "site", "model_label"]].copy()
    out["age_days"] = active["exit_days"].to_numpy(dtype=float)
    out["p_event"] = cdf[:, -1] if len(active) else []
    out["p_filament"] = p_fil[:, -1] if len(active) else []
    out["source"] = source
    return out


def default_as_of(con: duckdb.DuckDBPyConnection, as_of: datetime | None) -> datetime:
    """``as_of`` or the last logged exposure (or downtime end, or now)."""
    if as_of is not None:
        return as_of
    rows = con.execute(
        "SELECT greatest((SELECT max(timestamp_utc) FROM exposures), "
        "(SELECT max(end_utc) FROM downtime))"
    ).fetchall()
    if rows and rows[0][0] is not None:
        return rows[0][0]
    from tubetrack.store import utcnow

    return utcnow()
