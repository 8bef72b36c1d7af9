"""Posted actuals folded into the forecast: the Gaussian update of the level factors.

Evidence. A posted unit-week (k aired spots, y impressions in the deal's demo) says, per aired
spot, y / k = mu_i + u_i Z_com + a_i Z_net[network] + b_i Z_flight[zone, network, daypart] + e, with
e ~ N(0, c_i^2 + s_i^2 / k) (the unit-week's own factor and the airing noise averaged over k
spots; loadings u, a, b, c and airing sd s from the forecast table; Z_com is the factor shared
by every unit). With the level factors' prior
N(0, I) this is a linear-Gaussian model, so their posterior is Gaussian (a conditional, or
shrinkage, update: the evidence is weighed against the forecast's prior uncertainty):

    precision  P = I + H' R^-1 H,   mean  m = P^-1 H' R^-1 (y - mu),   covariance  V = P^-1.

The remaining weeks' forecast rows then get mean mu_i + u_i m_com + a_i m_net + b_i m_flight,
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

import numpy as np
import pandas as pd
from scipy import sparse

from planner.delivery import FLIGHT_KEY, UNIT_KEY, common_sd, network_week_sd

#: columns of a posted-actuals table (data contract)
ACTUALS_COLUMNS = ["zone", "network", "daypart", "week", "spots_aired", "impressions"]
_Z90 = 1.2815515655446004  # standard normal 0.90 quantile (NIST/SEMATECH e-Handbook table)


@dataclass
class LevelPosterior:
    """Posterior of the network, flight and common level factors (standard-normal prior).

    `networks` (Index) and `flights` (MultiIndex zone,network,daypart) order the factor vector
    [networks..., flights..., common] (the common factor last, when `common`); `mean` (K,) and
    `cov` (K, K) dimensionless (factor units)."""

    networks: pd.Index
    flights: pd.MultiIndex
    mean: np.ndarray
    cov: np.ndarray
    observations: int
    common: bool = False


def level_posterior(obs: pd.DataFrame) -> LevelPosterior:
    """Gaussian posterior of the level factors given posted unit-weeks.

    `obs`: posted rows joined with their forecast rows: `zone, network, daypart, week,
    spots_aired, impressions, mean_impressions, airing_sd, level_sd_network, level_sd_flight,
    level_sd_week` and optionally `level_sd_network_week`, `level_sd_common` (impressions per
    spot). Rows with 0
    aired spots carry no evidence. The network-week factors of the posted weeks are integrated
    out (they are shared by the posted units of a network in one week and say nothing of later
    weeks): their covariance joins the noise's, inverted by the Woodbury identity (each row
    loads on one of them, so the inner matrix is diagonal).

    References
    ----------
    Bishop (2006), PRML, eq. 3.50-3.51 (posterior of a linear-Gaussian model); Woodbury
    matrix identity (e.g. Golub & Van Loan, Matrix Computations, 4th ed., sec. 2.1.4).
    """
    obs = obs[obs["spots_aired"] > 0].reset_index(drop=True)
    net_c, nets = pd.factorize(obs["network"], sort=True)
    flt_c, flts = pd.factorize(pd.MultiIndex.from_frame(obs[FLIGHT_KEY]), sort=True)
    J, Nn, Nf = len(obs), len(nets), len(flts)
    u = common_sd(obs)
    has_common = bool(np.any(u > 0))
    K = Nn + Nf + int(has_common)
    if J == 0:
        return LevelPosterior(pd.Index([], name="network"),
                              pd.MultiIndex.from_tuples([], names=FLIGHT_KEY), np.zeros(0), np.zeros((0, 0)), 0)
    k = obs["spots_aired"].to_numpy(float)
    y = obs["impressions"].to_numpy(float) / k
    resid = y - obs["mean_impressions"].to_numpy(float)
    r = obs["level_sd_week"].to_numpy(float) ** 2 + obs["airing_sd"].to_numpy(float) ** 2 / k
    r = np.maximum(r, 1e-12 * np.maximum(obs["mean_impressions"].to_numpy(float) ** 2, 1.0))
    H = np.zeros((J, K))
    H[np.arange(J), net_c] = obs["level_sd_network"].to_numpy(float)
    H[np.arange(J), Nn + flt_c] = obs["level_sd_flight"].to_numpy(float)
    if has_common:
        H[:, K - 1] = u
    Hw = H / r[:, None]
    precision = np.eye(K) + H.T @ Hw
    rhs = Hw.T @ resid
    g = network_week_sd(obs)
    if np.any(g > 0):
        nw_c, nw_u = pd.factorize(pd.MultiIndex.from_frame(obs[["network", "week"]]))
        Gr = sparse.csr_matrix((g / r, (nw_c, np.arange(J))), shape=(len(nw_u), J))  # G' R^-1
        A = np.asarray(Gr @ H)  # (n_nw, K)
        d = 1.0 + np.bincount(nw_c, g * g / r, minlength=len(nw_u))
        precision -= A.T @ (A / d[:, None])
        rhs -= A.T @ (np.asarray(Gr @ resid) / d)
    cov = np.linalg.inv(precision)
    cov = (cov + cov.T) / 2
    mean = cov @ rhs
    return LevelPosterior(pd.Index(nets, name="network"),
                          pd.MultiIndex.from_tuples(list(flts), names=FLIGHT_KEY), mean, cov, J, has_common)


def update_forecast(forecast: pd.DataFrame, post: LevelPosterior) -> pd.DataFrame:
    """Forecast rows with the level factors' posterior folded in (module docstring).

    Changes `mean_impressions`, `level_sd_common`, `level_sd_network`, `level_sd_flight`,
    `level_sd`, `mean_rating` and the normal-approximation `q10_impressions`/`q90_impressions`;
    impressions per spot.
    """
    out = forecast.copy()
    Nn = len(post.networks)
    ni = post.networks.get_indexer(out["network"]) if Nn else np.full(len(out), -1)
    fi = (post.flights.get_indexer(pd.MultiIndex.from_frame(out[FLIGHT_KEY]))
          if len(post.flights) else np.full(len(out), -1))
    a = out["level_sd_network"].to_numpy(float)
    b = out["level_sd_flight"].to_numpy(float)
    c = out["level_sd_week"].to_numpy(float)
    u = common_sd(out)
    m = post.mean
    V = post.cov
    hn, hf = ni >= 0, fi >= 0
    gi = np.where(hf, Nn + fi, 0)
    nidx = np.where(hn, ni, 0)
    shift = np.where(hn, a * m[nidx] if Nn else 0.0, 0.0) + np.where(hf, b * m[gi] if len(m) else 0.0, 0.0)
    vnn = np.where(hn, V[nidx, nidx] if Nn else 1.0, 1.0)
    vff = np.where(hf, V[gi, gi] if len(m) else 1.0, 1.0)
    vnf = np.where(hn & hf, V[nidx, gi] if len(m) else 0.0, 0.0)
    vcc, vnc, vfc = 1.0, 0.0, 0.0
    if post.common:
        shift = shift + u * m[-1]
        vcc = V[-1, -1]
        vnc = np.where(hn, V[nidx, -1] if Nn else 0.0, 0.0)
        vfc = np.where(hf, V[gi, -1], 0.0)
    # Keep each unit's posterior level variance exact: the flight part takes b^2 Vff + 2ab Vnf
    # + 2bu Vfc, the network part a^2 Vnn + 2au Vnc, the common part u^2 Vcc; a negative part
    # (evidence pins the sum, not its parts) is absorbed by the next one (flight -> network ->
    # common).
    flt_part = b * b * vff + 2 * a * b * vnf + 2 * b * u * vfc
    net_part = a * a * vnn + 2 * a * u * vnc + np.minimum(flt_part, 0.0)
    com_part = np.maximum(u * u * vcc + np.minimum(net_part, 0.0), 0.0)
    new_b2, new_a2 = np.maximum(flt_part, 0.0), np.maximum(net_part, 0.0)
    out["mean_impressions"] = np.maximum(out["mean_impressions"].to_numpy(float) + shift, 0.0)
    out["level_sd_network"] = np.sqrt(new_a2)
    out["level_sd_flight"] = np.sqrt(new_b2)
    if "level_sd_common" in out:
        out["level_sd_common"] = np.sqrt(com_part)
    g = network_week_sd(out)
    level_sd = np.sqrt(new_a2 + new_b2 + com_part + c ** 2 + g ** 2)
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
