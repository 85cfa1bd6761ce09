"""The report opens in a real headless browser with networking disabled and every chart renders.

Runs Debian's chromium (installed by .ci/run). ``--dump-dom`` after a virtual-time budget gives
the DOM once the scripts ran: the embed script marks each rendered chart, and an error trap
installed before any other script records ``window.onerror``, unhandled promise rejections and
``console.error`` calls into the page.
"""

from __future__ import annotations

import re
import subprocess
from pathlib import Path

import pytest

from tubetrack import report as R

pytestmark = pytest.mark.browser

TIMEOUT_S = 180


def chromium_args(exe: str, profile: Path) -> list[str]:
    return [
        exe, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
        "--disable-component-update", "--no-first-run", "--disable-sync", "--disable-extensions",
        "--disable-default-apps", f"--user-data-dir={profile}",
        # no network at all: every proxy connection and every host lookup fails
        "--proxy-server=127.0.0.1:9", "--host-resolver-rules=MAP * ~NOTFOUND",
        "--virtual-time-budget=20000", "--window-size=1280,2400",
    ]


def run_browser(exe: str, tmp: Path, page: Path, *extra: str) -> subprocess.CompletedProcess:
    profile = tmp / f"profile-{page.stem}-{len(extra)}"
    profile.mkdir(exist_ok=True)
    return subprocess.run(
        [*chromium_args(exe, profile), *extra, page.resolve().as_uri()],
        capture_output=True, text=True, timeout=TIMEOUT_S, check=False,
    )


def attr(dom: str, name: str) -> str | None:
    m = re.search(rf'<html[^>]*\s{name}="([^"]*)"', dom)
    return m.group(1) if m else None


@pytest.fixture(scope="module")
def browser_report(tmp_path_factory, hostile_results, make_inputs):
    out = tmp_path_factory.mktemp("browser")
    return R.write_report(make_inputs(hostile_results), out, images=False)


def check_rendered(dom: str, page: Path) -> int:
    total = attr(dom, "data-charts-total")
    rendered = attr(dom, "data-charts-rendered")
    errors = attr(dom, "data-js-errors")
    trapped = re.search(r'<pre id="tt-js-errors">(.*?)</pre>', dom, re.S)
    assert errors == "0", f"{page.name}: script errors: {trapped.group(1) if trapped else '?'}"
    assert total is not None and int(total) > 0, f"{page.name}: no charts found"
    assert rendered == total, f"{page.name}: {rendered} of {total} charts rendered"
    # every chart container holds an SVG drawn by Vega
    figures = dom.split('<figure class="chart">')[1:]
    assert len(figures) == int(total)
    for fig in figures:
        body = fig.split("</figure>")[0]
        assert 'data-rendered="1"' in body and "<svg" in body and 'class="marks"' in body
    # hostile markup never became elements
    assert "<img src=\"x\"" not in dom and "onerror=\"alert" not in dom
    return int(total)


def test_fleet_report_renders_offline(chromium_path, browser_report, tmp_path):
    page = browser_report.fleet_html
    res = run_browser(chromium_path, tmp_path, page, "--dump-dom")
    assert res.returncode == 0, res.stderr[-2000:]
    n = check_rendered(res.stdout, page)
    assert n >= 10


def test_tube_pages_render_offline(chromium_path, browser_report, tmp_path):
    hostile = next(p for p in browser_report.tube_pages if p.name.startswith("script_alert"))
    for page in (hostile, browser_report.tube_pages[-1]):
        res = run_browser(chromium_path, tmp_path, page, "--dump-dom")
        assert res.returncode == 0, res.stderr[-2000:]
        assert check_rendered(res.stdout, page) >= 2


def test_screenshot_written(chromium_path, browser_report, tmp_path):
    shot = tmp_path / "fleet.png"
    res = run_browser(chromium_path, tmp_path, browser_report.fleet_html, f"--screenshot={shot}")
    assert res.returncode == 0, res.stderr[-2000:]
    data = shot.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 50_000


def test_error_trap_catches_a_broken_chart(chromium_path, tmp_path):
    # The checks above must be able to fail: a page whose chart spec is broken reports it.
    page = tmp_path / "broken.html"
    good = R._chart_block("c1", '{"mark":"point","data":{"values":[{"a":1}]},'
                                '"encoding":{"x":{"field":"a","type":"quantitative"}}}', "ok")
    bad = R._chart_block("c2", '{"mark":"nonsense-mark","data":{"values":[]}}', "broken")
    page.write_text(R._page(title="t", heading="t", meta_html="", nav=[], body=good + bad, footer_html="",
                            js_inline=R.js_bundle(), js_src=None), encoding="utf-8")
    res = run_browser(chromium_path, tmp_path, page, "--dump-dom")
    dom = res.stdout
    assert attr(dom, "data-charts-total") == "2"
    assert attr(dom, "data-charts-rendered") == "1"
    assert attr(dom, "data-js-errors") not in (None, "0")
