"""Mid-flight rebalancing: update the forecast from posted actuals and re-plan the remaining weeks.

Evidence: the posted actuals update the forecast's level factors (`planner.posterior`,
`fold_actuals`), the same step the stress test values a rebalanced deal with.

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

import copy
import os
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any, Sequence

import numpy as np
import pandas as pd

from planner import allocate as al
from planner import deals as dl
from planner.deals import deal_units
from planner.delivery import UNIT_KEY, DeliveryModel
from planner.errors import InputError
from planner.posterior import ACTUALS_COLUMNS, FoldedActuals, LevelPosterior, fold_actuals

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


# --------------------------------------------------------------------------- planning helpers

def replan(scenario: Any, deal: Any, *, guarantee: float, first_week: int, forecast: pd.DataFrame,
           held: pd.DataFrame | None, solver: str = "cbc"):
    """Re-plan `deal` over weeks first_week..last_week for `guarantee` impressions with the
    allocator (`planner.deals.run_deal`), on `forecast`, against avails less `held`.

    Returns (PlanResult, max_deliverable): when no plan meets the guarantee, `max_deliverable` is
    the largest guarantee the avails left can meet at the deal's risk margin (LP bound, impressions).
    """
    sub = replace(deal, impressions=float(guarantee), first_week=int(first_week))
    scn = copy.copy(scenario)
    scn.deals = {**scenario.deals, deal.name: sub}
    run = dl.run_deal(scn, deal.name, solver=solver, held=held, forecast=forecast)
    res = dl.plan_result(run)
    most = float("nan") if res.deliverable else float(al.max_guarantee(run.problem).value)
    return res, most


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


@dataclass
class _Evidence:
    """The postings of one deal against its holds and the forecast (`_evidence`)."""

    acts: pd.DataFrame
    folded: FoldedActuals
    last_aired: int
    aired: list[int]
    remaining: list[int]
    delivered: float
    expected_aired: float
    problems: list[str]
    warnings: list[str]


def _evidence(deal: Any, acts: pd.DataFrame, holds: pd.DataFrame, forecast: pd.DataFrame, *,
              unposted_as_zero: bool) -> _Evidence:
    """Fold the postings into the forecast (`fold_actuals`) and check them against the holds."""
    folded = fold_actuals(forecast, acts, deal.demo)
    obs, no_fc = folded.observed, folded.unmatched
    warnings = []
    if no_fc.any():
        warnings.append(f"{int(no_fc.sum())} posted unit-week(s) have no forecast row; counted as delivered, "
                        f"not used as evidence")
    last_aired = int(acts["week"].max()) if len(acts) else deal.first_week - 1
    problems, said = posting_problems(acts, holds, obs, no_fc, first_week=deal.first_week,
                                      unposted_as_zero=unposted_as_zero)
    ok = obs[~no_fc]  # expected delivery of what aired, under the prior forecast (per aired spot)
    return _Evidence(acts=acts, folded=folded, last_aired=last_aired, aired=list(range(deal.first_week, last_aired + 1)),
                     remaining=list(range(last_aired + 1, deal.last_week + 1)),
                     delivered=float(acts["impressions"].sum()),
                     expected_aired=float((ok["spots_aired"] * ok["mean_impressions"]).sum()),
                     problems=problems, warnings=warnings + said)


def _replan_remaining(scenario: Any, deal: Any, ev: _Evidence, g_left: float, others: pd.DataFrame | None,
                      solver: str) -> dict:
    """Re-plan the remaining weeks for what is left of the guarantee (`replan`), or say why not."""
    if ev.remaining and g_left > 0:
        plan, max_del = replan(scenario, deal, guarantee=g_left, first_week=ev.remaining[0],
                               forecast=ev.folded.forecast, held=others, solver=solver)
        ok = bool(plan.deliverable)
        return dict(deliverable=ok, status=plan.verdict if ok else plan.reason,
                    new_plan=plan.spots if ok else plan.spots.iloc[:0], max_del=max_del,
                    p_after=float(plan.probability) if ok else 0.0,
                    exp_rem=float(plan.expected_impressions or 0.0), sd_rem=float(plan.sd or 0.0),
                    new_cost=float(plan.cost or 0.0) if ok else 0.0)
    ok = g_left <= 0
    return dict(deliverable=ok, status="guarantee already delivered" if ok else "flight over: nothing left to re-plan",
                new_plan=None, max_del=float("nan") if ok else 0.0, p_after=float(ok), exp_rem=0.0, sd_rem=0.0,
                new_cost=0.0)


def _network_moves(ev: _Evidence) -> tuple[dict, dict]:
    """Per network that posted: its level factor's posterior mean (sds) and its units' level change."""
    post, obs = ev.folded.posterior, ev.folded.observed
    net_shift = {str(n): float(post.mean[i]) for i, n in enumerate(post.networks)}
    used = obs[~ev.folded.unmatched]  # the posted rows the posterior used: every network in it posted
    rel_sd = (used["level_sd_network"] / used["mean_impressions"]).groupby(used["network"].astype(str)).median()
    return net_shift, {n: z * float(rel_sd.get(n, np.nan)) for n, z in net_shift.items()}


def _not_committed(commit: bool, g_left: float, remaining: list[int], deliverable: bool) -> str:
    if not commit:
        return ""
    if g_left <= 0:
        return "the guarantee is already delivered: nothing to re-plan"
    if not remaining:
        return "the flight is over: nothing left to re-plan"
    return "" if deliverable else "no re-plan meets the remaining guarantee"


def rebalance_on(scenario: Any, deal: Any, acts: pd.DataFrame, holds: pd.DataFrame, *, forecast: pd.DataFrame,
                 others: pd.DataFrame | None, solver: str = "cbc", commit: bool = False,
                 unposted_as_zero: bool = False, where: Any = "posted actuals",
                 warnings: Sequence[str] = ()) -> RebalanceResult:
    """Update the forecast from a deal's valid posted actuals `acts` and re-plan its remaining weeks
    against the avails less `others` (the other deals' holds); `holds` are the deal's own.

    Computes everything `planner.workflows.rebalance_deal` answers; writes nothing (`committed`
    False). With `commit` the postings' `problems` raise InputError (naming `where`) before any
    planning, and `not_committed_reason` says why a commit would write nothing.
    """
    ev = _evidence(deal, acts, holds, forecast, unposted_as_zero=unposted_as_zero)
    if commit and ev.problems:
        raise InputError(f"{where}: re-plan of {deal.name!r} not committed, the postings look wrong: "
                         + "; ".join(ev.problems) + " (nothing was written to the book)")
    g_left = max(float(deal.impressions) - ev.delivered, 0.0)
    held_rem = holds[holds["week"] > ev.last_aired]
    p_before = _probability_of(scenario, deal, ev.folded.forecast, held_rem, g_left)
    r = _replan_remaining(scenario, deal, ev, g_left, others, solver)
    ok = r["deliverable"]
    new_plan = held_rem.iloc[:0] if r["new_plan"] is None else r["new_plan"]
    held_n, held_cost = int(held_rem["spots"].sum()), float(held_rem["cost"].fillna(0).sum())
    new_spots = int(new_plan["spots"].sum()) if ok else 0
    net_shift, net_change = _network_moves(ev)
    return RebalanceResult(
        deal=deal.name, guarantee=float(deal.impressions),
        confidence_label=f"confidence {deal.confidence:.0%}" if deal.pad is None else f"pad {deal.pad:.0%}",
        aired_weeks=ev.aired, remaining_weeks=ev.remaining, delivered=ev.delivered,
        expected_aired=ev.expected_aired,
        posted_vs_forecast=ev.delivered / ev.expected_aired - 1.0 if ev.expected_aired > 0 else float("nan"),
        remaining_guarantee=g_left, probability_before=p_before, deliverable=ok, probability_after=r["p_after"],
        expected_remaining=r["exp_rem"], sd_remaining=r["sd_rem"], held_remaining_spots=held_n,
        new_spots=new_spots, added_spots=new_spots - held_n if ok else 0, held_remaining_cost=held_cost,
        new_cost=r["new_cost"], added_cost=r["new_cost"] - held_cost if ok else 0.0, max_deliverable=r["max_del"],
        unmet=0.0 if ok else max(g_left - r["max_del"], 0.0), committed=False, status=r["status"],
        not_committed_reason=_not_committed(commit, g_left, ev.remaining, ok), problems=ev.problems,
        network_shift=net_shift, network_level_change=net_change, warnings=list(warnings) + ev.warnings,
        plan=new_plan, catch_up=_catch_up(held_rem, new_plan) if ok else None,
        order=(buy_order(held_rem, new_plan, scenario.inventory) if ok and ev.remaining and g_left > 0 else None),
        forecast=ev.folded.forecast, posterior=ev.folded.posterior)


def committable(result: RebalanceResult) -> bool:
    """True when a `--commit` of `result` writes: a deliverable re-plan of weeks left to deliver."""
    return bool(result.deliverable and result.remaining_weeks and result.remaining_guarantee > 0)


def rebalanced_holds(result: RebalanceResult, holds: pd.DataFrame, acts: pd.DataFrame) -> tuple[pd.DataFrame, dict]:
    """The deal's holds after a committed rebalance (aired weeks' holds kept, the re-plan after
    them) and the summary stored with them (`planner.book.replace_holds`)."""
    last_aired = result.remaining_weeks[0] - 1
    cols = UNIT_KEY + ["spots", "rate", "cost", "expected_impressions", "sd"]
    keep = holds[holds["week"] <= last_aired][cols]
    new_holds = pd.concat([keep, result.plan[cols]], ignore_index=True)
    summary = {"expected_impressions": result.delivered + result.expected_remaining, "sd": result.sd_remaining,
               "probability": result.probability_after,
               "cost": float(keep["cost"].fillna(0).sum()) + result.new_cost,
               "rebalanced_after_week": last_aired, "delivered": result.delivered, "posted_unit_weeks": int(len(acts))}
    return new_holds, summary


def _probability_of(scenario: Any, deal: Any, forecast: pd.DataFrame, held: pd.DataFrame, guarantee: float) -> float:
    """Normal-approximation chance that the held spots deliver `guarantee` on `forecast`."""
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
    unit-week), rate, cost (expected billed), expected_impressions, preempt_rate, sd_impressions,
    cost_sd (of the new count; impressions, currency), held (spots held before) and change
    (spots - held).
    """
    cols = UNIT_KEY + ["spots", "rate", "cost", "expected_impressions", "preempt_rate", "sd_impressions", "cost_sd"]
    h = held[UNIT_KEY + ["spots", "rate"]].rename(columns={"spots": "held", "rate": "held_rate"})
    m = new[cols].merge(h, on=UNIT_KEY, how="outer")
    inv = inventory[UNIT_KEY + ["preempt_rate"]].astype({"week": "int64"}).rename(columns={"preempt_rate": "p"})
    m = m.astype({"week": "int64"}).merge(inv, on=UNIT_KEY, how="left")
    for c in ("spots", "held"):
        m[c] = m[c].fillna(0).astype("int64")
    m["rate"] = m["rate"].fillna(m["held_rate"])
    m["preempt_rate"] = m["preempt_rate"].fillna(m["p"])
    for c in ("cost", "expected_impressions", "sd_impressions", "cost_sd"):
        m[c] = m[c].fillna(0.0)
    m["change"] = m["spots"] - m["held"]
    return m[cols + ["held", "change"]].sort_values(UNIT_KEY).reset_index(drop=True)
