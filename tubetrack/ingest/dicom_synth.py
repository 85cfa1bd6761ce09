"""Write small synthetic DICOM headers and X-ray radiation dose reports for given exposures.

Everything written here is invented: no patient data, no real device, UIDs under the UUID-derived
root ``2.25`` (DICOM PS3.5 section B.2) built from a seeded random generator, device serial
numbers and station names derived from our own system ids. The files are headers only (no pixel
data), written in the Deflated Explicit VR Little Endian transfer syntax so that thousands of
irradiation events stay small, with an uncompressed Part 10 preamble (``DICM`` at bytes 128-131).

Layout of :func:`write_dicom_workload`'s output folder::

    rdsr/<STATION>_<YYYYMMDD>.dcm    one X-Ray Radiation Dose SR per device and local day
                                     (TID 10001, one TID 10003 irradiation event per exposure)
    images/<STATION>_<n>             a few DX/CR image headers (no .dcm suffix on purpose) that
                                     describe exposures the RDSRs also report: ingest counts them once
    dicom-devices.csv                the device -> system mapping (device_serial, station_name,
                                     system_id), read by ``tubetrack ingest``

The lower-level builders :func:`image_dataset`, :func:`rdsr_dataset` and :func:`save_dataset` are
public so tests can write edge cases (missing attributes, planted patient data, multi-frame).

References
----------
NEMA, DICOM PS3.3 (Information Object Definitions): C.8.7.2 X-Ray Acquisition Dose module, C.8.11
DX modules, C.17 SR Document modules. NEMA, DICOM PS3.16 (Content Mapping Resource): TID 10001
Projection X-Ray Radiation Dose, TID 10003 Irradiation Event X-Ray Data, TID 10011/10013 CT
Radiation Dose / CT Irradiation Event Data; concept codes as shipped in ``pydicom.sr.codedict``.
"""

from __future__ import annotations

import hashlib
import random
import uuid
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:  # pragma: no cover
    import pandas as pd
    from pydicom.dataset import Dataset

#: SOP classes (DICOM PS3.4 Annex B.5).
SOP_CLASS = {
    "CR": "1.2.840.10008.5.1.4.1.1.1",  # Computed Radiography Image Storage
    "DX": "1.2.840.10008.5.1.4.1.1.1.1",  # Digital X-Ray Image Storage - For Presentation
    "MG": "1.2.840.10008.5.1.4.1.1.1.2",  # Digital Mammography X-Ray Image Storage - For Presentation
    "CT": "1.2.840.10008.5.1.4.1.1.2",  # CT Image Storage
    "XA": "1.2.840.10008.5.1.4.1.1.12.1",  # X-Ray Angiographic Image Storage
    "RF": "1.2.840.10008.5.1.4.1.1.12.2",  # X-Ray Radiofluoroscopic Image Storage
    "MR": "1.2.840.10008.5.1.4.1.1.4",  # MR Image Storage (non-X-ray, for skip tests)
    "US": "1.2.840.10008.5.1.4.1.1.6.1",  # Ultrasound Image Storage (non-X-ray)
    "RDSR": "1.2.840.10008.5.1.4.1.1.88.67",  # X-Ray Radiation Dose SR Storage
}
DEFLATED = "1.2.840.10008.1.2.1.99"  # Deflated Explicit VR Little Endian
EXPLICIT_LE = "1.2.840.10008.1.2.1"  # Explicit VR Little Endian

#: Nominal focal spot size written for each canonical focal spot [mm] (# common practice:
#: general radiography tubes are commonly 0.6 mm / 1.2 mm; the reader maps <= 0.6 mm to small).
FOCAL_SPOT_NOMINAL_MM = {"small": 0.6, "large": 1.2}

#: Modality written for each canonical system modality.
IMAGE_MODALITY = {
    "radiographic": "DX",
    "mobile": "CR",
    "fluoroscopy": "RF",
    "mammography": "MG",
}

MANUFACTURER = "Invented Imaging (synthetic)"


@dataclass(frozen=True)
class Device:
    """The DICOM identity of one invented device."""

    system_id: str
    device_serial: str
    station_name: str
    model_label: str
    modality: str  # DICOM modality of its images: DX | CR | RF | MG | CT


def fake_uid(rng: random.Random) -> str:
    """A UID under ``2.25`` from 128 seeded random bits (a version-4 UUID as an integer)."""
    return "2.25." + str(uuid.UUID(int=rng.getrandbits(128), version=4).int)


def device_for_system(
    system_id: str, modality: str | None, model_label: str | None, seed: int
) -> Device:
    """Invent a stable serial number and station name for one of our systems."""
    digest = hashlib.sha256(f"{seed}:{system_id}".encode()).hexdigest()
    serial = "SYN" + str(int(digest[:12], 16) % 10**7).zfill(7)
    station = ("ST-" + "".join(ch for ch in str(system_id) if ch.isalnum()))[:16]
    mod = IMAGE_MODALITY.get(str(modality or "radiographic"), "DX")
    return Device(
        str(system_id), serial, station, str(model_label or "synthetic unit"), mod
    )


# ---------------------------------------------------------------------------------------------
# Dataset builders
# ---------------------------------------------------------------------------------------------


def _code(value: str, scheme: str, meaning: str) -> Dataset:
    from pydicom.dataset import Dataset

    c = Dataset()
    c.CodeValue = value
    c.CodingSchemeDesignator = scheme
    c.CodeMeaning = meaning
    return c


#: Concept names used in the RDSR (DICOM PS3.16, DCM coding scheme), (code, meaning).
C_REPORT = ("113701", "X-Ray Radiation Dose Report")
C_PROCEDURE = ("121058", "Procedure reported")
C_PROJECTION = ("113704", "Projection X-Ray")
C_CT_PROCEDURE = (
    "P5-08000",
    "Computed Tomography X-Ray",
)  # SRT code for CT; from memory
C_EVENT = ("113706", "Irradiation Event X-Ray Data")
C_CT_EVENT = ("113819", "CT Acquisition")
C_CT_ACQ_PARAMS = ("113822", "CT Acquisition Parameters")
C_CT_SOURCE = ("113831", "CT X-Ray Source Parameters")
C_SOURCE_ID = ("113832", "Identification of the X-Ray Source")
C_DT_STARTED = ("111526", "DateTime Started")
C_EVENT_UID = ("113769", "Irradiation Event UID")
C_KVP = ("113733", "KVP")
C_TUBE_CURRENT = ("113734", "X-Ray Tube Current")
C_EXPOSURE_TIME = ("113824", "Exposure Time")
C_EXPOSURE = ("113736", "Exposure")
C_FOCAL_SPOT = ("113766", "Focal Spot Size")
C_PULSE_WIDTH = ("113793", "Pulse Width")
C_N_PULSES = ("113768", "Number of Pulses")

#: UCUM units (code, meaning).
U_KV = ("kV", "kV")
U_MA = ("mA", "mA")
U_MS = ("ms", "ms")
U_S = ("s", "s")
U_UAS = ("uA.s", "uA.s")
U_MM = ("mm", "mm")
U_NONE = ("1", "no units")


def _item(
    value_type: str, concept: tuple[str, str], relationship: str = "CONTAINS"
) -> Dataset:
    from pydicom.dataset import Dataset

    it = Dataset()
    it.RelationshipType = relationship
    it.ValueType = value_type
    it.ConceptNameCodeSequence = [_code(concept[0], "DCM", concept[1])]
    return it


def _num(concept: tuple[str, str], value: float, unit: tuple[str, str]) -> Dataset:
    from pydicom.dataset import Dataset

    it = _item("NUM", concept)
    mv = Dataset()
    mv.NumericValue = _ds(value)
    mv.MeasurementUnitsCodeSequence = [_code(unit[0], "UCUM", unit[1])]
    it.MeasuredValueSequence = [mv]
    return it


def _ds(value: float) -> str:
    """Format a number for a DS element (at most 16 characters)."""
    text = f"{float(value):.6g}"
    return text if len(text) <= 16 else f"{float(value):.8e}"[:16]


def _container(
    concept: tuple[str, str], children: list[Dataset], relationship: str = "CONTAINS"
) -> Dataset:
    it = _item("CONTAINER", concept, relationship)
    it.ContinuityOfContent = "SEPARATE"
    it.ContentSequence = children
    return it


def _dicom_dt(local: Any) -> tuple[str, str, str]:
    """(DT, DA, TM) strings of a naive local timestamp."""
    text = local.strftime("%Y%m%d%H%M%S.%f")
    return text, text[:8], text[8:]


def _offset_text(offset_minutes: int) -> str:
    sign = "+" if offset_minutes >= 0 else "-"
    m = abs(int(offset_minutes))
    return f"{sign}{m // 60:02d}{m % 60:02d}"


def _base(
    sop_class: str,
    sop_uid: str,
    modality: str,
    device: Device,
    study_uid: str,
    series_uid: str,
) -> Dataset:
    from pydicom.dataset import Dataset, FileMetaDataset

    ds = Dataset()
    meta = FileMetaDataset()
    meta.MediaStorageSOPClassUID = sop_class
    meta.MediaStorageSOPInstanceUID = sop_uid
    meta.TransferSyntaxUID = EXPLICIT_LE
    meta.ImplementationClassUID = "2.25.1234567890123456789012345678901234"
    ds.file_meta = meta
    ds.SpecificCharacterSet = "ISO_IR 100"
    ds.SOPClassUID = sop_class
    ds.SOPInstanceUID = sop_uid
    ds.StudyInstanceUID = study_uid
    ds.SeriesInstanceUID = series_uid
    ds.Modality = modality
    ds.Manufacturer = MANUFACTURER
    ds.ManufacturerModelName = device.model_label[:64]
    ds.DeviceSerialNumber = device.device_serial
    ds.StationName = device.station_name
    ds.PatientName = (
        ""  # type 2 attributes, present and empty: no patient data is invented
    )
    ds.PatientID = ""
    return ds


def image_dataset(
    *,
    device: Device,
    timestamp_local: Any,
    utc_offset_minutes: int | None,
    tube_voltage_kv: float | None,
    tube_current_ma: float | None,
    exposure_time_s: float | None,
    exposure_mas: float | None = None,
    focal_spot_mm: float | None = None,
    rng: random.Random,
    modality: str | None = None,
    frames: int = 1,
    precise: bool = True,
    extra: Mapping[str, Any] | None = None,
) -> Dataset:
    """One X-ray image header (no pixel data) describing one exposure.

    Parameters
    ----------
    timestamp_local
        Naive local date-time of the acquisition (a ``datetime`` or ``pandas.Timestamp``).
    utc_offset_minutes
        Local offset from UTC written to TimezoneOffsetFromUTC [min]; ``None`` leaves it out.
    tube_voltage_kv, tube_current_ma, exposure_time_s, exposure_mas, focal_spot_mm
        Exposure factors [kV], [mA], [s], [mA s], [mm]; ``None`` leaves the attribute out.
    precise
        Also write the decimal XRayTubeCurrentInuA, ExposureTimeInuS and ExposureInuAs (the
        integer KVP-era attributes round to whole mA, ms and mA s).
    frames
        NumberOfFrames for a multi-frame header (> 1).
    extra
        Further attributes by keyword (tests plant patient data or private tags this way).
    """
    mod = modality or device.modality
    ds = _base(SOP_CLASS[mod], fake_uid(rng), mod, device, fake_uid(rng), fake_uid(rng))
    dt, da, tm = _dicom_dt(timestamp_local)
    ds.AcquisitionDateTime = dt
    ds.AcquisitionDate = da
    ds.AcquisitionTime = tm
    ds.ContentDate = da
    ds.ContentTime = tm
    if utc_offset_minutes is not None:
        ds.TimezoneOffsetFromUTC = _offset_text(utc_offset_minutes)
    if tube_voltage_kv is not None:
        ds.KVP = _ds(tube_voltage_kv)
    if tube_current_ma is not None:
        ds.XRayTubeCurrent = int(round(tube_current_ma))
        if precise:
            ds.XRayTubeCurrentInuA = _ds(tube_current_ma * 1000.0)
    if exposure_time_s is not None:
        ds.ExposureTime = int(round(exposure_time_s * 1000.0))
        if precise:
            ds.ExposureTimeInuS = _ds(exposure_time_s * 1e6)
    if exposure_mas is not None:
        ds.Exposure = int(round(exposure_mas))
        if precise:
            ds.ExposureInuAs = int(round(exposure_mas * 1000.0))
    if focal_spot_mm is not None:
        ds.FocalSpots = _ds(focal_spot_mm)
    if frames > 1:
        ds.NumberOfFrames = int(frames)
    for key, value in (extra or {}).items():
        setattr(ds, key, value)
    return ds


def rdsr_dataset(
    events: pd.DataFrame,
    *,
    device: Device,
    utc_offset_minutes: int | None,
    rng: random.Random,
    ct: bool = False,
    extra: Mapping[str, Any] | None = None,
) -> Dataset:
    """An X-Ray Radiation Dose SR (TID 10001, or TID 10011 when ``ct``) with one event per row.

    ``events`` columns: ``timestamp_local`` (naive local time), ``tube_voltage_kv`` [kV],
    ``tube_current_ma`` [mA], ``exposure_time_s`` [s], optional ``exposure_mas`` [mA s],
    ``focal_spot_mm`` [mm], ``event_uid`` (default: a fresh fake UID) and ``offset_minutes``
    (per-event UTC offset written into DateTime Started, default ``utc_offset_minutes``).
    A NaN value leaves that content item out (tests of missing values).
    """
    import math

    ds = _base(
        SOP_CLASS["RDSR"],
        fake_uid(rng),
        "CT" if ct else "DX",
        device,
        fake_uid(rng),
        fake_uid(rng),
    )
    ds.Modality = "SR"
    first = events["timestamp_local"].min() if len(events) else None
    if first is not None:
        _, da, tm = _dicom_dt(first)
        ds.ContentDate = da
        ds.ContentTime = tm
    if utc_offset_minutes is not None:
        ds.TimezoneOffsetFromUTC = _offset_text(utc_offset_minutes)
    ds.ValueType = "CONTAINER"
    ds.ConceptNameCodeSequence = [_code(C_REPORT[0], "DCM", C_REPORT[1])]
    ds.ContinuityOfContent = "SEPARATE"
    ds.CompletionFlag = "COMPLETE"
    ds.VerificationFlag = "UNVERIFIED"
    from pydicom.dataset import Dataset

    tpl = Dataset()
    tpl.MappingResource = "DCMR"
    tpl.TemplateIdentifier = "10011" if ct else "10001"
    ds.ContentTemplateSequence = [tpl]
    proc = _item("CODE", C_PROCEDURE, "HAS CONCEPT MOD")
    proc.ConceptCodeSequence = [
        _code(C_CT_PROCEDURE[0], "SRT", C_CT_PROCEDURE[1])
        if ct
        else _code(C_PROJECTION[0], "DCM", C_PROJECTION[1])
    ]
    children: list[Dataset] = [proc]

    def ok(v: Any) -> bool:
        return v is not None and not (isinstance(v, float) and math.isnan(v))

    cols = set(events.columns)
    for rec in events.to_dict("records"):
        off = (
            rec.get("offset_minutes", utc_offset_minutes)
            if "offset_minutes" in cols
            else utc_offset_minutes
        )
        dt, _, _ = _dicom_dt(rec["timestamp_local"])
        when = _item("DATETIME", C_DT_STARTED)
        when.DateTime = dt + (_offset_text(int(off)) if ok(off) else "")
        uid_item = _item("UIDREF", C_EVENT_UID)
        uid_item.UID = (
            rec.get("event_uid") if ok(rec.get("event_uid")) else fake_uid(rng)
        )
        kv, ma, t_s = (
            rec.get("tube_voltage_kv"),
            rec.get("tube_current_ma"),
            rec.get("exposure_time_s"),
        )
        mas, fs = rec.get("exposure_mas"), rec.get("focal_spot_mm")
        if ct:
            src: list[Dataset] = []
            sid = _item("TEXT", C_SOURCE_ID)
            sid.TextValue = "A"
            src.append(sid)
            if ok(kv):
                src.append(_num(C_KVP, kv, U_KV))
            if ok(ma):
                src.append(_num(C_TUBE_CURRENT, ma, U_MA))
            acq: list[Dataset] = []
            if ok(t_s):
                acq.append(_num(C_EXPOSURE_TIME, t_s, U_S))
            acq.append(_container(C_CT_SOURCE, src))
            ev = _container(
                C_CT_EVENT, [uid_item, when, _container(C_CT_ACQ_PARAMS, acq)]
            )
        else:
            items = [when, uid_item]
            if ok(kv):
                items.append(_num(C_KVP, kv, U_KV))
            if ok(ma):
                items.append(_num(C_TUBE_CURRENT, ma, U_MA))
            if ok(t_s):
                items.append(_num(C_EXPOSURE_TIME, t_s * 1000.0, U_MS))
            if ok(mas):
                items.append(_num(C_EXPOSURE, mas * 1000.0, U_UAS))
            if ok(fs):
                items.append(_num(C_FOCAL_SPOT, fs, U_MM))
            ev = _container(C_EVENT, items)
        children.append(ev)
    ds.ContentSequence = children
    for key, value in (extra or {}).items():
        setattr(ds, key, value)
    return ds


def save_dataset(ds: Dataset, path: Path, *, deflate: bool = False) -> Path:
    """Write ``ds`` as a DICOM Part 10 file (preamble + ``DICM``), optionally deflated."""
    path.parent.mkdir(parents=True, exist_ok=True)
    ds.file_meta.TransferSyntaxUID = DEFLATED if deflate else EXPLICIT_LE
    ds.save_as(path, enforce_file_format=True)
    return path


# ---------------------------------------------------------------------------------------------
# Fast RDSR encoder (thousands of events): the content tree written as Explicit VR Little
# Endian bytes directly (PS3.5 7.1.2, 7.5 undefined-length sequences and items); the root
# attributes and the file meta information are still written by pydicom.
# ---------------------------------------------------------------------------------------------

_LONG_VRS = {
    "OB",
    "OW",
    "OF",
    "SQ",
    "UT",
    "UN",
    "UC",
    "UR",
    "OD",
    "OL",
    "OV",
    "SV",
    "UV",
}
_ITEM = b"\xfe\xff\x00\xe0\xff\xff\xff\xff"
_ITEM_END = b"\xfe\xff\x0d\xe0\x00\x00\x00\x00"
_SEQ_END = b"\xfe\xff\xdd\xe0\x00\x00\x00\x00"


def _el(group: int, elem: int, vr: str, text: str) -> bytes:
    """One element with an (even-padded) text value, Explicit VR Little Endian."""
    import struct

    raw = text.encode("ascii")
    if len(raw) % 2:
        raw += b"\x00" if vr == "UI" else b" "
    head = struct.pack("<HH", group, elem) + vr.encode("ascii")
    if vr in _LONG_VRS:
        return head + b"\x00\x00" + struct.pack("<I", len(raw)) + raw
    return head + struct.pack("<H", len(raw)) + raw


def _sq(group: int, elem: int, items: list[bytes]) -> bytes:
    import struct

    body = b"".join(_ITEM + it + _ITEM_END for it in items)
    return (
        struct.pack("<HH", group, elem)
        + b"SQ\x00\x00\xff\xff\xff\xff"
        + body
        + _SEQ_END
    )


def _code_bytes(value: str, scheme: str, meaning: str) -> bytes:
    return (
        _el(0x0008, 0x0100, "SH", value)
        + _el(0x0008, 0x0102, "SH", scheme)
        + _el(0x0008, 0x0104, "LO", meaning)
    )


_CODE_CACHE: dict[tuple[str, str], bytes] = {}


def _concept(concept: tuple[str, str]) -> bytes:
    """ConceptNameCodeSequence (0040,A043) of a DCM concept (cached: the same bytes each time)."""
    if concept not in _CODE_CACHE:
        _CODE_CACHE[concept] = _sq(
            0x0040, 0xA043, [_code_bytes(concept[0], "DCM", concept[1])]
        )
    return _CODE_CACHE[concept]


def _head(value_type: str, concept: tuple[str, str]) -> bytes:
    return (
        _el(0x0040, 0xA010, "CS", "CONTAINS")
        + _el(0x0040, 0xA040, "CS", value_type)
        + _concept(concept)
    )


def _num_bytes(concept: tuple[str, str], value: float, unit: tuple[str, str]) -> bytes:
    units = _sq(0x0040, 0x08EA, [_code_bytes(unit[0], "UCUM", unit[1])])
    mv = units + _el(0x0040, 0xA30A, "DS", _ds(value))
    return _head("NUM", concept) + _sq(0x0040, 0xA300, [mv])


def _event_bytes(
    dt_text: str, uid: str, kv: float, ma: float, t_ms: float, uas: float, fs_mm: float
) -> bytes:
    """One TID 10003 irradiation event item (its content, without the item delimiters)."""
    children = [
        _head("DATETIME", C_DT_STARTED) + _el(0x0040, 0xA120, "DT", dt_text),
        _head("UIDREF", C_EVENT_UID) + _el(0x0040, 0xA124, "UI", uid),
        _num_bytes(C_KVP, kv, U_KV),
        _num_bytes(C_TUBE_CURRENT, ma, U_MA),
        _num_bytes(C_EXPOSURE_TIME, t_ms, U_MS),
        _num_bytes(C_EXPOSURE, uas, U_UAS),
    ]
    if fs_mm == fs_mm:  # not NaN
        children.append(_num_bytes(C_FOCAL_SPOT, fs_mm, U_MM))
    return (
        _head("CONTAINER", C_EVENT)
        + _el(0x0040, 0xA050, "CS", "SEPARATE")
        + _sq(0x0040, 0xA730, children)
    )


def _write_rdsr_fast(
    events: pd.DataFrame,
    device: Device,
    utc_offset_minutes: int,
    rng: random.Random,
    path: Path,
    deflate: bool,
) -> Path:
    """Write a projection RDSR whose events are the rows of ``events`` (columns as built in
    :func:`write_dicom_workload`) without building pydicom objects per content item."""
    import zlib

    from pydicom.filebase import DicomBytesIO
    from pydicom.filewriter import write_dataset, write_file_meta_info

    ds = rdsr_dataset(
        events.iloc[:0], device=device, utc_offset_minutes=utc_offset_minutes, rng=rng
    )
    _, da, tm = _dicom_dt(events["timestamp_local"].min())
    ds.ContentDate = da
    ds.ContentTime = tm
    proc = ds.ContentSequence
    del ds.ContentSequence
    body = DicomBytesIO()
    body.is_little_endian = True
    body.is_implicit_VR = False
    write_dataset(body, ds)
    proc_item = (
        _el(0x0040, 0xA010, "CS", "HAS CONCEPT MOD")
        + _el(0x0040, 0xA040, "CS", "CODE")
        + _concept(C_PROCEDURE)
        + _sq(0x0040, 0xA168, [_code_bytes(C_PROJECTION[0], "DCM", C_PROJECTION[1])])
    )
    assert len(proc) == 1
    dts = events["timestamp_local"].dt.strftime("%Y%m%d%H%M%S.%f") + [
        _offset_text(int(m)) for m in events["offset_minutes"]
    ]
    items = [proc_item] + [
        _event_bytes(dt, uid, kv, ma, t * 1000.0, mas * 1000.0, fs)
        for dt, uid, kv, ma, t, mas, fs in zip(
            dts,
            events["event_uid"],
            events["tube_voltage_kv"],
            events["tube_current_ma"],
            events["exposure_time_s"],
            events["exposure_mas"],
            events["focal_spot_mm"],
            strict=True,
        )
    ]
    data = body.getvalue() + _sq(0x0040, 0xA730, items)
    ds.file_meta.TransferSyntaxUID = DEFLATED if deflate else EXPLICIT_LE
    meta = DicomBytesIO()
    meta.is_little_endian = True
    meta.is_implicit_VR = False
    write_file_meta_info(meta, ds.file_meta)
    if deflate:
        comp = zlib.compressobj(9, zlib.DEFLATED, -15)  # raw deflate, PS3.5 A.5
        data = comp.compress(data) + comp.flush()
        if len(data) % 2:
            data += b"\x00"
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_bytes(b"\x00" * 128 + b"DICM" + meta.getvalue() + data)
    return path


# ---------------------------------------------------------------------------------------------
# The demo workload
# ---------------------------------------------------------------------------------------------


def _local_times(ts_utc: pd.Series, tz: str) -> tuple[pd.Series, pd.Series]:
    """Naive local times and UTC offsets [min] of naive UTC timestamps (vectorised)."""
    import pandas as pd

    utc = pd.to_datetime(ts_utc).dt.tz_localize("UTC")
    local = utc.dt.tz_convert(tz)
    naive_local = local.dt.tz_localize(None)
    offset_min = (
        (naive_local - utc.dt.tz_localize(None)).dt.total_seconds() // 60
    ).astype(int)
    return naive_local, offset_min


def write_dicom_workload(
    exposures_df: pd.DataFrame,
    systems_df: pd.DataFrame,
    out_dir: str | Path,
    seed: int,
    *,
    tz: str = "Europe/Berlin",
    image_fraction: float = 0.01,
    max_images: int = 40,
    deflate: bool = True,
    write_mapping: bool = True,
    max_bytes: int = 1_000_000,
) -> list[Path]:
    """Write the exposures as RDSRs (one per device and local day) plus a few image headers.

    Parameters
    ----------
    exposures_df
        Canonical exposures (``timestamp_utc`` naive UTC, ``system_id``, ``focal_spot``,
        ``tube_voltage_kv`` [kV], ``tube_current_ma`` [mA], ``exposure_time_s`` [s], optional
        ``exposure_mas`` [mA s]). Every row becomes one irradiation event.
    systems_df
        Systems (``system_id``, optional ``modality``, ``model_label``): one invented device each.
    out_dir
        Output folder (created). Existing ``*.dcm`` files and images of earlier runs are replaced.
    seed
        Seed of the UIDs and of which exposures also get an image header.
    tz
        Local time zone of the devices; times are written local with TimezoneOffsetFromUTC.
    image_fraction, max_images
        Share of exposures that also get a DX/CR image header (a duplicate of an RDSR event that
        ingest must count once), capped at ``max_images`` [count].
    deflate
        Write the Deflated Explicit VR Little Endian transfer syntax (about 10x smaller).
    write_mapping
        Also write ``dicom-devices.csv`` (device_serial, station_name, system_id).
    max_bytes
        Size budget of the output [bytes]; exceeding it warns (TubetrackWarning): the committed
        sample must stay small, so pass fewer days of exposures.

    Returns
    -------
    list of Path
        The files written, sorted.
    """
    import numpy as np
    import pandas as pd

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    for old in list(out.glob("rdsr/*.dcm")) + list(out.glob("images/*")):
        old.unlink()
    rng = random.Random(int(seed))
    nprng = np.random.default_rng(int(seed))

    sys_df = systems_df.copy()
    for col in ("modality", "model_label"):
        if col not in sys_df.columns:
            sys_df[col] = None
    devices = {
        str(r.system_id): device_for_system(
            str(r.system_id), r.modality, r.model_label, int(seed)
        )
        for r in sys_df.itertuples(index=False)
    }
    e = exposures_df.copy()
    e["system_id"] = e["system_id"].astype(str)
    e = e[e["system_id"].isin(list(devices))].sort_values(
        ["system_id", "timestamp_utc"], kind="stable"
    )
    e = e.reset_index(drop=True)
    if "exposure_mas" not in e.columns:
        e["exposure_mas"] = e["tube_current_ma"] * e["exposure_time_s"]
    e["exposure_mas"] = e["exposure_mas"].fillna(
        e["tube_current_ma"] * e["exposure_time_s"]
    )
    e["exposure_time_s"] = e["exposure_time_s"].fillna(
        e["exposure_mas"] / e["tube_current_ma"]
    )
    e["timestamp_local"], e["offset_minutes"] = _local_times(e["timestamp_utc"], tz)
    e["focal_spot_mm"] = (
        e["focal_spot"].astype(str).map(FOCAL_SPOT_NOMINAL_MM).astype(float)
    )
    e["local_day"] = e["timestamp_local"].dt.strftime("%Y%m%d")
    e["event_uid"] = [fake_uid(rng) for _ in range(len(e))]

    written: list[Path] = []
    for (system_id, day), grp in e.groupby(["system_id", "local_day"], sort=True):
        dev = devices[str(system_id)]
        written.append(
            _write_rdsr_fast(
                grp,
                dev,
                int(grp["offset_minutes"].iloc[0]),
                rng,
                out / "rdsr" / f"{dev.station_name}_{day}.dcm",
                deflate,
            )
        )

    n_img = int(min(max_images, round(len(e) * image_fraction)))
    if n_img > 0:
        pick = np.sort(nprng.choice(len(e), size=n_img, replace=False))
        # The image's acquisition time sits up to 0.8 s after the RDSR's DateTime Started (the
        # detector reads out after the exposure): still one exposure under the 1 s match rule.
        lag_s = nprng.uniform(0.0, 0.8, size=n_img)
        for k, (i, lag) in enumerate(zip(pick, lag_s, strict=True)):
            rec = e.iloc[int(i)]
            dev = devices[str(rec["system_id"])]
            ds = image_dataset(
                device=dev,
                timestamp_local=rec["timestamp_local"]
                + pd.Timedelta(seconds=float(lag)),
                utc_offset_minutes=int(rec["offset_minutes"]),
                tube_voltage_kv=float(rec["tube_voltage_kv"]),
                tube_current_ma=float(rec["tube_current_ma"]),
                exposure_time_s=float(rec["exposure_time_s"]),
                exposure_mas=float(rec["exposure_mas"]),
                focal_spot_mm=float(rec["focal_spot_mm"]),
                rng=rng,
            )
            written.append(
                save_dataset(
                    ds, out / "images" / f"{dev.station_name}_{k:04d}", deflate=deflate
                )
            )

    if write_mapping:
        mp = pd.DataFrame(
            [
                {
                    "device_serial": d.device_serial,
                    "station_name": d.station_name,
                    "system_id": d.system_id,
                }
                for d in devices.values()
            ]
        ).sort_values("system_id")
        path = out / "dicom-devices.csv"
        mp.to_csv(path, index=False, lineterminator="\n")
        written.append(path)
    total = sum(p.stat().st_size for p in written)
    if total > max_bytes:
        import warnings

        from tubetrack.errors import TubetrackWarning

        warnings.warn(
            f"DICOM workload in {out} is {total:,} bytes, above the {max_bytes:,}-byte budget; "
            "pass fewer exposures (fewer days or systems).",
            TubetrackWarning,
            stacklevel=2,
        )
    return sorted(written)


def devices_frame(systems: Iterable[Device]) -> pd.DataFrame:
    """The mapping rows (device_serial, station_name, system_id) of some devices."""
    import pandas as pd

    return pd.DataFrame(
        [
            {
                "device_serial": d.device_serial,
                "station_name": d.station_name,
                "system_id": d.system_id,
            }
            for d in systems
        ],
        columns=["device_serial", "station_name", "system_id"],
    )


__all__ = [
    "Device",
    "FOCAL_SPOT_NOMINAL_MM",
    "SOP_CLASS",
    "device_for_system",
    "devices_frame",
    "fake_uid",
    "image_dataset",
    "rdsr_dataset",
    "save_dataset",
    "write_dicom_workload",
]
