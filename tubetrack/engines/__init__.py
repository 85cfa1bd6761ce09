"""Where the health analysis runs: the local engine (DuckDB + process pool) or Apache Spark.

Both engines run the same two stages (see docs/scaling.md):

1. aggregation of exposure rows to per tube x focal spot x mA station x day statistics, the SQL
   text of :mod:`tubetrack.health.sql`, run by DuckDB (store or lake) or by Spark SQL (lake);
2. the pure per-tube function :func:`tubetrack.health.forecast.analyse_tube` on each tube's small
   frame, in a local process pool or through Spark's ``groupBy("tube_id").applyInPandas``;

then the same fleet step (empirical-Bayes prior, end-of-life threshold, forecasts, levels) on the
driver. The results are the frames of :class:`tubetrack.health.api.HealthResult`.

The CLI hook is :func:`run_health`; pyspark is imported only by the Spark engine.
"""

from __future__ import annotations

from datetime import datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any

from tubetrack.errors import InputError

if TYPE_CHECKING:  # pragma: no cover
    import duckdb

ENGINES = ("local", "spark")


def run_health(
    engine: str,
    *,
    con: duckdb.DuckDBPyConnection | None = None,
    lake: str | Path | None = None,
    as_of: datetime | None = None,
    params: Any = None,
    master: str | None = None,
) -> Any:
    """Run the fleet health analysis on the chosen engine.

    Parameters
    ----------
    engine
        ``"local"`` (DuckDB SQL + process pool) or ``"spark"`` (Spark SQL + applyInPandas).
    con
        Open store (local engine only). Either ``con`` or ``lake`` is needed for ``local``.
    lake
        Lake folder written by ``tubetrack export-lake`` (required for ``spark``).
    as_of
        Analysis date (UTC); only data before it are used. Default: the day after the last
        exposure.
    params
        :class:`tubetrack.health.HealthParams` (default parameters when ``None``).
    master
        Spark master URL (``local[4]``, ``spark://host:7077``, ``yarn`` ...); default: the
        ``SPARK_REMOTE`` / spark-submit configuration, else ``local[2]``.

    Returns
    -------
    tubetrack.health.HealthResult
    """
    name = (engine or "").strip().lower()
    if name == "local":
        from tubetrack.engines.local import run_health_local

        if master:
            raise InputError(
                "--master applies to --engine spark only. Drop it, or add --engine spark."
            )
        return run_health_local(con=con, lake=lake, as_of=as_of, params=params)
    if name == "spark":
        from tubetrack.engines.spark import run_health_spark

        if lake is None:
            raise InputError(
                "--engine spark reads a Parquet lake: give --lake PATH "
                "(write one with `tubetrack export-lake --out PATH`)."
            )
        return run_health_spark(lake, as_of=as_of, params=params, master=master)
    raise InputError(f"--engine is {engine!r}; choose one of {', '.join(ENGINES)}.")


__all__ = ["ENGINES", "run_health"]
