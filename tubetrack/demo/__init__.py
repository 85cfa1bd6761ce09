"""The invented demo fleet: a fictional regional hospital group whose tubes age by the physics.

Public API::

    generate_fleet(seed=20261202, n_systems=24, years=3.2, start="2022-09-01",
                   exposures_per_day=None, physics=True) -> DemoFleet
    write_sample_logs(fleet, out_dir, foreign_site="harrowgate", formats=...) -> list[Path]
"""

from tubetrack.demo.generate import (
    DEFAULT_SEED,
    DEFAULT_START,
    DEFAULT_WEAR_ACCELERATION,
    DEFAULT_YEARS,
    DemoFleet,
    generate_fleet,
)

__all__ = [
    "DEFAULT_SEED",
    "DEFAULT_START",
    "DEFAULT_WEAR_ACCELERATION",
    "DEFAULT_YEARS",
    "DemoFleet",
    "generate_fleet",
    "write_sample_logs",
]


def __getattr__(name: str):  # lazy: the writer pulls in duckdb only when used
    if name == "write_sample_logs":
        from tubetrack.demo.writer import write_sample_logs

        return write_sample_logs
    raise AttributeError(name)
