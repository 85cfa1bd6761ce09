"""Write the demo fleet as log files: our own open layout, the foreign layout, truth, README.

Tree::

    inventory/systems.csv, inventory/tubes.csv
    <site>/exposures-<SYSTEM_ID>.csv.gz      own layout, all years in one file per system
    <site>/calibrations-<SYSTEM_ID>.csv      filament table after each calibration
    <site>/events.csv, <site>/downtime.csv
    harrowgate/genlog_<SYSTEM_ID>_<YYYY>.csv.gz   foreign layout (harrowgate profile), one per local year
    dicom/                                   written by tubetrack.ingest.dicom_synth (if present)
    truth.csv, truth_diameter.csv.gz, truth_steps.csv   ground truth, never ingested
    README.md

Files are byte-for-byte reproducible: gzip members carry no time stamp or file name.
A few deliberately bad rows are inserted (see :data:`BAD_ROWS` and the README) so that the
ingest's rejects and duplicate handling can be seen.
"""

from __future__ import annotations

import gzip
import io
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from tubetrack.demo.generate import DemoFleet

EXPOSURE_COLUMNS = [
    "timestamp_utc", "system_id", "tube_id", "focal_spot", "tube_voltage_kv", "tube_current_ma",
    "tube_current_measured_ma", "exposure_time_s", "exposure_mas", "filament_current_a",
    "filament_voltage_v", "prep_time_s", "arc_count",
]
FOREIGN_HEADER = [
    "Datum", "Zeit", "Anlage", "Fokus", "kVp", "mA", "Belichtung_ms", "Heizstrom_mA",
    "Vorbereitung_ms", "Ueberschlaege",
]
DICOM_DAYS = 60


@dataclass(frozen=True)
class BadRow:
    """One deliberately broken row: where it goes and what is wrong with it."""

    kind: str  # exposures | foreign | calibrations | events | downtime
    system_or_site: str
    field: str
    value: str
    why: str
    duplicate: bool = False  # an exact copy of the previous row (a duplicate, not a reject)


#: The deliberately bad rows of the committed sample logs (default scenario).
BAD_ROWS: tuple[BadRow, ...] = (
    BadRow("exposures", "ALG-R01", "tube_voltage_kv", "12O", "kV typed with a letter O: not a number"),
    BadRow("exposures", "ALG-R02", "tube_current_ma", "-200", "negative tube current"),
    BadRow("exposures", "KBC-R01", "timestamp_utc", "1970-01-01T00:00:12Z",
           "generator clock reset to the epoch: before 1990"),
    BadRow("exposures", "TOC-R01", "filament_current_a", "5123",
           "filament current written in mA instead of A: outside the physical range"),
    BadRow("exposures", "ALG-F01", "focal_spot", "", "required focal spot missing"),
    BadRow("exposures", "KBC-R02", "", "", "exact copy of the previous row (counted as a duplicate)",
           duplicate=True),
    BadRow("foreign", "HVC-R01", "Zeit", "31.03.2024 02:30:00",
           "local time inside the spring DST gap (does not exist in Europe/Berlin)"),
    BadRow("foreign", "HVC-R02", "Fokus", "F9", "unknown focus code"),
    BadRow("calibrations", "ALG-R01", "filament_current_a", "", "filament current missing"),
    BadRow("downtime", "aldermere", "end_utc", "", "end before start"),
    BadRow("events", "tollbridge", "timestamp_utc", "not recorded", "timestamp is not a time"),
)


# --------------------------------------------------------------------------------------------
# formatting helpers
# --------------------------------------------------------------------------------------------


def _iso(ts: pd.Series, unit: str = "ms") -> np.ndarray:
    """Naive UTC datetimes -> ISO 8601 with a trailing Z; empty for NaT."""
    arr = pd.to_datetime(ts).to_numpy().astype(f"datetime64[{unit}]")
    out = np.char.add(np.datetime_as_string(arr, unit=unit), "Z").astype(object)
    out[pd.isna(ts).to_numpy()] = ""
    return out


def _num(values: Any) -> np.ndarray:
    """Numbers as short text: integers without '.0', NaN as empty."""
    v = np.asarray(values, dtype=float)
    out = np.empty(len(v), dtype=object)
    nan = np.isnan(v)
    is_int = ~nan & (v == np.round(v))
    out[is_int] = v[is_int].astype(np.int64).astype(str)
    rest = ~nan & ~is_int
    out[rest] = np.char.mod("%.10g", v[rest])
    out[nan] = ""
    return out


def _csv_bytes(frame: pd.DataFrame, sep: str = ",", bom: bool = False) -> bytes:
    buf = io.StringIO()
    frame.to_csv(buf, index=False, sep=sep, lineterminator="\n")
    text = buf.getvalue()
    return ("\ufeff" if bom else "").encode("utf-8") + text.encode("utf-8")


def _write(path: Path, data: bytes, written: list[Path]) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    if path.name.endswith(".gz"):
        raw = io.BytesIO()
        with gzip.GzipFile(filename="", mode="wb", fileobj=raw, compresslevel=9, mtime=0) as gz:
            gz.write(data)
        data = raw.getvalue()
    path.write_bytes(data)
    written.append(path)


def _insert_bad(frame: pd.DataFrame, bad: BadRow, rng: np.random.Generator, shift_col: str | None) -> tuple[pd.DataFrame, int]:
    """Insert a broken copy of a random row after it; return the new frame and its CSV line."""
    frame = frame.astype(object)
    pos = int(rng.integers(len(frame) // 4, max(len(frame) // 4 + 1, 3 * len(frame) // 4)))
    row = frame.iloc[[pos]].copy()
    if not bad.duplicate:
        if bad.field:
            row.iloc[0, frame.columns.get_loc(bad.field)] = bad.value
        if shift_col and shift_col != bad.field and pos + 1 < len(frame):
            # keep the natural key distinct: halfway between the copied row and the next one
            t0 = pd.Timestamp(str(frame.iloc[pos][shift_col]).rstrip("Z"))
            t1 = pd.Timestamp(str(frame.iloc[pos + 1][shift_col]).rstrip("Z"))
            mid = (t0 + (t1 - t0) / 2).floor("ms")
            row.iloc[0, frame.columns.get_loc(shift_col)] = (
                np.datetime_as_string(np.datetime64(mid.to_datetime64(), "ms"), unit="ms") + "Z"
            )
    out = pd.concat([frame.iloc[: pos + 1], row, frame.iloc[pos + 1 :]], ignore_index=True)
    return out, pos + 3  # header is line 1, data row k (0-based) is line k + 2


# --------------------------------------------------------------------------------------------
# per-table writers
# --------------------------------------------------------------------------------------------


def _own_exposures(e: pd.DataFrame, logs_tube: bool, logs_measured: bool) -> pd.DataFrame:
    """Own layout; a site that logs the measured tube current also logs mAs, the others leave
    ``exposure_mas`` empty (the ingest derives it from mA x s)."""
    n = len(e)
    return pd.DataFrame(
        {
            "timestamp_utc": _iso(e["timestamp_utc"]),
            "system_id": e["system_id"].astype(str).to_numpy(),
            "tube_id": e["tube_id"].astype(str).to_numpy() if logs_tube else np.full(n, ""),
            "focal_spot": e["focal_spot"].astype(str).to_numpy(),
            "tube_voltage_kv": _num(e["tube_voltage_kv"]),
            "tube_current_ma": _num(e["tube_current_ma"]),
            "tube_current_measured_ma": _num(e["tube_current_measured_ma"]) if logs_measured else np.full(n, ""),
            "exposure_time_s": _num(e["exposure_time_s"]),
            "exposure_mas": _num(e["exposure_mas"]) if logs_measured else np.full(n, ""),
            "filament_current_a": _num(e["filament_current_a"]),
            "filament_voltage_v": _num(e["filament_voltage_v"]),
            "prep_time_s": _num(e["prep_time_s"]),
            "arc_count": e["arc_count"].astype(int).astype(str).to_numpy(),
        }
    )


def foreign_exposures(e: pd.DataFrame, tz: str = "Europe/Berlin") -> pd.DataFrame:
    """Exposures in the harrowgate foreign layout (local day-first times, ms, mA, F1/F2).

    Local times come from the UTC times by the IANA rules of ``tz``; rows stay in time order,
    so the repeated autumn hour can be resolved by order on reading.
    """
    local = e["timestamp_utc"].dt.tz_localize("UTC").dt.tz_convert(tz)
    dec = np.vectorize(lambda s: s.replace(".", ","), otypes=[object])
    t_ms = np.round(e["exposure_time_s"].to_numpy(dtype=float) * 1000.0, 1)
    return pd.DataFrame(
        {
            "Datum": local.dt.strftime("%d.%m.%Y").to_numpy(),
            "Zeit": local.dt.strftime("%H:%M:%S").to_numpy(),
            "Anlage": e["system_id"].astype(str).to_numpy(),
            "Fokus": np.where(e["focal_spot"].astype(str).to_numpy() == "small", "F1", "F2"),
            "kVp": _num(e["tube_voltage_kv"]),
            "mA": dec(_num(e["tube_current_ma"])) if len(e) else [],
            "Belichtung_ms": dec(_num(t_ms)) if len(e) else [],
            "Heizstrom_mA": _num(np.round(e["filament_current_a"].to_numpy(dtype=float) * 1000.0)),
            "Vorbereitung_ms": _num(np.round(e["prep_time_s"].to_numpy(dtype=float) * 1000.0)),
            "Ueberschlaege": e["arc_count"].astype(int).astype(str).to_numpy(),
            "_year": local.dt.year.to_numpy(),
        }
    )


def _weekly(truth_diameter: pd.DataFrame) -> pd.DataFrame:
    """Weekly (every 7th day, plus each tube's last day) true diameter loss per filament."""
    td = truth_diameter.sort_values(["tube_id", "focal_spot", "day"], kind="stable")
    first = td.groupby(["tube_id", "focal_spot"])["day"].transform("min")
    last = td.groupby(["tube_id", "focal_spot"])["day"].transform("max")
    keep = (((td["day"] - first).dt.days % 7) == 0) | (td["day"] == last)
    out = td[keep].copy()
    out["day"] = out["day"].dt.strftime("%Y-%m-%d")
    out["diameter_loss"] = np.round(out["diameter_loss"].to_numpy(dtype=float), 6)
    return out


def write_sample_logs(
    fleet: DemoFleet,
    out_dir: str | Path,
    foreign_site: str = "harrowgate",
    formats: tuple[str, ...] = ("csv.gz",),
    *,
    bad_rows: bool = True,
    dicom: bool = True,
) -> list[Path]:
    """Write ``fleet`` as the sample-log tree under ``out_dir``.

    Parameters
    ----------
    fleet
        From :func:`tubetrack.demo.generate_fleet`.
    out_dir
        Target folder (created; files of the same names are overwritten).
    foreign_site
        Site slug whose exposures are written in the foreign layout (harrowgate profile).
    formats
        Exposure file formats of our own layout: any of ``"csv.gz"``, ``"csv"``, ``"parquet"``.
    bad_rows
        Insert the documented deliberately bad rows (:data:`BAD_ROWS`).
    dicom
        Call ``tubetrack.ingest.dicom_synth.write_dicom_workload`` for the DICOM-only site's
        last :data:`DICOM_DAYS` days, when that function exists.

    Returns
    -------
    list of Path
        Every file written.
    """
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(int(fleet.meta.get("seed", 0)) + 7)
    written: list[Path] = []
    gen = fleet.meta["systems_gen"].set_index("system_id")
    bad_lines: list[dict[str, Any]] = []
    bad_by = {(b.kind, b.system_or_site): b for b in BAD_ROWS} if bad_rows else {}

    # inventory ----------------------------------------------------------------------------
    systems = fleet.systems.copy()
    _write(out / "inventory" / "systems.csv", _csv_bytes(systems), written)
    tubes = fleet.tubes.copy()
    tubes["installed_at_utc"] = _iso(tubes["installed_at_utc"], "s")
    tubes["removed_at_utc"] = _iso(tubes["removed_at_utc"], "s")
    tubes["price"] = _num(tubes["price"])
    _write(out / "inventory" / "tubes.csv", _csv_bytes(tubes), written)

    exp = fleet.exposures
    by_sys = {str(k): g for k, g in exp.groupby("system_id", observed=True, sort=True)}
    for site, sys_frame in fleet.systems.groupby("site", sort=True):
        site = str(site)
        site_dir = out / site
        sys_ids = sys_frame["system_id"].tolist()
        exports = bool(gen.loc[sys_ids[0], "gen_site_exports_logs"])
        foreign = site == foreign_site
        if exports:
            for sid in sys_ids:
                e = by_sys.get(sid)
                if e is None or e.empty:
                    continue
                if foreign:
                    fx = foreign_exposures(e, fleet.meta.get("timezone", "Europe/Berlin"))
                    for year, part in fx.groupby("_year", sort=True):
                        part = part.drop(columns="_year").reset_index(drop=True)
                        name = f"genlog_{sid}_{int(year)}.csv.gz"
                        b = bad_by.get(("foreign", sid))
                        if b is not None and (
                            (b.field == "Zeit" and int(year) == 2024) or (b.field == "Fokus" and int(year) == 2023)
                        ):
                            part, line = _insert_foreign_bad(part, b, rng)
                            bad_lines.append({"file": f"{site}/{name}", "line": line, "bad": b})
                        _write(site_dir / name, _csv_bytes(part, sep=";", bom=True), written)
                    continue
                own = _own_exposures(e, bool(gen.loc[sid, "gen_logs_tube_id"]), bool(gen.loc[sid, "gen_logs_measured_ma"]))
                b = bad_by.get(("exposures", sid))
                if b is not None:
                    own, line = _insert_bad(own, b, rng, "timestamp_utc")
                    bad_lines.append({"file": f"{site}/exposures-{sid}.csv.gz", "line": line, "bad": b})
                for fmt in formats:
                    if fmt == "csv.gz":
                        _write(site_dir / f"exposures-{sid}.csv.gz", _csv_bytes(own), written)
                    elif fmt == "csv":
                        _write(site_dir / f"exposures-{sid}.csv", _csv_bytes(own), written)
                    elif fmt == "parquet":
                        p = site_dir / f"exposures-{sid}.parquet"
                        p.parent.mkdir(parents=True, exist_ok=True)
                        e[EXPOSURE_COLUMNS].assign(
                            system_id=e["system_id"].astype(str), tube_id=e["tube_id"].astype(str),
                            focal_spot=e["focal_spot"].astype(str),
                        ).to_parquet(p, index=False)
                        written.append(p)
            # calibrations (the generator exports them): per system
            cal = fleet.calibrations
            for sid in sys_ids:
                c = cal[cal["system_id"] == sid]
                if c.empty:
                    continue
                c = c.assign(
                    timestamp_utc=_iso(c["timestamp_utc"], "s"),
                    tube_voltage_kv=_num(c["tube_voltage_kv"]),
                    tube_current_ma=_num(c["tube_current_ma"]),
                    filament_current_a=_num(c["filament_current_a"]),
                ).reset_index(drop=True)
                b = bad_by.get(("calibrations", sid))
                if b is not None:
                    c, line = _insert_bad(c, b, rng, None)
                    bad_lines.append({"file": f"{site}/calibrations-{sid}.csv", "line": line, "bad": b})
                _write(site_dir / f"calibrations-{sid}.csv", _csv_bytes(c), written)
            ev = fleet.events[fleet.events["system_id"].isin(sys_ids)]
            ev = ev.assign(timestamp_utc=_iso(ev["timestamp_utc"])).reset_index(drop=True)
            b = bad_by.get(("events", site))
            if b is not None and len(ev):
                ev, line = _insert_bad(ev, b, rng, None)
                bad_lines.append({"file": f"{site}/events.csv", "line": line, "bad": b})
            _write(site_dir / "events.csv", _csv_bytes(ev), written)
        # downtime comes from the group's maintenance records: every site has it
        dt = fleet.downtime[fleet.downtime["system_id"].isin(sys_ids)]
        dt = dt.assign(
            start_utc=_iso(dt["start_utc"], "s"),
            end_utc=_iso(dt["end_utc"], "s"),
            planned=np.where(dt["planned"].to_numpy(), "true", "false"),
        ).reset_index(drop=True)
        b = bad_by.get(("downtime", site))
        if b is not None and len(dt):
            dt = dt.astype(object)
            pos = len(dt) // 2
            row = dt.iloc[[pos]].copy()
            row.iloc[0, dt.columns.get_loc("end_utc")], row.iloc[0, dt.columns.get_loc("start_utc")] = (
                row.iloc[0]["start_utc"], row.iloc[0]["end_utc"]
            )
            row.iloc[0, dt.columns.get_loc("note")] = "entered with start and end swapped"
            dt = pd.concat([dt.iloc[: pos + 1], row, dt.iloc[pos + 1 :]], ignore_index=True)
            bad_lines.append({"file": f"{site}/downtime.csv", "line": pos + 3, "bad": b})
        _write(site_dir / "downtime.csv", _csv_bytes(dt), written)

    # DICOM-only site ------------------------------------------------------------------------
    dicom_note = _write_dicom(fleet, out, gen, written) if dicom else "not requested"

    # truth ------------------------------------------------------------------------------------
    truth = fleet.truth.copy()
    truth["installed_at_utc"] = _iso(truth["installed_at_utc"], "s")
    truth["removed_at_utc"] = _iso(truth["removed_at_utc"], "s")
    for col in truth.columns:
        if truth[col].dtype.kind == "f":
            truth[col] = np.round(truth[col].to_numpy(dtype=float), 6)
    _write(out / "truth.csv", _csv_bytes(truth), written)
    _write(out / "truth_diameter.csv.gz", _csv_bytes(_weekly(fleet.truth_diameter)), written)
    steps = fleet.truth_steps.assign(timestamp_utc=_iso(fleet.truth_steps["timestamp_utc"], "s"))
    steps["gain_before"] = np.round(steps["gain_before"].to_numpy(dtype=float), 5)
    steps["gain_after"] = np.round(steps["gain_after"].to_numpy(dtype=float), 5)
    _write(out / "truth_steps.csv", _csv_bytes(steps), written)

    from tubetrack.demo.readme import readme_text

    _write(out / "README.md", readme_text(fleet, bad_lines, dicom_note, foreign_site).encode("utf-8"), written)
    return written


def _insert_foreign_bad(part: pd.DataFrame, b: BadRow, rng: np.random.Generator) -> tuple[pd.DataFrame, int]:
    part = part.astype(object)
    if b.field == "Zeit":
        # right after the last row of 31.03.2024 before 02:00, or at the end of that day
        day = part.index[part["Datum"] == "31.03.2024"]
        pos = int(day[0]) if len(day) else len(part) // 2
        row = part.iloc[[pos]].copy()
        d, t = b.value.split(" ")
        row.iloc[0, part.columns.get_loc("Datum")] = d
        row.iloc[0, part.columns.get_loc("Zeit")] = t
        # keep time order: insert before the first row of that day at or after 03:00
        later = part.index[(part["Datum"] == "31.03.2024") & (part["Zeit"] >= "03:00:00")]
        pos = int(later[0]) - 1 if len(later) else pos
    else:
        pos = int(rng.integers(len(part) // 4, 3 * len(part) // 4))
        row = part.iloc[[pos]].copy()
        row.iloc[0, part.columns.get_loc(b.field)] = b.value
        # a distinct time so the natural key differs from the copied row (same day, in order)
        for p2 in range(pos, len(part) - 1):
            t0 = pd.to_datetime(part.iloc[p2]["Datum"] + " " + part.iloc[p2]["Zeit"], dayfirst=True)
            t1 = pd.to_datetime(part.iloc[p2 + 1]["Datum"] + " " + part.iloc[p2 + 1]["Zeit"], dayfirst=True)
            if t0.date() == t1.date() and (t1 - t0).total_seconds() >= 4 and 4 <= t0.hour <= 20:
                pos = p2
                row = part.iloc[[pos]].copy()
                row.iloc[0, part.columns.get_loc(b.field)] = b.value
                row.iloc[0, part.columns.get_loc("Zeit")] = (t0 + (t1 - t0) / 2).floor("s").strftime("%H:%M:%S")
                break
    out = pd.concat([part.iloc[: pos + 1], row, part.iloc[pos + 1 :]], ignore_index=True)
    return out, pos + 3


def _write_dicom(fleet: DemoFleet, out: Path, gen: pd.DataFrame, written: list[Path]) -> str:
    """DICOM workload of the sites that export no generator logs."""
    dicom_sites = sorted({str(s) for s, ok in zip(gen["site"], gen["gen_site_exports_logs"], strict=True) if not ok})
    if not dicom_sites:
        return "no DICOM-only site in this fleet"
    try:
        from tubetrack.ingest.dicom_synth import write_dicom_workload  # type: ignore[import-not-found]
    except ImportError:
        return (
            "tubetrack.ingest.dicom_synth.write_dicom_workload is not available in this build; "
            "no DICOM files were written"
        )
    sys_ids = fleet.systems.loc[fleet.systems["site"].isin(dicom_sites), "system_id"]
    e = fleet.exposures[fleet.exposures["system_id"].isin(sys_ids)]
    if e.empty:
        return "no exposures"
    since = e["timestamp_utc"].max() - pd.Timedelta(days=DICOM_DAYS)
    e = e[e["timestamp_utc"] > since].copy()
    e["system_id"] = e["system_id"].astype(str)
    e["tube_id"] = e["tube_id"].astype(str)
    e["focal_spot"] = e["focal_spot"].astype(str)
    paths = write_dicom_workload(
        e.reset_index(drop=True),
        fleet.systems[fleet.systems["system_id"].isin(sys_ids)].reset_index(drop=True),
        out / "dicom",
        int(fleet.meta.get("seed", 0)),
    )
    paths = [Path(p) for p in (paths or [])] or sorted(p for p in (out / "dicom").rglob("*") if p.is_file())
    written.extend(paths)
    return f"{len(e)} exposures of {', '.join(dicom_sites)} ({DICOM_DAYS} days) in {len(paths)} files"
