"""DICOM workload reader: X-ray image headers and radiation dose SRs -> canonical ``exposures``.

Every modern X-ray system writes DICOM even where its generator exports no service log. The
headers of DX, CR, RF, XA, MG and CT images and the irradiation events of X-Ray Radiation Dose SRs
(RDSR) carry kVp, tube current, exposure time, mAs, focal spot, device serial number and station
name: enough for a workload clock per tube (exposures, mAs, hot time), not for filament drift
(``filament_current_a`` stays NULL for these rows).

Flow
----
1. Each file is read once (sha256 of its bytes; a file already ingested with the same bytes is a
   reported no-op) with pydicom, headers only (``stop_before_pixels``, ``specific_tags``). A
   DICOMDIR is followed to the files it references. Patient attributes are never requested, so
   they never reach Python objects we keep, let alone the store.
2. Values go into column lists; units are converted vectorised (pandas). Rows that lack kVp, tube
   current, a time, or an exposure time/mAs go to ``rejects`` with the DICOM keyword and reason.
3. Devices are mapped to systems through ``dicom_devices`` (device serial first, then station
   name). A device no mapping names gets a placeholder system ``dicom:<station name or serial>``
   and a ``dicom_devices`` row with ``mapped = false`` (listed by ``tubetrack status``).
4. One SQL transaction per batch of files: duplicates are removed in SQL (see :data:`DEDUPE_RULE`)
   and the new rows are inserted in one statement.

Deduplication (:data:`DEDUPE_RULE`)
-----------------------------------
- same ``dicom_uid`` (SOP Instance UID of an image, Irradiation Event UID of an RDSR event), in the
  batch or in the store: one exposure;
- same natural key (system_id, timestamp_utc): one exposure (as for logs);
- an image and an exposure of the same system within :data:`MATCH_WINDOW_S` whose kV differ by at
  most :data:`MATCH_KV_TOL` and whose mA differ by at most max(:data:`MATCH_MA_ABS`,
  :data:`MATCH_MA_REL` x mA): one exposure. The RDSR event is preferred (an image row already
  stored is replaced by the RDSR event describing it); a generator-log row is preferred over both
  (it carries the filament current).
- CT image slices of one acquisition (same SeriesInstanceUID and AcquisitionNumber) are one
  exposure whose ``dicom_uid`` is derived from those two UIDs (``2.25.<uuid5>``).

References
----------
NEMA, DICOM PS3.3: C.7.5.1 General Equipment module (StationName, DeviceSerialNumber,
ManufacturerModelName), C.8.7.2 X-Ray Acquisition Dose module, C.8.7.7 X-Ray Tube Current module
(XRayTubeCurrent, XRayTubeCurrentInuA), C.8.7.8 / C.8.11.7 exposure attributes (ExposureTime,
ExposureTimeInuS, Exposure, ExposureInuAs), C.12.5 Timezone Offset From UTC.
NEMA, DICOM PS3.16: TID 10001 / 10003 (projection irradiation events), TID 10011 / 10013 (CT
irradiation events); concept codes as in ``pydicom.sr.codedict``.
"""

from __future__ import annotations

import hashlib
import io
import uuid
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any

from tubetrack.errors import InputError, NotFoundError
from tubetrack.store import utcnow

if TYPE_CHECKING:  # pragma: no cover
    import duckdb
    import pandas as pd

KIND = "dicom"

#: Modalities whose image headers we read (X-ray producing).
XRAY_MODALITIES = frozenset({"DX", "CR", "RF", "XA", "MG", "CT"})
#: X-Ray Radiation Dose SR and Enhanced X-Ray Radiation Dose SR Storage (DICOM PS3.4 B.5).
RDSR_SOP_CLASSES = frozenset(
    {"1.2.840.10008.5.1.4.1.1.88.67", "1.2.840.10008.5.1.4.1.1.88.76"}
)
#: Media Storage Directory Storage (DICOMDIR).
DICOMDIR_SOP_CLASS = "1.2.840.10008.1.3.10"

#: Our system modality for each DICOM modality (for placeholder systems of unmapped devices).
SYSTEM_MODALITY = {
    "DX": "radiographic",
    "CR": "radiographic",
    "RF": "fluoroscopy",
    "XA": "fluoroscopy",
    "MG": "mammography",
    "CT": "ct",
}

#: Largest nominal focal spot size still called "small", per DICOM modality [mm].
#: # common practice: dual-focus radiographic and fluoroscopic tubes are typically 0.6/1.2 mm
#: (sometimes 0.3-0.6 / 1.0-1.3 mm), mammography 0.1/0.3 mm, CT roughly 0.5-0.8 / 0.9-1.6 mm.
FOCAL_SPOT_SMALL_MAX_MM = {"MG": 0.15, "CT": 0.8}
FOCAL_SPOT_SMALL_MAX_MM_DEFAULT = 0.6
#: Focal spot stored when the object does not record one (counted in the file report).
FOCAL_SPOT_ASSUMED = "large"

#: Plausibility limits of diagnostic X-ray exposure factors (# common practice: diagnostic
#: generators reach 150 kV and about 1,000-1,300 mA; values beyond these are unit or coding errors).
MAX_PLAUSIBLE_KV = 200.0  # [kV]
MAX_PLAUSIBLE_MA = 2000.0  # [mA]

#: Image-vs-event match tolerances (our rule: DICOM times are the instants the equipment
#: stamped; an image's acquisition time and the RDSR's DateTime Started may differ by detector
#: read-out; displayed kV and mA are set values).
MATCH_WINDOW_S = 1.0  # [s]
MATCH_KV_TOL = 0.5  # [kV]
MATCH_MA_ABS = 0.5  # [mA]
MATCH_MA_REL = 0.01  # [fraction of mA]

DEDUPE_RULE = (
    "same dicom_uid; or same (system_id, timestamp_utc); or an image within "
    f"{MATCH_WINDOW_S:g} s of an exposure of the same system with kV within {MATCH_KV_TOL:g} kV and "
    f"mA within max({MATCH_MA_ABS:g} mA, {MATCH_MA_REL:.0%}): one exposure; preference "
    "log > RDSR event > image"
)

#: Attributes read from every object (nothing else is parsed; patient module never requested).
_TAGS = [
    "SpecificCharacterSet",
    "SOPClassUID",
    "SOPInstanceUID",
    "Modality",
    "Manufacturer",
    "ManufacturerModelName",
    "DeviceSerialNumber",
    "StationName",
    "AcquisitionDateTime",
    "AcquisitionDate",
    "AcquisitionTime",
    "ContentDate",
    "ContentTime",
    "TimezoneOffsetFromUTC",
    "KVP",
    "XRayTubeCurrent",
    "XRayTubeCurrentInuA",
    "ExposureTime",
    "ExposureTimeInuS",
    "Exposure",
    "ExposureInuAs",
    "FocalSpots",
    "NumberOfFrames",
    "SeriesInstanceUID",
    "AcquisitionNumber",
    "ContentSequence",
    "DirectoryRecordSequence",
]

# RDSR concept codes (DCM), PS3.16 / pydicom.sr.codedict.
_EVENT_CONTAINERS = {"113706": "projection", "113819": "ct"}
_CODE_DT_STARTED = "111526"
_CODE_EVENT_UID = "113769"
_NUM_CODES = {
    "113733": "kv",  # KVP
    "113734": "ma",  # X-Ray Tube Current (mean for CT)
    "113824": "t",  # Exposure Time
    "113736": "mas",  # Exposure
    "113766": "fs",  # Focal Spot Size
    "113793": "pulse_width",  # Pulse Width
    "113768": "n_pulses",  # Number of Pulses
}
#: UCUM unit -> factor to the canonical unit of each quantity.
_UNIT_FACTORS = {
    "kv": {"kV": 1.0, "V": 1e-3},
    "ma": {"mA": 1.0, "uA": 1e-3, "A": 1e3},
    "t": {"s": 1.0, "ms": 1e-3, "us": 1e-6, "min": 60.0},
    "pulse_width": {"s": 1.0, "ms": 1e-3, "us": 1e-6},
    "mas": {"mA.s": 1.0, "mAs": 1.0, "uA.s": 1e-3, "A.s": 1e3},
    "fs": {"mm": 1.0, "cm": 10.0, "um": 1e-3},
    "n_pulses": {"1": 1.0, "{pulses}": 1.0, "{pulse}": 1.0},
}
_PLACEHOLDER_PREFIX = "dicom:"
_NS = uuid.UUID(
    "6f1c2d0e-6b8e-4c55-9a43-2f4f1f6d7a10"
)  # our namespace for derived CT UIDs

ProgressArg = Any  # callable(done, total) or an object with file_started(path, size)

_COLUMNS = (
    "file_idx",
    "source_line",
    "source_kind",
    "dicom_uid",
    "modality",
    "device_serial",
    "station_name",
    "model_label",
    "dt_text",
    "tz_text",
    "kv_text",
    "kv_f",
    "ma_text",
    "ma_f",
    "t_text",
    "t_f",
    "mas_text",
    "mas_f",
    "fs_text",
    "fs_f",
    "pw_text",
    "pw_f",
    "np_text",
    "ct_group",
    "kv_field",
    "ma_field",
    "t_field",
    "mas_field",
    "unit_field",
    "unit_raw",
    "unit_reason",
)


@dataclass
class _Batch:
    """Column lists of one batch of files (one list per column, one entry per candidate row)."""

    cols: dict[str, list[Any]] = field(
        default_factory=lambda: {c: [] for c in _COLUMNS}
    )

    def add(self, **values: Any) -> None:
        for c in _COLUMNS:
            self.cols[c].append(values.get(c))

    def __len__(self) -> int:
        return len(self.cols["file_idx"])


@dataclass
class _FileState:
    """Per-file bookkeeping while a batch is read."""

    path: Path
    shown: str
    sha256: str = ""
    status: str = "ingested"
    message: str = ""
    rows_read: int = 0
    rows_accepted: int = 0
    rows_rejected: int = 0
    rows_duplicate: int = 0
    focal_assumed: int = 0
    started: datetime = field(default_factory=utcnow)
    file_rejects: list[tuple[int | None, str | None, str | None, str]] = field(
        default_factory=list
    )
    extra: dict[str, Any] = field(default_factory=dict)

    def report(self, file_id: int | None) -> dict[str, Any]:
        out = {
            "path": self.shown,
            "kind": KIND,
            "profile": None,
            "status": self.status,
            "rows_read": self.rows_read,
            "rows_accepted": self.rows_accepted,
            "rows_rejected": self.rows_rejected,
            "rows_duplicate": self.rows_duplicate,
            "message": self.message,
            "sha256": self.sha256,
            "file_id": file_id,
        }
        out.update(self.extra)
        if self.focal_assumed:
            out["focal_spot_assumed"] = self.focal_assumed
        return out


# ---------------------------------------------------------------------------------------------
# Reading one object
# ---------------------------------------------------------------------------------------------


def _text(value: Any) -> str | None:
    """A DICOM element value as text (first value of a multi-valued one), None when empty."""
    if value is None:
        return None
    if isinstance(value, str):
        return value.strip() or None
    if (
        hasattr(value, "__len__")
        and hasattr(value, "__getitem__")
        and not hasattr(value, "keys")
    ):
        if (
            len(value) == 0
        ):  # a multi-valued element (MultiValue, list): its first value
            return None
        value = value[0]
    text = str(value).strip()
    return text or None


def _dt_text(ds: Any) -> str | None:
    """Acquisition date-time as DICOM DT text: AcquisitionDateTime, else Acquisition or Content
    Date + Time."""
    dt = _text(ds.get("AcquisitionDateTime"))
    if dt:
        return dt
    for d_kw, t_kw in (
        ("AcquisitionDate", "AcquisitionTime"),
        ("ContentDate", "ContentTime"),
    ):
        d, t = _text(ds.get(d_kw)), _text(ds.get(t_kw))
        if d and t:
            return d + t.replace(":", "")
    return None


# Tags of the SR content tree, read by number (much faster than keyword look-ups).
_T_CONTENT_SEQ = 0x0040A730
_T_VALUE_TYPE = 0x0040A040
_T_CONCEPT = 0x0040A043
_T_CODE_VALUE = 0x00080100
_T_DATETIME = 0x0040A120
_T_UID = 0x0040A124
_T_MEASURED = 0x0040A300
_T_UNITS = 0x004008EA
_T_NUMERIC = 0x0040A30A


def _v(item: Any, tag: int) -> Any:
    """Value of element ``tag`` in ``item`` (None when absent)."""
    el = item.get(tag)
    return None if el is None else el.value


def _code_value(item: Any) -> str | None:
    seq = _v(item, _T_CONCEPT)
    if not seq:
        return None
    return _text(_v(seq[0], _T_CODE_VALUE))


def _walk_event(item: Any, found: dict[str, Any]) -> None:
    """Collect the first value of each concept we want under one irradiation-event container."""
    for child in _v(item, _T_CONTENT_SEQ) or []:
        vt = _text(_v(child, _T_VALUE_TYPE))
        if vt == "CONTAINER":
            _walk_event(child, found)
            continue
        code = _code_value(child)
        if code is None or code in found:
            continue
        if code == _CODE_DT_STARTED and vt == "DATETIME":
            found[code] = _text(_v(child, _T_DATETIME))
        elif code == _CODE_EVENT_UID and vt == "UIDREF":
            found[code] = _text(_v(child, _T_UID))
        elif code in _NUM_CODES and vt == "NUM":
            mv = _v(child, _T_MEASURED)
            if not mv:
                continue
            unit_seq = _v(mv[0], _T_UNITS)
            unit = _text(_v(unit_seq[0], _T_CODE_VALUE)) if unit_seq else None
            found[code] = (_text(_v(mv[0], _T_NUMERIC)), unit)


def _find_events(items: Iterable[Any], out: list[tuple[str, Any]]) -> None:
    for item in items:
        if _text(_v(item, _T_VALUE_TYPE)) != "CONTAINER":
            continue
        kind = _EVENT_CONTAINERS.get(_code_value(item) or "")
        if kind:
            out.append((kind, item))
        else:
            _find_events(_v(item, _T_CONTENT_SEQ) or [], out)


def _num(
    found: dict[str, Any], code: str, qty: str, bad_units: list[tuple[str, str, str]]
) -> tuple[str | None, float | None]:
    """(text, factor) of a NUM item; an unknown unit is noted in ``bad_units`` (the row is
    then rejected with that item's name when it is a required quantity)."""
    val = found.get(code)
    if not val or val[0] is None:
        return None, None
    text, unit = val
    factor = _UNIT_FACTORS[qty].get(unit or "")
    if factor is None:
        bad_units.append(
            (
                _NUM_NAMES[code],
                f"{text} {unit}",
                f"unit {unit!r} not understood; expected one of {sorted(_UNIT_FACTORS[qty])}",
            )
        )
        return None, None
    return text, factor


_NUM_NAMES = {
    "113733": "KVP",
    "113734": "X-Ray Tube Current",
    "113824": "Exposure Time",
    "113736": "Exposure",
    "113766": "Focal Spot Size",
    "113793": "Pulse Width",
    "113768": "Number of Pulses",
}


def _identity(ds: Any) -> dict[str, Any]:
    return {
        "device_serial": _text(ds.get("DeviceSerialNumber")),
        "station_name": _text(ds.get("StationName")),
        "model_label": _text(ds.get("ManufacturerModelName")),
        "tz_text": _text(ds.get("TimezoneOffsetFromUTC")),
    }


def _read_rdsr(ds: Any, idx: int, fs: _FileState, batch: _Batch) -> None:
    events: list[tuple[str, Any]] = []
    _find_events(ds.get("ContentSequence") or [], events)
    ident = _identity(ds)
    fs.rows_read += len(events)
    if not events:
        fs.message = "X-ray dose report without irradiation events; nothing to read"
    for n, (kind, item) in enumerate(events, start=1):
        found: dict[str, Any] = {}
        _walk_event(item, found)
        bad: list[tuple[str, str, str]] = []
        ignored: list[
            tuple[str, str, str]
        ] = []  # optional items with a unit we do not know
        kv = _num(found, "113733", "kv", bad)
        ma = _num(found, "113734", "ma", bad)
        t = _num(found, "113824", "t", bad)
        mas = _num(found, "113736", "mas", bad)
        fsz = _num(found, "113766", "fs", ignored)
        pw = _num(found, "113793", "pulse_width", ignored)
        npl = _num(found, "113768", "n_pulses", ignored)
        batch.add(
            file_idx=idx,
            source_line=n,
            source_kind="rdsr",
            dicom_uid=found.get(_CODE_EVENT_UID),
            modality="CT" if kind == "ct" else None,
            dt_text=found.get(_CODE_DT_STARTED),
            kv_text=kv[0],
            kv_f=kv[1],
            ma_text=ma[0],
            ma_f=ma[1],
            t_text=t[0],
            t_f=t[1],
            mas_text=mas[0],
            mas_f=mas[1],
            fs_text=fsz[0],
            fs_f=fsz[1],
            pw_text=pw[0],
            pw_f=pw[1],
            np_text=npl[0],
            unit_field=bad[0][0] if bad else None,
            unit_raw=bad[0][1] if bad else None,
            unit_reason=bad[0][2] if bad else None,
            kv_field="KVP",
            ma_field="X-Ray Tube Current",
            t_field="Exposure Time",
            mas_field="Exposure",
            **ident,
        )


def _read_image(
    ds: Any, idx: int, fs: _FileState, batch: _Batch, modality: str
) -> None:
    fs.rows_read += 1
    ma_ua = _text(ds.get("XRayTubeCurrentInuA"))
    t_us = _text(ds.get("ExposureTimeInuS"))
    mas_uas = _text(ds.get("ExposureInuAs"))
    ct_group = None
    if modality == "CT":
        series = _text(ds.get("SeriesInstanceUID"))
        if series:
            ct_group = f"{series}|{_text(ds.get('AcquisitionNumber')) or ''}"
    frames = _text(ds.get("NumberOfFrames"))
    if frames and frames not in ("1", "0"):
        fs.extra["frames"] = int(float(frames))
    batch.add(
        file_idx=idx,
        source_line=None,
        source_kind="dicom",
        dicom_uid=_text(ds.get("SOPInstanceUID")),
        modality=modality,
        dt_text=_dt_text(ds),
        kv_text=_text(ds.get("KVP")),
        kv_f=1.0,
        ma_text=ma_ua or _text(ds.get("XRayTubeCurrent")),
        ma_f=1e-3 if ma_ua else 1.0,
        t_text=t_us or _text(ds.get("ExposureTime")),
        t_f=1e-6 if t_us else 1e-3,
        mas_text=mas_uas or _text(ds.get("Exposure")),
        mas_f=1e-3 if mas_uas else 1.0,
        fs_text=_text(ds.get("FocalSpots")),
        fs_f=1.0,
        ct_group=ct_group,
        kv_field="KVP",
        ma_field="XRayTubeCurrentInuA" if ma_ua else "XRayTubeCurrent",
        t_field="ExposureTimeInuS" if t_us else "ExposureTime",
        mas_field="ExposureInuAs" if mas_uas else "Exposure",
        **_identity(ds),
    )


def _dcmread(data: bytes, force: bool) -> Any:
    import warnings

    import pydicom

    with (
        warnings.catch_warnings()
    ):  # malformed input is reported per file, not as warnings
        warnings.simplefilter("ignore")
        return pydicom.dcmread(
            io.BytesIO(data), stop_before_pixels=True, specific_tags=_TAGS, force=force
        )


def _safe_reason(exc: BaseException) -> str:
    """Reason text for an unreadable file that never echoes element values."""
    from pydicom.errors import InvalidDicomError

    if isinstance(exc, InvalidDicomError):
        return "not a DICOM Part 10 file (no DICM preamble/meta information)"
    return f"not a readable DICOM file ({type(exc).__name__}); the header is corrupt or truncated"


# ---------------------------------------------------------------------------------------------
# Vectorised conversion and validation
# ---------------------------------------------------------------------------------------------


def _parse_dt(
    dt: pd.Series, tz: pd.Series, default_tz: str | None
) -> tuple[pd.Series, pd.Series]:
    """DICOM DT text (+ optional TimezoneOffsetFromUTC) -> naive UTC timestamps; also a flag
    telling which rows had no offset at all."""
    import pandas as pd

    parts = dt.astype("string").str.extract(
        r"^(?P<d>\d{8})(?P<H>\d{2})?(?P<M>\d{2})?(?P<S>\d{2})?(?:\.(?P<F>\d{1,6}))?\s*(?P<z>[+-]\d{4})?\s*$"
    )
    frac = parts["F"].fillna("").str.ljust(6, "0")
    stamp = (
        parts["d"]
        + parts["H"].fillna("00")
        + parts["M"].fillna("00")
        + parts["S"].fillna("00")
        + "."
        + frac.where(frac != "", "000000")
    )
    local = pd.to_datetime(stamp, format="%Y%m%d%H%M%S.%f", errors="coerce")
    off_text = parts["z"].fillna(tz.astype("string").str.strip().where(tz.notna()))
    ok = off_text.str.fullmatch(r"[+-]\d{4}").fillna(False).astype(bool)
    sign = off_text.str[0].map({"+": 1, "-": -1})
    minutes = (
        pd.to_numeric(off_text.str[1:3], errors="coerce") * 60
        + pd.to_numeric(off_text.str[3:5], errors="coerce")
    ) * sign
    minutes = minutes.where(ok)
    no_offset = minutes.isna()
    utc = local - pd.to_timedelta(minutes.fillna(0), unit="min")
    if default_tz and bool(no_offset.any()):
        conv = (
            local[no_offset]
            .dt.tz_localize(default_tz, ambiguous="NaT", nonexistent="NaT")
            .dt.tz_convert("UTC")
            .dt.tz_localize(None)
        )
        utc = utc.where(~no_offset, conv)
    return utc, no_offset


def _focal_spot(size_mm: pd.Series, modality: pd.Series) -> pd.Series:
    """Nominal focal spot size [mm] -> small | large (rule: :data:`FOCAL_SPOT_SMALL_MAX_MM`)."""
    import numpy as np

    limit = (
        modality.map(FOCAL_SPOT_SMALL_MAX_MM)
        .astype(float)
        .fillna(FOCAL_SPOT_SMALL_MAX_MM_DEFAULT)
    )
    import pandas as pd

    out = np.where(
        size_mm.isna(), None, np.where(size_mm <= limit + 1e-9, "small", "large")
    )
    return pd.Series(out, index=size_mm.index, dtype="object")


def _canonical(
    batch: _Batch, default_tz: str | None
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Column lists -> (candidate rows in canonical units, rejects). Vectorised."""
    import numpy as np
    import pandas as pd

    df = pd.DataFrame(batch.cols)
    df["row_id"] = np.arange(len(df))

    def num(col: str, fcol: str) -> pd.Series:
        return pd.to_numeric(df[col], errors="coerce") * pd.to_numeric(
            df[fcol], errors="coerce"
        )

    kv = num("kv_text", "kv_f")
    ma = num("ma_text", "ma_f")
    t = num("t_text", "t_f")
    mas = num("mas_text", "mas_f")
    fs_mm = num("fs_text", "fs_f")
    pw = num("pw_text", "pw_f")
    npulses = pd.to_numeric(df["np_text"], errors="coerce")
    # Exposure time from pulses when not reported directly (fluoroscopy, TID 10003).
    t = t.where(t.notna(), pw * npulses)
    ts, no_offset = _parse_dt(df["dt_text"], df["tz_text"], default_tz)

    # Derive the missing one of mA, time, mAs (mAs = mA x s).
    t = t.where(t.notna() | ~(mas.notna() & ma.notna() & (ma > 0)), mas / ma)
    ma = ma.where(ma.notna() | ~(mas.notna() & t.notna() & (t > 0)), mas / t)
    mas = mas.where(mas.notna(), ma * t)

    rej_parts = []

    def reject(
        mask: pd.Series,
        field_col: str | None,
        field_name: str | None,
        raw_col: str | None,
        reason: str,
    ) -> pd.Series:
        if bool(mask.any()):
            r = df.loc[mask, ["file_idx", "source_line"]].copy()
            r["field"] = df.loc[mask, field_col] if field_col else field_name
            r["raw_value"] = df.loc[mask, raw_col] if raw_col else None
            r["reason"] = reason
            rej_parts.append(r)
        return mask

    bad = pd.Series(False, index=df.index)
    has_unit_problem = df["unit_reason"].notna()
    if bool(has_unit_problem.any()):
        r = df.loc[has_unit_problem, ["file_idx", "source_line"]].copy()
        r["field"] = df.loc[has_unit_problem, "unit_field"]
        r["raw_value"] = df.loc[has_unit_problem, "unit_raw"]
        r["reason"] = df.loc[has_unit_problem, "unit_reason"]
        rej_parts.append(r)
        bad |= has_unit_problem
    bad |= reject(
        df["dt_text"].isna(),
        None,
        "AcquisitionDateTime",
        None,
        "no acquisition time (AcquisitionDateTime, AcquisitionDate/Time or ContentDate/Time; RDSR: DateTime Started)",
    )
    bad |= reject(
        ~bad & df["dt_text"].notna() & ts.isna(),
        None,
        "AcquisitionDateTime",
        "dt_text",
        "acquisition time is not a valid DICOM date-time (or falls in a daylight-saving gap)",
    )
    bad |= reject(
        ~bad & (kv.isna() | (kv <= 0) | (kv > MAX_PLAUSIBLE_KV)),
        "kv_field",
        None,
        "kv_text",
        f"kVp missing, not a number, not positive or above {MAX_PLAUSIBLE_KV:g} kV",
    )
    bad |= reject(
        ~bad & (ma.isna() | (ma <= 0) | (ma > MAX_PLAUSIBLE_MA)),
        "ma_field",
        None,
        "ma_text",
        "tube current missing (and not derivable from mAs / time), not positive or above "
        f"{MAX_PLAUSIBLE_MA:g} mA",
    )
    bad |= reject(
        ~bad & (t.isna() | (t <= 0)) & (mas.isna() | (mas <= 0)),
        "t_field",
        None,
        "t_text",
        "neither exposure time nor mAs present and positive",
    )
    rejects = (
        pd.concat(rej_parts, ignore_index=True)
        if rej_parts
        else pd.DataFrame(
            columns=["file_idx", "source_line", "field", "raw_value", "reason"]
        )
    )

    focal = _focal_spot(fs_mm, df["modality"].astype("object"))
    assumed = focal.isna()
    focal = focal.where(~assumed, FOCAL_SPOT_ASSUMED)
    out = pd.DataFrame(
        {
            "row_id": df["row_id"],
            "file_idx": df["file_idx"].astype("int64"),
            "source_line": pd.to_numeric(df["source_line"], errors="coerce").astype(
                "float64"
            ),
            "source_kind": df["source_kind"],
            "dicom_uid": df["dicom_uid"],
            "modality": df["modality"],
            "device_serial": df["device_serial"],
            "station_name": df["station_name"],
            "model_label": df["model_label"],
            "ct_group": df["ct_group"],
            "timestamp_utc": ts,
            "no_offset": no_offset,
            "focal_spot": focal,
            "focal_assumed": assumed,
            "tube_voltage_kv": kv,
            "tube_current_ma": ma,
            "exposure_time_s": t,
            "exposure_mas": mas,
        }
    )[~bad.to_numpy()].reset_index(drop=True)
    # CT image slices of one acquisition: one exposure, a UID derived from series + acquisition.
    grp = out["ct_group"].notna()
    if bool(grp.any()):
        derived = out.loc[grp, "ct_group"].map(
            lambda g: "2.25." + str(uuid.uuid5(_NS, str(g)).int)
        )
        out.loc[grp, "dicom_uid"] = derived
        first_ts = out.loc[grp].groupby("dicom_uid")["timestamp_utc"].transform("min")
        out.loc[grp, "timestamp_utc"] = first_ts
    # An object without a UID still needs a key: derive one from its file and event number.
    miss = out["dicom_uid"].isna()
    if bool(miss.any()):
        out.loc[miss, "dicom_uid"] = None
    return out, rejects


# ---------------------------------------------------------------------------------------------
# Device mapping
# ---------------------------------------------------------------------------------------------


def _placeholder_id(serial: str | None, station: str | None) -> str:
    return _PLACEHOLDER_PREFIX + (station or serial or "unknown-device")


def _resolve_devices(con: duckdb.DuckDBPyConnection, rows: pd.DataFrame) -> pd.Series:
    """system_id for each row; unknown devices get a placeholder system (mapped = false)."""
    import pandas as pd

    keys = rows[["device_serial", "station_name", "model_label", "modality"]].copy()
    devs = keys.drop_duplicates(["device_serial", "station_name"])
    known = con.execute(
        "SELECT device_serial, station_name, system_id, mapped FROM dicom_devices ORDER BY mapped DESC"
    ).fetchall()
    by_serial: dict[str, str] = {}
    by_station: dict[str, str] = {}
    for serial, station, sys_id, _mapped in known:
        if serial and serial not in by_serial:
            by_serial[serial] = sys_id
        if station and not serial and station not in by_station:
            by_station[station] = sys_id
    by_station_any: dict[str, str] = {}
    for _serial, station, sys_id, _mapped in known:
        if station and station not in by_station_any:
            by_station_any[station] = sys_id
    resolved: dict[tuple[Any, Any], str] = {}
    for d in devs.itertuples(index=False):  # loop over distinct devices (few), not rows
        serial, station = d.device_serial, d.station_name
        sys_id = None
        if serial:
            sys_id = by_serial.get(serial)
        if sys_id is None and station:
            sys_id = by_station.get(station) or (
                None if serial else by_station_any.get(station)
            )
        if sys_id is None:
            sys_id = _placeholder_id(serial, station)
            same_serial = (
                rows["device_serial"].isna()
                if serial is None
                else rows["device_serial"] == serial
            )
            same_station = (
                rows["station_name"].isna()
                if station is None
                else rows["station_name"] == station
            )
            modality = rows.loc[same_serial & same_station, "modality"].dropna()
            con.execute(
                "INSERT INTO systems (system_id, site, modality, model_label, source_file) "
                "SELECT ?, NULL, ?, ?, 'dicom' WHERE NOT EXISTS (SELECT 1 FROM systems WHERE system_id = ?)",
                [
                    sys_id,
                    SYSTEM_MODALITY.get(modality.iloc[0]) if len(modality) else None,
                    d.model_label,
                    sys_id,
                ],
            )
            con.execute(
                "INSERT INTO dicom_devices (device_serial, station_name, system_id, mapped) VALUES (?, ?, ?, FALSE)",
                [serial, station, sys_id],
            )
            if serial:
                by_serial[serial] = sys_id
            elif station:
                by_station[station] = sys_id
        resolved[(serial, station)] = sys_id
    return pd.Series(
        [
            resolved[(s, st)]
            for s, st in zip(rows["device_serial"], rows["station_name"], strict=True)
        ],
        index=rows.index,
        dtype="object",
    )


def map_device(
    con: duckdb.DuckDBPyConnection,
    system_id: str,
    *,
    device_serial: str | None = None,
    station_name: str | None = None,
) -> dict[str, int]:
    """Map a DICOM device (serial number and/or station name) to one of our systems.

    Exposures already stored under the device's placeholder system ``dicom:<...>`` move to
    ``system_id``; the placeholder system disappears when nothing else uses it. DICOM rows that
    then duplicate a row of the target system (same time, or an image within the match rule)
    are removed. Returns counts ``{"moved": n, "removed_duplicates": m}``.

    Raises
    ------
    InputError
        Neither a serial number nor a station name was given, or ``system_id`` is empty.
    NotFoundError
        ``system_id`` is not in the store's systems table.
    """
    serial = (device_serial or "").strip() or None
    station = (station_name or "").strip() or None
    system_id = (system_id or "").strip()
    if not system_id:
        raise InputError(
            "map-device: the system id is empty. Give the system id from systems.csv."
        )
    if serial is None and station is None:
        raise InputError(
            f"map-device {system_id}: give the device serial number (DeviceSerialNumber) or the "
            "station name (StationName) of the device to map."
        )
    known = con.execute(
        "SELECT count(*) FROM systems WHERE system_id = ?", [system_id]
    ).fetchone()
    if not known or not known[0]:
        raise NotFoundError(
            f"map-device: system {system_id!r} is not in the store. Ingest the inventory "
            "(systems.csv) first, or check the spelling of the system id."
        )
    from tubetrack.store import transaction

    with transaction(con):
        if serial is not None:
            old = con.execute(
                "SELECT DISTINCT system_id FROM dicom_devices WHERE device_serial = ? AND system_id <> ?",
                [serial, system_id],
            ).fetchall()
        else:
            old = con.execute(
                "SELECT DISTINCT system_id FROM dicom_devices WHERE station_name = ? AND system_id <> ? "
                "AND NOT mapped",
                [station, system_id],
            ).fetchall()
        placeholders = [r[0] for r in old if str(r[0]).startswith(_PLACEHOLDER_PREFIX)]
        if serial is not None:
            con.execute("DELETE FROM dicom_devices WHERE device_serial = ?", [serial])
        else:
            con.execute(
                "DELETE FROM dicom_devices WHERE station_name = ? AND (device_serial IS NULL OR NOT mapped)",
                [station],
            )
        con.execute(
            "INSERT INTO dicom_devices (device_serial, station_name, system_id, mapped) VALUES (?, ?, ?, TRUE)",
            [serial, station, system_id],
        )
        moved = 0
        removed = 0
        for ph in placeholders:  # one or two placeholder systems per device
            removed += _drop_duplicates_on_move(con, ph, system_id)
            n = con.execute(
                "UPDATE exposures SET system_id = ? WHERE system_id = ? RETURNING 1",
                [system_id, ph],
            ).fetchall()
            moved += len(n)
            still = con.execute(
                "SELECT (SELECT count(*) FROM dicom_devices WHERE system_id = ?) + "
                "(SELECT count(*) FROM exposures WHERE system_id = ?) + "
                "(SELECT count(*) FROM tubes WHERE system_id = ?)",
                [ph, ph, ph],
            ).fetchone()
            if still and still[0] == 0:
                con.execute("DELETE FROM systems WHERE system_id = ?", [ph])
    return {"moved": moved, "removed_duplicates": removed}


def _drop_duplicates_on_move(
    con: duckdb.DuckDBPyConnection, source: str, target: str
) -> int:
    """Delete rows of ``source`` that would duplicate rows of ``target`` once moved."""
    rows = con.execute(
        f"""
        DELETE FROM exposures WHERE system_id = ? AND dicom_uid IN (
            SELECT s.dicom_uid FROM exposures s JOIN exposures e
              ON e.system_id = ? AND s.system_id = ?
             AND abs(epoch_ms(e.timestamp_utc) - epoch_ms(s.timestamp_utc)) <= {int(MATCH_WINDOW_S * 1000)}
             AND (e.timestamp_utc = s.timestamp_utc OR (
                  abs(e.tube_voltage_kv - s.tube_voltage_kv) <= {MATCH_KV_TOL}
              AND abs(e.tube_current_ma - s.tube_current_ma)
                  <= greatest({MATCH_MA_ABS}, {MATCH_MA_REL} * greatest(e.tube_current_ma, s.tube_current_ma))))
        ) RETURNING 1
        """,
        [source, target, source],
    ).fetchall()
    return len(rows)


def load_device_map(con: duckdb.DuckDBPyConnection, path: str | Path) -> dict[str, Any]:
    """Read a mapping CSV (``device_serial, station_name, system_id``) and apply each row with
    :func:`map_device`. Returns a file report (dict) like :func:`ingest_dicom_paths`' entries;
    rows without a system id or without any device identity go to ``rejects``."""
    import pandas as pd

    p = Path(path)
    started = utcnow()
    try:
        frame = pd.read_csv(p, dtype=str, keep_default_na=False, encoding="utf-8-sig")
    except (OSError, ValueError, UnicodeDecodeError) as exc:
        raise InputError(
            f"{p}: cannot read the DICOM device map ({type(exc).__name__}). "
            "It must be a CSV with columns device_serial, station_name, system_id."
        ) from exc
    frame.columns = [str(c).strip().lower() for c in frame.columns]
    missing = {"system_id"} - set(frame.columns)
    if missing or not ({"device_serial", "station_name"} & set(frame.columns)):
        raise InputError(
            f"{p}: the DICOM device map needs columns system_id and device_serial and/or "
            f"station_name; found {', '.join(frame.columns) or 'none'}."
        )
    for c in ("device_serial", "station_name"):
        if c not in frame.columns:
            frame[c] = ""
    sha = hashlib.sha256(p.read_bytes()).hexdigest()
    prev = con.execute(
        "SELECT path FROM ingest_files WHERE sha256 = ? AND table_kind = 'dicom_devices' "
        "AND status = 'ingested' AND rows_rejected = 0 ORDER BY file_id LIMIT 1",
        [sha],
    ).fetchone()
    if prev:
        return {
            "path": str(p),
            "kind": "dicom_devices",
            "profile": None,
            "status": "already_ingested",
            "rows_read": 0,
            "rows_accepted": 0,
            "rows_rejected": 0,
            "rows_duplicate": 0,
            "message": f"same content as {prev[0]}, already applied; nothing to do",
            "sha256": sha,
            "file_id": None,
        }
    rejects: list[tuple[int, str, str, str]] = []
    moved = 0
    accepted = 0
    for i, r in enumerate(
        frame.itertuples(index=False), start=2
    ):  # mapping rows: a short list
        sys_id = str(r.system_id).strip()
        if not sys_id:
            rejects.append((i, "system_id", "", "system_id is empty"))
            continue
        if not str(r.device_serial).strip() and not str(r.station_name).strip():
            rejects.append(
                (i, "device_serial", "", "neither device_serial nor station_name given")
            )
            continue
        try:
            res = map_device(
                con, sys_id, device_serial=r.device_serial, station_name=r.station_name
            )
        except NotFoundError:
            rejects.append(
                (i, "system_id", sys_id, "system_id is not in the store's systems")
            )
            continue
        moved += res["moved"]
        accepted += 1
    row = con.execute(
        "INSERT INTO ingest_files (path, sha256, table_kind, profile, rows_read, rows_accepted, "
        "rows_rejected, rows_duplicate, status, started_at_utc, finished_at_utc) "
        "VALUES (?, ?, 'dicom_devices', NULL, ?, ?, ?, 0, 'ingested', ?, ?) RETURNING file_id",
        [str(p), sha, len(frame), accepted, len(rejects), started, utcnow()],
    ).fetchone()
    file_id = int(row[0]) if row else None
    for line, fld, raw, reason in rejects:
        con.execute(
            "INSERT INTO rejects VALUES (?, ?, ?, ?, ?, ?)",
            [file_id, str(p), line, fld, raw, reason],
        )
    return {
        "path": str(p),
        "kind": "dicom_devices",
        "profile": None,
        "status": "ingested",
        "rows_read": len(frame),
        "rows_accepted": accepted,
        "rows_rejected": len(rejects),
        "rows_duplicate": 0,
        "message": f"{accepted} device mappings; {moved} stored exposures moved",
        "sha256": sha,
        "file_id": file_id,
    }


def unmapped_devices(con: duckdb.DuckDBPyConnection) -> pd.DataFrame:
    """Devices seen in DICOM that no mapping names, with their exposure counts."""
    return con.execute(
        """
        SELECT d.device_serial, d.station_name, d.system_id,
               (SELECT count(*) FROM exposures e WHERE e.system_id = d.system_id) AS exposures
        FROM dicom_devices d WHERE NOT d.mapped ORDER BY d.system_id
        """
    ).df()


DEVICE_MAP_GLOB = "dicom-devices*.csv"


def find_device_maps(paths: Sequence[Path]) -> list[Path]:
    """``dicom-devices*.csv`` files in the folders of ``paths`` and their parents up to the
    folder all paths share."""
    import os

    if not paths:
        return []
    dirs = {Path(p).resolve().parent for p in paths}
    common = Path(os.path.commonpath([str(d) for d in dirs]))
    seen: set[Path] = set()
    out: list[Path] = []
    for d in sorted(dirs):
        cur = d
        while True:
            if cur not in seen:
                seen.add(cur)
                out.extend(sorted(cur.glob(DEVICE_MAP_GLOB)))
            if cur == common or cur.parent == cur:
                break
            cur = cur.parent
    return sorted(set(out))


# ---------------------------------------------------------------------------------------------
# The batch writer
# ---------------------------------------------------------------------------------------------


def _write_batch(
    con: duckdb.DuckDBPyConnection,
    states: list[_FileState],
    batch: _Batch,
    default_tz: str | None,
) -> list[int | None]:
    """Convert, map, dedupe and insert one batch in one transaction; return file ids."""
    import pandas as pd

    from tubetrack.store import transaction

    rows, rejects = _canonical(batch, default_tz)
    with transaction(con):
        if len(rows):
            rows["system_id"] = _resolve_devices(con, rows)
        file_ids = [
            int(r[0])
            for r in con.execute(
                "SELECT nextval('ingest_file_seq') FROM range(?)", [len(states)]
            ).fetchall()
        ]
        dup_reason = pd.Series(dtype="object")
        if len(rows):
            dup_reason = _dedupe_and_insert(con, rows, states, file_ids)
        # per-file counts (vectorised over rows)
        n_rej = (
            rejects.groupby("file_idx").size()
            if len(rejects)
            else pd.Series(dtype="int64")
        )
        if len(rows):
            acc = rows.loc[dup_reason.isna().to_numpy()].groupby("file_idx").size()
            dup = rows.loc[dup_reason.notna().to_numpy()].groupby("file_idx").size()
            assumed = (
                rows.loc[rows["focal_assumed"] & dup_reason.isna().to_numpy()]
                .groupby("file_idx")
                .size()
            )
            no_off = (
                rows.loc[rows["no_offset"].to_numpy() & dup_reason.isna().to_numpy()]
                .groupby("file_idx")
                .size()
            )
        else:
            acc = dup = assumed = no_off = pd.Series(dtype="int64")
        for i, st in enumerate(states):
            st.rows_accepted = int(acc.get(i, 0))
            st.rows_duplicate = int(dup.get(i, 0))
            st.rows_rejected = int(n_rej.get(i, 0))
            st.focal_assumed = int(assumed.get(i, 0))
            if int(no_off.get(i, 0)):
                note = (
                    f"no UTC offset in the object; local time taken as {default_tz}"
                    if default_tz
                    else "no UTC offset in the object; times taken as UTC"
                )
                st.message = "; ".join(x for x in (st.message, note) if x)
            if st.status in ("ingested",):
                st.rows_read = st.rows_accepted + st.rows_duplicate + st.rows_rejected
        # ingest_files rows and rejects, one statement each
        files = pd.DataFrame(
            {
                "file_id": file_ids,
                "path": [s.shown for s in states],
                "sha256": [s.sha256 for s in states],
                "table_kind": KIND,
                "profile": None,
                "rows_read": [s.rows_read for s in states],
                "rows_accepted": [s.rows_accepted for s in states],
                "rows_rejected": [s.rows_rejected for s in states],
                "rows_duplicate": [s.rows_duplicate for s in states],
                "status": [s.status for s in states],
                "started_at_utc": [s.started for s in states],
                "finished_at_utc": utcnow(),
            }
        )
        files["profile"] = files["profile"].astype("object")
        con.register("_tt_dcm_files", files)
        try:
            con.execute(
                "INSERT INTO ingest_files (file_id, path, sha256, table_kind, profile, rows_read, "
                "rows_accepted, rows_rejected, rows_duplicate, status, started_at_utc, finished_at_utc) "
                "SELECT file_id, path, sha256, table_kind, CAST(profile AS VARCHAR), rows_read, "
                "rows_accepted, rows_rejected, rows_duplicate, status, started_at_utc, finished_at_utc "
                "FROM _tt_dcm_files"
            )
        finally:
            con.unregister("_tt_dcm_files")
        rej_rows = [
            (file_ids[i], st.shown, line, fld, raw, reason)
            for i, st in enumerate(states)
            for (line, fld, raw, reason) in st.file_rejects
        ]
        if len(rejects):
            rej_rows += [
                (
                    file_ids[int(f)],
                    states[int(f)].shown,
                    None if pd.isna(ln) else int(ln),
                    fld,
                    None
                    if raw is None or (isinstance(raw, float) and pd.isna(raw))
                    else str(raw),
                    reason,
                )
                for f, ln, fld, raw, reason in rejects[
                    ["file_idx", "source_line", "field", "raw_value", "reason"]
                ].itertuples(index=False)
            ]
        if rej_rows:
            rf = pd.DataFrame(
                rej_rows,
                columns=["file_id", "path", "line", "field", "raw_value", "reason"],
            ).astype({"field": "object", "raw_value": "object"})
            rf["line"] = pd.to_numeric(rf["line"], errors="coerce").astype("float64")
            con.register("_tt_dcm_rej", rf)
            try:
                con.execute(
                    "INSERT INTO rejects SELECT file_id, path, CAST(line AS BIGINT), CAST(field AS VARCHAR), "
                    "CAST(raw_value AS VARCHAR), reason FROM _tt_dcm_rej"
                )
            finally:
                con.unregister("_tt_dcm_rej")
    return file_ids


def _dedupe_and_insert(
    con: duckdb.DuckDBPyConnection,
    rows: pd.DataFrame,
    states: list[_FileState],
    file_ids: list[int],
) -> pd.Series:
    """Classify each candidate row (NULL = new) in SQL, replace stored images an RDSR event
    describes, insert the new rows in one statement. Returns the duplicate reason per row."""
    import pandas as pd

    stage = rows[
        [
            "row_id",
            "file_idx",
            "source_line",
            "source_kind",
            "dicom_uid",
            "system_id",
            "timestamp_utc",
            "focal_spot",
            "tube_voltage_kv",
            "tube_current_ma",
            "exposure_time_s",
            "exposure_mas",
        ]
    ].copy()
    stage["source_file"] = [states[int(i)].shown for i in stage["file_idx"]]
    # pref 0 = RDSR event, 1 = image; CT slices are grouped by a derived UID instead of matched
    stage["pref"] = (stage["source_kind"] == "dicom").astype("int64")
    stage["ct_img"] = rows["ct_group"].notna().to_numpy()
    for c in ("dicom_uid", "system_id", "focal_spot", "source_kind", "source_file"):
        stage[c] = stage[c].astype("object")
    win = int(MATCH_WINDOW_S * 1000)
    match = (
        f"abs(epoch_ms(a.timestamp_utc) - epoch_ms(b.timestamp_utc)) <= {win} "
        f"AND abs(a.tube_voltage_kv - b.tube_voltage_kv) <= {MATCH_KV_TOL} "
        f"AND abs(a.tube_current_ma - b.tube_current_ma) <= "
        f"greatest({MATCH_MA_ABS}, {MATCH_MA_REL} * greatest(a.tube_current_ma, b.tube_current_ma))"
    )
    con.register("_tt_dcm_stage_df", stage)
    try:
        con.execute(
            "CREATE OR REPLACE TEMP TABLE _tt_dcm_s AS SELECT *, "
            f"CAST(floor(epoch_ms(timestamp_utc) / {win}) AS BIGINT) AS bucket FROM "
            "(SELECT * REPLACE (CAST(timestamp_utc AS TIMESTAMP) AS timestamp_utc) FROM _tt_dcm_stage_df)"
        )
    finally:
        con.unregister("_tt_dcm_stage_df")
    try:
        lo, hi = con.execute(
            f"SELECT min(timestamp_utc) - INTERVAL {win + 1000} MILLISECOND, "
            f"max(timestamp_utc) + INTERVAL {win + 1000} MILLISECOND FROM _tt_dcm_s"
        ).fetchone()
        con.execute(
            f"""
            CREATE OR REPLACE TEMP TABLE _tt_dcm_e AS
            SELECT timestamp_utc, system_id, tube_voltage_kv, tube_current_ma, source_kind, dicom_uid,
                   CAST(floor(epoch_ms(timestamp_utc) / {win}) AS BIGINT) AS bucket
            FROM exposures
            WHERE system_id IN (SELECT DISTINCT system_id FROM _tt_dcm_s)
              AND timestamp_utc BETWEEN ? AND ?
            """,
            [lo, hi],
        )
        con.execute(
            f"""
            CREATE OR REPLACE TEMP TABLE _tt_dcm_c AS
            WITH ranked AS (
                SELECT s.*,
                       row_number() OVER (PARTITION BY dicom_uid ORDER BY pref, row_id) AS uid_rank,
                       row_number() OVER (PARTITION BY system_id, timestamp_utc ORDER BY pref, row_id) AS nk_rank
                FROM _tt_dcm_s s
            ),
            sb AS (SELECT s.*, unnest([s.bucket - 1, s.bucket, s.bucket + 1]) AS nb FROM _tt_dcm_s s),
            -- images matching an RDSR event or an earlier image of this batch
            in_batch AS (
                SELECT DISTINCT a.row_id FROM sb a JOIN _tt_dcm_s b
                  ON a.system_id = b.system_id AND a.nb = b.bucket AND a.row_id <> b.row_id
                WHERE a.pref = 1
                  AND (b.pref = 0 OR (b.row_id < a.row_id AND NOT a.ct_img AND NOT b.ct_img))
                  AND {match}
            ),
            -- rows matching a stored exposure: images match anything; RDSR events match log rows
            -- only (other RDSR events differ by UID; a stored image is replaced instead)
            in_store AS (
                SELECT DISTINCT a.row_id FROM sb a JOIN _tt_dcm_e b
                  ON a.system_id = b.system_id AND a.nb = b.bucket
                WHERE ((a.pref = 1 AND NOT (a.ct_img AND b.source_kind = 'dicom'))
                       OR b.source_kind NOT IN ('dicom', 'rdsr'))
                  AND (b.dicom_uid IS NULL OR a.dicom_uid IS NULL OR b.dicom_uid <> a.dicom_uid)
                  AND {match}
            )
            SELECT r.row_id,
                   CASE
                     WHEN r.dicom_uid IS NOT NULL AND r.uid_rank > 1 THEN 'same UID earlier in this batch'
                     WHEN r.dicom_uid IS NOT NULL AND EXISTS (SELECT 1 FROM exposures e WHERE e.dicom_uid = r.dicom_uid)
                          THEN 'UID already stored'
                     WHEN r.nk_rank > 1 THEN 'same system and time earlier in this batch'
                     WHEN EXISTS (SELECT 1 FROM _tt_dcm_e e WHERE e.system_id = r.system_id AND e.timestamp_utc = r.timestamp_utc)
                          THEN 'same system and time already stored'
                     WHEN r.row_id IN (SELECT row_id FROM in_batch) THEN 'image of an exposure reported in this batch'
                     WHEN r.row_id IN (SELECT row_id FROM in_store) THEN 'matches a stored exposure'
                   END AS dup_reason
            FROM ranked r
            """
        )
        # RDSR events replace stored image rows that describe the same exposure.
        con.execute(
            f"""
            DELETE FROM exposures WHERE source_kind = 'dicom' AND dicom_uid IN (
                SELECT b.dicom_uid FROM _tt_dcm_s a
                JOIN _tt_dcm_c c ON c.row_id = a.row_id AND c.dup_reason IS NULL
                JOIN _tt_dcm_e b ON a.system_id = b.system_id
                 AND b.bucket BETWEEN a.bucket - 1 AND a.bucket + 1
                WHERE a.pref = 0 AND b.source_kind = 'dicom' AND {match}
            )
            """
        )
        con.execute(
            """
            INSERT INTO exposures (timestamp_utc, system_id, tube_id, focal_spot, tube_voltage_kv,
                tube_current_ma, tube_current_measured_ma, exposure_time_s, exposure_mas,
                filament_current_a, filament_voltage_v, prep_time_s, arc_count, source_kind,
                dicom_uid, source_file, source_line)
            SELECT s.timestamp_utc, s.system_id, NULL, s.focal_spot, s.tube_voltage_kv,
                   s.tube_current_ma, NULL, s.exposure_time_s, s.exposure_mas,
                   NULL, NULL, NULL, NULL, s.source_kind, s.dicom_uid, s.source_file,
                   CAST(s.source_line AS BIGINT)
            FROM _tt_dcm_s s JOIN _tt_dcm_c c USING (row_id)
            WHERE c.dup_reason IS NULL
            ORDER BY s.system_id, s.timestamp_utc
            """
        )
        res = con.execute(
            "SELECT row_id, dup_reason FROM _tt_dcm_c ORDER BY row_id"
        ).df()
    finally:
        for t in ("_tt_dcm_s", "_tt_dcm_e", "_tt_dcm_c"):
            con.execute(f"DROP TABLE IF EXISTS {t}")
    reason = pd.Series(res["dup_reason"].to_numpy(), index=res["row_id"].to_numpy())
    return (
        reason.reindex(rows["row_id"].to_numpy())
        .reset_index(drop=True)
        .set_axis(rows.index)
    )


# ---------------------------------------------------------------------------------------------
# Public entry point
# ---------------------------------------------------------------------------------------------


def _dicomdir_refs(ds: Any, base: Path) -> list[Path]:
    out = []
    for rec in ds.get("DirectoryRecordSequence") or []:
        ref = rec.get("ReferencedFileID")
        if not ref:
            continue
        parts = [str(p) for p in (ref if not isinstance(ref, str) else ref.split("\\"))]
        out.append(base.joinpath(*parts))
    return out


def _is_dicom_file(path: Path) -> bool:
    if path.name.upper() == "DICOMDIR":
        return True
    try:
        with path.open("rb") as fh:
            fh.seek(128)
            return fh.read(4) == b"DICM"
    except OSError:
        return False


def _expand(paths: list[Path]) -> list[Path]:
    """Folders -> the DICOM files inside them (recursively, sorted); files stay as given."""
    out: list[Path] = []
    for p in paths:
        if p.is_dir():
            out.extend(
                f for f in sorted(p.rglob("*")) if f.is_file() and _is_dicom_file(f)
            )
        else:
            out.append(p)
    return out


def _notify(
    progress: ProgressArg, done: int, total: int, path: Path, size: int
) -> None:
    if progress is None:
        return
    if hasattr(progress, "file_started"):
        progress.file_started(str(path), size)
        adv = getattr(progress, "dicom_advance", None)
        if callable(adv):
            adv(done, total)
    elif callable(progress):
        progress(done, total)


def ingest_dicom_paths(
    con: duckdb.DuckDBPyConnection,
    paths: Sequence[str | Path],
    *,
    progress: ProgressArg = None,
    batch_size: int = 2000,
    default_tz: str | None = None,
    device_maps: bool = True,
) -> list[dict[str, Any]]:
    """Ingest DICOM files (and DICOMDIR sets) into ``exposures``; one report dict per file.

    Parameters
    ----------
    con
        Open store (``tubetrack.store.connect``).
    paths
        DICOM Part 10 files (any name, with or without ``.dcm``) and DICOMDIR files. Files a
        DICOMDIR references are read too (each once, also when also listed directly). A folder
        stands for the DICOM files in it (bytes 128-131 ``DICM``, or named DICOMDIR).
    progress
        ``callable(done_files, total_files)``, or an object with ``file_started(path, size)``
        (called before each file is read) and optionally ``dicom_advance(done, total)``.
    batch_size
        Files per SQL transaction [count].
    default_tz
        IANA time zone for objects that carry no UTC offset (TimezoneOffsetFromUTC or a DT
        suffix). ``None``: such times are taken as UTC and the file report says so.
    device_maps
        Also apply ``dicom-devices*.csv`` mapping files found beside the DICOM files or in
        their parent folders up to the folder they share (see :func:`find_device_maps`).

    Returns
    -------
    list of dict
        Keys ``path, kind ('dicom'), profile (None), status, rows_read, rows_accepted,
        rows_rejected, rows_duplicate, message, sha256, file_id`` (the fields of
        ``tubetrack.ingest.report.FileReport``), plus ``frames`` for multi-frame objects and
        ``focal_spot_assumed`` when the object recorded no focal spot. ``rows_read`` counts
        irradiation events of an RDSR, 1 for an image; ``status`` is ``ingested``,
        ``already_ingested`` (same bytes seen before), ``skipped`` (not an X-ray object; counted
        in ``message``) or ``failed`` (unreadable; a ``rejects`` row gives the reason).
    """
    import pydicom  # noqa: F401  (fail early with an ImportError when pydicom is absent)

    queue: list[Path] = _expand([Path(p) for p in paths])
    reports: list[dict[str, Any]] = []
    if device_maps:
        for mp in find_device_maps(queue):
            reports.append(load_device_map(con, mp))
    seen: set[Path] = set()
    known_sha = {
        r[0]: r[1]
        for r in con.execute(
            "SELECT sha256, min(path) FROM ingest_files WHERE table_kind = ? AND status IN ('ingested', 'skipped') "
            "GROUP BY sha256",
            [KIND],
        ).fetchall()
    }
    states: list[_FileState] = []
    batch = _Batch()
    done = 0
    i = 0
    while i < len(queue):
        path = queue[i]
        i += 1
        key = path.resolve()
        if key in seen:
            continue
        seen.add(key)
        total = len(queue)
        try:
            size = path.stat().st_size
        except OSError:
            size = 0
        _notify(progress, done, total, path, size)
        done += 1
        st = _FileState(path, str(path))
        try:
            data = path.read_bytes()
        except OSError as exc:
            st.status = "failed"
            st.message = f"{path}: cannot read the file ({exc.strerror}). Check the path and permissions."
            st.file_rejects.append(
                (None, None, None, "file rejected: cannot read the file")
            )
            states.append(st)
            continue
        st.sha256 = hashlib.sha256(data).hexdigest()
        if st.sha256 in known_sha:
            st.status = "already_ingested"
            st.message = f"same content as {known_sha[st.sha256]}, already ingested; nothing to do"
            states.append(st)
            continue
        known_sha[st.sha256] = st.shown
        try:
            try:
                ds = _dcmread(data, force=False)
            except Exception:
                if path.name.upper() == "DICOMDIR" or data[128:132] == b"DICM":
                    raise
                ds = _dcmread(
                    data, force=True
                )  # pre-Part-10 object referenced by a DICOMDIR
            sop_class = _text(ds.get("SOPClassUID")) or _text(
                getattr(ds, "file_meta", {}).get("MediaStorageSOPClassUID")
            )
            if not (
                sop_class
                or _text(ds.get("Modality"))
                or "DirectoryRecordSequence" in ds
            ):
                raise ValueError("no SOP Class UID and no Modality")
        except Exception as exc:  # pydicom raises many types for corrupt input
            st.status = "failed"
            reason = _safe_reason(exc)
            st.message = (
                f"{path}: {reason}. The whole file is rejected; export it again."
            )
            st.file_rejects.append((None, None, None, "file rejected: " + reason))
            states.append(st)
            continue
        idx = len(states)
        if (
            sop_class == DICOMDIR_SOP_CLASS
            or path.name.upper() == "DICOMDIR"
            and ds.get("DirectoryRecordSequence") is not None
        ):
            refs = _dicomdir_refs(ds, path.parent)
            missing = [r for r in refs if not r.exists()]
            new = [r for r in refs if r.exists() and r.resolve() not in seen]
            queue.extend(new)
            st.message = f"DICOMDIR: {len(refs)} referenced files, {len(new)} queued"
            if missing:
                st.message += f", {len(missing)} missing (first: {missing[0].name})"
                st.file_rejects.extend(
                    (
                        None,
                        "ReferencedFileID",
                        str(m.relative_to(path.parent)),
                        "file named by the DICOMDIR does not exist",
                    )
                    for m in missing
                )
            st.extra["referenced_files"] = len(refs)
        else:
            modality = (_text(ds.get("Modality")) or "").upper()
            try:
                if sop_class in RDSR_SOP_CLASSES:
                    _read_rdsr(ds, idx, st, batch)
                elif modality in XRAY_MODALITIES:
                    _read_image(ds, idx, st, batch, modality)
                else:
                    st.status = "skipped"
                    what = (
                        "SR that is not an X-ray radiation dose report"
                        if modality == "SR"
                        else (f"{modality or 'unknown modality'} object")
                    )
                    st.message = f"{what}: not an X-ray exposure record (skipped)"
                    st.extra["skipped_modality"] = modality or None
            except Exception as exc:  # a malformed sequence deep inside the object
                st.status = "failed"
                reason = _safe_reason(exc)
                st.message = (
                    f"{path}: {reason}. The whole file is rejected; export it again."
                )
                st.file_rejects.append((None, None, None, "file rejected: " + reason))
                # drop rows this file may have added before failing
                keep = [k for k, f in enumerate(batch.cols["file_idx"]) if f != idx]
                for c in _COLUMNS:
                    batch.cols[c] = [batch.cols[c][k] for k in keep]
        states.append(st)
        if len(states) >= batch_size:
            reports.extend(_flush(con, states, batch, default_tz))
            states, batch = [], _Batch()
    if states:
        reports.extend(_flush(con, states, batch, default_tz))
    if callable(progress) and not hasattr(progress, "file_started"):
        progress(done, done)
    return reports


def _flush(
    con: duckdb.DuckDBPyConnection,
    states: list[_FileState],
    batch: _Batch,
    default_tz: str | None,
) -> list[dict[str, Any]]:
    ids = _write_batch(con, states, batch, default_tz)
    return [st.report(fid) for st, fid in zip(states, ids, strict=True)]


__all__ = [
    "DEDUPE_RULE",
    "DEVICE_MAP_GLOB",
    "FOCAL_SPOT_SMALL_MAX_MM",
    "FOCAL_SPOT_SMALL_MAX_MM_DEFAULT",
    "XRAY_MODALITIES",
    "find_device_maps",
    "ingest_dicom_paths",
    "load_device_map",
    "map_device",
    "unmapped_devices",
]
