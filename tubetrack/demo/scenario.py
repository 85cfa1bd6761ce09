"""The invented scenario of the demo fleet: sites, systems and their exposure programs.

Everything here is fiction: the Aldermere Regional Health Group, its sites, system labels and
tube model labels are invented for tubetrack's demo and tests. Station values, kV and mAs of the
exposure programs are typical diagnostic settings (``# common practice``), not any vendor's.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

GROUP_NAME = "Aldermere Regional Health Group"
#: Local time zone of every site (the foreign-layout site logs in it).
SITE_TIMEZONE = "Europe/Berlin"


@dataclass(frozen=True)
class Site:
    """One invented site of the group."""

    slug: str
    name: str
    prefix: str
    n_systems: int
    exports_logs: bool = True  # False: no generator logs, DICOM workload only
    foreign_layout: bool = False  # True: generator logs in the foreign layout (harrowgate profile)
    logs_tube_id: bool = True  # the generator writes the tube serial into each exposure row
    logs_measured_ma: bool = False


#: The default scenario (24 systems). Larger fleets add generic sites ``site-NNN``.
SITES: tuple[Site, ...] = (
    Site("aldermere", "Aldermere General Hospital", "ALG", 8, logs_measured_ma=True),
    Site("kestrelbay", "Kestrel Bay Community Hospital", "KBC", 5, logs_tube_id=False),
    Site("harrowgate", "Harrowgate Valley Clinic", "HVC", 5, foreign_layout=True),
    Site("tollbridge", "Tollbridge Orthopaedic Centre", "TOC", 4),
    Site("wenlow", "Wenlow Street Outpatients", "WSO", 2, exports_logs=False),
)

#: Exposure programs per modality: name, focal spot, mA station, kV, nominal mAs, weight.
#: Typical adult settings (# common practice); the AEC varies the exposure time around mAs/mA.
PROGRAMS: dict[str, list[tuple[str, str, float, float, float, float]]] = {
    "radiographic": [
        ("chest_pa", "large", 400, 125, 4.0, 0.22),
        ("chest_lat", "large", 400, 125, 10.0, 0.10),
        ("abdomen", "large", 500, 80, 28.0, 0.08),
        ("pelvis", "large", 500, 77, 25.0, 0.07),
        ("lumbar_ap", "large", 500, 85, 40.0, 0.06),
        ("lumbar_lat", "large", 630, 95, 60.0, 0.05),
        ("skull", "large", 320, 75, 20.0, 0.04),
        ("shoulder", "small", 250, 70, 12.0, 0.10),
        ("knee", "small", 200, 65, 6.0, 0.10),
        ("wrist", "small", 100, 55, 2.5, 0.10),
        ("foot", "small", 160, 60, 4.0, 0.08),
    ],
    "mobile": [
        ("chest_ap_bed", "large", 200, 90, 3.2, 0.50),
        ("abdomen_bed", "large", 250, 75, 20.0, 0.12),
        ("pelvis_bed", "large", 250, 75, 18.0, 0.08),
        ("neonate", "small", 100, 60, 1.0, 0.15),
        ("limb_bed", "small", 160, 62, 5.0, 0.15),
    ],
    "fluoroscopy": [
        ("spot_abdomen", "large", 630, 80, 20.0, 0.22),
        ("spot_chest", "large", 500, 110, 5.0, 0.10),
        ("spot_series", "large", 800, 75, 12.0, 0.18),
        ("spot_spine", "large", 630, 90, 35.0, 0.10),
        ("fluoro_run", "small", 20, 80, 300.0, 0.25),
        ("fluoro_run_low", "small", 10, 70, 200.0, 0.15),
    ],
}

#: The next mA station up, for rooms that run high-mA stations (# common practice values).
STATION_UP = {100: 160, 160: 200, 200: 250, 250: 320, 320: 400, 400: 500, 500: 630, 630: 800, 800: 800}

#: Filament table stations written by each calibration, per focal spot [mA] and kV grid [kV].
CAL_STATIONS_MA = {"small": (100, 160, 200, 250), "large": (320, 400, 500, 630, 800)}
CAL_KV = (60.0, 90.0, 120.0)

#: Tube model labels (invented) and prices per modality.
TUBE_MODELS = {
    "radiographic": ("RT-150 rotating-anode insert", 21500.0),
    "mobile": ("MX-60 compact insert", 11800.0),
    "fluoroscopy": ("FL-300 high-capacity insert", 38900.0),
}
SYSTEM_MODELS = {
    "radiographic": "ceiling-mounted radiographic room",
    "mobile": "battery-powered mobile unit",
    "fluoroscopy": "remote-controlled fluoroscopy room",
}


def build_sites(n_systems: int) -> list[Site]:
    """The sites for a fleet of ``n_systems`` systems.

    With the default 24 systems these are the five named sites. Smaller fleets shrink the named
    sites proportionally (keeping each at least one system); larger fleets add generic sites
    ``site-006``, ``site-007``, ... of 25 systems each, all exporting our own layout.
    """
    base = sum(s.n_systems for s in SITES)
    if n_systems <= base:
        raw = np.array([s.n_systems for s in SITES], dtype=float) * n_systems / base
        counts = np.maximum(1, np.floor(raw)).astype(int)
        while counts.sum() > n_systems and counts.max() > 1:
            counts[int(np.argmax(counts))] -= 1
        while counts.sum() < n_systems:
            counts[int(np.argmax(raw - counts))] += 1
        sites = [
            Site(s.slug, s.name, s.prefix, int(c), s.exports_logs, s.foreign_layout,
                 s.logs_tube_id, s.logs_measured_ma)
            for s, c in zip(SITES, counts, strict=True)
        ]
        return [s for s in sites if s.n_systems > 0][:n_systems]
    sites = list(SITES)
    left = n_systems - base
    k = 6
    while left > 0:
        n = min(25, left)
        sites.append(Site(f"site-{k:03d}", f"Group site {k:03d}", f"S{k:03d}", n,
                          logs_tube_id=bool(k % 2)))
        left -= n
        k += 1
    return sites


def build_systems(sites: list[Site], rng: np.random.Generator) -> pd.DataFrame:
    """One row per system with canonical inventory columns plus generation parameters.

    Generation-only columns start with ``gen_``: mean logged exposures per day, hold-prep
    style (long prep times), high-mA style, whether the system is open around the clock.
    """
    rows = []
    for site in sites:
        n = site.n_systems
        # mix of kinds: about 55 % radiographic rooms, 25 % mobile units, 20 % fluoroscopy rooms
        kinds = ["radiographic"] * n
        n_mob = max(0, round(0.25 * n)) if n >= 3 else 0
        n_flu = max(0, round(0.20 * n)) if n >= 4 else 0
        if site.slug == "wenlow":
            n_mob, n_flu = 0, 0
        for i in range(n_mob):
            kinds[-1 - i] = "mobile"
        for i in range(n_flu):
            kinds[1 + i] = "fluoroscopy"
        counters: dict[str, int] = {}
        for kind in kinds:
            counters[kind] = counters.get(kind, 0) + 1
            letter = {"radiographic": "R", "mobile": "M", "fluoroscopy": "F"}[kind]
            system_id = f"{site.prefix}-{letter}{counters[kind]:02d}"
            gen = rng.choice(
                ["high_frequency", "three_phase_12p", "three_phase_6p", "single_phase"],
                p=[0.70, 0.15, 0.10, 0.05] if kind != "mobile" else [0.85, 0.0, 0.0, 0.15],
            )
            around_clock = kind == "mobile" or (kind == "radiographic" and counters[kind] == 1)
            crit = {"radiographic": 1.0, "mobile": 1.2, "fluoroscopy": 1.6}[kind]
            crit *= 1.3 if around_clock else 1.0
            rows.append(
                {
                    "system_id": system_id,
                    "site": site.slug,
                    "modality": kind,
                    "generator_type": str(gen),
                    "criticality_weight": round(float(crit * rng.uniform(0.85, 1.15)), 2),
                    "uptime_target_pct": float(rng.choice([95.0, 96.0, 97.0, 98.0]))
                    if not around_clock
                    else 98.0,
                    "scheduled_hours_per_week": 168.0
                    if around_clock
                    else float(rng.choice([45.0, 50.0, 55.0, 60.0])),
                    "model_label": SYSTEM_MODELS[kind],
                    "gen_site_exports_logs": site.exports_logs,
                    "gen_foreign_layout": site.foreign_layout,
                    "gen_logs_tube_id": site.logs_tube_id,
                    "gen_logs_measured_ma": site.logs_measured_ma,
                    "gen_around_clock": around_clock,
                    # hold-prep rooms keep the filament boosted for seconds before each exposure
                    "gen_hold_prep": bool(rng.random() < 0.25),
                    # high-mA rooms run every program one mA station up
                    "gen_high_ma": bool(rng.random() < 0.30),
                }
            )
    return pd.DataFrame(rows)


def build_programs(systems: pd.DataFrame, rng: np.random.Generator) -> pd.DataFrame:
    """Exposure programs per system (flat table, one row per system x program).

    Columns: system_idx, program_idx (within system), program, focal_spot, tube_current_ma,
    tube_voltage_kv, mas_nominal, weight (normalised within the system).
    """
    parts = []
    for s_idx, row in enumerate(systems.itertuples(index=False)):
        progs = PROGRAMS[row.modality]
        w = rng.dirichlet(np.array([p[5] for p in progs]) * 40.0)
        ma = np.array([p[2] for p in progs], dtype=float)
        if row.gen_high_ma:
            ma = np.array([STATION_UP.get(int(m), m) if m >= 100 else m for m in ma], dtype=float)
        parts.append(
            pd.DataFrame(
                {
                    "system_idx": s_idx,
                    "program_idx": np.arange(len(progs)),
                    "program": [p[0] for p in progs],
                    "focal_spot": [p[1] for p in progs],
                    "tube_current_ma": ma,
                    "tube_voltage_kv": np.array([p[3] for p in progs], dtype=float),
                    "mas_nominal": np.array([p[4] for p in progs], dtype=float),
                    "weight": w,
                }
            )
        )
    return pd.concat(parts, ignore_index=True)
