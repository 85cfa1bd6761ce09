"""Synthetic benchmark fleets, written as log files in our open layout and the foreign layout.

The fleet comes from the demo generator (:func:`tubetrack.demo.generate_fleet`) sized to the
requested number of tubes and exposures. When the demo generator is not importable (early in
development) a small vectorised stand-in produces the same canonical columns, so the harness
itself never waits on it; the chosen source is written into ``bench/RESULTS.md``.

Files are written with DuckDB ``COPY`` (fast, no Python loop over rows):

``open/inventory/systems.csv``, ``open/inventory/tubes.csv``
``open/<site>/exposures-<SYSTEM_ID>.csv`` every exposure except the last day
``open/<site>/calibrations.csv``, ``events.csv``, ``downtime.csv``
``increment/exposures-<YYYY-MM-DD>.csv`` the last day (the incremental-ingest step)
``foreign/genlog_<SYSTEM_ID>_<YYYY>.csv`` + ``foreign/profiles/harrowgate.toml`` (foreign layout
for a subset of the systems, when the ingest profile exists)
"""

from __future__ import annotations

import json
import math
import shutil
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

REPO_ROOT = Path(__file__).resolve().parents[1]
PROFILE = REPO_ROOT / "sample_logs" / "profiles" / "harrowgate.toml"

EXPOSURE_COLUMNS = (
    "timestamp_utc",
    "system_id",
    "tube_id",
    "focal_spot",
    "tube_voltage_kv",
    "tube_current_ma",
    "tube_current_measured_ma",
    "exposure_time_s",
    "exposure_mas",
    "filament_current_a",
    "filament_voltage_v",
    "prep_time_s",
    "arc_count",
)


@dataclass
class Dataset:
    """Paths and sizes of one generated benchmark data set."""

    root: Path
    source: str  #: "demo" or "stand-in"
    n_systems: int
    n_tubes: int
    n_exposures: int
    n_exposures_increment: int
    exposure_csv_bytes: int
    foreign_rows: int = 0
    foreign_bytes: int = 0
    generate_s: float = 0.0
    write_s: float = 0.0
    notes: list[str] = field(default_factory=list)
    request: str = ""  #: the size asked for; a cached data set is reused only for the same request

    @property
    def open_dir(self) -> Path:
        return self.root / "open"

    @property
    def increment_dir(self) -> Path:
        return self.root / "increment"

    @property
    def foreign_dir(self) -> Path:
        return self.root / "foreign"

    @property
    def exposure_glob(self) -> str:
        return str(self.open_dir / "*" / "exposures-*.csv")

    @property
    def foreign_glob(self) -> str:
        return str(self.foreign_dir / "genlog_*.csv")

    def to_json(self) -> str:
        data = {k: (str(v) if isinstance(v, Path) else v) for k, v in self.__dict__.items()}
        return json.dumps(data, indent=1)

    @classmethod
    def from_json(cls, text: str) -> Dataset:
        data = json.loads(text)
        data["root"] = Path(data["root"])
        return cls(**data)


# ----------------------------------------------------------------------------- fleet sources


def _demo_available() -> bool:
    try:
        from tubetrack.demo import generate_fleet  # noqa: F401
    except Exception:
        return False
    return True


def _demo_fleet(n_tubes: int, n_exposures: int, seed: int) -> Any:
    """Size the demo fleet from small probes, then generate it at full size.

    Exposures grow linearly with systems x rate; tubes per system grow with the rate too (more
    use, more filament failures), so the rate is fixed first from a probe at the target
    exposures per system, then the number of systems from that probe's tubes per system.
    """
    from tubetrack.demo import generate_fleet

    years, probe_systems = 3.2, 30
    days = years * 365.25
    # probe 1: exposures per system per unit of rate
    rate0 = 10.0
    p0 = generate_fleet(seed=seed, n_systems=probe_systems, years=years, exposures_per_day=rate0)
    exp_per_sys_per_rate = max(len(p0.exposures) / probe_systems / rate0, 1e-9)
    tubes_per_sys = max(len(p0.tubes) / probe_systems, 1.0)
    rate = rate0
    for _ in range(3):
        n_systems = max(2, round(n_tubes / tubes_per_sys))
        rate = max(0.5, n_exposures / n_systems / exp_per_sys_per_rate)
        p1 = generate_fleet(seed=seed, n_systems=probe_systems, years=years, exposures_per_day=rate)
        tubes_per_sys = max(len(p1.tubes) / probe_systems, 1.0)
        exp_per_sys_per_rate = max(len(p1.exposures) / probe_systems / rate, 1e-9)
    n_systems = max(2, round(n_tubes / tubes_per_sys))
    rate = max(0.5, n_exposures / n_systems / exp_per_sys_per_rate)
    del days
    return generate_fleet(seed=seed, n_systems=n_systems, years=years, exposures_per_day=rate)


@dataclass(frozen=True)
class _StandIn:
    systems: Any
    tubes: Any
    exposures: Any
    calibrations: Any
    events: Any
    downtime: Any


def _stand_in_fleet(n_tubes: int, n_exposures: int, seed: int) -> _StandIn:
    """A vectorised stand-in fleet with canonical columns (used only without the demo).

    Each system has two tubes in sequence (the first replaced part-way); filament current
    rises slowly with cumulative use. Plausible numbers only: this is load, not physics.
    """
    import numpy as np
    import pandas as pd

    rng = np.random.default_rng(seed)
    n_systems = max(1, n_tubes // 2)
    start = np.datetime64("2022-09-01T00:00:00")
    span_s = int(3.2 * 365.25 * 86400)
    sys_ids = np.array([f"SYS{i:05d}" for i in range(n_systems)])
    sites = np.array([f"site-{i % 12:02d}" for i in range(n_systems)])
    systems = pd.DataFrame(
        {
            "system_id": sys_ids,
            "site": sites,
            "modality": "radiographic",
            "generator_type": "high_frequency",
            "criticality_weight": 1.0,
            "uptime_target_pct": 97.0,
            "scheduled_hours_per_week": 50.0,
            "model_label": "bench stand-in",
        }
    )
    swap_s = rng.integers(span_s // 4, 3 * span_s // 4, n_systems)
    swap = start + swap_s.astype("timedelta64[s]")
    tubes = pd.DataFrame(
        {
            "tube_id": np.concatenate([[f"T{i:05d}A" for i in range(n_systems)], [f"T{i:05d}B" for i in range(n_systems)]]),
            "system_id": np.concatenate([sys_ids, sys_ids]),
            "model_label": "bench tube",
            "installed_at_utc": np.concatenate([np.full(n_systems, start - np.timedelta64(30, "D")), swap]),
            "removed_at_utc": np.concatenate([swap, np.full(n_systems, np.datetime64("NaT"), dtype="datetime64[s]")]),
            "removal_reason": np.concatenate([np.full(n_systems, "filament", dtype=object), np.full(n_systems, None, dtype=object)]),
            "price": 90000.0,
            "price_currency": "EUR",
        }
    )
    n = int(n_exposures)
    sys_idx = rng.integers(0, n_systems, n)
    t_s = rng.integers(0, span_s, n)
    ts = start + t_s.astype("timedelta64[s]") + rng.integers(0, 1000, n).astype("timedelta64[ms]")
    second = t_s >= swap_s[sys_idx]
    tube_ids = np.where(second, tubes["tube_id"].to_numpy()[n_systems + sys_idx], tubes["tube_id"].to_numpy()[sys_idx])
    stations = np.array([100.0, 200.0, 320.0, 500.0])
    ma = stations[rng.integers(0, 4, n)]
    large = ma >= 320
    kv = rng.choice(np.array([60.0, 70.0, 81.0, 90.0, 102.0, 117.0]), n)
    t_exp = rng.choice(np.array([0.008, 0.016, 0.032, 0.063, 0.125, 0.25]), n)
    age = np.where(second, t_s - swap_s[sys_idx], t_s) / span_s
    fil = (3.6 + 0.9 * large + 0.0012 * ma + 0.004 * (kv - 80) / 10) * (1 + 0.03 * age) + rng.normal(0, 0.01, n)
    exposures = pd.DataFrame(
        {
            "timestamp_utc": ts,
            "system_id": sys_ids[sys_idx],
            "tube_id": tube_ids,
            "focal_spot": np.where(large, "large", "small"),
            "tube_voltage_kv": kv,
            "tube_current_ma": ma,
            "tube_current_measured_ma": ma * (1 + rng.normal(0, 0.01, n)),
            "exposure_time_s": t_exp,
            "exposure_mas": ma * t_exp,
            "filament_current_a": np.round(fil, 4),
            "filament_voltage_v": np.round(fil * 2.1, 3),
            "prep_time_s": 0.8,
            "arc_count": (rng.random(n) < 2e-4).astype("int32"),
        }
    )
    empty_cal = pd.DataFrame(
        columns=["timestamp_utc", "system_id", "tube_id", "focal_spot", "tube_voltage_kv", "tube_current_ma", "filament_current_a"]
    )
    empty_ev = pd.DataFrame(columns=["timestamp_utc", "system_id", "tube_id", "category", "raw_code", "raw_text"])
    empty_dt = pd.DataFrame(columns=["system_id", "start_utc", "end_utc", "cause", "planned", "severity", "note"])
    return _StandIn(systems, tubes, exposures, empty_cal, empty_ev, empty_dt)


# ----------------------------------------------------------------------------- writers


def _sql_str(value: str | Path) -> str:
    return "'" + str(value).replace("'", "''") + "'"


def _iso(col: str) -> str:
    return f"strftime({col}, '%Y-%m-%dT%H:%M:%S.%gZ')"


def _write_open_layout(con: Any, fleet: Any, root: Path) -> tuple[int, int]:
    """Write the fleet in our open layout; return (rows before the last day, last-day rows)."""
    import pandas as pd

    open_dir, inc_dir = root / "open", root / "increment"
    (open_dir / "inventory").mkdir(parents=True, exist_ok=True)
    inc_dir.mkdir(parents=True, exist_ok=True)
    con.register("f_systems", fleet.systems)
    con.register("f_tubes", fleet.tubes)
    con.register("f_exposures", fleet.exposures)
    con.execute(f"COPY (SELECT * FROM f_systems) TO {_sql_str(open_dir / 'inventory' / 'systems.csv')} (HEADER)")
    tube_cols = [c for c in fleet.tubes.columns]
    sel = ", ".join(_iso(c) + f" AS {c}" if c.endswith("_utc") else c for c in tube_cols)
    con.execute(f"COPY (SELECT {sel} FROM f_tubes) TO {_sql_str(open_dir / 'inventory' / 'tubes.csv')} (HEADER)")
    cols = [c for c in EXPOSURE_COLUMNS if c in fleet.exposures.columns]
    last_day = con.execute("SELECT CAST(max(timestamp_utc) AS DATE) FROM f_exposures").fetchall()[0][0]
    con.execute(
        """CREATE TEMP TABLE x AS
        SELECT e.*, s.site FROM f_exposures e LEFT JOIN f_systems s USING (system_id)"""
    )
    sel = ", ".join(_iso(c) + " AS timestamp_utc" if c == "timestamp_utc" else c for c in cols)
    # one file per system, inside its site folder: exposures-<SYSTEM_ID>.csv
    con.execute(
        f"""COPY (SELECT {sel}, site AS _site, system_id AS _sys FROM x
                  WHERE CAST(timestamp_utc AS DATE) < ? ORDER BY system_id, timestamp_utc)
            TO {_sql_str(root / 'staging')}
            (FORMAT csv, HEADER, PARTITION_BY (_site, _sys), OVERWRITE_OR_IGNORE)""",
        [last_day],
    )
    staging = root / "staging"
    for part in staging.glob("_site=*/_sys=*"):
        site = part.parent.name.split("=", 1)[1]
        sys_id = part.name.split("=", 1)[1]
        dest = open_dir / site
        dest.mkdir(parents=True, exist_ok=True)
        files = sorted(part.glob("*.csv"))
        for i, f in enumerate(files):
            suffix = "" if i == 0 else f"-{i}"
            f.rename(dest / f"exposures-{sys_id}{suffix}.csv")
    shutil.rmtree(staging)
    con.execute(
        f"""COPY (SELECT {sel} FROM x WHERE CAST(timestamp_utc AS DATE) = ? ORDER BY system_id, timestamp_utc)
            TO {_sql_str(inc_dir / f'exposures-{last_day}.csv')} (HEADER)""",
        [last_day],
    )
    n_before, n_last = con.execute(
        "SELECT count(*) FILTER (WHERE CAST(timestamp_utc AS DATE) < ?), "
        "count(*) FILTER (WHERE CAST(timestamp_utc AS DATE) = ?) FROM x",
        [last_day, last_day],
    ).fetchall()[0]
    # small tables: one file each per site folder is not needed; they go beside the inventory
    for name in ("calibrations", "events", "downtime"):
        frame = getattr(fleet, name, None)
        if frame is None or len(frame) == 0:
            continue
        con.register(f"f_{name}", frame)
        cols2 = list(frame.columns)
        sel2 = ", ".join(
            _iso(c) + f" AS {c}" if (c.endswith("_utc") and pd.api.types.is_datetime64_any_dtype(frame[c])) else c
            for c in cols2
        )
        con.execute(f"COPY (SELECT {sel2} FROM f_{name}) TO {_sql_str(open_dir / 'inventory' / f'{name}.csv')} (HEADER)")
    return int(n_before), int(n_last)


def _write_foreign_layout(con: Any, root: Path, max_rows: int) -> tuple[int, int]:
    """Write some systems in the foreign (Harrowgate) layout: ``;``, decimal comma, BOM,
    day-first local dates in Europe/Berlin, exposure and prep time in ms, filament current in mA.
    """
    out = root / "foreign"
    out.mkdir(parents=True, exist_ok=True)
    if PROFILE.exists():
        (out / "profiles").mkdir(exist_ok=True)
        shutil.copy(PROFILE, out / "profiles" / PROFILE.name)
    # whole systems until max_rows
    con.execute(
        """CREATE TEMP TABLE fsys AS
        SELECT system_id FROM (
            SELECT system_id, sum(count(*)) OVER (ORDER BY system_id) AS cum
            FROM x GROUP BY system_id) WHERE cum <= ? ORDER BY system_id""",
        [max_rows],
    )

    def dec(expr: str, fmt: str) -> str:
        return f"replace(printf('{fmt}', {expr}), '.', ',')"

    local = "timezone('Europe/Berlin', timezone('UTC', timestamp_utc))"
    con.execute(
        f"""CREATE TEMP TABLE fx AS SELECT
            strftime({local}, '%d.%m.%Y') AS Datum,
            strftime({local}, '%H:%M:%S') AS Zeit,
            system_id AS Anlage,
            CASE focal_spot WHEN 'small' THEN 'F1' ELSE 'F2' END AS Fokus,
            {dec('tube_voltage_kv', '%.1f')} AS kVp,
            {dec('tube_current_ma', '%.1f')} AS mA,
            {dec('exposure_time_s * 1000', '%.1f')} AS Belichtung_ms,
            {dec('filament_current_a * 1000', '%.1f')} AS Heizstrom_mA,
            {dec('COALESCE(prep_time_s, 0) * 1000', '%.0f')} AS Vorbereitung_ms,
            COALESCE(arc_count, 0) AS Ueberschlaege,
            system_id AS _sys, year({local}) AS _yr, timestamp_utc AS _ts
        FROM x WHERE system_id IN (SELECT system_id FROM fsys)"""
    )
    con.execute(
        f"""COPY (SELECT * EXCLUDE (_ts) FROM fx ORDER BY _sys, _ts)
            TO {_sql_str(root / 'fstaging')}
            (FORMAT csv, HEADER, DELIMITER ';', QUOTE '', PARTITION_BY (_sys, _yr), OVERWRITE_OR_IGNORE)"""
    )
    rows = con.execute("SELECT count(*) FROM fx").fetchall()[0][0]
    nbytes = 0
    for part in (root / "fstaging").glob("_sys=*/_yr=*"):
        sys_id = part.parent.name.split("=", 1)[1]
        year = part.name.split("=", 1)[1]
        for i, f in enumerate(sorted(part.glob("*.csv"))):
            dest = out / (f"genlog_{sys_id}_{year}.csv" if i == 0 else f"genlog_{sys_id}_{year}-{i}.csv")
            with open(dest, "wb") as fh:
                fh.write(b"\xef\xbb\xbf")
                fh.write(f.read_bytes())
            nbytes += dest.stat().st_size
    shutil.rmtree(root / "fstaging")
    return int(rows), nbytes


def build_dataset(
    root: Path,
    *,
    n_tubes: int,
    n_exposures: int,
    seed: int = 20261202,
    foreign_fraction: float = 0.1,
    force_stand_in: bool = False,
) -> Dataset:
    """Generate a fleet of about ``n_tubes`` tubes and ``n_exposures`` exposures and write it."""
    import duckdb

    source_wanted = "stand-in" if force_stand_in or not _demo_available() else "demo"
    request = f"v2:{source_wanted}:{n_tubes}:{n_exposures}:{seed}:{foreign_fraction}"
    meta = root / "dataset.json"
    if meta.exists():
        ds = Dataset.from_json(meta.read_text())
        if ds.request == request:
            return ds
    if root.exists():
        shutil.rmtree(root)
    root.mkdir(parents=True)
    t0 = time.perf_counter()
    notes: list[str] = []
    if not force_stand_in and _demo_available():
        fleet, source = _demo_fleet(n_tubes, n_exposures, seed), "demo"
    else:
        fleet, source = _stand_in_fleet(n_tubes, n_exposures, seed), "stand-in"
        notes.append("tubetrack.demo not available: vectorised stand-in fleet used")
    gen_s = time.perf_counter() - t0
    t1 = time.perf_counter()
    con = duckdb.connect()
    con.execute("SET TimeZone = 'UTC'")
    n_before, n_last = _write_open_layout(con, fleet, root)
    f_rows, f_bytes = _write_foreign_layout(con, root, max_rows=max(1000, math.ceil(foreign_fraction * n_before)))
    if not PROFILE.exists():
        notes.append(f"{PROFILE.relative_to(REPO_ROOT)} missing: foreign layout written, profile not copied")
    con.close()
    csv_bytes = sum(p.stat().st_size for p in (root / "open").glob("*/exposures-*.csv"))
    ds = Dataset(
        root=root,
        source=source,
        n_systems=len(fleet.systems),
        n_tubes=len(fleet.tubes),
        n_exposures=n_before,
        n_exposures_increment=n_last,
        exposure_csv_bytes=csv_bytes,
        foreign_rows=f_rows,
        foreign_bytes=f_bytes,
        generate_s=gen_s,
        write_s=time.perf_counter() - t1,
        notes=notes,
        request=request,
    )
    meta.write_text(ds.to_json())
    return ds
