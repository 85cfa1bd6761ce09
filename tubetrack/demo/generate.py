"""Generate the invented demo fleet: workload, physics-driven filament wear, failures, logs.

Data flow (all bulk work vectorised; Python loops run over systems and tubes only):

1. Scenario: sites, systems and exposure programs (:mod:`tubetrack.demo.scenario`).
2. Downtime: preventive maintenance every ~6 months and random unplanned stops per system.
3. Workload: a Poisson number of logged exposures per system and day (weekday pattern), each
   drawn from the system's programs; local times of day converted to UTC; exposures inside hard
   downtime removed.
4. Tubes, one system at a time: each tube x focal spot gets a filament spec (physics default with
   per-tube variation), sensor gain, hot-spot factor and burn-through threshold; its diameter loss
   follows from the cumulative hot time weighted by the evaporation rate
   (:mod:`tubetrack.demo.aging`); competing causes (bearing, arcing, a rare planned upgrade) are
   drawn as ages; the first of them ends the tube, a new one is installed after a repair gap.
5. Logged filament current = physics current x sensor gain x (1 + noise), rounded to 1 mA; the
   gain steps at some recalibrations.
6. Events (arcs, precursors, failures, background faults), calibrations (filament table after
   each calibration) and the truth tables.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from tubetrack.demo import aging
from tubetrack.demo.scenario import (
    CAL_KV,
    CAL_STATIONS_MA,
    GROUP_NAME,
    SITE_TIMEZONE,
    TUBE_MODELS,
    build_programs,
    build_sites,
    build_systems,
)

DEFAULT_SEED = 20261202
DEFAULT_START = "2022-09-01"
DEFAULT_YEARS = 3.2
#: Demo time-lapse: multiplies every filament's wear rate so that filaments burn through within
#: the few years the demo spans at its (thinned) logged workload. Real filaments at this logged
#: workload would last longer; the physics of the drift is unchanged, only faster.
DEFAULT_WEAR_ACCELERATION = 100.0

#: Spread of the burn-through threshold around the physics default (relative SD) [1].
THRESHOLD_SD = 0.10
#: Hot-spot factor h = 1 + |N(0, HOT_SPOT_SD)| [1].
HOT_SPOT_SD = 0.08
#: Competing failure modes the filament signal cannot foresee: Weibull in days of tube age.
BEARING_ETA_DAYS, BEARING_BETA = 9 * 365.25, 2.5
ARCING_ETA_DAYS, ARCING_BETA = 8 * 365.25, 1.2
MS_PER_DAY = 86_400_000
BASE_ARC_RATE = 2e-4  # arcs per exposure of a healthy tube [1] (# common practice order)

#: Mean logged exposures per system and working day by modality [1/day].
MEAN_PER_DAY = {"radiographic": 11.0, "mobile": 5.5, "fluoroscopy": 7.0}

EVENT_CODES = {
    # category: (raw_code, raw_text)
    "arc": ("A-310", "HV discharge during exposure; exposure completed"),
    "arc_fail": ("A-319", "Repeated HV discharge; tube conditioning failed, exposures inhibited"),
    "kv_dropout": ("A-311", "Tube voltage fell below set value for more than 2 ms"),
    "filament_fault": ("F-120", "Filament current near its limit during boost"),
    "filament_open": ("F-121", "Filament circuit open: no emission at boost"),
    "ma_out_of_tolerance": ("M-205", "Measured tube current outside tolerance of set station"),
    "overload": ("T-402", "Anode heat limit reached: exposure inhibited"),
    "rotor_fault": ("R-510", "Rotor did not reach speed within prep time"),
    "rotor_stall": ("R-511", "Rotor stalled; anode drive stopped"),
    "other": ("S-900", "Generator controller restarted"),
}


@dataclass(frozen=True)
class DemoFleet:
    """The demo fleet: canonical tables plus the truth behind them.

    Attributes
    ----------
    systems, tubes, exposures, calibrations, events, downtime
        Canonical columns (the open layout, docs/log-layout.md), times naive UTC. ``exposures`` holds the full workload of
        every system, including those whose site does not export generator logs.
    truth
        One row per tube: true end (failure or removal) time, cause, failing focal spot,
        diameter loss at the end per focal spot, thresholds drawn, hot-spot factors [1].
    truth_diameter
        Daily true diameter loss per tube x focal spot: tube_id, focal_spot, day, diameter_loss
        (fraction [1]; the value after the day's last exposure).
    truth_steps
        Recalibration steps of the logged filament current: tube_id, focal_spot,
        timestamp_utc, gain_before, gain_after [1].
    programs
        Exposure programs per system (generation parameters).
    meta
        Seed, span, group name, site names and generation parameters.
    """

    systems: pd.DataFrame
    tubes: pd.DataFrame
    exposures: pd.DataFrame
    calibrations: pd.DataFrame
    events: pd.DataFrame
    downtime: pd.DataFrame
    truth: pd.DataFrame
    truth_diameter: pd.DataFrame
    truth_steps: pd.DataFrame
    programs: pd.DataFrame
    meta: dict[str, Any] = field(default_factory=dict)


# --------------------------------------------------------------------------------------------
# time helpers
# --------------------------------------------------------------------------------------------


def _utc_offset_s(days: pd.DatetimeIndex, tz: str) -> np.ndarray:
    """UTC offset of local noon on each day [s] (DST-aware)."""
    noon = days + pd.Timedelta(hours=12)
    local = noon.tz_localize(tz)
    utc_naive = local.tz_convert("UTC").tz_localize(None)
    return ((noon - utc_naive) / pd.Timedelta(seconds=1)).to_numpy().astype(np.int64)


def _to_ms(ts: Any) -> int:
    return int(pd.Timestamp(ts).value // 1_000_000)


# --------------------------------------------------------------------------------------------
# downtime
# --------------------------------------------------------------------------------------------


def _make_downtime(
    systems: pd.DataFrame,
    start_ms: int,
    end_ms: int,
    offset_s: np.ndarray,
    rng: np.random.Generator,
) -> pd.DataFrame:
    """Preventive maintenance (~every 182 days, weekday mornings) and unplanned stops."""
    n_sys = len(systems)
    span_days = (end_ms - start_ms) / MS_PER_DAY
    # preventive maintenance
    n_pm = int(np.ceil(span_days / 182.0)) + 1
    phase = rng.uniform(0, 182, n_sys)
    pm_day = phase[:, None] + 182.0 * np.arange(n_pm)[None, :] + rng.normal(0, 6, (n_sys, n_pm))
    pm_day = np.floor(pm_day).astype(np.int64)
    pm_sys = np.repeat(np.arange(n_sys), n_pm)
    pm_day = pm_day.ravel()
    keep = (pm_day >= 0) & (pm_day < span_days - 1)
    pm_sys, pm_day = pm_sys[keep], pm_day[keep]
    # move to a weekday (Mon-Fri): day 0 weekday from start
    start_wd = pd.Timestamp(start_ms, unit="ms").weekday()
    wd = (start_wd + pm_day) % 7
    pm_day = pm_day + np.where(wd == 5, 2, np.where(wd == 6, 1, 0))
    keep = pm_day < span_days - 1
    pm_sys, pm_day = pm_sys[keep], pm_day[keep]
    pm_start = (
        start_ms
        + pm_day * MS_PER_DAY
        + (7 * 3600 + rng.integers(0, 3 * 3600, len(pm_day)) - offset_s[pm_day]) * 1000
    )
    pm_dur = rng.uniform(2.0, 4.5, len(pm_day)) * 3_600_000
    pm = pd.DataFrame(
        {
            "sys": pm_sys,
            "start_ms": pm_start,
            "end_ms": pm_start + pm_dur.astype(np.int64),
            "cause": "preventive",
            "planned": True,
            "severity": "hard_down",
            "note": "preventive maintenance and filament calibration",
        }
    )
    # unplanned stops: about 3 per system and year
    n_un = rng.poisson(3.0 * span_days / 365.25, n_sys)
    un_sys = np.repeat(np.arange(n_sys), n_un)
    un_start = start_ms + (rng.uniform(0, span_days - 3, len(un_sys)) * MS_PER_DAY).astype(np.int64)
    un_hours = np.exp(rng.normal(np.log(5.0), 1.0, len(un_sys)))
    un_hours = np.clip(un_hours, 0.5, 96.0)
    causes = np.array(["generator", "detector", "mechanical", "software", "external", "other"])
    cause = rng.choice(causes, len(un_sys), p=[0.25, 0.25, 0.15, 0.15, 0.1, 0.1])
    notes = {
        "generator": "generator fault, service engineer called",
        "detector": "detector fault; room usable for some programs only",
        "mechanical": "table or column brake fault",
        "software": "acquisition workstation restarted",
        "external": "power interruption in the building",
        "other": "room closed by the department",
    }
    severity = np.where((cause == "detector") & (rng.random(len(un_sys)) < 0.6), "partial", "hard_down")
    un = pd.DataFrame(
        {
            "sys": un_sys,
            "start_ms": un_start,
            "end_ms": un_start + (un_hours * 3_600_000).astype(np.int64),
            "cause": cause,
            "planned": False,
            "severity": severity,
            "note": [notes[c] for c in cause],
        }
    )
    # one system per clock change (Europe/Berlin) is down over that weekend: the record spans
    # the DST change (local durations differ from UTC ones by an hour)
    change = np.flatnonzero(np.diff(offset_s) != 0) + 1  # first day with the new offset at noon
    dst_sys = rng.integers(0, n_sys, len(change))
    dst_start = start_ms + (change - 1) * MS_PER_DAY + 14 * 3_600_000
    dst = pd.DataFrame(
        {
            "sys": dst_sys,
            "start_ms": dst_start,
            "end_ms": dst_start + 40 * 3_600_000 + rng.integers(0, 4 * 3_600_000, len(change)),
            "cause": "generator",
            "planned": False,
            "severity": "hard_down",
            "note": "generator fault over the weekend; spare part delivered Monday",
        }
    )
    frame = pd.concat([dst, pm, un], ignore_index=True)
    return _drop_overlaps(frame)


def _drop_overlaps(frame: pd.DataFrame) -> pd.DataFrame:
    """Drop downtime records that start before the previous one of the same system ended."""
    frame = frame.sort_values(["sys", "start_ms"], kind="stable").reset_index(drop=True)
    # running max of the previous ends within the system (grouped shift + cummax)
    shifted = frame.groupby("sys")["end_ms"].shift(1)
    run_max = shifted.groupby(frame["sys"]).cummax()
    ok = ~(run_max.notna().to_numpy() & (frame["start_ms"].to_numpy() < run_max.fillna(0).to_numpy()))
    return frame[ok].reset_index(drop=True)


def _inside(
    keys: np.ndarray, iv_sys: np.ndarray, iv_start: np.ndarray, iv_end: np.ndarray, sys: np.ndarray
) -> np.ndarray:
    """True where (sys, time key) lies inside a non-overlapping interval of the same system."""
    big = np.int64(10) ** 13
    ikey = iv_sys.astype(np.int64) * big + iv_start
    order = np.argsort(ikey, kind="stable")
    ikey, iend, isys = ikey[order], (iv_sys.astype(np.int64) * big + iv_end)[order], iv_sys[order]
    k = sys.astype(np.int64) * big + keys
    idx = np.searchsorted(ikey, k, side="right") - 1
    valid = idx >= 0
    idx_c = np.where(valid, idx, 0)
    return valid & (isys[idx_c] == sys) & (k < iend[idx_c]) if len(ikey) else np.zeros(len(k), bool)


# --------------------------------------------------------------------------------------------
# workload
# --------------------------------------------------------------------------------------------


def _make_workload(
    systems: pd.DataFrame,
    programs: pd.DataFrame,
    start_ms: int,
    n_days: int,
    offset_s: np.ndarray,
    weekday0: int,
    exposures_per_day: float | None,
    rng: np.random.Generator,
) -> dict[str, np.ndarray]:
    """Draw every logged exposure: system, day, program, UTC time, exposure and prep time."""
    n_sys = len(systems)
    modality = systems["modality"].to_numpy()
    around = systems["gen_around_clock"].to_numpy()
    base = np.array([MEAN_PER_DAY[m] for m in modality]) * rng.uniform(0.6, 1.4, n_sys)
    wd = (weekday0 + np.arange(n_days)) % 7
    weekend = wd >= 5
    day_factor_work = np.where(weekend, 0.08, 1.0)
    day_factor_clock = np.where(weekend, 0.7, 1.0)
    season = 1.0 + 0.08 * np.cos(2 * np.pi * (np.arange(n_days) - 120) / 365.25)
    lam = base[:, None] * np.where(around[:, None], day_factor_clock[None, :], day_factor_work[None, :])
    lam = lam * season[None, :]
    if exposures_per_day is not None:
        lam = lam * (float(exposures_per_day) / lam.mean())
    counts = rng.poisson(lam).ravel()
    n = int(counts.sum())
    sys_day = np.repeat(np.arange(n_sys * n_days, dtype=np.int64), counts)
    sys = (sys_day // n_days).astype(np.int32)
    day = (sys_day % n_days).astype(np.int32)
    del sys_day
    # program draw: flat cumulative weights offset by the system index
    p_sys = programs["system_idx"].to_numpy()
    cumw = programs.groupby("system_idx")["weight"].cumsum().to_numpy()
    cumw = np.minimum(cumw, 1.0 - 1e-12)
    flat = p_sys + cumw
    flat[np.r_[p_sys[1:] != p_sys[:-1], True]] = p_sys[np.r_[p_sys[1:] != p_sys[:-1], True]] + 1.0
    prog_global = np.searchsorted(flat, sys + rng.random(n), side="right").astype(np.int32)
    # time of day (local): working hours, or around the clock with a day-time peak
    u = rng.random(n)
    work = np.clip(rng.normal(12.5 * 3600, 2.6 * 3600, n), 7.5 * 3600, 18.5 * 3600)
    night = rng.uniform(0, 86400, n)
    is_clock = around[sys]
    tod = np.where(is_clock & (u < 0.22), night, work)
    utc_ms = (
        start_ms
        + day.astype(np.int64) * MS_PER_DAY
        + ((tod - offset_s[day]) * 1000).astype(np.int64)
        + rng.integers(0, 1000, n)
    )
    ma = programs["tube_current_ma"].to_numpy()[prog_global]
    mas = programs["mas_nominal"].to_numpy()[prog_global]
    t_exp = np.maximum(np.round(mas / ma * np.exp(rng.normal(0.0, 0.3, n)), 4), 0.001)
    hold = systems["gen_hold_prep"].to_numpy()[sys]
    prep_med = np.where(ma < 50, 0.25, np.where(hold, 3.6, 1.1))
    prep = np.round(prep_med * np.exp(rng.normal(0.0, 0.3, n)), 2)
    return {
        "sys": sys,
        "day": day,
        "prog": prog_global,
        "ts_ms": utc_ms,
        "t_exp": t_exp,
        "prep": prep,
    }


# --------------------------------------------------------------------------------------------
# the fleet
# --------------------------------------------------------------------------------------------


def generate_fleet(
    seed: int = DEFAULT_SEED,
    n_systems: int = 24,
    years: float = DEFAULT_YEARS,
    start: str = DEFAULT_START,
    exposures_per_day: float | None = None,
    physics: bool = True,
    *,
    wear_acceleration: float = DEFAULT_WEAR_ACCELERATION,
    progress: Callable[[str], None] | None = None,
) -> DemoFleet:
    """Generate the invented demo fleet deterministically from ``seed``.

    Parameters
    ----------
    seed
        Random seed; the same seed and arguments give identical tables.
    n_systems
        Number of X-ray systems (24 = the named scenario; more add generic sites).
    years
        Span of the logs from ``start`` [years of 365.25 days].
    start
        First day of the logs (UTC date).
    exposures_per_day
        Mean logged exposures per system and calendar day over the fleet (before downtime)
        [1/day]; ``None`` keeps the modality defaults (on working days about 12 for
        radiographic rooms, 6 for mobile units, 8 for fluoroscopy rooms).
    physics
        Use :mod:`tubetrack.physics` for temperatures, wear rates and filament currents (``False``:
        a fast empirical stand-in, for benchmarks of the pipeline only).
    wear_acceleration
        Demo time-lapse factor on every wear rate [1] (see :data:`DEFAULT_WEAR_ACCELERATION`).
    progress
        Optional callback receiving short progress messages.

    Returns
    -------
    DemoFleet
        Canonical tables and truth (see :class:`DemoFleet`).
    """
    say = progress or (lambda _m: None)
    if physics and not aging.physics_available():
        from tubetrack.errors import TubetrackError

        raise TubetrackError(
            "tubetrack.physics does not provide the filament model yet "
            "(default_filament_spec, filament_temperature_for_tube_current_k, "
            "filament_current_for_tube_current_a, diameter_loss_rate_per_s). "
            "Run with physics=False for the empirical stand-in."
        )
    rng = np.random.default_rng(seed)
    sites = build_sites(int(n_systems))
    systems = build_systems(sites, rng)
    programs = build_programs(systems, rng)
    start_ts = pd.Timestamp(start).normalize()
    n_days = int(round(float(years) * 365.25))
    end_ts = start_ts + pd.Timedelta(days=n_days)
    start_ms, end_ms = _to_ms(start_ts), _to_ms(end_ts)
    days = pd.date_range(start_ts, periods=n_days, freq="D")
    offset_s = _utc_offset_s(days, SITE_TIMEZONE)
    eol = aging.end_of_life_diameter_loss()

    say(f"downtime for {len(systems)} systems")
    downtime = _make_downtime(systems, start_ms, end_ms, offset_s, rng)
    say("workload")
    w = _make_workload(
        systems, programs, start_ms, n_days, offset_s, start_ts.weekday(), exposures_per_day, rng
    )
    hard = downtime[downtime["severity"] == "hard_down"]
    drop = _inside(
        w["ts_ms"], hard["sys"].to_numpy(), hard["start_ms"].to_numpy(), hard["end_ms"].to_numpy(), w["sys"]
    )
    partial = downtime[downtime["severity"] == "partial"]
    drop |= _inside(
        w["ts_ms"], partial["sys"].to_numpy(), partial["start_ms"].to_numpy(), partial["end_ms"].to_numpy(), w["sys"]
    ) & (rng.random(len(drop)) < 0.5)
    drop |= (w["ts_ms"] < start_ms) | (w["ts_ms"] >= end_ms)
    keep = ~drop
    w = {k: v[keep] for k, v in w.items()}
    w = _add_repeated_hour(w, systems, programs, days, offset_s, start_ms, rng)
    # the foreign layout logs whole seconds: its systems' clocks tick in seconds
    foreign = systems["gen_foreign_layout"].to_numpy()[w["sys"]]
    w["ts_ms"] = np.where(foreign, w["ts_ms"] // 1000 * 1000, w["ts_ms"])
    order = np.lexsort((w["ts_ms"], w["sys"]))
    w = {k: v[order] for k, v in w.items()}
    w["ts_ms"] = _unique_per_system(w["ts_ms"], w["sys"], np.where(foreign[order], 1000, 1))
    n_exp = len(w["ts_ms"])
    say(f"{n_exp} exposures drawn; tubes and wear")

    sim = _simulate_tubes(
        systems, programs, downtime, w, start_ms, end_ms, eol, physics, wear_acceleration, rng, say
    )
    return _assemble(
        systems, programs, downtime, w, sim, sites, start_ts, end_ts, seed, physics,
        wear_acceleration, exposures_per_day, rng,
    )


def _unique_per_system(ts: np.ndarray, sys: np.ndarray, step: np.ndarray) -> np.ndarray:
    """Make sorted times strictly increasing within each system (natural key (system, time)).

    t'_i = max(t_i, t'_(i-1) + step): with a constant step per system this is
    i*step + cummax(t_j - j*step) within the system, computed with a grouped cumulative max.
    """
    if len(ts) == 0:
        return ts
    pos = np.arange(len(ts), dtype=np.int64)
    first = np.r_[True, sys[1:] != sys[:-1]]
    start_pos = np.maximum.accumulate(np.where(first, pos, 0))
    i = pos - start_pos
    step = np.asarray(step, dtype=np.int64)
    base = pd.Series(ts - i * step).groupby(sys).cummax().to_numpy()
    return base + i * step


def _add_repeated_hour(
    w: dict[str, np.ndarray],
    systems: pd.DataFrame,
    programs: pd.DataFrame,
    days: pd.DatetimeIndex,
    offset_s: np.ndarray,
    start_ms: int,
    rng: np.random.Generator,
) -> dict[str, np.ndarray]:
    """Night exposures in the repeated autumn hour for the foreign site's around-the-clock units.

    On each autumn change of Europe/Berlin, 00:10, 00:40, 01:10 and 01:40 UTC read 02:10, 02:40,
    02:10, 02:40 local: the same local times twice, in time order.
    """
    cand = np.flatnonzero(systems["gen_foreign_layout"].to_numpy() & systems["gen_around_clock"].to_numpy())
    autumn = np.flatnonzero(np.r_[False, np.diff(offset_s) < 0])  # first day on winter time
    if len(cand) == 0 or len(autumn) == 0:
        return w
    p_sys = programs["system_idx"].to_numpy()
    add: dict[str, list[np.ndarray]] = {k: [] for k in w}
    for s in cand:
        progs = np.flatnonzero(p_sys == s)
        for d in autumn:
            # the change happens at 01:00 UTC on the Sunday: that is day d-1 or d by local noon
            day_ms = _to_ms(days[d].normalize())
            k = 4
            pr = rng.choice(progs, k)
            ma = programs["tube_current_ma"].to_numpy()[pr]
            mas = programs["mas_nominal"].to_numpy()[pr]
            add["sys"].append(np.full(k, s, dtype=np.int32))
            add["day"].append(np.full(k, d, dtype=np.int32))
            add["prog"].append(pr.astype(np.int32))
            add["ts_ms"].append(day_ms + np.array([10, 40, 70, 100]) * 60_000)
            add["t_exp"].append(np.round(mas / ma, 4))
            add["prep"].append(np.full(k, 1.1))
    return {k: np.concatenate([w[k]] + [np.asarray(a, dtype=w[k].dtype) for a in add[k]]) for k in w}


def _weibull_age(
    eta_days: float, beta: float, age0_days: np.ndarray | float, rng: np.random.Generator
) -> float:
    """Age at failure drawn from a Weibull conditional on survival to ``age0_days`` [days]."""
    u = rng.random()
    return float(eta_days * ((np.asarray(age0_days) / eta_days) ** beta - np.log(u)) ** (1.0 / beta))


def _simulate_tubes(
    systems: pd.DataFrame,
    programs: pd.DataFrame,
    downtime: pd.DataFrame,
    w: dict[str, np.ndarray],
    start_ms: int,
    end_ms: int,
    eol: float,
    physics: bool,
    accel: float,
    rng: np.random.Generator,
    say: Callable[[str], None],
) -> dict[str, Any]:
    """Tube sequences per system: wear, failures, per-exposure tube, diameter and gain."""
    n_exp = len(w["ts_ms"])
    tube_of = np.full(n_exp, -1, dtype=np.int32)
    d_of = np.ones(n_exp)
    cur_of = np.full(n_exp, np.nan)
    arc_rate = np.full(n_exp, BASE_ARC_RATE)
    keep = np.ones(n_exp, dtype=bool)
    sys_bounds = np.searchsorted(w["sys"], np.arange(len(systems) + 1))
    prog_start = np.searchsorted(programs["system_idx"].to_numpy(), np.arange(len(systems) + 1))
    p_ma = programs["tube_current_ma"].to_numpy()
    p_kv = programs["tube_voltage_kv"].to_numpy()
    p_focal = programs["focal_spot"].to_numpy()
    p_weight = programs["weight"].to_numpy()
    p_mas = programs["mas_nominal"].to_numpy()
    pm = downtime[downtime["cause"] == "preventive"]
    pm_end_by_sys = {int(s): g["end_ms"].to_numpy() for s, g in pm.groupby("sys")}
    hot_all = w["t_exp"] + w["prep"]
    sys_rows = systems[["modality", "gen_hold_prep"]].to_dict("records")
    tubes: list[dict[str, Any]] = []
    truth_days: list[pd.DataFrame] = []
    steps: list[dict[str, Any]] = []
    cals: list[pd.DataFrame] = []
    extra_down: list[dict[str, Any]] = []
    events: list[dict[str, Any]] = []
    serial = 0
    day0 = start_ms // MS_PER_DAY
    for s in range(len(systems)):
        if s % 250 == 0 and s:
            say(f"  {s}/{len(systems)} systems")
        srow = sys_rows[s]
        a, b = int(sys_bounds[s]), int(sys_bounds[s + 1])
        pa, pb = int(prog_start[s]), int(prog_start[s + 1])
        ts = w["ts_ms"][a:b]
        prog = w["prog"][a:b] - pa
        hot = hot_all[a:b]
        ma_s, kv_s, foc_s = p_ma[pa:pb], p_kv[pa:pb], p_focal[pa:pb]
        prep_mean = np.where(ma_s < 50, 0.25, 3.6 if srow["gen_hold_prep"] else 1.1)
        hot_mean = p_mas[pa:pb] / ma_s + prep_mean
        per_day = max(1.0, (b - a) / max(1.0, (end_ms - start_ms) / MS_PER_DAY))
        model_label, price = TUBE_MODELS[srow["modality"]]
        pm_ends = pm_end_by_sys.get(s, np.array([], dtype=np.int64))
        install_ms: int | None = None
        i0 = 0
        first = True
        while True:
            serial += 1
            tube_id = f"TT-{serial:06d}"
            fil = {}
            tables = {}
            for f in ("small", "large"):
                hs = 1.0 + abs(float(rng.normal(0.0, HOT_SPOT_SD)))
                spec = aging.draw_spec(f, rng, physics, hs)
                mask = foc_s == f
                tables[f] = aging.wear_table(spec, ma_s, kv_s, mask, p_weight[pa:pb] * hot_mean)
                thr = float(np.clip(rng.normal(eol, THRESHOLD_SD * eol), 0.7 * eol, 1.3 * eol))
                fil[f] = aging.TubeFilament(spec, float(rng.normal(1.0, 0.02)), hs, thr)
            # expected daily G increment per focal spot (for the pre-log age of the first tube)
            g_day = {
                f: per_day * float((p_weight[pa:pb] * hot_mean * tables[f].rate0_per_s).sum()) * accel
                for f in fil
            }
            # mean diameter loss at which each filament's hot spot burns through [1]
            limit = {f: fil[f].threshold / fil[f].hot_spot_factor for f in fil}
            pre_loss = {"small": 0.0, "large": 0.0}
            if first:
                # left truncation: installed before the logs begin with some wear already done
                frac = rng.uniform(0.0, 0.7)
                lead = max(g_day, key=lambda f: g_day[f] / limit[f])
                g_lead = aging.cum_from_loss(tables[lead], frac * limit[lead])
                age_days = min(g_lead / max(g_day[lead], 1e-30), 6 * 365.25)
                age_days = max(age_days, 20.0)
                install_ms = int(start_ms - age_days * MS_PER_DAY) // 1000 * 1000
                for f in fil:
                    pre_loss[f] = float(
                        aging.loss_from_cum(tables[f], np.array([g_day[f] * age_days]))[0]
                    )
            assert install_ms is not None
            age0 = max(0.0, (start_ms - install_ms) / MS_PER_DAY) if first else 0.0
            # competing causes the filament signal cannot foresee [days of age]
            t_bearing = _weibull_age(BEARING_ETA_DAYS, BEARING_BETA, age0, rng)
            t_arcing = _weibull_age(ARCING_ETA_DAYS, ARCING_BETA, age0, rng)
            t_upgrade = np.inf if rng.random() > 0.03 else float(rng.uniform(age0 + 60, age0 + 900))
            other = min(
                ("bearing", t_bearing), ("arcing", t_arcing), ("upgrade", t_upgrade), key=lambda x: x[1]
            )
            other_ms = float(np.floor((install_ms + other[1] * MS_PER_DAY) / 1000.0) * 1000.0)
            # wear over this tube's exposures
            sl = slice(i0, len(ts))
            p_t, hot_t, ts_t = prog[sl], hot[sl], ts[sl]
            loss: dict[str, np.ndarray] = {}
            cross: dict[str, int] = {}
            for f in ("small", "large"):
                tab = tables[f]
                inc = tab.rate0_per_s[p_t] * hot_t * accel
                g0 = aging.cum_from_loss(tab, pre_loss[f])
                loss[f] = aging.loss_from_cum(tab, g0 + np.cumsum(inc))
                over = np.flatnonzero(loss[f] >= limit[f])
                cross[f] = int(over[0]) if len(over) else len(ts_t)
            fil_focal = min(cross, key=lambda f: cross[f])
            fil_idx = cross[fil_focal]
            # burns through during that exposure; times in the inventory are whole seconds
            fil_ms = float((ts_t[fil_idx] // 1000 + 1) * 1000) if fil_idx < len(ts_t) else np.inf
            if fil_ms <= other_ms:
                cause, fail_ms, n_use = "filament", fil_ms, fil_idx + 1
            else:
                cause, fail_ms = other[0], other_ms
                n_use = int(np.searchsorted(ts_t, fail_ms, side="left"))
            failed = fail_ms < end_ms
            if not failed:
                cause, n_use = None, len(ts_t)
            idx = np.arange(a + i0, a + i0 + n_use)
            tube_of[idx] = len(tubes)
            focal_e = foc_s[p_t[:n_use]]
            d_e = np.where(
                focal_e == "small",
                1.0 - np.concatenate([[pre_loss["small"]], loss["small"][: n_use - 1]])[:n_use],
                1.0 - np.concatenate([[pre_loss["large"]], loss["large"][: n_use - 1]])[:n_use],
            )
            d_of[idx] = d_e
            # calibrations (install + each preventive maintenance in service) and gain steps
            cal_ms = [install_ms + 3_600_000] + [
                int(x) for x in pm_ends if install_ms + 3_600_000 < x < min(fail_ms, end_ms)
            ]
            gains = {f: [fil[f].sensor_gain] for f in fil}
            for k in range(1, len(cal_ms)):
                for f in fil:
                    g_prev = gains[f][-1]
                    if rng.random() < 0.3:
                        g_new = g_prev * float(rng.normal(1.0, 0.02))
                        steps.append(
                            {"tube_id": tube_id, "focal_spot": f, "timestamp_utc_ms": cal_ms[k],
                             "gain_before": g_prev, "gain_after": g_new}
                        )
                    else:
                        g_new = g_prev
                    gains[f].append(g_new)
            cal_arr = np.array(cal_ms, dtype=np.int64)
            k_e = np.clip(np.searchsorted(cal_arr, ts_t[:n_use], side="right") - 1, 0, None)
            for f in ("small", "large"):
                m = focal_e == f
                if m.any():
                    true_i = aging.current_at(tables[f], p_t[:n_use][m], d_e[m])
                    cur_of[idx[m]] = true_i * np.asarray(gains[f])[k_e[m]]
            # filament table after each calibration inside the log span (one physics call per
            # filament for all its calibrations)
            k_in = np.flatnonzero((cal_arr >= start_ms) & (cal_arr < end_ms))
            if len(k_in):
                n_before = np.searchsorted(ts_t[:n_use], cal_arr[k_in])
                for f in ("small", "large"):
                    lf_all = np.concatenate([[pre_loss[f]], loss[f][:n_use]])[n_before]
                    st = np.array(CAL_STATIONS_MA[f], dtype=float)
                    mag, kvg = (x.ravel() for x in np.meshgrid(st, np.array(CAL_KV)))
                    m = len(mag)
                    cur = aging.filament_current_a(
                        fil[f].spec, np.tile(mag, len(k_in)), np.tile(kvg, len(k_in)),
                        np.repeat(1.0 - lf_all, m),
                    ) * np.repeat(np.asarray(gains[f])[k_in], m)
                    cals.append(
                        (np.repeat(cal_arr[k_in], m), s, len(tubes), f, np.tile(kvg, len(k_in)),
                         np.tile(mag, len(k_in)), np.round(cur, 3))
                    )
            # arc precursor for some arcing failures; rotor precursor for some bearing failures
            precursor = False
            if failed and cause == "arcing" and rng.random() < 0.5:
                precursor = True
                age_to_fail = (fail_ms - ts_t[:n_use]) / MS_PER_DAY
                arc_rate[idx] = BASE_ARC_RATE + 0.04 * np.exp(-age_to_fail / 20.0)
            if failed and cause == "bearing" and rng.random() < 0.6:
                precursor = True
                n_pre = int(rng.integers(3, 12))
                back = rng.exponential(15.0, n_pre)
                for bk in back:
                    t_ev = fail_ms - bk * MS_PER_DAY
                    if t_ev > max(install_ms, start_ms):
                        events.append({"ts": int(t_ev), "sys": s, "tube": len(tubes), "kind": "rotor_fault"})
            if failed and cause == "filament":
                events.append({"ts": int(fail_ms), "sys": s, "tube": len(tubes), "kind": "filament_open"})
                if rng.random() < 0.5:
                    for bk in rng.uniform(0.5, 20.0, int(rng.integers(1, 4))):
                        t_ev = fail_ms - bk * MS_PER_DAY
                        if t_ev > max(install_ms, start_ms):
                            events.append({"ts": int(t_ev), "sys": s, "tube": len(tubes), "kind": "filament_fault"})
            if failed and cause == "arcing":
                events.append({"ts": int(fail_ms), "sys": s, "tube": len(tubes), "kind": "arc_fail"})
            if failed and cause == "bearing":
                events.append({"ts": int(fail_ms), "sys": s, "tube": len(tubes), "kind": "rotor_stall"})
            # truth: loss at the end, daily series
            end_loss = {
                f: (pre_loss[f] if n_use == 0 else float(loss[f][n_use - 1])) for f in fil
            }
            tubes.append(
                {
                    "tube_id": tube_id, "sys": s, "model_label": model_label,
                    "installed_ms": install_ms, "removed_ms": fail_ms if failed else None,
                    "removal_reason": cause, "price": price,
                    "failed_focal_spot": fil_focal if cause == "filament" else None,
                    "precursor": precursor,
                    "pre_loss_small": pre_loss["small"], "pre_loss_large": pre_loss["large"],
                    "loss_end_small": end_loss["small"], "loss_end_large": end_loss["large"],
                    "threshold_small": fil["small"].threshold, "threshold_large": fil["large"].threshold,
                    "hot_spot_small": fil["small"].hot_spot_factor,
                    "hot_spot_large": fil["large"].hot_spot_factor,
                    "gain_small": fil["small"].sensor_gain, "gain_large": fil["large"].sensor_gain,
                    "spec_small": fil["small"].spec, "spec_large": fil["large"].spec,
                    "table_small": tables["small"], "table_large": tables["large"],
                    "n_exposures": n_use,
                }
            )
            # daily truth: value after each day's last exposure, carried over idle days
            t_first = max(install_ms, start_ms)
            t_last = min(fail_ms, end_ms)
            dd = np.arange(t_first // MS_PER_DAY, (t_last - 1) // MS_PER_DAY + 1) - day0
            day_end_ms = (dd + day0 + 1) * MS_PER_DAY
            n_at = np.searchsorted(ts_t[:n_use], day_end_ms, side="left")
            for f in ("small", "large"):
                lf = np.concatenate([[pre_loss[f]], loss[f][:n_use]])[n_at]
                truth_days.append((len(tubes) - 1, f, dd, lf))
            if not failed:
                break
            # repair gap: the system is down until the new tube is installed and calibrated
            gap_days = float(np.clip(rng.gamma(2.0, 1.2), 0.3, 10.0))
            if cause == "upgrade":
                gap_days = float(rng.uniform(0.2, 0.6))
            install_ms = int(fail_ms + gap_days * MS_PER_DAY) // 1000 * 1000
            extra_down.append(
                {
                    "sys": s, "start_ms": int(fail_ms), "end_ms": install_ms,
                    "cause": "tube", "planned": cause == "upgrade", "severity": "hard_down",
                    "note": "tube replaced (planned upgrade)" if cause == "upgrade" else "tube failed; replacement installed",
                }
            )
            gap_end = int(np.searchsorted(ts, install_ms, side="left"))
            keep[a + i0 + n_use : a + gap_end] = False
            i0 = gap_end
            first = False
            if install_ms >= end_ms:
                break
    return {
        "tube_of": tube_of, "d_of": d_of, "cur_of": cur_of, "arc_rate": arc_rate, "keep": keep,
        "tubes": tubes, "truth_days": truth_days, "steps": steps, "cals": cals,
        "extra_down": extra_down, "events": events,
    }


def _ts(ms: np.ndarray | pd.Series) -> pd.Series:
    """Integer milliseconds since the epoch -> naive UTC datetime64[ms]."""
    return pd.Series(pd.to_datetime(np.asarray(ms, dtype="int64"), unit="ms")).astype("datetime64[ms]")


def _assemble(
    systems: pd.DataFrame,
    programs: pd.DataFrame,
    downtime: pd.DataFrame,
    w: dict[str, np.ndarray],
    sim: dict[str, Any],
    sites: list[Any],
    start_ts: pd.Timestamp,
    end_ts: pd.Timestamp,
    seed: int,
    physics: bool,
    accel: float,
    exposures_per_day: float | None,
    rng: np.random.Generator,
) -> DemoFleet:
    """Turn the simulation arrays into canonical DataFrames and truth tables."""
    sys_ids = systems["system_id"].to_numpy()
    tubes_raw = sim["tubes"]
    tube_ids = np.array([t["tube_id"] for t in tubes_raw])
    keep = sim["keep"] & (sim["tube_of"] >= 0)
    idx = np.flatnonzero(keep)
    n = len(idx)
    prog = w["prog"][idx]
    sys = w["sys"][idx]
    tube = sim["tube_of"][idx]
    ma = programs["tube_current_ma"].to_numpy()[prog]
    kv = programs["tube_voltage_kv"].to_numpy()[prog]
    focal_code = (programs["focal_spot"].to_numpy() == "large").astype(np.int8)[prog]
    t_exp = w["t_exp"][idx]
    arcs = rng.poisson(sim["arc_rate"][idx]).astype(np.int32)
    fil_a = np.round(sim["cur_of"][idx] * (1.0 + rng.normal(0.0, 0.002, n)), 3)
    measured = np.round(ma * (1.0 + rng.normal(0.0, 0.01, n)), 1)
    sys_cat = pd.CategoricalDtype(list(sys_ids))
    tube_cat = pd.CategoricalDtype(list(tube_ids))
    exposures = pd.DataFrame(
        {
            "timestamp_utc": _ts(w["ts_ms"][idx]),
            "system_id": pd.Categorical.from_codes(sys, dtype=sys_cat),
            "tube_id": pd.Categorical.from_codes(tube, dtype=tube_cat),
            "focal_spot": pd.Categorical.from_codes(focal_code, categories=["small", "large"]),
            "tube_voltage_kv": kv,
            "tube_current_ma": ma,
            "tube_current_measured_ma": measured,
            "exposure_time_s": t_exp,
            "exposure_mas": np.round(ma * t_exp, 3),
            "filament_current_a": fil_a,
            "filament_voltage_v": np.full(n, np.nan),
            "prep_time_s": w["prep"][idx],
            "arc_count": arcs,
        },
        copy=False,
    )
    # events ---------------------------------------------------------------------------------
    ev_parts = []
    arc_idx = np.flatnonzero(arcs > 0)
    ev_parts.append(pd.DataFrame({"ts": w["ts_ms"][idx][arc_idx], "sys": sys[arc_idx], "tube": tube[arc_idx], "kind": "arc"}))
    kvd = arc_idx[rng.random(len(arc_idx)) < 0.3]
    ev_parts.append(pd.DataFrame({"ts": w["ts_ms"][idx][kvd] + 5, "sys": sys[kvd], "tube": tube[kvd], "kind": "kv_dropout"}))
    years = (end_ts - start_ts).days / 365.25
    for kind, per_year in (("ma_out_of_tolerance", 1.0), ("overload", 2.0), ("other", 1.0), ("kv_dropout", 0.5)):
        k = rng.poisson(per_year * years * len(systems))
        if n == 0 or k == 0:
            continue
        pick = rng.integers(0, n, k)
        ev_parts.append(pd.DataFrame({"ts": w["ts_ms"][idx][pick] + 3, "sys": sys[pick], "tube": tube[pick], "kind": kind}))
    if sim["events"]:
        ev_parts.append(pd.DataFrame(sim["events"]))
    ev = pd.concat(ev_parts, ignore_index=True).sort_values(["sys", "ts"], kind="stable")
    category = ev["kind"].map(
        {"arc_fail": "arc", "filament_open": "filament_fault", "rotor_stall": "rotor_fault"}
    ).fillna(ev["kind"])
    events = pd.DataFrame(
        {
            "timestamp_utc": _ts(ev["ts"].to_numpy()).to_numpy(),
            "system_id": sys_ids[ev["sys"].to_numpy()],
            "tube_id": tube_ids[ev["tube"].to_numpy().astype(int)],
            "category": category.to_numpy(),
            "raw_code": ev["kind"].map({k: v[0] for k, v in EVENT_CODES.items()}).to_numpy(),
            "raw_text": ev["kind"].map({k: v[1] for k, v in EVENT_CODES.items()}).to_numpy(),
        }
    ).reset_index(drop=True)
    # downtime -------------------------------------------------------------------------------
    dt = pd.concat([downtime, pd.DataFrame(sim["extra_down"])], ignore_index=True)
    dt = dt.sort_values(["sys", "start_ms"], kind="stable")
    downtime_out = pd.DataFrame(
        {
            "system_id": sys_ids[dt["sys"].to_numpy().astype(int)],
            "start_utc": _ts(dt["start_ms"].to_numpy()).to_numpy(),
            "end_utc": _ts(dt["end_ms"].to_numpy()).to_numpy(),
            "cause": dt["cause"].to_numpy(),
            "planned": dt["planned"].astype(bool).to_numpy(),
            "severity": dt["severity"].to_numpy(),
            "note": dt["note"].to_numpy(),
        }
    ).reset_index(drop=True)
    # calibrations ---------------------------------------------------------------------------
    if sim["cals"]:
        parts = sim["cals"]
        lens = [len(p[0]) for p in parts]
        c = pd.DataFrame(
            {
                "timestamp_utc_ms": np.concatenate([p[0] for p in parts]),
                "sys": np.repeat([p[1] for p in parts], lens),
                "tube": np.repeat([p[2] for p in parts], lens),
                "focal_spot": np.repeat([p[3] for p in parts], lens),
                "tube_voltage_kv": np.concatenate([p[4] for p in parts]),
                "tube_current_ma": np.concatenate([p[5] for p in parts]),
                "filament_current_a": np.concatenate([p[6] for p in parts]),
            }
        )
        calibrations = pd.DataFrame(
            {
                "timestamp_utc": _ts(c["timestamp_utc_ms"].to_numpy()).to_numpy(),
                "system_id": sys_ids[c["sys"].to_numpy()],
                "tube_id": tube_ids[c["tube"].to_numpy()],
                "focal_spot": c["focal_spot"].to_numpy(),
                "tube_voltage_kv": c["tube_voltage_kv"].to_numpy(),
                "tube_current_ma": c["tube_current_ma"].to_numpy(),
                "filament_current_a": c["filament_current_a"].to_numpy(),
            }
        ).sort_values(["system_id", "timestamp_utc", "focal_spot", "tube_current_ma", "tube_voltage_kv"], kind="stable")
        calibrations = calibrations.reset_index(drop=True)
    else:
        calibrations = pd.DataFrame(
            columns=["timestamp_utc", "system_id", "tube_id", "focal_spot", "tube_voltage_kv",
                     "tube_current_ma", "filament_current_a"]
        )
    # tubes and truth ------------------------------------------------------------------------
    tr = pd.DataFrame([{k: v for k, v in t.items() if not k.startswith(("spec_", "table_"))} for t in tubes_raw])
    installed = _ts(tr["installed_ms"].to_numpy())
    removed_ms = tr["removed_ms"].astype(float)
    removed = pd.Series(pd.to_datetime(removed_ms, unit="ms")).dt.floor("s").astype("datetime64[ms]")
    tubes = pd.DataFrame(
        {
            "tube_id": tr["tube_id"],
            "system_id": sys_ids[tr["sys"].to_numpy()],
            "model_label": tr["model_label"],
            "installed_at_utc": installed,
            "removed_at_utc": removed,
            "removal_reason": tr["removal_reason"],
            "price": tr["price"],
            "price_currency": "EUR",
        }
    )
    site_of = systems["site"].to_numpy()[tr["sys"].to_numpy()]
    truth = pd.DataFrame(
        {
            "tube_id": tr["tube_id"],
            "system_id": tubes["system_id"],
            "site": site_of,
            "installed_at_utc": installed,
            "removed_at_utc": removed,
            "left_truncated": installed < start_ts,
            "failed": tr["removal_reason"].notna() & (tr["removal_reason"] != "upgrade"),
            "true_cause": tr["removal_reason"].fillna("in_service"),
            "failed_focal_spot": tr["failed_focal_spot"],
            "diameter_loss_small_at_end": tr["loss_end_small"],
            "diameter_loss_large_at_end": tr["loss_end_large"],
            "threshold_small": tr["threshold_small"],
            "threshold_large": tr["threshold_large"],
            "diameter_loss_small_at_log_start": tr["pre_loss_small"],
            "diameter_loss_large_at_log_start": tr["pre_loss_large"],
            "hot_spot_factor_small": tr["hot_spot_small"],
            "hot_spot_factor_large": tr["hot_spot_large"],
            "sensor_gain_small": tr["gain_small"],
            "sensor_gain_large": tr["gain_large"],
            "arc_or_rotor_precursor": tr["precursor"],
            "n_exposures": tr["n_exposures"],
        }
    )
    tdp = sim["truth_days"]
    tlen = [len(p[2]) for p in tdp]
    td = pd.DataFrame(
        {
            "tube": np.repeat(np.array([p[0] for p in tdp], dtype=np.int64), tlen),
            "focal_spot": np.repeat(np.array([p[1] for p in tdp], dtype=object), tlen),
            "day": np.concatenate([p[2] for p in tdp]) if tdp else np.array([], dtype=np.int64),
            "diameter_loss": np.concatenate([p[3] for p in tdp]) if tdp else np.array([]),
        }
    )
    truth_diameter = pd.DataFrame(
        {
            "tube_id": tube_ids[td["tube"].to_numpy()],
            "focal_spot": td["focal_spot"].to_numpy(),
            "day": (np.datetime64(start_ts.date(), "D") + td["day"].to_numpy().astype("timedelta64[D]")).astype("datetime64[s]"),
            "diameter_loss": td["diameter_loss"].to_numpy(),
        }
    )
    steps = pd.DataFrame(sim["steps"], columns=["tube_id", "focal_spot", "timestamp_utc_ms", "gain_before", "gain_after"])
    truth_steps = pd.DataFrame(
        {
            "tube_id": steps["tube_id"],
            "focal_spot": steps["focal_spot"],
            "timestamp_utc": _ts(steps["timestamp_utc_ms"].to_numpy()),
            "gain_before": steps["gain_before"],
            "gain_after": steps["gain_after"],
        }
    )
    systems_out = systems[
        ["system_id", "site", "modality", "generator_type", "criticality_weight",
         "uptime_target_pct", "scheduled_hours_per_week", "model_label"]
    ].copy()
    prog_out = programs.assign(system_id=sys_ids[programs["system_idx"].to_numpy()])
    meta = {
        "seed": seed,
        "group": GROUP_NAME,
        "timezone": SITE_TIMEZONE,
        "start": start_ts,
        "end": end_ts,
        "physics": physics,
        "wear_acceleration": accel,
        "exposures_per_day": exposures_per_day,
        "sites": [s.__dict__ for s in sites],
        "systems_gen": systems.copy(),
        "tube_specs": {t["tube_id"]: {"small": t["spec_small"], "large": t["spec_large"]} for t in tubes_raw},
        "wear_tables": {t["tube_id"]: {"small": t["table_small"], "large": t["table_large"]} for t in tubes_raw},
    }
    return DemoFleet(
        systems=systems_out,
        tubes=tubes,
        exposures=exposures,
        calibrations=calibrations,
        events=events,
        downtime=downtime_out,
        truth=truth,
        truth_diameter=truth_diameter,
        truth_steps=truth_steps,
        programs=prog_out,
        meta=meta,
    )
