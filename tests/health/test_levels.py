"""Health levels: ordered, our own words, one-line reasons."""

from __future__ import annotations

import pandas as pd

from tubetrack.health.levels import FORECAST_SIGNALS, LEVELS, assign_levels


def _row(**kw):
    base = {"tube_id": "T", "focal_spot": "large", "diameter_loss_pct": 2.0, "diameter_loss_pct_se": 0.1,
            "rul_days_p10": 400.0, "rul_days_p50": 600.0, "rul_days_p90": 800.0,
            "p_end_of_life_30d": 0.0, "p_end_of_life_90d": 0.0, "p_end_of_life_180d": 0.0,
            "signature_level": 0, "signature_reasons": "", "signals_list": "", "unforeseeable": False,
            "current_drop_pct": 3.0, "current_drop_station_ma": 400.0, "history_days": 400.0}
    base.update(kw)
    return base


def test_levels_are_ordered_and_not_traffic_light_words():
    assert LEVELS == ("sound", "observe", "prepare", "imminent", "past limit")
    for word in ("red", "amber", "yellow", "green"):
        assert all(word not in lv for lv in LEVELS)


def test_rules_and_reasons():
    s = assign_levels(pd.DataFrame([
        _row(),
        _row(p_end_of_life_180d=0.1),
        _row(p_end_of_life_180d=0.4),
        _row(p_end_of_life_90d=0.6, p_end_of_life_180d=0.9),
        _row(rul_days_p50=0.0, rul_days_p10=0.0),
        _row(signature_level=2, signature_reasons="arc rate rising", signals_list="arc_rising",
             unforeseeable=True),
        _row(history_days=20.0),
        _row(diameter_loss_pct=5.2, rul_days_p50=40.0, rul_days_p10=10.0, p_end_of_life_90d=0.8),
        _row(logs_stopped=True, unlogged_days_at_end=45.0),
    ]), threshold=0.0513, min_history_days=90, max_rul_days=3650)
    assert list(s["health_rank"]) == [0, 1, 2, 3, 4, 2, 1, 4, 1]
    assert "no exposure logged in the 45 days before the analysis date" in s["reason"].iloc[8]
    assert "logs_stopped" in s["signals"].iloc[8] and "logs_stopped" not in s["signals"].iloc[0]
    # every signal the levels add is one the backtest knows is not a non-filament signature
    added = {x for v in s["signals"] for x in v.split(",") if x} - {"arc_rising"}
    assert added == set(FORECAST_SIGNALS)
    assert "past the fleet's expected end of life while the filament is still intact" in s["reason"].iloc[7]
    assert "50 % chance of end of life within 40 days" in s["reason"].iloc[7]
    assert list(s["health_level"]) == [LEVELS[i] for i in s["health_rank"]]
    r0 = s["reason"].iloc[0]
    assert r0.startswith("large focus: filament current at 400 mA down 3.0 %")
    assert "of an expected 5.1 %" in r0 and "50 % chance of end of life within 600 days" in r0
    assert "not foreseen by the filament signal" in s["reason"].iloc[5]
    assert "too little history (20 days" in s["reason"].iloc[6]
    assert "short_history" in s["signals"].iloc[6]
