"""Budget and spares from the replacement forecast.

Spend: each tube in service has a price (from the user's price list by model label, else the
tube's own ``price`` in the inventory). The spend in a period is the price-weighted sum of
independent replacement indicators, sum_i c_i B_i with B_i ~ Bernoulli(p_i). Its expectation is
exact (sum c_i p_i). For the intervals, the tubes are grouped by distinct price: the count of
each price group is Poisson-binomial (exact), so spend = sum_c price_c N_c with independent N_c;
its quantiles (inverted-CDF, i.e. attained spend values) come from seeded draws of the N_c from
their exact pmfs (default 20,000 draws;
quantile error about sqrt(q (1 - q) / n) in probability, +/- 0.15 percentage points at the
2.5 % tail; with a single price the quantiles are exact multiples of the price). Currencies are
never mixed: one row per currency.

Spares: per model label, the number of replacements over the horizon is the sum of independent
per-tube counts (Poisson-binomial, or with the renewal option counts 0, 1, 2+); the stock for a
service level is the smallest s with P(N <= s) >= level. With parameter draws in the forecast,
N's pmf is the mixture over the draws (predictive), so the stock also covers the uncertainty of
the fitted lifetime model.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from tubetrack.errors import InputError, TubetrackWarning
from tubetrack.fleet.forecast import (
    count_sum_pmf,
    pmf_interval,
    pmf_quantile,
    poisson_binomial_pmf,
)

if TYPE_CHECKING:  # pragma: no cover
    import pandas as pd

    from tubetrack.fleet.forecast import ForecastResult


def load_price_list(path: str | Path) -> pd.DataFrame:
    """Read a price list: CSV (``model_label,price,currency``) or TOML.

    TOML layout: a ``[prices]`` table of ``"<model label>" = { price = 48000, currency = "EUR" }``
    entries, or ``"<model label>" = 48000`` with a top-level ``currency = "EUR"`` default.

    Returns
    -------
    pandas.DataFrame
        ``model_label``, ``price``, ``currency``.

    Raises
    ------
    InputError
        Unreadable file, missing columns, or a price that is not a positive number (names the
        row).
    """
    import pandas as pd

    p = Path(path)
    if not p.exists():
        raise InputError(f"price list {p} does not exist. Give a CSV or TOML file.")
    if p.suffix.lower() == ".toml":
        import tomllib

        try:
            data = tomllib.loads(p.read_text(encoding="utf-8"))
        except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
            raise InputError(f"price list {p}: not valid TOML ({exc}).") from None
        default_cur = data.get("currency")
        prices = data.get("prices")
        if not isinstance(prices, dict):
            raise InputError(
                f"price list {p}: needs a [prices] table of model label -> price."
            )
        rows = []
        for label, v in prices.items():
            if isinstance(v, dict):
                rows.append((label, v.get("price"), v.get("currency", default_cur)))
            else:
                rows.append((label, v, default_cur))
        frame = pd.DataFrame(rows, columns=["model_label", "price", "currency"])
    else:
        try:
            frame = pd.read_csv(p, dtype={"model_label": str, "currency": str})
        except (
            pd.errors.ParserError,
            UnicodeDecodeError,
            pd.errors.EmptyDataError,
        ) as exc:
            raise InputError(
                f"price list {p}: cannot read it as CSV ({exc})."
            ) from None
        frame.columns = [c.strip().lower() for c in frame.columns]
        if "price_currency" in frame.columns and "currency" not in frame.columns:
            frame = frame.rename(columns={"price_currency": "currency"})
        missing = {"model_label", "price"} - set(frame.columns)
        if missing:
            raise InputError(
                f"price list {p}: missing column(s) {', '.join(sorted(missing))}. "
                "Expected header: model_label,price,currency."
            )
        if "currency" not in frame.columns:
            frame["currency"] = None
        frame = frame[["model_label", "price", "currency"]]
    price = pd.to_numeric(frame["price"], errors="coerce")
    bad = price.isna() | (price <= 0)
    if bad.any():
        i = int(np.flatnonzero(bad.to_numpy())[0])
        raise InputError(
            f"price list {p}: the price of {frame['model_label'].iloc[i]!r} is "
            f"{str(frame['price'].iloc[i])!r}, not a positive number. Fix that row."
        )
    frame = frame.assign(price=price.astype(float))
    if frame["model_label"].duplicated().any():
        dup = frame.loc[frame["model_label"].duplicated(), "model_label"].iloc[0]
        raise InputError(f"price list {p}: model label {dup!r} appears twice.")
    return frame.reset_index(drop=True)


def tube_prices(
    per_tube: pd.DataFrame, price_list: pd.DataFrame | None
) -> pd.DataFrame:
    """Price of each forecast tube: price list by model label, else the tube's own price.

    Returns ``per_tube`` with ``unit_price``, ``currency`` and ``price_source``
    (price_list | tube | missing).
    """
    out = per_tube.copy()
    own = out["price"].astype(float)
    own_cur = out["price_currency"]
    if price_list is not None and len(price_list):
        m = out[["model_label"]].merge(
            price_list.rename(columns={"price": "_lp", "currency": "_lc"}),
            on="model_label",
            how="left",
        )
        lp = m["_lp"].to_numpy(dtype=float)
        lc = m["_lc"].to_numpy(dtype=object)
    else:
        lp = np.full(len(out), np.nan)
        lc = np.full(len(out), None, dtype=object)
    use_list = np.isfinite(lp)
    out["unit_price"] = np.where(use_list, lp, own.to_numpy())
    out["currency"] = np.where(use_list, lc, own_cur.to_numpy(dtype=object))
    out["currency"] = out["currency"].fillna("(unknown)")
    out["price_source"] = np.where(
        use_list, "price_list", np.where(np.isfinite(own.to_numpy()), "tube", "missing")
    )
    return out


@dataclass(frozen=True)
class BudgetResult:
    """Expected spend per period and currency with simulation intervals.

    ``summary`` columns: ``period`` (month or quarter label), ``period_kind`` (month | quarter),
    ``period_start``, ``currency``, ``expected_spend``, ``spend_lower_80``, ``spend_upper_80``,
    ``spend_lower_95``, ``spend_upper_95``, ``expected_replacements``, ``tubes_priced``,
    ``tubes_unpriced``.
    """

    summary: pd.DataFrame
    prices: pd.DataFrame
    n_sims: int
    seed: int


def spend_forecast(
    forecast: ForecastResult,
    price_list: pd.DataFrame | None = None,
    *,
    n_sims: int = 20000,
    seed: int = 20261202,
    max_draws: int = 50,
) -> BudgetResult:
    """Expected spend per month and quarter with 80 % and 95 % intervals (see module notes).

    When the forecast carries parameter draws (``parameter_draws`` > 0), each simulated spend
    first picks one of the first ``max_draws`` parameter draws (equal shares) and then draws the
    per-price counts under it: predictive intervals that include the Weibull parameter
    uncertainty. The expected spend stays the plug-in value.
    """
    import pandas as pd

    prices = tube_prices(forecast.per_tube, price_list)
    missing = prices["price_source"] == "missing"
    if missing.any():
        warnings.warn(
            f"{int(missing.sum())} tube(s) have no price (e.g. {prices.loc[missing, 'tube_id'].iloc[0]},"
            f" model {prices.loc[missing, 'model_label'].iloc[0]!r}); their spend is left out. "
            "Add their model label to the price list.",
            TubetrackWarning,
            stacklevel=2,
        )
    t = forecast.tubes.merge(
        prices[["tube_id", "unit_price", "currency"]], on="tube_id"
    )
    t["quarter"] = pd.PeriodIndex(pd.to_datetime(t["month"]), freq="Q").astype(str)
    t["month_label"] = pd.to_datetime(t["month"]).dt.strftime("%Y-%m")
    rng = np.random.default_rng(seed)
    pos = {tid: i for i, tid in enumerate(forecast.per_tube["tube_id"])}
    draws = forecast.draws_monthly
    if draws is not None:
        draws = draws[:max_draws]
    rows = []
    for kind, key in (("month", "month_label"), ("quarter", "quarter")):
        cols_of = t.groupby(key)["month_index"].unique()
        g = (
            t.groupby([key, "tube_id", "currency"], sort=True)
            .agg(
                p=("p_replace", "sum"),
                price=("unit_price", "first"),
                start=("month", "min"),
            )
            .reset_index()
        )
        for (period, cur), gg in g.groupby([key, "currency"], sort=True):
            priced = gg[np.isfinite(gg["price"].to_numpy(dtype=float))]
            p = np.clip(priced["p"].to_numpy(dtype=float), 0, 1)
            c = priced["price"].to_numpy(dtype=float)
            # exact Poisson-binomial count per distinct price, then seeded draws of the counts
            sims = np.zeros(n_sims)
            if draws is None or not len(priced):
                for price_value in np.unique(c):
                    pmf = poisson_binomial_pmf(p[c == price_value])
                    sims += price_value * rng.choice(
                        len(pmf), size=n_sims, p=pmf / pmf.sum()
                    )
            else:
                idx = priced["tube_id"].map(pos).to_numpy()
                cols = np.asarray(cols_of[period]) - 1
                chunks = np.array_split(np.arange(n_sims), len(draws))
                for d, chunk in enumerate(chunks):
                    p_d = np.clip(draws[d][idx][:, cols].sum(axis=1), 0, 1)
                    for price_value in np.unique(c):
                        pmf = poisson_binomial_pmf(p_d[c == price_value])
                        sims[chunk] += price_value * rng.choice(
                            len(pmf), size=len(chunk), p=pmf / pmf.sum()
                        )
            q = (
                np.quantile(sims, [0.025, 0.10, 0.90, 0.975], method="inverted_cdf")
                if len(p)
                else np.zeros(4)
            )
            rows.append(
                {
                    "period": period,
                    "period_kind": kind,
                    "period_start": gg["start"].min(),
                    "currency": cur,
                    "expected_spend": float(np.dot(p, c)),
                    "spend_lower_80": q[1],
                    "spend_upper_80": q[2],
                    "spend_lower_95": q[0],
                    "spend_upper_95": q[3],
                    "expected_replacements": float(gg["p"].sum()),
                    "tubes_priced": len(priced),
                    "tubes_unpriced": len(gg) - len(priced),
                }
            )
    return BudgetResult(
        summary=pd.DataFrame(rows), prices=prices, n_sims=n_sims, seed=seed
    )


@dataclass(frozen=True)
class SparesResult:
    """Spares per model label for a service level.

    ``summary`` columns: ``model_label``, ``tubes_in_service``, ``expected_replacements``,
    ``lower_95``, ``upper_95``, ``service_level``, ``spares_needed`` (smallest s with
    P(N <= s) >= level), ``p_enough`` (P(N <= spares_needed)), ``p_stockout``, ``horizon_days``.
    """

    summary: pd.DataFrame


def spares_plan(
    forecast: ForecastResult, service_level: float = 0.95, *, by: str = "model_label"
) -> SparesResult:
    """Smallest stock per model that covers the horizon's replacements with ``service_level``."""
    import pandas as pd

    if not 0 < service_level < 1:
        raise InputError(
            f"--service-level is {service_level!r}; give a probability between 0 and 1 "
            "(e.g. 0.95)."
        )
    per = forecast.per_tube.reset_index(drop=True)
    horizon_days = (
        (
            forecast.tubes["period_end_utc"].max() - pd.Timestamp(forecast.as_of)
        ).total_seconds()
        / 86400.0
        if len(forecast.tubes)
        else 0.0
    )
    rows = []
    labels = per[by].fillna("(unknown)")
    draws = forecast.draws_cumulative_pmf
    for label, idx in per.groupby(labels, sort=True).groups.items():
        pmfs = forecast.cumulative_pmf[np.asarray(idx)]
        if draws is None:
            pmf = count_sum_pmf(pmfs)
        else:  # predictive: mixture over the Weibull parameter draws
            pmf = np.mean([count_sum_pmf(dp[np.asarray(idx)]) for dp in draws], axis=0)
        s = pmf_quantile(pmf, service_level)
        lo, hi = pmf_interval(pmf, 0.95)
        p_ok = float(np.cumsum(pmf)[s])
        rows.append(
            {
                "model_label": label,
                "tubes_in_service": len(idx),
                "expected_replacements": float((pmfs @ np.arange(pmfs.shape[1])).sum()),
                "lower_95": lo,
                "upper_95": hi,
                "service_level": service_level,
                "spares_needed": s,
                "p_enough": p_ok,
                "p_stockout": 1 - p_ok,
                "horizon_days": horizon_days,
            }
        )
    return SparesResult(summary=pd.DataFrame(rows))
