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

import copy
from dataclasses import dataclass

import numpy as np
import pandas as pd

from .baselines import BASELINES, last_year, trailing_mean
from .dayparts import as_specs, daypart_week_means
from .factors import LEVEL_FACTORS
from .pipeline import DaypartForecaster, Progress
from .profiles import ProfileCube
from .scoring import (coverage, coverage_if_calibrated, crps_gaussian, measured_factor_sds, pit_histogram,
                      total_bias_sd, wape)
from .uncertainty import COMPONENT_KEYS, factor_components

LEVELS = (0.5, 0.8, 0.95)
#: relative sd components of the level error and the rows that share each factor (None: own),
#: as `LevelErrorModel` nests them, with the backtest block in the place of its refit (fold)
COMPONENTS = tuple((col, None if keys is None else ["block"] + keys) for col, keys in COMPONENT_KEYS)
#: Monte Carlo draws (and seed) of the coverage a calibrated forecast would show
CALIBRATED_DRAWS, CALIBRATED_SEED = 500, 0


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
    (fraction), ``bias`` (sum actual / sum mean - 1, fraction), ``coverage`` {"0.5", "0.8",
    "0.95"} (fractions inside the central intervals).
    """
    return _scores(np.asarray(actual, float), np.asarray(mean, float), np.asarray(sd, float))


def _scores(y, mu, sd) -> dict:
    return {
        "crps": float(np.mean(crps_gaussian(y, mu, sd))),
        "crps_relative": float(np.sum(crps_gaussian(y, mu, sd)) / max(np.sum(np.abs(y)), 1e-300)),
        "wape": wape(y, mu),
        "bias": float(np.sum(y) / np.sum(mu) - 1.0) if np.sum(mu) > 0 else float("nan"),
        "coverage": {str(lv): coverage(y, mu, sd, lv) for lv in LEVELS},
    }


def _pooled_summary(df: pd.DataFrame, per_window: list[dict], seed: int, W: int, K: int, gap_days: int) -> dict:
    """The backtest's summary over every scored unit-week of the K blocks (`df`), with each block's
    own entry under ``windows`` (latest first)."""
    if K == 1:  # the pooled scores are the one block's
        summary = {k: v for k, v in per_window[0].items() if k not in ("holdout", "units", "law_estimated_on")}
    else:
        summary = _block_scores(df, seed)
    summary["pit_histogram"] = pit_histogram(df["actual"], df["mean"], df["sd"]).tolist()
    summary["by_daypart"] = {
        dp: _scores(g["actual"], g["mean"], g["sd"]) for dp, g in df.groupby("daypart", sort=False)}
    if K == 1:
        summary["holdout"] = per_window[0]["holdout"]
    else:
        summary["holdout"] = {
            "first_day": per_window[-1]["holdout"]["first_day"], "last_day": per_window[0]["holdout"]["last_day"],
            "weeks": W * K, "blocks": K, "weeks_per_block": W,
            "cutoff_day": per_window[0]["holdout"]["cutoff_day"], "lead_gap_days": int(gap_days)}
    summary["units"] = int(len(df))
    summary["windows"] = per_window
    return summary


def run_backtest(cube: ProfileCube, info: pd.DataFrame, dayparts, universes: pd.DataFrame, *,
                 holdout_weeks: int = 13, gap_days: int = 0, windows: int = 1,
                 forecaster: DaypartForecaster | None = None,
                 progress: Progress | None = None) -> BacktestResult:
    """Refit before a cut-off and score the last `holdout_weeks` weeks of the history.

    With ``windows = K > 1`` the K successive, non-overlapping blocks of `holdout_weeks` weeks
    that end the history are each scored by their own refit (rolling origin: each cut-off sits
    `gap_days` before its block), and the scores are pooled over every scored unit-week. One
    13-week block is a single draw of the network-wide shocks; pooling blocks gives the
    calibration of the method a smaller sampling error.

    Parameters
    ----------
    cube, info : the whole history and its series (``zone, network, demo, genre``).
    dayparts : objects with ``name, days, quarter_hours``.
    universes : ``zone, demo, universe``.
    holdout_weeks : held-out weeks per block, the last block ending the history.
    gap_days : lead gap between a cut-off and the first day of its block (the real forecast's gap).
    windows : held-out blocks (1 = the last `holdout_weeks` only).
    forecaster : an unfitted `DaypartForecaster` (its settings and seed are used for every refit).

    Returns
    -------
    BacktestResult ; ``summary`` has ``crps, wape, coverage{0.5,0.8,0.95}, by_daypart,
    baselines{name: {crps, wape, coverage}}, crps_skill_vs_best_baseline, holdout, units``,
    ``coverage_if_calibrated`` (`coverage_range_if_calibrated`), ``factor_sd``
    (`factor_sd_measured_and_law`),
    ``windows`` (one entry per block, latest first: ``holdout, units, law_estimated_on`` (first and
    last held-out day of each of the block's own refits), ``crps, wape, bias, coverage,
    coverage_if_calibrated, factor_sd, baselines, crps_skill_vs_best_baseline``) and ``fit`` (the
    latest block's refit).

    References
    ----------
    Tashman, L. J. (2000). Out-of-sample tests of forecasting accuracy: an analysis and review.
    Int. J. Forecasting 16(4): rolling-origin evaluation over several origins.
    """
    specs = as_specs(dayparts)
    W = int(holdout_weeks)
    K = int(windows)
    if K < 1:
        raise ValueError(f"windows must be at least 1, got {K}")
    T = cube.n_days
    proto = forecaster or DaypartForecaster()
    seed = int(getattr(proto, "random_state", None) or CALIBRATED_SEED)
    frames, per_window = [], []
    for j in range(K):
        h0 = T - 7 * W * (j + 1)
        cut = h0 - int(gap_days)
        if cut <= 0:
            what = f"{W} held-out weeks" if K == 1 else f"{K} blocks of {W} held-out weeks"
            raise ValueError(f"history of {T} days is too short for {what} at a lead gap of {int(gap_days)} days")
        fc = copy.deepcopy(proto)
        sub = None if progress is None else (
            lambda m, f, j=j: progress(m if K == 1 else f"block {j + 1}/{K}: {m}", (j + f) / K))
        df = _score_block(cube, info, specs, universes, fc, h0, cut, W, sub)
        df["block"] = j + 1
        frames.append(df)
        if j == 0:
            latest_fit = fc.summary()
        entry = {"holdout": _holdout(cube, h0, cut, W, gap_days), "units": int(len(df)),
                 "law_estimated_on": fc.fold_scored_days()}
        entry.update(_block_scores(df, seed))
        per_window.append(entry)
    df = pd.concat(frames, ignore_index=True)
    summary = _pooled_summary(df, per_window, seed, W, K, gap_days)
    summary["fit"] = latest_fit
    return BacktestResult(summary=summary, scored=df)


def _holdout(cube: ProfileCube, h0: int, cut: int, W: int, gap_days: int) -> dict:
    """Dates of one held-out block of W weeks from day `h0`, refit on days before `cut`."""
    day = lambda i: str((cube.day0 + pd.Timedelta(days=int(i))).date())  # noqa: E731
    return {"first_day": day(h0), "last_day": day(h0 + 7 * W - 1), "weeks": W,
            "cutoff_day": day(cut - 1), "lead_gap_days": int(gap_days)}


def coverage_range_if_calibrated(scored: pd.DataFrame, observed: dict | None = None,
                                 draws: int = CALIBRATED_DRAWS, seed: int = CALIBRATED_SEED,
                                 tolerance: float = 0.05, observed_bias: float | None = None) -> dict:
    """What coverage one backtest can show when the forecast's error law is exactly right.

    The level error of each scored unit-week is drawn from the forecast's own variance
    components, with the factors shared as the model says (network by block; network-week;
    flight of a zone x network x daypart x demo; own), and the share inside each central
    interval is counted. A 13-week block holds a few dozen network draws, so its coverage
    swings well beyond the binomial spread of independent hits.

    Parameters
    ----------
    scored : ``BacktestResult.scored`` (columns ``block, zone, network, daypart, demo, week`` and
        the ``rel_sd_*`` components of `forecasting.uncertainty.COMPONENT_KEYS`, fractions of the mean).
    observed : {"0.5": .., ...} the coverage measured on these rows (fractions), optional.
    draws, seed : Monte Carlo draws and seed.
    tolerance : distance from nominal (fraction) for ``share_within``.
    observed_bias : the measured total bias (sum actual / sum forecast - 1), optional.

    Returns
    -------
    dict ``levels``: level -> ``{"low", "high"}`` (5% and 95% quantiles of the simulated
    coverage, fractions) and, with `observed`, ``share_as_far`` (share of draws at least as far
    from the nominal level as the observed coverage: a two-sided Monte Carlo p-value);
    ``share_within``: share of draws within `tolerance` of nominal at every level at once (how
    often a calibrated forecast would pass such a target on these rows); ``tolerance``, ``draws``;
    ``bias_sd``: the sd of the total bias under the same law (exact: the bias is
    ``sum_i mean_i e_i / sum_i mean_i``, so its variance is the sum over components and groups of
    the squared mean-weighted sds of each group), and with `observed_bias`, ``bias_z`` (the
    measured bias in those sds: N(0, 1) under the law, approximately).

    References
    ----------
    Christoffersen, P. F. (1998). Evaluating interval forecasts. International Economic Review
    39(4), 841-862 (coverage tests of interval forecasts); the Monte Carlo test of Barnard (1963)
    / Hope (1968), with the null law simulated from the fitted components.
    """
    comps = factor_components(scored, COMPONENTS)
    sim = coverage_if_calibrated(comps, LEVELS, draws=draws, seed=seed)
    levels = {}
    for i, lv in enumerate(LEVELS):
        entry = {"low": float(np.quantile(sim[:, i], 0.05)), "high": float(np.quantile(sim[:, i], 0.95))}
        if observed is not None:
            far = np.abs(sim[:, i] - lv) >= abs(observed[str(lv)] - lv) - 1e-12
            entry["share_as_far"] = float(np.mean(far))
        levels[str(lv)] = entry
    within = np.all(np.abs(sim - np.asarray(LEVELS)) <= tolerance + 1e-12, axis=1)
    bias_sd = total_bias_sd(scored["mean"].to_numpy(float), comps)
    out = {"levels": levels, "share_within": float(np.mean(within)), "tolerance": float(tolerance),
           "draws": int(draws), "bias_sd": bias_sd}
    if observed_bias is not None:
        out["bias_z"] = float(observed_bias / bias_sd) if bias_sd > 0 else float("nan")
    return out


def _block_scores(df: pd.DataFrame, seed: int = CALIBRATED_SEED) -> dict:
    """Model and baseline scores of scored unit-weeks, the model's CRPS skill, and the coverage
    range a calibrated forecast would show on them."""
    out = _scores(df["actual"], df["mean"], df["sd"])
    out["coverage_if_calibrated"] = coverage_range_if_calibrated(df, out["coverage"], seed=seed,
                                                                 observed_bias=out["bias"])
    out["baselines"] = {name: _scores(df["actual"], df[f"{name}_mean"], df[f"{name}_sd"]) for name in BASELINES}
    best = min(v["crps"] for v in out["baselines"].values())
    out["crps_skill_vs_best_baseline"] = float(1.0 - out["crps"] / best) if best > 0 else float("nan")
    out["factor_sd"] = factor_sd_measured_and_law(df)
    return out


#: level factors (`forecasting.factors.LEVEL_FACTORS`' names) -> the law's relative-sd column
FACTOR_COLUMNS = {f.name: f.rel_column for f in LEVEL_FACTORS}


def factor_sd_measured_and_law(scored: pd.DataFrame) -> dict:
    """Each level factor's sd as measured in the scored unit-weeks and as the forecast's law has it.

    A coverage far from nominal in one block comes either from the unit-level factors (flight,
    own week: many draws per block, so a miss there is a miss of the law) or from the network-level
    ones (a few dozen draws per block, so a calm or a turbulent block moves them a lot); this
    tells which.

    Returns
    -------
    dict factor -> ``{"measured", "law"}`` (fractions of the mean): measured by
    `forecasting.scoring.measured_factor_sds` on ``actual / mean - 1`` (networks and weeks taken
    per block, each block's mean error taken out), the law's as the root mean square of its
    ``rel_sd_*`` column; ``common`` has no measured value (one draw per block: see the block's
    ``bias_z``).
    """
    block = scored["block"] if "block" in scored else pd.Series(0, index=scored.index)
    e = scored["actual"] / scored["mean"] - 1.0
    e = e - e.groupby(block).transform("mean")  # a shift of the whole block is not a network factor
    key = block.astype(str) + "\x1f"
    measured = measured_factor_sds(
        e.to_numpy(float), key + scored["network"].astype(str), key + scored["week"].astype(str),
        scored["zone"].astype(str) + "\x1f" + scored["daypart"].astype(str) + "\x1f" + scored["demo"].astype(str))
    return {name: {"measured": measured.get(name),
                   "law": float(np.sqrt(np.mean(scored[col].to_numpy(float) ** 2)))}
            for name, col in FACTOR_COLUMNS.items()}


def _score_block(cube: ProfileCube, info: pd.DataFrame, specs, universes: pd.DataFrame,
                 fc: DaypartForecaster, h0: int, cut: int, W: int, progress) -> pd.DataFrame:
    """Refit `fc` on days [0, cut) and score the W weeks from day `h0`: one row per unit-week."""
    train = ProfileCube(cube.series, cube.day0, cube.values[:, :cut])
    fc.fit(train, info, specs, cube.day0 + pd.Timedelta(days=h0), W, progress=progress, universes=universes)

    actual_cells = cube.values[:, h0:h0 + 7 * W]
    pad = fc.plan_pred_.shape[1] - actual_cells.shape[1]
    if pad > 0:
        actual_cells = np.concatenate(
            [actual_cells, np.full((cube.n_series, pad, 96), np.nan, dtype=actual_cells.dtype)], axis=1)
    wd = (cube.day0.day_of_week + h0) % 7
    starts = 7 * np.arange(W)
    actual, counts = daypart_week_means(actual_cells, wd, starts, specs)
    masked = np.where(np.isfinite(actual_cells), fc.plan_pred_, np.nan)
    model_raw, _ = daypart_week_means(masked, wd, starts, specs)
    model_mean = fc.combine_plan(model_raw) * fc.level_factor(fc.plan_recent_)
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
    rel = fc.plan_law().predict(df)
    for col, _ in COMPONENTS:
        df[col] = rel[col].to_numpy(float)
    rel_sd = np.sqrt(sum(df[col].to_numpy() ** 2 for col, _ in COMPONENTS))
    df["actual"] = actual[s, p, w] * u
    df["mean"] = model_mean[s, p, w] * u
    df["sd"] = rel_sd * df["mean"]
    for name, b in base.items():
        spread = fc.baseline_spread_.get(name, {})
        bm = b[s, p, w] * u
        bsd = df["daypart"].map(spread).astype(float).fillna(np.nanmean(list(spread.values()) or [0.1])).to_numpy() * bm
        df[f"{name}_mean"] = bm
        df[f"{name}_sd"] = bsd
    return df
