"""Mid-flight rebalance: actuals validation, the Gaussian level-factor update against the textbook
conditional-normal formula, and the re-plan after actuals 20% under forecast."""
from __future__ import annotations

import json
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from planner import book as bk
from planner import posterior as pst
from planner import rebalance as rb
from planner.errors import InputError
from planner import workflows as wf

sys.path.insert(0, str(Path(__file__).resolve().parent))
from test_book import greedy_planner, make_synthetic  # noqa: E402

UNIT = ["zone", "network", "daypart", "week"]


def _actuals_from_holds(holds, fc, weeks, factor):
    """Posted actuals for the held units of `weeks`: every spot aired, delivering `factor` x forecast."""
    h = holds[holds["week"].isin(list(weeks))][UNIT + ["spots"]]
    m = h.merge(fc[fc["demo"] == "a25-54"][UNIT + ["mean_impressions"]], on=UNIT)
    return pd.DataFrame({**{c: m[c] for c in UNIT}, "spots_aired": m["spots"].astype("int64"),
                         "impressions": factor * m["spots"] * m["mean_impressions"]})


def _committed(tmp_path, **kw):
    scn, fc = make_synthetic(tmp_path / "s", **kw)
    planner = wf.plan_for_commit(fc, solver="highs")
    for name in scn.deals:
        assert wf.commit_deal(scn, name, planner=planner).committed, name
    return scn, fc


# --------------------------------------------------------------------------- actuals file

def _write(tmp_path, text):
    p = tmp_path / "actuals.csv"
    p.write_text(text)
    return p


@pytest.mark.parametrize("body,msg", [
    ("zone,network,daypart,week,spots_aired\nz1,net1,prime,1,2\n", "missing column"),
    ("zone,network,daypart,week,spots_aired,impressions\nz1,net1,prime,1,-2,100\n", "row 1: spots_aired"),
    ("zone,network,daypart,week,spots_aired,impressions\nz1,net1,prime,1,2,100\nz1,net1,prime,x,2,100\n",
     "row 2: week"),
    ("zone,network,daypart,week,spots_aired,impressions\nz1,net1,prime,1,2,100\nz1,net1,prime,1,1,50\n",
     "row 2: duplicate unit"),
    ("zone,network,daypart,week,spots_aired,impressions\nz1,net1,prime,1,1.5,100\n", "row 1: spots_aired"),
    ("zone,network,daypart,week,spots_aired,impressions\nz1,net1,prime,1,0,100\n", "0 spots aired"),
    ("zone,network,daypart,week,spots_aired,impressions\nz9,net1,prime,1,2,100\n", "not in the scenario's inventory"),
    ("zone,network,daypart,week,spots_aired,impressions\nz1,net1,prime,99,2,100\n", "not in the scenario's inventory"),
    ("zone,network,daypart,week,spots_aired,impressions\n,net1,prime,1,2,100\n", "row 1: zone is blank"),
    ("zone,network,daypart,week,spots_aired,impressions\n", "no rows"),
])
def test_bad_actuals_name_file_and_row(tmp_path, body, msg):
    scn, _ = make_synthetic(tmp_path / "s")
    p = _write(tmp_path, body)
    with pytest.raises(InputError, match=msg) as e:
        rb.read_actuals(p, scn, scn.deals["alpha"])
    assert str(p) in str(e.value)


def test_actuals_week_outside_the_flight(tmp_path):
    from dataclasses import replace

    scn, _ = make_synthetic(tmp_path / "s")
    deal = replace(scn.deals["alpha"], first_week=3)
    p = _write(tmp_path, "zone,network,daypart,week,spots_aired,impressions\nz1,net1,prime,1,2,100\n")
    with pytest.raises(InputError, match="outside deal"):
        rb.read_actuals(p, scn, deal)


def test_missing_actuals_file(tmp_path):
    with pytest.raises(InputError, match="not found"):
        rb.read_actuals(tmp_path / "nope.csv")


# --------------------------------------------------------------------------- the Gaussian update

@pytest.mark.parametrize("nw,com", [(0.0, 0.0), (0.06, 0.0), (0.06, 0.05)])
def test_level_posterior_matches_the_conditional_normal_formula(nw, com):
    """Precision form vs the textbook conditional of a joint normal (Rasmussen & Williams 2006,
    eq. A.6): E[z|y] = S_zy S_yy^-1 (y - m), Cov[z|y] = I - S_zy S_yy^-1 S_yz, built explicitly.
    With a network-week factor (nw > 0) its covariance enters S_yy entry by entry (same network
    and week), which checks the Woodbury path; with a common factor (com > 0) it is one more
    column of H, loaded by every row."""
    rng = np.random.default_rng(4)
    rows = []
    for z in ("z1", "z2"):
        for n in ("n1", "n2"):
            for d in ("prime", "day"):
                for w in (1, 2, 3):
                    mu = rng.uniform(1000, 5000)
                    rows.append(dict(zone=z, network=n, daypart=d, week=w, spots_aired=int(rng.integers(1, 6)),
                                     mean_impressions=mu, airing_sd=0.3 * mu, level_sd_network=0.1 * mu,
                                     level_sd_flight=0.07 * mu, level_sd_week=0.05 * mu,
                                     level_sd_network_week=nw * mu, level_sd_common=com * mu))
    obs = pd.DataFrame(rows)
    obs["impressions"] = obs["spots_aired"] * obs["mean_impressions"] * rng.uniform(0.7, 1.1, len(obs))
    post = pst.level_posterior(obs)
    # explicit joint covariance of factors z = [networks, flights] and per-spot averages y
    nets = list(post.networks)
    flts = list(post.flights)
    H = np.zeros((len(obs), len(nets) + len(flts) + int(com > 0)))
    for j, r in obs.iterrows():
        H[j, nets.index(r.network)] = r.level_sd_network
        H[j, len(nets) + flts.index((r.zone, r.network, r.daypart))] = r.level_sd_flight
        if com > 0:
            H[j, -1] = r.level_sd_common
    assert post.common == (com > 0)
    R = np.diag(obs.level_sd_week ** 2 + obs.airing_sd ** 2 / obs.spots_aired)
    g = obs.level_sd_network_week.to_numpy()
    same = (obs.network.to_numpy()[:, None] == obs.network.to_numpy()[None, :]) & (
        obs.week.to_numpy()[:, None] == obs.week.to_numpy()[None, :])
    R = R + np.outer(g, g) * same
    S_yy = H @ H.T + R
    y = obs.impressions / obs.spots_aired - obs.mean_impressions
    mean = H.T @ np.linalg.solve(S_yy, y)
    cov = np.eye(H.shape[1]) - H.T @ np.linalg.solve(S_yy, H)
    np.testing.assert_allclose(post.mean, mean, rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(post.cov, cov, rtol=1e-8, atol=1e-10)
    assert (post.mean < 0).sum() >= len(post.mean) - 2  # evidence mostly under forecast


def test_update_moves_unposted_units_of_the_same_network():
    scn_rows = []
    for z in ("z1", "z2"):
        for n in ("n1", "n2"):
            for w in range(1, 9):
                scn_rows.append(dict(zone=z, network=n, daypart="prime", week=w, demo="a", mean_impressions=1000.0,
                                     airing_sd=300.0, level_sd_network=100.0, level_sd_flight=60.0,
                                     level_sd_week=40.0, level_sd=np.sqrt(100 ** 2 + 60 ** 2 + 40 ** 2)))
    fc = pd.DataFrame(scn_rows)
    # only z1/n1 posts, weeks 1-4, 20% under forecast
    posted = fc[(fc.zone == "z1") & (fc.network == "n1") & (fc.week <= 4)].copy()
    posted["spots_aired"] = 10
    posted["impressions"] = 0.8 * 10 * posted["mean_impressions"]
    up = pst.update_forecast(fc, pst.level_posterior(posted))
    later = up[up.week == 6].set_index(["zone", "network"])
    assert later.loc[("z1", "n1"), "mean_impressions"] < later.loc[("z2", "n1"), "mean_impressions"] < 1000.0
    assert later.loc[("z2", "n2"), "mean_impressions"] == pytest.approx(1000.0)  # other network untouched
    assert later.loc[("z1", "n1"), "level_sd"] < fc["level_sd"].iloc[0]  # evidence narrows the band
    assert later.loc[("z2", "n2"), "level_sd"] == pytest.approx(fc["level_sd"].iloc[0])
    # the posted units' posterior level variance is kept exactly (a^2 Vnn + b^2 Vff + 2ab Vnf)
    post = pst.level_posterior(posted)
    v = post.cov
    exact = 100 ** 2 * v[0, 0] + 60 ** 2 * v[1, 1] + 2 * 100 * 60 * v[0, 1] + 40 ** 2
    assert later.loc[("z1", "n1"), "level_sd"] ** 2 == pytest.approx(exact)


def test_common_factor_moves_every_unit_and_keeps_level_variances_exact():
    """With a factor shared by every unit, evidence from one network moves the other network a
    little (through the common factor), and every unit's posterior level variance is the exact
    quadratic form h' V h of its loadings h on [network, flight, common] (plus its own week
    factor), however the parts are split among the table's columns."""
    rows = []
    for z in ("z1", "z2"):
        for n in ("n1", "n2"):
            for w in range(1, 9):
                rows.append(dict(zone=z, network=n, daypart="prime", week=w, demo="a", mean_impressions=1000.0,
                                 airing_sd=300.0, level_sd_network=80.0, level_sd_flight=60.0, level_sd_week=40.0,
                                 level_sd_common=60.0, level_sd=np.sqrt(80 ** 2 + 60 ** 2 + 40 ** 2 + 60 ** 2)))
    fc = pd.DataFrame(rows)
    posted = fc[(fc.network == "n1") & (fc.week <= 4)].copy()
    posted["spots_aired"] = 10
    posted["impressions"] = 0.8 * 10 * posted["mean_impressions"]
    post = pst.level_posterior(posted)
    assert post.common and post.mean[-1] < 0
    up = pst.update_forecast(fc, post)
    later = up[up.week == 6].set_index(["zone", "network"])
    assert later.loc[("z1", "n1"), "mean_impressions"] < later.loc[("z1", "n2"), "mean_impressions"] < 1000.0
    assert later.loc[("z1", "n2"), "level_sd_common"] < 60.0  # the common factor is better known
    V = post.cov
    nets, flts = list(post.networks), list(post.flights)
    for (z, n), r in later.iterrows():
        h = np.zeros(len(V))
        h[-1] = 60.0
        prior = 0.0
        if n in nets:
            h[nets.index(n)] = 80.0
        else:
            prior += 80.0 ** 2
        if (z, n, "prime") in flts:
            h[len(nets) + flts.index((z, n, "prime"))] = 60.0
        else:
            prior += 60.0 ** 2
        assert r["level_sd"] ** 2 == pytest.approx(h @ V @ h + prior + 40.0 ** 2)
        assert r["level_sd"] ** 2 == pytest.approx(r["level_sd_network"] ** 2 + r["level_sd_flight"] ** 2
                                                   + r["level_sd_common"] ** 2 + 40.0 ** 2)



def test_posterior_split_gives_cross_terms_to_the_most_specific_factor():
    """The split of a posted unit's posterior level variance among its columns, worked by hand from
    the module docstring: the flight (most specific) takes b^2 V_ff + 2ab V_nf + 2bu V_fc, the
    network a^2 V_nn + 2au V_nc, the common u^2 V_cc (one spot posted: weak evidence, every part
    positive, none absorbed); V from the posterior, loadings a = 80, b = 60, u = 60 as in the table."""
    rows = [dict(zone=z, network=n, daypart="prime", week=w, demo="a", mean_impressions=1000.0, airing_sd=300.0,
                 level_sd_network=80.0, level_sd_flight=60.0, level_sd_week=40.0, level_sd_common=60.0,
                 level_sd=100.0) for z in ("z1", "z2") for n in ("n1", "n2") for w in range(1, 9)]
    fc = pd.DataFrame(rows)
    posted = fc[(fc.zone == "z1") & (fc.network == "n1") & (fc.week == 1)].copy()
    posted["spots_aired"] = 1
    posted["impressions"] = 0.8 * posted["mean_impressions"]
    post = pst.level_posterior(posted)
    V = post.cov
    n, f = list(post.networks).index("n1"), len(post.networks) + list(post.flights).index(("z1", "n1", "prime"))
    a, b, u = 80.0, 60.0, 60.0
    flt = b * b * V[f, f] + 2 * a * b * V[n, f] + 2 * b * u * V[f, -1]
    net = a * a * V[n, n] + 2 * a * u * V[n, -1]
    com = u * u * V[-1, -1]
    assert min(flt, net, com) > 0 and abs(V[n, f]) > 0.04
    r = pst.update_forecast(fc, post).set_index(["zone", "network", "week"]).loc[("z1", "n1", 6)]
    assert r["level_sd_flight"] ** 2 == pytest.approx(flt, rel=1e-10)
    assert r["level_sd_network"] ** 2 == pytest.approx(net, rel=1e-10)
    assert r["level_sd_common"] ** 2 == pytest.approx(com, rel=1e-10)


# --------------------------------------------------------------------------- the re-plan

def test_more_spots_aired_than_held_is_said(tmp_path):
    scn, fc = _committed(tmp_path, deals=[("alpha", 0.20, 0.95, 22.0)])
    holds = bk.get_deal(scn, "alpha").holds
    acts = _actuals_from_holds(holds, fc, range(1, 3), 1.0)
    r = wf.rebalance_deal(scn, "alpha", acts, forecast=fc, solver="highs")
    assert not any("more spots than the deal holds" in w for w in r.problems + r.warnings)
    acts.loc[acts.index[0], "spots_aired"] += 5
    r = wf.rebalance_deal(scn, "alpha", acts, forecast=fc, solver="highs")
    assert any(w.startswith("1 posted unit-week(s) aired more spots than the deal holds") for w in r.problems)


def test_actuals_20_percent_under_are_caught_up_to_the_deals_confidence(tmp_path):
    scn, fc = _committed(tmp_path, deals=[("alpha", 0.20, 0.95, 22.0)])
    holds = bk.get_deal(scn, "alpha").holds
    acts = _actuals_from_holds(holds, fc, range(1, 5), 0.8)
    r = wf.rebalance_deal(scn, "alpha", acts, forecast=fc, solver="highs")
    assert r.aired_weeks == [1, 2, 3, 4] and r.remaining_weeks == [5, 6, 7, 8]
    assert r.posted_vs_forecast == pytest.approx(-0.2)
    assert r.remaining_guarantee == pytest.approx(scn.deals["alpha"].impressions - acts["impressions"].sum())
    assert r.probability_before < 0.95  # the old holds no longer make it
    assert r.deliverable
    assert r.probability_after >= 0.95 - 1e-6  # back to the deal's confidence
    assert r.added_spots > 0 and r.added_cost > 0
    assert all(s < 0 for s in r.network_shift.values())
    # Reference: the posterior mean of each network factor by the covariance (gain) form of
    # Gaussian conditioning, E[Z | y] = H' (H H' + R)^-1 (y - mu) (e.g. Bishop 2006, eq. 2.81),
    # solved densely here, where the code uses the precision form. Each posted unit-week's mean
    # per aired spot is mu + a_net Z_net + a_flight Z_flight + noise of variance a_week^2 +
    # airing_sd^2 / k (DEVELOPERS.md, "Forecast table"; make_synthetic has no common or
    # network-week factor). In level fractions the change is z x 0.08, make_synthetic's network sd.
    obs = acts.merge(fc[fc["demo"] == "a25-54"], on=UNIT)
    k = obs["spots_aired"].to_numpy(float)
    resid = obs["impressions"].to_numpy(float) / k - obs["mean_impressions"].to_numpy(float)
    nets = sorted(obs["network"].unique())
    flights = sorted(set(zip(obs["zone"], obs["network"], obs["daypart"])))
    H = np.zeros((len(obs), len(nets) + len(flights)))
    for j, row in enumerate(obs.itertuples()):
        H[j, nets.index(row.network)] = row.level_sd_network
        H[j, len(nets) + flights.index((row.zone, row.network, row.daypart))] = row.level_sd_flight
    R = np.diag(obs["level_sd_week"].to_numpy(float) ** 2 + obs["airing_sd"].to_numpy(float) ** 2 / k)
    z_ref = H.T @ np.linalg.solve(H @ H.T + R, resid)
    for i, n in enumerate(nets):
        assert r.network_shift[n] == pytest.approx(z_ref[i], rel=1e-6, abs=1e-9)
        assert r.network_level_change[n] == pytest.approx(z_ref[i] * 0.08, rel=1e-6, abs=1e-9)
    # the evidence lowered the forecast of the remaining weeks: the re-plan used the lowered one
    before = fc[(fc.week > 4)].mean_impressions.sum()
    after = r.forecast[(r.forecast.week > 4)].mean_impressions.sum()
    assert after < before
    assert bk.get_deal(scn, "alpha").spots == int(holds["spots"].sum())  # not committed without --commit


def test_rebalance_commit_replaces_the_remaining_holds(tmp_path):
    scn, fc = _committed(tmp_path, deals=[("alpha", 0.20, 0.95, 22.0), ("beta", 0.2, 0.9, 18.0)])
    holds = bk.get_deal(scn, "alpha").holds
    acts = _actuals_from_holds(holds, fc, range(1, 5), 0.8)
    r = wf.rebalance_deal(scn, "alpha", acts, forecast=fc, solver="highs", commit=True)
    assert r.committed
    new = bk.get_deal(scn, "alpha")
    aired_old = holds[holds.week <= 4].reset_index(drop=True)
    aired_new = new.holds[new.holds.week <= 4].reset_index(drop=True)
    pd.testing.assert_frame_equal(aired_old[UNIT + ["spots"]], aired_new[UNIT + ["spots"]])
    assert int(new.holds[new.holds.week > 4]["spots"].sum()) == r.new_spots
    assert bk.check_book(scn)["over_avails"] == 0
    assert bk.events(scn)["action"].tolist()[-1] == "rebalance"
    beta = bk.get_deal(scn, "beta")  # the other deal's holds are untouched
    assert beta.spots == int(beta.holds["spots"].sum())
    # the stress then counts the posted weeks as delivered and draws only the remaining weeks
    from planner import stress as st

    model, _ = wf.load_book_model(scn, forecast=fc)
    j = model.deals.index("alpha")
    assert model.fixed[j] == pytest.approx(r.delivered) and model.fixed[model.deals.index("beta")] == 0
    rows = model.rows[model.rows["deal"] == "alpha"]
    assert rows["week"].min() == 5
    fast = st.stress_model(model, draws=20_000, seed=1)
    exact = st.stress_model(model, draws=20_000, seed=2, method="exact")
    assert exact.deals[j].expected_delivery == pytest.approx(fast.deals[j].expected_delivery, rel=0.01)
    assert fast.deals[j].expected_delivery == pytest.approx(model.mean[j], rel=0.01)


def test_shortfall_that_cannot_be_closed_is_reported(tmp_path):
    """Another deal then takes every avail left in weeks 5-8: after a 20% shortfall the deal's own
    remaining spots cannot bring it back; the result says by how much."""
    scn, fc = _committed(tmp_path, deals=[("alpha", 0.20, 0.95, 22.0)])
    from planner.scenario import Deal, Mix

    scn.deals["beta"] = Deal(name="beta", advertiser="Invented", demo="a25-54", impressions=1e6, first_week=5,
                             last_week=8, price_cpm=18.0, confidence=0.9, pad=None, mix=Mix(), path=scn.path)
    late = scn.inventory[scn.inventory.week >= 5][UNIT]
    left = int(scn.inventory[scn.inventory.week >= 5]["avails"].sum()) - int(
        bk.held_spots(scn).query("week >= 5")["spots"].sum())
    assert wf.commit_deal(scn, "beta", planner=greedy_planner(left, late)).committed
    holds = bk.get_deal(scn, "alpha").holds
    acts = _actuals_from_holds(holds, fc, range(1, 5), 0.8)
    r = wf.rebalance_deal(scn, "alpha", acts, forecast=fc, solver="highs", commit=True)
    assert not r.deliverable and not r.committed
    assert r.unmet > 0 and r.max_deliverable < r.remaining_guarantee
    assert r.unmet == pytest.approx(r.remaining_guarantee - r.max_deliverable)
    d = r.as_dict()
    assert d["deliverable"] is False and d["unmet"] > 0


def test_rebalance_needs_a_committed_deal(tmp_path):
    scn, fc = make_synthetic(tmp_path / "s")
    acts = pd.DataFrame(columns=UNIT + ["spots_aired", "impressions"])
    with pytest.raises(InputError, match="not in the book"):
        wf.rebalance_deal(scn, "alpha", acts, forecast=fc)


@pytest.mark.slow
def test_update_from_simulated_postings_moves_the_forecast_toward_the_truth(demo_fitted, scenario_copy):
    """Demo book: post weeks 1-4 of a committed plan from the generator's simulated future
    (`scenarios.actuals.posted_actuals`); the updated forecast of the remaining weeks' spots is
    closer to what they then deliver in that simulated future than the prior forecast."""
    from planner.forecast_job import ensure_forecast
    from planner.scenario import load_scenario
    from scenarios.actuals import posted_actuals

    folder = scenario_copy(demo_fitted)
    scn = load_scenario(folder)
    fc = ensure_forecast(scn).table
    name = next(n for n in scn.deals if wf.commit_deal(scn, n, forecast=fc, solver="highs").committed)
    d = bk.get_deal(scn, name)
    spots = d.holds[UNIT + ["spots"]]
    aired = range(d.first_week, d.first_week + 4)
    later = range(d.first_week + 4, d.last_week + 1)
    acts = posted_actuals(scn, spots, d.demo, weeks=aired, seed=0)
    truth = posted_actuals(scn, spots, d.demo, weeks=later, seed=1)
    r = wf.rebalance_deal(scn, name, acts, forecast=fc, solver="highs")
    key = fc["demo"] == d.demo
    f = truth.merge(fc[key][UNIT + ["mean_impressions"]], on=UNIT).merge(
        r.forecast[r.forecast["demo"] == d.demo][UNIT + ["mean_impressions"]].rename(
            columns={"mean_impressions": "posterior"}), on=UNIT)
    prior = float((f["spots_aired"] * f["mean_impressions"]).sum())
    post = float((f["spots_aired"] * f["posterior"]).sum())
    actual = float(f["impressions"].sum())
    assert abs(post - actual) < abs(prior - actual)
    assert r.deliverable or r.unmet > 0


# --------------------------------------------------------------------------- the evidence in the book

def _with_optional_factors(fc):
    """The synthetic forecast with a common and a network-week level factor (both optional columns),
    level_sd kept consistent; invented magnitudes."""
    fc = fc.copy()
    mu = fc["mean_impressions"]
    fc["level_sd_common"] = 0.05 * mu
    fc["level_sd_network_week"] = 0.03 * mu
    fc["level_sd"] = np.sqrt(0.08 ** 2 + 0.06 ** 2 + 0.04 ** 2 + 0.05 ** 2 + 0.03 ** 2) * mu
    return fc


def _committed_on(tmp_path, fc_transform=None, **kw):
    scn, fc = make_synthetic(tmp_path / "s", **kw)
    if fc_transform is not None:
        fc = fc_transform(fc)
    planner = wf.plan_for_commit(fc, solver="highs")
    for name in scn.deals:
        assert wf.commit_deal(scn, name, planner=planner).committed, name
    return scn, fc


@pytest.mark.parametrize("optional", [False, True])
def test_stress_values_a_rebalanced_deal_on_the_rebalances_updated_forecast(tmp_path, optional):
    """QA finding: after `rebalance --commit`, the stress valued the new remaining holds on the
    forecast from before the actuals. Now the book stores the postings and the stress folds them
    in with the same posterior step (`fold_actuals`), so the stress model's mean and sd of the
    deal are the rebalance's own: delivered + expected_remaining and sd_remaining. These are the
    same `DeliveryModel` on the same rows (same forecast, holds, preemption rates), so they agree
    to floating-point rounding (rel 1e-9); the Monte Carlo figures agree within their error."""
    from planner import stress as st
    from planner.delivery import DeliveryModel

    scn, fc = _committed_on(tmp_path, _with_optional_factors if optional else None,
                            deals=[("alpha", 0.20, 0.95, 22.0), ("beta", 0.2, 0.9, 18.0)])
    holds = bk.get_deal(scn, "alpha").holds
    acts = _actuals_from_holds(holds, fc, range(1, 5), 0.8)
    r = wf.rebalance_deal(scn, "alpha", acts, forecast=fc, solver="highs", commit=True)
    assert r.committed and r.posted_vs_forecast == pytest.approx(-0.2)
    assert r.posterior.common == optional
    stored = bk.read_postings(scn, deal="alpha")
    pd.testing.assert_frame_equal(
        stored.drop(columns="deal").reset_index(drop=True),
        acts.astype({"week": "int64"}).sort_values(["week"] + UNIT[:3]).reset_index(drop=True)[stored.columns[1:]],
        check_dtype=False)
    assert bk.get_deal(scn, "alpha").summary["posted_unit_weeks"] == len(acts)

    model, _ = wf.load_book_model(scn, forecast=fc)
    assert model.warnings == []
    j, k = model.deals.index("alpha"), model.deals.index("beta")
    # exact: the same model of the same rows (the bug gave the prior forecast's higher mean here)
    assert model.mean[j] == pytest.approx(r.delivered + r.expected_remaining, rel=1e-9)
    assert np.sqrt(model.variance[j]) == pytest.approx(r.sd_remaining, rel=1e-9)
    booked = bk.get_deal(scn, "alpha")
    assert model.mean[j] == pytest.approx(booked.expected_impressions, rel=1e-9)
    # the other deal keeps the prior forecast (the documented approximation)
    beta = bk.get_deal(scn, "beta")
    u = beta.holds[UNIT + ["spots"]].merge(fc[fc.demo == "a25-54"], on=UNIT).merge(
        scn.inventory[UNIT + ["preempt_rate"]], on=UNIT)
    assert model.mean[k] == pytest.approx(DeliveryModel.from_units(u).mean(u["spots"].to_numpy(float)), rel=1e-9)

    n = 50_000
    res = st.stress_model(model, draws=n, seed=3)
    d = res.deals[j]
    # Monte Carlo: the mean of n draws is within 4 standard errors (sd / sqrt(n)) of the model mean
    assert abs(d.expected_delivery - (r.delivered + r.expected_remaining)) < 4 * r.sd_remaining / np.sqrt(n)
    # sd of n normal draws has relative standard error 1 / sqrt(2 n) (0.3% here); 2% allows for it
    assert d.sd_delivery == pytest.approx(r.sd_remaining, rel=0.02)
    # the chance of shortfall is the rebalance's 1 - chance of delivery (the same normal model),
    # within 4 Monte Carlo standard errors
    assert abs(d.probability_of_shortfall - (1 - r.probability_after)) < 4 * d.probability_of_shortfall_se + 1e-3
    assert d.probability_of_shortfall_normal == pytest.approx(1 - r.probability_after, abs=1e-6)


def test_fold_actuals_on_a_subset_equals_the_whole_table_update(tmp_path):
    """The stress updates only the rebalanced deal's rows; each row's update depends only on its
    own columns and the posterior, so the subset equals the same rows of the whole-table update."""
    scn, fc = _committed_on(tmp_path, _with_optional_factors, deals=[("alpha", 0.20, 0.95, 22.0)])
    acts = _actuals_from_holds(bk.get_deal(scn, "alpha").holds, fc, range(1, 4), 0.85)
    whole = pst.fold_actuals(fc, acts, "a25-54").forecast
    pick = fc[(fc.week >= 4) & (fc.network == "net2")]
    part = pst.fold_actuals(fc, acts, "a25-54", rows=pick).forecast
    pd.testing.assert_frame_equal(part, whole.loc[pick.index])


def test_releasing_a_rebalanced_deal_removes_its_postings(tmp_path):
    scn, fc = _committed_on(tmp_path, deals=[("alpha", 0.20, 0.95, 22.0), ("beta", 0.2, 0.9, 18.0)])
    for name in ("alpha", "beta"):
        acts = _actuals_from_holds(bk.get_deal(scn, name).holds, fc, range(1, 3), 0.9)
        assert wf.rebalance_deal(scn, name, acts, forecast=fc, solver="highs", commit=True).committed
    assert set(bk.read_postings(scn)["deal"]) == {"alpha", "beta"}
    removed = bk.release_deal(scn, "alpha")
    assert len(removed.postings) > 0
    assert set(bk.read_postings(scn)["deal"]) == {"beta"}  # cascade: alpha's went with it
    assert bk.read_postings(scn, deal="alpha").empty
    conn = bk.open_book(bk.book_path(scn))
    assert conn.execute("SELECT COUNT(*) FROM postings WHERE deal = 'alpha'").fetchone()[0] == 0
    conn.close()


def test_a_book_from_before_postings_upgrades_keeps_working_and_cautions(tmp_path):
    """A version-2 book with a rebalanced deal (what pledge wrote before postings were stored):
    opening it upgrades it to the current schema; the stress keeps valuing the deal on the prior
    forecast (today's behaviour) and says so; re-running the rebalance with commit stores the
    postings, and the caution goes."""
    import sqlite3

    from planner import stress as st

    scn, fc = _committed_on(tmp_path, deals=[("alpha", 0.20, 0.95, 22.0), ("beta", 0.2, 0.9, 18.0)])
    acts = _actuals_from_holds(bk.get_deal(scn, "alpha").holds, fc, range(1, 5), 0.8)
    r = wf.rebalance_deal(scn, "alpha", acts, forecast=fc, solver="highs", commit=True)
    assert r.committed
    # make it the book an older pledge would have left: no postings table, schema version 2,
    # and a summary without the posted_unit_weeks key
    path = bk.book_path(scn)
    conn = sqlite3.connect(path)
    conn.execute("DROP TABLE postings")
    conn.execute("ALTER TABLE deals DROP COLUMN terms_json")  # what schema 4 added
    conn.execute("ALTER TABLE events DROP COLUMN user")
    conn.execute("DELETE FROM schema_version WHERE version > 2")
    summary = json.loads(conn.execute("SELECT summary_json FROM deals WHERE name='alpha'").fetchone()[0])
    summary.pop("posted_unit_weeks")
    conn.execute("UPDATE deals SET summary_json = ? WHERE name='alpha'", (json.dumps(summary),))
    conn.commit()
    conn.close()

    model, _ = wf.load_book_model(scn, forecast=fc)
    conn = bk.open_book(path)
    assert bk._schema_version(conn) == bk.SCHEMA_VERSION == 4
    conn.close()
    assert bk.read_postings(scn).empty
    assert len(model.warnings) == 1
    assert "'alpha'" in model.warnings[0] and "before its posted actuals" in model.warnings[0]
    assert "--commit" in model.warnings[0]
    j = model.deals.index("alpha")
    # today's behaviour: the remaining holds on the prior forecast (above the rebalance's figure
    # after a 20% shortfall)
    assert model.mean[j] > r.delivered + r.expected_remaining
    res = st.stress_model(model, draws=2_000, seed=0)
    assert res.warnings == model.warnings and res.as_dict()["warnings"] == model.warnings

    r2 = wf.rebalance_deal(scn, "alpha", acts, forecast=fc, solver="highs", commit=True)
    assert r2.committed and len(bk.read_postings(scn, deal="alpha")) == len(acts)
    model, _ = wf.load_book_model(scn, forecast=fc)
    assert model.warnings == []
    assert model.mean[j] == pytest.approx(r2.delivered + r2.expected_remaining, rel=1e-9)


def test_rebalance_on_no_postings_gives_no_caution(tmp_path):
    """A committed rebalance with no posted unit-weeks has no evidence to store: nothing to warn of."""
    scn, fc = _committed_on(tmp_path, deals=[("alpha", 0.20, 0.95, 22.0)])
    acts = pd.DataFrame({c: pd.Series([], dtype=t) for c, t in zip(
        rb.ACTUALS_COLUMNS, [str, str, str, "int64", "int64", float])})
    r = wf.rebalance_deal(scn, "alpha", acts, forecast=fc, solver="highs", commit=True)
    assert r.committed
    model, _ = wf.load_book_model(scn, forecast=fc)
    assert model.warnings == []


# --------------------------------------------------------------------------- refusing bad postings (issue 19)

def _book_state(scn):
    """What a refused commit must leave untouched: every hold, the event log and the postings."""
    d = bk.get_deal(scn, "alpha")
    return (d.holds[UNIT + ["spots"]].to_dict("records"), len(bk.events(scn)), len(bk.read_postings(scn)))


def _refused(scn, fc, acts, match, **kw):
    before = _book_state(scn)
    with pytest.raises(InputError, match=match) as e:
        wf.rebalance_deal(scn, "alpha", acts, forecast=fc, solver="highs", commit=True, **kw)
    assert _book_state(scn) == before  # nothing written
    return str(e.value)


def test_a_stray_later_week_is_refused_not_counted_as_zero(tmp_path):
    """QA finding: one stray row for a late week made every held unit-week before it count as
    zero delivered, and --commit booked a huge catch-up. Now the commit is refused, naming the
    held unit-weeks without a posted row."""
    scn, fc = _committed(tmp_path, deals=[("alpha", 0.20, 0.95, 22.0)])
    holds = bk.get_deal(scn, "alpha").holds
    acts = _actuals_from_holds(holds, fc, range(1, 3), 1.0)
    stray = _actuals_from_holds(holds, fc, [7], 1.0).head(1)
    msg = _refused(scn, fc, pd.concat([acts, stray], ignore_index=True), "no posted row")
    assert "weeks 3-7" in msg and "--unposted-as-zero" in msg
    # without --commit the answer is given, and the same problem is in it
    r = wf.rebalance_deal(scn, "alpha", pd.concat([acts, stray], ignore_index=True), forecast=fc, solver="highs")
    assert not r.committed and any("no posted row" in p for p in r.problems)


def test_a_missing_week_is_refused_unless_gaps_are_accepted_as_zero(tmp_path):
    scn, fc = _committed(tmp_path, deals=[("alpha", 0.20, 0.95, 22.0)])
    holds = bk.get_deal(scn, "alpha").holds
    acts = _actuals_from_holds(holds, fc, [1, 3], 1.0)  # week 2 missing
    msg = _refused(scn, fc, acts, "no posted row")
    assert "week 2" in msg
    r = wf.rebalance_deal(scn, "alpha", acts, forecast=fc, solver="highs", commit=True, unposted_as_zero=True)
    assert r.committed and r.problems == []
    assert any("counted as 0 delivered" in w for w in r.warnings)  # said, on purpose


def test_more_spots_aired_than_held_is_refused(tmp_path):
    scn, fc = _committed(tmp_path, deals=[("alpha", 0.20, 0.95, 22.0)])
    acts = _actuals_from_holds(bk.get_deal(scn, "alpha").holds, fc, range(1, 3), 1.0)
    acts.loc[acts.index[0], "spots_aired"] += 5
    _refused(scn, fc, acts, "more spots than the deal holds")


def test_a_posting_outside_the_held_plan_is_refused(tmp_path):
    scn, fc = _committed(tmp_path, deals=[("alpha", 0.20, 0.95, 22.0)])
    holds = bk.get_deal(scn, "alpha").holds
    acts = _actuals_from_holds(holds, fc, range(1, 3), 1.0)
    held_keys = set(map(tuple, holds[UNIT].to_numpy().tolist()))
    free = next(r for r in scn.inventory[scn.inventory.week == 1][UNIT].itertuples(index=False)
                if tuple(r) not in held_keys)
    extra = pd.DataFrame([{**free._asdict(), "spots_aired": 1, "impressions": 1000.0}])
    msg = _refused(scn, fc, pd.concat([acts, extra], ignore_index=True), "not in the deal's held plan")
    assert f"row {len(acts) + 1}" in msg  # 1-based data row of the posting


@pytest.mark.parametrize("factor", [1000.0, 10.0])
def test_impressions_far_off_the_forecast_are_refused(tmp_path, factor):
    """QA finding: impressions x1000 ("delivered 30018%") and x10 passed. Both lie far beyond
    6 sds of the forecast's error law, per unit-week and for the deal."""
    scn, fc = _committed(tmp_path, deals=[("alpha", 0.20, 0.95, 22.0)])
    acts = _actuals_from_holds(bk.get_deal(scn, "alpha").holds, fc, range(1, 3), factor)
    msg = _refused(scn, fc, acts, "beyond 6 sds")
    assert "the deal's posted total" in msg


@pytest.mark.parametrize("sds,refused", [(5.9, False), (6.1, True)])
def test_unit_plausibility_threshold_is_six_sds_of_the_stated_error_law(tmp_path, sds, refused):
    """Hand-worked from the data contract's error law of one aired spot (DEVELOPERS.md, Forecast
    table): the mean of k aired spots of a unit-week has sd sqrt(level_sd^2 + airing_sd^2 / k).
    One unit-week posted `sds` of those above its mean, every other one exactly at forecast."""
    scn, fc = _committed(tmp_path, deals=[("alpha", 0.20, 0.95, 22.0)])
    acts = _actuals_from_holds(bk.get_deal(scn, "alpha").holds, fc, range(1, 3), 1.0)
    i = int(acts["spots_aired"].idxmax())
    row = acts.loc[i]
    f = fc[(fc.demo == "a25-54") & (fc.zone == row.zone) & (fc.network == row.network)
           & (fc.daypart == row.daypart) & (fc.week == row.week)].iloc[0]
    k = int(row.spots_aired)
    mu = f.mean_impressions
    level = np.sqrt((0.08 ** 2 + 0.06 ** 2 + 0.04 ** 2)) * mu  # make_synthetic's loadings
    sd = np.sqrt(level ** 2 + (0.35 * mu) ** 2 / k)
    acts.loc[i, "impressions"] = k * (mu + sds * sd)
    r = wf.rebalance_deal(scn, "alpha", acts, forecast=fc, solver="highs")
    assert any("beyond 6 sds" in p for p in r.problems) == refused


def _cli(capsys, *argv):
    from planner.cli import main

    code = main([str(a) for a in argv])
    out = capsys.readouterr()
    return code, out.out, out.err


def test_cli_rebalance_refuses_bad_postings_warns_under_quiet_and_writes_the_order(
        small_scenario, scenario_copy, monkeypatch, capsys):
    """--quiet silences progress only: a posting gap is still said (on stdout, in the answer);
    --commit on it exits 2 and writes nothing; --unposted-as-zero accepts it; --out writes the
    re-planned remaining weeks in the plan CSV's format."""
    from planner.deals import PLAN_COLUMNS
    from planner.scenario import load_scenario
    from test_book import synthetic_forecast, use_forecast

    folder = scenario_copy(small_scenario)
    scn = load_scenario(folder)
    fc = synthetic_forecast(scn)
    use_forecast(monkeypatch, fc)
    deal = "small-comfortable"
    assert _cli(capsys, "book", "commit", folder, deal, "--solver", "highs")[0] == 0
    holds = bk.get_deal(scn, deal).holds
    first = scn.deals[deal].first_week
    a = holds[holds["week"].isin([first, first + 2])][UNIT + ["spots"]].merge(
        fc[fc["demo"] == scn.deals[deal].demo][UNIT + ["mean_impressions"]], on=UNIT)
    acts = a[UNIT].assign(spots_aired=a["spots"], impressions=0.9 * a["spots"] * a["mean_impressions"])
    path = folder / "actuals.csv"
    acts.to_csv(path, index=False)
    before = (bk.get_deal(scn, deal).holds.to_dict("records"), len(bk.events(scn)))
    code, out, err = _cli(capsys, "--quiet", "rebalance", folder, deal, "--actuals", path, "--solver", "highs")
    assert code == 0 and err == ""
    assert f"week {first + 1}" in out and "no posted row" in out and "--commit would be refused" in out
    code, out, err = _cli(capsys, "--quiet", "rebalance", folder, deal, "--actuals", path, "--solver", "highs",
                          "--commit", "--out", folder / "order.csv")
    assert code == 2 and err.startswith(f"error: {path}: ") and "no posted row" in err
    assert "nothing was written" in err and err.count("\n") == 1
    assert (bk.get_deal(scn, deal).holds.to_dict("records"), len(bk.events(scn))) == before
    assert not (folder / "order.csv").exists()
    code, out, _ = _cli(capsys, "rebalance", folder, deal, "--actuals", path, "--solver", "highs", "--commit",
                        "--unposted-as-zero", "--out", folder / "order.csv", "--json")
    r = json.loads(out)
    assert code == 0 and r["committed"] and r["problems"] == []
    assert any("counted as 0 delivered" in w for w in r["warnings"])
    order = pd.read_csv(folder / "order.csv")
    assert list(order.columns) == PLAN_COLUMNS + ["held", "change"]
    assert set(order["deal"]) == {deal} and order["week"].min() == first + 3
    assert int(order["spots"].sum()) == r["new_spots"] and int(order["change"].sum()) == r["added_spots"]
    # the order's spots are what the book now holds in the remaining weeks
    now = bk.get_deal(scn, deal).holds
    assert int(now[now["week"] > first + 2]["spots"].sum()) == int(order["spots"].sum())
