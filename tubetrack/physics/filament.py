"""Filament specification and the forward model: tube current <-> filament temperature/current.

Forward model for one filament (all vectorised, NaN in -> NaN out):

1. Space-charge limit at the tube voltage: I_sc = P V^1.5 (Child-Langmuir, perveance form).
2. Saturation current needed for the wanted tube current I:
   I_sat = (I^-m - I_sc^-m)^(-1/m) (inverse of the blend; NaN if I >= I_sc).
3. Emission density needed: J = I_sat / S_e, with the emitting area
   S_e = f_e pi d L r^a (r = d/d0; a = 1 when the emitting area shrinks with the wire).
4. Temperature from Richardson-Dushman inverted (published pair A = 60 A cm^-2 K^-2,
   phi = 4.54 eV).
5. Filament current and voltage at that temperature from the heat balance
   (:mod:`tubetrack.physics.thermal`) for the current diameter d = r d0, times ``current_scale``
   (logged / model current: absorbs sensor gain and geometry errors; 1 for a nominal spec).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike

from tubetrack.errors import InputError
from tubetrack.physics.emission import (
    DEFAULT_BLEND_SHARPNESS,
    blended_tube_current_a,
    child_langmuir_current_a,
    richardson_dushman_current_density_a_m2,
    richardson_dushman_temperature_k,
    saturation_current_for_tube_current_a,
)
from tubetrack.physics.thermal import (
    filament_current_at_temperature_a,
    filament_resistance_ohm,
    filament_temperature_for_current_k,
    filament_voltage_at_temperature_v,
)
from tubetrack.physics.tungsten import _asarray, _out

__all__ = [
    "FilamentSpec",
    "default_filament_spec",
    "saturation_current_at_temperature_a",
    "tube_current_at_temperature_ma",
    "tube_current_for_filament_current_ma",
    "filament_temperature_for_tube_current_k",
    "filament_current_for_tube_current_a",
    "filament_operating_point",
]


@dataclass(frozen=True)
class FilamentSpec:
    """Parameters of one filament (one focal spot) of one tube.

    Attributes
    ----------
    focal_spot : str
        ``"small"`` or ``"large"``.
    diameter_m : float
        Initial wire diameter d0 [m].
    length_m : float
        Wire length between the legs (uncoiled) [m].
    emitting_area_fraction : float
        Fraction f_e of the wire surface pi d L whose emission reaches the anode [1].
    radiating_area_fraction : float
        Fraction a_rad of the wire surface that radiates freely (coil self-shielding) [1].
    end_loss_fraction : float
        Fraction of the heating power conducted away at the legs [1].
    perveance_a_v15 : float
        Space-charge perveance P of the cathode-anode geometry [A V^-1.5].
    blend_sharpness : float
        Exponent m of the emission blend [1].
    work_function_ev, richardson_a_m2_k2 : float
        The published emission pair [eV], [A m^-2 K^-2] (Wolf 1995: 4.54 eV with 60 A cm^-2 K^-2).
    emitting_area_diameter_exponent : float
        a in S_e ~ (d/d0)^a: 1 if the emitting area shrinks with the wire (default), 0 if the
        cup aperture fixes it. The inversion reports the spread between the two as model error.
    hot_spot_factor : float
        Local thinning rate at the weakest point relative to the mean [1] (>= 1).
    turns_ratio : float
        Filament transformer primary:secondary turns ratio Np/Ns [1].
    current_scale : float
        Logged filament current / model current [1]: sensor gain and geometry errors, fitted
        per tube from a baseline (:func:`tubetrack.physics.inversion.fit_baseline`).

    Notes
    -----
    Numeric fields may also be numpy arrays (one value per row of the inputs, e.g. per-tube
    fitted values from :func:`tubetrack.physics.inversion.fit_baseline_groups`); they then
    broadcast against the per-row arguments of every model function.
    """

    focal_spot: str = "large"
    diameter_m: float = 0.30e-3
    length_m: float = 0.120
    emitting_area_fraction: float = 0.5
    radiating_area_fraction: float = 0.75
    end_loss_fraction: float = 0.05
    perveance_a_v15: float = 6.4e-8
    blend_sharpness: float = DEFAULT_BLEND_SHARPNESS
    work_function_ev: float = 4.54
    richardson_a_m2_k2: float = 60e4
    emitting_area_diameter_exponent: float = 1.0
    hot_spot_factor: float = 1.0
    turns_ratio: float = 20.0
    current_scale: float = 1.0

    def __post_init__(self) -> None:
        def arr(name: str) -> Any:
            return np.asarray(getattr(self, name), dtype=float)

        checks = {
            "diameter_m": arr("diameter_m") > 0,
            "length_m": arr("length_m") > 0,
            "emitting_area_fraction": (arr("emitting_area_fraction") > 0)
            & (arr("emitting_area_fraction") <= 1),
            "radiating_area_fraction": (arr("radiating_area_fraction") > 0)
            & (arr("radiating_area_fraction") <= 1),
            "end_loss_fraction": (arr("end_loss_fraction") >= 0)
            & (arr("end_loss_fraction") < 1),
            "perveance_a_v15": arr("perveance_a_v15") > 0,
            "blend_sharpness": arr("blend_sharpness") > 0,
            "hot_spot_factor": arr("hot_spot_factor") >= 1,
            "turns_ratio": arr("turns_ratio") > 0,
            "current_scale": arr("current_scale") > 0,
        }
        for name, ok in checks.items():
            value = arr(name)
            # NaN is allowed (it marks unknown rows and propagates); other bad values are not
            if not np.all(ok | np.isnan(value)) or np.any(np.isinf(value)):
                raise InputError(
                    f"FilamentSpec.{name} is {getattr(self, name)!r}, outside its valid range. "
                    "Check the value and its unit (SI: metres, A V^-1.5, fractions 0-1)."
                )

    @property
    def surface_area_m2(self) -> Any:
        """Wire surface pi d0 L [m^2]."""
        return np.pi * np.asarray(self.diameter_m) * np.asarray(self.length_m)

    @property
    def emitting_area_m2(self) -> Any:
        """Emitting area f_e pi d0 L of the new wire [m^2]."""
        return self.emitting_area_fraction * self.surface_area_m2

    def replace(self, **changes: Any) -> FilamentSpec:
        """A copy with some fields changed (validated)."""
        return dataclasses.replace(self, **changes)


# Nominal filaments. Wire diameters from radiography teaching texts (about 0.22 mm small focus,
# 0.30 mm large; REFERENCES.md [R]). Lengths, area fractions and perveances are model choices
# (# common practice scale): they put the filament at 8-12 V / 4-8 A at 2500-2750 K and make
# the large filament's tube current rise from about 450 mA at 50 kV to about 550 mA at 90 kV at
# constant filament current (common practice figure), i.e. the transition region.
_DEFAULTS: dict[str, FilamentSpec] = {
    "small": FilamentSpec(
        focal_spot="small",
        diameter_m=0.22e-3,
        length_m=0.095,
        emitting_area_fraction=0.5,
        radiating_area_fraction=0.75,
        end_loss_fraction=0.05,
        perveance_a_v15=3.2e-8,
    ),
    "large": FilamentSpec(
        focal_spot="large",
        diameter_m=0.30e-3,
        length_m=0.120,
        emitting_area_fraction=0.5,
        radiating_area_fraction=0.70,
        end_loss_fraction=0.05,
        perveance_a_v15=6.4e-8,
    ),
}


def default_filament_spec(focal_spot: str) -> FilamentSpec:
    """Nominal filament for a focal spot: ``"small"`` (0.22 mm wire) or ``"large"`` (0.30 mm).

    Parameters
    ----------
    focal_spot : str
        ``"small"`` or ``"large"`` (case-insensitive).

    Returns
    -------
    FilamentSpec
        Nominal parameters; per-tube values come from
        :func:`tubetrack.physics.inversion.fit_baseline`.
    """
    key = str(focal_spot).strip().lower()
    if key not in _DEFAULTS:
        raise InputError(
            f"focal spot is {focal_spot!r}; expected 'small' or 'large'. "
            "Map the log's focus code to small/large first."
        )
    return _DEFAULTS[key]


def _emitting_area(spec: FilamentSpec, diameter_ratio: Any) -> Any:
    return spec.emitting_area_m2 * diameter_ratio**spec.emitting_area_diameter_exponent


def saturation_current_at_temperature_a(
    spec: FilamentSpec, temperature_k: ArrayLike, diameter_ratio: ArrayLike = 1.0
) -> Any:
    """Temperature-limited emission current of the filament, J_RD(T) x S_e [A]."""
    r = _asarray(diameter_ratio)
    j = _asarray(
        richardson_dushman_current_density_a_m2(
            temperature_k, spec.work_function_ev, spec.richardson_a_m2_k2
        )
    )
    return _out(j * _emitting_area(spec, r))


def tube_current_at_temperature_ma(
    spec: FilamentSpec,
    temperature_k: ArrayLike,
    tube_voltage_kv: ArrayLike,
    diameter_ratio: ArrayLike = 1.0,
) -> Any:
    """Tube current delivered at a filament temperature and tube voltage [mA].

    Parameters
    ----------
    spec : FilamentSpec
    temperature_k : array_like
        Filament temperature [K].
    tube_voltage_kv : array_like
        Tube voltage [kV].
    diameter_ratio : array_like, default 1.0
        d/d0 [1].
    """
    i_sat = saturation_current_at_temperature_a(spec, temperature_k, diameter_ratio)
    i_sc = child_langmuir_current_a(
        _asarray(tube_voltage_kv) * 1e3, spec.perveance_a_v15
    )
    return _out(
        _asarray(blended_tube_current_a(i_sat, i_sc, spec.blend_sharpness)) * 1e3
    )


def _heat_args(spec: FilamentSpec, r: Any) -> tuple[Any, float, float]:
    return spec.diameter_m * r, spec.radiating_area_fraction, spec.end_loss_fraction


def tube_current_for_filament_current_ma(
    spec: FilamentSpec,
    filament_current_a: ArrayLike,
    tube_voltage_kv: ArrayLike,
    diameter_ratio: ArrayLike = 1.0,
) -> Any:
    """Tube current at a given (logged-scale) filament current and tube voltage [mA].

    The filament current is divided by ``spec.current_scale`` to get the model current, the heat
    balance gives the temperature, the emission model the tube current.
    """
    r = _asarray(diameter_ratio)
    d, a_rad, f_end = _heat_args(spec, r)
    t = filament_temperature_for_current_k(
        _asarray(filament_current_a) / spec.current_scale, d, a_rad, f_end
    )
    return tube_current_at_temperature_ma(spec, t, tube_voltage_kv, r)


def filament_temperature_for_tube_current_k(
    spec: FilamentSpec,
    tube_current_ma: ArrayLike,
    tube_voltage_kv: ArrayLike,
    diameter_ratio: ArrayLike = 1.0,
) -> Any:
    """Filament temperature needed to deliver a tube current at a tube voltage [K].

    Parameters
    ----------
    spec : FilamentSpec
    tube_current_ma : array_like
        Wanted tube current [mA].
    tube_voltage_kv : array_like
        Tube voltage [kV].
    diameter_ratio : array_like, default 1.0
        Current wire diameter over the new diameter d/d0 [1].

    Returns
    -------
    numpy.ndarray or float
        Temperature [K]; NaN when the tube current is at or above the space-charge limit
        P V^1.5 at that kV (not deliverable) or an input is NaN.
    """
    r = _asarray(diameter_ratio)
    i_sc = child_langmuir_current_a(
        _asarray(tube_voltage_kv) * 1e3, spec.perveance_a_v15
    )
    i_sat = saturation_current_for_tube_current_a(
        _asarray(tube_current_ma) * 1e-3, i_sc, spec.blend_sharpness
    )
    with np.errstate(divide="ignore", invalid="ignore"):
        j = _asarray(i_sat) / _emitting_area(spec, r)
    return richardson_dushman_temperature_k(
        j, spec.work_function_ev, spec.richardson_a_m2_k2
    )


def filament_current_for_tube_current_a(
    spec: FilamentSpec,
    tube_current_ma: ArrayLike,
    tube_voltage_kv: ArrayLike,
    diameter_ratio: ArrayLike = 1.0,
) -> Any:
    """Filament current needed to deliver a tube current at a tube voltage [A].

    Parameters
    ----------
    spec : FilamentSpec
    tube_current_ma : array_like
        Wanted tube current (mA station) [mA].
    tube_voltage_kv : array_like
        Tube voltage [kV].
    diameter_ratio : array_like, default 1.0
        d/d0 [1].

    Returns
    -------
    numpy.ndarray or float
        Filament current [A] on the log's scale (model current x ``spec.current_scale``); NaN when
        not deliverable or outside the property tables.
    """
    r = _asarray(diameter_ratio)
    t = filament_temperature_for_tube_current_k(
        spec, tube_current_ma, tube_voltage_kv, r
    )
    d, a_rad, f_end = _heat_args(spec, r)
    return _out(
        _asarray(filament_current_at_temperature_a(t, d, a_rad, f_end))
        * spec.current_scale
    )


def filament_operating_point(
    spec: FilamentSpec,
    tube_current_ma: ArrayLike,
    tube_voltage_kv: ArrayLike,
    diameter_ratio: ArrayLike = 1.0,
) -> Any:
    """Full operating point of the filament for each (tube current, kV, d/d0).

    Returns
    -------
    pandas.DataFrame
        Columns: focal_spot, tube_current_ma, tube_voltage_kv, diameter_ratio,
        filament_temperature_k, filament_current_a, filament_voltage_v, filament_resistance_ohm,
        filament_power_w, saturation_current_ma, space_charge_current_ma, emission_density_a_cm2,
        primary_voltage_v (ideal transformer, ``spec.turns_ratio``).
    """
    import pandas as pd

    ma, kv, r = np.broadcast_arrays(
        np.atleast_1d(_asarray(tube_current_ma)),
        np.atleast_1d(_asarray(tube_voltage_kv)),
        np.atleast_1d(_asarray(diameter_ratio)),
    )
    t = _asarray(filament_temperature_for_tube_current_k(spec, ma, kv, r))
    d, a_rad, f_end = _heat_args(spec, r)
    i_f = _asarray(filament_current_at_temperature_a(t, d, a_rad, f_end))
    v_f = _asarray(filament_voltage_at_temperature_v(t, d, spec.length_m, a_rad, f_end))
    i_sat = _asarray(saturation_current_at_temperature_a(spec, t, r))
    i_sc = _asarray(child_langmuir_current_a(kv * 1e3, spec.perveance_a_v15))
    return pd.DataFrame(
        {
            "focal_spot": spec.focal_spot,
            "tube_current_ma": ma,
            "tube_voltage_kv": kv,
            "diameter_ratio": r,
            "filament_temperature_k": t,
            "filament_current_a": i_f * spec.current_scale,
            "filament_voltage_v": v_f,
            "filament_resistance_ohm": _asarray(
                filament_resistance_ohm(t, d, spec.length_m)
            ),
            "filament_power_w": i_f * v_f,
            "saturation_current_ma": i_sat * 1e3,
            "space_charge_current_ma": i_sc * 1e3,
            "emission_density_a_cm2": i_sat / _asarray(_emitting_area(spec, r)) * 1e-4,
            "primary_voltage_v": v_f * spec.turns_ratio,
        }
    )
