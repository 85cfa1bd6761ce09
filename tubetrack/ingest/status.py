"""What the store holds: the sections ``tubetrack status`` prints."""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:  # pragma: no cover
    import duckdb
    import pandas as pd

#: Section names in print order.
SECTIONS = (
    "overview",
    "systems",
    "tubes",
    "exposures_by_month",
    "files",
    "rejects_by_reason",
    "unmapped_dicom_devices",
)


@dataclass(frozen=True)
class StoreStatus:
    """One DataFrame per section (see :data:`SECTIONS`)."""

    sections: dict[str, pd.DataFrame]

    def as_json(self) -> dict[str, Any]:
        from tubetrack.cli.common import records

        out: dict[str, Any] = {}
        for name in SECTIONS:
            rows = records(self.sections[name])
            out[name] = rows[0] if name == "overview" and rows else rows
        return out

    def long(self) -> pd.DataFrame:
        """All sections in one long table: section, item, metric, value."""
        import pandas as pd

        parts = []
        for name in SECTIONS:
            frame = self.sections[name]
            if frame.empty:
                continue
            if name == "overview":
                m = pd.DataFrame(
                    {
                        "item": "",
                        "metric": list(frame.columns),
                        "value": frame.iloc[0].tolist(),
                    }
                )
            else:
                keys = [
                    c
                    for c in frame.columns
                    if not pd.api.types.is_numeric_dtype(frame[c])
                ]
                metrics = [c for c in frame.columns if c not in keys]
                item = frame[keys].astype(str).agg("/".join, axis=1) if keys else ""
                m = (
                    frame[metrics]
                    .astype(object)
                    .assign(item=item)
                    .melt(id_vars=["item"], var_name="metric", value_name="value")
                )
            m.insert(0, "section", name)
            parts.append(m[["section", "item", "metric", "value"]])
        if not parts:
            return pd.DataFrame(columns=["section", "item", "metric", "value"])
        return pd.concat(parts, ignore_index=True)


def store_status(con: duckdb.DuckDBPyConnection) -> StoreStatus:
    """Counts of what the store holds (all in SQL)."""
    q = lambda sql: con.execute(sql).df()  # noqa: E731
    sections = {
        "overview": q(
            """
            SELECT (SELECT count(*) FROM systems) AS systems,
                   (SELECT count(*) FROM tubes) AS tubes,
                   (SELECT count(*) FROM tubes WHERE removed_at_utc IS NULL) AS tubes_active,
                   (SELECT count(*) FROM tubes WHERE removed_at_utc IS NOT NULL) AS tubes_removed,
                   (SELECT count(*) FROM exposures) AS exposures,
                   (SELECT min(timestamp_utc) FROM exposures) AS first_exposure_utc,
                   (SELECT max(timestamp_utc) FROM exposures) AS last_exposure_utc,
                   (SELECT count(*) FROM calibrations) AS calibrations,
                   (SELECT count(*) FROM events) AS events,
                   (SELECT count(*) FROM downtime) AS downtime_periods,
                   (SELECT count(*) FROM ingest_files WHERE status = 'ingested') AS files_ingested,
                   (SELECT count(*) FROM rejects) AS rejects
            """
        ),
        "systems": q(
            """
            SELECT COALESCE(site, '(none)') AS site, COALESCE(modality, '(none)') AS modality,
                   count(*) AS systems
            FROM systems GROUP BY ALL ORDER BY site, modality
            """
        ),
        "tubes": q(
            """
            SELECT CASE WHEN removed_at_utc IS NULL THEN 'active' ELSE 'removed' END AS state,
                   COALESCE(removal_reason, '') AS removal_reason, count(*) AS tubes
            FROM tubes GROUP BY ALL ORDER BY state, removal_reason
            """
        ),
        "exposures_by_month": q(
            """
            SELECT strftime(date_trunc('month', timestamp_utc), '%Y-%m') AS month,
                   count(*) AS exposures, count(DISTINCT system_id) AS systems,
                   count(*) FILTER (WHERE source_kind = 'log') AS from_logs,
                   count(*) FILTER (WHERE source_kind <> 'log') AS from_dicom
            FROM exposures GROUP BY ALL ORDER BY month
            """
        ),
        "files": q(
            """
            SELECT status, COALESCE(table_kind, '') AS kind, count(*) AS files,
                   CAST(sum(rows_read) AS BIGINT) AS rows_read, CAST(sum(rows_accepted) AS BIGINT) AS rows_accepted,
                   CAST(sum(rows_rejected) AS BIGINT) AS rows_rejected, CAST(sum(rows_duplicate) AS BIGINT) AS rows_duplicate
            FROM ingest_files GROUP BY ALL ORDER BY status, kind
            """
        ),
        "rejects_by_reason": q(
            """
            SELECT split_part(reason, ':', 1) AS reason, COALESCE(field, '') AS field,
                   count(*) AS rejects, count(DISTINCT path) AS files
            FROM rejects GROUP BY ALL ORDER BY rejects DESC, reason, field
            """
        ),
        "unmapped_dicom_devices": q(
            """
            SELECT COALESCE(d.device_serial, '') AS device_serial,
                   COALESCE(d.station_name, '') AS station_name, d.system_id,
                   (SELECT count(*) FROM exposures e WHERE e.system_id = d.system_id)
                       AS exposures
            FROM dicom_devices d WHERE NOT d.mapped ORDER BY ALL
            """
        ),
    }
    return StoreStatus(sections)
