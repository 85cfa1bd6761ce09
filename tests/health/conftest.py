"""Seeded synthetic tubes for the health tests (closed-form physics, known truth)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

STATIONS_MA = (200.0, 400.0, 630.0)
KV_CHOICES = (60.0, 70.0, 81.0, 90.0, 102.0)


def simulate_tube(
    seed: int,
    tube_id: str = "T1",
    system_id: str = "S1",
    start: str = "2024-01-01",
    n_days: int = 600,
    exposures_per_day: float = 30.0,
    k_true: float = 1.0,
    rate_at_400ma_per_s: float = 1.2e-6,
    shift_day: int | None = None,
    shift_factor: float = 1.02,
    noise: float = 0.004,
    kv_slope: float = -0.002,
    focal_spot: str = "large",
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Exposure rows of one tube whose wire thins as k * sum(hot_s * rate(mA)), I ~ d^1.5.

    Returns (exposures in canonical columns, truth per day: day, loss).
    """
    rng = np.random.default_rng(seed)
    counts = rng.poisson(exposures_per_day, n_days)
    day_idx = np.repeat(np.arange(n_days), counts)
    n = day_idx.size
    ma = rng.choice(np.asarray(STATIONS_MA), n, p=[0.3, 0.5, 0.2])
    kv = rng.choice(np.asarray(KV_CHOICES), n)
    t_s = rng.choice([0.05, 0.1, 0.2], n)
    prep_s = rng.uniform(0.8, 1.5, n)
    rate = rate_at_400ma_per_s * (ma / 400.0) ** 2.0
    wear = k_true * (t_s + prep_s) * rate
    # wear of a day acts from the next day on (the day's own exposures see the morning wire)
    daily_wear = np.bincount(day_idx, weights=wear, minlength=n_days)
    loss_day = np.concatenate([[0.0], np.cumsum(daily_wear)[:-1]])
    d = 1.0 - loss_day[day_idx]
    i0 = {200.0: 4.6, 400.0: 5.1, 630.0: 5.5}
    base = np.vectorize(i0.get)(ma)
    current = base * d**1.5 * np.exp(kv_slope * (kv - 80.0)) * (1 + noise * rng.standard_normal(n))
    if shift_day is not None:
        current = np.where(day_idx >= shift_day, current * shift_factor, current)
    ts = pd.Timestamp(start) + pd.to_timedelta(day_idx, unit="D") + pd.to_timedelta(
        rng.uniform(8 * 3600, 17 * 3600, n), unit="s")
    exp = pd.DataFrame({
        "timestamp_utc": ts, "system_id": system_id, "tube_id": tube_id, "focal_spot": focal_spot,
        "tube_voltage_kv": kv, "tube_current_ma": ma, "tube_current_measured_ma": ma,
        "exposure_time_s": t_s, "exposure_mas": ma * t_s, "filament_current_a": current,
        "filament_voltage_v": np.nan, "prep_time_s": prep_s, "arc_count": 0,
    }).sort_values("timestamp_utc", ignore_index=True)
    truth = pd.DataFrame({"day": pd.Timestamp(start) + pd.to_timedelta(np.arange(n_days), unit="D"),
                          "loss": loss_day})
    return exp, truth


def load_into(con, exposures: pd.DataFrame, tubes: pd.DataFrame, systems: pd.DataFrame | None = None):
    """Insert canonical frames into a store."""
    con.register("_e", exposures)
    con.execute(
        "INSERT INTO exposures (timestamp_utc, system_id, tube_id, focal_spot, tube_voltage_kv, "
        "tube_current_ma, tube_current_measured_ma, exposure_time_s, exposure_mas, filament_current_a, "
        "filament_voltage_v, prep_time_s, arc_count) SELECT timestamp_utc, system_id, tube_id, focal_spot, "
        "tube_voltage_kv, tube_current_ma, tube_current_measured_ma, exposure_time_s, exposure_mas, "
        "filament_current_a, filament_voltage_v, prep_time_s, arc_count FROM _e")
    con.unregister("_e")
    con.register("_t", tubes)
    con.execute("INSERT INTO tubes (tube_id, system_id, model_label, installed_at_utc, removed_at_utc, "
                "removal_reason) SELECT tube_id, system_id, NULL, installed_at_utc, removed_at_utc, "
                "removal_reason FROM _t")
    con.unregister("_t")
    if systems is not None:
        con.register("_s", systems)
        con.execute("INSERT INTO systems (system_id, site) SELECT system_id, site FROM _s")
        con.unregister("_s")


@pytest.fixture
def sim():
    """The simulator function."""
    return simulate_tube


@pytest.fixture
def load():
    """The store loader function."""
    return load_into
