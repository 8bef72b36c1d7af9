"""Combining candidate forecasts by the held-out CRPS of their mixture (stacking).

Each candidate k, per daypart, is first put on the level the held-out weeks showed, by an
impression-weighted ratio (sum actual / sum forecast per refit, the refits' log ratios averaged
with weights for how much each refit's weeks resemble the plan weeks in season and shrunk toward
no correction, so neither a few unit-weeks with huge ratios nor a refit of another season set
the level of every unit: `forecasting.scoring.pooled_level_ratio`), and given its own spread (the
root mean square of its relative held-out errors after that). Its predictive law of a unit-week
is N(b_k m_k, (s_k b_k m_k)^2). The weights w (w_k >= 0, sum 1) minimise the mean CRPS of the
mixture sum_k w_k N(...) over the held-out unit-weeks, in impressions (the deals' unit), per
daypart where it has enough rows (else all dayparts pooled). The CRPS of a mixture is convex in
w (CRPS is quadratic in the predictive CDF, the CDF linear in w), so the optimum is global and in
sample never worse than the best single candidate (a vertex). The combined point forecast is the
mixture's mean, ``sum_k w_k b_k m_k``; where a candidate has no forecast its weight is shared
out among the others. The CRPS rows count by their refit's resemblance to the plan weeks in
season (plus a floor), and the fitted weights are pulled toward a prior by one refit's worth
(a fixed average: estimated weights rarely beat one by much, Smith & Wallis 2009; the pipeline's
weighs the two candidates that carry the season by their inverse held-out variance, each measured
where it could forecast), so when the held-out weeks say little about weeks like the plan weeks
the combination stays close to that average.

References
----------
Yao, Y., Vehtari, A., Simpson, D. & Gelman, A. (2018). Using stacking to average Bayesian
    predictive distributions. Bayesian Analysis 13(3), 917-1007.
Grimit, E. P., Gneiting, T., Berrocal, V. J. & Johnson, N. A. (2006). The continuous ranked
    probability score for circular variables and its application to mesoscale forecast ensemble
    verification. QJRMS 132 (the closed-form CRPS of a Gaussian mixture).
Bates, J. M. & Granger, C. W. J. (1969). The combination of forecasts. Oper. Res. Q. 20(4).
Smith, J. & Wallis, K. F. (2009). A simple explanation of the forecast combination puzzle. Oxford
    Bulletin of Economics and Statistics 71(3).
"""
from __future__ import annotations

from typing import Mapping, Sequence

import numpy as np
import pandas as pd
from scipy.optimize import minimize
from scipy.stats import norm

from .scoring import pooled_level_ratio

#: season weight every held-out row keeps in the weights' CRPS (so refits of other seasons count a little)
SEASON_FLOOR = 0.05
#: share of the (season-weighted) held-out rows a candidate must have a forecast on to get a weight
MIN_EVIDENCE_SHARE = 0.25


def _abs_normal_mean(mu: np.ndarray, var: np.ndarray) -> np.ndarray:
    """E|X| for X ~ N(mu, var): ``2 sd phi(mu/sd) + mu (2 Phi(mu/sd) - 1)``."""
    sd = np.sqrt(np.maximum(var, 1e-300))
    z = mu / sd
    return 2.0 * sd * norm.pdf(z) + mu * (2.0 * norm.cdf(z) - 1.0)


def crps_normal_mixture(y, weights, mu, sigma) -> np.ndarray:
    """CRPS of the mixture ``sum_k w_k N(mu_k, sigma_k^2)`` at y (same unit as y).

    ``CRPS = sum_k w_k E|X_k - y| - 1/2 sum_jk w_j w_k E|X_j - X_k|``.

    Parameters
    ----------
    y : (n,) observations; weights : (n, K) or (K,) summing to 1; mu, sigma : (n, K).

    References
    ----------
    Grimit et al. (2006), QJRMS 132, eq. (5); Gneiting & Raftery (2007), JASA 102(477), eq. (20).
    """
    y = np.asarray(y, float)
    mu = np.asarray(mu, float)
    var = np.asarray(sigma, float) ** 2
    w = np.broadcast_to(np.asarray(weights, float), mu.shape)
    first = np.sum(w * _abs_normal_mean(mu - y[:, None], var), axis=1)
    pair = _abs_normal_mean(mu[:, :, None] - mu[:, None, :], var[:, :, None] + var[:, None, :])
    second = np.einsum("nj,njk,nk->n", w, pair, w)
    return first - 0.5 * second


def _simplex_weights(y: np.ndarray, mu: np.ndarray, sigma: np.ndarray, row_weight=None) -> np.ndarray:
    """Weights on the simplex minimising the (row-weighted) mean mixture CRPS.

    The mean CRPS of a mixture is a quadratic in the weights, ``w.a - w'Bw / 2`` with ``a_k`` the
    mean of E|X_k - y| and ``B_jk`` the mean of E|X_j - X_k| over the rows (`crps_normal_mixture`),
    so both are computed once and the small convex problem is solved by SLSQP with its gradient.
    """
    K = mu.shape[1]
    if K == 1:
        return np.ones(1)
    scale = max(float(np.mean(np.abs(y))), 1e-300)
    yy, mm, var = y / scale, mu / scale, (sigma / scale) ** 2
    rw = np.ones(len(y)) if row_weight is None else np.asarray(row_weight, float)
    rw = rw / rw.sum()
    a = rw @ _abs_normal_mean(mm - yy[:, None], var)
    B = np.einsum("n,njk->jk", rw, _abs_normal_mean(mm[:, :, None] - mm[:, None, :], var[:, :, None] + var[:, None, :]))

    def loss(w):
        return float(w @ a - 0.5 * w @ B @ w)

    singles = [loss(np.eye(K)[k]) for k in range(K)]
    start = np.full(K, 1.0 / K)
    res = minimize(loss, start, jac=lambda w: a - B @ w, method="SLSQP", bounds=[(0.0, 1.0)] * K,
                   constraints=[{"type": "eq", "fun": lambda w: np.sum(w) - 1.0, "jac": lambda w: np.ones(K)}],
                   options={"ftol": 1e-12, "maxiter": 200})
    w = np.clip(res.x, 0.0, None) if res.success else start
    w = w / w.sum()
    best = int(np.argmin(singles))
    return w if loss(w) <= singles[best] + 1e-12 else np.eye(K)[best]


class StackedCombiner:
    """Per-daypart level ratios, spreads and mixture weights of candidate forecasts.

    Parameters
    ----------
    candidates : names of the candidate columns, in order.
    min_rows : held-out unit-weeks a daypart needs for weights of its own (else the pooled ones).
    ratio_prior : refits' worth of pull of each level ratio toward 1 (`forecasting.scoring.pooled_level_ratio`;
        with a ``season_weight`` column, refits unlike the plan weeks in season count little), and of
        the weights toward `prior_weights`.
    prior_weights : {candidate: weight} the weights fall back on when the held-out weeks say little
        about weeks like the plan weeks (None: no pull).
    max_rows : rows per daypart used for the weights (a seeded sample; the CRPS is an average).
    random_state : seed of that sample.

    Attributes
    ----------
    ratio_ : DataFrame (daypart x candidate) level ratio b (impression-weighted, over refits).
    spread_ : DataFrame (daypart x candidate) relative sd s after the ratio.
    weights_ : DataFrame (daypart x candidate) mixture weights (rows sum to 1); ``pooled_weights_``.
    scores_ : DataFrame (daypart x [candidates..., "combined"]) mean held-out CRPS (impressions).
    """

    def __init__(self, candidates: Sequence[str], min_rows: int = 300, max_rows: int = 20_000, ratio_prior: float = 1.0,
                 prior_weights: dict | None = None, random_state: int = 0):
        self.candidates = tuple(candidates)
        self.ratio_prior = ratio_prior
        self.prior_weights = prior_weights
        self.min_rows = min_rows
        self.max_rows = max_rows
        self.random_state = random_state

    def fit(self, rows: pd.DataFrame) -> "StackedCombiner":
        """Fit on held-out unit-weeks: columns ``fold, daypart, actual`` and one column per
        candidate (all in impressions, or all in ratings: one unit throughout; NaN where a
        candidate has no forecast). Each candidate's level ratio and spread come from the rows where
        it has a forecast; the weights from the rows where every usable candidate has one. A
        candidate is usable when it has a forecast on at least `MIN_EVIDENCE_SHARE` of the rows,
        counted with their season weights (plus `SEASON_FLOOR`) as the weights' CRPS counts them:
        else the weights would be learned only where it exists, which may be the refits least
        like the plan weeks (a candidate needing a year of history exists only in the latest)."""
        cands = list(self.candidates)
        have = np.isfinite(rows[cands].to_numpy(float)) & (rows[cands].to_numpy(float) > 0)
        rw = rows["season_weight"].to_numpy(float) + SEASON_FLOOR if "season_weight" in rows else np.ones(len(rows))
        share = rw @ have / max(float(rw.sum()), 1e-300)
        self.usable_ = [c for c, sh in zip(cands, share) if sh >= MIN_EVIDENCE_SHARE]
        ratio, spread = {}, {}
        for dp, g in rows.groupby("daypart", sort=True):
            ratio[dp], spread[dp] = {}, {}
            for c in cands:  # each candidate's level and spread where it has a forecast
                h = g[np.isfinite(g[c]) & (g[c] > 0)]
                r = pooled_level_ratio(h["actual"], h[c], h["fold"], h.get("season_weight"), self.ratio_prior)
                rel = np.clip(h["actual"].to_numpy(float) / (h[c].to_numpy(float) * r) - 1.0, -1.0, 3.0)
                ratio[dp][c] = r
                spread[dp][c] = float(np.sqrt(np.mean(rel ** 2))) if len(rel) else 1.0
        self.ratio_ = pd.DataFrame(ratio).T[cands]
        self.spread_ = pd.DataFrame(spread).T[cands]
        parts = {dp: self._weight_rows(g, dp) for dp, g in rows.groupby("daypart", sort=True)}
        pooled = [np.concatenate(x) for x in zip(*parts.values())]
        self.pooled_weights_ = self._toward_prior(self._full_weights(_simplex_weights(*pooled) if len(pooled[0]) else None),
                                                  rows, self.spread_.mean())
        weights = {dp: (self._toward_prior(self._full_weights(_simplex_weights(*p)), rows, self.spread_.loc[dp]).to_numpy()
                        if len(p[0]) >= self.min_rows else self.pooled_weights_.to_numpy()) for dp, p in parts.items()}
        self.weights_ = pd.DataFrame(weights, index=cands).T
        self.scores_ = pd.DataFrame({dp: self._scores(*p[:3], self.weights_.loc[dp, self.usable_].to_numpy(float))
                                     for dp, p in parts.items() if len(p[0])}).T
        return self

    def _toward_prior(self, w: pd.Series, rows: pd.DataFrame, spread: pd.Series) -> pd.Series:
        """``(S w + prior w0) / (S + prior)``: the fitted weights pulled toward w0 by `ratio_prior`
        refits' worth, S the refits' summed season weights (how much of the held-out evidence is
        about weeks like the plan weeks). w0 is `prior_weights` over each candidate's held-out
        variance (`spread`^2, measured where that candidate could forecast), normalised: the
        inverse-variance combination of Bates & Granger (1969) among the prior's candidates."""
        if self.prior_weights is None:
            return w
        S = float(rows.groupby("fold")["season_weight"].first().sum()) if "season_weight" in rows \
            else float(rows["fold"].nunique())
        w0 = pd.Series(self.prior_weights, dtype=float).reindex(w.index).fillna(0.0)
        w0 = w0 / np.maximum(spread.reindex(w.index).astype(float).fillna(1.0), 1e-3) ** 2
        w0 = w0 / w0.sum() if w0.sum() > 0 else w0
        return (S * w + self.ratio_prior * w0) / (S + self.ratio_prior)

    def _weight_rows(self, g: pd.DataFrame, dp: str):
        """(y, mu, sd) of a daypart's rows where every usable candidate has a forecast (a seeded
        sample of at most `max_rows`), each candidate at its level ratio and spread."""
        use = self.usable_
        g = g[np.all(np.isfinite(g[use].to_numpy(float)) & (g[use].to_numpy(float) > 0), axis=1)]
        if len(g) > self.max_rows:
            g = g.iloc[np.sort(np.random.default_rng([self.random_state, 505]).choice(len(g), self.max_rows, replace=False))]
        mu = g[use].to_numpy(float) * self.ratio_.loc[dp, use].to_numpy(float)[None, :]
        sw = g["season_weight"].to_numpy(float) + SEASON_FLOOR if "season_weight" in g else np.ones(len(g))
        return g["actual"].to_numpy(float), mu, mu * self.spread_.loc[dp, use].to_numpy(float)[None, :], sw

    def _full_weights(self, w_usable) -> pd.Series:
        """Weights over every candidate (0 for the unusable); equal weights when there was no row."""
        w = pd.Series(0.0, index=list(self.candidates))
        if w_usable is None:
            w[self.usable_] = 1.0 / len(self.usable_)
        else:
            w[self.usable_] = w_usable
        return w

    def _scores(self, y, mu, sd, weights) -> dict:
        """Mean CRPS of each usable candidate alone and of the mixture on the rows (impressions)."""
        out = {c: float(np.mean(crps_normal_mixture(y, np.eye(len(self.usable_))[k], mu, sd)))
               for k, c in enumerate(self.usable_)}
        out["combined"] = float(np.mean(crps_normal_mixture(y, weights, mu, sd)))
        out["rows"] = int(len(y))
        return out

    def combine(self, forecasts: Mapping[str, np.ndarray], dayparts: Sequence[str]) -> np.ndarray:
        """The combined mean: ``sum_k w_k b_k m_k`` with weights renormalised over the candidates
        that have a finite, positive forecast. `forecasts` maps each candidate to an array whose
        axis 1 is the daypart (in the order of `dayparts`), e.g. (S, P, W). NaN where none has one."""
        stack, ok, wk, total = self._available(forecasts, dayparts)
        b = self._per_candidate(self.ratio_, dayparts, 1.0, stack.ndim)
        with np.errstate(invalid="ignore", divide="ignore"):
            out = (np.where(ok, stack * b, 0.0) * wk).sum(axis=0) / total
        return np.where(total > 0, out, np.nan)

    def _available(self, forecasts: Mapping[str, np.ndarray], dayparts: Sequence[str]):
        """(stack (K, S, P, ...), ok: finite and > 0, the weights where ok else 0, their sum over K)."""
        stack = np.stack([np.asarray(forecasts[c], float) for c in self.candidates], axis=0)
        ok = np.isfinite(stack) & (stack > 0)
        wk = np.where(ok, self._per_candidate(self.weights_, dayparts, self.pooled_weights_.to_numpy(), stack.ndim), 0.0)
        return stack, ok, wk, wk.sum(axis=0)

    def _per_candidate(self, frame: pd.DataFrame, dayparts: Sequence[str], unseen, ndim: int) -> np.ndarray:
        """`frame`'s (daypart x candidate) values shaped to broadcast against a (K, S, P, ...) stack."""
        shape = [1] * ndim
        shape[0], shape[2] = len(self.candidates), len(dayparts)
        return self._table(frame, dayparts, unseen).T.reshape(shape)

    def mixture_variance(self, forecasts: Mapping[str, np.ndarray], dayparts: Sequence[str]) -> np.ndarray:
        """Expected relative variance (fraction^2) of the combination each unit gets, from the
        candidates that have a forecast there: ``sum_k w_k s_k^2 / sum_k w_k`` over them, s_k the
        candidate's held-out spread (after its ratio), w_k its weight. Same shape as `combine`'s
        result; NaN where none has one. It differs between units only by which candidates could
        forecast them: where a good one is missing (last year's weeks before the history began)
        it is larger. (The candidates' disagreement unit by unit is left out: a few units where
        one candidate is far off would dominate it.)"""
        stack, _, wk, total = self._available(forecasts, dayparts)
        s = self._per_candidate(self.spread_, dayparts, self.spread_.mean().to_numpy(), stack.ndim)
        with np.errstate(invalid="ignore", divide="ignore"):
            out = (wk * s * s).sum(axis=0) / total
        return np.where(total > 0, out, np.nan)

    def disagreement(self, forecasts: Mapping[str, np.ndarray], dayparts: Sequence[str], size) -> float:
        """Variance (fraction^2) of the candidates' totals around the mixture's: the between-component
        part of the mixture's law of one total shared by every unit.

        Each candidate's total ``T_k = sum b_k m_k size`` over the units where every usable candidate
        has a forecast (`forecasts` as in `combine`, (S, P, ...) arrays; `size` (S,) per-series
        multiplier such as the universe), then ``sum_k w_k (log T_k - sum_j w_j log T_j)^2`` with
        the pooled weights w. By the law of total variance, a mixture whose component is one model
        for every unit gives its total at least this variance, whatever each component's own
        spread. 0 with fewer than two usable candidates or no unit.
        """
        use = [c for c in self.candidates if c in self.usable_]
        if len(use) < 2:
            return 0.0
        stack = np.stack([np.asarray(forecasts[c], float) for c in use], axis=0)  # (K, S, P, ...)
        ok = np.all(np.isfinite(stack) & (stack > 0), axis=0)
        if not ok.any():
            return 0.0
        shape = [1] * (stack.ndim - 1)
        shape[1] = len(dayparts)
        b = self._table(self.ratio_, dayparts, 1.0)[:, [self.candidates.index(c) for c in use]]  # (P, K)
        u = np.asarray(size, float).reshape([-1] + [1] * (stack.ndim - 2))
        totals = np.array([np.sum(np.where(ok, stack[k] * b[:, k].reshape(shape) * u, 0.0)) for k in range(len(use))])
        w = self.pooled_weights_.reindex(use).to_numpy(float)
        if w.sum() <= 0:
            return 0.0
        w = w / w.sum()
        log_t = np.log(totals)
        return float(w @ (log_t - w @ log_t) ** 2)

    def _table(self, frame: pd.DataFrame, dayparts: Sequence[str], unseen) -> np.ndarray:
        """(P, K) rows of `frame` for `dayparts`; `unseen` (a (K,) row or a number) for a daypart
        the fit never saw."""
        out = np.empty((len(dayparts), len(self.candidates)))
        for i, dp in enumerate(dayparts):
            out[i] = frame.loc[dp, list(self.candidates)].to_numpy(float) if dp in frame.index else unseen
        return out

    def summary(self) -> dict:
        """Weights, ratios and held-out CRPS by daypart, plain for meta.json."""
        return {
            "candidates": list(self.candidates),
            "weights_by_daypart": {dp: {c: float(v) for c, v in row.items()} for dp, row in self.weights_.iterrows()},
            "pooled_weights": {c: float(v) for c, v in self.pooled_weights_.items()},
            "level_ratio_by_daypart": {dp: {c: float(v) for c, v in row.items()} for dp, row in self.ratio_.iterrows()},
            "heldout_crps_by_daypart": {dp: {c: float(v) for c, v in row.items()} for dp, row in self.scores_.iterrows()},
        }
