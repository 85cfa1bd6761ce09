"""Wiener first passage = inverse Gaussian, checked against scipy.stats.invgauss."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import invgauss

from tubetrack.health import firstpassage as fp


def test_ig_published_check_values():
    # Source: /work/shared/REFERENCES.md "Wiener degradation first passage" [C]: mu = 0.5,
    # sigma = 1, d = 10 -> mean 20, variance 80, P(T <= 20) = 0.585289 (6 printed digits).
    m, lam = fp.ig_params(0.5, 1.0, 10.0)
    assert m == pytest.approx(20.0) and m**3 / lam == pytest.approx(80.0)
    assert float(fp.ig_cdf(20.0, 0.5, 1.0, 10.0)) == pytest.approx(0.585289, abs=5e-7)


def test_ig_cdf_matches_scipy_invgauss_over_a_grid():
    # Reference: scipy.stats.invgauss(mu = m / lam, scale = lam), scipy 1.17.
    t = np.linspace(0.5, 200, 60)
    for drift, sig, d in [(0.5, 1.0, 10.0), (0.02, 0.05, 1.0), (1e-4, 2e-4, 0.03)]:
        m, lam = fp.ig_params(drift, sig, d)
        ref = invgauss.cdf(t * (m / 20.0), m / lam, scale=lam)
        ours = fp.ig_cdf(t * (m / 20.0), drift, sig, d)
        np.testing.assert_allclose(ours, ref, rtol=1e-9, atol=1e-12)
    q = fp.ig_ppf([0.1, 0.5, 0.9], 0.5, 1.0, 10.0)
    np.testing.assert_allclose(fp.ig_cdf(q, 0.5, 1.0, 10.0), [0.1, 0.5, 0.9], atol=1e-9)


def test_edge_cases():
    assert float(fp.ig_cdf(5.0, 0.5, 1.0, 0.0)) == 1.0  # already past the threshold
    assert np.isinf(fp.ig_ppf(0.5, -0.1, 1.0, 1.0)).all()
    # negative drift: defective distribution, P(ever) = exp(2 mu d / s^2) < 1 (reflection formula)
    assert float(fp.ig_cdf(1e9, -0.1, 1.0, 1.0)) == pytest.approx(np.exp(-0.2), rel=1e-6)


def test_fit_wiener_recovers_drift_and_diffusion():
    rng = np.random.default_rng(42)
    t = np.cumsum(rng.uniform(0.5, 3.0, 4000))
    dt = np.diff(t, prepend=0.0)
    x = np.cumsum(0.01 * dt + 0.05 * np.sqrt(dt) * rng.standard_normal(t.size))
    mu, sig = fp.fit_wiener(t, x)
    # standard errors: sd(mu) = sigma / sqrt(T) ~ 6e-5; sd(sigma) ~ sigma / sqrt(2n) ~ 6e-4
    assert mu == pytest.approx(0.01, abs=4 * 0.05 / np.sqrt(t[-1] - t[0]))
    assert sig == pytest.approx(0.05, abs=4 * 0.05 / np.sqrt(2 * t.size))
