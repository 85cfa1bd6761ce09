"""Demo fleet: determinism, canonical columns and units, plausibility, truth consistency."""

from __future__ import annotations

import hashlib

import numpy as np
import pandas as pd
import pytest

from tubetrack import store
from tubetrack.demo import generate_fleet, write_sample_logs

from .conftest import SMALL

TABLES = ("systems", "tubes", "exposures", "calibrations", "events", "downtime")


def test_same_seed_gives_identical_tables(small_fleet):
    again = generate_fleet(**SMALL)
    for name in TABLES + ("truth", "truth_diameter", "truth_steps"):
        pd.testing.assert_frame_equal(getattr(small_fleet, name), getattr(again, name), obj=name)


def test_other_seed_gives_other_fleet(small_fleet):
    other = generate_fleet(**{**SMALL, "seed": SMALL["seed"] + 1})
    assert len(other.exposures) != len(small_fleet.exposures) or not np.array_equal(
        other.exposures["filament_current_a"].to_numpy()[:100],
        small_fleet.exposures["filament_current_a"].to_numpy()[:100],
    )


def test_written_files_are_byte_identical(small_fleet, small_logs, tmp_path):
    out, paths = small_logs
    again = write_sample_logs(small_fleet, tmp_path / "again", dicom=False)
    digest = lambda ps, root: {  # noqa: E731
        str(p.relative_to(root)): hashlib.sha256(p.read_bytes()).hexdigest() for p in ps
    }
    assert digest(paths, out) == digest(again, tmp_path / "again")


@pytest.mark.parametrize("name", TABLES)
def test_columns_are_canonical_store_columns(small_fleet, mem_store, name):
    cols = {
        r[0]
        for r in mem_store.execute(
            "SELECT column_name FROM information_schema.columns WHERE table_name = ?", [name]
        ).fetchall()
    }
    frame = getattr(small_fleet, name)
    assert set(frame.columns) <= cols, set(frame.columns) - cols
    # the frame loads into the store as it is (types compatible)
    mem_store.register("_f", frame)
    col_list = ", ".join(store.quote_ident(c) for c in frame.columns)
    mem_store.execute(f"INSERT INTO {name} ({col_list}) SELECT {col_list} FROM _f")
    assert mem_store.execute(f"SELECT count(*) FROM {name}").fetchone()[0] == len(frame)


def test_exposure_units_and_ranges(small_fleet):
    e = small_fleet.exposures
    # common practice: diagnostic tube voltage 40-150 kV
    assert e["tube_voltage_kv"].between(40, 150).all()
    assert (e["tube_voltage_kv"] == e["tube_voltage_kv"].round()).all()  # integer kV
    # common practice: radiographic mA stations 100-800 mA; fluoroscopy runs 0.5-50 mA
    assert e["tube_current_ma"].between(0.5, 800).all()
    # exposure time in seconds (not ms): 1 ms to 60 s
    assert e["exposure_time_s"].between(0.001, 60).all()
    np.testing.assert_allclose(e["exposure_mas"], e["tube_current_ma"] * e["exposure_time_s"], rtol=1e-3, atol=1e-3)
    assert e["prep_time_s"].between(0, 15).all()
    assert e["focal_spot"].isin(["small", "large"]).all()
    assert (e["arc_count"] >= 0).all()
    assert e["filament_current_a"].notna().all()
    assert e["timestamp_utc"].dt.tz is None  # naive UTC, the store's convention


def test_filament_current_in_trade_range_at_normal_stations(small_fleet):
    # common practice: filament supply of 8-12 V AC driving 4-8 A (REFERENCES.md, trade facts)
    e = small_fleet.exposures
    normal = e["tube_current_ma"].between(100, 500)
    assert normal.sum() > 1000
    assert e.loc[normal, "filament_current_a"].between(4.0, 8.0).all()
    # all stations incl. 630-800 mA and low-mA fluoroscopy stay near that range (sensor gain 2 %)
    assert e["filament_current_a"].between(3.0, 9.5).all()


def test_filament_current_rounded_to_one_ma(small_fleet):
    a = small_fleet.exposures["filament_current_a"].to_numpy()
    np.testing.assert_allclose(a * 1000, np.round(a * 1000), atol=1e-6)


def test_higher_kv_needs_less_filament_current(small_fleet):
    # common practice: at constant filament heating tube current rises with kV (space charge),
    # so generators lower filament heating as kV rises to hold the mA station
    c = small_fleet.calibrations.sort_values("tube_voltage_kv")
    assert len(c) > 0
    steps = c.groupby(["timestamp_utc", "tube_id", "focal_spot", "tube_current_ma"])[
        "filament_current_a"
    ].apply(lambda s: np.diff(s.to_numpy()).max())
    assert (steps < 0).all()


def test_truth_failures_consistent(small_fleet):
    t = small_fleet.truth
    fil = t[t["true_cause"] == "filament"]
    for r in fil.itertuples():
        f = r.failed_focal_spot
        loss = getattr(r, f"diameter_loss_{f}_at_end")
        h = getattr(r, f"hot_spot_factor_{f}")
        thr = getattr(r, f"threshold_{f}")
        # burn-through when hot spot x mean loss reaches the threshold (one exposure's step)
        assert h * loss == pytest.approx(thr, rel=2e-3)
    ok = t[t["true_cause"] != "filament"]
    for f in ("small", "large"):
        assert (ok[f"hot_spot_factor_{f}"] * ok[f"diameter_loss_{f}_at_end"] <= ok[f"threshold_{f}"] + 1e-9).all()
    # every tube but the last of a system is removed, with the next installed after it
    tubes = small_fleet.tubes.sort_values(["system_id", "installed_at_utc"])
    nxt = tubes.groupby("system_id")["installed_at_utc"].shift(-1)
    has_next = nxt.notna()
    assert (tubes.loc[has_next, "removed_at_utc"] <= nxt[has_next]).all()
    assert tubes.loc[~has_next, "removed_at_utc"].isna().sum() == tubes["system_id"].nunique() - (
        tubes.loc[~has_next, "removed_at_utc"].notna().sum()
    )


def test_exposures_belong_to_the_installed_tube(small_fleet):
    e = small_fleet.exposures
    tubes = small_fleet.tubes.set_index("tube_id")
    inst = tubes.loc[e["tube_id"].astype(str), "installed_at_utc"].to_numpy()
    rem = tubes.loc[e["tube_id"].astype(str), "removed_at_utc"].to_numpy()
    ts = e["timestamp_utc"].to_numpy().astype("datetime64[ms]")
    assert (ts >= inst.astype("datetime64[ms]")).all()
    rem = rem.astype("datetime64[ms]")
    assert ((ts < rem) | np.isnat(rem)).all()


def test_no_exposures_inside_hard_downtime(small_fleet):
    e = small_fleet.exposures
    dt = small_fleet.downtime[small_fleet.downtime["severity"] == "hard_down"]
    for r in dt.itertuples():
        m = (e["system_id"] == r.system_id) & (e["timestamp_utc"] > r.start_utc) & (e["timestamp_utc"] < r.end_utc)
        assert not m.any(), r


def test_natural_key_unique(small_fleet):
    e = small_fleet.exposures
    assert not e.duplicated(["system_id", "timestamp_utc"]).any()


def test_left_truncated_tubes_start_with_wear(small_fleet):
    t = small_fleet.truth
    first = t[t["left_truncated"]]
    assert len(first) == small_fleet.systems.shape[0]
    assert (first["diameter_loss_large_at_log_start"] > 0).all()
    assert (t.loc[~t["left_truncated"], "diameter_loss_large_at_log_start"] == 0).all()


def test_diameter_loss_never_decreases(small_fleet):
    td = small_fleet.truth_diameter.sort_values(["tube_id", "focal_spot", "day"])
    step = td.groupby(["tube_id", "focal_spot"])["diameter_loss"].diff().dropna()
    assert (step >= -1e-15).all()


def test_recalibration_steps_show_in_logged_current(small_fleet):
    steps = small_fleet.truth_steps
    big = steps[(steps["gain_after"] / steps["gain_before"] - 1).abs() > 0.02]
    if big.empty:
        pytest.skip("no large recalibration step in this seed")
    r = big.iloc[0]
    e = small_fleet.exposures
    m = (e["tube_id"] == r.tube_id) & (e["focal_spot"] == r.focal_spot)
    e = e[m]
    key = e.groupby(["tube_current_ma", "tube_voltage_kv"]).size().idxmax()
    one = e[(e["tube_current_ma"] == key[0]) & (e["tube_voltage_kv"] == key[1])]
    before = one[(one["timestamp_utc"] < r.timestamp_utc) & (one["timestamp_utc"] > r.timestamp_utc - pd.Timedelta(days=20))]
    after = one[(one["timestamp_utc"] > r.timestamp_utc) & (one["timestamp_utc"] < r.timestamp_utc + pd.Timedelta(days=20))]
    if len(before) < 5 or len(after) < 5:
        pytest.skip("too few exposures around the step")
    ratio = after["filament_current_a"].median() / before["filament_current_a"].median()
    assert ratio == pytest.approx(r.gain_after / r.gain_before, abs=0.006)
