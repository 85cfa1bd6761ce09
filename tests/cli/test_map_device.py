"""`tubetrack map-device`: an unmapped DICOM device's exposures move to the named system."""

from __future__ import annotations

import json

import pandas as pd
from typer.testing import CliRunner

from tubetrack import store
from tubetrack.cli import app
from tubetrack.ingest.dicom_synth import write_dicom_workload


def test_unmapped_device_is_listed_then_mapped(tmp_path):
    db = tmp_path / "s.duckdb"
    con = store.connect(db)
    con.execute(
        "INSERT INTO systems (system_id, site, modality) VALUES ('ROOM-7', 'north', 'radiographic')"
    )
    con.close()
    exposures = pd.DataFrame(
        {
            "timestamp_utc": pd.to_datetime(["2025-03-03 09:00:00", "2025-03-03 09:05:00"]),
            "system_id": ["DEV-X", "DEV-X"],
            "focal_spot": ["large", "small"],
            "tube_voltage_kv": [81.0, 66.0],
            "tube_current_ma": [320.0, 200.0],
            "exposure_time_s": [0.05, 0.1],
        }
    )
    systems = pd.DataFrame({"system_id": ["DEV-X"], "modality": ["radiographic"]})
    write_dicom_workload(exposures, systems, tmp_path / "dcm", seed=7, write_mapping=False)

    runner = CliRunner()
    res = runner.invoke(app, ["ingest", "--db", str(db), "-q", str(tmp_path / "dcm")])
    assert res.exit_code == 0, res.output
    res = runner.invoke(app, ["status", "--db", str(db), "--format", "json"])
    unmapped = json.loads(res.stdout)["unmapped_dicom_devices"]
    assert len(unmapped) == 1 and unmapped[0]["exposures"] == 2
    assert unmapped[0]["system_id"].startswith("dicom:")
    serial = unmapped[0]["device_serial"]

    res = runner.invoke(
        app, ["map-device", "ROOM-7", "--serial", serial, "--db", str(db), "-f", "json"]
    )
    assert res.exit_code == 0, res.output
    assert json.loads(res.stdout)[0]["moved"] == 2
    con = store.connect(db, read_only=True)
    rows = con.execute("SELECT system_id, count(*) FROM exposures GROUP BY 1").fetchall()
    con.close()
    assert rows == [("ROOM-7", 2)]

    res = runner.invoke(app, ["map-device", "NO-SUCH", "--serial", serial, "--db", str(db)])
    assert res.exit_code == 1 and "Error:" in res.output
