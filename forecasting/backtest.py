"""Backtest: refit on the history before a cut-off, score the held-out weeks at daypart level.

The score is on unit-week mean impressions (zone x network x daypart x demo x week: the mean
over the daypart's observed quarter-hour-day cells, times the universe), the quantity the level
error model describes. The model's predictive law is N(mean, level_sd^2); each baseline's is
N(baseline, (rel_sd x baseline)^2) with its own held-out spread. All three are scored on the
same unit-weeks.

References
----------
Gneiting & Raftery (2007), JASA 102(477): CRPS; Gneiting, Balabdaoui & Raftery (2007),
Probabilistic forecasts, calibration and sharpness, JRSS B 69(2): coverage and PIT.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np
import pandas as pd

from .baselines import last_year, trailing_mean
from .dayparts import as_specs, daypart_week_means
from .pipeline import DaypartForecaster, Progress
from .profiles import ProfileCube
from .scoring import coverage, crps_gaussian, pit_histogram, wape

LEVELS = (0.5, 0.8, 0.95)


@dataclass
class BacktestResult:
    """Scores of a backtest (`summary` is the JSON-able dict) and the scored unit-weeks."""

    summary: dict
    scored: pd.DataFrame


def score_levels(actual, mean, sd) -> dict:
    """Scores of normal forecasts N(mean, sd^2) of unit-week levels against what happened.

    Parameters
    ----------
    actual, mean, sd : arrays of the same shape (impressions per spot).

    Returns
    -------
    dict ``crps`` (mean, impressions), ``crps_relative`` (sum CRPS / sum |actual|), ``wape``
    (fraction), ``coverage`` {"0.5", "0.8", "0.95"} (fractions inside the central intervals).
    """
    return _scores(np.asarray(actual, float), np.asarray(mean, float), np.asarray(sd, float))


def _scores(y, mu, sd) -> dict:
    return {
        "crps": float(np.mean(crps_gaussian(y, mu, sd))),
        "crps_relative": float(np.sum(crps_gaussian(y, mu, sd)) / max(np.sum(np.abs(y)), 1e-300)),
        "wape": wape(y, mu),
        "coverage": {str(lv): coverage(y, mu, sd, lv) for lv in LEVELS},
    }


def run_backtest(cube: ProfileCube, info: pd.DataFrame, dayparts, universes: pd.DataFrame, *,
                 holdout_weeks: int = 13, gap_days: int = 0, forecaster: DaypartForecaster | None = None,
                 progress: Progress | None = None) -> BacktestResult:
    """Refit before a cut-off and score the last `holdout_weeks` weeks of the history.

    Parameters
    ----------
    cube, info : the whole history and its series (``zone, network, demo, genre``).
    dayparts : objects with ``name, days, quarter_hours``.
    universes : ``zone, demo, universe``.
    holdout_weeks : held-out weeks at the end of the history.
    gap_days : lead gap between the cut-off and the first held-out day (the real forecast's gap).
    forecaster : an unfitted `DaypartForecaster` (its settings and seed are used).

    Returns
    -------
    BacktestResult ; ``summary`` has ``crps, wape, coverage{0.5,0.8,0.95}, by_daypart,
    baselines{name: {crps, wape, coverage}}, crps_skill_vs_best_baseline, holdout, units``.
    """
    specs = as_specs(dayparts)
    W = int(holdout_weeks)
    T = cube.n_days
    h0 = T - 7 * W
    cut = h0 - int(gap_days)
    if cut <= 0:
        raise ValueError(f"history of {T} days is too short for {W} held-out weeks")
    fc = forecaster or DaypartForecaster()
    train = ProfileCube(cube.series, cube.day0, cube.values[:, :cut])
    fc.fit(train, info, specs, cube.day0 + pd.Timedelta(days=h0), W, progress=progress, universes=universes)

    actual_cells = cube.values[:, h0:]
    pad = fc.plan_pred_.shape[1] - actual_cells.shape[1]
    if pad > 0:
        actual_cells = np.concatenate(
            [actual_cells, np.full((cube.n_series, pad, 96), np.nan, dtype=actual_cells.dtype)], axis=1)
    wd = (cube.day0.day_of_week + h0) % 7
    starts = 7 * np.arange(W)
    actual, counts = daypart_week_means(actual_cells, wd, starts, specs)
    masked = np.where(np.isfinite(actual_cells), fc.plan_pred_, np.nan)
    model_raw, _ = daypart_week_means(masked, wd, starts, specs)
    model_mean = model_raw * fc.level_factor(fc.plan_recent_)
    base = {
        "last_year": last_year(cube.values[:, :cut], cube.day0.day_of_week, h0 + starts, specs),
        "trailing_8w": trailing_mean(cube.values, cube.day0.day_of_week, cut, specs, W),
    }
    need = fc.min_cells * np.array([len(d.quarter_hours) * len(d.days) for d in specs])[None, :, None]
    ok = (counts >= need) & np.isfinite(actual) & np.isfinite(model_mean)
    for b in base.values():
        ok &= np.isfinite(b) & (b > 0)
    s, p, w = np.nonzero(ok)
    names = np.array([d.name for d in specs])
    df = pd.DataFrame({
        "zone": info["zone"].to_numpy()[s], "network": info["network"].to_numpy()[s],
        "demo": info["demo"].to_numpy()[s], "genre": info["genre"].to_numpy()[s],
        "daypart": names[p], "week": w + 1,
        "history_weeks": fc.history_weeks_[s],
    })
    uni = universes[["zone", "demo", "universe"]].astype({"zone": str, "demo": str})
    u = df.merge(uni, on=["zone", "demo"], how="left")["universe"].to_numpy(float)
    u = np.where(np.isfinite(u), u, 1.0)
    df["size"] = np.log10(np.maximum(model_mean[s, p, w] * fc.universe_s_[s], 1e-9))
    rel = fc.level_.predict(df)
    rel_sd = np.sqrt(rel["rel_sd_network"] ** 2 + rel["rel_sd_network_week"] ** 2 + rel["rel_sd_flight"] ** 2
                     + rel["rel_sd_week"] ** 2).to_numpy()
    df["actual"] = actual[s, p, w] * u
    df["mean"] = model_mean[s, p, w] * u
    df["sd"] = rel_sd * df["mean"]
    summary = _scores(df["actual"], df["mean"], df["sd"])
    summary["pit_histogram"] = pit_histogram(df["actual"], df["mean"], df["sd"]).tolist()
    summary["by_daypart"] = {
        dp: _scores(g["actual"], g["mean"], g["sd"]) for dp, g in df.groupby("daypart", sort=False)}
    summary["baselines"] = {}
    for name, b in base.items():
        spread = fc.baseline_spread_.get(name, {})
        bm = b[s, p, w] * u
        bsd = df["daypart"].map(spread).astype(float).fillna(np.nanmean(list(spread.values()) or [0.1])).to_numpy() * bm
        df[f"{name}_mean"] = bm
        df[f"{name}_sd"] = bsd
        summary["baselines"][name] = _scores(df["actual"], bm, bsd)
    best = min(v["crps"] for v in summary["baselines"].values())
    summary["crps_skill_vs_best_baseline"] = float(1.0 - summary["crps"] / best) if best > 0 else float("nan")
    summary["holdout"] = {
        "first_day": str((cube.day0 + pd.Timedelta(days=h0)).date()),
        "last_day": str((cube.day0 + pd.Timedelta(days=T - 1)).date()),
        "weeks": W, "cutoff_day": str((cube.day0 + pd.Timedelta(days=cut - 1)).date()),
        "lead_gap_days": int(gap_days)}
    summary["units"] = int(len(df))
    summary["fit"] = fc.summary()
    return BacktestResult(summary=summary, scored=df)
