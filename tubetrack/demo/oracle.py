"""How much of the forecast error is information the logs do not carry: the backtest with the
demo's hidden truth put in place of what the analysis estimates.

The demo fleet knows what no log shows: each filament's own burn-through point (its drawn
threshold divided by its hot-spot factor, as mean diameter loss) and its true mean diameter loss
on every day (``truth.csv``, ``truth_diameter.csv.gz`` beside the sample logs). This module
replays the ordinary backtest (:mod:`tubetrack.health.backtest`, same cut-offs, same scoring)
once per mode, changing only the inputs of the end-of-life forecast of each tube and focal spot:

``shipped``
    the analysis as it runs for users;
``true_failure_point``
    the fleet threshold (mean and spread) replaced by the filament's own failure point;
``true_loss``
    the estimated diameter loss at the cut-off (and its uncertainty, including the wear before the
    first logged day) replaced by the true loss; the threshold stays the one the fleet step learned
    from *estimated* losses at failure, so the two no longer share their errors;
``true_loss_population``
    the true loss, and as threshold the true distribution of failure points over all the demo's
    filaments (normal with their mean and standard deviation): a perfect measurement and a
    perfectly known fleet, but not the individual failure point. This is the bound for any
    method that cannot see a filament's own failure point;
``both``
    both replaced; what remains is the future workload and the fitted wear rate.

Everything else (drift, kV normalisation, segments, wear fit, workload projection, levels) is the
shipped code. The levels, and so the false alerts, still follow the *estimated* loss in the
true-loss modes, which is why the command line does not print false alerts. It is a check of the method on invented data, never an input to it: the truth is
only read here. Run it on a store that holds the sample logs::

    python -m tubetrack.demo.oracle --logs sample_logs [--db store.duckdb] [--every-days 60]

(without ``--db`` the logs are ingested into a temporary store first).
"""

from __future__ import annotations

import argparse
import sys
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

#: Modes of :func:`oracle_backtest`, in the order they are reported.
MODES = ("shipped", "true_failure_point", "true_loss", "true_loss_population", "both")

#: Spread given to a known failure point (a normal this narrow is the point itself) [1].
KNOWN_POINT_SD = 1e-6

#: Metrics shown by the command line, in this order.
REPORTED = ("alpha_lambda_accuracy", "auc_180d", "coverage_p10_p90", "median_relative_rul_error",
            "prognostic_horizon_days")


def failure_points(truth: pd.DataFrame) -> pd.DataFrame:
    """Each filament's own failure point as mean diameter loss: threshold / hot-spot factor.

    Parameters
    ----------
    truth
        ``truth.csv`` of the demo: tube_id, threshold_small, threshold_large,
        hot_spot_factor_small, hot_spot_factor_large [1].

    Returns
    -------
    pandas.DataFrame
        tube_id, focal_spot, failure_point [1] (mean diameter loss at burn-through).
    """
    parts = [
        pd.DataFrame({
            "tube_id": truth["tube_id"].astype(str),
            "focal_spot": focal,
            "failure_point": truth[f"threshold_{focal}"].to_numpy(float)
            / truth[f"hot_spot_factor_{focal}"].to_numpy(float),
        })
        for focal in ("small", "large")
    ]
    return pd.concat(parts, ignore_index=True)


def true_loss_at(diameter: pd.DataFrame, cut: pd.Timestamp) -> dict[tuple[str, str], float]:
    """True mean diameter loss of every filament on the day before ``cut`` [1].

    Linear interpolation in time of the demo's weekly truth series (``truth_diameter.csv.gz``:
    tube_id, focal_spot, day, diameter_loss); filaments whose series has not started by then or
    ended before are left out.
    """
    out: dict[tuple[str, str], float] = {}
    t = (pd.Timestamp(cut) - pd.Timedelta(days=1)).value
    day_ns = pd.to_datetime(diameter["day"]).to_numpy("datetime64[ns]").astype(np.int64)
    loss = diameter["diameter_loss"].to_numpy(float)
    keys = diameter["tube_id"].astype(str) + "|" + diameter["focal_spot"].astype(str)
    codes, uniques = pd.factorize(keys, sort=False)
    order = np.lexsort((day_ns, codes))
    codes, day_ns, loss = codes[order], day_ns[order], loss[order]
    bounds = np.searchsorted(codes, np.arange(len(uniques) + 1))
    for i, key in enumerate(uniques):
        x, y = day_ns[bounds[i]:bounds[i + 1]], loss[bounds[i]:bounds[i + 1]]
        if x.size and x[0] <= t <= x[-1] + 7 * 86_400 * 10**9:
            tube, focal = key.split("|")
            out[(tube, focal)] = float(np.interp(t, x, y))
    return out


def state_with_loss(state: dict[str, Any], loss: float) -> dict[str, Any]:
    """A wear state whose present loss is ``loss`` exactly [1]; the wear rate is left as fitted.

    The forecast draws the present loss as a + k (x_now + pre): with a = loss, x_now = 0, a
    negligible variance of a and no unlogged-wear uncertainty, every draw is ``loss`` while k
    keeps its variance.
    """
    cov = np.asarray(state["cov"], float)
    # a keeps a negligible variance (SD 1e-7 of diameter): the draws use a Cholesky factor
    new_cov = np.array([[KNOWN_POINT_SD**2 / 100.0, 0.0], [0.0, cov[1, 1]]])
    return dict(state, a=float(loss), x_now=0.0, x_pre_sd=0.0, cov=new_cov,
                loss_now=float(loss), loss_se=0.0)


@contextmanager
def _substituted(mode: str, points: dict[tuple[str, str], float],
                 losses: dict[tuple[str, str], float],
                 population: tuple[float, float]) -> Iterator[None]:
    """Route the fleet step's per-state forecast through the truth for ``mode``."""
    from tubetrack.health import api
    from tubetrack.health.forecast import forecast_task

    def task(args: tuple) -> Any:
        state, threshold, threshold_sd, params, threshold_df = args
        key = (str(state["tube_id"]), str(state["focal_spot"]))
        if mode in ("true_failure_point", "both") and key in points:
            threshold, threshold_sd, threshold_df = points[key], KNOWN_POINT_SD, np.inf
        if mode == "true_loss_population":
            threshold, threshold_sd, threshold_df = population[0], population[1], np.inf
        if mode in ("true_loss", "true_loss_population", "both") and key in losses:
            state = state_with_loss(state, losses[key])
        return forecast_task((state, threshold, threshold_sd, params, threshold_df))

    saved = api.forecast_task
    api.forecast_task = task if mode != "shipped" else saved
    try:
        yield
    finally:
        api.forecast_task = saved


def oracle_backtest(con: Any, truth: pd.DataFrame, diameter: pd.DataFrame, every_days: int = 60,
                    warmup_days: int = 180, modes: tuple[str, ...] = MODES,
                    progress: Any = None) -> pd.DataFrame:
    """The backtest of :func:`tubetrack.health.backtest.run_backtest` once per mode.

    Runs in this process (the substitution lives in this interpreter; the per-tube step still
    uses the shipped code). ``progress(mode, i, n)`` is called after each cut-off when given.

    Returns
    -------
    pandas.DataFrame
        One row per metric, one column per mode (values as the backtest reports them), plus the
        alpha-lambda accuracy split by whether the tube was logged since installation.
    """
    from tubetrack.health.backtest import _one_cut, backtest_inputs, score_parts
    from tubetrack.health.params import HealthParams

    p = replace(HealthParams(), workers=1)
    inputs = backtest_inputs(con, every_days, warmup_days)
    fp = failure_points(truth)
    points = dict(zip(zip(fp["tube_id"], fp["focal_spot"], strict=True), fp["failure_point"], strict=True))
    population = (float(fp["failure_point"].mean()), float(fp["failure_point"].std(ddof=1)))
    truncated = set(truth.loc[truth["left_truncated"].astype(str).str.lower() == "true", "tube_id"])
    columns: dict[str, pd.Series] = {}
    for mode in modes:
        parts = []
        for i, cut in enumerate(inputs.cuts):
            losses = true_loss_at(diameter, cut) if mode not in ("shipped", "true_failure_point") else {}
            with _substituted(mode, points, losses, population):
                parts.append(_one_cut(inputs.task(cut, p)))
            if progress is not None:
                progress(mode, i + 1, len(inputs.cuts))
        result = score_parts(parts, inputs, every_days)
        values = result.summary.set_index("metric")["value"]
        for label, keep in (("alpha_lambda_logged_since_install", False),
                            ("alpha_lambda_installed_before_logs", True)):
            values[label] = _alpha_lambda_of(result.cases, truncated, keep)
        columns[mode] = values
    return pd.DataFrame(columns)


def _alpha_lambda_of(scored: pd.DataFrame, truncated: set[str], keep_truncated: bool) -> float:
    """Alpha-lambda accuracy over the filament-failed tubes of one group (the backtest's rule)."""
    from tubetrack.health.backtest import alpha_lambda_per_tube, failure_cases

    ev = failure_cases(scored)
    hits = alpha_lambda_per_tube(ev[ev["tube_id"].isin(truncated) == keep_truncated])
    return float(hits["alpha_lambda_hit"].mean()) if len(hits) else float("nan")


def _read_truth(logs: Path) -> tuple[pd.DataFrame, pd.DataFrame]:
    from tubetrack.errors import InputError

    tpath, dpath = logs / "truth.csv", logs / "truth_diameter.csv.gz"
    missing = [str(x) for x in (tpath, dpath) if not x.is_file()]
    if missing:
        raise InputError(f"the demo truth is missing: {', '.join(missing)}; this diagnostic needs a "
                         "folder written by `tubetrack demo`.")
    return pd.read_csv(tpath), pd.read_csv(dpath)


def main(argv: list[str] | None = None) -> int:
    """Command line: print the metrics of every mode side by side (markdown table)."""
    ap = argparse.ArgumentParser(prog="python -m tubetrack.demo.oracle", description=__doc__.split("\n\n")[0])
    ap.add_argument("--logs", type=Path, default=Path("sample_logs"),
                    help="folder written by `tubetrack demo` (logs and truth files)")
    ap.add_argument("--db", type=Path, default=None,
                    help="store that already holds those logs (default: ingest into a temporary one)")
    ap.add_argument("--every-days", type=int, default=60, help="spacing of the cut-offs [days]")
    ap.add_argument("--warmup-days", type=int, default=180, help="first cut-off after the first exposure [days]")
    args = ap.parse_args(argv)
    from tubetrack import store
    from tubetrack.errors import TubetrackError

    try:
        truth, diameter = _read_truth(args.logs)
        with tempfile.TemporaryDirectory(prefix="tubetrack-oracle-") as tmp:
            con = store.connect(args.db or Path(tmp) / "oracle.duckdb")
            try:
                if args.db is None:
                    from tubetrack.ingest import ingest_paths

                    ingest_paths(con, [args.logs])

                def progress(mode: str, i: int, n: int) -> None:
                    print(f"\r{mode}: cut-off {i}/{n}   ", end="", file=sys.stderr, flush=True)

                table = oracle_backtest(con, truth, diameter, args.every_days, args.warmup_days,
                                        progress=progress)
                print(file=sys.stderr)
            finally:
                con.close()
    except TubetrackError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    rows = [*REPORTED, "alpha_lambda_logged_since_install", "alpha_lambda_installed_before_logs"]
    shown = table.reindex(rows)
    print("| metric | " + " | ".join(shown.columns) + " |")
    print("|---|" + "---|" * len(shown.columns))
    for metric, row in shown.iterrows():
        print(f"| {metric} | " + " | ".join(f"{v:.3f}" for v in row.to_numpy(float)) + " |")
    return 0


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
