#!/usr/bin/env python
"""Benchmark: Monte Carlo stress of the demo book (target: 100,000 draws in under 5 s).

Sets up the invented demo scenario in a folder (copy, fit the forecast once, commit every
deliverable demo deal to its book; reused on later runs), then times `planner.stress.stress_book`
(reading the book, building the joint model, sampling, summarising) with the fast sampler, and,
for comparison, the naive per-spot sampler at fewer draws (its time per draw is reported;
it checks that the fast figures agree within Monte Carlo error).

Usage:
    python bench/bench_stress.py                      # demo book, 100,000 draws
    python bench/bench_stress.py --draws 1000000 --folder /tmp/demo-bench
    python bench/bench_stress.py --scenario /work/large/national --draws 1000000 --naive-draws 2000

Prints a small table on stderr and one JSON object as the last line of stdout.
"""
from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

TARGET_SECONDS = 5.0


def demo_book(folder: Path, solver: str = "cbc"):
    """The demo scenario in `folder` with its forecast fitted and deliverable deals committed."""
    from planner.book import list_deals
    from planner.workflows import commit_deal
    from planner.forecast_job import ensure_forecast
    from planner.scenario import load_scenario
    from scenarios.folders import copy_demo

    if not (folder / "scenario.toml").exists():
        copy_demo(folder)
    scn = load_scenario(folder)
    fc = ensure_forecast(scn).table
    booked = {d.name for d in list_deals(scn)}
    for name in scn.deals:
        if name not in booked:
            r = commit_deal(scn, name, forecast=fc, solver=solver)
            print(f"commit {name}: {'committed' if r.committed else 'not committed: ' + r.reason}", file=sys.stderr)
    return scn, fc


def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--scenario", type=Path, help="an existing scenario folder with a book and a forecast")
    ap.add_argument("--folder", type=Path, help="folder for the demo copy (default: a temporary folder)")
    ap.add_argument("--draws", type=int, default=100_000)
    ap.add_argument("--naive-draws", type=int, default=500)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--repeat", type=int, default=3, help="timed repetitions (best is reported)")
    args = ap.parse_args(argv)

    from planner.stress import stress_model
    from planner.workflows import load_book_model, stress_book

    tmp = None
    if args.scenario is not None:
        from planner.forecast_job import load_forecast
        from planner.scenario import load_scenario

        scn = load_scenario(args.scenario)
        fc = load_forecast(scn)
        fc = getattr(fc, "table", fc)
    else:
        folder = args.folder
        if folder is None:
            tmp = tempfile.TemporaryDirectory(prefix="pledge-bench-stress-")
            folder = Path(tmp.name) / "demo"
        scn, fc = demo_book(folder)

    times, cpu = [], []
    for _ in range(args.repeat):
        t0, c0 = time.perf_counter(), time.process_time()
        r = stress_book(scn, draws=args.draws, seed=args.seed, forecast=fc, keep_draws=False)
        times.append(time.perf_counter() - t0)
        cpu.append(time.process_time() - c0)
    t0 = time.perf_counter()
    model, _ = load_book_model(scn, forecast=fc)
    build = time.perf_counter() - t0
    spots = int(model.rows["spots"].sum())
    t0 = time.perf_counter()
    naive = stress_model(model, draws=args.naive_draws, seed=args.seed + 1, method="per_spot", keep_draws=False)
    naive_t = time.perf_counter() - t0
    worst = max(abs(a.probability_of_shortfall - b.probability_of_shortfall)
                / max((a.probability_of_shortfall_se ** 2 + b.probability_of_shortfall_se ** 2) ** 0.5, 1e-12)
                for a, b in zip(r.deals, naive.deals))
    out = {
        "bench": "stress", "deals": len(model.deals), "networks": len(model.networks),
        "held_units": int(len(model.rows)), "held_spots": spots, "draws": args.draws,
        "seconds_best": min(times), "seconds_all": times, "cpu_seconds_best": min(cpu), "model_build_seconds": build,
        "target_seconds": TARGET_SECONDS, "meets_target": min(times) < TARGET_SECONDS if args.draws <= 100_000 else None,
        "naive_per_spot_draws": args.naive_draws, "naive_per_spot_seconds": naive_t,
        "naive_seconds_per_draw": naive_t / args.naive_draws,
        "fast_seconds_per_draw": min(times) / args.draws,
        "speedup_per_draw": (naive_t / args.naive_draws) / (min(times) / args.draws),
        "max_shortfall_prob_gap_in_se": worst,
        "book": r.book,
    }
    print(f"stress of {len(model.deals)} deals, {spots:,} held spots on {len(model.rows):,} units, "
          f"{len(model.networks)} networks", file=sys.stderr)
    print(f"  fast sampler   {args.draws:>10,} draws  {min(times):7.2f} s wall, {min(cpu):.2f} s CPU (best of "
          f"{args.repeat}; target < {TARGET_SECONDS:.0f} s at 100,000)", file=sys.stderr)
    print(f"  naive per spot {args.naive_draws:>10,} draws  {naive_t:7.2f} s  "
          f"({out['speedup_per_draw']:,.0f}x slower per draw)", file=sys.stderr)
    print(f"  largest gap in P(shortfall) fast vs naive: {worst:.1f} standard errors", file=sys.stderr)
    print(json.dumps(out))
    if tmp is not None:
        tmp.cleanup()
    return out


if __name__ == "__main__":
    main()
