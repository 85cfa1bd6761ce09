"""Synthetic result frames shaped like the health and fleet result tables.

Invented numbers for exercising charts and reports only: never used as check values.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

LEVELS = ("good", "watch", "plan", "act")  # stand-in ordered levels; rank 0 = best

HOSTILE_TUBE = '<script>alert(1)</script>"T\'1</script>'
HOSTILE_SITE = 'Site "A" </script><img src=x onerror=alert(2)>'
HOSTILE_TEXT = "arc </script><script>alert(3)</script> & 'quoted'"


def make_results(n_tubes: int = 6, days: int = 400, seed: int = 7, hostile: bool = False,
                 stations=(100.0, 200.0, 400.0)) -> dict[str, pd.DataFrame]:
    """A dict of frames: health, rul_cdf, drift, diameter, projection, changepoints, systems,
    tubes, fault_rates, km, weibull_curve, forecast, budget, spares, uptime, downtime,
    backtest_cases, backtest_outcomes, rejects, ingest_files."""
    rng = np.random.default_rng(seed)
    start = pd.Timestamp("2023-01-02")
    end = start + pd.Timedelta(days=days - 1)
    tube_ids = [f"T{i:05d}" for i in range(n_tubes)]
    if hostile:
        tube_ids[0] = HOSTILE_TUBE
    system_ids = [f"S{i:04d}" for i in range(n_tubes)]
    sites = [f"site-{i % 5}" for i in range(n_tubes)]
    if hostile:
        sites[0] = HOSTILE_SITE
    focal = ["small", "large"]
    slope = rng.uniform(0.0, 4e-5, n_tubes)
    # health: one row per tube x focal spot
    rows = []
    for i, t in enumerate(tube_ids):
        for f in focal:
            rank = int(rng.integers(0, len(LEVELS)))
            p30 = float(rng.uniform(0, 0.3)) * rank / 3
            rows.append(
                dict(tube_id=t, system_id=system_ids[i], site=sites[i], focal_spot=f,
                     health_level=LEVELS[rank], health_rank=rank,
                     reason=(HOSTILE_TEXT if hostile and i == 0 else f"{f} focus: drift {slope[i]*1e5:.1f}"),
                     diameter_loss_pct=float(rng.uniform(0, 5)), diameter_loss_pct_se=0.3,
                     rul_days_p10=100.0, rul_days_p50=200.0, rul_days_p90=400.0,
                     rul_exposures_p10=1e4, rul_exposures_p50=2e4, rul_exposures_p90=4e4,
                     p_end_of_life_30d=p30, p_end_of_life_90d=min(1, p30 * 2), p_end_of_life_180d=min(1, p30 * 3),
                     arc_rate_per_1000=float(rng.uniform(0, 2)), signals="filament",
                     as_of=end, analysed_at_utc=pd.Timestamp("2026-12-02 01:00"), code_version="0.1.0"))
    health = pd.DataFrame(rows)
    horizons = np.arange(30, 366, 30)
    rul_cdf = pd.DataFrame(
        [dict(tube_id=t, focal_spot=f, horizon_days=int(h), p_end_of_life=float(1 - np.exp(-h / 300)))
         for t in tube_ids for f in focal for h in horizons])
    day_index = pd.date_range(start, end, freq="D")
    n = len(day_index)
    dfs = []
    for i, t in enumerate(tube_ids):
        for f in focal:
            for s in stations:
                base = 3.5 + s / 400.0 + (0.3 if f == "large" else 0.0)
                fitted = base * (1 - slope[i] * np.arange(n))
                dfs.append(pd.DataFrame(dict(
                    tube_id=t, focal_spot=f, tube_current_ma=s, day=day_index,
                    filament_current_norm_a=fitted + rng.normal(0, 0.004, n), fitted_a=fitted,
                    segment=np.where(np.arange(n) > n // 2, 1, 0))))
    drift = pd.concat(dfs, ignore_index=True)
    wk = pd.date_range(start, end, freq="7D")
    dia = []
    proj = []
    for i, t in enumerate(tube_ids):
        for f in focal:
            loss = np.linspace(0, 3.0 + i % 3, len(wk))
            dia.append(pd.DataFrame(dict(tube_id=t, focal_spot=f, day=wk, diameter_loss_pct=loss,
                                         diameter_loss_pct_lo=loss - 0.3, diameter_loss_pct_hi=loss + 0.3)))
            fut = pd.date_range(end, end + pd.Timedelta(days=365), freq="7D")
            k = np.arange(len(fut))
            p50 = loss[-1] + 0.02 * k
            proj.append(pd.DataFrame(dict(tube_id=t, focal_spot=f, day=fut, diameter_loss_pct_p10=p50 - 0.01 * k,
                                          diameter_loss_pct_p50=p50, diameter_loss_pct_p90=p50 + 0.015 * k)))
    diameter = pd.concat(dia, ignore_index=True)
    projection = pd.concat(proj, ignore_index=True)
    changepoints = pd.DataFrame(dict(tube_id=tube_ids, focal_spot="large", tube_current_ma=stations[-1],
                                     day=start + pd.Timedelta(days=days // 2),
                                     kind=[HOSTILE_TEXT if hostile and i == 0 else "level shift" for i in range(n_tubes)]))
    systems = pd.DataFrame(dict(system_id=system_ids, site=sites, modality="radiographic",
                                generator_type="high_frequency",
                                criticality_weight=rng.uniform(0.5, 3, n_tubes).round(2),
                                uptime_target_pct=97.0, scheduled_hours_per_week=50.0, model_label="room"))
    tubes = pd.DataFrame(dict(tube_id=tube_ids, system_id=system_ids, model_label=[f"XT-{i % 3}" for i in range(n_tubes)],
                              installed_at_utc=start - pd.Timedelta(days=200), removed_at_utc=pd.NaT,
                              removal_reason=None, price=90000.0, price_currency="EUR", site=sites))
    months = pd.date_range(start, end, freq="MS")
    cats = ["arc", "kv_dropout", HOSTILE_TEXT if hostile else "filament_fault"]
    fault_rates = pd.DataFrame([dict(tube_id=t, system_id=system_ids[i], month=m, category=c,
                                     events=int(rng.poisson(3)), exposures=int(rng.integers(1000, 3000)))
                                for i, t in enumerate(tube_ids) for m in months for c in cats])
    times = np.sort(rng.weibull(2.0, 60) * 1500)
    at_risk = np.arange(60, 0, -1)
    events = (rng.uniform(size=60) < 0.6).astype(int)
    surv = np.cumprod(1 - events / at_risk)
    km = pd.DataFrame(dict(time=times, at_risk=at_risk, events=events, censored=1 - events,
                           survival=surv, lower=np.clip(surv - 0.08, 0, 1), upper=np.clip(surv + 0.08, 0, 1)))
    grid = np.linspace(10, 3000, 120)
    eta, beta = 1500.0, 2.0
    s = np.exp(-(grid / eta) ** beta)
    weibull_curve = pd.DataFrame(dict(time=grid, survival=s, lower=s ** 1.2, upper=s ** 0.85))
    fmonths = pd.date_range(end + pd.Timedelta(days=1), periods=12, freq="MS")
    exp_ = rng.uniform(0.5, 3, 12)
    forecast = pd.DataFrame(dict(month=fmonths, month_index=np.arange(1, 13), expected_replacements=exp_,
                                 lower_80=np.floor(exp_ * 0.4), upper_80=np.ceil(exp_ * 1.6),
                                 lower_95=np.floor(exp_ * 0.2), upper_95=np.ceil(exp_ * 2.1)))
    budget = pd.DataFrame(dict(month=fmonths, expected_spend=exp_ * 90000, spend_lower_80=exp_ * 50000,
                               spend_upper_80=exp_ * 140000, spend_lower_95=exp_ * 30000,
                               spend_upper_95=exp_ * 180000, currency="EUR"))
    spares = pd.DataFrame(dict(model_label=["XT-0", "XT-1", "XT-2"], spares_needed=[3, 2, 1],
                               expected_demand=[1.8, 1.1, 0.4], service_level=0.95))
    uptime = pd.DataFrame(dict(system_id=system_ids, site=sites,
                               availability_pct=rng.uniform(94, 100, n_tubes), uptime_target_pct=97.0))
    downtime = pd.DataFrame(dict(cause=["tube", "generator", "preventive", "tube", "external"],
                                 planned=[False, False, True, False, False], downtime_h=[40.0, 12.0, 30.0, 8.0, 3.0]))
    ncase = 40
    true = rng.uniform(5, 300, ncase)
    p50 = true * rng.lognormal(0, 0.25, ncase)
    backtest_cases = pd.DataFrame(dict(tube_id=[tube_ids[i % n_tubes] for i in range(ncase)],
                                       cutoff=end - pd.Timedelta(days=100), cause="filament",
                                       true_rul_days=true, rul_days_p10=p50 * 0.6, rul_days_p50=p50,
                                       rul_days_p90=p50 * 1.5))
    pp = rng.uniform(0, 1, 400)
    backtest_outcomes = pd.DataFrame(dict(horizon_days=np.repeat([90, 180], 200), p_predicted=pp,
                                          outcome=(rng.uniform(size=400) < pp).astype(int)))
    rejects = pd.DataFrame(dict(reason=["not a number", HOSTILE_TEXT if hostile else "time in DST gap"],
                                field=["tube_voltage_kv", "timestamp_utc"], rows=[3, 1]))
    ingest_files = pd.DataFrame(dict(table_kind=["exposures", "events"], files=[n_tubes, 1],
                                     rows_read=[1000, 50], rows_accepted=[997, 49], rows_rejected=[3, 1],
                                     rows_duplicate=[0, 0]))
    return dict(health=health, rul_cdf=rul_cdf, drift=drift, diameter=diameter, projection=projection,
                changepoints=changepoints, systems=systems, tubes=tubes, fault_rates=fault_rates, km=km,
                weibull_curve=weibull_curve, weibull_params=pd.DataFrame(dict(eta=[eta], beta=[beta])),
                forecast=forecast, budget=budget, spares=spares, uptime=uptime, downtime=downtime,
                backtest_cases=backtest_cases, backtest_outcomes=backtest_outcomes, rejects=rejects,
                ingest_files=ingest_files)
