"""Charts are checked on their Vega-Lite specification (``chart.to_dict()``), never on pixels."""

from __future__ import annotations

import re

import numpy as np
import pandas as pd
import pytest

from tubetrack import charts as C
from tubetrack.charts import theme

UNIT_IN_TITLE = re.compile(r"\[[^\]]+\]")


# ----------------------------------------------------------------------------------------------
# helpers


def units(spec: dict, data: dict | None = None) -> list[dict]:
    """Every single-view spec (one mark) inside layers and concatenations, with its data."""
    out = []
    data = spec.get("data", data)
    if "mark" in spec:
        out.append({**spec, "data": data})
    for key in ("layer", "vconcat", "hconcat", "concat"):
        for sub in spec.get(key, []):
            out.extend(units(sub, data))
    return out


def marks(spec: dict) -> list[str]:
    return [u["mark"]["type"] if isinstance(u["mark"], dict) else u["mark"] for u in units(spec)]


def axis_titles(spec: dict) -> list[str]:
    titles = []
    for u in units(spec):
        for ch in ("x", "y"):
            enc = u.get("encoding", {}).get(ch)
            if not enc or "field" not in enc:
                continue
            title = enc.get("title", enc.get("axis", {}).get("title") if isinstance(enc.get("axis"), dict) else None)
            if title is not None:
                titles.append(title)
    return titles


def fields(spec: dict) -> set[str]:
    out = set()
    for u in units(spec):
        for enc in u.get("encoding", {}).values():
            if isinstance(enc, dict) and "field" in enc:
                out.add(enc["field"])
            if isinstance(enc, list):
                out.update(e["field"] for e in enc if "field" in e)
    return out


def tooltips(spec: dict) -> list[dict]:
    out = []
    for u in units(spec):
        tip = u.get("encoding", {}).get("tooltip")
        if isinstance(tip, list):
            out.extend(tip)
        elif isinstance(tip, dict):
            out.append(tip)
    return out


def check_common(spec: dict, datasets_expected: set[str]) -> None:
    """Axis titles carry units, tooltips exist, every mark uses a named dataset that exists."""
    titles = axis_titles(spec)
    assert titles, "no axis titles at all"
    for t in titles:
        assert UNIT_IN_TITLE.search(t) or t.lower().startswith(("system", "tube model", "cause", "health level")), t
    assert tooltips(spec), "no tooltips"
    assert set(spec["datasets"]) == datasets_expected
    for u in units(spec):
        assert u["data"]["name"] in spec["datasets"]
    # the theme travels with the spec
    assert spec["config"]["font"] == theme.FONT


def one(r: dict, name: str, tube: str, focal: str = "large") -> pd.DataFrame:
    f = r[name]
    return f[(f["tube_id"] == tube) & (f["focal_spot"] == focal)]


# ----------------------------------------------------------------------------------------------
# palettes


def test_ordinal_palette_is_viridis_samples():
    # Source: matplotlib's viridis colour map (van der Walt & Smith, SciPy 2015), sampled at the
    # positions named in tubetrack.charts.theme; hex colours are exact to 1/255 per channel.
    mpl = pytest.importorskip("matplotlib")
    from matplotlib.colors import to_hex

    cmap = mpl.colormaps["viridis"]
    expected = [to_hex(cmap(x)) for x in (0.92, 0.72, 0.50, 0.28, 0.05)]
    assert list(theme.ORDINAL_PALETTE) == expected


def _luminance(hex_colour: str) -> float:
    # Source: W3C WCAG 2.1, definition of relative luminance (sRGB linearisation, Rec. 709 weights).
    rgb = np.array([int(hex_colour[i:i + 2], 16) for i in (1, 3, 5)]) / 255.0
    lin = np.where(rgb <= 0.03928, rgb / 12.92, ((rgb + 0.055) / 1.055) ** 2.4)
    return float(lin @ np.array([0.2126, 0.7152, 0.0722]))


def test_ordinal_palette_reads_in_order_without_hue():
    # Ordinal reading: relative luminance falls strictly from least to most concern, so the order
    # survives grey-scale printing and colour-vision deficiency.
    lum = [_luminance(c) for c in theme.ORDINAL_PALETTE]
    assert all(a > b for a, b in zip(lum, lum[1:], strict=False))
    for n in range(2, 6):
        sub = [_luminance(c) for c in theme.ordinal_palette(n)]
        assert all(a > b for a, b in zip(sub, sub[1:], strict=False))
        assert theme.ordinal_palette(n)[0] == theme.ORDINAL_PALETTE[0]
        assert theme.ordinal_palette(n)[-1] == theme.ORDINAL_PALETTE[-1]


def test_no_traffic_light_codes_in_palettes():
    # A pure red / amber / green triple is exactly what the ordinal scale must not be.
    traffic = {"#ff0000", "#ffbf00", "#00ff00", "#008000", "#ffa500", "#ff9900"}
    assert not traffic & {c.lower() for c in theme.ORDINAL_PALETTE + theme.CATEGORICAL_PALETTE}


def test_categorical_palette_is_okabe_ito():
    # Source: Okabe M., Ito K., Color Universal Design (2008), the eight colours in RGB 0-255:
    # orange 230,159,0; sky blue 86,180,233; bluish green 0,158,115; yellow 240,228,66;
    # blue 0,114,178; vermillion 213,94,0; reddish purple 204,121,167; black 0,0,0.
    published = {(230, 159, 0), (86, 180, 233), (0, 158, 115), (240, 228, 66), (0, 114, 178),
                 (213, 94, 0), (204, 121, 167), (0, 0, 0)}
    got = {tuple(int(c[i:i + 2], 16) for i in (1, 3, 5)) for c in theme.CATEGORICAL_PALETTE}
    assert got == published


def test_theme_registers_and_configures():
    import altair as alt

    name = C.register_theme()
    assert name in alt.theme.names()
    cfg = C.theme_config()
    assert cfg["range"]["ordinal"] == list(theme.ORDINAL_PALETTE)
    assert cfg["range"]["category"] == list(theme.CATEGORICAL_PALETTE)


# ----------------------------------------------------------------------------------------------
# health charts


def test_drift_chart_structure(results):
    t = results["health"]["tube_id"].iloc[0]
    chart = C.drift_chart(one(results, "drift", t), one(results, "diameter", t), one(results, "projection", t),
                          one(results, "changepoints", t), 5.13, 4.6, 5.7)
    spec = C.spec_of(chart)
    check_common(spec, {"drift_points", "drift_diameter", "drift_projection", "drift_changes", "drift_threshold"})
    m = marks(spec)
    assert m.count("point") >= 1 and "line" in m and "area" in m and "rule" in m and "rect" in m
    assert {"filament_current_a", "fitted_a", "diameter_loss_pct_p10", "diameter_loss_pct_p90",
            "diameter_loss_pct_p50", "threshold_pct", "day", "station"} <= fields(spec)
    titles = axis_titles(spec)
    assert "Filament current, kV-normalised [A]" in titles
    assert "Estimated filament diameter loss [%]" in titles
    assert "Date [UTC]" in titles
    # change points are vertical rules on both panels, fed by one dataset
    rules = [u for u in units(spec) if u["data"]["name"] == "drift_changes"]
    assert len(rules) == 2 and all(u["mark"]["type"] == "rule" for u in rules)
    # time axes are UTC
    assert all(u["encoding"]["x"]["scale"]["type"] == "utc" for u in units(spec) if "x" in u.get("encoding", {})
               and u["encoding"]["x"].get("type") == "temporal")
    thr = spec["datasets"]["drift_threshold"][0]
    assert thr == {"threshold_pct": 5.13, "threshold_lo_pct": 4.6, "threshold_hi_pct": 5.7}


def test_drift_structure_does_not_depend_on_data(results):
    # The report compiles the drift chart once and swaps datasets per tube: that is only right if
    # the specification without datasets is identical for every tube.
    specs = []
    for t in results["health"]["tube_id"].unique()[:3]:
        spec = C.spec_of(C.drift_chart(one(results, "drift", t), one(results, "diameter", t),
                                       one(results, "projection", t), one(results, "changepoints", t), 5.13))
        spec.pop("datasets")
        specs.append(spec)
    assert specs[0] == specs[1] == specs[2]
    bare = C.spec_of(C.drift_layers())
    bare.pop("datasets", None)
    assert bare == specs[0]


def test_aggregate_drift_bins_weekly_with_true_medians():
    # 3 years of daily values equal to the day number: every full weekly bin's median is its
    # middle day and lo/hi its first/last day, by construction.
    days = pd.date_range("2021-01-04", periods=1100, freq="D")  # 2021-01-04 is a Monday
    frame = pd.DataFrame({"tube_id": "A", "focal_spot": "large", "tube_current_ma": 200.0, "day": days,
                          "filament_current_norm_a": np.arange(1100, dtype=float), "fitted_a": 1.0,
                          "segment": 0})
    out = C.aggregate_drift(frame, max_points=160)
    assert len(out) <= 160
    assert (out["day"].dt.dayofweek == 0).all()  # bins start on Mondays
    width = (out["day"].iloc[1] - out["day"].iloc[0]).days
    assert width % 7 == 0
    full = out.iloc[1:-1]
    assert np.allclose(full["filament_current_lo_a"].diff().dropna(), width)
    assert np.allclose(full["filament_current_a"], full["filament_current_lo_a"] + (width - 1) / 2)
    assert np.allclose(full["filament_current_hi_a"], full["filament_current_lo_a"] + width - 1)
    assert (full["n_days"] == width).all()
    assert out["n_days"].sum() == 1100


def test_aggregate_drift_short_series_untouched(results):
    d = results["drift"].iloc[:50]
    out = C.aggregate_drift(d)
    assert len(out) == 50
    assert np.allclose(out["filament_current_a"].to_numpy(), d.sort_values(
        ["tube_id", "focal_spot", "tube_current_ma", "day"])["filament_current_norm_a"].to_numpy())


def test_dataset_bound_is_enforced():
    big = pd.DataFrame({"x": np.arange(C.MAX_ROWS_PER_DATASET + 1)})
    with pytest.raises(C.ChartDataError, match="aggregate before charting"):
        C.dataset_records(big, ["x"], "big")


def test_missing_columns_are_named():
    with pytest.raises(C.ChartDataError, match="p_end_of_life"):
        C.fleet_overview_chart(pd.DataFrame({"tube_id": ["a"]}))


def test_fleet_overview_uses_ordinal_palette_in_rank_order(results):
    h = results["health"]
    ov = h.assign(p_end_of_life=h["p_end_of_life_90d"], impact=1.0, href="tubes/x.html")
    spec = C.spec_of(C.fleet_overview_chart(ov, 90))
    check_common(spec, {"fleet_overview"})
    u, text = units(spec)
    assert u["mark"]["type"] == "point" and text["mark"]["type"] == "text"
    labelled = [r for r in spec["datasets"]["fleet_overview"] if r["label"]]
    assert 0 < len(labelled) <= 8 and all(r["label"] == r["tube_id"] for r in labelled)
    assert all(r["health_rank"] >= 2 or r["p_end_of_life"] >= 0.2 for r in labelled)
    enc = u["encoding"]
    assert enc["href"]["field"] == "href"
    levels = C.level_order(ov)
    ranks = ov.drop_duplicates("health_level").set_index("health_level")["health_rank"]
    assert list(ranks.loc[levels]) == sorted(ranks.loc[levels])
    assert enc["color"]["scale"]["domain"] == levels
    assert enc["color"]["scale"]["range"] == theme.ordinal_palette(len(levels))
    assert enc["x"]["title"] == "Probability of end of life within 90 days [%]"
    assert {t["field"] for t in enc["tooltip"]} >= {"tube_id", "system_id", "site", "p_end_of_life", "impact"}
    assert len(spec["datasets"]["fleet_overview"]) == len(ov)


def test_health_level_chart_palette(results):
    spec = C.spec_of(C.health_level_chart(results["health"]))
    (u,) = units(spec)
    assert u["mark"]["type"] == "bar"
    levels = C.level_order(results["health"])
    assert u["encoding"]["color"]["scale"]["range"] == theme.ordinal_palette(len(levels))
    counts = {d["health_level"]: d["tubes"] for d in spec["datasets"]["health_levels"]}
    assert counts == results["health"]["health_level"].value_counts().to_dict()


def test_diameter_chart_limits_series_and_shows_threshold(results):
    spec = C.spec_of(C.diameter_chart(results["diameter"], 5.13, 4.5, 5.8, max_tubes=3))
    check_common(spec, {"diameter_series", "diameter_threshold"})
    series = {d["series"] for d in spec["datasets"]["diameter_series"]}
    assert len(series) == 3
    assert "rule" in marks(spec) and "area" in marks(spec)


def test_fault_rate_chart_rates(results):
    fr = results["fault_rates"].groupby(["month", "category"], as_index=False)[["events", "exposures"]].sum()
    spec = C.spec_of(C.fault_rate_chart(fr))
    check_common(spec, {"fault_rates"})
    rows = spec["datasets"]["fault_rates"]
    for row in rows[:10]:
        assert row["rate_per_1000"] == pytest.approx(row["events"] / row["exposures"] * 1000)
    zero = C.spec_of(C.fault_rate_chart(pd.DataFrame({"month": [pd.Timestamp("2024-01-01")], "category": ["arc"],
                                                      "events": [2], "exposures": [0]})))
    assert zero["datasets"]["fault_rates"][0]["rate_per_1000"] is None
    # months travel as UTC epoch milliseconds
    assert zero["datasets"]["fault_rates"][0]["month"] == 1704067200000


# ----------------------------------------------------------------------------------------------
# fleet charts


def test_km_chart_steps(results):
    spec = C.spec_of(C.km_chart(results["km"]))
    check_common(spec, {"km_steps"})
    assert all(u["mark"]["interpolate"] == "step-after" for u in units(spec) if u["mark"]["type"] in ("line", "area"))
    steps = spec["datasets"]["km_steps"]
    assert steps[0]["time"] == 0 and steps[0]["survival"] == 1
    assert len(steps) == 1 + int((results["km"]["events"] > 0).sum())


def test_weibull_transform_and_midpoint_positions():
    # Source: Meeker & Escobar (1998) sec. 6.2: the Weibull probability scale is log(-log(1 - F));
    # F = 1 - exp(-1) (63.2 %, the characteristic life) maps to 0.
    assert C.fleet.weibull_y([1 - np.exp(-1)])[0] == pytest.approx(0.0, abs=1e-12)
    assert np.isnan(C.fleet.weibull_y([0.0, 1.0])).all()
    # Source: Meeker & Escobar (1998) sec. 6.4.2: plot at the midpoint of each KM jump.
    km = pd.DataFrame({"time": [10.0, 20.0, 30.0], "survival": [0.9, 0.9, 0.6], "events": [1, 0, 2]})
    pts = C.weibull_points(km)
    assert list(pts["time"]) == [10.0, 30.0]
    assert pts["fraction_failed"].tolist() == pytest.approx([0.05, 0.25])


def test_weibull_plot_structure(results):
    p = results["weibull_params"].iloc[0]
    spec = C.spec_of(C.weibull_plot(results["km"], results["weibull_curve"], p["eta"], p["beta"]))
    check_common(spec, {"weibull_points", "weibull_curve"})
    assert sorted(marks(spec)) == ["area", "line", "point"]
    x = units(spec)[0]["encoding"]["x"]
    assert x["scale"]["type"] == "log"
    y_axis = units(spec)[1]["encoding"]["y"]["axis"]
    assert "exp(-exp(datum.value))" in y_axis["labelExpr"]
    assert y_axis["values"][list(C.fleet.WEIBULL_TICKS).index(0.632)] == pytest.approx(0.0, abs=1e-3)


def test_forecast_and_spend_charts(results):
    spec = C.spec_of(C.forecast_chart(results["forecast"]))
    check_common(spec, {"forecast"})
    assert sorted(marks(spec)) == ["bar", "rule", "rule"]
    assert "Tube replacements per month [tubes]" in axis_titles(spec)
    spend = C.spec_of(C.spend_chart(results["budget"]))
    check_common(spend, {"spend"})
    assert "Tube spend per month [EUR]" in axis_titles(spend)


def test_spares_uptime_downtime_charts(results):
    s = C.spec_of(C.spares_chart(results["spares"]))
    check_common(s, {"spares"})
    assert sorted(marks(s)) == ["bar", "tick"]
    up = results["uptime"]
    u = C.spec_of(C.uptime_chart(up, max_systems=4))
    check_common(u, {"uptime"})
    assert sorted(marks(u)) == ["point", "rule", "tick"]
    rows = u["datasets"]["uptime"]
    assert len(rows) == 4
    worst = (up["availability_pct"] - up["uptime_target_pct"]).nsmallest(4)
    assert [r["gap_pct"] for r in rows] == pytest.approx(sorted(worst))
    assert {r["versus_target"] for r in rows} <= {"meets target", "below target", "no target"}
    d = C.spec_of(C.downtime_cause_chart(results["downtime"]))
    check_common(d, {"downtime_causes"})
    tube = [r for r in d["datasets"]["downtime_causes"] if r["cause"] == "tube"]
    assert tube == [{"cause": "tube", "kind": "unplanned", "downtime_h": 48.0}]


# ----------------------------------------------------------------------------------------------
# backtest charts


def test_calibration_table_wilson_interval_matches_scipy():
    # Source: Newcombe R.G., Stat. Med. 17 (1998) 857, Table I example 81/263: Wilson score
    # interval 0.2553 to 0.3662; checked against scipy.stats.binomtest(...).proportion_ci(
    # method="wilson") (scipy 1.17) to 1e-9.
    from scipy.stats import binomtest

    outcomes = pd.DataFrame({"horizon_days": 90, "p_predicted": 0.31,
                             "outcome": np.r_[np.ones(81), np.zeros(263 - 81)]})
    tab = C.calibration_table(outcomes)
    assert len(tab) == 1
    ci = binomtest(81, 263).proportion_ci(0.95, method="wilson")
    assert tab["observed_lo"].iloc[0] == pytest.approx(ci.low, abs=1e-6)
    assert tab["observed_hi"].iloc[0] == pytest.approx(ci.high, abs=1e-6)
    assert tab["observed_lo"].iloc[0] == pytest.approx(0.2553, abs=5e-5)
    assert tab["observed_hi"].iloc[0] == pytest.approx(0.3662, abs=5e-5)
    assert tab["bin_lo"].iloc[0] == pytest.approx(0.3)


def test_calibration_and_backtest_charts(results):
    spec = C.spec_of(C.calibration_chart(results["backtest_outcomes"]))
    check_common(spec, {"calibration", "calibration_diagonal"})
    rows = spec["datasets"]["calibration"]
    assert sum(r["cases"] for r in rows) == len(results["backtest_outcomes"])
    bt = C.spec_of(C.backtest_rul_chart(results["backtest_cases"]))
    check_common(bt, {"backtest_cases", "backtest_cone"})
    cone = bt["datasets"]["backtest_cone"][1]
    assert cone["lo"] == pytest.approx(0.8 * cone["t"]) and cone["hi"] == pytest.approx(1.2 * cone["t"])
    cases = results["backtest_cases"]
    inside = ((cases["true_rul_days"] >= cases["rul_days_p10"]) & (cases["true_rul_days"] <= cases["rul_days_p90"])).sum()
    assert sum(r["covered"] == "inside P10-P90" for r in bt["datasets"]["backtest_cases"]) == inside


def test_hostile_strings_stay_data_in_specs(hostile_results, synth):
    h = hostile_results["health"]
    ov = h.assign(p_end_of_life=h["p_end_of_life_90d"], impact=1.0, href="tubes/x.html")
    spec = C.spec_of(C.fleet_overview_chart(ov))
    ids = {r["tube_id"] for r in spec["datasets"]["fleet_overview"]}
    sites = {r["site"] for r in spec["datasets"]["fleet_overview"]}
    assert synth.HOSTILE_TUBE in ids and synth.HOSTILE_SITE in sites
