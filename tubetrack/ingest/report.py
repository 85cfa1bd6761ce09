"""Per-file ingest reports, shared by the log walker and the DICOM reader.

A :class:`FileReport` is what one input file came to: its table kind, the profile used, its status
and the reconciliation ``rows_read = rows_accepted + rows_rejected + rows_duplicate``. The same
fields are stored in ``ingest_files`` and printed by ``tubetrack ingest``.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from typing import Any

#: Status values a file can end in.
STATUS_INGESTED = "ingested"  # rows written (possibly zero new rows, all duplicates)
STATUS_ALREADY = "already_ingested"  # same sha256 already ingested: reported no-op
STATUS_FAILED = (
    "failed"  # file rejected whole; nothing written except the ingest_files row
)
STATUS_SKIPPED = (
    "skipped"  # not a log file we read (README, truth file, unsupported format)
)
STATUS_DRY_RUN = "dry_run"  # parsed and validated, nothing written

STATUSES = (
    STATUS_INGESTED,
    STATUS_ALREADY,
    STATUS_FAILED,
    STATUS_SKIPPED,
    STATUS_DRY_RUN,
)


@dataclass(frozen=True)
class FileReport:
    """What ingesting one file came to.

    Attributes
    ----------
    path
        The file as given or found by the walker.
    kind
        Table kind: exposures | calibrations | events | downtime | systems | tubes | dicom, or
        ``None`` when it could not be decided.
    profile
        Name of the layout profile used (``None`` = our own open layout).
    status
        One of :data:`STATUSES`.
    rows_read
        Data rows read from the file (header excluded) [count].
    rows_accepted
        Rows written to the store (or that would be, on a dry run) [count].
    rows_rejected
        Rows written to ``rejects`` [count].
    rows_duplicate
        Rows already in the store under their natural key, or repeated within the file [count].
    message
        For failed or skipped files: what went wrong and the next step; else empty.
    sha256
        Hex digest of the file's bytes (empty when not read).
    file_id
        ``ingest_files.file_id`` of the stored row, ``None`` on a dry run or when not stored.
    """

    path: str
    kind: str | None
    profile: str | None
    status: str
    rows_read: int = 0
    rows_accepted: int = 0
    rows_rejected: int = 0
    rows_duplicate: int = 0
    message: str = ""
    sha256: str = ""
    file_id: int | None = None
    extra: dict[str, Any] = field(default_factory=dict, compare=False, hash=False)

    @property
    def reconciles(self) -> bool:
        """True when rows_read = accepted + rejected + duplicate."""
        return (
            self.rows_read
            == self.rows_accepted + self.rows_rejected + self.rows_duplicate
        )

    @property
    def failed(self) -> bool:
        return self.status == STATUS_FAILED

    def as_row(self) -> dict[str, Any]:
        """One output row (the columns ``tubetrack ingest`` prints)."""
        d = asdict(self)
        d.pop("extra", None)
        d.pop("sha256", None)
        d.pop("file_id", None)
        return d

    @classmethod
    def from_mapping(cls, data: dict[str, Any]) -> FileReport:
        """Build a report from a dict (e.g. one returned by the DICOM reader); unknown keys go
        to ``extra``."""
        known = {f for f in cls.__dataclass_fields__ if f != "extra"}
        kwargs = {k: v for k, v in data.items() if k in known}
        extra = {k: v for k, v in data.items() if k not in known}
        kwargs.setdefault("kind", "dicom")
        kwargs.setdefault("profile", None)
        kwargs.setdefault("status", STATUS_INGESTED)
        kwargs["path"] = str(kwargs.get("path", ""))
        return cls(**kwargs, extra=extra)


#: Column order of the per-file result table.
REPORT_COLUMNS = (
    "path",
    "kind",
    "profile",
    "status",
    "rows_read",
    "rows_accepted",
    "rows_rejected",
    "rows_duplicate",
    "message",
)
