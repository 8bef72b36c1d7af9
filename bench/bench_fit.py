#!/usr/bin/env python
"""Benchmark: the forecast fit on the demo scenario, and the demo backtest against its targets.

Targets (issue 2): fit on the demo (about 17 million quarter-hour rows, 175 thousand daily
profiles) in under 2 minutes on a 2-core machine; on the demo backtest (13 held-out weeks at the
real lead time), coverage of the 50/80/95% central intervals within 5 points of nominal and CRPS
at least 15% lower than the better baseline. Each step runs in its own process (wall time and
peak RSS measured by `_measure.run_step`).

Also measured (not an issue target): the fitted forecast scored on the 13 plan weeks it was made
for, against the invented generator's simulated future (`scenarios.actuals.true_unit_week_levels`):
the same model, lead and horizon the planner uses, on weeks no refit has seen. And the backtest
pooled over the last `--windows` 13-week blocks, each scored by its own refit (one block is one
draw of the network-wide shocks; the issue's targets are read on the last block alone).

Usage:
    python bench/bench_fit.py [--scenario DIR] [--skip-backtest] [--holdout-weeks 13] [--windows 2] [--json]
"""
from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
import _measure as M  # noqa: E402

TARGET_FIT_SECONDS = 120.0


def step_fit(args) -> None:
    from planner.forecast_job import fit_forecast
    from planner.scenario import load_scenario

    scn = load_scenario(args.scenario)
    t0 = time.perf_counter()
    c0 = time.process_time()
    res = fit_forecast(scn, seed=0)
    print(json.dumps({"fit_seconds": time.perf_counter() - t0, "rows": len(res.table),
                      "cpu_seconds": time.process_time() - c0, "load_average": list(__import__("os").getloadavg()),
                      "series": res.meta["history"]["series"], "ingest_seconds": res.meta["seconds"]["ingest"],
                      "timings": res.meta["fit"]["timings_seconds"],
                      "calibration": res.meta["fit"]["calibration"], "plan_weeks": _plan_week_scores(scn, res.table)}))


def _plan_week_scores(scn, table) -> dict:
    """Scores of the fitted forecast on the plan weeks against the simulated future."""
    from scenarios.actuals import plan_week_scores

    return plan_week_scores(scn, table) if scn.history_generator is not None else {}


def step_backtest(args) -> None:
    from planner.forecast_job import backtest_scenario
    from planner.scenario import load_scenario

    scn = load_scenario(args.scenario)
    t0 = time.perf_counter()
    s = backtest_scenario(scn, holdout_weeks=args.holdout_weeks, seed=0, windows=args.windows)
    s.pop("fit", None)
    s["seconds"] = time.perf_counter() - t0
    print(json.dumps(s))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--scenario", default=None, help="scenario folder (default: a fresh copy of the demo)")
    ap.add_argument("--step", choices=["fit", "backtest"], default=None, help=argparse.SUPPRESS)
    ap.add_argument("--holdout-weeks", type=int, default=13)
    ap.add_argument("--skip-backtest", action="store_true")
    ap.add_argument("--windows", type=int, default=2,
                    help="held-out blocks of the backtest: the last one is the issue's figure, all are pooled")
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args()
    if args.step == "fit":
        return step_fit(args)
    if args.step == "backtest":
        return step_backtest(args)
    with tempfile.TemporaryDirectory(prefix="pledge-bench-fit-", dir="/tmp") as tmp:
        scenario = args.scenario
        if scenario is None:
            from scenarios.folders import copy_demo

            scenario = str(copy_demo(Path(tmp) / "demo"))
        fit = M.run_step([Path(__file__), "--step", "fit", "--scenario", scenario])
        rows = [M.row("demo-fit: forecast fit on the demo, time", "< 120 s", f"{fit['fit_seconds']:.1f} s",
                      fit["fit_seconds"] / TARGET_FIT_SECONDS, fit["fit_seconds"] < TARGET_FIT_SECONDS),
                M.row("  CPU time of the fit (all threads)", "-", f"{fit['cpu_seconds']:.1f} s",
                      None, None),
                M.row("  peak memory of the fit", "-", f"{fit['peak_rss_bytes'] / M.GIB:.2f} GiB",
                      None, True)]
        result = {"fit": fit}
        pw = fit.get("plan_weeks") or {}
        for lv in ("0.5", "0.8", "0.95") if pw else ():
            c = pw["coverage"][lv]
            rows.append(M.row(f"  plan weeks vs simulated future: coverage of the {float(lv):.0%} interval",
                              "(not a target)", f"{c:.1%}", None, None))
        if not args.skip_backtest:
            bt = M.run_step([Path(__file__), "--step", "backtest", "--scenario", scenario,
                             "--holdout-weeks", str(args.holdout_weeks), "--windows", str(args.windows)])
            result["backtest"] = bt
            last = bt["windows"][0]  # the last held-out block: the backtest the targets are for
            for lv in ("0.5", "0.8", "0.95"):
                c = last["coverage"][lv]
                rows.append(M.row(f"  backtest coverage of the {float(lv):.0%} interval", f"{float(lv):.0%} +- 5 pts",
                                  f"{c:.1%}", abs(c - float(lv)) / 0.05, abs(c - float(lv)) <= 0.05))
            skill = last["crps_skill_vs_best_baseline"]
            rows.append(M.row("  backtest CRPS below the better baseline", ">= 15%", f"{skill:.1%}",
                              0.15 / skill if skill > 0 else float("inf"), skill >= 0.15))
            if len(bt["windows"]) > 1:
                k = len(bt["windows"])
                cov = " / ".join(f"{bt['coverage'][lv]:.1%}" for lv in ("0.5", "0.8", "0.95"))
                rows.append(M.row(f"  backtest pooled over the last {k} blocks: coverage 50 / 80 / 95%",
                                  "(not a target)", cov, None, None))
                rows.append(M.row(f"  backtest pooled over the last {k} blocks: CRPS below the better baseline",
                                  "(not a target)", f"{bt['crps_skill_vs_best_baseline']:.1%}", None, None))
        result["rows"] = rows
    if args.json:
        print(json.dumps(result, default=str))  # one line: bench/run reads the last JSON line
    else:
        M.print_rows(rows)


if __name__ == "__main__":
    main()
