"""DeliveryModel against independent computations (dense covariance, finite differences, Monte Carlo)."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import optimize, stats

from planner.delivery import DeliveryModel


def synthetic_units(zones=3, networks=4, dayparts=("day", "prime"), weeks=4, seed=0,
                    preempt=0.05, level_scale=0.15, airing_scale=0.4):
    """Small invented unit table (forecast joined with inventory), impressions per spot."""
    rng = np.random.default_rng(seed)
    idx = pd.MultiIndex.from_product(
        [[f"z{i}" for i in range(zones)], [f"n{i}" for i in range(networks)], list(dayparts),
         list(range(1, weeks + 1))], names=["zone", "network", "daypart", "week"])
    u = idx.to_frame(index=False)
    n = len(u)
    mu = rng.uniform(2_000, 20_000, n) * np.where(u["daypart"] == "prime", 2.0, 1.0)
    u["demo"] = "a25-54"
    u["mean_impressions"] = mu
    u["airing_sd"] = airing_scale * mu * rng.uniform(0.5, 1.5, n)
    u["level_sd_network"] = level_scale * 0.5 * mu
    u["level_sd_flight"] = level_scale * 0.7 * mu
    u["level_sd_week"] = level_scale * 0.5 * mu
    u["level_sd"] = np.sqrt(u["level_sd_network"] ** 2 + u["level_sd_flight"] ** 2 + u["level_sd_week"] ** 2)
    u["avails"] = rng.integers(0, 8, n)
    u["rate"] = np.round(mu / 1000 * rng.uniform(8, 30, n), 2)
    u["preempt_rate"] = preempt
    return u


def dense_covariance(u):
    """Covariance of the per-spot deliveries built entry by entry from the error model."""
    p = u["preempt_rate"].to_numpy()
    keep = 1 - p
    net = u["network"].to_numpy()
    flt = (u["zone"] + "|" + u["network"] + "|" + u["daypart"]).to_numpy()
    a_n = u["level_sd_network"].to_numpy() * keep
    a_f = u["level_sd_flight"].to_numpy() * keep
    a_w = u["level_sd_week"].to_numpy() * keep
    S = np.outer(a_n, a_n) * (net[:, None] == net[None, :]) + np.outer(a_f, a_f) * (flt[:, None] == flt[None, :])
    S += np.diag(a_w ** 2)
    return S


def test_moments_match_dense_formulation():
    u = synthetic_units()
    dm = DeliveryModel.from_units(u)
    x = np.random.default_rng(1).integers(0, 4, len(u)).astype(float)
    S = dense_covariance(u)
    keep = 1 - u["preempt_rate"].to_numpy()
    mu = u["mean_impressions"].to_numpy()
    assert dm.mean(x) == pytest.approx(float(x @ (keep * mu)), rel=1e-12)
    assert dm.quadratic_variance(x) == pytest.approx(float(x @ S @ x), rel=1e-12)
    p = u["preempt_rate"].to_numpy()
    lin = x @ (keep * u["airing_sd"] ** 2 + p * keep * (mu ** 2 + u["level_sd"] ** 2))
    assert dm.linear_variance(x) == pytest.approx(float(lin), rel=1e-12)
    fl = dm.factor_loadings(x)
    assert fl.quadratic_variance == pytest.approx(dm.quadratic_variance(x), rel=1e-12)
    assert fl.mean == pytest.approx(dm.mean(x))


def test_sd_gradient_matches_finite_differences():
    # Reference: scipy.optimize.approx_fprime (forward differences).
    u = synthetic_units(seed=3)
    dm = DeliveryModel.from_units(u)
    x = np.random.default_rng(2).uniform(0, 4, len(u))
    l0 = dm.linear_variance(x)
    f = lambda y: np.sqrt(dm.quadratic_variance(y) + l0)  # noqa: E731
    num = optimize.approx_fprime(x, f, 1e-4)
    assert np.allclose(dm.sd_gradient(x, l0), num, rtol=1e-4, atol=1e-3)


def test_monte_carlo_matches_moments_and_probability():
    u = synthetic_units(seed=5, preempt=0.1)
    dm = DeliveryModel.from_units(u)
    x = np.random.default_rng(4).integers(0, 4, len(u)).astype(float)
    rng = np.random.default_rng(7)
    draws = 40_000
    for exact in (True, False):
        d = dm.sample(x, draws, rng, exact=exact)
        se_mean = dm.sd(x) / np.sqrt(draws)
        assert abs(d.mean() - dm.mean(x)) < 4 * se_mean
        assert d.std() == pytest.approx(dm.sd(x), rel=0.03)
        g = dm.mean(x) - 1.2816 * dm.sd(x)  # z(0.90), NIST/SEMATECH normal table
        assert abs((d >= g).mean() - dm.probability(x, g)) < 0.01


def test_network_week_factor_matches_dense_covariance_and_monte_carlo():
    """A factor shared by every unit of a network in one week (all zones and dayparts): the
    quadratic variance equals x'Sx with S built entry by entry, and Monte Carlo draws (exact and
    conditional) reproduce the mean and sd."""
    u = synthetic_units(seed=9, preempt=0.05)
    u["level_sd_network_week"] = 0.08 * u["mean_impressions"]
    dm = DeliveryModel.from_units(u)
    x = np.random.default_rng(3).integers(0, 4, len(u)).astype(float)
    keep = 1 - u["preempt_rate"].to_numpy()
    g = u["level_sd_network_week"].to_numpy() * keep
    same = (u["network"].to_numpy()[:, None] == u["network"].to_numpy()[None, :]) & (
        u["week"].to_numpy()[:, None] == u["week"].to_numpy()[None, :])
    S = dense_covariance(u) + np.outer(g, g) * same
    assert dm.quadratic_variance(x) == pytest.approx(float(x @ S @ x), rel=1e-12)
    assert dm.quadratic_variance(x) > DeliveryModel.from_units(u.drop(columns="level_sd_network_week")).quadratic_variance(x)
    assert np.allclose(dm.quadratic_gradient(x), S @ x, rtol=1e-10)
    fl = dm.factor_loadings(x)
    assert fl.quadratic_variance == pytest.approx(dm.quadratic_variance(x), rel=1e-12)
    assert fl.network_week.index.names == ["network", "week"]
    rng = np.random.default_rng(8)
    for exact in (True, False):
        d = dm.sample(x, 40_000, rng, exact=exact)
        assert abs(d.mean() - dm.mean(x)) < 4 * dm.sd(x) / np.sqrt(40_000)
        assert d.std() == pytest.approx(dm.sd(x), rel=0.03)


def test_common_factor_matches_dense_covariance_and_monte_carlo():
    """A factor shared by every unit (all zones, networks, dayparts and weeks): the quadratic
    variance equals x'Sx with S built entry by entry (S gains the outer product of the common
    loadings), and Monte Carlo draws (exact and conditional) reproduce the mean and sd."""
    u = synthetic_units(seed=10, preempt=0.05)
    u["level_sd_network_week"] = 0.03 * u["mean_impressions"]
    u["level_sd_common"] = 0.06 * u["mean_impressions"]
    dm = DeliveryModel.from_units(u)
    x = np.random.default_rng(5).integers(0, 4, len(u)).astype(float)
    keep = 1 - u["preempt_rate"].to_numpy()
    g = u["level_sd_network_week"].to_numpy() * keep
    c = u["level_sd_common"].to_numpy() * keep
    same = (u["network"].to_numpy()[:, None] == u["network"].to_numpy()[None, :]) & (
        u["week"].to_numpy()[:, None] == u["week"].to_numpy()[None, :])
    S = dense_covariance(u) + np.outer(g, g) * same + np.outer(c, c)
    assert dm.quadratic_variance(x) == pytest.approx(float(x @ S @ x), rel=1e-12)
    assert np.allclose(dm.quadratic_gradient(x), S @ x, rtol=1e-10)
    fl = dm.factor_loadings(x)
    assert fl.common == pytest.approx(float(c @ x))
    assert fl.quadratic_variance == pytest.approx(dm.quadratic_variance(x), rel=1e-12)
    # the per-spot preemption variance counts the common level variance too
    without = DeliveryModel.from_units(u.drop(columns="level_sd_common"))
    assert dm.linear_variance(x) > without.linear_variance(x)
    rng = np.random.default_rng(9)
    for exact in (True, False):
        d = dm.sample(x, 40_000, rng, exact=exact)
        assert abs(d.mean() - dm.mean(x)) < 4 * dm.sd(x) / np.sqrt(40_000)
        assert d.std() == pytest.approx(dm.sd(x), rel=0.03)


def test_probability_uses_normal_quantiles():
    # z values from the NIST/SEMATECH e-Handbook normal table: z(0.95) = 1.6449, z(0.99) = 2.3263.
    u = synthetic_units(seed=6)
    dm = DeliveryModel.from_units(u)
    x = np.ones(len(u))
    for c, z in ((0.95, 1.6449), (0.99, 2.3263), (0.90, 1.2816)):
        g = dm.mean(x) - z * dm.sd(x)
        assert dm.probability(x, g) == pytest.approx(c, abs=1e-4)
        assert stats.norm.ppf(c) == pytest.approx(z, abs=1e-4)


def test_independent_errors_understate_variance_on_a_big_plan():
    u = synthetic_units(zones=4, networks=5, weeks=6, seed=8)
    dm = DeliveryModel.from_units(u)
    x = np.full(len(u), 3.0)
    assert dm.independent_variance(x) < 0.5 * dm.variance(x)


def test_empty_plan():
    dm = DeliveryModel.from_units(synthetic_units())
    x = np.zeros(dm.n)
    assert dm.mean(x) == 0 and dm.variance(x) == 0
    assert dm.probability(x, 1.0) == 0.0
    assert np.all(dm.sample(x, 10, np.random.default_rng(0)) == 0)
