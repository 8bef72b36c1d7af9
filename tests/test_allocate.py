"""The allocator against outside references: scipy.optimize.linprog (HiGHS), cvxpy (Clarabel),
Monte Carlo of the error model, the NIST/SEMATECH normal table, and trade worked examples."""
from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import linprog

from planner import allocate as al
from test_delivery import dense_covariance, synthetic_units

WEEKS = (1, 2, 3, 4)
MIX = dict(max_network_share=0.3, daypart_min_share={"prime": 0.4}, daypart_max_share={"day": 0.7},
           weekly_tolerance=0.2)


def problem(guarantee=1.0e6, seed=1, max_spots=5, held=None, **rules):
    u = synthetic_units(zones=4, networks=5, weeks=4, seed=seed)
    scope = al.candidate_units(u, weeks=WEEKS, max_spots_per_unit=max_spots, held=held)
    r = dict(MIX)
    r.update(rules)
    return al.make_problem(scope, guarantee, al.Rules(**r), WEEKS)


def billed_cost(prob):
    """Expected billed cost of one bought spot, written here from the unit columns: the rate when
    the spot airs, nothing when it is preempted (common practice), so rate x (1 - preempt_rate)."""
    u = prob.units
    return (u["rate"] * (1.0 - u["preempt_rate"])).to_numpy(float)


def linear_rows(prob):
    """Independent dense formulation of the mix and pacing rules: A_ub x <= 0."""
    u = prob.units
    m = ((1 - u["preempt_rate"]) * u["mean_impressions"]).to_numpy()
    r = prob.rules
    rows = []
    for n in u["network"].unique():
        rows.append(m * (u["network"] == n) - r.max_network_share * m)
    for d, s in r.daypart_min_share.items():
        rows.append(-(m * (u["daypart"] == d) - s * m))
    for d, s in r.daypart_max_share.items():
        rows.append(m * (u["daypart"] == d) - s * m)
    W = len(prob.weeks)
    for w in prob.weeks:
        rows.append(m * (u["week"] == w) - (1 + r.weekly_tolerance) / W * m)
        rows.append(-(m * (u["week"] == w) - (1 - r.weekly_tolerance) / W * m))
    return m, np.array(rows, dtype=float)


def test_pad_lp_relaxation_matches_scipy_linprog():
    # Reference: scipy.optimize.linprog (method="highs") on an independent dense formulation.
    prob = problem(pad=0.1, confidence=None)
    ours = al.allocate(prob, integer=False)
    m, A = linear_rows(prob)
    A_ub = np.vstack([A, -m])
    b_ub = np.append(np.zeros(len(A)), -(1.1) * prob.guarantee)
    ref = linprog(billed_cost(prob), A_ub=A_ub, b_ub=b_ub, bounds=list(zip(np.zeros(prob.n), prob.ub)), method="highs")
    assert ref.status == 0 and ours.feasible
    assert ours.cost == pytest.approx(ref.fun, rel=1e-6)


def test_confidence_lp_relaxation_matches_cvxpy_conic_optimum():
    # Reference: cvxpy with Clarabel, the second-order cone form of the chance constraint
    # (Lobo, Vandenberghe, Boyd & Lebret 1998) with the linear variance frozen at our plan's value.
    cp = pytest.importorskip("cvxpy")
    prob = problem(guarantee=1.5e6, confidence=0.95)
    ours = al.allocate(prob, integer=False)
    assert ours.feasible
    l0 = prob.model.linear_variance(ours.x)
    m, A = linear_rows(prob)
    S = dense_covariance(prob.units)
    L = np.linalg.cholesky(S + 1e-9 * np.eye(len(S)) * S.diagonal().max())
    x = cp.Variable(prob.n)
    z = 1.6448536269514722  # z(0.95), NIST/SEMATECH table 1.6449
    cons = [x >= 0, x <= prob.ub, A @ x <= 0,
            m @ x - z * cp.norm(cp.hstack([L.T @ x, np.array([np.sqrt(l0)])])) >= prob.guarantee]
    ref = cp.Problem(cp.Minimize(billed_cost(prob) @ x), cons)
    ref.solve(solver=cp.CLARABEL)
    assert ref.status == "optimal"
    assert abs(ours.cost - ref.value) / ref.value < 0.005
    # and the exact condition holds at our relaxed plan
    dm = prob.model
    assert dm.mean(ours.x) - z * dm.sd(ours.x) >= prob.guarantee * (1 - 1e-5)


@pytest.mark.parametrize("solver", ["cbc", "highs"])
def test_integer_plan_within_reported_gap_and_rules(solver):
    prob = problem(guarantee=1.5e6, confidence=0.95)
    a = al.allocate(prob, solver=solver)
    assert a.feasible
    x = a.x
    assert np.all(x == np.round(x)) and np.all(x >= 0) and np.all(x <= prob.ub)
    assert a.cost >= a.lp_bound * (1 - 1e-9)  # the LP relaxation is a lower bound
    assert a.mip_bound >= a.lp_bound * (1 - 1e-6)  # the solver's bound is at least as strong
    assert a.gap <= 0.005 + 1e-9  # the stated 0.5% gap is met
    assert (a.cost - a.lp_bound) / a.cost <= 0.01  # and the plan is within 1% of the LP bound
    assert a.lp_gap == pytest.approx((a.cost - a.lp_bound) / a.cost)
    dm = prob.model
    assert dm.mean(x) - al.z_value(0.95) * dm.sd(x) >= prob.guarantee  # exact condition, integer plan
    m, A = linear_rows(prob)
    assert np.all(A @ x <= 1e-6 * dm.mean(x))  # mix rules and pacing on expected impressions


def test_solvers_agree():
    prob = problem(guarantee=1.2e6, confidence=0.9)
    c1, c2 = al.allocate(prob, solver="cbc").cost, al.allocate(prob, solver="highs").cost
    assert abs(c1 - c2) / min(c1, c2) <= 0.01


def test_even_pacing_is_total_expected_over_weeks():
    # Pacing is defined against the plan's own total: each week within +-tol of T/W.
    prob = problem(guarantee=1.2e6, pad=0.0, confidence=None, weekly_tolerance=0.05)
    a = al.allocate(prob, solver="highs")
    dm = prob.model
    T = dm.mean(a.x)
    wk = prob.units["week"].to_numpy()
    for w in WEEKS:
        e = dm.mean(np.where(wk == w, a.x, 0))
        assert 0.95 * T / 4 - 1e-6 * T <= e <= 1.05 * T / 4 + 1e-6 * T
    loose = al.allocate(al.with_rules(prob, weekly_tolerance=None), solver="highs")
    assert loose.cost <= a.cost + 1e-6


def test_monte_carlo_agrees_with_stated_probability_and_independence_overstates():
    """The plan's stated chance (normal approximation) against a Monte Carlo of the documented
    error model written in the tests (tests/test_faults.py::_mc_probability: binomial preemption,
    shared level factors, airing noise; 40,000 draws, standard error about 0.0015 at 90%).
    Tolerance: 0.003 for the normal approximation (the skew of preemption; within 2 SE in three
    seeds here) + 4 SE."""
    from test_faults import _mc_probability

    prob = problem(guarantee=1.5e6, confidence=0.9)
    a = al.allocate(prob, solver="highs")
    dm = prob.model
    stated = dm.probability(a.x, prob.guarantee)
    mc, se = _mc_probability(prob.units, np.rint(a.x), prob.guarantee, 40_000, seed=42)
    assert abs(mc - stated) <= 0.003 + 4 * se
    assert mc >= 0.9 - 0.003 - 4 * se
    from scipy.special import ndtr

    indep = float(ndtr((dm.mean(a.x) - prob.guarantee) / np.sqrt(dm.independent_variance(a.x))))
    assert indep > mc + 0.03  # treating the level errors as independent per spot overstates it


def test_z_values_against_normal_table():
    # NIST/SEMATECH e-Handbook of Statistical Methods, 1.3.6.7.1 (standard normal table).
    for c, z in ((0.90, 1.2816), (0.95, 1.6449), (0.975, 1.9600), (0.99, 2.3263)):
        assert al.z_value(c) == pytest.approx(z, abs=1e-4)


def test_cpm_worked_example():
    # Common practice: 25,000 impressions for $500 is a $20 CPM.
    assert al.cpm_needed(500.0, 25_000, 0.0) == pytest.approx(20.0)
    # a 20% margin on revenue: revenue must be 500 / 0.8 = 625, i.e. a $25 CPM
    assert al.cpm_needed(500.0, 25_000, 0.2) == pytest.approx(25.0)


def test_holds_and_max_spots_bound_the_plan():
    u = synthetic_units(zones=4, networks=5, weeks=4, seed=1)
    held = u.loc[u["avails"] > 2, ["zone", "network", "daypart", "week"]].assign(spots=2)
    scope = al.candidate_units(u, weeks=WEEKS, held=held, max_spots_per_unit=3)
    merged = u.merge(held, how="left", on=["zone", "network", "daypart", "week"]).fillna({"spots": 0})
    expect = np.minimum(merged["avails"] - merged["spots"], 3)
    assert np.array_equal(scope["ub"].to_numpy(), expect.to_numpy(float))
    prob = al.make_problem(scope, 5e5, al.Rules(confidence=0.9), WEEKS)
    a = al.allocate(prob, solver="highs")
    assert a.feasible and np.all(a.x <= prob.ub)


def test_max_guarantee_is_the_edge_of_feasibility():
    prob = problem(confidence=0.95)
    mg = al.max_guarantee(prob)
    assert mg.value > 0 and mg.at_plan == pytest.approx(mg.value, rel=2e-3)
    assert al.allocate(al.with_guarantee(prob, 0.97 * mg.value), integer=False).feasible
    assert not al.allocate(al.with_guarantee(prob, 1.01 * mg.value), integer=False).feasible
    mgi = al.max_guarantee(prob, integer=True)
    assert mgi.integer and mgi.at_plan <= mg.value * (1 + 1e-6) and mgi.at_plan >= 0.97 * mg.value


def test_infeasible_deal_is_explained_in_seller_words():
    # daytime carries about a third of the audience on offer: a 90% day minimum blocks a big guarantee
    prob = problem(guarantee=4.0e6, confidence=0.95, daypart_min_share={"day": 0.9}, daypart_max_share={},
                   max_network_share=None, weekly_tolerance=None)
    a = al.allocate(prob, solver="highs")
    assert not a.feasible
    words = al.diagnose(prob)
    day = [w for w in words if "day share: needs 90%, can reach" in w]
    assert day, words
    reach = float(day[0].split("can reach ")[1].split("%")[0]) / 100
    ok = al.with_rules(prob, daypart_min_share={"day": reach - 0.01})
    assert al.max_guarantee(ok).at_plan >= prob.guarantee
    too = al.with_rules(prob, daypart_min_share={"day": reach + 0.9 / 2 ** 5 + 0.01})  # bisection step
    assert al.max_guarantee(too).value < prob.guarantee


def test_binding_rules_reported():
    prob = problem(guarantee=1.5e6, confidence=0.95, daypart_min_share={"day": 0.6}, daypart_max_share={})
    a = al.allocate(prob, solver="highs")
    words = al.binding_constraints(prob, a)
    assert any(w.startswith("day share: held at the 60% minimum") for w in words), words
    assert any(w.startswith("confidence: a 95% chance") for w in words), words


def test_exhausted_avails_counts_networks():
    prob = problem(guarantee=1e5, confidence=0.9)
    x = np.where(prob.units["week"].to_numpy() == 3, prob.ub, 0.0)
    words = al.exhausted_avails(prob, x)
    assert words == ["avails in week 3 exhausted on 5 of 5 networks"]


def _linprog_pad_cost(prob, pad):
    """LP cost of a pad plan by scipy.optimize.linprog (HiGHS) on the dense formulation of
    `linear_rows` (written here from the rules, not by the allocator)."""
    m, A = linear_rows(prob)
    ref = linprog(billed_cost(prob), A_ub=np.vstack([A, -m]), b_ub=np.append(np.zeros(len(A)), -(1 + pad) * prob.guarantee),
                  bounds=list(zip(np.zeros(prob.n), prob.ub)), method="highs")
    assert ref.status == 0
    return ref.fun


def test_pulp_reference_model_gives_the_lp_cost_of_an_independent_formulation():
    """The one-object-per-variable pulp model (kept for the benchmark) solved by CBC as an LP,
    against scipy.optimize.linprog on the formulation written in this file (not the allocator)."""
    import pulp

    prob = problem(pad=0.05, confidence=None)
    ref = al.pulp_reference_model(prob, integer=False)
    ref.solve(pulp.COIN_CMD(path=al.cbc_path(), msg=False))
    assert pulp.value(ref.objective) == pytest.approx(_linprog_pad_cost(prob, 0.05), rel=1e-6)


@pytest.mark.parametrize("solver", ["cbc", "highs"])
def test_whole_spot_plan_matches_scipy_milp(solver):
    """Reference: scipy.optimize.milp (HiGHS branch and bound) on the dense formulation written in
    this file, whole spots, a tiny instance (2 zones x 2 networks x 2 dayparts x 4 weeks, pad 5%,
    the mix and pacing rules of MIX). Our whole-spot cost lies between the optimum and the optimum
    plus the allocator's stated gap (0.5%)."""
    from scipy.optimize import Bounds, LinearConstraint, milp

    u = synthetic_units(zones=2, networks=2, weeks=4, seed=4)
    u["avails"] = np.maximum(u["avails"], 2)
    scope = al.candidate_units(u, weeks=WEEKS)
    prob = al.make_problem(scope, 3.0e5, al.Rules(**{**MIX, "max_network_share": 0.6}, pad=0.05), WEEKS)
    m, A = linear_rows(prob)
    ref = milp(billed_cost(prob), integrality=np.ones(prob.n),
               bounds=Bounds(np.zeros(prob.n), prob.ub),
               constraints=[LinearConstraint(A, -np.inf, 0.0), LinearConstraint(m, 1.05 * prob.guarantee, np.inf)])
    assert ref.status == 0
    ours = al.allocate(prob, solver=solver)
    assert ours.feasible and np.allclose(ours.x, np.round(ours.x))
    assert ref.fun * (1 - 1e-9) <= ours.cost <= ref.fun * 1.005 + 1e-6
    assert m @ ours.x >= 1.05 * prob.guarantee * (1 - 1e-9) and np.all(A @ ours.x <= 1e-6 * prob.guarantee)


def test_unknown_solver_is_rejected():
    with pytest.raises(ValueError):
        al.allocate(problem(), solver="nope")


@pytest.mark.parametrize("rules", [dict(pad=0.1, confidence=None), dict(confidence=0.95)])
def test_column_subset_pricing_reaches_the_full_lp(monkeypatch, rules):
    # Column generation (sifting) from a subset must end at the same LP optimum as all columns.
    prob = problem(guarantee=1.5e6, seed=4, **rules)
    full = al.allocate(prob, integer=False)
    monkeypatch.setattr(al, "SIFT_COLUMNS", 10)
    monkeypatch.setattr(al, "SIFT_PER_GROUP", 1)
    monkeypatch.setattr(al, "SIFT_CAPACITY", 1.0)
    model = al._Model(prob, "cost")
    assert not model.complete
    ok, col, _ = model.solve()
    hd = np.asarray(model.h.getSolution().col_dual)[model.off:]
    assert np.allclose(model.reduced_costs()[model.active], hd, atol=1e-7)  # c - A'y, HiGHS convention
    sub = al.allocate(prob, integer=False)
    assert sub.cost == pytest.approx(full.cost, rel=1e-5)
    mg_full = al.max_guarantee(prob)
    monkeypatch.setattr(al, "SIFT_COLUMNS", 10)
    mg_sub = al.max_guarantee(prob)
    assert mg_sub.at_plan == pytest.approx(mg_full.at_plan, rel=2e-3)
    a = al.allocate(prob, solver="highs")
    assert a.feasible and a.cost <= full.cost * 1.01


@pytest.mark.parametrize("rules", [dict(pad=0.1, confidence=None), dict(confidence=0.95)])
def test_interior_point_cold_solves_reach_the_simplex_optimum(monkeypatch, rules):
    # Large models start each cold LP by interior point + crossover (no presolve) and re-solve
    # warm by dual simplex; the optimum, the duals used for pricing and the MIP must not change.
    prob = problem(guarantee=1.5e6, seed=4, **rules)
    ref = al.allocate(prob, integer=False)
    ref_mip = al.allocate(prob, solver="highs")
    monkeypatch.setattr(al, "IPM_COLUMNS", 1)
    model = al._Model(prob, "cost")
    ok, col, _ = model.solve()
    assert ok and model.h.getInfo().ipm_iteration_count > 0 and model.warm
    hd = np.asarray(model.h.getSolution().col_dual)[model.off:]
    assert np.allclose(model.reduced_costs()[model.active], hd, atol=1e-7)
    lp = al.allocate(prob, integer=False)
    assert lp.cost == pytest.approx(ref.cost, rel=1e-6)
    monkeypatch.setattr(al, "SIFT_COLUMNS", 10)  # with column generation too
    assert al.allocate(prob, integer=False).cost == pytest.approx(ref.cost, rel=1e-5)
    a = al.allocate(prob, solver="highs")
    assert a.feasible and a.cost == pytest.approx(ref_mip.cost, rel=0.01)


def test_a_solver_stopped_by_its_time_limit_is_undecided_not_infeasible(monkeypatch):
    """A relaxation the solver did not finish proves nothing: never report it as infeasible."""
    prob = problem(guarantee=1.0e6, confidence=0.95)
    assert al.allocate(prob, solver="highs").feasible  # the deal is deliverable
    monkeypatch.setattr(al, "LP_TIME_LIMIT_FACTOR", 0.0)
    monkeypatch.setattr(al, "LP_TIME_LIMIT_FLOOR", 1e-12)  # HiGHS stops at once
    a = al.allocate(prob, solver="highs")
    assert not a.feasible
    assert a.status.startswith(al.UNDECIDED) and "infeasible" not in a.status.split("(")[0]


def _hand_units():
    """One zone, three networks, two dayparts, three identical weeks; no uncertainty and no
    preemption (a pad of 0: the largest guarantee is the largest expected delivery, an LP)."""
    import pandas as pd

    per_week = [("n1", "prime", 500, 20), ("n1", "day", 50, 10), ("n2", "prime", 500, 10),
                ("n2", "day", 200, 20), ("n3", "prime", 500, 5), ("n3", "day", 50, 5)]
    rows = [dict(zone="z1", network=n, daypart=d, week=w, mean_impressions=float(mu), avails=a, rate=10.0,
                 airing_sd=0.0, level_sd_network=0.0, level_sd_flight=0.0, level_sd_week=0.0, preempt_rate=0.0)
            for w in (1, 2, 3) for n, d, mu, a in per_week]
    return pd.DataFrame(rows)


def _largest_expected(u, day_min=None, net_max=None):
    """Reference: scipy.optimize.linprog (HiGHS) maximising expected impressions under the rules."""
    m = u["mean_impressions"].to_numpy()
    rows = []
    if day_min is not None:
        rows.append(-(m * (u["daypart"] == "day").to_numpy() - day_min * m))
    if net_max is not None:
        rows += [m * (u["network"] == n).to_numpy() - net_max * m for n in ("n1", "n2", "n3")]
    ref = linprog(-m, A_ub=np.array(rows) if rows else None, b_ub=np.zeros(len(rows)) if rows else None,
                  bounds=list(zip(np.zeros(len(u)), u["avails"].to_numpy(float))), method="highs")
    assert ref.status == 0
    return -ref.fun


def test_what_limits_it_names_each_rule_with_what_removing_it_alone_allows():
    """QA finding: a deal whose daytime minimum cost three quarters of its largest guarantee was
    told only "avails in week N exhausted" four times. Each rule that binds is now named with the
    largest guarantee removing it alone would allow (checked against an independent LP solve),
    largest gain first; the weeks whose avails run out fold into ranges."""
    u = _hand_units()
    scope = al.candidate_units(u, weeks=(1, 2, 3))
    prob = al.make_problem(scope, 75_000.0, al.Rules(daypart_min_share={"day": 0.6}, max_network_share=0.4, pad=0.0),
                           (1, 2, 3))
    both = _largest_expected(u, 0.6, 0.4)
    no_day = _largest_expected(u, None, 0.4)
    no_net = _largest_expected(u, 0.6, None)
    loose = _largest_expected(u)
    assert no_day - both > no_net - both > 0.05 * both  # the case: two levers, of different size
    words = al.diagnose(prob)
    lever = [w for w in words if "without it alone" in w]
    assert [w.split(":")[0] for w in lever] == ["daypart_min_share day 60%", "max_network_share 40%"]
    for w, want in zip(lever, (no_day, no_net)):
        allowed = float(w.split("would be ")[1].split(" ")[0].replace(",", ""))
        gain = float(w.split("(+")[1].split(")")[0].replace(",", ""))
        assert allowed == pytest.approx(want, rel=2e-3) and gain == pytest.approx(want - both, rel=5e-3)
    assert f"deliver at most {loose:,.0f} expected impressions, short of 75,000" in " ".join(words)
    assert "avails in weeks 1-3 exhausted on 3 of 3 networks" in words


def test_cbc_is_found_without_pulps_deprecated_class():
    """pulp's PULP_CBC_CMD warns of its removal in pulp 4; the CBC path is found without it (a
    DeprecationWarning is an error here), and it runs: CBC's own version banner."""
    import subprocess
    import warnings

    with warnings.catch_warnings():
        warnings.simplefilter("error", DeprecationWarning)
        path = al.cbc_path()
    out = subprocess.run([path, "-quit"], capture_output=True, text=True, timeout=60).stdout
    assert "CBC" in out.upper() or "Coin" in out


# ---------------------------------------------------------------------------------------------
# Preemption is not billed (common practice): the plan's cost is the expected cost of the spots
# that air, and the allocator minimises it.
def _two_units():
    """Two invented units of one zone, network and week, hand-sized for the worked case below."""
    u = synthetic_units(zones=1, networks=1, dayparts=("day", "prime"), weeks=1, seed=0)
    u["mean_impressions"] = 10_000.0
    u["airing_sd"] = 1_000.0
    for c in ("level_sd_network", "level_sd_flight", "level_sd_week"):
        u[c] = 500.0
    u["avails"] = 4
    u["rate"] = [100.0, 150.0]        # day: 100 a spot, prime: 150
    u["preempt_rate"] = [0.5, 0.0]    # day is preempted half the time, prime never
    return u


def test_hand_worked_plan_pays_only_for_the_spots_that_air():
    """Fault caught: cost or objective at the card rate (spots x rate), billing preempted spots.

    Worked by hand: guarantee 20,000, pad 0. Day: 5,000 expected impressions a bought spot, billed
    100 x 0.5 = 50 expected, i.e. 0.010 per expected impression; prime: 10,000 for 150, 0.015. So the
    least expected cost is 4 day spots (the avails), expected cost 200, sd
    sqrt(4 x 100^2 x 0.5 x 0.5) = 100. At the card rate day would cost 0.020 per expected
    impression and the plan would be 2 prime spots for 300."""
    scope = al.candidate_units(_two_units(), weeks=(1,))
    prob = al.make_problem(scope, 20_000.0, al.Rules(pad=0.0), (1,))
    a = al.allocate(prob, gap=0.0)
    assert a.feasible
    day = prob.units["daypart"].to_numpy() == "day"
    assert a.x[day].tolist() == [4.0] and a.x[~day].tolist() == [0.0]
    assert a.cost == pytest.approx(200.0, rel=1e-9)
    assert prob.cost_sd(a.x) == pytest.approx(100.0, rel=1e-9)


def _brute_force(prob, ok):
    """Least expected billed cost over every whole-spot plan 0..ub (enumerated), among those `ok`
    accepts (ok(X) -> bool array for plans X (k, n)); the cost written here from the unit columns."""
    grids = np.meshgrid(*[np.arange(int(b) + 1) for b in prob.ub], indexing="ij")
    X = np.stack([g.ravel() for g in grids], axis=1).astype(float)
    cost = X @ billed_cost(prob)
    good = ok(X)
    return float(cost[good].min()), X[good][np.argmin(cost[good])]


@pytest.mark.parametrize("risk", [dict(pad=0.05), dict(confidence=0.9)])
def test_least_billed_cost_matches_brute_force_enumeration(risk):
    """Fault caught: the allocator minimising anything but the expected billed cost (card rate,
    or the billing applied twice), or a plan whose cost is not that of its spots.

    Reference: enumeration of all 4^6 = 4,096 whole-spot plans of a tiny instance (1 zone x 3
    networks x 2 dayparts x 1 week, up to 3 spots each, preemption 0-60% per unit) with a network
    cap of 60%; feasibility by the pad written here, or by the chance of delivery of
    `DeliveryModel.probability` (itself checked against a dense covariance and Monte Carlo in
    tests/test_delivery.py)."""
    u = synthetic_units(zones=1, networks=3, dayparts=("day", "prime"), weeks=1, seed=7)
    u["avails"] = 3
    u["preempt_rate"] = [0.0, 0.6, 0.3, 0.1, 0.5, 0.2]
    scope = al.candidate_units(u, weeks=(1,))
    dm_m = ((1 - scope["preempt_rate"]) * scope["mean_impressions"]).to_numpy()
    G = 0.45 * float(dm_m.sum() * 3)
    prob = al.make_problem(scope, G, al.Rules(max_network_share=0.6, **risk), (1,))
    net = prob.units["network"].to_numpy()

    def ok(X):
        T = X @ dm_m
        share = np.all([X @ (dm_m * (net == n)) <= 0.6 * T + 1e-9 for n in np.unique(net)], axis=0)
        if "pad" in risk:
            return share & (T >= 1.05 * G)
        return share & np.array([prob.model.probability(x, G) >= 0.9 - 1e-12 for x in X])

    ref_cost, ref_x = _brute_force(prob, ok)
    a = al.allocate(prob, gap=0.0)
    assert a.feasible
    assert a.cost == pytest.approx(ref_cost, rel=1e-9)
    assert a.cost == pytest.approx(float(a.x @ billed_cost(prob)), rel=1e-12)
