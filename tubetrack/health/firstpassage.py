"""Statistical cross-check: Wiener process with drift and its inverse-Gaussian first passage.

The diameter-loss index X(t) is modelled as X(t) = X(0) + mu t + sigma W(t). The time for the
remaining distance ``d`` to the end-of-life threshold to be covered is inverse Gaussian with mean
``d / mu`` and shape ``d^2 / sigma^2``::

    F(t) = Phi( sqrt(lam/t) (t/m - 1) ) + exp(2 lam / m) Phi( -sqrt(lam/t) (t/m + 1) )

(Chhikara & Folks 1989, eq. 2.3; the second term is evaluated in log space so it does not overflow.)
Drift and diffusion are the maximum-likelihood estimates from the increments of an irregularly
sampled path (Whitmore 1995, section 3): mu = (x_n - x_0)/(t_n - t_0),
sigma^2 = sum((dx - mu dt)^2 / dt) / (n - 1).

References
----------
Chhikara R.S., Folks J.L., The Inverse Gaussian Distribution: Theory, Methodology and
Applications, Marcel Dekker 1989, ch. 2.
Whitmore G.A., "Estimating degradation by a Wiener diffusion process subject to measurement
error", Lifetime Data Analysis 1 (1995) 307-319.
"""

from __future__ import annotations

import numpy as np
from scipy.special import log_ndtr, ndtr


def ig_params(drift_per_day: float, sigma_per_sqrt_day: float, distance: float) -> tuple[float, float]:
    """Mean [days] and shape [days] of the first-passage time of a Wiener process with drift."""
    return distance / drift_per_day, (distance / sigma_per_sqrt_day) ** 2


def ig_cdf(t_days, drift_per_day: float, sigma_per_sqrt_day: float, distance: float):
    """P(first passage <= t) of a Wiener process with drift to a barrier ``distance`` away.

    Parameters
    ----------
    t_days
        Horizons [days] (scalar or array).
    drift_per_day
        Drift mu [index/day]; <= 0 gives the defective case (probability from the reflection
        formula, below one at infinity).
    sigma_per_sqrt_day
        Diffusion sigma [index/sqrt(day)], > 0.
    distance
        Remaining distance to the threshold [index]; <= 0 means already crossed (F = 1).

    Returns
    -------
    ndarray
        Probabilities [1].
    """
    t = np.asarray(t_days, float)
    if distance <= 0:
        return np.ones_like(t)
    sig = float(sigma_per_sqrt_day)
    mu = float(drift_per_day)
    with np.errstate(divide="ignore", invalid="ignore"):
        st = sig * np.sqrt(t)
        # Wiener first passage (valid for any sign of mu): Phi((mu t - d)/(s sqrt t))
        #   + exp(2 mu d / s^2) Phi((-mu t - d)/(s sqrt t)); equals the IG CDF for mu > 0.
        a = ndtr((mu * t - distance) / st)
        logb = 2.0 * mu * distance / sig**2 + log_ndtr((-mu * t - distance) / st)
        out = a + np.exp(logb)
    out = np.where(t <= 0, 0.0, out)
    return np.clip(out, 0.0, 1.0)


def ig_ppf(q, drift_per_day: float, sigma_per_sqrt_day: float, distance: float):
    """Quantiles of the first-passage time [days]; ``inf`` where the path may never cross."""
    from scipy.stats import invgauss

    q = np.asarray(q, float)
    if distance <= 0:
        return np.zeros_like(q)
    if drift_per_day <= 0:
        return np.full_like(q, np.inf)
    m, lam = ig_params(drift_per_day, sigma_per_sqrt_day, distance)
    return invgauss.ppf(q, m / lam, scale=lam)


def fit_wiener(t_days, x) -> tuple[float, float]:
    """Maximum-likelihood drift [1/day] and diffusion [1/sqrt(day)] from one sampled path."""
    t = np.asarray(t_days, float)
    x = np.asarray(x, float)
    ok = np.isfinite(t) & np.isfinite(x)
    t, x = t[ok], x[ok]
    if t.size < 3 or t[-1] <= t[0]:
        return float("nan"), float("nan")
    dt = np.diff(t)
    dx = np.diff(x)
    keep = dt > 0
    dt, dx = dt[keep], dx[keep]
    mu = float((x[-1] - x[0]) / (t[-1] - t[0]))
    sigma2 = float(np.sum((dx - mu * dt) ** 2 / dt) / max(dx.size - 1, 1))
    return mu, float(np.sqrt(sigma2))
