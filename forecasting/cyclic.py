"""Circular encodings of clock time and calendar (unit circle: the end of a cycle meets its start).

(Named `cyclic` rather than `calendar` so it never shadows the standard library module.)
"""
from __future__ import annotations

import numpy as np
import pandas as pd


def circle(value, period: float) -> tuple[np.ndarray, np.ndarray]:
    """Map a cyclic quantity onto the unit circle.

    Parameters
    ----------
    value : array-like, in units of the cycle (e.g. quarter-hours, days).
    period : length of the cycle in the same units (96 quarter-hours, 7 days, 365.25 days).

    Returns
    -------
    (sin, cos) : two arrays of the same shape, ``sin(2 pi v / period)``, ``cos(2 pi v / period)``.
    """
    angle = 2.0 * np.pi * np.asarray(value, dtype=float) / period
    return np.sin(angle), np.cos(angle)


def clock_features(quarter_hour) -> np.ndarray:
    """Clock time on the circle: 23:45 (95) sits next to 00:00 (0).

    Parameters
    ----------
    quarter_hour : array-like of quarter-hour indices (0..95; values >= 96 wrap).

    Returns
    -------
    ndarray (n, 2) : sin and cos of the clock angle.
    """
    s, c = circle(np.asarray(quarter_hour) % 96, 96.0)
    return np.column_stack([s, c])


def calendar_features(dates) -> pd.DataFrame:
    """Calendar of each date on the circle plus a linear day count.

    Parameters
    ----------
    dates : array-like of dates.

    Returns
    -------
    DataFrame (n, 6) : ``dow_sin, dow_cos`` (day of week, period 7), ``doy_sin, doy_cos`` (day of
        year, period 365.25), ``weekend`` (0/1) and ``day`` (days since 2000-01-01, for slow trends).
    """
    d = pd.DatetimeIndex(pd.to_datetime(np.asarray(dates)))
    dow_s, dow_c = circle(d.day_of_week.to_numpy(), 7.0)
    doy_s, doy_c = circle(d.day_of_year.to_numpy() - 1, 365.25)
    day = ((d - pd.Timestamp("2000-01-01")) // pd.Timedelta(days=1)).to_numpy(dtype=float)
    return pd.DataFrame({
        "dow_sin": dow_s, "dow_cos": dow_c, "doy_sin": doy_s, "doy_cos": doy_c,
        "weekend": (d.day_of_week >= 5).astype(float), "day": day,
    })
