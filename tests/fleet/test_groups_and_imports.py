"""Per-group fits, workload clocks, and the test-only status of the reference libraries."""

from __future__ import annotations

import subprocess
import sys
import warnings
from datetime import datetime

import numpy as np
import pandas as pd
import pytest

from tubetrack.fleet.forecast import replacement_forecast
from tubetrack.fleet.lifedata import load_life_data
from tubetrack.fleet.models import fit_fleet_models
from tubetrack.fleet.survival import fit_weibull, survival_by_group

from .conftest import AS_OF


def test_groups_with_too_few_failures_get_a_clear_message():
    rng = np.random.default_rng(1)
    n = 60
    tab = pd.DataFrame(
        {
            "tube_id": [f"T{i}" for i in range(n)],
            "model_label": ["big"] * 50 + ["rare"] * 10,
            "site": "s",
            "modality": "m",
            "entry": 0.0,
            "exit": rng.uniform(100, 1000, n),
            "event": np.r_[rng.random(50) < 0.6, [True] + [False] * 9],
        }
    )
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        res = survival_by_group(tab, "model", min_failures=3)
    s = res.summary.set_index("group")
    assert s.loc["rare", "message"].startswith("only 1 failure(s) among 10 tubes")
    assert np.isnan(s.loc["rare", "eta"])
    assert s.loc["big", "message"].startswith("ok")
    assert "big" in res.fits and "rare" not in res.fits
    assert any("too few failures" in str(w.message) for w in caught)
    # the Kaplan-Meier table is there for every group, fitted or not
    assert set(res.km["group"]) == {"big", "rare"}


def test_workload_clock_forecast_projects_at_the_recent_rate(fleet_store):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        life = load_life_data(fleet_store, AS_OF.to_pydatetime())
        models = fit_fleet_models(life, "mas")
    fc = replacement_forecast(
        life.frame,
        models.all_cause,
        as_of=AS_OF.to_pydatetime(),
        months=12,
        clock="mas",
    )
    f = life.frame.set_index("tube_id")
    per = fc.per_tube.set_index("tube_id")
    tid = per.index[0]
    horizon = (pd.Timestamp("2026-06-01") - AS_OF).days
    age, rate = f.loc[tid, "mas"], f.loc[tid, "rate_mas"]
    expected = models.all_cause.conditional_failure_probability(age, rate * horizon)
    assert per.loc[tid, "p_replace_horizon"] == pytest.approx(float(expected), rel=1e-6)


def test_weibull_shape_below_one_is_recovered():
    # seeded early-failure population (beta 0.7) with administrative censoring at 2000
    rng = np.random.default_rng(8)
    life = 1500 * rng.weibull(0.7, 3000)
    t = np.minimum(life, 2000.0)
    fit = fit_weibull(t, life <= 2000.0)
    assert fit.beta_interval(0.01)[0] < 0.7 < fit.beta_interval(0.01)[1]
    assert fit.eta_interval(0.01)[0] < 1500 < fit.eta_interval(0.01)[1]


def test_package_never_imports_the_reference_libraries():
    code = (
        "import sys, tubetrack.fleet.lifedata, tubetrack.fleet.survival, "
        "tubetrack.fleet.forecast, tubetrack.fleet.budget, tubetrack.fleet.visits, "
        "tubetrack.fleet.uptime, tubetrack.fleet.models, tubetrack.cli.fleet_cmd; "
        "print(any(m.split('.')[0] in ('lifelines', 'reliability') for m in sys.modules))"
    )
    out = subprocess.run(
        [sys.executable, "-c", code], capture_output=True, text=True, check=True
    )
    assert out.stdout.strip() == "False"


def test_as_of_ignores_later_data(fleet_store):
    early = datetime(2024, 1, 1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        life = load_life_data(fleet_store, early)
    f = life.frame
    assert (f["installed_at_utc"] < pd.Timestamp(early)).all()
    later_removed = f["removed_at_utc"] > pd.Timestamp(early)
    assert (f.loc[later_removed, "status"] == "in_service").all()
    assert (
        f["exit_days"].max()
        <= (pd.Timestamp(early) - f["installed_at_utc"].min()).days + 1
    )
