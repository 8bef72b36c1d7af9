"""Fit or load the forecast of a scenario; cache in ``<scenario>/forecast/``.

Files (each written atomically; ``meta.json`` last, so a complete meta means a complete fit):

- ``forecast.parquet``: the forecast table (DEVELOPERS.md, "Forecast table").
- ``model.pkl``: the fitted `forecasting.pipeline.DaypartForecaster` (pickle; load only files you
  wrote yourself).
- ``meta.json``: the fit key (history fingerprint, scenario calendar, dayparts, units, universes,
  demos, seed, versions), fold origins, variance components and calibration figures.

Forecasts are estimates from past audiences; contract terms decide what is owed on delivery.
"""
from __future__ import annotations

import hashlib
import json
import pickle
import platform
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import duckdb
import numpy as np
import pandas as pd
import sklearn

from forecasting.backtest import run_backtest
from forecasting.ingest import daily_profiles
from forecasting.pipeline import DaypartForecaster
from forecasting.profiles import ProfileCube
from forecasting.spark_engine import spark_available

from planner.atomic import check_writable, write_text_atomic, write_with_atomic
from planner.errors import InputError
from planner.scenario import history_fingerprint

FORECAST_DIR = "forecast"
TABLE_FILE = "forecast.parquet"
MODEL_FILE = "model.pkl"
META_FILE = "meta.json"
#: bump when the model or the table changes meaning (old caches are then refitted)
MODEL_VERSION = "8"  # 3: network-week factor; 4: common factor; 5: stacked candidates, widened law; 6: disagreement floor; 7: weights from plan-like evidence; 8: series launched after a refit set apart

Progress = Callable[[str, float], None]


@dataclass
class ForecastResult:
    """A scenario's forecast: the table, whether it was fitted by this call, where it lives."""

    table: pd.DataFrame
    fitted_now: bool
    path: Path
    meta: dict = field(default_factory=dict)


def forecast_dir(scenario) -> Path:
    return Path(scenario.path) / FORECAST_DIR


def _versions() -> dict:

    return {"model": MODEL_VERSION, "numpy": np.__version__, "pandas": pd.__version__,
            "scikit-learn": sklearn.__version__, "duckdb": duckdb.__version__,
            "python": platform.python_version()}


def fit_key(scenario, *, demo: str | None = None, seed: int = 0) -> dict:
    """What the forecast depends on; a change in any of it means a refit."""

    inv = scenario.inventory[["zone", "network", "daypart", "week"]].astype(str)
    inv_hash = hashlib.sha1(pd.util.hash_pandas_object(
        inv.sort_values(list(inv.columns)), index=False).to_numpy().tobytes()).hexdigest()[:16]
    uni = scenario.universes[["zone", "demo", "universe"]].astype(str)
    uni_hash = hashlib.sha1(pd.util.hash_pandas_object(
        uni.sort_values(["zone", "demo"]), index=False).to_numpy().tobytes()).hexdigest()[:16]
    nets = scenario.networks[["network", "genre"]].astype(str).sort_values("network")
    return {
        "history": history_fingerprint(scenario),
        "first_week": str(scenario.first_week), "weeks": int(scenario.weeks),
        "dayparts": [[d.name, list(d.days), list(d.quarter_hours)] for d in scenario.dayparts],
        "inventory": inv_hash, "universes": uni_hash,
        "networks": [list(r) for r in nets.itertuples(index=False)],
        "demos": [demo] if demo else list(scenario.demos),
        "seed": int(seed), "model_version": MODEL_VERSION,
    }


def _read_meta(folder: Path) -> dict | None:
    p = folder / META_FILE
    if not p.is_file() or not (folder / TABLE_FILE).is_file():
        return None
    try:
        return json.loads(p.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None


def load_history_cube(scenario, *, demos=None, engine: str = "duckdb", progress: Progress | None = None):
    """History -> (ProfileCube, series info with genre). Raises InputError when there is none."""

    progress = progress or (lambda m, f: None)
    progress("reading history into daily profiles", 0.0)
    demos = list(demos) if demos else list(scenario.demos)
    path = Path(scenario.history_path)
    if not path.exists():
        raise InputError(f"{path.name}: history file is missing in {scenario.path}")
    if engine == "spark":
        ok, why = spark_available()
        if not ok:
            raise InputError(f"--engine spark: {why}")
    try:
        profiles = daily_profiles(path, engine=engine, demos=demos)
    except FileNotFoundError as exc:
        raise InputError(str(exc)) from None
    if profiles.empty:
        raise InputError(f"{path.name}: no history rows for demo(s) {', '.join(demos)}")
    series = pd.MultiIndex.from_product(
        [sorted(map(str, scenario.zone_names)), sorted(map(str, scenario.network_names)), sorted(demos)],
        names=["zone", "network", "demo"]).to_frame(index=False)
    cube = ProfileCube.from_profiles(profiles, series=series)
    genre = scenario.networks.assign(network=scenario.networks["network"].astype(str)).set_index("network")["genre"]
    info = cube.series.copy()
    info["genre"] = info["network"].map(genre).astype(str)
    return cube, info


def fit_forecast(scenario, *, demo: str | None = None, engine: str = "duckdb", seed: int = 0,
                 progress: Progress | None = None) -> ForecastResult:
    """Fit the forecast of `scenario` (all demos, or `demo`) and write ``<scenario>/forecast/``.

    Returns
    -------
    ForecastResult with the table of every inventory unit x demo for the plan weeks.
    """

    progress = progress or (lambda m, f: None)
    if demo is not None and demo not in scenario.demos:
        raise InputError(f"--demo {demo!r}: not a demo of the scenario (known: {', '.join(scenario.demos)})")
    key = fit_key(scenario, demo=demo, seed=seed)
    check_writable(forecast_dir(scenario), "the fitted forecast")  # before minutes of fitting
    t0 = time.perf_counter()
    cube, info = load_history_cube(scenario, demos=[demo] if demo else None, engine=engine, progress=progress)
    t_ingest = time.perf_counter() - t0

    def sub(message: str, fraction: float) -> None:
        progress(message, 0.15 + 0.85 * fraction)

    fc = DaypartForecaster(random_state=seed)
    try:
        fc.fit(cube, info, scenario.dayparts, pd.Timestamp(scenario.first_week), scenario.weeks, progress=sub,
               universes=scenario.universes)
    except ValueError as exc:
        raise InputError(f"{Path(scenario.history_path).name}: {exc}") from None
    table = fc.forecast_table(scenario.universes, units=scenario.inventory)
    folder = forecast_dir(scenario)
    folder.mkdir(parents=True, exist_ok=True)
    write_with_atomic(folder / TABLE_FILE, lambda p: table.to_parquet(p, index=False))
    write_with_atomic(folder / MODEL_FILE, lambda p: p.write_bytes(pickle.dumps(fc, protocol=pickle.HIGHEST_PROTOCOL)))
    hist_end = cube.day0 + pd.Timedelta(days=cube.n_days - 1)
    meta = {
        "key": key, "versions": _versions(), "engine": engine, "seed": int(seed),
        "history": {"first_day": str(cube.day0.date()), "last_day": str(hist_end.date()),
                    "series": int(cube.n_series), "days": int(cube.n_days)},
        "rows": int(len(table)),
        "fit": fc.summary(),
        "seconds": {"ingest": round(t_ingest, 2), "total": round(time.perf_counter() - t0, 2)},
        "caution": "Forecasts are estimates from past audiences; contract terms decide what is owed.",
    }
    write_text_atomic(folder / META_FILE, json.dumps(meta, indent=2, default=str))
    return ForecastResult(table=table, fitted_now=True, path=folder / TABLE_FILE, meta=meta)


def ensure_forecast(scenario, *, demo: str | None = None, engine: str = "duckdb", seed: int = 0,
                    progress: Progress | None = None, force: bool = False) -> ForecastResult:
    """The scenario's forecast, fitted now when missing or stale (history, calendar, dayparts,
    inventory, universes, networks, demos, seed or model version changed), else read from cache."""
    folder = forecast_dir(scenario)
    meta = _read_meta(folder)
    if not force and meta is not None:
        try:
            fresh = meta.get("key") == json.loads(json.dumps(fit_key(scenario, demo=demo, seed=seed)))
        except OSError:
            fresh = False
        if fresh:
            return ForecastResult(table=pd.read_parquet(folder / TABLE_FILE), fitted_now=False,
                                  path=folder / TABLE_FILE, meta=meta)
    return fit_forecast(scenario, demo=demo, engine=engine, seed=seed, progress=progress)


def shared_error_caution(meta: dict | None, scenario_path, brief: bool = False) -> str | None:
    """The caution a fit's own check of its refit totals calls for, or None.

    `meta` is a forecast's ``meta.json`` (see `ensure_forecast`); the caution is due when the
    chi-square test of the refits' total misses against the error law rejects at 5%
    (``fit.calibration.total_z_p``), and names the stress shock of one shift of the estimated
    sd (``total_excess_sd``); not due when the fit widened its common factor to cover those misses
    (``level_error.common_widened_by_sd`` > 0: the law, and so every chance of delivery, already
    holds them). `brief`: the same caution in one sentence of at most 150
    characters, pointing to `pledge forecast fit` and the report for the whole text (what
    answers print; the whole text stays in their --json).
    """
    fit = (meta or {}).get("fit") or {}
    cal = fit.get("calibration") or {}
    p = cal.get("total_z_p")
    if p is None or not p < 0.05:
        return None
    if float((fit.get("level_error") or {}).get("common_widened_by_sd") or 0.0) > 0:
        return None  # the law was widened until the refits' totals were within it: the chances include it
    if brief:
        return (f"forecast refits missed their totals beyond the error law (p = {p:.3f}): shared errors may "
                "exceed the bands; see pledge forecast fit, the report")
    excess = float(cal.get("total_excess_sd") or 0.0)
    common = float((fit.get("level_error") or {}).get("rel_sd_common") or 0.0)
    n = len(cal.get("leave_one_fold_out_total") or {})
    held = (f", even with the shift shared by all units that the law holds (sd {common:.1%})" if common > 0 else "")
    hint = (f" The misses suggest a further shift shared by all units with an sd of about {excess:.1%} (a "
            f"rough figure from {n} refits); `pledge stress {scenario_path} --shock all:-{excess:.3f}` shows "
            "what one such shift does to the book." if excess > 0 else "")
    return ("The forecast's refits missed their totals by more than its error law allows (chi-square "
            f"p = {p:.3f}{held}), so errors shared by all units may be larger than the bands assume; a deal "
            "spread over many networks may be riskier than its chance of delivery shows (README, Cautions)."
            + hint)


def forecast_meta(scenario) -> dict | None:
    """The cached forecast's ``meta.json`` as a dict, None when there is none."""
    return _read_meta(forecast_dir(scenario))


def forecast_caution(scenario, scenario_path=None, brief: bool = False) -> str | None:
    """`shared_error_caution` of the scenario's cached forecast (the stress command naming
    `scenario_path`, default the scenario's path; `brief` its one-sentence form), None when there
    is no forecast or no caution."""
    return shared_error_caution(forecast_meta(scenario), scenario.path if scenario_path is None else scenario_path,
                                brief)


def load_forecast(scenario) -> pd.DataFrame:
    """The cached forecast table; InputError when the scenario has none."""
    folder = forecast_dir(scenario)
    path = folder / TABLE_FILE
    if not path.is_file():
        raise InputError(f"{folder}: no forecast yet (run `pledge forecast fit {scenario.path}`)")
    return pd.read_parquet(path)


def load_model(scenario):
    """The fitted `DaypartForecaster` saved beside the table (InputError when missing)."""
    path = forecast_dir(scenario) / MODEL_FILE
    if not path.is_file():
        raise InputError(f"{path}: no saved model (run `pledge forecast fit {scenario.path}`)")
    return pickle.loads(path.read_bytes())


def backtest_scenario(scenario, *, holdout_weeks: int = 13, demo: str | None = None, engine: str = "duckdb",
                      seed: int = 0, gap_days: int | None = None, windows: int = 1,
                      progress: Progress | None = None) -> dict:
    """Backtest the forecaster on the scenario's history (`forecasting.backtest.run_backtest`).

    The held-out weeks are the last `holdout_weeks` of the history; the cut-off sits the real
    forecast's lead gap before them (history end -> plan week 1) unless `gap_days` is given.
    With `windows` > 1, that many successive blocks of `holdout_weeks` weeks ending the history
    are each scored by their own refit and the scores pooled. Returns the JSON-able summary.
    """

    if holdout_weeks < 1:
        raise InputError(f"--holdout-weeks {holdout_weeks}: must be at least 1")
    if windows < 1:
        raise InputError(f"--windows {windows}: must be at least 1")
    progress = progress or (lambda m, f: None)
    cube, info = load_history_cube(scenario, demos=[demo] if demo else None, engine=engine, progress=progress)
    if gap_days is None:
        gap_days = max(cube.day_index(pd.Timestamp(scenario.first_week)) - cube.n_days, 0)

    def sub(message: str, fraction: float) -> None:
        progress(message, 0.15 + 0.85 * fraction)

    try:
        res = run_backtest(cube, info, scenario.dayparts, scenario.universes, holdout_weeks=holdout_weeks,
                           gap_days=gap_days, windows=windows, forecaster=DaypartForecaster(random_state=seed),
                           progress=sub)
    except ValueError as exc:
        raise InputError(f"{Path(scenario.history_path).name}: {exc}") from None
    out = res.summary
    out["caution"] = "Backtest scores are of past weeks; future errors can be larger."
    return out
