"""Shared helpers of the chart modules: named datasets, time columns, row budgets.

Every chart keeps its data in top-level named ``datasets`` (one per layer) and its marks refer to
them by name. The chart's structure then does not depend on the data, so a report can compile a
chart once and reuse its specification for thousands of tubes by swapping only the datasets
(see :func:`tubetrack.report.write_report`).
"""

from __future__ import annotations

import json
import math
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:  # pragma: no cover
    import altair as alt
    import pandas as pd

#: Upper bound of rows in one dataset of one chart, after aggregation. Charts aggregate before
#: plotting; a dataset above this bound is a bug in the aggregation, not a reason to draw it.
MAX_ROWS_PER_DATASET = 20_000

#: Vega-Lite version of the specifications Altair writes (for vl-convert).
def vl_version() -> str:
    """Vega-Lite version string for vl-convert (``"6.4"`` for Altair 6.3)."""
    import altair as alt

    major_minor = alt.SCHEMA_VERSION.lstrip("v").split(".")[:2]
    return ".".join(major_minor)


class ChartDataError(ValueError):
    """A chart was given a frame without the columns it needs (a programming error)."""


def require(frame: pd.DataFrame, columns: list[str], what: str) -> None:
    """Raise :class:`ChartDataError` naming the missing columns of ``frame``."""
    missing = [c for c in columns if c not in frame.columns]
    if missing:
        raise ChartDataError(
            f"{what}: missing column(s) {', '.join(missing)}; got {', '.join(map(str, frame.columns))}"
        )


def dataset_frame(frame: pd.DataFrame, columns: list[str], name: str) -> pd.DataFrame:
    """Columns ready for JSON: times as epoch milliseconds (UTC), a bounded number of rows."""
    import numpy as np
    import pandas as pd

    keep = [c for c in columns if c in frame.columns]
    out = frame.loc[:, keep].copy()
    if len(out) > MAX_ROWS_PER_DATASET:
        raise ChartDataError(
            f"dataset {name} has {len(out)} rows, more than {MAX_ROWS_PER_DATASET}: "
            "aggregate before charting"
        )
    for col in keep:
        series = out[col]
        if pd.api.types.is_datetime64_any_dtype(series):
            if getattr(series.dt, "tz", None) is not None:
                series = series.dt.tz_convert("UTC").dt.tz_localize(None)
            ms = (series - pd.Timestamp("1970-01-01")) / pd.Timedelta(milliseconds=1)
            out[col] = ms.round()
        elif pd.api.types.is_bool_dtype(series):
            out[col] = series.astype(object).where(series.notna(), None)
        elif pd.api.types.is_float_dtype(series):
            out[col] = series.replace([np.inf, -np.inf], np.nan)
    return out


def dataset_json(frame: pd.DataFrame, columns: list[str], name: str) -> str:
    """JSON array of records (NaN -> null) for one named dataset."""
    out = dataset_frame(frame, columns, name)
    if out.empty:
        return "[]"
    return out.to_json(orient="records", double_precision=7, date_format="epoch")


def dataset_records(frame: pd.DataFrame, columns: list[str], name: str) -> list[dict[str, Any]]:
    """Records of one named dataset, as Python objects."""
    return json.loads(dataset_json(frame, columns, name))  # type: ignore[no-any-return]


def named(name: str) -> alt.NamedData:
    """A reference to the top-level dataset ``name``."""
    import altair as alt

    return alt.NamedData(name=name)


def with_datasets(chart: Any, datasets: dict[str, list[dict[str, Any]]]) -> Any:
    """Attach named datasets to a top-level chart."""
    return chart.properties(datasets=datasets)


def spec_of(chart: Any, validate: bool = True) -> dict[str, Any]:
    """The chart's Vega-Lite specification with the tubetrack theme applied."""
    import altair as alt

    from tubetrack.charts.theme import register_theme

    # Datasets are plain JSON-ready records: validating them record by record against the
    # schema costs seconds on big charts and checks nothing about the chart, so the structure is
    # validated without them and the datasets are attached afterwards.
    datasets = getattr(chart, "datasets", alt.Undefined)
    bare = chart.copy(deep=False)
    bare.datasets = alt.Undefined
    with alt.theme.enable(register_theme()):
        spec: dict[str, Any] = bare.to_dict(validate=validate)
    if datasets is not alt.Undefined:
        spec["datasets"] = datasets
    return spec


def nice_max(value: float) -> float:
    """A round upper bound >= value (1, 2, 2.5, 5 x 10^k)."""
    if not math.isfinite(value) or value <= 0:
        return 1.0
    exp = math.floor(math.log10(value))
    for m in (1, 2, 2.5, 5, 10):
        if m * 10**exp >= value:
            return float(m * 10**exp)
    return float(10 ** (exp + 1))  # pragma: no cover
