"""Posted actuals folded into the forecast: the Gaussian update of the level factors.

Evidence. A posted unit-week (k aired spots, y impressions in the deal's demo) says, per aired
spot, y / k = mu_i + u_i Z_com + a_i Z_net[network] + b_i Z_flight[zone, network, daypart] + e, with
e ~ N(0, c_i^2 + s_i^2 / k) (the unit-week's own factor and the airing noise averaged over k
spots; loadings u, a, b, c and airing sd s from the forecast table; Z_com is the factor shared
by every unit). With the level factors' prior
N(0, I) this is a linear-Gaussian model, so their posterior is Gaussian (a conditional, or
shrinkage, update: the evidence is weighed against the forecast's prior uncertainty):

    precision  P = I + H' R^-1 H,   mean  m = P^-1 H' R^-1 (y - mu),   covariance  V = P^-1.

Which factors are unknowns, integrated out or noise follows from their grouping keys in
`forecasting.factors.LEVEL_FACTORS` (`persistent`, `weekly_shared`, `own`). The remaining
weeks' forecast rows then get mean mu_i + u_i m_com + a_i m_net + b_i m_flight,
common loading u_i sqrt(V_cc), network loading sqrt(a_i^2 V_nn + 2 a_i u_i V_nc) and flight
loading sqrt(b_i^2 V_ff + 2 a_i b_i V_nf + 2 b_i u_i V_fc) (keeping each unit's posterior level
variance exact; a negative flight part is absorbed by the unit's network loading, a negative
network part by its common loading; cross-unit posterior correlations beyond the shared factors
are approximated). Units that posted move, and so, through the network factor, do units of the
same network in other zones and dayparts that did not post, and through the common factor every
unit a little. The unit-week factors of future weeks are
independent of the past and keep their prior.

References
----------
Conditional distribution of a multivariate normal / Bayesian linear regression with a Gaussian
prior: e.g. Rasmussen & Williams (2006), Gaussian Processes for Machine Learning, sec. 2.1 and
A.2; Bishop (2006), Pattern Recognition and Machine Learning, sec. 3.3.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np
import pandas as pd
from scipy import sparse

from forecasting.factors import DRAWN, LevelFactor
from planner.delivery import FLIGHT_KEY, UNIT_KEY, group_keys, loading

#: columns of a posted-actuals table (data contract)
ACTUALS_COLUMNS = ["zone", "network", "daypart", "week", "spots_aired", "impressions"]
_Z90 = 1.2815515655446004  # standard normal 0.90 quantile (NIST/SEMATECH e-Handbook table)


def persistent(factors: Sequence[LevelFactor] = DRAWN) -> tuple[LevelFactor, ...]:
    """The factors past weeks teach about later weeks (no week among their keys), in draw order:
    the posterior's factor vector is their blocks in this order (network, flight, common)."""
    return tuple(f for f in factors if not f.weekly)


def weekly_shared(factors: Sequence[LevelFactor] = DRAWN) -> tuple[LevelFactor, ...]:
    """The factors drawn afresh each week and shared by several units (network-week): integrated out."""
    return tuple(f for f in factors if f.weekly and f.shared)


def own(factors: Sequence[LevelFactor] = DRAWN) -> tuple[LevelFactor, ...]:
    """The unit-week's own factors: part of each posting's noise."""
    return tuple(f for f in factors if not f.shared)


@dataclass
class LevelPosterior:
    """Posterior of the persistent level factors (`persistent`: network, flight, common; standard-
    normal prior).

    `groups` maps each factor in the vector to its groups' labels, in `persistent` order (the
    network Index, the flight MultiIndex zone,network,daypart; the common factor, one group, only
    when some posting loads on it); the factor vector is their blocks in that order; `mean` (K,)
    and `cov` (K, K) dimensionless (factor units)."""

    groups: dict
    mean: np.ndarray
    cov: np.ndarray
    observations: int

    def offset(self, name: str) -> int:
        """Position in the factor vector of the first group of the factor called `name`."""
        pos = 0
        for n, labels in self.groups.items():
            if n == name:
                return pos
            pos += len(labels)
        raise KeyError(name)

    @property
    def networks(self) -> pd.Index:
        """The networks of the network factors (the vector's first block)."""
        return self.groups.get("network", pd.Index([], name="network"))

    @property
    def flights(self) -> pd.MultiIndex:
        """The flights (zone, network, daypart) of the flight factors."""
        return self.groups.get("flight", pd.MultiIndex.from_tuples([], names=FLIGHT_KEY))

    @property
    def common(self) -> bool:
        """True when the common factor is in the vector (some posting loads on it)."""
        return "common" in self.groups


def _posterior_groups(obs: pd.DataFrame, factors: Sequence[LevelFactor]) -> tuple[dict, dict]:
    """({name: labels}, {name: code (J,)}) of the persistent factors posted rows load on: a factor
    every table has always, an optional one when some loading is positive; groups sorted."""
    labels, codes = {}, {}
    for f in persistent(factors):
        if f.optional and not np.any(loading(obs, f) > 0):
            continue
        keys = group_keys(f)
        if not keys:
            codes[f.name], labels[f.name] = np.zeros(len(obs), dtype=np.int64), pd.RangeIndex(1)
        elif len(keys) == 1:
            c, u = pd.factorize(obs[keys[0]], sort=True)
            codes[f.name], labels[f.name] = c, pd.Index(u, name=keys[0])
        else:
            c, u = pd.factorize(pd.MultiIndex.from_frame(obs[keys]), sort=True)
            codes[f.name], labels[f.name] = c, pd.MultiIndex.from_tuples(list(u), names=keys)
    return labels, codes


def _integrate_weekly(obs: pd.DataFrame, H: np.ndarray, r: np.ndarray, resid: np.ndarray,
                      precision: np.ndarray, rhs: np.ndarray, factors: Sequence[LevelFactor]
                      ) -> tuple[np.ndarray, np.ndarray]:
    """Precision and right-hand side with the weekly shared factors (`weekly_shared`) of the posted
    weeks integrated out of the noise (Woodbury identity). One such factor: each row loads on one
    of its groups, so the inner matrix I + G' R^-1 G is diagonal; several: solved densely."""
    J = len(obs)
    parts = []
    for f in weekly_shared(factors):
        g = loading(obs, f)
        if np.any(g > 0):
            c, u = pd.factorize(pd.MultiIndex.from_frame(obs[group_keys(f)]))
            parts.append((g, c, len(u)))
    if not parts:
        return precision, rhs
    if len(parts) == 1:
        g, nw_c, n = parts[0]
        Gr = sparse.csr_matrix((g / r, (nw_c, np.arange(J))), shape=(n, J))  # G' R^-1
        A = np.asarray(Gr @ H)  # (n_nw, K)
        d = 1.0 + np.bincount(nw_c, g * g / r, minlength=n)
        return precision - A.T @ (A / d[:, None]), rhs - A.T @ (np.asarray(Gr @ resid) / d)
    G = sparse.hstack([sparse.csr_matrix((g, (np.arange(J), c)), shape=(J, n)) for g, c, n in parts]).tocsr()
    Gr = (G.T.multiply(1.0 / r[None, :])).tocsr()
    M = np.eye(G.shape[1]) + np.asarray((Gr @ G).todense())
    A = np.asarray(Gr @ H)
    return precision - A.T @ np.linalg.solve(M, A), rhs - A.T @ np.linalg.solve(M, np.asarray(Gr @ resid))


def level_posterior(obs: pd.DataFrame, factors: Sequence[LevelFactor] = DRAWN) -> LevelPosterior:
    """Gaussian posterior of the level factors given posted unit-weeks.

    `obs`: posted rows joined with their forecast rows: `zone, network, daypart, week,
    spots_aired, impressions, mean_impressions, airing_sd` and the level loadings `level_sd_<name>`
    of `forecasting.factors.LEVEL_FACTORS` (optional ones may be absent; impressions per spot).
    Rows with 0 aired spots carry no evidence. `factors`: the level factors in draw order
    (`forecasting.factors.DRAWN`). The persistent factors (`persistent`) are the unknowns; the
    weekly shared factors of the posted weeks (`weekly_shared`: shared by the posted units of a
    group in one week, saying nothing of later weeks) are integrated out: their covariance joins
    the noise's, inverted by the Woodbury identity; the unit-week's own factors (`own`) are part
    of each posting's noise.

    References
    ----------
    Bishop (2006), PRML, eq. 3.50-3.51 (posterior of a linear-Gaussian model); Woodbury
    matrix identity (e.g. Golub & Van Loan, Matrix Computations, 4th ed., sec. 2.1.4).
    """
    obs = obs[obs["spots_aired"] > 0].reset_index(drop=True)
    labels, codes = _posterior_groups(obs, factors)
    J = len(obs)
    if J == 0:
        return LevelPosterior(labels, np.zeros(0), np.zeros((0, 0)), 0)
    K = sum(len(lab) for lab in labels.values())
    k = obs["spots_aired"].to_numpy(float)
    y = obs["impressions"].to_numpy(float) / k
    resid = y - obs["mean_impressions"].to_numpy(float)
    r = np.zeros(J)
    for f in own(factors):
        r = r + loading(obs, f) ** 2
    r = r + obs["airing_sd"].to_numpy(float) ** 2 / k
    r = np.maximum(r, 1e-12 * np.maximum(obs["mean_impressions"].to_numpy(float) ** 2, 1.0))
    H = np.zeros((J, K))
    at = 0
    for f in persistent(factors):
        if f.name in labels:
            H[np.arange(J), at + codes[f.name]] = loading(obs, f)
            at += len(labels[f.name])
    Hw = H / r[:, None]
    precision, rhs = _integrate_weekly(obs, H, r, resid, np.eye(K) + H.T @ Hw, Hw.T @ resid,
                                    factors)
    cov = np.linalg.inv(precision)
    cov = (cov + cov.T) / 2
    return LevelPosterior(labels, cov @ rhs, cov, J)


def _row_positions(out: pd.DataFrame, post: LevelPosterior, factors: Sequence[LevelFactor]) -> dict:
    """{name: (has (n,) bool, index (n,) into the factor vector)} of each persistent factor of the
    posterior, for rows `out` (a row of a group the postings did not reach: has False)."""
    pos = {}
    for f in persistent(factors):
        if f.name not in post.groups:
            continue
        labels, keys = post.groups[f.name], group_keys(f)
        if not len(labels):  # no postings: the prior
            continue
        if not keys:
            at = np.zeros(len(out), dtype=np.int64)
        elif len(keys) == 1:
            at = labels.get_indexer(out[keys[0]])
        else:
            at = labels.get_indexer(pd.MultiIndex.from_frame(out[keys]))
        has = at >= 0
        pos[f.name] = (has, np.where(has, post.offset(f.name) + at, 0))
    return pos


def _posterior_parts(out: pd.DataFrame, post: LevelPosterior, factors: Sequence[LevelFactor]
                     ) -> tuple[np.ndarray, dict]:
    """(shift (n,) impressions, {name: new squared loading (n,)}) of rows `out` (`update_forecast`).

    Each unit's posterior level variance is kept exact: along the chain of persistent factors from
    the most specific (most keys: flight) to the least (common), a factor's part is its own
    w^2 V + 2 w w' V' with every later factor of the chain, plus the previous part where it is
    negative (the evidence pins the sum, not its parts); the last part is floored at 0."""
    m, V = post.mean, post.cov
    pos = _row_positions(out, post, factors)
    kept = persistent(factors)
    w = {f.name: loading(out, f) for f in kept}
    shift = None
    for f in kept:
        if f.name in pos:
            has, idx = pos[f.name]
            term = np.where(has, w[f.name] * m[idx] if len(m) else 0.0, 0.0)
            shift = term if shift is None else shift + term

    def cov(i: str, j: str):
        if i not in pos or j not in pos:
            return 1.0 if i == j else 0.0
        (hi, xi), (hj, xj) = pos[i], pos[j]
        return np.where(hi & hj, V[xi, xj], 1.0 if i == j else 0.0)

    chain = sorted(kept, key=lambda f: -len(group_keys(f)))
    parts, prev = {}, None
    for t, f in enumerate(chain):
        a = w[f.name]
        part = a * a * cov(f.name, f.name)
        for g in chain[t + 1:]:
            part = part + 2 * a * w[g.name] * cov(f.name, g.name)
        if prev is not None:
            part = part + np.minimum(prev, 0.0)
        parts[f.name], prev = np.maximum(part, 0.0), part
    return (np.zeros(len(out)) if shift is None else shift), parts


def update_forecast(forecast: pd.DataFrame, post: LevelPosterior, factors: Sequence[LevelFactor] = DRAWN
                    ) -> pd.DataFrame:
    """Forecast rows with the level factors' posterior folded in (module docstring).

    Changes `mean_impressions`, the persistent factors' loadings (`level_sd_network`,
    `level_sd_flight`, `level_sd_common` when the table has it), `level_sd`, `mean_rating` and the
    normal-approximation `q10_impressions`/`q90_impressions`; impressions per spot. `factors` as
    in `level_posterior`.
    """
    out = forecast.copy()
    shift, parts = _posterior_parts(out, post, factors)
    out["mean_impressions"] = np.maximum(out["mean_impressions"].to_numpy(float) + shift, 0.0)
    for f in persistent(factors):
        if not f.optional or f.table_column in out:
            out[f.table_column] = np.sqrt(parts[f.name])
    level_var = None
    for f in persistent(factors):
        level_var = parts[f.name] if level_var is None else level_var + parts[f.name]
    for f in factors:
        if f.weekly:
            level_var = level_var + loading(out, f) ** 2
    level_sd = np.sqrt(level_var)
    out["level_sd"] = level_sd
    if "universe" in out.columns and "mean_rating" in out.columns:
        with np.errstate(divide="ignore", invalid="ignore"):
            out["mean_rating"] = np.where(out["universe"] > 0, out["mean_impressions"] / out["universe"],
                                          out["mean_rating"])
    total_sd = np.sqrt(level_sd ** 2 + out["airing_sd"].to_numpy(float) ** 2)
    if "q10_impressions" in out.columns:
        out["q10_impressions"] = np.maximum(out["mean_impressions"] - _Z90 * total_sd, 0.0)
    if "q90_impressions" in out.columns:
        out["q90_impressions"] = out["mean_impressions"] + _Z90 * total_sd
    return out


@dataclass
class FoldedActuals:
    """Posted actuals folded into a forecast (impressions per spot in the forecast columns).

    `observed`: the postings joined with their forecast rows (one row per posting, the forecast
    columns NaN where the unit-week has no forecast row); `unmatched`: boolean array (postings,)
    of postings without a forecast row (no evidence); `posterior`: the level factors' posterior;
    `forecast`: the rows asked for with the posterior folded in (`update_forecast`)."""

    observed: pd.DataFrame
    unmatched: np.ndarray
    posterior: LevelPosterior
    forecast: pd.DataFrame


def fold_actuals(forecast: pd.DataFrame, actuals: pd.DataFrame, demo: str, *,
                 rows: pd.DataFrame | None = None) -> FoldedActuals:
    """Update forecast rows from posted actuals of one deal: the posterior of the level factors
    given the postings (`level_posterior` on the postings joined with the forecast rows of the
    deal's `demo`), folded into `rows` (default: every row of `forecast`) by `update_forecast`.

    `actuals`: DataFrame `zone, network, daypart, week, spots_aired, impressions` (whole aired
    spots; impressions in `demo`). `rows`: forecast-like rows (the level-sd columns, keyed by
    zone, network, daypart) to update; each row's update depends only on its own columns and
    the posterior, so updating a subset gives the same values as updating the whole table and
    taking the subset. The one step shared by `rebalance_deal` and the stress test
    (`planner.stress.load_book_model`), so both value a rebalanced deal on the same forecast.
    """
    fc_demo = forecast[forecast["demo"] == demo].copy()
    fc_demo["week"] = fc_demo["week"].astype("int64")
    acts = actuals[ACTUALS_COLUMNS].astype({"week": "int64"})
    obs = acts.merge(fc_demo, on=UNIT_KEY, how="left")
    unmatched = obs["mean_impressions"].isna().to_numpy()
    post = level_posterior(obs[~unmatched])
    updated = update_forecast(forecast if rows is None else rows, post)
    return FoldedActuals(observed=obs, unmatched=unmatched, posterior=post, forecast=updated)
