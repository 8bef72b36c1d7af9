"""check_deal / plan_deal and the `pledge check` / `pledge plan` commands on the small scenario,
with an invented forecast table (the forecaster has its own tests)."""
from __future__ import annotations

import copy
import json

import numpy as np
import pandas as pd
import pytest

import planner.deals as deals
from planner.cli import main
from planner.errors import InputError
from planner import workflows as wf

DP_RATING = {"prime": 0.010, "prime_access": 0.007, "late_fringe": 0.005, "early_fringe": 0.005,
             "daytime": 0.004, "early_morning": 0.003, "overnight": 0.001}


def synthetic_forecast(scenario, seed=0) -> pd.DataFrame:
    """Invented forecast table in the DEVELOPERS.md layout for every inventory unit and demo."""
    rng = np.random.default_rng(seed)
    inv = scenario.inventory[["zone", "network", "daypart", "week"]]
    parts = []
    for demo in scenario.demos:
        f = inv.copy()
        f["demo"] = demo
        f = f.merge(scenario.universes[scenario.universes["demo"] == demo][["zone", "universe"]], on="zone")
        net = {n: rng.uniform(0.5, 1.5) for n in f["network"].unique()}
        f["mean_rating"] = f["daypart"].map(DP_RATING).fillna(0.004) * f["network"].map(net) * rng.uniform(0.8, 1.2, len(f))
        mu = f["mean_rating"] * f["universe"]
        f["mean_impressions"] = mu
        f["airing_sd"] = 0.35 * mu
        f["level_sd_network"] = 0.06 * mu
        f["level_sd_flight"] = 0.10 * mu
        f["level_sd_week"] = 0.05 * mu
        f["level_sd"] = np.sqrt(f["level_sd_network"] ** 2 + f["level_sd_flight"] ** 2 + f["level_sd_week"] ** 2)
        sd = np.sqrt(f["airing_sd"] ** 2 + f["level_sd"] ** 2)
        f["q10_impressions"] = mu - 1.2816 * sd
        f["q90_impressions"] = mu + 1.2816 * sd
        f["history_weeks"] = 52
        parts.append(f)
    return pd.concat(parts, ignore_index=True)


@pytest.fixture(scope="module")
def scn(small_scenario):
    from planner.scenario import load_scenario

    return load_scenario(small_scenario)


@pytest.fixture(scope="module")
def fc(scn):
    return synthetic_forecast(scn)


def test_check_comfortable_deal(scn, fc):
    r = wf.check_deal(scn, "small-comfortable", forecast=fc, held=None, target_margin=0.3, solver="highs")
    assert r.deliverable and r.verdict == "deliverable"
    d = scn.deals["small-comfortable"]
    # Reference: the deal file read by hand (tomllib) and the plan's spots costed at inventory.csv's
    # rates (pandas), billed only when they air (a preempted spot is not billed, common practice:
    # rate x (1 - preemption), the preemption from inventory.csv or scenario.toml's default);
    # revenue = impressions x CPM / 1000 (CPM: cost per thousand, common practice).
    import tomllib

    raw = tomllib.loads(d.path.read_text())
    revenue = raw["impressions"] * raw["price_cpm"] / 1000
    spots = wf.plan_deal(scn, "small-comfortable", forecast=fc, held=None, solver="highs").spots
    inv = pd.read_csv(scn.path / "inventory.csv")
    default_p = tomllib.loads((scn.path / "scenario.toml").read_text()).get("preempt_rate", 0.0)
    inv["p"] = inv["preempt_rate"].fillna(default_p) if "preempt_rate" in inv else default_p
    cost = float(spots[["zone", "network", "daypart", "week", "spots"]].merge(inv)
                 .eval("spots * rate * (1 - p)").sum())
    assert r.revenue == pytest.approx(revenue)
    assert r.cost == pytest.approx(cost, rel=1e-9)
    assert r.margin == pytest.approx(revenue - cost)
    assert r.margin_pct == pytest.approx((revenue - cost) / revenue)
    assert r.probability_of_delivery >= 0.95 - 1e-9
    assert r.probability_if_independent > r.probability_of_delivery
    assert r.max_guarantee >= d.impressions
    # the CPM that leaves a 30% margin on revenue: cost / (1 - 0.3) per thousand impressions
    assert r.cpm_needed == pytest.approx(cost / 0.7 / (raw["impressions"] / 1000))
    assert r.gap <= 0.005 + 1e-9
    js = r.to_json()
    for k in ("deal", "deliverable", "guarantee", "expected_impressions", "probability_of_delivery", "confidence",
              "cost", "revenue", "margin", "max_guarantee", "binding", "margin_pct", "cpm_needed", "gap", "lp_bound",
              "risk_rule", "default_confidence_used"):
        assert k in js
    json.dumps(js)


def test_default_confidence_is_stated(scn, fc):
    r = wf.check_deal(scn, "small-tight", forecast=fc, held=None, solver="highs")
    assert r.default_confidence_used and r.confidence == 0.95
    assert any("default confidence" in c for c in r.cautions)
    # the forecast's own caution on errors shared by all units, exactly when its check calls for it
    from planner.forecast_job import forecast_meta, shared_error_caution

    shared = shared_error_caution(forecast_meta(scn), scn.path)
    brief = shared_error_caution(forecast_meta(scn), scn.path, brief=True)
    assert (brief in r.cautions) if brief else not any("refits missed" in c for c in r.cautions)
    assert r.shared_error_caution == shared


def test_too_big_deal_is_an_answer(scn, fc):
    r = wf.check_deal(scn, "small-too-big", forecast=fc, held=None, solver="highs")
    d = scn.deals["small-too-big"]
    if r.deliverable:
        pytest.skip("the invented forecast happens to carry this deal")
    assert r.max_guarantee < d.impressions and r.binding
    assert r.binding[0].startswith("largest deliverable guarantee")
    assert r.cost is None and r.probability_of_delivery is None


def test_plan_tables(scn, fc):
    p = wf.plan_deal(scn, "small-comfortable", forecast=fc, held=None, solver="highs")
    assert p.deliverable
    s = p.spots
    assert list(s.columns[:8]) == ["zone", "network", "daypart", "week", "spots", "rate", "cost", "expected_impressions"]
    assert "preempt_rate" in s and "sd_impressions" in s
    assert s["cost"].sum() == pytest.approx(p.cost)
    assert s["expected_impressions"].sum() == pytest.approx(p.expected_impressions)
    # a preempted spot is not billed (common practice): cost = spots x rate x (1 - preemption), its sd
    # that of a binomial count of aired spots; the inventory's preemption rate is read here, not the plan's
    inv = scn.inventory.set_index(["zone", "network", "daypart", "week"])["preempt_rate"]
    pr = inv.reindex(pd.MultiIndex.from_frame(s[["zone", "network", "daypart", "week"]])).to_numpy()
    assert np.allclose(s["cost"], s["spots"] * s["rate"] * (1 - pr))
    assert np.allclose(s["cost_sd"], s["rate"] * np.sqrt(s["spots"] * pr * (1 - pr)))
    assert p.cost_sd == pytest.approx(float(np.sqrt((s["cost_sd"] ** 2).sum())), rel=1e-9)
    pc = p.pacing
    d = scn.deals["small-comfortable"]
    assert list(pc["week"]) == d.weeks
    assert pc["even_pacing"].iloc[0] == pytest.approx(p.expected_impressions / len(d.weeks))
    assert pc["expected_impressions"].sum() == pytest.approx(p.expected_impressions)
    assert np.all(pc["p10"] <= pc["expected_impressions"]) and np.all(pc["p90"] >= pc["expected_impressions"])
    # the avails are respected
    inv = scn.inventory.merge(s, on=["zone", "network", "daypart", "week"])
    assert np.all(inv["spots"] <= inv["avails"])


def test_holds_reduce_avails(scn, fc):
    p = wf.plan_deal(scn, "small-comfortable", forecast=fc, held=None, solver="highs")
    held = p.spots[["zone", "network", "daypart", "week", "spots"]]
    q = wf.plan_deal(scn, "small-comfortable", forecast=fc, held=held, solver="highs")
    if q.deliverable:
        both = held.merge(q.spots, on=["zone", "network", "daypart", "week"], suffixes=("_h", "_q"))
        both = both.merge(scn.inventory, on=["zone", "network", "daypart", "week"])
        assert np.all(both["spots_h"] + both["spots_q"] <= both["avails"])
        assert q.cost >= p.cost - 1e-6
    assert q.held_spots_excluded == int(held["spots"].sum())


def _with_deal(scn, **changes):
    s = copy.copy(scn)
    d = copy.deepcopy(scn.deals["small-comfortable"])
    for k, v in changes.items():
        if k.startswith("mix_"):
            setattr(d.mix, k[4:], v)
        else:
            setattr(d, k, v)
    s.deals = {**scn.deals, "x": d}
    return s


def test_diagnosis_names_what_the_exclusions_cost(scn, fc):
    """A deal short only because of its excluded zones is told so, with both totals.

    Independent reference: with no share or pacing rule and no risk margin (pad 0) the largest
    guarantee is the expected delivery of every spot left, sum of avails x (1 - preemption) x mean
    impressions per spot, over the deal's weeks and the zones it may buy (a plain sum, no solver).
    """
    deal = scn.deals["small-comfortable"]
    units = deals.deal_units(scn, fc, deal)
    units = units[units["week"].isin(deal.weeks)]
    expected = units["avails"] * (1 - units["preempt_rate"]) * units["mean_impressions"]
    keep_zone = sorted(units["zone"].unique())[0]
    inside = float(expected[units["zone"] == keep_zone].sum())
    everything = float(expected.sum())
    s = _with_deal(scn, impressions=(inside + everything) / 2, confidence=None, pad=0.0, mix=type(deal.mix)(),
                   mix_exclude_zones=[z for z in units["zone"].unique() if z != keep_zone])
    r = wf.check_deal(s, "x", forecast=fc, held=None, solver="highs")
    assert not r.deliverable
    excluded = ", ".join(s.deals["x"].mix.exclude_zones)
    lever = next(b for b in r.binding if b.startswith(f"exclude_zones {excluded}: without it alone"))
    allowed = float(lever.split("would be ")[1].split(" ")[0].replace(",", ""))
    assert allowed == pytest.approx(everything, rel=2e-3)  # the LP's tolerance
    assert any(f"deliver at most {inside:,.0f} expected impressions" in b for b in r.binding)
    line = next(b for b in r.binding if b.startswith(f"without its exclude_zones {excluded} too"))
    assert f"at most {everything:,.0f} expected impressions (enough" in line


@pytest.mark.parametrize("changes, words", [
    (dict(impressions=0.0), "must be positive"),
    (dict(impressions=-5.0), "must be positive"),
    (dict(confidence=0.3), "confidence must be in (0.5, 0.999)"),
    (dict(confidence=0.9995), "confidence must be in (0.5, 0.999)"),
    (dict(confidence=0.9, pad=0.1), "either confidence or pad"),
    (dict(last_week=99), "outside the inventory"),
    (dict(mix_max_network_share=1.5), "share in [0, 1]"),
    (dict(mix_daypart_min_share={"prime": 0.7, "daytime": 0.6}), "sum past 1"),
    (dict(demo="nobody"), "no forecast rows"),
])
def test_bad_input(scn, fc, changes, words):
    with pytest.raises(InputError, match=None) as e:
        wf.check_deal(_with_deal(scn, **changes), "x", forecast=fc, held=None)
    assert words in str(e.value)


def test_unknown_deal_and_solver_and_margin(scn, fc):
    with pytest.raises(InputError, match="unknown deal"):
        wf.check_deal(scn, "nope", forecast=fc, held=None)
    with pytest.raises(InputError, match="--solver"):
        wf.check_deal(scn, "small-comfortable", forecast=fc, held=None, solver="glpk")
    with pytest.raises(InputError, match="target-margin"):
        wf.check_deal(scn, "small-comfortable", forecast=fc, held=None, target_margin=1.2)


# ---------------------------------------------------------------------------------------------- CLI
@pytest.fixture()
def cli_forecast(monkeypatch, fc):
    monkeypatch.setattr(wf.deal, "forecast_table", lambda scenario, forecast, progress: (fc, True))
    monkeypatch.setattr(wf.deal, "_held", lambda scenario, held, book, deal_name: None)


def test_cli_check_json(small_scenario, cli_forecast, capsys):
    code = main(["check", str(small_scenario), "small-comfortable", "--json", "--solver", "highs",
                 "--target-margin", "0.25", "--frontier"])
    out = capsys.readouterr()
    assert code == 0
    js = json.loads(out.out)
    assert js["deal"] == "small-comfortable" and js["deliverable"] is True
    assert js["frontier"] and all("probability_of_delivery" in f for f in js["frontier"])
    assert "fitted forecast first" in out.err


def test_cli_check_readable(small_scenario, cli_forecast, capsys):
    code = main(["check", str(small_scenario), "small-tight", "--solver", "highs"])
    out = capsys.readouterr().out
    assert code == 0
    assert "chance of delivery" in out and "default" in out and "Forecasts are estimates" in out


def test_cli_plan_and_split(small_scenario, cli_forecast, capsys, tmp_path):
    target = tmp_path / "plan.csv"
    assert main(["plan", str(small_scenario), "small-comfortable", "--out", str(target), "--solver", "highs"]) == 0
    out = capsys.readouterr().out
    plan = pd.read_csv(target)
    assert list(plan.columns[:8]) == ["zone", "network", "daypart", "week", "spots", "rate", "cost",
                                      "expected_impressions"]
    assert "weekly pacing" in out
    assert main(["plan", str(small_scenario), "small-comfortable", "--out", str(target), "--split-by", "zone",
                 "--solver", "highs", "--json"]) == 0
    js = json.loads(capsys.readouterr().out)
    files = js["files"]
    assert len(files) == plan["zone"].nunique()
    parts = pd.concat([pd.read_csv(f) for f in files])
    assert int(parts["spots"].sum()) == int(plan["spots"].sum())
    assert not list(tmp_path.glob(".*.tmp"))


def test_cli_bad_input_exit_2(small_scenario, cli_forecast, capsys, tmp_path):
    assert main(["check", str(small_scenario), "no-such-deal"]) == 2
    assert main(["check", str(small_scenario), "small-comfortable", "--solver", "x"]) == 2
    assert main(["plan", str(small_scenario), "small-comfortable", "--out", str(tmp_path / "p.csv"),
                 "--split-by", "network"]) == 2
    err = capsys.readouterr().err
    assert "unknown deal" in err and "Traceback" not in err


def test_cli_usage_errors_are_one_line_exit_2(small_scenario, capsys, tmp_path):
    """Option errors (Typer's own parsing and the --book check) name the option in one line, exit 2.
    A mistyped --book would otherwise read as an empty book and give an optimistic answer."""
    missing = tmp_path / "no-such-book.sqlite"
    for argv in (["check", str(small_scenario), "small-comfortable", "--book", str(missing)],
                 ["stress", str(small_scenario), "--book", str(missing)],
                 ["stress", str(small_scenario), "--seed", "-1"],
                 ["stress", str(small_scenario), "--draws", "many"],
                 ["check", str(small_scenario), "small-comfortable", "--no-such-option"]):
        capsys.readouterr()
        assert main(argv) == 2, argv
        err = capsys.readouterr().err.strip()
        assert err.startswith("error: pledge ") and "\n" not in err and "Traceback" not in err, err
    assert "--book" in err or "--no-such-option" in err
    assert not missing.exists()


def test_cli_infeasible_is_exit_0(small_scenario, cli_forecast, capsys):
    code = main(["check", str(small_scenario), "small-too-big", "--json", "--solver", "highs"])
    js = json.loads(capsys.readouterr().out)
    assert code == 0 and "max_guarantee" in js


# ---------------------------------------------------------------------------------------------- demo
DEMO_VERDICTS = {"brambleford-spring": True, "corvella-launch": True, "saltmarsh-flu": False,
                 "wrenfield-weekly": True}  # intended verdicts written in the invented deal files


@pytest.mark.slow
def test_demo_deals_verdicts_gap_and_monte_carlo(demo_fitted):
    from planner.forecast_job import ensure_forecast
    from planner.scenario import load_scenario

    scn = load_scenario(demo_fitted)
    fc = ensure_forecast(scn).table
    for name, deliverable in DEMO_VERDICTS.items():
        run = wf.run_deal(scn, name, forecast=fc, held=None)
        a, prob = run.allocation, run.problem
        assert a.feasible == deliverable, name
        if not deliverable:
            r = deals.check_result(run)
            assert r.max_guarantee < prob.guarantee and len(r.binding) >= 2
            continue
        assert a.gap <= 0.01 and a.lp_gap <= 0.01, name
        dm = prob.model
        stated = dm.probability(a.x, prob.guarantee)
        # Monte Carlo of the documented error law written in the tests (tests/test_faults.py::
        # _mc_probability: binomial preemption, shared level factors, airing noise), 20,000 draws:
        # standard error about 0.0015 at 95%; tolerance 0.003 for the normal approximation + 4 SE
        from test_faults import _mc_probability

        mc, se = _mc_probability(prob.units, np.rint(a.x), prob.guarantee, 20_000, seed=1)
        assert abs(mc - stated) <= 0.003 + 4 * se, (name, mc, stated, se)
        if prob.rules.confidence is not None:
            assert mc >= prob.rules.confidence - 0.003 - 4 * se, name
        r = deals.plan_result(run)
        assert r.probability_if_independent >= mc  # all-independent errors overstate the chance


# ---------------------------------------------------------------------------------------------- issue 19: buyer
def test_plan_csv_carries_deal_week_dates_and_daypart_times(small_scenario, cli_forecast, tmp_path):
    """The buy plan names the deal, each week's Monday and Sunday and the daypart's days and
    clock times, read here from scenario.toml by hand (data contract: week w runs from
    first_week + 7 (w - 1) days through the Sunday after)."""
    import datetime as dt
    import tomllib

    raw = tomllib.loads((small_scenario / "scenario.toml").read_text())
    target = tmp_path / "plan.csv"
    assert main(["plan", str(small_scenario), "small-comfortable", "--out", str(target), "--solver", "highs"]) == 0
    plan = pd.read_csv(target, dtype={"start": str, "end": str})
    assert set(plan["deal"]) == {"small-comfortable"}
    first = raw["first_week"] if isinstance(raw["first_week"], dt.date) else dt.date.fromisoformat(raw["first_week"])
    for w, g in plan.groupby("week"):
        monday = first + dt.timedelta(days=7 * (int(w) - 1))
        assert set(g["week_start"]) == {monday.isoformat()}
        assert set(g["week_end"]) == {(monday + dt.timedelta(days=6)).isoformat()}
    names = ("mon", "tue", "wed", "thu", "fri", "sat", "sun")
    for d in raw["daypart"]:
        rows = plan[plan["daypart"] == d["name"]]
        if rows.empty:
            continue
        assert set(rows["start"]) == {d["start"]} and set(rows["end"]) == {d["end"]}
        text = rows["days"].iloc[0]
        days = [names.index(x) for x in d.get("days", names)]
        listed = set()
        for part in text.split(","):
            a, _, b = part.partition("-")
            listed |= set(range(names.index(a), names.index(b or a) + 1))
        assert listed == set(days), (d["name"], text)


def test_days_text_folds_runs():
    assert deals.days_text(range(7)) == "mon-sun"
    assert deals.days_text((0, 1, 2, 3, 4)) == "mon-fri"
    assert deals.days_text((5, 6)) == "sat,sun" and deals.days_text((0, 2, 4)) == "mon,wed,fri"


def test_plan_notes_pacing_astray_without_a_rule_and_a_pad_below_95_percent(scn, fc):
    """A plan whose weekly pacing strays more than 25% from even with no pacing rule says so,
    and a pad plan with a chance of delivery below 95% says so; the deviation is recomputed here
    from the plan's own spots (each week's expected impressions over the flight's mean)."""
    s = copy.copy(scn)
    inv = scn.inventory.copy()
    inv.loc[inv["week"] > 2, "rate"] *= 5.0  # the first two weeks are much cheaper
    s.inventory = inv
    s.deals = {**scn.deals}
    s = _with_deal(s, pad=0.0, confidence=None, mix_weekly_tolerance=None, mix_max_network_share=None)
    p = wf.plan_deal(s, "x", forecast=fc, held=None, solver="highs")
    assert p.deliverable
    weekly = p.spots.groupby("week")["expected_impressions"].sum().reindex(s.deals["x"].weeks, fill_value=0.0)
    dev = weekly / weekly.mean() - 1
    assert dev.abs().max() > 0.25  # the case
    assert any(n.startswith(f"weekly pacing strays up to {dev[dev.abs().idxmax()]:+.0%} from even") for n in p.notes)
    assert p.probability < 0.95 and any("below 95% under the pad of 0%" in n for n in p.notes)
    ruled = wf.plan_deal(_with_deal(s, mix_weekly_tolerance=0.2, pad=None, confidence=0.95), "x", forecast=fc,
                            held=None, solver="highs")
    assert ruled.deliverable and ruled.notes == []


# ---------------------------------------------------------------------------------------------- issue 20: direct checks
PACED_DEAL = """# Invented deal for a test (invented advertiser).
name = "small-paced"
advertiser = "Example Kite Shop (invented)"
demo = "a25-54"
impressions = {impressions}
first_week = 2
last_week = 5
price_cpm = 20.0
confidence = 0.9

[mix]
weekly_tolerance = 0.2
"""


def test_a_paced_plan_buys_every_week_of_the_deal_files_flight(small_scenario, scenario_copy, cli_forecast,
                                                              fc, tmp_path):
    """Faults caught: a flight one week short (`Deal.weeks` as range(first, last), or the plan's
    candidate weeks `deal.weeks[:-1]`).

    Reference: the deal file and scenario.toml read by hand (tomllib): plan weeks 2..5 inclusive,
    week w starting on first_week + 7 (w - 1) days (data contract). Under a weekly tolerance of
    20% every one of those weeks must carry 80-120% of the plan's total / 4 (the number of weeks
    counted from the file), so the plan CSV must list exactly those weeks and Mondays."""
    import datetime as dt
    import tomllib

    folder = scenario_copy(small_scenario)
    a25 = fc[(fc["demo"] == "a25-54") & fc["week"].between(2, 5)].merge(
        pd.read_csv(folder / "inventory.csv"), on=["zone", "network", "daypart", "week"])
    reach = float((a25["avails"] * 0.97 * a25["mean_impressions"]).sum())  # preempt_rate 0.03 (scenario.toml)
    (folder / "deals" / "paced.toml").write_text(PACED_DEAL.format(impressions=round(0.2 * reach)))
    raw = tomllib.loads((folder / "deals" / "paced.toml").read_text())
    weeks = list(range(raw["first_week"], raw["last_week"] + 1))
    assert weeks == [2, 3, 4, 5]  # hand-worked: first and last weeks both inclusive
    first = tomllib.loads((folder / "scenario.toml").read_text())["first_week"]
    mondays = {w: (first + dt.timedelta(days=7 * (w - 1))).isoformat() for w in weeks}
    target = tmp_path / "paced.csv"
    assert main(["plan", str(folder), "small-paced", "--out", str(target), "--solver", "highs"]) == 0
    plan = pd.read_csv(target)
    assert sorted(plan["week"].unique()) == weeks
    assert dict(zip(plan["week"], plan["week_start"])) == mondays
    weekly = plan.groupby("week")["expected_impressions"].sum()
    even = weekly.sum() / len(weeks)
    assert ((weekly >= 0.8 * even * (1 - 1e-6)) & (weekly <= 1.2 * even * (1 + 1e-6))).all(), weekly


def test_a_booked_deal_is_planned_against_avails_less_the_other_deals_holds(tmp_path):
    """Faults caught: a booked deal re-planned against its own holds as well
    (`workflows.deal._held` with `exclude=()`), and holds subtracted twice (`avails - 2 x held`).

    Reference: two deals committed to a book; the book's `holds` rows read by hand with sqlite3;
    for every unit, spots the re-plan of `alpha` may buy = inventory avails - beta's held spots
    (floored at 0; no spot cap), a plain subtraction."""
    import sqlite3
    import sys
    from pathlib import Path

    sys.path.insert(0, str(Path(__file__).resolve().parent))
    from test_book import make_synthetic

    unit = ["zone", "network", "daypart", "week"]
    scn, synth = make_synthetic(tmp_path / "s", deals=[("alpha", 0.35, 0.95, 22.0), ("beta", 0.30, 0.90, 18.0)])
    planner = wf.plan_for_commit(synth, solver="highs")
    for name in scn.deals:
        assert wf.commit_deal(scn, name, planner=planner).committed, name
    with sqlite3.connect(scn.path / "book.sqlite") as con:
        holds = pd.read_sql_query("SELECT deal, zone, network, daypart, week, spots FROM holds", con)
    held = holds.pivot_table(index=unit, columns="deal", values="spots", aggfunc="sum", fill_value=0)
    inv = scn.inventory.set_index(unit)["avails"]
    beta = held["beta"].reindex(inv.index, fill_value=0)
    alpha = held["alpha"].reindex(inv.index, fill_value=0)
    want = (inv - beta).clip(lower=0)
    assert ((alpha > 0) & (want > 0)).sum() > 5  # the case: alpha holds units beta leaves open
    assert ((beta > 0) & (inv - 2 * beta < want)).sum() > 5  # and beta's holds are not zero
    run = wf.run_deal(scn, "alpha", forecast=synth, solver="highs")  # held=None: reads the book
    got = run.problem.scope.set_index(unit)["ub"]
    pd.testing.assert_series_equal(got.sort_index(), want.astype(float).sort_index(), check_names=False)
