"""``tubetrack export-lake``: the store as a Hive-partitioned Parquet lake (see docs/lake.md)."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from tubetrack.cli.common import (
    DbOption,
    FormatOption,
    OutputFormat,
    QuietOption,
    emit,
    handle_errors,
    stderr,
)


def register(app: typer.Typer) -> None:
    """Add ``export-lake`` to ``app``."""

    @app.command("export-lake")
    @handle_errors
    def export_lake_cmd(
        out: Annotated[
            Path,
            typer.Option(
                "--out",
                help="Lake folder to write. A new or empty folder, or an earlier lake "
                "(replaced atomically). Required.",
            ),
        ],
        partition_by: Annotated[
            str,
            typer.Option(
                "--partition-by",
                help="Partition columns of exposures, comma-separated: exposure columns or the "
                "derived year, month, day (UTC). Empty string = unpartitioned. system_id,month gives one "
                "small file per system and month: fine for a few dozen systems, slow for thousands.",
            ),
        ] = "month",
        compression: Annotated[
            str, typer.Option("--compression", help="Parquet codec: zstd, snappy, gzip or uncompressed.")
        ] = "zstd",
        db: DbOption = None,
        fmt: FormatOption = OutputFormat.table,
        quiet: QuietOption = False,
    ) -> None:
        """Write the canonical tables as Hive-partitioned Parquet (exposures by month by default).

        The lake is read by DuckDB, Spark or any Parquet reader; `tubetrack tubes --engine spark
        --lake PATH` analyses it on Spark. Written through a temporary folder and renamed into
        place, so readers never see a half-written lake.
        """
        import pandas as pd

        from tubetrack import store
        from tubetrack.lake import export_lake

        con = store.connect(db, read_only=True)
        try:
            result = export_lake(con, out, partition_by=partition_by, compression=compression)
        finally:
            con.close()
        frame = pd.DataFrame(
            {"table_name": list(result.rows), "rows": list(result.rows.values())}
        )
        emit(frame, fmt, title=f"lake {result.path}")
        stderr(
            f"wrote lake {result.path}: {sum(result.rows.values()):,} rows, {result.files:,} "
            f"Parquet files, {result.bytes / 2**20:,.1f} MiB, exposures partitioned by "
            f"{','.join(result.partition_by) or '(none)'}",
            quiet,
        )
