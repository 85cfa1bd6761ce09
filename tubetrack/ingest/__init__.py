"""Log ingest: files and folders -> canonical store tables, with rejects and reconciliation.

Public API (imported lazily so ``import tubetrack.ingest.dicom`` stays light):

- :func:`ingest_paths` (``tubetrack.ingest.pipeline``) -> :class:`IngestSummary`
- :class:`FileReport` (``tubetrack.ingest.report``)
- :func:`load_profile`, :func:`builtin_profiles` (``tubetrack.ingest.profiles``)
- :func:`store_status` (``tubetrack.ingest.status``)
"""

from __future__ import annotations

from typing import Any

_EXPORTS = {
    "ingest_paths": "tubetrack.ingest.pipeline",
    "IngestSummary": "tubetrack.ingest.pipeline",
    "FileReport": "tubetrack.ingest.report",
    "load_profile": "tubetrack.ingest.profiles",
    "builtin_profiles": "tubetrack.ingest.profiles",
    "Profile": "tubetrack.ingest.profiles",
    "store_status": "tubetrack.ingest.status",
}

__all__ = sorted(_EXPORTS)


def __getattr__(name: str) -> Any:
    mod = _EXPORTS.get(name)
    if mod is None:
        raise AttributeError(f"module 'tubetrack.ingest' has no attribute {name!r}")
    import importlib

    return getattr(importlib.import_module(mod), name)
