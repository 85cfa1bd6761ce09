"""Charts of tubetrack results: analysis result frames in, ``altair`` charts out.

Charts never write files (:mod:`tubetrack.report` does). Each chart keeps its data in named
top-level datasets, aggregated and bounded (:data:`MAX_ROWS_PER_DATASET`), uses the tubetrack
theme (:func:`spec_of` applies it), puts units in every axis title and carries tooltips with the
values behind each mark. Health levels use an ordinal viridis palette, never traffic-light colours.

Modules: :mod:`.theme` (theme, palettes), :mod:`.health` (drift, diameter, fault rates, fleet
overview), :mod:`.fleet` (survival, Weibull plot, forecast, spend, spares, uptime, downtime),
:mod:`.backtest` (forecast against actual, calibration).
"""

from tubetrack.charts._base import (
    MAX_ROWS_PER_DATASET,
    ChartDataError,
    dataset_json,
    dataset_records,
    spec_of,
    vl_version,
)
from tubetrack.charts.backtest import (
    backtest_rul_chart,
    calibration_chart,
    calibration_table,
)
from tubetrack.charts.fleet import (
    downtime_cause_chart,
    forecast_chart,
    km_chart,
    spares_chart,
    spend_chart,
    uptime_chart,
    weibull_plot,
    weibull_points,
)
from tubetrack.charts.health import (
    DRIFT_COLUMNS,
    aggregate_drift,
    diameter_chart,
    drift_chart,
    drift_datasets,
    drift_layers,
    fault_rate_chart,
    fleet_overview_chart,
    health_level_chart,
    level_order,
)
from tubetrack.charts.theme import (
    CATEGORICAL_PALETTE,
    ORDINAL_PALETTE,
    THEME_NAME,
    ordinal_palette,
    register_theme,
    theme_config,
)

__all__ = [
    "CATEGORICAL_PALETTE",
    "DRIFT_COLUMNS",
    "MAX_ROWS_PER_DATASET",
    "ORDINAL_PALETTE",
    "THEME_NAME",
    "ChartDataError",
    "aggregate_drift",
    "backtest_rul_chart",
    "calibration_chart",
    "calibration_table",
    "dataset_json",
    "dataset_records",
    "diameter_chart",
    "downtime_cause_chart",
    "drift_chart",
    "drift_datasets",
    "drift_layers",
    "fault_rate_chart",
    "fleet_overview_chart",
    "forecast_chart",
    "health_level_chart",
    "km_chart",
    "level_order",
    "ordinal_palette",
    "register_theme",
    "spares_chart",
    "spec_of",
    "spend_chart",
    "theme_config",
    "uptime_chart",
    "vl_version",
    "weibull_plot",
    "weibull_points",
]
