"""Fixtures of the report tests: synthetic result frames shaped like the health and fleet result tables, chromium."""

from __future__ import annotations

import importlib.util
import shutil
import sys
from pathlib import Path

import pytest

_HERE = Path(__file__).resolve().parent


def _load_synthetic():
    name = "tubetrack_tests_reports_synthetic"
    if name in sys.modules:
        return sys.modules[name]
    spec = importlib.util.spec_from_file_location(name, _HERE / "synthetic.py")
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module
    spec.loader.exec_module(module)
    return module


synthetic = _load_synthetic()


@pytest.fixture(scope="session")
def synth():
    """The synthetic-frames module (make_results, hostile strings)."""
    return synthetic


@pytest.fixture(scope="session")
def results():
    """Six tubes, 400 days, plain ids."""
    return synthetic.make_results(6, 400, seed=7)


@pytest.fixture(scope="session")
def hostile_results():
    """Like ``results`` but tube id, site name and fault texts carry markup and quotes."""
    return synthetic.make_results(4, 300, seed=11, hostile=True)


def report_inputs(r, **extra):
    from tubetrack.report import ReportInputs

    keys = ("health", "rul_cdf", "drift", "diameter", "projection", "changepoints", "systems", "tubes",
            "fault_rates", "km", "weibull_curve", "weibull_params", "forecast", "budget", "spares",
            "uptime", "downtime", "backtest_cases", "backtest_outcomes", "rejects", "ingest_files")
    kwargs = {k: r[k] for k in keys}
    kwargs.update(extra)
    return ReportInputs(**kwargs)


@pytest.fixture(scope="session")
def make_inputs():
    """Callable(results dict, **overrides) -> ReportInputs."""
    return report_inputs


@pytest.fixture(scope="session")
def chromium_path():
    """Path of Debian's chromium (skips the test with the reason when absent)."""
    for name in ("chromium", "chromium-browser", "google-chrome", "chrome"):
        found = shutil.which(name)
        if found:
            return found
    pytest.skip("chromium is not installed (CI installs Debian's chromium in .ci/run; "
                "locally: apt-get install -y chromium)")
