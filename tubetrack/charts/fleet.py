"""Charts of fleet results: survival, Weibull probability plot, forecast, spend, spares, uptime.

Inputs are the fleet result frames (see docs/fleet.md and docs/reports.md). Every function keeps
its datasets bounded (event steps only, the worst systems only, months not days).

References
----------
Kaplan E.L., Meier P., "Nonparametric estimation from incomplete observations", J. Am. Stat.
Assoc. 53 (1958) 457-481.
Meeker W.Q., Escobar L.A., Statistical Methods for Reliability Data, Wiley 1998, section 6.4
(probability plots; plotting positions at the midpoints of the Kaplan-Meier jumps) and 6.2
(Weibull probability scale: log(-log(1 - F)) against log t).
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING

from tubetrack.charts._base import dataset_records, named, require
from tubetrack.charts.theme import (
    CATEGORICAL_PALETTE,
    CHART_WIDTH,
    FIT_COLOUR,
    OBSERVED_COLOUR,
    PROJECTION_COLOUR,
    TARGET_COLOUR,
)

if TYPE_CHECKING:  # pragma: no cover
    import altair as alt
    import pandas as pd

#: Cumulative fractions failed labelled on the Weibull probability axis.
WEIBULL_TICKS = (0.001, 0.002, 0.005, 0.01, 0.02, 0.05, 0.1, 0.2, 0.3, 0.5, 0.632, 0.8, 0.9, 0.95, 0.99)

#: Systems shown at most in the uptime chart (those furthest below their target first).
MAX_SYSTEMS = 40


def weibull_y(fraction_failed):
    """Weibull probability-scale ordinate log(-log(1 - F)) [-] (NaN outside 0 < F < 1)."""
    import numpy as np

    f = np.asarray(fraction_failed, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        y = np.log(-np.log1p(-f))
    return np.where((f > 0) & (f < 1), y, np.nan)


def _km_steps(km: pd.DataFrame) -> pd.DataFrame:
    """Event rows of a Kaplan-Meier table plus the start point (t = 0, S = 1)."""
    import pandas as pd

    require(km, ["time", "survival", "lower", "upper"], "Kaplan-Meier chart")
    frame = km.copy()
    if "events" in frame.columns:
        frame = frame[frame["events"] > 0]
    group_cols = ["group"] if "group" in frame.columns else []
    starts = []
    for key, part in (frame.groupby(group_cols, sort=False) if group_cols else [(None, frame)]):
        start = {"time": 0.0, "survival": 1.0, "lower": 1.0, "upper": 1.0}
        if "at_risk" in part.columns and len(part):
            start["at_risk"] = int(part["at_risk"].iloc[0])
        if group_cols:
            start["group"] = key[0] if isinstance(key, tuple) else key
        starts.append(start)
    return pd.concat([pd.DataFrame(starts), frame], ignore_index=True).sort_values(
        group_cols + ["time"], ignore_index=True
    )


def km_chart(km: pd.DataFrame, clock_title: str = "Tube age [days]", interval_label: str = "95 %") -> alt.LayerChart:
    """Kaplan-Meier survival curve with its pointwise confidence band (steps).

    Parameters
    ----------
    km
        Kaplan-Meier table (``KaplanMeierResult.table``): time [clock unit], survival, lower,
        upper [-]; optional events, at_risk, censored, group.
    clock_title
        Axis title of the life clock, with its unit.
    interval_label
        Confidence level of the band, for the title.
    """
    import altair as alt

    steps = _km_steps(km)
    for col in ("at_risk", "events", "group"):
        if col not in steps.columns:
            steps[col] = None
    cols = ["time", "survival", "lower", "upper", "at_risk", "events", "group"]
    datasets = {"km_steps": dataset_records(steps, cols, "km_steps")}
    has_group = steps["group"].notna().any()
    x = alt.X("time:Q", title=clock_title)
    colour = alt.Color("group:N", title="group") if has_group else alt.value(FIT_COLOUR)
    band = (
        alt.Chart(named("km_steps"))
        .mark_area(interpolate="step-after", opacity=0.2)
        .encode(x=x, y=alt.Y("lower:Q", title="Survival probability [%]", axis=alt.Axis(format=".0%"),
                             scale=alt.Scale(domain=[0, 1])), y2="upper:Q", color=colour)
    )
    line = (
        alt.Chart(named("km_steps"))
        .mark_line(interpolate="step-after", strokeWidth=2)
        .encode(x=x, y=alt.Y("survival:Q", title="Survival probability [%]"), color=colour)
    )
    pts = (
        alt.Chart(named("km_steps"))
        .mark_point(size=18, filled=True, opacity=0.6)
        .encode(
            x=x,
            y="survival:Q",
            color=colour,
            tooltip=[
                alt.Tooltip("time:Q", title=clock_title, format=",.0f"),
                alt.Tooltip("survival:Q", title="survival [%]", format=".1%"),
                alt.Tooltip("lower:Q", title="lower bound [%]", format=".1%"),
                alt.Tooltip("upper:Q", title="upper bound [%]", format=".1%"),
                alt.Tooltip("at_risk:Q", title="at risk [tubes]"),
                alt.Tooltip("events:Q", title="failures at this time [tubes]"),
            ],
        )
    )
    return alt.layer(band, line, pts).properties(
        title=f"Tube survival (Kaplan-Meier) with {interval_label} pointwise band",
        width=CHART_WIDTH,
        height=260,
        datasets=datasets,
    )


def weibull_points(km: pd.DataFrame) -> pd.DataFrame:
    """Plotting positions for a Weibull plot from a Kaplan-Meier table.

    F_i = 1 - (S(t_i-) + S(t_i)) / 2 at each failure time t_i (midpoint of the KM jump; Meeker &
    Escobar 1998, sec. 6.4.2), so censored lives are accounted for and no point sits at F = 1.
    """
    import numpy as np

    require(km, ["time", "survival"], "Weibull plot")
    frame = km.sort_values("time", ignore_index=True)
    s = frame["survival"].to_numpy(dtype=float)
    s_before = np.concatenate([[1.0], s[:-1]])
    if "events" in frame.columns:
        mask = frame["events"].to_numpy() > 0
    else:
        mask = s < s_before
    out = frame.loc[mask, ["time"]].copy()
    out["fraction_failed"] = 1.0 - (s_before[mask] + s[mask]) / 2.0
    out = out[(out["time"] > 0) & (out["fraction_failed"] > 0)]
    out["weibull_y"] = weibull_y(out["fraction_failed"].to_numpy())
    return out.reset_index(drop=True)


def weibull_plot(
    km: pd.DataFrame,
    fit_curve: pd.DataFrame,
    eta: float,
    beta: float,
    clock_title: str = "Tube age [days]",
) -> alt.LayerChart:
    """Weibull probability plot: fleet failures, the fitted line and its confidence bounds.

    Parameters
    ----------
    km
        Kaplan-Meier table (time, survival, events) giving the plotting positions.
    fit_curve
        ``WeibullResult.survival_bounds(t)`` on a grid: time, survival, lower, upper [-].
    eta, beta
        Fitted scale [clock unit] and shape [-] (for the title and tooltips).
    """
    import altair as alt
    import numpy as np

    require(fit_curve, ["time", "survival", "lower", "upper"], "Weibull plot")
    pts = weibull_points(km)
    curve = fit_curve[fit_curve["time"] > 0].copy()
    curve["fraction_failed"] = 1.0 - curve["survival"]
    curve["weibull_y"] = weibull_y(curve["fraction_failed"].to_numpy())
    curve["weibull_y_lo"] = weibull_y(1.0 - curve["upper"].to_numpy())
    curve["weibull_y_hi"] = weibull_y(1.0 - curve["lower"].to_numpy())
    curve = curve.replace([np.inf, -np.inf], np.nan).dropna(subset=["weibull_y"])
    if len(pts):
        t_lo, t_hi = float(pts["time"].min()) / 2.0, float(pts["time"].max()) * 1.5
        curve = curve[(curve["time"] >= t_lo) & (curve["time"] <= t_hi)]
    if len(curve) > 200:
        idx = np.unique(np.linspace(0, len(curve) - 1, 200).round().astype(int))
        curve = curve.iloc[idx]
    ticks = [float(weibull_y(f)) for f in WEIBULL_TICKS]
    datasets = {
        "weibull_points": dataset_records(pts, ["time", "fraction_failed", "weibull_y"], "weibull_points"),
        "weibull_curve": dataset_records(
            curve, ["time", "fraction_failed", "weibull_y", "weibull_y_lo", "weibull_y_hi"], "weibull_curve"
        ),
    }
    x = alt.X("time:Q", title=clock_title + " (log scale)", scale=alt.Scale(type="log", nice=False))
    y_axis = alt.Axis(
        values=ticks,
        labelExpr="format(1 - exp(-exp(datum.value)), '.3~p')",
        title="Cumulative fraction failed [%] (Weibull scale)",
    )
    band = (
        alt.Chart(named("weibull_curve"))
        .mark_area(opacity=0.2, color=FIT_COLOUR)
        .encode(x=x, y=alt.Y("weibull_y_lo:Q", axis=y_axis), y2="weibull_y_hi:Q")
    )
    line = (
        alt.Chart(named("weibull_curve"))
        .mark_line(color=FIT_COLOUR, strokeWidth=2)
        .encode(
            x=x,
            y=alt.Y("weibull_y:Q", axis=y_axis),
        )
    )
    points = (
        alt.Chart(named("weibull_points"))
        .mark_point(color=OBSERVED_COLOUR, size=36, filled=True)
        .encode(
            x=x,
            y=alt.Y("weibull_y:Q", axis=y_axis),
            tooltip=[
                alt.Tooltip("time:Q", title=clock_title, format=",.0f"),
                alt.Tooltip("fraction_failed:Q", title="fraction failed [%]", format=".1%"),
            ],
        )
    )
    eta_txt = f"{eta:,.0f}" if math.isfinite(eta) else "n/a"
    beta_txt = f"{beta:.2f}" if math.isfinite(beta) else "n/a"
    return alt.layer(band, line, points).properties(
        title=f"Weibull probability plot: fitted line (scale {eta_txt}, shape {beta_txt}) with 95 % bounds",
        width=CHART_WIDTH,
        height=280,
        datasets=datasets,
    )


def _month_x(field: str = "month") -> alt.X:
    import altair as alt

    return alt.X(
        f"utcyearmonth({field}):O",
        title="Month [UTC]",
        axis=alt.Axis(labelAngle=-40),
    )


def forecast_chart(summary: pd.DataFrame) -> alt.LayerChart:
    """Expected tube replacements per month with 80 % and 95 % intervals.

    Parameters
    ----------
    summary
        ``ForecastResult.summary``: month, expected_replacements, lower_80, upper_80,
        lower_95, upper_95 [tubes].
    """
    import altair as alt

    require(summary, ["month", "expected_replacements", "lower_80", "upper_80", "lower_95", "upper_95"], "forecast chart")
    cols = ["month", "expected_replacements", "lower_80", "upper_80", "lower_95", "upper_95"]
    datasets = {"forecast": dataset_records(summary, cols, "forecast")}
    x = _month_x()
    y_title = "Tube replacements per month [tubes]"
    bars = (
        alt.Chart(named("forecast"))
        .mark_bar(color=FIT_COLOUR, opacity=0.75)
        .encode(
            x=x,
            y=alt.Y("expected_replacements:Q", title=y_title),
            tooltip=[
                alt.Tooltip("utcyearmonth(month):T", title="month [UTC]"),
                alt.Tooltip("expected_replacements:Q", title="expected [tubes]", format=".2f"),
                alt.Tooltip("lower_80:Q", title="80 % interval, low [tubes]"),
                alt.Tooltip("upper_80:Q", title="80 % interval, high [tubes]"),
                alt.Tooltip("lower_95:Q", title="95 % interval, low [tubes]"),
                alt.Tooltip("upper_95:Q", title="95 % interval, high [tubes]"),
            ],
        )
    )
    r95 = alt.Chart(named("forecast")).mark_rule(color=OBSERVED_COLOUR, strokeWidth=1).encode(
        x=x, y=alt.Y("lower_95:Q", title=y_title), y2="upper_95:Q"
    )
    r80 = alt.Chart(named("forecast")).mark_rule(color=TARGET_COLOUR, strokeWidth=4).encode(
        x=x, y=alt.Y("lower_80:Q", title=y_title), y2="upper_80:Q"
    )
    return alt.layer(bars, r95, r80).properties(
        title="Replacement forecast: expected tubes per month (bars), 80 % (thick) and 95 % (thin) intervals",
        width=CHART_WIDTH,
        height=240,
        datasets=datasets,
    )


def spend_chart(budget: pd.DataFrame, currency: str = "") -> alt.LayerChart:
    """Expected tube spend per month with 80 % and 95 % intervals.

    Parameters
    ----------
    budget
        ``BudgetResult.summary`` rows of monthly periods: month (period start), expected_spend,
        spend_lower_80, spend_upper_80, spend_lower_95, spend_upper_95 [currency units];
        optional currency. Several currencies are drawn side by side as colours.
    currency
        Currency code for the axis title (e.g. ``EUR``); taken from the frame when empty.
    """
    import altair as alt

    require(budget, ["month", "expected_spend", "spend_lower_80", "spend_upper_80", "spend_lower_95",
                     "spend_upper_95"], "spend chart")
    frame = budget.copy()
    if "currency" not in frame.columns:
        frame["currency"] = currency or None
    currencies = sorted(str(c) for c in frame["currency"].dropna().unique())
    if not currency:
        currency = currencies[0] if len(currencies) == 1 else "currency units"
    unit = currency or "currency units"
    cols = ["month", "currency", "expected_spend", "spend_lower_80", "spend_upper_80", "spend_lower_95",
            "spend_upper_95"]
    datasets = {"spend": dataset_records(frame, cols, "spend")}
    x = _month_x()
    y_title = f"Tube spend per month [{unit}]"
    bars = (
        alt.Chart(named("spend"))
        .mark_bar(color=PROJECTION_COLOUR, opacity=0.8)
        .encode(
            x=x,
            y=alt.Y("expected_spend:Q", title=y_title, axis=alt.Axis(format="~s")),
            xOffset=alt.XOffset("currency:N"),
            tooltip=[
                alt.Tooltip("utcyearmonth(month):T", title="month [UTC]"),
                alt.Tooltip("currency:N", title="currency"),
                alt.Tooltip("expected_spend:Q", title=f"expected spend [{unit}]", format=",.0f"),
                alt.Tooltip("spend_lower_80:Q", title=f"80 % interval, low [{unit}]", format=",.0f"),
                alt.Tooltip("spend_upper_80:Q", title=f"80 % interval, high [{unit}]", format=",.0f"),
                alt.Tooltip("spend_lower_95:Q", title=f"95 % interval, low [{unit}]", format=",.0f"),
                alt.Tooltip("spend_upper_95:Q", title=f"95 % interval, high [{unit}]", format=",.0f"),
            ],
        )
    )
    r95 = alt.Chart(named("spend")).mark_rule(color=OBSERVED_COLOUR, strokeWidth=1).encode(
        x=x, xOffset=alt.XOffset("currency:N"), y=alt.Y("spend_lower_95:Q", title=y_title), y2="spend_upper_95:Q"
    )
    r80 = alt.Chart(named("spend")).mark_rule(color=TARGET_COLOUR, strokeWidth=4).encode(
        x=x, xOffset=alt.XOffset("currency:N"), y=alt.Y("spend_lower_80:Q", title=y_title), y2="spend_upper_80:Q"
    )
    return alt.layer(bars, r95, r80).properties(
        title="Expected tube spend per month (bars), 80 % (thick) and 95 % (thin) intervals",
        width=CHART_WIDTH,
        height=240,
        datasets=datasets,
    )


def spares_chart(spares: pd.DataFrame) -> alt.LayerChart:
    """Spare tubes to stock per tube model for the chosen service level.

    Parameters
    ----------
    spares
        model_label, spares_needed [tubes], expected_demand [tubes]; optional service_level
        [0-1].
    """
    import altair as alt

    require(spares, ["model_label", "spares_needed", "expected_demand"], "spares chart")
    frame = spares.copy()
    if "service_level" not in frame.columns:
        frame["service_level"] = None
    cols = ["model_label", "spares_needed", "expected_demand", "service_level"]
    datasets = {"spares": dataset_records(frame, cols, "spares")}
    y = alt.Y("model_label:N", title="Tube model", sort="-x")
    bars = (
        alt.Chart(named("spares"))
        .mark_bar(color=FIT_COLOUR, opacity=0.75)
        .encode(
            x=alt.X("spares_needed:Q", title="Spare tubes [tubes]"),
            y=y,
            tooltip=[
                alt.Tooltip("model_label:N", title="tube model"),
                alt.Tooltip("spares_needed:Q", title="spares to stock [tubes]"),
                alt.Tooltip("expected_demand:Q", title="expected demand [tubes]", format=".2f"),
                alt.Tooltip("service_level:Q", title="service level [%]", format=".0%"),
            ],
        )
    )
    ticks = alt.Chart(named("spares")).mark_tick(color=TARGET_COLOUR, thickness=3, size=18).encode(
        x=alt.X("expected_demand:Q", title="Spare tubes [tubes]"), y=y
    )
    return alt.layer(bars, ticks).properties(
        title="Spares per tube model: stock for the service level (bars), expected demand (ticks)",
        width=CHART_WIDTH,
        height=alt.Step(22),
        datasets=datasets,
    )


def uptime_chart(uptime: pd.DataFrame, max_systems: int = MAX_SYSTEMS) -> alt.LayerChart:
    """Availability per system against its contracted target (a dot-and-gap chart).

    Parameters
    ----------
    uptime
        One row per system: system_id, availability_pct [%], uptime_target_pct [%]; optional
        site. Systems furthest below target come first; at most ``max_systems`` are drawn.
    """
    import altair as alt
    import numpy as np

    require(uptime, ["system_id", "availability_pct", "uptime_target_pct"], "uptime chart")
    frame = uptime.copy()
    if "site" not in frame.columns:
        frame["site"] = None
    frame["gap_pct"] = frame["availability_pct"] - frame["uptime_target_pct"]
    frame["versus_target"] = np.where(
        frame["uptime_target_pct"].isna(), "no target",
        np.where(frame["gap_pct"] >= 0, "meets target", "below target"),
    )
    frame = frame.sort_values(["gap_pct", "system_id"], na_position="last").head(max_systems)
    cols = ["system_id", "site", "availability_pct", "uptime_target_pct", "gap_pct", "versus_target"]
    datasets = {"uptime": dataset_records(frame, cols, "uptime")}
    lo = float(np.nanmin(np.concatenate([frame["availability_pct"].to_numpy(float),
                                          frame["uptime_target_pct"].to_numpy(float), [100.0]]))) if len(frame) else 90.0
    lo = max(0.0, math.floor(lo - 1.0))
    y = alt.Y("system_id:N", title="System", sort=[str(v) for v in frame["system_id"]])
    x_scale = alt.Scale(domain=[lo, 100])
    x_title = "Availability over required hours [%]"
    colour = alt.Color(
        "versus_target:N",
        title="against target",
        scale=alt.Scale(domain=["meets target", "below target", "no target"],
                        range=[CATEGORICAL_PALETTE[0], CATEGORICAL_PALETTE[5], "#999999"]),
    )
    gap = alt.Chart(named("uptime")).mark_rule(strokeWidth=2.5, opacity=0.7).encode(
        x=alt.X("availability_pct:Q", title=x_title, scale=x_scale), x2="uptime_target_pct:Q", y=y, color=colour
    )
    bars = (
        alt.Chart(named("uptime"))
        .mark_point(filled=True, size=60, opacity=1)
        .encode(
            x=alt.X("availability_pct:Q", title=x_title, scale=x_scale),
            y=y,
            color=colour,
            shape=alt.Shape("versus_target:N", title="against target",
                            scale=alt.Scale(domain=["meets target", "below target", "no target"])),
            tooltip=[
                alt.Tooltip("system_id:N", title="system"),
                alt.Tooltip("site:N", title="site"),
                alt.Tooltip("availability_pct:Q", title="availability [%]", format=".2f"),
                alt.Tooltip("uptime_target_pct:Q", title="target [%]", format=".2f"),
                alt.Tooltip("gap_pct:Q", title="difference to target [percentage points]", format="+.2f"),
            ],
        )
    )
    ticks = alt.Chart(named("uptime")).mark_tick(color=TARGET_COLOUR, thickness=2, size=14).encode(
        x=alt.X("uptime_target_pct:Q", title=x_title, scale=x_scale), y=y
    )
    return alt.layer(gap, ticks, bars).properties(
        title="Uptime per system (points) against its target (ticks); furthest below target first",
        width=CHART_WIDTH,
        height=alt.Step(16),
        datasets=datasets,
    )


def downtime_cause_chart(downtime: pd.DataFrame) -> alt.LayerChart:
    """Downtime hours by cause, planned and unplanned stacked.

    Parameters
    ----------
    downtime
        cause, planned (bool), downtime_h [h]; rows are summed per cause and planned.
    """
    import altair as alt

    require(downtime, ["cause", "planned", "downtime_h"], "downtime chart")
    frame = downtime.copy()
    frame["kind"] = frame["planned"].map({True: "planned", False: "unplanned"}).fillna("unplanned")
    agg = frame.groupby(["cause", "kind"], as_index=False)["downtime_h"].sum()
    datasets = {"downtime_causes": dataset_records(agg, ["cause", "kind", "downtime_h"], "downtime_causes")}
    bars = (
        alt.Chart(named("downtime_causes"))
        .mark_bar()
        .encode(
            x=alt.X("sum(downtime_h):Q", title="Downtime [h]"),
            y=alt.Y("cause:N", title="Cause", sort="-x"),
            color=alt.Color("kind:N", title="downtime", scale=alt.Scale(
                domain=["unplanned", "planned"], range=[CATEGORICAL_PALETTE[5], CATEGORICAL_PALETTE[4]])),
            tooltip=[
                alt.Tooltip("cause:N", title="cause"),
                alt.Tooltip("kind:N", title="planned or not"),
                alt.Tooltip("downtime_h:Q", title="downtime [h]", format=",.1f"),
            ],
        )
    )
    return alt.layer(bars).properties(
        title="Downtime by cause", width=CHART_WIDTH, height=alt.Step(22), datasets=datasets
    )
