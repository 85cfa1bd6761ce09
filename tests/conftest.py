"""Shared fixtures: an in-memory store with schema, a temporary store path."""

from __future__ import annotations

from pathlib import Path

import pytest

from tubetrack import store

REPO_ROOT = Path(__file__).resolve().parents[1]
SAMPLE_LOGS = REPO_ROOT / "sample_logs"


@pytest.fixture
def mem_store():
    """A fresh in-memory store with the full schema."""
    con = store.connect(":memory:")
    yield con
    con.close()


@pytest.fixture
def db_path(tmp_path: Path) -> Path:
    """Path of a not-yet-created store file in a temp folder."""
    return tmp_path / "test.duckdb"
