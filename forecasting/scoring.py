"""Probabilistic scores: CRPS (Gaussian closed form and from samples), WAPE, coverage, PIT.

References
----------
Gneiting, T. & Raftery, A. E. (2007). Strictly proper scoring rules, prediction, and
estimation. JASA 102(477), 359-378 (CRPS, its Gaussian closed form and the energy form).
"""
from __future__ import annotations

import numpy as np
from scipy.stats import norm


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
