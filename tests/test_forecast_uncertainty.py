"""The level-error decomposition on simulated nested random effects with known variances."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from forecasting.uncertainty import LevelErrorModel, airing_cv


def _nested_errors(sd_net=0.08, sd_flight=0.10, sd_week=0.05, folds=6, networks=12, zones=10,
                   dayparts=("day", "prime"), weeks=13, seed=0, sd_nw=0.0):
    rng = np.random.default_rng(seed)
    f, n, z, d, w = np.meshgrid(np.arange(folds), np.arange(networks), np.arange(zones),
                                np.arange(len(dayparts)), np.arange(weeks), indexing="ij")
    f, n, z, d, w = (a.ravel() for a in (f, n, z, d, w))
    a = rng.normal(0, sd_net, (folds, networks))[f, n]
    b = rng.normal(0, sd_flight, (folds, networks, zones, len(dayparts)))[f, n, z, d]
    c = rng.normal(0, sd_week, len(f))
    g = rng.normal(0, sd_nw, (folds, networks, weeks))[f, n, w] if sd_nw > 0 else 0.0
    return pd.DataFrame({
        "fold": f, "zone": [f"z{i}" for i in z], "network": [f"n{i}" for i in n],
        "genre": np.where(n % 2 == 0, "news", "drama"), "daypart": np.array(dayparts)[d], "demo": "hh",
        "week": w + 1, "rel_error": a + b + c + g, "truncated": False, "history_weeks": 60.0,
    })


def test_method_of_moments_recovers_known_components():
    # Nested random-effects ANOVA (Searle, Casella & McCulloch 1992, ch. 3-4): with 72 network
    # draws, 1440 flights and 18720 unit-weeks the sds are recovered to about 15%, 5% and 2%.
    df = _nested_errors()
    m = LevelErrorModel().fit(df)
    k = m.scale_  # the quantile-matching factor is ~1 for normal errors
    assert k == pytest.approx(1.0, abs=0.06)
    assert np.sqrt(m.var_network_) / k == pytest.approx(0.08, rel=0.2)
    for dp in ("day", "prime"):
        assert np.sqrt(m.var_flight_daypart_[dp]) / k == pytest.approx(0.10, rel=0.08)
        assert np.sqrt(m.var_week_daypart_[dp]) / k == pytest.approx(0.05, rel=0.05)
    sd = m.predict(pd.DataFrame({"daypart": ["day"], "genre": ["news"], "history_weeks": [60.0]}))
    total = np.sqrt(sd["rel_sd_network"] ** 2 + sd["rel_sd_flight"] ** 2 + sd["rel_sd_week"] ** 2)[0]
    assert total == pytest.approx(np.sqrt(0.08**2 + 0.10**2 + 0.05**2), rel=0.1)


def test_network_week_component_is_recovered_and_kept_apart():
    # Nested random effects with a network x week factor (Searle, Casella & McCulloch 1992,
    # ch. 4, method of moments): 936 network-weeks of 20 flights each; sds recovered to ~10%.
    df = _nested_errors(sd_nw=0.06, seed=5)
    m = LevelErrorModel().fit(df)
    k = m.scale_
    assert np.sqrt(m.var_network_week_) / k == pytest.approx(0.06, rel=0.1)
    assert np.sqrt(m.var_network_) / k == pytest.approx(0.08, rel=0.25)
    for dp in ("day", "prime"):
        assert np.sqrt(m.var_week_daypart_[dp]) / k == pytest.approx(0.05, rel=0.1)
        assert np.sqrt(m.var_flight_daypart_[dp]) / k == pytest.approx(0.10, rel=0.1)
    sd = m.predict(pd.DataFrame({"daypart": ["day"], "genre": ["news"], "history_weeks": [60.0]}))
    assert sd["rel_sd_network_week"][0] == pytest.approx(np.sqrt(m.var_network_week_))
    # without such a factor the estimate sits near its floor, not at the unit-week level
    m0 = LevelErrorModel().fit(_nested_errors(seed=5))
    assert np.sqrt(m0.var_network_week_) < 0.015


def test_short_history_ratio_from_truncated_series():
    df = _nested_errors(folds=4, seed=1)
    rng = np.random.default_rng(2)
    short = df.sample(frac=0.3, random_state=3).copy()
    short["truncated"] = True
    short["history_weeks"] = 4.0
    # Series seen for 4 weeks err twice as much (variance x 4).
    short["rel_error"] = 2.0 * short["rel_error"] + rng.normal(0, 0.001, len(short))
    m = LevelErrorModel().fit(pd.concat([df, short], ignore_index=True))
    assert m.history_factor([4.0])[0] == pytest.approx(4.0, rel=0.25)
    assert m.history_factor([60.0])[0] == pytest.approx(1.0)
    assert m.history_factor([0.0])[0] >= m.history_factor([4.0])[0]


def test_airing_cv_known_dispersion():
    # Cells with mean 10 and sd 2 (cv 0.2) in every week: the pooled cv is 0.2.
    rng = np.random.default_rng(4)
    cells = rng.normal(10, 2, (3, 2, 40, 200))  # series, daypart, week, cells
    sums, sq = cells.sum(axis=3), (cells**2).sum(axis=3)
    counts = np.full(sums.shape, 200.0)
    cv = airing_cv(sums, sq, counts, np.array([0, 0, 1]))
    np.testing.assert_allclose(cv, 0.2, rtol=0.03)


def _refit_check(df):
    from forecasting.pipeline import DaypartForecaster

    fc = DaypartForecaster()
    fc.day0_ = pd.Timestamp("2025-01-06")
    fc.folds_ = [400 - 28 * j for j in range(df["fold"].nunique())]
    return fc._calibration(df.assign(size=2.0, recent=0.0))


def test_refit_totals_agree_with_the_law_when_errors_follow_it():
    # Errors drawn from the nested law itself: each refit's total misses by about N(0, law sd),
    # so over 4 histories x 8 refits the RMS of the z's is 1 within its sampling error (about
    # 1/sqrt(2 x 32) = 0.125; bounds at ~2 of those) and sum z^2 is about chi-square(8)
    # (scipy.stats.chi2) for each history.
    z, p = [], []
    for seed in (11, 13, 15, 17):
        cal = _refit_check(_nested_errors(folds=8, sd_nw=0.03, seed=seed))
        totals = cal["leave_one_fold_out_total"]
        assert len(totals) == 8 and all(t["bias_sd"] > 0 for t in totals.values())
        z += [t["z"] for t in totals.values()]
        p.append(cal["total_z_p"])
    assert 0.75 < np.sqrt(np.mean(np.square(z))) < 1.25
    assert min(p) > 0.05
    assert cal["total_excess_sd"] < 0.02  # no shared shift beyond the law


def test_common_component_is_carved_out_of_the_network_factor():
    # Nested random effects plus a shift shared by every unit of a refit (Searle, Casella &
    # McCulloch 1992, ch. 3-4, method of moments on the refits' means over networks): the shift's
    # sd is recovered against the sd of the drawn shifts (24 draws) within 15%, and the network
    # factor stays at its own 0.08 instead of absorbing the shift.
    J = 24
    for seed in (1, 2, 3):
        df = _nested_errors(folds=J, sd_nw=0.03, seed=seed)
        shift = np.random.default_rng(seed + 100).normal(0.0, 0.06, J)
        m = LevelErrorModel().fit(df.assign(rel_error=df["rel_error"] + shift[df["fold"]]))
        k = m.scale_
        # the bias correction took out the refits' mean shift: the held-out errors hold 1 - 1/J
        # of its variance, and a forecast's error 1 + 1/J of it
        assert np.sqrt(m.var_common_heldout_ / (1 - 1 / J)) / k == pytest.approx(np.std(shift), rel=0.15)
        assert m.var_common_ == pytest.approx(m.var_common_heldout_ * (1 + 1 / J) / (1 - 1 / J))
        assert np.sqrt(m.var_network_) / k == pytest.approx(0.08, rel=0.15)
        sd = m.predict(pd.DataFrame({"daypart": ["day"], "genre": ["news"], "history_weeks": [60.0]}))
        assert sd["rel_sd_common"][0] == pytest.approx(np.sqrt(m.var_common_))
        # without a shift the common factor is (near) zero and the network factor unchanged
        m0 = LevelErrorModel().fit(df)
        assert np.sqrt(m0.var_common_) < 0.015
        assert np.sqrt(m0.var_network_) / m0.scale_ == pytest.approx(0.08, rel=0.15)


def test_refit_totals_follow_the_law_once_the_shift_is_in_it():
    # The law plus a shift of every unit of a refit (sd 8%). The common factor puts it in the
    # law, so each left-out refit's total misses by about its law sd (the shift's variance
    # estimated from the 7 other refits: z about t-distributed with 6 dof, so RMS z within
    # 0.6-1.6) and the sd the law gives a total now holds the shift (> 0.05, against 0.005-0.05
    # without it).
    df = _nested_errors(folds=8, sd_nw=0.03, seed=11)
    shift = np.random.default_rng(3).normal(0.0, 0.08, 8)
    cal = _refit_check(df.assign(rel_error=df["rel_error"] + shift[df["fold"]]))
    assert 0.6 < cal["total_z_rms"] < 1.6
    assert cal["total_z_p"] > 0.05
    assert all(t["bias_sd"] > 0.05 for t in cal["leave_one_fold_out_total"].values())
    t0 = next(iter(_refit_check(df)["leave_one_fold_out_total"].values()))
    assert 0.005 < t0["bias_sd"] < 0.05


def test_refit_total_check_flags_misses_beyond_the_law():
    # The chi-square test of sum z^2 (Pearson; p-value against scipy.stats.chi2.sf) and the
    # method-of-moments sd of a shift the law leaves out: totals missing by 3 law sds each.
    from scipy.stats import chi2

    from forecasting.pipeline import DaypartForecaster

    totals = {str(j): {"bias": 0.03 * (-1) ** j, "bias_sd": 0.01, "z": 3.0 * (-1) ** j} for j in range(4)}
    out = DaypartForecaster._total_check(totals, 4)
    assert out["total_z_rms"] == pytest.approx(3.0)
    assert out["total_z_p"] == pytest.approx(chi2.sf(36.0, 4))
    # E[bias^2] = bias_sd^2 + var (1 + 1/3): var = (0.0009 - 0.0001) / (4/3)
    assert out["total_excess_sd"] == pytest.approx(np.sqrt(0.0008 * 0.75))


def test_daypart_scale_and_common_floor_of_the_plan_law():
    """`with_daypart_scale` multiplies every relative sd but the common one of a daypart's units and
    leaves the others; `with_common_floor` then raises the common sd to at least the floor (max, not sum); both return
    copies. Hand-worked on a law fitted to nested errors (its own sds as the unscaled reference).
    Catches a scale applied to the wrong daypart or component, a floor added instead of maxed, or
    a fitted law changed in place."""
    df = _nested_errors(folds=12, seed=3)
    shift = np.random.default_rng(7).normal(0.0, 0.06, 12)  # a common factor of its own
    law = LevelErrorModel().fit(df.assign(rel_error=df["rel_error"] + shift[df["fold"]]))
    units = pd.DataFrame({"daypart": ["day", "prime"], "genre": ["news", "news"], "history_weeks": [60.0, 60.0]})
    base = law.predict(units)
    cols = ["rel_sd_network", "rel_sd_network_week", "rel_sd_flight", "rel_sd_week"]
    half = law.with_daypart_scale({"day": 0.5}).predict(units)
    np.testing.assert_allclose(half.loc[0, cols].to_numpy(float), 0.5 * base.loc[0, cols].to_numpy(float))
    np.testing.assert_allclose(half.loc[1, cols].to_numpy(float), base.loc[1, cols].to_numpy(float))
    c = float(base.loc[0, "rel_sd_common"])
    assert c > 0.02  # the case: a common factor the floor must not add to
    assert half.loc[0, "rel_sd_common"] == pytest.approx(c)  # one fraction of every unit's mean (contract)
    for floor_sd in (0.5 * c, 2.0 * c):  # below the law's own: no change; above: the floor
        floored = law.with_daypart_scale({"day": 0.5}).with_common_floor(floor_sd ** 2).predict(units)
        assert floored["rel_sd_common"].to_numpy() == pytest.approx([max(c, floor_sd)] * 2)
    pd.testing.assert_frame_equal(law.predict(units), base)  # the fitted law is unchanged


def test_widen_common_adds_the_shift_as_a_forecast_and_a_held_out_refit_see_it():
    """Hand-worked: a shift s shared by every unit, variance v, independent across refits and the
    plan weeks; the bias correction subtracts the mean of the J refits' shifts. The plan weeks'
    error then holds s_0 - mean(s_1..s_J): variance v (1 + 1/J); a held-out refit's holds
    s_j - mean(s_1..s_J): variance v (1 - 1/J). With v = 0.0016 and J = 4: +0.0020 to the
    forecast's common variance, +0.0012 to the held-out one. Catches a widening without the
    (1 + 1/J) of the mean correction."""
    m = LevelErrorModel().fit(_nested_errors(folds=4, seed=1))
    before, before_heldout = m.var_common_, m.var_common_heldout_
    m.widen_common(0.0016, 4)
    assert m.var_common_ - before == pytest.approx(0.0020, rel=1e-12)
    assert m.var_common_heldout_ - before_heldout == pytest.approx(0.0012, rel=1e-12)
    sd = m.predict(pd.DataFrame({"daypart": ["day"], "genre": ["news"], "history_weeks": [60.0]}))
    assert sd["rel_sd_common"][0] == pytest.approx(np.sqrt(before + 0.0020), rel=1e-12)
