"""Sales-desk check and buyer plan of one deal, computed over the allocator.

`run_deal` builds and solves the deal's allocation problem from a forecast table and the spots
other deals hold (both passed in: this module reads neither the book nor the forecast cache);
`check_result` answers "is it deliverable, at what cost, margin and chance, how big could it be,
what CPM to ask"; `plan_result` gives the whole-spot buy plan with its weekly pacing. The
workflows (`planner.workflows.check_deal`, `plan_deal`) read the book and the forecast and call them.
"""
from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field, replace
from typing import Any

import numpy as np
import pandas as pd
from scipy.special import ndtr

from planner import allocate as al
from planner import terms as tm
from planner.delivery import UNIT_KEY, DeliveryModel
from planner.errors import InputError
from planner.rules import EXCLUSIONS, RISK, SPOT_CAP, Rules, Scope, row_rules

CAUTIONS = ("Forecasts are estimates from past audiences; contract terms decide what is owed on "
            "under-delivery; check the plan against posted actuals as the flight airs and have the "
            "people accountable for the money review it before committing.")
#: frontier sizes as fractions of the deal's guarantee (`check --frontier` and the report)
FRONTIER_SIZES = (0.5, 0.75, 0.9, 1.0, 1.1, 1.25, 1.5)
#: the report's frontier adds these fractions of the largest deliverable guarantee
FRONTIER_MAX_SHARES = (0.25, 0.5, 0.75, 1.0)
Z10 = 1.2815515655446004  # standard normal 90% quantile (p10/p90 band)
#: a plan with no pacing rule whose weekly expected delivery strays further than this from even
#: pacing says so (a buyer expects delivery spread over the flight)
PACING_NOTE = 0.25
#: a plan under a pad whose chance of delivery is below this says so (what a confidence rule,
#: the default, would have held)
PAD_CHANCE_NOTE = 0.95
#: columns of a buy-plan CSV (`plan_frame`): the allocation's, then what a buyer needs to place
#: the order (the deal, each week's Monday and Sunday, the daypart's days and clock times)
PLAN_COLUMNS = ["zone", "network", "daypart", "week", "spots", "rate", "cost", "expected_impressions",
                "preempt_rate", "sd_impressions", "cost_sd", "deal", "week_start", "week_end", "days", "start", "end"]
#: the expected make-good's keys in check/plan results and their --json (`makegood_of`)
MAKEGOOD_KEYS = ("expected_shortfall_impressions", "expected_makegood_cost", "margin_net_of_makegoods")
_DAY_NAMES = ("mon", "tue", "wed", "thu", "fri", "sat", "sun")


def days_text(days) -> str:
    """Weekday numbers (0=Mon..6=Sun) as text: (0, 1, 2, 3, 4) -> 'mon-fri', (0, 2) -> 'mon,wed'."""
    days = sorted(set(int(d) for d in days))
    parts, i = [], 0
    while i < len(days):
        j = i
        while j + 1 < len(days) and days[j + 1] == days[j] + 1:
            j += 1
        parts.append(_DAY_NAMES[days[i]] if j - i < 2 else f"{_DAY_NAMES[days[i]]}-{_DAY_NAMES[days[j]]}")
        if j - i == 1:
            parts.append(_DAY_NAMES[days[j]])
        i = j + 1
    return ",".join(parts)


def plan_frame(scenario, deal_name: str, spots: pd.DataFrame, extra=()) -> pd.DataFrame:
    """A buy plan as written to CSV: `PLAN_COLUMNS`, then the columns `extra` of `spots`.

    `spots`: one row per bought unit-week (`PlanResult.spots` or a re-plan's order). Adds the
    deal name, the week's Monday and Sunday (ISO dates, `scenario.week_start`/`week_end`) and the
    daypart's days (`days_text`) and clock times (start inclusive, end exclusive, local clock).
    """
    out = spots.copy()
    out["deal"] = deal_name
    weeks = out["week"].astype("int64")
    out["week_start"] = weeks.map(lambda w: scenario.week_start(w).isoformat())
    out["week_end"] = weeks.map(lambda w: scenario.week_end(w).isoformat())
    parts = {d.name: (days_text(d.days), d.start, d.end) for d in scenario.dayparts}
    for i, col in enumerate(("days", "start", "end")):
        out[col] = out["daypart"].map(lambda name, i=i: parts[name][i])
    return out[PLAN_COLUMNS + list(extra)].reset_index(drop=True)


@dataclass
class DealRun:
    """Internals shared by check and plan: the problem, its allocation, the forecast status."""

    scenario: Any
    deal: Any
    problem: al.AllocationProblem
    allocation: al.Allocation
    fitted_now: bool
    held_spots: int
    units: pd.DataFrame | None = None    # the deal's demo and weeks, before its exclusions and spot cap
    held: pd.DataFrame | None = None     # other deals' holds the avails were reduced by
    warnings: list = field(default_factory=list)  # about the book read (`planner.book.book_warnings`)
    caution: str | None = None           # the forecast's caution on shared errors, brief form
    caution_full: str | None = None      # the same, whole text (for --json)


@dataclass
class PlanResult:
    """Whole-spot buy plan of one deal.

    spots: DataFrame zone, network, daypart, week, spots, rate (card rate of one spot), cost (the
    expected billed cost, spots x rate x (1 - preempt_rate): preempted spots are not billed),
    expected_impressions, preempt_rate, sd_impressions (and `sd`, the same), cost_sd (currency,
    binomial preemption) per bought unit; cost is the expected billed cost, cost_sd its sd;
    pacing: DataFrame week, expected_impressions, sd, p10, p90, even_pacing (impressions);
    totals: dict of plan totals. `deliverable` False means no plan meets the deal's rules.
    """

    deal: str
    deliverable: bool
    verdict: str
    reason: str
    currency: str
    guarantee: float
    risk_rule: str
    confidence: float | None
    pad: float | None
    default_confidence_used: bool
    spots: pd.DataFrame
    pacing: pd.DataFrame
    totals: dict
    cost: float | None
    cost_sd: float | None
    revenue: float
    margin: float | None
    margin_pct: float | None
    expected_impressions: float | None
    sd: float | None
    probability: float | None
    expected_shortfall_impressions: float | None
    expected_makegood_cost: float | None
    margin_net_of_makegoods: float | None
    makegood_terms: dict
    probability_if_independent: float | None
    solver: str
    gap: float | None
    lp_bound: float | None
    mip_bound: float | None
    cuts: int
    iterations: int
    build_seconds: float
    solve_seconds: float
    fitted_forecast_first: bool
    held_spots_excluded: int
    binding: list = field(default_factory=list)
    cautions: list = field(default_factory=list)
    warnings: list = field(default_factory=list)  # about the data (the book held over avails)
    notes: list = field(default_factory=list)  # about this plan (pacing, chance under a pad)
    shared_error_caution: str | None = None  # the forecast's caution in full (its brief form is in cautions)


@dataclass
class CheckResult:
    """Sales-desk answer for one deal (money in the scenario's currency, impressions in the demo)."""

    deal: str
    advertiser: str
    demo: str
    deliverable: bool
    verdict: str
    currency: str
    guarantee: float
    first_week: int
    last_week: int
    price_cpm: float
    risk_rule: str
    confidence: float | None
    pad: float | None
    default_confidence_used: bool
    expected_impressions: float | None
    sd_impressions: float | None
    probability_of_delivery: float | None
    probability_if_independent: float | None
    cost: float | None
    cost_sd: float | None
    revenue: float
    margin: float | None
    margin_pct: float | None
    cost_cpm: float | None
    target_margin: float | None
    cpm_needed: float | None
    expected_shortfall_impressions: float | None
    expected_makegood_cost: float | None
    margin_net_of_makegoods: float | None
    cpm_needed_net_of_makegoods: float | None
    makegood_terms: dict
    max_guarantee: float
    max_guarantee_lp: float
    binding: list
    spots: int
    units_bought: int
    solver: str
    gap: float | None
    lp_bound: float | None
    mip_bound: float | None
    cuts: int
    iterations: int
    build_seconds: float
    solve_seconds: float
    fitted_forecast_first: bool
    held_spots_excluded: int
    frontier: list | None = None
    cautions: list = field(default_factory=list)
    warnings: list = field(default_factory=list)  # about the data (the book held over avails)
    notes: list = field(default_factory=list)  # about this plan (pacing, chance under a pad)
    shared_error_caution: str | None = None  # the forecast's caution in full (its brief form is in cautions)

    def to_json(self) -> dict:
        """Plain dict for `--json` (the documented keys first)."""
        return asdict(self)


# ---------------------------------------------------------------------------------------------
def validate_deal(deal, scenario) -> None:
    """Boundary checks of a deal's numbers (the loader checks files; this guards API callers)."""
    where = f"deal {deal.name!r}"
    if not (deal.impressions > 0):
        raise InputError(f"{where}: impressions (the guarantee) must be positive, got {deal.impressions!r}")
    rules = replace(rules_of(deal), confidence=deal.confidence)  # both given is a problem too
    said = RISK.check(rules, where)
    if not said and not 1 <= deal.first_week <= deal.last_week <= scenario.weeks:
        said = [f"{where}: weeks {deal.first_week}..{deal.last_week} are outside the inventory's "
                f"plan weeks 1..{scenario.weeks}"]
    said = said or [p for f in row_rules(rules) for p in f.check(rules, where)]
    if said:
        raise InputError(said[0])


def _get_deal(scenario, deal_name: str):
    if deal_name not in scenario.deals:
        known = ", ".join(sorted(scenario.deals)) or "none"
        raise InputError(f"{scenario.path}: unknown deal {deal_name!r} (deals/*.toml has: {known})")
    deal = scenario.deals[deal_name]
    validate_deal(deal, scenario)
    return deal


def deal_units(scenario, forecast: pd.DataFrame, deal) -> pd.DataFrame:
    """Forecast rows of the deal's demo joined with the inventory (avails, rate, preempt_rate)."""
    fc = forecast[forecast["demo"] == deal.demo]
    if fc.empty:
        demos = ", ".join(sorted(map(str, forecast["demo"].unique())))
        raise InputError(f"deal {deal.name!r}: demo {deal.demo!r} has no forecast rows (forecast demos: {demos})")
    inv = scenario.inventory
    fc = fc.drop(columns=[c for c in ("avails", "rate", "preempt_rate") if c in fc.columns])
    fc = fc.astype({"week": "int64"})
    inv = inv.astype({"week": "int64"})
    units = inv.merge(fc, on=UNIT_KEY, how="inner")
    have = set(units["week"].unique())
    missing = [w for w in deal.weeks if w not in have]
    if len(missing) == len(deal.weeks):
        raise InputError(f"deal {deal.name!r}: weeks {deal.first_week}..{deal.last_week} have no inventory "
                         f"with a forecast")
    return units


def rules_of(deal) -> Rules:
    """The allocator's `Rules` of a deal: its mix rules and its risk margin (confidence or pad)."""
    mix = deal.mix
    return Rules(max_network_share=mix.max_network_share, daypart_min_share=dict(mix.daypart_min_share),
                 daypart_max_share=dict(mix.daypart_max_share), weekly_tolerance=mix.weekly_tolerance,
                 confidence=deal.confidence if deal.pad is None else None, pad=deal.pad,
                 settings=dict(getattr(mix, "extra", None) or {}))


def check_solver(solver: str) -> None:
    """InputError unless `solver` is one the allocator knows."""
    if solver not in al.SOLVERS:
        raise InputError(f"--solver {solver!r}: choose one of {', '.join(al.SOLVERS)}")


def run_deal(scenario, deal_name: str, *, forecast: pd.DataFrame, held: pd.DataFrame | None = None,
             solver: str = "cbc", gap: float = al.DEFAULT_GAP, time_limit: float = al.DEFAULT_TIME_LIMIT,
             guarantee: float | None = None, fitted_now: bool = False, warnings: list | None = None,
             caution: str | None = None, caution_full: str | None = None) -> DealRun:
    """Build the deal's allocation problem and solve it (whole spots).

    `forecast`: the forecast table; `held`: spots other deals hold (zone, network, daypart, week,
    spots; None: nothing held); `guarantee` replaces the deal's (impressions). `fitted_now`,
    `warnings` (about the book read) and the forecast's `caution` (brief, and in full) are what the
    caller read, carried into the results.
    """
    check_solver(solver)
    deal = _get_deal(scenario, deal_name)
    units = deal_units(scenario, forecast, deal)
    mix = deal.mix
    scope = al.candidate_units(units, weeks=deal.weeks, exclude_networks=mix.exclude_networks,
                               exclude_zones=mix.exclude_zones, max_spots_per_unit=mix.max_spots_per_unit,
                               held=held)
    prob = al.make_problem(scope, deal.impressions if guarantee is None else guarantee, rules_of(deal), deal.weeks)
    alloc = al.allocate(prob, solver=solver, gap=gap, time_limit=time_limit)
    n_held = int(held["spots"].sum()) if held is not None and len(held) else 0
    return DealRun(scenario, deal, prob, alloc, fitted_now, n_held, units=units, held=held,
                   warnings=list(warnings or []), caution=caution, caution_full=caution_full)


def _scope_of(mix) -> Scope:
    return Scope(tuple(mix.exclude_networks), tuple(mix.exclude_zones), mix.max_spots_per_unit)


def _scope_items(mix) -> list[tuple[str, dict]]:
    """The deal's exclusions and spot cap, each as (label as in the deal file, candidate_units
    arguments without it): each scope rule relaxes itself (`planner.rules`)."""
    scope = _scope_of(mix)
    return [(label, dict(exclude_networks=s.exclude_networks, exclude_zones=s.exclude_zones,
                         max_spots_per_unit=s.max_spots_per_unit))
            for label, s in EXCLUSIONS.scope_items(scope) + SPOT_CAP.scope_items(scope)]


def scope_levers(run: DealRun, current: float) -> list[tuple[float, str]]:
    """The deal's exclusions and per-unit spot cap removed one at a time, every rule kept: (gain,
    text) for each whose removal raises the largest deliverable guarantee above `current`
    (`allocate.lever_text`; LP relaxations, impressions). They decide which spots the deal may
    buy, so `al.rule_levers` (which changes the plan's rules) cannot try them."""
    if run.units is None:
        return []
    prob, deal = run.problem, run.deal
    out = []
    for label, args in _scope_items(deal.mix):
        scope = al.candidate_units(run.units, weeks=deal.weeks, held=run.held, **args)
        allowed = al.max_guarantee(al.make_problem(scope, prob.guarantee, prob.rules, deal.weeks),
                                   tol=2e-3, max_iter=40).value
        if allowed - current > 1e-3 * max(prob.guarantee, 1.0):
            out.append((allowed - current, al.lever_text(label, allowed, current)))
    return out


def scope_diagnosis(run: DealRun) -> list[str]:
    """When even with no rule and no margin the spots the deal may buy fall short: what they
    would deliver without its exclusions and spot cap (LP relaxation, impressions). One line, or
    none when the deal has neither or the spots inside them suffice."""
    mix, prob = run.deal.mix, run.problem
    named = [label for label, _ in _scope_items(mix)]
    if run.units is None or not named:
        return []
    loose = al.no_rules_no_margin(prob.rules)
    inside = al.max_guarantee(replace(prob, rules=loose)).value
    if inside >= prob.guarantee * (1 - 1e-6):
        return []
    scope = al.candidate_units(run.units, weeks=run.deal.weeks, held=run.held)
    without = al.max_guarantee(al.make_problem(scope, prob.guarantee, loose, run.deal.weeks)).value
    verdict = "enough" if without >= prob.guarantee * (1 - 1e-6) else "still short"
    return [f"without its {'; '.join(named)} too, with no share or pacing rule and no risk margin, the spots "
            f"left would deliver at most {without:,.0f} expected impressions ({verdict} for {prob.guarantee:,.0f})"]


def _risk_text(deal) -> str:
    if deal.pad is not None:
        return f"pad {100 * deal.pad:.0f}%"
    s = f"confidence {100 * deal.confidence:.1f}%"
    return s + (" (default: the deal sets neither confidence nor pad)" if deal.risk_default_used else "")


def _cautions(run: DealRun) -> list[str]:
    out = [CAUTIONS]
    if run.deal.risk_default_used:
        out.append(f"The deal sets neither confidence nor pad: the default confidence "
                   f"{100 * run.deal.confidence:.0f}% was used.")
    if run.fitted_now:
        out.append("The forecast was missing or stale and was fitted first.")
    if run.caution:
        out.append(run.caution)
    return out


def _spots_frame(run: DealRun) -> pd.DataFrame:
    prob, x = run.problem, run.allocation.x
    cols = UNIT_KEY + ["spots", "rate", "cost", "expected_impressions", "preempt_rate", "sd_impressions", "sd",
                       "cost_sd"]
    if x is None:
        return pd.DataFrame({c: pd.Series([], dtype=float) for c in cols})
    dm = prob.model
    u = prob.units
    sel = x > 0
    xs = x[sel]
    sd_line = np.sqrt((xs * (1.0 - dm.p[sel])) ** 2 * dm.level_var[sel] + xs * dm.v_lin[sel])
    out = u.loc[sel, UNIT_KEY].reset_index(drop=True)
    out["spots"] = xs.astype("int64")
    out["rate"] = u.loc[sel, "rate"].to_numpy(float)
    p = dm.p[sel]
    out["cost"] = xs * out["rate"].to_numpy() * (1.0 - p)  # preempted spots are not billed
    out["expected_impressions"] = xs * dm.m[sel]
    out["preempt_rate"] = p
    out["sd_impressions"] = sd_line
    out["sd"] = sd_line
    out["cost_sd"] = out["rate"].to_numpy() * np.sqrt(xs * p * (1.0 - p))
    return out.sort_values(UNIT_KEY).reset_index(drop=True)


def _by_week(dm, x: np.ndarray, wk: np.ndarray, weeks) -> tuple[np.ndarray, np.ndarray]:
    """Expected impressions and sd of spots `x` week by week (`wk` the week of each unit row)."""
    exp, sds = [], []
    for w in weeks:  # one pass per flight week (a dozen or so), each vectorised
        xw = np.where(wk == w, x, 0.0)
        exp.append(dm.mean(xw))
        sds.append(dm.sd(xw))
    return np.array(exp), np.array(sds)


def _pacing_frame(weeks, exp: np.ndarray, sds: np.ndarray) -> pd.DataFrame:
    """Pacing table: week, expected_impressions, sd, p10/p90 (normal band), even_pacing."""
    even = float(np.sum(exp)) / len(weeks) if len(weeks) else np.nan
    return pd.DataFrame({"week": list(weeks), "expected_impressions": exp, "sd": sds, "p10": exp - Z10 * sds,
                         "p90": exp + Z10 * sds, "even_pacing": even})


def pacing_table(run: DealRun) -> pd.DataFrame:
    """Per flight week: expected impressions, sd, p10/p90 (normal band) and even pacing."""
    prob, x = run.problem, run.allocation.x
    weeks = list(prob.weeks)
    if x is None:
        return pd.DataFrame({"week": weeks, "expected_impressions": np.nan, "sd": np.nan, "p10": np.nan,
                             "p90": np.nan, "even_pacing": np.nan})
    return _pacing_frame(weeks, *_by_week(prob.model, x, prob.units["week"].to_numpy(), weeks))


def held_pacing(scenario, deal, holds: pd.DataFrame, forecast: pd.DataFrame) -> pd.DataFrame:
    """Pacing of a deal's held spots (`pacing_table`'s columns): each week's expected impressions
    as the book stores them (`holds.expected_impressions`), its sd from the delivery model of the
    held spots on `forecast` (deal's demo; preemption from the inventory)."""
    weeks = list(deal.weeks)
    units = holds[UNIT_KEY + ["spots"]].astype({"week": "int64"}).merge(
        deal_units(scenario, forecast, deal), on=UNIT_KEY, how="inner")
    _, sds = (_by_week(DeliveryModel.from_units(units), units["spots"].to_numpy(float), units["week"].to_numpy(),
                       weeks) if len(units) else (None, np.zeros(len(weeks))))
    exp = holds.groupby("week")["expected_impressions"].sum().reindex(weeks, fill_value=0.0).to_numpy(float)
    return _pacing_frame(weeks, exp, sds)


def _summary(run: DealRun) -> dict:
    prob, a, deal = run.problem, run.allocation, run.deal
    revenue = deal.impressions / 1000.0 * deal.price_cpm
    if not a.feasible:
        return dict(cost=None, cost_sd=None, revenue=revenue, margin=None, margin_pct=None, expected_impressions=None,
                    sd=None, probability=None, probability_if_independent=None, spots=0, units=0)
    dm, x, G = prob.model, a.x, prob.guarantee
    mean, sd = dm.mean(x), dm.sd(x)
    ind_sd = math.sqrt(dm.independent_variance(x))
    p_ind = float(ndtr((mean - G) / ind_sd)) if ind_sd > 0 else float(mean >= G)
    margin = revenue - a.cost
    return dict(cost=a.cost, cost_sd=prob.cost_sd(x), revenue=revenue, margin=margin, margin_pct=margin / revenue if revenue > 0 else None,
                expected_impressions=mean, sd=sd, probability=dm.probability(x, G),
                probability_if_independent=p_ind, spots=int(x.sum()), units=int((x > 0).sum()))


def makegood_of(run: DealRun, s: dict, target_margin: float | None = None) -> dict:
    """The plan's expected make-good under the deal's terms (`planner.terms.makegood_summary` on
    the plan's normal delivery law, `s` from `_summary`): expected_shortfall_impressions,
    expected_makegood_cost, margin_net_of_makegoods, cpm_needed_net_of_makegoods (currency,
    impressions); None values when there is no plan."""
    deal = run.deal
    terms = getattr(deal, "terms", None) or tm.Terms()
    if s["cost"] is None:
        return {"expected_shortfall_impressions": None, "expected_makegood_cost": None,
                "margin_net_of_makegoods": None, "cpm_needed_net_of_makegoods": None, "terms": terms.as_dict()}
    return tm.makegood_summary(mean=s["expected_impressions"], sd=s["sd"], guarantee=deal.impressions,
                               cost=s["cost"], revenue=s["revenue"], price_cpm=deal.price_cpm, terms=terms,
                               target_margin=target_margin)


def _verdict(run: DealRun, binding_reason: str = "") -> str:
    a = run.allocation
    if a.feasible:
        return "deliverable"
    if str(a.status).startswith(al.UNDECIDED):
        return f"undecided: {a.status[len(al.UNDECIDED) + 2:]} (raise the time limit)"
    return "not deliverable" + (f": {binding_reason}" if binding_reason else "")


def _weeks_text(weeks) -> str:
    """[5, 6, 7, 9] -> '5-7, 9'."""
    weeks, out, i = sorted(int(w) for w in weeks), [], 0
    while i < len(weeks):
        j = i
        while j + 1 < len(weeks) and weeks[j + 1] == weeks[j] + 1:
            j += 1
        out.append(str(weeks[i]) if i == j else f"{weeks[i]}-{weeks[j]}")
        i = j + 1
    return ", ".join(out)


def plan_notes(run: DealRun, pacing: pd.DataFrame, probability: float | None) -> list[str]:
    """What a buyer should know of a feasible plan that its rules did not ask for: weekly pacing
    more than `PACING_NOTE` from even with no pacing rule; a chance of delivery below
    `PAD_CHANCE_NOTE` under a pad. `pacing`: `pacing_table`; `probability`: the plan's chance."""
    if not run.allocation.feasible:
        return []
    deal, out = run.deal, []
    dev = pacing["expected_impressions"] / pacing["even_pacing"] - 1.0
    if deal.mix.weekly_tolerance is None and len(dev) and float(dev.abs().max()) > PACING_NOTE:
        low = pacing["week"][dev < -PACING_NOTE]
        high = pacing["week"][dev > PACING_NOTE]
        parts = ([f"weeks {_weeks_text(low)} more than {PACING_NOTE:.0%} below"] if len(low) else []) + (
            [f"weeks {_weeks_text(high)} more than {PACING_NOTE:.0%} above"] if len(high) else [])
        out.append(f"weekly pacing strays up to {float(dev[dev.abs().idxmax()]):+.0%} from even ({'; '.join(parts)}) "
                   f"and the deal sets no pacing rule: add weekly_tolerance to its [mix] to spread delivery")
    if deal.pad is not None and probability is not None and probability < PAD_CHANCE_NOTE:
        out.append(f"chance of delivery {probability:.1%} is below {PAD_CHANCE_NOTE:.0%} under the pad of "
                   f"{deal.pad:.0%}: a confidence rule (confidence = {PAD_CHANCE_NOTE:g}) would hold it there")
    return out


def plan_result(run: DealRun, explain: bool = True) -> PlanResult:
    deal, a, prob = run.deal, run.allocation, run.problem
    s = _summary(run)
    if a.feasible:
        binding = al.binding_constraints(prob, a) if explain else []
        reason = ""
    elif str(a.status).startswith(al.UNDECIDED):
        binding = []
        reason = a.status
    else:
        current = al.max_guarantee(prob, tol=2e-3, max_iter=40).value if explain else 0.0
        binding = (al.diagnose(prob, current=current, levers=scope_levers(run, current)) + scope_diagnosis(run)
                   if explain else [])
        reason = "no plan meets the guarantee under the deal's rules and risk margin"
        if binding:
            reason += " (" + "; ".join(binding[:3]) + ")"
    spots = _spots_frame(run)
    pacing = pacing_table(run)
    mg = makegood_of(run, s)
    totals = {"spots": s["spots"], "units": s["units"], "cost": s["cost"], "cost_sd": s["cost_sd"],
              **{k: mg[k] for k in MAKEGOOD_KEYS}, "expected_impressions": s["expected_impressions"],
              "sd_impressions": s["sd"], "guarantee": deal.impressions, "probability_of_delivery": s["probability"],
              "revenue": s["revenue"], "margin": s["margin"], "margin_pct": s["margin_pct"]}
    return PlanResult(
        deal=deal.name, deliverable=a.feasible, verdict=_verdict(run), reason=reason, currency=run.scenario.currency,
        guarantee=deal.impressions, risk_rule=prob.rules.risk_rule, confidence=prob.rules.confidence,
        pad=prob.rules.pad, default_confidence_used=bool(deal.risk_default_used), spots=spots,
        pacing=pacing, totals=totals, cost=s["cost"], cost_sd=s["cost_sd"], revenue=s["revenue"], margin=s["margin"],
        margin_pct=s["margin_pct"], expected_impressions=s["expected_impressions"], sd=s["sd"],
        probability=s["probability"], probability_if_independent=s["probability_if_independent"],
        **{k: mg[k] for k in MAKEGOOD_KEYS}, makegood_terms=mg["terms"],
        solver=a.solver, gap=a.gap, lp_bound=a.lp_bound, mip_bound=a.mip_bound, cuts=a.cuts,
        iterations=a.iterations, build_seconds=a.build_seconds, solve_seconds=a.solve_seconds,
        fitted_forecast_first=run.fitted_now, held_spots_excluded=run.held_spots, binding=binding,
        cautions=_cautions(run), warnings=list(run.warnings), shared_error_caution=run.caution_full,
        notes=plan_notes(run, pacing, s["probability"]))


def report_frontier_sizes(guarantee: float, max_guarantee: float) -> list[float]:
    """The report's frontier sizes (impressions, whole): `guarantee` x `FRONTIER_SIZES` and
    `max_guarantee` x `FRONTIER_MAX_SHARES`, ascending."""
    sizes = {round(guarantee * f) for f in FRONTIER_SIZES}
    if max_guarantee > 0:
        sizes |= {round(max_guarantee * f) for f in FRONTIER_MAX_SHARES}
    return sorted(float(v) for v in sizes if v > 0)


def frontier(prob: al.AllocationProblem, sizes, *, solver: str = "cbc", gap: float = al.DEFAULT_GAP,
             time_limit: float = al.DEFAULT_TIME_LIMIT, max_g: float | None = None,
             integer: bool = False) -> list[dict]:
    """Cost and probability of delivery of the min-cost plan at each guarantee size (impressions).

    By default from the LP relaxation (continuous spots: one LP per size, a lower bound on the
    whole-spot cost); `integer=True` solves each size as a MIP.
    """
    rows = []
    for g in sorted(set(float(v) for v in sizes if v > 0)):
        if max_g is not None and g > max_g * (1 + 1e-9):
            rows.append(dict(guarantee=g, deliverable=False, cost=None, cost_cpm=None, expected_impressions=None,
                             probability_of_delivery=None))
            continue
        a = al.allocate(al.with_guarantee(prob, g), solver=solver, gap=gap, time_limit=time_limit, integer=integer)
        if not a.feasible:
            rows.append(dict(guarantee=g, deliverable=False, cost=None, cost_cpm=None, expected_impressions=None,
                             probability_of_delivery=None))
            continue
        dm = prob.model
        rows.append(dict(guarantee=g, deliverable=True, cost=a.cost, cost_cpm=1000 * a.cost / g,
                         expected_impressions=dm.mean(a.x), probability_of_delivery=dm.probability(a.x, g)))
    return rows


def check_result(run: DealRun, *, target_margin=None, with_frontier=False, gap=al.DEFAULT_GAP,
                 time_limit=al.DEFAULT_TIME_LIMIT) -> CheckResult:
    deal, a, prob = run.deal, run.allocation, run.problem
    s = _summary(run)
    mg = al.max_guarantee(prob)  # LP relaxation; at_plan is the exact value at its plan
    max_g = mg.at_plan
    if a.feasible:
        binding = al.binding_constraints(prob, a)
        max_g = max(max_g, deal.impressions)  # the plan found is itself a witness
    elif str(a.status).startswith(al.UNDECIDED):  # no verdict, so nothing to diagnose
        binding = [f"{a.status}; the largest deliverable guarantee found is {max_g:,.0f} impressions"]
    else:
        binding = [f"largest deliverable guarantee at these rules: {max_g:,.0f} impressions "
                   f"({100 * max_g / deal.impressions:.0f}% of the {deal.impressions:,.0f} asked)"]
        binding += al.diagnose(prob, current=mg.value, levers=scope_levers(run, mg.value)) + scope_diagnosis(run)
    cpm = al.cpm_needed(a.cost, deal.impressions, target_margin) if (a.feasible and target_margin is not None) else None
    owed = makegood_of(run, s, target_margin)
    fr = None
    if with_frontier:
        sizes = [deal.impressions * f for f in FRONTIER_SIZES] + ([max_g] if max_g > 0 else [])
        fr = frontier(prob, sizes, solver=a.solver, gap=gap, time_limit=time_limit, max_g=mg.value)
    return CheckResult(
        deal=deal.name, advertiser=deal.advertiser, demo=deal.demo, deliverable=a.feasible, verdict=_verdict(run),
        currency=run.scenario.currency, guarantee=deal.impressions, first_week=deal.first_week,
        last_week=deal.last_week, price_cpm=deal.price_cpm, risk_rule=prob.rules.risk_rule,
        confidence=prob.rules.confidence, pad=prob.rules.pad, default_confidence_used=bool(deal.risk_default_used),
        expected_impressions=s["expected_impressions"], sd_impressions=s["sd"],
        probability_of_delivery=s["probability"], probability_if_independent=s["probability_if_independent"],
        cost=s["cost"], cost_sd=s["cost_sd"], revenue=s["revenue"], margin=s["margin"], margin_pct=s["margin_pct"],
        cost_cpm=1000 * s["cost"] / deal.impressions if s["cost"] is not None else None,
        target_margin=target_margin, cpm_needed=cpm, **{k: owed[k] for k in MAKEGOOD_KEYS},
        cpm_needed_net_of_makegoods=owed["cpm_needed_net_of_makegoods"], makegood_terms=owed["terms"],
        max_guarantee=max_g, max_guarantee_lp=mg.value,
        binding=binding, spots=s["spots"], units_bought=s["units"], solver=a.solver, gap=a.gap,
        lp_bound=a.lp_bound, mip_bound=a.mip_bound, cuts=a.cuts, iterations=a.iterations,
        build_seconds=a.build_seconds, solve_seconds=a.solve_seconds, fitted_forecast_first=run.fitted_now,
        held_spots_excluded=run.held_spots, frontier=fr, cautions=_cautions(run), warnings=list(run.warnings),
        shared_error_caution=run.caution_full, notes=plan_notes(run, pacing_table(run), s["probability"]))
