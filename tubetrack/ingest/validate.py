"""Physical plausibility ranges and the SQL that checks every cell.

:data:`RANGES` is THE table of valid ranges (also printed in ``docs/log-layout.md``; a test keeps
the two in step). Values are in canonical units, after a profile's unit conversion. A value
outside its range is rejected with the reason; when the value divided by 1000 (or times 1000) would
fit, the reason says which unit mix-up it looks like and how to fix the profile.

The ranges are wide on purpose: they catch broken cells, not unusual technique.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime

from tubetrack.ingest.layout import Kind


@dataclass(frozen=True)
class Range:
    """Valid closed interval of one canonical column."""

    low: float
    high: float
    unit: str
    note: str


#: Valid ranges per canonical column [canonical unit]. # common practice (diagnostic X-ray
#: generators: IEC 60601-2-54 scope covers radiography and fluoroscopy up to 150 kV; we allow 160).
RANGES: dict[str, Range] = {
    "tube_voltage_kv": Range(
        20.0, 160.0, "kV", "diagnostic radiography and fluoroscopy"
    ),
    "tube_current_ma": Range(
        0.1, 2000.0, "mA", "set mA station; fluoroscopy from 0.1 mA"
    ),
    "tube_current_measured_ma": Range(
        0.0, 2000.0, "mA", "0 allowed: an aborted exposure"
    ),
    "exposure_time_s": Range(0.0005, 30.0, "s", "single radiographic exposure"),
    "exposure_mas": Range(
        0.00005, 60000.0, "mAs", "0.1 mA x 0.5 ms up to 2000 mA x 30 s"
    ),
    "filament_current_a": Range(1.0, 12.0, "A", "tungsten filament heating current"),
    "filament_voltage_v": Range(1.0, 20.0, "V", "filament heating voltage"),
    # common practice: the prep (boost + anode run-up) lasts as long as the operator holds the
    # first button stage, until the generator's hold time-out of some tens of seconds
    "prep_time_s": Range(
        0.0, 30.0, "s", "filament boost and anode run-up; held prep times out"
    ),
    "arc_count": Range(0.0, 1000.0, "count", "arcs logged during one exposure"),
    "criticality_weight": Range(0.0, 100.0, "", "relative weight, 1 = typical"),
    "uptime_target_pct": Range(0.0, 100.0, "%", "contracted availability"),
    "scheduled_hours_per_week": Range(0.0, 168.0, "h", "a week has 168 h"),
    "price": Range(0.0, 1e9, "", "purchase price"),
}

#: Fluoroscopy runs are logged as one row per run: a system whose modality in the store is
#: ``fluoroscopy`` may log runs up to this long [s]. # common practice (a fluoroscopy timer
#: sounds after 5 min of beam-on time; 10 min covers a long run)
FLUORO_MAX_EXPOSURE_TIME_S = 600.0

#: Unit mix-ups detected from magnitude: column -> (factor, what it looks like, profile unit,
#: smallest plausible value after the fix). A value outside its range whose value / factor lies
#: between that smallest plausible value and the range's high end gets this reason.
MIXUPS: dict[str, tuple[float, str, str, float]] = {
    "filament_current_a": (1000.0, "mA given as A", "mA", 1.0),
    "filament_voltage_v": (1000.0, "mV given as V", "mV", 1.0),
    "tube_voltage_kv": (1000.0, "V given as kV", "V", 20.0),
    "tube_current_ma": (0.001, "A given as mA", "A", 0.5),
    "exposure_time_s": (1000.0, "ms given as s", "ms", 0.0005),
    "prep_time_s": (1000.0, "ms given as s", "ms", 0.05),
    "exposure_mas": (1000.0, "uAs given as mAs", "uAs", 0.05),
}

#: Earliest plausible timestamp (digital generator logs do not predate this).
MIN_TIMESTAMP_UTC = datetime(1990, 1, 1)
#: Clock slack allowed beyond the time of ingest before a timestamp counts as in the future [h].
FUTURE_SLACK_H = 1.0


def _num(x: float) -> str:
    """SQL literal for a number from the tables above (never user data)."""
    return repr(float(x))


def _fmt(x: float) -> str:
    return f"{x:g}"


def range_reason_sql(kind: Kind, name: str, value: str, raw: str) -> str | None:
    """SQL CASE expression giving the range/finite reason for ``value`` (NULL when fine).

    ``value`` and ``raw`` are SQL expressions (the converted value and the raw cell text).
    """
    rng = RANGES.get(name)
    finite = (
        f"WHEN isnan({value}) OR isinf({value}) THEN "
        f"'not finite: {name} is ' || {raw} || '; give a finite number or leave it empty'"
    )
    if rng is None:
        return f"CASE {finite} ELSE NULL END"
    high = _num(rng.high)
    high_txt = f"'{_fmt(rng.high)}'"
    if name == "exposure_time_s" and kind.name == "exposures":
        # fluoroscopy systems may log long runs (column _fluoro set by the reader from systems)
        fl = FLUORO_MAX_EXPOSURE_TIME_S
        high = f"(CASE WHEN _fluoro THEN {_num(fl)} ELSE {high} END)"
        high_txt = (
            f"(CASE WHEN _fluoro THEN '{_fmt(fl)} (fluoroscopy)' ELSE {high_txt} END)"
        )
    unit = f" {rng.unit}" if rng.unit and rng.unit != "count" else ""
    parts = [finite]
    mix = MIXUPS.get(name)
    if mix is not None:
        factor, looks, unit_name, plausible = mix
        scaled = f"({value} / {_num(factor)})"
        parts.append(
            f"WHEN ({value} < {_num(rng.low)} OR {value} > {high}) AND {scaled} >= {_num(plausible)} "
            f"AND {scaled} <= {high} THEN 'unit mix-up: {name} is ' || {raw} || "
            f"' (= ' || CAST({value} AS VARCHAR) || '{unit}), which looks like {looks}; set the "
            f"profile''s unit (units.{name} = \"{unit_name}\")'"
        )
    parts.append(
        f"WHEN {value} < {_num(rng.low)} OR {value} > {high} THEN 'out of range: {name} is ' || "
        f"{raw} || ' (= ' || CAST({value} AS VARCHAR) || '{unit}), outside {_fmt(rng.low)}-' || "
        f"{high_txt} || '{unit}; fix the row or check the unit'"
    )
    return "CASE " + " ".join(parts) + " ELSE NULL END"


def time_reason_sql(name: str, value: str, raw: str, now_utc: datetime) -> str:
    """SQL CASE giving the timestamp sanity reason (before 1990, in the future)."""
    limit = now_utc.replace(microsecond=0)
    return (
        f"CASE WHEN {value} < TIMESTAMP '{MIN_TIMESTAMP_UTC:%Y-%m-%d %H:%M:%S}' THEN "
        f"'too early: {name} is ' || {raw} || ', before {MIN_TIMESTAMP_UTC:%Y-%m-%d}; "
        f"check the generator clock' "
        f"WHEN {value} > TIMESTAMP '{limit:%Y-%m-%d %H:%M:%S}' + INTERVAL {int(FUTURE_SLACK_H * 3600)} "
        f"SECOND THEN 'in the future: {name} is ' || {raw} || ' (UTC ' || "
        f"strftime({value}, '%Y-%m-%d %H:%M:%S') || '), later than now; check the generator clock "
        f"or the profile''s time zone' ELSE NULL END"
    )
