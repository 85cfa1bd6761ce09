"""Physics API: every spec-based model function takes scalars or arrays and maps NaN to NaN."""

from __future__ import annotations

import numpy as np
import pytest

from tubetrack import physics as p

SPEC = p.default_filament_spec("large")

CASES = [
    (
        "filament_temperature_for_tube_current_k",
        lambda x: p.filament_temperature_for_tube_current_k(SPEC, x, 80.0),
    ),
    (
        "filament_current_for_tube_current_a",
        lambda x: p.filament_current_for_tube_current_a(SPEC, x, 80.0),
    ),
    (
        "tube_current_at_temperature_ma",
        lambda x: p.tube_current_at_temperature_ma(SPEC, 2600.0 + 0.0 * x, 80.0),
    ),
    (
        "tube_current_for_filament_current_ma",
        lambda x: p.tube_current_for_filament_current_ma(SPEC, x / 60.0, 80.0),
    ),
    (
        "saturation_current_at_temperature_a",
        lambda x: p.saturation_current_at_temperature_a(SPEC, x * 6.0 + 800.0),
    ),
    (
        "diameter_loss_rate_per_s",
        lambda x: p.diameter_loss_rate_per_s(SPEC, x * 6.0 + 800.0),
    ),
    (
        "exposure_diameter_loss",
        lambda x: p.exposure_diameter_loss(SPEC, x, 80.0, 0.1, 1.0),
    ),
    ("kv_compensation_ratio", lambda x: p.kv_compensation_ratio(SPEC, x, 70.0, 80.0)),
    ("inversion_exponent", lambda x: p.inversion_exponent(SPEC, x, 80.0)),
    (
        "current_ratio_for_diameter_ratio",
        lambda x: p.current_ratio_for_diameter_ratio(SPEC, 0.97, x, 80.0),
    ),
    (
        "diameter_ratio_from_current_ratio",
        lambda x: p.diameter_ratio_from_current_ratio(
            x / 400.0 * 0.95, SPEC, 400.0, 80.0
        )[0],
    ),
]


@pytest.mark.parametrize(("name", "call"), CASES, ids=[c[0] for c in CASES])
def test_scalar_array_and_nan(name, call):
    scalar = call(400.0)
    assert np.ndim(scalar) == 0 and np.isfinite(scalar), name
    arr = call(np.array([300.0, np.nan, 400.0]))
    assert np.shape(arr) == (3,), name
    assert np.isnan(arr[1]) and np.isfinite(arr[0]) and np.isfinite(arr[2]), name
