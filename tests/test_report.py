"""The HTML report: rendered in headless Chromium, its numbers checked against `pledge check --json`.

The browser part needs Chromium (`/usr/bin/chromium`, Debian package `chromium`); without it the
browser test is skipped, unless PLEDGE_REQUIRE_BROWSER=1 (set by CI), when it fails.
"""
from __future__ import annotations

import contextlib
import html
import io
import json
import os
import re
import shutil
from html.parser import HTMLParser
from pathlib import Path
from typing import NamedTuple

import numpy as np
import pandas as pd
import pytest

from planner import workflows as wf
from planner.cli import main

VERDICT_KEYS = ("guarantee", "expected_impressions", "probability_of_delivery", "confidence", "cost",
                "revenue", "margin", "max_guarantee")


class Ran(NamedTuple):
    returncode: int
    stdout: str
    stderr: str


def pledge(*args) -> Ran:
    """Run the command line in this process (`planner.cli.main`, what the `pledge` script calls),
    stdout and stderr captured. The installed script in a fresh interpreter is run by
    tests/test_demo.py and tests/test_book.py."""
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = main([str(a) for a in args])
    return Ran(code, out.getvalue(), err.getvalue())


def pledge_json(*args: str) -> dict:
    r = pledge(*args, "--json")
    assert r.returncode == 0, r.stderr
    return json.loads(r.stdout)


class _Fields(HTMLParser):
    """Collect data-deal/data-field/data-value triples and the plots of a report."""

    def __init__(self):
        super().__init__()
        self.fields: dict[tuple[str, str], str] = {}
        self.plots: list[dict] = []
        self.external: list[str] = []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if "data-field" in a and "data-value" in a and "data-deal" in a:
            self.fields.setdefault((a["data-deal"], a["data-field"]), a["data-value"])
        if tag == "img" and "data-plot" in a:
            self.plots.append(a)
        for key in ("src", "href"):
            v = a.get(key)
            if v and not v.startswith(("data:", "#")):
                self.external.append(v)
        if tag in ("script", "link") and (a.get("src") or a.get("href")):
            self.external.append(a.get("src") or a.get("href"))


def report_fields(path: Path) -> _Fields:
    p = _Fields()
    p.feed(path.read_text(encoding="utf-8"))
    return p


def assert_verdict_equal(fields: dict, deal: str, check: dict) -> None:
    """The report's verdict numbers for `deal` equal the check JSON's (the same float, exactly)."""
    assert fields[(deal, "deliverable")] == ("true" if check["deliverable"] else "false")
    for key in VERDICT_KEYS:
        shown = fields[(deal, key)]
        if check.get(key) is None:
            assert shown == "", (deal, key, shown)
        else:
            assert float(shown) == pytest.approx(float(check[key]), rel=1e-12, abs=1e-9), (deal, key)


UNIT = ["zone", "network", "daypart", "week"]


def deal_file(folder: Path, name: str) -> dict:
    """The deal file named `name` in `folder/deals`, read by hand (tomllib)."""
    import tomllib

    for p in sorted((Path(folder) / "deals").glob("*.toml")):
        raw = tomllib.loads(p.read_text())
        if raw["name"] == name:
            return raw
    raise AssertionError(f"no deal file for {name}")


def booked_units(folder: Path, name: str) -> pd.DataFrame:
    """A booked deal's holds read from book.sqlite (sqlite3), joined with inventory.csv's rate and
    preemption (scenario.toml's when the file has none) and forecast.parquet's rows of its demo."""
    import sqlite3
    import tomllib

    folder = Path(folder)
    with sqlite3.connect(folder / "book.sqlite") as con:
        holds = pd.read_sql_query("SELECT zone, network, daypart, week, spots FROM holds WHERE deal = ?", con,
                                  params=(name,))
    inv = pd.read_csv(folder / "inventory.csv")
    if "preempt_rate" not in inv:
        inv["preempt_rate"] = tomllib.loads((folder / "scenario.toml").read_text()).get("preempt_rate", 0.0)
    inv["preempt_rate"] = inv["preempt_rate"].fillna(tomllib.loads((folder / "scenario.toml").read_text())
                                                     .get("preempt_rate", 0.0))
    fc = pd.read_parquet(folder / "forecast" / "forecast.parquet")
    fc = fc[fc["demo"] == deal_file(folder, name)["demo"]]
    return holds.merge(inv[UNIT + ["rate", "preempt_rate"]], on=UNIT).merge(fc, on=UNIT)


def assert_verdict_facts(fields: dict, folder: Path, deal: str, booked: bool, draws: int = 20_000) -> None:
    """The report's figures for `deal` against facts read independently: guarantee, revenue
    (impressions x CPM / 1000, common practice) and risk rule from the deal file; for a booked
    deal, cost (holds x inventory.csv rates x (1 - preemption): a preempted spot is not billed,
    common practice), expected delivery (holds x (1 - preemption) x
    forecast mean per spot) and margin from the book's holds, and the chance of delivery against
    a Monte Carlo of the documented error law (tests/test_faults.py::_mc_probability; standard
    error at most 0.5 / sqrt(draws) = 0.0035 at 20,000 draws; the normal approximation may differ
    from the exact law by a little: tolerance 0.01 + 4 SE)."""
    from test_faults import _mc_probability

    f = deal_file(folder, deal)
    assert float(fields[(deal, "guarantee")]) == pytest.approx(f["impressions"])
    revenue = f["impressions"] * f["price_cpm"] / 1000
    assert float(fields[(deal, "revenue")]) == pytest.approx(revenue)
    if "pad" not in f:  # DEVELOPERS.md: neither given -> the default confidence 0.95
        assert float(fields[(deal, "confidence")]) == pytest.approx(f.get("confidence", 0.95))
    if not booked:
        return
    u = booked_units(folder, deal)
    cost = float((u["spots"] * u["rate"] * (1 - u["preempt_rate"])).sum())
    assert float(fields[(deal, "cost")]) == pytest.approx(cost, rel=1e-9)
    assert float(fields[(deal, "margin")]) == pytest.approx(revenue - cost, rel=1e-9)
    expected = float((u["spots"] * (1 - u["preempt_rate"]) * u["mean_impressions"]).sum())
    assert float(fields[(deal, "expected_impressions")]) == pytest.approx(expected, rel=1e-6)
    p, se = _mc_probability(u, u["spots"].to_numpy(), f["impressions"], draws, seed=2)
    assert float(fields[(deal, "probability_of_delivery")]) == pytest.approx(p, abs=0.01 + 4 * se)


# ----------------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def booked_report(small_fitted, fitted_copy, tmp_path_factory):
    """A copy of the session's fitted small scenario (tests/conftest.py) with its first deal
    committed, the checks made the way a desk would make them, and the report written by the
    command line."""
    from planner.scenario import load_scenario

    folder = fitted_copy(small_fitted, tmp_path_factory.mktemp("report") / "small")
    names = sorted(load_scenario(folder).deals)
    first, rest = names[0], names[1:]
    checks = {first: pledge_json("check", folder, first, "--frontier")}
    assert checks[first]["deliverable"], "the small scenario's first deal should be deliverable"
    r = pledge("book", "commit", folder, first)
    assert r.returncode == 0, r.stderr
    # The other deals are checked against the book holding the first deal, as the report does.
    for name in rest:
        checks[name] = pledge_json("check", folder, name)
    out = folder / "out" / "report.html"
    r = pledge("report", folder, "--out", out, "--draws", "4000", "--seed", "3")
    assert r.returncode == 0, r.stderr
    return folder, out, checks, first


def test_report_numbers_equal_check_json(booked_report):
    folder, out, checks, first = booked_report
    parsed = report_fields(out)
    for deal, check in checks.items():
        assert_verdict_equal(parsed.fields, deal, check)
        assert_verdict_facts(parsed.fields, folder, deal, booked=deal == first)
    assert not parsed.external, f"the report refers to outside resources: {parsed.external[:3]}"


def test_report_is_self_contained_and_cautious(booked_report):
    _, out, checks, _ = booked_report
    text = out.read_text(encoding="utf-8")
    assert not re.search(r"""(src|href)\s*=\s*["']?(https?:)?//""", text)
    assert "@import" not in text and "url(http" not in text
    low = text.lower()
    # The three cautions every readable output carries.
    assert "forecasts are estimates" in low
    assert "contract terms decide what is owed" in low
    assert "review it before anything is committed" in low
    meta = json.loads(re.search(r'<script type="application/json" id="report-meta">(.*?)</script>', text, re.S).group(1))
    assert meta["seed"] == 3 and set(meta["deals"]) == set(checks)
    assert {"python", "numpy", "pandas", "matplotlib"} <= set(meta["versions"])


def test_report_stress_matches_stress_command(booked_report):
    """The book figures in the report are the stress test's at the same draws and seed."""
    folder, out, _, first = booked_report
    fields = report_fields(out).fields
    st = pledge_json("stress", folder, "--draws", "4000", "--seed", "3")
    for key in ("expected_liability", "var95", "cvar95"):
        assert float(fields[("_book", key)]) == pytest.approx(st["book"][key], rel=1e-9, abs=1e-6)
    # Reference: the one booked deal's refund liability, E[(G - D)+] x CPM / 1000 (common practice),
    # by a Monte Carlo of the documented error law on its holds (tests/test_faults.py::_mc_totals,
    # 20,000 draws, its standard error computed here) against the report's 4,000 draws (its own
    # standard error, shown in the report): tolerance 4 combined standard errors.
    from test_faults import _mc_totals

    f = deal_file(folder, first)
    u = booked_units(folder, first)
    loss = np.maximum(f["impressions"] - _mc_totals(u, u["spots"].to_numpy(), 20_000, seed=4), 0.0) \
        * f["price_cpm"] / 1000
    se = np.hypot(loss.std() / np.sqrt(loss.size), float(fields[("_book", "expected_liability_se")]))
    assert float(fields[("_book", "expected_liability")]) == pytest.approx(loss.mean(), abs=4 * se)


def test_rendering_is_deterministic(booked_report):
    """Same inputs, same file: the plots carry no dates and stable element ids."""
    from planner import plots

    rng = np.random.default_rng(0)
    draws = rng.normal(1e6, 5e4, 2000)
    assert plots.delivery_svg(draws, 9.5e5) == plots.delivery_svg(draws.copy(), 9.5e5)
    assert "<dc:date>" not in plots.delivery_svg(draws, 9.5e5)


def test_unit_history_matches_sql(small_scenario):
    """The weekly daypart history equals an independent SQL aggregation (DuckDB, a general-purpose
    reference engine), including a daypart that wraps past midnight."""
    import duckdb

    from planner.workflows import unit_history
    from planner.scenario import load_scenario

    scn = load_scenario(small_scenario)
    zone, network, demo = scn.zone_names[0], scn.network_names[0], scn.demos[0]
    wrapping = [d for d in scn.dayparts if d.wraps]
    cases = [scn.dayparts[0]] + wrapping[:1]
    for dp in cases:
        got = unit_history(scn, zone, network, dp.name, demo)
        start = dp.quarter_hours[0]
        # Membership in SQL: a row at (date, qh) belongs to the airing that started on `start_day`,
        # the previous day for the after-midnight part of a wrapping daypart.
        qhs = ",".join(str(q) for q in dp.quarter_hours)
        days = ",".join(str(d) for d in dp.days)
        wrap = "TRUE" if dp.wraps else "FALSE"
        sql = f"""
            WITH h AS (
              SELECT CAST(date AS DATE) AS d, quarter_hour AS qh, rating FROM read_parquet('{scn.history_path}')
              WHERE zone = '{zone}' AND network = '{network}' AND demo = '{demo}'),
            s AS (
              SELECT CASE WHEN {wrap} AND qh < {start} THEN d - INTERVAL 1 DAY ELSE d END AS start_day,
                     CASE WHEN {wrap} AND qh < {start} THEN qh + 96 ELSE qh END AS rel, rating FROM h)
            SELECT date_trunc('week', start_day) AS week_start, avg(rating) AS r FROM s
            WHERE rel IN ({qhs}) AND (isodow(start_day) - 1) IN ({days})
            GROUP BY 1 ORDER BY 1"""
        ref = duckdb.sql(sql).df()
        universe = scn.universe(zone, demo)
        assert len(got) == len(ref) > 20
        np.testing.assert_array_equal(pd.to_datetime(got["week_start"]).to_numpy(),
                                      pd.to_datetime(ref["week_start"]).to_numpy())
        np.testing.assert_allclose(got["impressions"].to_numpy(), ref["r"].to_numpy() * universe, rtol=1e-5)


# ----------------------------------------------------------------------------------------------
def _chromium() -> str | None:
    for name in ("/usr/bin/chromium", shutil.which("chromium"), shutil.which("chromium-browser")):
        if name and Path(name).exists():
            return name
    return None


@pytest.mark.browser
def test_report_in_headless_chromium(booked_report, tmp_path):
    exe = _chromium()
    if exe is None:
        if os.environ.get("PLEDGE_REQUIRE_BROWSER") == "1":
            pytest.fail("Chromium is required (PLEDGE_REQUIRE_BROWSER=1) but /usr/bin/chromium is missing")
        pytest.skip("headless Chromium not installed")
    from cdp import Browser

    folder, out, checks, first = booked_report
    browser = Browser(exe, tmp_path / "profile")
    try:
        session = browser.open(out.resolve().as_uri())
        info = browser.evaluate("""(() => {
            const imgs = Array.from(document.querySelectorAll('img[data-plot]'));
            return {
              plots: imgs.map(i => { const r = i.getBoundingClientRect();
                return {kind: i.dataset.plot, deal: i.dataset.deal || null, natural: i.naturalWidth,
                        complete: i.complete, w: r.width, h: r.height}; }),
              fields: Array.from(document.querySelectorAll('[data-field][data-deal]')).map(e =>
                [e.dataset.deal, e.dataset.field, e.dataset.value, e.textContent]),
              title: document.title,
              cautions: document.querySelectorAll('[data-section=cautions]').length,
            };
        })()""", session)
        shot = browser.screenshot(session, tmp_path / "report.png")
        keep = os.environ.get("PLEDGE_SCREENSHOT")
        if keep:
            shutil.copy(shot, keep)
        browser.call("Runtime.evaluate", {"expression": "1"}, session=session)  # flush pending events
        errors = browser.console_errors(session)
        requests = [u for u in browser.requests(session) if not u.startswith(("data:", "file:"))]
    finally:
        browser.close()

    assert errors == [], errors
    assert requests == [], f"the page fetched from a network: {requests}"
    assert shot.stat().st_size > 50_000  # a real full-page image, not a blank page
    assert info["cautions"] >= 1
    # Every plot is decoded and drawn at a readable size.
    for p in info["plots"]:
        assert p["complete"] and p["natural"] > 0, p
        assert p["w"] >= 300 and p["h"] >= 150, p
    kinds = {(p["kind"], p["deal"]) for p in info["plots"]}
    for deal, check in checks.items():
        assert ("frontier", deal) in kinds
        if check["deliverable"]:
            assert ("pacing", deal) in kinds and ("money", deal) in kinds
    assert ("delivery", first) in kinds
    assert ("liability", None) in kinds and ("forecast", None) in kinds
    # The verdict numbers as the browser sees them equal `pledge check --json`.
    seen = {}
    for deal, field, value, _text in info["fields"]:
        seen.setdefault((deal, field), value)
    for deal, check in checks.items():
        assert_verdict_equal(seen, deal, check)


def test_report_bad_input_exits_2(small_scenario, tmp_path):
    """Bad options are input errors: exit 2, one line naming what is wrong, nothing written."""
    r = pledge("report", small_scenario, "--out", tmp_path / "r.txt")
    assert r.returncode == 2 and "ending in .html" in r.stderr and "Traceback" not in r.stderr
    r = pledge("report", small_scenario, "--out", tmp_path / "r.html", "--deal", "no-such-deal")
    assert r.returncode == 2 and "no-such-deal" in r.stderr
    r = pledge("report", tmp_path / "missing", "--out", tmp_path / "r.html")
    assert r.returncode == 2 and "not a scenario folder" in r.stderr
    assert not (tmp_path / "r.html").exists()


def test_report_carries_the_forecasts_own_caution(booked_report):
    # The report repeats the caution of the fit's refit-total check exactly when the check calls
    # for it (planner.forecast_job.shared_error_caution on the cached meta.json).
    from planner.forecast_job import forecast_meta, shared_error_caution
    from planner.scenario import load_scenario

    folder, out, _, _ = booked_report
    scn = load_scenario(folder)
    caution = shared_error_caution(forecast_meta(scn), scn.path)
    text = out.read_text(encoding="utf-8")
    assert ('data-section="warnings"' in text) == (caution is not None)
    if caution:
        assert html.escape(caution) in text


def test_report_renders_warnings_escaped():
    from planner.report import ReportData, render_report

    page = render_report(ReportData(scenario_name="x", scenario_path="/x", currency="USD", deals=[],
                                    warnings=["refits missed <by> 8%"]))
    assert 'data-section="warnings"' in page and "refits missed &lt;by&gt; 8%" in page
    assert 'data-section="warnings"' not in render_report(ReportData(scenario_name="x", scenario_path="/x",
                                                                     currency="USD", deals=[]))


# ---------------------------------------------------------------------------------------------- issue 19
def test_a_booked_deal_is_shown_from_the_book_flagged_when_its_file_differs_and_kept_without_one(
        small_scenario, scenario_copy, monkeypatch):
    """QA findings: the report re-planned booked deals from their deal files (55,178 spots /
    USD 390,806 shown, 55,190 / 390,815 held), an edited deal file showed "no (booked)", a
    deleted one dropped the deal from the deal sections (not from the stress). The report now
    shows a booked deal's held plan and committed terms from the book, flags a deal file that
    differs from its commit, and keeps a booked deal whose file is gone."""
    import tomllib

    from planner import book as bk
    from planner.workflows import build_report
    from planner.scenario import load_scenario
    from test_book import synthetic_forecast, use_forecast

    folder = scenario_copy(small_scenario)
    scn = load_scenario(folder)
    fc = synthetic_forecast(scn)
    use_forecast(monkeypatch, fc)
    name = "small-comfortable"
    assert wf.commit_deal(scn, name, forecast=fc, solver="highs").committed
    # the book's plan is no longer what a fresh plan would be (as after a rebalance): one
    # unit-week fewer, its own cost and expected delivery
    b = bk.get_deal(scn, name)
    held = b.holds.iloc[:-1]
    summary = {"cost": float(held["cost"].sum()), "expected_impressions": float(held["expected_impressions"].sum()),
               "probability": 0.9}
    bk.replace_holds(scn, name, held, summary)
    b = bk.get_deal(scn, name)

    def section(report, deal):
        return next(s for s in report.deals if s.name == deal)

    def shows_the_book(s):
        assert s.in_book and s.verdict["deliverable"] is True
        assert int(s.spots["spots"].sum()) == b.spots == int(held["spots"].sum())
        assert s.verdict["cost"] == b.cost and s.verdict["expected_impressions"] == b.expected_impressions
        assert s.verdict["probability_of_delivery"] == 0.9 and s.verdict["guarantee"] == b.guarantee
        assert s.verdict["margin"] == pytest.approx(b.revenue - b.cost, rel=1e-12)
        assert s.pacing["expected_impressions"].sum() == pytest.approx(float(held["expected_impressions"].sum()),
                                                                       rel=1e-9)

    r = build_report(scn, forecast=fc, draws=2000, solver="highs")
    shows_the_book(section(r, name))
    assert not any(name in w for w in r.warnings)

    deal_file = scn.deals[name].path
    text = deal_file.read_text()
    old = tomllib.loads(text)["impressions"]
    edited = re.sub(r"(?m)^impressions = .*$", f"impressions = {int(old) + 5000}", text)
    assert tomllib.loads(edited)["impressions"] == int(old) + 5000
    deal_file.write_text(edited)
    r = build_report(load_scenario(folder), forecast=fc, draws=2000, solver="highs")
    shows_the_book(section(r, name))
    flag = next(w for w in r.warnings if w.startswith(f"{name}: deals/{deal_file.name} differs from its commit"))
    assert f"impressions: {b.guarantee:,.0f} in the book, {int(old) + 5000:,.0f} in the file" in flag

    deal_file.unlink()
    r = build_report(load_scenario(folder), forecast=fc, draws=2000, solver="highs")
    shows_the_book(section(r, name))
    assert any(w.startswith(f"{name}: in the book without a deal file") for w in r.warnings)
    assert name in r.book.deals
