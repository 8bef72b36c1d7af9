#!/usr/bin/env python
"""Benchmark: calibration of the forecast over several invented histories (generator seeds).

One backtest window or one set of plan weeks is a single draw of the network shocks that
dominate the level error, so its coverage can sit several points from nominal by chance. This
runs the demo scenario with its history regenerated under other seeds (same structure, other
shocks, episodes and noise) and, per seed, scores

- the fitted forecast on its 13 plan weeks against the generator's simulated future (the
  forecast the planner uses; `scenarios.actuals.true_unit_week_levels`), and
- optionally (`--backtest`) the backtest at the real lead (`pledge forecast backtest`; with
  `--blocks K`, its K successive 13-week blocks, each scored by its own refit),

then pools them. Expected coverage over seeds is what "calibrated" means; each seed's figure
shows the spread. For the backtest it also counts the single blocks whose coverage is within 5
points of nominal at all three levels, and those whose CRPS is at least 15% below the better
baseline: how often one block, the issue's test, passes by itself, beside how often a calibrated
forecast would pass it (drawn from the forecast's own correlated error law), and the share of
blocks whose coverage falls inside the 5-95% range such a forecast would show on that block
(90% if the error law, correlation included, is right). Invented data throughout.

Usage:
    python bench/bench_calibration.py [--seeds 20261129,1,2,3,4] [--backtest [--blocks 2]] [--json]
"""
from __future__ import annotations

import argparse
import json
import re
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
import _measure as M  # noqa: E402

LEVELS = ("0.5", "0.8", "0.95")


def _seeded_demo(dest: Path, seed: int) -> Path:
    """A copy of the demo whose [history_generator] seed is `seed` (history generated here)."""
    import shutil

    from scenarios.folders import demo_path, ensure_history

    src = demo_path()
    shutil.copytree(src, dest, ignore=shutil.ignore_patterns("history.parquet", "forecast", "book.sqlite*",
                                                             "__pycache__", ".*.tmp"))
    toml = dest / "scenario.toml"
    text = toml.read_text()
    text, n = re.subn(r"(?m)^seed = \d+$", f"seed = {seed}", text, count=1)
    if n != 1:
        raise RuntimeError("scenario.toml: no [history_generator] seed line to change")
    toml.write_text(text)
    ensure_history(dest)
    return dest


def run_seed(seed: int, tmp: Path, backtest: bool, blocks: int = 1) -> dict:
    from planner.forecast_job import backtest_scenario, fit_forecast
    from planner.scenario import load_scenario
    from scenarios.actuals import plan_week_scores

    folder = _seeded_demo(tmp / f"demo-{seed}", seed)
    scn = load_scenario(folder)
    t0 = time.perf_counter()
    res = fit_forecast(scn, seed=0)
    fit_s = time.perf_counter() - t0
    pw = plan_week_scores(scn, res.table)
    cal = res.meta["fit"]["calibration"]
    out = {"seed": seed, "fit_seconds": fit_s, "plan_weeks": pw, "plan_weeks_bias": pw["bias"],
           "fit_total_check": {k: cal[k] for k in ("total_z_rms", "total_z_p", "total_excess_sd")}}
    if backtest:
        from scenarios.actuals import true_network_shock_week_sd

        bt = backtest_scenario(scn, seed=0, windows=blocks)
        out["backtest"] = {"coverage": bt["coverage"], "crps_skill": bt["crps_skill_vs_best_baseline"],
                           "crps": bt["crps"], "baseline_coverage": {k: v["coverage"] for k, v in bt["baselines"].items()},
                           "blocks": [{"holdout": w["holdout"], "coverage": w["coverage"],
                                       "crps_skill": w["crps_skill_vs_best_baseline"],
                                       "bias": w["bias"],
                                       "coverage_if_calibrated": w["coverage_if_calibrated"],
                                       "factor_sd": w["factor_sd"], "law_estimated_on": w["law_estimated_on"],
                                       # the generator's network shocks in the block and in its law's windows
                                       "true_shock_week_sd": {
                                           "block": true_network_shock_week_sd(scn, [w["holdout"]["first_day"]])[0],
                                           "law_windows": true_network_shock_week_sd(
                                               scn, [a for a, _ in w["law_estimated_on"]])}}
                                      for w in bt["windows"]]}
    return out


def _block_rows(per_seed: list[dict]) -> list[dict]:
    """Rows on the single backtest blocks of every seed: mean coverage, how many blocks pass the
    issue's tests by themselves (coverage within 5 points at 50/80/95%; CRPS skill >= 15%)."""
    blocks = [b for r in per_seed for b in r["backtest"]["blocks"]]
    n = len(blocks)
    cov = np.array([[b["coverage"][lv] for lv in LEVELS] for b in blocks])
    skill = np.array([b["crps_skill"] for b in blocks])
    bias = np.array([b["bias"] for b in blocks])
    within = np.all(np.abs(cov - np.array([float(lv) for lv in LEVELS])) <= 0.05, axis=1)
    # each block's own 5-95% range of the coverage a calibrated forecast would show there
    low = np.array([[b["coverage_if_calibrated"]["levels"][lv]["low"] for lv in LEVELS] for b in blocks])
    high = np.array([[b["coverage_if_calibrated"]["levels"][lv]["high"] for lv in LEVELS] for b in blocks])
    inside = (cov >= low) & (cov <= high)
    below = cov < low
    expected_within = np.array([b["coverage_if_calibrated"]["share_within"] for b in blocks])
    bias_sd = np.array([b["coverage_if_calibrated"]["bias_sd"] for b in blocks])
    bias_z = bias / bias_sd
    rows = [M.row(f"  backtest, single blocks ({n}): coverage 50 / 80 / 95%, mean", "",
                  " / ".join(f"{c:.1%}" for c in cov.mean(axis=0)), None, None),
            M.row("  backtest, single blocks: share within 5 points at all three levels", "",
                  f"{within.mean():.0%} ({int(within.sum())} of {n})", None, None),
            M.row("  backtest, single blocks: the same expected of a calibrated forecast (its own error law)", "",
                  f"{expected_within.mean():.0%}", None, None),
            M.row("  backtest, single blocks: share inside the block's calibrated 5-95% range, 50 / 80 / 95%",
                  "90% each", " / ".join(f"{c:.0%}" for c in inside.mean(axis=0)), None, None),
            M.row("  backtest, single blocks: share below that range (bands too narrow), 50 / 80 / 95%",
                  "5% each", " / ".join(f"{c:.0%}" for c in below.mean(axis=0)), None, None),
            M.row("  backtest, single blocks: sd of the total bias by the forecast's own law, mean (min-max)", "",
                  f"{bias_sd.mean():.1%} ({bias_sd.min():.1%} to {bias_sd.max():.1%})", None, None),
            M.row("  backtest, single blocks: total bias in those sds, RMS (1 if the law is right)", "about 1",
                  f"{np.sqrt(np.mean(bias_z ** 2)):.2f}", None, None),
            M.row("  backtest, single blocks: share with |bias| beyond 1.645 of those sds", "10%",
                  f"{np.mean(np.abs(bias_z) > 1.645):.0%} ({int(np.sum(np.abs(bias_z) > 1.645))} of {n})", None, None),
            M.row("  backtest, single blocks: CRPS skill vs the better baseline, mean (min-max)", ">= 15%",
                  f"{skill.mean():.1%} ({skill.min():.1%} to {skill.max():.1%})", 0.15 / max(skill.mean(), 1e-9)
                  if skill.mean() > 0 else None, bool(skill.mean() >= 0.15)),
            M.row("  backtest, single blocks: share with CRPS skill >= 15%", "",
                  f"{np.mean(skill >= 0.15):.0%} ({int(np.sum(skill >= 0.15))} of {n})", None, None),
            M.row("  backtest, single blocks: total bias (actual / forecast - 1), mean (min-max)", "",
                  f"{bias.mean():+.1%} ({bias.min():+.1%} to {bias.max():+.1%})", None, None)]
    rows += _factor_rows(blocks, cov)
    return rows


def _factor_rows(blocks: list[dict], cov: np.ndarray) -> list[dict]:
    """Rows on each factor's sd measured in the single blocks against the law's, and on how calm
    the generator's network shocks were in each block against the windows its law came from."""
    ratio = {k: np.array([b["factor_sd"][k]["measured"] / b["factor_sd"][k]["law"] for b in blocks])
             for k in ("network", "network_week", "flight", "week")}
    rows = [M.row("  backtest, single blocks: factor sd measured in the block / the law's, mean (min-max): "
                  + ", ".join(ratio), "about 1",
                  "; ".join(f"{r.mean():.2f} ({r.min():.2f}-{r.max():.2f})" for r in ratio.values()), None, None)]
    calm = np.array([b["true_shock_week_sd"]["block"] / np.mean(b["true_shock_week_sd"]["law_windows"])
                     for b in blocks])
    excess50 = cov[:, 0] - 0.5
    rows.append(M.row("  backtest, single blocks: the generator's network-shock week sd in the block / in its law's "
                      "windows, mean (min-max); correlation with the measured / law network-week ratio; with the "
                      "50% coverage minus 50%", "",
                      f"{calm.mean():.2f} ({calm.min():.2f}-{calm.max():.2f}); "
                      f"{np.corrcoef(calm, ratio['network_week'])[0, 1]:+.2f}; {np.corrcoef(calm, excess50)[0, 1]:+.2f}",
                      None, None))
    return rows


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--seeds", default="20261129,1,2,3,4", help="comma list of generator seeds (the demo's first)")
    ap.add_argument("--backtest", action="store_true", help="also run the backtest per seed")
    ap.add_argument("--blocks", type=int, default=1, help="with --backtest: successive 13-week blocks per seed")
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args()
    seeds = [int(s) for s in args.seeds.split(",") if s.strip()]
    t0 = time.perf_counter()
    per_seed = []
    with tempfile.TemporaryDirectory(prefix="pledge-bench-cal-", dir="/tmp") as tmp:
        for seed in seeds:
            per_seed.append(run_seed(seed, Path(tmp), args.backtest, args.blocks))
            print(json.dumps({"progress": per_seed[-1]}), file=sys.stderr, flush=True)
    rows = []
    nblocks = len(per_seed[0].get("backtest", {}).get("blocks", [])) or 1
    backtest_label = "backtest" if nblocks == 1 else f"backtest pooled over {nblocks} blocks"
    for key, label in (("plan_weeks", "plan weeks vs simulated future"), ("backtest", backtest_label)):
        if key not in per_seed[0]:
            continue
        for lv in LEVELS:
            vals = np.array([r[key]["coverage"][lv] for r in per_seed])
            mean, lo, hi = float(vals.mean()), float(vals.min()), float(vals.max())
            first = not rows
            rows.append(M.row(("calibration: " if first else "  ") + f"{label}: coverage of the {float(lv):.0%} "
                              f"interval, mean over {len(vals)} seeds (min-max)", f"{float(lv):.0%} +- 5 pts", f"{mean:.1%} ({lo:.1%}-{hi:.1%})",
                              abs(mean - float(lv)) / 0.05, abs(mean - float(lv)) <= 0.05))
    if "backtest" in per_seed[0]:
        rows += _block_rows(per_seed)
    bias = np.array([r["plan_weeks_bias"] for r in per_seed])
    rows.append(M.row(f"  plan weeks: total bias (actual / forecast - 1), mean over {len(bias)} seeds (min-max)", "",
                      f"{bias.mean():+.1%} ({bias.min():+.1%} to {bias.max():+.1%})", None, None))
    z = np.array([r["plan_weeks"]["bias_z"] for r in per_seed])
    law = np.array([r["plan_weeks"]["bias_sd"] for r in per_seed])
    rows.append(M.row("  plan weeks: sd of the total bias by the forecast's own law, mean; measured bias in those "
                      "sds, RMS", "about 1", f"{law.mean():.1%}; {np.sqrt(np.mean(z ** 2)):.2f}", None, None))
    chk = [r["fit_total_check"] for r in per_seed]
    flagged = sum(c["total_z_p"] < 0.05 for c in chk)
    excess = np.array([c["total_excess_sd"] for c in chk])
    rows.append(M.row("  fit's leave-one-refit-out check of the totals: seeds flagged (chi-square p < 5%)", "",
                      f"{flagged} of {len(chk)}; RMS z {np.mean([c['total_z_rms'] for c in chk]):.2f} mean", None, None))
    rows.append(M.row("  fit's estimate of a shift shared by all units (sd), mean (min-max); the plan-week total "
                      "bias beyond the law, sqrt(mean(bias^2 - law^2))", "",
                      f"{excess.mean():.1%} ({excess.min():.1%}-{excess.max():.1%}); "
                      f"{np.sqrt(max(np.mean(bias ** 2 - law ** 2), 0.0)):.1%}", None, None))
    result = {"seeds": seeds, "per_seed": per_seed, "rows": rows, "seconds": time.perf_counter() - t0}
    if args.json:
        print(json.dumps(result, default=str))
    else:
        M.print_rows(rows)


if __name__ == "__main__":
    main()
