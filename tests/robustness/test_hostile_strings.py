"""Hostile strings in ids, site names and fault texts flow through ingest, every analysis command
(table, JSON, CSV) and the HTML report unchanged as data and inert as code (issue 7, item 5).

The store is a small demo fleet (tubetrack.demo.generate_fleet, 6 systems, 2 years) whose system
ids, site names, tube ids and raw fault texts are replaced by HTML, quotes, SQL fragments,
newlines, unicode (incl. a right-to-left override), 10 kB strings and spreadsheet formulas,
written as canonical CSV (docs/log-layout.md) and ingested with `tubetrack ingest`.
"""

from __future__ import annotations

import csv
import io
import json
from html.parser import HTMLParser
from pathlib import Path

import pytest
from typer.testing import CliRunner

from tubetrack import store
from tubetrack.cli import app

from .conftest import LONG, RAW_TEXTS, SITES, SYSTEM_IDS, TUBE_IDS

pytestmark = pytest.mark.slow

#: Output columns that carry ids or names straight from the logs.
ID_COLUMNS = ("tube_id", "system_id", "site", "oldest_tube_id", "group")
FORMULA_START = ("=", "+", "-", "@", "\t", "\r")

#: Every command that answers --format, with arguments that make ids and sites show.
COMMANDS = {
    "status": ["status"],
    "tubes": ["tubes"],
    "tube_script": ["tube", "<script>alert(1)</script>"],
    "tube_removed": ["tube", "<img src=x onerror=alert(1)>"],
    "tube_long": ["tube", "T" + LONG],
    "tube_sql": ["tube", "T'; DROP TABLE tubes; --"],
    "survival": ["fleet", "survival", "--by", "site"],
    "forecast": ["fleet", "forecast", "--show", "tubes"],
    "visits": ["fleet", "visits"],
    "uptime": ["fleet", "uptime", "--by", "systems"],
    "spares": ["fleet", "spares", "--by", "site"],
}


@pytest.fixture(scope="module")
def hostile_run(hostile_frames_and_logs, tmp_path_factory):
    """Ingest the hostile logs, then run every command in every format and the report once."""
    frames, logs = hostile_frames_and_logs
    db = tmp_path_factory.mktemp("hostile_store") / "store.duckdb"
    runner = CliRunner()
    ingest = runner.invoke(app, ["ingest", "--db", str(db), "--format", "json", str(logs)])
    outputs = {}
    for name, args in COMMANDS.items():
        for fmt in ("table", "json", "csv"):
            outputs[name, fmt] = runner.invoke(
                app, [*args, "--db", str(db), "--format", fmt]
            )
    out = tmp_path_factory.mktemp("hostile_report")
    report = runner.invoke(app, ["report", "--db", str(db), "--out", str(out), "--no-images"])
    return {
        "frames": frames,
        "db": db,
        "ingest": ingest,
        "outputs": outputs,
        "report": report,
        "report_dir": out,
    }


def _ok(result) -> None:
    assert result.exit_code == 0, (result.stdout[-2000:], result.stderr[-2000:], result.exception)
    assert "Traceback" not in result.stderr


def test_ingest_accepts_every_hostile_row(hostile_run):
    _ok(hostile_run["ingest"])
    files = json.loads(hostile_run["ingest"].stdout)
    frames = hostile_run["frames"]
    read = {Path(f["path"]).stem: f for f in files}
    assert set(read) == set(frames)
    for stem, frame in frames.items():
        f = read[stem]
        assert f["status"] == "ingested"
        # every row accepted: none of the strings is a validation error
        assert (f["rows_read"], f["rows_accepted"], f["rows_rejected"], f["rows_duplicate"]) == (
            len(frame), len(frame), 0, 0,
        ), stem


def test_store_holds_the_strings_unchanged_and_no_sql_ran(hostile_run):
    # runs after every command and the report (module fixture): tables still exist
    frames = hostile_run["frames"]
    con = store.connect(hostile_run["db"], read_only=True)
    try:
        tables = {r[0] for r in con.execute("SELECT table_name FROM information_schema.tables").fetchall()}
        assert set(store.CANONICAL_TABLES) <= tables
        assert con.execute("SELECT count(*) FROM exposures").fetchall()[0][0] == len(frames["exposures-all"])
        assert con.execute("SELECT count(*) FROM tubes").fetchall()[0][0] == len(frames["tubes"])
        assert con.execute("SELECT count(*) FROM events").fetchall()[0][0] == len(frames["events"])
        stored = dict(con.execute("SELECT system_id, site FROM systems").fetchall())
        expected = dict(zip(frames["systems"]["system_id"], frames["systems"]["site"], strict=True))
        assert stored == expected
        assert len(stored[SYSTEM_IDS[0]]) == len(SITES[0]) and LONG in stored.values()
        tubes = dict(con.execute("SELECT tube_id, system_id FROM tubes").fetchall())
        assert tubes == dict(zip(frames["tubes"]["tube_id"], frames["tubes"]["system_id"], strict=True))
        exp_tubes = {r[0] for r in con.execute("SELECT DISTINCT tube_id FROM exposures").fetchall()}
        assert exp_tubes <= set(TUBE_IDS)
        texts = sorted(r[0] for r in con.execute("SELECT raw_text FROM events").fetchall())
        assert texts == sorted(frames["events"]["raw_text"])
        assert set(texts) <= set(RAW_TEXTS)
    finally:
        con.close()


def _strings(value, key=None):
    """(key, string) pairs of every string in a JSON document."""
    if isinstance(value, dict):
        for k, v in value.items():
            yield from _strings(v, k)
    elif isinstance(value, list):
        for v in value:
            yield from _strings(v, key)
    elif isinstance(value, str):
        yield key, value


@pytest.mark.parametrize("name", list(COMMANDS))
def test_json_values_come_back_unchanged(hostile_run, name):
    result = hostile_run["outputs"][name, "json"]
    _ok(result)
    doc = json.loads(result.stdout)
    allowed = {
        "tube_id": set(TUBE_IDS),
        "oldest_tube_id": set(TUBE_IDS),
        "system_id": set(SYSTEM_IDS),
        "site": set(SITES),
    }
    pairs = list(_strings(doc))
    seen = {k: {v for kk, v in pairs if kk == k} for k in allowed}
    for key, values in seen.items():
        assert values <= allowed[key], (name, key, values - allowed[key])
    all_strings = {v for _, v in pairs}
    # each command shows at least one hostile value exactly (escaping or trimming would fail this)
    hostile = set(TUBE_IDS) | set(SYSTEM_IDS) | set(SITES)
    if name == "status":
        # status lists systems per site: every site name, exactly
        assert seen["site"] == set(SITES)
    else:
        assert all_strings & hostile, name
    if name.startswith("tube_"):
        wanted = {
            "tube_script": TUBE_IDS[8],
            "tube_removed": TUBE_IDS[0],
            "tube_long": "T" + LONG,
            "tube_sql": TUBE_IDS[3],
        }[name]
        assert seen["tube_id"] == {wanted}
    if name in ("survival", "spares"):  # --by site: the groups are the site names, exactly
        assert {v for k, v in pairs if k == "group"} == set(SITES)


def test_json_rows_keep_their_relations(hostile_run):
    frames = hostile_run["frames"]
    rows = json.loads(hostile_run["outputs"]["tubes", "json"].stdout)
    tube_system = dict(zip(frames["tubes"]["tube_id"], frames["tubes"]["system_id"], strict=True))
    system_site = dict(zip(frames["systems"]["system_id"], frames["systems"]["site"], strict=True))
    assert rows
    for row in rows:
        assert row["system_id"] == tube_system[row["tube_id"]]
        assert row["site"] == system_site[row["system_id"]]


def _csv_text(result) -> str:
    # Result.stdout folds \r\n into \n (also inside quoted cells); read the raw bytes
    return result.stdout_bytes.decode("utf-8")


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


@pytest.mark.parametrize("name", list(COMMANDS))
def test_csv_cells_are_formula_safe(hostile_run, name):
    result = hostile_run["outputs"][name, "csv"]
    _ok(result)
    cells = [c for row in csv.reader(io.StringIO(_csv_text(result))) for c in row]
    assert cells
    for cell in cells:
        if cell.startswith(FORMULA_START):
            # only numbers (a negative value is data) may start with a formula character
            assert cell.startswith("-") and _is_number(cell), (name, cell[:80])


@pytest.mark.parametrize("name", [n for n in COMMANDS if n != "status"])
def test_csv_equals_json_after_neutralising(hostile_run, name):
    """CSV id cells are the JSON values, with a leading ' where a formula character starts them."""
    rows_json = json.loads(hostile_run["outputs"][name, "json"].stdout)
    rows_csv = list(csv.DictReader(io.StringIO(_csv_text(hostile_run["outputs"][name, "csv"]))))
    if name.startswith("tube_"):
        # the single-tube JSON nests sections per focal spot; its CSV is the forecast rows
        rows_json = [{"tube_id": r["tube_id"]} for r in rows_json if "health_level" in r]
    assert len(rows_csv) == len(rows_json)
    if name == "tube_removed":  # a removed tube has no forecast: header only, like the JSON
        assert rows_csv == []
        return
    checked = 0
    for col in ID_COLUMNS:
        if not rows_json or col not in rows_json[0] or col not in rows_csv[0]:
            continue
        expected = sorted(
            ("'" + v if v.startswith(FORMULA_START) else v) if isinstance(v, str) else ""
            for v in (r[col] for r in rows_json)
        )
        assert sorted(r[col] for r in rows_csv) == expected, (name, col)
        checked += 1
    assert checked, f"{name}: no id column to compare"


def test_status_csv_neutralises_site_groups(hostile_run):
    text = _csv_text(hostile_run["outputs"]["status", "csv"])
    rows = list(csv.reader(io.StringIO(text)))
    items = {r[1] for r in rows if r and r[0] == "systems"}
    assert "'-2+3 site/radiographic" in items
    assert "line1\nline2/radiographic" in items  # the newline survives CSV quoting


@pytest.mark.parametrize("name", list(COMMANDS))
def test_table_format_runs(hostile_run, name):
    result = hostile_run["outputs"][name, "table"]
    _ok(result)
    assert result.stdout.strip()


class _Page(HTMLParser):
    """Collects script elements (attributes, body), every start tag, and visible text."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.scripts: list[tuple[dict, str]] = []
        self.tags: list[tuple[str, dict]] = []
        self.text: list[str] = []
        self._in: dict | None = None
        self._body: list[str] = []

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        self.tags.append((tag, attrs))
        if tag == "script":
            self._in, self._body = attrs, []

    def handle_endtag(self, tag):
        if tag == "script" and self._in is not None:
            self.scripts.append((self._in, "".join(self._body)))
            self._in = None

    def handle_data(self, data):
        (self._body if self._in is not None else self.text).append(data)


def _parse(path: Path) -> tuple[str, _Page]:
    raw = path.read_text(encoding="utf-8")
    page = _Page()
    page.feed(raw)
    page.close()
    return raw, page


def _pages(run) -> list[Path]:
    out = run["report_dir"]
    return [out / "fleet.html", *sorted((out / "tubes").glob("*.html"))]


def test_report_written(hostile_run):
    _ok(hostile_run["report"])
    pages = _pages(hostile_run)
    assert pages[0].is_file() and len(pages) > 1


def test_report_strings_are_escaped_never_markup(hostile_run):
    for path in _pages(hostile_run):
        raw, page = _parse(path)
        assert "<script>alert(1)" not in raw, path.name
        assert "<img src=x onerror" not in raw, path.name
        for tag, attrs in page.tags:
            assert not (tag == "img" and attrs.get("src") == "x"), path.name
            for key, value in attrs.items():
                assert "alert(1)" not in (value or ""), (path.name, tag, key)
                assert not (key.startswith("on") and "alert" in (value or "")), path.name
        for attrs, body in page.scripts:
            kind = (attrs.get("type") or "text/javascript").lower()
            if kind == "application/json":
                # inlined data: parses as JSON, cannot open or close a script element
                assert "<script" not in body.lower() and "</" not in body
                json.loads(body)
            else:
                assert "alert(1)" not in body, path.name
        # every raw `</script` is the closer of a script element we parsed
        assert raw.lower().count("</script") == len(page.scripts), path.name


def test_report_shows_the_hostile_values_as_text(hostile_run):
    raw, page = _parse(hostile_run["report_dir"] / "fleet.html")
    text = "".join(page.text)
    assert "&lt;img src=x onerror=alert(1)&gt;" in raw  # the escaped form in the file
    assert "<img src=x onerror=alert(1)>" in text  # ... reads back as the site's name
    assert "<script>alert(1)</script>" in text  # a system id / tube id as text
    assert "T'; DROP TABLE tubes; --" in text or "T&#x27;; DROP TABLE tubes; --" in raw
    data = [json.loads(b) for a, b in page.scripts if (a.get("type") or "") == "application/json"]
    strings = {v for d in data for _, v in _strings(d)}
    # the chart data carries the ids decoded, exactly
    assert strings & (set(TUBE_IDS) | set(SYSTEM_IDS) | set(SITES))
