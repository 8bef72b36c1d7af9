"""The log-like rating coordinate ``y = log10(1 + r / c)`` and its exact inverse.

Quarter-hour ratings span orders of magnitude (a few thousandths of a rating point overnight to
about a point at the peak), so models are fitted and errors pooled in a log-like coordinate.
Unlike a plain log it is finite at a true zero (y = 0) and nearly linear below ``c``.

``C_RATING = 1e-4`` (0.01 rating point): below it, measured quarter-hour ratings are mostly
sampling noise, so differences there should count about linearly; above it the coordinate is
essentially ``log10(r)`` shifted, so relative errors count alike at every level.
"""
from __future__ import annotations

import numpy as np

#: the offset c of the coordinate, as a rating fraction (0.01 rating point)
C_RATING = 1e-4


def to_log(rating, c: float = C_RATING):
    """Rating fraction -> log-like coordinate ``log10(1 + r/c)`` (dimensionless).

    Parameters
    ----------
    rating : array-like of ratings (fractions, >= 0); NaN passes through.
    c : offset, a rating fraction.

    Returns
    -------
    ndarray : same shape, ``log10(1 + rating / c)``.
    """
    return np.log10(1.0 + np.asarray(rating, dtype=float) / c)


def from_log(y, c: float = C_RATING):
    """Exact inverse of `to_log`: ``c * (10**y - 1)`` (rating fraction).

    Parameters
    ----------
    y : array-like in the log-like coordinate.

    Returns
    -------
    ndarray : ratings (fractions), same shape.
    """
    return c * np.expm1(np.asarray(y, dtype=float) * np.log(10.0))


def expected_rating(y_mean, smear, c: float = C_RATING):
    """Expected rating from a log-coordinate prediction and a smearing factor.

    ``E[r] = c * (10**y_mean * E[10**e] - 1)`` where ``e`` is the error around ``y_mean`` and
    ``smear = E[10**e]`` is estimated from residuals (the mean of the inverse, not the inverse
    of the mean).

    References
    ----------
    Duan, N. (1983). Smearing estimate: a nonparametric retransformation method. JASA 78(383).
    """
    return np.maximum(c * (np.power(10.0, np.asarray(y_mean, dtype=float)) * smear - 1.0), 0.0)
