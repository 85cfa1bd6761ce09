"""Physical constants and tungsten material data used by :mod:`tubetrack.physics`.

Physical constants come from :mod:`scipy.constants` (CODATA 2022 in scipy 1.17), never typed by
hand. Material data carry one cited source each.

References
----------
.. [1] CODATA recommended values of the fundamental physical constants, as shipped in
   ``scipy.constants``.
.. [2] IUPAC Commission on Isotopic Abundances and Atomic Weights (CIAAW), standard atomic weight
   of tungsten, Ar(W) = 183.84(1) (2013 table; unchanged in later tables).
.. [3] D. R. Lide (ed.), CRC Handbook of Chemistry and Physics, section 4 "Physical constants of
   inorganic compounds" / "Properties of the elements": tungsten density 19.25 g cm^-3 at 20 C.
"""

from __future__ import annotations

import math

import scipy.constants as _sc

#: Boltzmann constant [J K^-1] (scipy.constants, CODATA).
BOLTZMANN_J_K: float = _sc.k
#: Boltzmann constant [eV K^-1] (scipy.constants, CODATA).
BOLTZMANN_EV_K: float = _sc.physical_constants["Boltzmann constant in eV/K"][0]
#: Elementary charge [C] (scipy.constants, CODATA).
ELEMENTARY_CHARGE_C: float = _sc.e
#: Electron rest mass [kg] (scipy.constants, CODATA).
ELECTRON_MASS_KG: float = _sc.m_e
#: Planck constant [J s] (scipy.constants, CODATA).
PLANCK_J_S: float = _sc.h
#: Vacuum electric permittivity [F m^-1] (scipy.constants, CODATA).
VACUUM_PERMITTIVITY_F_M: float = _sc.epsilon_0
#: Stefan-Boltzmann constant [W m^-2 K^-4] (scipy.constants, CODATA).
STEFAN_BOLTZMANN_W_M2_K4: float = _sc.sigma
#: Molar gas constant [J mol^-1 K^-1] (scipy.constants, CODATA).
GAS_CONSTANT_J_MOL_K: float = _sc.R
#: Standard atmosphere [Pa] (scipy.constants).
STANDARD_ATMOSPHERE_PA: float = _sc.atm

#: Theoretical Richardson constant A0 = 4 pi m_e e k^2 / h^3 [A m^-2 K^-2]
#: (Dushman 1923; IUPAC Gold Book "thermionic work function" prints 1.202e6).
RICHARDSON_A0_A_M2_K2: float = (
    4.0
    * math.pi
    * ELECTRON_MASS_KG
    * ELEMENTARY_CHARGE_C
    * BOLTZMANN_J_K**2
    / PLANCK_J_S**3
)

#: Child-Langmuir planar-diode constant (4 eps0 / 9) sqrt(2 e / m_e) [A V^-1.5]
#: (Child 1911, Phys. Rev. 32:492; Langmuir 1913, Phys. Rev. 2:450). J = K V^1.5 / d^2.
CHILD_LANGMUIR_K_A_V15: float = (
    4.0
    * VACUUM_PERMITTIVITY_F_M
    / 9.0
    * math.sqrt(2.0 * ELEMENTARY_CHARGE_C / ELECTRON_MASS_KG)
)

#: Molar mass of tungsten [kg mol^-1]: standard atomic weight 183.84(1) (IUPAC CIAAW 2013).
TUNGSTEN_MOLAR_MASS_KG_MOL: float = 183.84e-3
#: Density of tungsten at 20 C [kg m^-3]: 19.25 g cm^-3 (CRC Handbook of Chemistry and Physics,
#: properties of the elements). Thermal expansion to 2700 K (about 1.5 % in length) is neglected.
TUNGSTEN_DENSITY_KG_M3: float = 19.25e3
#: Melting point of tungsten [K]: 3695 K (White & Minges 1997, Int. J. Thermophys. 18:1269,
#: upper end of their recommended range).
TUNGSTEN_MELTING_POINT_K: float = 3695.0
#: Reference ambient temperature [K] of the Jones (1926) radiated-power table (20 C = 293 K).
AMBIENT_K: float = 293.15
