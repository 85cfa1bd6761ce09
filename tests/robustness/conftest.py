"""Fixtures of the robustness tests: a small demo fleet whose ids, sites and fault texts are
hostile strings, written in our open layout (docs/log-layout.md) and ingested through the CLI."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

LONG = "L" * 10_240  # 10 kB

#: One hostile string per system (system_id), in the order of the demo fleet's systems.
SYSTEM_IDS = [
    "<script>alert(1)</script>",
    "'; DROP TABLE exposures; --",
    '=HYPERLINK("http://evil.example","click")',
    "+cmd|' /C calc'!A0",
    'Röntgen 室 "q" 🩻 \u202eevil',
    "@SUM(1+1)",
]
#: Site names (one per system).
SITES = [
    "<img src=x onerror=alert(1)>",
    "line1\nline2",
    "O'Brien \"site\"",
    LONG,
    "-2+3 site",
    "</script><script>alert(1)</script>",
]
#: Tube ids (one per demo tube, in the order of the demo fleet's tubes).
TUBE_IDS = [
    "<img src=x onerror=alert(1)>",
    "@SUM(A1)",
    "-1+1 tube",
    "T'; DROP TABLE tubes; --",
    "T" + LONG,
    "tube\nnewline\r\nsecond",
    "=1+1",
    "Ωmega \"x\" 'y'",
    "<script>alert(1)</script>",
]
#: Raw fault texts, cycled over the events.
RAW_TEXTS = [
    "<script>alert(1)</script>",
    "'; DROP TABLE events; --",
    "a\nb \"c\" 'd'",
    LONG,
    '=HYPERLINK("http://evil.example")',
    "+cmd",
    "@SUM(1)",
    "<img src=x onerror=alert(1)>",
]
TIME_FORMAT = "%Y-%m-%dT%H:%M:%S.%fZ"


def write_hostile_logs(root: Path, *, n_systems: int = 6, years: float = 2.0, seed: int = 7):
    """Write a demo fleet with hostile strings as canonical CSV files under ``root``.

    Returns the frames written (dict kind -> DataFrame), the expected stored values.
    """
    from tubetrack.demo import generate_fleet

    fleet = generate_fleet(seed=seed, n_systems=n_systems, years=years)
    assert len(fleet.systems) == len(SYSTEM_IDS) and len(fleet.tubes) <= len(TUBE_IDS)
    smap = dict(zip(fleet.systems["system_id"], SYSTEM_IDS, strict=True))
    tmap = dict(zip(fleet.tubes["tube_id"], TUBE_IDS, strict=False))

    def hostile(frame):
        out = frame.copy()
        if "system_id" in out:
            out["system_id"] = out["system_id"].astype(object).map(smap)
        if "tube_id" in out:
            out["tube_id"] = out["tube_id"].astype(object).map(lambda t: tmap.get(t, t))
        return out

    systems = hostile(fleet.systems)
    systems["site"] = SITES[: len(systems)]
    events = hostile(fleet.events)
    events["raw_text"] = [RAW_TEXTS[i % len(RAW_TEXTS)] for i in range(len(events))]
    frames = {
        "systems": systems,
        "tubes": hostile(fleet.tubes),
        "exposures-all": hostile(fleet.exposures),
        "calibrations-all": hostile(fleet.calibrations),
        "events": events,
        "downtime": hostile(fleet.downtime),
    }
    root.mkdir(parents=True, exist_ok=True)
    for name, frame in frames.items():
        frame.to_csv(root / f"{name}.csv", index=False, date_format=TIME_FORMAT)
    return frames


def tubetrack_cmd(*args: str) -> list[str]:
    """argv of ``python -m tubetrack ARGS`` in this interpreter."""
    return [sys.executable, "-m", "tubetrack", *args]


def child_env(**extra: str) -> dict[str, str]:
    env = dict(os.environ, PYTHONUNBUFFERED="1", **extra)
    env.pop("TUBETRACK_DB", None)
    return env


def run_cli(*args: str, timeout: float = 300, **env: str) -> subprocess.CompletedProcess:
    """Run the CLI in a child process (text mode)."""
    return subprocess.run(
        tubetrack_cmd(*args),
        capture_output=True,
        text=True,
        timeout=timeout,
        env=child_env(**env),
    )


@pytest.fixture(scope="module")
def hostile_frames_and_logs(tmp_path_factory):
    root = tmp_path_factory.mktemp("hostile") / "logs"
    frames = write_hostile_logs(root)
    return frames, root
