"""The local engine: DuckDB SQL over the store or a lake, per-tube work in a process pool."""

from __future__ import annotations

from datetime import datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any

from tubetrack.errors import InputError

if TYPE_CHECKING:  # pragma: no cover
    import duckdb


def run_health_local(
    *,
    con: duckdb.DuckDBPyConnection | None = None,
    lake: str | Path | None = None,
    as_of: datetime | None = None,
    params: Any = None,
) -> Any:
    """:func:`tubetrack.health.analyse_fleet` on an open store, or on a lake through DuckDB views.

    Parameters
    ----------
    con
        Open store; used when ``lake`` is not given.
    lake
        Lake folder (``tubetrack export-lake``); read with :func:`tubetrack.lake.open_lake`.
    as_of, params
        As for :func:`tubetrack.health.analyse_fleet`.
    """
    from tubetrack.health import analyse_fleet

    if lake is not None:
        from tubetrack.lake import open_lake

        lake_con = open_lake(lake)
        try:
            return analyse_fleet(lake_con, as_of=as_of, params=params)
        finally:
            lake_con.close()
    if con is None:
        raise InputError("the local engine needs an open store or --lake PATH.")
    return analyse_fleet(con, as_of=as_of, params=params)
