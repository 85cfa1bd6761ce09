"""Backtest charts: forecast remaining life against what happened, calibration of probabilities.

References
----------
Saxena A., Celaya J., Saha B., Saha S., Goebel K., "Metrics for offline evaluation of prognostic
performance", Int. J. Prognostics and Health Management 1 (2010) 001 (alpha-lambda cone).
Niculescu-Mizil A., Caruana R., "Predicting good probabilities with supervised learning",
ICML 2005 (reliability diagrams: mean predicted probability against observed frequency per bin).
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from tubetrack.charts._base import dataset_records, named, require
from tubetrack.charts.theme import (
    FIT_COLOUR,
    OBSERVED_COLOUR,
    PROJECTION_COLOUR,
)

if TYPE_CHECKING:  # pragma: no cover
    import altair as alt
    import pandas as pd

#: Probability bins of the calibration chart.
CALIBRATION_BINS = 10
#: Cases drawn at most in the forecast-vs-actual chart (a deterministic even subsample beyond).
MAX_CASES = 2_000


def calibration_table(outcomes: pd.DataFrame, bins: int = CALIBRATION_BINS) -> pd.DataFrame:
    """Bin predicted probabilities and compare with observed frequencies, per horizon.

    Parameters
    ----------
    outcomes
        horizon_days, p_predicted [0-1], outcome (1 = reached end of life within the horizon,
        0 = did not; rows with unknown outcome must be dropped before).
    bins
        Number of equal-width probability bins.

    Returns
    -------
    pandas.DataFrame
        horizon_days, bin_lo, bin_hi, p_mean (mean prediction), observed (fraction with
        outcome 1), cases [count], observed_lo / observed_hi (Wilson 95 % interval).
    """
    import numpy as np
    import pandas as pd

    require(outcomes, ["horizon_days", "p_predicted", "outcome"], "calibration")
    frame = outcomes.dropna(subset=["p_predicted", "outcome"]).copy()
    p = frame["p_predicted"].clip(0, 1).to_numpy(float)
    frame["bin"] = np.minimum((p * bins).astype(int), bins - 1)
    g = frame.groupby(["horizon_days", "bin"], as_index=False).agg(
        p_mean=("p_predicted", "mean"), observed=("outcome", "mean"), cases=("outcome", "size"),
        hits=("outcome", "sum"),
    )
    g["bin_lo"] = g["bin"] / bins
    g["bin_hi"] = (g["bin"] + 1) / bins
    # Wilson score interval, z = 1.96 (Wilson E.B., J. Am. Stat. Assoc. 22 (1927) 209).
    z = 1.959964
    n = g["cases"].to_numpy(float)
    ph = g["observed"].to_numpy(float)
    centre = (ph + z * z / (2 * n)) / (1 + z * z / n)
    half = z * np.sqrt(ph * (1 - ph) / n + z * z / (4 * n * n)) / (1 + z * z / n)
    g["observed_lo"] = np.clip(centre - half, 0, 1)
    g["observed_hi"] = np.clip(centre + half, 0, 1)
    return pd.DataFrame(g[["horizon_days", "bin_lo", "bin_hi", "p_mean", "observed", "cases",
                          "observed_lo", "observed_hi"]])


def calibration_chart(outcomes: pd.DataFrame, bins: int = CALIBRATION_BINS) -> alt.LayerChart:
    """Reliability diagram of the end-of-life probabilities, one colour per horizon."""
    import altair as alt
    import pandas as pd

    table = calibration_table(outcomes, bins)
    table["horizon"] = table["horizon_days"].map(lambda h: f"{h:g} days")
    diag = pd.DataFrame({"p": [0.0, 1.0]})
    datasets = {
        "calibration": dataset_records(
            table, ["horizon", "horizon_days", "p_mean", "observed", "observed_lo", "observed_hi", "cases"],
            "calibration"),
        "calibration_diagonal": dataset_records(diag, ["p"], "calibration_diagonal"),
    }
    x = alt.X("p_mean:Q", title="Forecast probability of end of life [%]", scale=alt.Scale(domain=[0, 1]),
              axis=alt.Axis(format=".0%"))
    y_title = "Observed fraction reaching end of life [%]"
    colour = alt.Color("horizon:N", title="horizon", sort=alt.SortField("horizon_days"))
    diagonal = (
        alt.Chart(named("calibration_diagonal"))
        .mark_line(color="#999999", strokeDash=[4, 4])
        .encode(x=alt.X("p:Q", title="Forecast probability of end of life [%]"), y=alt.Y("p:Q", title=y_title))
    )
    err = alt.Chart(named("calibration")).mark_rule(strokeWidth=1.5).encode(
        x=x, y=alt.Y("observed_lo:Q", title=y_title), y2="observed_hi:Q", color=colour
    )
    pts = (
        alt.Chart(named("calibration"))
        .mark_point(filled=True)
        .encode(
            x=x,
            y=alt.Y("observed:Q", title=y_title, scale=alt.Scale(domain=[0, 1]), axis=alt.Axis(format=".0%")),
            color=colour,
            size=alt.Size("cases:Q", title="cases [count]", scale=alt.Scale(range=[30, 300])),
            tooltip=[
                alt.Tooltip("horizon:N", title="horizon"),
                alt.Tooltip("p_mean:Q", title="mean forecast [%]", format=".1%"),
                alt.Tooltip("observed:Q", title="observed [%]", format=".1%"),
                alt.Tooltip("observed_lo:Q", title="observed, 95 % low [%]", format=".1%"),
                alt.Tooltip("observed_hi:Q", title="observed, 95 % high [%]", format=".1%"),
                alt.Tooltip("cases:Q", title="cases [count]"),
            ],
        )
    )
    return alt.layer(diagonal, err, pts).properties(
        title="Calibration of end-of-life probabilities (on the diagonal = honest)",
        width=360,
        height=320,
        datasets=datasets,
    )


def backtest_rul_chart(cases: pd.DataFrame, alpha: float = 0.2) -> alt.LayerChart:
    """Forecast remaining life (P50 with P10-P90) against the true remaining life.

    Parameters
    ----------
    cases
        One row per backtest case with a known outcome: true_rul_days, rul_days_p10,
        rul_days_p50, rul_days_p90 [days]; optional tube_id, cutoff (datetime), cause.
    alpha
        Half-width of the accuracy cone around the diagonal (Saxena et al. 2010) [-].
    """
    import altair as alt
    import numpy as np
    import pandas as pd

    require(cases, ["true_rul_days", "rul_days_p10", "rul_days_p50", "rul_days_p90"], "backtest chart")
    frame = cases.dropna(subset=["true_rul_days", "rul_days_p50"]).copy()
    if len(frame) > MAX_CASES:
        idx = np.unique(np.linspace(0, len(frame) - 1, MAX_CASES).round().astype(int))
        frame = frame.iloc[idx]
    for col in ("tube_id", "cutoff", "cause"):
        if col not in frame.columns:
            frame[col] = None
    frame["covered"] = np.where(
        (frame["true_rul_days"] >= frame["rul_days_p10"]) & (frame["true_rul_days"] <= frame["rul_days_p90"]),
        "inside P10-P90", "outside P10-P90",
    )
    top = float(np.nanmax(frame["true_rul_days"].to_numpy(float))) * 1.05 if len(frame) else 365.0
    top = max(top, 1.0)
    cone = pd.DataFrame({"t": [0.0, top], "lo": [0.0, top * (1 - alpha)], "hi": [0.0, top * (1 + alpha)]})
    datasets = {
        "backtest_cases": dataset_records(
            frame, ["tube_id", "cutoff", "cause", "true_rul_days", "rul_days_p10", "rul_days_p50",
                    "rul_days_p90", "covered"], "backtest_cases"),
        "backtest_cone": dataset_records(cone, ["t", "lo", "hi"], "backtest_cone"),
    }
    x = alt.X("true_rul_days:Q", title="True remaining life at the cut-off [days]")
    y_title = "Forecast remaining life [days]"
    cone_area = (
        alt.Chart(named("backtest_cone"))
        .mark_area(opacity=0.12, color=FIT_COLOUR)
        .encode(x=alt.X("t:Q", title="True remaining life at the cut-off [days]"),
                y=alt.Y("lo:Q", title=y_title), y2="hi:Q")
    )
    diagonal = alt.Chart(named("backtest_cone")).mark_line(color="#999999", strokeDash=[4, 4]).encode(
        x="t:Q", y=alt.Y("t:Q", title=y_title)
    )
    bars = alt.Chart(named("backtest_cases")).mark_rule(color=OBSERVED_COLOUR, opacity=0.5).encode(
        x=x, y=alt.Y("rul_days_p10:Q", title=y_title), y2="rul_days_p90:Q"
    )
    pts = (
        alt.Chart(named("backtest_cases"))
        .mark_point(filled=True, size=34)
        .encode(
            x=x,
            y=alt.Y("rul_days_p50:Q", title=y_title),
            color=alt.Color("covered:N", title="true date", scale=alt.Scale(
                domain=["inside P10-P90", "outside P10-P90"], range=[FIT_COLOUR, PROJECTION_COLOUR])),
            shape=alt.Shape("covered:N", title="true date",
                            scale=alt.Scale(domain=["inside P10-P90", "outside P10-P90"])),
            tooltip=[
                alt.Tooltip("tube_id:N", title="tube"),
                alt.Tooltip("utcyearmonthdate(cutoff):T", title="cut-off [UTC]"),
                alt.Tooltip("cause:N", title="removal reason"),
                alt.Tooltip("true_rul_days:Q", title="true remaining life [days]", format=".0f"),
                alt.Tooltip("rul_days_p10:Q", title="forecast P10 [days]", format=".0f"),
                alt.Tooltip("rul_days_p50:Q", title="forecast P50 [days]", format=".0f"),
                alt.Tooltip("rul_days_p90:Q", title="forecast P90 [days]", format=".0f"),
            ],
        )
    )
    return alt.layer(cone_area, diagonal, bars, pts).properties(
        title=f"Backtest: forecast against true remaining life (shaded: within +/-{alpha:.0%})",
        width=420,
        height=320,
        datasets=datasets,
    )
