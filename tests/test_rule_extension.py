"""A rule is one object: a toy rule defined in this file alone is used by the allocator.

The toy rule caps each zone's share of the plan's expected impressions. It is defined here only
(no change to planner/); the allocator builds its rows, explains its binding rows and relaxes it
like the shipped rules. The plan is checked against scipy.optimize.linprog (HiGHS) on an
independent dense formulation written out below, and its zone shares with numpy. Its deal-file
form (`ZoneShareKey`, the [mix] key `max_zone_share`) added to `planner.rules.FAMILIES` is read
and checked by the scenario loader, stored with a commit's terms and handed to the allocator.
"""
from __future__ import annotations

from dataclasses import replace

import numpy as np
import pandas as pd
import pytest
from scipy.optimize import linprog

from planner import allocate as al
from planner import rules as rl
from planner.book import deal_from_book, deal_terms
from planner.deals import rules_of
from planner.errors import ScenarioError
from planner.rules import INF, RowBlock, RuleFamily, is_num, one_value, pct
from planner.scenario import load_scenario
from test_delivery import synthetic_units

WEEKS = (1, 2, 3, 4)


class ZoneShareCap(RuleFamily):
    """No zone carries more than `cap` of the plan's expected impressions (invented toy rule)."""

    kinds = ("zone_cap",)

    def __init__(self, cap: float):
        self.cap = cap

    def check(self, rules, where):
        return [] if 0 <= self.cap <= 1 else [f"{where}: zone cap must be a share"]

    def blocks(self, rules, units, weeks):
        code, zones = pd.factorize(units["zone"], sort=True)
        k = len(zones)
        return [RowBlock("zone_cap", code, np.full(k, -self.cap), np.full(k, -INF), np.zeros(k), list(zones))]

    def explain(self, kind, key, rules, plan):
        return f"zone {key} share: at the {pct(self.cap)} cap (plan {pct(plan.share('zone', key))})"

    def relaxations(self, rules, ok, steps):
        return [(f"zone cap {pct(self.cap)}", dict(extra=()), lambda: "zone cap: remove it")]


def _problem(guarantee: float, extra=()):
    u = synthetic_units(zones=4, networks=5, weeks=4, seed=3)
    scope = al.candidate_units(u, weeks=WEEKS, max_spots_per_unit=5)
    return al.make_problem(scope, guarantee, al.Rules(pad=0.0, extra=tuple(extra)), WEEKS)


def _zone_shares(prob, x) -> pd.Series:
    m = ((1 - prob.units["preempt_rate"]) * prob.units["mean_impressions"]).to_numpy()
    return pd.Series(m * x).groupby(prob.units["zone"].to_numpy()).sum() / float(m @ x)


def test_a_rule_defined_in_a_test_shapes_the_plan_and_matches_linprog():
    free = _problem(2.0e5)
    plain = al.allocate(free, integer=False)
    cap = 0.3
    assert float(_zone_shares(free, plain.x).max()) > cap + 0.1  # without it one zone carries more
    prob = _problem(2.0e5, [ZoneShareCap(cap)])
    ours = al.allocate(prob, integer=False)
    assert ours.feasible and float(_zone_shares(prob, ours.x).max()) <= cap + 1e-6
    # Reference: scipy.optimize.linprog (HiGHS), dense rows written here: y_z - cap * T <= 0, T >= G.
    u = prob.units
    m = ((1 - u["preempt_rate"]) * u["mean_impressions"]).to_numpy()
    rows = [m * (u["zone"] == z).to_numpy() - cap * m for z in sorted(u["zone"].unique())]
    A_ub = np.vstack(rows + [-m])
    b_ub = np.append(np.zeros(len(rows)), -prob.guarantee)
    billed = (u["rate"] * (1 - u["preempt_rate"])).to_numpy()  # preempted spots are not billed (common practice)
    ref = linprog(billed, A_ub=A_ub, b_ub=b_ub, bounds=list(zip(np.zeros(prob.n), prob.ub)), method="highs")
    assert ref.status == 0 and ours.cost == pytest.approx(ref.fun, rel=1e-6)
    assert ours.cost > plain.cost * (1 + 1e-6)  # the cap costs something


def test_the_toy_rule_is_explained_and_relaxed_like_the_shipped_ones():
    prob = _problem(2.0e5, [ZoneShareCap(0.3)])
    alloc = al.allocate(prob, solver="highs")
    assert any(t.startswith("zone ") and "at the 30% cap" in t for t in al.binding_constraints(prob, alloc))
    # A cap of 25% over four zones of unequal avails limits the largest guarantee; asked for more,
    # removing the toy rule alone is the lever, worth what the LP without it gives.
    tight = _problem(2.0e5, [ZoneShareCap(0.25)])
    capped = al.max_guarantee(tight).value
    free = al.max_guarantee(_problem(2.0e5)).value
    assert free > capped * 1.05
    levers = al.rule_levers(replace(tight, guarantee=free), capped)
    assert levers and levers[0][1].startswith("zone cap 25%")
    assert levers[0][0] == pytest.approx(free - capped, rel=1e-3)


class ZoneShareKey(ZoneShareCap):
    """The toy rule set from a deal file: [mix] max_zone_share, a share in (0, 1] (invented)."""

    mix_keys = ("max_zone_share",)

    def __init__(self):
        super().__init__(1.0)

    def parse_mix(self, raw, deal, problem):
        return one_value(raw, "max_zone_share", lambda v: is_num(v) and 0 < v <= 1, "a share in (0, 1]",
                         float, deal, problem)

    def blocks(self, rules, units, weeks):
        cap = rules.settings.get("max_zone_share")
        if cap is None:
            return []
        self.cap = cap
        return super().blocks(rules, units, weeks)


def _with_deal(folder, mix: str):
    (folder / "deals" / "zoned.toml").write_text(
        'name = "zoned"\nadvertiser = "Example Grocer (invented)"\ndemo = "hh"\nimpressions = 100_000\n'
        f'first_week = 1\nlast_week = 2\nprice_cpm = 15.0\n[mix]\n{mix}\n')
    return folder


def test_a_deal_file_key_of_a_family_added_in_one_place(small_scenario, scenario_copy, monkeypatch):
    """The family added to `planner.rules.FAMILIES` / `ROW_FAMILIES` alone: the loader reads its key
    (a misspelling is refused with it as the hint), refuses a bad value naming file and key, the
    commit's terms store it and give it back, and the allocator's rows obey it (zone shares by
    numpy, as above)."""
    toy = ZoneShareKey()
    monkeypatch.setattr(rl, "FAMILIES", rl.FAMILIES + (toy,))
    monkeypatch.setattr(rl, "ROW_FAMILIES", rl.ROW_FAMILIES + (toy,))
    folder = _with_deal(scenario_copy(small_scenario), "max_zone_share = 0.4\nweekly_tolerance = 0.5")
    deal = load_scenario(folder).deals["zoned"]
    assert deal.mix.extra == {"max_zone_share": 0.4} and deal.mix.weekly_tolerance == 0.5
    assert rules_of(deal).settings == {"max_zone_share": 0.4}
    assert deal_terms(deal)["mix"]["max_zone_share"] == 0.4
    booked = type("Booked", (), dict(name="zoned", advertiser="", demo="hh", guarantee=1e5, first_week=1,
                                      last_week=2, price_cpm=15.0, confidence=None, pad=0.0,
                                      terms=deal_terms(deal)))()
    assert deal_from_book(booked).mix.extra == {"max_zone_share": 0.4}
    with pytest.raises(ScenarioError, match=r"deals/zoned\.toml: \[mix\] max_zone_share must be a share in "
                                            r"\(0, 1\], got 1\.5"):
        load_scenario(_with_deal(folder, "max_zone_share = 1.5"))
    with pytest.raises(ScenarioError, match=r"deals/zoned\.toml: \[mix\] unknown key 'max_zone_shares' "
                                            r"\(did you mean 'max_zone_share'\?"):
        load_scenario(_with_deal(folder, "max_zone_shares = 0.4"))
    prob = _problem(2.0e5)
    prob = al.make_problem(prob.units, 2.0e5, replace(rules_of(deal), pad=0.0, confidence=None,
                                                       weekly_tolerance=None), WEEKS)
    ours = al.allocate(prob, integer=False)
    assert ours.feasible and float(_zone_shares(prob, ours.x).max()) <= 0.4 + 1e-6
    free_prob = _problem(2.0e5)
    free = al.allocate(free_prob, integer=False)
    assert float(_zone_shares(free_prob, free.x).max()) > 0.4 + 0.05  # without the key one zone carries more


def test_without_the_family_its_key_is_refused(small_scenario, scenario_copy):
    """The shipped families do not read the toy key: the loader refuses it (exit status 2 at the
    command line, `planner.errors.ScenarioError`)."""
    folder = _with_deal(scenario_copy(small_scenario), "max_zone_share = 0.4")
    with pytest.raises(ScenarioError, match=r"deals/zoned\.toml: \[mix\] unknown key 'max_zone_share'"):
        load_scenario(folder)
