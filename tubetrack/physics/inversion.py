"""Inversion: logged filament current relative to a tube's own baseline -> wire diameter d/d0.

Why a ratio works
-----------------
A regulated generator adjusts the filament current until the tube delivers the station's mA. At a
fixed (focal spot, mA station, kV) the needed saturation current I_sat is fixed by the emission
blend and the (unchanged) cathode perveance, whatever the wire's age. For a wire thinned to
r = d/d0:

* the emitting area shrinks as r^a (a = 1 when it is the wire surface), so the filament must run
  hotter: J(T) = J(T0) / r^a (Richardson-Dushman);
* the heat balance gives I_f ~ d^1.5 sqrt(W(T)/rho(T)) (Jones 1926; Jones & Langmuir 1927).

Hence q = I_f / I_f0 = r^1.5 sqrt(g(T)/g(T0)), g = W/rho, T from J(T) = J(T0) r^-a.
Near 2600 K this is q ~ r^n with n ~ 1.42 (a = 1) or n = 1.5 (a = 0). Sensor gain, wire length,
end losses and radiating fraction cancel in the ratio; only the baseline temperature T0 matters,
and weakly. T0 comes from a per-tube fit of the baseline (:func:`fit_baseline`), so absolute
geometry is not needed.

Uncertainty
-----------
* measurement: se(r) = r se(q) / (q n), from the current-ratio standard error;
* model: the full spread of r between the two emitting-area assumptions (a = 1 and a = 0: the
  truth may be either, so one standard error spans the gap) and, added in quadrature, half the
  spread when the baseline emitting area (thus T0) is scaled by 2 and 1/2. Reported separately
  and combined in quadrature. The exponent's model error is likewise |n(a=1) - n(a=0)|.

What is estimated is d/d0 relative to the wire during the baseline period: wear during the
baseline itself is not visible in a ratio (keep the baseline short and early).
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import ArrayLike

from tubetrack.constants import BOLTZMANN_EV_K
from tubetrack.errors import AnalysisError, InputError
from tubetrack.physics.emission import richardson_dushman_temperature_k
from tubetrack.physics.filament import (
    FilamentSpec,
    filament_current_for_tube_current_a,
    filament_temperature_for_tube_current_k,
)
from tubetrack.physics.tungsten import _asarray, _out

__all__ = [
    "current_ratio_for_diameter_ratio",
    "inversion_exponent",
    "diameter_ratio_from_current_ratio",
    "diameter_ratio_from_resistance_ratio",
    "invert_current_ratio",
    "fit_baseline",
    "fit_baseline_groups",
    "spec_for_rows",
    "kv_compensation_ratio",
]

_H = 1e-4  # relative step for numerical derivatives in ln r
_DT_K = 10.0  # temperature step for the local quadratic of ln sqrt(W/rho) [K]


def current_ratio_for_diameter_ratio(
    spec: FilamentSpec,
    diameter_ratio: ArrayLike,
    tube_current_ma: ArrayLike,
    tube_voltage_kv: ArrayLike,
) -> Any:
    """Forward model of the inversion: I_f(r) / I_f(1) at fixed tube current and kV [1]."""
    f1 = _asarray(
        filament_current_for_tube_current_a(spec, tube_current_ma, tube_voltage_kv, 1.0)
    )
    fr = _asarray(
        filament_current_for_tube_current_a(
            spec, tube_current_ma, tube_voltage_kv, diameter_ratio
        )
    )
    return _out(fr / f1)


def inversion_exponent(
    spec: FilamentSpec,
    tube_current_ma: ArrayLike,
    tube_voltage_kv: ArrayLike,
    diameter_ratio: ArrayLike = 1.0,
) -> Any:
    """Local exponent n = d ln I_f / d ln(d/d0) at fixed tube current and kV [1] (about 1.42)."""
    r = _asarray(diameter_ratio)
    up = _asarray(
        filament_current_for_tube_current_a(
            spec, tube_current_ma, tube_voltage_kv, r * np.exp(_H)
        )
    )
    dn = _asarray(
        filament_current_for_tube_current_a(
            spec, tube_current_ma, tube_voltage_kv, r * np.exp(-_H)
        )
    )
    return _out(np.log(up / dn) / (2 * _H))


def _h_current(t_k: Any) -> Any:
    """sqrt(W/rho) of the heat balance at T (thermal eq. 1 without geometry)."""
    from tubetrack.physics import thermal

    return np.interp(t_k, thermal._TG, thermal._H_I, left=np.nan, right=np.nan)


def _h_voltage(t_k: Any) -> Any:
    """sqrt(W rho) at T (thermal eq. 2 without geometry)."""
    from tubetrack.physics import thermal

    return np.interp(t_k, thermal._TG, thermal._H_V, left=np.nan, right=np.nan)


def _h_resistance(t_k: Any) -> Any:
    """rho(T): the hot resistance without geometry."""
    from tubetrack.physics import thermal

    return np.interp(t_k, thermal._TG, thermal._RHO, left=np.nan, right=np.nan)


#: Logged signal -> (power of r from the geometry, temperature factor h(T)). At a fixed station:
#: I_f ~ r^1.5 sqrt(W/rho), V_f ~ r^-0.5 sqrt(W rho), R_hot = V_f / I_f ~ r^-2 rho (thermal.py).
_SIGNALS = {
    "current": (1.5, _h_current),
    "voltage": (-0.5, _h_voltage),
    "resistance": (-2.0, _h_resistance),
}


def _fallback_temperature(spec: FilamentSpec, t0: Any, ma: Any, kv: Any) -> Any:
    """Baseline temperature where the spec cannot deliver the station (above P V^1.5).

    The ratio inversion needs T0 only weakly (n changes by < 0.01 per 100 K), so a station the
    nominal spec cannot deliver (the real tube's perveance is higher) is given the temperature at
    which the saturation current equals 1.5 x the tube current (mid-transition), with a warning.
    """
    spec_ok = np.isfinite(
        np.asarray(spec.perveance_a_v15)
        * np.asarray(spec.emitting_area_fraction)
        * np.asarray(spec.current_scale)
    )
    bad = (
        ~np.isfinite(t0)
        & np.isfinite(ma)
        & np.isfinite(kv)
        & (ma > 0)
        & (kv > 0)
        & spec_ok
    )
    if not np.any(bad):
        return t0
    import warnings

    from tubetrack.errors import TubetrackWarning

    warnings.warn(
        f"{int(np.sum(bad))} (mA, kV) point(s) lie above the filament spec's space-charge limit "
        "P V^1.5; their baseline temperature is assumed at mid-transition. Fit the tube's "
        "perveance with fit_baseline / fit_baseline_groups to avoid this.",
        TubetrackWarning,
        stacklevel=3,
    )
    area = spec.emitting_area_m2
    j = 1.5 * np.asarray(ma, dtype=float) * 1e-3 / area
    t_fb = _asarray(
        richardson_dushman_temperature_k(
            j, spec.work_function_ev, spec.richardson_a_m2_k2
        )
    )
    return np.where(bad, t_fb, t0)


def _baseline_temperature(spec: FilamentSpec, ma: Any, kv: Any) -> Any:
    """T0 of every (mA, kV) point, with the fallback of :func:`_fallback_temperature`.

    With a scalar spec the temperature depends on the (mA, kV) pair only, and a tube's series
    repeats a few stations at one reference kV: the forward model runs once per distinct pair
    and is broadcast back (the same element-wise computation, far fewer elements).
    """
    ma_a, kv_a = np.asarray(ma, dtype=float), np.asarray(kv, dtype=float)
    scalar = all(np.ndim(getattr(spec, f)) == 0 for f in _SPEC_ARRAY_FIELDS)
    if (scalar and ma_a.ndim == 1 and ma_a.shape == kv_a.shape and ma_a.size > 16
            and np.isfinite(kv_a[0]) and np.all(kv_a == kv_a[0])):
        # one kV (the health step inverts at the reference kV): distinct stations only
        um, inv = np.unique(ma_a, return_inverse=True)
        if um.size < ma_a.size // 4:
            uk = np.full(um.size, kv_a[0])
            t0 = _asarray(filament_temperature_for_tube_current_k(spec, um, uk, 1.0))
            return np.asarray(_fallback_temperature(spec, t0, um, uk))[inv.ravel()]
    t0 = _asarray(filament_temperature_for_tube_current_k(spec, ma, kv, 1.0))
    return _fallback_temperature(spec, t0, ma, kv)


def _solve_ratio(
    spec: FilamentSpec, q: Any, ma: Any, kv: Any, signal: str = "current"
) -> tuple[Any, Any]:
    """Solve q = S(r)/S(1) for r (vectorised, fast path of the full forward model).

    With the baseline temperature T0 (full forward model, once), q(r) = r^k h(T_r) / h(T0)
    where J(T_r) = J(T0) r^-a; for the filament current k = 1.5 and h = sqrt(W/rho) (geometry,
    end losses and sensor gain cancel), see :data:`_SIGNALS` for voltage and resistance.
    Fixed-slope Newton in ln r (slope from a central difference at r = 1), then an exact polish.
    """
    power, h_of = _SIGNALS[signal]
    t0 = _baseline_temperature(spec, ma, kv)
    a = spec.emitting_area_diameter_exponent
    b = spec.work_function_ev / BOLTZMANN_EV_K
    # ln h(T) near T0 as a quadratic from three grid lookups (h is smooth; |T - T0| < 50 K for
    # r > 0.7, where the quadratic's error in ln q is < 1e-6).
    with np.errstate(divide="ignore", invalid="ignore"):
        lh0, lhp, lhm = (np.log(h_of(t0 + dt)) for dt in (0.0, _DT_K, -_DT_K))
    s1 = (lhp - lhm) / (2 * _DT_K)
    s2 = (lhp - 2 * lh0 + lhm) / _DT_K**2
    c0 = 2.0 * np.log(t0) - b / t0

    def temperature(ln_r: Any) -> Any:
        # T_r from 2 ln T - b/T = 2 ln T0 - b/T0 - a ln r (Richardson-Dushman ratio), Newton
        # from T0: two steps reach < 1e-3 K for |T - T0| < 50 K.
        c = c0 - a * ln_r
        t = t0
        for _ in range(2):
            t = t - (2.0 * np.log(t) - b / t - c) / (2.0 / t + b / t**2)
        return t

    def ln_q_fast(ln_r: Any) -> Any:
        dt = temperature(ln_r) - t0
        return power * ln_r + dt * (s1 + 0.5 * s2 * dt)

    def ln_q_exact(ln_r: Any) -> Any:
        return power * ln_r + np.log(h_of(temperature(ln_r))) - lh0

    with np.errstate(divide="ignore", invalid="ignore"):
        n0 = (ln_q_fast(np.full_like(t0, _H)) - ln_q_fast(np.full_like(t0, -_H))) / (
            2 * _H
        )
        ln_q = np.log(np.where(q > 0, q, np.nan))
        ln_r = ln_q / n0
        for _ in range(4):
            ln_r = ln_r - (ln_q_fast(ln_r) - ln_q) / n0
        for _ in range(2):  # polish on the exact grid
            ln_r = ln_r - (ln_q_exact(ln_r) - ln_q) / n0
        r = np.exp(ln_r)
        n_eff = np.where(np.abs(ln_r) > 1e-9, ln_q / ln_r, n0)
    return r, n_eff


_SPEC_ARRAY_FIELDS = (
    "diameter_m",
    "length_m",
    "emitting_area_fraction",
    "radiating_area_fraction",
    "end_loss_fraction",
    "perveance_a_v15",
    "blend_sharpness",
    "work_function_ev",
    "richardson_a_m2_k2",
    "emitting_area_diameter_exponent",
    "hot_spot_factor",
    "turns_ratio",
    "current_scale",
)


def _result_shape(spec: FilamentSpec, *args: Any) -> tuple[int, ...]:
    shapes = [np.shape(a) for a in args if a is not None]
    shapes += [np.shape(getattr(spec, f)) for f in _SPEC_ARRAY_FIELDS]
    return tuple(np.broadcast_shapes(*shapes))


def _ravel_spec(spec: FilamentSpec, shape: tuple[int, ...]) -> FilamentSpec:
    """Spec with array fields broadcast to ``shape`` and flattened (scalars stay scalars)."""
    changes = {
        f: np.broadcast_to(np.asarray(getattr(spec, f), dtype=float), shape).ravel()
        for f in _SPEC_ARRAY_FIELDS
        if np.ndim(getattr(spec, f)) > 0
    }
    return spec.replace(**changes) if changes else spec


def invert_current_ratio(
    current_ratio: ArrayLike,
    spec: FilamentSpec,
    tube_current_ma: ArrayLike,
    tube_voltage_kv: ArrayLike,
    current_ratio_se: ArrayLike | None = None,
    *,
    signal: str = "current",
) -> Any:
    """Diameter ratio from filament-current ratios, with the full uncertainty breakdown.

    Parameters
    ----------
    current_ratio : array_like
        Logged filament current / the tube's baseline current at the same focal spot, mA station
        and kV (or kV-compensated with :func:`kv_compensation_ratio`) [1].
    spec : FilamentSpec
        The tube's filament, ideally from :func:`fit_baseline` on its baseline.
    tube_current_ma, tube_voltage_kv : array_like
        The station [mA] and kV [kV] the ratio refers to.
    current_ratio_se : array_like, optional
        Standard error of the ratio [1]; None means 0 (model uncertainty only).
    signal : {"current", "resistance", "voltage"}, default "current"
        Which logged quantity the ratio is of: filament current (q ~ r^1.42), hot resistance
        V_f/I_f (q ~ r^-2.06, needs the filament voltage; gains of both sensors cancel) or
        filament voltage (q ~ r^-0.63).

    Returns
    -------
    pandas.DataFrame
        diameter_ratio, diameter_ratio_se (total), diameter_ratio_se_measurement,
        diameter_ratio_se_model, exponent (effective n in q = r^n), exponent_se (model),
        diameter_loss_pct, diameter_loss_pct_se.
    """
    import pandas as pd

    return pd.DataFrame(
        _invert_arrays(current_ratio, spec, tube_current_ma, tube_voltage_kv, current_ratio_se, signal)
    )


def _invert_arrays(
    current_ratio: ArrayLike,
    spec: FilamentSpec,
    tube_current_ma: ArrayLike,
    tube_voltage_kv: ArrayLike,
    current_ratio_se: ArrayLike | None,
    signal: str,
) -> dict[str, np.ndarray]:
    """The columns of :func:`invert_current_ratio` as flat arrays (no DataFrame)."""
    shape = _result_shape(
        spec, current_ratio, tube_current_ma, tube_voltage_kv, current_ratio_se
    )
    q, ma, kv = (
        np.broadcast_to(_asarray(x), shape).ravel()
        for x in (current_ratio, tube_current_ma, tube_voltage_kv)
    )
    se_q = (
        np.zeros_like(q)
        if current_ratio_se is None
        else np.broadcast_to(_asarray(current_ratio_se), shape).ravel()
    )
    if signal not in _SIGNALS:
        raise InputError(
            f"signal is {signal!r}; expected one of {sorted(_SIGNALS)} (the logged quantity "
            "the ratio is of)."
        )
    spec = _ravel_spec(spec, shape)
    r, n = _solve_ratio(spec, q, ma, kv, signal)
    alt_a = np.where(np.asarray(spec.emitting_area_diameter_exponent) != 0, 0.0, 1.0)
    r_a, n_a = _solve_ratio(
        spec.replace(emitting_area_diameter_exponent=alt_a), q, ma, kv, signal
    )
    hi_f = np.minimum(1.0, np.asarray(spec.emitting_area_fraction) * 2.0)
    r_hi, _ = _solve_ratio(spec.replace(emitting_area_fraction=hi_f), q, ma, kv, signal)
    r_lo, _ = _solve_ratio(
        spec.replace(emitting_area_fraction=spec.emitting_area_fraction / 2.0),
        q,
        ma,
        kv,
        signal,
    )
    # Model error: the full spread between the emitting-area assumptions (a = 1 vs a = 0: either
    # may hold, so one standard error spans the whole gap) and half the spread for T0 (area x2, /2).
    se_model = np.sqrt(
        (r - r_a) ** 2 + (0.5 * np.maximum(np.abs(r - r_hi), np.abs(r - r_lo))) ** 2
    )
    with np.errstate(divide="ignore", invalid="ignore"):
        se_meas = r * se_q / (q * np.abs(n))
    se = np.sqrt(se_meas**2 + se_model**2)
    return (
        {
            "diameter_ratio": r,
            "diameter_ratio_se": se,
            "diameter_ratio_se_measurement": se_meas,
            "diameter_ratio_se_model": se_model,
            "exponent": n,
            "exponent_se": np.abs(n - n_a),
            "diameter_loss_pct": 100.0 * (1.0 - r),
            "diameter_loss_pct_se": 100.0 * se,
        }
    )


def diameter_ratio_from_current_ratio(
    current_ratio: ArrayLike,
    spec: FilamentSpec,
    tube_current_ma: ArrayLike,
    tube_voltage_kv: ArrayLike,
    current_ratio_se: ArrayLike | None = None,
) -> tuple[Any, Any]:
    """Estimate d/d0 from the filament-current ratio I_f / I_f,baseline at fixed station and kV.

    Parameters
    ----------
    current_ratio : array_like
        Filament current relative to the tube's own baseline at the same focal spot, station and
        kV [1]. Sensor gain cancels.
    spec : FilamentSpec
        The filament (from :func:`fit_baseline` for this tube, or a default).
    tube_current_ma : array_like
        mA station [mA].
    tube_voltage_kv : array_like
        Tube voltage [kV].
    current_ratio_se : array_like, optional
        Standard error of the ratio [1].

    Returns
    -------
    (diameter_ratio, diameter_ratio_se) : tuple of numpy arrays (0-d for scalar input)
        d/d0 [1] and its standard error [1] (measurement and model combined in quadrature; see
        :func:`invert_current_ratio` for the parts). Approximately q^(1/1.42).
    """
    return _diameter_ratio_arrays(
        current_ratio, spec, tube_current_ma, tube_voltage_kv, current_ratio_se, "current"
    )


def diameter_ratio_from_resistance_ratio(
    resistance_ratio: ArrayLike,
    spec: FilamentSpec,
    tube_current_ma: ArrayLike,
    tube_voltage_kv: ArrayLike,
    resistance_ratio_se: ArrayLike | None = None,
) -> tuple[Any, Any]:
    """Estimate d/d0 from the hot-resistance ratio (V_f/I_f) / baseline at fixed station and kV.

    A second, independent reading of the same wire when the log carries the filament voltage:
    R_hot ~ rho(T) / d^2, so q = r^-2 rho(T_r)/rho(T0) ~ r^-2.06 (+11 % at 10 % mass loss).
    Returns (diameter_ratio, diameter_ratio_se) like :func:`diameter_ratio_from_current_ratio`.
    """
    return _diameter_ratio_arrays(
        resistance_ratio,
        spec,
        tube_current_ma,
        tube_voltage_kv,
        resistance_ratio_se,
        "resistance",
    )


def _diameter_ratio_arrays(
    ratio: ArrayLike,
    spec: FilamentSpec,
    tube_current_ma: ArrayLike,
    tube_voltage_kv: ArrayLike,
    ratio_se: ArrayLike | None,
    signal: str,
) -> tuple[Any, Any]:
    """:func:`invert_current_ratio` reshaped to the broadcast input shape (0-d -> scalars)."""
    if signal not in _SIGNALS:
        raise InputError(
            f"signal is {signal!r}; expected one of {sorted(_SIGNALS)} (the logged quantity "
            "the ratio is of)."
        )
    cols = _invert_arrays(ratio, spec, tube_current_ma, tube_voltage_kv, ratio_se, signal)
    shape = _result_shape(spec, ratio, tube_current_ma, tube_voltage_kv, ratio_se)
    r = np.asarray(cols["diameter_ratio"], dtype=float).reshape(shape)
    se = np.asarray(cols["diameter_ratio_se"], dtype=float).reshape(shape)
    if r.ndim == 0:
        return r[()], se[()]
    return r, se


def kv_compensation_ratio(
    spec: FilamentSpec,
    tube_current_ma: ArrayLike,
    tube_voltage_kv: ArrayLike,
    reference_kv: ArrayLike,
) -> Any:
    """Space-charge compensation: I_f(mA, kV) / I_f(mA, reference kV) for the same wire [1].

    Divide a logged filament current by this to express it at the reference kV (the generator
    heats less at high kV for the same mA because the space-charge limit rises).
    """
    at_kv = _asarray(
        filament_current_for_tube_current_a(spec, tube_current_ma, tube_voltage_kv)
    )
    at_ref = _asarray(
        filament_current_for_tube_current_a(spec, tube_current_ma, reference_kv)
    )
    return _out(at_kv / at_ref)


def fit_baseline(
    spec: FilamentSpec,
    tube_current_ma: ArrayLike,
    tube_voltage_kv: ArrayLike,
    filament_current_a: ArrayLike,
    *,
    fit_emitting_area: bool = True,
    log_current_sd: float = 0.01,
    area_prior_sd: float = 0.5,
    perveance_prior_sd: float = 2.0,
) -> FilamentSpec:
    """Fit a tube's filament to its baseline (kV, mA, filament current) triples.

    Fits, by least squares on ln(filament current): ``current_scale`` (sensor gain and geometry,
    free), ``perveance_a_v15`` (space charge, from the kV dependence; weak log-normal prior at the
    spec's value, sd ``perveance_prior_sd`` in ln) and, if ``fit_emitting_area``,
    ``emitting_area_fraction`` (sets the baseline temperature; prior sd ``area_prior_sd`` in ln,
    because current scale and emitting area are only weakly separable). The wire is taken as new
    (d/d0 = 1) during the baseline.

    Parameters
    ----------
    spec : FilamentSpec
        Starting values and priors (e.g. ``default_filament_spec(focal_spot)``).
    tube_current_ma, tube_voltage_kv, filament_current_a : array_like
        Baseline triples: station [mA], kV [kV], logged filament current [A] (mean per
        station/kV is fine). NaN rows are dropped.
    log_current_sd : float, default 0.01
        Noise of ln(filament current) per triple [1], weights data against priors.

    Returns
    -------
    FilamentSpec
        ``spec`` with the fitted fields replaced.

    Raises
    ------
    InputError
        Fewer than one usable triple.
    AnalysisError
        The optimiser fails (check units: mA, kV, A; a kV/mA combination the tube cannot deliver).
    """
    from scipy.optimize import least_squares

    ma, kv, i_f = (
        np.ravel(a)
        for a in np.broadcast_arrays(
            _asarray(tube_current_ma),
            _asarray(tube_voltage_kv),
            _asarray(filament_current_a),
        )
    )
    ok = (
        np.isfinite(ma)
        & np.isfinite(kv)
        & np.isfinite(i_f)
        & (ma > 0)
        & (kv > 0)
        & (i_f > 0)
    )
    ma, kv, i_f = ma[ok], kv[ok], i_f[ok]
    if ma.size < 1:
        raise InputError(
            "fit_baseline got no usable (mA, kV, filament current) triple. Give positive mA, kV "
            "and filament current in A (not mA) from the tube's first weeks."
        )
    # Lowest perveance that can deliver every baseline point (blend: I < P V^1.5).
    p_min = float(np.max(ma * 1e-3 / (kv * 1e3) ** 1.5)) * 1.0005
    ln_p0 = np.log(max(spec.perveance_a_v15, 1.5 * p_min))
    ln_f0 = np.log(spec.emitting_area_fraction)
    base = spec.replace(current_scale=1.0)
    model0 = _asarray(
        filament_current_for_tube_current_a(
            base.replace(perveance_a_v15=np.exp(ln_p0)), ma, kv
        )
    )
    ln_s0 = (
        float(np.nanmean(np.log(i_f) - np.log(model0)))
        if np.any(np.isfinite(model0))
        else 0.0
    )

    def unpack(theta: np.ndarray) -> FilamentSpec:
        ln_s, ln_p = theta[0], theta[1]
        f_e = np.exp(theta[2]) if fit_emitting_area else spec.emitting_area_fraction
        return spec.replace(
            current_scale=float(np.exp(ln_s)),
            perveance_a_v15=float(np.exp(ln_p)),
            emitting_area_fraction=float(min(f_e, 1.0)),
        )

    def residuals(theta: np.ndarray) -> np.ndarray:
        s = unpack(theta)
        model = _asarray(filament_current_for_tube_current_a(s, ma, kv))
        res = (np.log(i_f) - np.log(model)) / log_current_sd
        res = np.where(np.isfinite(res), res, 1e3)
        prior = [(theta[1] - np.log(spec.perveance_a_v15)) / perveance_prior_sd]
        if fit_emitting_area:
            prior.append((theta[2] - ln_f0) / area_prior_sd)
        return np.concatenate([res, prior])

    theta0 = [ln_s0, ln_p0] + ([ln_f0] if fit_emitting_area else [])
    lower = [-np.inf, np.log(p_min)] + ([np.log(1e-3)] if fit_emitting_area else [])
    upper = [np.inf, np.log(1e-4)] + ([0.0] if fit_emitting_area else [])
    theta0[1] = float(np.clip(theta0[1], lower[1] + 1e-9, upper[1] - 1e-9))
    if fit_emitting_area:
        theta0[2] = float(np.clip(theta0[2], lower[2] + 1e-9, upper[2] - 1e-9))
    try:
        sol = least_squares(
            residuals, np.array(theta0, dtype=float), bounds=(lower, upper), x_scale=1.0
        )
    except ValueError as exc:  # pragma: no cover - defensive
        raise AnalysisError(
            f"fit_baseline failed ({exc}). Check: filament current in A, tube current in mA, kV in "
            "kV; the baseline holds stations the tube can deliver at those kV."
        ) from None
    if not sol.success:
        raise AnalysisError(
            f"fit_baseline did not converge ({sol.message}). Check units (A, mA, kV) and that the "
            "baseline covers more than one kV if the perveance matters."
        )
    return unpack(sol.x)


def fit_baseline_groups(
    spec: FilamentSpec,
    group: ArrayLike,
    tube_current_ma: ArrayLike,
    tube_voltage_kv: ArrayLike,
    filament_current_a: ArrayLike,
    *,
    log_current_sd: float = 0.01,
    area_prior_sd: float = 0.5,
    perveance_prior_sd: float = 2.0,
    iterations: int = 40,
) -> Any:
    """:func:`fit_baseline` for many filaments at once (vectorised Levenberg-Marquardt).

    Same model, parameters and priors as :func:`fit_baseline` (current scale, perveance and
    emitting-area fraction per group), solved for all groups together: residuals and a
    finite-difference Jacobian over all rows, per-group 3 x 3 normal equations with the prior
    terms, a per-group damping that grows when a step does not lower that group's cost. For
    thousands of tubes this takes about as long as a few dozen single fits.

    Parameters
    ----------
    spec : FilamentSpec
        Starting values and priors (scalar fields), e.g. ``default_filament_spec(focal_spot)``.
    group : array_like
        Label per row (e.g. ``"tube_id|focal_spot"``); any hashable values.
    tube_current_ma, tube_voltage_kv, filament_current_a : array_like
        Baseline triples per row [mA], [kV], [A]. Rows with NaN or non-positive values are
        ignored.

    Returns
    -------
    pandas.DataFrame
        One row per group: group, n_points, current_scale, perveance_a_v15,
        emitting_area_fraction, rms_log_residual (RMS of ln(logged/model)), converged. Build a
        per-row spec with :func:`spec_for_rows`.
    """
    import pandas as pd

    g_all, ma, kv, i_f = (
        np.ravel(a)
        for a in np.broadcast_arrays(
            np.asarray(group, dtype=object),
            _asarray(tube_current_ma),
            _asarray(tube_voltage_kv),
            _asarray(filament_current_a),
        )
    )
    ma, kv, i_f = ma.astype(float), kv.astype(float), i_f.astype(float)
    ok = (
        np.isfinite(ma)
        & np.isfinite(kv)
        & np.isfinite(i_f)
        & (ma > 0)
        & (kv > 0)
        & (i_f > 0)
    )
    gidx, labels = pd.factorize(pd.Series(g_all[ok]), sort=True)
    ma, kv, i_f = ma[ok], kv[ok], i_f[ok]
    n_groups = labels.size
    if n_groups == 0:
        raise InputError(
            "fit_baseline_groups got no usable (mA, kV, filament current) row. Give positive "
            "mA, kV and filament current in A."
        )
    counts = np.bincount(gidx, minlength=n_groups)
    p_need = ma * 1e-3 / (kv * 1e3) ** 1.5
    p_min = np.zeros(n_groups)
    np.maximum.at(p_min, gidx, p_need)
    ln_p_lo = np.log(p_min * 1.0005)
    ln_p_prior = np.log(spec.perveance_a_v15)
    ln_f_prior = np.log(spec.emitting_area_fraction)

    theta = np.empty((n_groups, 3))
    theta[:, 1] = np.maximum(ln_p_prior, np.log(1.5 * p_min))
    theta[:, 2] = ln_f_prior
    base = spec.replace(current_scale=1.0)
    y = np.log(i_f)

    def model(th: np.ndarray) -> np.ndarray:
        rows = th[gidx]
        s = base.replace(
            current_scale=np.exp(rows[:, 0]),
            perveance_a_v15=np.exp(rows[:, 1]),
            emitting_area_fraction=np.exp(rows[:, 2]),
        )
        return np.log(_asarray(filament_current_for_tube_current_a(s, ma, kv)))

    theta[:, 0] = 0.0
    start = model(theta)
    sum_res = np.bincount(gidx, weights=np.nan_to_num(y - start), minlength=n_groups)
    theta[:, 0] = sum_res / np.maximum(counts, 1)

    def costs(th: np.ndarray, m: np.ndarray) -> np.ndarray:
        res = np.where(np.isfinite(m), (y - m) / log_current_sd, 1e3)
        c = np.bincount(gidx, weights=res**2, minlength=n_groups)
        c += ((th[:, 1] - ln_p_prior) / perveance_prior_sd) ** 2
        c += ((th[:, 2] - ln_f_prior) / area_prior_sd) ** 2
        return c

    def clip(th: np.ndarray) -> np.ndarray:
        th = th.copy()
        th[:, 1] = np.clip(th[:, 1], ln_p_lo, np.log(1e-4))
        th[:, 2] = np.clip(th[:, 2], np.log(1e-3), 0.0)
        return th

    theta = clip(theta)
    m_cur = model(theta)
    cost = costs(theta, m_cur)
    lam = np.full(n_groups, 1e-3)
    converged = np.zeros(n_groups, dtype=bool)
    h = 1e-4
    prior_w = np.array([0.0, 1.0 / perveance_prior_sd**2, 1.0 / area_prior_sd**2])
    prior_c = np.array([0.0, ln_p_prior, ln_f_prior])
    for _ in range(max(1, int(iterations))):
        res = np.where(np.isfinite(m_cur), (y - m_cur) / log_current_sd, 0.0)
        jac = np.empty((ma.size, 3))
        jac[:, 0] = 1.0 / log_current_sd  # d ln I / d ln scale = 1 exactly
        for k in (1, 2):
            th = theta.copy()
            th[:, k] += h
            jac[:, k] = np.nan_to_num((model(th) - m_cur) / h) / log_current_sd
        a_mat = np.zeros((n_groups, 3, 3))
        b_vec = np.zeros((n_groups, 3))
        for i in range(3):
            b_vec[:, i] = np.bincount(gidx, weights=jac[:, i] * res, minlength=n_groups)
            for j in range(i, 3):
                v = np.bincount(gidx, weights=jac[:, i] * jac[:, j], minlength=n_groups)
                a_mat[:, i, j] = v
                a_mat[:, j, i] = v
        a_mat[:, [0, 1, 2], [0, 1, 2]] += prior_w
        b_vec -= prior_w * (theta - prior_c)
        diag = a_mat[:, [0, 1, 2], [0, 1, 2]]
        damped = a_mat.copy()
        damped[:, [0, 1, 2], [0, 1, 2]] += lam[:, None] * diag
        step = np.linalg.solve(damped, b_vec[:, :, None])[:, :, 0]
        trial = clip(theta + step)
        m_trial = model(trial)
        c_trial = costs(trial, m_trial)
        better = c_trial < cost
        rel_gain = np.where(better, (cost - c_trial) / np.maximum(cost, 1e-12), 0.0)
        theta = np.where(better[:, None], trial, theta)
        better_rows = better[gidx]
        m_cur = np.where(better_rows, m_trial, m_cur)
        converged |= better & (rel_gain < 1e-10)
        converged |= ~better & (lam > 1e8)
        cost = np.where(better, c_trial, cost)
        lam = np.where(better, lam / 3.0, lam * 10.0)
        if np.all(converged | (np.abs(step).max(axis=1) < 1e-10)):
            converged[:] = True
            break
    resid = np.where(np.isfinite(m_cur), y - m_cur, np.nan)
    rms = np.sqrt(
        np.bincount(gidx, weights=np.nan_to_num(resid) ** 2, minlength=n_groups)
        / counts
    )
    return pd.DataFrame(
        {
            "group": np.asarray(labels),
            "n_points": counts,
            "current_scale": np.exp(theta[:, 0]),
            "perveance_a_v15": np.exp(theta[:, 1]),
            "emitting_area_fraction": np.exp(theta[:, 2]),
            "rms_log_residual": rms,
            "converged": converged,
        }
    )


def spec_for_rows(
    spec: FilamentSpec, fitted: Any, row_group: ArrayLike
) -> FilamentSpec:
    """A FilamentSpec whose fitted fields are arrays aligned with ``row_group``.

    Parameters
    ----------
    spec : FilamentSpec
        The base (nominal) spec the groups were fitted from.
    fitted : pandas.DataFrame
        Output of :func:`fit_baseline_groups`.
    row_group : array_like
        Group label of each row of the data to evaluate (NaN results for unknown groups).
    """
    import pandas as pd

    lookup = fitted.set_index("group")
    keys = pd.Index(np.ravel(np.asarray(row_group)))

    def col(name: str) -> np.ndarray:
        return (
            lookup[name]
            .reindex(keys)
            .to_numpy(dtype=float)
            .reshape(np.shape(row_group))
        )

    scale, perv, area = (
        col("current_scale"),
        col("perveance_a_v15"),
        col("emitting_area_fraction"),
    )
    # unknown groups get NaN fields, so every result on those rows is NaN
    spec_rows = spec.replace(
        current_scale=scale, perveance_a_v15=perv, emitting_area_fraction=area
    )
    return spec_rows
