"""Walk paths, choose a profile and kind per file, ingest each file, hand DICOM files on.

:func:`ingest_paths` is the Python API behind ``tubetrack ingest``. Files are ingested in this
order: inventory (systems, then tubes) first, so later checks can use it (fluoroscopy systems may
log long runs), then the other log files by path, then DICOM files through
``tubetrack.ingest.dicom.ingest_dicom_paths`` when that module is installed.
"""

from __future__ import annotations

import importlib
from collections.abc import Iterable
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any, Protocol

from tubetrack.errors import InputError
from tubetrack.ingest.engine import Preview, ingest_batch, ingest_file
from tubetrack.ingest.layout import KINDS, SKIP_NAME_PREFIXES, kind_from_name
from tubetrack.ingest.profiles import Profile, folder_profiles, load_profile
from tubetrack.ingest.reader import ScanAhead, base_suffix, is_dicom, is_log_name
from tubetrack.ingest.report import (
    REPORT_COLUMNS,
    STATUS_ALREADY,
    STATUS_FAILED,
    STATUS_SKIPPED,
    FileReport,
)

if TYPE_CHECKING:  # pragma: no cover
    import duckdb
    import pandas as pd


class IngestProgress(Protocol):
    """What :func:`ingest_paths` reports while it works (all methods optional to implement)."""

    def start(self, total_files: int, total_bytes: int) -> None: ...

    def file_started(self, path: str, size_bytes: int) -> None: ...

    def file_done(self, report: FileReport) -> None: ...


@dataclass(frozen=True)
class IngestSummary:
    """Result of one ingest run: one :class:`FileReport` per file, in processing order."""

    reports: tuple[FileReport, ...]
    previews: tuple[tuple[str, Preview], ...] = ()

    @property
    def summary(self) -> pd.DataFrame:
        """One row per file: path, kind, profile, status, rows_read, rows_accepted,
        rows_rejected, rows_duplicate, message."""
        import pandas as pd

        return pd.DataFrame(
            [r.as_row() for r in self.reports], columns=list(REPORT_COLUMNS)
        )

    def total(self, name: str) -> int:
        return sum(int(getattr(r, name)) for r in self.reports)

    @property
    def failed(self) -> tuple[FileReport, ...]:
        return tuple(r for r in self.reports if r.status == STATUS_FAILED)

    @property
    def ok(self) -> bool:
        return not self.failed

    @property
    def reconciles(self) -> bool:
        return all(r.reconciles for r in self.reports)

    def line(self) -> str:
        """The one-line summary printed at the end of a run."""
        counts: dict[str, int] = {}
        for r in self.reports:
            counts[r.status] = counts.get(r.status, 0) + 1
        files = ", ".join(
            f"{n} {s.replace('_', ' ')}" for s, n in sorted(counts.items())
        )
        return (
            f"{len(self.reports)} files ({files or 'none'}): rows read {self.total('rows_read'):,} = "
            f"accepted {self.total('rows_accepted'):,} + rejected {self.total('rows_rejected'):,} "
            f"+ duplicate {self.total('rows_duplicate'):,}"
        )


@dataclass(frozen=True)
class _Job:
    path: Path
    shown: str
    profile: Profile | None
    dicom: bool = False
    skip_reason: str = ""


_KIND_ORDER = {
    k: i
    for i, k in enumerate(
        ("systems", "tubes", *[k for k in KINDS if k not in ("systems", "tubes")])
    )
}


def _skip_name(name: str) -> bool:
    low = name.lower()
    return any(low.startswith(p) for p in SKIP_NAME_PREFIXES)


def plan_jobs(
    paths: Iterable[str | Path], profile: Profile | None = None
) -> list[_Job]:
    """Expand folders (recursively) into files and pick each file's profile.

    ``profile`` (``--profile``) applies to every file named directly and, inside folders, to the
    files its ``files`` globs match (all files when it has none). Without it, a folder's own
    ``profiles/*.toml`` apply to the files their globs match (first match by file name wins).
    """
    jobs: list[_Job] = []
    seen: set[Path] = set()
    for raw in paths:
        root = Path(raw)
        if not root.exists():
            raise InputError(f"{raw}: no such file or folder. Check the path.")
        if root.is_file():
            if root.resolve() in seen:
                continue
            seen.add(root.resolve())
            if is_dicom(root):
                jobs.append(_Job(root, str(root), None, dicom=True))
            elif not is_log_name(root) and profile is None:
                jobs.append(_Job(root, str(root), None, skip_reason=_unsupported(root)))
            else:
                jobs.append(_Job(root, str(root), profile))
            continue
        auto = [] if profile is not None else folder_profiles(root)
        for f in sorted(root.rglob("*")):
            if not f.is_file():
                continue
            rel = f.relative_to(root)
            if (
                any(_skip_name(part) for part in rel.parts)
                or "profiles" in rel.parts[:-1]
            ):
                continue
            if f.resolve() in seen:
                continue
            seen.add(f.resolve())
            if is_dicom(f):
                jobs.append(_Job(f, str(f), None, dicom=True))
                continue
            if not is_log_name(f):
                continue  # documentation, images, ... inside a folder: not ours to report
            chosen = None
            if profile is not None:
                chosen = (
                    profile
                    if profile.matches(rel.as_posix()) or not profile.files
                    else None
                )
            else:
                chosen = next(
                    (pr for pr in auto if pr.files and pr.matches(rel.as_posix())), None
                )
            jobs.append(_Job(f, str(f), chosen))

    def order(j: _Job) -> tuple[int, int, str]:
        if j.dicom:
            return (2, 0, j.shown)
        k = j.profile.kind if j.profile else kind_from_name(j.path.name)
        return (
            0 if k in ("systems", "tubes") else 1,
            _KIND_ORDER.get(k or "", 99),
            j.shown,
        )

    return sorted(jobs, key=order)


def _unsupported(path: Path) -> str:
    return (
        f"{path}: not a log format tubetrack reads (.csv, .tsv, .txt, .jsonl, .parquet, "
        "optionally .gz, or DICOM); give a profile with format = ... if it is one"
    )


def ingest_paths(
    con: duckdb.DuckDBPyConnection,
    paths: Iterable[str | Path],
    *,
    profile: str | Path | Profile | None = None,
    kind: str | None = None,
    dry_run: bool = False,
    progress: Any = None,
    now_utc: datetime | None = None,
    preview_rows: int = 0,
) -> IngestSummary:
    """Ingest files and folders into the store.

    Parameters
    ----------
    con
        Open store (``tubetrack.store.connect``).
    paths
        Files or folders (walked recursively; ``truth*``, ``README*`` and hidden files skipped).
    profile
        A profile file, a built-in profile name, or a loaded :class:`Profile` applied as
        ``--profile`` does (see :func:`plan_jobs`). Default: folders' own ``profiles/*.toml``.
    kind
        Table kind for files whose name does not decide it (``exposures``, ``calibrations``,
        ``events``, ``downtime``, ``systems``, ``tubes``).
    dry_run
        Read and validate, write nothing (DICOM files are not read on a dry run).
    progress
        Object with optional ``start(total_files, total_bytes)``, ``file_started(path, size)``,
        ``file_done(report)`` methods.
    now_utc
        Reference time for the "not in the future" check (default: now, UTC).
    preview_rows
        On a dry run, keep this many canonical rows and rejects per file (``.previews``).

    Returns
    -------
    IngestSummary
        One report per file; a file-level failure never stops the other files.
    """
    if kind is not None and kind not in KINDS:
        raise InputError(
            f"--kind {kind!r} is not a table kind; allowed: {', '.join(KINDS)}."
        )
    prof = load_profile(profile) if isinstance(profile, str | Path) else profile
    try:
        con.execute("SET TimeZone = 'UTC'")
    except Exception:  # pragma: no cover - ICU missing
        pass
    con.execute(
        "SET enable_progress_bar = false"
    )  # our own bar, on stderr, when wanted
    jobs = plan_jobs(paths, prof)
    _call(progress, "start", len(jobs), sum(_size(j.path) for j in jobs))
    reports: list[FileReport] = []
    previews: list[tuple[str, Preview]] = []
    dicom_jobs: list[_Job] = []
    with ScanAhead() as ahead:
        _ingest_jobs(con, jobs, kind, dry_run, progress, now_utc, preview_rows, ahead,
                     reports, previews, dicom_jobs)
    if dicom_jobs:
        reports.extend(_ingest_dicom(con, dicom_jobs, dry_run, progress))
    return IngestSummary(tuple(reports), tuple(previews))


def _scan_window(run: list[_Job], batches: int = 2) -> list[Path]:
    """The first files of ``run`` that up to ``batches`` batches can take (by count and bytes):
    scanned ahead, the next batch's files are hashed while this one is in DuckDB."""
    from tubetrack.ingest.engine import BATCH_MAX_FILES, BATCH_MAX_TOTAL_BYTES

    out, total = [], 0
    for job in run[: batches * BATCH_MAX_FILES]:
        total += _size(job.path)
        if total > batches * BATCH_MAX_TOTAL_BYTES and out:
            break
        out.append(job.path)
    return out


def _ingest_jobs(
    con: duckdb.DuckDBPyConnection,
    jobs: list[_Job],
    kind: str | None,
    dry_run: bool,
    progress: Any,
    now_utc: datetime | None,
    preview_rows: int,
    ahead: ScanAhead,
    reports: list[FileReport],
    previews: list[tuple[str, Preview]],
    dicom_jobs: list[_Job],
) -> None:
    """The loop of :func:`ingest_paths` over its planned jobs (DICOM files are collected)."""
    no_batch_until = 0
    skip_to = 0
    for i, job in enumerate(jobs):
        if job.dicom:
            dicom_jobs.append(job)
            continue
        if skip_to > i:
            continue
        if not dry_run and i >= no_batch_until and _batchable(job):
            run = [job]
            for nxt in jobs[i + 1 :]:
                if not _batchable(nxt) or kind_from_name(
                    nxt.path.name
                ) != kind_from_name(job.path.name):
                    break
                run.append(nxt)
            if len(run) >= 2:
                ahead.prefetch(_scan_window(run))
                taken, tried = ingest_batch(
                    con, [(j.path, j.shown) for j in run], now_utc=now_utc, scans_from=ahead
                )
                if taken:
                    for rep in taken:
                        _call(progress, "file_started", rep.path, _size(Path(rep.path)))
                        reports.append(rep)
                        _call(progress, "file_done", rep)
                    skip_to = i + len(taken)
                    continue
                # a failed run is read file by file (each file names its own rejects)
                no_batch_until = i + max(tried, 1)
        _call(progress, "file_started", job.shown, _size(job.path))
        if job.skip_reason:
            rep = FileReport(
                job.shown, None, None, STATUS_SKIPPED, message=job.skip_reason
            )
        else:
            rep, prev = ingest_file(
                con,
                job.path,
                shown=job.shown,
                profile=job.profile,
                kind=kind,
                dry_run=dry_run,
                now_utc=now_utc,
                preview_rows=preview_rows,
            )
            if prev is not None:
                previews.append((job.shown, prev))
        reports.append(rep)
        _call(progress, "file_done", rep)


def _batchable(job: _Job) -> bool:
    """An open-layout ``.csv`` whose name gives a log kind: may share a scan with its neighbours
    (:func:`tubetrack.ingest.engine.ingest_batch` checks the rest)."""
    if job.dicom or job.skip_reason or job.profile is not None:
        return False
    k = kind_from_name(job.path.name)
    return (
        k is not None
        and not KINDS[k].upsert
        and base_suffix(job.path) == ".csv"
        and not job.path.name.lower().endswith(".gz")
    )


def _ingest_dicom(
    con: duckdb.DuckDBPyConnection, jobs: list[_Job], dry_run: bool, progress: Any
) -> list[FileReport]:
    def skipped(msg: str) -> list[FileReport]:
        out = [
            FileReport(j.shown, "dicom", None, STATUS_SKIPPED, message=msg)
            for j in jobs
        ]
        for r in out:
            _call(progress, "file_done", r)
        return out

    if dry_run:
        return skipped("dry run: DICOM files are not read")
    try:
        mod = importlib.import_module("tubetrack.ingest.dicom")
    except ImportError:
        return skipped("DICOM support not installed")
    fn = getattr(mod, "ingest_dicom_paths", None)
    if fn is None:
        return skipped("DICOM support not installed")
    results = fn(con, [j.path for j in jobs], progress=progress)
    out = []
    for r in results or []:
        rep = r if isinstance(r, FileReport) else FileReport.from_mapping(dict(r))
        out.append(rep)
        _call(progress, "file_done", rep)
    return out


def _size(path: Path) -> int:
    try:
        return path.stat().st_size
    except OSError:
        return 0


def _call(obj: Any, name: str, *args: Any) -> None:
    fn = getattr(obj, name, None) if obj is not None else None
    if callable(fn):
        fn(*args)


__all__ = [
    "IngestSummary",
    "IngestProgress",
    "ingest_paths",
    "plan_jobs",
    "STATUS_ALREADY",
]
