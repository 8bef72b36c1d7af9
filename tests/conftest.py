"""Shared fixtures.

- `small_scenario`: a small invented scenario made by the project's generator (seconds).
- `demo_scenario`: a private copy of the shipped demo scenario with its history generated.
- `demo_fitted`: the same copy after `forecast fit` (done once per test session).
Each returns the scenario folder as a `pathlib.Path`; tests must not modify them (copy first).
"""
from __future__ import annotations

import os
import shutil

import pytest

os.environ.setdefault("OMP_NUM_THREADS", "2")


@pytest.fixture(scope="session")
def small_scenario(tmp_path_factory):
    from scenarios.folders import make_small_scenario

    return make_small_scenario(tmp_path_factory.mktemp("small") / "small", seed=11)


@pytest.fixture(scope="session")
def demo_scenario(tmp_path_factory):
    from scenarios.folders import copy_demo

    return copy_demo(tmp_path_factory.mktemp("demo") / "demo")


@pytest.fixture(scope="session")
def demo_fitted(demo_scenario):
    from planner.forecast_job import ensure_forecast
    from planner.scenario import load_scenario

    ensure_forecast(load_scenario(demo_scenario))
    return demo_scenario


@pytest.fixture()
def scenario_copy(tmp_path):
    """Return a function that copies a scenario folder into this test's tmp dir."""

    def _copy(src, name="copy"):
        dest = tmp_path / name
        shutil.copytree(src, dest)
        return dest

    return _copy
