"""The whole job through the command line, once, with nothing stubbed (planner.cli).

A small invented scenario (3 zones x 3 networks, 8 plan weeks) is fitted for real
(`pledge forecast fit`, once per session: tests/conftest.py), then checked, planned, committed, stressed and reported
by `pledge` commands. Every output is compared with facts read independently from the files:
the deal files and scenario.toml (tomllib), inventory.csv and forecast.parquet (pandas), the
book's holds (sqlite3), the report's HTML (regular expressions), the normal law (scipy).
"""
from __future__ import annotations

import json
import re
import sqlite3
import sys
import tomllib
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from planner.cli import main

sys.path.insert(0, str(Path(__file__).resolve().parent))
from test_faults import _mc_probability  # noqa: E402

UNIT = ["zone", "network", "daypart", "week"]
DRAWS = 20_000


@pytest.fixture()
def fitted(small_fit, fitted_copy, tmp_path):
    """A copy of the session's small scenario, fitted for real by `pledge forecast fit`
    (tests/conftest.py; the copy shares its history file and its forecast is current)."""
    from planner.forecast_job import ensure_forecast
    from planner.scenario import load_scenario

    assert small_fit.result.fitted_now
    folder = fitted_copy(small_fit.folder, tmp_path / "small")
    assert not ensure_forecast(load_scenario(folder)).fitted_now
    return folder


def _run(capsys, *argv) -> tuple[int, str]:
    capsys.readouterr()
    code = main([str(a) for a in argv])
    return code, capsys.readouterr().out


def _deal_files(folder) -> dict[str, dict]:
    return {d["name"]: d for d in (tomllib.loads(p.read_text()) for p in sorted((folder / "deals").glob("*.toml")))}


def _expected_per_spot(folder, demo: str) -> pd.DataFrame:
    """Expected impressions of one bought spot per unit: (1 - preemption) x mean impressions,
    from forecast.parquet and scenario.toml's preemption (inventory.csv has no preempt column)."""
    fc = pd.read_parquet(folder / "forecast" / "forecast.parquet")
    fc = fc[fc["demo"] == demo][UNIT + ["mean_impressions"]]
    preempt = tomllib.loads((folder / "scenario.toml").read_text())["preempt_rate"]
    return fc.assign(per_spot=(1 - preempt) * fc["mean_impressions"])


def test_check_plan_commit_stress_report_on_a_fitted_scenario(fitted, capsys, tmp_path):
    """Faults caught: any break between the fitted table and the answers (a plan over avails, a
    flight week lost, holds that differ from the plan, stress figures inconsistent with each
    other or with the plan's expected delivery, report figures that are not the deal's)."""
    folder = fitted
    files = _deal_files(folder)
    inv = pd.read_csv(folder / "inventory.csv")
    comfy = files["small-comfortable"]

    # check: the guarantee and revenue are the deal file's (CPM: cost per thousand, common practice)
    code, out = _run(capsys, "check", folder, "small-comfortable", "--json", "--solver", "highs")
    assert code == 0
    check = json.loads(out)
    assert check["deliverable"] is True
    assert check["guarantee"] == pytest.approx(comfy["impressions"])
    assert check["revenue"] == pytest.approx(comfy["impressions"] * comfy["price_cpm"] / 1000)
    assert check["probability_of_delivery"] >= comfy["confidence"] - 1e-9

    # plan: within avails, in the flight, costed at the inventory's rates, expected = sum of spots
    code, _ = _run(capsys, "plan", folder, "small-comfortable", "--out", tmp_path / "plan.csv", "--solver", "highs")
    assert code == 0
    plan = pd.read_csv(tmp_path / "plan.csv")
    m = plan.merge(inv, on=UNIT, suffixes=("", "_inv"), validate="one_to_one")
    assert len(m) == len(plan) and (m["spots"] >= 1).all() and (m["spots"] <= m["avails"]).all()
    assert set(plan["week"]) <= set(range(comfy["first_week"], comfy["last_week"] + 1))
    # a preempted spot is not billed (common practice): expected cost = spots x rate x (1 - preemption)
    keep = 1 - tomllib.loads((folder / "scenario.toml").read_text())["preempt_rate"]
    assert (m["spots"] * m["rate_inv"] * keep).sum() == pytest.approx(check["cost"], rel=1e-9)
    e = plan.merge(_expected_per_spot(folder, comfy["demo"]), on=UNIT)
    expected = float((e["spots"] * e["per_spot"]).sum())
    assert expected == pytest.approx(check["expected_impressions"], rel=1e-6)
    assert expected > comfy["impressions"]  # a 95% chance needs more than the guarantee in expectation

    # commit: the book's holds (read with sqlite3) are the plan's spots
    code, out = _run(capsys, "book", "commit", folder, "small-comfortable", "--json", "--solver", "highs")
    assert code == 0 and json.loads(out)["committed"] is True
    code, out = _run(capsys, "book", "commit", folder, "small-tight", "--json", "--solver", "highs")
    assert code == 0
    tight_committed = json.loads(out)["committed"]
    with sqlite3.connect(folder / "book.sqlite") as con:
        holds = pd.read_sql_query("SELECT deal, zone, network, daypart, week, spots FROM holds", con)
    mine = holds[holds["deal"] == "small-comfortable"].drop(columns="deal").sort_values(UNIT).reset_index(drop=True)
    want = plan[UNIT + ["spots"]].sort_values(UNIT).reset_index(drop=True)
    pd.testing.assert_frame_equal(mine, want, check_dtype=False)
    # the figures committed with it: cost and expected delivery as computed above, and its chance
    # of delivery against a Monte Carlo of the documented error model written in the tests
    # (tests/test_faults.py::_mc_probability, 20,000 draws, standard error stated, at most 0.0035;
    # the code's normal approximation may differ from the exact law by a little: 0.01 + 4 SE)
    with sqlite3.connect(folder / "book.sqlite") as con:
        booked = pd.read_sql_query("SELECT name, cost, expected_impressions, probability FROM deals", con)
    b = booked.set_index("name").loc["small-comfortable"]
    assert b["cost"] == pytest.approx(check["cost"], rel=1e-9)
    assert b["expected_impressions"] == pytest.approx(expected, rel=1e-6)
    fc = pd.read_parquet(folder / "forecast" / "forecast.parquet")
    units = plan[UNIT + ["spots"]].merge(fc[fc["demo"] == comfy["demo"]], on=UNIT).assign(
        preempt_rate=tomllib.loads((folder / "scenario.toml").read_text())["preempt_rate"])
    p_mc, se = _mc_probability(units, units["spots"].to_numpy(), comfy["impressions"], 20_000, seed=1)
    assert b["probability"] == pytest.approx(p_mc, abs=0.01 + 4 * se)
    both = holds.groupby(UNIT, as_index=False)["spots"].sum().merge(inv, on=UNIT)
    assert (both["spots"] <= both["avails"]).all()  # the second deal was planned around the first

    # stress: each deal's mean is the holds' expected delivery; the fast sampler's deal totals are
    # normal, so P(short) = Phi((G - mean) / sd) and E[shortfall] = sd (phi(k) + k Phi(k)),
    # k = (G - mean) / sd (the normal loss function); and E[shortfall] <= G x P(short).
    code, out = _run(capsys, "stress", folder, "--draws", DRAWS, "--seed", 3, "--json")
    assert code == 0
    stress = {d["deal"]: d for d in json.loads(out)["deals"]}
    assert set(stress) == {"small-comfortable"} | ({"small-tight"} if tight_committed else set())
    for name, d in stress.items():
        deal = files[name]
        h = holds[holds["deal"] == name].merge(_expected_per_spot(folder, deal["demo"]), on=UNIT)
        se_mean = d["sd_delivery"] / np.sqrt(DRAWS)
        assert d["expected_delivery"] == pytest.approx(float((h["spots"] * h["per_spot"]).sum()), abs=4 * se_mean)
        assert d["guarantee"] == pytest.approx(deal["impressions"])
        k = (deal["impressions"] - d["expected_delivery"]) / d["sd_delivery"]
        p = d["probability_of_shortfall"]
        assert p == pytest.approx(stats.norm.cdf(k), abs=4 * d["probability_of_shortfall_se"] + 0.002)
        loss = d["sd_delivery"] * (stats.norm.pdf(k) + k * stats.norm.cdf(k))
        assert d["expected_shortfall"] == pytest.approx(loss, abs=4 * d["expected_shortfall_se"] + 1e-3 * loss + 1)
        assert 0 <= d["expected_shortfall"] <= deal["impressions"] * p + 1e-6
        assert d["expected_liability"] == pytest.approx(d["expected_shortfall"] * deal["price_cpm"] / 1000, rel=1e-9)

    # report: every deal file is named; each verdict's guarantee is its file's
    code, _ = _run(capsys, "report", folder, "--out", tmp_path / "report.html", "--draws", DRAWS,
                   "--solver", "highs")
    assert code == 0
    html = (tmp_path / "report.html").read_text()
    for name, deal in files.items():
        assert name in html
        shown = re.search(rf'data-deal="{re.escape(name)}" data-field="guarantee" data-value="([^"]+)"', html)
        assert shown, name
        assert float(shown.group(1)) == pytest.approx(deal["impressions"])
