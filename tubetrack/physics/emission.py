"""Thermionic emission from a tungsten filament and the space-charge limit of the tube.

References
----------
.. [Dushman1923] S. Dushman, "Electron emission from metals as a function of temperature",
   Physical Review 21, 623-636 (1923): J = A T^2 exp(-phi / kT), theoretical A0 = 4 pi m e k^2/h^3.
.. [Wolf1995] B. Wolf (ed.), Handbook of Ion Sources, CRC Press (1995), table of thermionic
   emission constants: tungsten A = 60 A cm^-2 K^-2 with phi = 4.54 eV (also in Smithells Metals
   Reference Book). A and phi are fitted together and are only used as this pair.
.. [Schottky1914] W. Schottky, "Ueber den Einfluss von Strukturwirkungen, besonders der
   Thomsonschen Bildkraft, auf die Elektronenemission der Metalle", Physikalische Zeitschrift 15,
   872 (1914): barrier lowering dphi = sqrt(e^3 E / (4 pi eps0)).
.. [Child1911] C. D. Child, "Discharge from hot CaO", Physical Review 32, 492 (1911);
   I. Langmuir, "The effect of space charge and residual gases on thermionic currents in high
   vacuum", Physical Review 2, 450 (1913): J = (4 eps0/9) sqrt(2e/m) V^1.5 / d^2.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import ArrayLike

from tubetrack.constants import (
    BOLTZMANN_EV_K,
    CHILD_LANGMUIR_K_A_V15,
    ELEMENTARY_CHARGE_C,
    RICHARDSON_A0_A_M2_K2,
    VACUUM_PERMITTIVITY_F_M,
)
from tubetrack.physics.tungsten import _asarray, _out

__all__ = [
    "RICHARDSON_A0_A_M2_K2",
    "CHILD_LANGMUIR_K_A_V15",
    "TUNGSTEN_EMISSION_PAIR",
    "DEFAULT_BLEND_SHARPNESS",
    "richardson_dushman_current_density_a_m2",
    "richardson_dushman_temperature_k",
    "schottky_lowering_ev",
    "child_langmuir_current_a",
    "child_langmuir_perveance_a_v15",
    "blended_tube_current_a",
    "saturation_current_for_tube_current_a",
]

#: Published tungsten emission pair (Wolf 1995, Handbook of Ion Sources; Smithells):
#: Richardson constant [A m^-2 K^-2] and work function [eV], to be used together only.
TUNGSTEN_EMISSION_PAIR: tuple[float, float] = (60e4, 4.54)

#: Default sharpness m of the blend I = (I_sat^-m + I_sc^-m)^(-1/m) [1]. A modelling choice:
#: m = 2 gives a soft knee; large m tends to min(I_sat, I_sc). Per-tube data can refit it.
DEFAULT_BLEND_SHARPNESS: float = 2.0


def richardson_dushman_current_density_a_m2(
    temperature_k: ArrayLike,
    work_function_ev: ArrayLike = 4.54,
    richardson_a_m2_k2: ArrayLike = 60e4,
) -> Any:
    """Temperature-limited emission current density, Richardson-Dushman law.

    Parameters
    ----------
    temperature_k : array_like
        Emitter temperature [K].
    work_function_ev : array_like, default 4.54
        Effective work function [eV]; pass phi minus any Schottky lowering.
    richardson_a_m2_k2 : array_like, default 60e4
        Richardson constant [A m^-2 K^-2]. The defaults are the published tungsten pair
        (A = 60 A cm^-2 K^-2, phi = 4.54 eV; Wolf 1995); never mix A and phi from different
        sources.

    Returns
    -------
    numpy.ndarray or float
        Current density [A m^-2]. About 1.47e4 A m^-2 (1.47 A cm^-2) at 2700 K.

    Notes
    -----
    J = A T^2 exp(-phi / (k T))  (Dushman 1923, eq. 1).

    References
    ----------
    S. Dushman, Phys. Rev. 21, 623 (1923); B. Wolf, Handbook of Ion Sources, CRC (1995).
    """
    t = _asarray(temperature_k)
    phi = _asarray(work_function_ev)
    a = _asarray(richardson_a_m2_k2)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        j = a * t**2 * np.exp(-phi / (BOLTZMANN_EV_K * t))  # Dushman 1923, eq. 1
    return _out(np.where(t > 0, j, np.nan))


def richardson_dushman_temperature_k(
    current_density_a_m2: ArrayLike,
    work_function_ev: ArrayLike = 4.54,
    richardson_a_m2_k2: ArrayLike = 60e4,
) -> Any:
    """Invert Richardson-Dushman: the temperature that emits a given current density.

    Parameters
    ----------
    current_density_a_m2 : array_like
        Temperature-limited current density [A m^-2]; non-positive values give NaN.
    work_function_ev, richardson_a_m2_k2 : array_like
        The emission pair [eV], [A m^-2 K^-2] (see
        :func:`richardson_dushman_current_density_a_m2`).

    Returns
    -------
    numpy.ndarray or float
        Temperature [K]. 2653 K for 1 A cm^-2, 2863 K for 5 A cm^-2 with the default pair.

    Notes
    -----
    Solves 2 ln T - b / T = ln(J / A), b = phi / k, by Newton's method (vectorised, 8 fixed
    iterations from b / (ln(A/J) + 2 ln 2500); converged to < 1e-9 K over 500-3600 K).
    """
    j = _asarray(current_density_a_m2)
    phi = _asarray(work_function_ev)
    a = _asarray(richardson_a_m2_k2)
    b = phi / BOLTZMANN_EV_K
    with np.errstate(divide="ignore", invalid="ignore"):
        c = np.log(np.where(j > 0, j, np.nan) / a)
        t = b / (2.0 * np.log(2500.0) - c)
        for _ in range(8):
            f = 2.0 * np.log(t) - b / t - c
            t = t - f / (2.0 / t + b / t**2)
    return _out(np.where(t > 0, t, np.nan))


def schottky_lowering_ev(field_v_m: ArrayLike) -> Any:
    """Schottky lowering of the work function by the surface electric field.

    Parameters
    ----------
    field_v_m : array_like
        Accelerating field at the emitter surface [V m^-1]; negative values give NaN.

    Returns
    -------
    numpy.ndarray or float
        Barrier lowering [eV]: 3.7947e-5 sqrt(E) eV.

    Notes
    -----
    dphi = sqrt(e^3 E / (4 pi eps0)) [J], divided by e for eV (Schottky 1914).
    """
    e_field = _asarray(field_v_m)
    with np.errstate(invalid="ignore"):
        dphi_j = np.sqrt(
            ELEMENTARY_CHARGE_C**3 * e_field / (4.0 * np.pi * VACUUM_PERMITTIVITY_F_M)
        )
    return _out(dphi_j / ELEMENTARY_CHARGE_C)


def child_langmuir_perveance_a_v15(area_m2: ArrayLike, gap_m: ArrayLike) -> Any:
    """Perveance of an ideal planar diode, P = K S / d^2 [A V^-1.5] (Child 1911, Langmuir 1913).

    Parameters
    ----------
    area_m2 : array_like
        Emitting area [m^2].
    gap_m : array_like
        Cathode-anode gap [m].
    """
    return _out(CHILD_LANGMUIR_K_A_V15 * _asarray(area_m2) / _asarray(gap_m) ** 2)


def child_langmuir_current_a(
    tube_voltage_v: ArrayLike, perveance_a_v15: ArrayLike
) -> Any:
    """Space-charge-limited tube current in perveance form, I = P V^1.5.

    Parameters
    ----------
    tube_voltage_v : array_like
        Anode-cathode voltage [V] (kV x 1000). Negative values give NaN.
    perveance_a_v15 : array_like
        Perveance of the cathode-anode geometry [A V^-1.5]. For a planar diode
        P = (4 eps0 / 9) sqrt(2 e / m_e) S / d^2; a focusing-cup cathode is characterised per tube.

    Returns
    -------
    numpy.ndarray or float
        Space-charge-limited current [A].

    References
    ----------
    C. D. Child, Phys. Rev. 32, 492 (1911); I. Langmuir, Phys. Rev. 2, 450 (1913).
    """
    v = _asarray(tube_voltage_v)
    with np.errstate(invalid="ignore"):
        return _out(_asarray(perveance_a_v15) * np.where(v >= 0, v, np.nan) ** 1.5)


def blended_tube_current_a(
    saturation_current_a: ArrayLike,
    space_charge_current_a: ArrayLike,
    sharpness: ArrayLike = DEFAULT_BLEND_SHARPNESS,
) -> Any:
    """Tube current between the temperature-limited and space-charge-limited regimes.

    Parameters
    ----------
    saturation_current_a : array_like
        Temperature-limited (Richardson-Dushman) current I_sat [A].
    space_charge_current_a : array_like
        Space-charge-limited current I_sc = P V^1.5 [A].
    sharpness : array_like, default 2.0
        Blend exponent m [1] (> 0).

    Returns
    -------
    numpy.ndarray or float
        I = (I_sat^-m + I_sc^-m)^(-1/m) [A]: below both limits, tends to the smaller one, rises
        with kV at fixed temperature and saturates at I_sat.

    Notes
    -----
    A common empirical interpolation between the two regimes (a generalised mean of order -m);
    not a first-principles result. Its sharpness and the perveance are fitted per tube
    (:func:`tubetrack.physics.inversion.fit_baseline`).
    """
    i_sat = _asarray(saturation_current_a)
    i_sc = _asarray(space_charge_current_a)
    m = _asarray(sharpness)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        i = (i_sat ** (-m) + i_sc ** (-m)) ** (-1.0 / m)
    return _out(i)


def saturation_current_for_tube_current_a(
    tube_current_a: ArrayLike,
    space_charge_current_a: ArrayLike,
    sharpness: ArrayLike = DEFAULT_BLEND_SHARPNESS,
) -> Any:
    """Invert :func:`blended_tube_current_a` for the saturation current needed.

    Parameters
    ----------
    tube_current_a : array_like
        Wanted tube current I [A].
    space_charge_current_a : array_like
        Space-charge limit P V^1.5 [A].
    sharpness : array_like, default 2.0
        Blend exponent m [1].

    Returns
    -------
    numpy.ndarray or float
        I_sat = (I^-m - I_sc^-m)^(-1/m) [A]; NaN when I >= I_sc (the tube cannot deliver that
        current at that kV whatever the filament temperature).
    """
    i = _asarray(tube_current_a)
    i_sc = _asarray(space_charge_current_a)
    m = _asarray(sharpness)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        diff = i ** (-m) - i_sc ** (-m)
        i_sat = np.where((diff > 0) & (i > 0), diff, np.nan) ** (-1.0 / m)
    return _out(i_sat)
