"""Availability on hand-computed calendars; MTBF chi-square bounds."""

from __future__ import annotations

import math

import pandas as pd
import pytest

from tubetrack.errors import InputError
from tubetrack.fleet.uptime import mtbf_chi_square_bounds, uptime


def test_mtbf_chi_square_example():
    # Source: REFERENCES.md [C] (MIL-HDBK-338B time-terminated bounds): T = 10000 h, r = 4
    # -> MTBF 2500 h, 90 % two-sided [1092.5, 7318.9] h (printed to 0.1 h).
    m, lo, hi = mtbf_chi_square_bounds(10000.0, 4, 0.90)
    assert m == 2500.0
    assert lo == pytest.approx(1092.5, abs=0.05)
    assert hi == pytest.approx(7318.9, abs=0.05)


def test_mtbf_zero_failures_has_only_a_lower_bound():
    m, lo, hi = mtbf_chi_square_bounds(1000.0, 0, 0.90)
    assert math.isinf(m) and math.isinf(hi)
    # 2T / chi2(0.95, 2) = 2000 / 5.991465 (chi-square table, 2 d.o.f.)
    assert lo == pytest.approx(2000 / 5.991465, rel=1e-6)


def _systems(sched=168.0, target=99.0):
    return pd.DataFrame(
        {
            "system_id": ["A"],
            "site": ["s"],
            "scheduled_hours_per_week": [sched],
            "uptime_target_pct": [target],
        }
    )


def _down(rows):
    return pd.DataFrame(
        rows,
        columns=["system_id", "start_utc", "end_utc", "cause", "planned", "severity"],
    ).assign(
        start_utc=lambda d: pd.to_datetime(d["start_utc"]),
        end_utc=lambda d: pd.to_datetime(d["end_utc"]),
    )


def test_overlaps_are_merged_and_outages_split_at_month_end():
    # Hand calendar: March 2025 has 744 h, April 720 h (UTC).
    # Outage 1: 30 Mar 20:00 -> 1 Apr 04:00 = 28 h in March + 4 h in April (hard, generator)
    # Outage 2 overlaps it: 31 Mar 10:00 -> 31 Mar 14:00 (hard, tube) -> no extra time; those
    # 4 h are attributed to the tube.
    d = _down(
        [
            (
                "A",
                "2025-03-30 20:00",
                "2025-04-01 04:00",
                "generator",
                False,
                "hard_down",
            ),
            ("A", "2025-03-31 10:00", "2025-03-31 14:00", "tube", False, "hard_down"),
        ]
    )
    res = uptime(
        d, _systems(), start=pd.Timestamp("2025-03-01"), end=pd.Timestamp("2025-05-01")
    )
    p = res.periods.set_index("period")
    assert p.loc["2025-03", "calendar_h"] == 744
    assert p.loc["2025-04", "calendar_h"] == 720
    assert p.loc["2025-03", "corrective_down_h"] == pytest.approx(28.0)
    assert p.loc["2025-04", "corrective_down_h"] == pytest.approx(4.0)
    assert p.loc["2025-03", "tube_down_h"] == pytest.approx(4.0)
    assert p.loc["2025-03", "other_down_h"] == pytest.approx(24.0)
    assert p.loc["2025-03", "availability_pct"] == pytest.approx(100 * (1 - 28 / 744))
    assert p.loc["2025-04", "availability_pct"] == pytest.approx(100 * (1 - 4 / 720))
    # one merged episode of 32 h -> one failure
    s = res.summary.iloc[0]
    assert s["failures"] == 1
    assert s["mttr_h"] == pytest.approx(32.0)
    assert s["up_h"] == pytest.approx(744 + 720 - 32)
    assert s["mtbf_h"] == pytest.approx(744 + 720 - 32)


def test_dst_weekend_is_plain_utc_hours():
    # Europe switched to summer time on 2024-03-31 01:00 UTC: a local clock loses an hour, UTC
    # does not. Outage 2024-03-30 22:00 -> 2024-03-31 04:00 UTC is 6 h.
    d = _down(
        [("A", "2024-03-30 22:00", "2024-03-31 04:00", "detector", False, "hard_down")]
    )
    res = uptime(
        d, _systems(), start=pd.Timestamp("2024-03-01"), end=pd.Timestamp("2024-04-01")
    )
    p = res.periods.iloc[0]
    assert p["calendar_h"] == 31 * 24
    assert p["corrective_down_h"] == pytest.approx(6.0)


def test_partial_weight_preventive_and_external_are_classified():
    # 10 h partial (weight 0.5 -> 5 h), 8 h planned maintenance, 12 h external power cut,
    # 2 h hard-down fault inside the planned maintenance (hard corrective wins there).
    d = _down(
        [
            ("A", "2025-02-03 08:00", "2025-02-03 18:00", "software", False, "partial"),
            (
                "A",
                "2025-02-10 08:00",
                "2025-02-10 16:00",
                "preventive",
                True,
                "hard_down",
            ),
            (
                "A",
                "2025-02-10 09:00",
                "2025-02-10 11:00",
                "generator",
                False,
                "hard_down",
            ),
            (
                "A",
                "2025-02-15 00:00",
                "2025-02-15 12:00",
                "external",
                True,
                "hard_down",
            ),
        ]
    )
    res = uptime(
        d,
        _systems(sched=84.0),
        start=pd.Timestamp("2025-02-01"),
        end=pd.Timestamp("2025-03-01"),
        partial_weight=0.5,
    )
    p = res.periods.iloc[0]
    cal = 28 * 24
    assert p["partial_down_h"] == pytest.approx(10.0)
    assert p["hard_down_h"] == pytest.approx(2.0)
    assert p["corrective_down_h"] == pytest.approx(5.0 + 2.0)
    assert p["preventive_h"] == pytest.approx(6.0)
    assert p["external_h"] == pytest.approx(12.0)
    req_wall = cal - 6 - 12
    assert p["required_h"] == pytest.approx(84 / 168 * req_wall)
    assert p["availability_pct"] == pytest.approx(100 * (1 - 7 / req_wall))
    assert p["availability_incl_pm_pct"] == pytest.approx(100 * (1 - 13 / (cal - 12)))
    res1 = uptime(
        d,
        _systems(sched=84.0),
        start=pd.Timestamp("2025-02-01"),
        end=pd.Timestamp("2025-03-01"),
        partial_weight=1.0,
    )
    assert res1.periods.iloc[0]["corrective_down_h"] == pytest.approx(12.0)
    s = res.summary.iloc[0]
    assert s["failures"] == 2  # the partial episode and the hard fault
    assert s["up_h"] == pytest.approx(cal - 2 - 6 - 12)


def test_quarters_and_target_comparison():
    d = _down(
        [("A", "2025-01-10 00:00", "2025-01-12 00:00", "tube", False, "hard_down")]
    )
    res = uptime(
        d,
        _systems(target=99.0),
        start=pd.Timestamp("2025-01-01"),
        end=pd.Timestamp("2025-07-01"),
        period="quarter",
    )
    p = res.periods.set_index("period")
    q1 = (31 + 28 + 31) * 24
    assert p.loc["2025-Q1", "availability_pct"] == pytest.approx(100 * (1 - 48 / q1))
    assert p.loc["2025-Q1", "meets_target"] == (100 * (1 - 48 / q1) >= 99.0)
    assert p.loc["2025-Q2", "availability_pct"] == 100.0
    assert bool(p.loc["2025-Q2", "meets_target"]) is True


def test_bad_downtime_record_names_the_system():
    d = _down(
        [("A", "2025-01-12 00:00", "2025-01-10 00:00", "tube", False, "hard_down")]
    )
    with pytest.raises(InputError, match="downtime of system A starting 2025-01-12"):
        uptime(
            d,
            _systems(),
            start=pd.Timestamp("2025-01-01"),
            end=pd.Timestamp("2025-02-01"),
        )
