"""Shared fixtures.

- `small_scenario`: a small invented scenario made by the project's generator (seconds).
- `small_fitted`: a copy of `small_scenario` fitted by `pledge forecast fit` (run in this process,
  once per test session; its `history.parquet` a symbolic link to `small_scenario`'s);
  `small_fit`: the same folder with what the command printed and the fit's `ForecastResult`.
- `demo_scenario`: a private copy of the shipped demo scenario with its history generated.
- `demo_fitted`: the same copy after `forecast fit` (done once per test session).
Each returns the scenario folder as a `pathlib.Path`; tests must not modify them (copy first:
`scenario_copy` in a test, `fitted_copy` in a module fixture; `fitted_copy` keeps a fitted
forecast current and shares the history file).
"""
from __future__ import annotations

import contextlib
import io
import os
import shutil
from pathlib import Path
from typing import NamedTuple

import pytest

os.environ.setdefault("OMP_NUM_THREADS", "2")


@pytest.fixture(scope="session")
def small_scenario(tmp_path_factory):
    from scenarios.folders import make_small_scenario

    return make_small_scenario(tmp_path_factory.mktemp("small") / "small", seed=11)


def copy_sharing_history(src, dest) -> Path:
    """Copy scenario folder `src` to `dest` except its history.parquet, which becomes a symbolic
    link to `src`'s (resolved) history file. The fit key names the resolved history (path, size,
    mtime: `planner.scenario.history_fingerprint`), so a forecast fitted in `src` stays current in
    the copy and is not fitted again. The history is shared: never write to it through the copy."""
    src, dest = Path(src), Path(dest)
    shutil.copytree(src, dest, ignore=shutil.ignore_patterns("history.parquet"))
    (dest / "history.parquet").symlink_to((src / "history.parquet").resolve())
    return dest


class SmallFit(NamedTuple):
    folder: Path  # the fitted folder
    printed: str  # what `pledge forecast fit` printed on stdout
    result: object  # the `planner.forecast_job.ForecastResult` the fit returned (fitted_now True)


@pytest.fixture(scope="session")
def small_fit(small_scenario, tmp_path_factory) -> SmallFit:
    """Fit a copy of the small scenario once, by the command line's `forecast fit` run in this
    process (7-10 s on 2 cores); the fit's own result is kept by a spy on `fit_forecast`."""
    import planner.forecast_job as fj
    from planner.cli import main

    folder = copy_sharing_history(small_scenario, tmp_path_factory.mktemp("small_fitted") / "small")
    real, seen = fj.fit_forecast, []

    def spy(*args, **kwargs):
        seen.append(real(*args, **kwargs))
        return seen[-1]

    out, err = io.StringIO(), io.StringIO()
    with pytest.MonkeyPatch.context() as mp, contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        mp.setattr(fj, "fit_forecast", spy)
        code = main(["forecast", "fit", str(folder)])
    assert code == 0 and len(seen) == 1, err.getvalue()
    return SmallFit(folder, out.getvalue(), seen[0])


@pytest.fixture(scope="session")
def small_fitted(small_fit) -> Path:
    return small_fit.folder


@pytest.fixture(scope="session")
def fitted_copy():
    """`copy_sharing_history(src, dest)`: a copy of a fitted folder whose forecast stays current
    (its history a link to the source's). Session-scoped, so module fixtures may use it."""
    return copy_sharing_history


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
