#!/usr/bin/env python
"""Benchmark: check of a national deal on the 728,000-unit instance, with the model built from arrays,
side by side with the same model built one pulp variable at a time, and with the solver's own time.

Targets (issue 6): the check (`planner.deals.check_deal`: plan at the deal's confidence, the
largest deliverable guarantee, binding rules) under 60 s; model building under a quarter of that
(15 s). In ONE child process (whole-process peak memory measured), on the same problem:

1. problem preparation: the deal's units (forecast x inventory), avails less the book's holds,
   the delivery model (`deal_units`, `candidate_units`, `make_problem`);
2. the array build of the LP (`planner.allocate._Model`: sparse matrix handed to HiGHS);
3. the solver's own time on that same matrix: one HiGHS LP solve (no cuts);
4. the whole check, `check_deal` (its own build and solve times are reported too);
5. the same LP built the usual pulp way, one `LpVariable` and one term at a time.

Ratios reported: pulp build / array build, and array build / solver's own LP time.

Usage:
    python bench/bench_scale_allocate.py [--large DIR] [--deal national-check] [--solver cbc] [--json]
"""
from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
import _measure as M  # noqa: E402

TARGET_CHECK = 60.0
TARGET_BUILD = 15.0


def build_pulp(prob):
    """The LP of `planner.allocate._Model` (cost mode) in pulp, one variable and one term at a time,
    its rows from the same rule objects (`planner.rules.row_blocks`)."""
    import numpy as np
    import pulp

    from planner.allocate import SCALE, pulp_variable
    from planner.rules import RISK, row_blocks

    r = prob.rules
    n = prob.n
    m = (prob.model.m * SCALE).tolist()
    ub, rate = prob.ub.tolist(), prob.billed.tolist()
    lp = pulp.LpProblem("national_check", pulp.LpMinimize)
    x = []
    for i in range(n):
        x.append(pulp_variable(lp, f"x{i}", 0, ub[i], "Integer"))
    T = pulp_variable(lp, "T", 0)
    lp += pulp.lpSum(rate[i] * x[i] for i in range(n))
    lp += pulp.lpSum(m[i] * x[i] for i in range(n)) - T == 0, "total"
    for b in row_blocks(r, prob.units, prob.weeks):
        for j, key in enumerate(b.keys):
            e = pulp.lpSum(m[i] * x[i] for i in np.flatnonzero(b.group == j)) + float(b.t_coef[j]) * T
            if np.isfinite(b.upper[j]):
                lp += e <= float(b.upper[j]), f"{b.kind}_{key}_hi"
            if np.isfinite(b.lower[j]):
                lp += e >= float(b.lower[j]), f"{b.kind}_{key}_lo"
    factor, label = RISK.base_row(r)
    lp += T >= factor * prob.guarantee * SCALE, label
    return lp


def step_allocate(args) -> None:
    import pandas as pd

    from planner import allocate as al
    from planner.book import held_spots
    from planner.deals import deal_units, rules_of
    from planner.workflows import check_deal
    from planner.scenario import load_scenario

    t0 = time.perf_counter()
    scenario = load_scenario(args.large)
    forecast = pd.read_parquet(Path(args.large) / "forecast" / "forecast.parquet")
    held = held_spots(scenario)
    load_s = time.perf_counter() - t0
    deal = scenario.deals[args.deal]

    t0 = time.perf_counter()
    units = deal_units(scenario, forecast, deal)
    mix = deal.mix
    scope = al.candidate_units(units, weeks=deal.weeks, exclude_networks=mix.exclude_networks,
                               exclude_zones=mix.exclude_zones, max_spots_per_unit=mix.max_spots_per_unit,
                               held=held)
    prob = al.make_problem(scope, deal.impressions, rules_of(deal), deal.weeks)
    prep_s = time.perf_counter() - t0

    t0 = time.perf_counter()
    model = al._Model(prob, "cost", al.DEFAULT_TIME_LIMIT)
    array_build_s = time.perf_counter() - t0
    t0 = time.perf_counter()
    ok, _, lp_obj = model.solve()
    lp_solve_s = time.perf_counter() - t0
    nnz = int(model.h.getLp().a_matrix_.value_.__len__())
    del model

    pulp_s = None
    if not args.skip_pulp:
        t0 = time.perf_counter()
        lp = build_pulp(prob)
        pulp_s = time.perf_counter() - t0
        del lp
    part = {"variables": int(prob.n), "in_scope_units": int(len(prob.scope)), "nonzeros": nnz,
            "load_seconds": load_s, "prep_seconds": prep_s, "array_build_seconds": array_build_s,
            "lp_solve_seconds": lp_solve_s, "lp_ok": bool(ok), "lp_objective": lp_obj,
            "pulp_build_seconds": pulp_s, "solver": args.solver, "check_started_at": time.time()}
    M.emit(part)  # partial result, kept if the check is stopped by the time limit

    t0 = time.perf_counter()
    res = check_deal(scenario, args.deal, solver=args.solver, forecast=forecast, held=held)
    check_s = time.perf_counter() - t0
    M.emit({**part,
            "check_seconds": check_s, "check_build_seconds": res.build_seconds,
            "check_solve_seconds": res.solve_seconds, "deliverable": bool(res.deliverable),
            "cost": res.cost, "gap": res.gap, "probability_of_delivery": res.probability_of_delivery,
            "max_guarantee": res.max_guarantee, "guarantee": res.guarantee, "cuts": res.cuts,
            "spots": res.spots, "units_bought": res.units_bought, "binding": res.binding[:5],
            "held_spots": int(held["spots"].sum()) if len(held) else 0})


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--large", type=Path, default=None)
    ap.add_argument("--deal", default="national-check")
    ap.add_argument("--solver", default="cbc", choices=["cbc", "highs"])
    ap.add_argument("--skip-pulp", action="store_true")
    ap.add_argument("--timeout", type=float, default=840.0,
                    help="stop the check after this many seconds in all (reported as not finished)")
    ap.add_argument("--json", action="store_true")
    ap.add_argument("--step", default=None)
    args = ap.parse_args(argv)
    args.large = args.large or M.default_large()
    if args.step == "allocate":
        step_allocate(args)
        return 0
    cmd = [Path(__file__), "--step", "allocate", "--large", args.large, "--deal", args.deal, "--solver", args.solver]
    if args.skip_pulp:
        cmd.append("--skip-pulp")
    res = M.run_step(cmd, timeout=args.timeout)
    peak = M.gib(res["peak_rss_bytes"])
    build = res["prep_seconds"] + res["array_build_seconds"]
    if "check_seconds" in res:
        check_row = M.row(f"check of a national deal, {res['variables']:,} spot variables ({args.solver}), time",
                          "< 60 s", f"{res['check_seconds']:.1f} s", res["check_seconds"] / TARGET_CHECK,
                          res["check_seconds"] < TARGET_CHECK)
    else:  # stopped: the check ran from check_started_at until the kill
        ran = time.time() - res["check_started_at"]
        res["check_seconds_at_stop"] = ran
        check_row = M.row(f"check of a national deal, {res['variables']:,} spot variables ({args.solver}), time",
                          "< 60 s", f"> {ran:.0f} s (stopped)", ran / TARGET_CHECK, False)
    rows = [
        check_row,
        M.row("  model build: problem prep + array LP build", "< 15 s",
              f"{res['prep_seconds']:.1f} + {res['array_build_seconds']:.2f} s", build / TARGET_BUILD,
              build < TARGET_BUILD),
        M.row("  solver's own time, one HiGHS LP solve of the same matrix", "", f"{res['lp_solve_seconds']:.2f} s",
              None),
        M.row("  ratio array LP build / solver's own LP time", "", f"{res['array_build_seconds']:.2f} / "
              f"{res['lp_solve_seconds']:.2f} s", res["array_build_seconds"] / max(res["lp_solve_seconds"], 1e-9)),
    ]
    if res["pulp_build_seconds"] is not None:
        rows.append(M.row("  same LP built one pulp variable at a time", "", f"{res['pulp_build_seconds']:.1f} s",
                          None))
        rows.append(M.row("  ratio pulp build / array LP build", "",
                          f"{res['pulp_build_seconds']:.1f} / {res['array_build_seconds']:.2f} s",
                          res["pulp_build_seconds"] / max(res["array_build_seconds"], 1e-9)))
    rows.append(M.row("allocation bench, peak memory (whole process, incl. pulp model)", "", f"{peak:.2f} GiB",
                      None))
    out = {"rows": rows, "details": {**{k: v for k, v in res.items() if k != "peak_rss_bytes"},
                                     "peak_rss_gib": peak}}
    if args.json:
        print(json.dumps(out, default=str))
    else:
        M.print_rows(rows)
        print(json.dumps(out["details"], indent=2, default=str))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
