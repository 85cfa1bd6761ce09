"""Station drift: daily filament current per mA station with the kV effect removed.

A generator with space-charge compensation lowers the filament current as kV rises, to hold the
tube current at the station. The size of that effect is tube-specific, so it is estimated per
tube and focal spot from a baseline window (the first ``baseline_days`` of data) by a pooled
within-station least-squares regression of ln(filament current) on kV::

    ln I = c_s + b (kV - kV_ref) + e          (one intercept c_s per station s, one slope b)

computed exactly from per-day sums aggregated in SQL (sum kV, sum kV^2, sum ln I, sum kV ln I),
so the exposures are never loaded into Python. Each day's robust level is then the median
filament current moved to the reference kV: ln I_norm = ln median(I) - b (median kV - kV_ref).
When the baseline holds too little kV spread to estimate ``b`` (within-station kV variance below
``min_kv_spread_kv2``), the slope of the physics model is used instead
(d ln I_f / d kV of :func:`tubetrack.physics.filament_current_for_tube_current_a` at the
station), or zero when that is unavailable.

Standard error of a daily median: 1.2533 sigma / sqrt(n) for normal data (asymptotic relative
efficiency of the median, 2/pi), with sigma the pooled robust scale IQR / 1.349 of the station.

References
----------
Kenney J.F., Keeping E.S., Mathematics of Statistics, part 2, 2nd ed., Van Nostrand 1951,
section 7.4 (standard error of the median, sqrt(pi/2) sigma / sqrt(n)).
Rousseeuw P.J., Croux C., J. Am. Stat. Assoc. 88 (1993) 1273 (IQR / 1.349 as robust sigma).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

#: sqrt(pi / 2): standard error of the median relative to that of the mean for normal data.
MEDIAN_SE_FACTOR = float(np.sqrt(np.pi / 2.0))
#: IQR of a standard normal distribution (2 x 0.6745).
NORMAL_IQR = 1.3489795


def as_datetime(values: pd.Series) -> pd.Series:
    """``pd.to_datetime(values)``, skipped when the column already is ``datetime64``.

    ``pd.to_datetime`` on a datetime column is a no-op that still iterates the values (its
    default cache check), which cost ~9 % of the per-tube time.
    """
    if isinstance(values, pd.Series) and values.dtype.kind == "M":
        return values
    return pd.to_datetime(values)


@dataclass(frozen=True)
class KvModel:
    """Per tube x focal spot kV model of ln(filament current), fitted on a baseline window.

    Attributes
    ----------
    slope_per_kv
        d ln(I_filament) / d kV [1/kV].
    kv_ref
        Reference tube voltage the series are moved to [kV].
    baseline_start, baseline_end
        The baseline window [day].
    source
        ``"regression"``, ``"physics"`` or ``"none"``.
    """

    slope_per_kv: float
    kv_ref: float
    baseline_start: pd.Timestamp
    baseline_end: pd.Timestamp
    source: str


def fit_kv_model(
    daily: pd.DataFrame,
    focal_spot: str,
    baseline_days: int = 30,
    min_kv_spread_kv2: float = 4.0,
) -> KvModel:
    """Fit the kV model of one tube and focal spot on its baseline window.

    Parameters
    ----------
    daily
        Daily statistics of ONE tube and focal spot (columns of ``sql.DAILY_SQL``).
    focal_spot
        ``small`` or ``large`` (for the physics fallback).
    baseline_days
        Length of the baseline window from the first day with filament current [days].
    min_kv_spread_kv2
        Minimum mean within-station kV variance in the baseline for a regression slope [kV^2].

    Returns
    -------
    KvModel
    """
    have = daily[daily["n_current"] > 0]
    if have.empty:
        t0 = pd.Timestamp(daily["day"].min()) if len(daily) else pd.Timestamp("1970-01-01")
        return KvModel(0.0, float(daily["tube_voltage_med_kv"].median()) if len(daily) else 70.0,
                       t0, t0, "none")
    day = as_datetime(have["day"]).to_numpy()
    start = pd.Timestamp(day.min())
    end = start + pd.Timedelta(days=baseline_days)
    b = day < np.datetime64(end)
    stations, inv = np.unique(have["tube_current_ma"].to_numpy(float)[b], return_inverse=True)

    def station_sum(col: str) -> np.ndarray:
        # NaN counts as 0, as in a pandas groupby sum
        return np.bincount(inv, weights=np.nan_to_num(have[col].to_numpy(float)[b], nan=0.0),
                           minlength=stations.size)

    n = station_sum("n_current")
    sum_kv = station_sum("sum_kv")
    sxx = station_sum("sum_kv2") - sum_kv ** 2 / n
    sxy = station_sum("sum_kv_log_i") - sum_kv * station_sum("sum_log_i") / n
    kv_ref = float(np.nansum(have["sum_kv"].to_numpy(float)[b]) / have["n_current"].to_numpy(float)[b].sum())
    spread = float(np.sum(sxx) / max(np.sum(n), 1.0))
    if spread >= min_kv_spread_kv2 and np.sum(sxx) > 0:
        return KvModel(float(np.sum(sxy) / np.sum(sxx)), kv_ref, start, end, "regression")
    slope = _physics_slope(focal_spot, float(np.average(stations, weights=n)), kv_ref)
    if slope is None:
        return KvModel(0.0, kv_ref, start, end, "none")
    return KvModel(slope, kv_ref, start, end, "physics")


def _physics_slope(focal_spot: str, tube_current_ma: float, kv: float) -> float | None:
    try:
        from tubetrack import physics

        spec = physics.default_filament_spec(focal_spot)
        lo, hi = physics.filament_current_for_tube_current_a(
            spec, np.array([tube_current_ma, tube_current_ma]), np.array([kv - 5.0, kv + 5.0])
        )
        value = float((np.log(hi) - np.log(lo)) / 10.0)
        return value if np.isfinite(value) else None
    except Exception:  # physics not available or outside its range: no slope
        return None


def normalise(daily: pd.DataFrame, model: KvModel) -> pd.DataFrame:
    """Daily kV-normalised filament current per station, with a standard error.

    Parameters
    ----------
    daily
        Daily statistics of ONE tube and focal spot.
    model
        Its :class:`KvModel`.

    Returns
    -------
    DataFrame
        tube_current_ma, day, t_days (days since the baseline start), n_current,
        log_i_norm [ln A], filament_current_norm_a [A], se_log [1] (standard error of
        ``log_i_norm``), in_baseline (bool).
    """
    cur = daily["n_current"].to_numpy()
    med = daily["filament_current_med_a"].to_numpy(float)
    keep = (cur > 0) & (med > 0)
    if not keep.any():
        return pd.DataFrame(columns=["tube_current_ma", "day", "t_days", "n_current", "log_i_norm",
                                     "filament_current_norm_a", "se_log", "in_baseline"])
    med = med[keep]
    log_med = np.log(med)
    kv = daily["tube_voltage_med_kv"].to_numpy(float)[keep]
    y = log_med - model.slope_per_kv * (kv - model.kv_ref)
    rel_iqr = (daily["filament_current_q3_a"].to_numpy(float)[keep]
               - daily["filament_current_q1_a"].to_numpy(float)[keep]) / med
    n = cur[keep].astype(float)
    ma = daily["tube_current_ma"].to_numpy(float)[keep]
    day = as_datetime(daily["day"]).to_numpy()[keep]
    rel_sigma = np.where(n >= 4, rel_iqr / NORMAL_IQR, np.nan)
    # pooled robust sigma per station (median of daily estimates); fall back to day-to-day scatter
    # (each station's rows in their given order, as a pandas groupby sees them)
    order = np.argsort(ma, kind="stable")
    ma_o = ma[order]
    cuts = np.flatnonzero(ma_o[1:] != ma_o[:-1]) + 1
    sig = np.empty(ma.size)
    diff_sig = np.empty(ma.size)
    for rows in np.split(order, cuts):
        rs = rel_sigma[rows]
        rs = rs[~np.isnan(rs)]
        sig[rows] = np.median(rs) if rs.size else np.nan
        diff_sig[rows] = _diff_sigma_values(y[rows])
    sigma = np.where(np.isnan(sig), diff_sig * np.sqrt(np.maximum(n, 1.0)), sig)
    sigma = np.where(np.isnan(sigma), 0.01, sigma)
    se_log = np.maximum(MEDIAN_SE_FACTOR * sigma / np.sqrt(np.maximum(n, 1.0)), 1e-5)
    o = np.lexsort((day, ma))
    day_o = day[o]
    start = np.datetime64(pd.Timestamp(model.baseline_start))
    return pd.DataFrame(
        {
            "tube_current_ma": ma[o],
            "day": day_o,
            "n_current": n[o],
            "log_i_norm": y[o],
            "se_log": se_log[o],
            "filament_current_norm_a": np.exp(y[o]),
            "t_days": ((day_o - start) // np.timedelta64(1, "D")).astype(float),
            "in_baseline": day_o < np.datetime64(pd.Timestamp(model.baseline_end)),
        }
    )


def _diff_sigma_values(v: np.ndarray) -> float:
    if v.size < 3:
        return np.nan
    dv = np.diff(v)
    return float(1.4826 * np.median(np.abs(dv - np.median(dv))) / np.sqrt(2.0))


def _diff_sigma(values: pd.Series) -> float:
    """Robust sigma of one observation from first differences (MAD of diffs / sqrt 2)."""
    v = values.to_numpy(float)
    if v.size < 3:
        return np.nan
    dv = np.diff(v)
    return float(1.4826 * np.median(np.abs(dv - np.median(dv))) / np.sqrt(2.0))


def normalise_calibrations(calib: pd.DataFrame, model: KvModel) -> pd.DataFrame:
    """Calibration tables of one tube and focal spot moved to the reference kV (second series).

    The calibration's own kV spread per station and day gives an exact local slope when present;
    otherwise the tube's baseline slope is used. Returns tube_current_ma, day,
    filament_current_norm_a [A].
    """
    if calib.empty:
        return pd.DataFrame(columns=["tube_current_ma", "day", "filament_current_norm_a"])
    n = calib["n_points"].to_numpy(float)
    mean_kv = calib["sum_kv"].to_numpy(float) / n
    mean_log = calib["sum_log_i"].to_numpy(float) / n
    y = mean_log - model.slope_per_kv * (mean_kv - model.kv_ref)
    return pd.DataFrame(
        {
            "tube_current_ma": calib["tube_current_ma"].to_numpy(float),
            "day": as_datetime(calib["day"]).to_numpy(),
            "filament_current_norm_a": np.exp(y),
        }
    )
