"""Two simple daypart baselines, scored the same way as the model.

- ``last_year``: the same weeks one year earlier (52 weeks = 364 days back, same weekdays).
- ``trailing_8w``: the mean of the last 8 weeks of history before the forecast origin.

Each gets its own empirical spread: the root-mean-square of its relative held-out errors in the
rolling-origin folds, per daypart (so its bands are as honest as its own past errors).
"""
from __future__ import annotations

from typing import Sequence

import numpy as np
import pandas as pd

from .dayparts import DaypartSpec, daypart_week_means, daypart_week_sums

BASELINES = ("last_year", "trailing_8w")


def last_year(values: np.ndarray, day0_weekday: int, week_starts: Sequence[int],
              dayparts: Sequence[DaypartSpec]) -> np.ndarray:
    """Daypart-week mean ratings of the same weeks 364 days earlier (fractions).

    Parameters
    ----------
    values : history cube (n_series, n_days, 96), day index 0 has weekday `day0_weekday`.
    week_starts : day indices (in the same cube calendar) of the target weeks.

    Returns
    -------
    (n_series, n_dayparts, n_weeks), NaN where last year is not in the history.
    """
    starts = np.asarray(week_starts, dtype=np.int64) - 364
    means, _ = daypart_week_means(values, day0_weekday, np.maximum(starts, 0), dayparts)
    means[:, :, starts < 0] = np.nan
    return means


def trailing_mean(values: np.ndarray, day0_weekday: int, origin: int, dayparts: Sequence[DaypartSpec],
                  n_weeks: int, weeks: int = 8) -> np.ndarray:
    """Mean rating over the daypart cells of the `weeks` weeks before day index `origin`.

    Returns
    -------
    (n_series, n_dayparts, n_weeks) -- the same value for every target week.
    """
    starts = origin - 7 * np.arange(weeks, 0, -1)
    starts = starts[starts >= 0]
    sums, counts = daypart_week_sums(values[:, :origin], day0_weekday, starts, dayparts)
    s, c = sums.sum(axis=2), counts.sum(axis=2)
    with np.errstate(invalid="ignore", divide="ignore"):
        m = np.where(c > 0, s / np.maximum(c, 1), np.nan)
    return np.repeat(m[:, :, None], n_weeks, axis=2)


def spread_by_daypart(errors: pd.DataFrame) -> dict[str, dict[str, float]]:
    """Empirical relative sd of each baseline per daypart: RMS of held-out ``actual/forecast - 1``.

    Parameters
    ----------
    errors : rows with ``baseline, daypart, rel_error``.

    Returns
    -------
    {baseline: {daypart: rel_sd}} (fractions of the baseline forecast).
    """
    ok = errors[np.isfinite(errors["rel_error"])]
    out: dict[str, dict[str, float]] = {}
    for name, g in ok.groupby("baseline"):
        rms = g.groupby("daypart")["rel_error"].apply(lambda x: float(np.sqrt(np.mean(x**2))))
        out[str(name)] = {str(k): float(v) for k, v in rms.items()}
    return out
