"""One Spark session per test run (local[2], 4 shuffle partitions) and one small demo lake."""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest


def _java_ok() -> bool:
    return shutil.which("java") is not None


@pytest.fixture(scope="session")
def spark_session():
    pytest.importorskip("pyspark", reason="pyspark not installed (pip install 'tubetrack[spark]')")
    if not _java_ok():
        pytest.skip("Java is not installed: Spark local mode needs a Java 17+ runtime")
    from tubetrack.engines.spark import spark_session as make

    spark = make("local[2]", shuffle_partitions=4)
    spark.sparkContext.setLogLevel("ERROR")
    yield spark
    spark.stop()


@pytest.fixture(scope="session")
def demo_store_and_lake(tmp_path_factory):
    """A small seeded demo fleet (4 systems, 1.5 years) in a store and exported as a lake."""
    from tubetrack import store
    from tubetrack.demo import generate_fleet
    from tubetrack.lake import export_lake

    root: Path = tmp_path_factory.mktemp("spark_lake")
    fleet = generate_fleet(seed=11, n_systems=4, years=1.5)
    db = root / "demo.duckdb"
    con = store.connect(db)
    for name in ("systems", "tubes", "exposures", "calibrations", "events", "downtime"):
        con.register("_df", getattr(fleet, name))
        con.execute(f"INSERT INTO {name} BY NAME SELECT * FROM _df")
        con.unregister("_df")
    lake = root / "lake"
    export_lake(con, lake)
    con.close()
    return db, lake
