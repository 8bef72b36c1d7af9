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
    # Total variance summed over pairs of bought spots (not the code's quadratic + linear split):
    # two different spots s != t of units i, j covary through the level factors only,
    # Cov = q_i q_j C_ij (C the level covariance without preemption, A's independent); one spot
    # with itself: E[A^2 (mu + L + e)^2] - (q mu)^2 = q (mu^2 + C_ii + airing^2) - q^2 mu^2.
    # Over x_i x_j pairs of which x_i are the same spot: x'(qq' * C)x - sum x_i q_i^2 C_ii + the own terms.
    q = keep
    C = S / np.outer(q, q)
    airing2 = u["airing_sd"].to_numpy() ** 2
    own = x @ (q * (mu ** 2 + np.diag(C) + airing2) - q ** 2 * mu ** 2)
    pairs = x @ S @ x - x @ (q ** 2 * np.diag(C))
    assert dm.variance(x) == pytest.approx(float(pairs + own), rel=1e-12)
    fl = dm.factor_loadings(x)
    assert fl.quadratic_variance == pytest.approx(dm.quadratic_variance(x), rel=1e-12)
    assert fl.mean == pytest.approx(dm.mean(x))


def test_variance_of_two_spots_of_one_unit_hand_worked():
    """One unit, mean 1,000 impressions per spot, preemption 10% (q = 0.9 airs), own level sd
    200, airing sd 300; two spots: D = (A1 + A2)(mu + L) + A1 e1 + A2 e2. By hand:
    E[(A1 + A2)^2] = 2q + 2q^2 = 3.42, E[(mu + L)^2] = 1,000,000 + 40,000, so
    Var D = 3.42 x 1,040,000 - (2 x 0.9 x 1,000)^2 + 2 x 0.9 x 90,000 = 478,800; one spot:
    0.9 x 1,130,000 - 810,000 = 207,000."""
    u = pd.DataFrame({"zone": ["z"], "network": ["n"], "daypart": ["d"], "week": [1], "mean_impressions": [1000.0],
                      "airing_sd": [300.0], "level_sd_network": [0.0], "level_sd_flight": [0.0],
                      "level_sd_week": [200.0], "preempt_rate": [0.1]})
    dm = DeliveryModel.from_units(u)
    assert dm.variance(np.array([2.0])) == pytest.approx(478_800.0, rel=1e-12)
    assert dm.variance(np.array([1.0])) == pytest.approx(207_000.0, rel=1e-12)
    assert dm.mean(np.array([2.0])) == pytest.approx(1_800.0)


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
        # standard error of a sample sd: sd sqrt((kurtosis - 1) / (4 n)) (delta method), kurtosis
        # estimated from the draws (scipy)
        se_sd = d.std() * np.sqrt((stats.kurtosis(d, fisher=False) - 1) / (4 * draws))
        assert abs(d.std() - dm.sd(x)) < 4 * se_sd
        g = dm.mean(x) - 1.2816 * dm.sd(x)  # z(0.90), NIST/SEMATECH normal table
        p = (d >= g).mean()
        # 0.003 for the normal approximation (skew of preemption) + 4 binomial standard errors
        assert abs(p - dm.probability(x, g)) < 0.003 + 4 * np.sqrt(p * (1 - p) / draws)
    # the same against the Monte Carlo of the documented error law written in the tests
    # (tests/test_faults.py::_mc_totals), not the model's own sampler
    from test_faults import _mc_totals

    t = _mc_totals(u, x, draws, seed=9)
    assert abs(t.mean() - dm.mean(x)) < 4 * t.std() / np.sqrt(draws)
    assert abs(t.std() - dm.sd(x)) < 4 * t.std() * np.sqrt((stats.kurtosis(t, fisher=False) - 1) / (4 * draws))


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
