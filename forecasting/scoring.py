"""Probabilistic scores: CRPS (Gaussian closed form and from samples), WAPE, coverage, PIT.

References
----------
Gneiting, T. & Raftery, A. E. (2007). Strictly proper scoring rules, prediction, and
estimation. JASA 102(477), 359-378 (CRPS, its Gaussian closed form and the energy form).
"""
from __future__ import annotations

import numpy as np
import pandas as pd
from scipy.stats import norm

from .factors import LEVEL_FACTORS, LevelFactor


def crps_gaussian(y, mu, sigma) -> np.ndarray:
    """CRPS of a normal forecast N(mu, sigma^2) at observation y (same unit as y).

    ``CRPS = sigma * [z (2 Phi(z) - 1) + 2 phi(z) - 1/sqrt(pi)]``, ``z = (y - mu)/sigma``;
    sigma = 0 gives the absolute error.

    References
    ----------
    Gneiting & Raftery (2007), JASA 102(477), eq. (21).
    """
    y, mu, sigma = np.broadcast_arrays(*(np.asarray(a, dtype=float) for a in (y, mu, sigma)))
    out = np.array(np.abs(y - mu), dtype=float)
    pos = np.asarray(sigma > 0)
    z = (y[pos] - mu[pos]) / sigma[pos]
    out[pos] = sigma[pos] * (z * (2.0 * norm.cdf(z) - 1.0) + 2.0 * norm.pdf(z) - 1.0 / np.sqrt(np.pi))
    return out


def crps_sample(y, samples) -> np.ndarray:
    """CRPS of an ensemble forecast: ``E|X - y| - E|X - X'| / 2`` (exact for the empirical law).

    Parameters
    ----------
    y : observations, shape (n,).
    samples : shape (n, m), m draws per observation.

    References
    ----------
    Gneiting & Raftery (2007), eq. (20); the sorted-sample form of the second term.
    """
    y = np.atleast_1d(np.asarray(y, dtype=float))
    x = np.sort(np.atleast_2d(np.asarray(samples, dtype=float)), axis=1)
    m = x.shape[1]
    term1 = np.mean(np.abs(x - y[:, None]), axis=1)
    # E|X - X'| = (2 / m^2) * sum_i (2i - m - 1) x_(i), i = 1..m
    i = np.arange(1, m + 1)
    term2 = (2.0 / m**2) * np.sum((2 * i - m - 1) * x, axis=1)
    return term1 - 0.5 * term2


def wape(actual, forecast) -> float:
    """Weighted absolute percentage error ``sum|a - f| / sum|a|`` (fraction)."""
    actual = np.asarray(actual, dtype=float)
    forecast = np.asarray(forecast, dtype=float)
    den = np.sum(np.abs(actual))
    return float(np.sum(np.abs(actual - forecast)) / den) if den > 0 else float("nan")


def central_interval(mu, sigma, level: float) -> tuple[np.ndarray, np.ndarray]:
    """Central `level` interval of N(mu, sigma^2): ``mu -+ z_{(1+level)/2} sigma``."""
    z = norm.ppf(0.5 + level / 2.0)
    mu = np.asarray(mu, dtype=float)
    sigma = np.asarray(sigma, dtype=float)
    return mu - z * sigma, mu + z * sigma


def coverage(y, mu, sigma, level: float) -> float:
    """Share of observations inside the central `level` interval of N(mu, sigma^2) (fraction)."""
    lo, hi = central_interval(mu, sigma, level)
    y = np.asarray(y, dtype=float)
    return float(np.mean((y >= lo) & (y <= hi)))


def pit(y, mu, sigma) -> np.ndarray:
    """Probability integral transform ``Phi((y - mu)/sigma)``: uniform on [0, 1] when calibrated."""
    sigma = np.maximum(np.asarray(sigma, dtype=float), 1e-300)
    return norm.cdf((np.asarray(y, dtype=float) - np.asarray(mu, dtype=float)) / sigma)


def pit_histogram(y, mu, sigma, bins: int = 10) -> np.ndarray:
    """Shares of PIT values in `bins` equal bins (each ~1/bins when calibrated)."""
    counts, _ = np.histogram(pit(y, mu, sigma), bins=bins, range=(0.0, 1.0))
    return counts / max(counts.sum(), 1)


def coverage_if_calibrated(components, levels=(0.5, 0.8, 0.95), draws: int = 500, seed: int = 0,
                           chunk: int = 50) -> np.ndarray:
    """Coverage that a calibrated forecast would show, drawn from its own correlated error law.

    The error of observation i is ``sum_k sd_k[i] * Z_k[group_k[i]]`` with independent standard
    normal factors Z_k, one per group of component k (a factor shared by a group makes its
    observations miss together). The forecast's interval at `level` is ``+- z sd_total[i]`` with
    ``sd_total^2 = sum_k sd_k^2``, so each draw gives the share of observations inside it: the
    coverage one backtest would show if the error law were exactly right. With every
    observation in its own group the count is binomial; with shared factors the spread is wider.

    Parameters
    ----------
    components : sequence of ``(sd, group)`` pairs: sd, shape (n,), in any unit common to all
        components (fractions of the mean); group, shape (n,), integer codes 0..G-1 (the
        observations sharing a factor), or None for a factor of each observation alone.
    levels : central interval levels (fractions).
    draws : Monte Carlo draws of the whole set of observations.
    seed : seed of the random generator (same seed, same draws).

    Returns
    -------
    ndarray, shape (draws, len(levels)): simulated coverage (fractions).

    References
    ----------
    Christoffersen, P. F. (1998). Evaluating interval forecasts. International Economic Review
    39(4), 841-862 (the coverage count of a calibrated interval forecast: binomial when hits are
    independent); here simulated, as the hits of one backtest share network-wide factors.
    """
    comps = [(np.asarray(sd, dtype=float), None if g is None else np.asarray(g, dtype=np.int64))
             for sd, g in components]
    n = comps[0][0].shape[0]
    total = np.sqrt(sum(sd**2 for sd, _ in comps))
    half = norm.ppf(0.5 + np.asarray(levels, dtype=float) / 2.0)[:, None, None] * total  # (L, 1, n)
    rng = np.random.default_rng(seed)
    out = np.empty((int(draws), len(levels)))
    for start in range(0, int(draws), chunk):
        m = min(chunk, int(draws) - start)
        err = np.zeros((m, n))
        for sd, g in comps:
            if g is None:
                err += sd * rng.standard_normal((m, n))
            else:
                err += sd * rng.standard_normal((m, int(g.max()) + 1 if n else 0))[:, g]
        out[start:start + m] = np.mean(np.abs(err)[None] <= half, axis=2).T
    return out


def total_bias_sd(weight, components) -> float:
    """Standard deviation of the relative error of a weighted total under a factor error law.

    The total's relative error is ``sum_i w_i e_i / sum_i w_i`` with
    ``e_i = sum_k sd_k[i] Z_k[group_k[i]]`` (independent standard normal factors, as in
    `coverage_if_calibrated`), so its variance is exactly the sum over components and groups of
    the squared weighted sd of each group.

    Parameters
    ----------
    weight : (n,) non-negative weights of the observations (e.g. forecast impressions).
    components : sequence of ``(sd, group)`` pairs as in `coverage_if_calibrated` (sd as
        fractions of each observation's mean).

    Returns
    -------
    float, the sd of the total's relative error (fraction).

    References
    ----------
    Bienaymé formula: the variance of a sum of independent terms is the sum of their variances.
    """
    w = np.asarray(weight, dtype=float)
    w = w / w.sum()
    var = 0.0
    for sd, group in components:  # each group's factor moves the total by its summed weighted sd
        sd = np.asarray(sd, dtype=float)
        per_factor = w * sd if group is None else np.bincount(np.asarray(group, dtype=np.int64), weights=w * sd)
        var += float(np.sum(per_factor ** 2))
    return float(np.sqrt(var))


#: the nested layout's terms (`measured_factor_sds`) by the set of a factor's grouping keys (None:
#: the unit-week's own); the unit is zone x daypart x demo within a network
_LAYOUT_TERMS = {frozenset({"network"}): "network", frozenset({"network", "week"}): "network_week",
                 frozenset({"zone", "network", "daypart", "demo"}): "unit", None: "own"}


def layout_term(factor: LevelFactor) -> str:
    """The term of `measured_factor_sds`' nested layout that measures `factor` (``network``,
    ``network_week``, ``unit``, ``own``); ValueError for a factor the layout cannot measure (its
    specification should say ``measured=False``)."""
    key = None if factor.keys is None else frozenset(factor.keys)
    if key not in _LAYOUT_TERMS:
        raise ValueError(f"level factor {factor.name!r}: the nested layout of measured_factor_sds has no term "
                         f"for the keys {factor.keys}; give it measured=False or a term of its own")
    return _LAYOUT_TERMS[key]


def measured_factor_sds(rel_error, network, week, unit, factors: tuple[LevelFactor, ...] = LEVEL_FACTORS) -> dict:
    """Standard deviations of the level-error factors measured in one set of scored unit-weeks.

    The relative errors are taken as ``e = a[n] + g[n, w] + b[n, u] + c[n, u, w]`` (network;
    network-week, shared by all units of the network in one week; flight, shared by the weeks of
    one unit; own), with the week and unit factors crossed within each network, and each variance
    is estimated by the method of moments of that two-way layout without replication, pooled over
    networks (expected mean squares of the balanced layout; a few missing unit-weeks bias them
    little). A shift shared by every row cannot be told from a bias in one block, so it is not
    estimated here: the network sd is measured around the mean of the networks.

    Parameters
    ----------
    rel_error : (n,) relative errors ``actual / forecast - 1`` (fractions).
    network, week, unit : (n,) labels of each row's network (one per block when several blocks
        are pooled), week and unit within the network (zone x daypart x demo).

    factors : the level factors (`forecasting.factors.LEVEL_FACTORS`); each one with
        ``measured=True`` is named by its layout term (`layout_term`).

    Returns
    -------
    dict factor name -> sd (fraction; a negative moment estimate is reported as 0), the measured
    factors in `factors` order (``network, network_week, flight, week``).

    References
    ----------
    Searle, S. R., Casella, G. & McCulloch, C. E. (1992). Variance Components. Wiley, ch. 4
    (ANOVA estimators: the two-way crossed classification without interaction replicates, nested
    in a one-way classification).
    """
    df = pd.DataFrame({"e": np.asarray(rel_error, dtype=float), "n": pd.factorize(np.asarray(network))[0],
                       "w": pd.factorize(np.asarray(week))[0], "u": pd.factorize(np.asarray(unit))[0]})
    by_n = df.groupby("n")["e"]
    m_n = by_n.transform("mean")
    m_nw = df.groupby(["n", "w"])["e"].transform("mean")
    m_nu = df.groupby(["n", "u"])["e"].transform("mean")
    U = df.groupby("n")["u"].nunique()
    W = df.groupby("n")["w"].nunique()
    # own: interaction residual, E[sum r^2] = (U - 1)(W - 1) var_c per network
    r = df["e"] - m_nw - m_nu + m_n
    dof_c = float(((U - 1) * (W - 1)).sum())
    var_c = float(np.sum(r.to_numpy() ** 2) / dof_c) if dof_c > 0 else 0.0
    # week means: E[sum_w (m_nw - m_n)^2] = (W - 1)(var_g + var_c / U)
    d_w = (m_nw - m_n).groupby([df["n"], df["w"]]).first()
    ss_w = d_w.pow(2).groupby(level=0).sum()
    dof_w = float((W - 1).sum())
    var_g = float((ss_w.sum() - ((W - 1) * var_c / U).sum()) / dof_w) if dof_w > 0 else 0.0
    # unit means: E[sum_u (m_nu - m_n)^2] = (U - 1)(var_b + var_c / W)
    d_u = (m_nu - m_n).groupby([df["n"], df["u"]]).first()
    ss_u = d_u.pow(2).groupby(level=0).sum()
    dof_u = float((U - 1).sum())
    var_b = float((ss_u.sum() - ((U - 1) * var_c / W).sum()) / dof_u) if dof_u > 0 else 0.0
    var_g, var_b = max(var_g, 0.0), max(var_b, 0.0)
    # network means around their mean: E = (N - 1)/N sum_n (var_a + var_g/W + var_b/U + var_c/(UW)) / N
    means = by_n.mean()
    N = len(means)
    if N > 1:
        inner = var_g / W + var_b / U + var_c / (U * W)
        var_a = float(np.sum((means - means.mean()) ** 2) / (N - 1) - inner.mean())
    else:
        var_a = 0.0
    term = {"network": var_a, "network_week": var_g, "unit": var_b, "own": var_c}
    return {f.name: float(np.sqrt(max(term[layout_term(f)], 0.0))) for f in factors if f.measured}


def pooled_level_ratio(actual, forecast, fold, weight=None, prior: float = 1.0) -> float:
    """Level correction of a forecast from held-out refits: ``exp(sum_j s_j L_j / (sum_j s_j + prior))``
    with ``L_j = log(sum actual / sum forecast)`` over refit j's unit-weeks (impression-weighted:
    what a deal's total needs, and a few unit-weeks with huge ratios cannot set it) and s_j the
    refit's weight (its resemblance to the plan weeks, 1 without `weight`); `prior` refits' worth
    of pull toward no correction, so refits unlike the plan weeks (another season) barely move it.

    Parameters
    ----------
    actual, forecast : (n,) impressions (or ratings) of held-out unit-weeks.
    fold : (n,) refit of each; weight : (n,) the refit's weight (constant within a refit).
    """
    df = pd.DataFrame({"a": np.asarray(actual, float), "f": np.asarray(forecast, float), "fold": np.asarray(fold),
                       "s": 1.0 if weight is None else np.asarray(weight, float)})
    sums = df.groupby("fold").agg(a=("a", "sum"), f=("f", "sum"), s=("s", "first"))
    sums = sums[(sums["a"] > 0) & (sums["f"] > 0)]
    if sums.empty:
        return 1.0
    return float(np.exp(np.sum(sums["s"] * np.log(sums["a"] / sums["f"])) / (sums["s"].sum() + prior)))
