"""The filament circuit: step-down transformer, series resistance in the primary, mains sensitivity.

Model
-----
An ideal step-down transformer with turns ratio N = Np/Ns: V_s = V_p / N, I_p = I_s / N
(transformer law). The tube-current (mA) selector puts a series resistance R_s (stepped
resistors, or a continuously variable one) in the primary; referred to the secondary it is
R_s / N^2. The operating point solves

    V_mains / N = I_f(T) (R_fil(T) + R_s / N^2)                                        (1)

for the filament temperature T, I_f(T) and R_fil(T) from the heat balance. Mains fluctuation
moves V_mains, hence T, hence the tube current steeply (Richardson-Dushman); the sensitivity
d ln I_tube / d ln V_mains quantifies it (high-frequency generators regulate this away; the
figure describes an unregulated circuit).

Facts of the trade used as checks (# common practice): filament supply 8-12 V at 4-8 A; 240 V
mains through 20:1 gives 12 V; a series drop of 20 V leaves 220 V and 11 V, 40 V leaves 200 V
and 10 V.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import ArrayLike

from tubetrack.errors import InputError
from tubetrack.physics.filament import FilamentSpec, tube_current_at_temperature_ma
from tubetrack.physics.thermal import (
    filament_current_at_temperature_a,
    filament_resistance_ohm,
    filament_temperature_for_voltage_k,
    filament_voltage_at_temperature_v,
)
from tubetrack.physics.tungsten import _asarray, _out

__all__ = [
    "transformer_secondary_voltage_v",
    "transformer_primary_current_a",
    "primary_voltage_after_series_drop_v",
    "series_resistance_for_filament_voltage_ohm",
    "series_resistance_for_tube_current_ohm",
    "filament_circuit_operating_point",
    "mains_sensitivity",
]


def transformer_secondary_voltage_v(
    primary_voltage_v: ArrayLike, turns_ratio: ArrayLike
) -> Any:
    """Ideal transformer law V_s = V_p Ns/Np = V_p / N [V] (N = Np/Ns, step-down N > 1)."""
    return _out(_asarray(primary_voltage_v) / _asarray(turns_ratio))


def transformer_primary_current_a(
    secondary_current_a: ArrayLike, turns_ratio: ArrayLike
) -> Any:
    """Ideal transformer law I_p = I_s / N [A] (magnetising current neglected)."""
    return _out(_asarray(secondary_current_a) / _asarray(turns_ratio))


def primary_voltage_after_series_drop_v(
    mains_v: ArrayLike, series_drop_v: ArrayLike
) -> Any:
    """Voltage left on the transformer primary after the series resistor's drop [V]."""
    return _out(_asarray(mains_v) - _asarray(series_drop_v))


def series_resistance_for_filament_voltage_ohm(
    mains_v: ArrayLike,
    filament_voltage_v: ArrayLike,
    filament_current_a: ArrayLike,
    turns_ratio: ArrayLike,
) -> Any:
    """Primary series resistance that sets a filament voltage and current [ohm].

    R_s = (V_mains - N V_f) / (I_f / N); NaN when the mains cannot reach N V_f.
    """
    n = _asarray(turns_ratio)
    drop = _asarray(mains_v) - n * _asarray(filament_voltage_v)
    with np.errstate(divide="ignore", invalid="ignore"):
        r = drop / (_asarray(filament_current_a) / n)
    return _out(np.where(drop >= 0, r, np.nan))


def series_resistance_for_tube_current_ohm(
    spec: FilamentSpec,
    tube_current_ma: ArrayLike,
    tube_voltage_kv: ArrayLike,
    mains_v: ArrayLike,
    *,
    turns_ratio: float | None = None,
    diameter_ratio: ArrayLike = 1.0,
) -> Any:
    """Primary series resistance that makes the filament deliver a tube current [ohm].

    For a stepped selector this is the resistor of each mA station; for a continuous one, the
    setting as a function of mA. Ideal transformer; NaN when the station is not deliverable or
    the mains cannot reach the needed primary voltage.
    """
    from tubetrack.physics.filament import filament_temperature_for_tube_current_k

    n = float(spec.turns_ratio if turns_ratio is None else turns_ratio)
    r = _asarray(diameter_ratio)
    t = filament_temperature_for_tube_current_k(
        spec, tube_current_ma, tube_voltage_kv, r
    )
    d = spec.diameter_m * r
    heat = (spec.radiating_area_fraction, spec.end_loss_fraction)
    v_f = filament_voltage_at_temperature_v(t, d, spec.length_m, *heat)
    i_f = filament_current_at_temperature_a(t, d, *heat)
    return series_resistance_for_filament_voltage_ohm(mains_v, v_f, i_f, n)


def _solve_temperature(
    spec: FilamentSpec, secondary_open_v: Any, source_ohm: Any, r: Any
) -> Any:
    """Bisection on T of eq. (1): I_f(T) (R(T) + R_src) = V_open (vectorised, 50 steps)."""
    d = spec.diameter_m * r
    lo = np.full(np.shape(secondary_open_v), 1200.0)
    hi = np.full(np.shape(secondary_open_v), 3650.0)

    def g(t: Any) -> Any:
        i = _asarray(
            filament_current_at_temperature_a(
                t, d, spec.radiating_area_fraction, spec.end_loss_fraction
            )
        )
        return (
            i * (_asarray(filament_resistance_ohm(t, d, spec.length_m)) + source_ohm)
            - secondary_open_v
        )

    for _ in range(50):
        mid = 0.5 * (lo + hi)
        above = g(mid) > 0
        hi = np.where(above, mid, hi)
        lo = np.where(above, lo, mid)
    t = 0.5 * (lo + hi)
    inside = (g(np.full_like(t, 1200.0)) <= 0) & (g(np.full_like(t, 3650.0)) >= 0)
    return np.where(inside, t, np.nan)


def filament_circuit_operating_point(
    spec: FilamentSpec,
    mains_v: ArrayLike,
    tube_voltage_kv: ArrayLike = 80.0,
    *,
    turns_ratio: float | None = None,
    series_resistance_ohm: ArrayLike = 0.0,
    primary_drop_v: ArrayLike | None = None,
    diameter_ratio: ArrayLike = 1.0,
) -> Any:
    """Operating point of the filament circuit for a mains voltage and primary series element.

    Parameters
    ----------
    spec : FilamentSpec
    mains_v : array_like
        Mains (supply) voltage [V rms].
    tube_voltage_kv : array_like, default 80
        Tube voltage for the resulting tube current [kV].
    turns_ratio : float, optional
        Np/Ns [1]; default ``spec.turns_ratio`` (20).
    series_resistance_ohm : array_like, default 0
        Resistance in series with the primary [ohm] (the mA selector).
    primary_drop_v : array_like, optional
        Instead of a resistance: a fixed voltage drop across the series element [V] (how the
        trade states it: "a resistor dropping 20 V"). Overrides ``series_resistance_ohm``.
    diameter_ratio : array_like, default 1.0
        d/d0 [1].

    Returns
    -------
    pandas.DataFrame
        mains_v, primary_voltage_v, series_drop_v, filament_voltage_v, filament_current_a,
        primary_current_a, filament_temperature_k, filament_power_w, tube_current_ma,
        tube_voltage_kv.
    """
    import pandas as pd

    n = float(spec.turns_ratio if turns_ratio is None else turns_ratio)
    if not n > 0:
        raise InputError(
            f"turns ratio is {n!r}; it must be > 0 (Np/Ns, e.g. 20 for 240 V -> 12 V)."
        )
    mains, kv, r, rs, drop_in = np.broadcast_arrays(
        np.atleast_1d(_asarray(mains_v)),
        np.atleast_1d(_asarray(tube_voltage_kv)),
        np.atleast_1d(_asarray(diameter_ratio)),
        np.atleast_1d(_asarray(series_resistance_ohm)),
        np.atleast_1d(_asarray(0.0 if primary_drop_v is None else primary_drop_v)),
    )
    d = spec.diameter_m * r
    if primary_drop_v is not None:
        drop = drop_in
        v_p = mains - drop
        v_f = v_p / n
        t = _asarray(
            filament_temperature_for_voltage_k(
                v_f,
                d,
                spec.length_m,
                spec.radiating_area_fraction,
                spec.end_loss_fraction,
            )
        )
    else:
        t = _solve_temperature(spec, mains / n, rs / n**2, r)
        v_f = _asarray(
            filament_voltage_at_temperature_v(
                t,
                d,
                spec.length_m,
                spec.radiating_area_fraction,
                spec.end_loss_fraction,
            )
        )
        v_p = v_f * n
        drop = mains - v_p
    i_f = _asarray(
        filament_current_at_temperature_a(
            t, d, spec.radiating_area_fraction, spec.end_loss_fraction
        )
    )
    return pd.DataFrame(
        {
            "mains_v": mains,
            "primary_voltage_v": v_p,
            "series_drop_v": drop,
            "filament_voltage_v": v_f,
            "filament_current_a": i_f,
            "primary_current_a": i_f / n,
            "filament_temperature_k": t,
            "filament_power_w": i_f * v_f,
            "tube_current_ma": _asarray(tube_current_at_temperature_ma(spec, t, kv, r)),
            "tube_voltage_kv": kv,
        }
    )


def mains_sensitivity(
    spec: FilamentSpec,
    mains_v: ArrayLike,
    tube_voltage_kv: ArrayLike = 80.0,
    *,
    turns_ratio: float | None = None,
    series_resistance_ohm: ArrayLike = 0.0,
    relative_step: float = 0.005,
) -> Any:
    """Sensitivity of filament and tube current to mains fluctuation (unregulated circuit).

    Returns
    -------
    pandas.DataFrame
        dln_filament_voltage_dln_mains, dln_filament_current_dln_mains,
        dln_tube_current_dln_mains, dln_tube_current_dln_filament_voltage [1], by central
        differences of :func:`filament_circuit_operating_point` (+-``relative_step``).
        A tube current that moves 20-30 % for 5 % of filament voltage (REFERENCES.md) is an
        elasticity of 4-6.
    """
    import pandas as pd

    kw = dict(turns_ratio=turns_ratio, series_resistance_ohm=series_resistance_ohm)
    mains = np.atleast_1d(_asarray(mains_v))
    up = filament_circuit_operating_point(
        spec, mains * (1 + relative_step), tube_voltage_kv, **kw
    )
    dn = filament_circuit_operating_point(
        spec, mains * (1 - relative_step), tube_voltage_kv, **kw
    )
    den = np.log((1 + relative_step) / (1 - relative_step))

    def el(col: str) -> Any:
        return np.log(up[col].to_numpy() / dn[col].to_numpy()) / den

    dv = el("filament_voltage_v")
    di = el("tube_current_ma")
    return pd.DataFrame(
        {
            "dln_filament_voltage_dln_mains": dv,
            "dln_filament_current_dln_mains": el("filament_current_a"),
            "dln_tube_current_dln_mains": di,
            "dln_tube_current_dln_filament_voltage": di / dv,
        }
    )
