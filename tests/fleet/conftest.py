"""Fixtures for the fleet tests: a seeded simulated fleet in a store (never a check value).

The simulated fleet is used for recovery tests (does the fit find the parameters we simulated?)
and for end-to-end CLI runs. Published check values live in the reference tests.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from tubetrack import store

LOG_START = pd.Timestamp("2022-01-01")
AS_OF = pd.Timestamp("2025-06-01")
TRUE_ETA_DAYS = 900.0
TRUE_BETA = 2.5


def simulate_fleet(seed: int = 7, n_systems: int = 40, exposures_per_day: float = 2.0):
    """Systems, tubes (Weibull lives, replaced at failure since 2016), exposures, downtime."""
    rng = np.random.default_rng(seed)
    gen = np.array(
        ["single_phase", "three_phase_6p", "three_phase_12p", "high_frequency"]
    )
    systems = pd.DataFrame(
        {
            "system_id": [f"SYS{i:03d}" for i in range(n_systems)],
            "site": np.where(np.arange(n_systems) % 2 == 0, "north", "south"),
            "modality": np.where(
                np.arange(n_systems) % 3 == 0, "fluoroscopy", "radiographic"
            ),
            "generator_type": gen[np.arange(n_systems) % 4],
            "criticality_weight": np.where(np.arange(n_systems) % 5 == 0, 2.0, 1.0),
            "uptime_target_pct": 97.0,
            "scheduled_hours_per_week": 60.0,
            "model_label": "room",
        }
    )
    rows = []
    for sid in systems["system_id"]:
        t = pd.Timestamp("2016-01-01") + pd.Timedelta(days=float(rng.uniform(0, 300)))
        k = 0
        while t < AS_OF:
            life = TRUE_ETA_DAYS * rng.weibull(TRUE_BETA)
            end = t + pd.Timedelta(days=float(life))
            failed = end < AS_OF
            rows.append(
                {
                    "tube_id": f"{sid}-T{k}",
                    "system_id": sid,
                    "model_label": "TX-A" if k % 2 == 0 else "TX-B",
                    "installed_at_utc": t,
                    "removed_at_utc": end if failed else pd.NaT,
                    "removal_reason": (
                        ("filament" if rng.random() < 0.6 else "arcing")
                        if failed
                        else None
                    ),
                    "price": 40000.0 if k % 2 == 0 else 55000.0,
                    "price_currency": "EUR",
                }
            )
            t = end + pd.Timedelta(hours=12)
            k += 1
    tubes = pd.DataFrame(rows)
    span_days = (AS_OF - LOG_START).days
    n_exp = int(n_systems * span_days * exposures_per_day)
    ts = LOG_START + pd.to_timedelta(rng.uniform(0, span_days, n_exp), unit="D")
    exposures = pd.DataFrame(
        {
            "timestamp_utc": ts.round("s"),
            "system_id": systems["system_id"].to_numpy()[
                rng.integers(0, n_systems, n_exp)
            ],
            "tube_id": None,
            "focal_spot": np.where(rng.random(n_exp) < 0.5, "small", "large"),
            "tube_voltage_kv": rng.choice([60.0, 70.0, 81.0, 90.0], n_exp),
            "tube_current_ma": rng.choice([100.0, 200.0, 400.0], n_exp),
            "exposure_time_s": rng.choice([0.02, 0.05, 0.1], n_exp),
            "prep_time_s": 1.0,
        }
    ).drop_duplicates(["system_id", "timestamp_utc"])
    exposures["exposure_mas"] = (
        exposures["tube_current_ma"] * exposures["exposure_time_s"]
    )
    failed = tubes[
        tubes["removed_at_utc"].notna() & (tubes["removed_at_utc"] > LOG_START)
    ]
    down = pd.DataFrame(
        {
            "system_id": failed["system_id"].to_numpy(),
            "start_utc": failed["removed_at_utc"].to_numpy() - pd.Timedelta(hours=20),
            "end_utc": failed["removed_at_utc"].to_numpy() + pd.Timedelta(hours=10),
            "cause": "tube",
            "planned": False,
            "severity": "hard_down",
            "note": None,
        }
    )
    return systems, tubes, exposures, down


def load_into(con, systems, tubes, exposures, down) -> None:
    for name, frame in (
        ("systems", systems),
        ("tubes", tubes),
        ("exposures", exposures),
        ("downtime", down),
    ):
        con.register("_f", frame)
        cols = ", ".join(frame.columns)
        con.execute(f"INSERT INTO {name} ({cols}) SELECT {cols} FROM _f")
        con.unregister("_f")


@pytest.fixture(scope="session")
def fleet_frames():
    return simulate_fleet()


@pytest.fixture
def fleet_store(fleet_frames):
    con = store.connect(":memory:")
    load_into(con, *fleet_frames)
    yield con
    con.close()


@pytest.fixture(scope="session")
def fleet_db(tmp_path_factory, fleet_frames) -> Path:
    path = tmp_path_factory.mktemp("fleet") / "fleet.duckdb"
    con = store.connect(path)
    load_into(con, *fleet_frames)
    con.close()
    return path
