"""Candidate forecasts, their stacking, the widened error law (forecasting.candidates, .stacking,
.pipeline.DaypartForecaster.shift_to_cover).

Each check is against an outside reference (scoringrules, a hand-worked case, the generating
formula of synthetic data); which fault it catches is said beside it.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import scoringrules as sr

from forecasting.candidates import LevelRegression, last_year_scaled, trailing, weekly_grid
from forecasting.dayparts import DaypartSpec
from forecasting.pipeline import DaypartForecaster, season_weight, seasonal_origin
from forecasting.scoring import pooled_level_ratio
from forecasting.stacking import StackedCombiner, crps_normal_mixture


def test_mixture_crps_matches_scoringrules():
    """Closed form of Grimit et al. (2006) against scoringrules' crps_mixnorm (reference library).
    Catches a wrong sign or factor in either term of the mixture CRPS."""
    rng = np.random.default_rng(1)
    n, k = 200, 3
    mu = rng.normal(0, 2, (n, k))
    sd = rng.uniform(0.2, 3, (n, k))
    w = rng.dirichlet(np.ones(k), n)
    y = rng.normal(0, 3, n)
    ours = crps_normal_mixture(y, w, mu, sd)
    ref = sr.crps_mixnorm(y, mu, sd, w, backend="numpy")
    np.testing.assert_allclose(ours, ref, rtol=1e-9, atol=1e-12)


def test_mixture_crps_of_one_component_is_the_gaussian_closed_form():
    """A one-component mixture is N(mu, sd^2): scoringrules' crps_normal (reference library)."""
    y = np.array([0.0, 1.0, -2.5])
    mu = np.array([[0.5], [1.0], [0.0]])
    sd = np.array([[1.0], [0.3], [2.0]])
    np.testing.assert_allclose(crps_normal_mixture(y, np.ones(1), mu, sd),
                               sr.crps_normal(y, mu[:, 0], sd[:, 0], backend="numpy"), rtol=1e-10)


def _rows(rng, n_folds=3, n=600, daypart="prime"):
    """Held-out rows where candidate 'good' is the truth's mean and 'biased' is 30% high."""
    level = rng.lognormal(8, 1, n * n_folds)
    actual = level * rng.lognormal(0, 0.1, level.size)
    return pd.DataFrame({"fold": np.repeat(np.arange(n_folds), n), "daypart": daypart, "actual": actual,
                         "good": level, "biased": level * 1.3 * rng.lognormal(0, 0.3, level.size)})


def test_stacking_puts_the_weight_on_the_candidate_that_is_right():
    """Synthetic rows whose truth is candidate 'good' times noise: the weights must go (almost) all
    to it. Catches weights that ignore the score (equal weights) or maximise it."""
    comb = StackedCombiner(["good", "biased"]).fit(_rows(np.random.default_rng(2)))
    w = comb.weights_.loc["prime"]
    assert w["good"] > 0.85, w
    assert abs(w.sum() - 1.0) < 1e-9
    scores = comb.scores_.loc["prime"]
    assert scores["combined"] <= min(scores["good"], scores["biased"]) + 1e-9


def test_level_ratio_is_impression_weighted_and_robust():
    """Hand-worked: in one refit a tiny unit-week has a ratio of 100 (actual 100, forecast 1) next
    to a big one on target (actual 1,000, forecast 1,000). The unweighted mean ratio would be 50.5;
    the deal-relevant ratio is sum actual / sum forecast = 1,100 / 1,001. With two more refits on
    target the combined ratio is exp(mean(log(1100/1001), 0, 0)); with one refit's worth of prior
    toward 1, exp(log(1100/1001) / 4). Catches an unweighted mean of unit-week ratios (the fault
    that made an 18% over-forecast)."""
    actual = np.array([100.0, 1000.0, 50.0, 50.0])
    forecast = np.array([1.0, 1000.0, 50.0, 50.0])
    fold = np.array([0, 0, 1, 2])
    assert pooled_level_ratio(actual, forecast, fold, prior=0.0) == pytest.approx(np.exp(np.log(1100 / 1001) / 3))
    assert pooled_level_ratio(actual, forecast, fold) == pytest.approx(np.exp(np.log(1100 / 1001) / 4))


def test_level_ratio_weighs_refits_by_season():
    """Hand-worked: a refit of the plan weeks' season (weight 1) saw actual / forecast = 0.9, one half
    a year away (weight 0.02) saw 1.3: exp((log 0.9 + 0.02 log 1.3) / (1.02 + 1)). Catches season
    weights ignored (a winter refit's ratio applied to summer weeks)."""
    r = pooled_level_ratio([90.0, 130.0], [100.0, 100.0], [0, 1], [1.0, 0.02])
    assert r == pytest.approx(np.exp((np.log(0.9) + 0.02 * np.log(1.3)) / 2.02))


def test_season_weight_of_refits():
    """Same weeks a year earlier -> 1; a quarter (91 days) apart -> exp(-1); half a year -> about 0.
    Also the seasonal refit's origin is the plan start less a year and the lead (hand-worked)."""
    assert season_weight(origin=100 - 364 - 20, gap=20, horizon=91, plan_start=100) == pytest.approx(1.0)
    assert season_weight(origin=100 - 91 - 20, gap=20, horizon=91, plan_start=100) == pytest.approx(np.exp(-1))
    assert season_weight(origin=100 - 182 - 20, gap=20, horizon=91, plan_start=100) < 0.02
    assert seasonal_origin(800, 119, 91, 182, [500], 730) == 800 - 364 - 119
    assert seasonal_origin(800, 119, 91, 182, [800 - 364 - 119 + 10], 730) is None  # one already there
    assert seasonal_origin(500, 119, 91, 182, [], 730) is None  # too little training before it


def test_combine_renormalises_over_candidates_that_have_a_forecast():
    """Hand-worked: weights 0.25 / 0.75, ratios 1, candidate B missing in one cell: that cell takes
    A alone; the other cells 0.25 A + 0.75 B."""
    comb = StackedCombiner(["A", "B"])
    comb.weights_ = pd.DataFrame({"A": [0.25], "B": [0.75]}, index=["prime"])
    comb.ratio_ = pd.DataFrame({"A": [1.0], "B": [1.0]}, index=["prime"])
    comb.pooled_weights_ = pd.Series({"A": 0.25, "B": 0.75})
    a = np.array([[[10.0, 10.0]]])
    b = np.array([[[20.0, np.nan]]])
    out = comb.combine({"A": a, "B": b}, ["prime"])
    np.testing.assert_allclose(out[0, 0], [0.25 * 10 + 0.75 * 20, 10.0])


def test_combine_puts_each_candidate_on_its_level_ratio_by_daypart():
    """Hand-worked (DEVELOPERS.md: the shipped mean is sum_k w_k b_k m_k): prime weights 0.4 / 0.6,
    ratios 0.9 / 1.2: 0.4 x 0.9 x 10 + 0.6 x 1.2 x 20 = 3.6 + 14.4 = 18.0; daytime weights 1 / 0,
    ratio 1.1 for A: 11.0; a daypart the fit never saw takes the pooled weights 0.5 / 0.5 and no
    ratio (1): 15.0; with B missing in a prime cell: 0.9 x 10 = 9.0 (A alone, on its ratio)."""
    comb = StackedCombiner(["A", "B"])
    comb.weights_ = pd.DataFrame({"A": [0.4, 1.0], "B": [0.6, 0.0]}, index=["prime", "daytime"])
    comb.ratio_ = pd.DataFrame({"A": [0.9, 1.1], "B": [1.2, 0.8]}, index=["prime", "daytime"])
    comb.pooled_weights_ = pd.Series({"A": 0.5, "B": 0.5})
    a = np.full((1, 3, 2), 10.0)
    b = np.full((1, 3, 2), 20.0)
    b[0, 0, 1] = np.nan
    out = comb.combine({"A": a, "B": b}, ["prime", "daytime", "overnight"])
    np.testing.assert_allclose(out[0], [[18.0, 9.0], [11.0, 11.0], [15.0, 15.0]])


def _grid_from_levels(levels: np.ndarray):
    """A one-daypart weekly grid (means, counts) of given levels (S, n_weeks)."""
    return levels[:, None, :], np.full(levels[:, None, :].shape, 10.0)


def test_last_year_scaled_recovers_a_seasonal_series_with_erosion():
    """Synthetic series: level = seasonal(week of year) x 0.9^(years): last year's same week times
    the pooled year-over-year ratio is exactly right at full strength (generating formula: the
    ratio of two windows a year apart is 0.9 whatever the season), and by default the ratio is
    taken at half strength (x 0.9^0.5). By default last year's week is the mean of it and its two
    neighbours (equal cells), checked against numpy's mean of those three levels. Catches a
    misaligned last-year week, an inverted ratio or an off-centre window."""
    n = 120
    t = np.arange(n + 30)
    season = 1.0 + 0.3 * np.sin(2 * np.pi * t / 52.0)
    level = 0.01 * season * 0.9 ** (t / 52.0)
    grid = _grid_from_levels(np.vstack([level[:n], 2 * level[:n]]))
    gap, W = 4, 13
    truth = level[n + gap:n + gap + W]
    full = last_year_scaled(grid, gap, W, shrink=1.0, smooth_weeks=0)
    np.testing.assert_allclose(full[0, 0], truth, rtol=1e-9)
    np.testing.assert_allclose(full[1, 0], 2 * truth, rtol=1e-9)
    np.testing.assert_allclose(last_year_scaled(grid, gap, W, smooth_weeks=0)[0, 0], truth / 0.9 * 0.9 ** 0.5,
                               rtol=1e-9)
    ly = n + gap + np.arange(W) - 52
    window = np.array([np.mean(level[i - 1:i + 2]) for i in ly])
    ratio = np.sum(level[n - 26:n]) / np.sum(level[n - 26 - 52:n - 52])
    np.testing.assert_allclose(last_year_scaled(grid, gap, W)[0, 0], window * ratio ** 0.5, rtol=1e-9)
    np.testing.assert_allclose(trailing(grid, W, 8)[0, 0], np.mean(level[n - 8:n]), rtol=1e-12)


def test_level_regression_learns_an_erosion_the_trailing_mean_misses():
    """Synthetic panel whose log level falls 25% a year with noise, lead 17 weeks: the trailing mean
    stands about 0.75^((17 + 4 + 6.5)/52) - 1 = -14% off the target weeks; the regression, fitted on
    pseudo-origins of the same history, must land within 4% of the truth on average (generating
    formula). Catches a regression that ignores the lead (no horizon term) or its own smearing."""
    rng = np.random.default_rng(3)
    S, n = 40, 150
    t = np.arange(n + 40)
    base = rng.lognormal(np.log(0.005), 0.5, S)
    levels = base[:, None] * 0.75 ** (t[None, :] / 52.0) * rng.lognormal(0, 0.05, (S, t.size))
    info = pd.DataFrame({"zone": [f"z{i % 4}" for i in range(S)], "network": [f"n{i % 5}" for i in range(S)],
                         "demo": "hh", "genre": "news"})
    grid = _grid_from_levels(levels[:, :n])
    gap, W = 17, 13
    reg = LevelRegression(random_state=0).fit(grid, info, gap, W)
    pred = reg.predict(grid, gap, W)[:, 0, :]
    truth = (base[:, None] * 0.75 ** (t[None, n + gap:n + gap + W] / 52.0))
    bias_reg = pred.sum() / truth.sum() - 1.0
    bias_trail = trailing(grid, W, 8)[:, 0, :].sum() / truth.sum() - 1.0
    assert bias_trail > 0.10  # the fault the candidate exists for
    assert abs(bias_reg) < 0.04, bias_reg


def test_weekly_grid_ends_at_the_origin():
    """A cube whose day d holds d: the last week of the grid is the mean of days origin-7..origin-1
    (hand-worked). Catches an off-by-one week that would leak the target into the features."""
    S, T = 1, 70
    values = np.broadcast_to(np.arange(T, dtype=float)[None, :, None], (S, T, 96)).copy()
    dp = [DaypartSpec("all", tuple(range(7)), tuple(range(96)))]
    means, counts = weekly_grid(values, 0, 40, dp)
    assert means.shape == (1, 1, 5)
    assert means[0, 0, -1] == pytest.approx(np.mean(np.arange(33, 40)))


def test_shift_to_cover_hand_worked():
    """Three refits missing +10%, -10%, +10% with law sds of 5%: mean z^2 = 4. The shared shift
    variance v with mean(b^2 / (s^2 + v (1 + 1/2))) = 1 is (0.01 - 0.0025) / 1.5 = 0.005.
    Catches a widening that is skipped or solved for the wrong target."""
    totals = {d: {"bias": b, "bias_sd": 0.05} for d, b in zip("abc", (0.1, -0.1, 0.1))}
    assert DaypartForecaster.shift_to_cover(totals, 3) == pytest.approx(0.005, rel=1e-6)
    calm = {d: {"bias": 0.01, "bias_sd": 0.05} for d in "abc"}
    assert DaypartForecaster.shift_to_cover(calm, 3) == 0.0


def test_stacking_weights_minimise_the_mixture_crps():
    """The weights `_simplex_weights` returns score at least as well as every point of a 0.05 grid
    over the 3-candidate simplex, each scored by scoringrules' crps_mixnorm (reference library).
    Catches a wrong quadratic form of the mean mixture CRPS or a solver stopped early."""
    from forecasting.stacking import _simplex_weights

    rng = np.random.default_rng(5)
    n = 400
    y = rng.lognormal(3, 0.5, n)
    mu = np.column_stack([y * rng.lognormal(0, s, n) for s in (0.1, 0.2, 0.3)]) * [1.0, 1.1, 0.9]
    sd = mu * [0.12, 0.2, 0.3]
    w = _simplex_weights(y, mu, sd)

    def score(v):
        return float(np.mean(sr.crps_mixnorm(y, mu, sd, np.broadcast_to(v, mu.shape), backend="numpy")))

    grid = [np.array([a, b, 1 - a - b]) for a in np.arange(0, 1.0001, 0.05) for b in np.arange(0, 1.0001 - a, 0.05)]
    assert score(w) <= min(score(g) for g in grid) + 1e-9


def test_disagreement_is_the_weighted_variance_of_the_candidates_log_totals():
    """Hand-worked case against numpy's weighted variance (`np.cov(..., aweights=w, ddof=0)`):
    two series x two dayparts x two weeks; candidate B has no forecast in one cell, so that cell
    leaves every candidate's total; ratios scale each candidate per daypart; sizes weigh series.
    Catches totals over cells some candidate lacks, ratios or sizes ignored, unweighted variance."""
    comb = StackedCombiner(["A", "B", "C"])
    comb.usable_ = ["A", "B", "C"]
    comb.pooled_weights_ = pd.Series({"A": 0.5, "B": 0.3, "C": 0.2})
    comb.ratio_ = pd.DataFrame({"A": [1.0, 1.0], "B": [1.1, 0.9], "C": [1.0, 1.2]}, index=["day", "prime"])
    rng = np.random.default_rng(4)
    f = {k: rng.uniform(1.0, 3.0, (2, 2, 2)) for k in "ABC"}
    f["B"][1, 0, 1] = np.nan
    size = np.array([100.0, 300.0])
    keep = np.ones((2, 2, 2), bool)
    keep[1, 0, 1] = False
    ratio = {"A": [1.0, 1.0], "B": [1.1, 0.9], "C": [1.0, 1.2]}
    totals = []
    for k in "ABC":  # hand-written loop over the cells
        t = 0.0
        for s in range(2):
            for p in range(2):
                for w in range(2):
                    if keep[s, p, w]:
                        t += f[k][s, p, w] * ratio[k][p] * size[s]
        totals.append(t)
    want = float(np.cov(np.log(totals), aweights=[0.5, 0.3, 0.2], ddof=0))
    assert comb.disagreement(f, ["day", "prime"], size) == pytest.approx(want, rel=1e-12)
    assert want > 0
    # candidates that agree on the total: no disagreement
    same = {k: f["A"] for k in "ABC"}
    comb.ratio_ = pd.DataFrame({k: [1.0, 1.0] for k in "ABC"}, index=["day", "prime"])
    assert comb.disagreement(same, ["day", "prime"], size) == pytest.approx(0.0, abs=1e-15)


def test_prior_weights_are_inverse_variance_among_the_prior_candidates():
    """Hand-worked: prior 0.5 / 0.5 on A and B, held-out spreads 0.2 and 0.4: w0 = (0.5 / 0.04,
    0.5 / 0.16) normalised = (0.8, 0.2) (Bates & Granger 1969); fitted weights (0, 1) from one
    refit pulled by one refit's worth: (0.4, 0.6). Catches a prior that ignores the spreads or
    weighs by sd instead of variance."""
    comb = StackedCombiner(["A", "B"], prior_weights={"A": 0.5, "B": 0.5}, ratio_prior=1.0)
    rows = pd.DataFrame({"fold": [0, 0]})
    w = comb._toward_prior(pd.Series({"A": 0.0, "B": 1.0}), rows, pd.Series({"A": 0.2, "B": 0.4}))
    np.testing.assert_allclose(w[["A", "B"]].to_numpy(), [0.4, 0.6], rtol=1e-12)


def test_law_scale_hand_worked():
    """`DaypartForecaster.law_scale`: sqrt(the target's mean mixture variance over the refits'
    pooled one), by daypart, within [1/2, 2], 1 where unknown. Hand-worked: refits' (sum, count)
    day (0.4, 10) and (1.2, 10) -> 0.08, prime (0.1, 10) twice -> 0.01; target day 0.02 -> x0.5,
    prime 0.04 -> x2; a target of 0.001 is clipped to x0.5; a daypart with no target unit -> 1.
    Catches an inverted ratio, a missing square root or an unpooled mean."""
    from types import SimpleNamespace

    fc = DaypartForecaster.__new__(DaypartForecaster)
    fc.dayparts_ = [SimpleNamespace(name="day"), SimpleNamespace(name="prime")]
    fc.fold_results_ = [SimpleNamespace(mixture_var=np.array([[0.4, 10.0], [0.1, 10.0]])),
                        SimpleNamespace(mixture_var=np.array([[1.2, 10.0], [0.1, 10.0]]))]
    k = fc.law_scale(np.array([[0.02, 1.0], [0.04, 1.0]]), [0, 1])
    assert k["day"] == pytest.approx(0.5) and k["prime"] == pytest.approx(2.0)
    k = fc.law_scale(np.array([[0.001, 1.0], [0.0, 0.0]]), [0, 1])
    assert k["day"] == pytest.approx(0.5) and k["prime"] == 1.0
    assert fc.law_scale(np.array([[0.02, 1.0], [0.04, 1.0]]), [0])["day"] == pytest.approx(np.sqrt(0.02 / 0.04))


def test_forecast_table_carries_the_disagreement_floor():
    """The plan table's common loading is max(the law's own common sd, the candidates'
    disagreement sd) x mean, one fraction for every unit (DEVELOPERS.md, "Forecast table"):
    hand-worked with a disagreement sd of 0.05 over a law whose own common sd is below it, and of
    0.001 under it. Catches the floor dropped on the way from the law to the table, or added."""
    import sys
    from pathlib import Path
    from types import SimpleNamespace

    sys.path.insert(0, str(Path(__file__).resolve().parent))
    from test_faults import ONE_UNIT_UNIVERSE, one_unit_forecaster
    from test_forecast_uncertainty import _nested_errors

    from forecasting.uncertainty import LevelErrorModel

    fc = one_unit_forecaster(LevelErrorModel().fit(_nested_errors(folds=6, seed=5)), "day", "news")
    fc.fold_results_ = [SimpleNamespace(mixture_var=np.array([[0.4, 10.0]]))]
    fc.plan_mixture_var_ = np.array([[0.04, 1.0]])  # the same mean: scale 1
    own = float(np.sqrt(fc.level_.var_common_))
    assert own < 0.03
    for dis_sd in (0.05, 0.001):
        fc.plan_disagreement_var_ = dis_sd ** 2
        t = fc.forecast_table(ONE_UNIT_UNIVERSE)
        rel = (t["level_sd_common"] / t["mean_impressions"]).to_numpy()
        np.testing.assert_allclose(rel, max(own, dis_sd), rtol=1e-9)


def test_candidate_forecasting_only_unlike_refits_gets_no_weight():
    """Three refits of 600 rows; candidate 'late' has forecasts only in refit 0, whose season weight
    is 0.02 against 0.20 and 0.68 (a third of the rows, but (0.02 + 0.05) / (0.07 + 0.25 + 0.73) =
    6.7% of the plan-like evidence, hand-worked with SEASON_FLOOR 0.05). Weighing it would confine
    the weights to refit 0: it must get none, and 'good' (the truth's mean) nearly all. With the
    season weights swapped (refit 0 the plan-like one) it is usable. Catches the usable share
    counted over rows instead of the evidence."""
    rows = _rows(np.random.default_rng(4))
    rows["late"] = np.where(rows["fold"] == 0, rows["biased"], np.nan)
    rows["season_weight"] = rows["fold"].map({0: 0.02, 1: 0.20, 2: 0.68})
    comb = StackedCombiner(["good", "biased", "late"]).fit(rows)
    assert comb.usable_ == ["good", "biased"]
    assert comb.weights_.loc["prime", "late"] == 0.0 and comb.weights_.loc["prime", "good"] > 0.85
    swapped = rows.assign(season_weight=rows["fold"].map({0: 0.68, 1: 0.20, 2: 0.02}))
    assert StackedCombiner(["good", "biased", "late"]).fit(swapped).usable_ == ["good", "biased", "late"]


def test_naturally_short_series_are_set_apart_hand_worked():
    """Hand-worked: histories 0, 10, 60, 60 (truncated on purpose), 60, 30 weeks at a refit's origin;
    the others' median is 30, so the threshold is min(26, 15) = 15 weeks: the 0- and 10-week series
    are short (a network launched after the origin), the truncated one is already counted as such.
    When every series is young (20 weeks each: threshold min(26, 10)) none is. Catches a launched
    network's errors left among the full-history units' (whose factors they inflated 5-10x)."""
    fc = DaypartForecaster()
    got = fc.naturally_short(np.array([0.0, 10, 60, 60, 60, 30]), np.array([False, False, False, True, False, False]))
    assert got.tolist() == [True, True, False, False, False, False]
    assert not fc.naturally_short(np.full(3, 20.0), np.zeros(3, bool)).any()
