"""Replayed deals (planner.hindcast): the statistics against references, the realised delivery
against the raw history, and the command end to end on a small invented scenario."""
from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from scipy.stats import cramervonmises, norm

from planner.hindcast import (cramer_von_mises, effective_count, reliability_for, replay_deals, shared_scale,
                              summarise)


def test_cramer_von_mises_matches_scipy():
    """Against scipy.stats.cramervonmises (reference library). Catches a wrong plotting position."""
    u = np.random.default_rng(0).beta(2, 3, 57)
    assert cramer_von_mises(u) == pytest.approx(cramervonmises(u, "uniform").statistic, rel=1e-12)


def test_effective_count_of_clustered_outcomes():
    """Hand-worked extremes (Kish 1965): identical z within each of 4 clusters -> rho 1, 4 effective
    outcomes; z independent of the cluster -> close to n. Catches a count that ignores shared shocks."""
    cluster = np.repeat(np.arange(4), 25)
    same = np.repeat([-1.0, 0.5, 2.0, -0.3], 25)
    n_eff, rho = effective_count(same, cluster)
    assert rho == pytest.approx(1.0)
    assert n_eff == pytest.approx(4.0)
    z = np.random.default_rng(1).normal(size=100)
    n_eff, rho = effective_count(z, cluster)
    assert n_eff > 60


def test_shared_scale_recovers_a_doubled_shared_sd():
    """Synthetic deals whose shared level error is twice the law's: the scale that makes the PIT
    uniform is 2. Monte Carlo over 4,000 deals: the Cramer-von Mises minimiser's standard error is
    about 0.03 here (from repeated draws), so |k - 2| < 0.15 fails with negligible probability.
    Catches a scale applied to the wrong part of the variance or inverted."""
    rng = np.random.default_rng(2)
    n = 4000
    q = rng.uniform(1, 4, n) ** 2
    lin = rng.uniform(0.5, 1.5, n) ** 2
    dev = rng.normal(size=n) * 2.0 * np.sqrt(q) + rng.normal(size=n) * np.sqrt(lin)
    deals = pd.DataFrame({"delivered": 100 + dev, "expected": 100.0, "shared_var": q, "other_var": lin})
    assert shared_scale(deals) == pytest.approx(2.0, abs=0.15)


def test_reliability_table_counts_claims_and_outcomes():
    """Hand-made deals: 10 claimed at 95% of which 9 met, 10 at 60% of which 6 met, one origin
    each half. Catches bins that mix claims or count the wrong outcome."""
    deals = pd.DataFrame({
        "origin": ["a"] * 10 + ["b"] * 10,
        "claimed": [0.95] * 10 + [0.6] * 10,
        "met": [True] * 9 + [False] + [True] * 6 + [False] * 4,
        "delivered": 1.0, "expected": 1.0, "sd": 1.0, "shared_var": 0.5, "other_var": 0.5,
        "z": np.r_[np.linspace(-1, 1, 10), np.linspace(-1, 1, 10)]})
    deals["pit"] = norm.cdf(deals["z"])
    s = summarise(deals)
    by = {(b["low"], b["high"]): b for b in s["reliability"]}
    assert by[(0.9, 0.97)]["deals"] == 10 and by[(0.9, 0.97)]["realised"] == pytest.approx(0.9)
    assert by[(0.5, 0.8)]["realised"] == pytest.approx(0.6)
    assert by[(0.8, 0.9)]["deals"] == 0
    assert reliability_for(s, 0.95)["mean_claimed"] == pytest.approx(0.95)
    assert reliability_for(s, 0.85) is None


@pytest.fixture(scope="module")
def fitted_small(small_fitted, fitted_copy, tmp_path_factory):
    """A copy of the session's fitted small scenario (tests/conftest.py) and its fitted model."""
    from planner.forecast_job import ensure_forecast, load_model
    from planner.scenario import load_scenario

    sc = load_scenario(fitted_copy(small_fitted, tmp_path_factory.mktemp("hind") / "small"))
    assert not ensure_forecast(sc).fitted_now  # the session's fit, current in the copy
    return sc, load_model(sc)


def test_heldout_table_actuals_match_the_raw_history(fitted_small):
    """The realised level a replayed deal is delivered from is the unit-week's mean quarter-hour
    rating in the daypart x universe, recomputed here from the history file with pandas alone.
    Catches a week or daypart misalignment between the past forecast and what it is scored on."""
    sc, model = fitted_small
    t = model.heldout_table(0, sc.universes, units=sc.inventory)
    assert len(t) and np.isfinite(t["actual_impressions"]).all()
    hist = pd.read_parquet(sc.history_path)
    hist["date"] = pd.to_datetime(hist["date"])
    first = model.day0_ + pd.Timedelta(days=int(model.folds_[0] + model.gap_days_))
    dp = {d.name: d for d in sc.dayparts}
    for r in t.sample(6, random_state=0).itertuples():
        d = dp[r.daypart]
        start = first + pd.Timedelta(days=7 * (r.week - 1))
        cells = []
        for k in range(7):
            day = start + pd.Timedelta(days=k)
            if day.day_of_week not in d.days:
                continue
            for q in d.quarter_hours:
                cells.append((day + pd.Timedelta(days=q // 96), q % 96))
        key = pd.DataFrame(cells, columns=["date", "quarter_hour"])
        sel = hist[(hist["zone"] == r.zone) & (hist["network"] == r.network) & (hist["demo"] == r.demo)]
        got = sel.merge(key, on=["date", "quarter_hour"])["rating"].astype(float).mean()
        assert r.actual_impressions == pytest.approx(got * r.universe, rel=1e-4)


def test_shipped_common_factor_covers_the_candidates_disagreement(fitted_small):
    """The plan weeks' common factor (the table's level_sd_common over its mean) is at least the
    sd of the candidates' plan totals around the combination, recomputed here from the fitted
    candidates with numpy's weighted variance (`np.cov(aweights=...)`); a replayed refit's table
    the same with that refit's own disagreement. Catches a floor that never reaches the tables."""
    sc, model = fitted_small
    comb = model.combiner_
    names = [d.name for d in model.dayparts_]
    use = [c for c in comb.candidates if c in comb.usable_]
    cands = {"profile": model.plan_raw_mean_, **model.plan_candidates_}
    stack = np.stack([cands[c] for c in use])
    ok = np.all(np.isfinite(stack) & (stack > 0), axis=0)
    ratio = comb.ratio_.loc[names, use].to_numpy(float)  # (P, K)
    totals = [np.nansum(np.where(ok, stack[k] * ratio[None, :, k, None] * model.universe_s_[:, None, None], 0.0))
              for k in range(len(use))]
    want = float(np.cov(np.log(totals), aweights=comb.pooled_weights_[use].to_numpy(float), ddof=0))
    table = model.forecast_table(sc.universes, units=sc.inventory)
    rel = (table["level_sd_common"] / table["mean_impressions"]).to_numpy(float)
    assert want > 0 and np.all(rel >= np.sqrt(want) * (1 - 1e-9))
    held = model.heldout_table(0, sc.universes, units=sc.inventory)
    rel0 = (held["level_sd_common"] / held["mean_impressions"]).to_numpy(float)
    assert np.all(rel0 >= np.sqrt(model.fold_results_[0].disagreement) * (1 - 1e-9))


def test_replayed_deals_keep_their_claims_and_rules(fitted_small):
    """Each replayed plan claims at least the confidence it was planned at (the chance constraint,
    Charnes & Cooper 1959), its expected delivery clears the guarantee, and every origin replays.
    Catches a replay that plans without the risk margin or skips origins."""
    sc, model = fitted_small
    res = replay_deals(sc, model, fractions=(0.5,), confidences=(0.9,), seed=0)
    d = res.deals
    assert d["origin"].nunique() == len(model.folds_)
    conf = d[d["risk"] == "confidence 90%"]
    assert len(conf) and (conf["claimed"] >= 0.9 - 1e-3).all()
    assert (d["expected"] >= d["guarantee"]).all()
    s = res.summary
    assert s["deals"] == len(d) and sum(b["deals"] for b in s["reliability"]) == (d["claimed"] >= 0.5).sum()


@pytest.mark.slow
def test_hindcast_command_json_and_apply(fitted_small):
    """`pledge forecast hindcast --apply --json` writes hindcast.json and widens only the shared
    level sds of the cached table by the applied scale (the airing sd and means unchanged)."""
    from typer.testing import CliRunner

    from planner.cli import app
    from planner.forecast_job import load_forecast

    sc, _ = fitted_small
    before = load_forecast(sc)
    r = CliRunner().invoke(app, ["forecast", "hindcast", str(sc.path), "--apply", "--json"])
    assert r.exit_code == 0, r.output
    out = json.loads(r.stdout)
    after = load_forecast(sc)
    k, f = out["applied_scale"], out["applied_deal_factor"]
    assert k == pytest.approx(out["scale_to_apply"]) and f == pytest.approx(out["deal_factor_to_apply"])
    assert k >= 1.0
    np.testing.assert_allclose(after["level_sd_network"], before["level_sd_network"] * k * f, rtol=1e-9)
    np.testing.assert_allclose(after["level_sd_week"], before["level_sd_week"] * f, rtol=1e-12)
    np.testing.assert_allclose(after["mean_impressions"], before["mean_impressions"] * f, rtol=1e-12)
    assert (sc.path / "forecast" / "hindcast.json").is_file()
    # a hindcast without --apply leaves the table as it is and says what it holds
    r = CliRunner().invoke(app, ["forecast", "hindcast", str(sc.path), "--json"])
    again = json.loads(r.stdout)
    assert (again["applied_scale"], again["applied_deal_factor"]) == pytest.approx((k, f))
    np.testing.assert_allclose(load_forecast(sc)["mean_impressions"], after["mean_impressions"], rtol=0)
    # check shows, beside its chance of delivery, what the replays found for claims like it
    r = CliRunner().invoke(app, ["check", str(sc.path), "small-comfortable", "--json"])
    assert r.exit_code == 0, r.output
    got = json.loads(r.stdout)
    b = got["hindcast_for_claim"]
    assert b is not None and b["low"] <= got["probability_of_delivery"] < b["high"] + 1e-9


def test_applied_scale_is_shrunk_by_the_evidence_and_never_narrows():
    """Hand-worked: a PIT-uniform scale of 2 from 4 independent outcomes with 4 outcomes' worth of
    prior is applied as exp(log 2 x 4/8) = sqrt 2; from many outcomes it tends to 2; a scale below 1
    is applied as 1. Catches an unshrunk (noisy) or narrowing scale."""
    from planner.hindcast import applied_scale

    assert applied_scale(2.0, 4.0) == pytest.approx(np.sqrt(2.0))
    assert applied_scale(2.0, 4000.0) == pytest.approx(2.0, rel=1e-3)
    assert applied_scale(0.7, 50.0) == 1.0


def test_reliability_bins_take_claims_on_their_lower_edge_and_count_clustered_outcomes_once():
    """Hand-made deals: 4 origins of 10 deals, each origin's z identical (an origin's shared shock
    moves all its deals: rho = 1, so 40 deals are 4 independent outcomes, Kish 1965: design
    effect 10); claims exactly on the bin edges 0.80 (3 per origin), 0.90 (3) and 0.97 (4), lower
    edges inclusive (DEVELOPERS.md). By hand: bins 80-90 and 90-97 hold 12 deals each (1.2
    effective), 97+ holds 16 (1.6), 50-80 none; se = sqrt(c (1 - c) / max(effective, 1)).
    Catches edges taken as exclusive and a count that ignores the shared shocks."""
    claims = np.tile(np.r_[[0.8] * 3, [0.9] * 3, [0.97] * 4], 4)
    origin = np.repeat(["a", "b", "c", "d"], 10)
    z = np.repeat([-1.0, 0.5, 2.0, -0.3], 10)
    deals = pd.DataFrame({"origin": origin, "claimed": claims, "met": z > -0.5, "delivered": 1.0, "expected": 1.0,
                          "sd": 1.0, "shared_var": 0.5, "other_var": 0.5, "z": z, "pit": norm.cdf(z)})
    s = summarise(deals)
    assert s["effective_deals"] == pytest.approx(4.0)
    by = {b["low"]: b for b in s["reliability"]}
    assert by[0.5]["deals"] == 0
    for low, n, claim in ((0.8, 12, 0.8), (0.9, 12, 0.9), (0.97, 16, 0.97)):
        b = by[low]
        assert b["deals"] == n and b["mean_claimed"] == pytest.approx(claim)
        assert b["effective_deals"] == pytest.approx(n / 10)
        assert b["se"] == pytest.approx(np.sqrt(claim * (1 - claim) / max(n / 10, 1.0)))
        assert b["realised"] == pytest.approx(0.75)  # origins a (z -1) short, b, c, d met
    assert reliability_for(s, 0.9)["low"] == 0.9 and reliability_for(s, 0.8)["low"] == 0.8


def test_scale_shared_factors_widens_every_shared_sd_and_recomputes_the_bands():
    """Hand-worked: one unit, mean 1,000, airing sd 50, loadings common 10, network 20,
    network-week 5, flight 8, own week 30; factor 2 doubles the four shared ones (DEVELOPERS.md:
    `--apply` multiplies the common/network/network-week/flight sds), the own week's stays:
    level_sd = sqrt(20^2 + 40^2 + 10^2 + 16^2 + 30^2) = sqrt(3,256); q90 = 1,000 + z(0.90) x
    sqrt(3,256 + 2,500), z(0.90) from scipy. Catches a shared factor left out of the widening."""
    from planner.hindcast import scale_shared_factors

    t = pd.DataFrame({"mean_impressions": [1000.0], "airing_sd": [50.0], "level_sd_common": [10.0],
                      "level_sd_network": [20.0], "level_sd_network_week": [5.0], "level_sd_flight": [8.0],
                      "level_sd_week": [30.0], "level_sd": [0.0], "q10_impressions": [0.0], "q90_impressions": [0.0]})
    r = scale_shared_factors(t, 2.0).iloc[0]
    for col, want in (("level_sd_common", 20.0), ("level_sd_network", 40.0), ("level_sd_network_week", 10.0),
                      ("level_sd_flight", 16.0), ("level_sd_week", 30.0), ("airing_sd", 50.0)):
        assert r[col] == pytest.approx(want), col
    assert r["level_sd"] == pytest.approx(np.sqrt(3256.0))
    assert r["q90_impressions"] == pytest.approx(1000.0 + norm.ppf(0.9) * np.sqrt(3256.0 + 2500.0))
    assert r["q10_impressions"] == pytest.approx(1000.0 - norm.ppf(0.9) * np.sqrt(3256.0 + 2500.0))
    assert t["level_sd_common"].iloc[0] == 10.0  # a copy: the caller's table unchanged


def test_selection_gap_hand_worked_and_shrunk_by_its_noise():
    """Hand-worked: origin o1 (its units missed +10%) has plans at 1.045 and 1.056 of expected, so
    -5% and -4% beyond their units; o2 (units -5%) 0.9025: -5%; o3 (units 0) 0.96: -4%. Per-origin
    means -4.5%, -5%, -4%: gap -4.5%, se = sd 0.5% / sqrt 3 = 0.2887%; factor
    1 - 0.045 (1 - se^2 / gap^2) = 0.955185. Catches the units' own miss left in (the gap would be
    the origins' shocks), the sign flipped, or deals weighed instead of origins."""
    from planner.hindcast import selection_gap

    deals = pd.DataFrame({"origin": ["o1", "o1", "o2", "o3"], "expected": [100.0] * 4,
                          "delivered": [104.5, 105.6, 90.25, 96.0], "units_miss": [0.10, 0.10, -0.05, 0.0]})
    g = selection_gap(deals)
    assert g["gap"] == pytest.approx(-0.045) and g["origins"] == 3
    assert g["se"] == pytest.approx(0.005 / np.sqrt(3))
    assert g["factor"] == pytest.approx(0.955185, abs=1e-6)
    # a gap within one se of zero, or from one origin, is not applied
    noisy = deals.assign(delivered=[104.5, 105.6, 104.5, 90.0])
    assert selection_gap(noisy)["factor"] == 1.0
    assert selection_gap(deals[deals["origin"] == "o1"])["factor"] == 1.0


def test_optimizers_curse_measured_on_a_simulated_selection():
    """Monte Carlo, independent of the replays: 4,000 units with true levels t = 1 and forecasts
    f = t exp(e), e ~ N(0, 0.2^2); a plan buys the half with the highest forecast. Its delivery over
    its expectation, sum t / sum f over the chosen half, against the units' together: the gap
    `selection_gap` reports must equal that ratio. For these units it is E[f] / E[f | e > 0] - 1 =
    1 / (2 Phi(0.2)) - 1 = -13.7% (lognormal partial moment: E[exp(e); e > 0] = exp(0.02) Phi(0.2));
    20 units split at their sample median and 200 origins: mean -13.2%, sd 0.14 points over 40
    seeds (the small split sits 0.5 points nearer 0), so 1.2 points of tolerance fail with negligible
    probability if the gap is right; leaving the units' miss in or flipping the sign fails it."""
    from planner.hindcast import selection_gap

    rng = np.random.default_rng(5)
    rows = []
    for o in range(200):
        f = np.exp(rng.normal(0, 0.2, 20))
        pick = f >= np.median(f)
        rows.append({"origin": o, "expected": f[pick].sum(), "delivered": float(pick.sum()),
                     "units_miss": 20.0 / f.sum() - 1.0})
    g = selection_gap(pd.DataFrame(rows))
    assert g["gap"] == pytest.approx(1.0 / (2 * norm.cdf(0.2)) - 1, abs=0.012)
    assert g["factor"] < 1.0


def test_scale_planned_delivery_scales_means_and_sds_alike():
    """Hand-worked: mean 1,000, airing sd 50, loadings 10/20/5/8/30; factor 0.9: mean 900, every sd
    x 0.9, level_sd = 0.9 sqrt(1,489), q90 = 900 + z(0.90) x 0.9 sqrt(1,489 + 2,500), z from scipy."""
    from planner.hindcast import scale_planned_delivery

    t = pd.DataFrame({"mean_rating": [2.0], "mean_impressions": [1000.0], "airing_sd": [50.0],
                      "level_sd_common": [10.0], "level_sd_network": [20.0], "level_sd_network_week": [5.0],
                      "level_sd_flight": [8.0], "level_sd_week": [30.0], "level_sd": [0.0],
                      "q10_impressions": [0.0], "q90_impressions": [0.0]})
    r = scale_planned_delivery(t, 0.9).iloc[0]
    assert r["mean_impressions"] == pytest.approx(900.0) and r["mean_rating"] == pytest.approx(1.8)
    assert r["level_sd_week"] == pytest.approx(27.0) and r["airing_sd"] == pytest.approx(45.0)
    assert r["level_sd"] == pytest.approx(0.9 * np.sqrt(1489.0))
    assert r["q90_impressions"] == pytest.approx(900.0 + norm.ppf(0.9) * 0.9 * np.sqrt(1489.0 + 2500.0))
    assert t["mean_impressions"].iloc[0] == 1000.0


def test_applied_table_replaces_an_earlier_application():
    """Hand-worked: a table already applied at factor 0.95 and scale 1.2 (mean 950, network sd 19 x
    1.2 = 22.8, week sd 28.5), applied again at factor 0.9 and scale 1.5: mean 900, network sd
    18 x 1.5 = 27, week sd 27 (shared scale does not touch it). Catches the factor left out, or
    applied on top of the earlier one (855)."""
    from planner.hindcast import applied_table

    t = pd.DataFrame({"mean_rating": [1.9], "mean_impressions": [950.0], "airing_sd": [47.5],
                      "level_sd_common": [0.0], "level_sd_network": [22.8], "level_sd_network_week": [0.0],
                      "level_sd_flight": [0.0], "level_sd_week": [28.5], "level_sd": [0.0],
                      "q10_impressions": [0.0], "q90_impressions": [0.0]})
    r = applied_table(t, 0.9, 1.5, previous_factor=0.95, previous_scale=1.2).iloc[0]
    assert r["mean_impressions"] == pytest.approx(900.0)
    assert r["level_sd_network"] == pytest.approx(27.0)
    assert r["level_sd_week"] == pytest.approx(27.0) and r["airing_sd"] == pytest.approx(45.0)
