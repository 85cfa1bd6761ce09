"""Health levels: an ordered scale in our own words, each tube with a one-line reason.

=====  ============  ==============================================================================
rank   level         meaning
=====  ============  ==============================================================================
0      sound         no sign of approaching end of life, no other concern
1      observe       a weak sign (small end-of-life probability, a signature, or too little history)
2      prepare       end of life plausible within about six months, or a strong signature: order a
                     tube, plan the swap
3      imminent      end of life likely within three months or plausible within a month
4      past limit    the estimated diameter loss has already reached the expected end of life
=====  ============  ==============================================================================

Rules (first match from the top wins): past limit when the estimated diameter loss has reached
the threshold in use (the forecast, conditioned on the filament still being intact, then gives a
short remaining life rather than zero) or the median remaining life is zero;
imminent when P(EOL <= 30 d) >= 0.25 or P(EOL <= 90 d) >= 0.5; prepare when
P(EOL <= 180 d) >= 0.3 or a signature of level 2; observe when P(EOL <= 180 d) >= 0.05, a
signature of level 1, too little history, or stopped logs (no exposure logged in the last
``stale_after_days`` before the analysis date); otherwise sound.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

LEVELS: tuple[str, ...] = ("sound", "observe", "prepare", "imminent", "past limit")

#: Rank from which a tube counts as an alert in the backtest (``prepare`` or worse).
ALERT_RANK = 2

#: Signals this module adds about the filament forecast itself (its wear, the data behind it);
#: every other signal comes from a signature other than filament thinning.
FORECAST_SIGNALS = ("filament_wear", "short_history", "logs_stopped")


def assign_levels(summary: pd.DataFrame, threshold: float, min_history_days: float,
                  max_rul_days: float) -> pd.DataFrame:
    """Add health_rank, health_level, reason and signals to a per tube x focal spot summary.

    Parameters
    ----------
    summary
        Output rows of :func:`tubetrack.health.forecast.analyse_tube`.
    threshold
        End-of-life diameter loss in use [1].
    min_history_days
        Below this span of filament data the reason says the history is short [days].
    max_rul_days
        Cap of the reported remaining life [days].
    """
    s = summary.copy()
    if s.empty:
        return s.assign(health_rank=pd.Series(dtype=int), health_level=pd.Series(dtype=str),
                        reason=pd.Series(dtype=str), signals=pd.Series(dtype=str))
    p30 = s["p_end_of_life_30d"].to_numpy(float)
    p90 = s["p_end_of_life_90d"].to_numpy(float)
    p180 = s["p_end_of_life_180d"].to_numpy(float)
    sig = s["signature_level"].to_numpy(int)
    short = s["history_days"].to_numpy(float) < min_history_days
    stopped = s["logs_stopped"].eq(True).to_numpy() if "logs_stopped" in s else np.zeros(len(s), bool)
    rank = np.select(
        [(s["rul_days_p50"].to_numpy(float) <= 0.0)
         | (s["diameter_loss_pct"].to_numpy(float) >= 100.0 * threshold),
         (p30 >= 0.25) | (p90 >= 0.5),
         (p180 >= 0.3) | (sig >= 2), (p180 >= 0.05) | (sig >= 1) | short | stopped],
        [4, 3, 2, 1], default=0,
    )
    s["health_rank"] = rank.astype(int)
    s["health_level"] = [LEVELS[r] for r in rank]
    s["reason"] = [_reason(r, threshold, max_rul_days, sh, st) for r, sh, st in
                   zip(s.to_dict("records"), short, stopped, strict=True)]
    sigs = []
    for r, sh, st in zip(s.to_dict("records"), short, stopped, strict=True):
        items = [x for x in str(r.get("signals_list") or "").split(",") if x]
        if r["p_end_of_life_180d"] >= 0.05:
            items.insert(0, "filament_wear")
        if sh:
            items.append("short_history")
        if st:
            items.append("logs_stopped")
        sigs.append(",".join(items))
    s["signals"] = sigs
    return s


def _fmt_days(days: float, cap: float) -> str:
    if not np.isfinite(days) or days >= cap:
        return f"more than {cap / 365.25:.0f} years"
    if days < 1:
        return "now"
    return f"{days:.0f} days"


def _reason(r: dict, threshold: float, cap: float, short: bool, stopped: bool = False) -> str:
    parts = []
    head = f"{r['focal_spot']} focus: "
    if np.isfinite(r.get("current_drop_pct", np.nan)):
        word = "down" if r["current_drop_pct"] >= 0 else "up"
        parts.append(
            f"{head}filament current at {r['current_drop_station_ma']:.0f} mA {word} "
            f"{abs(r['current_drop_pct']):.1f} % since its baseline"
        )
    else:
        parts.append(f"{head}no filament current logged, wear estimated from workload and physics only")
    parts.append(
        f"estimated diameter loss {r['diameter_loss_pct']:.1f} +- {r['diameter_loss_pct_se']:.1f} % "
        f"of an expected {100 * threshold:.1f} %"
    )
    p50 = r["rul_days_p50"]
    if p50 >= 1 and r["diameter_loss_pct"] >= 100.0 * threshold:
        parts.append("past the fleet's expected end of life while the filament is still intact")
    if p50 < 1:
        parts.append("end of life already reached by the estimate: check the tube")
    else:
        parts.append(
            f"50 % chance of end of life within {_fmt_days(p50, cap)} "
            f"(10-90 %: {_fmt_days(r['rul_days_p10'], cap)} to {_fmt_days(r['rul_days_p90'], cap)})"
        )
    if short:
        parts.append(
            f"too little history ({r['history_days']:.0f} days of filament current): interval "
            "widened for the unknown workload pattern, treat the dates as rough"
        )
    if stopped:
        parts.append(
            f"no exposure logged in the {r['unlogged_days_at_end']:.0f} days before the analysis "
            "date: wear since the newest logged day assumed at the recent rate; check that this "
            "system's logs still arrive"
        )
    if r.get("signature_reasons"):
        parts.append(str(r["signature_reasons"]))
    if r.get("unforeseeable"):
        parts.append("this kind of failure is not foreseen by the filament signal: no date given for it")
    return "; ".join(parts)
