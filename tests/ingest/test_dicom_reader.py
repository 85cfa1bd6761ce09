"""DICOM workload reader: values against pydicom's own bundled files, generated RDSR and edge
cases, deduplication, device mapping and the no-patient-data guarantee.

Reference objects: the test files shipped inside pydicom (``pydicom/data/test_files``, pydicom
3.0.x), written by others; expected values are read from them with pydicom in each test.
"""

from __future__ import annotations

import random
import shutil
from datetime import datetime, timedelta
from pathlib import Path
from zoneinfo import ZoneInfo

import pandas as pd
import pydicom
import pytest
from pydicom.data import DATA_ROOT

from tubetrack import store
from tubetrack.ingest import dicom
from tubetrack.ingest.dicom_synth import (
    Device,
    image_dataset,
    rdsr_dataset,
    save_dataset,
)

TEST_FILES = (
    Path(DATA_ROOT) / "test_files"
)  # local files only: never triggers a download
DEV = Device("SYS-A", "SER-0001", "STATION-A", "invented test unit", "DX")


@pytest.fixture
def con():
    c = store.connect(":memory:")
    yield c
    c.close()


def _rows(con, where: str = "TRUE") -> pd.DataFrame:
    return con.execute(
        f"SELECT * FROM exposures WHERE {where} ORDER BY timestamp_utc"
    ).df()


def _image(tmp: Path, name: str, rng: random.Random, when: datetime, **kw) -> Path:
    args = dict(
        device=DEV,
        timestamp_local=when,
        utc_offset_minutes=60,
        tube_voltage_kv=81.0,
        tube_current_ma=320.0,
        exposure_time_s=0.032,
        exposure_mas=10.24,
        focal_spot_mm=1.2,
        rng=rng,
    )
    args.update(kw)
    ds = image_dataset(**args)
    return save_dataset(ds, tmp / name)


def _events(n: int, start: datetime, **cols) -> pd.DataFrame:
    base = {
        "timestamp_local": [start + timedelta(minutes=7 * i) for i in range(n)],
        "tube_voltage_kv": [70.0 + i for i in range(n)],
        "tube_current_ma": [250.0 + 10 * i for i in range(n)],
        "exposure_time_s": [0.02 + 0.001 * i for i in range(n)],
        "focal_spot_mm": [0.6 if i % 2 else 1.2 for i in range(n)],
    }
    base["exposure_mas"] = [
        a * t
        for a, t in zip(base["tube_current_ma"], base["exposure_time_s"], strict=True)
    ]
    base.update(cols)
    return pd.DataFrame(base)


# ---------------------------------------------------------------------------------------------
# pydicom's bundled objects
# ---------------------------------------------------------------------------------------------


def test_ct_small_values_equal_pydicom_attributes(con):
    # Source: pydicom 3.0 bundled test object CT_small.dcm, attributes read with pydicom.dcmread.
    path = TEST_FILES / "CT_small.dcm"
    ref = pydicom.dcmread(path, stop_before_pixels=True)
    reps = dicom.ingest_dicom_paths(con, [path])
    assert [r["status"] for r in reps] == ["ingested"]
    row = _rows(con).iloc[0]
    assert row["tube_voltage_kv"] == float(ref.KVP)
    assert row["tube_current_ma"] == float(ref.XRayTubeCurrent)
    assert row["exposure_time_s"] == pytest.approx(
        float(ref.ExposureTime) / 1000.0, rel=1e-12
    )
    assert row["exposure_mas"] == float(ref.Exposure)
    assert row["filament_current_a"] != row["filament_current_a"]  # NULL -> NaN
    assert row["source_kind"] == "dicom" and row["tube_id"] is None
    # local AcquisitionDate/Time with the object's TimezoneOffsetFromUTC ("-0500") -> UTC
    off = str(ref.TimezoneOffsetFromUTC)
    offset = timedelta(hours=int(off[1:3]), minutes=int(off[3:5])) * (
        1 if off[0] == "+" else -1
    )
    local = datetime.strptime(
        ref.AcquisitionDate + ref.AcquisitionTime.split(".")[0], "%Y%m%d%H%M%S"
    )
    assert row["timestamp_utc"].to_pydatetime().replace(microsecond=0) == local - offset
    assert "taken as UTC" not in reps[0]["message"]
    # CT focal spot rule: nominal <= 0.8 mm is the small spot (FocalSpots 0.7 in the file)
    assert float(ref.FocalSpots) <= dicom.FOCAL_SPOT_SMALL_MAX_MM["CT"]
    assert row["focal_spot"] == "small"
    # unmapped device: placeholder system named after the station name
    assert row["system_id"] == f"dicom:{ref.StationName}"
    dev = con.execute("SELECT station_name, mapped FROM dicom_devices").fetchall()
    assert dev == [(str(ref.StationName), False)]
    assert con.execute("SELECT modality, model_label FROM systems").fetchall() == [
        ("ct", str(ref.ManufacturerModelName))
    ]


def test_mr_and_other_non_xray_objects_are_skipped_and_counted(con):
    paths = [
        TEST_FILES / "MR_small.dcm",
        TEST_FILES / "test-SR.dcm",
        TEST_FILES / "rtplan.dcm",
    ]
    modalities = [pydicom.dcmread(p, stop_before_pixels=True).Modality for p in paths]
    reps = dicom.ingest_dicom_paths(con, paths)
    assert [r["status"] for r in reps] == ["skipped"] * 3
    assert [r["skipped_modality"] for r in reps] == modalities
    assert con.execute("SELECT count(*) FROM exposures").fetchone()[0] == 0
    counted = con.execute(
        "SELECT count(*) FROM ingest_files WHERE status = 'skipped'"
    ).fetchone()[0]
    assert counted == 3


def test_dicomdir_set_is_followed_and_values_match(con, tmp_path):
    # Source: pydicom's bundled DICOMDIR set (dicomdirtests), copied so paths are ours.
    root = tmp_path / "set"
    shutil.copytree(TEST_FILES / "dicomdirtests", root)
    reps = dicom.ingest_dicom_paths(con, [root / "DICOMDIR"])
    ref_dir = pydicom.dcmread(root / "DICOMDIR")
    refs = [
        root.joinpath(*r.ReferencedFileID)
        for r in ref_dir.DirectoryRecordSequence
        if "ReferencedFileID" in r
    ]
    assert len(reps) == 1 + len(refs)
    assert reps[0]["referenced_files"] == len(refs)
    # Expected: one exposure per CT acquisition (series + acquisition number) with kVp > 0;
    # CR objects carry KVP 0 and are rejected with field KVP; MR objects are skipped.
    cts, crs, mrs = {}, 0, 0
    for p in refs:
        ds = pydicom.dcmread(p, stop_before_pixels=True)
        if ds.Modality == "CT" and float(ds.get("KVP") or 0) > 0:
            cts.setdefault(
                (ds.SeriesInstanceUID, str(ds.get("AcquisitionNumber", ""))), ds
            )
        elif ds.Modality == "CR":
            crs += 1
        elif ds.Modality == "MR":
            mrs += 1
    got = _rows(con)
    assert len(got) == len(cts)
    assert sorted(got["tube_voltage_kv"]) == sorted(float(d.KVP) for d in cts.values())
    assert sorted(got["tube_current_ma"]) == sorted(
        float(d.XRayTubeCurrent) for d in cts.values()
    )
    rej = con.execute(
        "SELECT field, raw_value FROM rejects WHERE field = 'KVP'"
    ).fetchall()
    assert rej == [("KVP", "0")] * crs
    assert sum(r["status"] == "skipped" for r in reps) == mrs
    for r in reps:  # every file reconciles
        assert (
            r["rows_read"]
            == r["rows_accepted"] + r["rows_rejected"] + r["rows_duplicate"]
        )


# ---------------------------------------------------------------------------------------------
# Generated RDSR and images
# ---------------------------------------------------------------------------------------------


def test_concept_codes_are_the_dicom_ones():
    # Source: DICOM PS3.16 DCM codes as shipped in pydicom.sr.codedict (pydicom 3.0).
    from pydicom.sr.codedict import codes

    assert dicom._NUM_CODES[codes.DCM.KVP.value] == "kv"
    assert dicom._NUM_CODES[codes.DCM.XRayTubeCurrent.value] == "ma"
    assert dicom._NUM_CODES[codes.DCM.ExposureTime.value] == "t"
    assert dicom._NUM_CODES[codes.DCM.Exposure.value] == "mas"
    assert dicom._NUM_CODES[codes.DCM.FocalSpotSize.value] == "fs"
    assert dicom._NUM_CODES[codes.DCM.PulseWidth.value] == "pulse_width"
    assert dicom._NUM_CODES[codes.DCM.NumberOfPulses.value] == "n_pulses"
    assert dicom._CODE_EVENT_UID == codes.DCM.IrradiationEventUID.value
    assert dicom._CODE_DT_STARTED == codes.DCM.DatetimeStarted.value
    assert (
        dicom._EVENT_CONTAINERS[codes.DCM.IrradiationEventXRayData.value]
        == "projection"
    )
    assert dicom._EVENT_CONTAINERS[codes.DCM.CTAcquisition.value] == "ct"


def test_rdsr_events_units_and_time_zone(con, tmp_path):
    rng = random.Random(1)
    ev = _events(
        5, datetime(2025, 3, 30, 1, 10, 0)
    )  # crosses the Europe/Berlin spring change
    tz = ZoneInfo("Europe/Berlin")
    ev["offset_minutes"] = [
        int(t.replace(tzinfo=tz).utcoffset().total_seconds() // 60)
        for t in ev["timestamp_local"]
    ]
    path = save_dataset(
        rdsr_dataset(ev, device=DEV, utc_offset_minutes=60, rng=rng), tmp_path / "r.dcm"
    )
    reps = dicom.ingest_dicom_paths(con, [path])
    assert reps[0]["rows_read"] == 5 and reps[0]["rows_accepted"] == 5
    got = _rows(con)
    assert (got["source_kind"] == "rdsr").all()
    # expected UTC from Python's zoneinfo, independent of our parser
    want = [
        (t.replace(tzinfo=tz) - t.replace(tzinfo=tz).utcoffset()).replace(tzinfo=None)
        for t in ev["timestamp_local"]
    ]
    assert [t.to_pydatetime() for t in got["timestamp_utc"]] == want
    assert list(got["tube_voltage_kv"]) == list(ev["tube_voltage_kv"])
    assert list(got["tube_current_ma"]) == list(ev["tube_current_ma"])
    # Exposure Time written in ms, Exposure in uA.s (DS, 6 significant digits)
    assert got["exposure_time_s"].to_numpy() == pytest.approx(
        ev["exposure_time_s"].to_numpy(), rel=1e-6
    )
    assert got["exposure_mas"].to_numpy() == pytest.approx(
        ev["exposure_mas"].to_numpy(), rel=1e-5
    )
    assert list(got["focal_spot"]) == ["large", "small", "large", "small", "large"]
    ref = pydicom.dcmread(path)
    uids = [
        it.UID
        for e in ref.ContentSequence[1:]
        for it in e.ContentSequence
        if it.ValueType == "UIDREF"
    ]
    assert list(got["dicom_uid"]) == uids
    assert list(got["source_line"]) == [1, 2, 3, 4, 5]


def test_ct_rdsr_events(con, tmp_path):
    rng = random.Random(2)
    ev = _events(3, datetime(2025, 6, 1, 9, 0, 0))
    path = save_dataset(
        rdsr_dataset(ev, device=DEV, utc_offset_minutes=120, rng=rng, ct=True),
        tmp_path / "ct",
    )
    dicom.ingest_dicom_paths(con, [path])
    got = _rows(con)
    assert list(got["tube_voltage_kv"]) == list(ev["tube_voltage_kv"])
    assert list(got["tube_current_ma"]) == list(ev["tube_current_ma"])
    assert got["exposure_time_s"].to_numpy() == pytest.approx(
        ev["exposure_time_s"].to_numpy(), rel=1e-6
    )
    assert got["exposure_mas"].to_numpy() == pytest.approx(
        (ev["tube_current_ma"] * ev["exposure_time_s"]).to_numpy(), rel=1e-6
    )
    assert got["timestamp_utc"].iloc[0] == pd.Timestamp("2025-06-01 07:00:00")


def test_same_rdsr_event_in_two_reports_counts_once(con, tmp_path):
    ev = _events(4, datetime(2025, 5, 5, 8, 0, 0))
    ev["event_uid"] = [f"2.25.{1000 + i}" for i in range(4)]
    a = save_dataset(
        rdsr_dataset(ev, device=DEV, utc_offset_minutes=0, rng=random.Random(3)),
        tmp_path / "a",
    )
    b = save_dataset(
        rdsr_dataset(
            ev.iloc[2:], device=DEV, utc_offset_minutes=0, rng=random.Random(4)
        ),
        tmp_path / "b",
    )
    reps = dicom.ingest_dicom_paths(con, [a, b])
    assert [r["rows_accepted"] for r in reps] == [4, 0]
    assert reps[1]["rows_duplicate"] == 2
    assert con.execute("SELECT count(*) FROM exposures").fetchone()[0] == 4


@pytest.mark.parametrize("order", ["same_batch", "image_first", "rdsr_first"])
def test_image_and_rdsr_event_count_once(con, tmp_path, order):
    rng = random.Random(5)
    when = datetime(2025, 2, 3, 10, 0, 0)
    ev = _events(3, when)
    rdsr = save_dataset(
        rdsr_dataset(ev, device=DEV, utc_offset_minutes=60, rng=rng),
        tmp_path / "rdsr.dcm",
    )
    # an image of event 2, stamped 0.6 s later, mA rounded to a whole number
    e2 = ev.iloc[1]
    img = _image(
        tmp_path,
        "IMG0001",
        rng,
        e2["timestamp_local"] + timedelta(seconds=0.6),
        tube_voltage_kv=e2["tube_voltage_kv"],
        tube_current_ma=e2["tube_current_ma"],
        exposure_time_s=e2["exposure_time_s"],
        exposure_mas=e2["exposure_mas"],
        precise=False,
    )
    if order == "same_batch":
        dicom.ingest_dicom_paths(con, [img, rdsr])
    elif order == "image_first":
        first = dicom.ingest_dicom_paths(con, [img])
        assert first[0]["rows_accepted"] == 1
        dicom.ingest_dicom_paths(con, [rdsr])
    else:
        dicom.ingest_dicom_paths(con, [rdsr])
        second = dicom.ingest_dicom_paths(con, [img])
        assert second[0]["rows_duplicate"] == 1
    got = _rows(con)
    assert len(got) == 3
    assert (got["source_kind"] == "rdsr").all()  # the RDSR event is preferred


def test_image_far_in_time_is_a_separate_exposure(con, tmp_path):
    rng = random.Random(6)
    when = datetime(2025, 2, 3, 10, 0, 0)
    ev = _events(1, when)
    rdsr = save_dataset(
        rdsr_dataset(ev, device=DEV, utc_offset_minutes=60, rng=rng), tmp_path / "r"
    )
    e = ev.iloc[0]
    img = _image(
        tmp_path,
        "IMG",
        rng,
        when + timedelta(seconds=5),
        tube_voltage_kv=e["tube_voltage_kv"],
        tube_current_ma=e["tube_current_ma"],
    )
    dicom.ingest_dicom_paths(con, [rdsr, img])
    assert len(_rows(con)) == 2


# ---------------------------------------------------------------------------------------------
# Edge cases
# ---------------------------------------------------------------------------------------------


def test_missing_attributes_reject_or_derive(con, tmp_path):
    rng = random.Random(7)
    t0 = datetime(2025, 1, 10, 9, 0, 0)
    no_kv = _image(tmp_path, "nokv", rng, t0, tube_voltage_kv=None)
    no_time = _image(
        tmp_path,
        "notime",
        rng,
        t0 + timedelta(minutes=1),
        exposure_time_s=None,
        exposure_mas=None,
    )
    no_ma = _image(
        tmp_path, "noma", rng, t0 + timedelta(minutes=2), tube_current_ma=None
    )
    no_fs = _image(tmp_path, "nofs", rng, t0 + timedelta(minutes=3), focal_spot_mm=None)
    reps = {
        Path(r["path"]).name: r
        for r in dicom.ingest_dicom_paths(con, [no_kv, no_time, no_ma, no_fs])
    }
    assert reps["nokv"]["rows_rejected"] == 1 and reps["notime"]["rows_rejected"] == 1
    rej = dict(con.execute("SELECT field, reason FROM rejects").fetchall())
    assert "kVp missing" in rej["KVP"]
    assert "neither exposure time nor mAs" in rej["ExposureTime"]
    got = _rows(con).set_index(_rows(con)["timestamp_utc"].dt.minute)
    # tube current derived as mAs / time = 10.24 mA s / 0.032 s
    assert got.loc[2, "tube_current_ma"] == pytest.approx(10.24 / 0.032, rel=1e-9)
    assert got.loc[3, "focal_spot"] == dicom.FOCAL_SPOT_ASSUMED
    assert reps["nofs"]["focal_spot_assumed"] == 1


def test_multiframe_private_tags_no_suffix(con, tmp_path):
    rng = random.Random(8)
    ds = image_dataset(
        device=DEV,
        timestamp_local=datetime(2025, 4, 4, 12, 0),
        utc_offset_minutes=120,
        tube_voltage_kv=72.0,
        tube_current_ma=12.5,
        exposure_time_s=3.2,
        rng=rng,
        modality="RF",
        frames=40,
    )
    block = ds.private_block(0x0029, "INVENTED PRIVATE", create=True)
    block.add_new(0x01, "LO", "private value")
    block.add_new(0x02, "DS", "1.5")
    path = save_dataset(ds, tmp_path / "run_without_suffix")
    reps = dicom.ingest_dicom_paths(con, [path])
    assert reps[0]["rows_accepted"] == 1 and reps[0]["frames"] == 40
    row = _rows(con).iloc[0]
    assert row["exposure_time_s"] == pytest.approx(3.2) and row[
        "tube_current_ma"
    ] == pytest.approx(12.5)
    assert row["timestamp_utc"] == pd.Timestamp("2025-04-04 10:00:00")


def test_corrupt_file_is_rejected_with_reason(con, tmp_path):
    good = _image(tmp_path, "good", random.Random(9), datetime(2025, 1, 1, 8))
    raw = good.read_bytes()
    bad = tmp_path / "corrupt.dcm"
    bad.write_bytes(raw[:140] + b"\xff" * 64)  # preamble + DICM, then garbage
    notdicom = tmp_path / "DICOMDIR"
    notdicom.write_bytes(b"not a directory at all")
    reps = dicom.ingest_dicom_paths(con, [bad, notdicom, good])
    st = {Path(r["path"]).name: r["status"] for r in reps}
    assert st == {"corrupt.dcm": "failed", "DICOMDIR": "failed", "good": "ingested"}
    reasons = [
        r[0]
        for r in con.execute("SELECT reason FROM rejects ORDER BY file_id").fetchall()
    ]
    assert len(reasons) == 2 and all(
        r.startswith("file rejected: not a") for r in reasons
    )
    assert len(_rows(con)) == 1


def test_reingest_is_a_noop(con, tmp_path):
    p = _image(tmp_path, "x", random.Random(10), datetime(2025, 1, 1, 8))
    dicom.ingest_dicom_paths(con, [p])
    again = dicom.ingest_dicom_paths(con, [p])
    assert again[0]["status"] == "already_ingested"
    assert len(_rows(con)) == 1


def test_progress_callback_counts_files(con, tmp_path):
    rng = random.Random(11)
    paths = [
        _image(tmp_path, f"i{k}", rng, datetime(2025, 1, 1, 8, k)) for k in range(5)
    ]
    seen: list[tuple[int, int]] = []
    dicom.ingest_dicom_paths(
        con, paths, progress=lambda d, t: seen.append((d, t)), batch_size=2
    )
    assert seen[-1] == (5, 5) and len(seen) == 6
    assert len(_rows(con)) == 5


@pytest.mark.parametrize(
    ("modality", "size_mm", "spot"),
    [
        ("DX", 0.6, "small"),
        ("DX", 1.0, "large"),
        ("RF", 0.3, "small"),
        ("MG", 0.1, "small"),
        ("MG", 0.3, "large"),
        ("CT", 0.7, "small"),
        ("CT", 1.2, "large"),
    ],
)
def test_focal_spot_rule(modality, size_mm, spot):
    got = dicom._focal_spot(pd.Series([size_mm]), pd.Series([modality], dtype="object"))
    assert got.iloc[0] == spot


# ---------------------------------------------------------------------------------------------
# Devices
# ---------------------------------------------------------------------------------------------


def test_unmapped_device_then_mapped_moves_exposures(con, tmp_path):
    con.execute(
        "INSERT INTO systems (system_id, site, modality) VALUES ('R-01', 'site-a', 'radiographic')"
    )
    rng = random.Random(12)
    p = [_image(tmp_path, f"i{k}", rng, datetime(2025, 1, 1, 8, k)) for k in range(3)]
    dicom.ingest_dicom_paths(con, p)
    assert set(_rows(con)["system_id"]) == {"dicom:STATION-A"}
    um = dicom.unmapped_devices(con)
    assert um[["device_serial", "station_name", "exposures"]].to_dict("records") == [
        {"device_serial": "SER-0001", "station_name": "STATION-A", "exposures": 3}
    ]
    res = dicom.map_device(con, "R-01", device_serial="SER-0001")
    assert res == {"moved": 3, "removed_duplicates": 0}
    assert set(_rows(con)["system_id"]) == {"R-01"}
    assert (
        con.execute(
            "SELECT count(*) FROM systems WHERE system_id LIKE 'dicom:%'"
        ).fetchone()[0]
        == 0
    )
    assert dicom.unmapped_devices(con).empty
    # later files of that device go straight to R-01
    dicom.ingest_dicom_paths(
        con, [_image(tmp_path, "later", rng, datetime(2025, 1, 2, 8))]
    )
    assert set(_rows(con)["system_id"]) == {"R-01"}


def test_device_map_file_beside_the_files(con, tmp_path):
    # the map sits in the folder the DICOM files share (files in two sub-folders)
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    (tmp_path / "dicom-devices.csv").write_text(
        "device_serial,station_name,system_id\nSER-0001,,R-07\n,,R-08\n"
    )
    con.execute("INSERT INTO systems (system_id) VALUES ('R-07')")
    rng = random.Random(13)
    p = [
        _image(tmp_path / s, "i", rng, datetime(2025, 1, 1, 8, k))
        for k, s in enumerate("ab")
    ]
    reps = dicom.ingest_dicom_paths(con, p)
    assert (
        reps[0]["kind"] == "dicom_devices"
        and reps[0]["rows_accepted"] == 1
        and reps[0]["rows_rejected"] == 1
    )
    assert set(_rows(con)["system_id"]) == {"R-07"}


def test_map_device_needs_an_identity_and_a_known_system(con, tmp_path):
    from tubetrack.errors import InputError, NotFoundError

    with pytest.raises(InputError, match="serial number"):
        dicom.map_device(con, "R-01")
    with pytest.raises(NotFoundError, match="not in the store"):
        dicom.map_device(con, "R-99", device_serial="X1")
    csv = tmp_path / "dicom-devices-typo.csv"
    csv.write_text("device_serial,station_name,system_id\nX1,,R-99\n")
    rep = dicom.load_device_map(con, csv)
    assert (rep["rows_accepted"], rep["rows_rejected"]) == (0, 1)
    assert con.execute("SELECT raw_value FROM rejects").fetchone()[0] == "R-99"
    # once the system exists, the same file applies (a file with rejects is not a no-op)
    con.execute("INSERT INTO systems (system_id) VALUES ('R-99')")
    again = dicom.load_device_map(con, csv)
    assert (again["status"], again["rows_accepted"]) == ("ingested", 1)


# ---------------------------------------------------------------------------------------------
# Patient data never stored
# ---------------------------------------------------------------------------------------------

PLANTED = {
    "PatientName": "Plantedname^Zebulon",
    "PatientID": "PID-PLANTED-4471",
    "PatientBirthDate": "19010203",
    "AccessionNumber": "ACC-PLANTED-9921",
    "OtherPatientIDs": "OPID-PLANTED-55",
    "PatientAddress": "1 Planted Lane",
    "ReferringPhysicianName": "Doctor^Planted",
}


def test_patient_data_never_stored(con, tmp_path):
    rng = random.Random(14)
    img = _image(tmp_path, "img", rng, datetime(2025, 1, 1, 8), extra=PLANTED)
    ev = _events(2, datetime(2025, 1, 1, 9))
    rd = save_dataset(
        rdsr_dataset(ev, device=DEV, utc_offset_minutes=60, rng=rng, extra=PLANTED),
        tmp_path / "r",
    )
    bad = (
        tmp_path / "bad"
    )  # a file rejected for a missing kVp still carries the planted values
    _image(
        tmp_path,
        "bad",
        rng,
        datetime(2025, 1, 1, 10),
        tube_voltage_kv=None,
        extra=PLANTED,
    )
    # the planted values are really in the files (so this test can fail)
    for p in (img, rd, bad):
        ds = pydicom.dcmread(p)
        assert all(str(ds[k].value) == v for k, v in PLANTED.items())
    dicom.ingest_dicom_paths(con, [img, rd, bad])
    assert con.execute("SELECT count(*) FROM exposures").fetchone()[0] == 3
    cols = con.execute(
        "SELECT table_name, column_name FROM information_schema.columns "
        "WHERE data_type = 'VARCHAR' AND table_schema = 'main'"
    ).fetchall()
    assert len(cols) > 20
    needles = [v.lower() for v in PLANTED.values()] + [
        "plantedname",
        "zebulon",
        "19010203",
    ]
    for table, column in cols:
        q = f"SELECT DISTINCT lower({store.quote_ident(column)}) FROM {store.quote_ident(table)}"
        values = [v[0] for v in con.execute(q).fetchall() if v[0] is not None]
        for needle in needles:
            assert not any(needle in v for v in values), (table, column, needle)


def test_rdsr_unknown_unit_rejects_that_event_once(con, tmp_path):
    ev = _events(2, datetime(2025, 7, 1, 8, 0, 0))
    ds = rdsr_dataset(ev, device=DEV, utc_offset_minutes=0, rng=random.Random(15))
    first_event = ds.ContentSequence[1]
    kvp = next(it for it in first_event.ContentSequence if it.ValueType == "NUM")
    kvp.MeasuredValueSequence[0].MeasurementUnitsCodeSequence[0].CodeValue = "kPa"
    path = save_dataset(ds, tmp_path / "units")
    rep = dicom.ingest_dicom_paths(con, [path])[0]
    assert (rep["rows_read"], rep["rows_accepted"], rep["rows_rejected"]) == (2, 1, 1)
    rej = con.execute("SELECT line, field, raw_value, reason FROM rejects").fetchall()
    assert len(rej) == 1 and rej[0][:3] == (1, "KVP", "70 kPa")
    assert "unit 'kPa' not understood" in rej[0][3]


def test_implausible_factors_are_rejected(con, tmp_path):
    rng = random.Random(16)
    t0 = datetime(2025, 1, 11, 9, 0, 0)
    # kV written in volts and mA in microamperes by mistake
    volts = _image(tmp_path, "volts", rng, t0, tube_voltage_kv=81000.0)
    micro = _image(
        tmp_path,
        "micro",
        rng,
        t0 + timedelta(minutes=1),
        tube_current_ma=320000.0,
        exposure_mas=None,
    )
    reps = dicom.ingest_dicom_paths(con, [volts, micro])
    assert [r["rows_rejected"] for r in reps] == [1, 1]
    fields = sorted(r[0] for r in con.execute("SELECT field FROM rejects").fetchall())
    assert fields == ["KVP", "XRayTubeCurrentInuA"]


def test_default_time_zone_for_objects_without_offset(con, tmp_path):
    rng = random.Random(17)
    winter = _image(
        tmp_path, "winter", rng, datetime(2025, 1, 15, 9, 0), utc_offset_minutes=None
    )
    summer = _image(
        tmp_path, "summer", rng, datetime(2025, 7, 15, 9, 0), utc_offset_minutes=None
    )
    gap = _image(
        tmp_path, "gap", rng, datetime(2025, 3, 30, 2, 30), utc_offset_minutes=None
    )
    reps = dicom.ingest_dicom_paths(
        con, [winter, summer, gap], default_tz="Europe/Berlin"
    )
    assert [r["rows_accepted"] for r in reps] == [1, 1, 0]
    assert "taken as Europe/Berlin" in reps[0]["message"]
    tz = ZoneInfo("Europe/Berlin")  # expected offsets from Python's zoneinfo
    want = [
        (t - t.replace(tzinfo=tz).utcoffset())
        for t in (datetime(2025, 1, 15, 9, 0), datetime(2025, 7, 15, 9, 0))
    ]
    assert [t.to_pydatetime() for t in _rows(con)["timestamp_utc"]] == want
    reason = con.execute("SELECT reason FROM rejects").fetchone()[0]
    assert "daylight-saving gap" in reason
