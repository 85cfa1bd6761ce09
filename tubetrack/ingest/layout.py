"""The open log layout of tubetrack: table kinds, their columns, types and natural keys.

This module is the machine-readable form of ``docs/log-layout.md``. Each :class:`Kind` lists the
canonical columns a file of that kind may carry (the column names ARE the store's column names),
which are required, and the natural key that keeps overlapping exports from double-counting.
"""

from __future__ import annotations

from dataclasses import dataclass

#: Field types the reader understands.
#: timestamp: ISO 8601 in UTC (or a profile's formats and time zone); number: decimal;
#: integer: whole number; text: free text; id: identifier (trimmed); enum: one of ``choices``;
#: bool: true/false.
FIELD_TYPES = ("timestamp", "number", "integer", "text", "id", "enum", "bool")

#: Unit families: canonical unit first, then every unit a profile may declare, with the factor
#: that converts a value in that unit to the canonical unit.
UNIT_FAMILIES: dict[str, dict[str, float]] = {
    "mA": {"mA": 1.0, "A": 1000.0, "uA": 0.001, "µA": 0.001},
    "A": {"A": 1.0, "mA": 0.001},
    "kV": {"kV": 1.0, "V": 0.001},
    "V": {"V": 1.0, "mV": 0.001, "kV": 1000.0},
    "s": {"s": 1.0, "ms": 0.001, "us": 1e-6, "µs": 1e-6, "min": 60.0, "h": 3600.0},
    "mAs": {"mAs": 1.0, "uAs": 0.001, "µAs": 0.001, "As": 1000.0},
    "%": {"%": 1.0, "fraction": 100.0},
    "h": {"h": 1.0, "min": 1.0 / 60.0},
}


@dataclass(frozen=True)
class Field:
    """One canonical column of a table kind."""

    name: str
    type: str
    required: bool = False
    unit: str | None = None  # key of UNIT_FAMILIES (canonical unit), None = unitless
    choices: tuple[str, ...] = ()
    doc: str = ""


@dataclass(frozen=True)
class Kind:
    """A table kind: which store table, its fields, natural key and how it is written."""

    name: str
    table: str
    fields: tuple[Field, ...]
    key: tuple[str, ...]
    upsert: bool = False  # inventory: update rows by key instead of skipping duplicates
    one_of: tuple[
        tuple[str, ...], ...
    ] = ()  # at least one of these columns must be present
    has_line: bool = True  # store table has source_line
    time_column: str | None = "timestamp_utc"  # column used to prune the dedupe scan

    def field(self, name: str) -> Field:
        for f in self.fields:
            if f.name == name:
                return f
        raise KeyError(name)

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(f.name for f in self.fields)

    @property
    def required(self) -> tuple[str, ...]:
        return tuple(f.name for f in self.fields if f.required)


FOCAL_SPOTS = ("small", "large")
EVENT_CATEGORIES = (
    "arc",
    "kv_dropout",
    "filament_fault",
    "ma_out_of_tolerance",
    "overload",
    "rotor_fault",
    "other",
)
DOWNTIME_CAUSES = (
    "tube",
    "generator",
    "detector",
    "mechanical",
    "software",
    "external",
    "preventive",
    "other",
)
SEVERITIES = ("hard_down", "partial")
MODALITIES = (
    "radiographic",
    "mobile",
    "fluoroscopy",
    "mammography",
    "ct",
    "dental",
    "other",
)
GENERATOR_TYPES = (
    "single_phase",
    "three_phase_6p",
    "three_phase_12p",
    "high_frequency",
)
REMOVAL_REASONS = (
    "filament",
    "arcing",
    "bearing",
    "anode",
    "vacuum",
    "housing",
    "other",
    "upgrade",
)

_TS = "timestamp"

KINDS: dict[str, Kind] = {
    "exposures": Kind(
        "exposures",
        "exposures",
        (
            Field("timestamp_utc", _TS, True, doc="start of the exposure"),
            Field("system_id", "id", True, doc="system that made the exposure"),
            Field(
                "tube_id",
                "id",
                doc="tube serial; empty = attributed from the tubes table",
            ),
            Field("focal_spot", "enum", True, choices=FOCAL_SPOTS),
            Field("tube_voltage_kv", "number", True, "kV", doc="set peak tube voltage"),
            Field(
                "tube_current_ma",
                "number",
                True,
                "mA",
                doc="set tube current (mA station)",
            ),
            Field(
                "tube_current_measured_ma",
                "number",
                False,
                "mA",
                doc="measured tube current",
            ),
            Field("exposure_time_s", "number", False, "s", doc="exposure time"),
            Field("exposure_mas", "number", False, "mAs", doc="current-time product"),
            Field(
                "filament_current_a",
                "number",
                False,
                "A",
                doc="filament heating current",
            ),
            Field("filament_voltage_v", "number", False, "V", doc="filament voltage"),
            Field(
                "prep_time_s", "number", False, "s", doc="filament boost (prep) time"
            ),
            Field("arc_count", "integer", False, doc="arcs during the exposure"),
        ),
        key=("system_id", "timestamp_utc"),
        one_of=(("exposure_time_s", "exposure_mas"),),
    ),
    "calibrations": Kind(
        "calibrations",
        "calibrations",
        (
            Field("timestamp_utc", _TS, True, doc="time of the calibration"),
            Field("system_id", "id", True),
            Field("tube_id", "id"),
            Field("focal_spot", "enum", True, choices=FOCAL_SPOTS),
            Field("tube_voltage_kv", "number", True, "kV"),
            Field("tube_current_ma", "number", True, "mA", doc="mA station"),
            Field(
                "filament_current_a",
                "number",
                True,
                "A",
                doc="filament current in the table",
            ),
        ),
        key=(
            "system_id",
            "timestamp_utc",
            "focal_spot",
            "tube_voltage_kv",
            "tube_current_ma",
        ),
    ),
    "events": Kind(
        "events",
        "events",
        (
            Field("timestamp_utc", _TS, True),
            Field("system_id", "id", True),
            Field("tube_id", "id"),
            Field("category", "enum", True, choices=EVENT_CATEGORIES),
            Field("raw_code", "text", doc="the generator's own code"),
            Field("raw_text", "text", doc="the generator's own message"),
        ),
        key=("system_id", "timestamp_utc", "category", "raw_code"),
    ),
    "downtime": Kind(
        "downtime",
        "downtime",
        (
            Field("system_id", "id", True),
            Field("start_utc", _TS, True),
            Field("end_utc", _TS, True),
            Field("cause", "enum", True, choices=DOWNTIME_CAUSES),
            Field("planned", "bool", doc="true for planned work; empty = false"),
            Field("severity", "enum", choices=SEVERITIES, doc="empty = hard_down"),
            Field("note", "text"),
        ),
        key=("system_id", "start_utc"),
        time_column="start_utc",
    ),
    "systems": Kind(
        "systems",
        "systems",
        (
            Field("system_id", "id", True),
            Field("site", "text"),
            Field("modality", "enum", choices=MODALITIES),
            Field("generator_type", "enum", choices=GENERATOR_TYPES),
            Field(
                "criticality_weight",
                "number",
                doc="relative clinical impact, 1 = typical",
            ),
            Field(
                "uptime_target_pct", "number", unit="%", doc="contracted availability"
            ),
            Field("scheduled_hours_per_week", "number", unit="h"),
            Field("model_label", "text"),
        ),
        key=("system_id",),
        upsert=True,
        has_line=False,
        time_column=None,
    ),
    "tubes": Kind(
        "tubes",
        "tubes",
        (
            Field("tube_id", "id", True, doc="serial number"),
            Field("system_id", "id", True),
            Field("model_label", "text"),
            Field("installed_at_utc", _TS, True),
            Field("removed_at_utc", _TS, doc="empty = in service"),
            Field("removal_reason", "enum", choices=REMOVAL_REASONS),
            Field("price", "number", doc="purchase price in price_currency"),
            Field("price_currency", "id"),
        ),
        key=("tube_id",),
        upsert=True,
        has_line=False,
        time_column=None,
    ),
}

#: File-name prefixes that decide a file's kind (checked in this order).
KIND_PREFIXES = tuple(KINDS)

#: Files the walker never reads (ground truth of the demo, documentation).
SKIP_NAME_PREFIXES = ("truth", "readme", "license", ".", "dicom-devices")
LOG_SUFFIXES = (
    ".csv",
    ".tsv",
    ".txt",
    ".log",
    ".dat",
    ".jsonl",
    ".ndjson",
    ".json",
    ".parquet",
)


def kind_from_name(name: str) -> str | None:
    """Kind from a file-name prefix (``exposures-R01.csv.gz`` -> ``exposures``), else None."""
    low = name.lower()
    for k in KIND_PREFIXES:
        if low.startswith(k):
            return k
    return None


def kind_from_header(columns: list[str]) -> str | None:
    """The kind whose required columns are all present, preferring the most columns matched."""
    cols = {c.strip().lower() for c in columns}
    best: tuple[int, str] | None = None
    for k in KINDS.values():
        if not set(k.required) <= cols:
            continue
        if k.one_of and not all(set(g) & cols for g in k.one_of):
            continue
        score = len(set(k.names) & cols)
        if best is None or score > best[0]:
            best = (score, k.name)
    return best[1] if best else None
