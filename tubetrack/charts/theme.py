"""The tubetrack chart theme and palettes.

One look for every chart: a sans-serif font available offline on most systems, modest sizes, a
light grid, and palettes chosen for readers with colour-vision deficiencies:

* :data:`ORDINAL_PALETTE` - five samples of the *viridis* colour map, ordered from the lightest
  (least concern) to the darkest (most concern). Viridis is perceptually uniform and its lightness
  rises monotonically, so the order of the levels reads correctly in grey scale and for the common
  forms of colour blindness. It is used for ordered health levels; it is deliberately not a
  red/amber/green code.
* :data:`CATEGORICAL_PALETTE` - the eight colours of Okabe and Ito, for unordered categories
  (downtime causes, fault categories, mA stations).

References
----------
van der Walt S., Smith N., "A Better Default Colormap for Matplotlib", SciPy 2015 conference
(the viridis colour map, matplotlib ``viridis``).
Okabe M., Ito K., "Color Universal Design (CUD): how to make figures and presentations that are
friendly to colorblind people", J*Fly, 2008 (the eight-colour palette).
"""

from __future__ import annotations

from typing import Any

#: viridis sampled at 0.92, 0.72, 0.50, 0.28, 0.05 (matplotlib ``colormaps["viridis"]``):
#: lightest = least concern, darkest = most concern.
ORDINAL_PALETTE: tuple[str, ...] = ("#cae11f", "#4ec36b", "#21918c", "#375a8c", "#471365")

#: Okabe & Ito (2008) colour-universal-design palette, black last.
CATEGORICAL_PALETTE: tuple[str, ...] = (
    "#0072B2",  # blue
    "#E69F00",  # orange
    "#009E73",  # bluish green
    "#CC79A7",  # reddish purple
    "#56B4E9",  # sky blue
    "#D55E00",  # vermillion
    "#F0E442",  # yellow
    "#000000",  # black
)

#: Single colours with a fixed meaning across charts.
OBSERVED_COLOUR = "#4d4d4d"
FIT_COLOUR = "#0072B2"
PROJECTION_COLOUR = "#E69F00"
THRESHOLD_COLOUR = "#7a0177"
CHANGE_COLOUR = "#595959"
TARGET_COLOUR = "#000000"

FONT = "DejaVu Sans, Liberation Sans, Helvetica, Arial, sans-serif"
THEME_NAME = "tubetrack"
CHART_WIDTH = 560
CHART_HEIGHT = 260


def ordinal_palette(n: int) -> list[str]:
    """``n`` colours of :data:`ORDINAL_PALETTE`, spread evenly, first = least concern.

    Parameters
    ----------
    n
        Number of ordered levels (1 to 5).
    """
    size = len(ORDINAL_PALETTE)
    if n <= 0:
        return []
    if n == 1:
        return [ORDINAL_PALETTE[-1]]
    if n > size:
        # More levels than samples: repeat the darkest (never happens with our level scales).
        return list(ORDINAL_PALETTE) + [ORDINAL_PALETTE[-1]] * (n - size)
    step = (size - 1) / (n - 1)
    return [ORDINAL_PALETTE[round(i * step)] for i in range(n)]


def theme_config() -> dict[str, Any]:
    """The Vega-Lite ``config`` block of the tubetrack theme."""
    return {
        "font": FONT,
        "background": "#ffffff",
        "padding": 8,
        "view": {"continuousWidth": CHART_WIDTH, "continuousHeight": CHART_HEIGHT, "stroke": "#d9d9d9"},
        "title": {"fontSize": 15, "fontWeight": 600, "anchor": "start", "color": "#1a1a1a", "offset": 10},
        "axis": {
            "labelFontSize": 11,
            "titleFontSize": 12,
            "titleFontWeight": 500,
            "titleColor": "#333333",
            "labelColor": "#333333",
            "gridColor": "#ececec",
            "domainColor": "#888888",
            "tickColor": "#888888",
        },
        "legend": {"labelFontSize": 11, "titleFontSize": 12, "titleFontWeight": 500, "orient": "right"},
        "header": {"labelFontSize": 12, "titleFontSize": 12},
        "range": {
            "category": list(CATEGORICAL_PALETTE),
            "ordinal": list(ORDINAL_PALETTE),
            "ramp": list(ORDINAL_PALETTE),
        },
        "point": {"size": 36, "filled": True},
        "line": {"strokeWidth": 1.8},
        "bar": {"color": FIT_COLOUR},
        "rule": {"color": "#333333"},
    }


def register_theme() -> str:
    """Register (not enable) the tubetrack Altair theme; return its name."""
    import altair as alt

    if THEME_NAME not in alt.theme.names():

        @alt.theme.register(THEME_NAME, enable=False)
        def _tubetrack_theme() -> alt.theme.ThemeConfig:
            return alt.theme.ThemeConfig(config=theme_config())  # type: ignore[typeddict-item]

    return THEME_NAME
