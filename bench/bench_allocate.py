"""Benchmark: `check` and `plan` of every demo deal (target: each within 10 s on this machine).

Usage: python bench/bench_allocate.py [--solver cbc|highs] [--scenario PATH] [--mc-draws N]

Fits the demo forecast first if needed (not timed), then for each deal times check_deal and
plan_deal and prints verdict, cost, gap to the LP bound, chance of delivery, a Monte Carlo check of
that chance (exact sampler) and the chance an all-independent error model would claim.
"""
from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from planner import deals as dl  # noqa: E402
from planner import workflows as wf  # noqa: E402
from planner.scenario import load_scenario  # noqa: E402

TARGET_SECONDS = 10.0


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--solver", default="cbc", choices=["cbc", "highs"])
    ap.add_argument("--scenario", type=Path, default=None, help="scenario folder (default: a copy of the demo)")
    ap.add_argument("--mc-draws", type=int, default=20_000)
    args = ap.parse_args(argv)

    tmp = None
    if args.scenario is None:
        from scenarios.folders import copy_demo

        tmp = tempfile.TemporaryDirectory(prefix="pledge-bench-")
        args.scenario = copy_demo(Path(tmp.name) / "demo")
    scn = load_scenario(args.scenario)
    from planner.forecast_job import ensure_forecast

    t = time.perf_counter()
    fc = ensure_forecast(scn).table
    print(f"forecast ready in {time.perf_counter() - t:.1f} s (not part of the timings)")
    rows, worst = [], 0.0
    for name in sorted(scn.deals):
        t = time.perf_counter()
        chk = wf.check_deal(scn, name, solver=args.solver, forecast=fc, held=None)
        t_check = time.perf_counter() - t
        t = time.perf_counter()
        run = wf.run_deal(scn, name, solver=args.solver, forecast=fc, held=None)
        plan = dl.plan_result(run)
        t_plan = time.perf_counter() - t
        worst = max(worst, t_check, t_plan)
        mc = None
        if plan.deliverable:
            d = run.problem.model.sample(run.allocation.x, args.mc_draws, np.random.default_rng(0), exact=True)
            mc = float((d >= run.problem.guarantee).mean())
        rows.append((name, chk.verdict.split(":")[0], chk.cost, chk.gap, chk.probability_of_delivery, mc,
                     chk.probability_if_independent, chk.max_guarantee, chk.guarantee, t_check, t_plan,
                     run.problem.n, chk.cuts))
    head = ("deal", "verdict", "cost", "gap", "P(stated)", "P(MC)", "P(indep)", "max guar.", "guarantee",
            "check s", "plan s", "units", "cuts")
    fmt = "{:<22} {:<16} {:>12} {:>7} {:>9} {:>7} {:>8} {:>13} {:>12} {:>8} {:>7} {:>6} {:>5}"
    print(fmt.format(*head))

    def f(v, spec):
        return "-" if v is None else format(v, spec)

    for r in rows:
        print(fmt.format(r[0], r[1], f(r[2], ",.0f"), f(r[3], ".2%"), f(r[4], ".3f"), f(r[5], ".3f"),
                         f(r[6], ".3f"), f(r[7], ",.0f"), f(r[8], ",.0f"), f(r[9], ".2f"), f(r[10], ".2f"),
                         r[11], r[12]))
    ok = worst <= TARGET_SECONDS
    print(f"solver {args.solver}; slowest check/plan {worst:.2f} s (target {TARGET_SECONDS:.0f} s): "
          f"{'met' if ok else 'NOT met'}")
    if tmp is not None:
        tmp.cleanup()
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
