"""Planner: scenarios, deals, allocation, the book, stress tests and reports.

The command line (`pledge`) is a thin layer over the functions exported here, so everything it
does can be done from a notebook::

    from planner import open_scenario, ensure_forecast, check_deal, commit_deal, stress_book, build_report

    scn = open_scenario("pledge-demo")         # load_scenario too, once the folder has its history
    ensure_forecast(scn)                       # fits once, then reuses <scenario>/forecast/
    result = check_deal(scn, "some-deal", frontier=True)

Names are imported lazily (on first use), so `import planner` stays fast and light.
"""
from __future__ import annotations

import importlib
from typing import Any

# public name -> module that defines it
_EXPORTS = {
    "load_scenario": "planner.scenario",
    "open_scenario": "planner.workflows",
    "load_history": "planner.scenario",
    "validate_history": "planner.scenario",
    "Scenario": "planner.scenario",
    "Deal": "planner.scenario",
    "ensure_forecast": "planner.forecast_job",
    "load_forecast": "planner.forecast_job",
    "fit_forecast": "planner.forecast_job",
    "DeliveryModel": "planner.delivery",
    "check_deal": "planner.workflows",
    "plan_deal": "planner.workflows",
    "commit_deal": "planner.workflows",
    "release_deal": "planner.book",
    "list_deals": "planner.book",
    "read_book": "planner.book",
    "held_spots": "planner.book",
    "stress_book": "planner.workflows",
    "rebalance_deal": "planner.workflows",
    "build_report": "planner.workflows",
    "render_report": "planner.report",
    "write_report": "planner.report",
    "run_demo": "planner.workflows",
    "copy_demo": "scenarios.folders",
    "InputError": "planner.errors",
}

__all__ = sorted(_EXPORTS)


def __getattr__(name: str) -> Any:
    module = _EXPORTS.get(name)
    if module is None:
        raise AttributeError(f"module 'planner' has no attribute {name!r}")
    value = getattr(importlib.import_module(module), name)
    globals()[name] = value  # cache: the next lookup is a plain attribute
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_EXPORTS))
