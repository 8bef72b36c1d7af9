"""The workflows: the only code that reads the book and the forecast cache and runs the steps in
order (open a scenario, check, plan, commit, rebalance, stress, report, demo).

The modules below them compute: they take frames and arrays and return results
(`planner.deals`, `planner.allocate`, `planner.stress`, `planner.rebalance`, ...), store
(`planner.book`), or render (`planner.report`). The command line (`planner.cli`) calls these.
"""
from __future__ import annotations

from planner.workflows.deal import check_deal, commit_deal, forecast_table, plan_deal, plan_for_commit, run_deal
from planner.workflows.demo import DemoResult, example_actuals, prepare_folder, run_demo
from planner.workflows.rebalance import rebalance_deal
from planner.workflows.report import (booked_section, build_report, evaluate_deal, forecast_bands,
                                      relaxed_frontier, unit_history)
from planner.workflows.scenario import open_scenario
from planner.workflows.stress import load_book_model, stress_book

__all__ = ["DemoResult", "booked_section", "build_report", "check_deal", "commit_deal", "evaluate_deal",
           "example_actuals", "forecast_bands", "forecast_table", "load_book_model", "open_scenario", "plan_deal",
           "plan_for_commit", "prepare_folder", "rebalance_deal", "relaxed_frontier", "run_deal", "run_demo",
           "stress_book", "unit_history"]
