"""Tube health: station drift, change points, physics-based wear, end-of-life forecasts, backtest.

Public API (imported lazily so that ``import tubetrack.health`` stays light)::

    analyse_fleet(con, as_of=None, params=None) -> HealthResult
    analyse_frames(daily, tubes, as_of, params=None, calibrations=None, events=None) -> HealthResult
    analyse_tube(daily, tube_meta, params=None, *, calibrations=None, events=None, physics=None)
    run_backtest(con, every_days=60, params=None) -> BacktestResult
    HealthParams, HealthResult, LEVELS
"""

from __future__ import annotations

from typing import Any

__all__ = ["analyse_fleet", "analyse_frames", "analyse_tube", "run_backtest", "HealthParams",
           "HealthResult", "BacktestResult", "LEVELS"]

_WHERE = {
    "analyse_fleet": "tubetrack.health.api",
    "analyse_frames": "tubetrack.health.api",
    "HealthResult": "tubetrack.health.api",
    "analyse_tube": "tubetrack.health.forecast",
    "run_backtest": "tubetrack.health.backtest",
    "BacktestResult": "tubetrack.health.backtest",
    "HealthParams": "tubetrack.health.params",
    "LEVELS": "tubetrack.health.levels",
}


def __getattr__(name: str) -> Any:
    if name in _WHERE:
        import importlib

        return getattr(importlib.import_module(_WHERE[name]), name)
    raise AttributeError(f"module 'tubetrack.health' has no attribute {name!r}")
