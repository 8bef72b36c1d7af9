"""The drift history family (scenarios.drift), the family dispatch and the worlds registry.

Each knob of the drift generator is checked by its measurable effect on the simulated ratings,
measured here by moments and least squares (numpy), not by the generator's own formulas.
Invented data only.
"""
from __future__ import annotations

import dataclasses
import hashlib
import re
import shutil
from datetime import date, timedelta
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from scipy import stats

from planner.cli import main
from planner.errors import ScenarioError
from planner.scenario import (DRIFT_DEFAULT_LAUNCH_MONTHS, DRIFT_GENERATOR_RULES, load_scenario,
                              validate_history)
from scenarios.drift import (DRIFT_GENRES, DRIFT_KNOBS, DriftSim, DriftSpec, main_peak_hour, simulate_drift,
                             write_drift_history)
from scenarios.worlds import FAMILIES, PLAN_START, make_world, world_truth_levels

QH = 96
# Every drift knob off: the log rating is the network level plus the day shape (and demo ratio).
QUIET = dict(network_shock_sd=0.0, zone_network_shock_sd=0.0, season_amplitude=0.0, erosion_mean=0.0,
             erosion_sd=0.0, launch_months=0, floor=0.0, missing_day_share=0.0, missing_qh_share=0.0,
             peak_jitter_hours=0.0, network_level_sd=0.0, zone_level_sd=0.0, zone_network_level_sd=0.0,
             demo_ratio_sd=0.0, day_noise_sd=0.0, airing_noise_sd=0.0, demo_noise_sd=0.0)
MONDAY = date(2024, 1, 1)  # a Monday: weeks of the simulation are whole calendar weeks


def _spec(*, zones=1, networks=1, demos=("hh",), days=28, genre="news", seed=1, lead_days=0, plan_weeks=0,
          **knobs) -> DriftSpec:
    genres = genre if isinstance(genre, list) else [genre] * networks
    return DriftSpec(zones=[f"z{i}" for i in range(zones)], networks=[f"n{j}" for j in range(len(genres))],
                     genres=genres, demos=list(demos), start=MONDAY, end=MONDAY + timedelta(days=days - 1),
                     seed=seed, lead_days=lead_days, plan_weeks=plan_weeks, **knobs)


def _weekly_log_means(ratings: np.ndarray, weeks: int) -> np.ndarray:
    """Mean log rating per calendar week: (..., days, 96) -> (..., weeks), whole weeks from day 0."""
    x = np.log(ratings[..., : 7 * weeks, :].astype(float))
    return x.reshape(*x.shape[:-2], weeks, 7 * QH).mean(axis=-1)


def _lag1(x: np.ndarray) -> tuple[float, float]:
    """Pooled lag-1 autocorrelation and variance of series x (series, time), each centred on its mean."""
    x = x - x.mean(axis=-1, keepdims=True)
    return float((x[:, 1:] * x[:, :-1]).sum() / (x * x).sum()), float((x * x).mean())


@pytest.fixture(scope="module")
def drift_world(tmp_path_factory):
    return make_world(tmp_path_factory.mktemp("worlds") / "drift", "drift", 3)


@pytest.fixture(scope="module")
def drift_history(drift_world):
    df = pq.read_table(drift_world / "history.parquet").to_pandas()
    df["date"] = pd.to_datetime(df["date"])
    return df


# ----------------------------------------------------------------------------- shocks

def test_network_shock_is_ar1_with_the_knobs_rho_and_sd():
    """Weekly mean log rating of a network (every other knob off) is its shock plus a constant:
    its pooled lag-1 autocorrelation is rho and its variance sd^2, up to the mean-correction bias
    E[r1] ~ rho - (1 + 3 rho)/n (Marriott & Pope 1954, Biometrika 41; from memory) and
    E[s^2] ~ sd^2 (1 - (1 + rho)/((1 - rho) n)) (from memory). Standard errors over N = 20 x 155
    pairs: sqrt((1 - rho^2)/N) = 0.014 for r1 (Bartlett 1946), and for s^2/sd^2
    sqrt(2 (1 + rho^2)/((1 - rho^2) N)) = 0.036; checks at 3 SE."""
    rho, sd, W, n_net = 0.6, 0.1, 156, 20
    spec = _spec(networks=n_net, days=7 * W, **{**QUIET, "network_shock_rho": rho, "network_shock_sd": sd})
    _, r = simulate_drift(spec)
    x = _weekly_log_means(r[0, :, 0], W)  # (networks, weeks)
    r1, var = _lag1(x)
    N = n_net * (W - 1)
    assert abs(r1 - (rho - (1 + 3 * rho) / W)) < 3 * np.sqrt((1 - rho**2) / N)
    expect = sd**2 * (1 - (1 + rho) / ((1 - rho) * W))
    assert abs(var / expect - 1) < 3 * np.sqrt(2 * (1 + rho**2) / ((1 - rho**2) * N))


def test_network_shock_shared_by_zones_and_demos_zone_network_shock_not():
    """The network shock moves every zone and demo together (identical weekly log changes); the
    zone x network shock is an AR(1) of its own rho per zone (pooled r1 within 3 SE, as above) and
    independent between zones (correlation of two zones' shocks within 3/sqrt(n) of 0)."""
    W = 104
    spec = _spec(zones=3, networks=2, demos=("hh", "a25-54"), days=7 * W,
                 **{**QUIET, "network_shock_rho": 0.7, "network_shock_sd": 0.1})
    _, r = simulate_drift(spec)
    x = _weekly_log_means(r, W)  # (zones, networks, demos, weeks)
    moves = x - x[..., :1]  # change since week 0
    assert np.abs(moves - moves[:1, :, :1]).max() < 1e-5
    assert moves[0, :, 0].std() > 0.05  # and it does move

    rho, n_z, n_n = 0.5, 10, 10
    spec = _spec(zones=n_z, networks=n_n, days=7 * W,
                 **{**QUIET, "zone_network_shock_rho": rho, "zone_network_shock_sd": 0.05})
    _, r = simulate_drift(spec)
    x = _weekly_log_means(r[:, :, 0], W)  # (zones, networks, weeks)
    r1, var = _lag1(x.reshape(-1, W))
    N = n_z * n_n * (W - 1)
    assert abs(r1 - (rho - (1 + 3 * rho) / W)) < 3 * np.sqrt((1 - rho**2) / N)
    assert abs(np.sqrt(var) / 0.05 - 1) < 0.1
    c = x - x.mean(axis=-1, keepdims=True)
    corr = (c[0] * c[1]).sum() / np.sqrt((c[0] ** 2).sum() * (c[1] ** 2).sum())  # zone 0 vs zone 1, pooled
    assert abs(corr) < 3 / np.sqrt(n_n * W)


def test_network_shock_runs_on_through_the_plan_weeks():
    """200 networks of one genre (every level equal): across networks, the shock of the first plan
    week correlates with the last history week's at rho (SE (1 - rho^2)/sqrt(200) = 0.025, check at
    4 SE), and the plan weeks' shocks keep the marginal sd (SE sd/sqrt(2 x 800), check at 4 SE).
    A shock frozen, reset or dropped after the history end fails."""
    rho, sd, n_net = 0.8, 0.1, 200
    spec = _spec(networks=n_net, days=28, lead_days=0, plan_weeks=4,
                 **{**QUIET, "network_shock_rho": rho, "network_shock_sd": sd})
    _, r = simulate_drift(spec)
    x = _weekly_log_means(r[0, :, 0], 8)  # 4 history + 4 plan weeks
    x = x - x.mean(axis=0)  # every network has the same level and shape: the rest is its shock
    corr = np.corrcoef(x[:, 3], x[:, 4])[0, 1]
    assert abs(corr - rho) < 4 * (1 - rho**2) / np.sqrt(n_net)
    plan_sd = x[:, 4:].std()
    assert abs(plan_sd / sd - 1) < 4 / np.sqrt(2 * n_net * 4)


# ----------------------------------------------------------------------------- day shape, season, erosion

@pytest.mark.parametrize("genre", ["kids", "sports", "news"])
def test_weekday_and_weekend_peak_hours_as_the_genre_table_says(genre):
    """The hour of the highest mean household rating (three zones, 26 weeks, default noise, no
    jitter) is the genre table's main peak, weekdays and weekends apart, within 0.75 h; the
    weekday and weekend peaks of these genres are hours apart."""
    spec = _spec(zones=3, days=7 * 26, genre=genre, peak_jitter_hours=0.0, launch_months=0)
    dates, r = simulate_drift(spec)
    weekend = pd.DatetimeIndex(dates).day_of_week >= 5
    hh = r[:, 0, 0, : spec.history_days].astype(float)  # (zones, days, 96)
    for we in (False, True):
        prof = hh[:, (weekend[: spec.history_days] == we)].mean(axis=(0, 1))
        hour = (np.argmax(prof) + 0.5) / 4
        assert abs(hour - main_peak_hour(genre, we)) <= 0.75, (we, hour)
    assert abs(main_peak_hour(genre, False) - main_peak_hour(genre, True)) >= 3


def test_season_amplitude_and_a_phase_of_its_own_per_network():
    """Daily mean log rating (every other knob off) fitted by least squares on a weekend dummy and
    one yearly harmonic of calendar time: amplitude = the knob, phase = the network's drawn phase
    (exact up to float32), and the 40 phases are uniform (Kolmogorov-Smirnov p > 0.001)."""
    spec = _spec(networks=40, days=730, **{**QUIET, "season_amplitude": 0.2})
    dates, r = simulate_drift(spec)
    y = np.log(r[0, :, 0].astype(float)).mean(axis=-1)  # (networks, days)
    tau = (pd.DatetimeIndex(dates) - pd.Timestamp("2000-01-01")).days.to_numpy() / 365.25
    X = np.column_stack([np.ones(len(tau)), pd.DatetimeIndex(dates).day_of_week >= 5,
                         np.cos(2 * np.pi * tau), np.sin(2 * np.pi * tau)])
    coef, *_ = np.linalg.lstsq(X, y.T, rcond=None)
    amp = np.hypot(coef[2], coef[3])
    phase = np.arctan2(coef[3], coef[2]) / (2 * np.pi) % 1.0
    assert np.allclose(amp, 0.2, atol=1e-4)
    drawn = DriftSim(spec).season_phase
    assert np.allclose(np.angle(np.exp(2j * np.pi * (phase - drawn))), 0, atol=1e-3)
    assert stats.kstest(phase, "uniform").pvalue > 0.001


def test_erosion_slope_per_network_and_the_spread_of_the_rates():
    """Daily mean log rating (every other knob off) regressed on time in years: the slope of each
    network is log(1 + its drawn yearly rate), and the 60 drawn rates have the knob's mean (3 SE,
    SE = sd/sqrt(60)) and sd (3 SE of a normal sample sd, SE ~ sd/sqrt(2 x 59))."""
    mean, sd, n_net = -0.06, 0.05, 60
    spec = _spec(networks=n_net, days=730, **{**QUIET, "erosion_mean": mean, "erosion_sd": sd})
    dates, r = simulate_drift(spec)
    y = np.log(r[0, :, 0].astype(float)).mean(axis=-1)
    years = np.arange(len(dates)) / 365.25
    X = np.column_stack([np.ones(len(dates)), pd.DatetimeIndex(dates).day_of_week >= 5, years])
    slope = np.linalg.lstsq(X, y.T, rcond=None)[0][2]
    rates = DriftSim(spec).erosion_rate
    assert np.allclose(slope, np.log1p(rates), atol=2e-4)
    assert abs(rates.mean() - mean) < 3 * sd / np.sqrt(n_net)
    assert abs(rates.std(ddof=1) / sd - 1) < 3 / np.sqrt(2 * (n_net - 1))


def test_demo_ratio_by_genre_and_time_of_day():
    """Adult demo over households (noise and ratio jitter off) is the genre's `adult` ratio at
    03:00, lowered by exp(-work_dip) at noon on weekdays and by exp(-0.3 work_dip) at noon on
    weekends (the genre table)."""
    genres = ["news", "kids", "business"]
    spec = _spec(networks=3, genre=genres, demos=("hh", "a25-54"), days=14, **QUIET)
    _, r = simulate_drift(spec)
    ratio = r[0, :, 1].astype(float) / r[0, :, 0]  # (networks, days, 96); day 0 a Monday
    for j, g in enumerate(genres):
        row = DRIFT_GENRES[g]
        assert ratio[j, 0, 12] == pytest.approx(row["adult"], rel=1e-5)                      # Mon 03:00
        assert ratio[j, 0, 48] == pytest.approx(row["adult"] * np.exp(-row["work_dip"]), rel=1e-5)  # Mon 12:00
        assert ratio[j, 5, 48] == pytest.approx(row["adult"] * np.exp(-0.3 * row["work_dip"]), rel=1e-5)  # Sat


def test_zone_and_zone_network_levels_have_the_knobs_sds():
    """Mean log rating per zone x network (60 zones x 20 networks of one genre, every other knob
    off) is network + zone + zone x network: the two-way layout's interaction mean square
    estimates zone_network_level_sd^2 (df 59 x 19, SE of the sd ~ sd/sqrt(2 df), check at 3 SE) and
    the zone means' variance zone_level_sd^2 + zone_network_level_sd^2 / 20 (df 59, check at 3 SE)."""
    zs, zns, Z, N = 0.15, 0.25, 60, 20
    spec = _spec(zones=Z, networks=N, days=7, **{**QUIET, "zone_level_sd": zs, "zone_network_level_sd": zns})
    _, r = simulate_drift(spec)
    L = np.log(r[..., 0, :7, :].astype(float)).mean(axis=(-1, -2))  # (zones, networks)
    resid = L - L.mean(axis=0) - L.mean(axis=1, keepdims=True) + L.mean()
    df = (Z - 1) * (N - 1)
    zn_hat = np.sqrt((resid**2).sum() / df)
    assert abs(zn_hat / zns - 1) < 3 / np.sqrt(2 * df)
    zone_var = L.mean(axis=1).var(ddof=1) - zn_hat**2 / N
    assert abs(np.sqrt(zone_var) / zs - 1) < 3 / np.sqrt(2 * (Z - 1)) + 0.05


def test_day_airing_and_demo_noise_have_the_knobs_sds():
    """Per network, weekday type and quarter-hour, across 56 days (every other knob off): the
    difference of two demos' log ratings has variance 2 demo^2; a day's deviations from its own
    mean over the 96 quarter-hours have variance (airing^2 + demo^2)(1 - 1/96); the daily means
    have variance day^2 + (airing^2 + demo^2)/96. Moment estimates with thousands of df (SE of the
    sds < 2%; the day-noise sd has df ~ 540, SE 3%); checks at 10%."""
    day, air, dem = 0.05, 0.15, 0.08
    spec = _spec(networks=10, demos=("hh", "a25-54"), days=56,
                 **{**QUIET, "day_noise_sd": day, "airing_noise_sd": air, "demo_noise_sd": dem})
    dates, r = simulate_drift(spec)
    x = np.log(r[0].astype(float))  # (networks, demos, days, 96)
    weekend = pd.DatetimeIndex(dates).day_of_week.to_numpy() >= 5

    def within(v, axis_days):  # pooled variance across days within weekday / weekend groups
        parts = [np.compress(weekend == w, v, axis=axis_days) for w in (False, True)]
        ss = sum(((p - p.mean(axis=axis_days, keepdims=True)) ** 2).sum() for p in parts)
        n = sum(p.size for p in parts)
        groups = sum(p.size // p.shape[axis_days] for p in parts)
        return ss / (n - groups)

    d = x[:, 0] - x[:, 1]  # (networks, days, 96)
    assert np.sqrt(within(d, 1) / 2) == pytest.approx(dem, rel=0.1)
    hh = x[:, 0]
    dev = hh - hh.mean(axis=-1, keepdims=True)
    assert np.sqrt(within(dev, 1) / (1 - 1 / QH) - dem**2) == pytest.approx(air, rel=0.1)
    daily = hh.mean(axis=-1)  # (networks, days)
    assert np.sqrt(within(daily, 1) - (air**2 + dem**2) / QH) == pytest.approx(day, rel=0.1)


# ----------------------------------------------------------------------------- floor, gaps, launch, lead

def test_floor_reads_low_ratings_as_zero_and_nothing_else_changes():
    """With the floor no rating lies in (0, floor), some are 0, and every rating above the floor is
    the one drawn without it (the floor changes the reading only); without it none is 0
    (a log-normal rating is never 0)."""
    kw = dict(networks=3, genre=["kids", "news", "music"], demos=("hh", "a25-54"), days=28, launch_months=0)
    _, raw = simulate_drift(_spec(floor=0.0, **kw))
    floor = 1e-4
    _, r = simulate_drift(_spec(floor=floor, **kw))
    assert not ((r > 0) & (r < floor)).any()
    assert (r == 0).mean() > 0.001
    assert (raw > 0).all()
    np.testing.assert_array_equal(r, np.where(raw < np.float32(floor), 0, raw))


def test_missing_days_and_quarter_hours_at_the_knobs_shares(drift_world, drift_history):
    """Whole zone x network days missing (every demo and quarter-hour at once) at the default 2%
    (binomial SE sqrt(p(1-p)/n), n = 4 zones x 4 networks x 490 days, check at 3 SE), quarter-hour
    rows missing on present days at 0.1% (binomial SE, 3 SE). The launched network is left out."""
    defaults = {f.name: f.default for f in dataclasses.fields(DriftSpec)}
    p_day, p_qh = defaults["missing_day_share"], defaults["missing_qh_share"]
    assert (p_day, p_qh) == (0.02, 0.001)
    sc = load_scenario(drift_world)
    launched = sc.network_names[-1]
    h = drift_history[drift_history["network"] != launched]
    days = (sc.history_generator["end"] - sc.history_generator["start"]).days + 1
    present = h.groupby(["zone", "network"])["date"].nunique()
    n = len(present) * days
    share = 1 - present.sum() / n
    assert abs(share - p_day) < 3 * np.sqrt(p_day * (1 - p_day) / n)
    per_demo = h.groupby(["zone", "network", "demo"])["date"].nunique().unstack("demo")
    assert (per_demo["hh"] == per_demo["a25-54"]).all()  # a missing day misses every demo
    cells = present.sum() * len(sc.demos) * QH
    qh_share = 1 - len(h) / cells
    assert abs(qh_share - p_qh) < 3 * np.sqrt(p_qh * (1 - p_qh) / cells)


def test_launched_network_has_no_history_before_its_launch(drift_world, drift_history):
    """Default: the last network launches 9 months before plan week 1 (2027-03-29 -> 2026-06-29, by
    hand): no row before that day in any zone, every zone has rows within its first week; the
    other networks start within a few days of the history start."""
    sc = load_scenario(drift_world)
    launched = sc.network_names[-1]
    launch = pd.Timestamp("2026-06-29")
    assert sc.first_week == PLAN_START == date(2027, 3, 29)
    first = drift_history.groupby(["network", "zone"])["date"].min()
    assert (first[launched] >= launch).all() and (first[launched] < launch + pd.Timedelta(days=7)).all()
    start = pd.Timestamp(sc.history_generator["start"])
    assert (first.drop(launched, level="network") < start + pd.Timedelta(days=7)).all()


def test_lead_days_between_history_end_and_plan_week_1(tmp_path, drift_world):
    """Plan week 1 starts lead_days + 1 days after the last history day (0: the next day)."""
    sc = load_scenario(drift_world)
    assert (sc.first_week - validate_history(sc).end).days == 28 + 1
    w = make_world(tmp_path / "lead0", "drift", 4, lead_days=0)
    sc0 = load_scenario(w)
    h = validate_history(sc0)
    assert (sc0.first_week - h.end).days == 1 and h.end == date(2027, 3, 28)


# ----------------------------------------------------------------------------- files, determinism, truth

def test_written_history_passes_the_loader(drift_world):
    """The written file has the contract's columns and dtypes (as scenarios.generate writes them)
    and passes validate_history: 490 days, ratings in [0, 1], the launched network's series (4
    zones x 2 demos) listed as short."""
    schema = pq.read_schema(drift_world / "history.parquet")
    assert [(f.name, f.type) for f in schema] == [("zone", pa.string()), ("network", pa.string()),
                                                  ("demo", pa.string()), ("date", pa.date32()),
                                                  ("quarter_hour", pa.int16()), ("rating", pa.float32())]
    sc = load_scenario(drift_world)
    h = validate_history(sc)
    assert h.days == 490 and h.series == 4 * 5 * 2 and 0 < h.rating_max <= 1
    assert {s["network"] for s in h.short_series} == {sc.network_names[-1]} and len(h.short_series) == 8
    assert 0 < h.zero_share < 0.1 and h.missing_series == []


def test_history_is_the_truth_with_gaps(drift_world, drift_history):
    """Every history row is the simulated truth's value at its zone, network, demo, day and
    quarter-hour (the plan weeks continue the same simulation)."""
    from scenarios.families import simulate_scenario_truth

    sc = load_scenario(drift_world)
    truth = simulate_scenario_truth(sc)
    assert truth.family == "drift" and truth.dates[0] == np.datetime64(sc.history_generator["start"])
    z = sc.zone_names[1]
    cube = truth.zone(1)
    rows = drift_history[drift_history["zone"] == z].sample(5000, random_state=0)
    ni = rows["network"].map({n: i for i, n in enumerate(truth.networks)}).to_numpy()
    di = rows["demo"].map({d: i for i, d in enumerate(truth.demos)}).to_numpy()
    day = (rows["date"] - pd.Timestamp(truth.start)).dt.days.to_numpy()
    np.testing.assert_array_equal(cube[ni, di, day, rows["quarter_hour"].to_numpy()], rows["rating"].to_numpy())
    assert cube.shape[2] == 490 + 28 + 7 * sc.weeks + 1


def test_seeded_determinism(tmp_path, drift_world):
    """Same spec, same bytes; another seed, other ratings. The same world twice: the same files."""
    spec = _spec(zones=2, networks=2, demos=("hh", "a25-54"), days=35, seed=8)
    a = write_drift_history(spec, tmp_path / "a.parquet").read_bytes()
    b = write_drift_history(spec, tmp_path / "b.parquet").read_bytes()
    assert a == b
    spec.seed = 9
    c = pq.read_table(write_drift_history(spec, tmp_path / "c.parquet"))
    assert not c.column("rating").equals(pq.read_table(tmp_path / "a.parquet").column("rating"))
    again = make_world(tmp_path / "again", "drift", 3)
    for f in ("scenario.toml", "inventory.csv", "universes.csv", "deals/tight.toml", "deals/paced.toml"):
        assert (again / f).read_text() == (drift_world / f).read_text(), f
    assert pq.read_table(again / "history.parquet").equals(pq.read_table(drift_world / "history.parquet"))


def _table_digest(path: Path) -> str:
    t = pq.read_table(path)
    h = hashlib.sha256()
    for c in ("zone", "network", "demo"):
        h.update("\n".join(t.column(c).to_pylist()).encode())
    h.update(t.column("date").cast("int32").to_numpy().tobytes())
    h.update(t.column("quarter_hour").to_numpy().astype(np.int16).tobytes())
    h.update(t.column("rating").to_numpy().astype(np.float32).tobytes())
    return h.hexdigest()[:16]


def test_profile_family_unchanged(tmp_path, small_scenario):
    """The profile family gives the same history and plan-week truth as before the drift family
    (digests recorded from the code before it, commit 36f0db3, in this environment; a numpy whose
    random streams changed would change them too)."""
    from scenarios.build import unit_truth
    from scenarios.generate import generate_history

    p = generate_history(
        tmp_path / "h.parquet", zones=["big-zone", "small-zone"], networks=["news-net", "kids-net", "sports-net"],
        genres=["news", "kids", "sports"], demos=["hh", "a25-54"],
        universes={("big-zone", "hh"): 1_500_000, ("big-zone", "a25-54"): 1_400_000,
                   ("small-zone", "hh"): 90_000, ("small-zone", "a25-54"): 85_000},
        start=date(2025, 1, 6), end=date(2025, 5, 4), seed=3, short_history=[("small-zone", "sports-net")],
        short_history_days=30)
    assert _table_digest(p) == "a911f96b31b62334"
    assert _table_digest(small_scenario / "history.parquet") == "c27c49351f64c1a0"
    u = unit_truth(load_scenario(small_scenario)).sort_values(["zone", "network", "daypart", "week", "demo"])
    assert hashlib.sha256(u["rating"].to_numpy(np.float64).tobytes()).hexdigest()[:16] == "019f17672edc1ad3"


def test_profile_world_and_truth_levels_for_both_families(tmp_path, drift_world):
    """A profile world (lead 10): plan week 1 11 days after its history; world_truth_levels of
    both families covers every zone x network x daypart x week x demo with a positive audience."""
    assert FAMILIES == ("profile", "drift")
    w = make_world(tmp_path / "profile", "profile", 2, lead_days=10)
    sc = load_scenario(w)
    assert sc.history_generator.get("family") == "profile"
    assert (sc.first_week - validate_history(sc).end).days == 11
    for world in (w, drift_world):
        s = load_scenario(world)
        t = world_truth_levels(s)
        assert list(t.columns) == ["zone", "network", "daypart", "week", "demo", "true_impressions"]
        assert len(t) == 4 * 5 * 7 * s.weeks * 2 and (t["true_impressions"] > 0).all()
        assert len(s.deals) == 4


def test_posted_actuals_on_a_drift_world(drift_world):
    """Posted actuals air against the drift family's plan weeks: preemption near 3% (binomial SE
    < 0.3%, check at 1 point) and the delivery near the aired spots x the true unit-week levels."""
    from scenarios.actuals import posted_actuals

    sc = load_scenario(drift_world)
    inv = sc.inventory[sc.inventory["week"] <= 2]
    plan = inv[["zone", "network", "daypart", "week"]].assign(spots=inv["avails"].clip(upper=40))
    act = posted_actuals(sc, plan, "hh", weeks=[1, 2], seed=1)
    assert act["spots_aired"].sum() / plan["spots"].sum() == pytest.approx(0.97, abs=0.01)
    t = world_truth_levels(sc)
    t = t[t["demo"] == "hh"].merge(act, on=["zone", "network", "daypart", "week"])
    assert act["impressions"].sum() == pytest.approx(float((t["spots_aired"] * t["true_impressions"]).sum()),
                                                     rel=0.05)


# ----------------------------------------------------------------------------- scenario.toml keys

def test_drift_knobs_are_the_loaders_keys():
    """The loader validates exactly the DriftSpec knobs, and assumes its default launch."""
    assert set(DRIFT_KNOBS) == set(DRIFT_GENERATOR_RULES)
    launch = {f.name: f.default for f in dataclasses.fields(DriftSpec)}["launch_months"]
    assert launch == DRIFT_DEFAULT_LAUNCH_MONTHS


@pytest.mark.parametrize("edit, message", [
    (("end = 2027-02-28", "end = 2027-02-28\nnetwork_shok_rho = 0.5"),
     r"scenario\.toml \[history_generator\]: unknown key 'network_shok_rho' \(did you mean 'network_shock_rho'\?"),
    (("end = 2027-02-28", "end = 2027-02-28\nshort_history_days = 20"),
     r"scenario\.toml \[history_generator\]: unknown key 'short_history_days'"),
    (('family = "drift"', 'family = "profile"\nfloor = 0.001'),
     r"scenario\.toml \[history_generator\]: unknown key 'floor'"),
    (('family = "drift"', 'family = "wobble"'),
     r"scenario\.toml \[history_generator\]: family must be one of profile, drift, got 'wobble'"),
    (("end = 2027-02-28", "end = 2027-02-28\nnetwork_shock_rho = 1.0"),
     r"scenario\.toml \[history_generator\]: network_shock_rho must be a number with -1 < rho < 1, got 1\.0"),
    (("end = 2027-02-28", "end = 2027-02-28\nmissing_day_share = -0.1"),
     r"scenario\.toml \[history_generator\]: missing_day_share must be a share"),
    (("end = 2027-02-28", "end = 2027-02-28\nlaunch_months = 2.5"),
     r"scenario\.toml \[history_generator\]: launch_months must be a whole number of months"),
    (("end = 2027-02-28", 'end = 2027-02-28\nlaunch_network = "nowhere-tv"'),
     r"scenario\.toml \[history_generator\]: launch_network 'nowhere-tv' is not a network in networks\.csv"),
    (("end = 2027-02-28", "end = 2027-02-20\nlaunch_months = 1"),
     r"launch_months 1 puts the launch of velvetreel-movies on 2027-02-28, after the history's end 2027-02-20"),
    (("end = 2027-02-28", "end = 2027-03-29"),
     r"scenario\.toml \[history_generator\]: end 2027-03-29 must be before first_week 2027-03-29"),
])
def test_drift_keys_validated_by_the_loader(tmp_path, drift_world, edit, message):
    folder = tmp_path / "w"
    shutil.copytree(drift_world, folder, ignore=shutil.ignore_patterns("history.parquet", "forecast"))
    text = (folder / "scenario.toml").read_text()
    assert edit[0] in text
    (folder / "scenario.toml").write_text(text.replace(edit[0], edit[1]))
    with pytest.raises(ScenarioError, match=message):
        load_scenario(folder)


def test_make_world_refuses_unknown_knobs_and_used_folders(tmp_path, drift_world):
    with pytest.raises(ValueError, match=re.escape("unknown drift knob(s) short_history")):
        make_world(tmp_path / "x", "drift", 1, short_history=[])
    with pytest.raises(ValueError, match="not empty"):
        make_world(drift_world, "drift", 1)
    with pytest.raises(ValueError, match="family must be one of profile, drift"):
        make_world(tmp_path / "y", "wobble", 1)


# ----------------------------------------------------------------------------- end to end

@pytest.mark.slow
def test_forecast_fit_on_a_drift_world(tmp_path, drift_world):
    """`pledge forecast fit` on a small drift world (about 15 s): a forecast row for every unit of
    the plan weeks, each matched by the simulated truth."""
    from planner.forecast_job import load_forecast

    folder = tmp_path / "fit"
    shutil.copytree(drift_world, folder)
    assert main(["forecast", "fit", str(folder), "--json"]) == 0
    sc = load_scenario(folder)
    table = load_forecast(sc)
    truth = world_truth_levels(sc)
    m = table.merge(truth, on=["zone", "network", "daypart", "week", "demo"], how="inner")
    assert len(table) == len(truth) == len(m) == 4 * 5 * 7 * 10 * 2
    assert (m["mean_impressions"] > 0).all() and (m["level_sd"] > 0).all()
