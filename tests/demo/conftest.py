"""Fixtures of the demo tests: small seeded fleets, generated once per session."""

from __future__ import annotations

import pytest

from tubetrack.demo import generate_fleet

SMALL = {"seed": 11, "n_systems": 8, "years": 1.2}


@pytest.fixture(scope="session")
def small_fleet():
    """An 8-system, 1.2-year fleet aged by the physics package (fixed seed)."""
    return generate_fleet(**SMALL)


@pytest.fixture(scope="session")
def small_logs(small_fleet, tmp_path_factory):
    """The small fleet written as a sample-log tree (no DICOM)."""
    from tubetrack.demo import write_sample_logs

    out = tmp_path_factory.mktemp("sample_logs_small")
    paths = write_sample_logs(small_fleet, out, dicom=False)
    return out, paths
