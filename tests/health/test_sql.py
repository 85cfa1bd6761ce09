"""Aggregation SQL: one query gives per tube x focal spot x station x day statistics."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd

from tubetrack.health import sql


def _tubes():
    return pd.DataFrame({"tube_id": ["T1"], "system_id": ["S1"],
                         "installed_at_utc": [pd.Timestamp("2024-01-01")],
                         "removed_at_utc": [pd.NaT], "removal_reason": [None]})


def test_daily_statistics_match_pandas(mem_store, sim, load):
    exp, _ = sim(3, n_days=20)
    exp.loc[exp.index[::7], "tube_current_measured_ma"] *= 0.8  # regulation misses
    load(mem_store, exp, _tubes())
    daily = sql.load_daily(mem_store)
    # independent computation with pandas on the raw rows
    e = exp.assign(day=exp["timestamp_utc"].dt.normalize(),
                   miss=(abs(exp["tube_current_measured_ma"] - exp["tube_current_ma"])
                         > 0.1 * exp["tube_current_ma"]).astype(int))
    g = e.groupby(["focal_spot", "tube_current_ma", "day"])
    ref = pd.DataFrame({
        "n": g.size(),
        "med": g["filament_current_a"].median(),
        # pandas' default (linear) interpolation is SQL's percentile_cont
        "q1": g["filament_current_a"].quantile(0.25),
        "q3": g["filament_current_a"].quantile(0.75),
        "kv": g["tube_voltage_kv"].median(),
        "prep": g["prep_time_s"].sum(),
        "miss": g["miss"].sum(),
    }).reset_index()
    m = daily.assign(day=pd.to_datetime(daily["day"])).merge(ref, on=["focal_spot", "tube_current_ma", "day"])
    assert len(m) == len(ref) == len(daily)
    assert (m["n_exposures"] == m["n"]).all()
    np.testing.assert_allclose(m["filament_current_med_a"], m["med"], rtol=1e-12)
    np.testing.assert_allclose(m["filament_current_q1_a"], m["q1"], rtol=1e-12)
    np.testing.assert_allclose(m["filament_current_q3_a"], m["q3"], rtol=1e-12)
    assert (m["filament_current_q3_a"] > m["filament_current_q1_a"]).any()
    np.testing.assert_allclose(m["tube_voltage_med_kv"], m["kv"], rtol=1e-12)
    np.testing.assert_allclose(m["prep_time_sum_s"], m["prep"], rtol=1e-9)
    assert (m["n_ma_miss"] == m["miss"]).all() and m["n_ma_miss"].sum() > 0


def test_local_one_sort_form_equals_the_portable_query(mem_store, sim, load):
    # the local engine's quartiles in one quantile_cont list must give the portable query's
    # frame (the one Spark runs): same columns, same order, same values; groups without a
    # filament current (NULL quartiles) included
    exp, _ = sim(6, n_days=15)
    exp.loc[exp.index[::5], "filament_current_a"] = None
    exp.loc[exp.index[:40], "filament_current_a"] = None
    load(mem_store, exp, _tubes())
    params = [None, None, sql.MA_MISS_TOLERANCE]
    portable = mem_store.execute(sql.DAILY_SQL, params).df()
    local = mem_store.execute(sql.DAILY_SQL_LOCAL, params).df()
    assert sql.DAILY_SQL_LOCAL != sql.DAILY_SQL and "quantile_cont" in sql.DAILY_SQL_LOCAL
    assert portable["filament_current_q1_a"].isna().any()
    pd.testing.assert_frame_equal(local, portable, check_exact=False, rtol=1e-12)


def test_as_of_excludes_later_rows(mem_store, sim, load):
    exp, _ = sim(4, n_days=30)
    load(mem_store, exp, _tubes())
    cut = dt.datetime(2024, 1, 11)
    daily = sql.load_daily(mem_store, cut)
    assert pd.to_datetime(daily["day"]).max() < pd.Timestamp(cut)
    assert daily["n_exposures"].sum() == int((exp["timestamp_utc"] < cut).sum())
    # the span the analysis date is chosen from (the Spark engine runs the same text)
    first, last = mem_store.execute(sql.DATA_SPAN_SQL).fetchone()
    # the store keeps microseconds
    assert abs(pd.Timestamp(first) - exp["timestamp_utc"].min()) < pd.Timedelta(microseconds=1)
    assert abs(pd.Timestamp(last) - exp["timestamp_utc"].max()) < pd.Timedelta(microseconds=1)


def test_tubes_as_of_hides_later_removal(mem_store, sim, load):
    exp, _ = sim(5, n_days=10)
    t = _tubes().assign(removed_at_utc=pd.Timestamp("2024-06-01"), removal_reason="filament")
    load(mem_store, exp, t)
    before = sql.load_tubes(mem_store, dt.datetime(2024, 3, 1))
    after = sql.load_tubes(mem_store, dt.datetime(2024, 7, 1))
    assert before["removal_reason"].isna().all() and before["removed_at_utc"].isna().all()
    assert after["removal_reason"].iloc[0] == "filament"
    assert sql.load_tubes(mem_store, dt.datetime(2023, 12, 1)).empty


def test_chunks_equal_the_whole_fleet_with_unlogged_tube_ids(mem_store, sim, load):
    # four tubes on three systems; S2 had a tube swap and logs no tube ids at all, so its rows
    # are resolved by system and time. Every chunk split must give exactly the rows of the
    # v_exposures aggregation (the reference is the same SQL over the view, not the chunk code).
    parts = [sim(10, tube_id="A1", system_id="S1", n_days=40)[0],
             sim(11, tube_id="B1", system_id="S2", n_days=20)[0],
             sim(12, tube_id="B2", system_id="S2", start="2024-01-21", n_days=20)[0],
             sim(13, tube_id="C1", system_id="S3", n_days=40)[0]]
    exp = pd.concat(parts, ignore_index=True)
    exp.loc[exp["system_id"] == "S2", "tube_id"] = None
    tubes = pd.DataFrame({
        "tube_id": ["A1", "B1", "B2", "C1"], "system_id": ["S1", "S2", "S2", "S3"],
        "installed_at_utc": pd.to_datetime(["2024-01-01", "2024-01-01", "2024-01-21", "2024-01-01"]),
        "removed_at_utc": pd.to_datetime([None, "2024-01-21", None, None]),
        "removal_reason": [None, "filament", None, None]})
    load(mem_store, exp, tubes)
    whole = sql.load_daily(mem_store)
    assert set(whole["tube_id"]) == {"A1", "B1", "B2", "C1"}
    for cut in (None, dt.datetime(2024, 1, 30)):
        whole = sql.load_daily(mem_store, cut)
        for bounds in ([None, "B1", None], [None, "B2", "C1", None], [None, "A1", "B1", "B2", "C1", None]):
            chunks = pd.concat([sql.load_daily_tubes(mem_store, cut, lo, hi)
                                for lo, hi in zip(bounds[:-1], bounds[1:], strict=True)],
                               ignore_index=True)
            pd.testing.assert_frame_equal(chunks, whole)
