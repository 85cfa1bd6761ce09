"""The ingest progress bar moves file by file, DICOM batches included."""

from __future__ import annotations

import pandas as pd

from tubetrack import store
from tubetrack.cli.ingest_cmd import _RichProgress
from tubetrack.ingest import ingest_paths
from tubetrack.ingest.dicom_synth import write_dicom_workload


class _Recording(_RichProgress):
    def __init__(self) -> None:
        super().__init__()
        self.advances: list[tuple[int, int, float]] = []

    def dicom_advance(self, done: int, total: int) -> None:
        super().dicom_advance(done, total)
        task = self._progress.tasks[0]
        self.advances.append((done, total, task.completed))


def test_dicom_files_advance_the_bar_one_by_one(tmp_path):
    days = pd.date_range("2025-03-03 09:00", periods=4, freq="D")
    exposures = pd.DataFrame(
        {
            "timestamp_utc": days,
            "system_id": ["DEV-Y"] * 4,
            "focal_spot": ["large"] * 4,
            "tube_voltage_kv": [70.0, 75.0, 80.0, 85.0],
            "tube_current_ma": [200.0] * 4,
            "exposure_time_s": [0.05] * 4,
        }
    )
    systems = pd.DataFrame({"system_id": ["DEV-Y"], "modality": ["radiographic"]})
    files = write_dicom_workload(exposures, systems, tmp_path / "dcm", seed=3)
    dicom_files = [f for f in files if f.suffix == ".dcm"]
    con = store.connect(":memory:")
    progress = _Recording()
    with progress:
        summary = ingest_paths(con, [tmp_path / "dcm"], progress=progress)
    assert summary.ok
    # one call per DICOM file as it starts; by then the files before it are on the bar
    assert [d for d, _, _ in progress.advances] == list(range(len(dicom_files)))
    sizes = [f.stat().st_size for f in sorted(dicom_files)]
    completed = [c for _, _, c in progress.advances]
    assert completed == [sum(sizes[:k]) for k in range(len(sizes))]
