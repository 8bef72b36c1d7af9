#!/usr/bin/env python
"""Benchmark: Monte Carlo stress of the 20-deal national book at 1,000,000 draws, and the fast
sampler against naive per-spot sampling at equal draws on a smaller book.

Target (issue 6): 1,000,000 draws of the 20-deal book in under 10 s, with the Monte Carlo
standard errors reported. Measured in a child process (whole-process peak RSS): reading the book
and building the joint model (`planner.stress.load_book_model`), then `stress_model` with the
default fast sampler. The comparison (second child) runs `stress_model` on a small book twice at
the same number of draws: `method="fast"` and `method="per_spot"` (one Bernoulli and one
airing-noise draw per bought spot), reports the time ratio and the largest gap between the two
in probability of shortfall, in standard errors.

Usage:
    python bench/bench_scale_stress.py [--large DIR] [--draws 1000000] [--small DIR] [--json]
"""
from __future__ import annotations

import argparse
import json
import subprocess
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
import _measure as M  # noqa: E402

TARGET_SECONDS = 10.0


def _load(folder):
    import pandas as pd

    from planner.scenario import load_scenario

    scenario = load_scenario(folder)
    forecast = pd.read_parquet(Path(folder) / "forecast" / "forecast.parquet")
    return scenario, forecast


def step_stress(args) -> None:
    from planner.stress import stress_model
    from planner.workflows import load_book_model

    scenario, forecast = _load(args.large)
    t0 = time.perf_counter()
    model, _ = load_book_model(scenario, forecast=forecast)
    build_s = time.perf_counter() - t0
    t0 = time.perf_counter()
    r = stress_model(model, draws=args.draws, seed=args.seed, keep_draws=False, currency=scenario.currency)
    sample_s = time.perf_counter() - t0
    deals = [d.__dict__ for d in r.deals]
    shocked = None
    if args.shock:  # the same book under a finance shock, so shortfalls (and their errors) show
        t1 = time.perf_counter()
        smodel, _ = load_book_model(scenario, forecast=forecast, shocks=[args.shock])
        sr = stress_model(smodel, draws=args.draws, seed=args.seed, keep_draws=False, currency=scenario.currency)
        sd = [d.__dict__ for d in sr.deals]
        shocked = {"shock": args.shock, "seconds": time.perf_counter() - t1, "book": sr.book,
                   "max_probability_of_shortfall": max(d["probability_of_shortfall"] for d in sd),
                   "max_se_probability_of_shortfall": max(d["probability_of_shortfall_se"] for d in sd)}
    M.emit({"shocked": shocked,"deals": len(r.deals), "draws": r.draws, "held_rows": int(len(model.rows)),
            "held_spots": int(model.rows["spots"].sum()), "networks": len(model.networks),
            "build_seconds": build_s, "sample_seconds": sample_s, "book": r.book,
            "max_se_probability_of_shortfall": max(d["probability_of_shortfall_se"] for d in deals),
            "deals_detail": [{k: d[k] for k in ("deal", "probability_of_shortfall", "probability_of_shortfall_se",
                                                "expected_liability", "expected_liability_se")} for d in deals]})


def step_compare(args) -> None:
    from planner.stress import stress_model
    from planner.workflows import load_book_model

    scenario, forecast = _load(args.small)
    model, _ = load_book_model(scenario, forecast=forecast)
    out = {}
    for method in ("fast", "per_spot"):
        t0 = time.perf_counter()
        r = stress_model(model, draws=args.draws, seed=args.seed, method=method, keep_draws=False)
        out[method] = (time.perf_counter() - t0, r)
    fast, naive = out["fast"][1], out["per_spot"][1]
    gap = max(abs(a.probability_of_shortfall - b.probability_of_shortfall)
              / max((a.probability_of_shortfall_se ** 2 + b.probability_of_shortfall_se ** 2) ** 0.5, 1e-12)
              for a, b in zip(fast.deals, naive.deals))
    M.emit({"deals": len(fast.deals), "draws": args.draws, "held_rows": int(len(model.rows)),
            "held_spots": int(model.rows["spots"].sum()), "fast_seconds": out["fast"][0],
            "per_spot_seconds": out["per_spot"][0], "max_gap_in_se": gap,
            "fast_book": fast.book, "per_spot_book": naive.book})


def ensure_small(folder: Path) -> Path:
    """A small invented book for the naive comparison (bench/generate_large.py, tiny size)."""
    if not (folder / "book.sqlite").exists():
        subprocess.run([sys.executable, str(Path(__file__).parent / "generate_large.py"), str(folder),
                        "--zones", "4", "--networks", "4", "--days", "70", "--deals", "6",
                        "--history-zones", "1"], check=True, stdout=subprocess.DEVNULL)
    return folder


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--large", type=Path, default=None)
    ap.add_argument("--small", type=Path, default=Path("/tmp/pledge-small-book"))
    ap.add_argument("--draws", type=int, default=1_000_000)
    ap.add_argument("--compare-draws", type=int, default=100_000,
                    help="draws of each sampler in the side-by-side (equal for both)")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--shock", default="all:-0.10",
                    help="also stress the book under this shock (planner.stress syntax; '' for none)")
    ap.add_argument("--json", action="store_true")
    ap.add_argument("--step", default=None)
    args = ap.parse_args(argv)
    args.large = args.large or M.default_large()
    if args.step == "stress":
        step_stress(args)
        return 0
    if args.step == "compare":
        step_compare(args)
        return 0
    res = M.run_step([Path(__file__), "--step", "stress", "--large", args.large, "--draws", args.draws,
                      "--seed", args.seed, "--shock", args.shock])
    small = ensure_small(args.small)
    cd = args.compare_draws
    cmp_ = M.run_step([Path(__file__), "--step", "compare", "--small", small, "--draws", cd, "--seed", args.seed])
    total = res["build_seconds"] + res["sample_seconds"]
    peak = M.gib(res["peak_rss_bytes"])
    book = res["book"]
    def se_text(book):
        return ", ".join(f"{k} {book[k]:,.0f} +- {book.get(k + '_se', float('nan')):,.3g}"
                         for k in ("expected_liability", "var95", "cvar95") if k in book)

    se_txt = se_text(book)
    rows = [
        M.row(f"stress {res['draws']:,} draws, {res['deals']}-deal book ({res['held_spots']:,} spots on "
              f"{res['held_rows']:,} units), time", "< 10 s",
              f"{total:.1f} s ({res['build_seconds']:.1f} model + {res['sample_seconds']:.1f} draws)",
              total / TARGET_SECONDS, total < TARGET_SECONDS),
        M.row("  Monte Carlo standard error, P(shortfall) (largest over deals)", "reported",
              f"{res['max_se_probability_of_shortfall']:.2g}", None),
        M.row("  book liability, USD (MC standard error)", "reported", se_txt or "n/a", None),
        *([] if not res.get("shocked") else [
            M.row(f"  same book under shock {res['shocked']['shock']}: time; largest P(shortfall) (MC se)", "",
                  f"{res['shocked']['seconds']:.1f} s; {res['shocked']['max_probability_of_shortfall']:.4f} "
                  f"(+- {res['shocked']['max_se_probability_of_shortfall']:.2g})", None),
            M.row("  book liability under the shock, USD (MC standard error)", "reported",
                  se_text(res["shocked"]["book"]), None)]),
        M.row("stress, peak memory (whole process)", "", f"{peak:.2f} GiB", None),
        M.row(f"naive per-spot vs fast sampler, {cmp_['draws']:,} draws each, small book "
              f"({cmp_['held_spots']:,} spots)", "", f"{cmp_['per_spot_seconds']:.1f} s vs "
              f"{cmp_['fast_seconds']:.2f} s", cmp_["per_spot_seconds"] / max(cmp_["fast_seconds"], 1e-9)),
        M.row("  agreement: largest gap in P(shortfall) fast vs per-spot, in standard errors", "",
              f"{cmp_['max_gap_in_se']:.2f}", None),
    ]
    out = {"rows": rows, "details": {"stress": {k: v for k, v in res.items() if k != "peak_rss_bytes"},
                                     "compare": {k: v for k, v in cmp_.items() if k != "peak_rss_bytes"},
                                     "peak_rss_gib": peak}}
    if args.json:
        print(json.dumps(out, default=str))
    else:
        M.print_rows(rows)
        print(json.dumps(out["details"], indent=2, default=str))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
