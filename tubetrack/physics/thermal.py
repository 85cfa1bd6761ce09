"""Heat balance of a directly heated tungsten wire: temperature <-> filament current and voltage.

Model
-----
A wire of diameter d and (uncoiled) length L carrying current I reaches the temperature T at
which Joule heating equals radiation plus end (conduction) losses:

    I^2 R(T) = a_rad e(T) sigma (T^4 - T_amb^4) pi d L / (1 - f_end),
    R(T) = rho(T) L / (pi d^2 / 4),

so that

    I(T) = (pi / 2) sqrt(a_rad d^3 / (1 - f_end)) sqrt(W(T) / rho(T))          (1)
    V(T) = I R = 2 L sqrt(a_rad / (d (1 - f_end))) sqrt(W(T) rho(T))           (2)

with W = e sigma (T^4 - T_amb^4) the radiated power per unit area (Jones 1926 Table I) and rho
the resistivity (Jones 1926 Table I). a_rad (radiating-area fraction, < 1 for a coil whose turns
see each other) and f_end (fraction of the input power conducted away at the legs) are
per-filament constants. Convection is absent (vacuum); electron cooling (work-function energy
carried off by the tube current, about phi x I_tube = 4.5 W at 1 A) is neglected against 40-80 W
of heating. I does not depend on L; V does.

Equation (1) is the classic Langmuir "filament characteristics" scaling: at a given temperature
the current goes as d^1.5 (Jones & Langmuir, "The characteristics of tungsten filaments as
functions of temperature", General Electric Review 30, 1927).

Inverses use precomputed 0.5 K grids of sqrt(W/rho) and sqrt(W rho), both strictly increasing
in T, and ``numpy.interp`` (vectorised, no iteration).
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import ArrayLike

from tubetrack.physics.tungsten import (
    EMISSIVITY_RANGE_K,
    _asarray,
    _grid_property,
    _out,
    tungsten_radiated_power_w_m2,
    tungsten_resistivity_ohm_m,
)

__all__ = [
    "filament_resistance_ohm",
    "filament_current_at_temperature_a",
    "filament_voltage_at_temperature_v",
    "filament_temperature_for_current_k",
    "filament_temperature_for_voltage_k",
]

_T = _grid_property("t")
_VALID = (_T >= EMISSIVITY_RANGE_K[0]) & (_T <= EMISSIVITY_RANGE_K[1])
_TG = _T[_VALID]
_W = np.asarray(tungsten_radiated_power_w_m2(_TG))
_RHO = np.asarray(tungsten_resistivity_ohm_m(_TG))
_H_I = np.sqrt(_W / _RHO)  # sqrt(W/rho): eq. (1) without geometry [A m^-1.5]
_H_V = np.sqrt(_W * _RHO)  # sqrt(W rho): eq. (2) without geometry [V m^-0.5]
if not (np.all(np.diff(_H_I) > 0) and np.all(np.diff(_H_V) > 0)):  # pragma: no cover
    raise RuntimeError("heat-balance grids are not monotone; check the property tables")


def _geometry_current(
    diameter_m: Any, radiating_area_fraction: Any, end_loss_fraction: Any
) -> Any:
    return (
        0.5
        * np.pi
        * np.sqrt(radiating_area_fraction * diameter_m**3 / (1.0 - end_loss_fraction))
    )


def _geometry_voltage(
    diameter_m: Any, length_m: Any, radiating_area_fraction: Any, end_loss_fraction: Any
) -> Any:
    return (
        2.0
        * length_m
        * np.sqrt(radiating_area_fraction / (diameter_m * (1.0 - end_loss_fraction)))
    )


def filament_resistance_ohm(
    temperature_k: ArrayLike, diameter_m: ArrayLike, length_m: ArrayLike
) -> Any:
    """Resistance of a tungsten wire at temperature T: R = rho(T) L / (pi d^2 / 4) [ohm].

    Parameters
    ----------
    temperature_k : array_like
        Wire temperature [K] (293-3655 K).
    diameter_m : array_like
        Wire diameter [m].
    length_m : array_like
        Wire length between the legs [m].
    """
    rho = _asarray(tungsten_resistivity_ohm_m(temperature_k))
    d = _asarray(diameter_m)
    return _out(rho * _asarray(length_m) / (0.25 * np.pi * d**2))


def filament_current_at_temperature_a(
    temperature_k: ArrayLike,
    diameter_m: ArrayLike,
    radiating_area_fraction: ArrayLike = 1.0,
    end_loss_fraction: ArrayLike = 0.0,
) -> Any:
    """Filament current that holds a wire at temperature T, eq. (1) of the module note [A].

    Parameters
    ----------
    temperature_k : array_like
        Wire temperature [K] (1200-3655 K, else NaN).
    diameter_m : array_like
        Wire diameter [m].
    radiating_area_fraction : array_like, default 1.0
        Fraction of the wire surface that radiates freely [1].
    end_loss_fraction : array_like, default 0.0
        Fraction of the electrical input lost by conduction at the legs [1] (0 <= f < 1).

    References
    ----------
    H. A. Jones, Phys. Rev. 28, 202 (1926), Table I (W and rho); Jones & Langmuir, Gen. Electr.
    Rev. 30 (1927) (d^1.5 scaling).
    """
    t = _asarray(temperature_k)
    h = np.interp(t, _TG, _H_I, left=np.nan, right=np.nan)
    geo = _geometry_current(
        _asarray(diameter_m),
        _asarray(radiating_area_fraction),
        _asarray(end_loss_fraction),
    )
    return _out(h * geo)


def filament_voltage_at_temperature_v(
    temperature_k: ArrayLike,
    diameter_m: ArrayLike,
    length_m: ArrayLike,
    radiating_area_fraction: ArrayLike = 1.0,
    end_loss_fraction: ArrayLike = 0.0,
) -> Any:
    """Filament voltage across the wire at temperature T, eq. (2) of the module note [V].

    Parameters
    ----------
    temperature_k : array_like
        Wire temperature [K] (1200-3655 K, else NaN).
    diameter_m, length_m : array_like
        Wire diameter and length [m].
    radiating_area_fraction, end_loss_fraction : array_like
        As in :func:`filament_current_at_temperature_a` [1].
    """
    t = _asarray(temperature_k)
    h = np.interp(t, _TG, _H_V, left=np.nan, right=np.nan)
    geo = _geometry_voltage(
        _asarray(diameter_m),
        _asarray(length_m),
        _asarray(radiating_area_fraction),
        _asarray(end_loss_fraction),
    )
    return _out(h * geo)


def filament_temperature_for_current_k(
    filament_current_a: ArrayLike,
    diameter_m: ArrayLike,
    radiating_area_fraction: ArrayLike = 1.0,
    end_loss_fraction: ArrayLike = 0.0,
) -> Any:
    """Inverse of :func:`filament_current_at_temperature_a`: wire temperature for a current [K].

    Returns NaN when the current would put the wire outside 1200-3655 K.
    """
    geo = _geometry_current(
        _asarray(diameter_m),
        _asarray(radiating_area_fraction),
        _asarray(end_loss_fraction),
    )
    h = _asarray(filament_current_a) / geo
    return _out(np.interp(h, _H_I, _TG, left=np.nan, right=np.nan))


def filament_temperature_for_voltage_k(
    filament_voltage_v: ArrayLike,
    diameter_m: ArrayLike,
    length_m: ArrayLike,
    radiating_area_fraction: ArrayLike = 1.0,
    end_loss_fraction: ArrayLike = 0.0,
) -> Any:
    """Inverse of :func:`filament_voltage_at_temperature_v`: wire temperature for a voltage [K].

    Returns NaN when the voltage would put the wire outside 1200-3655 K.
    """
    geo = _geometry_voltage(
        _asarray(diameter_m),
        _asarray(length_m),
        _asarray(radiating_area_fraction),
        _asarray(end_loss_fraction),
    )
    h = _asarray(filament_voltage_v) / geo
    return _out(np.interp(h, _H_V, _TG, left=np.nan, right=np.nan))
