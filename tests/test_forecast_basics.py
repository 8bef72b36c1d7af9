"""Forecasting building blocks against outside references (scores, PCA, transform, clock, dayparts)."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from forecasting.cyclic import calendar_features, clock_features
from forecasting.dayparts import DaypartSpec, daypart_week_means, daypart_week_sums
from forecasting.profiles import ProfileCube, ProfilePCA
from forecasting.scoring import (central_interval, coverage, coverage_if_calibrated, crps_gaussian, crps_sample,
                                measured_factor_sds,
                                 pit, pit_histogram, wape)
from forecasting.transform import C_RATING, expected_rating, from_log, to_log


# ------------------------------------------------------------------ CRPS
def test_crps_gaussian_closed_form_and_reference_libraries():
    import properscoring
    import scoringrules
    from scipy.stats import norm

    rng = np.random.default_rng(1)
    y = rng.normal(size=200) * 3
    mu = rng.normal(size=200)
    sigma = rng.uniform(0.1, 4, size=200)
    ours = crps_gaussian(y, mu, sigma)
    # Gneiting & Raftery (2007), JASA 102(477), eq. (21), written out independently here.
    z = (y - mu) / sigma
    closed = sigma * (z * (2 * norm.cdf(z) - 1) + 2 * norm.pdf(z) - 1 / np.sqrt(np.pi))
    np.testing.assert_allclose(ours, closed, rtol=1e-12)
    # Reference libraries: scoringrules.crps_normal and properscoring.crps_gaussian.
    np.testing.assert_allclose(ours, scoringrules.crps_normal(y, mu, sigma), rtol=1e-9)
    np.testing.assert_allclose(ours, properscoring.crps_gaussian(y, mu, sigma), rtol=1e-9)
    # Worked value from the closed form at the mean: sigma * (2 phi(0) - 1/sqrt(pi)) = 0.2337 sigma.
    assert crps_gaussian(0.0, 0.0, 1.0)[()] == pytest.approx(2 / np.sqrt(2 * np.pi) - 1 / np.sqrt(np.pi))
    # Zero spread reduces to the absolute error.
    assert crps_gaussian(3.0, 1.0, 0.0)[()] == pytest.approx(2.0)


def test_crps_sample_matches_reference_and_converges_to_gaussian():
    import properscoring
    import scoringrules

    rng = np.random.default_rng(2)
    y = rng.normal(size=20)
    ens = rng.normal(0.3, 1.5, size=(20, 300))
    ours = crps_sample(y, ens)
    np.testing.assert_allclose(ours, properscoring.crps_ensemble(y, ens), rtol=1e-9)
    np.testing.assert_allclose(ours, scoringrules.crps_ensemble(y, ens, estimator="nrg"), rtol=1e-9)
    big = rng.normal(0.3, 1.5, size=(1, 200_000))
    assert crps_sample([0.7], big)[0] == pytest.approx(crps_gaussian(0.7, 0.3, 1.5)[()], rel=0.01)


def test_wape_coverage_pit():
    assert wape([10, 20, 30], [12, 18, 30]) == pytest.approx(4 / 60)
    lo, hi = central_interval(0.0, 1.0, 0.95)
    # Standard normal table (NIST/SEMATECH e-Handbook): z(0.975) = 1.9600.
    assert hi == pytest.approx(1.95996, abs=1e-4) and lo == pytest.approx(-hi)
    rng = np.random.default_rng(3)
    y = rng.normal(2.0, 3.0, size=100_000)
    for lv in (0.5, 0.8, 0.95):
        assert coverage(y, 2.0, 3.0, lv) == pytest.approx(lv, abs=0.01)
    h = pit_histogram(y, 2.0, 3.0)
    assert np.all(np.abs(h - 0.1) < 0.01)
    assert pit(2.0, 2.0, 3.0)[()] == pytest.approx(0.5)



def test_coverage_if_calibrated_is_binomial_for_independent_hits_and_per_group_when_shared():
    """Christoffersen (1998): a calibrated interval's hits are Bernoulli(level), so with
    independent errors the coverage of n observations is Binomial(n, level) / n; when a factor is
    shared by every observation of a group, the group's observations hit or miss together and
    the coverage of G equal groups is Binomial(G, level) / G. Quantiles from scipy.stats.binom."""
    from scipy.stats import binom

    rng = np.random.default_rng(5)
    n, draws = 400, 4000
    sd = rng.uniform(0.05, 0.3, n)  # unequal sds: the interval scales with each one
    sim = coverage_if_calibrated([(sd, None)], (0.5, 0.8, 0.95), draws=draws, seed=1)
    for i, lv in enumerate((0.5, 0.8, 0.95)):
        assert sim[:, i].mean() == pytest.approx(lv, abs=0.003)
        for q in (0.05, 0.95):
            assert np.quantile(sim[:, i], q) == pytest.approx(binom.ppf(q, n, lv) / n, abs=1.5 / n)
    # one shared factor per group of 40, nothing else: 10 independent group draws
    groups = np.repeat(np.arange(10), 40)
    sim = coverage_if_calibrated([(sd, groups)], (0.5, 0.8), draws=draws, seed=2)
    for i, lv in enumerate((0.5, 0.8)):
        vals, counts = np.unique(np.round(sim[:, i] * 10).astype(int), return_counts=True)
        expected = binom.pmf(vals, 10, lv)
        np.testing.assert_allclose(counts / draws, expected, atol=0.02)
    # a shared factor widens the spread beyond the binomial one, and the same seed repeats it
    mixed = [(np.full(n, 0.1), groups), (np.full(n, 0.1), None)]
    a = coverage_if_calibrated(mixed, (0.5,), draws=2000, seed=3)
    np.testing.assert_array_equal(a, coverage_if_calibrated(mixed, (0.5,), draws=2000, seed=3))
    assert a[:, 0].mean() == pytest.approx(0.5, abs=0.01)
    assert a[:, 0].std() > 2 * np.sqrt(0.25 / n)


def _nested_errors(rng, sds, n_net=60, n_unit=84, n_week=13):
    """Relative errors e[n, u, w] = a[n] + g[n, w] + b[n, u] + c[n, u, w] with the given sds."""
    a, g, b, c = sds
    e = (a * rng.standard_normal((n_net, 1, 1)) + g * rng.standard_normal((n_net, 1, n_week))
         + b * rng.standard_normal((n_net, n_unit, 1)) + c * rng.standard_normal((n_net, n_unit, n_week)))
    n, u, w = np.meshgrid(np.arange(n_net), np.arange(n_unit), np.arange(n_week), indexing="ij")
    return e, n.ravel(), u.ravel(), w.ravel()


def test_measured_factor_sds_equal_the_textbook_mean_squares_on_a_balanced_layout():
    """Searle, Casella & McCulloch (1992), ch. 4: in the two-way crossed layout without
    replication, E[MS_residual] = var_c, E[MS_week] = var_c + U var_g, E[MS_unit] = var_c + W var_b;
    the network means (one-way layout on top) have variance var_a + var_g/W + var_b/U + var_c/(UW).
    The estimates are computed here from the balanced array's mean squares (the textbook form),
    and must equal the grouped computation exactly."""
    rng = np.random.default_rng(11)
    e, n, u, w = _nested_errors(rng, (0.1, 0.05, 0.04, 0.07), n_net=8, n_unit=20, n_week=13)
    N, U, W = e.shape
    m_n = e.mean(axis=(1, 2), keepdims=True)
    m_nw = e.mean(axis=1, keepdims=True)
    m_nu = e.mean(axis=2, keepdims=True)
    ms_res = np.sum((e - m_nw - m_nu + m_n) ** 2) / (N * (U - 1) * (W - 1))
    ms_week = U * np.sum((m_nw - m_n) ** 2) / (N * (W - 1))
    ms_unit = W * np.sum((m_nu - m_n) ** 2) / (N * (U - 1))
    var_a = np.var(m_n.ravel(), ddof=1) - ((ms_week - ms_res) / U / W + (ms_unit - ms_res) / W / U + ms_res / (U * W))
    expected = {"network": np.sqrt(var_a), "network_week": np.sqrt((ms_week - ms_res) / U),
                "flight": np.sqrt((ms_unit - ms_res) / W), "week": np.sqrt(ms_res)}
    got = measured_factor_sds(e.ravel(), n, w, u)
    for k, v in expected.items():
        assert got[k] == pytest.approx(v, rel=1e-9), k


def test_measured_factor_sds_recover_known_factor_sds():
    """Simulated nested errors with known sds: 60 networks x 84 units x 13 weeks (about 5% of
    the network draws' sampling error in the network sd, less for the others), then with 10% of
    the unit-weeks dropped at random (the balanced expected mean squares still hold closely).
    A shift added to every row is not a factor of one block and changes nothing."""
    rng = np.random.default_rng(12)
    true = {"network": 0.10, "network_week": 0.05, "flight": 0.04, "week": 0.07}
    e, n, u, w = _nested_errors(rng, tuple(true.values()))
    got = measured_factor_sds(e.ravel(), n, w, u)
    for k, v in true.items():
        assert got[k] == pytest.approx(v, rel=0.25 if k == "network" else 0.06), k
    shifted = measured_factor_sds(e.ravel() + 0.3, n, w, u)
    for k in true:
        assert shifted[k] == pytest.approx(got[k], rel=1e-9)
    keep = rng.random(e.size) > 0.1
    dropped = measured_factor_sds(e.ravel()[keep], n[keep], w[keep], u[keep])
    for k, v in true.items():
        assert dropped[k] == pytest.approx(v, rel=0.25 if k == "network" else 0.08), k
    # no network-week factor at all: its estimate is near zero, not the own factor's size
    e0, n0, u0, w0 = _nested_errors(rng, (0.1, 0.0, 0.04, 0.07))
    assert measured_factor_sds(e0.ravel(), n0, w0, u0)["network_week"] < 0.012


# ------------------------------------------------------------------ transform and clock
def test_log_coordinate_round_trips_exactly():
    r = np.array([0.0, 1e-9, 1e-6, 3e-5, 1e-4, 0.0042, 0.01, 0.2, 1.0])
    back = from_log(to_log(r))
    np.testing.assert_allclose(back, r, rtol=1e-12, atol=1e-18)
    assert to_log(0.0) == 0.0
    assert to_log(C_RATING) == pytest.approx(np.log10(2.0))
    # Mean of the inverse, not the inverse of the mean (Duan 1983): with e ~ N(0, s^2) in log10
    # units, E[10^e] = exp((s ln 10)^2 / 2).
    s = 0.1
    smear = np.exp((s * np.log(10)) ** 2 / 2)
    rng = np.random.default_rng(4)
    y = 1.5 + rng.normal(0, s, 400_000)
    assert expected_rating(1.5, smear) == pytest.approx(from_log(y).mean(), rel=0.005)


def test_clock_encoding_neighbours():
    f = clock_features(np.arange(96))
    step = np.linalg.norm(f[1] - f[0])
    # 23:45 (95) and 00:00 (0) are as close as any two neighbouring quarter-hours ...
    assert np.linalg.norm(f[95] - f[0]) == pytest.approx(step)
    # ... while 00:00 and 12:00 are opposite on the circle.
    assert np.linalg.norm(f[48] - f[0]) == pytest.approx(2.0)
    np.testing.assert_allclose(np.linalg.norm(f, axis=1), 1.0)
    cal = calendar_features(pd.to_datetime(["2026-12-31", "2027-01-01", "2027-01-03", "2027-01-04"]))
    # New Year's Eve next to New Year's Day; Sunday (2027-01-03) next to Monday (2027-01-04).
    d_year = np.hypot(*(cal.loc[0, ["doy_sin", "doy_cos"]] - cal.loc[1, ["doy_sin", "doy_cos"]]))
    assert d_year < 0.03
    d_week = np.hypot(*(cal.loc[2, ["dow_sin", "dow_cos"]] - cal.loc[3, ["dow_sin", "dow_cos"]]))
    assert d_week == pytest.approx(2 * np.sin(np.pi / 7))
    assert cal["weekend"].tolist() == [0.0, 0.0, 1.0, 0.0]


# ------------------------------------------------------------------ PCA
def test_pca_matches_sklearn_and_svd():
    from sklearn.decomposition import PCA

    rng = np.random.default_rng(5)
    basis = rng.normal(size=(4, 96))
    Y = rng.normal(size=(500, 4)) * [5, 3, 2, 1] @ basis + rng.normal(0, 0.1, (500, 96)) + 2.0
    ours = ProfilePCA(n_components=4).fit(Y)
    ref = PCA(n_components=4, svd_solver="full").fit(Y)
    # scikit-learn PCA: same axes up to sign, same explained variance.
    signs = np.sign(np.sum(ours.components_ * ref.components_, axis=1))
    np.testing.assert_allclose(ours.components_, ref.components_ * signs[:, None], atol=1e-8)
    np.testing.assert_allclose(ours.explained_variance_, ref.explained_variance_, rtol=1e-8)
    np.testing.assert_allclose(ours.explained_variance_ratio_, ref.explained_variance_ratio_, rtol=1e-8)
    # numpy SVD of the centred data: singular values squared / (n - 1) are the variances.
    s = np.linalg.svd(Y - Y.mean(axis=0), compute_uv=False)
    np.testing.assert_allclose(ours.explained_variance_, s[:4] ** 2 / (len(Y) - 1), rtol=1e-8)
    # Reconstruction by the pseudo-inverse: exact for profiles inside the span.
    inside = ours.mean_ + rng.normal(size=(10, 4)) @ ours.components_
    np.testing.assert_allclose(ours.inverse_transform(ours.transform(inside)), inside, atol=1e-9)
    chosen = ProfilePCA(variance_target=0.99).fit(Y)
    assert chosen.components_.shape[0] == 4


# ------------------------------------------------------------------ cube and dayparts
def _profiles_frame(values: np.ndarray, day0: str) -> pd.DataFrame:
    S, D, _ = values.shape
    s, d = np.meshgrid(np.arange(S), np.arange(D), indexing="ij")
    df = pd.DataFrame(values.reshape(S * D, 96), columns=[f"q{k:02d}" for k in range(96)])
    df.insert(0, "date", pd.Timestamp(day0) + pd.to_timedelta(d.ravel(), unit="D"))
    df.insert(0, "demo", "hh")
    df.insert(0, "network", "n1")
    df.insert(0, "zone", [f"z{i}" for i in s.ravel()])
    return df


def test_daypart_wrapping_past_midnight():
    # Day t quarter-hour q holds the value 1000 t + q, so every cell is identifiable.
    D = 15
    vals = (1000.0 * np.arange(D)[:, None] + np.arange(96)[None, :])[None].astype(np.float64)
    cube = ProfileCube.from_profiles(_profiles_frame(vals, "2027-03-01"))  # a Monday
    assert cube.values.shape == (1, D, 96)
    late = DaypartSpec("late", days=(0, 1, 2, 3, 4, 5, 6), quarter_hours=tuple(range(92, 100)))  # 23:00-01:00
    sat = DaypartSpec("sat_late", days=(5,), quarter_hours=tuple(range(92, 100)))
    means, counts = daypart_week_means(cube.values.astype(float), 0, [0, 7], [late, sat])
    # Week 1: start days 0..6; cells (t, 92..95) and (t + 1, 0..3).
    expect = np.mean([1000 * t + q for t in range(7) for q in (92, 93, 94, 95)]
                     + [1000 * (t + 1) + q for t in range(7) for q in (0, 1, 2, 3)])
    assert means[0, 0, 0] == pytest.approx(expect)
    assert counts[0, 0, 0] == 56
    # Saturday start (day 5) takes Sunday's early quarter-hours (day 6), not Saturday's.
    expect_sat = np.mean([5092, 5093, 5094, 5095, 6000, 6001, 6002, 6003])
    assert means[0, 1, 0] == pytest.approx(expect_sat)
    # Week 2's last start day (day 13) wraps onto day 14, the last day of the cube.
    assert counts[0, 0, 1] == 56
    # Past the end of the cube counts as missing, not zero.
    _, c = daypart_week_means(cube.values[:, :14].astype(float), 0, [7], [late])
    assert c[0, 0, 0] == 52
    sums, sq, cnt = daypart_week_sums(cube.values.astype(float), 0, [0], [late], squares=True)
    assert sq[0, 0, 0] == pytest.approx(sum(v * v for v in
                                           [1000 * t + q for t in range(7) for q in (92, 93, 94, 95)]
                                           + [1000 * (t + 1) + q for t in range(7) for q in (0, 1, 2, 3)]))


def test_cube_keeps_gaps_missing():
    vals = np.random.default_rng(6).uniform(0, 0.01, (2, 5, 96))
    df = _profiles_frame(vals, "2027-01-04").drop(index=[3]).reset_index(drop=True)
    df.loc[0, "q10"] = np.nan
    cube = ProfileCube.from_profiles(df)
    assert np.isnan(cube.values[0, 3]).all()
    assert np.isnan(cube.values[0, 0, 10])
    assert cube.values[1, 2, 5] == pytest.approx(vals[1, 2, 5], rel=1e-6)
    assert cube.history_days().tolist() == [4, 5]


def test_backtest_factor_sd_takes_each_block_apart_and_gives_the_law_as_rms():
    """Two blocks of simulated nested errors (30 networks x 24 units x 13 weeks each, known
    sds), the second shifted by 20% as a whole: the measured sds are those of one pooled layout
    with the shift removed (a block's shift is the common factor, one draw per block), and the
    law's are the root mean squares of the rel_sd columns."""
    from forecasting.backtest import factor_sd_measured_and_law

    rng = np.random.default_rng(21)
    frames = []
    for block, shift in ((1, 0.0), (2, 0.2)):
        e, n, u, w = _nested_errors(rng, (0.1, 0.05, 0.04, 0.07), n_net=30, n_unit=24)
        frames.append(pd.DataFrame({
            "block": block, "network": n, "week": w + 1, "zone": u % 6, "daypart": u // 6, "demo": "hh",
            "mean": 1000.0, "actual": 1000.0 * (1.0 + shift) * (1.0 + e.ravel())}))
    scored = pd.concat(frames, ignore_index=True)
    for col, v in (("rel_sd_common", 0.02), ("rel_sd_network", 0.1), ("rel_sd_network_week", 0.05),
                   ("rel_sd_flight", 0.04)):
        scored[col] = v
    scored["rel_sd_week"] = np.where(scored["block"] == 1, 0.06, 0.08)
    res = factor_sd_measured_and_law(scored)
    assert res["common"]["measured"] is None and res["common"]["law"] == pytest.approx(0.02)
    assert res["week"]["law"] == pytest.approx(np.sqrt((0.06 ** 2 + 0.08 ** 2) / 2))
    # the shifted block's errors are (1.2)(1 + e) - 1 around its mean: its factors scale by 1.2
    for k, v in (("network", 0.1), ("network_week", 0.05), ("flight", 0.04), ("week", 0.07)):
        assert res[k]["measured"] == pytest.approx(v * np.sqrt((1 + 1.2 ** 2) / 2), rel=0.25 if k == "network" else 0.08), k


def test_backtest_calibrated_range_shares_each_factor_as_the_level_model_does():
    """Each component's factor is shared by the rows its key names (common: per block, every row;
    network: per block, all zones, dayparts, demos, weeks; network-week; flight: zone x network x
    daypart x demo). With a
    single non-zero component the coverage is Binomial(G, level) / G over its G groups
    (Christoffersen 1998; probabilities from scipy.stats.binom)."""
    from scipy.stats import binom

    from forecasting.backtest import COMPONENTS, coverage_range_if_calibrated

    idx = pd.MultiIndex.from_product([[1, 2], ["n1"], ["z1", "z2", "z3"], ["day", "prime"], ["a"], [1, 2, 3, 4]],
                                     names=["block", "network", "zone", "daypart", "demo", "week"])
    base = idx.to_frame(index=False).assign(mean=1.0)
    groups = {"rel_sd_common": 2, "rel_sd_network": 2, "rel_sd_network_week": 8, "rel_sd_flight": 12,
              "rel_sd_week": len(base)}
    for col, g in groups.items():
        frame = base.assign(**{c: (0.1 if c == col else 0.0) for c, _ in COMPONENTS})
        draws = 3000
        res = coverage_range_if_calibrated(frame, {"0.5": 0.5, "0.8": 0.8, "0.95": 0.95}, draws=draws, seed=4)
        lo, hi = res["levels"]["0.8"]["low"], res["levels"]["0.8"]["high"]
        assert lo == pytest.approx(binom.ppf(0.05, g, 0.8) / g, abs=1.01 / g)
        assert hi == pytest.approx(binom.ppf(0.95, g, 0.8) / g, abs=1.01 / g)
        assert res["levels"]["0.5"]["share_as_far"] == 1.0  # the nominal itself is never "far"
        # equal means: the total bias averages G independent factors of sd 0.1 (Bienaymé)
        assert res["bias_sd"] == pytest.approx(0.1 / np.sqrt(g), rel=1e-12)
    # share within 5 points at every level: with the network factor alone (2 groups) a draw's
    # coverage is 0, 1/2 or 1 at each level, so it is within 5 points of 50% only at 1/2, and of
    # 80% or 95% never
    frame = base.assign(**{c: (0.1 if c == "rel_sd_network" else 0.0) for c, _ in COMPONENTS})
    assert coverage_range_if_calibrated(frame, draws=500)["share_within"] == 0.0
    # 192 independent rows: the 50% level alone is within 5 points with the binomial probability
    # (0.83; its sd is 3.6 points); all three levels at once cannot be more likely
    frame = base.assign(**{c: (0.1 if c == "rel_sd_week" else 0.0) for c, _ in COMPONENTS})
    within = coverage_range_if_calibrated(frame, draws=3000)["share_within"]
    p50 = binom.cdf(np.floor(0.55 * 192), 192, 0.5) - binom.cdf(np.ceil(0.45 * 192) - 1, 192, 0.5)
    assert within <= p50 + 0.02
    # unequal means and all five components: the exact bias sd against a direct simulation of
    # sum_i mean_i e_i / sum_i mean_i with each factor shared by its groups
    rng = np.random.default_rng(8)
    frame = base.assign(mean=rng.uniform(1, 50, len(base)), rel_sd_common=0.04, rel_sd_network=0.08,
                        rel_sd_network_week=0.05,
                        rel_sd_flight=rng.uniform(0.02, 0.1, len(base)), rel_sd_week=0.1)
    res = coverage_range_if_calibrated(frame, observed_bias=-0.03)
    w = frame["mean"].to_numpy() / frame["mean"].sum()
    draws = np.zeros(20_000)
    for col, keys in COMPONENTS:
        g = np.arange(len(frame)) if keys is None else frame.groupby(keys).ngroup().to_numpy()
        z = rng.standard_normal((20_000, g.max() + 1))[:, g]
        draws += (z * (w * frame[col].to_numpy())).sum(axis=1)
    assert res["bias_sd"] == pytest.approx(draws.std(), rel=0.02)
    assert res["bias_z"] == pytest.approx(-0.03 / res["bias_sd"])
