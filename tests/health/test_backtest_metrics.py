"""Backtest metrics against sklearn / scipy references and a hand-scored case table."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy.stats import mannwhitneyu
from sklearn.metrics import brier_score_loss

from tubetrack.health.backtest import auc_score, brier_score, cutoff_dates, score_cases


def test_auc_equals_mann_whitney_u_and_brier_equals_sklearn():
    rng = np.random.default_rng(8)
    y = rng.integers(0, 2, 300)
    p = np.clip(0.3 * y + rng.uniform(0, 0.7, 300), 0, 1)
    # Reference: AUC = U / (n1 n0) (Hanley & McNeil 1982), U from scipy.stats.mannwhitneyu
    u = mannwhitneyu(p[y == 1], p[y == 0]).statistic
    assert auc_score(y, p) == pytest.approx(u / ((y == 1).sum() * (y == 0).sum()), rel=1e-12)
    assert brier_score(y, p) == pytest.approx(brier_score_loss(y, p), rel=1e-12)
    assert np.isnan(auc_score(np.zeros(5), np.linspace(0, 1, 5)))


def test_score_cases_by_hand():
    cut = pd.to_datetime(["2024-01-01", "2024-03-01", "2024-05-01", "2024-07-01"])
    fail = pd.Timestamp("2024-09-28")  # true RUL 271, 211, 150, 89 days
    true = (fail - cut).days.to_numpy(float)
    p50 = np.array([400.0, 190.0, 140.0, 95.0])  # within 20 % from the 2nd forecast on
    cases = pd.DataFrame({
        "cut_off": list(cut) * 2, "tube_id": ["A"] * 4 + ["B"] * 4, "system_id": "S", "focal_spot": "large",
        "p_end_of_life_90d": [0.0, 0.1, 0.3, 0.6] + [0.0] * 4,
        "p_end_of_life_180d": [0.2, 0.4, 0.7, 0.9] + [0.05] * 4,
        "rul_days_p10": list(p50 * 0.7) + [900.0] * 4, "rul_days_p50": list(p50) + [1500.0] * 4,
        "rul_days_p90": list(p50 * 1.3) + [2500.0] * 4, "health_rank": [1, 2, 2, 3, 0, 0, 0, 0],
        "signature_flag": False, "history_days": 300.0,
    })
    tubes = pd.DataFrame({"tube_id": ["A", "B"], "removed_at_utc": [fail, pd.NaT],
                          "removal_reason": ["filament", None]})
    summary, scored = score_cases(cases, tubes, pd.Timestamp("2025-06-01"), every_days=60)
    m = summary.set_index("metric")["value"]
    assert m["auc_180d"] == 1.0 and m["auc_90d"] == 1.0
    # coverage: 400*0.7=280 > 271 misses, the other three cover
    assert m["coverage_p10_p90"] == pytest.approx(3 / 4)
    # alpha-lambda: t_P = 2024-01-01, t_EOL = 2024-09-28, t_lambda = 2024-05-15 -> nearest cut
    # 2024-05-01: |140 - 150| = 10 <= 0.2 x 150
    assert m["alpha_lambda_accuracy"] == 1.0
    # prognostic horizon: band 0.2 x 271 = 54.2 days; inside from the 2nd forecast (211 days)
    assert m["prognostic_horizon_days"] == pytest.approx(211.0)
    assert m["median_relative_rul_error"] == pytest.approx(np.median(np.abs(p50 - true) / true))
    assert (scored["filament_within_180d"] == [0, 0, 1, 1, 0, 0, 0, 0]).all()


def test_cutoff_dates():
    c = cutoff_dates(pd.Timestamp("2024-01-01"), pd.Timestamp("2025-01-01"), 60, 180, 30)
    assert c[0] == pd.Timestamp("2024-06-29") and all(np.diff(c) == pd.Timedelta(days=60))
    assert c[-1] <= pd.Timestamp("2024-12-02")
