#!/usr/bin/env python
"""Benchmark: generate the demo's invented history (target: ~17 million rows in under 20 s).

Each step runs in its own process (`bench/_measure.py`: wall time and peak memory):
`generate` writes the demo history (`scenarios.generate.write_spec`) to a temporary folder,
`validate` runs `planner.scenario.validate_history` on it (every row checked).

Usage:
    python bench/bench_generate.py            # prints a table on stderr, one JSON object on stdout
"""
from __future__ import annotations

import argparse
import shutil
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))

TARGET_SECONDS = 20.0


def _step_generate(folder: Path) -> dict:
    from planner.scenario import load_scenario
    from scenarios.generate import spec_from_scenario, write_spec

    sc = load_scenario(folder)
    t0 = time.perf_counter()
    write_spec(spec_from_scenario(sc), folder / "history.parquet")
    import pyarrow.parquet as pq

    return {"step": "generate", "seconds": time.perf_counter() - t0,
            "rows": pq.read_metadata(folder / "history.parquet").num_rows,
            "bytes": (folder / "history.parquet").stat().st_size}


def _step_validate(folder: Path) -> dict:
    from planner.scenario import load_scenario, validate_history

    sc = load_scenario(folder)
    t0 = time.perf_counter()
    h = validate_history(sc)
    return {"step": "validate", "seconds": time.perf_counter() - t0, "rows": h.rows,
            "completeness": h.completeness, "zero_share": h.zero_share}


def main(argv=None) -> dict:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--step", choices=["generate", "validate"])
    ap.add_argument("--folder", type=Path)
    args = ap.parse_args(argv)
    from _measure import emit, machine_facts, run_step

    if args.step:
        res = (_step_generate if args.step == "generate" else _step_validate)(args.folder)
        emit(res)
        return res
    tmp = Path(tempfile.mkdtemp(prefix="bench-generate-"))
    try:
        folder = tmp / "demo"
        shutil.copytree(ROOT / "scenarios" / "demo", folder,
                        ignore=shutil.ignore_patterns("history.parquet", "forecast", "book.sqlite*"))
        rows = [run_step([Path(__file__), "--step", s, "--folder", folder]) for s in ("generate", "validate")]
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    for r in rows:
        sys.stderr.write(f"{r['step']:<9} {r['rows']:>12,} rows  {r['seconds']:6.1f} s (step)  "
                         f"{r['wall_seconds']:6.1f} s (process)  peak {r['peak_rss_bytes'] / 2**20:7.0f} MiB\n")
    out = {"benchmark": "generate", "target_seconds": TARGET_SECONDS, "steps": rows,
           "meets_target": rows[0]["seconds"] < TARGET_SECONDS, "machine": machine_facts()}
    emit(out)
    return out


if __name__ == "__main__":
    main()
