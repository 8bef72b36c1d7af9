"""Daypart x week aggregates of a quarter-hour cube (a spot rotates across the daypart's cells).

A daypart is a set of quarter-hours relative to its start day (values >= 96 fall on the next
calendar day) and the weekdays it starts on. One spot bought in a unit-week lands on one of the
daypart's quarter-hour-day cells of that week; its expected rating is the average over those
cells, and the spread of the cells around that average is the airing noise of one spot.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Iterable, Sequence

import numpy as np

QUARTER_HOURS = 96


@dataclass(frozen=True)
class DaypartSpec:
    """A daypart as the forecaster sees it.

    Attributes
    ----------
    name : identifier.
    days : weekday numbers it starts on (0 = Monday .. 6 = Sunday).
    quarter_hours : quarter-hour indices relative to the start day; >= 96 is the next day.
    """

    name: str
    days: tuple[int, ...]
    quarter_hours: tuple[int, ...]


def as_specs(dayparts: Iterable) -> list[DaypartSpec]:
    """Any objects with ``name, days, quarter_hours`` -> list of `DaypartSpec`."""
    return [DaypartSpec(str(d.name), tuple(int(x) for x in d.days), tuple(int(q) for q in d.quarter_hours))
            for d in dayparts]


def daypart_week_sums(values: np.ndarray, day0_weekday: int, week_starts: Sequence[int],
                      dayparts: Sequence[DaypartSpec], *, squares: bool = False):
    """Sums, (sums of squares) and counts of observed cells per series x daypart x week.

    Parameters
    ----------
    values : (n_series, n_days, 96) quarter-hour values (ratings, fractions), NaN = missing.
    day0_weekday : weekday of day index 0 (0 = Monday).
    week_starts : day index of the first day of each week (a week is 7 start days).
    dayparts : the dayparts.
    squares : also return sums of squares.

    Returns
    -------
    sums, [sumsq,] counts : float arrays (n_series, n_dayparts, n_weeks); counts are numbers of
        observed quarter-hour-day cells. Cells past the end of `values` count as missing.
    """
    S, D, _ = values.shape
    flat = values.reshape(S, D * QUARTER_HOURS)
    W = len(week_starts)
    P = len(dayparts)
    sums = np.zeros((S, P, W))
    sq = np.zeros((S, P, W)) if squares else None
    counts = np.zeros((S, P, W))
    starts = np.asarray(week_starts, dtype=np.int64)
    offsets = np.arange(7)
    for p, dp in enumerate(dayparts):
        qh = np.asarray(dp.quarter_hours, dtype=np.int64)
        day_ok = np.isin((day0_weekday + starts[:, None] + offsets[None, :]) % 7, dp.days)  # (W, 7)
        for w in range(W):
            days = starts[w] + offsets[day_ok[w]]
            if len(days) == 0 or len(qh) == 0:
                continue
            idx = (days[:, None] * QUARTER_HOURS + qh[None, :]).ravel()
            inside = (idx >= 0) & (idx < D * QUARTER_HOURS)
            cells = flat[:, idx[inside]].astype(float)
            ok = np.isfinite(cells)
            cells = np.where(ok, cells, 0.0)
            sums[:, p, w] = cells.sum(axis=1)
            counts[:, p, w] = ok.sum(axis=1)
            if squares:
                sq[:, p, w] = (cells**2).sum(axis=1)
    if squares:
        return sums, sq, counts
    return sums, counts


def daypart_week_means(values: np.ndarray, day0_weekday: int, week_starts: Sequence[int],
                       dayparts: Sequence[DaypartSpec]) -> tuple[np.ndarray, np.ndarray]:
    """Mean over each daypart-week's observed cells (rating fraction) and the cell counts.

    Returns
    -------
    means, counts : (n_series, n_dayparts, n_weeks); means are NaN where no cell is observed.
    """
    sums, counts = daypart_week_sums(values, day0_weekday, week_starts, dayparts)
    with np.errstate(invalid="ignore", divide="ignore"):
        means = np.where(counts > 0, sums / np.maximum(counts, 1), np.nan)
    return means, counts
