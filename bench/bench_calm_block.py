#!/usr/bin/env python
"""Benchmark: can any forecast made before the cut-off know that the demo's backtest block is calm?

The demo's backtest block (the last 13 weeks of its history, refit 119 days earlier) shows
interval coverage above nominal (about 60 / 89 / 98%), while the same method is slightly below
nominal on average over 30 blocks of 15 generator histories (`bench_calibration.py`). The block's
network-week factor measures about half of the law's. Two questions, answered on invented data:

1. **Truth** (fast, generator only). In the generator's own network shocks (drift and episodes;
   `scenarios.actuals.true_network_shock_week_sd`), how does the block's week-to-week turbulence
   relate to what was observable before the cut-off: the 13 weeks just before it, and the RMS of
   every 13-week window of the training history? Over `--seeds` histories of the demo's structure:
   the correlations, where the demo's own block falls, and the ratio block / training windows.
2. **Estimation** (``--cv``, about 1-2 minutes). The lowest-noise honest estimate of the
   within-flight factors we could make: blocked cross-validation over the whole training history
   (each 13-week window of it held out in turn, a buffer either side, the model fitted on the
   rest; Bergmeir, Hyndman & Koo 2018), against the law's rolling-origin refits (three windows).
   Prints both estimates of the network-week and own-week sds (unscaled), and the demo block's
   coverage with the law as fitted, with the blocked-CV network-week sd in its place (the law's
   quantile scale kept; the own-week sds agree), and with every level sd scaled by a common
   factor, so the distance to the issue's target (within 5 points) can be read off.

Usage:
    python bench/bench_calm_block.py [--seeds 400] [--cv [--buffer-days 28]] [--json]

References
----------
Bergmeir, C., Hyndman, R. J. & Koo, B. (2018). A note on the validity of cross-validation for
evaluating autoregressive time series prediction. Computational Statistics & Data Analysis 120.
"""
from __future__ import annotations

import argparse
import dataclasses
import json
import sys
import time
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

WEEKS = 13


def _windows(scenario, gap: int) -> tuple[pd.Timestamp, list[pd.Timestamp]]:
    """First day of the backtest block and of every 13-week training window before its cut-off
    (latest first), as the backtest places them (block ends the history; cut-off `gap` days before)."""
    g = scenario.history_generator
    start, end = pd.Timestamp(g["start"]), pd.Timestamp(g["end"])
    n_days = (end - start).days + 1
    h0 = n_days - 7 * WEEKS
    cut = h0 - gap
    day = lambda i: start + pd.Timedelta(days=int(i))  # noqa: E731
    return day(h0), [day(e - 7 * WEEKS) for e in range(cut, 7 * WEEKS - 1, -7 * WEEKS)]


def truth_part(scenario, gap: int, n_seeds: int) -> dict:
    """Generator truth: block turbulence against what was observable before the cut-off."""
    from scenarios.actuals import true_network_shock_week_sd

    block_day, train_days = _windows(scenario, gap)
    seeds = [int(scenario.history_generator["seed"])] + list(range(1, n_seeds + 1))
    rows = []
    for s in seeds:
        scn = dataclasses.replace(scenario, history_generator={**scenario.history_generator, "seed": s})
        sds = true_network_shock_week_sd(scn, [block_day, *train_days], WEEKS)
        rows.append((sds[0], sds[1], float(np.sqrt(np.mean(np.square(sds[1:]))))))
    r = np.array(rows)
    demo, others = r[0], r[1:]
    ratio = others[:, 0] / others[:, 2]
    return {
        "seeds": len(others), "block_first_day": str(block_day.date()),
        "training_windows": [str(d.date()) for d in train_days],
        "corr_block_vs_13w_before_cutoff": float(np.corrcoef(others[:, 0], others[:, 1])[0, 1]),
        "corr_block_vs_training_rms": float(np.corrcoef(others[:, 0], others[:, 2])[0, 1]),
        "block_sd_quantiles": {str(q): float(np.quantile(others[:, 0], q)) for q in (0.05, 0.25, 0.5, 0.75, 0.95)},
        "demo": {"block_sd": float(demo[0]), "before_cutoff_sd": float(demo[1]), "training_rms_sd": float(demo[2]),
                 "block_sd_percentile": float(np.mean(others[:, 0] <= demo[0])),
                 "ratio_block_to_training": float(demo[0] / demo[2]),
                 "ratio_percentile": float(np.mean(ratio <= demo[0] / demo[2]))},
        "ratio_block_to_training_quantiles": {str(q): float(np.quantile(ratio, q)) for q in (0.05, 0.5, 0.95)},
    }


def cv_part(scenario, gap: int, buffer_days: int) -> dict:
    """Blocked-CV within-flight sds against the law's refits, and the demo block's coverage."""
    from forecasting.backtest import run_backtest, score_levels
    from forecasting.dayparts import as_specs, daypart_week_means
    from forecasting.models import ProfileForecaster
    from forecasting.pipeline import DaypartForecaster, FoldResult
    from forecasting.uncertainty import COMPONENT_KEYS, LevelErrorModel
    from planner.forecast_job import load_history_cube

    t0 = time.perf_counter()
    cube, info = load_history_cube(scenario)
    specs = as_specs(scenario.dayparts)
    res = run_backtest(cube, info, specs, scenario.universes, holdout_weeks=WEEKS, gap_days=gap)
    scored = res.scored
    k = float(res.summary["fit"]["level_error"]["quantile_scale"])
    law_nw = float(scored["rel_sd_network_week"].iloc[0])
    law_week = pd.Series(res.summary["fit"]["level_error"]["rel_sd_week_by_daypart"])

    cut = cube.n_days - 7 * WEEKS - gap
    fc = DaypartForecaster()
    fc.info_ = info.reset_index(drop=True)
    fc.universe_s_ = fc._series_universe(scenario.universes)
    folds = []
    S = cube.n_series
    for j, e in enumerate(range(cut, 7 * WEEKS + 120, -7 * WEEKS)):
        a = e - 7 * WEEKS
        train = cube.values[:, :cut].copy()
        train[:, max(a - buffer_days, 0):min(e + buffer_days, cut)] = np.nan
        model = ProfileForecaster(random_state=5000 + j).fit(train, fc.info_, cube.day0)
        pred = model.predict(np.arange(a, e + 1)).astype(np.float32)
        actual = cube.values[:, a:e + 1]
        wd = (cube.day0.day_of_week + a) % 7
        am, cnt = daypart_week_means(actual, wd, 7 * np.arange(WEEKS), specs)
        fm, _ = daypart_week_means(np.where(np.isfinite(actual), pred, np.nan), wd, 7 * np.arange(WEEKS), specs)
        folds.append(FoldResult(a, am, cnt, fm, {}, np.zeros(S, bool), np.full(S, 104.0), np.zeros((S, len(specs)))))
    errors, _ = fc._errors_frame(folds, fc.info_, specs)
    cv = LevelErrorModel().fit(errors)
    cv_nw = float(np.sqrt(cv.var_network_week_) / cv.scale_)
    cv_week = np.sqrt(cv.var_week_daypart_) / cv.scale_

    cols = [c for c, _ in COMPONENT_KEYS]

    def cover(frame: pd.DataFrame) -> dict:
        sd = np.sqrt(sum(frame[c] ** 2 for c in cols)) * frame["mean"]
        s = score_levels(frame["actual"], frame["mean"], sd)
        return {"coverage": s["coverage"], "crps": s["crps"]}

    swapped = scored.assign(rel_sd_network_week=cv_nw * k)
    scaled = {str(f): cover(scored.assign(**{c: scored[c] * f for c in cols})) for f in (0.85, 0.9, 0.95, 1.0)}
    return {
        "buffer_days": buffer_days, "cv_windows": len(folds), "seconds": time.perf_counter() - t0,
        "law_estimated_on": res.summary["windows"][0]["law_estimated_on"],
        "network_week_sd": {"law": law_nw, "law_unscaled": law_nw / k, "blocked_cv_unscaled": cv_nw},
        "week_sd_unscaled": {"law": (law_week / k).to_dict(), "blocked_cv": cv_week.to_dict()},
        "quantile_scale": k,
        "block": {"as_fitted": cover(scored), "blocked_cv_network_week": cover(swapped),
                  "every_sd_times": scaled},
    }


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, default=400, help="generator seeds besides the demo's own")
    ap.add_argument("--cv", action="store_true", help="also the blocked cross-validation part (1-2 min)")
    ap.add_argument("--buffer-days", type=int, default=28, help="days left out either side of a CV window")
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args()

    from scenarios.folders import demo_path, ensure_history

    scenario = ensure_history(demo_path())
    g = scenario.history_generator
    gap = (pd.Timestamp(scenario.first_week) - pd.Timestamp(g["end"])).days - 1
    out = {"lead_gap_days": gap, "truth": truth_part(scenario, gap, args.seeds)}
    if args.cv:
        out["estimation"] = cv_part(scenario, gap, args.buffer_days)
    if args.json:
        print(json.dumps(out))
        return
    t = out["truth"]
    d = t["demo"]
    print(f"Generator truth over {t['seeds']} histories (network shocks' week-to-week sd in a 13-week window):")
    print(f"  corr(block, 13 weeks before the cut-off) = {t['corr_block_vs_13w_before_cutoff']:+.3f}; "
          f"corr(block, RMS of the training windows) = {t['corr_block_vs_training_rms']:+.3f}")
    print("  block sd quantiles 5/25/50/75/95%: " + " / ".join(f"{v:.4f}" for v in t["block_sd_quantiles"].values()))
    print(f"  demo: block {d['block_sd']:.4f} (percentile {d['block_sd_percentile']:.1%}), before the cut-off "
          f"{d['before_cutoff_sd']:.4f}, training RMS {d['training_rms_sd']:.4f}; block / training "
          f"{d['ratio_block_to_training']:.3f} (percentile {d['ratio_percentile']:.1%})")
    if "estimation" in out:
        e = out["estimation"]
        print(f"Estimation on the demo's backtest block ({e['cv_windows']} blocked-CV windows, buffer "
              f"{e['buffer_days']} d, {e['seconds']:.0f} s):")
        nw = e["network_week_sd"]
        print(f"  network-week sd (unscaled): law's refits {nw['law_unscaled']:.4f}, blocked CV "
              f"{nw['blocked_cv_unscaled']:.4f}; quantile scale {e['quantile_scale']:.3f}")
        wk = e["week_sd_unscaled"]
        print("  own unit-week sd by daypart (unscaled), law's refits / blocked CV: " + ", ".join(
            f"{dp} {wk['law'][dp]:.3f}/{wk['blocked_cv'][dp]:.3f}" for dp in wk["law"]))
        for name, v in [("as fitted", e["block"]["as_fitted"]),
                        ("blocked-CV network-week sd", e["block"]["blocked_cv_network_week"]),
                        *[(f"every sd x {f}", v) for f, v in e["block"]["every_sd_times"].items()]]:
            c = v["coverage"]
            print(f"  {name:30s} coverage {c['0.5']:.1%} / {c['0.8']:.1%} / {c['0.95']:.1%}, CRPS {v['crps']:.2f}")


if __name__ == "__main__":
    main()
