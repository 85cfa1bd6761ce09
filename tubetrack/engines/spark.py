"""The Spark engine: the health analysis over a Parquet lake on Apache Spark.

Stage 1 (aggregation) runs the SQL text of :mod:`tubetrack.health.sql` as Spark SQL after the
small dialect adapter :func:`to_spark_sql` (the only place that knows the differences). Stage 2
runs the pure per-tube function :func:`tubetrack.health.forecast.analyse_tube_task` in
``groupBy("tube_id").applyInPandas``: each tube's daily statistics never leave the executors; one
row per tube comes back (its result frames, serialised). Stage 3, the fleet step, is
:func:`tubetrack.health.api.analyse_frames` itself on the driver, given the per-tube results, so
the two engines share every line of model code.

pyspark is an optional extra (``pip install 'tubetrack[spark]'``), imported only here.
"""

from __future__ import annotations

import os
import pickle
import re
import sys
import threading
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from datetime import date, datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any

from tubetrack.errors import AnalysisError, TubetrackError

if TYPE_CHECKING:  # pragma: no cover
    import pandas as pd
    from pyspark.sql import SparkSession

DEFAULT_MASTER = "local[2]"
_PATCH_LOCK = threading.Lock()


class SparkUnavailableError(TubetrackError):
    """pyspark (or Java) is not installed."""


def _import_pyspark() -> Any:
    try:
        import pyspark
        from pyspark.sql import SparkSession  # noqa: F401
    except ImportError as exc:
        raise SparkUnavailableError(
            "the Spark engine needs pyspark: install it with `pip install 'tubetrack[spark]'` "
            "(and a Java 17+ runtime), or use --engine local."
        ) from exc
    return pyspark


# ----------------------------------------------------------------------------- session


def spark_session(
    master: str | None = None, *, shuffle_partitions: int | None = None
) -> SparkSession:
    """A Spark session for the analysis.

    The master comes from, in order: ``master``; a session that already runs (spark-submit,
    notebooks); ``SPARK_REMOTE`` (Spark Connect, handled by pyspark itself); ``spark.master`` in
    the Spark configuration; else ``local[2]``. Session settings the SQL relies on: time zone
    UTC, ``TIMESTAMP`` = timestamp without time zone (the store's naive UTC convention).
    """
    _import_pyspark()
    from pyspark.sql import SparkSession

    active = SparkSession.getActiveSession()
    if active is not None and master is None:
        _configure(active, shuffle_partitions)
        return active
    builder = SparkSession.builder.appName("tubetrack")
    if master:
        builder = builder.master(master)
    elif not os.environ.get("SPARK_REMOTE") and "spark.master" not in os.environ.get(
        "PYSPARK_SUBMIT_ARGS", ""
    ):
        builder = builder.master(DEFAULT_MASTER)
    resolved = master or DEFAULT_MASTER
    if resolved.startswith("local") and not os.environ.get("PYSPARK_PYTHON"):
        # local workers must run this interpreter (the one with tubetrack installed)
        builder = builder.config("spark.pyspark.python", sys.executable)
        os.environ.setdefault("PYSPARK_PYTHON", sys.executable)
    builder = (
        builder.config("spark.ui.enabled", "false")
        .config("spark.sql.session.timeZone", "UTC")
        .config("spark.sql.timestampType", "TIMESTAMP_NTZ")
        .config("spark.sql.execution.arrow.pyspark.enabled", "true")
        .config("spark.sql.shuffle.partitions", str(shuffle_partitions or 8))
        .config("spark.driver.extraJavaOptions", "-Duser.timezone=UTC")
        .config("spark.executor.extraJavaOptions", "-Duser.timezone=UTC")
    )
    try:
        spark = builder.getOrCreate()
    except Exception as exc:  # Java missing or a bad master URL: say so plainly
        raise SparkUnavailableError(
            f"cannot start a Spark session (master {resolved!r}): {str(exc).splitlines()[0][:300]}. "
            "Check that Java 17+ is installed (java -version) and the master URL is right."
        ) from exc
    _configure(spark, shuffle_partitions)
    return spark


def _configure(spark: SparkSession, shuffle_partitions: int | None) -> None:
    spark.conf.set("spark.sql.session.timeZone", "UTC")
    spark.conf.set("spark.sql.timestampType", "TIMESTAMP_NTZ")
    if shuffle_partitions:
        spark.conf.set("spark.sql.shuffle.partitions", str(shuffle_partitions))


# ----------------------------------------------------------------------------- dialect adapter


def _literal(value: Any) -> str:
    """A Spark SQL literal for a bound parameter of the DuckDB query."""
    import pandas as pd

    if value is None or (isinstance(value, float) and value != value):
        return "NULL"
    if isinstance(value, bool):
        return "TRUE" if value else "FALSE"
    if isinstance(value, int | float):
        return repr(float(value)) if isinstance(value, float) else str(int(value))
    if isinstance(value, datetime | pd.Timestamp):
        return f"TIMESTAMP '{pd.Timestamp(value).strftime('%Y-%m-%d %H:%M:%S.%f')}'"
    if isinstance(value, date):
        return f"DATE '{value.isoformat()}'"
    text = str(value).replace("\\", "\\\\").replace("'", "\\'")
    return f"'{text}'"


_STAR_REPLACE = re.compile(r"(\w+)\.\*\s+REPLACE\s*\((.*?)\)\s*(?=FROM\b)", re.S | re.I)
_STAR_EXCLUDE = re.compile(r"(\w+)\.\*\s+EXCLUDE\s*\(", re.I)


def to_spark_sql(
    sql: str,
    params: Sequence[Any] = (),
    columns: dict[str, Sequence[str]] | None = None,
) -> str:
    """Rewrite one DuckDB query of tubetrack as Spark SQL.

    The differences handled (and the only ones the health SQL uses):

    * ``?`` parameters become literals (values are our own dates and numbers, never log text);
    * ``alias.* EXCLUDE (c)`` -> ``alias.* EXCEPT (c)``;
    * ``alias.* REPLACE (expr AS c)`` -> the column list of ``columns[alias]`` with ``c``
      replaced by ``expr``;
    * ``CREATE OR REPLACE VIEW`` -> ``CREATE OR REPLACE TEMPORARY VIEW``.
    """
    out = sql

    def repl_replace(m: re.Match[str]) -> str:
        alias, body = m.group(1), m.group(2)
        cols = list((columns or {}).get(alias, ()))
        if not cols:
            raise ValueError(
                f"to_spark_sql needs the columns of alias {alias!r} to expand REPLACE"
            )
        exprs = {}
        for part in re.split(r",(?![^()]*\))", body):
            expr, _, name = part.strip().rpartition(" AS ")
            exprs[name.strip()] = expr.strip()
        return (
            ", ".join(
                f"{exprs[c]} AS {c}" if c in exprs else f"{alias}.{c}" for c in cols
            )
            + "\n"
        )

    out = _STAR_REPLACE.sub(repl_replace, out)
    out = _STAR_EXCLUDE.sub(lambda m: f"{m.group(1)}.* EXCEPT (", out)
    out = re.sub(
        r"CREATE\s+OR\s+REPLACE\s+VIEW",
        "CREATE OR REPLACE TEMPORARY VIEW",
        out,
        flags=re.I,
    )
    pieces = out.split("?")
    if len(pieces) - 1 != len(params):
        raise ValueError(f"query has {len(pieces) - 1} parameters, {len(params)} given")
    text = pieces[0]
    for value, piece in zip(params, pieces[1:], strict=True):
        text += _literal(value) + piece
    return text.rstrip().rstrip(";")


# ----------------------------------------------------------------------------- lake views


def register_lake(spark: SparkSession, lake_path: str | Path) -> dict:
    """Temporary views over the lake with the store's table names (and ``v_exposures``).

    Files are listed recursively and every column, the partition columns included, is read
    from the files (never parsed from folder names), as in :func:`tubetrack.lake.attach_lake`.
    """
    from tubetrack.lake import read_manifest
    from tubetrack.store import VIEWS_V1

    manifest = read_manifest(lake_path)
    for table, cols in manifest["columns"].items():
        names = [c for c, _ in cols]
        frame = spark.read.option("recursiveFileLookup", "true").parquet(
            str(Path(lake_path) / table)
        )
        frame.select(*names).createOrReplaceTempView(table)
    cols = manifest["columns"]
    if "exposures" in cols and "tubes" in cols:
        spark.sql(to_spark_sql(VIEWS_V1, (), {"e": [c for c, _ in cols["exposures"]]}))
    return manifest


# ----------------------------------------------------------------------------- frames


def _reference_dtypes(
    query: str, n_params: int, extra: Sequence[Any] = ()
) -> dict[str, Any]:
    """Column dtypes DuckDB gives the query on an empty store (the local engine's frames)."""
    from tubetrack import store

    con = store.connect(":memory:")
    try:
        params = [None] * (n_params - len(extra)) + list(extra)
        return dict(con.execute(query, params).df().dtypes)
    finally:
        con.close()


def conform(
    frame: pd.DataFrame, dtypes: dict[str, Any], order: Sequence[str] = ()
) -> pd.DataFrame:
    """Give a Spark-made pandas frame the local engine's column order and dtypes (and row order)."""
    import pandas as pd

    out = frame[[c for c in dtypes if c in frame.columns]].copy()
    for col, dtype in dtypes.items():
        if col not in out.columns:
            continue
        kind = getattr(dtype, "kind", "O")
        if kind == "M":
            out[col] = pd.to_datetime(out[col]).astype(dtype)
        elif kind in "fiub":
            out[col] = out[col].astype(dtype)
    if order:
        out = out.sort_values(list(order), kind="mergesort", ignore_index=True)
    return out.reset_index(drop=True)


def _collect(spark: SparkSession, sql: str) -> pd.DataFrame:
    return spark.sql(sql).toPandas()


# ----------------------------------------------------------------------------- the fleet step


class _Captured(Exception):
    def __init__(self, tasks: list[tuple]) -> None:
        super().__init__("tasks captured")
        self.tasks = tasks


@contextmanager
def _runner(fn: Callable[[list[tuple], Any], list[dict[str, Any]]]) -> Iterator[None]:
    """Run :func:`tubetrack.health.api.analyse_frames` with its per-tube runner replaced.

    analyse_frames builds the per-tube tasks (tube metadata, as-of cut per tube) and then calls
    ``api._run(tasks, params)``; the fleet step that follows is what we want to share. Until the
    health package publishes a runner argument, the runner is swapped here, under a lock.
    """
    from tubetrack.health import api

    with _PATCH_LOCK:
        original = api._run
        api._run = fn  # type: ignore[assignment]
        try:
            yield
        finally:
            api._run = original  # type: ignore[assignment]


def run_health_spark(
    lake_path: str | Path,
    *,
    as_of: datetime | None = None,
    params: Any = None,
    master: str | None = None,
    spark: SparkSession | None = None,
) -> Any:
    """The fleet health analysis of a lake on Spark; same result as the local engine.

    Parameters
    ----------
    lake_path
        Lake folder (``tubetrack export-lake``), local or any path Spark can read.
    as_of
        Analysis date (UTC); default: the day after the last exposure.
    params
        :class:`tubetrack.health.HealthParams`.
    master
        Spark master URL; see :func:`spark_session`.
    spark
        An existing session to use (tests, notebooks).

    Returns
    -------
    tubetrack.health.HealthResult
    """
    from tubetrack.health import api
    from tubetrack.health import sql as hsql
    from tubetrack.health.params import HealthParams

    p = params or HealthParams()
    spark = spark or spark_session(master)
    register_lake(spark, lake_path)

    # the analysis date, as the local engine chooses it
    first, last = spark.sql(to_spark_sql(hsql.DATA_SPAN_SQL, [])).collect()[0]
    cut = api.analysis_date(
        first, last, as_of, "the lake holds no exposures. Export a store with exposures first."
    )

    # stage 1: aggregation (stays distributed for the exposures)
    tol = hsql.MA_MISS_TOLERANCE
    daily_sdf = spark.sql(to_spark_sql(hsql.DAILY_SQL, [cut, cut, tol]))
    daily_types = _reference_dtypes(hsql.DAILY_SQL, 3, [tol])
    keys = ["tube_id", "focal_spot", "tube_current_ma", "day"]
    cal = conform(
        _collect(spark, to_spark_sql(hsql.CALIBRATION_SQL, [cut, cut])),
        _reference_dtypes(hsql.CALIBRATION_SQL, 2),
        keys,
    )
    ev = conform(
        _collect(spark, to_spark_sql(hsql.EVENTS_SQL, [cut, cut])),
        _reference_dtypes(hsql.EVENTS_SQL, 2),
        ["tube_id", "category", "day"],
    )
    tubes = conform(
        _collect(spark, to_spark_sql(hsql.TUBES_SQL, [None] * 6)),
        _reference_dtypes(hsql.TUBES_SQL, 6),
        ["tube_id"],
    )
    # one row per tube with data: enough for analyse_frames to build the tasks (pass 1)
    first_days = conform(
        daily_sdf.groupBy("tube_id")
        .agg({"day": "min"})
        .withColumnRenamed("min(day)", "day")
        .toPandas(),
        {"tube_id": daily_types["tube_id"], "day": daily_types["day"]},
        ["tube_id"],
    )

    def capture(tasks: list[tuple], _p: Any) -> list[dict[str, Any]]:
        raise _Captured(tasks)

    with _runner(capture):
        try:
            api.analyse_frames(first_days, tubes, cut, p, calibrations=cal, events=ev)
            tasks: list[tuple] = []
        except _Captured as got:
            tasks = got.tasks
    # per tube: (meta, params, calibrations, events) exactly as the local engine builds them
    extras = {t[1]["tube_id"]: (t[1], t[3], t[4]) for t in tasks}
    extras_b = spark.sparkContext.broadcast(
        pickle.dumps((extras, p, daily_types, keys))
    )

    # stage 2: the pure per-tube function, next to the data
    def per_tube(pdf: pd.DataFrame) -> pd.DataFrame:
        import pickle as _pickle

        import pandas as _pd

        from tubetrack.engines.spark import conform as _conform
        from tubetrack.health.forecast import analyse_tube_task as _task

        ex, params_, types_, keys_ = _pickle.loads(extras_b.value)
        tid = str(pdf["tube_id"].iloc[0])
        if tid not in ex:
            return _pd.DataFrame(
                {
                    "tube_id": _pd.Series([], dtype=str),
                    "payload": _pd.Series([], dtype=object),
                }
            )
        meta, calib, events = ex[tid]
        daily = _conform(pdf, types_, keys_)
        result = _task((daily, meta, params_, calib, events))
        return _pd.DataFrame(
            {"tube_id": [tid], "payload": [_pickle.dumps(result, protocol=5)]}
        )

    rows = (
        daily_sdf.groupBy("tube_id")
        .applyInPandas(per_tube, schema="tube_id string, payload binary")
        .collect()
    )
    by_tube = {r["tube_id"]: pickle.loads(r["payload"]) for r in rows}
    extras_b.unpersist()

    # stage 3: the fleet step of the local engine, fed with the Spark results (pass 2)
    def replay(tasks2: list[tuple], _p: Any) -> list[dict[str, Any]]:
        out = []
        for t in tasks2:
            tid = t[1]["tube_id"]
            if (
                tid not in by_tube
            ):  # pragma: no cover - every task's tube has daily rows
                raise AnalysisError(
                    f"Spark returned no result for tube {tid!r}; rerun, or use --engine local."
                )
            out.append(by_tube[tid])
        return out

    with _runner(replay):
        return api.analyse_frames(
            first_days, tubes, cut, p, calibrations=cal, events=ev
        )
