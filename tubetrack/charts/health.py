"""Charts of tube health results: station drift, diameter loss, fault rates, fleet overview.

Inputs are the health result tables (``result_health*``, see docs/health.md and the column list in
docs/reports.md); every function aggregates before it draws, so a chart stays light whatever the
history length. Times are UTC: temporal scales use ``utc`` and tooltips show UTC dates.
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

from tubetrack.charts._base import (
    dataset_records,
    named,
    require,
)
from tubetrack.charts.theme import (
    CHANGE_COLOUR,
    CHART_WIDTH,
    OBSERVED_COLOUR,
    PROJECTION_COLOUR,
    THRESHOLD_COLOUR,
    ordinal_palette,
)

if TYPE_CHECKING:  # pragma: no cover
    import altair as alt
    import pandas as pd

#: Default number of time bins per series a drift chart shows at most.
MAX_POINTS_PER_SERIES = 160

DATE_TITLE = "Date [UTC]"


def _utc_x(field: str = "day", title: str = DATE_TITLE) -> alt.X:
    import altair as alt

    return alt.X(f"{field}:T", title=title, scale=alt.Scale(type="utc"), axis=alt.Axis(format="%Y-%m"))


def _utc_tip(field: str = "day", title: str = "date [UTC]") -> alt.Tooltip:
    import altair as alt

    return alt.Tooltip(f"utcyearmonthdate({field}):T", title=title)


def bin_days_for(span_days: float, max_points: int = MAX_POINTS_PER_SERIES) -> int:
    """Width of the time bins [days] that keeps a series at or below ``max_points`` bins.

    At least 1 day; 7 days (weekly) once a series spans more than ``max_points`` days, then
    whole multiples of 7 days.
    """
    if not math.isfinite(span_days) or span_days <= max_points:
        return 1
    weeks = math.ceil(span_days / (7 * max_points))
    return 7 * max(1, weeks)


def aggregate_drift(drift: pd.DataFrame, max_points: int = MAX_POINTS_PER_SERIES) -> pd.DataFrame:
    """Bin the daily station drift series in time so each series has <= ``max_points`` points.

    Parameters
    ----------
    drift
        ``result_health_drift`` rows: tube_id, focal_spot, tube_current_ma, day,
        filament_current_norm_a [A], fitted_a [A], segment; optional ``n_days`` (already binned).
    max_points
        Maximum bins per tube x focal spot x station series.

    Returns
    -------
    pandas.DataFrame
        tube_id, focal_spot, tube_current_ma, day (bin start), filament_current_a (median of the
        normalised daily values in the bin; median of bin medians when ``drift`` was binned
        already) [A], filament_current_lo_a / _hi_a (min and max of the daily values; taken from
        ``drift`` when it carries them) [A], fitted_a (mean of the fitted trend) [A], segment (last in the
        bin), n_days [days with data].
    """
    import numpy as np
    import pandas as pd

    require(
        drift,
        ["tube_id", "focal_spot", "tube_current_ma", "day", "filament_current_norm_a", "fitted_a"],
        "drift chart",
    )
    if drift.empty:
        return pd.DataFrame(
            columns=[
                "tube_id", "focal_spot", "tube_current_ma", "day", "filament_current_a",
                "filament_current_lo_a", "filament_current_hi_a", "fitted_a", "segment", "n_days",
            ]
        )
    frame = drift.copy()
    frame["day"] = pd.to_datetime(frame["day"])
    if "segment" not in frame.columns:
        frame["segment"] = 0
    if "n_days" not in frame.columns:
        frame["n_days"] = 1
    span = (frame["day"].max() - frame["day"].min()) / pd.Timedelta(days=1)
    width = bin_days_for(float(span), max_points)
    if "filament_current_lo_a" not in frame.columns:
        frame["filament_current_lo_a"] = frame["filament_current_norm_a"]
    if "filament_current_hi_a" not in frame.columns:
        frame["filament_current_hi_a"] = frame["filament_current_norm_a"]
    if width == 1:
        frame["filament_current_a"] = frame["filament_current_norm_a"]
        return frame[
            [
                "tube_id", "focal_spot", "tube_current_ma", "day", "filament_current_a",
                "filament_current_lo_a", "filament_current_hi_a", "fitted_a", "segment", "n_days",
            ]
        ].sort_values(["tube_id", "focal_spot", "tube_current_ma", "day"], ignore_index=True)
    origin = pd.Timestamp("1970-01-05")  # a Monday: weekly bins start on Mondays
    days = (frame["day"] - origin) // pd.Timedelta(days=1)
    frame["day"] = origin + pd.to_timedelta((days // width) * width, unit="D")
    grouped = frame.groupby(
        ["tube_id", "focal_spot", "tube_current_ma", "day", "segment"], sort=True, dropna=False
    )
    out = grouped.agg(
        filament_current_a=("filament_current_norm_a", "median"),
        filament_current_lo_a=("filament_current_lo_a", "min"),
        filament_current_hi_a=("filament_current_hi_a", "max"),
        fitted_a=("fitted_a", "mean"),
        n_days=("n_days", "sum"),
    ).reset_index()
    out["n_days"] = out["n_days"].astype(np.int64)
    return out[
        [
            "tube_id", "focal_spot", "tube_current_ma", "day", "filament_current_a",
            "filament_current_lo_a", "filament_current_hi_a", "fitted_a", "segment", "n_days",
        ]
    ]


def drift_datasets(
    drift: pd.DataFrame,
    diameter: pd.DataFrame,
    projection: pd.DataFrame,
    changepoints: pd.DataFrame,
    threshold_pct: float,
    threshold_lo_pct: float | None = None,
    threshold_hi_pct: float | None = None,
) -> dict[str, pd.DataFrame]:
    """The named datasets of :func:`drift_chart` (frames; times still datetimes)."""
    import pandas as pd

    obs = aggregate_drift(drift)
    obs = obs.assign(station=obs["tube_current_ma"].map(lambda v: f"{v:g} mA"))
    dia = diameter.copy()
    if not dia.empty:
        require(dia, ["day", "diameter_loss_pct", "diameter_loss_pct_lo", "diameter_loss_pct_hi"], "diameter")
        dia = _thin(dia, "day", MAX_POINTS_PER_SERIES)
    proj = projection.copy()
    if not proj.empty:
        require(proj, ["day", "diameter_loss_pct_p10", "diameter_loss_pct_p50", "diameter_loss_pct_p90"], "projection")
        proj = _thin(proj, "day", MAX_POINTS_PER_SERIES)
    cps = changepoints.copy()
    if not cps.empty:
        require(cps, ["day", "kind"], "change points")
        if "tube_current_ma" not in cps.columns:
            cps["tube_current_ma"] = float("nan")
    lo = threshold_pct if threshold_lo_pct is None else threshold_lo_pct
    hi = threshold_pct if threshold_hi_pct is None else threshold_hi_pct
    thr = pd.DataFrame(
        {
            "threshold_pct": [float(threshold_pct)],
            "threshold_lo_pct": [float(lo)],
            "threshold_hi_pct": [float(hi)],
        }
    )
    return {
        "drift_points": obs,
        "drift_diameter": dia,
        "drift_projection": proj,
        "drift_changes": cps,
        "drift_threshold": thr,
    }


DRIFT_COLUMNS: dict[str, list[str]] = {
    "drift_points": [
        "day", "station", "tube_current_ma", "filament_current_a", "filament_current_lo_a",
        "filament_current_hi_a", "fitted_a", "segment", "n_days",
    ],
    "drift_diameter": ["day", "diameter_loss_pct", "diameter_loss_pct_lo", "diameter_loss_pct_hi"],
    "drift_projection": ["day", "diameter_loss_pct_p10", "diameter_loss_pct_p50", "diameter_loss_pct_p90"],
    "drift_changes": ["day", "kind", "tube_current_ma"],
    "drift_threshold": ["threshold_pct", "threshold_lo_pct", "threshold_hi_pct"],
}


def _thin(frame: pd.DataFrame, time_col: str, max_points: int) -> pd.DataFrame:
    """Keep at most ``max_points`` evenly spaced rows of a smooth series (sorted by time)."""
    import numpy as np

    frame = frame.sort_values(time_col, ignore_index=True)
    if len(frame) <= max_points:
        return frame
    idx = np.unique(np.linspace(0, len(frame) - 1, max_points).round().astype(int))
    return frame.iloc[idx].reset_index(drop=True)


def drift_layers(title: str = "") -> alt.VConcatChart:
    """The data-free structure of the drift chart (marks refer to named datasets)."""
    import altair as alt

    x = _utc_x()
    changes = (
        alt.Chart(named("drift_changes"))
        .mark_rule(color=CHANGE_COLOUR, strokeDash=[2, 3], strokeWidth=1.2)
        .encode(
            x=x,
            tooltip=[_utc_tip(), alt.Tooltip("kind:N", title="change"),
                     alt.Tooltip("tube_current_ma:Q", title="station [mA]")],
        )
    )
    station = alt.Color("station:N", title="mA station", sort=alt.SortField("tube_current_ma"))
    points = (
        alt.Chart(named("drift_points"))
        .mark_point(size=22, opacity=0.75, filled=True)
        .encode(
            x=x,
            y=alt.Y(
                "filament_current_a:Q",
                title="Filament current, kV-normalised [A]",
                scale=alt.Scale(zero=False),
            ),
            color=station,
            tooltip=[
                _utc_tip(title="bin start [UTC]"),
                alt.Tooltip("station:N", title="mA station"),
                alt.Tooltip("filament_current_a:Q", title="median filament current [A]", format=".4f"),
                alt.Tooltip("filament_current_lo_a:Q", title="lowest daily value [A]", format=".4f"),
                alt.Tooltip("filament_current_hi_a:Q", title="highest daily value [A]", format=".4f"),
                alt.Tooltip("fitted_a:Q", title="fitted trend [A]", format=".4f"),
                alt.Tooltip("n_days:Q", title="days with data [days]"),
                alt.Tooltip("segment:N", title="segment"),
            ],
        )
    )
    fit = (
        alt.Chart(named("drift_points"))
        .mark_line(strokeWidth=2)
        .encode(
            x=x,
            y=alt.Y("fitted_a:Q", title="Filament current, kV-normalised [A]", scale=alt.Scale(zero=False)),
            color=station,
            detail=alt.Detail("segment:N"),
        )
    )
    top = alt.layer(points, fit, changes).properties(
        title="Filament current per mA station (points: measured, lines: fitted trend)",
        width=CHART_WIDTH,
        height=220,
    )

    band = (
        alt.Chart(named("drift_diameter"))
        .mark_area(opacity=0.25, color=OBSERVED_COLOUR)
        .encode(
            x=x,
            y=alt.Y("diameter_loss_pct_lo:Q", title="Estimated filament diameter loss [%]"),
            y2="diameter_loss_pct_hi:Q",
        )
    )
    history = (
        alt.Chart(named("drift_diameter"))
        .mark_line(color=OBSERVED_COLOUR, point=alt.OverlayMarkDef(size=10, color=OBSERVED_COLOUR))
        .encode(
            x=x,
            y=alt.Y("diameter_loss_pct:Q", title="Estimated filament diameter loss [%]"),
            tooltip=[
                _utc_tip(),
                alt.Tooltip("diameter_loss_pct:Q", title="diameter loss [%]", format=".2f"),
                alt.Tooltip("diameter_loss_pct_lo:Q", title="lower bound [%]", format=".2f"),
                alt.Tooltip("diameter_loss_pct_hi:Q", title="upper bound [%]", format=".2f"),
            ],
        )
    )
    fan = (
        alt.Chart(named("drift_projection"))
        .mark_area(opacity=0.25, color=PROJECTION_COLOUR)
        .encode(x=x, y="diameter_loss_pct_p10:Q", y2="diameter_loss_pct_p90:Q")
    )
    median = (
        alt.Chart(named("drift_projection"))
        .mark_line(color=PROJECTION_COLOUR, strokeDash=[6, 3], strokeWidth=2)
        .encode(
            x=x,
            y="diameter_loss_pct_p50:Q",
            tooltip=[
                _utc_tip(),
                alt.Tooltip("diameter_loss_pct_p10:Q", title="projection P10 [%]", format=".2f"),
                alt.Tooltip("diameter_loss_pct_p50:Q", title="projection P50 [%]", format=".2f"),
                alt.Tooltip("diameter_loss_pct_p90:Q", title="projection P90 [%]", format=".2f"),
            ],
        )
    )
    thr_band, thr = _threshold_layers(
        "drift_threshold", "end-of-life threshold [%]", "threshold, low [%]", "threshold, high [%]"
    )
    bottom = alt.layer(thr_band, band, fan, history, median, thr, changes).properties(
        title="Estimated diameter loss, projection P10-P90 and end-of-life threshold",
        width=CHART_WIDTH,
        height=220,
    )
    chart = alt.vconcat(top, bottom, spacing=18).resolve_scale(x="shared", color="independent")
    if title:
        chart = chart.properties(title=title)
    return chart


def _threshold_layers(
    dataset: str, title: str, lo_title: str, hi_title: str
) -> tuple[alt.Chart, alt.Chart]:
    """End-of-life threshold as a dashed rule over its spread band, from a named dataset with
    ``threshold_pct``, ``threshold_lo_pct`` and ``threshold_hi_pct`` [% diameter loss]."""
    import altair as alt

    band = (
        alt.Chart(named(dataset))
        .mark_rect(opacity=0.12, color=THRESHOLD_COLOUR)
        .encode(y="threshold_lo_pct:Q", y2="threshold_hi_pct:Q")
    )
    rule = (
        alt.Chart(named(dataset))
        .mark_rule(color=THRESHOLD_COLOUR, strokeDash=[8, 4], strokeWidth=2)
        .encode(
            y="threshold_pct:Q",
            tooltip=[
                alt.Tooltip("threshold_pct:Q", title=title, format=".2f"),
                alt.Tooltip("threshold_lo_pct:Q", title=lo_title, format=".2f"),
                alt.Tooltip("threshold_hi_pct:Q", title=hi_title, format=".2f"),
            ],
        )
    )
    return band, rule


def drift_chart(
    drift: pd.DataFrame,
    diameter: pd.DataFrame,
    projection: pd.DataFrame,
    changepoints: pd.DataFrame,
    threshold_pct: float,
    threshold_lo_pct: float | None = None,
    threshold_hi_pct: float | None = None,
    title: str = "",
) -> alt.VConcatChart:
    """Station drift of one tube and focal spot, with its wear estimate and projection.

    Upper panel: the kV-normalised filament current per mA station (binned points, the fitted
    trend per segment), change points as vertical rules. Lower panel: the estimated filament
    diameter loss with its uncertainty band, the projection's P10-P90 fan and P50 line, the
    end-of-life threshold (with the spread of the fleet's learned threshold as a band).

    Parameters
    ----------
    drift, diameter, projection, changepoints
        Rows of ``result_health_drift``, ``_diameter``, ``_projection``, ``_changepoints`` for ONE
        tube and focal spot.
    threshold_pct
        End-of-life diameter loss [%].
    threshold_lo_pct, threshold_hi_pct
        Spread of the learned threshold [%], if known.
    title
        Chart title (plain text; Vega draws it as text, never as markup).
    """
    frames = drift_datasets(
        drift, diameter, projection, changepoints, threshold_pct, threshold_lo_pct, threshold_hi_pct
    )
    datasets = {name: dataset_records(frames[name], DRIFT_COLUMNS[name], name) for name in frames}
    return drift_layers(title).properties(datasets=datasets)


# ----------------------------------------------------------------------------------------------
# Diameter loss of several tubes against the fleet's learned threshold.


def diameter_chart(
    diameter: pd.DataFrame,
    threshold_pct: float,
    threshold_lo_pct: float | None = None,
    threshold_hi_pct: float | None = None,
    max_tubes: int = 8,
    order: list[str] | None = None,
) -> alt.LayerChart:
    """Estimated diameter loss over time per tube, with bands and the learned threshold.

    Parameters
    ----------
    diameter
        ``result_health_diameter`` rows (tube_id, focal_spot, day, diameter_loss_pct,
        diameter_loss_pct_lo, diameter_loss_pct_hi) [%].
    threshold_pct, threshold_lo_pct, threshold_hi_pct
        The fleet's end-of-life threshold and its spread [%].
    max_tubes
        Show at most this many tube x focal spot series (the first of ``order``, else the ones
        with the largest latest loss).
    order
        Preferred ``"tube_id / focal_spot"`` keys, most important first (e.g. by risk).
    """
    import altair as alt
    import pandas as pd

    require(
        diameter,
        ["tube_id", "focal_spot", "day", "diameter_loss_pct", "diameter_loss_pct_lo", "diameter_loss_pct_hi"],
        "diameter chart",
    )
    import numpy as np

    # rows per (tube, focal spot) first, and the series labels only for the kept rows: the
    # whole fleet's diameter table has millions of rows (4.1 M on the bench store)
    rows_of = {f"{t} / {f}": idx for (t, f), idx in
               diameter.groupby(["tube_id", "focal_spot"], sort=False).indices.items()}
    if order is None:
        latest = diameter.sort_values("day").groupby(["tube_id", "focal_spot"])["diameter_loss_pct"].last()
        order = [f"{t} / {f}" for t, f in latest.sort_values(ascending=False).index]
    keep = list(dict.fromkeys(s for s in order if s in rows_of))[:max_tubes]
    take = np.sort(np.concatenate([rows_of[s] for s in keep])) if keep else np.zeros(0, int)
    frame = diameter.iloc[take].copy()
    frame["series"] = frame["tube_id"].astype(str) + " / " + frame["focal_spot"].astype(str)
    parts = [_thin(g, "day", MAX_POINTS_PER_SERIES) for _, g in frame.groupby("series", sort=False)]
    frame = pd.concat(parts, ignore_index=True) if parts else frame
    lo = threshold_pct if threshold_lo_pct is None else threshold_lo_pct
    hi = threshold_pct if threshold_hi_pct is None else threshold_hi_pct
    thr = pd.DataFrame({"threshold_pct": [threshold_pct], "threshold_lo_pct": [lo], "threshold_hi_pct": [hi]})
    cols = ["series", "tube_id", "focal_spot", "day", "diameter_loss_pct", "diameter_loss_pct_lo", "diameter_loss_pct_hi"]
    datasets = {
        "diameter_series": dataset_records(frame, cols, "diameter_series"),
        "diameter_threshold": dataset_records(thr, list(thr.columns), "diameter_threshold"),
    }
    x = _utc_x()
    colour = alt.Color("series:N", title="tube / focal spot", sort=keep)
    y_title = "Estimated filament diameter loss [%]"
    band = (
        alt.Chart(named("diameter_series"))
        .mark_area(opacity=0.15)
        .encode(x=x, y=alt.Y("diameter_loss_pct_lo:Q", title=y_title), y2="diameter_loss_pct_hi:Q", color=colour)
    )
    line = (
        alt.Chart(named("diameter_series"))
        .mark_line(point=alt.OverlayMarkDef(size=12))
        .encode(
            x=x,
            y=alt.Y("diameter_loss_pct:Q", title=y_title),
            color=colour,
            tooltip=[
                alt.Tooltip("tube_id:N", title="tube"),
                alt.Tooltip("focal_spot:N", title="focal spot"),
                _utc_tip(),
                alt.Tooltip("diameter_loss_pct:Q", title="diameter loss [%]", format=".2f"),
                alt.Tooltip("diameter_loss_pct_lo:Q", title="lower bound [%]", format=".2f"),
                alt.Tooltip("diameter_loss_pct_hi:Q", title="upper bound [%]", format=".2f"),
            ],
        )
    )
    thr_band, rule = _threshold_layers(
        "diameter_threshold",
        "learned end-of-life threshold [%]",
        "spread, low [%]",
        "spread, high [%]",
    )
    return alt.layer(thr_band, band, line, rule).properties(
        title="Estimated diameter loss of the tubes nearest end of life, against the fleet's threshold",
        width=CHART_WIDTH,
        height=280,
        datasets=datasets,
    )


# ----------------------------------------------------------------------------------------------
# Arc and fault rates.


def fault_rate_chart(rates: pd.DataFrame, title: str = "") -> alt.LayerChart:
    """Events per 1,000 exposures per month and category.

    Parameters
    ----------
    rates
        month (datetime, month start, UTC), category, events [count], exposures [count]; the
        rate is computed here as events / exposures x 1000 (NaN where no exposures).
    """
    import altair as alt
    import numpy as np

    require(rates, ["month", "category", "events", "exposures"], "fault rate chart")
    frame = rates.copy()
    exposures = frame["exposures"].astype(float)
    frame["rate_per_1000"] = np.where(exposures > 0, frame["events"].astype(float) / exposures.where(exposures > 0) * 1000.0, np.nan)
    cols = ["month", "category", "events", "exposures", "rate_per_1000"]
    datasets = {"fault_rates": dataset_records(frame, cols, "fault_rates")}
    base = alt.Chart(named("fault_rates")).encode(
        x=alt.X("month:T", title="Month [UTC]", scale=alt.Scale(type="utc"), axis=alt.Axis(format="%Y-%m")),
        y=alt.Y("rate_per_1000:Q", title="Events per 1,000 exposures [1/1000]"),
        color=alt.Color("category:N", title="event category"),
    )
    line = base.mark_line()
    pts = base.mark_point(size=28).encode(
        tooltip=[
            alt.Tooltip("utcyearmonth(month):T", title="month [UTC]"),
            alt.Tooltip("category:N", title="category"),
            alt.Tooltip("events:Q", title="events [count]"),
            alt.Tooltip("exposures:Q", title="exposures [count]", format=","),
            alt.Tooltip("rate_per_1000:Q", title="rate [per 1,000 exposures]", format=".2f"),
        ]
    )
    return alt.layer(line, pts).properties(
        title=title or "Arcs and faults per 1,000 exposures, by month",
        width=CHART_WIDTH,
        height=220,
        datasets=datasets,
    )


# ----------------------------------------------------------------------------------------------
# Fleet overview: probability of end of life vs impact.


def level_order(health: pd.DataFrame) -> list[str]:
    """Health levels ordered by ``health_rank`` (0 = best first)."""
    if "health_rank" not in health.columns:
        return sorted(health["health_level"].dropna().astype(str).unique())
    pairs = health[["health_level", "health_rank"]].dropna().drop_duplicates()
    pairs = pairs.sort_values(["health_rank", "health_level"])
    return list(dict.fromkeys(pairs["health_level"].astype(str)))


def level_scale(levels: list[str]) -> alt.Scale:
    """Ordinal colour scale of health levels: :func:`ordinal_palette` in rank order."""
    import altair as alt

    return alt.Scale(domain=levels, range=ordinal_palette(len(levels)))


def fleet_overview_chart(overview: pd.DataFrame, horizon_days: int = 90, label_top: int = 8) -> alt.LayerChart:
    """Every active tube placed by probability of end of life within the horizon vs impact.

    Parameters
    ----------
    overview
        One row per active tube: tube_id, system_id, site, health_level, health_rank,
        p_end_of_life (within ``horizon_days``) [0-1], impact [criticality weight, 1 = typical],
        href (relative link to the tube's page); optional rul_days_p50 [days], reason.
    horizon_days
        The horizon of ``p_end_of_life`` [days] (axis title).
    label_top
        Name at most this many tubes of most concern (level 3 or worse, or >= 20 % chance).
    """
    import altair as alt

    require(
        overview,
        ["tube_id", "system_id", "site", "health_level", "p_end_of_life", "impact", "href"],
        "fleet overview",
    )
    frame = overview.copy()
    for col in ("rul_days_p50", "reason", "health_rank"):
        if col not in frame.columns:
            frame[col] = None
    levels = level_order(frame)
    # Name the few tubes of most concern next to their points (the rest: tooltips and links).
    ranked = frame.assign(_r=frame["health_rank"].fillna(-1), _p=frame["p_end_of_life"].fillna(0))
    top = ranked[(ranked["_r"] >= 2) | (ranked["_p"] >= 0.2)].sort_values(["_r", "_p"], ascending=False)
    frame["label"] = ""
    frame.loc[top.index[:label_top], "label"] = frame.loc[top.index[:label_top], "tube_id"].astype(str)
    cols = [
        "tube_id", "system_id", "site", "health_level", "health_rank", "p_end_of_life", "impact",
        "href", "rul_days_p50", "reason", "label",
    ]
    datasets = {"fleet_overview": dataset_records(frame, cols, "fleet_overview")}
    points = (
        alt.Chart(named("fleet_overview"))
        .mark_point(filled=True, opacity=0.8, size=70, stroke="#333333", strokeWidth=0.5, cursor="pointer")
        .encode(
            x=alt.X(
                "p_end_of_life:Q",
                title=f"Probability of end of life within {horizon_days} days [%]",
                scale=alt.Scale(domain=[0, 1]),
                axis=alt.Axis(format=".0%"),
            ),
            y=alt.Y("impact:Q", title="Impact: system criticality weight [1 = typical]", scale=alt.Scale(zero=True)),
            color=alt.Color("health_level:N", title="health level", scale=level_scale(levels), sort=levels),
            shape=alt.Shape("health_level:N", title="health level", sort=levels,
                            scale=alt.Scale(domain=levels)),
            href=alt.Href("href:N"),
            order=alt.Order("health_rank:Q"),
            tooltip=[
                alt.Tooltip("tube_id:N", title="tube"),
                alt.Tooltip("system_id:N", title="system"),
                alt.Tooltip("site:N", title="site"),
                alt.Tooltip("health_level:N", title="health level"),
                alt.Tooltip("p_end_of_life:Q", title=f"P(end of life in {horizon_days} d) [%]", format=".1%"),
                alt.Tooltip("rul_days_p50:Q", title="remaining life P50 [days]", format=".0f"),
                alt.Tooltip("impact:Q", title="criticality weight [1 = typical]", format=".2f"),
                alt.Tooltip("reason:N", title="reason"),
            ],
        )
    )
    labels = (
        alt.Chart(named("fleet_overview"))
        .mark_text(align="left", dx=8, dy=-6, fontSize=10, color="#333333")
        .encode(x="p_end_of_life:Q", y="impact:Q", text="label:N", href=alt.Href("href:N"))
    )
    return alt.layer(points, labels).properties(
        title=f"Fleet overview: chance of end of life within {horizon_days} days against impact (click a tube)",
        width=CHART_WIDTH,
        height=320,
        datasets=datasets,
    )


def health_level_chart(health: pd.DataFrame) -> alt.LayerChart:
    """Number of tube x focal spot rows per health level (ordinal colours)."""
    import altair as alt

    require(health, ["health_level"], "health level chart")
    levels = level_order(health)
    counts = health.groupby("health_level", dropna=False).size().rename("tubes").reset_index()
    counts["health_level"] = counts["health_level"].astype(str)
    datasets = {"health_levels": dataset_records(counts, ["health_level", "tubes"], "health_levels")}
    bars = (
        alt.Chart(named("health_levels"))
        .mark_bar()
        .encode(
            x=alt.X("tubes:Q", title="Tubes x focal spots [count]"),
            y=alt.Y("health_level:N", title="Health level [ordered, best first]", sort=levels),
            color=alt.Color("health_level:N", scale=level_scale(levels), legend=None, sort=levels),
            tooltip=[
                alt.Tooltip("health_level:N", title="health level"),
                alt.Tooltip("tubes:Q", title="tubes x focal spots [count]"),
            ],
        )
    )
    return alt.layer(bars).properties(
        title="Health levels across the fleet", width=CHART_WIDTH, height=30 * max(1, len(levels)), datasets=datasets
    )
