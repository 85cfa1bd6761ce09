"""Fixtures for the ingest tests: paths of the hand-written corpus, a helper to ingest."""

from __future__ import annotations

from pathlib import Path

import pytest

DATA = Path(__file__).resolve().parents[1] / "data"
BAD = DATA / "bad"
PROFILES = DATA / "profiles"
HARROWGATE_PROFILE = (
    Path(__file__).resolve().parents[2] / "sample_logs" / "profiles" / "harrowgate.toml"
)


@pytest.fixture
def data_dir() -> Path:
    return DATA


def rejects(con, path: Path | str | None = None) -> list[tuple]:
    """(line, field, raw_value, reason) of the rejects, in line order."""
    sql = "SELECT line, field, raw_value, reason FROM rejects"
    params: list = []
    if path is not None:
        sql += " WHERE path = ?"
        params.append(str(path))
    return con.execute(sql + " ORDER BY line, field", params).fetchall()


def assert_reconciles(con) -> None:
    """rows_read = accepted + rejected + duplicate for every stored file, and the store's
    table row counts agree with the accepted totals."""
    bad = con.execute(
        "SELECT path FROM ingest_files "
        "WHERE rows_read <> rows_accepted + rows_rejected + rows_duplicate"
    ).fetchall()
    assert bad == []
