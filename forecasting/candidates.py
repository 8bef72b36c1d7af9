"""Candidate forecasts of unit-week daypart levels, made at one origin for weeks after a lead gap.

Besides the quarter-hour profile model (`forecasting.models.ProfileForecaster`), three simple and
structurally different forecasters of a daypart-week mean rating are made at every origin, from
the history before it only:

- ``last_year_scaled``: the same weeks one year (364 days) earlier (each averaged with its two
  neighbours), scaled by half the recent year-over-year change pooled over every series (up to 26
  weeks before the origin over the same weeks a year earlier); it carries each unit's seasonality
  and, partly, erosion.
- ``trailing``: the mean of the last `recent_weeks` weeks before the origin; it carries level
  shifts and launches.
- ``regression``: a random-effects regression of log unit-week levels (`LevelRegression`): the
  log change from the trailing level to the target week, on last year's seasonal change, recent
  momentum, the horizon, and zone, network, daypart, genre x daypart and network x daypart
  effects shrunk as random effects (ridge penalty = BLUP with a common variance ratio), fitted on
  pseudo-origins inside the training history at the same lead gap.

Each returns (n_series, n_dayparts, n_weeks) mean ratings (fractions), NaN where it cannot say.

References
----------
Danaher, P. J., Dagger, T. S. & Smith, M. S. (2011). Forecasting television ratings.
    Int. J. Forecasting 27(4), 1215-1240 (a random-effects regression of ratings as accurate as
    Bayesian model averaging among eight models).
Henderson, C. R. (1975). Best linear unbiased estimation and prediction under a selection model.
    Biometrics 31(2); Robinson, G. K. (1991). That BLUP is a good thing. Statistical Science 6(1)
    (random effects as penalised least squares).
Duan, N. (1983). Smearing estimate: a nonparametric retransformation method. JASA 78(383).
"""
from __future__ import annotations

from typing import Sequence

import numpy as np
import pandas as pd
from scipy import sparse
from sklearn.linear_model import Ridge

from .dayparts import DaypartSpec, daypart_week_means

#: the candidates besides the profile model, in the order they are combined
SIMPLE_CANDIDATES = ("last_year_scaled", "trailing", "regression")
#: smallest daypart-week mean rating taken to logs (a measurement floor reads as zero)
LOG_FLOOR = 1e-6
YEAR_WEEKS = 52
#: half-width (weeks) of the window around last year's week that `last_year_scaled` averages
SMOOTH_WEEKS = 1


def weekly_grid(values: np.ndarray, day0_weekday: int, origin: int, dayparts: Sequence[DaypartSpec]):
    """Daypart means of the whole weeks that end exactly at day index `origin`.

    Returns
    -------
    means : (n_series, n_dayparts, n_weeks) mean ratings (NaN unobserved), week n_weeks - 1 ending
        on day origin - 1; counts : the same shape, observed cells.
    """
    n = origin // 7
    starts = origin - 7 * np.arange(n, 0, -1)
    return daypart_week_means(values[:, :origin], day0_weekday, starts, dayparts)


def _window_mean(means: np.ndarray, counts: np.ndarray, lo: int, hi: int) -> np.ndarray:
    """Cell-weighted mean of weeks [lo, hi) of a weekly grid, (S, P); NaN without cells."""
    lo, hi = max(lo, 0), max(hi, 0)
    if hi <= lo:
        return np.full(means.shape[:2], np.nan)
    c = counts[:, :, lo:hi]
    s = np.where(c > 0, np.nan_to_num(means[:, :, lo:hi]) * c, 0.0).sum(axis=2)
    n = c.sum(axis=2)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(n > 0, s / np.maximum(n, 1), np.nan)


def _centred_mean(means: np.ndarray, counts: np.ndarray, idx: np.ndarray, half_width: int) -> np.ndarray:
    """Cell-weighted mean of weeks ``idx - half_width .. idx + half_width`` of a weekly grid (those
    inside it), (S, P, len(idx)); NaN without cells."""
    n = means.shape[2]
    total = np.zeros(means.shape[:2] + (len(idx),))
    cells = np.zeros_like(total)
    for d in range(-half_width, half_width + 1):
        j = idx + d
        inside = (j >= 0) & (j < n)
        c = np.where(inside[None, None, :], counts[:, :, np.clip(j, 0, n - 1)], 0.0)
        total += np.where(c > 0, np.nan_to_num(means[:, :, np.clip(j, 0, n - 1)]) * c, 0.0)
        cells += c
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(cells > 0, total / np.maximum(cells, 1e-300), np.nan)


def trailing(grid: tuple[np.ndarray, np.ndarray], n_weeks: int, recent_weeks: int = 8) -> np.ndarray:
    """Mean of the last `recent_weeks` weeks of the grid, repeated for `n_weeks` target weeks."""
    means, counts = grid
    m = _window_mean(means, counts, means.shape[2] - recent_weeks, means.shape[2])
    return np.repeat(m[:, :, None], n_weeks, axis=2)


def last_year_scaled(grid: tuple[np.ndarray, np.ndarray], gap_weeks: int, n_weeks: int,
                     max_ratio_weeks: int = 26, shrink: float = 0.5, smooth_weeks: int = SMOOTH_WEEKS) -> np.ndarray:
    """Last year's same weeks x the recent year-over-year ratio, (S, P, W) ratings.

    Target week w (0-based) starts `gap_weeks + w` weeks after the origin; its last-year week is 52
    weeks earlier. The ratio is pooled over every series, per daypart: sum of the last k weeks over
    the sum of the same weeks a year earlier (k the longest window up to `max_ratio_weeks` the
    history holds, at least 4), its log times `shrink`. A series' own ratio, or its network's, is
    measured on a few weeks of shocks and adds more noise than the erosion it would carry.
    Last year's week is the cell-weighted mean of the weeks within `smooth_weeks` of it (those the
    history holds): one week of last year carries that week's passing shocks, which will not recur.
    """
    means, counts = grid
    S, P, n = means.shape
    ly_idx = n + gap_weeks + np.arange(n_weeks) - YEAR_WEEKS
    out = np.full((S, P, n_weeks), np.nan)
    ok = (ly_idx >= 0) & (ly_idx < n)
    out[:, :, ok] = _centred_mean(means, counts, ly_idx[ok], smooth_weeks)
    k = min(max_ratio_weeks, n - YEAR_WEEKS)
    if k < 4:
        return out
    now = _window_mean(means, counts, n - k, n)
    then = _window_mean(means, counts, n - k - YEAR_WEEKS, n - YEAR_WEEKS)
    both = np.isfinite(now) & np.isfinite(then)
    with np.errstate(invalid="ignore", divide="ignore"):
        ratio = np.where(both, now, 0.0).sum(axis=0) / np.where(both, then, 0.0).sum(axis=0)  # (P,)
    log_ratio = np.where(np.isfinite(ratio) & (ratio > 0), np.log(np.maximum(ratio, LOG_FLOOR)), 0.0)
    return out * np.exp(shrink * np.clip(log_ratio, -1.0, 1.0))[None, :, None]


class LevelRegression:
    """Random-effects regression of log unit-week levels at a fixed lead (see the module doc).

    Parameters
    ----------
    alpha : ridge penalty of every effect (the common variance ratio of the random effects).
    recent_weeks : weeks of the trailing level the change is measured from.
    max_rows : training rows kept (a seeded sample of pseudo-origin x unit-week pairs).
    origin_step : weeks between pseudo-origins.
    random_state : seed of the sample.

    Attributes
    ----------
    model_ : fitted `sklearn.linear_model.Ridge`; smear_ : retransformation factor (Duan 1983);
    n_rows_ : training rows used (0 when there were too few: predictions are then NaN).
    """

    def __init__(self, alpha: float = 30.0, recent_weeks: int = 8, max_rows: int = 250_000, origin_step: int = 2,
                 random_state: int = 0):
        self.alpha = alpha
        self.recent_weeks = recent_weeks
        self.max_rows = max_rows
        self.origin_step = origin_step
        self.random_state = random_state

    # ------------------------------------------------------------------ features
    def _features_at(self, logm: np.ndarray, counts: np.ndarray, means: np.ndarray, i0: int, gap_weeks: int,
                     n_weeks: int, n_grid: int):
        """Numeric features (S, P, W, F) and the trailing log level (S, P) at pseudo-origin week i0."""
        k = self.recent_weeks
        l8 = np.log(np.maximum(_window_mean(means, counts, i0 - k, i0), LOG_FLOOR))
        l52 = np.log(np.maximum(_window_mean(means, counts, i0 - YEAR_WEEKS, i0), LOG_FLOOR))
        ly8 = np.log(np.maximum(_window_mean(means, counts, i0 - k - YEAR_WEEKS, i0 - YEAR_WEEKS), LOG_FLOOR))
        have52 = np.isfinite(_window_mean(means, counts, i0 - YEAR_WEEKS, i0 - YEAR_WEEKS // 2))
        tgt = i0 + gap_weeks + np.arange(n_weeks)
        ly_idx = tgt - YEAR_WEEKS
        lyt = np.full(logm.shape[:2] + (n_weeks,), np.nan)
        ok = (ly_idx >= 0) & (ly_idx < n_grid)
        lyt[:, :, ok] = logm[:, :, ly_idx[ok]]
        seas = lyt - ly8[:, :, None]
        has_seas = np.isfinite(seas)
        mom = np.where(have52, l8 - l52, 0.0)
        S, P = l8.shape
        h = np.broadcast_to(((gap_weeks + np.arange(n_weeks) + 1) / 52.0)[None, None, :], (S, P, n_weeks))
        feats = np.stack([np.where(has_seas, seas, 0.0), has_seas.astype(float),
                          np.broadcast_to(mom[:, :, None], (S, P, n_weeks)),
                          np.broadcast_to(have52[:, :, None].astype(float), (S, P, n_weeks)), h,
                          h * np.broadcast_to(mom[:, :, None], (S, P, n_weeks))], axis=-1)
        return feats, l8

    def _design(self, feats: np.ndarray, s: np.ndarray, p: np.ndarray, w: np.ndarray) -> sparse.csr_matrix:
        num = feats[s, p, w]
        cols = [sparse.csr_matrix(num)]
        for codes, size in self.effects_:
            idx = codes(s, p)
            cols.append(sparse.csr_matrix((np.ones(len(s)), (np.arange(len(s)), idx)), shape=(len(s), size)))
        return sparse.hstack(cols, format="csr")

    def _effects(self, info: pd.DataFrame, n_dayparts: int) -> list:
        """Random-effect groups: (function (s, p) -> column, number of columns)."""
        out = []
        for col in ("zone", "network", "demo"):
            codes = pd.factorize(info[col].astype(str))[0]
            k = codes.max() + 1
            out.append((lambda s, p, c=codes, k=k: c[s] * n_dayparts + p, k * n_dayparts))
        genre = pd.factorize(info["genre"].astype(str))[0]
        out.append((lambda s, p, c=genre: c[s] * n_dayparts + p, (genre.max() + 1) * n_dayparts))
        return out

    # ------------------------------------------------------------------ fit / predict
    def fit(self, grid: tuple[np.ndarray, np.ndarray], info: pd.DataFrame, gap_weeks: int,
            n_weeks: int) -> "LevelRegression":
        """Fit on pseudo-origins of a weekly grid (`weekly_grid`) at a lead of `gap_weeks` weeks.

        Parameters
        ----------
        grid : (means, counts), each (S, P, n_grid).
        info : ``zone, network, demo, genre`` of the S series.
        gap_weeks, n_weeks : lead gap (whole weeks) and target weeks per origin.
        """
        means, counts = grid
        S, P, n = means.shape
        self.effects_ = self._effects(info, P)
        logm = np.log(np.maximum(means, LOG_FLOOR))
        rng = np.random.default_rng([self.random_state, 404])
        first = self.recent_weeks
        last = n - gap_weeks - n_weeks
        origins = np.arange(last, first - 1, -self.origin_step)
        Xs, ys, ws = [], [], []
        per_origin = max(self.max_rows // max(len(origins), 1), 1)
        for i0 in origins:
            feats, l8 = self._features_at(logm, counts, means, int(i0), gap_weeks, n_weeks, n)
            tgt = logm[:, :, i0 + gap_weeks:i0 + gap_weeks + n_weeks]
            ok = np.isfinite(tgt) & np.isfinite(l8)[:, :, None] & (counts[:, :, i0 + gap_weeks:i0 + gap_weeks + n_weeks] > 0)
            s, p, w = np.nonzero(ok)
            if len(s) > per_origin:
                keep = rng.choice(len(s), per_origin, replace=False)
                s, p, w = s[keep], p[keep], w[keep]
            if len(s) == 0:
                continue
            Xs.append(self._design(feats, s, p, w))
            ys.append(tgt[s, p, w] - l8[s, p])
            ws.append(np.exp(tgt[s, p, w]))
        self.n_rows_ = int(sum(len(y) for y in ys))
        if self.n_rows_ < 200:
            self.n_rows_ = 0
            return self
        X = sparse.vstack(Xs, format="csr")
        y = np.concatenate(ys)
        self.model_ = Ridge(alpha=self.alpha).fit(X, y)
        level = np.concatenate(ws)
        fitted = np.exp(y - self.model_.predict(X))  # actual / exp(prediction) on the training rows
        # Duan's smearing, level-weighted: the ratio of sums the deals' totals need
        self.smear_ = float(np.sum(level) / np.sum(level / fitted))
        return self

    def predict(self, grid: tuple[np.ndarray, np.ndarray], gap_weeks: int, n_weeks: int) -> np.ndarray:
        """Mean ratings (S, P, n_weeks) of the weeks `gap_weeks` after the end of `grid`."""
        means, counts = grid
        S, P, n = means.shape
        if self.n_rows_ == 0:  # too short a history to learn from: no forecast (weight 0 when stacked)
            return np.full((S, P, n_weeks), np.nan)
        logm = np.log(np.maximum(means, LOG_FLOOR))
        feats, l8 = self._features_at(logm, counts, means, n, gap_weeks, n_weeks, n)
        base = np.where(np.isfinite(l8), np.exp(l8), np.nan)[:, :, None]
        s, p, w = (a.ravel() for a in np.meshgrid(np.arange(S), np.arange(P), np.arange(n_weeks), indexing="ij"))
        pred = self.model_.predict(self._design(feats, s, p, w)).reshape(S, P, n_weeks)
        return base * np.exp(pred) * self.smear_


def simple_candidates(values: np.ndarray, day0_weekday: int, origin: int, gap_days: int, n_weeks: int,
                      dayparts: Sequence[DaypartSpec], info: pd.DataFrame, *, recent_weeks: int = 8,
                      random_state: int = 0) -> dict[str, np.ndarray]:
    """The candidates of `SIMPLE_CANDIDATES` made at day index `origin` from ``values[:, :origin]``
    for the `n_weeks` weeks starting `gap_days` after it: {name: (S, P, n_weeks) mean ratings}.

    A lead gap that is not a whole number of weeks is rounded to the nearest week for the weekly
    candidates (their weeks then sit up to 3 days off the target weeks: levels move little in 3 days).
    """
    grid = weekly_grid(values, day0_weekday, origin, dayparts)
    gap_weeks = int(round(gap_days / 7.0))
    reg = LevelRegression(recent_weeks=recent_weeks, random_state=random_state).fit(grid, info, gap_weeks, n_weeks)
    return {
        "last_year_scaled": last_year_scaled(grid, gap_weeks, n_weeks),
        "trailing": trailing(grid, n_weeks, recent_weeks),
        "regression": reg.predict(grid, gap_weeks, n_weeks),
    }
