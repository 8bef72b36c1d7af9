"""Mid-flight rebalancing: update the forecast from posted actuals and re-plan the remaining weeks.

Evidence. A posted unit-week (k aired spots, y impressions in the deal's demo) says, per aired
spot, y / k = mu_i + a_i Z_net[network] + b_i Z_flight[zone, network, daypart] + e, with
e ~ N(0, c_i^2 + s_i^2 / k) (the unit-week's own factor and the airing noise averaged over k
spots; loadings a, b, c and airing sd s from the forecast table). With the level factors' prior
N(0, I) this is a linear-Gaussian model, so their posterior is Gaussian (a conditional, or
shrinkage, update: the evidence is weighed against the forecast's prior uncertainty):

    precision  P = I + H' R^-1 H,   mean  m = P^-1 H' R^-1 (y - mu),   covariance  V = P^-1.

The remaining weeks' forecast rows then get mean mu_i + a_i m_net + b_i m_flight, network
loading a_i sqrt(V_nn) and flight loading sqrt(b_i^2 V_ff + 2 a_i b_i V_nf) (keeping each unit's
posterior level variance exact; cross-unit posterior correlations beyond the shared factors are
dropped). Units that posted move, and so, through the network factor, do units of the same
network in other zones and dayparts that did not post. The unit-week factors of future weeks are
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
from scipy.special import ndtri

from planner.delivery import FLIGHT_KEY, UNIT_KEY, DeliveryModel
from planner.errors import InputError

ACTUALS_COLUMNS = ["zone", "network", "daypart", "week", "spots_aired", "impressions"]
_Z90 = 1.2815515655446004  # standard normal 0.90 quantile (NIST/SEMATECH e-Handbook table)


# --------------------------------------------------------------------------- actuals

def read_actuals(path: str | os.PathLike, scenario: Any = None, deal: Any = None) -> pd.DataFrame:
    """Read and validate a posted-actuals CSV `zone,network,daypart,week,spots_aired,impressions`.

    spots_aired: whole aired spots (>= 0); impressions: delivered in the deal's demo (>= 0).
    With `scenario`/`deal`, units must exist in the inventory and weeks lie in the deal's flight.
    Raises InputError naming the file and row (CSV line numbers, header = line 1).
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
    for c in ("zone", "network", "daypart"):
        df[c] = df[c].astype(str).str.strip()
        blank = df[c] == ""
        if blank.any():
            raise InputError(f"{path}: row {int(np.flatnonzero(blank)[0]) + 2}: {c} is blank")
    for c, integer in (("week", True), ("spots_aired", True), ("impressions", False)):
        num = pd.to_numeric(df[c].str.strip(), errors="coerce")
        bad = num.isna() | ~np.isfinite(num) | (num < 0)
        if integer:
            bad |= (num.fillna(0) % 1) != 0
        if bad.any():
            i = int(np.flatnonzero(bad.to_numpy())[0])
            what = "a whole number >= 0" if integer else "a number >= 0"
            raise InputError(f"{path}: row {i + 2}: {c} {df[c].iloc[i]!r} is not {what}")
        df[c] = num.astype("int64") if integer else num.astype(float)
    dup = df.duplicated(UNIT_KEY, keep="first")
    if dup.any():
        i = int(np.flatnonzero(dup.to_numpy())[0])
        r = df.iloc[i]
        raise InputError(f"{path}: row {i + 2}: duplicate unit {r.zone}/{r.network}/{r.daypart}/week {r.week}")
    pos = (df["impressions"] > 0) & (df["spots_aired"] == 0)
    if pos.any():
        i = int(np.flatnonzero(pos.to_numpy())[0])
        raise InputError(f"{path}: row {i + 2}: impressions posted with 0 spots aired")
    if scenario is not None:
        inv = scenario.inventory[UNIT_KEY].astype({"week": "int64"})
        m = df.merge(inv.assign(_known=True), on=UNIT_KEY, how="left")
        unknown = m["_known"].isna().to_numpy()
        if unknown.any():
            i = int(np.flatnonzero(unknown)[0])
            r = df.iloc[i]
            raise InputError(f"{path}: row {i + 2}: unit {r.zone}/{r.network}/{r.daypart}/week {r.week} "
                             f"is not in the scenario's inventory")
    if deal is not None:
        out = (df["week"] < deal.first_week) | (df["week"] > deal.last_week)
        if out.any():
            i = int(np.flatnonzero(out.to_numpy())[0])
            raise InputError(f"{path}: row {i + 2}: week {df['week'].iloc[i]} is outside deal "
                             f"{deal.name!r}'s flight (weeks {deal.first_week}-{deal.last_week})")
    return df.reset_index(drop=True)


# --------------------------------------------------------------------------- the update

@dataclass
class LevelPosterior:
    """Posterior of the network and flight level factors (standard-normal prior).

    `networks` (Index) and `flights` (MultiIndex zone,network,daypart) order the factor vector
    [networks..., flights...]; `mean` (K,) and `cov` (K, K) dimensionless (factor units)."""

    networks: pd.Index
    flights: pd.MultiIndex
    mean: np.ndarray
    cov: np.ndarray
    observations: int


def level_posterior(obs: pd.DataFrame) -> LevelPosterior:
    """Gaussian posterior of the level factors given posted unit-weeks.

    `obs`: posted rows joined with their forecast rows: `zone, network, daypart, week,
    spots_aired, impressions, mean_impressions, airing_sd, level_sd_network, level_sd_flight,
    level_sd_week` (impressions per spot). Rows with 0 aired spots carry no evidence.

    References
    ----------
    Bishop (2006), PRML, eq. 3.50-3.51 (posterior of a linear-Gaussian model).
    """
    obs = obs[obs["spots_aired"] > 0].reset_index(drop=True)
    net_c, nets = pd.factorize(obs["network"], sort=True)
    flt_c, flts = pd.factorize(pd.MultiIndex.from_frame(obs[FLIGHT_KEY]), sort=True)
    J, Nn, Nf = len(obs), len(nets), len(flts)
    K = Nn + Nf
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
    Hw = H / r[:, None]
    precision = np.eye(K) + H.T @ Hw
    cov = np.linalg.inv(precision)
    cov = (cov + cov.T) / 2
    mean = cov @ (Hw.T @ resid)
    return LevelPosterior(pd.Index(nets, name="network"),
                          pd.MultiIndex.from_tuples(list(flts), names=FLIGHT_KEY), mean, cov, J)


def update_forecast(forecast: pd.DataFrame, post: LevelPosterior) -> pd.DataFrame:
    """Forecast rows with the level factors' posterior folded in (module docstring).

    Changes `mean_impressions`, `level_sd_network`, `level_sd_flight`, `level_sd`, `mean_rating`
    and the normal-approximation `q10_impressions`/`q90_impressions`; impressions per spot.
    """
    out = forecast.copy()
    Nn = len(post.networks)
    ni = post.networks.get_indexer(out["network"]) if Nn else np.full(len(out), -1)
    fi = (post.flights.get_indexer(pd.MultiIndex.from_frame(out[FLIGHT_KEY]))
          if len(post.flights) else np.full(len(out), -1))
    a = out["level_sd_network"].to_numpy(float)
    b = out["level_sd_flight"].to_numpy(float)
    c = out["level_sd_week"].to_numpy(float)
    m = post.mean
    V = post.cov
    hn, hf = ni >= 0, fi >= 0
    gi = np.where(hf, Nn + fi, 0)
    nidx = np.where(hn, ni, 0)
    shift = np.where(hn, a * m[nidx] if Nn else 0.0, 0.0) + np.where(hf, b * m[gi] if len(m) else 0.0, 0.0)
    vnn = np.where(hn, V[nidx, nidx] if Nn else 1.0, 1.0)
    vff = np.where(hf, V[gi, gi] if len(m) else 1.0, 1.0)
    vnf = np.where(hn & hf, V[nidx, gi] if len(m) else 0.0, 0.0)
    new_a = a * np.sqrt(vnn)
    new_b2 = np.maximum(b * b * vff + 2 * a * b * vnf, 0.0)
    out["mean_impressions"] = np.maximum(out["mean_impressions"].to_numpy(float) + shift, 0.0)
    out["level_sd_network"] = new_a
    out["level_sd_flight"] = np.sqrt(new_b2)
    level_sd = np.sqrt(new_a ** 2 + new_b2 + c ** 2)
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


# --------------------------------------------------------------------------- planning helpers

def deal_units(scenario: Any, forecast: pd.DataFrame, demo: str) -> pd.DataFrame:
    """Forecast rows of `demo` joined with the inventory (`avails, rate, preempt_rate`)."""
    fc = forecast[forecast["demo"] == demo].copy()
    fc["week"] = fc["week"].astype("int64")
    inv = scenario.inventory[UNIT_KEY + ["avails", "rate", "preempt_rate"]].copy()
    inv["week"] = inv["week"].astype("int64")
    return fc.drop(columns=[c for c in ("avails", "rate", "preempt_rate") if c in fc.columns]).merge(
        inv, on=UNIT_KEY, how="inner")


def rules_of(deal: Any):
    """The allocator's `Rules` for a deal (mix shares, pacing tolerance, risk margin)."""
    from planner.allocate import Rules

    mix = deal.mix
    return Rules(max_network_share=mix.max_network_share, daypart_min_share=dict(mix.daypart_min_share),
                 daypart_max_share=dict(mix.daypart_max_share), weekly_tolerance=mix.weekly_tolerance,
                 confidence=deal.confidence, pad=deal.pad)


@dataclass
class UnitPlan:
    """A plan made by `plan_units`: whole spots per unit and its figures (impressions, currency)."""

    deliverable: bool
    spots: pd.DataFrame
    cost: float
    expected_impressions: float
    sd: float
    probability: float
    status: str
    max_deliverable: float
    model: Any = None
    x: Any = None


def plan_units(units: pd.DataFrame, deal: Any, *, guarantee: float, weeks, held: pd.DataFrame | None,
               solver: str = "cbc") -> UnitPlan:
    """Minimum-cost whole-spot plan of `deal` over `weeks` for `guarantee` impressions.

    Uses the allocator (`planner.allocate`) with the deal's mix and risk margin, against avails less
    `held`. When no plan meets the guarantee, `max_deliverable` is the largest guarantee the avails
    left can meet at that risk margin (LP bound) and `spots` is empty.
    """
    from planner.allocate import allocate, candidate_units, make_problem, max_guarantee

    mix = deal.mix
    scope = candidate_units(units, weeks=list(weeks), exclude_networks=mix.exclude_networks,
                            exclude_zones=mix.exclude_zones, max_spots_per_unit=mix.max_spots_per_unit, held=held)
    prob = make_problem(scope, guarantee, rules_of(deal), list(weeks))
    if guarantee <= 0:
        return UnitPlan(True, _spot_frame(prob, np.zeros(prob.n)), 0.0, 0.0, 0.0, 1.0,
                        "nothing left to deliver", float("nan"), prob.model, np.zeros(prob.n))
    alloc = allocate(prob, solver=solver) if prob.n else None
    if alloc is None or not alloc.feasible:
        mg = max_guarantee(prob) if prob.n else None
        most = float(mg.value) if mg is not None else 0.0
        return UnitPlan(False, _spot_frame(prob, np.zeros(prob.n)).iloc[:0], 0.0, 0.0, 0.0, 0.0,
                        alloc.status if alloc is not None else "no units left to buy", most, prob.model,
                        mg.x if mg is not None else None)
    x = alloc.x
    dm = prob.model
    return UnitPlan(True, _spot_frame(prob, x), float(alloc.cost), dm.mean(x), dm.sd(x),
                    dm.probability(x, guarantee), alloc.status, float("nan"), dm, x)


def _spot_frame(prob, x: np.ndarray) -> pd.DataFrame:
    u = prob.units
    keep = np.asarray(x) > 0
    dm = prob.model
    out = u.loc[keep, UNIT_KEY + ["rate"]].copy()
    xs = np.asarray(x)[keep]
    out["spots"] = np.rint(xs).astype("int64")
    out["cost"] = out["rate"].to_numpy(float) * xs
    out["expected_impressions"] = dm.m[keep] * xs if len(dm.m) else 0.0
    out["sd"] = np.sqrt(dm.v_lin[keep] * xs + ((dm.a_net ** 2 + dm.a_flight ** 2 + dm.a_week ** 2)[keep]) * xs ** 2) \
        if len(dm.m) else 0.0
    return out[UNIT_KEY + ["spots", "rate", "cost", "expected_impressions", "sd"]].reset_index(drop=True)


def plan_for_commit(forecast: pd.DataFrame, *, solver: str = "cbc"):
    """A `planner` for `planner.book.commit_deal` that plans the whole flight on `forecast`
    (a forecast table) with the allocator directly (tests, and books built on a given forecast)."""

    def _planner(scenario, deal_name, *, held, **_kw):
        deal = scenario.deals[deal_name]
        return plan_units(deal_units(scenario, forecast, deal.demo), deal, guarantee=deal.impressions,
                          weeks=deal.weeks, held=held, solver=solver)

    return _planner


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
    network_shift: dict = field(default_factory=dict)
    warnings: list[str] = field(default_factory=list)
    plan: pd.DataFrame | None = field(default=None, repr=False)
    catch_up: pd.DataFrame | None = field(default=None, repr=False)
    forecast: pd.DataFrame | None = field(default=None, repr=False)
    posterior: LevelPosterior | None = field(default=None, repr=False)

    def as_dict(self) -> dict:
        skip = {"plan", "catch_up", "forecast", "posterior"}
        out = {k: v for k, v in self.__dict__.items() if k not in skip}
        out["catch_up"] = [] if self.catch_up is None else self.catch_up.to_dict(orient="records")
        return out


def rebalance_deal(scenario: Any, deal_name: str, actuals: str | os.PathLike | pd.DataFrame,
                   book: str | os.PathLike | None = None, *, commit: bool = False, solver: str = "cbc",
                   forecast: pd.DataFrame | None = None) -> RebalanceResult:
    """Update the forecast from posted actuals and re-plan the deal's remaining weeks.

    `actuals`: a CSV path (validated by `read_actuals`) or an already-valid DataFrame. Aired weeks
    are first_week .. the last posted week; their posted impressions count toward the guarantee.
    With `commit=True` and a deliverable re-plan, the deal's holds in the remaining weeks are
    replaced by the re-plan in one checked transaction (aired weeks' holds are kept).
    """
    from planner.book import book_path, get_deal, held_spots, replace_holds

    if deal_name not in scenario.deals:
        raise InputError(f"{scenario.path}: no deal named {deal_name!r} in deals/")
    deal = scenario.deals[deal_name]
    path = book_path(scenario, book)
    booked = get_deal(scenario, deal_name, book)  # InputError when not committed
    acts = actuals if isinstance(actuals, pd.DataFrame) else read_actuals(actuals, scenario, deal)
    if forecast is None:
        from planner.forecast_job import ensure_forecast

        forecast = ensure_forecast(scenario).table
    warnings: list[str] = []
    fc_demo = forecast[forecast["demo"] == deal.demo].copy()
    fc_demo["week"] = fc_demo["week"].astype("int64")
    obs = acts.merge(fc_demo, on=UNIT_KEY, how="left")
    no_fc = obs["mean_impressions"].isna()
    if no_fc.any():
        warnings.append(f"{int(no_fc.sum())} posted unit-week(s) have no forecast row; counted as delivered, "
                        f"not used as evidence")
    post = level_posterior(obs[~no_fc])
    updated = update_forecast(forecast, post)

    last_aired = int(acts["week"].max()) if len(acts) else deal.first_week - 1
    aired = list(range(deal.first_week, last_aired + 1))
    remaining = list(range(last_aired + 1, deal.last_week + 1))
    delivered = float(acts["impressions"].sum())
    holds = booked.holds
    held_aired = holds[holds["week"] <= last_aired]
    unposted = held_aired.merge(acts[UNIT_KEY], on=UNIT_KEY, how="left", indicator=True)
    unposted = int((unposted["_merge"] == "left_only").sum())
    if unposted:
        warnings.append(f"{unposted} held unit-week(s) in aired weeks have no posting; counted as 0 delivered")
    # Expected delivery of what aired, under the prior forecast (per aired spot, no preemption).
    ok = obs[~no_fc]
    expected_aired = float((ok["spots_aired"] * ok["mean_impressions"]).sum())
    ratio = delivered / expected_aired - 1.0 if expected_aired > 0 else float("nan")
    G_left = max(float(deal.impressions) - delivered, 0.0)

    units = deal_units(scenario, updated, deal.demo)
    held_rem = holds[holds["week"] > last_aired]
    # The current holds' chance of meeting what is left, on the updated forecast.
    p_before = _probability_of(units, held_rem, G_left)
    others = held_spots(scenario, book, exclude=[deal_name])
    if remaining:
        plan = plan_units(units, deal, guarantee=G_left, weeks=remaining, held=others, solver=solver)
    else:
        plan = UnitPlan(G_left <= 0, held_rem.iloc[:0][UNIT_KEY + ["spots"]], 0.0, 0.0, 0.0,
                        float(G_left <= 0), "flight over", 0.0)
    held_spots_n = int(held_rem["spots"].sum())
    held_cost = float(held_rem["cost"].fillna(0).sum()) if "cost" in held_rem else 0.0
    new_spots = int(plan.spots["spots"].sum()) if plan.deliverable else 0
    new_cost = float(plan.cost) if plan.deliverable else 0.0
    label = (f"confidence {deal.confidence:.0%}" if deal.confidence is not None else f"pad {deal.pad:.0%}")
    max_del = float(plan.max_deliverable) if not plan.deliverable else float("nan")
    unmet = max(G_left - max_del, 0.0) if not plan.deliverable else 0.0
    catch = _catch_up(held_rem, plan.spots) if plan.deliverable else None
    net_shift = {str(n): float(post.mean[i]) for i, n in enumerate(post.networks)}
    committed = False
    if commit and plan.deliverable and remaining:
        keep = held_aired[UNIT_KEY + ["spots", "rate", "cost", "expected_impressions", "sd"]]
        new_holds = pd.concat([keep, plan.spots], ignore_index=True)
        replace_holds(scenario, deal_name, new_holds, {
            "expected_impressions": delivered + plan.expected_impressions, "sd": plan.sd,
            "probability": plan.probability, "cost": float(keep["cost"].fillna(0).sum()) + plan.cost,
            "rebalanced_after_week": last_aired, "delivered": delivered}, book)
        committed = True
    return RebalanceResult(
        deal=deal_name, guarantee=float(deal.impressions), confidence_label=label, aired_weeks=aired,
        remaining_weeks=remaining, delivered=delivered, expected_aired=expected_aired, posted_vs_forecast=ratio,
        remaining_guarantee=G_left, probability_before=p_before, deliverable=bool(plan.deliverable),
        probability_after=float(plan.probability), expected_remaining=float(plan.expected_impressions),
        sd_remaining=float(plan.sd), held_remaining_spots=held_spots_n, new_spots=new_spots,
        added_spots=new_spots - held_spots_n if plan.deliverable else 0, held_remaining_cost=held_cost,
        new_cost=new_cost, added_cost=new_cost - held_cost if plan.deliverable else 0.0,
        max_deliverable=max_del, unmet=unmet, committed=committed, status=plan.status,
        network_shift=net_shift, warnings=warnings, plan=plan.spots, catch_up=catch, forecast=updated,
        posterior=post)


def _probability_of(units: pd.DataFrame, held: pd.DataFrame, guarantee: float) -> float:
    """Normal-approximation chance that the held spots deliver `guarantee` on `units`' forecast."""
    if guarantee <= 0:
        return 1.0
    if held.empty:
        return 0.0
    u = held[UNIT_KEY + ["spots"]].merge(units, on=UNIT_KEY, how="inner")
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
