"""One deal at the desk: check, plan and commit, reading the book and the forecast cache.

The computing is `planner.deals` (the allocation problem, its answers) and `planner.book` (the
store and its commit transaction); this module reads what they need (the forecast table,
`planner.forecast_job.ensure_forecast`; the spots other deals hold, `planner.book.held_spots`)
and hands it to them.
"""
from __future__ import annotations

import os
from typing import Any, Callable

import pandas as pd

from planner import forecast_job
from planner import allocate as al
from planner import book as bk
from planner.deals import CheckResult, DealRun, PlanResult, check_result, check_solver, plan_result
from planner.deals import run_deal as solve_deal
from planner.errors import InputError


def forecast_table(scenario, forecast: pd.DataFrame | None = None,
                   progress: Callable | None = None) -> tuple[pd.DataFrame, bool]:
    """The forecast table to use: `forecast` when given, else the cached one (fitted first when
    missing or stale). Returns (table, fitted_now)."""
    if forecast is not None:
        return forecast, False
    res = forecast_job.ensure_forecast(scenario, progress=progress)
    return res.table, bool(res.fitted_now)


def _held(scenario, held: pd.DataFrame | None, book, deal_name: str) -> pd.DataFrame:
    """`held` when given, else the spots the book's committed deals hold, the deal's own left out
    (a booked deal re-checked or re-planned competes only with the others)."""
    if held is not None:
        return held
    return bk.held_spots(scenario, book, exclude=(deal_name,))


def run_deal(scenario, deal_name: str, *, solver: str = "cbc", held: pd.DataFrame | None = None,
             book: str | os.PathLike | None = None, forecast: pd.DataFrame | None = None,
             gap: float = al.DEFAULT_GAP, time_limit: float = al.DEFAULT_TIME_LIMIT,
             progress: Callable | None = None, guarantee: float | None = None) -> DealRun:
    """Solve one deal (`planner.deals.run_deal`) on the forecast (`forecast`, else the cache) against
    the spots held: `held`, else the book's holds of every other deal (then with the book's warnings)."""
    check_solver(solver)  # before a forecast is fitted
    table, fitted = forecast_table(scenario, forecast, progress)
    held_df = _held(scenario, held, book, deal_name)
    warnings = bk.book_warnings(scenario, book) if held is None else []
    return solve_deal(scenario, deal_name, forecast=table, held=held_df, solver=solver, gap=gap,
                      time_limit=time_limit, guarantee=guarantee, fitted_now=fitted, warnings=warnings,
                      caution=forecast_job.forecast_caution(scenario, brief=True), caution_full=forecast_job.forecast_caution(scenario))


def plan_deal(scenario, deal_name: str, *, solver: str = "cbc", held=None, book=None, forecast=None,
              gap: float = al.DEFAULT_GAP, time_limit: float = al.DEFAULT_TIME_LIMIT,
              progress: Callable | None = None, explain: bool = True) -> PlanResult:
    """Whole-spot buy plan of one deal at least cost (see `planner.allocate`).

    held: spots held by committed deals (DataFrame zone,network,daypart,week,spots); when None the
    scenario's book is read (`planner.book.held_spots`). Money in the scenario's currency.
    """
    run = run_deal(scenario, deal_name, solver=solver, held=held, book=book, forecast=forecast, gap=gap,
                   time_limit=time_limit, progress=progress)
    return plan_result(run, explain=explain)


def check_deal(scenario, deal_name: str, *, solver: str = "cbc", target_margin: float | None = None,
               frontier: bool = False, held=None, book=None, forecast=None, gap: float = al.DEFAULT_GAP,
               time_limit: float = al.DEFAULT_TIME_LIMIT, progress: Callable | None = None) -> CheckResult:
    """Sales-desk check of one deal: verdict, cost, revenue, margin, chance of delivery, max guarantee,
    CPM needed for `target_margin` (a fraction of revenue, 0 <= m < 1), binding rules, optional frontier.

    Money in the scenario's currency, impressions in the deal's demo.
    """
    if target_margin is not None and not (0 <= target_margin < 1):
        raise InputError(f"--target-margin {target_margin!r}: a margin is a fraction of revenue in [0, 1)")
    run = run_deal(scenario, deal_name, solver=solver, held=held, book=book, forecast=forecast, gap=gap,
                   time_limit=time_limit, progress=progress)
    return check_result(run, target_margin=target_margin, with_frontier=frontier, gap=gap, time_limit=time_limit)


def _plan_with_book(scenario, deal_name: str, *, held, **kwargs) -> PlanResult:
    return plan_deal(scenario, deal_name, held=held, **kwargs)


def commit_deal(scenario: Any, deal_name: str, book: str | os.PathLike | None = None, *,
                planner: Callable[..., Any] | None = None, **plan_kwargs) -> bk.CommitResult:
    """Plan `deal_name` against the avails not already held and commit it with its spots
    (`planner.book.commit_plan`: the plan re-checked, and re-made if needed, under the book's lock).

    `planner(scenario, deal_name, held=DataFrame, **plan_kwargs)` returns a plan with `.spots`
    (default `plan_deal`, on the cached forecast). An undeliverable deal is not committed: the
    result says so (`committed=False`, `reason`); a deal already in the book raises InputError.
    """
    return bk.commit_plan(scenario, deal_name, book, planner=planner or _plan_with_book, **plan_kwargs)


def plan_for_commit(forecast: pd.DataFrame, *, solver: str = "cbc") -> Callable[..., PlanResult]:
    """A `planner` for `commit_deal` planning on a given forecast table (no fitting)."""

    def _planner(scenario, deal_name, *, held, **kw):
        return plan_deal(scenario, deal_name, held=held, forecast=forecast, solver=kw.get("solver", solver))

    return _planner
