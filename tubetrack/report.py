"""Offline HTML reports: result frames and charts in, a fleet page and one page per tube out.

The report never runs SQL: the caller (``tubetrack report``, or Python code) hands it the result
frames in a :class:`ReportInputs`. :func:`write_report` writes::

    <out>/fleet.html                 the fleet report (self-contained: the charting JavaScript inlined)
    <out>/tubes/<tube page>.html     one page per tube (JavaScript inlined, or shared for big fleets)
    <out>/img/*.png, *.svg           every fleet chart as PNG and SVG (vl-convert)
    <out>/img/tubes/*.png, *.svg     drift charts of the riskiest tubes (``tube_images``)

Pages need no network: Vega, Vega-Lite and vega-embed come from ``vl_convert.javascript_bundle``;
no page refers to a URL. Every string from the data is HTML-escaped, and the chart
specifications embedded in ``<script type="application/json">`` blocks have ``<``, ``>`` and ``&``
written as JSON unicode escapes, so a tube id such as ``</script><script>...`` stays text.

Large fleets: charts are aggregated before they are drawn, the per-tube chart is compiled once and
reused with each tube's datasets, and per-tube images are limited to the riskiest tubes.
"""

from __future__ import annotations

import hashlib
import html
import json
import math
import os
import re
import time
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any

from tubetrack import __version__

if TYPE_CHECKING:  # pragma: no cover
    import pandas as pd

#: Per-tube pages inline the JavaScript up to this many pages; above it, the pages share one
#: local script file (``assets/``), to keep thousands of pages from each carrying ~0.9 MB.
INLINE_JS_MAX_PAGES = 200

#: Drift chart series get at most this many time bins; fewer for very large fleets so the
#: whole report stays within :data:`MAX_DRIFT_POINTS_TOTAL`.
MAX_DRIFT_POINTS_TOTAL = 2_500_000

SAFETY_TITLE = "Safety"


def _safety_note() -> str:
    from tubetrack.cli.common import SAFETY_NOTE

    return SAFETY_NOTE


# ----------------------------------------------------------------------------------------------
# Inputs and outputs


@dataclass(frozen=True)
class ReportInputs:
    """Everything a report shows. Frames may be ``None`` when an analysis has not been run.

    Attributes
    ----------
    health
        ``result_health`` (one row per tube x focal spot).
    rul_cdf, drift, diameter, projection, changepoints
        ``result_health_rul_cdf``, ``_drift`` (may be pre-binned; an ``n_days`` column then
        counts the days per bin), ``_diameter``, ``_projection``, ``_changepoints``.
    systems, tubes
        Canonical ``systems`` and ``tubes`` (tubes with ``site``).
    fault_rates
        month, category, events, exposures, and tube_id / system_id [counts per month].
    km, weibull_curve, weibull_params
        Kaplan-Meier table (time, survival, lower, upper, events, at_risk); Weibull
        S(t) with bounds on a grid (time, survival, lower, upper); one row with eta, beta.
    forecast, budget, spares, uptime, downtime, visits
        Fleet planning frames (see docs/reports.md for the columns).
    backtest, backtest_cases, backtest_outcomes
        Backtest metrics (metric, value), cases with true and forecast remaining life, and
        (horizon_days, p_predicted, outcome) pairs.
    rejects, ingest_files, reconciliation
        Data quality: rejected rows by reason and field, ingest counts, reconciliation checks.
    threshold_pct, threshold_sd_pct
        End-of-life diameter loss in use and its spread [%].
    as_of, data_start, data_end, analysed_at_utc
        Analysis date, first and last data in the store, analysis time (UTC).
    code_version
        tubetrack version that produced the results.
    horizon_days
        Horizon of the fleet overview's probability [days] (30, 90 or 180).
    notes
        Sentences shown at the top (e.g. analyses that were not available).
    """

    health: pd.DataFrame | None = None
    rul_cdf: pd.DataFrame | None = None
    drift: pd.DataFrame | None = None
    diameter: pd.DataFrame | None = None
    projection: pd.DataFrame | None = None
    changepoints: pd.DataFrame | None = None
    systems: pd.DataFrame | None = None
    tubes: pd.DataFrame | None = None
    fault_rates: pd.DataFrame | None = None
    km: pd.DataFrame | None = None
    weibull_curve: pd.DataFrame | None = None
    weibull_params: pd.DataFrame | None = None
    forecast: pd.DataFrame | None = None
    budget: pd.DataFrame | None = None
    spares: pd.DataFrame | None = None
    uptime: pd.DataFrame | None = None
    downtime: pd.DataFrame | None = None
    visits: pd.DataFrame | None = None
    backtest: pd.DataFrame | None = None
    backtest_cases: pd.DataFrame | None = None
    backtest_outcomes: pd.DataFrame | None = None
    rejects: pd.DataFrame | None = None
    ingest_files: pd.DataFrame | None = None
    reconciliation: pd.DataFrame | None = None
    threshold_pct: float = 5.13
    threshold_sd_pct: float | None = None
    as_of: datetime | None = None
    data_start: datetime | None = None
    data_end: datetime | None = None
    analysed_at_utc: datetime | None = None
    code_version: str = __version__
    horizon_days: int = 90
    notes: tuple[str, ...] = ()


@dataclass(frozen=True)
class ReportFiles:
    """What :func:`write_report` wrote, and how long it took."""

    fleet_html: Path
    tube_pages: tuple[Path, ...]
    images: tuple[Path, ...]
    seconds: float
    timings_s: dict[str, float] = field(default_factory=dict)


# ----------------------------------------------------------------------------------------------
# Escaping and small HTML helpers


def esc(value: Any) -> str:
    """HTML-escape any value from the data (quotes too)."""
    return html.escape("" if value is None else str(value), quote=True)


def script_json(text: str) -> str:
    """Make a JSON text safe inside ``<script type="application/json">``.

    ``<``, ``>`` and ``&`` can only occur inside JSON strings, so writing them as ``\\u003c``,
    ``\\u003e`` and ``\\u0026`` keeps the JSON equal while no ``</script>`` or ``<!--`` can ever
    appear in the block. (This is a stricter form of the usual ``</`` -> ``<\\/``.)
    """
    return text.replace("&", "\\u0026").replace("<", "\\u003c").replace(">", "\\u003e")


def script_js(code: str) -> str:
    """Make JavaScript source safe to inline in a ``<script>`` element."""
    return re.sub(r"</(script)", r"<\\/\1", code, flags=re.IGNORECASE).replace("<!--", "<\\!--")


_SLUG = re.compile(r"[^A-Za-z0-9_.-]+")


def page_stem(tube_id: Any) -> str:
    """File-name stem of a tube's page: a readable slug of the id plus a short hash.

    Any tube id (quotes, slashes, markup, non-ASCII) maps to a safe, unique file name.
    """
    text = str(tube_id)
    slug = _SLUG.sub("_", text).strip("._")[:48] or "tube"
    digest = hashlib.sha1(text.encode("utf-8")).hexdigest()[:8]
    return f"{slug}-{digest}"


def _fmt_time(value: Any) -> str:
    import pandas as pd

    if value is None:
        return "n/a"
    try:
        if pd.isna(value):
            return "n/a"
    except (TypeError, ValueError):
        pass
    ts = pd.Timestamp(value)
    if ts.tzinfo is not None:
        ts = ts.tz_convert("UTC").tz_localize(None)
    if ts == ts.normalize():
        return ts.strftime("%Y-%m-%d") + " UTC"
    return ts.strftime("%Y-%m-%d %H:%M") + " UTC"


def _fmt_cell(column: str, value: Any) -> str:
    """Format one table cell by its column name's unit."""
    import pandas as pd

    if value is None:
        return "&ndash;"
    if isinstance(value, float) and not math.isfinite(value):
        return "&ndash;"
    try:
        if value is pd.NaT or (not isinstance(value, str) and pd.isna(value)):
            return "&ndash;"
    except (TypeError, ValueError):
        pass
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, (pd.Timestamp, datetime)):
        return esc(_fmt_time(value))
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        v = float(value)
        if column.startswith("p_") or column in ("p_predicted", "service_level", "probability"):
            return f"{100 * v:.1f} %"
        if column.endswith("_pct"):
            return f"{v:.2f}"
        if column.endswith("_days") or "_days_" in column or column.startswith("rul_"):
            return f"{v:,.0f}"
        if float(v).is_integer() and abs(v) < 1e15:
            return f"{int(v):,}"
        if abs(v) >= 1000:
            return f"{v:,.0f}"
        return f"{v:.3g}" if abs(v) < 0.01 else f"{v:.3f}".rstrip("0").rstrip(".")
    return esc(value)


def _row_strings(frame: pd.DataFrame, cols: list[tuple[str, str]], link: dict[str, str] | None,
                 link_col: str | None) -> list[str]:
    """``<tr>`` strings of ``frame``, formatted column by column (no per-row pandas work)."""
    per_col = []
    for name, _ in cols:
        values = frame[name].to_numpy(dtype=object)
        cells = []
        for value in values:
            text = _fmt_cell(name, value)
            if link is not None and name == link_col and str(value) in link:
                text = f'<a href="{esc(link[str(value)])}">{text}</a>'
            num = isinstance(value, (int, float)) and not isinstance(value, bool)
            cells.append(f'<td class="num">{text}</td>' if num else f"<td>{text}</td>")
        per_col.append(cells)
    return ["<tr>" + "".join(row) + "</tr>" for row in zip(*per_col, strict=True)] if per_col else []


def _table_html(cols: list[tuple[str, str]], rows: list[str], total: int, max_rows: int, caption: str) -> str:
    head = "".join(f'<th scope="col">{esc(h)}</th>' for _, h in cols)
    more = f'<p class="more">Showing {max_rows:,} of {total:,} rows.</p>' if total > max_rows else ""
    cap = f"<caption>{esc(caption)}</caption>" if caption else ""
    return (
        f'<div class="table-wrap"><table>{cap}<thead><tr>{head}</tr></thead>'
        f'<tbody>{"".join(rows)}</tbody></table></div>{more}'
    )


def html_table(
    frame: pd.DataFrame | None,
    columns: list[tuple[str, str]] | None = None,
    *,
    link: dict[str, str] | None = None,
    link_col: str | None = None,
    max_rows: int = 200,
    empty: str = "No rows.",
    caption: str = "",
) -> str:
    """A small HTML table; every cell escaped and formatted by its column's unit.

    Parameters
    ----------
    columns
        (column, header) pairs; default all columns with their names as headers.
    link, link_col
        ``link[value of link_col] = relative href`` makes that cell a link.
    """
    if frame is None or len(frame) == 0:
        return f'<p class="empty">{esc(empty)}</p>'
    cols = columns or [(c, c) for c in frame.columns]
    cols = [(c, h) for c, h in cols if c in frame.columns]
    rows = _row_strings(frame.head(max_rows), cols, link, link_col)
    return _table_html(cols, rows, len(frame), max_rows, caption)


CSS = """
:root{--ink:#1d2430;--muted:#5b6473;--line:#d8dde5;--panel:#f6f8fb;--accent:#20527a;--warn:#6b3f00}
*{box-sizing:border-box}
body{margin:0;font:15px/1.5 "DejaVu Sans","Liberation Sans",Helvetica,Arial,sans-serif;color:var(--ink);background:#fff}
header.top{background:var(--accent);color:#fff;padding:18px 28px 14px}
header.top h1{margin:0 0 4px;font-size:23px;font-weight:600;letter-spacing:.2px}
header.top .meta{font-size:13px;opacity:.92}
header.top a{color:#fff}
nav.toc{padding:8px 28px;border-bottom:1px solid var(--line);background:var(--panel);font-size:13px}
nav.toc a{margin-right:14px;color:var(--accent);text-decoration:none}
main{padding:8px 28px 40px;max-width:1200px}
section{margin:26px 0 10px}
h2{font-size:19px;border-bottom:2px solid var(--line);padding-bottom:4px;margin:0 0 12px}
h3{font-size:16px;margin:18px 0 8px}
.caution{border-left:5px solid var(--warn);background:#fff6e8;padding:10px 14px;margin:14px 0;font-size:14px}
.caution strong{color:var(--warn)}
.note{color:var(--muted);font-size:13px}
.cards{display:flex;flex-wrap:wrap;gap:12px;margin:6px 0 4px}
.card{border:1px solid var(--line);border-radius:6px;padding:10px 14px;min-width:150px;background:var(--panel)}
.card .v{font-size:22px;font-weight:600}
.card .k{font-size:12px;color:var(--muted)}
figure.chart{margin:14px 0 22px}
figure.chart .vis{min-height:60px}
figure.chart figcaption{font-size:12.5px;color:var(--muted);margin-top:4px}
figure.chart figcaption a{color:var(--accent)}
.table-wrap{overflow-x:auto}
table{border-collapse:collapse;font-size:13px;margin:6px 0}
caption{text-align:left;font-weight:600;padding:4px 0}
th,td{border-bottom:1px solid var(--line);padding:4px 10px;text-align:left;vertical-align:top}
th{background:var(--panel);font-weight:600}
td.num{text-align:right;font-variant-numeric:tabular-nums}
p.empty,p.more{color:var(--muted);font-size:13px}
footer{border-top:1px solid var(--line);padding:12px 28px;color:var(--muted);font-size:12.5px}
ol.refs li{margin-bottom:4px;font-size:13.5px}
.level{display:inline-block;width:.8em;height:.8em;border-radius:2px;margin-right:.35em;vertical-align:-1px;border:1px solid #555}
#tt-js-errors{display:none}
@media print{nav.toc{display:none}header.top{background:#fff;color:#000}}
"""

#: Installed in <head> before any other script: records errors into the page so that a headless
#: browser (and a reader) can see them; counts charts as they render.
ERROR_TRAP_JS = """
(function(){
  var errs=[];
  function note(msg){errs.push(String(msg));var el=document.getElementById('tt-js-errors');
    if(el){el.textContent=errs.join('\\n');}
    document.documentElement.setAttribute('data-js-errors',String(errs.length));}
  window.ttNoteError=note;
  window.addEventListener('error',function(e){note('error: '+(e.message||e.type));});
  window.addEventListener('unhandledrejection',function(e){note('rejection: '+(e.reason&&e.reason.message||e.reason));});
  var ce=console.error;console.error=function(){note('console: '+Array.prototype.join.call(arguments,' '));
    if(ce){ce.apply(console,arguments);}};
  document.documentElement.setAttribute('data-js-errors','0');
})();
"""

#: Runs after the bundle: embeds every chart whose spec sits in a JSON script block.
EMBED_JS = """
(function(){
  var blocks=document.querySelectorAll('script[type="application/json"][data-chart]');
  var total=blocks.length, done=0, jobs=[];
  document.documentElement.setAttribute('data-charts-total',String(total));
  if(typeof vegaEmbed!=='function'){window.ttNoteError('charting library missing');return;}
  blocks.forEach(function(b){
    var target=document.getElementById(b.getAttribute('data-chart'));
    var spec;
    try{spec=JSON.parse(b.textContent);}catch(e){window.ttNoteError('bad chart spec: '+e);return;}
    jobs.push(vegaEmbed(target,spec,{renderer:'svg',actions:false,tooltip:true})
      .then(function(){done+=1;target.setAttribute('data-rendered','1');})
      .catch(function(e){window.ttNoteError('chart '+b.getAttribute('data-chart')+': '+e);}));
  });
  Promise.all(jobs).then(function(){
    document.documentElement.setAttribute('data-charts-rendered',String(done));});
})();
"""


_BUNDLE_CACHE: dict[str, str] = {}


def js_bundle() -> str:
    """Vega + Vega-Lite + vega-embed as one script (from vl-convert; no network)."""
    from tubetrack.charts import vl_version

    version = vl_version()
    if version not in _BUNDLE_CACHE:
        import vl_convert as vlc

        cache = _bundle_cache_path(f"{getattr(vlc, '__version__', 'x')}-vl{version}")
        bundle = None
        if cache is not None and cache.is_file():
            bundle = cache.read_text(encoding="utf-8")
        if not bundle:
            try:
                bundle = vlc.javascript_bundle(vl_version=version)
            except TypeError:  # pragma: no cover - older vl-convert without vl_version
                bundle = vlc.javascript_bundle()
            if cache is not None:
                try:
                    cache.parent.mkdir(parents=True, exist_ok=True)
                    tmp = cache.with_suffix(f".tmp{os.getpid()}")
                    tmp.write_text(bundle, encoding="utf-8")
                    tmp.replace(cache)
                except OSError:
                    pass  # a read-only home: build the bundle each time
        _BUNDLE_CACHE[version] = script_js(bundle)
    return _BUNDLE_CACHE[version]


def _bundle_cache_path(key: str) -> Path | None:
    """Where the JavaScript bundle is cached between runs (it takes seconds to build)."""
    base = os.environ.get("XDG_CACHE_HOME") or (str(Path.home() / ".cache") if Path.home().exists() else "")
    if not base:
        return None
    return Path(base) / "tubetrack" / f"vega-bundle-{re.sub(r'[^A-Za-z0-9_.-]', '_', key)}.js"


def _page(
    *,
    title: str,
    heading: str,
    meta_html: str,
    nav: list[tuple[str, str]],
    body: str,
    footer_html: str,
    js_inline: str | None,
    js_src: str | None,
) -> str:
    nav_html = "".join(f'<a href="{esc(href)}">{esc(label)}</a>' for href, label in nav)
    if js_inline is not None:
        lib = f"<script>{js_inline}</script>"
    elif js_src is not None:
        lib = f'<script src="{esc(js_src)}"></script>'
    else:
        lib = ""
    return (
        "<!DOCTYPE html>\n"
        '<html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f'<meta name="generator" content="tubetrack {esc(__version__)}">'
        f"<title>{esc(title)}</title><style>{CSS}</style>"
        f"<script>{ERROR_TRAP_JS}</script></head><body>"
        f'<header class="top"><h1>{esc(heading)}</h1><div class="meta">{meta_html}</div></header>'
        f'<nav class="toc">{nav_html}</nav><main>'
        f'<div class="caution" role="note"><strong>{SAFETY_TITLE}.</strong> {esc(_safety_note())}</div>'
        f"{body}</main><footer>{footer_html}</footer>"
        '<pre id="tt-js-errors"></pre>'
        f"{lib}<script>{EMBED_JS}</script></body></html>\n"
    )


def _chart_block(chart_id: str, spec_json: str, caption: str, images: dict[str, str] | None = None) -> str:
    links = ""
    if images:
        links = " " + " ".join(
            f'<a href="{esc(href)}">{esc(kind.upper())}</a>' for kind, href in images.items()
        )
    return (
        f'<figure class="chart"><div class="vis" id="chart-{esc(chart_id)}"></div>'
        f'<figcaption>{esc(caption)}{links}</figcaption></figure>'
        f'<script type="application/json" data-chart="chart-{esc(chart_id)}">{script_json(spec_json)}</script>'
    )


# ----------------------------------------------------------------------------------------------
# Frames the charts need, derived from the inputs


def _nonempty(frame: pd.DataFrame | None) -> bool:
    return frame is not None and len(frame) > 0


def tube_overview(inputs: ReportInputs, pages: dict[str, str]) -> pd.DataFrame:
    """One row per tube: worst focal spot's level, the horizon probability, impact and link."""
    import pandas as pd

    h = inputs.health
    if not _nonempty(h):
        return pd.DataFrame()
    assert h is not None
    col = f"p_end_of_life_{inputs.horizon_days}d"
    frame = h.copy()
    if col not in frame.columns:
        frame[col] = float("nan")
    frame = frame.sort_values(["tube_id", "health_rank", col], ascending=[True, False, False])
    worst = frame.drop_duplicates("tube_id", keep="first").copy()
    pmax = frame.groupby("tube_id")[col].max()
    worst["p_end_of_life"] = worst["tube_id"].map(pmax)
    if _nonempty(inputs.tubes) and "removed_at_utc" in inputs.tubes.columns:  # type: ignore[union-attr]
        t = inputs.tubes
        assert t is not None
        removed = set(t.loc[t["removed_at_utc"].notna(), "tube_id"].astype(str))
        worst = worst[~worst["tube_id"].astype(str).isin(removed)]
    impact = 1.0
    if _nonempty(inputs.systems) and "criticality_weight" in inputs.systems.columns:  # type: ignore[union-attr]
        s = inputs.systems
        assert s is not None
        weights = s.set_index("system_id")["criticality_weight"]
        worst["impact"] = worst["system_id"].map(weights).astype(float).fillna(1.0)
    else:
        worst["impact"] = impact
    if "site" not in worst.columns:
        worst["site"] = None
    worst["href"] = worst["tube_id"].astype(str).map(pages)
    return worst.reset_index(drop=True)


def _threshold_bounds(inputs: ReportInputs) -> tuple[float, float | None, float | None]:
    thr = float(inputs.threshold_pct)
    sd = inputs.threshold_sd_pct
    if sd is None or not math.isfinite(sd) or sd <= 0:
        return thr, None, None
    return thr, max(0.0, thr - sd), thr + sd


# ----------------------------------------------------------------------------------------------
# Methods and references (our own words)

METHODS_HTML = """
<h3>Station drift</h3>
<p>For each tube, focal spot and mA station, the filament current of every exposure is reduced to a
robust daily level (median) after removing the effect of tube voltage, which the generator's
space-charge compensation introduces. The kV effect is estimated per tube from its first weeks of
data. Charts show these levels binned in time (the median of the daily levels in each bin), with the
fitted trend of each segment.</p>
<h3>Change points</h3>
<p>Abrupt changes (recalibrations, sensor offsets, unrecorded tube changes, sudden damage) split a
series into segments. Forecasts use the current segment but carry the wear accumulated before it.</p>
<h3>Filament wear and projection</h3>
<p>Tungsten evaporates from the hot filament and the wire thins. Under regulated tube current a
thinner wire needs less heating current at the same station, so the drift of the filament current
relative to the tube's own early level is inverted, with a physics model of thermionic emission and
filament heating, into an estimated loss of wire diameter. The recent workload of the tube projects
the loss forward; the P10&ndash;P90 band is the spread of that projection including the uncertainty of
the estimate and of the end-of-life threshold. The threshold is learned from the fleet's own past
filament failures where there are enough of them, and otherwise is the common 10&nbsp;% mass loss
(5.13&nbsp;% diameter loss).</p>
<h3>Health levels</h3>
<p>Each tube and focal spot gets an ordered level with a one-line reason, from the probabilities of
reaching end of life within 30, 90 and 180 days and from other signatures (arcing, faults, tube
current regulation). Colours of levels run from light (least concern) to dark (most concern).</p>
<h3>Fleet statistics</h3>
<p>Tube lives are right-censored (most tubes still run) and left-truncated (tubes installed before the
logs began). Survival is estimated by Kaplan&ndash;Meier with Greenwood variance and by a
two-parameter Weibull fitted by maximum likelihood; the Weibull plot places failures at the midpoints
of the Kaplan&ndash;Meier steps. Monthly replacement counts are sums of per-tube probabilities
(Poisson-binomial), with intervals from that distribution. Availability is computed over required
hours, with planned and externally caused downtime kept apart.</p>
<h3>Backtest</h3>
<p>The health analysis is replayed at past cut-off dates using only earlier data and compared with
what happened: discrimination and calibration of the end-of-life probabilities, coverage of the
P10&ndash;P90 interval and the accuracy of the remaining-life forecast within &plusmn;20&nbsp;%.</p>
<h3>Limits</h3>
<p>Failures without a precursor in the filament current (bearing seizure, sudden arcing, vacuum loss)
cannot be foreseen from drift; they are reported as such. A tube with little history gets a wide
interval and a stated reason. The numbers support, and never replace, the judgement of qualified
service personnel.</p>
"""

REFERENCES_HTML = """
<ol class="refs">
<li>Richardson O.W., Dushman S.: thermionic emission, J = A T<sup>2</sup> exp(&minus;&phi;/kT); Dushman S.,
Phys. Rev. 21 (1923) 623.</li>
<li>Jones H.A., Langmuir I., &ldquo;The characteristics of tungsten filaments as functions of
temperature&rdquo;, General Electric Review 30 (1927); Jones H.A., &ldquo;A temperature scale for
tungsten&rdquo;, Phys. Rev. 28 (1926) 202.</li>
<li>Truong C., Oudre L., Vayatis N., &ldquo;Selective review of offline change point detection
methods&rdquo;, Signal Processing 167 (2020) 107299 (the ruptures library).</li>
<li>Kaplan E.L., Meier P., &ldquo;Nonparametric estimation from incomplete observations&rdquo;,
J. Am. Stat. Assoc. 53 (1958) 457&ndash;481; Greenwood M., Reports on Public Health and Medical
Subjects 33 (1926).</li>
<li>Meeker W.Q., Escobar L.A., Statistical Methods for Reliability Data, Wiley 1998 (Weibull maximum
likelihood with censoring and truncation, probability plots, confidence bounds).</li>
<li>NIST/SEMATECH e-Handbook of Statistical Methods, section 8.4 (reliability data analysis).</li>
<li>IEC 60050-192, International Electrotechnical Vocabulary &ndash; Part 192: Dependability.</li>
<li>Saxena A. et al., &ldquo;Metrics for offline evaluation of prognostic performance&rdquo;,
Int. J. Prognostics and Health Management 1 (2010) (alpha-lambda accuracy, prognostic horizon).</li>
<li>Okabe M., Ito K., Color Universal Design (2008); van der Walt S., Smith N., the viridis colour
map (SciPy 2015): the colour-blind-safe palettes of the charts.</li>
</ol>
"""


# ----------------------------------------------------------------------------------------------
# The writer


def _spec_json(chart: Any) -> str:
    from tubetrack.charts import spec_of

    return json.dumps(spec_of(chart), separators=(",", ":"), ensure_ascii=False, allow_nan=False)


def _write_images(spec_json: str, base: Path, scale: float = 2.0) -> list[Path]:
    import vl_convert as vlc

    from tubetrack.charts import vl_version

    spec = json.loads(spec_json)
    svg = vlc.vegalite_to_svg(spec, vl_version=vl_version())
    base.parent.mkdir(parents=True, exist_ok=True)
    svg_path = base.with_suffix(".svg")
    png_path = base.with_suffix(".png")
    svg_path.write_text(svg, encoding="utf-8")
    png_path.write_bytes(vlc.svg_to_png(svg, scale=scale))
    return [png_path, svg_path]


def _render_job(job: tuple[str, Path]) -> list[Path]:
    return _write_images(job[0], job[1])


def render_images(jobs: list[tuple[str, Path]]) -> list[Path]:
    """Write PNG + SVG for each (spec JSON, path stem), one after the other."""
    return [p for job in jobs for p in _render_job(job)]


class _BackgroundImages:
    """Chart images rendered in ONE background process while this process writes the pages.

    vl-convert renders one chart at a time per process and threads do not overlap, and a pool
    splitting the images was measured no faster on a loaded two-core machine (each process pays
    the renderer's start). One process running beside the page writing overlaps the two instead.
    The process is forked before this process has started the renderer or the page writer's
    threads (a spawned one would re-import the caller's main module, which library callers
    need not guard). Where no process can be forked, images are rendered here at
    :meth:`results`, as before.
    """

    def __init__(self) -> None:
        self._pool: Any = None
        self._tried = False  # whether a process was asked for (once, at the first job)
        self._futures: list[Any] = []
        self._inline: list[tuple[str, Path]] = []

    def submit(self, jobs: list[tuple[str, Path]]) -> None:
        if jobs and not self._tried:
            self._tried = True
            try:
                import multiprocessing
                from concurrent.futures import ProcessPoolExecutor

                self._pool = ProcessPoolExecutor(max_workers=1, mp_context=multiprocessing.get_context("fork"))
            except (OSError, ImportError, ValueError):  # ValueError: no fork on this platform
                self._pool = None
        if self._pool is None:
            self._inline.extend(jobs)
        else:
            self._futures.extend(self._pool.submit(_render_job, job) for job in jobs)

    def results(self) -> list[Path]:
        """Every written image path, in submission order (waits for the background process)."""
        try:
            done = [p for f in self._futures for p in f.result()]
        finally:
            if self._pool is not None:
                self._pool.shutdown(wait=True, cancel_futures=True)
        return done + render_images(self._inline)


def _grouped_json(frame: pd.DataFrame, keys: list[str], columns: list[str]) -> dict[tuple, str]:
    """JSON arrays of ``columns`` per group of ``keys``, from ONE vectorised serialisation.

    Rows are sorted by the keys, serialised once as JSON lines, and each group's contiguous
    block of lines joined: no per-group DataFrame work (fast for thousands of tubes).
    """
    import numpy as np

    from tubetrack.charts._base import MAX_ROWS_PER_DATASET

    if frame is None or frame.empty:
        return {}
    data = frame.sort_values(keys, kind="stable", ignore_index=True)
    from tubetrack.charts._base import dataset_frame

    key_frame = data[keys]
    # dataset_frame enforces a per-dataset bound; the whole frame is many datasets, so convert
    # in bounded chunks of the same code path.
    parts = []
    step = MAX_ROWS_PER_DATASET
    for start in range(0, len(data), step):
        chunk = dataset_frame(data.iloc[start:start + step], columns, "grouped")
        parts.append(chunk.to_json(orient="records", lines=True, double_precision=7))
    lines = "".join(p if p.endswith("\n") else p + "\n" for p in parts).split("\n")[: len(data)]
    joined = key_frame[keys[0]].astype(str)
    for k in keys[1:]:
        joined = joined + "\x1f" + key_frame[k].astype(str)
    codes = joined.to_numpy()
    change = np.flatnonzero(np.concatenate([[True], codes[1:] != codes[:-1]]))
    ends = np.concatenate([change[1:], [len(codes)]])
    out: dict[tuple, str] = {}
    for s, e in zip(change, ends, strict=True):
        key = tuple(str(codes[s]).split("\x1f"))
        if e - s > MAX_ROWS_PER_DATASET:
            raise ValueError(f"dataset for {key} has {e - s} rows; aggregate before charting")
        out[key] = "[" + ",".join(lines[s:e]) + "]"
    return out


def write_report(
    inputs: ReportInputs,
    out_dir: str | Path,
    *,
    images: bool = True,
    tube_ids: list[str] | None = None,
    tube_images: int = 6,
    js: str = "auto",
    progress: Any = None,
) -> ReportFiles:
    """Write the fleet report, the per-tube pages and the chart images.

    Parameters
    ----------
    inputs
        Result frames and metadata.
    out_dir
        Output folder (created).
    images
        Write PNG and SVG of every fleet chart (and of ``tube_images`` tubes' drift charts).
    tube_ids
        Write pages only for these tubes (default: every tube with health results).
    tube_images
        Number of tubes (riskiest first) whose drift charts are also written as images.
    js
        ``inline`` (every page carries the charting JavaScript), ``shared`` (tube pages load
        ``assets/tubetrack-charts.js`` next to them) or ``auto`` (inline up to
        :data:`INLINE_JS_MAX_PAGES` tube pages).
    progress
        Optional callable(message) for progress lines.

    Returns
    -------
    ReportFiles
    """
    import pandas as pd

    from tubetrack import charts as C

    t_start = time.perf_counter()
    timings: dict[str, float] = {}
    say = progress or (lambda _m: None)
    out = Path(out_dir)
    (out / "tubes").mkdir(parents=True, exist_ok=True)
    written_images: list[Path] = []
    generated = datetime.now(UTC).replace(tzinfo=None)

    health = inputs.health if inputs.health is not None else pd.DataFrame()
    all_tubes = [str(t) for t in health["tube_id"].drop_duplicates()] if "tube_id" in health.columns else []
    wanted = all_tubes if tube_ids is None else [t for t in all_tubes if t in {str(x) for x in tube_ids}]
    pages = {t: f"tubes/{page_stem(t)}.html" for t in wanted}

    meta = _meta_html(inputs, generated)
    footer = _footer_html(inputs, generated)

    # ---------------- fleet page
    t0 = time.perf_counter()
    fleet_blocks: list[tuple[str, str, str, str]] = []  # (section, chart id, spec json, caption)
    thr, thr_lo, thr_hi = _threshold_bounds(inputs)
    overview = tube_overview(inputs, pages)

    image_jobs: list[tuple[str, Path]] = []
    fleet_images: dict[str, dict[str, str]] = {}
    background = _BackgroundImages()  # each chart's images render while the next is built

    def add_image(job: tuple[str, Path]) -> None:
        image_jobs.append(job)
        background.submit([job])

    def add(section: str, chart_id: str, builder: Any, caption: str) -> None:
        try:
            chart = builder()
        except (ValueError, KeyError) as exc:  # a result frame without the expected columns
            fleet_blocks.append((section, chart_id, "", f"Chart not drawn: {exc}"))
            return
        spec_json = _spec_json(chart)
        fleet_blocks.append((section, chart_id, spec_json, caption))
        if images:
            add_image((spec_json, out / "img" / chart_id))
            fleet_images[chart_id] = {"png": f"img/{chart_id}.png", "svg": f"img/{chart_id}.svg"}

    if _nonempty(overview):
        add("overview", "fleet-overview", lambda: C.fleet_overview_chart(overview, inputs.horizon_days),
            f"Each point is a tube in service (its worst focal spot). Right = more likely to reach end of "
            f"life within {inputs.horizon_days} days; up = more clinical impact. Click a point for its page.")
        add("overview", "health-levels", lambda: C.health_level_chart(health),
            "Tube x focal spot rows per health level, best first.")
    if _nonempty(inputs.diameter):
        order = None
        if _nonempty(health):
            ranked = health.sort_values(["health_rank", f"p_end_of_life_{inputs.horizon_days}d"],
                                        ascending=[False, False]) if f"p_end_of_life_{inputs.horizon_days}d" in health.columns else health
            order = list(ranked["tube_id"].astype(str) + " / " + ranked["focal_spot"].astype(str))
        add("wear", "diameter", lambda: C.diameter_chart(inputs.diameter, thr, thr_lo, thr_hi, order=order),
            "Estimated diameter loss of the tubes with the highest concern, with uncertainty bands; the dashed "
            "line is the end-of-life threshold in use (band: its spread).")
    if _nonempty(inputs.fault_rates):
        fr = inputs.fault_rates
        assert fr is not None
        fleet_rates = fr.groupby(["month", "category"], as_index=False)[["events", "exposures"]].sum()
        add("wear", "fault-rates", lambda: C.fault_rate_chart(fleet_rates),
            "Arcs and other faults per 1,000 exposures across the fleet, by month.")
    if _nonempty(inputs.km):
        add("survival", "kaplan-meier", lambda: C.km_chart(inputs.km),
            "Fraction of tubes still in service by age, with its 95 % pointwise band.")
        if _nonempty(inputs.weibull_curve) and _nonempty(inputs.weibull_params):
            wp = inputs.weibull_params.iloc[0]  # type: ignore[union-attr]
            add("survival", "weibull", lambda: C.weibull_plot(inputs.km, inputs.weibull_curve,
                                                              float(wp["eta"]), float(wp["beta"])),
                "Failures on Weibull probability paper; a straight line means the Weibull model fits.")
    if _nonempty(inputs.forecast):
        add("planning", "forecast", lambda: C.forecast_chart(inputs.forecast),
            "Expected tube replacements per month with 80 % and 95 % intervals.")
    if _nonempty(inputs.budget):
        add("planning", "spend", lambda: C.spend_chart(inputs.budget),
            "Expected spend on tubes per month with its interval.")
    if _nonempty(inputs.spares):
        add("planning", "spares", lambda: C.spares_chart(inputs.spares),
            "Spare tubes to hold per model for the chosen service level.")
    if _nonempty(inputs.uptime):
        add("uptime", "uptime", lambda: C.uptime_chart(inputs.uptime),
            "Availability over required hours per system against its contracted target.")
    if _nonempty(inputs.downtime):
        add("uptime", "downtime", lambda: C.downtime_cause_chart(inputs.downtime),
            "Hours of downtime by cause, planned and unplanned.")
    if _nonempty(inputs.backtest_cases):
        add("backtest", "backtest-rul", lambda: C.backtest_rul_chart(inputs.backtest_cases),
            "Each point is one forecast made at a past cut-off; bars are its P10-P90 interval.")
    if _nonempty(inputs.backtest_outcomes):
        add("backtest", "calibration", lambda: C.calibration_chart(inputs.backtest_outcomes),
            "Forecast probabilities of end of life against the observed fraction (95 % Wilson intervals).")
    timings["fleet_charts_s"] = time.perf_counter() - t0

    bundle = js_bundle()
    fleet_html = _fleet_body(inputs, fleet_blocks, fleet_images, overview, pages)
    fleet_path = out / "fleet.html"
    fleet_path.write_text(
        _page(
            title="tubetrack fleet report",
            heading="Fleet report: X-ray tube health and planning",
            meta_html=meta,
            nav=[("#summary", "Summary"), ("#overview", "Overview"), ("#attention", "Tubes needing attention"),
                 ("#wear", "Wear"), ("#survival", "Survival"), ("#planning", "Planning"),
                 ("#uptime", "Uptime"), ("#backtest", "Backtest"), ("#quality", "Data quality"),
                 ("#methods", "Methods"), ("#references", "References")],
            body=fleet_html,
            footer_html=footer,
            js_inline=bundle,
            js_src=None,
        ),
        encoding="utf-8",
    )

    # ---------------- tube pages
    t0 = time.perf_counter()
    # the riskiest tubes' drift charts are submitted as their pages are built
    tube_paths = _write_tube_pages(inputs, out, wanted, pages, meta, footer, bundle, js, images,
                                   tube_images, add_image, say)
    timings["tube_pages_s"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    if image_jobs:
        say(f"writing {2 * len(image_jobs)} chart images (PNG + SVG) ...")
    written_images.extend(background.results())
    timings["images_s"] = time.perf_counter() - t0  # the wait after the pages
    return ReportFiles(
        fleet_html=fleet_path,
        tube_pages=tuple(tube_paths),
        images=tuple(written_images),
        seconds=time.perf_counter() - t_start,
        timings_s=timings,
    )


def _meta_html(inputs: ReportInputs, generated: datetime) -> str:
    parts = [
        f"Data as of <b>{esc(_fmt_time(inputs.as_of))}</b>",
        f"data from {esc(_fmt_time(inputs.data_start))} to {esc(_fmt_time(inputs.data_end))}",
        f"analysed {esc(_fmt_time(inputs.analysed_at_utc))}",
        f"tubetrack {esc(inputs.code_version)}",
    ]
    return " &middot; ".join(parts)


def _footer_html(inputs: ReportInputs, generated: datetime) -> str:
    return (
        f"Written by tubetrack {esc(__version__)} on {esc(_fmt_time(generated))} from results of tubetrack "
        f"{esc(inputs.code_version)} analysed {esc(_fmt_time(inputs.analysed_at_utc))}; data as of "
        f"{esc(_fmt_time(inputs.as_of))}. The page works offline: every script it needs is inside it. "
        f"{esc(_safety_note())}"
    )


def _section(anchor: str, title: str, inner: str) -> str:
    return f'<section id="{esc(anchor)}"><h2>{esc(title)}</h2>{inner}</section>'


def _charts_html(blocks: list[tuple[str, str, str, str]], section: str, images: dict[str, dict[str, str]]) -> str:
    html_parts = []
    for sec, chart_id, spec_json, caption in blocks:
        if sec != section:
            continue
        if not spec_json:
            html_parts.append(f'<p class="note">{esc(caption)}</p>')
            continue
        html_parts.append(_chart_block(chart_id, spec_json, caption, images.get(chart_id)))
    return "".join(html_parts)


def _fleet_body(inputs: ReportInputs, blocks: list[tuple[str, str, str, str]], images: dict[str, dict[str, str]],
                overview: pd.DataFrame, pages: dict[str, str]) -> str:
    import pandas as pd

    from tubetrack.charts import level_order, ordinal_palette

    health = inputs.health if inputs.health is not None else pd.DataFrame()
    parts: list[str] = []
    # Summary cards
    cards = []
    n_tubes = health["tube_id"].nunique() if "tube_id" in health.columns else 0
    cards.append((f"{n_tubes:,}", "tubes analysed"))
    if _nonempty(inputs.systems):
        cards.append((f"{len(inputs.systems):,}", "systems"))  # type: ignore[arg-type]
    if "health_rank" in health.columns and len(health):
        alert = health[health["health_rank"] >= 2]["tube_id"].nunique()
        third = health.loc[health["health_rank"] == 2, "health_level"]
        label = f"tubes at '{third.iloc[0]}' or worse" if len(third) else "tubes at level 3 of the scale or worse"
        cards.append((f"{alert:,}", label))
    if _nonempty(inputs.forecast) and "expected_replacements" in inputs.forecast.columns:  # type: ignore[union-attr]
        total = float(inputs.forecast["expected_replacements"].sum())  # type: ignore[index]
        cards.append((f"{total:.1f}", f"expected replacements, next {len(inputs.forecast)} months"))  # type: ignore[arg-type]
    cards.append((f"{inputs.threshold_pct:.2f} %", "end-of-life diameter loss in use"))
    card_html = "".join(f'<div class="card"><div class="v">{esc(v)}</div><div class="k">{esc(k)}</div></div>'
                        for v, k in cards)
    notes = "".join(f'<p class="note">{esc(n)}</p>' for n in inputs.notes)
    legend = ""
    if "health_level" in health.columns and len(health):
        levels = level_order(health)
        colours = ordinal_palette(len(levels))
        legend = "<p class=\"note\">Health levels, least to most concern: " + ", ".join(
            f'<span class="level" style="background:{c}"></span>{esc(lv)}' for lv, c in zip(levels, colours, strict=True)
        ) + ".</p>"
    parts.append(_section("summary", "Summary", f'<div class="cards">{card_html}</div>{legend}{notes}'))
    parts.append(_section("overview", "Fleet overview", _charts_html(blocks, "overview", images)
                          or '<p class="empty">No health results: run <code>tubetrack tubes</code> first.</p>'))
    # Attention table
    att = ""
    if len(health):
        col = f"p_end_of_life_{inputs.horizon_days}d"
        sort_cols = [c for c in ("health_rank", col) if c in health.columns]
        ranked = health.sort_values(sort_cols, ascending=False) if sort_cols else health
        att = html_table(
            ranked,
            [("tube_id", "tube"), ("focal_spot", "focal spot"), ("system_id", "system"), ("site", "site"),
             ("health_level", "level"), ("reason", "reason"), ("diameter_loss_pct", "diameter loss [%]"),
             ("rul_days_p10", "remaining life P10 [days]"), ("rul_days_p50", "P50 [days]"),
             ("rul_days_p90", "P90 [days]"), ("p_end_of_life_30d", "P(end of life) 30 d"),
             ("p_end_of_life_90d", "90 d"), ("p_end_of_life_180d", "180 d")],
            link=pages, link_col="tube_id", max_rows=40,
        )
    parts.append(_section("attention", "Tubes needing attention", att or '<p class="empty">No health results.</p>'))
    parts.append(_section("wear", "Filament wear and faults", _charts_html(blocks, "wear", images)
                          or '<p class="empty">No wear results.</p>'))
    surv = _charts_html(blocks, "survival", images)
    if _nonempty(inputs.weibull_params):
        surv += html_table(inputs.weibull_params, caption="Weibull fit of the fleet (scale in days)")
    parts.append(_section("survival", "Tube life statistics", surv or '<p class="empty">No survival results: run '
                          '<code>tubetrack fleet survival</code>.</p>'))
    plan = _charts_html(blocks, "planning", images)
    if _nonempty(inputs.forecast):
        plan += html_table(inputs.forecast, [(c, c) for c in ("month", "expected_replacements", "lower_80", "upper_80",
                                                              "lower_95", "upper_95")],
                           caption="Replacement forecast per month [tubes]")
    if _nonempty(inputs.visits):
        plan += "<h3>Suggested visit order</h3>" + html_table(inputs.visits, max_rows=30)
    parts.append(_section("planning", "Replacement forecast, budget and spares", plan
                          or '<p class="empty">No forecast: run <code>tubetrack fleet forecast</code>.</p>'))
    up = _charts_html(blocks, "uptime", images)
    parts.append(_section("uptime", "Uptime and downtime", up or '<p class="empty">No uptime results.</p>'))
    bt = ""
    if _nonempty(inputs.backtest):
        bt += html_table(inputs.backtest, caption="Backtest metrics")
    bt += _charts_html(blocks, "backtest", images)
    parts.append(_section("backtest", "How good are the forecasts? (backtest)", bt
                          or '<p class="empty">No backtest results: run <code>tubetrack backtest</code>.</p>'))
    dq = []
    if _nonempty(inputs.ingest_files):
        dq.append(html_table(inputs.ingest_files, caption="Rows read, accepted, rejected and duplicate, by table"))
    if _nonempty(inputs.rejects):
        dq.append(html_table(inputs.rejects, caption="Rejected rows by reason (kept in the store's rejects table)"))
    else:
        dq.append('<p class="note">No rejected rows recorded.</p>')
    if _nonempty(inputs.reconciliation):
        dq.append(html_table(inputs.reconciliation, caption="Reconciliation"))
    parts.append(_section("quality", "Data quality", "".join(dq)))
    parts.append(_section("methods", "Methods", METHODS_HTML))
    parts.append(_section("references", "References", REFERENCES_HTML))
    return "".join(parts)


def _write_tube_pages(inputs: ReportInputs, out: Path, wanted: list[str], pages: dict[str, str], meta: str,
                      footer: str, bundle: str, js: str, images: bool, tube_images: int,
                      add_image: Any, say: Any) -> list[Path]:
    import pandas as pd

    from tubetrack import charts as C

    if not wanted:
        return []
    health = inputs.health
    assert health is not None
    mode = js
    if mode == "auto":
        mode = "inline" if len(wanted) <= INLINE_JS_MAX_PAGES else "shared"
    js_src = None
    if mode == "shared":
        (out / "assets").mkdir(exist_ok=True)
        (out / "assets" / "tubetrack-charts.js").write_text(bundle, encoding="utf-8")
        js_src = "../assets/tubetrack-charts.js"
    wanted_set = set(wanted)

    def only_wanted(frame: pd.DataFrame | None) -> pd.DataFrame:
        if frame is None or frame.empty or "tube_id" not in frame.columns:
            return pd.DataFrame()
        f = frame[frame["tube_id"].astype(str).isin(wanted_set)].copy()
        f["tube_id"] = f["tube_id"].astype(str)
        return f

    thr, thr_lo, thr_hi = _threshold_bounds(inputs)
    drift = only_wanted(inputs.drift)
    n_series = max(1, len(drift[["tube_id", "focal_spot", "tube_current_ma"]].drop_duplicates())) if len(drift) else 1
    max_points = int(min(C.health.MAX_POINTS_PER_SERIES, max(30, MAX_DRIFT_POINTS_TOTAL // n_series)))
    obs = C.aggregate_drift(drift, max_points) if len(drift) else pd.DataFrame()
    if len(obs):
        labels = {v: f"{v:g} mA" for v in obs["tube_current_ma"].unique()}
        obs["station"] = obs["tube_current_ma"].map(labels)
    dia = only_wanted(inputs.diameter)
    proj = only_wanted(inputs.projection)
    cps = only_wanted(inputs.changepoints)
    if len(cps) and "tube_current_ma" not in cps.columns:
        cps["tube_current_ma"] = float("nan")
    keys = ["tube_id", "focal_spot"]
    grouped = {
        "drift_points": _grouped_json(obs, keys, C.DRIFT_COLUMNS["drift_points"]) if len(obs) else {},
        "drift_diameter": _grouped_json(_thin_groups(dia, keys, C.health.MAX_POINTS_PER_SERIES), keys, C.DRIFT_COLUMNS["drift_diameter"]) if len(dia) else {},
        "drift_projection": _grouped_json(_thin_groups(proj, keys, C.health.MAX_POINTS_PER_SERIES), keys, C.DRIFT_COLUMNS["drift_projection"]) if len(proj) else {},
        "drift_changes": _grouped_json(cps, keys, C.DRIFT_COLUMNS["drift_changes"]) if len(cps) else {},
    }
    thr_frame = pd.DataFrame({"threshold_pct": [thr], "threshold_lo_pct": [thr if thr_lo is None else thr_lo],
                              "threshold_hi_pct": [thr if thr_hi is None else thr_hi]})
    thr_json = C.dataset_json(thr_frame, C.DRIFT_COLUMNS["drift_threshold"], "drift_threshold")
    # Compile the drift chart once; each page swaps in its own datasets.
    template = C.spec_of(C.drift_layers())
    template.pop("datasets", None)
    template["datasets"] = "__TT_DATASETS__"
    template_json = json.dumps(template, separators=(",", ":"), ensure_ascii=False)
    fault_template_json = None
    fault_groups: dict[tuple, str] = {}
    fr = only_wanted(inputs.fault_rates)
    if len(fr):
        import numpy as np

        fr = fr.groupby(["tube_id", "month", "category"], as_index=False)[["events", "exposures"]].sum()
        exposures = fr["exposures"].astype(float)
        fr["rate_per_1000"] = np.where(exposures > 0, fr["events"] / exposures.where(exposures > 0) * 1000.0, np.nan)
        fault_groups = _grouped_json(fr, ["tube_id"], ["month", "category", "events", "exposures", "rate_per_1000"])
        ft = C.spec_of(C.fault_rate_chart(fr.head(0).drop(columns=["rate_per_1000"]),
                                          title="Arcs and faults of this tube per 1,000 exposures, by month"))
        ft["datasets"] = "__TT_DATASETS__"
        fault_template_json = json.dumps(ft, separators=(",", ":"), ensure_ascii=False)

    def fill(template_text: str, datasets: dict[str, str]) -> str:
        body = "{" + ",".join(f"{json.dumps(k)}:{v}" for k, v in datasets.items()) + "}"
        return template_text.replace('"__TT_DATASETS__"', body, 1)

    # Which tubes get images: the riskiest first.
    image_tubes: set[str] = set()
    if images and tube_images > 0:
        col = f"p_end_of_life_{inputs.horizon_days}d"
        sort_cols = [c for c in ("health_rank", col) if c in health.columns]
        ranked = health[health["tube_id"].astype(str).isin(wanted_set)]
        if sort_cols:
            ranked = ranked.sort_values(sort_cols, ascending=False)
        image_tubes = set(ranked["tube_id"].astype(str).drop_duplicates().head(tube_images))

    h = health.copy()
    h["tube_id"] = h["tube_id"].astype(str)
    h = h[h["tube_id"].isin(wanted_set)].reset_index(drop=True)
    status_cols = [c for c in STATUS_COLUMNS if c[0] in h.columns]
    status_rows = _row_strings(h, status_cols, None, None)
    h_groups: dict[str, tuple[pd.DataFrame, list[str]]] = {}
    for k, idx in h.groupby("tube_id", sort=False).indices.items():
        h_groups[k] = (h.iloc[idx[:1]], [status_rows[i] for i in idx])
    cdf_groups: dict[str, str] = {}
    cdf = only_wanted(inputs.rul_cdf)
    if len(cdf):
        wide = cdf.pivot_table(index=["tube_id", "focal_spot"], columns="horizon_days",
                               values="p_end_of_life", aggfunc="first")
        wide.columns = [f"p_{int(c)}" for c in wide.columns]
        wide = wide.reset_index()
        wide = wide.dropna(axis=1, how="all")
        cdf_cols = [("focal_spot", "focal spot")] + [(c, f"{c[2:]} d") for c in wide.columns if c.startswith("p_")]
        cdf_rows = _row_strings(wide, cdf_cols, None, None)
        cdf_groups = {k: _table_html(cdf_cols, [cdf_rows[i] for i in idx], len(idx), len(idx) + 1,
                                     "Probability of end of life within each horizon")
                      for k, idx in wide.groupby("tube_id", sort=False).indices.items()}
    tubes_info: dict[str, dict[str, Any]] = {}
    if _nonempty(inputs.tubes):
        t = inputs.tubes.copy()  # type: ignore[union-attr]
        t["tube_id"] = t["tube_id"].astype(str)
        tubes_info = {r["tube_id"]: r for r in t[t["tube_id"].isin(wanted_set)].to_dict("records")}

    health_focals = h.groupby("tube_id", sort=False)["focal_spot"].unique().to_dict()
    nav = [("../fleet.html", "Fleet report"), ("#status", "Status"), ("#drift", "Drift and wear"),
           ("#faults", "Faults"), ("../fleet.html#methods", "Methods")]
    paths: list[Path] = []
    # Pages are built here and written by a few threads, so disk latency overlaps the next page.
    from concurrent.futures import ThreadPoolExecutor

    writer = ThreadPoolExecutor(max_workers=4)
    writes = []
    for i, tube in enumerate(wanted):
        if i and i % 500 == 0:
            say(f"tube pages {i:,}/{len(wanted):,}")
        got = h_groups.get(tube)
        if got is None:
            continue
        rows, row_html = got
        focals = sorted(str(f) for f in health_focals.get(tube, ()))
        body = [_tube_status(rows, _table_html(status_cols, row_html, len(row_html), len(row_html) + 1, ""),
                             tubes_info.get(tube), cdf_groups.get(tube, ""))]
        chart_html = []
        for focal in focals:
            key = (tube, focal)
            datasets = {
                "drift_points": grouped["drift_points"].get(key, "[]"),
                "drift_diameter": grouped["drift_diameter"].get(key, "[]"),
                "drift_projection": grouped["drift_projection"].get(key, "[]"),
                "drift_changes": grouped["drift_changes"].get(key, "[]"),
                "drift_threshold": thr_json,
            }
            if all(datasets[k] == "[]" for k in ("drift_points", "drift_diameter", "drift_projection")):
                chart_html.append(f'<p class="empty">No drift data for the {esc(focal)} focal spot.</p>')
                continue
            spec_text = fill(template_json, datasets)
            chart_id = f"drift-{_SLUG.sub('_', focal)}"
            img_links = None
            if tube in image_tubes:
                stem = f"{page_stem(tube)}-{_SLUG.sub('_', focal)}-drift"
                add_image((spec_text, out / "img" / "tubes" / stem))
                img_links = {"png": f"../img/tubes/{stem}.png", "svg": f"../img/tubes/{stem}.svg"}
            chart_html.append(f"<h3>{esc(focal.capitalize())} focal spot</h3>" + _chart_block(
                chart_id, spec_text,
                "Upper: filament current per mA station (binned medians and fitted trend per segment; dotted "
                "rules: change points). Lower: estimated diameter loss, projection P10-P90 and the end-of-life "
                "threshold.", img_links))
        body.append(_section("drift", "Drift and wear", "".join(chart_html) or '<p class="empty">No drift data.</p>'))
        if fault_template_json is not None and (tube,) in fault_groups:
            body.append(_section("faults", "Arcs and faults", _chart_block(
                "faults", fill(fault_template_json, {"fault_rates": fault_groups[(tube,)]}),
                "Events per 1,000 exposures of this tube, by month and category.")))
        else:
            body.append(_section("faults", "Arcs and faults", '<p class="empty">No fault events recorded for this tube.</p>'))
        path = out / pages[tube]
        text = _page(title=f"tubetrack tube {tube}", heading=f"Tube {tube}", meta_html=meta, nav=nav,
                     body="".join(body), footer_html=footer,
                     js_inline=bundle if mode == "inline" else None, js_src=js_src)
        writes.append(writer.submit(path.write_text, text, encoding="utf-8"))
        paths.append(path)
    for w in writes:
        w.result()  # re-raise any write error
    writer.shutdown()
    return paths


def _thin_groups(frame: pd.DataFrame, keys: list[str], max_points: int = 160) -> pd.DataFrame:
    """Keep at most ``max_points`` evenly spaced rows per group (vectorised)."""
    import numpy as np

    if frame.empty:
        return frame
    data = frame.sort_values(keys + ["day"], kind="stable", ignore_index=True)
    pos = data.groupby(keys, sort=False).cumcount().to_numpy()
    size = data.groupby(keys, sort=False)[keys[0]].transform("size").to_numpy()
    step = np.maximum(1.0, (size - 1) / max(1, max_points - 1))
    keep = (np.floor(pos / step) != np.floor((pos - 1) / step)) | (pos == size - 1)
    return data[keep].reset_index(drop=True)


STATUS_COLUMNS = [
    ("focal_spot", "focal spot"), ("health_level", "level"), ("reason", "reason"),
    ("diameter_loss_pct", "diameter loss [%]"), ("diameter_loss_pct_se", "standard error [%]"),
    ("rul_days_p10", "remaining life P10 [days]"), ("rul_days_p50", "P50 [days]"), ("rul_days_p90", "P90 [days]"),
    ("p_end_of_life_30d", "P(end of life) 30 d"), ("p_end_of_life_90d", "90 d"),
    ("p_end_of_life_180d", "180 d"), ("arc_rate_per_1000", "arcs per 1,000 exposures"),
]


def _tube_status(first_row: pd.DataFrame, table: str, info: dict[str, Any] | None, cdf_html: str) -> str:
    import pandas as pd

    facts = []
    first = first_row.iloc[0]
    facts.append(("system", first.get("system_id")))
    facts.append(("site", first.get("site")))
    if info:
        facts.append(("model", info.get("model_label")))
        facts.append(("installed", _fmt_time(info.get("installed_at_utc"))))
        if info.get("removed_at_utc") is not None and not pd.isna(info.get("removed_at_utc")):
            facts.append(("removed", f"{_fmt_time(info.get('removed_at_utc'))} ({info.get('removal_reason') or 'reason not given'})"))
    dl = "".join(f'<div class="card"><div class="k">{esc(k)}</div><div>{esc(v)}</div></div>' for k, v in facts)
    return _section("status", "Status", f'<div class="cards">{dl}</div>{table}{cdf_html}')
