"""The seeded history generator and the scenario builder (the demo and small test scenarios)."""
from __future__ import annotations

from datetime import date, timedelta

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from scenarios.build import DEMO_DEALS, capacity, deal_units, unit_truth
from scenarios.folders import make_small_scenario
from scenarios.generate import QH, demo_path, generate_history, make_spec, simulate_truth

ZONES = ["big-zone", "small-zone"]
NETWORKS = ["news-net", "kids-net", "sports-net"]
GENRES = ["news", "kids", "sports"]
DEMOS = ["hh", "a25-54"]
UNIVERSES = {("big-zone", "hh"): 1_500_000, ("big-zone", "a25-54"): 1_400_000,
             ("small-zone", "hh"): 90_000, ("small-zone", "a25-54"): 85_000}
START, END = date(2025, 1, 6), date(2025, 5, 4)  # 119 days, Monday to Sunday


def _gen(tmp_path, name="h.parquet", **kw):
    args = dict(zones=ZONES, networks=NETWORKS, genres=GENRES, demos=DEMOS, universes=UNIVERSES,
                start=START, end=END, seed=3, short_history=[("small-zone", "sports-net")], short_history_days=30)
    args.update(kw)
    return generate_history(tmp_path / name, **args)


@pytest.fixture(scope="module")
def hist(tmp_path_factory):
    path = _gen(tmp_path_factory.mktemp("gen"))
    df = pq.read_table(path).to_pandas()
    df["date"] = pd.to_datetime(df["date"])
    return path, df


def test_schema_and_ranges(hist):
    path, df = hist
    schema = pq.read_schema(path)
    assert schema.field("date").type == pa.date32()
    assert schema.field("rating").type == pa.float32()
    assert schema.field("quarter_hour").type == pa.int16()
    assert [f.name for f in schema] == ["zone", "network", "demo", "date", "quarter_hour", "rating"]
    assert df["quarter_hour"].between(0, 95).all()
    assert df["rating"].between(0, 1).all() and np.isfinite(df["rating"]).all()
    assert df["date"].min() == pd.Timestamp(START) and df["date"].max() == pd.Timestamp(END)
    assert not df.duplicated(["zone", "network", "demo", "date", "quarter_hour"]).any()


def test_deterministic_by_seed(tmp_path, hist):
    path, _ = hist
    again = pq.read_table(_gen(tmp_path, "again.parquet"))
    assert again.equals(pq.read_table(path))
    other = pq.read_table(_gen(tmp_path, "other.parquet", seed=4))
    assert other.num_rows != again.num_rows or not other.column("rating").equals(again.column("rating"))


def test_row_count_without_gaps(tmp_path):
    path = _gen(tmp_path, short_history=[], missing_qh_rate=0.0, missing_days_per_zone=0, missing_days_per_series=0)
    days = (END - START).days + 1
    assert pq.read_metadata(path).num_rows == len(ZONES) * len(NETWORKS) * len(DEMOS) * days * QH


def test_gaps_present(hist):
    _, df = hist
    days = (END - START).days + 1
    full = len(ZONES) * len(NETWORKS) * len(DEMOS) * days * QH
    assert 0.75 * full < len(df) < full  # short history removes most of one series of six
    per_day = df.groupby(["zone", "network", "demo", "date"]).size()
    assert (per_day < QH).any()  # missing quarter-hours inside a day
    zone_days = df.groupby("zone")["date"].nunique()
    assert (zone_days < days).all()  # whole days missing (zone outages)


def test_short_history_series(hist):
    _, df = hist
    first = df.groupby(["zone", "network"])["date"].min()
    assert first[("small-zone", "sports-net")] == pd.Timestamp(END - timedelta(days=29))
    others = first.drop(("small-zone", "sports-net"))
    assert (others <= pd.Timestamp(START + timedelta(days=3))).all()


def test_true_zeros_small_zone_overnight(hist):
    _, df = hist
    night = df[df["quarter_hour"].between(8, 19)]  # 02:00-05:00
    zero = night.groupby("zone")["rating"].apply(lambda r: float((r == 0).mean()))
    assert zero["small-zone"] > 0.05
    assert zero["big-zone"] < zero["small-zone"]


def test_day_profiles_have_trade_shape(hist):
    _, df = hist
    hour = df["quarter_hour"] // 4
    m = df.assign(hour=hour)
    adult = m[m["network"] != "kids-net"]
    prime = adult[adult["hour"].between(20, 22)].groupby(["network", "demo"])["rating"].mean()
    night = adult[adult["hour"].between(1, 5)].groupby(["network", "demo"])["rating"].mean()
    # Common practice: evening viewing far above overnight viewing (adult networks, every demo).
    assert (prime > 3 * night).all()
    # Common practice: household ratings exceed the ratings of one adult demo (homes vs people).
    demo_mean = m.groupby(["network", "demo"])["rating"].mean().unstack()
    assert (demo_mean["hh"] > demo_mean["a25-54"]).all()
    # Kids' networks: daytime/afternoon well above late night; adults watch kids' TV little.
    kids = m[m["network"] == "kids-net"]
    assert kids[kids["hour"].between(15, 17)]["rating"].mean() > 2 * kids[kids["hour"].between(22, 23)]["rating"].mean()
    assert demo_mean.loc["kids-net", "a25-54"] < 0.5 * demo_mean.loc["kids-net", "hh"]
    # News: the morning block beats the small hours.
    news = m[(m["network"] == "news-net")]
    assert news[news["hour"].between(6, 8)]["rating"].mean() > 3 * news[news["hour"].between(2, 4)]["rating"].mean()
    # Sports: weekend afternoons beat weekday afternoons.
    sp = m[(m["network"] == "sports-net") & m["hour"].between(13, 16)]
    weekend = sp["date"].dt.day_of_week >= 5
    assert sp[weekend]["rating"].mean() > 1.5 * sp[~weekend]["rating"].mean()


def test_rating_magnitudes(hist):
    _, df = hist
    # The brief's scale (from the domain brief): about one rating point (0.01) at the peak for a big
    # network, a small fraction of a point overnight.
    hh = df[df["demo"] == "hh"]
    peak = hh.groupby(["zone", "network", hh["quarter_hour"]])["rating"].mean().groupby(["zone", "network"]).max()
    assert peak.between(0.002, 0.04).all()
    night = hh[hh["quarter_hour"].between(8, 19)].groupby(["zone", "network"])["rating"].mean()
    assert night.between(1e-5, 2e-3).all()


def test_network_shocks_shared_across_zones(tmp_path):
    # Daily level of a network moves together in every zone (shared shocks), more than two
    # networks in the same zone move together.
    path = _gen(tmp_path, "long.parquet", start=date(2024, 1, 1), end=date(2025, 12, 28), short_history=[],
                demos=["hh"], universes={k: v for k, v in UNIVERSES.items() if k[1] == "hh"})
    df = pq.read_table(path).to_pandas()
    prime = df[df["quarter_hour"].between(80, 91)]
    daily = np.log(prime.groupby(["zone", "network", "date"])["rating"].mean().unstack(["zone", "network"]))
    dow = pd.to_datetime(daily.index).day_of_week
    resid = daily - daily.groupby(dow).transform("mean")
    resid = resid - resid.rolling(7, center=True, min_periods=1).mean().rolling(365, min_periods=30).mean()
    same_net = np.mean([resid[("big-zone", n)].corr(resid[("small-zone", n)]) for n in NETWORKS])
    same_zone = np.mean([resid[(z, "news-net")].corr(resid[(z, "kids-net")]) for z in ZONES])
    assert same_net > same_zone + 0.1


def test_seasonality_winter_above_summer(tmp_path):
    path = _gen(tmp_path, "season.parquet", start=date(2024, 1, 1), end=date(2025, 12, 28), short_history=[],
                networks=["news-net"], genres=["news"], zones=["big-zone"], demos=["hh"],
                universes={("big-zone", "hh"): 1_500_000})
    df = pq.read_table(path).to_pandas()
    month = pd.to_datetime(df["date"]).dt.month
    by_month = df.groupby(month)["rating"].mean()
    # Common practice: more television is watched in winter than in summer.
    assert by_month[[1, 2, 12]].mean() > 1.1 * by_month[[6, 7, 8]].mean()


def test_universes_mapping_or_array_agree(tmp_path):
    a = make_spec(zones=ZONES, networks=NETWORKS, genres=GENRES, demos=DEMOS, universes=UNIVERSES,
                  start=START, end=END, seed=1)
    arr = np.array([[UNIVERSES[(z, d)] for d in DEMOS] for z in ZONES])
    b = make_spec(zones=ZONES, networks=NETWORKS, genres=GENRES, demos=DEMOS, universes=arr,
                  start=START, end=END, seed=1)
    assert np.array_equal(a.universes, b.universes)


def test_history_is_prefix_of_simulated_future(hist):
    path, df = hist
    spec = make_spec(zones=ZONES, networks=NETWORKS, genres=GENRES, demos=DEMOS, universes=UNIVERSES,
                     start=START, end=END, seed=3, short_history=[("small-zone", "sports-net")], short_history_days=30)
    dates, truth = simulate_truth(spec)
    assert len(dates) == spec.history_days + spec.horizon_days
    row = df.iloc[12345]
    zi, ni, di = ZONES.index(row["zone"]), NETWORKS.index(row["network"]), DEMOS.index(row["demo"])
    day = (row["date"] - pd.Timestamp(START)).days
    assert truth[zi, ni, di, day, row["quarter_hour"]] == row["rating"]


# ----------------------------------------------------------------------------- scenario folders

def test_small_scenario_deals_sized_as_intended(small_scenario):
    from planner.scenario import load_scenario

    sc = load_scenario(small_scenario)
    truth = unit_truth(sc)
    inv = sc.inventory
    units = truth.merge(inv, on=["zone", "network", "daypart", "week"])
    for name, (lo, hi) in {"small-comfortable": (0.0, 0.35), "small-tight": (0.6, 1.0),
                           "small-too-big": (1.05, 99)}.items():
        d = sc.deals[name]
        u = units[(units["demo"] == d.demo) & units["week"].between(d.first_week, d.last_week)]
        upper = float((u["avails"] * u["impressions"]).sum())  # every avail bought, no mix rule
        if name == "small-too-big":
            assert d.impressions > 1.05 * upper
        else:
            assert d.impressions < hi * upper
    # The tight deal sits at 80% of its mix-constrained capacity; check that LP (scipy HiGHS)
    # against cvxpy solving the same LP (reference library).
    cvxpy = pytest.importorskip("cvxpy")
    from scenarios.build import DealSpec

    d = sc.deals["small-tight"]
    spec = DealSpec("t", d.name, "", d.demo, d.first_week, d.last_week, 0.8, 1.0, "",
                    mix={"daypart_min_share": dict(d.mix.daypart_min_share)})
    u = deal_units(truth, inv, spec)
    cap = capacity(u, spec, sc.daypart_names)
    m = u["impressions"].to_numpy()
    x = cvxpy.Variable(len(u))
    prime = (u["daypart"] == "prime").to_numpy().astype(float)
    prob = cvxpy.Problem(cvxpy.Maximize(m @ x), [x >= 0, x <= u["ub"].to_numpy(),
                                                 (prime * m) @ x >= 0.3 * (m @ x)])
    prob.solve(solver="CLARABEL")
    assert cap == pytest.approx(prob.value, rel=1e-4)
    assert d.impressions == pytest.approx(0.8 * cap, rel=0.01)


def test_make_small_scenario_is_deterministic(tmp_path):
    a = make_small_scenario(tmp_path / "a", seed=5, n_zones=2, n_networks=2, history_days=60, weeks=3)
    b = make_small_scenario(tmp_path / "b", seed=5, n_zones=2, n_networks=2, history_days=60, weeks=3)
    for f in ("inventory.csv", "universes.csv", "deals/tight.toml", "scenario.toml"):
        assert (a / f).read_text() == (b / f).read_text()
    assert pq.read_table(a / "history.parquet").equals(pq.read_table(b / "history.parquet"))


def test_shipped_demo_layout():
    from planner.scenario import load_scenario

    sc = load_scenario(demo_path())
    assert len(sc.zones) == 12 and sc.zones["market"].nunique() == 4
    assert len(sc.networks) == 10 and sc.networks["genre"].nunique() == 10
    assert [d.name for d in sc.dayparts] == ["early_morning", "daytime", "early_fringe", "prime_access", "prime",
                                             "late_fringe", "overnight"]
    assert sc.first_week == date(2027, 3, 29) and sc.first_week.weekday() == 0 and sc.weeks == 13
    assert sc.preempt_rate == 0.03 and sc.demos == ["hh", "a25-54"]
    assert set(sc.deals) == {d.name for d in DEMO_DEALS}
    # make-good terms: the files carry what the builder writes (scenarios/build.py DEMO_TERMS and
    # each DealSpec's terms over them), at least one deal settled in ADUs and one in cash
    from scenarios.build import DEMO_TERMS

    for spec in DEMO_DEALS:
        assert sc.deals[spec.name].terms.as_dict() == {**DEMO_TERMS, **spec.terms}
    assert {"units", "cash"} <= {d.terms.settlement for d in sc.deals.values()}
    assert sc.history_generator["end"] == date(2026, 11, 29)
    assert (sc.history_generator["end"] - sc.history_generator["start"]).days + 1 == 730
    inv = sc.inventory
    assert len(inv) == 12 * 10 * 7 * 13 and (inv["avails"] >= 0).all()
    by = inv.groupby(["zone", "network", "daypart"])["rate"].mean().unstack()
    # Common practice: prime is dearer than overnight, everywhere.
    assert (by["prime"] > by["overnight"]).all()
    # Common practice: big zones are dearer per spot than small ones.
    hh = sc.universes[sc.universes["demo"] == "hh"].set_index("zone")["universe"]
    zone_rate = inv[inv["daypart"] == "prime"].groupby("zone")["rate"].mean()
    assert zone_rate[hh.idxmax()] > 3 * zone_rate[hh.idxmin()]
    assert np.corrcoef(np.log(hh[zone_rate.index]), np.log(zone_rate))[0, 1] > 0.8


@pytest.mark.slow
def test_demo_history_and_deal_sizing(demo_scenario):
    from planner.scenario import load_scenario, validate_history

    sc = load_scenario(demo_scenario)
    h = validate_history(sc)
    assert h.days == 730 and h.end == date(2026, 11, 29)
    assert 0.95 * 17_000_000 * 0.96 < h.rows < 12 * 10 * 2 * 730 * 96
    assert h.completeness > 0.95 and len(h.short_series) == 6
    truth = unit_truth(sc)
    units = truth.merge(sc.inventory, on=["zone", "network", "daypart", "week"])
    units = units[units["impressions"] > 0]
    cpm = units["rate"] / units["impressions"] * 1000
    med = cpm.groupby([units["demo"], units["daypart"]]).median()
    # Common practice: local cable CPMs of a few dollars to a few tens of dollars.
    assert med.between(2, 60).all(), med
    d = sc.deals["saltmarsh-flu"]
    u = units[(units["demo"] == d.demo) & units["week"].between(d.first_week, d.last_week)
              & ~units["zone"].isin(d.mix.exclude_zones)]
    assert d.impressions > float((u["avails"] * u["impressions"]).sum()) * 0.3  # even with no other rule


def test_posted_actuals_follow_the_simulated_future(small_scenario):
    from planner.scenario import load_scenario
    from scenarios.actuals import posted_actuals

    sc = load_scenario(small_scenario)
    inv = sc.inventory[sc.inventory["week"] <= 2]
    plan = inv[["zone", "network", "daypart", "week"]].assign(spots=inv["avails"].clip(upper=40))
    act = posted_actuals(sc, plan, "hh", weeks=[1, 2], seed=1)
    assert list(act.columns) == ["zone", "network", "daypart", "week", "spots_aired", "impressions"]
    assert len(act) == int((plan["spots"] > 0).sum()) and (act["spots_aired"] <= plan.set_index(
        ["zone", "network", "daypart", "week"]).loc[act.set_index(["zone", "network", "daypart", "week"]).index,
                                                   "spots"].to_numpy()).all()
    # Preemption: aired share near 1 - 0.03 (binomial, thousands of spots).
    share = act["spots_aired"].sum() / plan["spots"].sum()
    assert share == pytest.approx(0.97, abs=0.01)
    # Delivery: aired spots x the simulated unit-week mean audience, within a few percent in total.
    truth = unit_truth(sc)
    t = truth[truth["demo"] == "hh"].merge(act, on=["zone", "network", "daypart", "week"])
    expected = float((t["spots_aired"] * t["impressions_x"]).sum())
    assert act["impressions"].sum() == pytest.approx(expected, rel=0.05)
    again = posted_actuals(sc, plan, "hh", weeks=[1, 2], seed=1)
    pd.testing.assert_frame_equal(act, again)


def test_true_network_shock_week_sd_per_window(small_scenario):
    """The generator's network shocks in a window (invented data): one sd per window, of the
    size the generator draws (AR(1) drift of sd 0.06 plus episodes of sd 0.18), and an error for
    a window outside the simulated span."""
    from planner.scenario import load_scenario
    from scenarios.actuals import true_network_shock_week_sd

    sc = load_scenario(small_scenario)
    start = pd.Timestamp(sc.history_generator["start"])
    firsts = [start + pd.Timedelta(days=d) for d in (0, 91, 182)]
    sds = true_network_shock_week_sd(sc, firsts)
    assert len(sds) == 3 and all(0.0 < v < 0.3 for v in sds)
    assert true_network_shock_week_sd(sc, firsts[:1], weeks=4)[0] > 0
    with pytest.raises(ValueError, match="outside the simulated span"):
        true_network_shock_week_sd(sc, [start - pd.Timedelta(days=7)])
