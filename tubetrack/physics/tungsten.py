"""Tungsten properties as functions of temperature, each from a named published source.

All functions are vectorised numpy: scalars in give 0-d float64 out, arrays broadcast, NaN in
gives NaN out, and temperatures outside a source's validity range give NaN (never a silent
extrapolation), except where a docstring says otherwise.

References
----------
.. [Jones1926] H. A. Jones, "A temperature scale for tungsten", Physical Review 28, 202-207
   (1926), Table I (resistivity in micro-ohm cm and radiated power in W cm^-2 versus temperature).
.. [WM1997] G. K. White and M. L. Minges, "Thermophysical properties of some key solids: an
   update", International Journal of Thermophysics 18, 1269-1327 (1997): tungsten resistivity fit.
.. [AIH1984] C. B. Alcock, V. P. Itkin and M. K. Horrigan, "Vapour pressure equations for the
   metallic elements: 298-2500 K", Canadian Metallurgical Quarterly 23, 309-313 (1984), as
   reproduced in the CRC Handbook of Chemistry and Physics, "Vapor pressure of the metallic
   elements - equations".
.. [Yaws2018] C. L. Yaws, "The Yaws Handbook of Vapor Pressure: Antoine coefficients", 2nd ed.,
   Gulf Professional Publishing (2015/2018): tungsten Antoine fit.
.. [Langmuir1913] I. Langmuir, "The vapor pressure of metallic tungsten", Physical Review 2,
   329-342 (1913): free-evaporation (Hertz-Knudsen-Langmuir) mass flux.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

from tubetrack.constants import (
    AMBIENT_K,
    GAS_CONSTANT_J_MOL_K,
    STANDARD_ATMOSPHERE_PA,
    STEFAN_BOLTZMANN_W_M2_K4,
    TUNGSTEN_DENSITY_KG_M3,
    TUNGSTEN_MOLAR_MASS_KG_MOL,
)

__all__ = [
    "JONES_1926_RESISTIVITY",
    "JONES_1926_RADIATED_POWER",
    "TUNGSTEN_DENSITY_KG_M3",
    "TUNGSTEN_MOLAR_MASS_KG_MOL",
    "tungsten_resistivity_ohm_m",
    "tungsten_resistivity_white_minges_ohm_m",
    "tungsten_total_emissivity",
    "tungsten_radiated_power_w_m2",
    "tungsten_vapour_pressure_pa",
    "tungsten_vapour_pressure_yaws_pa",
    "tungsten_evaporation_flux_kg_m2_s",
]

FloatArray = NDArray[np.float64]

#: Jones (1926) Table I, resistivity of tungsten: (temperature [K], resistivity [micro-ohm cm]).
#: Valid 293-3655 K (the table's range). The printed 1100 K and 1200 K rows look misprinted; the
#: values here (27.94, 30.99) are those implied by the table's own R/R293 column.
JONES_1926_RESISTIVITY: tuple[tuple[float, float], ...] = (
    (293.0, 5.49),
    (1000.0, 24.90),
    (1100.0, 27.94),
    (1200.0, 30.99),
    (1500.0, 40.35),
    (2000.0, 56.67),
    (2400.0, 70.38),
    (2500.0, 73.83),
    (2600.0, 77.38),
    (2700.0, 81.00),
    (2800.0, 84.69),
    (3000.0, 92.00),
    (3655.0, 117.1),
)

#: Jones (1926) Table I, total radiated power of a tungsten surface into a 293 K enclosure:
#: (temperature [K], radiated power [W cm^-2]). Valid 2000-3000 K (the rows transcribed).
JONES_1926_RADIATED_POWER: tuple[tuple[float, float], ...] = (
    (2000.0, 23.9),
    (2500.0, 69.2),
    (2700.0, 98.8),
    (3000.0, 160.1),
)

#: Validity range [K] of :func:`tungsten_resistivity_ohm_m` (Jones 1926 table range).
RESISTIVITY_RANGE_K = (293.0, 3655.0)
#: Validity range [K] of the White & Minges (1997) fit.
WHITE_MINGES_RANGE_K = (300.0, 3695.0)
#: Range [K] covered by the Jones (1926) radiated-power rows; emissivity is extrapolated
#: linearly (in T) from the end intervals down to 1200 K and up to 3655 K, outside it is NaN.
EMISSIVITY_TABLE_RANGE_K = (2000.0, 3000.0)
EMISSIVITY_RANGE_K = (1200.0, 3655.0)
#: Range [K] over which the vapour-pressure functions are evaluated (solid tungsten).
VAPOUR_PRESSURE_RANGE_K = (1000.0, 3695.0)

_GRID_STEP_K = 0.5
_GRID_T = np.arange(250.0, 3700.0 + _GRID_STEP_K, _GRID_STEP_K)


def _asarray(x: ArrayLike) -> FloatArray:
    return np.asarray(x, dtype=np.float64)


def _out(x: FloatArray) -> Any:
    """Return 0-d arrays as numpy float64 scalars, arrays unchanged."""
    return x[()] if x.ndim == 0 else x


def _mask_range(values: FloatArray, t: FloatArray, lo: float, hi: float) -> FloatArray:
    return np.where((t >= lo) & (t <= hi), values, np.nan)


def _build_resistivity_grid() -> FloatArray:
    from scipy.interpolate import PchipInterpolator

    t, rho = np.array(JONES_1926_RESISTIVITY).T
    # PCHIP (monotone, C1) through the Jones rows; tabulated once on a 0.5 K grid so that
    # lookups are a fast np.interp. Grid error is far below the table's 4-digit precision.
    return PchipInterpolator(t, rho * 1e-8, extrapolate=True)(_GRID_T)


def _build_emissivity_grid() -> FloatArray:
    from scipy.interpolate import PchipInterpolator

    t, w = np.array(JONES_1926_RADIATED_POWER).T
    eps = w * 1e4 / (STEFAN_BOLTZMANN_W_M2_K4 * (t**4 - AMBIENT_K**4))
    inner = PchipInterpolator(t, eps, extrapolate=False)(_GRID_T)
    lo_slope = (eps[1] - eps[0]) / (t[1] - t[0])
    hi_slope = (eps[-1] - eps[-2]) / (t[-1] - t[-2])
    below = eps[0] + lo_slope * (_GRID_T - t[0])
    above = eps[-1] + hi_slope * (_GRID_T - t[-1])
    grid = np.where(_GRID_T < t[0], below, np.where(_GRID_T > t[-1], above, inner))
    return np.clip(grid, 0.02, 0.6)


_RHO_GRID = _build_resistivity_grid()
_EPS_GRID = _build_emissivity_grid()


def tungsten_resistivity_ohm_m(temperature_k: ArrayLike) -> Any:
    """Electrical resistivity of tungsten, Jones (1926) Table I interpolated.

    Parameters
    ----------
    temperature_k : array_like
        Wire temperature [K]. Valid 293-3655 K; outside it the result is NaN.

    Returns
    -------
    numpy.ndarray or float
        Resistivity [ohm m].

    Notes
    -----
    Monotone cubic (PCHIP) interpolation through the rows of :data:`JONES_1926_RESISTIVITY`;
    agrees with the White & Minges (1997) fit within about 2 % over 1500-2800 K.

    References
    ----------
    H. A. Jones, "A temperature scale for tungsten", Phys. Rev. 28, 202 (1926), Table I.
    """
    t = _asarray(temperature_k)
    rho = np.interp(t, _GRID_T, _RHO_GRID)
    return _out(_mask_range(rho, t, *RESISTIVITY_RANGE_K))


def tungsten_resistivity_white_minges_ohm_m(temperature_k: ArrayLike) -> Any:
    """Electrical resistivity of tungsten from the White & Minges (1997) polynomial fit.

    Parameters
    ----------
    temperature_k : array_like
        Temperature [K]. Valid 300-3695 K; outside it the result is NaN.

    Returns
    -------
    numpy.ndarray or float
        Resistivity [ohm m].

    Notes
    -----
    rho [micro-ohm cm] = -0.9680 + 1.9274e-2 T + 7.8260e-6 T^2 - 1.8517e-9 T^3 + 2.0790e-13 T^4.

    References
    ----------
    G. K. White and M. L. Minges, Int. J. Thermophys. 18, 1269 (1997), tungsten resistivity.
    """
    t = _asarray(temperature_k)
    rho_uohm_cm = -0.9680 + t * (
        1.9274e-2 + t * (7.8260e-6 + t * (-1.8517e-9 + t * 2.0790e-13))
    )
    return _out(_mask_range(rho_uohm_cm * 1e-8, t, *WHITE_MINGES_RANGE_K))


def tungsten_total_emissivity(temperature_k: ArrayLike) -> Any:
    """Total hemispherical emissivity of tungsten derived from Jones (1926) radiated power.

    Parameters
    ----------
    temperature_k : array_like
        Temperature [K]. Table rows cover 2000-3000 K; 1200-2000 K and 3000-3655 K are linear
        extrapolations from the end intervals (weaker); outside 1200-3655 K the result is NaN.

    Returns
    -------
    numpy.ndarray or float
        Emissivity [1].

    Notes
    -----
    e(T) = W(T) / (sigma (T^4 - 293^4)), W from :data:`JONES_1926_RADIATED_POWER`, PCHIP
    between rows. Gives 0.264, 0.312, 0.328, 0.349 at 2000, 2500, 2700, 3000 K; Forsythe &
    Worthing (1925, Astrophys. J. 61, 146) agree within about 1 %.

    References
    ----------
    H. A. Jones, Phys. Rev. 28, 202 (1926), Table I.
    """
    t = _asarray(temperature_k)
    eps = np.interp(t, _GRID_T, _EPS_GRID)
    return _out(_mask_range(eps, t, *EMISSIVITY_RANGE_K))


def tungsten_radiated_power_w_m2(
    temperature_k: ArrayLike, ambient_k: float = AMBIENT_K
) -> Any:
    """Net power radiated per unit surface of tungsten [W m^-2].

    Parameters
    ----------
    temperature_k : array_like
        Surface temperature [K] (range as :func:`tungsten_total_emissivity`).
    ambient_k : float, default 293.15
        Temperature of the surroundings [K].

    Returns
    -------
    numpy.ndarray or float
        e(T) sigma (T^4 - T_amb^4) [W m^-2].

    References
    ----------
    H. A. Jones, Phys. Rev. 28, 202 (1926), Table I.
    """
    t = _asarray(temperature_k)
    eps = _asarray(tungsten_total_emissivity(t))
    return _out(eps * STEFAN_BOLTZMANN_W_M2_K4 * (t**4 - ambient_k**4))


def tungsten_vapour_pressure_pa(temperature_k: ArrayLike) -> Any:
    """Vapour pressure of solid tungsten, Alcock, Itkin & Horrigan (1984) [Pa].

    Parameters
    ----------
    temperature_k : array_like
        Temperature [K]. Evaluated 1000-3695 K (solid); outside it the result is NaN.

    Returns
    -------
    numpy.ndarray or float
        Equilibrium vapour pressure [Pa].

    Notes
    -----
    log10(p / atm) = 2.945 - 44094 / T + 1.3677 log10(T). Gives about 2.05e-4 Pa at 2700 K.
    The CRC table states the equations reproduce the data within about 5 % (from memory).

    References
    ----------
    C. B. Alcock, V. P. Itkin, M. K. Horrigan, Can. Metall. Q. 23, 309 (1984), as in the CRC
    Handbook of Chemistry and Physics, "Vapor pressure of the metallic elements - equations".
    """
    t = _asarray(temperature_k)
    with np.errstate(divide="ignore", invalid="ignore"):
        log10_atm = 2.945 - 44094.0 / t + 1.3677 * np.log10(t)
    p = STANDARD_ATMOSPHERE_PA * 10.0**log10_atm
    return _out(_mask_range(p, t, *VAPOUR_PRESSURE_RANGE_K))


def tungsten_vapour_pressure_yaws_pa(temperature_k: ArrayLike) -> Any:
    """Vapour pressure of tungsten from the Yaws Antoine fit [Pa] (second, independent fit).

    Parameters
    ----------
    temperature_k : array_like
        Temperature [K]. Evaluated 1000-3695 K; outside it the result is NaN.

    Returns
    -------
    numpy.ndarray or float
        Vapour pressure [Pa].

    Notes
    -----
    log10(p / Pa) = 12.108 - 40387.965 / (T - 141.51). Agrees with
    :func:`tungsten_vapour_pressure_pa` within 10 % over 2000-3000 K.

    References
    ----------
    C. L. Yaws, The Yaws Handbook of Vapor Pressure: Antoine Coefficients, 2nd ed. (2015/2018).
    """
    t = _asarray(temperature_k)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        p = 10.0 ** (12.108 - 40387.965 / (t - 141.51))
    return _out(_mask_range(p, t, *VAPOUR_PRESSURE_RANGE_K))


def tungsten_evaporation_flux_kg_m2_s(temperature_k: ArrayLike) -> Any:
    """Free-evaporation mass flux of tungsten into vacuum (Hertz-Knudsen-Langmuir).

    Parameters
    ----------
    temperature_k : array_like
        Surface temperature [K] (range as :func:`tungsten_vapour_pressure_pa`).

    Returns
    -------
    numpy.ndarray or float
        Mass flux leaving the surface [kg m^-2 s^-1].

    Notes
    -----
    Gamma = alpha p(T) sqrt(M / (2 pi R T)) with evaporation coefficient alpha = 1 (Langmuir 1913
    found tungsten evaporates at the free rate), p from Alcock-Itkin-Horrigan (1984) and
    M = 183.84 g/mol (IUPAC). About 2.35e-7 kg m^-2 s^-1 (2.35e-8 g cm^-2 s^-1) at 2700 K.

    References
    ----------
    I. Langmuir, "The vapor pressure of metallic tungsten", Phys. Rev. 2, 329 (1913).
    """
    t = _asarray(temperature_k)
    p = _asarray(tungsten_vapour_pressure_pa(t))
    with np.errstate(divide="ignore", invalid="ignore"):
        flux = p * np.sqrt(
            TUNGSTEN_MOLAR_MASS_KG_MOL / (2.0 * np.pi * GAS_CONSTANT_J_MOL_K * t)
        )
    return _out(flux)


def _grid_property(name: str) -> FloatArray:
    """Internal: the precomputed 0.5 K grid of a property (for fast inverse lookups)."""
    if name == "t":
        return _GRID_T
    if name == "rho":
        return _RHO_GRID
    if name == "eps":
        return _EPS_GRID
    raise KeyError(name)
