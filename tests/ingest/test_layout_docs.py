"""docs/log-layout.md and docs/profiles.md stay in step with the code they describe."""

from __future__ import annotations

import re
from pathlib import Path

from tubetrack.ingest.layout import KINDS, UNIT_FAMILIES
from tubetrack.ingest.validate import RANGES

DOCS = Path(__file__).resolve().parents[2] / "docs"


def _section(text: str, title: str) -> str:
    m = re.search(rf"^## {re.escape(title)}\n(.*?)(?=^## |\Z)", text, re.S | re.M)
    assert m, f"no section {title}"
    return m.group(1)


def test_valid_range_table_matches_validate_py():
    text = (DOCS / "log-layout.md").read_text(encoding="utf-8")
    sec = _section(
        text, "Valid ranges (one table, as in `tubetrack/ingest/validate.py`)"
    )
    rows = {}
    for line in sec.splitlines():
        cells = [c.strip() for c in line.strip().strip("|").split("|")]
        if len(cells) == 4 and cells[0] in RANGES:
            rows[cells[0]] = (float(cells[1]), float(cells[2]))
    assert rows == {k: (r.low, r.high) for k, r in RANGES.items()}


def test_every_kind_has_a_section_listing_all_its_columns():
    text = (DOCS / "log-layout.md").read_text(encoding="utf-8")
    for kind in KINDS.values():
        sec = _section(text, kind.name)
        listed = {
            line.strip().strip("|").split("|")[0].strip()
            for line in sec.splitlines()
            if line.startswith("| ") and not line.startswith("| column")
        }
        assert listed == set(kind.names), kind.name


def test_profiles_doc_lists_every_unit():
    text = (DOCS / "profiles.md").read_text(encoding="utf-8")
    for fam in UNIT_FAMILIES.values():
        for unit in fam:
            if unit.startswith("µ"):
                continue
            assert unit in text
