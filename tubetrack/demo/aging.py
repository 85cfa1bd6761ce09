"""How a demo tube's filaments age: a thin adapter over :mod:`tubetrack.physics`.

The demo never models physics itself. With ``physics=True`` every number comes from the physics
package: the filament temperature needed for an exposure's (mA, kV) at the current
diameter ratio, the relative diameter-loss rate at that temperature (Hertz-Knudsen-Langmuir
evaporation), and the filament current the generator must drive. With ``physics=False`` a plain
empirical stand-in is used (documented below) so that the generator runs, fast, without the
physics package; it is for benchmarks and smoke tests only.

Integration of the wear
-----------------------
For one filament, the mean diameter ratio follows d(d/d0)/dt = -a r(T(mA, kV, d), d) while hot
(a = the demo's time-lapse factor ``wear_acceleration``); the wire burns through when its hot
spot, thinning h times faster than the mean, reaches the drawn threshold: h x mean loss >= thr.
The logged filament current follows the mean diameter. Temperature and rate depend on d only weakly (the wire loses a few per cent), so the
rate is written r_p(d) = r_p(1) g(d), with one tube-wide shape g(d) = sum_p w_p r_p(d)/r_p(1)
(weights w_p = the tube's share of hot-time-weighted wear per program). The ODE then separates:
G(loss) = integral_0^loss dx / g(1 - x) = sum over exposures of r_p(1) h (t_exp + t_prep),
so the loss after every exposure is an interpolation of a cumulative sum (numpy ``cumsum``),
exact up to the protocol-independence of g (their spread is well below 1 % over the demo range).
"""

from __future__ import annotations

import dataclasses
import functools
from dataclasses import dataclass
from typing import Any

import numpy as np

#: Diameter ratios at which rates and filament currents are tabulated (linear interpolation
#: between them; the filament current is smooth in d, interpolation error < 1e-4 relative).
D_GRID = np.array([1.0, 0.98, 0.96, 0.94, 0.92, 0.90, 0.88])

#: Points of the fine diameter-loss grid on which G(loss) is integrated and inverted.
FINE_POINTS = 241

#: Default end-of-life diameter loss when the physics package is absent [1].
FALLBACK_END_OF_LIFE = 0.0513


@dataclass(frozen=True)
class TubeFilament:
    """One filament of one demo tube: its spec (physics) and the demo's per-tube draws."""

    spec: Any  # tubetrack.physics.FilamentSpec, or a dict for the empirical stand-in
    sensor_gain: float  # logged / true filament current at the first calibration [1]
    hot_spot_factor: float  # local wear multiplier at the hottest point of the wire [1]
    threshold: float  # diameter loss at which this filament burns through [1]


_NAMES = (
    "default_filament_spec",
    "filament_temperature_for_tube_current_k",
    "filament_current_for_tube_current_a",
    "diameter_loss_rate_per_s",
    "END_OF_LIFE_DIAMETER_LOSS",
)


@functools.cache
def _ph(name: str) -> Any:
    """A physics-API name from :mod:`tubetrack.physics` (or its submodules while the package's
    ``__init__`` does not re-export it yet)."""
    import importlib

    for mod in ("tubetrack.physics", "tubetrack.physics.filament", "tubetrack.physics.wear"):
        try:
            m = importlib.import_module(mod)
        except ImportError:
            continue
        if hasattr(m, name):
            return getattr(m, name)
    raise ImportError(f"tubetrack.physics does not provide {name}")


def physics_available() -> bool:
    """True when :mod:`tubetrack.physics` provides the names the demo needs."""
    try:
        for n in _NAMES:
            _ph(n)
    except ImportError:
        return False
    return True


def end_of_life_diameter_loss() -> float:
    """The physics package's default end-of-life diameter loss (0.0513 = 10 % mass) [1]."""
    try:
        return float(_ph("END_OF_LIFE_DIAMETER_LOSS"))
    except ImportError:
        return FALLBACK_END_OF_LIFE


def draw_spec(
    focal_spot: str, rng: np.random.Generator, physics: bool, hot_spot_factor: float = 1.0
) -> Any:
    """A per-tube filament spec: the physics default with a few per cent random variation.

    ``hot_spot_factor`` (>= 1) is stored in the spec: the wire's weakest point thins that many
    times faster than the mean, so it burns through when ``hot_spot_factor x mean loss`` reaches
    the threshold (the physics package's convention, :mod:`tubetrack.physics.wear`).
    """
    if not physics:
        base = 4.6 if focal_spot == "small" else 7.4
        return {
            "base_a": base * rng.normal(1.0, 0.03),
            "focal_spot": focal_spot,
            "hot_spot_factor": hot_spot_factor,
        }
    spec = _ph("default_filament_spec")(focal_spot)
    names = {f.name for f in dataclasses.fields(spec)}
    changes: dict[str, float] = {}
    for name, sd in (
        ("diameter_m", 0.015),
        ("length_m", 0.02),
        ("emitting_area_fraction", 0.05),
        ("perveance_a_v15", 0.05),
        ("end_loss_fraction", 0.10),
    ):
        if name in names and getattr(spec, name) is not None:
            changes[name] = float(getattr(spec, name)) * float(rng.normal(1.0, sd))
    if "hot_spot_factor" in names:
        changes["hot_spot_factor"] = max(1.0, float(hot_spot_factor))
    return dataclasses.replace(spec, **changes)


def spec_hot_spot_factor(spec: Any) -> float:
    """The hot-spot factor the physics spec itself carries (1.0 when absent)."""
    if isinstance(spec, dict):
        return float(spec.get("hot_spot_factor", 1.0))
    return float(getattr(spec, "hot_spot_factor", 1.0) or 1.0)


def temperature_k(spec: Any, ma: np.ndarray, kv: np.ndarray, d: np.ndarray) -> np.ndarray:
    """Filament temperature needed for tube current ``ma`` [mA] at ``kv`` [kV], ratio ``d`` [K]."""
    if isinstance(spec, dict):
        return 2500.0 + 220.0 * np.log10(np.maximum(ma, 1.0) / 100.0) + 0.0 * kv - 0.0 * d
    return np.asarray(_ph("filament_temperature_for_tube_current_k")(spec, ma, kv, d), dtype=float)


def loss_rate_per_s(spec: Any, temp_k: np.ndarray, d: np.ndarray) -> np.ndarray:
    """Relative diameter-loss rate of the wire at ``temp_k`` [1/s] (without the demo's factors)."""
    if isinstance(spec, dict):
        # empirical stand-in: 1e-7 / s at 2700 K, doubling every 60 K, faster as the wire thins
        return 1e-7 * 2.0 ** ((temp_k - 2700.0) / 60.0) / np.maximum(d, 0.5)
    return np.asarray(_ph("diameter_loss_rate_per_s")(spec, temp_k, d), dtype=float)


def filament_current_a(spec: Any, ma: np.ndarray, kv: np.ndarray, d: np.ndarray) -> np.ndarray:
    """True filament current needed for ``ma`` at ``kv`` and diameter ratio ``d`` [A]."""
    if isinstance(spec, dict):
        return (
            spec["base_a"]
            * (np.maximum(ma, 1.0) / 250.0) ** 0.12
            * (kv / 80.0) ** -0.08
            * np.asarray(d, dtype=float) ** 1.5
        )
    return np.asarray(_ph("filament_current_for_tube_current_a")(spec, ma, kv, d), dtype=float)


@dataclass(frozen=True)
class WearTable:
    """Tabulated wear of one filament over a system's programs (see the module notes)."""

    rate0_per_s: np.ndarray  # r_p(1) per program (0 for programs of the other focal spot) [1/s]
    loss_grid: np.ndarray  # diameter loss grid [1]
    g_inv_cum: np.ndarray  # G(loss) on loss_grid [1] (same unit as sum of r_p(1) * time)
    current_a: np.ndarray  # true filament current per program x D_GRID [A]
    temperature_k: np.ndarray  # filament temperature per program at d = 1 [K]


def wear_table(
    spec: Any,
    prog_ma: np.ndarray,
    prog_kv: np.ndarray,
    prog_mask: np.ndarray,
    prog_weight: np.ndarray,
) -> WearTable:
    """Rates and currents of one filament over the programs of its focal spot.

    Parameters
    ----------
    spec
        Filament spec from :func:`draw_spec`.
    prog_ma, prog_kv
        Program tube current [mA] and tube voltage [kV], all programs of the system.
    prog_mask
        True for programs that use this filament's focal spot.
    prog_weight
        Hot time per program (any scale) used to weight the shape g(d) [s].
    """
    ma = np.repeat(prog_ma[:, None], len(D_GRID), axis=1)
    kv = np.repeat(prog_kv[:, None], len(D_GRID), axis=1)
    dd = np.broadcast_to(D_GRID[None, :], ma.shape)
    temp = temperature_k(spec, ma.ravel(), kv.ravel(), dd.ravel()).reshape(ma.shape)
    rate = loss_rate_per_s(spec, temp.ravel(), dd.ravel()).reshape(ma.shape)
    cur = filament_current_a(spec, ma.ravel(), kv.ravel(), dd.ravel()).reshape(ma.shape)
    rate = np.where(np.isfinite(rate), rate, 0.0)
    rate0 = np.where(prog_mask, rate[:, 0], 0.0)
    w = np.where(prog_mask, prog_weight * rate0, 0.0)
    if w.sum() > 0:
        with np.errstate(divide="ignore", invalid="ignore"):
            shape = np.where(rate0[:, None] > 0, rate / rate0[:, None], 1.0)
        g = (w[:, None] * shape).sum(axis=0) / w.sum()
    else:
        g = np.ones(len(D_GRID))
    # G(loss) = integral dx / g: g is interpolated (log-linear) from the coarse grid onto a fine
    # one and integrated by the trapezoid rule there, so the inverse is accurate near 0 too
    loss = np.linspace(0.0, 1.0 - D_GRID[-1], FINE_POINTS)
    log_g = np.interp(loss, 1.0 - D_GRID, np.log(np.maximum(g, 1e-9)))
    inv = np.exp(-log_g)
    g_cum = np.concatenate([[0.0], np.cumsum(0.5 * (inv[1:] + inv[:-1]) * np.diff(loss))])
    return WearTable(
        rate0_per_s=rate0,
        loss_grid=loss,
        g_inv_cum=g_cum,
        current_a=cur,
        temperature_k=temp[:, 0],
    )


def loss_from_cum(table: WearTable, g_value: np.ndarray) -> np.ndarray:
    """Diameter loss for accumulated G (inverse of G, linear past the grid's end) [1]."""
    x, y = table.g_inv_cum, table.loss_grid
    out = np.interp(g_value, x, y)
    slope = (y[-1] - y[-2]) / (x[-1] - x[-2])
    return np.where(g_value > x[-1], y[-1] + (g_value - x[-1]) * slope, out)


def cum_from_loss(table: WearTable, loss: float) -> float:
    """G for a given diameter loss (inverse of :func:`loss_from_cum`) [1]."""
    x, y = table.g_inv_cum, table.loss_grid
    if loss > y[-1]:
        slope = (x[-1] - x[-2]) / (y[-1] - y[-2])
        return float(x[-1] + (loss - y[-1]) * slope)
    return float(np.interp(loss, y, x))


def current_at(table: WearTable, program: np.ndarray, d: np.ndarray) -> np.ndarray:
    """True filament current per exposure by program index and diameter ratio [A].

    Linear interpolation between the tabulated diameter ratios :data:`D_GRID` (descending).
    """
    pos = (1.0 - np.asarray(d, dtype=float)) / (D_GRID[0] - D_GRID[1])
    pos = np.clip(pos, 0.0, len(D_GRID) - 1.000001)
    lo = np.floor(pos).astype(np.int64)
    frac = pos - lo
    c = table.current_a
    return c[program, lo] * (1.0 - frac) + c[program, lo + 1] * frac
