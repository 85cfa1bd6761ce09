"""Tungsten-filament physics: pure vectorised numpy functions with units, no I/O.

Modules by responsibility:

- :mod:`~tubetrack.physics.tungsten`: tungsten properties vs temperature (Jones 1926; White &
  Minges 1997; Alcock-Itkin-Horrigan 1984; Yaws; Hertz-Knudsen-Langmuir evaporation).
- :mod:`~tubetrack.physics.emission`: Richardson-Dushman, Schottky lowering, Child-Langmuir,
  the temperature-limited / space-charge-limited blend.
- :mod:`~tubetrack.physics.thermal`: heat balance of the wire (temperature <-> current, voltage).
- :mod:`~tubetrack.physics.filament`: :class:`FilamentSpec` and the forward model
  (tube current, kV, d/d0 -> temperature, filament current and voltage).
- :mod:`~tubetrack.physics.circuit`: transformer, series resistance, mains sensitivity.
- :mod:`~tubetrack.physics.wear`: evaporation thinning, workload integration, end of life.
- :mod:`~tubetrack.physics.inversion`: filament-current ratio -> d/d0 with uncertainty; per-tube
  baseline fit; kV (space-charge) compensation.

Every function accepts scalars or arrays (broadcast), returns NaN for NaN input, and is
documented with units in brackets and its published source. See docs/physics.md.
"""

from tubetrack.constants import TUNGSTEN_DENSITY_KG_M3, TUNGSTEN_MOLAR_MASS_KG_MOL
from tubetrack.physics.circuit import (
    filament_circuit_operating_point,
    mains_sensitivity,
    primary_voltage_after_series_drop_v,
    series_resistance_for_filament_voltage_ohm,
    series_resistance_for_tube_current_ohm,
    transformer_primary_current_a,
    transformer_secondary_voltage_v,
)
from tubetrack.physics.emission import (
    blended_tube_current_a,
    child_langmuir_current_a,
    child_langmuir_perveance_a_v15,
    richardson_dushman_current_density_a_m2,
    richardson_dushman_temperature_k,
    saturation_current_for_tube_current_a,
    schottky_lowering_ev,
)
from tubetrack.physics.filament import (
    FilamentSpec,
    default_filament_spec,
    filament_current_for_tube_current_a,
    filament_operating_point,
    filament_temperature_for_tube_current_k,
    saturation_current_at_temperature_a,
    tube_current_at_temperature_ma,
    tube_current_for_filament_current_ma,
)
from tubetrack.physics.inversion import (
    current_ratio_for_diameter_ratio,
    diameter_ratio_from_current_ratio,
    diameter_ratio_from_resistance_ratio,
    fit_baseline,
    fit_baseline_groups,
    inversion_exponent,
    invert_current_ratio,
    kv_compensation_ratio,
    spec_for_rows,
)
from tubetrack.physics.thermal import (
    filament_current_at_temperature_a,
    filament_resistance_ohm,
    filament_temperature_for_current_k,
    filament_temperature_for_voltage_k,
    filament_voltage_at_temperature_v,
)
from tubetrack.physics.tungsten import (
    tungsten_evaporation_flux_kg_m2_s,
    tungsten_radiated_power_w_m2,
    tungsten_resistivity_ohm_m,
    tungsten_resistivity_white_minges_ohm_m,
    tungsten_total_emissivity,
    tungsten_vapour_pressure_pa,
    tungsten_vapour_pressure_yaws_pa,
)
from tubetrack.physics.wear import (
    END_OF_LIFE_DIAMETER_LOSS,
    END_OF_LIFE_MASS_LOSS,
    diameter_loss_from_mass_loss,
    diameter_loss_rate_per_s,
    end_of_life_reached,
    exposure_diameter_loss,
    hot_time_to_end_of_life_s,
    integrate_wear,
    mass_loss_from_diameter_loss,
    simulate_filament_history,
    thinning_rate_m_s,
)

__all__ = [
    "TUNGSTEN_DENSITY_KG_M3",
    "TUNGSTEN_MOLAR_MASS_KG_MOL",
    "END_OF_LIFE_DIAMETER_LOSS",
    "END_OF_LIFE_MASS_LOSS",
    "FilamentSpec",
    "blended_tube_current_a",
    "child_langmuir_current_a",
    "child_langmuir_perveance_a_v15",
    "current_ratio_for_diameter_ratio",
    "default_filament_spec",
    "diameter_loss_from_mass_loss",
    "diameter_loss_rate_per_s",
    "diameter_ratio_from_current_ratio",
    "diameter_ratio_from_resistance_ratio",
    "end_of_life_reached",
    "exposure_diameter_loss",
    "filament_circuit_operating_point",
    "filament_current_at_temperature_a",
    "filament_current_for_tube_current_a",
    "filament_operating_point",
    "filament_resistance_ohm",
    "filament_temperature_for_current_k",
    "filament_temperature_for_tube_current_k",
    "filament_temperature_for_voltage_k",
    "filament_voltage_at_temperature_v",
    "fit_baseline",
    "fit_baseline_groups",
    "hot_time_to_end_of_life_s",
    "integrate_wear",
    "inversion_exponent",
    "invert_current_ratio",
    "kv_compensation_ratio",
    "mains_sensitivity",
    "mass_loss_from_diameter_loss",
    "primary_voltage_after_series_drop_v",
    "richardson_dushman_current_density_a_m2",
    "richardson_dushman_temperature_k",
    "saturation_current_at_temperature_a",
    "saturation_current_for_tube_current_a",
    "schottky_lowering_ev",
    "series_resistance_for_filament_voltage_ohm",
    "series_resistance_for_tube_current_ohm",
    "simulate_filament_history",
    "spec_for_rows",
    "thinning_rate_m_s",
    "transformer_primary_current_a",
    "transformer_secondary_voltage_v",
    "tube_current_at_temperature_ma",
    "tube_current_for_filament_current_ma",
    "tungsten_evaporation_flux_kg_m2_s",
    "tungsten_radiated_power_w_m2",
    "tungsten_resistivity_ohm_m",
    "tungsten_resistivity_white_minges_ohm_m",
    "tungsten_total_emissivity",
    "tungsten_vapour_pressure_pa",
    "tungsten_vapour_pressure_yaws_pa",
]
