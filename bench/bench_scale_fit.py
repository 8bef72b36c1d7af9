#!/usr/bin/env python
"""Benchmark: the forecaster's fit on about 1 million daily profiles.

Target (issue 6): under 5 minutes, whole-process peak memory under 8 GiB.

Daily profiles of the large instance's history (bench/generate_large.py) are made first by the
ingest step (parts taken in order until they hold `--profiles` profiles; not part of the timed
figure) and saved to a temporary Parquet file. A fresh child process then reads them, scatters
them into the history cube and runs the product's fit, `forecasting.pipeline.DaypartForecaster.fit`
(rolling-origin refits for the uncertainty plus the final `ProfileForecaster` fit), then the
forecast table; its wall time and peak RSS are measured.

Usage:
    python bench/bench_scale_fit.py [--large DIR] [--profiles 1000000] [--demo hh] [--json]
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
from bench_ingest import subset_folder  # noqa: E402

TARGET_SECONDS = 300.0
TARGET_GIB = 8.0


def pick_zone_parts(history: Path, profiles: int, networks: int, days: int, demos: int) -> list[Path]:
    """Per-zone parts until zones x networks x demos x days reaches `profiles`."""
    parts = sorted(history.glob("*.parquet"))
    if not parts:
        raise SystemExit(f"{history}: no Parquet parts (run bench/generate_large.py first)")
    need = -(-profiles // (networks * days * demos))
    return parts[:need]


def step_fit(args) -> None:
    import numpy as np
    import pandas as pd

    from forecasting.pipeline import DaypartForecaster
    from forecasting.profiles import ProfileCube
    from planner.scenario import load_scenario

    t0 = time.perf_counter()
    scenario = load_scenario(args.large)
    prof = pd.read_parquet(args.profiles_file)
    t_read = time.perf_counter()
    cube = ProfileCube.from_profiles(prof)
    n_profiles = len(prof)
    del prof
    info = cube.series.merge(scenario.networks[["network", "genre"]], on="network", how="left")
    t1 = time.perf_counter()
    fc = DaypartForecaster(random_state=0).fit(cube, info, scenario.dayparts, scenario.first_week,
                                               scenario.weeks)
    t2 = time.perf_counter()
    table = fc.forecast_table(scenario.universes)
    t3 = time.perf_counter()
    M.emit({"profiles": n_profiles, "series": int(cube.n_series), "days": int(cube.n_days),
            "fit_seconds": t2 - t1, "table_seconds": t3 - t2, "read_seconds": t_read - t0,
            "cube_seconds": t1 - t_read, "forecast_rows": len(table),
            "timings": {k: float(v) for k, v in fc.timings_.items()},
            "finite": bool(np.isfinite(table["mean_impressions"]).all())})


def _breakdown(timings: dict) -> tuple[float, float, float]:
    folds = sum(v for k, v in timings.items() if k.startswith("fold_"))
    return folds, timings.get("final_fit", float("nan")), timings.get("predict", float("nan"))


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--large", type=Path, default=None)
    ap.add_argument("--profiles", type=int, default=1_000_000)
    ap.add_argument("--demo", default="all", help="demo to fit, or 'all' (every demo of the instance)")
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--json", action="store_true")
    ap.add_argument("--step", default=None)
    ap.add_argument("--profiles-file", default=None)
    args = ap.parse_args(argv)
    args.large = args.large or M.default_large()
    if args.step == "fit":
        step_fit(args)
        return 0
    facts = json.loads((args.large / "LARGE.json").read_text())
    n_demos = facts["demos"] if args.demo == "all" else 1
    parts = pick_zone_parts(args.large / "history", args.profiles, facts["networks"], facts["days"], n_demos)
    with tempfile.TemporaryDirectory(prefix="pledge-fit-", dir="/tmp") as tmp:
        src = subset_folder(parts, Path(tmp) / "history")
        pfile = Path(tmp) / "profiles.parquet"
        ing = M.run_step([Path(__file__).parent / "bench_ingest.py", "--step", "ingest", "--source", src,
                          "--threads", args.threads, "--memory-limit", "4GB", "--spill", Path(tmp) / "spill",
                          *([] if args.demo == "all" else ["--demos", args.demo]), "--save", pfile])
        res = M.run_step([Path(__file__), "--step", "fit", "--large", args.large, "--profiles-file", pfile])
    peak = M.gib(res["peak_rss_bytes"])
    fit_s = res["fit_seconds"]
    out = {
        "rows": [
            M.row(f"forecast fit on {res['profiles']:,} daily profiles ({res['series']:,} series), time",
                  "< 300 s", f"{fit_s:.1f} s (process CPU {res.get('cpu_seconds', float('nan')):.0f} s)", fit_s / TARGET_SECONDS,
                  fit_s < TARGET_SECONDS and res["profiles"] >= args.profiles),
            M.row("  of which: rolling-origin refits (uncertainty) / final model fit / plan-week predict", "",
                  " / ".join(f"{v:.0f} s" for v in _breakdown(res["timings"])), None),
            M.row("forecast fit, peak memory (whole process)", "< 8 GiB", f"{peak:.2f} GiB", peak / TARGET_GIB,
                  peak < TARGET_GIB),
        ],
        "details": {**{k: v for k, v in res.items() if k != "peak_rss_bytes"}, "peak_rss_gib": peak,
                    "ingest_seconds": ing["wall_seconds"], "ingest_peak_gib": M.gib(ing["peak_rss_bytes"]),
                    "demo": args.demo, "zones": len(parts)},
    }
    if args.json:
        print(json.dumps(out))
    else:
        M.print_rows(out["rows"])
        print(json.dumps(out["details"], indent=2))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
