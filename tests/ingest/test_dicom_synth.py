"""Synthetic DICOM workload writer: files are valid DICOM (read back with pydicom), small,
reproducible, carry no patient data, and ingest back to exactly the exposures given."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pydicom
import pytest
from pydicom.uid import UID

from tubetrack import store
from tubetrack.ingest.dicom import ingest_dicom_paths
from tubetrack.ingest.dicom_synth import write_dicom_workload


def _fleet(n_per_system: int = 150, seed: int = 3) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Invented exposures of two systems over ~40 days, crossing the autumn DST change."""
    rng = np.random.default_rng(seed)
    systems = pd.DataFrame(
        {
            "system_id": ["INV-R01", "INV-M01"],
            "modality": ["radiographic", "mobile"],
            "model_label": ["invented room", "invented mobile"],
        }
    )
    frames = []
    for sid in systems["system_id"]:
        start = pd.Timestamp("2025-10-01 06:00:00")
        gaps = rng.uniform(600, 40000, size=n_per_system)
        ts = start + pd.to_timedelta(np.cumsum(gaps), unit="s")
        ts = ts.round("ms")
        ma = rng.choice([100.0, 200.0, 320.0, 500.0], size=n_per_system)
        t = rng.choice([0.008, 0.016, 0.032, 0.1, 0.25], size=n_per_system)
        frames.append(
            pd.DataFrame(
                {
                    "timestamp_utc": ts,
                    "system_id": sid,
                    "tube_id": "T-" + sid,
                    "focal_spot": np.where(ma <= 200, "small", "large"),
                    "tube_voltage_kv": rng.choice(
                        [60.0, 70.0, 81.0, 102.0, 125.0], size=n_per_system
                    ),
                    "tube_current_ma": ma,
                    "exposure_time_s": t,
                    "exposure_mas": ma * t,
                }
            )
        )
    return pd.concat(frames, ignore_index=True), systems


def test_round_trip_counts_values_and_size(tmp_path):
    exp, systems = _fleet()
    paths = write_dicom_workload(
        exp, systems, tmp_path / "dicom", seed=7, image_fraction=0.05
    )
    files = [p for p in paths if p.suffix != ".csv"]
    assert sum(p.stat().st_size for p in paths) < 1_000_000
    images = [p for p in files if p.parent.name == "images"]
    assert len(images) == 15  # 5 % of 300 exposures, each a duplicate of an RDSR event
    con = store.connect(":memory:")
    con.execute("INSERT INTO systems (system_id) VALUES ('INV-R01'), ('INV-M01')")
    reps = ingest_dicom_paths(con, paths)
    got = con.execute("SELECT * FROM exposures ORDER BY system_id, timestamp_utc").df()
    want = exp.sort_values(["system_id", "timestamp_utc"]).reset_index(drop=True)
    assert len(got) == len(want)  # images counted once
    assert sum(r["rows_duplicate"] for r in reps) == len(images)
    assert list(got["system_id"]) == list(
        want["system_id"]
    )  # mapped via dicom-devices.csv
    assert (got["timestamp_utc"].to_numpy() == want["timestamp_utc"].to_numpy()).all()
    assert list(got["focal_spot"]) == list(want["focal_spot"])
    assert got["tube_voltage_kv"].to_numpy() == pytest.approx(
        want["tube_voltage_kv"].to_numpy()
    )
    assert got["tube_current_ma"].to_numpy() == pytest.approx(
        want["tube_current_ma"].to_numpy()
    )
    # DS values carry 6 significant digits
    assert got["exposure_mas"].to_numpy() == pytest.approx(
        want["exposure_mas"].to_numpy(), rel=1e-5
    )
    assert got["filament_current_a"].isna().all()
    assert (
        con.execute("SELECT count(*) FROM dicom_devices WHERE NOT mapped").fetchone()[0]
        == 0
    )


def test_files_are_valid_reproducible_and_anonymous(tmp_path):
    exp, systems = _fleet(40)
    a = write_dicom_workload(exp, systems, tmp_path / "a", seed=11)
    b = write_dicom_workload(exp, systems, tmp_path / "b", seed=11)
    assert [p.relative_to(tmp_path / "a") for p in a] == [
        p.relative_to(tmp_path / "b") for p in b
    ]
    assert all(x.read_bytes() == y.read_bytes() for x, y in zip(a, b, strict=True))
    for p in a:
        if p.suffix == ".csv":
            continue
        assert p.read_bytes()[128:132] == b"DICM"
        ds = pydicom.dcmread(p)
        assert UID(ds.SOPInstanceUID).is_valid and ds.SOPInstanceUID.startswith("2.25.")
        assert str(ds.PatientName) == "" and ds.PatientID == ""
        assert "PatientBirthDate" not in ds and "AccessionNumber" not in ds


def test_size_budget_warns(tmp_path):
    from tubetrack.errors import TubetrackWarning

    exp, systems = _fleet(30)
    with pytest.warns(TubetrackWarning, match="byte budget"):
        write_dicom_workload(exp, systems, tmp_path / "d", seed=1, max_bytes=1000)


def test_folder_argument_reads_the_dicom_files_in_it(tmp_path):
    exp, systems = _fleet(20)
    write_dicom_workload(exp, systems, tmp_path / "d", seed=2)
    (tmp_path / "d" / "notes.txt").write_text("not DICOM")
    con = store.connect(":memory:")
    reps = ingest_dicom_paths(con, [tmp_path / "d"])
    assert not any(r["path"].endswith("notes.txt") for r in reps)
    assert con.execute("SELECT count(*) FROM exposures").fetchone()[0] == len(exp)
