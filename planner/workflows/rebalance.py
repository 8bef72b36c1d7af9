"""Mid-flight rebalance of one booked deal: read the book, the postings and the forecast, re-plan,
and with `commit` replace the deal's remaining holds (`planner.rebalance` computes)."""
from __future__ import annotations

import os
from typing import Any

import pandas as pd

from planner import forecast_job
from planner.book import book_warnings, get_deal, held_spots, replace_holds
from planner.errors import InputError
from planner.posterior import ACTUALS_COLUMNS
from planner.rebalance import RebalanceResult, committable, read_actuals, rebalance_on, rebalanced_holds


def rebalance_deal(scenario: Any, deal_name: str, actuals: str | os.PathLike | pd.DataFrame,
                   book: str | os.PathLike | None = None, *, commit: bool = False, solver: str = "cbc",
                   forecast: pd.DataFrame | None = None, unposted_as_zero: bool = False) -> RebalanceResult:
    """Update the forecast from posted actuals and re-plan the deal's remaining weeks.

    `actuals`: a CSV path (validated by `planner.rebalance.read_actuals`) or an already-valid
    DataFrame. Aired weeks are first_week .. the last posted week; their posted impressions count
    toward the guarantee. With `commit=True` and a deliverable re-plan, the deal's holds in the
    remaining weeks are replaced by the re-plan in one checked transaction (aired weeks' holds are
    kept), and the posted actuals used are stored with them (the book's `postings`), so the stress
    test values the remaining holds on the same updated forecast (`planner.posterior.fold_actuals`).

    Postings that look wrong (`planner.rebalance.posting_problems`) are listed in `problems`; with
    `commit=True` they raise InputError before anything is planned or written. `unposted_as_zero`
    accepts held unit-weeks without a row as delivering nothing (said in `warnings`).
    """
    if deal_name not in scenario.deals:
        raise InputError(f"{scenario.path}: no deal named {deal_name!r} in deals/")
    deal = scenario.deals[deal_name]
    booked = get_deal(scenario, deal_name, book)  # InputError when not committed
    acts = actuals if isinstance(actuals, pd.DataFrame) else read_actuals(actuals, scenario, deal)
    if forecast is None:
        forecast = forecast_job.ensure_forecast(scenario).table
    warnings = book_warnings(scenario, book)
    result = rebalance_on(scenario, deal, acts, booked.holds, forecast=forecast,
                          others=held_spots(scenario, book, exclude=[deal_name]), solver=solver, commit=commit,
                          unposted_as_zero=unposted_as_zero, warnings=warnings,
                          where=actuals if not isinstance(actuals, pd.DataFrame) else "posted actuals")
    if commit and committable(result):
        holds, summary = rebalanced_holds(result, booked.holds, acts)
        replace_holds(scenario, deal_name, holds, summary, book, postings=acts[ACTUALS_COLUMNS])
        result.committed, result.not_committed_reason = True, ""
    return result
