"""A level factor is one specification: a toy factor defined in this file alone is carried by the
delivery model, its Monte Carlo draws and the posterior update from posted actuals.

The toy factor (invented) is a zone-wide level error, shared by every unit of one zone:
``LevelFactor("zone", ("zone",), ...)``, optional (tables without its column read as zeros).
It is handed to the code as a specification (`forecasting.factors.in_draw_order`), as a new
entry of `forecasting.factors.LEVEL_FACTORS` would be: nothing in planner/ names it. Each check
compares with a computation written out here: the covariance built entry by entry, the Gaussian
posterior in its covariance form (not the code's information form), and the method-of-moments
scores refusing a factor their layout has no term for.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from forecasting.factors import DRAWN, LEVEL_FACTORS, LevelFactor, in_draw_order
from forecasting.scoring import measured_factor_sds
from planner.delivery import DeliveryModel
from planner.posterior import level_posterior, persistent, update_forecast
from test_delivery import dense_covariance, synthetic_units

ZONE = LevelFactor("zone", ("zone",), "zone (toy)", optional=True, measured=False)
WITH_ZONE = in_draw_order(LEVEL_FACTORS + (ZONE,))


def _units(seed: int = 4) -> pd.DataFrame:
    u = synthetic_units(zones=3, networks=3, weeks=3, seed=seed)
    u["level_sd_zone"] = 0.2 * u["mean_impressions"]
    return u


def test_the_toy_factor_is_drawn_last_and_persists_across_weeks():
    """The specification alone places it: after every named factor (seeded draws of tables without
    it unchanged) and, having no week among its keys, among the factors the posterior learns."""
    assert WITH_ZONE[:len(DRAWN)] == DRAWN and WITH_ZONE[-1] is ZONE
    assert ZONE in persistent(WITH_ZONE) and ZONE not in persistent(DRAWN)


def test_toy_factor_variance_matches_dense_covariance_and_monte_carlo():
    """Quadratic variance = x'Sx with S built entry by entry: the shipped factors' covariance
    (tests/test_delivery.py `dense_covariance`) plus the zone loadings' outer product over pairs of
    units in one zone. Monte Carlo (40,000 draws): mean within 4 standard errors (se = sd / 200),
    sd within 3% (the se of a sample sd is about sd / sqrt(2 n) = 0.35% of it)."""
    u = _units()
    dm = DeliveryModel.from_units(u, factors=WITH_ZONE)
    base = DeliveryModel.from_units(u)  # the shipped specification: the column is not read
    x = np.random.default_rng(5).integers(0, 4, len(u)).astype(float)
    keep = 1 - u["preempt_rate"].to_numpy()
    z = u["level_sd_zone"].to_numpy() * keep
    same_zone = u["zone"].to_numpy()[:, None] == u["zone"].to_numpy()[None, :]
    S = dense_covariance(u) + np.outer(z, z) * same_zone
    assert dm.quadratic_variance(x) == pytest.approx(float(x @ S @ x), rel=1e-12)
    assert base.quadratic_variance(x) == pytest.approx(float(x @ dense_covariance(u) @ x), rel=1e-12)
    assert np.allclose(dm.quadratic_gradient(x), S @ x, rtol=1e-10)
    fl = dm.factor_loadings(x)
    assert list(fl.zone.index) == ["z0", "z1", "z2"]
    assert fl.zone.to_numpy() == pytest.approx([float((z * x)[u["zone"] == k].sum()) for k in ("z0", "z1", "z2")])
    rng = np.random.default_rng(9)
    for exact in (True, False):
        d = dm.sample(x, 40_000, rng, exact=exact)
        assert abs(d.mean() - dm.mean(x)) < 4 * dm.sd(x) / np.sqrt(40_000)
        assert d.std() == pytest.approx(dm.sd(x), rel=0.03)


def test_toy_factor_posterior_matches_the_covariance_form():
    """Postings of zone z0's units in week 1: the posterior of the persistent factors (network,
    flight, zone) equals the textbook conditional of a joint normal, mean = H'(H H' + R)^-1 (y - mu)
    and covariance I - H'(H H' + R)^-1 H (Rasmussen & Williams 2006, eq. A.6), with H and R written
    out here; a later week's row of a posted flight keeps its posterior level variance exactly
    (h' V h plus its own week factor)."""
    u = _units(seed=7)
    obs = u[(u["zone"] == "z0") & (u["week"] == 1)].copy()
    obs["spots_aired"] = 2
    rng = np.random.default_rng(3)
    obs["impressions"] = obs["spots_aired"] * obs["mean_impressions"] * rng.uniform(0.7, 1.1, len(obs))
    post = level_posterior(obs, factors=WITH_ZONE)
    assert list(post.groups) == ["network", "flight", "zone"]
    nets, flts = list(post.networks), list(post.flights)
    J, K = len(obs), len(nets) + len(flts) + 1
    H = np.zeros((J, K))
    for j, r in enumerate(obs.itertuples()):
        H[j, nets.index(r.network)] = r.level_sd_network
        H[j, len(nets) + flts.index((r.zone, r.network, r.daypart))] = r.level_sd_flight
        H[j, K - 1] = r.level_sd_zone
    R = np.diag(obs["level_sd_week"].to_numpy() ** 2 + obs["airing_sd"].to_numpy() ** 2 / 2)
    resid = obs["impressions"].to_numpy() / 2 - obs["mean_impressions"].to_numpy()
    gain = H.T @ np.linalg.inv(H @ H.T + R)
    np.testing.assert_allclose(post.mean, gain @ resid, rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(post.cov, np.eye(K) - gain @ H, rtol=1e-8, atol=1e-10)
    later = u[(u["zone"] == "z0") & (u["week"] == 3)]
    new = update_forecast(later, post, factors=WITH_ZONE)
    for i, r in enumerate(later.itertuples()):
        h = np.zeros(K)
        h[nets.index(r.network)] = r.level_sd_network
        h[len(nets) + flts.index((r.zone, r.network, r.daypart))] = r.level_sd_flight
        h[K - 1] = r.level_sd_zone
        assert new["mean_impressions"].iloc[i] == pytest.approx(r.mean_impressions + h @ post.mean, rel=1e-10)
        assert new["level_sd"].iloc[i] ** 2 == pytest.approx(h @ post.cov @ h + r.level_sd_week ** 2, rel=1e-8)


def test_a_measured_toy_factor_the_layout_cannot_measure_is_refused():
    """The method-of-moments scores name each measured factor by its layout term; a factor whose
    keys have no term (a zone-wide factor is not nested in the network) is refused in words, not
    given another factor's estimate."""
    rng = np.random.default_rng(0)
    n = 600
    args = (0.1 * rng.standard_normal(n), rng.integers(0, 4, n), rng.integers(0, 5, n), rng.integers(0, 6, n))
    assert list(measured_factor_sds(*args)) == ["network", "network_week", "flight", "week"]
    assert list(measured_factor_sds(*args, factors=LEVEL_FACTORS + (ZONE,))) == ["network", "network_week", "flight", "week"]
    measured = LevelFactor("zone", ("zone",), "zone (toy)", optional=True)
    with pytest.raises(ValueError, match="level factor 'zone'.*measured=False"):
        measured_factor_sds(*args, factors=LEVEL_FACTORS + (measured,))
