"""Tube life data: durations, censoring, delayed entry, causes and life clocks.

A tube's life runs from ``installed_at_utc`` to ``removed_at_utc``. A removal for a wear-out or
fault reason is a *failure*; ``upgrade`` is a withdrawal (right-censored, not a failure); a tube
still in service is right-censored at the analysis date. A tube installed before its system's logs
began is *left-truncated* (delayed entry): it is only in our data because it survived to the log
start, so it enters the risk set at ``entry = log start - install`` (Klein & Moeschberger, Survival
Analysis, 2nd ed., Springer 2003, sec. 3.4 and 4.6).

Causes are split into ``filament`` (the filament burnt through or drifted out of range) and
``other`` (arcing, bearing, anode, vacuum, housing, other); competing causes are analysed
separately (cause-specific fits; cumulative incidence in :mod:`tubetrack.fleet.survival`).

Life clocks:

``days``
    calendar days in service.
``exposures``
    number of logged exposures.
``mas``
    tube-current-time product [mA s].
``heat_units``
    kVp x mAs x waveform factor [HU] (see :data:`WAVEFORM_FACTORS`).
``hot_time_s``
    filament hot time: exposure time plus prep (boost) time [s].

Workload is only known from the logs. For a left-truncated tube the workload before the log
start is unknown; its entry on a workload clock is *estimated* as its logged mean daily workload
times the days in service before the log start (flag ``workload_entry_estimated``).
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from datetime import datetime
from typing import TYPE_CHECKING, Literal

import numpy as np

from tubetrack.errors import InputError, TubetrackWarning

if TYPE_CHECKING:  # pragma: no cover
    import duckdb
    import pandas as pd

Clock = Literal["days", "exposures", "mas", "heat_units", "hot_time_s"]
CLOCKS: tuple[str, ...] = ("days", "exposures", "mas", "heat_units", "hot_time_s")
CLOCK_UNITS = {
    "days": "d",
    "exposures": "exposures",
    "mas": "mA s",
    "heat_units": "HU",
    "hot_time_s": "s",
}

#: Heat-unit waveform factor per generator type: HU = kVp x mA x s x factor.
#: Source: radiography teaching texts, e.g. S. C. Bushong, Radiologic Science for Technologists,
#: 11th ed., Elsevier 2017, ch. 7 (heat units: 1.0 single-phase, 1.35 three-phase six-pulse,
#: 1.41 three-phase twelve-pulse, about 1.4 high-frequency). 1 HU is about 0.71 J.
WAVEFORM_FACTORS: dict[str, float] = {
    "single_phase": 1.0,
    "three_phase_6p": 1.35,
    "three_phase_12p": 1.41,
    "high_frequency": 1.4,
}

#: Removal reasons counted as failure of the filament; other failure reasons are ``other``.
FILAMENT_REASONS = frozenset({"filament"})
#: Removal reasons that are not failures (the tube was withdrawn in working order).
WITHDRAWAL_REASONS = frozenset({"upgrade"})

_DAY_S = 86400.0


def workload_by_tube(
    con: duckdb.DuckDBPyConnection,
    as_of: datetime | None = None,
    recent_days: float = 90.0,
) -> pd.DataFrame:
    """Aggregate logged workload per tube from ``v_exposures`` in one grouped DuckDB query.

    Parameters
    ----------
    con
        Open store.
    as_of
        Only exposures strictly before this time (UTC) count; ``None`` = all.
    recent_days
        Window before ``as_of`` (or the last exposure) for the recent workload rate [d].

    Returns
    -------
    pandas.DataFrame
        One row per tube: ``tube_id``, ``system_id``, ``exposures`` [count], ``mas`` [mA s],
        ``heat_units`` [HU] (NULL when the system's generator type is unknown), ``hot_time_s``
        [s], ``first_exposure_utc``, ``last_exposure_utc``, ``recent_exposures``,
        ``recent_mas``, ``recent_heat_units``, ``recent_hot_time_s`` (same sums over the recent
        window), ``recent_window_start_utc``.
    """
    factors = ", ".join(f"('{k}', {v!r})" for k, v in WAVEFORM_FACTORS.items())
    sql = f"""
    WITH wf(generator_type, factor) AS (VALUES {factors}),
    e AS (
        SELECT x.tube_id, x.system_id, x.timestamp_utc,
               coalesce(x.exposure_mas, x.tube_current_ma * x.exposure_time_s) AS mas,
               x.tube_voltage_kv
                 * coalesce(x.exposure_mas, x.tube_current_ma * x.exposure_time_s)
                 * wf.factor AS hu,
               coalesce(x.exposure_time_s, x.exposure_mas / nullif(x.tube_current_ma, 0), 0)
                 + coalesce(x.prep_time_s, 0) AS hot_s
        FROM v_exposures x
        LEFT JOIN systems s ON s.system_id = x.system_id
        LEFT JOIN wf ON wf.generator_type = s.generator_type
        WHERE x.tube_id IS NOT NULL
          AND (CAST($as_of AS TIMESTAMP) IS NULL OR x.timestamp_utc < CAST($as_of AS TIMESTAMP))
    ),
    edge AS (
        SELECT coalesce(CAST($as_of AS TIMESTAMP), max(timestamp_utc))
               - to_microseconds(CAST($recent_us AS BIGINT)) AS recent_start
        FROM e
    )
    SELECT e.tube_id,
           any_value(e.system_id) AS system_id,
           count(*) AS exposures,
           sum(e.mas) AS mas,
           CASE WHEN count(e.hu) = count(*) THEN sum(e.hu) END AS heat_units,
           sum(e.hot_s) AS hot_time_s,
           min(e.timestamp_utc) AS first_exposure_utc,
           max(e.timestamp_utc) AS last_exposure_utc,
           count(*) FILTER (WHERE e.timestamp_utc >= edge.recent_start) AS recent_exposures,
           coalesce(sum(e.mas) FILTER (WHERE e.timestamp_utc >= edge.recent_start), 0)
               AS recent_mas,
           CASE WHEN count(e.hu) = count(*) THEN
               coalesce(sum(e.hu) FILTER (WHERE e.timestamp_utc >= edge.recent_start), 0)
           END AS recent_heat_units,
           coalesce(sum(e.hot_s) FILTER (WHERE e.timestamp_utc >= edge.recent_start), 0)
               AS recent_hot_time_s,
           any_value(edge.recent_start) AS recent_window_start_utc
    FROM e CROSS JOIN edge
    GROUP BY e.tube_id
    ORDER BY e.tube_id
    """
    return con.execute(
        sql, {"as_of": as_of, "recent_us": int(recent_days * _DAY_S * 1e6)}
    ).df()


def log_start_by_system(
    con: duckdb.DuckDBPyConnection, as_of: datetime | None = None
) -> pd.DataFrame:
    """First logged exposure per system (UTC): the start of observation for delayed entry.

    Returns
    -------
    pandas.DataFrame
        ``system_id``, ``log_start_utc``, ``log_end_utc``.
    """
    return con.execute(
        """
        SELECT system_id, min(timestamp_utc) AS log_start_utc, max(timestamp_utc) AS log_end_utc
        FROM exposures
        WHERE CAST($as_of AS TIMESTAMP) IS NULL OR timestamp_utc < CAST($as_of AS TIMESTAMP)
        GROUP BY system_id ORDER BY system_id
        """,
        {"as_of": as_of},
    ).df()


@dataclass(frozen=True)
class LifeData:
    """Life records of every tube, one row each, in ``frame``.

    Columns of ``frame``: ``tube_id``, ``system_id``, ``model_label``, ``site``, ``modality``,
    ``generator_type``, ``installed_at_utc``, ``removed_at_utc``, ``removal_reason``,
    ``status`` (failed | in_service | withdrawn), ``failed`` (bool), ``cause``
    (filament | other | empty), ``log_start_utc``, ``left_truncated`` (bool), ``entry_days``
    and ``exit_days`` [d], workload totals ``exposures``, ``mas`` [mA s], ``heat_units`` [HU],
    ``hot_time_s`` [s] (logged plus estimated pre-log workload), the same with an ``entry_``
    prefix (workload at the log start), per-day rates ``rate_<clock>`` [clock unit per day]
    from the recent window, ``workload_entry_estimated`` (bool), ``price``, ``price_currency``.
    """

    frame: pd.DataFrame
    as_of: datetime
    excluded: pd.DataFrame

    @property
    def summary(self) -> pd.DataFrame:
        """Counts by status and cause."""
        import pandas as pd

        f = self.frame
        rows = [
            ("tubes", len(f)),
            ("failed", int(f["failed"].sum())),
            ("failed_filament", int((f["cause"] == "filament").sum())),
            ("failed_other", int((f["cause"] == "other").sum())),
            ("in_service", int((f["status"] == "in_service").sum())),
            ("withdrawn", int((f["status"] == "withdrawn").sum())),
            ("left_truncated", int(f["left_truncated"].sum())),
            ("excluded", len(self.excluded)),
        ]
        return pd.DataFrame(rows, columns=["quantity", "count"])

    def table(self, clock: str = "days", cause: str | None = None) -> pd.DataFrame:
        """Survival table for one clock: ``tube_id``, ``entry``, ``exit``, ``event`` + groups.

        Parameters
        ----------
        clock
            One of :data:`CLOCKS`.
        cause
            ``None``: any failure is the event; ``"filament"`` or ``"other"``: cause-specific
            (failures of the other cause are censored, independent competing risks).
        """
        if clock not in CLOCKS:
            raise InputError(f"clock {clock!r} is not one of {', '.join(CLOCKS)}.")
        f = self.frame
        if clock == "days":
            entry, exit_ = f["entry_days"], f["exit_days"]
        else:
            entry, exit_ = f[f"entry_{clock}"], f[clock]
        event = f["failed"] if cause is None else f["failed"] & (f["cause"] == cause)
        out = f[["tube_id", "system_id", "model_label", "site", "modality"]].copy()
        out["entry"] = entry.to_numpy(dtype=float)
        out["exit"] = exit_.to_numpy(dtype=float)
        out["event"] = event.to_numpy(dtype=bool)
        keep = np.isfinite(out["exit"].to_numpy()) & (out["exit"].to_numpy() > 0)
        if not keep.all():
            warnings.warn(
                f"{int((~keep).sum())} tube(s) have no logged workload on the {clock} clock and "
                "are left out of this analysis.",
                TubetrackWarning,
                stacklevel=2,
            )
        return out[keep].reset_index(drop=True)


def validate_durations(
    exit_: np.ndarray,
    entry: np.ndarray | None = None,
    ids: np.ndarray | None = None,
    what: str = "tube",
) -> None:
    """Reject negative or zero durations and entry at or after exit, naming the first offender.

    Raises
    ------
    InputError
        With the record id, the values and the next step.
    """
    exit_ = np.asarray(exit_, dtype=float)
    names = np.asarray(ids) if ids is not None else np.arange(len(exit_))
    bad = ~np.isfinite(exit_) | (exit_ <= 0)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise InputError(
            f"{what} {names[i]}: duration is {float(exit_[i])!r}, not a positive number "
            f"({int(bad.sum())} record(s) affected). Check its install and removal dates."
        )
    if entry is not None:
        entry = np.asarray(entry, dtype=float)
        bad = ~np.isfinite(entry) | (entry < 0) | (entry >= exit_)
        if bad.any():
            i = int(np.flatnonzero(bad)[0])
            raise InputError(
                f"{what} {names[i]}: entry {float(entry[i])!r} is not before exit {float(exit_[i])!r} "
                f"({int(bad.sum())} record(s) affected). Delayed entry must be >= 0 and "
                "earlier than the end of follow-up."
            )


def build_life_data(
    tubes: pd.DataFrame,
    *,
    as_of: datetime,
    systems: pd.DataFrame | None = None,
    workload: pd.DataFrame | None = None,
    log_start: pd.DataFrame | None = None,
) -> LifeData:
    """Turn the ``tubes`` inventory into life records with censoring, delayed entry and clocks.

    Parameters
    ----------
    tubes
        Store ``tubes`` rows (columns as in the schema; ``site``/``modality`` optional).
    as_of
        Analysis time (UTC, naive): tubes removed after it count as in service; tubes
        installed after it are ignored.
    systems
        Store ``systems`` rows, for site, modality and generator type.
    workload
        Output of :func:`workload_by_tube` (optional; workload clocks are NaN without it).
    log_start
        Output of :func:`log_start_by_system`: tubes installed before their system's first log
        are left-truncated there (systems without logs: the fleet's first log). ``None``: no
        truncation.

    Raises
    ------
    InputError
        A tube removed before it was installed (names the tube).
    """
    import pandas as pd

    t = tubes.copy()
    for col in (
        "removed_at_utc",
        "removal_reason",
        "price",
        "price_currency",
        "model_label",
    ):
        if col not in t.columns:
            t[col] = None
    t["installed_at_utc"] = pd.to_datetime(t["installed_at_utc"])
    t["removed_at_utc"] = pd.to_datetime(t["removed_at_utc"])
    bad = t["removed_at_utc"].notna() & (t["removed_at_utc"] <= t["installed_at_utc"])
    if bad.any():
        row = t[bad].iloc[0]
        raise InputError(
            f"tube {row['tube_id']}: removed_at_utc {row['removed_at_utc']} is not after "
            f"installed_at_utc {row['installed_at_utc']} ({int(bad.sum())} tube(s) affected). "
            "Fix the tubes inventory and ingest it again."
        )
    as_of_ts = pd.Timestamp(as_of)
    t = t[t["installed_at_utc"] < as_of_ts].copy()
    if systems is not None and len(systems):
        sys_cols = [
            c for c in ("site", "modality", "generator_type") if c in systems.columns
        ]
        t = t.drop(columns=[c for c in sys_cols if c in t.columns]).merge(
            systems[["system_id", *sys_cols]], on="system_id", how="left"
        )
    for col in ("site", "modality", "generator_type"):
        if col not in t.columns:
            t[col] = None

    removed = t["removed_at_utc"].notna() & (t["removed_at_utc"] <= as_of_ts)
    reason = t["removal_reason"].fillna("").astype(str).str.strip().str.lower()
    reason = reason.where(removed, "")
    withdrawn = removed & reason.isin(WITHDRAWAL_REASONS)
    failed = removed & ~withdrawn
    t["failed"] = failed.to_numpy(dtype=bool)
    t["status"] = np.where(
        failed, "failed", np.where(withdrawn, "withdrawn", "in_service")
    )
    t["cause"] = np.where(
        failed, np.where(reason.isin(FILAMENT_REASONS), "filament", "other"), ""
    )
    end = t["removed_at_utc"].where(removed, as_of_ts)
    t["exit_days"] = (
        end - t["installed_at_utc"]
    ).dt.total_seconds().to_numpy() / _DAY_S

    if log_start is not None and len(log_start):
        ls = log_start[["system_id", "log_start_utc"]]
        t = t.merge(ls, on="system_id", how="left")
        t["log_start_utc"] = pd.to_datetime(t["log_start_utc"])
        # A system without any logged exposure: observation of the fleet began with the first
        # log anywhere, so its older tubes are truncated there too.
        no_log = t["log_start_utc"].isna()
        if no_log.any():
            fleet_start = pd.to_datetime(ls["log_start_utc"]).min()
            t.loc[no_log, "log_start_utc"] = fleet_start
            warnings.warn(
                f"{t.loc[no_log, 'system_id'].nunique()} system(s) have no logged exposures "
                f"(e.g. {t.loc[no_log, 'system_id'].iloc[0]}); their tubes enter observation at "
                f"the fleet's first log ({fleet_start:%Y-%m-%d}).",
                TubetrackWarning,
                stacklevel=2,
            )
    else:
        t["log_start_utc"] = pd.NaT
    pre = (t["log_start_utc"] - t["installed_at_utc"]).dt.total_seconds() / _DAY_S
    t["left_truncated"] = (pre > 0).fillna(False).to_numpy(dtype=bool)
    t["entry_days"] = np.where(t["left_truncated"], pre.fillna(0.0), 0.0)
    # A tube that left service before its system's logs began was never observed.
    unseen = t["left_truncated"] & (t["entry_days"] >= t["exit_days"])
    excluded = t[unseen].copy()
    if len(excluded):
        excluded["exclusion_reason"] = "removed before the system's logs began"
        warnings.warn(
            f"{len(excluded)} tube(s) left service before their system's logs began "
            f"(e.g. {excluded['tube_id'].iloc[0]}); they are outside the observation window "
            "and left out.",
            TubetrackWarning,
            stacklevel=2,
        )
    t = t[~unseen].reset_index(drop=True)

    work_cols = ["exposures", "mas", "heat_units", "hot_time_s"]
    if workload is not None and len(workload):
        w = workload.drop(columns=[c for c in ("system_id",) if c in workload.columns])
        t = t.merge(w, on="tube_id", how="left")
    for col in work_cols:
        if col not in t.columns:
            t[col] = np.nan
        if f"recent_{col}" not in t.columns:
            t[f"recent_{col}"] = np.nan
    if "recent_window_start_utc" not in t.columns:
        t["recent_window_start_utc"] = pd.NaT
    logged_from = t[["installed_at_utc", "log_start_utc"]].max(axis=1)
    end_t = t["removed_at_utc"].where(
        t["removed_at_utc"].notna() & (t["removed_at_utc"] <= as_of_ts), as_of_ts
    )
    logged_days = ((end_t - logged_from).dt.total_seconds() / _DAY_S).clip(lower=1e-9)
    recent_from = pd.to_datetime(t["recent_window_start_utc"])
    recent_from = pd.concat([recent_from, logged_from], axis=1).max(axis=1)
    recent_days = ((end_t - recent_from).dt.total_seconds() / _DAY_S).clip(lower=1.0)
    t["workload_entry_estimated"] = t["left_truncated"] & t["exposures"].notna()
    t["rate_days"] = 1.0
    for col in work_cols:
        logged = t[col].astype(float)
        mean_rate = logged / logged_days
        entry = np.where(t["left_truncated"], mean_rate * t["entry_days"], 0.0)
        t[f"entry_{col}"] = entry
        t[col] = entry + logged
        recent = t[f"recent_{col}"].astype(float) / recent_days
        t[f"rate_{col}"] = recent.where(recent > 0, mean_rate)
    keep = [
        "tube_id",
        "system_id",
        "model_label",
        "site",
        "modality",
        "generator_type",
        "installed_at_utc",
        "removed_at_utc",
        "removal_reason",
        "status",
        "failed",
        "cause",
        "log_start_utc",
        "left_truncated",
        "entry_days",
        "exit_days",
        *work_cols,
        *[f"entry_{c}" for c in work_cols],
        "rate_days",
        *[f"rate_{c}" for c in work_cols],
        "workload_entry_estimated",
        "price",
        "price_currency",
    ]
    frame = (
        t[keep].sort_values(["system_id", "installed_at_utc"]).reset_index(drop=True)
    )
    validate_durations(
        frame["exit_days"].to_numpy(),
        frame["entry_days"].to_numpy(),
        frame["tube_id"].to_numpy(),
    )
    return LifeData(frame=frame, as_of=as_of_ts.to_pydatetime(), excluded=excluded)


def load_life_data(
    con: duckdb.DuckDBPyConnection, as_of: datetime | None = None
) -> LifeData:
    """Read tubes, systems and aggregated workload from the store and build :class:`LifeData`.

    ``as_of`` defaults to the last logged exposure (or now when nothing is logged).
    """
    from tubetrack import store

    if as_of is None:
        rows = con.execute("SELECT max(timestamp_utc) FROM exposures").fetchall()
        last = rows[0][0] if rows else None
        as_of = last if last is not None else store.utcnow()
    tubes = con.execute("SELECT * FROM tubes").df()
    if tubes.empty:
        from tubetrack.errors import AnalysisError

        raise AnalysisError(
            "the store has no tubes. Ingest the tubes inventory (tubes*.csv) first."
        )
    return build_life_data(
        tubes,
        as_of=as_of,
        systems=store.load_systems(con),
        workload=workload_by_tube(con, as_of),
        log_start=log_start_by_system(con, as_of),
    )
