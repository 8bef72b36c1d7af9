"""The quarter-hour forecaster: principal components of daily profiles, boosted trees for the
component scores, shrunk series offsets, a second boosted stage on quarter-hour residuals, and a
smearing retransformation to expected ratings.

Pipeline (all in the log-like coordinate of `forecasting.transform`):

1. Each observed day of a series is a profile of 96 values; missing quarter-hours are filled
   with the series' mean profile. PCA (thin SVD on a sample) gives k components.
2. One gradient-boosted regressor per component predicts the day's score from zone, network,
   genre, demo (categorical) and the calendar on the circle (day of week, day of year) plus a
   day count (trees extrapolate it flat: the latest level carries forward).
3. Each series gets an offset per component: the recency-weighted mean of its score residuals,
   shrunk toward zero (the pooled network/genre model) by a random-effects ratio estimated by
   the method of moments. Short histories are shrunk most: they borrow strength.
4. A second regressor is stacked on the quarter-hour residuals of stages 1-3 (clock time and
   weekday on the circle, categories), trained on a sample of cells; it is tabulated per series
   x weekday x quarter-hour, so predicting costs a lookup.
5. Expected ratings: the mean of the inverse transform (smearing factor per series and clock
   block, shrunk to the network x demo block), not the inverse of the mean.

References
----------
Jolliffe (2002), PCA; Hyndman & Ullah (2007), functional-data forecasting with PCA scores;
Friedman, J. H. (2001). Greedy function approximation: a gradient boosting machine. Ann.
Statist. 29(5); Wolpert, D. H. (1992). Stacked generalization. Neural Networks 5(2);
Duan, N. (1983). Smearing estimate. JASA 78(383).
"""
from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
from sklearn.ensemble import HistGradientBoostingRegressor
from threadpoolctl import threadpool_limits

from .cyclic import calendar_features, clock_features
from .profiles import ProfilePCA
from .transform import C_RATING, expected_rating, to_log

CATEGORY_COLUMNS = ["zone", "network", "genre", "demo"]
CALENDAR_COLUMNS = ["dow_sin", "dow_cos", "doy_sin", "doy_cos", "weekend", "day"]
BLOCK_QH = 12  # smearing blocks of 3 hours (8 per day)


class ProfileForecaster:
    """Forecast quarter-hour expected ratings of many series for future days.

    Parameters
    ----------
    n_components : PCA components (None: by `variance_target`).
    variance_target : share of profile variance the components must explain when chosen.
    max_rows : day-rows sampled to train each score regressor.
    max_iter, learning_rate, max_leaf_nodes : boosting settings of the score regressors.
    residual_rows : quarter-hour cells sampled to train the residual (second-stage) regressor.
    residual_max_iter : boosting iterations of the second stage (0 disables it).
    half_life_days : recency half-life of the series offsets (days).
    min_observed : a day enters the fit only with at least this many observed quarter-hours.
    offset_rows : days of the recent year sampled for the offsets, second stage and smearing.
    n_threads : OpenMP threads of the regressors (1 by default: on a shared machine more threads
        than free cores slow boosting down many times over).
    random_state : seed of every sample and regressor.

    Attributes (after `fit`)
    ------------------------
    pca_ : `ProfilePCA`; score_models_ : list of regressors; offsets_ : (n_series, k);
    shrink_ : (n_series, k) shrinkage factors; residual_model_ : regressor or None;
    smear_ : (n_series, 96 // BLOCK_QH) smearing factors; categories_ : dict of category lists.
    """

    def __init__(self, n_components: int | None = None, variance_target: float = 0.95,
                 max_rows: int = 30_000, max_iter: int = 80, learning_rate: float = 0.12,
                 max_leaf_nodes: int = 31, residual_rows: int = 80_000, residual_max_iter: int = 60,
                 half_life_days: float = 91.0, min_observed: int = 24, offset_rows: int = 60_000,
                 n_threads: int | None = 1,
                 random_state: int = 0):
        self.n_components = n_components
        self.variance_target = variance_target
        self.max_rows = max_rows
        self.max_iter = max_iter
        self.learning_rate = learning_rate
        self.max_leaf_nodes = max_leaf_nodes
        self.residual_rows = residual_rows
        self.residual_max_iter = residual_max_iter
        self.half_life_days = half_life_days
        self.min_observed = min_observed
        self.offset_rows = offset_rows
        self.n_threads = n_threads
        self.random_state = random_state

    # ----------------------------------------------------------------- features
    def _series_codes(self, series: pd.DataFrame) -> np.ndarray:
        cols = []
        for c in CATEGORY_COLUMNS:
            cats = self.categories_[c]
            codes = pd.Categorical(series[c].astype(str), categories=cats).codes.astype(float)
            codes[codes < 0] = np.nan
            cols.append(codes)
        return np.column_stack(cols)

    def _features(self, s_idx: np.ndarray, t_idx: np.ndarray) -> np.ndarray:
        """Day-row features (n, 4 + 6): category codes of the series, calendar of the day."""
        cal = self._calendar(t_idx)
        return np.column_stack([self.series_codes_[s_idx], cal])

    def _calendar(self, t_idx: np.ndarray) -> np.ndarray:
        lo, hi = int(t_idx.min()), int(t_idx.max())
        dates = pd.date_range(self.day0_ + pd.Timedelta(days=lo), periods=hi - lo + 1, freq="D")
        table = calendar_features(dates)[CALENDAR_COLUMNS].to_numpy()
        return table[t_idx - lo]

    def _regressor(self, max_iter: int, seed: int, mask: np.ndarray) -> HistGradientBoostingRegressor:
        return HistGradientBoostingRegressor(
            max_iter=max_iter, learning_rate=self.learning_rate, max_leaf_nodes=self.max_leaf_nodes,
            min_samples_leaf=40, l2_regularization=1.0, categorical_features=mask,
            early_stopping=False, random_state=seed)

    # ----------------------------------------------------------------- fit
    def fit(self, values: np.ndarray, series: pd.DataFrame, day0) -> "ProfileForecaster":
        """Fit on a history cube (see `_fit`), with the regressors' threads limited."""
        with threadpool_limits(self.n_threads):
            return self._fit(values, series, day0)

    def _fit(self, values: np.ndarray, series: pd.DataFrame, day0) -> "ProfileForecaster":
        """Fit on a history cube.

        Parameters
        ----------
        values : (n_series, n_days, 96) ratings (fractions), NaN = missing; day index 0 is `day0`.
        series : one row per cube series with ``zone, network, demo, genre``.
        day0 : date of day index 0.
        """
        rng = np.random.default_rng(self.random_state)
        S, T, Q = values.shape
        self.day0_ = pd.Timestamp(day0)
        self.n_days_ = T
        self.categories_ = {c: sorted(series[c].astype(str).unique()) for c in CATEGORY_COLUMNS}
        self.series_codes_ = self._series_codes(series)
        n_cal = len(CALENDAR_COLUMNS)
        self.categorical_mask_ = np.array(
            [len(self.categories_[c]) <= 250 for c in CATEGORY_COLUMNS] + [False] * n_cal)

        s_idx, t_idx, rows, rows_obs, scores, X = self._fit_scores(rng, values)
        n = len(s_idx)

        # Offsets, second stage and smearing use the recent year only (recency-weighted anyway),
        # sampled to at most `offset_rows` days so their cost does not grow with the history.
        recent = np.nonzero(t_idx >= T - 365)[0]
        if len(recent) > self.offset_rows:
            recent = np.sort(rng.choice(recent, size=self.offset_rows, replace=False))
        rs, rt = s_idx[recent], t_idx[recent]
        Xr = X[recent]
        pred = np.column_stack([m.predict(Xr) for m in self.score_models_])
        self._fit_offsets(rs, rt, scores[recent] - pred, S, T)
        pred += self.offsets_[rs]

        level = self.pca_.inverse_transform(pred)  # (n_recent, 96) stage-1 fit
        rows_r = rows[recent]
        resid = rows_r - level
        cell_r, cell_q, dow = self._fit_second_stage(rng, rows_obs[recent], rs, rt, resid, S)

        # Smearing factors from a fresh sample of cells (not the one the second stage saw).
        pick = np.sort(rng.choice(len(cell_r), size=min(len(cell_r), self.residual_rows), replace=False))
        r, q = cell_r[pick], cell_q[pick]
        fitted = level[r, q] + self.residual_table_[rs[r], dow[r], q]
        err = rows_r[r, q] - fitted
        self._fit_smear(rs[r], q // BLOCK_QH, np.power(10.0, err), S)
        self.n_train_rows_ = n
        return self

    def _cell_features(self, s: np.ndarray, dow: np.ndarray, q: np.ndarray) -> np.ndarray:
        """Quarter-hour cell features (n, 4 + 5): series categories, weekday and clock on the circle."""
        ang = 2 * np.pi * dow / 7.0
        return np.column_stack([self.series_codes_[s], np.sin(ang), np.cos(ang), (dow >= 5).astype(float),
                                clock_features(q)])

    def _fit_scores(self, rng: np.random.Generator, values: np.ndarray):
        """Stage 1: the profile PCA on observed days and one regression per score (log10 ratings).
        Returns (series index, day index, day rows (n, 96) NaN = missing, observed mask, scores (n, k),
        features X)."""
        Y = to_log(values).astype(np.float32)
        observed = np.isfinite(Y)
        per_day = observed.sum(axis=2)
        s_idx, t_idx = np.nonzero(per_day >= self.min_observed)
        if len(s_idx) < 50:
            raise ValueError("too little history to fit: fewer than 50 observed days")
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", RuntimeWarning)
            global_mean = np.nanmean(Y[s_idx, t_idx], axis=0)
            series_mean = np.nanmean(Y, axis=1)  # (S, 96)
        global_mean = np.where(np.isfinite(global_mean), global_mean, 0.0)
        series_mean = np.where(np.isfinite(series_mean), series_mean, global_mean[None, :])
        self.series_mean_ = series_mean

        rows = Y[s_idx, t_idx]  # (n, 96) with NaN
        rows_obs = np.isfinite(rows)
        filled = np.where(rows_obs, rows, series_mean[s_idx]).astype(np.float64)

        n = len(s_idx)
        pca_take = rng.choice(n, size=min(n, 40_000), replace=False)
        self.pca_ = ProfilePCA(self.n_components, self.variance_target, max_components=8).fit(filled[np.sort(pca_take)])
        scores = self.pca_.transform(filled)  # (n, k)
        k = scores.shape[1]

        X = self._features(s_idx, t_idx)
        take = np.sort(rng.choice(n, size=min(n, self.max_rows), replace=False))
        self.score_models_ = []
        for j in range(k):
            model = self._regressor(self.max_iter, self.random_state + 17 * (j + 1), self.categorical_mask_)
            model.fit(X[take], scores[take, j])
            self.score_models_.append(model)

        return s_idx, t_idx, rows, rows_obs, scores, X

    def _fit_second_stage(self, rng: np.random.Generator, observed: np.ndarray, rs: np.ndarray, rt: np.ndarray,
                          resid: np.ndarray, S: int):
        """Stage 2: the residual model by series x day-of-week x quarter-hour on recent cells, as a
        table (S, 7, 96) of log10 corrections. Returns the recent observed cells (row, qh) and each
        recent row's day of week."""
        self.residual_model_ = None
        self.residual_table_ = np.zeros((S, 7, 96))
        cell_r, cell_q = np.nonzero(observed)
        dow = (self.day0_.day_of_week + rt) % 7
        if self.residual_max_iter > 0 and len(cell_r) > 1000:
            pick = np.sort(rng.choice(len(cell_r), size=min(len(cell_r), self.residual_rows), replace=False))
            r, q = cell_r[pick], cell_q[pick]
            Xc = self._cell_features(rs[r], dow[r], q)
            self.residual_model_ = self._regressor(self.residual_max_iter, self.random_state + 7,
                                                   np.r_[self.categorical_mask_[:4], [False] * 5])
            self.residual_model_.fit(Xc, resid[r, q])
            gs, gd, gq = np.meshgrid(np.arange(S), np.arange(7), np.arange(96), indexing="ij")
            self.residual_table_ = self.residual_model_.predict(
                self._cell_features(gs.ravel(), gd.ravel(), gq.ravel())).reshape(S, 7, 96)
        return cell_r, cell_q, dow

    def _fit_offsets(self, s_idx, t_idx, resid, S, T) -> None:
        """Series offsets: recency-weighted mean residual, shrunk by the random-effects ratio.

        References
        ----------
        Method-of-moments variance components for a one-way random-effects model (e.g. Searle,
        Casella & McCulloch, Variance Components, 1992, ch. 3).
        """
        w = np.power(0.5, (T - 1 - t_idx) / self.half_life_days)
        sw = np.bincount(s_idx, weights=w, minlength=S)
        sw2 = np.bincount(s_idx, weights=w * w, minlength=S)
        k = resid.shape[1]
        offsets = np.zeros((S, k))
        shrink = np.zeros((S, k))
        has = sw > 0
        n_eff = np.where(has, sw**2 / np.maximum(sw2, 1e-300), 0.0)
        for j in range(k):
            m = np.bincount(s_idx, weights=w * resid[:, j], minlength=S)
            m = np.where(has, m / np.maximum(sw, 1e-300), 0.0)
            within = np.mean((resid[:, j] - m[s_idx]) ** 2)
            noise = within / np.maximum(n_eff[has], 1.0)
            tau2 = max(np.mean(m[has] ** 2) - np.mean(noise), 1e-6 * within + 1e-12)
            f = np.where(has, tau2 / (tau2 + within / np.maximum(n_eff, 1e-12)), 0.0)
            offsets[:, j] = f * m
            shrink[:, j] = f
        self.offsets_ = offsets
        self.shrink_ = shrink

    def _fit_smear(self, s, block, ratio, S) -> None:
        nb = 96 // BLOCK_QH
        g = s * nb + block
        cnt = np.bincount(g, minlength=S * nb).astype(float)
        tot = np.bincount(g, weights=ratio, minlength=S * nb)
        parent_key = (self.series_codes_[:, 1].astype(int) * 64 + self.series_codes_[:, 3].astype(int))
        pk = parent_key[s] * nb + block
        uniq, inv = np.unique(pk, return_inverse=True)
        pc = np.bincount(inv).astype(float)
        pt = np.bincount(inv, weights=ratio)
        overall = float(ratio.mean())
        parent_val = (pt + 30 * overall) / (pc + 30)
        # parent value for every (series, block)
        all_pk = (parent_key[:, None] * nb + np.arange(nb)[None, :]).ravel()
        pos = np.searchsorted(uniq, all_pk)
        pos = np.clip(pos, 0, len(uniq) - 1)
        parent_all = np.where(uniq[pos] == all_pk, parent_val[pos], overall)
        smear = (tot + 30 * parent_all) / (cnt + 30)
        self.smear_ = smear.reshape(S, nb)

    # ----------------------------------------------------------------- predict
    def predict_log(self, day_index: np.ndarray) -> np.ndarray:
        """Predicted log-coordinate profiles (n_series, n_days, 96) for day indices (from day0)."""
        with threadpool_limits(self.n_threads):
            return self._predict_log(day_index)

    def _predict_log(self, day_index: np.ndarray) -> np.ndarray:
        day_index = np.asarray(day_index, dtype=np.int64)
        S = self.series_codes_.shape[0]
        D = len(day_index)
        s_idx = np.repeat(np.arange(S), D)
        t_idx = np.tile(day_index, S)
        X = self._features(s_idx, t_idx)
        scores = np.column_stack([m.predict(X) for m in self.score_models_]) + self.offsets_[s_idx]
        level = self.pca_.inverse_transform(scores)  # (S*D, 96)
        dow = (self.day0_.day_of_week + t_idx) % 7
        level = level + self.residual_table_[s_idx, dow]
        return level.reshape(S, D, 96)

    def predict(self, day_index: np.ndarray) -> np.ndarray:
        """Expected quarter-hour ratings (fractions), array (n_series, n_days, 96)."""
        y = self.predict_log(day_index)
        smear = np.repeat(self.smear_, BLOCK_QH, axis=1)[:, None, :]  # (S, 1, 96)
        return expected_rating(y, smear, C_RATING)
