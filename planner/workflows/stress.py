"""The book's stress test: read the book and the forecast, build the book's model, draw."""
from __future__ import annotations

import os
from typing import Any, Callable, Sequence

import pandas as pd

from planner import forecast_job
from planner.book import read_book
from planner.stress import DEFAULT_DRAWS, BookModel, Shock, StressResult, book_model, stress_model

HOLD_KEY = ["zone", "network", "daypart", "week", "spots"]


def load_book_model(scenario: Any, book: str | os.PathLike | None = None, *, forecast: pd.DataFrame | None = None,
                    shocks: Sequence[str | Shock] = (), preempt_multiplier: float = 1.0
                    ) -> tuple[BookModel, list[Shock]]:
    """Read the book and the forecast (`forecast`, else the cached one) and build the (shocked)
    `BookModel` (`planner.stress.book_model`). Returns (model, shocks parsed)."""
    deals, holds = read_book(scenario, book, hold_columns=HOLD_KEY)
    if deals and forecast is None:
        forecast = forecast_job.ensure_forecast(scenario).table
    return book_model(scenario, deals, holds, forecast, shocks=shocks, preempt_multiplier=preempt_multiplier)


def stress_book(scenario: Any, book: str | os.PathLike | None = None, *, draws: int = DEFAULT_DRAWS, seed: int = 0,
                shocks: Sequence[str | Shock] = (), preempt_multiplier: float = 1.0, liability: str = "refund",
                method: str = "fast", forecast: pd.DataFrame | None = None, keep_draws: bool = True,
                advance: Callable[[float], Any] | None = None) -> StressResult:
    """Monte Carlo stress of every deal committed in the scenario's book.

    Per deal: probability of under-delivery, expected shortfall (impressions), expected liability
    and margin (currency), each with its Monte Carlo standard error; for the book: expected
    liability, VaR95, CVaR95, the deals' contributions to CVaR and the networks whose level
    factor drives the tail. `shocks` are strings like "network=NAME:-0.15" or `Shock`s.

    References
    ----------
    Rockafellar & Uryasev (2000), J. Risk 2(3).
    """
    model, parsed = load_book_model(scenario, book, forecast=forecast, shocks=shocks,
                                    preempt_multiplier=preempt_multiplier)
    return stress_model(model, draws=draws, seed=seed, method=method, liability=liability, shocks=parsed,
                        preempt_multiplier=preempt_multiplier, currency=getattr(scenario, "currency", "USD"),
                        keep_draws=keep_draws, advance=advance)
