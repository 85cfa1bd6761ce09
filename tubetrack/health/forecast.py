"""Per-tube forecast: drift -> kV normalisation -> segments -> inversion -> wear fit -> projection.

:func:`analyse_tube` is a pure function of one tube's daily statistics; it is what the process
pool runs. :func:`forecast_from_state` turns the fitted wear model into remaining-life quantiles by
Monte Carlo over every uncertain input at once:

* the posterior of (a, k) of the wear fit (multivariate normal),
* the wear before the first logged day,
* the end-of-life threshold (learned from the fleet, or the default with its assumed spread),
* the future workload: the recent physics wear per calendar day times a log-normal factor.

For each draw T = max(D - L_now, 0) / (k r): the time at which the projected loss reaches the
threshold D. P10/P50/P90 of T, P(T <= 30/90/180 days) and the CDF on 30..365 days follow.
"""

from __future__ import annotations

import dataclasses
import zlib
from typing import Any

import numpy as np
import pandas as pd

from tubetrack.health import drift, firstpassage, segments
from tubetrack.health.degradation import (
    WearFit,
    combine_stations,
    default_physics,
    fit_wear,
    posterior,
    station_losses,
    wear_index,
)
from tubetrack.health.drift import as_datetime
from tubetrack.health.params import HealthParams
from tubetrack.health.signatures import tube_signatures

#: Horizons of the stored end-of-life CDF [days].
CDF_HORIZONS_DAYS = (30, 60, 90, 120, 150, 180, 210, 240, 270, 300, 330, 360, 365)
#: Step of the stored projection [days].
PROJECTION_STEP_DAYS = 7
PROJECTION_SPAN_DAYS = 365
#: Remaining-life keys of :func:`forecast_from_state` copied into the per-tube summary.
_FORECAST_KEYS = ("rul_days_p10", "rul_days_p50", "rul_days_p90", "rul_exposures_p10",
                  "rul_exposures_p50", "rul_exposures_p90", "p_end_of_life_30d",
                  "p_end_of_life_90d", "p_end_of_life_180d")
#: Smallest physics calibration factor a draw may take (wear cannot run backwards).
MIN_K = 0.05


def forecast_from_state(state: dict[str, Any], threshold: float, threshold_sd: float,
                        params: HealthParams, threshold_df: float = np.inf) -> dict[str, Any]:
    """Remaining life of one tube and focal spot from its fitted wear state.

    Parameters
    ----------
    state
        Keys a, k, cov (2x2), x_now, x_pre_sd, rate_phys_per_day [1/day],
        exposures_per_day [1/day], tube_id, focal_spot.
    threshold, threshold_sd
        End-of-life diameter loss and its spread [1].
    threshold_df
        Degrees of freedom of the threshold's predictive distribution: Student t with n - 1
        degrees of freedom when learned from n failures (the predictive distribution of a new
        draw from a normal population with estimated mean and variance), normal when infinite.
    params
        Analysis parameters (n_samples, seed, workload_sd, max_rul_days).

    Returns
    -------
    dict
        rul_days_p10/p50/p90, rul_exposures_p10/p50/p90, p_end_of_life_30d/90d/180d, cdf (array
        over :data:`CDF_HORIZONS_DAYS`), projection (DataFrame day offset -> loss quantiles),
        samples_loss_now.
    """
    key = f"{state['tube_id']}|{state['focal_spot']}".encode()
    seed = (params.seed + zlib.crc32(key)) % (2**32)  # stable across processes (no str hash)
    rng = np.random.default_rng(seed)
    n = params.n_samples
    cov = np.asarray(state["cov"], float)
    ak = rng.multivariate_normal([state["a"], state["k"]], cov, size=n, method="cholesky") \
        if np.all(np.isfinite(cov)) else np.tile([state["a"], state["k"]], (n, 1))
    a, k = ak[:, 0], ak[:, 1]
    pre = rng.normal(0.0, 1.0, n) * state["x_pre_sd"]
    loss_now = a + k * (state["x_now"] + pre)
    d = threshold_given_survival(loss_now, threshold, threshold_sd, threshold_df, rng.random(n))
    cv = state.get("workload_cv", np.nan)
    # unknown workload pattern (less than two full quarters logged): the wider default
    w_sd = max(params.workload_sd, float(cv)) if np.isfinite(cv) else params.workload_sd_unknown
    w = np.exp(rng.normal(0.0, w_sd, n))
    r = np.maximum(k, MIN_K) * state["rate_phys_per_day"] * w
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.where(loss_now >= d, 0.0, (d - loss_now) / r)
    t = np.where(np.isfinite(t), t, np.inf)
    t = np.minimum(t, params.max_rul_days)
    q = np.quantile(t, [0.1, 0.5, 0.9])
    epd = float(state["exposures_per_day"])
    horizons = np.asarray(CDF_HORIZONS_DAYS, float)
    cdf = (t[None, :] <= horizons[:, None]).mean(axis=1)
    steps = np.arange(0, PROJECTION_SPAN_DAYS + 1, PROJECTION_STEP_DAYS, dtype=float)
    path = loss_now[None, :] + r[None, :] * steps[:, None]
    pq = np.quantile(path, [0.1, 0.5, 0.9], axis=1)
    return {
        "rul_days_p10": float(q[0]),
        "rul_days_p50": float(q[1]),
        "rul_days_p90": float(q[2]),
        "rul_exposures_p10": float(q[0] * epd),
        "rul_exposures_p50": float(q[1] * epd),
        "rul_exposures_p90": float(q[2] * epd),
        "p_end_of_life_30d": float((t <= 30).mean()),
        "p_end_of_life_90d": float((t <= 90).mean()),
        "p_end_of_life_180d": float((t <= 180).mean()),
        "cdf": cdf,
        "projection": pd.DataFrame(
            {"offset_days": steps, "diameter_loss_pct_p10": 100 * pq[0],
             "diameter_loss_pct_p50": 100 * pq[1], "diameter_loss_pct_p90": 100 * pq[2]}
        ),
    }


def threshold_given_survival(loss_now: np.ndarray, threshold: float, threshold_sd: float,
                             threshold_df: float, u: np.ndarray) -> np.ndarray:
    """Draws of the end-of-life threshold conditional on the filament still being intact.

    A filament in service has not burnt through, so its own threshold exceeds its present loss:
    each draw comes from the threshold's distribution (normal, or Student t with ``threshold_df``
    degrees of freedom, location ``threshold``, scale ``threshold_sd``) truncated below at that
    draw's ``loss_now`` (inverse-CDF sampling of the truncated distribution with the uniforms
    ``u``). Without this condition a tube whose loss already passed the fleet's median threshold
    would be forecast to fail "today" although it is running.

    Parameters
    ----------
    loss_now
        Diameter-loss draws at the analysis date [1].
    threshold, threshold_sd
        Location and scale of the threshold distribution [1].
    threshold_df
        Degrees of freedom (``inf`` = normal).
    u
        Uniform(0, 1) draws, same shape as ``loss_now``.

    Returns
    -------
    numpy.ndarray
        Threshold draws [1], each >= max(loss_now, 0.005).
    """
    from scipy import special

    # the standard normal / Student t through the special functions scipy.stats calls for them
    # (norm: ndtr, ndtri; t: stdtr, stdtrit): the same values without the per-call overhead of
    # scipy's distribution objects (a frozen t alone cost ~1 ms per tube and focal spot)
    scale = max(threshold_sd, 1e-9)
    lo = np.maximum(np.asarray(loss_now, float), 0.005)
    z = (lo - threshold) / scale
    if np.isfinite(threshold_df):
        df = max(threshold_df, 1.0)
        # upper tail through the survival function: exact far out in the tail
        s_lo = special.stdtr(df, -z)
        q = -special.stdtrit(df, np.clip(s_lo * (1.0 - np.asarray(u, float)), 1e-300, 1.0))
    else:
        s_lo = special.ndtr(-z)
        q = -special.ndtri(np.clip(s_lo * (1.0 - np.asarray(u, float)), 1e-300, 1.0))
    # no probability left above the present loss: the draw is the present loss itself
    d = np.where(s_lo > 0.0, threshold + scale * q, lo)
    return np.maximum(d, lo)


def _empty_frames() -> dict[str, pd.DataFrame]:
    return {
        "summary": pd.DataFrame(),
        "drift": pd.DataFrame(columns=["tube_id", "focal_spot", "tube_current_ma", "day",
                                       "filament_current_norm_a", "fitted_a", "segment", "series"]),
        "diameter": pd.DataFrame(columns=["tube_id", "focal_spot", "day", "diameter_loss_pct",
                                          "diameter_loss_pct_lo", "diameter_loss_pct_hi"]),
        "changepoints": pd.DataFrame(columns=["tube_id", "focal_spot", "tube_current_ma", "day", "kind",
                                              "jump_pct"]),
    }


def analyse_tube(
    daily: pd.DataFrame,
    tube_meta: dict[str, Any],
    params: HealthParams | None = None,
    *,
    calibrations: pd.DataFrame | None = None,
    events: pd.DataFrame | None = None,
    physics=None,
    forecast: bool = True,
) -> dict[str, Any]:
    """Analyse one tube: everything from its daily statistics to its forecast.

    Parameters
    ----------
    daily
        Rows of ``sql.DAILY_SQL`` for this tube (all focal spots and stations).
    tube_meta
        tube_id, system_id, site, installed_at_utc, as_of (analysis date, a day boundary),
        removal_reason (None while in service), removed (whether the tube was removed before the
        analysis date; default: a removal reason is given).
    params
        :class:`HealthParams`.
    calibrations, events
        This tube's rows of ``sql.CALIBRATION_SQL`` / ``sql.EVENTS_SQL``.
    physics
        Physics adapter (default :func:`degradation.default_physics`).
    forecast
        Forecast with the configured threshold (``False``: the remaining-life columns are NaN
        and ``projections``/``cdfs`` hold None; the fleet step forecasts every state again with
        the learned threshold, so it skips this one).

    Returns
    -------
    dict
        ``summary`` (one row per focal spot), ``drift``, ``diameter``, ``changepoints``
        (DataFrames), ``states`` (list of dicts for re-forecasting with another threshold),
        ``projections`` (dict focal_spot -> DataFrame), ``cdfs`` (dict focal_spot -> array).
    """
    p = params or HealthParams()
    phys = physics or default_physics()
    out: dict[str, Any] = {}
    tube_id = str(tube_meta["tube_id"])
    as_of = pd.Timestamp(tube_meta["as_of"])
    installed = pd.Timestamp(tube_meta["installed_at_utc"]).normalize()
    calib = calibrations if calibrations is not None else pd.DataFrame()
    ev = events if events is not None else pd.DataFrame(columns=["tube_id", "category", "day", "n_events"])
    rows, drifts, diams, cps, states = [], [], [], [], []
    projections, cdfs = {}, {}
    daily = daily.assign(day=as_datetime(daily["day"]))
    # --- stopped logs: no exposure of this tube (any focal spot) in the last stale_after_days
    logged_end = pd.Timestamp(daily["day"].max()).normalize() + pd.Timedelta(days=1) if len(daily) else as_of
    unlogged_end_days = max(0.0, float((as_of - logged_end).days))
    removed = tube_meta.get("removed", tube_meta.get("removal_reason") is not None)
    stale = not removed and unlogged_end_days >= p.stale_after_days
    # the recent workload, the fit's minimum span and the signatures end with the logs
    window_end = logged_end if stale else as_of
    for focal in sorted(daily["focal_spot"].dropna().unique()):
        dfs = daily[daily["focal_spot"] == focal]
        kvm = drift.fit_kv_model(dfs, focal, baseline_days=p.baseline_days)
        norm = drift.normalise(dfs, kvm)
        # --- change points on the focal spot's combined series, shifts removed per station
        # (numpy on the normalised rows, sorted by station then day; stations are contiguous)
        n_ma = norm["tube_current_ma"].to_numpy(float)
        n_day = norm["day"].to_numpy()
        n_t = norm["t_days"].to_numpy(float)
        n_y = norm["log_i_norm"].to_numpy(float)
        n_se = norm["se_log"].to_numpy(float)
        n_w = 1.0 / n_se**2
        n_inb = norm["in_baseline"].to_numpy(bool)
        cuts = np.flatnonzero(n_ma[1:] != n_ma[:-1]) + 1
        bounds = [0, *cuts.tolist(), n_ma.size] if n_ma.size else [0]
        c0 = np.full(n_ma.size, np.nan)  # each row's station baseline (inverse-variance mean)
        for lo, hi in zip(bounds[:-1], bounds[1:], strict=False):
            m = n_inb[lo:hi]
            if m.any():
                wb = n_w[lo:hi][m]
                c0[lo:hi] = np.nansum(n_y[lo:hi][m] * wb) / wb.sum()  # NaN skipped, as pandas
        r_all = n_y - c0
        okr = ~np.isnan(r_all)
        shifts: list[tuple[float, float, float, str]] = []
        if okr.any():
            tt, inv_t = np.unique(n_t[okr], return_inverse=True)
            ww = np.bincount(inv_t, weights=n_w[okr], minlength=tt.size)
            yy = np.bincount(inv_t, weights=n_w[okr] * r_all[okr], minlength=tt.size) / ww
            idx = segments.detect_breaks(
                tt, yy, penalty_c=p.penalty_c, min_size=p.min_segment_days
            )
            cands = [(float(tt[i]), "detected") for i in idx]
            if len(calib):
                cdays = as_datetime(
                    calib.loc[calib["focal_spot"] == focal, "day"]
                ).drop_duplicates()
                ct = ((cdays - kvm.baseline_start).dt.days.astype(float)).to_numpy()
                ct = ct[(ct > tt[0] + 3) & (ct < tt[-1] - 3)]
                # a detected break within 7 days of a calibration is that calibration
                cands = [c for c in cands if not np.any(np.abs(ct - c[0]) <= 7)]
                cands += [(float(x), "calibration") for x in ct]
            shifts = segments.level_shifts(tt, yy, ww, cands)
        break_t = [sh[0] for sh in shifts]
        last_break = None
        corrected_all = np.empty(n_ma.size)
        fitted_all = np.full(n_ma.size, np.nan)
        seg_all = np.searchsorted(np.asarray(break_t), n_t, side="right")
        for lo, hi in zip(bounds[:-1], bounds[1:], strict=False):
            if hi <= lo:
                continue
            ma = n_ma[lo]
            tg, yg, seg = n_t[lo:hi], n_y[lo:hi], seg_all[lo:hi]
            corrected, deltas = segments.remove_shifts(tg, yg, n_w[lo:hi], break_t)
            corrected_all[lo:hi] = corrected
            fitted = fitted_all[lo:hi]
            for k in np.unique(seg):
                m = seg == k
                if m.sum() >= 2 and np.ptp(tg[m]) > 0:
                    b1, b0 = np.polyfit(tg[m], yg[m], 1)
                    fitted[m] = b0 + b1 * tg[m]
            for (tb, _d, _se, origin), delta in zip(shifts, deltas, strict=True):
                if not np.isfinite(delta):
                    continue
                cps.append(
                    {
                        "tube_id": tube_id,
                        "focal_spot": focal,
                        "tube_current_ma": float(ma),
                        "day": kvm.baseline_start + pd.Timedelta(days=float(tb)),
                        "kind": "recalibration"
                        if origin == "calibration"
                        else "level_shift",
                        "jump_pct": 100.0 * float(np.expm1(delta)),
                    }
                )
        if n_ma.size:
            drifts.append(
                pd.DataFrame(
                    {
                        "tube_id": tube_id,
                        "focal_spot": focal,
                        "tube_current_ma": n_ma,
                        "day": n_day,
                        "filament_current_norm_a": norm["filament_current_norm_a"].to_numpy(),
                        "fitted_a": np.exp(fitted_all),
                        "segment": seg_all,
                        "series": "exposures",
                    }
                )
            )
        if break_t:
            last_break = kvm.baseline_start + pd.Timedelta(days=max(break_t))
        if len(calib):
            cn = drift.normalise_calibrations(calib[calib["focal_spot"] == focal], kvm)
            if len(cn):
                drifts.append(cn.assign(tube_id=tube_id, focal_spot=focal, fitted_a=np.nan, segment=-1,
                                        series="calibration"))
        corr = pd.DataFrame({"tube_current_ma": n_ma, "day": n_day, "log_i_corr": corrected_all,
                             "se_log": n_se})
        st = station_losses(corr, focal, kvm.kv_ref, kvm.baseline_end, phys) if len(corr) else pd.DataFrame(
            columns=["tube_current_ma", "day", "current_ratio", "loss", "loss_se"])
        comb = combine_stations(st)
        wear = wear_index(dfs, focal, phys)
        # --- wear before the first logged day: first `recent_days` of workload x gap
        first_day = pd.Timestamp(dfs["day"].min())
        gap_days = max(0.0, float((first_day - installed).days))
        w_day = wear["day"].to_numpy()
        w_wear = wear["wear"].to_numpy(float)
        early = w_wear[w_day < np.datetime64(first_day + pd.Timedelta(days=p.recent_days))]
        early_span = max(
            1.0,
            min(
                float(p.recent_days), float((pd.Timestamp(w_day.max()) - first_day).days) + 1.0
            ),
        )
        x_pre = (
            gap_days * float(early.sum()) / early_span if gap_days > 14 else 0.0
        )
        cv = workload_cv(wear, p.recent_days)
        x_pre_sd = cv * x_pre
        # --- current segment, extended back to min_fit_days
        fit_from = None
        if last_break is not None and len(comb):
            fit_from = min(last_break, window_end - pd.Timedelta(days=p.min_fit_days))
        fit = fit_wear(comb, wear, fit_from, x_pre, x_pre_sd, p.prior_k_sd, as_of,
                       prior_k_mean=p.prior_k_mean)
        # --- recent workload per calendar day
        recent_start = window_end - pd.Timedelta(days=p.recent_days)
        rec = w_day >= np.datetime64(recent_start)
        span_rec = max(1.0, min(float(p.recent_days), float((window_end - first_day).days)))
        rate_phys = float(w_wear[rec].sum()) / span_rec
        epd = float(wear["n_exposures"].to_numpy(float)[rec].sum()) / span_rec
        if stale:
            # wear since the newest logged day at the recent rate, as uncertain as the workload;
            # its spread joins that of the wear before the first logged day
            x_post = unlogged_end_days * rate_phys
            fit = dataclasses.replace(fit, x_now=fit.x_now + x_post,
                                      x_pre_sd=float(np.hypot(fit.x_pre_sd, cv * x_post)))
        loss_now, loss_se = fit.loss_now()
        flat_beta, flat_cov = posterior(fit.data_precision, fit.data_rhs, 1.0, 1e6)
        state = {"tube_id": tube_id, "focal_spot": focal, "a": fit.a, "k": fit.k, "cov": fit.cov,
                 "x_now": fit.x_now, "x_b": fit.x_b, "x_pre_sd": fit.x_pre_sd,
                 "rate_phys_per_day": rate_phys,
                 "exposures_per_day": epd, "loss_now": loss_now, "loss_se": loss_se,
                 "workload_cv": cv if len(wear) and (wear["day"].max() - wear["day"].min()).days
                 >= 2 * p.recent_days else float("nan"),
                 "n_days": fit.n_days, "span_days": fit.span_days, "dispersion": fit.dispersion,
                 "data_precision": fit.data_precision, "data_rhs": fit.data_rhs,
                 "flat_k": float(flat_beta[1]) if fit.n_days >= 3 else float("nan"),
                 "flat_k_se": float(np.sqrt(flat_cov[1, 1])) if fit.n_days >= 3 else float("nan"),
                 "wiener_mu": float("nan"), "wiener_sigma": float("nan")}
        fc = forecast_from_state(state, p.eol_diameter_loss, p.eol_diameter_loss_sd, p) if forecast \
            else dict.fromkeys(_FORECAST_KEYS, float("nan"))
        # --- Wiener / inverse-Gaussian cross-check on weekly means of the loss index
        wien_p50, wien_p180 = float("nan"), float("nan")
        if len(comb) >= 10:
            cw = comb[comb["day"] >= fit_from] if fit_from is not None else comb
            tdays = (cw["day"] - cw["day"].min()).dt.days.to_numpy(float)
            wk_i = (tdays // 7).astype(int)
            cnt = np.bincount(wk_i)
            keep = cnt > 0
            wk = pd.DataFrame(
                {
                    "t": (np.bincount(wk_i, weights=tdays)[keep] / cnt[keep]),
                    "x": (
                        np.bincount(wk_i, weights=cw["loss"].to_numpy(float))[keep]
                        / cnt[keep]
                    ),
                }
            )
            mu, sig = firstpassage.fit_wiener(wk["t"], wk["x"])
            state["wiener_mu"], state["wiener_sigma"] = mu, sig
            if np.isfinite(mu) and np.isfinite(sig) and sig > 0:
                dist = p.eol_diameter_loss - loss_now
                wien_p50 = float(min(firstpassage.ig_ppf(0.5, mu, sig, dist), p.max_rul_days))
                wien_p180 = float(firstpassage.ig_cdf(180.0, mu, sig, dist))
        sig_info = tube_signatures(dfs, ev, window_end, p.signatures)
        # --- drop of the busiest station's current since its baseline (for the reason line)
        drop_pct, drop_ma = float("nan"), float("nan")
        if len(st):
            busiest = dfs.groupby("tube_current_ma")["n_current"].sum().idxmax()
            s1 = st[st["tube_current_ma"] == busiest]
            if len(s1):
                last = s1[s1["day"] >= s1["day"].max() - pd.Timedelta(days=14)]
                drop_pct = 100.0 * (1.0 - float(np.median(last["current_ratio"])))
                drop_ma = float(busiest)
        n_cur_days = int(comb.shape[0])
        rows.append({
            "tube_id": tube_id, "system_id": tube_meta.get("system_id"), "site": tube_meta.get("site"),
            "focal_spot": focal,
            "diameter_loss_pct": 100.0 * loss_now, "diameter_loss_pct_se": 100.0 * loss_se,
            **{k: fc[k] for k in ("rul_days_p10", "rul_days_p50", "rul_days_p90", "rul_exposures_p10",
                                  "rul_exposures_p50", "rul_exposures_p90", "p_end_of_life_30d",
                                  "p_end_of_life_90d", "p_end_of_life_180d")},
            "arc_rate_per_1000": sig_info["arc_rate_per_1000"],
            "arc_rate_recent_per_1000": sig_info["arc_rate_recent_per_1000"],
            "arc_trend_p": sig_info["arc_trend_p"],
            "ma_miss_fraction": sig_info["ma_miss_fraction"],
            "resistance_change_pct": sig_info["resistance_change_pct"],
            "signature_level": sig_info["level"],
            "signature_reasons": "; ".join(sig_info["reasons"]),
            "signals_list": ",".join(sig_info["signals"]),
            "unforeseeable": bool(sig_info["unforeseeable"]),
            "current_drop_pct": drop_pct, "current_drop_station_ma": drop_ma,
            "wear_factor_k": fit.k, "wear_factor_k_se": float(np.sqrt(fit.cov[1, 1])),
            "history_days": fit.span_days, "days_with_current": n_cur_days,
            "pre_log_gap_days": gap_days, "unlogged_days_at_end": unlogged_end_days,
            "logs_stopped": bool(stale), "kv_model": kvm.source, "kv_slope_per_kv": kvm.slope_per_kv,
            "rul_days_p50_wiener": wien_p50, "p_end_of_life_180d_wiener": wien_p180,
            "exposures_per_day": epd,
        })
        states.append(state)
        projections[focal] = fc.get("projection")
        cdfs[focal] = fc.get("cdf")
        if len(comb):
            z = 1.2815516  # standard normal 90 % quantile: lo/hi are the P10/P90 band
            diams.append(pd.DataFrame({
                "tube_id": tube_id, "focal_spot": focal, "day": comb["day"].to_numpy(),
                "loss_since_baseline_pct": 100 * comb["loss"].to_numpy(),
                "loss_since_baseline_pct_lo": 100 * (comb["loss"].to_numpy() - z * comb["loss_se"].to_numpy()),
                "loss_since_baseline_pct_hi": 100 * (comb["loss"].to_numpy() + z * comb["loss_se"].to_numpy()),
                "diameter_loss_pct": 100 * (comb["loss"].to_numpy() + fit.k * fit.x_b),
                "diameter_loss_pct_lo": 100 * (comb["loss"].to_numpy() + fit.k * fit.x_b - z * comb["loss_se"].to_numpy()),
                "diameter_loss_pct_hi": 100 * (comb["loss"].to_numpy() + fit.k * fit.x_b + z * comb["loss_se"].to_numpy()),
            }))
    empty = _empty_frames() if not (drifts and diams and cps) else {}  # only when one is needed
    out["summary"] = pd.DataFrame(rows)
    out["drift"] = pd.concat(drifts, ignore_index=True) if drifts else empty["drift"]
    out["diameter"] = pd.concat(diams, ignore_index=True) if diams else empty["diameter"]
    out["changepoints"] = pd.DataFrame(cps) if cps else empty["changepoints"]
    out["states"] = states
    out["projections"] = projections
    out["cdfs"] = cdfs
    return out


def workload_cv(wear: pd.DataFrame, block_days: int) -> float:
    """Relative spread of the physics wear per block of ``block_days`` over the logged history.

    Used as the relative uncertainty of the wear before the first logged day (the unlogged months
    are assumed to vary like the logged ones), floored at 0.15 and 0.5 when fewer than two full
    blocks exist.
    """
    if wear.empty:
        return 0.5
    d = as_datetime(wear["day"])
    blk = ((d - d.min()).dt.days // block_days).to_numpy()
    full = blk < blk.max()  # the last block is usually partial
    if np.unique(blk[full]).size < 2:
        return 0.5
    sums = np.bincount(blk[full], weights=wear["wear"].to_numpy(float)[full])
    if sums.mean() <= 0:
        return 0.5
    return float(max(0.15, np.std(sums, ddof=1) / sums.mean()))


def update_state(
    state: dict[str, Any], prior_k_mean: float, prior_k_sd: float
) -> dict[str, Any]:
    """Copy of a state refitted with another prior on k (e.g. the fleet's own, empirical Bayes)."""
    beta, cov = posterior(state["data_precision"], state["data_rhs"], prior_k_mean, prior_k_sd)
    new = dict(state, a=float(beta[0]), k=float(beta[1]), cov=cov)
    g = np.array([1.0, new["x_now"]])
    new["loss_now"] = float(new["a"] + new["k"] * new["x_now"])
    new["loss_se"] = float(np.sqrt(max(float(g @ cov @ g) + (new["k"] * new["x_pre_sd"]) ** 2, 0.0)))
    return new


def wiener_cross_check(state: dict[str, Any], threshold: float, max_rul_days: float) -> tuple[float, float]:
    """Median first-passage time [days] and P(T <= 180 d) of the Wiener model of the loss index."""
    mu, sig = state.get("wiener_mu", np.nan), state.get("wiener_sigma", np.nan)
    if not (np.isfinite(mu) and np.isfinite(sig) and sig > 0):
        return float("nan"), float("nan")
    dist = threshold - state["loss_now"]
    return (float(min(firstpassage.ig_ppf(0.5, mu, sig, dist), max_rul_days)),
            float(firstpassage.ig_cdf(180.0, mu, sig, dist)))


def forecast_task(args: tuple) -> tuple[dict[str, float], np.ndarray, np.ndarray, np.ndarray]:
    """Process-pool entry point of the fleet step: one state's forecast and Wiener cross-check.

    ``args`` = (state, threshold, threshold_sd, params, threshold_df) as for
    :func:`forecast_from_state`. Returns (scalars, cdf over :data:`CDF_HORIZONS_DAYS`, projection
    day offsets, projection loss quantiles [%] as a 3 x steps array P10/P50/P90); plain arrays
    pickle faster than the projection frame. The scalars are the remaining-life keys plus
    rul_days_p50_wiener and p_end_of_life_180d_wiener.
    """
    state, threshold, threshold_sd, params, threshold_df = args
    fc = forecast_from_state(state, threshold, threshold_sd, params, threshold_df)
    out = {k: fc[k] for k in _FORECAST_KEYS}
    out["rul_days_p50_wiener"], out["p_end_of_life_180d_wiener"] = wiener_cross_check(
        state, threshold, params.max_rul_days)
    proj = fc["projection"]
    quantiles = proj[["diameter_loss_pct_p10", "diameter_loss_pct_p50",
                      "diameter_loss_pct_p90"]].to_numpy().T
    return out, fc["cdf"], proj["offset_days"].to_numpy(), quantiles


def analyse_tube_task(args: tuple) -> dict[str, Any]:
    """Process-pool entry point: ``analyse_tube(*args)`` with keyword extras."""
    daily, meta, params, calib, events = args
    return analyse_tube(daily, meta, params, calibrations=calib, events=events,
                        forecast=meta.get("forecast", True))


def fit_state_for(fit: WearFit) -> dict[str, Any]:  # pragma: no cover - convenience
    """The state dict of a :class:`WearFit` (for callers building states by hand)."""
    return {"a": fit.a, "k": fit.k, "cov": fit.cov, "x_now": fit.x_now, "x_pre_sd": fit.x_pre_sd}
