"""Stress of the book: Monte Carlo against closed forms (scipy.stats.norm, Rockafellar & Uryasev
2000), fast sampler against the exact and per-spot samplers, shared-network correlation, shocks."""
from __future__ import annotations

import sys
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from planner import book as bk
from planner import stress as st
from planner.delivery import DeliveryModel
from planner.errors import InputError
from planner import workflows as wf

sys.path.insert(0, str(Path(__file__).resolve().parent))
from test_book import greedy_planner, make_synthetic  # noqa: E402

UNIT = ["zone", "network", "daypart", "week"]


def _rows(deal, networks, *, zones=("z1", "z2"), dayparts=("prime", "day"), weeks=range(1, 5), spots=3,
          mu=1000.0, air=300.0, net=150.0, flt=100.0, wk=80.0, p=0.0, demo="a", nw=0.0, com=0.0):
    rows = [dict(deal=deal, demo=demo, zone=z, network=n, daypart=d, week=w, spots=spots, mean_impressions=mu,
                 airing_sd=air, level_sd_network=net, level_sd_flight=flt, level_sd_week=wk, preempt_rate=p,
                 level_sd_network_week=nw, level_sd_common=com)
            for z in zones for n in networks for d in dayparts for w in weeks]
    return rows


def _deal(name, guarantee, price=20.0, cost=1000.0):
    return SimpleNamespace(name=name, guarantee=float(guarantee), price_cpm=price, cost=cost, expected_impressions=None)


def _model(specs, **kw):
    """specs: [(deal, networks, guarantee_offset_in_sd)] -> BookModel (guarantee = mean + k sd)."""
    rows = []
    for name, nets, _ in specs:
        rows += _rows(name, nets, **kw)
    units = pd.DataFrame(rows)
    tmp = st.build_book_model([_deal(n, 0) for n, _, _ in specs], units)
    sd = np.sqrt(tmp.variance)
    deals = [_deal(n, tmp.mean[j] + k * sd[j]) for j, (n, _, k) in enumerate(specs)]
    return st.build_book_model(deals, units)


def test_model_moments_match_the_allocators_delivery_model():
    m = _model([("a", ["n1", "n2"], 0.0), ("b", ["n1", "n3"], 0.0)], p=0.05)
    for j, name in enumerate(m.deals):
        u = m.rows[m.rows["deal"] == name].reset_index(drop=True)
        dm = DeliveryModel.from_units(u)
        x = u["spots"].to_numpy(float)
        assert m.mean[j] == pytest.approx(dm.mean(x))
        assert m.variance[j] == pytest.approx(dm.variance(x))
    # deals a and b hold the same units of n1 (zones z1, z2): they covary through n1's network
    # factor and through the flight and unit-week factors of the shared units (worked by hand)
    keep = 3 * (1 - 0.05)  # spots x chance of airing
    net_a = net_b = keep * 150.0 * 2 * 2 * 4  # zones x dayparts x weeks on n1
    flights = 2 * 2 * (keep * 100.0 * 4) ** 2  # (zone, daypart) flights of n1, 4 weeks each
    weeks = 2 * 2 * 4 * (keep * 80.0) ** 2
    assert m.covariance[0, 1] == pytest.approx(net_a * net_b + flights + weeks)
    # a network-week factor adds, per week of n1, (the deal's n1 loading in that week)^2
    mg = _model([("a", ["n1", "n2"], 0.0), ("b", ["n1", "n3"], 0.0)], p=0.05, nw=60.0)
    per_week = keep * 60.0 * 2 * 2  # zones x dayparts on n1 in one week
    assert mg.covariance[0, 1] == pytest.approx(net_a * net_b + flights + weeks + 4 * per_week ** 2)
    # a common factor adds the product of the two deals' whole common loadings
    mc = _model([("a", ["n1", "n2"], 0.0), ("b", ["n1", "n3"], 0.0)], p=0.05, com=50.0)
    whole = keep * 50.0 * 2 * 2 * 2 * 4  # zones x networks x dayparts x weeks
    assert mc.covariance[0, 1] == pytest.approx(net_a * net_b + flights + weeks + whole ** 2)
    # no shared unit: only the network factor links them
    units = pd.DataFrame(_rows("a", ["n1", "n2"], zones=("z1",)) + _rows("b", ["n1"], zones=("z2",)))
    m2 = st.build_book_model([_deal("a", 0), _deal("b", 0)], units)
    assert m2.covariance[0, 1] == pytest.approx((3 * 150.0 * 2 * 4) ** 2)


def test_gaussian_book_shortfall_probability_matches_scipy_norm():
    """Airing noise and level errors only (no preemption): each deal's delivery is exactly
    normal, so P(D < G) = scipy.stats.norm.cdf((G - mean) / sd); MC within 3 standard errors."""
    m = _model([("a", ["n1", "n2"], -0.5), ("b", ["n1", "n3"], 0.3), ("c", ["n2"], -1.2)], p=0.0)
    r = st.stress_model(m, draws=200_000, seed=7)
    for j, d in enumerate(r.deals):
        exact = stats.norm.cdf(m.guarantee[j], loc=m.mean[j], scale=np.sqrt(m.variance[j]))
        assert abs(d.probability_of_shortfall - exact) < 3 * d.probability_of_shortfall_se, (d.deal, exact)
        # expected shortfall of a normal: E[(G-D)+] = sd * (phi(k) + k Phi(k)), k = (G-mean)/sd
        s = np.sqrt(m.variance[j])
        k = (m.guarantee[j] - m.mean[j]) / s
        es = s * (stats.norm.pdf(k) + k * stats.norm.cdf(k))
        assert abs(d.expected_shortfall - es) < 3 * d.expected_shortfall_se


def test_cvar_matches_the_normal_closed_form():
    """Guarantees far above the mean: liability = price/1000 x (G - D) > 0 in every draw, a normal
    loss, so VaR95 = mu + sigma z_0.95 and CVaR95 = mu + sigma phi(z_0.95) / 0.05
    (Rockafellar & Uryasev 2000, J. Risk 2(3), closed form for a normal loss)."""
    m = _model([("a", ["n1", "n2"], 9.0), ("b", ["n1", "n3"], 9.0)], p=0.0)
    r = st.stress_model(m, draws=200_000, seed=3)
    w = m.price_cpm / 1000.0
    mu = float(w @ (m.guarantee - m.mean))
    sigma = float(np.sqrt(w @ m.covariance @ w))
    z = stats.norm.ppf(0.95)
    assert z == pytest.approx(1.6449, abs=1e-4)  # NIST/SEMATECH e-Handbook normal table
    assert abs(r.book["var95"] - (mu + sigma * z)) < 3 * r.book["var95_se"]
    cvar = mu + sigma * stats.norm.pdf(z) / 0.05
    assert abs(r.book["cvar95"] - cvar) < 3 * r.book["cvar95_se"]
    assert r.book["cvar95_se"] < 0.01 * cvar
    # contributions of the deals to CVaR add up to it (Euler allocation)
    assert sum(d.tail_contribution for d in r.deals) == pytest.approx(r.book["cvar95"], rel=1e-9)


def test_var_cvar_on_a_discrete_loss():
    """Losses 1..100 equally likely: VaR95 = 95, CVaR95 = mean of the worst 5% = 98
    (Rockafellar & Uryasev 2000: CVaR = VaR + E[(L - VaR)+] / (1 - a)), worked by hand."""
    var, cvar = st.var_cvar(np.arange(1, 101, dtype=float), 0.95)
    assert var == 95 and cvar == pytest.approx(98.0)
    # with an atom at zero (most draws owe nothing) CVaR still averages the worst 5%
    losses = np.zeros(1000)
    losses[-20:] = 10.0
    var, cvar = st.var_cvar(losses, 0.95)
    assert var == 0 and cvar == pytest.approx(4.0)  # (20 x 10 + 30 x 0) / 50


@pytest.mark.parametrize("method,nw,com", [("exact", 0.0, 0.0), ("per_spot", 0.0, 0.0), ("exact", 90.0, 0.0),
                                           ("exact", 0.0, 60.0)])
def test_fast_sampler_agrees_with_the_exact_samplers(method, nw, com):
    """With preemptions (non-Gaussian per spot) the conditional-normal sampler must agree with
    drawing every factor, every Bernoulli and every airing (per_spot: the naive sampler); with a
    network-week factor (nw > 0) the exact sampler draws it per network and week, with a common
    factor (com > 0) once per draw for every deal."""
    m = _model([("a", ["n1", "n2"], -0.8), ("b", ["n1", "n3"], -0.2)], p=0.08, spots=2, nw=nw, com=com)
    n = 60_000
    fast = st.stress_model(m, draws=n, seed=11)
    slow = st.stress_model(m, draws=n, seed=12, method=method)

    def se_sd(d):  # standard error of a sample sd: sd sqrt((kurtosis - 1) / (4 n)) (delta method)
        return d.std() * np.sqrt((stats.kurtosis(d, fisher=False) - 1) / (4 * d.size))

    for j, (f, s) in enumerate(zip(fast.deals, slow.deals)):
        se = np.hypot(f.probability_of_shortfall_se, s.probability_of_shortfall_se)
        assert abs(f.probability_of_shortfall - s.probability_of_shortfall) < 4 * se
        a, b = fast.delivery[:, j], slow.delivery[:, j]
        assert abs(a.std() - b.std()) < 4 * np.hypot(se_sd(a), se_sd(b))
        assert abs(a.mean() - b.mean()) < 4 * np.hypot(a.std(), b.std()) / np.sqrt(n)
    cf = np.corrcoef(fast.delivery.T)[0, 1]
    cs = np.corrcoef(slow.delivery.T)[0, 1]
    # standard error of a sample correlation about (1 - r^2) / sqrt(n) (normal theory; Fisher 1921)
    assert abs(cf - cs) < 4 * np.hypot(1 - cf ** 2, 1 - cs ** 2) / np.sqrt(n)
    assert abs(fast.book["cvar95"] - slow.book["cvar95"]) < 4 * np.hypot(fast.book["cvar95_se"], slow.book["cvar95_se"])


def test_deals_sharing_a_network_fail_together():
    """Two deals on the same network: P(both short) well above P(a short) x P(b short); with the
    network factor removed (and no shared units) the joint is the product (control)."""
    shared = _model([("a", ["n1"], -0.3), ("b", ["n1"], -0.3)], zones=("z1",), net=300.0, p=0.0)
    r = st.stress_model(shared, draws=100_000, seed=5)
    sa = r.delivery[:, 0] < shared.guarantee[0]
    sb = r.delivery[:, 1] < shared.guarantee[1]
    joint, product = (sa & sb).mean(), sa.mean() * sb.mean()
    assert joint > product + 0.05
    assert r.joint["probability_both_short"] == pytest.approx(joint)
    # the analytic bivariate normal (scipy) agrees with the MC joint
    rho = shared.covariance[0, 1] / np.sqrt(shared.variance[0] * shared.variance[1])
    ka = (shared.guarantee - shared.mean) / np.sqrt(shared.variance)
    exact = stats.multivariate_normal(mean=[0, 0], cov=[[1, rho], [rho, 1]]).cdf(ka)
    assert abs(joint - exact) < 3 * np.sqrt(exact * (1 - exact) / 100_000) + 1e-3
    indep = _model([("a", ["n1"], -0.3), ("b", ["n2"], -0.3)], zones=("z1",), net=300.0, p=0.0)
    r2 = st.stress_model(indep, draws=100_000, seed=5)
    sa = r2.delivery[:, 0] < indep.guarantee[0]
    sb = r2.delivery[:, 1] < indep.guarantee[1]
    assert abs((sa & sb).mean() - sa.mean() * sb.mean()) < 4 * np.sqrt(0.25 * 0.25 / 100_000) + 2e-3
    # the network that drives the shared book's tail is n1
    assert r.networks[0]["network"] == "n1" and r.networks[0]["tail_liability"] > 0


def test_same_seed_same_numbers():
    m = _model([("a", ["n1", "n2"], -0.5), ("b", ["n1"], 0.0)], p=0.03)
    a = st.stress_model(m, draws=5_000, seed=42).as_dict()
    b = st.stress_model(m, draws=5_000, seed=42).as_dict()
    c = st.stress_model(m, draws=5_000, seed=43).as_dict()
    assert a == b and a["book"] != c["book"]


def test_shocks_move_liability_the_right_way():
    base_units = pd.DataFrame(_rows("a", ["n1", "n2"], p=0.03) + _rows("b", ["n3"], p=0.03))
    m0 = st.build_book_model([_deal("a", 0), _deal("b", 0)], base_units)
    deals = [_deal("a", m0.mean[0] * 0.98), _deal("b", m0.mean[1] * 0.98)]

    def run(shocks=(), pm=1.0):
        u = st.apply_shocks(base_units, shocks, pm)
        return st.stress_model(st.build_book_model(deals, u), draws=40_000, seed=1, shocks=shocks,
                               preempt_multiplier=pm)

    base = run()
    net = run([st.parse_shock("network=n1:-0.15", networks=["n1", "n2", "n3"])])
    assert net.deals[0].expected_liability > base.deals[0].expected_liability * 1.5
    assert net.deals[1].expected_liability == pytest.approx(base.deals[1].expected_liability, rel=1e-9)
    up = run([st.parse_shock("all:+0.10")])
    assert up.book["expected_liability"] < base.book["expected_liability"]
    pre = run(pm=3.0)
    assert pre.book["expected_liability"] > base.book["expected_liability"]
    dp = run([st.parse_shock("daypart=prime:-0.10", dayparts=["prime", "day"])])
    assert dp.book["cvar95"] > base.book["cvar95"]
    # every spot preempted (not reachable by --preempt-multiplier, which keeps preemption below
    # 100%): nothing delivered, no spread
    gone = st.stress_model(st.build_book_model(deals, base_units.assign(preempt_rate=1.0)), draws=40_000, seed=1)
    assert all(d.probability_of_shortfall == 1.0 for d in gone.deals)
    assert gone.joint == {}  # no pair of deals to call correlated (it named one deal twice)
    both = run([st.parse_shock("network=n1:-0.15"), st.parse_shock("all:-0.05")], 2.0)
    assert both.book["expected_liability"] > net.book["expected_liability"]
    assert net.shocks == ["network n1 -15.0%"]


@pytest.mark.parametrize("text,msg", [
    ("network=n9:-0.1", "unknown network"),
    ("network n1 -0.1", "expected network=NAME"),
    ("all:-1.5", "must be > -1"),
    ("daypart=prime:abc", "expected network=NAME"),
    ("channel=x:-0.1", "expected network=NAME"),
    ("zone=z9:-0.1", "unknown zone"),
])
def test_bad_shocks_are_input_errors(text, msg):
    with pytest.raises(InputError, match=msg):
        st.parse_shock(text, networks=["n1", "n2"], dayparts=["prime"], zones=["z1"])


def test_stress_book_end_to_end_from_the_sqlite_book(tmp_path):
    scn, fc = make_synthetic(tmp_path / "s")
    wf.commit_deal(scn, "alpha", planner=greedy_planner(30))
    wf.commit_deal(scn, "beta", planner=greedy_planner(30))
    r = wf.stress_book(scn, draws=20_000, seed=9, forecast=fc, shocks=["network=net1:-0.15"])
    d = r.as_dict()
    assert d["draws"] == 20_000 and d["seed"] == 9 and "caution" in d
    assert {"deal", "probability_of_shortfall", "expected_shortfall", "expected_liability"} <= set(d["deals"][0])
    assert {"expected_liability", "var95", "cvar95"} <= set(d["book"])
    assert r.delivery.shape == (20_000, 2) and r.liability.shape == (20_000, 2)
    assert r.book_liability.shape == (20_000,)
    assert r.deal_names == ["alpha", "beta"]
    mk = wf.stress_book(scn, draws=20_000, seed=9, forecast=fc, liability="makegood")
    assert mk.liability_basis == "makegood"
    # Reference: each deal's shortfall max(G - D, 0) averaged over the kept draws of delivery, the
    # guarantee and price from the deal definitions, the plan's cost and expected impressions summed
    # from the book's holds rows read with sqlite3 (not the book's deal summary).
    import sqlite3

    with sqlite3.connect(scn.path / "book.sqlite") as con:
        h = pd.read_sql_query("SELECT deal, SUM(cost) AS cost, SUM(expected_impressions) AS expected "
                              "FROM holds GROUP BY deal", con).set_index("deal")
    for j, d in enumerate(mk.deals):
        deal = scn.deals[d.deal]
        short = np.maximum(deal.impressions - mk.delivery[:, j], 0.0).mean()
        assert d.expected_shortfall == pytest.approx(short, rel=1e-9, abs=1e-6)
        # make-good: the shortfall bought back at the plan's cost per expected impression
        cpi = h.loc[d.deal, "cost"] / h.loc[d.deal, "expected"]
        assert d.expected_liability == pytest.approx(short * cpi, rel=1e-9, abs=1e-9)
    for j, d in enumerate(r.deals):
        deal = scn.deals[d.deal]
        short = np.maximum(deal.impressions - r.delivery[:, j], 0.0)
        assert short.mean() > 0  # the case: a shortfall to price
        # refund: shortfall x price CPM / 1000 (CPM definition, common practice)
        assert d.expected_liability == pytest.approx(short.mean() * deal.price_cpm / 1000, rel=1e-9, abs=1e-9)
        revenue = deal.impressions * deal.price_cpm / 1000
        assert d.expected_margin == pytest.approx(revenue - h.loc[d.deal, "cost"] - d.expected_liability)
    with pytest.raises(InputError, match="unknown network"):
        wf.stress_book(scn, draws=100, forecast=fc, shocks=["network=nope:-0.1"])
    with pytest.raises(InputError, match="--liability"):
        wf.stress_book(scn, draws=100, forecast=fc, liability="other")


def test_empty_book_is_input_error(tmp_path):
    scn, fc = make_synthetic(tmp_path / "s")
    with pytest.raises(InputError, match="no committed deals"):
        wf.stress_book(scn, draws=100, forecast=fc)


# --------------------------------------------------------------------------- command line, end to end

def _cli(capsys, *argv):
    from planner.cli import main

    code = main([str(a) for a in argv])
    out = capsys.readouterr()
    return code, out.out, out.err


def test_cli_commit_stress_rebalance_end_to_end(small_scenario, scenario_copy, monkeypatch, capsys):
    import json

    from planner.scenario import load_scenario
    from test_book import synthetic_forecast, use_forecast

    folder = scenario_copy(small_scenario)
    scn = load_scenario(folder)
    fc = synthetic_forecast(scn)
    use_forecast(monkeypatch, fc)
    code, out, _ = _cli(capsys, "book", "commit", folder, "small-comfortable", "--json", "--solver", "highs")
    assert code == 0 and json.loads(out)["committed"] is True
    code, out, _ = _cli(capsys, "book", "commit", folder, "small-too-big", "--solver", "highs")
    assert code == 0 and "not committed" in out  # an answer, not bad input
    code, _, err = _cli(capsys, "book", "commit", folder, "small-comfortable")
    assert code == 2 and "already in the book" in err
    code, out, _ = _cli(capsys, "book", "check", folder, "--json")
    assert code == 0 and json.loads(out)["consistent"] is True and json.loads(out)["deals"] == 1
    code, out, _ = _cli(capsys, "stress", folder, "--draws", 20000, "--seed", 4, "--json",
                        "--shock", f"network={scn.network_names[0]}:-0.15", "--shock", "all:-0.05",
                        "--preempt-multiplier", 2)
    assert code == 0
    d = json.loads(out)
    assert d["draws"] == 20000 and d["seed"] == 4 and len(d["shocks"]) == 2 and d["preempt_multiplier"] == 2
    assert {"deal", "probability_of_shortfall", "expected_shortfall", "expected_liability"} <= set(d["deals"][0])
    assert {"expected_liability", "var95", "cvar95"} <= set(d["book"])
    # the forecast's own caution on errors shared by all units, when its refit check calls for it
    from planner.forecast_job import forecast_meta, shared_error_caution

    caution = shared_error_caution(forecast_meta(scn), folder)
    assert d["warnings"] == ([caution] if caution else [])
    code, out2, _ = _cli(capsys, "stress", folder, "--draws", 20000, "--seed", 4, "--json",
                         "--shock", f"network={scn.network_names[0]}:-0.15", "--shock", "all:-0.05",
                         "--preempt-multiplier", 2)
    assert json.loads(out2) == d  # same seed, same numbers
    code, out, _ = _cli(capsys, "stress", folder, "--draws", 5000)
    assert code == 0 and "VaR95" in out and "CVaR95" in out and "contract" in out
    for bad in (["--shock", "network=nowhere:-0.1"], ["--shock", "prime-0.1"], ["--liability", "x"], ["--draws", 1]):
        code, _, err = _cli(capsys, "stress", folder, *bad)
        assert code == 2 and err.startswith("error:"), bad
    # mid-flight: weeks 1-3 posted 20% under forecast
    held = bk.get_deal(scn, "small-comfortable").holds
    a = held[held["week"] <= 3][UNIT + ["spots"]].merge(fc[fc["demo"] == "a25-54"][UNIT + ["mean_impressions"]], on=UNIT)
    acts = a[UNIT].assign(spots_aired=a["spots"], impressions=0.8 * a["spots"] * a["mean_impressions"])
    path = folder / "actuals.csv"
    acts.to_csv(path, index=False)
    code, out, _ = _cli(capsys, "rebalance", folder, "small-comfortable", "--actuals", path, "--json",
                        "--solver", "highs", "--commit")
    assert code == 0
    r = json.loads(out)
    assert r["aired_weeks"] == [1, 2, 3] and r["posted_vs_forecast"] == pytest.approx(-0.2)
    assert r["deliverable"] and r["probability_after"] >= 0.95 - 1e-6 and r["committed"]
    assert r["shared_error_caution"] == caution  # the same caution as the stress test's
    # the stress then values the re-planned weeks on the forecast the rebalance used (the book
    # stores the postings): its model mean is the rebalance's, so the MC mean is within 4 of its
    # standard errors (sd / sqrt(draws))
    code, out, _ = _cli(capsys, "stress", folder, "--draws", 20000, "--seed", 4, "--json")
    s = next(x for x in json.loads(out)["deals"] if x["deal"] == "small-comfortable")
    assert abs(s["expected_delivery"] - (r["delivered"] + r["expected_remaining"])) < 4 * r["sd_remaining"] / np.sqrt(20000)
    assert s["sd_delivery"] == pytest.approx(r["sd_remaining"], rel=0.03)
    assert json.loads(out)["warnings"] == ([caution] if caution else [])
    # a book from before postings were stored: the stress says the deal is valued on the old forecast
    import sqlite3

    conn = sqlite3.connect(folder / "book.sqlite")
    conn.execute("DELETE FROM postings")
    conn.commit()
    conn.close()
    code, out, _ = _cli(capsys, "stress", folder, "--draws", 2000, "--json")
    stale = st.stale_rebalance_caution("small-comfortable", 3)
    assert code == 0 and json.loads(out)["warnings"] == [stale] + ([caution] if caution else [])
    code, out, _ = _cli(capsys, "stress", folder, "--draws", 2000)
    assert code == 0 and "before its posted actuals" in " ".join(out.split())
    code, out, _ = _cli(capsys, "rebalance", folder, "small-comfortable", "--actuals", path, "--json",
                        "--solver", "highs", "--commit")
    assert code == 0 and json.loads(out)["committed"]
    code, out, _ = _cli(capsys, "stress", folder, "--draws", 2000, "--json")
    assert json.loads(out)["warnings"] == ([caution] if caution else [])
    code, out, _ = _cli(capsys, "rebalance", folder, "small-comfortable", "--actuals", path, "--solver", "highs")
    assert code == 0 and "chance of delivery" in out
    path.write_text("zone,network,daypart,week,spots_aired,impressions\nx,y,z,1,1,1\n")
    code, _, err = _cli(capsys, "rebalance", folder, "small-comfortable", "--actuals", path)
    assert code == 2 and "actuals.csv" in err and "row 1" in err  # 1-based data rows, as the scenario's files


@pytest.mark.slow
def test_demo_book_stress_agrees_with_the_allocator_and_the_exact_sampler(demo_fitted, scenario_copy):
    """On the demo book: each deal's MC chance of shortfall is the allocator's own normal
    figure (1 - chance of delivery of the committed plan; same uncertainty model), and the fast
    sampler agrees with the exact one (every factor, Binomial preemptions, airing noise)."""
    from planner.forecast_job import ensure_forecast
    from planner.scenario import load_scenario

    folder = scenario_copy(demo_fitted)
    scn = load_scenario(folder)
    fc = ensure_forecast(scn).table
    plans = {}
    for name in scn.deals:
        r = wf.commit_deal(scn, name, forecast=fc, solver="highs")
        if r.committed:
            plans[name] = r.plan
    assert len(plans) >= 2
    fast = wf.stress_book(scn, draws=100_000, seed=1, forecast=fc)
    for d in fast.deals:
        p_plan = plans[d.deal].probability
        assert d.probability_of_shortfall_normal == pytest.approx(1 - p_plan, abs=1e-6)
        # Monte Carlo error plus the normal approximation of the per-spot part (CLT)
        assert abs(d.probability_of_shortfall - (1 - p_plan)) < 4 * d.probability_of_shortfall_se + 0.01
    exact = wf.stress_book(scn, draws=20_000, seed=2, forecast=fc, method="exact")
    for f, e in zip(fast.deals, exact.deals):
        se = np.hypot(f.probability_of_shortfall_se, e.probability_of_shortfall_se)
        assert abs(f.probability_of_shortfall - e.probability_of_shortfall) < 4 * se + 1e-3
        assert f.sd_delivery == pytest.approx(e.sd_delivery, rel=0.03)


# --------------------------------------------------------------------------- issue 19: bounds

def test_draws_that_cannot_fit_in_memory_are_refused_with_the_limit(monkeypatch):
    """QA finding: --draws 1e12 died with MemoryError (exit 1). The draws kept per deal and
    network are counted first; more than fit in half the memory available is refused, the
    limit named."""
    model = _model([("a", ["n1"], 1.0), ("b", ["n2"], 1.0)])
    with pytest.raises(InputError, match=r"--draws 1,000,000,000,000: .*at most [0-9,]+ draws"):
        st.stress_model(model, draws=10 ** 12)
    monkeypatch.setattr(st, "available_memory", lambda: 64 * 2 ** 20)  # 64 MiB
    limit = st.max_draws(model, keep_draws=True)
    assert 10_000 < limit < 2_000_000
    with pytest.raises(InputError, match=f"at most {limit:,} draws"):
        st.stress_model(model, draws=limit + 1)
    st.stress_model(model, draws=min(limit, 20_000))  # within the limit: runs


def test_preempt_multiplier_keeps_preemption_below_100_percent(tmp_path):
    """QA finding: --preempt-multiplier 100 was accepted (preemption 300%). A multiplier that
    takes any held unit's preemption to 100% or more is refused, naming the largest allowed."""
    scn, _ = make_synthetic(tmp_path / "s", preempt=0.03)
    units = pd.DataFrame(_rows("a", ["n1"], p=0.03))
    st.apply_shocks(units, (), 30.0)  # 90%: allowed
    with pytest.raises(InputError, match=r"--preempt-multiplier 100: .*300%.*below 33\.3"):
        st.apply_shocks(units, (), 100.0)
    with pytest.raises(InputError, match="--preempt-multiplier"):
        st.apply_shocks(units, (), 1 / 0.03)


def test_billed_cost_sd_of_the_book_hand_worked():
    """Fault caught: the stress test's cost sd not that of spots billed only when they air
    (binomial preemption, common practice), or summed over deals in the wrong place.

    Hand-worked: deal a holds 3 spots at 100 with p = 0.1 and 2 at 50 with p = 0.5:
    var = 3 x 100^2 x 0.1 x 0.9 + 2 x 50^2 x 0.5 x 0.5 = 2,700 + 1,250 = 3,950, sd 62.849...;
    deal b holds 4 spots at 10 with p = 0 (always aired): sd 0."""
    rows = (_rows("a", ["n1"], zones=("z1",), dayparts=("prime",), weeks=[1], spots=3, p=0.1)
            + _rows("a", ["n1"], zones=("z1",), dayparts=("day",), weeks=[1], spots=2, p=0.5)
            + _rows("b", ["n2"], zones=("z1",), dayparts=("prime",), weeks=[1], spots=4, p=0.0))
    units = pd.DataFrame(rows)
    units["rate"] = [100.0, 50.0, 10.0]
    model = st.build_book_model([_deal("a", 1.0), _deal("b", 1.0)], units)
    assert st.billed_cost_sd(model) == pytest.approx([np.sqrt(3950.0), 0.0], rel=1e-12)
    res = st.stress_model(model, draws=1000, seed=0)
    assert [d.cost_sd for d in res.deals] == pytest.approx([np.sqrt(3950.0), 0.0], rel=1e-12)
    assert res.book["cost_sd"] == pytest.approx(np.sqrt(3950.0), rel=1e-12)
