"""Emission laws against their published constants and equations."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.constants as sc
from hypothesis import given, settings
from hypothesis import strategies as st

from tubetrack.constants import CHILD_LANGMUIR_K_A_V15, RICHARDSON_A0_A_M2_K2
from tubetrack.physics import (
    blended_tube_current_a,
    child_langmuir_current_a,
    child_langmuir_perveance_a_v15,
    richardson_dushman_current_density_a_m2,
    richardson_dushman_temperature_k,
    saturation_current_for_tube_current_a,
    schottky_lowering_ev,
)


def test_richardson_constant_matches_iupac_gold_book():
    # Source: IUPAC Gold Book, "thermionic work function": A0 = 1.202e6 A m^-2 K^-2 (4 digits,
    # tolerance half a unit of the last digit = 5e2). Recomputed here from scipy.constants
    # (scipy 1.17, CODATA 2022) as 4 pi m_e e k^2 / h^3 (Dushman 1923).
    recomputed = 4 * math.pi * sc.m_e * sc.e * sc.k**2 / sc.h**3
    assert RICHARDSON_A0_A_M2_K2 == pytest.approx(recomputed, rel=1e-12)
    assert RICHARDSON_A0_A_M2_K2 == pytest.approx(1.202e6, abs=5e2)


def test_child_langmuir_constant_recomputed():
    # Source: Child 1911 (Phys. Rev. 32, 492) / Langmuir 1913 (Phys. Rev. 2, 450):
    # J = (4 eps0 / 9) sqrt(2 e / m_e) V^1.5 / d^2; REFERENCES.md K = 2.33395e-6 A V^-1.5 [C, 6 digits].
    k = 4 * sc.epsilon_0 / 9 * math.sqrt(2 * sc.e / sc.m_e)
    assert CHILD_LANGMUIR_K_A_V15 == pytest.approx(k, rel=1e-12)
    assert CHILD_LANGMUIR_K_A_V15 == pytest.approx(2.33395e-6, abs=5e-12)
    # planar diode 1 cm^2, 1 cm gap at 10 kV: I = K S/d^2 V^1.5
    p = child_langmuir_perveance_a_v15(1e-4, 1e-2)
    assert float(child_langmuir_current_a(1e4, p)) == pytest.approx(
        k * 1e-4 / 1e-4 * 1e6, rel=1e-12
    )


def test_richardson_dushman_tungsten_pair_at_2700_k():
    # Source: Wolf, Handbook of Ion Sources (CRC 1995): tungsten A = 60 A cm^-2 K^-2, phi = 4.54 eV.
    # REFERENCES.md: J(2700 K) = 1.47 A/cm^2 [C, 3 digits]; recomputed by hand with scipy's k.
    expected = (
        60.0
        * 2700**2
        * math.exp(
            -4.54 / (sc.physical_constants["Boltzmann constant in eV/K"][0] * 2700)
        )
    )
    j_a_cm2 = float(richardson_dushman_current_density_a_m2(2700.0)) * 1e-4
    assert j_a_cm2 == pytest.approx(expected, rel=1e-12)
    assert j_a_cm2 == pytest.approx(1.47, abs=0.005)


@pytest.mark.parametrize(("j_a_cm2", "t_k"), [(1.0, 2653.0), (5.0, 2863.0)])
def test_richardson_dushman_inverse_temperatures(j_a_cm2, t_k):
    # Source: REFERENCES.md [C]: 1 A/cm^2 at 2653 K, 5 A/cm^2 at 2863 K (A = 60, phi = 4.54),
    # printed to 1 K: tolerance 0.5 K.
    assert float(richardson_dushman_temperature_k(j_a_cm2 * 1e4)) == pytest.approx(
        t_k, abs=0.5
    )


def test_schottky_lowering_coefficient():
    # Source: Schottky 1914: dphi = sqrt(e^3 E / (4 pi eps0)); REFERENCES.md 3.7947e-5 sqrt(E) eV.
    coef = math.sqrt(sc.e**3 / (4 * math.pi * sc.epsilon_0)) / sc.e
    assert float(schottky_lowering_ev(1.0)) == pytest.approx(coef, rel=1e-12)
    assert float(schottky_lowering_ev(1e8)) == pytest.approx(3.7947e-5 * 1e4, rel=2e-5)


def test_blend_limits_and_kv_behaviour():
    # The blend tends to the smaller limit, rises with kV at fixed temperature and saturates.
    assert float(blended_tube_current_a(1.0, 1e6)) == pytest.approx(1.0, rel=1e-9)
    assert float(blended_tube_current_a(1e6, 1.0)) == pytest.approx(1.0, rel=1e-9)
    kv = np.linspace(40e3, 150e3, 50)
    i = blended_tube_current_a(0.5, child_langmuir_current_a(kv, 6e-8))
    assert np.all(np.diff(i) > 0) and i[-1] < 0.5 and i[-1] > 0.45


def test_blend_inverse_round_trip_and_infeasible():
    i_sc = 0.8
    i_sat = saturation_current_for_tube_current_a(0.5, i_sc)
    assert float(blended_tube_current_a(i_sat, i_sc)) == pytest.approx(0.5, rel=1e-12)
    assert np.isnan(
        saturation_current_for_tube_current_a(0.9, i_sc)
    )  # above the space-charge limit


@settings(max_examples=60, deadline=None)
@given(st.floats(1500.0, 3400.0), st.floats(1.0, 300.0))
def test_hotter_emits_more(t_k, dt_k):
    # Property: Richardson-Dushman is strictly increasing in temperature.
    assert richardson_dushman_current_density_a_m2(
        t_k + dt_k
    ) > richardson_dushman_current_density_a_m2(t_k)


@settings(max_examples=60, deadline=None)
@given(st.floats(1e2, 1e6))
def test_rd_inverse_round_trip(j_a_m2):
    t = richardson_dushman_temperature_k(j_a_m2)
    assert float(richardson_dushman_current_density_a_m2(t)) == pytest.approx(
        j_a_m2, rel=1e-9
    )


@pytest.mark.parametrize(
    "func,args",
    [
        (richardson_dushman_current_density_a_m2, ()),
        (richardson_dushman_temperature_k, ()),
        (schottky_lowering_ev, ()),
        (child_langmuir_current_a, (6e-8,)),
        (blended_tube_current_a, (0.5,)),
    ],
)
def test_nan_scalar_array(func, args):
    x = np.array([2500.0, np.nan, 2600.0])
    out = func(x, *args)
    assert out.shape == (3,) and np.isnan(out[1]) and np.all(np.isfinite(out[[0, 2]]))
    assert np.ndim(func(2500.0, *args)) == 0
