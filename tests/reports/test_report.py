"""Offline HTML reports: self-contained, escaped, one page per tube."""

from __future__ import annotations

import html
import json
import re
from pathlib import Path

import pytest

from tubetrack import report as R
from tubetrack.cli.common import SAFETY_NOTE

SCRIPT_OPEN = re.compile(r"<script\b[^>]*>", re.IGNORECASE)


def json_blocks(text: str) -> list[dict]:
    blocks = re.findall(r'<script type="application/json" data-chart="[^"]*">(.*?)</script>', text, re.S)
    return [json.loads(b) for b in blocks]


@pytest.fixture(scope="module")
def hostile_report(tmp_path_factory, hostile_results, make_inputs):
    out = tmp_path_factory.mktemp("hostile")
    files = R.write_report(make_inputs(hostile_results, threshold_sd_pct=0.5, notes=("a <b>note</b>",)),
                           out, images=False)
    return files


def test_pages_written(hostile_report, hostile_results):
    tubes = hostile_results["health"]["tube_id"].unique()
    assert hostile_report.fleet_html.is_file()
    assert len(hostile_report.tube_pages) == len(tubes)
    names = {p.name for p in hostile_report.tube_pages}
    assert names == {R.page_stem(t) + ".html" for t in tubes}
    assert not hostile_report.images


def test_no_network_references_and_js_inlined(hostile_report):
    for path in (hostile_report.fleet_html, *hostile_report.tube_pages):
        text = path.read_text(encoding="utf-8")
        tags = SCRIPT_OPEN.findall(text)
        assert all("src=" not in t for t in tags), tags  # inline mode: no script loads anything
        assert not re.search(r"""(src|href)\s*=\s*["']?\s*(https?:)?//""", text, re.I)
        assert "cdn.jsdelivr" not in text and "unpkg.com" not in text
        # the bundle is inlined: vega-embed is defined in the page itself
        assert len(text) > 500_000 and "vegaEmbed" in text


def test_safety_note_and_metadata_on_every_page(hostile_report):
    note = html.escape(SAFETY_NOTE, quote=True)
    for path in (hostile_report.fleet_html, *hostile_report.tube_pages):
        text = path.read_text(encoding="utf-8")
        assert note in text
        assert "Data as of" in text and "tubetrack 0." in text


def test_hostile_strings_are_text_never_markup(hostile_report, synth):
    fleet = hostile_report.fleet_html.read_text(encoding="utf-8")
    for page in (fleet, *(p.read_text(encoding="utf-8") for p in hostile_report.tube_pages)):
        assert "<script>alert" not in page
        assert "<img src=x" not in page
        assert "<b>note</b>" not in page
        # Only our own scripts: error trap, bundle, embed, and the JSON chart blocks.
        tags = SCRIPT_OPEN.findall(page)
        assert all(t in ("<script>", '<script type="application/json" data-chart="' + t.split('data-chart="')[-1])
                   for t in tags)
        n_json = len(re.findall(r'<script type="application/json"', page))
        assert len(tags) == 3 + n_json
        assert page.count("</script>") == len(tags)
    # The escaped forms are shown as text in tables.
    assert html.escape(synth.HOSTILE_TUBE, quote=True) in fleet
    assert html.escape(synth.HOSTILE_SITE, quote=True) in fleet
    assert html.escape(synth.HOSTILE_TEXT, quote=True) in fleet
    assert html.escape("a <b>note</b>") in fleet


def test_json_blocks_roundtrip_hostile_values(hostile_report, synth):
    fleet = hostile_report.fleet_html.read_text(encoding="utf-8")
    specs = json_blocks(fleet)
    assert specs, "no chart blocks"
    overview = next(s for s in specs if "fleet_overview" in s.get("datasets", {}))
    ids = {r["tube_id"] for r in overview["datasets"]["fleet_overview"]}
    assert synth.HOSTILE_TUBE in ids  # exact value after JSON decoding
    # and the raw text of the blocks has no characters that could close the element
    for raw in re.findall(r'data-chart="[^"]*">(.*?)</script>', fleet, re.S):
        assert "<" not in raw and ">" not in raw and "&" not in raw
    hostile_page = next(p for p in hostile_report.tube_pages if p.name.startswith("script_alert"))
    tube_specs = json_blocks(hostile_page.read_text(encoding="utf-8"))
    changes = [r for s in tube_specs for r in s.get("datasets", {}).get("drift_changes", [])]
    assert any(r["kind"] == synth.HOSTILE_TEXT for r in changes)


def test_overview_links_point_to_written_pages(hostile_report):
    fleet = hostile_report.fleet_html.read_text(encoding="utf-8")
    overview = next(s for s in json_blocks(fleet) if "fleet_overview" in s.get("datasets", {}))
    out = hostile_report.fleet_html.parent
    hrefs = [r["href"] for r in overview["datasets"]["fleet_overview"]]
    assert hrefs and all((out / h).is_file() for h in hrefs)
    assert all(re.fullmatch(r"tubes/[A-Za-z0-9_.-]+\.html", h) for h in hrefs)


def test_tube_page_swapped_datasets_match_the_tube(tmp_path, results, make_inputs):
    files = R.write_report(make_inputs(results), tmp_path, images=False, tube_ids=["T00002"])
    assert [p.name for p in files.tube_pages] == [R.page_stem("T00002") + ".html"]
    specs = json_blocks(files.tube_pages[0].read_text(encoding="utf-8"))
    drift = [s for s in specs if "drift_points" in s["datasets"]]
    assert len(drift) == 2  # small and large focal spot
    d = results["drift"]
    for spec in drift:
        pts = spec["datasets"]["drift_points"]
        assert pts
        stations = {p["tube_current_ma"] for p in pts}
        assert stations == set(d.loc[d["tube_id"] == "T00002", "tube_current_ma"])
        # binned medians stay inside this tube's own range of values
        mine = d.loc[d["tube_id"] == "T00002", "filament_current_norm_a"]
        assert min(p["filament_current_a"] for p in pts) >= mine.min() - 1e-9
        assert max(p["filament_current_a"] for p in pts) <= mine.max() + 1e-9
        assert spec["datasets"]["drift_threshold"][0]["threshold_pct"] == pytest.approx(5.13)
    faults = [s for s in specs if "fault_rates" in s["datasets"]]
    assert len(faults) == 1
    fr = results["fault_rates"]
    assert sum(r["events"] for r in faults[0]["datasets"]["fault_rates"]) == fr.loc[fr["tube_id"] == "T00002", "events"].sum()


def test_shared_js_mode(tmp_path, results, make_inputs):
    files = R.write_report(make_inputs(results), tmp_path, images=False, js="shared")
    asset = tmp_path / "assets" / "tubetrack-charts.js"
    assert asset.is_file() and asset.stat().st_size > 500_000
    page = files.tube_pages[0].read_text(encoding="utf-8")
    assert '<script src="../assets/tubetrack-charts.js"></script>' in page
    assert len(page) < 200_000
    # the fleet report stays self-contained in every mode
    assert "<script src" not in files.fleet_html.read_text(encoding="utf-8")


def test_images_png_and_svg(tmp_path, results, make_inputs):
    files = R.write_report(make_inputs(results), tmp_path, images=True, tube_images=1)
    pngs = [p for p in files.images if p.suffix == ".png"]
    svgs = [p for p in files.images if p.suffix == ".svg"]
    assert len(pngs) == len(svgs) >= 10
    for p in pngs:
        assert p.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    for p in svgs:
        head = p.read_text(encoding="utf-8")[:400]
        assert "<svg" in head
    tube_imgs = [p for p in files.images if p.parent.name == "tubes"]
    assert len(tube_imgs) == 4  # one tube, two focal spots, PNG + SVG
    fleet = files.fleet_html.read_text(encoding="utf-8")
    for p in pngs:
        if p.parent.name == "img":
            assert f'href="img/{p.name}"' in fleet


def test_missing_results_give_notes_not_errors(tmp_path):
    files = R.write_report(R.ReportInputs(notes=("No tube health results.",)), tmp_path, images=False)
    text = files.fleet_html.read_text(encoding="utf-8")
    assert "No tube health results." in text
    assert files.tube_pages == ()
    assert "run <code>tubetrack fleet survival</code>" in text


def test_page_stem_is_safe_and_unique():
    ids = ["A/B", "A_B", "../../etc/passwd", '<x y="1">', "Äöü tube", "", "a" * 300]
    stems = [R.page_stem(i) for i in ids]
    assert len(set(stems)) == len(ids)
    for s in stems:
        assert re.fullmatch(r"[A-Za-z0-9_.-]+", s) and not s.startswith(".") and len(s) <= 57


def test_script_json_and_table_escaping():
    raw = json.dumps({"a": "</script><!-- & <b>"})
    safe = R.script_json(raw)
    assert "<" not in safe and ">" not in safe and "&" not in safe
    assert json.loads(safe) == {"a": "</script><!-- & <b>"}
    assert R.script_js("x='</SCRIPT>'") == "x='<\\/SCRIPT>'"
    import pandas as pd

    t = R.html_table(pd.DataFrame({"tube_id": ['"><script>'], "p_end_of_life_90d": [0.25],
                                   "diameter_loss_pct": [1.234]}))
    assert "<script>" not in t and "&quot;&gt;&lt;script&gt;" in t
    assert "25.0 %" in t and "1.23" in t


@pytest.mark.slow
def test_five_thousand_tube_fleet_is_feasible(tmp_path, synth, make_inputs, capsys):
    """A 5,000-tube report (pages, no images) completes; its time is printed, not asserted."""
    import time

    big = synth.make_results(5000, 120, seed=3, stations=(200.0, 400.0))
    files = R.write_report(make_inputs(big), tmp_path, images=False)
    assert len(files.tube_pages) == 5000
    sizes = [p.stat().st_size for p in files.tube_pages[:50]]
    assert max(sizes) < 300_000  # shared script: pages stay small
    with capsys.disabled():
        print(f"\n5,000-tube report: {files.seconds:.1f} s {files.timings_s}")
    assert (Path(tmp_path) / "assets" / "tubetrack-charts.js").is_file()
    _ = time
