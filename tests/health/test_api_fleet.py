"""Fleet step: threshold learned from past filament failures, hidden future removals."""

from __future__ import annotations

import pandas as pd

from tubetrack.health import sql
from tubetrack.health.api import analyse_frames, tubes_as_of
from tubetrack.health.params import HealthParams


def test_threshold_learned_from_three_failures_and_used(mem_store, sim, load):
    parts, rows = [], []
    for i in range(4):
        tid = f"F{i}"
        e, _ = sim(40 + i, tube_id=tid, system_id=f"S{i}", n_days=300 + 20 * i, rate_at_400ma_per_s=3e-6)
        parts.append(e)
        rows.append({"tube_id": tid, "system_id": f"S{i}", "installed_at_utc": pd.Timestamp("2024-01-01"),
                     "removed_at_utc": pd.Timestamp("2024-01-01") + pd.Timedelta(days=300 + 20 * i),
                     "removal_reason": "filament"})
    e, _ = sim(50, tube_id="LIVE", system_id="S9", n_days=500, rate_at_400ma_per_s=3e-6)
    parts.append(e)
    rows.append({"tube_id": "LIVE", "system_id": "S9", "installed_at_utc": pd.Timestamp("2024-01-01"),
                 "removed_at_utc": pd.NaT, "removal_reason": None})
    load(mem_store, pd.concat(parts, ignore_index=True), pd.DataFrame(rows))
    daily = sql.load_daily(mem_store)
    tubes = sql.load_tubes(mem_store)
    cut = pd.Timestamp("2024-01-01") + pd.Timedelta(days=500)
    res = analyse_frames(daily, tubes, cut.to_pydatetime(), HealthParams(workers=1))
    assert res.threshold.source == "fleet" and res.threshold.n_failures == 4
    assert set(res.summary["tube_id"]) == {"LIVE"}
    assert res.summary["threshold_pct"].iloc[0] == 100 * res.threshold.mean
    assert res.summary["threshold_source"].iloc[0] == "fleet"
    # at an earlier date only two failures are known: the default threshold is used
    early = analyse_frames(daily, tubes, (pd.Timestamp("2024-01-01") + pd.Timedelta(days=330)).to_pydatetime(),
                           HealthParams(workers=1))
    assert early.threshold.source == "default" and early.threshold.n_failures == 2
    assert {"F2", "F3", "LIVE"} <= set(early.summary["tube_id"])  # not yet removed then


def test_tubes_as_of_hides_future():
    t = pd.DataFrame({"tube_id": ["A", "B"], "installed_at_utc": pd.to_datetime(["2024-01-01", "2025-01-01"]),
                      "removed_at_utc": pd.to_datetime(["2024-06-01", None]),
                      "removal_reason": ["filament", None]})
    k = tubes_as_of(t, pd.Timestamp("2024-05-01"))
    assert list(k["tube_id"]) == ["A"] and k["removal_reason"].isna().all()


def test_chunked_pool_analysis_equals_the_serial_whole_fleet(mem_store, sim, load, monkeypatch):
    # analyse_fleet in chunks of two tubes on a two-process pool (per-tube step and the fleet
    # step's forecasts both in the pool) against analyse_frames on the whole fleet in one process
    from tubetrack.health import api

    parts, rows = [], []
    for i in range(5):
        tid, sid = f"P{i}", f"S{i}"
        days = 260 + 25 * i
        parts.append(sim(60 + i, tube_id=tid, system_id=sid, n_days=days, rate_at_400ma_per_s=3e-6)[0])
        gone = i < 3
        rows.append({"tube_id": tid, "system_id": sid, "installed_at_utc": pd.Timestamp("2024-01-01"),
                     "removed_at_utc": pd.Timestamp("2024-01-01") + pd.Timedelta(days=days) if gone else pd.NaT,
                     "removal_reason": "filament" if gone else None})
    load(mem_store, pd.concat(parts, ignore_index=True), pd.DataFrame(rows))
    cut = pd.Timestamp("2024-01-01") + pd.Timedelta(days=370)
    serial = analyse_frames(sql.load_daily(mem_store), sql.load_tubes(mem_store), cut.to_pydatetime(),
                            HealthParams(workers=1), analysed_at=cut.to_pydatetime())
    monkeypatch.setattr(api, "CHUNK_TUBES", 2)
    seen = []
    pooled = api.analyse_fleet(mem_store, cut.to_pydatetime(), HealthParams(workers=2, serial_below=0),
                               progress=lambda done, total: seen.append((done, total)))
    assert seen == [(2, 5), (4, 5), (5, 5)]  # one call per chunk of two tubes
    assert set(serial.summary["tube_id"]) == {"P3", "P4"}
    for name, frame in serial.tables().items():
        other = pooled.tables()[name]
        if name == "result_health":
            frame, other = frame.drop(columns="analysed_at_utc"), other.drop(columns="analysed_at_utc")
        pd.testing.assert_frame_equal(other.reset_index(drop=True), frame.reset_index(drop=True),
                                      check_dtype=False, rtol=1e-9)


def test_no_filament_states_keep_the_configured_prior():
    # e.g. an as-of date soon after the first exposure: no filament has a fitted state yet
    from tubetrack.health.api import fleet_k_priors
    from tubetrack.health.params import HealthParams

    assert fleet_k_priors([], HealthParams()) == {}
