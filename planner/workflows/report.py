"""The report's data: check, plan and frontier of every deal, the book's stress test, the forecast
bands against history. Reads the book, the forecast cache and the history; `planner.report`
renders what this gathers."""
from __future__ import annotations

import copy
from pathlib import Path
from typing import Any, Callable, Sequence

import numpy as np
import pandas as pd

from planner import forecast_job
from planner.book import deal_from_book, held_spots, read_book, terms_differ
from planner.deals import check_result, frontier, held_pacing, plan_result, report_frontier_sizes, run_deal
from planner.report import (DealSection, ForecastBand, ReportData, attach_stress, book_section, book_verdict,
                            check_payload, deal_section, frontier_frame, package_versions, top_units)
from planner.scenario import load_history
from planner.stress import DEFAULT_DRAWS
from planner.workflows.stress import stress_book


def unit_history(scenario: Any, zone: str, network: str, daypart: str, demo: str) -> pd.DataFrame:
    """Weekly history of one unit: mean impressions of one spot rotated across the daypart.

    Returns a DataFrame ``week_start`` (the Monday, datetime64), ``impressions`` (mean rating over
    the daypart's quarter-hours and days of that week times the zone's universe, impressions).
    A quarter-hour after midnight of a daypart that wraps belongs to the day the daypart starts.
    """
    dp = scenario.daypart(daypart)
    h = load_history(scenario, ["date", "quarter_hour", "rating"],
                     filters=[("zone", "=", zone), ("network", "=", network), ("demo", "=", demo)])
    if h.empty:
        return pd.DataFrame({"week_start": pd.Series([], dtype="datetime64[ns]"), "impressions": []})
    qh = h["quarter_hour"].to_numpy().astype(int)
    dates = pd.to_datetime(h["date"])
    start_qh = int(dp.quarter_hours[0])
    # A quarter-hour before the start clock of a wrapping daypart belongs to the previous day's airing.
    shift = (qh < start_qh) if dp.wraps else np.zeros(len(qh), dtype=bool)
    start_day = dates - pd.to_timedelta(shift.astype(int), unit="D")
    rel = qh + 96 * shift
    member = np.isin(rel, np.asarray(dp.quarter_hours)) & np.isin(start_day.dt.day_of_week, np.asarray(dp.days))
    if not member.any():
        return pd.DataFrame({"week_start": pd.Series([], dtype="datetime64[ns]"), "impressions": []})
    sd = start_day[member]
    week = (sd - pd.to_timedelta(sd.dt.day_of_week, unit="D")).dt.normalize()
    g = pd.Series(h["rating"].to_numpy()[member], index=week.to_numpy()).groupby(level=0).mean()
    universe = scenario.universe(zone, demo)
    return pd.DataFrame({"week_start": g.index, "impressions": g.to_numpy(dtype=float) * universe})


def unit_forecast(scenario: Any, forecast: pd.DataFrame, zone: str, network: str, daypart: str,
                  demo: str) -> pd.DataFrame:
    """Forecast rows of one unit and demo with ``week_start`` added (impressions of one spot)."""
    f = forecast[(forecast["zone"] == zone) & (forecast["network"] == network) &
                 (forecast["daypart"] == daypart) & (forecast["demo"] == demo)].sort_values("week")
    f = f[["week", "mean_impressions", "q10_impressions", "q90_impressions"]].copy()
    f["week_start"] = pd.to_datetime([scenario.week_start(int(w)) for w in f["week"]])
    return f


def forecast_bands(scenario: Any, forecast: pd.DataFrame, units: Sequence[tuple[str, str, str, str]]) -> list[ForecastBand]:
    """History against the forecast band for each unit (zone, network, daypart, demo)."""
    out = []
    for zone, network, daypart, demo in units:
        fc = unit_forecast(scenario, forecast, zone, network, daypart, demo)
        if fc.empty:
            continue
        out.append(ForecastBand(f"{zone} \u00b7 {network} \u00b7 {daypart} ({demo})",
                                unit_history(scenario, zone, network, daypart, demo), fc))
    return out


def booked_section(scenario: Any, booked: Any, *, forecast: pd.DataFrame, held: pd.DataFrame | None,
                   solver: str = "cbc") -> DealSection:
    """The report's section of a deal in the book: its held plan (`booked.holds`), its committed
    terms and figures (`book_verdict`), its pacing (`planner.deals.held_pacing`); the largest
    deliverable guarantee and the cost frontier from a check of the committed terms against the
    other deals' holds `held`. `flags` says where the figures come from, and how the deal file
    differs from the commit (or that it is gone)."""
    name = booked.name
    file_deal = scenario.deals.get(name)
    differs = terms_differ(booked, file_deal) if file_deal is not None else []
    deal = file_deal if file_deal is not None and not differs else deal_from_book(booked)
    flags = [f"held plan and terms from the book (committed {booked.committed_at})"]
    if file_deal is None:
        flags.append("in the book without a deal file (deals/ has none): shown from the book")
    elif differs:
        where = f"deals/{Path(file_deal.path).name}" if getattr(file_deal, "path", None) else "its deal file"
        flags.append(f"{where} differs from its commit ({'; '.join(differs)}): the book's terms are shown")
    scn = copy.copy(scenario)
    scn.deals = {**scenario.deals, name: deal}
    check, _, extra = evaluate_deal(scn, name, forecast=forecast, held=held, solver=solver)
    verdict = {**check_payload(check), **book_verdict(booked), "binding": flags}
    holds = booked.holds
    return DealSection(
        name=name, verdict=verdict, advertiser=booked.advertiser, demo=booked.demo,
        weeks=(int(booked.first_week), int(booked.last_week)), price_cpm=float(booked.price_cpm), in_book=True,
        frontier=frontier_frame(list(extra)), frontier_relaxed=True, spots=holds,
        pacing=held_pacing(scn, deal, holds, forecast), flags=flags)


def evaluate_deal(scenario: Any, name: str, *, forecast: pd.DataFrame, held: pd.DataFrame | None,
                  solver: str = "cbc") -> tuple[Any, Any, list]:
    """Check and buy plan of one deal from a single solve, and its frontier for the picture.

    Returns (CheckResult, PlanResult or None, frontier rows). The check and plan are the same
    computation as `check_deal(...)` and `plan_deal(...)` with the same `held` spots (the plan is
    None when the deal is not deliverable); the frontier is `relaxed_frontier`.
    """
    run = run_deal(scenario, name, solver=solver, held=held, forecast=forecast,
                   caution=forecast_job.forecast_caution(scenario, brief=True), caution_full=forecast_job.forecast_caution(scenario))
    check = check_result(run)
    plan = plan_result(run) if run.allocation.feasible else None
    return check, plan, relaxed_frontier(run.problem, check.guarantee, check.max_guarantee_lp)


def relaxed_frontier(problem: Any, guarantee: float, max_guarantee: float) -> list[dict]:
    """Least cost and chance of delivery against guarantee size, from the linear relaxation
    (`planner.deals.frontier` at `report_frontier_sizes`): a lower bound of the whole-spot cost
    (within the stated MIP gap of it on the demo), at a fraction of the time of one integer solve
    per size. Rows as `frontier`'s, each marked ``relaxed``."""
    rows = frontier(problem, report_frontier_sizes(guarantee, max_guarantee), max_g=max_guarantee)
    return [{**r, "relaxed": True} for r in rows]


def _deal_sections(scenario: Any, names: Sequence[str], booked: dict, *, book, forecast: pd.DataFrame,
                   runs: dict, solver: str, say: Callable[[str], None]) -> tuple[list[DealSection], list[str]]:
    """Each deal's section: a booked deal from the book (`booked_section`), any other checked and
    planned against every deal's holds (`evaluate_deal`, or the `runs` given). Returns (sections, flags)."""
    sections, flags = [], []
    for name in names:
        if name in booked:
            say(f"checking {name} (in the book)")
            held = held_spots(scenario, book, exclude=[name])
            section = booked_section(scenario, booked[name], forecast=forecast, held=held, solver=solver)
            flags += [f"{name}: {f}" for f in section.flags[1:]]
        else:
            if name not in runs:
                say(f"checking {name}")
                runs[name] = evaluate_deal(scenario, name, forecast=forecast, held=held_spots(scenario, book),
                                           solver=solver)
            check, plan, *extra = runs[name]
            section = deal_section(scenario, name, check, plan, False, extra[0] if extra else ())
        sections.append(section)
    return sections, flags


def _largest_units(forecast: pd.DataFrame, demo: str, n_units: int) -> list[tuple[str, str, str, str]]:
    """The units with the largest audiences in `demo` (distinct networks first), when nothing is planned."""
    f = forecast[forecast["demo"] == demo]
    g = f.groupby(["zone", "network", "daypart"], observed=True)["mean_impressions"].mean()
    g = g.sort_values(ascending=False, kind="stable").rename("imp").reset_index().assign(demo=demo)
    g = pd.concat([g.drop_duplicates("network"), g]).drop_duplicates(["zone", "network", "daypart"])
    return [tuple(r) for r in g.head(n_units)[["zone", "network", "daypart", "demo"]].itertuples(index=False)]


def build_report(scenario: Any, deals: Sequence[str] | None = None, *, book: str | Path | None = None,
                 forecast: pd.DataFrame | None = None, stress: Any = None,
                 runs: dict[str, tuple[Any, Any]] | None = None, draws: int = DEFAULT_DRAWS, seed: int = 0,
                 solver: str = "cbc", n_units: int = 3, stage: Any = None,
                 check_note: str | None = None) -> ReportData:
    """Gather everything the report shows for `deals` (default: every deal of the scenario).

    Each deal is checked (with its frontier) and planned against the avails not held by the
    book; a deal already in the book is checked against the other deals' holds (its own set
    aside). `runs` supplies (CheckResult, PlanResult, frontier rows) already computed (the demo
    passes the ones it made; `check_note` then says how they were made). The book, when it holds
    deals, is stress-tested with `draws` and `seed` unless `stress` (a `StressResult` with its
    draws kept) is given.
    """
    say = stage or (lambda text: None)
    if forecast is None:
        say("forecast")
        forecast = forecast_job.ensure_forecast(scenario).table
    booked = {d.name: d for d in read_book(scenario, book)[0]}
    names = list(deals) if deals else list(scenario.deals) + [n for n in booked if n not in scenario.deals]
    sections, flags = _deal_sections(scenario, names, booked, book=book, forecast=forecast, runs=dict(runs or {}),
                                     solver=solver, say=say)
    book_part = None
    if booked:
        if stress is None or getattr(stress, "delivery", None) is None:
            say(f"stress test of the book ({draws:,} draws)")
            stress = stress_book(scenario, book, draws=draws, seed=seed, forecast=forecast)
        book_part = book_section(stress)
        for s in sections:
            attach_stress(s, stress)
    say("forecast bands")
    units = top_units({s.name: (s.demo, s.spots) for s in sections if s.spots is not None}, n_units)
    if not units and sections:  # nothing planned: show the units with the largest audiences
        units = _largest_units(forecast, sections[0].demo, n_units)
    notes = [(check_note or "Every deal not in the book is checked against the avails the book does not hold.")
             + " A deal in the book shows its held plan and the terms it was committed on, from the book; its "
               "largest deliverable guarantee and cost frontier are against the other deals' holds (its own set "
               "aside)."
             + f" Impressions are in each deal's demo; money in {scenario.currency}."]
    caution = forecast_job.forecast_caution(scenario)
    return ReportData(
        scenario_name=scenario.name, scenario_path=str(scenario.path), currency=scenario.currency,
        deals=sections, book=book_part, forecasts=forecast_bands(scenario, forecast, units),
        dayparts=[d.name for d in scenario.dayparts], seed=stress.seed if stress is not None else seed, notes=notes,
        versions=package_versions(),
        warnings=([caution] if caution else []) + flags + (list(stress.warnings) if stress is not None else []))
