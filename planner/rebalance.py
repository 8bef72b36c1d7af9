"""Mid-flight rebalancing: update the forecast from posted actuals and re-plan the remaining weeks.

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

Re-plan. Aired weeks are fixed and their posted impressions counted; the remaining weeks are
re-planned with the allocator (`planner.allocate`) against the avails less every other deal's
holds, for the remaining guarantee G - delivered at the deal's own risk margin (confidence or pad).

References
----------
Conditional distribution of a multivariate normal / Bayesian linear regression with a Gaussian
prior: e.g. Rasmussen & Williams (2006), Gaussian Processes for Machine Learning, sec. 2.1 and
A.2; Bishop (2006), Pattern Recognition and Machine Learning, sec. 3.3. Chance-constrained
re-plan: Charnes & Cooper (1959), Management Science 6(1).
"""
from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from scipy import sparse

from planner.delivery import FLIGHT_KEY, UNIT_KEY, DeliveryModel, common_sd, network_week_sd
from planner.errors import InputError

ACTUALS_COLUMNS = ["zone", "network", "daypart", "week", "spots_aired", "impressions"]
_Z90 = 1.2815515655446004  # standard normal 0.90 quantile (NIST/SEMATECH e-Handbook table)
#: a posting further than this many sds of the forecast's own error law from its forecast (one
#: unit-week, or the deal's posted total) is taken for a data error: a commit is refused. Under
#: the normal law a 6-sd miss has a chance of about 2e-9 per unit-week.
PLAUSIBLE_SDS = 6.0


# --------------------------------------------------------------------------- actuals

def read_actuals(path: str | os.PathLike, scenario: Any = None, deal: Any = None) -> pd.DataFrame:
    """Read and validate a posted-actuals CSV `zone,network,daypart,week,spots_aired,impressions`.

    spots_aired: whole aired spots (>= 0); impressions: delivered in the deal's demo (>= 0).
    With `scenario`/`deal`, units must exist in the inventory and weeks lie in the deal's flight.
    Raises InputError naming the file and row (1-based data rows, as for the scenario's files).
    """
    path = Path(path)
    if not path.is_file():
        raise InputError(f"{path}: actuals file not found")
    try:
        df = pd.read_csv(path, dtype=str, keep_default_na=False, skipinitialspace=True)
    except (pd.errors.ParserError, UnicodeDecodeError, pd.errors.EmptyDataError) as exc:
        raise InputError(f"{path}: not a readable CSV ({exc})") from exc
    df.columns = [str(c).strip().lower() for c in df.columns]
    missing = [c for c in ACTUALS_COLUMNS if c not in df.columns]
    if missing:
        raise InputError(f"{path}: missing column(s) {', '.join(missing)} (need {','.join(ACTUALS_COLUMNS)})")
    df = df[ACTUALS_COLUMNS].copy()
    if df.empty:
        raise InputError(f"{path}: no rows (post at least one aired unit-week)")
    for c in ("zone", "network", "daypart"):
        df[c] = df[c].astype(str).str.strip()
        blank = df[c] == ""
        if blank.any():
            raise InputError(f"{path}: row {int(np.flatnonzero(blank)[0]) + 1}: {c} is blank")
    for c, integer in (("week", True), ("spots_aired", True), ("impressions", False)):
        num = pd.to_numeric(df[c].str.strip(), errors="coerce")
        bad = num.isna() | ~np.isfinite(num) | (num < 0)
        if integer:
            bad |= (num.fillna(0) % 1) != 0
        if bad.any():
            i = int(np.flatnonzero(bad.to_numpy())[0])
            what = "a whole number >= 0" if integer else "a number >= 0"
            raise InputError(f"{path}: row {i + 1}: {c} {df[c].iloc[i]!r} is not {what}")
        df[c] = num.astype("int64") if integer else num.astype(float)
    dup = df.duplicated(UNIT_KEY, keep="first")
    if dup.any():
        i = int(np.flatnonzero(dup.to_numpy())[0])
        r = df.iloc[i]
        raise InputError(f"{path}: row {i + 1}: duplicate unit {r.zone}/{r.network}/{r.daypart}/week {r.week}")
    pos = (df["impressions"] > 0) & (df["spots_aired"] == 0)
    if pos.any():
        i = int(np.flatnonzero(pos.to_numpy())[0])
        raise InputError(f"{path}: row {i + 1}: impressions posted with 0 spots aired")
    if scenario is not None:
        inv = scenario.inventory[UNIT_KEY].astype({"week": "int64"})
        m = df.merge(inv.assign(_known=True), on=UNIT_KEY, how="left")
        unknown = m["_known"].isna().to_numpy()
        if unknown.any():
            i = int(np.flatnonzero(unknown)[0])
            r = df.iloc[i]
            raise InputError(f"{path}: row {i + 1}: unit {r.zone}/{r.network}/{r.daypart}/week {r.week} "
                             f"is not in the scenario's inventory")
    if deal is not None:
        out = (df["week"] < deal.first_week) | (df["week"] > deal.last_week)
        if out.any():
            i = int(np.flatnonzero(out.to_numpy())[0])
            raise InputError(f"{path}: row {i + 1}: week {df['week'].iloc[i]} is outside deal "
                             f"{deal.name!r}'s flight (weeks {deal.first_week}-{deal.last_week})")
    return df.reset_index(drop=True)


# --------------------------------------------------------------------------- the update

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


# --------------------------------------------------------------------------- planning helpers

def replan(scenario: Any, deal: Any, *, guarantee: float, first_week: int, forecast: pd.DataFrame,
           held: pd.DataFrame | None, solver: str = "cbc"):
    """Re-plan `deal` over weeks first_week..last_week for `guarantee` impressions with the
    allocator (`planner.deals.run_deal`), on `forecast`, against avails less `held`.

    Returns (PlanResult, max_deliverable): when no plan meets the guarantee, `max_deliverable` is
    the largest guarantee the avails left can meet at the deal's risk margin (LP bound, impressions).
    """
    import copy
    from dataclasses import replace

    from planner import allocate as al
    from planner import deals as dl

    sub = replace(deal, impressions=float(guarantee), first_week=int(first_week))
    scn = copy.copy(scenario)
    scn.deals = {**scenario.deals, deal.name: sub}
    run = dl.run_deal(scn, deal.name, solver=solver, held=held, forecast=forecast)
    res = dl.plan_result(run)
    most = float("nan") if res.deliverable else float(al.max_guarantee(run.problem).value)
    return res, most


def plan_for_commit(forecast: pd.DataFrame, *, solver: str = "cbc"):
    """A `planner` for `planner.book.commit_deal` planning on a given forecast table (no fitting)."""

    def _planner(scenario, deal_name, *, held, **kw):
        from planner.deals import plan_deal

        return plan_deal(scenario, deal_name, held=held, forecast=forecast, solver=kw.get("solver", solver))

    return _planner


# --------------------------------------------------------------------------- checks of the postings

def _unit(r) -> str:
    return f"{r.zone}/{r.network}/{r.daypart}/week {int(r.week)}"


def _weeks_text(weeks) -> str:
    """Sorted plan weeks as ranges: [3, 4, 5, 8] -> 'weeks 3-5, 8' ('week 2' for one)."""
    weeks = sorted(set(int(w) for w in weeks))
    parts, start = [], None
    for i, w in enumerate(weeks):
        start = w if start is None else start
        if i + 1 == len(weeks) or weeks[i + 1] != w + 1:
            parts.append(f"{start}" if start == w else f"{start}-{w}")
            start = None
    return ("week " if len(weeks) == 1 else "weeks ") + ", ".join(parts)


def posting_problems(acts: pd.DataFrame, holds: pd.DataFrame, observed: pd.DataFrame, unmatched: np.ndarray,
                     *, first_week: int, unposted_as_zero: bool = False) -> tuple[list[str], list[str]]:
    """What makes posted actuals unsafe to commit a re-plan on, and what is only worth saying.

    `acts`: the postings (row i is the 1-based data row i + 1 of the file); `holds`: the deal's
    holds (`UNIT_KEY` + spots); `observed`/`unmatched`: the postings joined with their forecast
    rows (`FoldedActuals`). Returns (problems, warnings). Problems: held unit-weeks of weeks
    `first_week`..last posted week without a posted row (a warning instead with
    `unposted_as_zero`); postings in unit-weeks the deal does not hold or airing more spots than
    it holds; a unit-week, or the deal's total, beyond `PLAUSIBLE_SDS` sds of the forecast's error
    law (`implausible_postings`).
    """
    problems: list[str] = []
    warnings: list[str] = []
    if acts.empty:
        return problems, warnings
    last = int(acts["week"].max())
    held = holds[(holds["week"] >= first_week) & (holds["week"] <= last)]
    gaps = held.merge(acts[UNIT_KEY], on=UNIT_KEY, how="left", indicator=True)
    gaps = gaps[gaps["_merge"] == "left_only"]
    if len(gaps):
        text = (f"{len(gaps)} held unit-week(s) in {_weeks_text(gaps['week'])} (up to the last posted week {last}) "
                f"have no posted row ({int(gaps['spots'].sum()):,} held spots; first: {_unit(gaps.iloc[0])})")
        if unposted_as_zero:
            warnings.append(text + "; counted as 0 delivered (--unposted-as-zero)")
        else:
            problems.append(text + ": a stray later week or a missing one? post them, or pass --unposted-as-zero "
                                   "to count them as delivering nothing")
    vs = acts.reset_index(drop=True).merge(holds[UNIT_KEY + ["spots"]], on=UNIT_KEY, how="left")
    outside = vs["spots"].isna().to_numpy()
    if outside.any():
        i = int(np.flatnonzero(outside)[0])
        problems.append(f"{int(outside.sum())} posting(s) are not in the deal's held plan (first: row {i + 1}, "
                        f"{_unit(vs.iloc[i])}, {int(vs['spots_aired'].iloc[i])} aired, none held)")
    extra = (~outside) & (vs["spots_aired"] > vs["spots"].fillna(0)).to_numpy()
    if extra.any():
        i = int(np.flatnonzero(extra)[0])
        r = vs.iloc[i]
        problems.append(f"{int(extra.sum())} posted unit-week(s) aired more spots than the deal holds there "
                        f"(first: row {i + 1}, {_unit(r)}, {int(r.spots_aired)} aired, {int(r.spots)} held)")
    problems += implausible_postings(observed, unmatched)
    return problems, warnings


def implausible_postings(observed: pd.DataFrame, unmatched: np.ndarray, sds: float = PLAUSIBLE_SDS) -> list[str]:
    """Postings beyond `sds` sds of the forecast's own error law, per unit-week and for the total.

    Unit-week i with k aired spots: the mean impressions per aired spot has sd
    sqrt(level_sd_i^2 + airing_sd_i^2 / k) around mean_impressions_i (DEVELOPERS.md, the error
    model of one spot, preemption excluded since k counts aired spots). The deal's total over the
    posted unit-weeks: mean sum k_i mu_i and the `DeliveryModel` variance of k aired spots (level
    factors shared across units, so the total's sd does not shrink like 1/sqrt(n)). `observed`:
    postings joined with forecast rows (row i = data row i + 1); `unmatched`: rows without one.
    """
    ok = ~unmatched & (observed["spots_aired"] > 0).to_numpy()
    o = observed[ok]
    if o.empty:
        return []
    k = o["spots_aired"].to_numpy(float)
    mu = o["mean_impressions"].to_numpy(float)
    sd = np.sqrt(o["level_sd"].to_numpy(float) ** 2 + o["airing_sd"].to_numpy(float) ** 2 / k)
    z = (o["impressions"].to_numpy(float) / k - mu) / np.maximum(sd, 1e-9 * np.maximum(mu, 1.0))
    out = []
    far = np.abs(z) > sds
    if far.any():
        j = int(np.argmax(np.abs(z)))
        r = o.iloc[j]
        out.append(f"{int(far.sum())} posted unit-week(s) lie beyond {sds:g} sds of the forecast's error law "
                   f"(worst: row {int(o.index[j]) + 1}, {_unit(r)}, {r.impressions / k[j]:,.0f} impressions per aired "
                   f"spot against {mu[j]:,.0f} forecast, {z[j]:+,.1f} sds): impressions in another unit or scale "
                   f"(thousands?), or another demo?")
    dm = DeliveryModel.from_units(o.assign(preempt_rate=0.0))
    total, expected, sd_total = float(o["impressions"].sum()), dm.mean(k), dm.sd(k)
    zt = (total - expected) / sd_total if sd_total > 0 else 0.0
    if abs(zt) > sds:
        out.append(f"the deal's posted total {total:,.0f} is {total / expected:,.3g}x the forecast of the spots "
                   f"that aired ({expected:,.0f}), {zt:+,.1f} sds of the error law: beyond {sds:g} sds")
    return out


# --------------------------------------------------------------------------- the rebalance

@dataclass
class RebalanceResult:
    """Mid-flight re-plan of one deal (impressions; money in the scenario currency)."""

    deal: str
    guarantee: float
    confidence_label: str
    aired_weeks: list[int]
    remaining_weeks: list[int]
    delivered: float
    expected_aired: float
    posted_vs_forecast: float
    remaining_guarantee: float
    probability_before: float
    deliverable: bool
    probability_after: float
    expected_remaining: float
    sd_remaining: float
    held_remaining_spots: int
    new_spots: int
    added_spots: int
    held_remaining_cost: float
    new_cost: float
    added_cost: float
    max_deliverable: float
    unmet: float
    committed: bool
    status: str
    not_committed_reason: str = ""
    # reasons the postings look wrong (a commit on them is refused): `posting_problems`
    problems: list[str] = field(default_factory=list)
    # per network that posted: the posterior mean of its level factor, in sds of that factor
    # (standard-normal units), and the change of its units' forecast level from it (fraction)
    network_shift: dict = field(default_factory=dict)
    network_level_change: dict = field(default_factory=dict)
    warnings: list[str] = field(default_factory=list)
    plan: pd.DataFrame | None = field(default=None, repr=False)
    catch_up: pd.DataFrame | None = field(default=None, repr=False)
    # the re-planned remaining weeks as a buy order (`buy_order`); None without a re-plan
    order: pd.DataFrame | None = field(default=None, repr=False)
    forecast: pd.DataFrame | None = field(default=None, repr=False)
    posterior: LevelPosterior | None = field(default=None, repr=False)

    def as_dict(self) -> dict:
        skip = {"plan", "catch_up", "order", "forecast", "posterior"}
        out = {k: v for k, v in self.__dict__.items() if k not in skip}
        out["catch_up"] = [] if self.catch_up is None else self.catch_up.to_dict(orient="records")
        return out


def rebalance_deal(scenario: Any, deal_name: str, actuals: str | os.PathLike | pd.DataFrame,
                   book: str | os.PathLike | None = None, *, commit: bool = False, solver: str = "cbc",
                   forecast: pd.DataFrame | None = None, unposted_as_zero: bool = False) -> RebalanceResult:
    """Update the forecast from posted actuals and re-plan the deal's remaining weeks.

    `actuals`: a CSV path (validated by `read_actuals`) or an already-valid DataFrame. Aired weeks
    are first_week .. the last posted week; their posted impressions count toward the guarantee.
    With `commit=True` and a deliverable re-plan, the deal's holds in the remaining weeks are
    replaced by the re-plan in one checked transaction (aired weeks' holds are kept), and the
    posted actuals used are stored with them (the book's `postings`), so the stress test values
    the remaining holds on the same updated forecast (`fold_actuals`).

    Postings that look wrong (`posting_problems`: held unit-weeks up to the last posted week
    without a row, postings outside the held plan or airing more than held, figures beyond
    `PLAUSIBLE_SDS` sds of the forecast's error law) are listed in `problems`; with `commit=True`
    they raise InputError before anything is planned or written. `unposted_as_zero` accepts
    held unit-weeks without a row as delivering nothing (said in `warnings`).
    """
    from planner.book import book_warnings, get_deal, held_spots, replace_holds

    if deal_name not in scenario.deals:
        raise InputError(f"{scenario.path}: no deal named {deal_name!r} in deals/")
    deal = scenario.deals[deal_name]
    booked = get_deal(scenario, deal_name, book)  # InputError when not committed
    acts = actuals if isinstance(actuals, pd.DataFrame) else read_actuals(actuals, scenario, deal)
    if forecast is None:
        from planner.forecast_job import ensure_forecast

        forecast = ensure_forecast(scenario).table
    warnings: list[str] = book_warnings(scenario, book)
    folded = fold_actuals(forecast, acts, deal.demo)
    obs, no_fc, post, updated = folded.observed, folded.unmatched, folded.posterior, folded.forecast
    if no_fc.any():
        warnings.append(f"{int(no_fc.sum())} posted unit-week(s) have no forecast row; counted as delivered, "
                        f"not used as evidence")

    last_aired = int(acts["week"].max()) if len(acts) else deal.first_week - 1
    aired = list(range(deal.first_week, last_aired + 1))
    remaining = list(range(last_aired + 1, deal.last_week + 1))
    delivered = float(acts["impressions"].sum())
    holds = booked.holds
    held_aired = holds[holds["week"] <= last_aired]
    problems, said = posting_problems(acts, holds, obs, no_fc, first_week=deal.first_week,
                                      unposted_as_zero=unposted_as_zero)
    warnings += said
    if commit and problems:
        where = actuals if not isinstance(actuals, pd.DataFrame) else "posted actuals"
        raise InputError(f"{where}: re-plan of {deal_name!r} not committed, the postings look wrong: "
                         + "; ".join(problems) + " (nothing was written to the book)")
    # Expected delivery of what aired, under the prior forecast (per aired spot, no preemption).
    ok = obs[~no_fc]
    expected_aired = float((ok["spots_aired"] * ok["mean_impressions"]).sum())
    ratio = delivered / expected_aired - 1.0 if expected_aired > 0 else float("nan")
    G_left = max(float(deal.impressions) - delivered, 0.0)

    held_rem = holds[holds["week"] > last_aired]
    # The current holds' chance of meeting what is left, on the updated forecast.
    p_before = _probability_of(scenario, deal, updated, held_rem, G_left)
    others = held_spots(scenario, book, exclude=[deal_name])
    max_del = float("nan")
    if remaining and G_left > 0:
        plan, max_del = replan(scenario, deal, guarantee=G_left, first_week=remaining[0], forecast=updated,
                               held=others, solver=solver)
        deliverable, status = bool(plan.deliverable), (plan.verdict if plan.deliverable else plan.reason)
        new_plan = plan.spots if deliverable else plan.spots.iloc[:0]
        p_after = float(plan.probability) if deliverable else 0.0
        exp_rem, sd_rem = float(plan.expected_impressions or 0.0), float(plan.sd or 0.0)
        new_cost_val = float(plan.cost or 0.0)
    else:
        deliverable = G_left <= 0
        status = "guarantee already delivered" if deliverable else "flight over: nothing left to re-plan"
        new_plan = held_rem.iloc[:0]
        p_after, exp_rem, sd_rem, new_cost_val = float(deliverable), 0.0, 0.0, 0.0
        if not deliverable:
            max_del = 0.0
    held_spots_n = int(held_rem["spots"].sum())
    held_cost = float(held_rem["cost"].fillna(0).sum())
    new_spots = int(new_plan["spots"].sum()) if deliverable else 0
    new_cost = new_cost_val if deliverable else 0.0
    label = (f"confidence {deal.confidence:.0%}" if deal.pad is None else f"pad {deal.pad:.0%}")
    unmet = 0.0 if deliverable else max(G_left - max_del, 0.0)
    catch = _catch_up(held_rem, new_plan) if deliverable else None
    order = (buy_order(held_rem, new_plan, scenario.inventory)
             if deliverable and remaining and G_left > 0 else None)
    net_shift = {str(n): float(post.mean[i]) for i, n in enumerate(post.networks)}
    ev = obs[~no_fc]  # the posted rows the posterior used: every network in it posted
    rel_sd = (ev["level_sd_network"] / ev["mean_impressions"]).groupby(ev["network"].astype(str)).median()
    net_change = {n: z * float(rel_sd.get(n, np.nan)) for n, z in net_shift.items()}
    committed = False
    not_committed = ("" if not commit else
                     "the guarantee is already delivered: nothing to re-plan" if G_left <= 0 else
                     "the flight is over: nothing left to re-plan" if not remaining else
                     "" if deliverable else "no re-plan meets the remaining guarantee")
    if commit and deliverable and remaining and G_left > 0:
        cols = UNIT_KEY + ["spots", "rate", "cost", "expected_impressions", "sd"]
        keep = held_aired[cols]
        new_holds = pd.concat([keep, new_plan[cols]], ignore_index=True)
        replace_holds(scenario, deal_name, new_holds, {
            "expected_impressions": delivered + exp_rem, "sd": sd_rem, "probability": p_after,
            "cost": float(keep["cost"].fillna(0).sum()) + new_cost,
            "rebalanced_after_week": last_aired, "delivered": delivered,
            "posted_unit_weeks": int(len(acts))}, book,
            postings=acts[ACTUALS_COLUMNS])
        committed = True
    return RebalanceResult(
        deal=deal_name, guarantee=float(deal.impressions), confidence_label=label, aired_weeks=aired,
        remaining_weeks=remaining, delivered=delivered, expected_aired=expected_aired, posted_vs_forecast=ratio,
        remaining_guarantee=G_left, probability_before=p_before, deliverable=deliverable,
        probability_after=p_after, expected_remaining=exp_rem, sd_remaining=sd_rem,
        held_remaining_spots=held_spots_n, new_spots=new_spots,
        added_spots=new_spots - held_spots_n if deliverable else 0, held_remaining_cost=held_cost,
        new_cost=new_cost, added_cost=new_cost - held_cost if deliverable else 0.0,
        max_deliverable=max_del, unmet=unmet, committed=committed, status=status,
        not_committed_reason="" if committed else not_committed, problems=problems,
        network_shift=net_shift, network_level_change=net_change, warnings=warnings, plan=new_plan, catch_up=catch,
        order=order, forecast=updated,
        posterior=post)


def _probability_of(scenario: Any, deal: Any, forecast: pd.DataFrame, held: pd.DataFrame, guarantee: float) -> float:
    """Normal-approximation chance that the held spots deliver `guarantee` on `forecast`."""
    from planner.deals import deal_units

    if guarantee <= 0:
        return 1.0
    if held.empty:
        return 0.0
    u = held[UNIT_KEY + ["spots"]].merge(deal_units(scenario, forecast, deal), on=UNIT_KEY, how="inner")
    if u.empty:
        return 0.0
    dm = DeliveryModel.from_units(u)
    return dm.probability(u["spots"].to_numpy(float), guarantee)


def _catch_up(held: pd.DataFrame, new: pd.DataFrame) -> pd.DataFrame:
    """Per unit: held spots, re-planned spots and the change (remaining weeks only)."""
    a = held[UNIT_KEY + ["spots"]].rename(columns={"spots": "held"})
    b = new[UNIT_KEY + ["spots", "rate"]].rename(columns={"spots": "new"})
    m = a.merge(b, on=UNIT_KEY, how="outer")
    m["held"] = m["held"].fillna(0).astype("int64")
    m["new"] = m["new"].fillna(0).astype("int64")
    m["change"] = m["new"] - m["held"]
    m = m[m["change"] != 0]
    return m.sort_values(UNIT_KEY).reset_index(drop=True)


def buy_order(held: pd.DataFrame, new: pd.DataFrame, inventory: pd.DataFrame) -> pd.DataFrame:
    """The re-planned remaining weeks as a buy order, one row per unit-week re-planned or held.

    `held`: the deal's holds in the remaining weeks (`UNIT_KEY`, spots, rate); `new`: the
    re-plan (`PlanResult.spots`). Columns `UNIT_KEY`, spots (the new count; 0 releases the
    unit-week), rate, cost, expected_impressions, preempt_rate, sd_impressions (of the new
    count; impressions, currency), held (spots held before) and change (spots - held).
    """
    cols = UNIT_KEY + ["spots", "rate", "cost", "expected_impressions", "preempt_rate", "sd_impressions"]
    h = held[UNIT_KEY + ["spots", "rate"]].rename(columns={"spots": "held", "rate": "held_rate"})
    m = new[cols].merge(h, on=UNIT_KEY, how="outer")
    inv = inventory[UNIT_KEY + ["preempt_rate"]].astype({"week": "int64"}).rename(columns={"preempt_rate": "p"})
    m = m.astype({"week": "int64"}).merge(inv, on=UNIT_KEY, how="left")
    for c in ("spots", "held"):
        m[c] = m[c].fillna(0).astype("int64")
    m["rate"] = m["rate"].fillna(m["held_rate"])
    m["preempt_rate"] = m["preempt_rate"].fillna(m["p"])
    for c in ("cost", "expected_impressions", "sd_impressions"):
        m[c] = m[c].fillna(0.0)
    m["change"] = m["spots"] - m["held"]
    return m[cols + ["held", "change"]].sort_values(UNIT_KEY).reset_index(drop=True)
