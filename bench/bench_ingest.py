#!/usr/bin/env python
"""Benchmark: quarter-hour history -> daily profiles (`forecasting.ingest.daily_profiles`), out of core.

Target (issue 6): at least 100 million history rows in under 2 minutes, whole-process peak memory
under 8 GiB. The history parts of the large instance (bench/generate_large.py) are taken in order
until they hold at least `--min-rows` rows; the reduction runs in a child process (DuckDB with a
memory limit and a thread count), whose wall time and peak RSS are measured.

Usage:
    python bench/bench_ingest.py [--large DIR] [--min-rows 100000000] [--threads 2] [--json]
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

TARGET_SECONDS = 120.0
TARGET_GIB = 8.0


def pick_parts(history: Path, min_rows: int) -> tuple[list[Path], int]:
    """The first parts (sorted by name) holding at least `min_rows` rows, and their row count."""
    import pyarrow.parquet as pq

    parts = sorted(history.glob("*.parquet")) or sorted(history.rglob("*.parquet"))
    if not parts:
        raise SystemExit(f"{history}: no Parquet parts (run bench/generate_large.py first)")
    chosen, rows = [], 0
    for p in parts:
        if rows >= min_rows:
            break
        chosen.append(p)
        rows += pq.ParquetFile(p).metadata.num_rows
    return chosen, rows


def subset_folder(parts: list[Path], where: Path) -> Path:
    """A folder of symlinks to `parts` (the reduction reads a folder of Parquet)."""
    where.mkdir(parents=True, exist_ok=True)
    for p in parts:
        (where / p.name).symlink_to(p.resolve())
    return where


def step_ingest(args) -> None:
    from forecasting.ingest import daily_profiles

    t0 = time.perf_counter()
    opts = dict(threads=args.threads)
    if args.engine == "duckdb":
        opts.update(memory_limit=args.memory_limit, temp_directory=args.spill)
    demos = args.demos.split(",") if args.demos else None
    prof = daily_profiles(args.source, engine=args.engine, demos=demos, **opts)
    seconds = time.perf_counter() - t0
    if args.save:
        prof.to_parquet(args.save, index=False)
    M.emit({"seconds": seconds, "profiles": len(prof), "series": int(prof[["zone", "network", "demo"]]
                                                                     .drop_duplicates().shape[0])})


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--large", type=Path, default=None)
    ap.add_argument("--min-rows", type=int, default=100_000_000)
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--memory-limit", default="5GB", help="DuckDB memory_limit")
    ap.add_argument("--engine", default="duckdb", choices=["duckdb", "spark"])
    ap.add_argument("--json", action="store_true")
    # child-process step
    ap.add_argument("--step", default=None)
    ap.add_argument("--source", default=None)
    ap.add_argument("--spill", default=None)
    ap.add_argument("--demos", default=None)
    ap.add_argument("--save", default=None)
    args = ap.parse_args(argv)
    if args.step == "ingest":
        step_ingest(args)
        return 0
    large = args.large or M.default_large()
    parts, rows = pick_parts(large / "history", args.min_rows)
    with tempfile.TemporaryDirectory(prefix="pledge-ingest-", dir="/tmp") as tmp:
        src = subset_folder(parts, Path(tmp) / "history")
        res = M.run_step([Path(__file__), "--step", "ingest", "--source", src, "--threads", args.threads,
                          "--memory-limit", args.memory_limit, "--engine", args.engine,
                          "--spill", Path(tmp) / "spill"])
    peak = M.gib(res["peak_rss_bytes"])
    wall = res["wall_seconds"]
    rows_ok = rows >= args.min_rows
    out = {
        "rows": [
            M.row(f"ingest {rows / 1e6:,.1f} M rows -> {res['profiles']:,} daily profiles ({args.engine}), time",
                  "< 120 s", f"{wall:.1f} s (CPU {res.get('cpu_seconds', float('nan')):.0f} s)", wall / TARGET_SECONDS, wall < TARGET_SECONDS and rows_ok),
            M.row("ingest, peak memory (whole process)", "< 8 GiB", f"{peak:.2f} GiB", peak / TARGET_GIB,
                  peak < TARGET_GIB),
            M.row("ingest throughput", "", f"{rows / wall / 1e6:.2f} M rows/s", None),
        ],
        "details": {"history_rows": rows, "parts": len(parts), "profiles": res["profiles"],
                    "series": res["series"], "reduction_seconds": res["seconds"], "wall_seconds": wall,
                    "peak_rss_gib": peak, "threads": args.threads, "memory_limit": args.memory_limit,
                    "engine": args.engine, "min_rows_reached": rows_ok},
    }
    if args.json:
        print(json.dumps(out))
    else:
        M.print_rows(out["rows"])
        print(json.dumps(out["details"], indent=2))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
