#!/usr/bin/env python
"""Benchmark: honesty of the forecast and of the chances of delivery over several kinds of history.

For each history family of `scenarios.worlds` (the profile generator and the structurally
different drift generator) and each seed, a complete invented world is made, its forecast fitted
as a user would (`ensure_forecast`), and scored two ways:

- plan weeks against the world's simulated truth (`world_truth_levels`): total bias (sum actual /
  sum forecast - 1), that bias in the sds the forecast's own error law gives it (`bias_z`, N(0, 1)
  if the law is right), CRPS and its skill against the better of two baselines made at the same
  origin (last year's same weeks; the trailing 8 weeks), each with its own held-out spread;
- replayed deals (`planner.hindcast.replay_deals`) at the fit's past origins, pooled by family: a
  reliability table of claimed chance against realised frequency, with the effective number of
  independent outcomes (deals at one origin share its shocks); and the same plans' claims as the
  tool states them after `--apply` (`cross_validated_claims`: each origin's with the planned-delivery
  factor and shared scale learned from its world's other origins).

With `--apply` the plan-week scores are of the table with the replays' shared scale (the units'
law); the planned-delivery factor (the optimizer's curse measured on the replays) concerns plans,
not every unit, and is judged on the cross-validated replays. `*_unapplied` figures are the fit's.

Targets (issue "honest chances of delivery"), judged per family: mean plan-week bias within
+-2%; RMS of bias_z between 0.7 and 1.35; mean CRPS skill >= 10% and no seed below -5%; every
claimed-chance bin within 3 points of its mean claim or within 2 standard errors; claims at 95%
delivered in at least 92%. Invented data throughout.

Usage:
    python bench/bench_worlds.py [--families profile,drift] [--seeds 1-15] [--size small]
                                 [--lead 0,28,119] [--out bench/worlds.json]
    python bench/bench_worlds.py --pool A.json B.json   (pool runs over other seeds: worlds and deals)
"""
from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from forecasting.backtest import score_levels  # noqa: E402
from forecasting.baselines import last_year, trailing_mean  # noqa: E402
from forecasting.dayparts import as_specs  # noqa: E402
from forecasting.scoring import total_bias_sd  # noqa: E402
from forecasting.uncertainty import COMPONENT_KEYS, factor_components  # noqa: E402
from planner.forecast_job import ensure_forecast, load_history_cube, load_model  # noqa: E402
from scipy.stats import norm  # noqa: E402

from planner.hindcast import (applied_scale, effective_count, replay_deals,  # noqa: E402
                              scale_shared_factors, selection_gap, shared_scale, summarise)
from planner.scenario import load_scenario  # noqa: E402
from scenarios.worlds import make_world, world_truth_levels  # noqa: E402

KEY = ["zone", "network", "daypart", "week", "demo"]


def _seeds(text: str) -> list[int]:
    if "-" in text:
        a, b = text.split("-")
        return list(range(int(a), int(b) + 1))
    return [int(x) for x in text.split(",")]


def baseline_table(sc, model) -> pd.DataFrame:
    """The two baselines at the plan origin, per unit-week (impressions per spot), with the sd of
    their own held-out spread by daypart."""
    cube, info = load_history_cube(sc)
    specs = as_specs(sc.dayparts)
    p0 = cube.day_index(pd.Timestamp(sc.first_week))
    W = int(sc.weeks)
    starts = p0 + 7 * np.arange(W)
    base = {"last_year": last_year(cube.values, cube.day0.day_of_week, starts, specs),
            "trailing_8w": trailing_mean(cube.values, cube.day0.day_of_week, cube.n_days, specs, W)}
    S, P = len(info), len(specs)
    s, p, w = (a.ravel() for a in np.meshgrid(np.arange(S), np.arange(P), np.arange(W), indexing="ij"))
    t = pd.DataFrame({"zone": info["zone"].to_numpy()[s], "network": info["network"].to_numpy()[s],
                      "daypart": np.array([d.name for d in specs])[p], "week": w + 1, "demo": info["demo"].to_numpy()[s]})
    uni = sc.universes.set_index(["zone", "demo"])["universe"]
    u = np.array([float(uni[(z, d)]) for z, d in zip(t["zone"], t["demo"])])
    for name, arr in base.items():
        t[f"{name}_mean"] = arr[s, p, w] * u
        spread = model.baseline_spread_.get(name, {})
        t[f"{name}_sd"] = t["daypart"].map(spread).astype(float).fillna(0.3).to_numpy() * t[f"{name}_mean"]
    return t


def plan_week_scores(sc, table: pd.DataFrame, model) -> dict:
    """Scores of the shipped table and the baselines on the plan weeks against the world's truth."""
    m = table.merge(world_truth_levels(sc), on=KEY).merge(baseline_table(sc, model), on=KEY)
    m = m[np.isfinite(m["last_year_mean"]) & np.isfinite(m["trailing_8w_mean"])
          & (m["last_year_mean"] > 0) & (m["trailing_8w_mean"] > 0)]
    y = m["true_impressions"].to_numpy(float)
    out = score_levels(y, m["mean_impressions"], m["level_sd"])
    spec = [(col.replace("rel_sd_", "level_sd_"), keys) for col, keys in COMPONENT_KEYS]
    mu = m["mean_impressions"].to_numpy(float)
    out["bias_sd"] = total_bias_sd(mu, factor_components(m, spec, divide_by=mu))
    out["bias_z"] = out["bias"] / out["bias_sd"]
    base = {n: score_levels(y, m[f"{n}_mean"], m[f"{n}_sd"]) for n in ("last_year", "trailing_8w")}
    best = min(b["crps"] for b in base.values())
    out["baselines"] = {n: {"crps": b["crps"], "bias": b["bias"]} for n, b in base.items()}
    out["crps_skill"] = 1.0 - out["crps"] / best
    out["units"] = int(len(m))
    return out


def run_world(family: str, seed: int, size: str, lead: int, work: Path, apply: bool = False) -> tuple[dict, pd.DataFrame]:
    t0 = time.perf_counter()
    path = make_world(work / f"{family}-{seed}", family, seed, size=size, lead_days=lead)
    sc = load_scenario(path)
    res = ensure_forecast(sc)
    t_fit = time.perf_counter() - t0
    model = load_model(sc)
    replay = replay_deals(sc, model, seed=seed, solver="highs")
    table = res.table
    scale = float(replay.summary.get("scale_to_apply", 1.0)) if apply and len(replay.deals) else 1.0
    factor = float(replay.summary.get("deal_factor_to_apply", 1.0)) if apply and len(replay.deals) else 1.0
    if scale != 1.0:  # the shared scale `pledge forecast hindcast --apply` (and pledge demo) give the units' law;
        table = scale_shared_factors(table, scale)  # its planned-delivery factor is for plans (replays, below)
    scores = plan_week_scores(sc, table, model)
    unapplied = plan_week_scores(sc, res.table, model) if table is not res.table else scores
    deals = replay.deals.assign(family=family, seed=seed, origin=lambda d: f"{family}-{seed}-" + d["origin"])
    fit = res.meta["fit"]
    row = {"family": family, "seed": seed, "lead_days": lead, "fit_seconds": round(t_fit, 1),
           "seconds": round(time.perf_counter() - t0, 1), "bias": scores["bias"], "bias_sd": scores["bias_sd"],
           "bias_z": scores["bias_z"], "bias_z_unapplied": unapplied["bias_z"],
           "crps_skill": scores["crps_skill"], "coverage": scores["coverage"],
           "bias_unapplied": unapplied["bias"], "crps_skill_unapplied": unapplied["crps_skill"],
           "coverage_unapplied": unapplied["coverage"],
           "selection_gap": replay.summary.get("selection", {}).get("gap", 0.0), "applied_deal_factor": factor,
           "disagreement_sd": fit["candidates"].get("disagreement_sd", 0.0),
           "baseline_bias": {n: b["bias"] for n, b in scores["baselines"].items()},
           "weights": fit["candidates"]["pooled_weights"],
           "common_widened_by_sd": fit["level_error"]["common_widened_by_sd"],
           "replayed": int(len(deals)), "units": scores["units"], "applied_scale": scale}
    return row, deals


def cross_validated_claims(deals: pd.DataFrame) -> pd.DataFrame:
    """The replayed plans' claims as the tool would state them after `--apply`, each origin's with
    the planned-delivery factor and shared scale learned from the OTHER origins of its world
    (`selection_gap`, `shared_scale`, `applied_scale`): ``claimed = Phi((f m - G) / (f sqrt(k^2 q + l)))``,
    the plans themselves unchanged. Columns as `replay_deals`' (claimed, expected, sd, z, pit redone)."""
    out = []
    for (_, seed), world in deals.groupby(["family", "seed"], sort=False):
        for origin, here in world.groupby("origin", sort=False):
            others = world[world["origin"] != origin]
            f = selection_gap(others)["factor"] if len(others) else 1.0
            n_eff, _ = effective_count(others["z"].to_numpy(float), others["origin"].to_numpy()) if len(others) else (0.0, 0.0)
            k = applied_scale(shared_scale(others, factor=f), n_eff) if len(others) else 1.0
            d = here.copy()
            d["expected"] = f * d["expected"]
            d["shared_var"] = (f * k) ** 2 * d["shared_var"]
            d["other_var"] = f * f * d["other_var"]
            d["sd"] = np.sqrt(d["shared_var"] + d["other_var"])
            d["claimed"] = norm.cdf((d["expected"] - d["guarantee"]) / d["sd"])
            d["z"] = (d["delivered"] - d["expected"]) / d["sd"]
            d["pit"] = norm.cdf(d["z"])
            out.append(d)
    return pd.concat(out, ignore_index=True) if out else deals


def family_summary(rows: list[dict], deals: pd.DataFrame) -> dict:
    df = pd.DataFrame(rows)
    out = {"worlds": int(len(df)), "mean_bias": float(df["bias"].mean()),
           "bias_se": float(df["bias"].std(ddof=1) / np.sqrt(len(df))) if len(df) > 1 else float("nan"),
           "bias_z_rms": float(np.sqrt(np.mean(df["bias_z"] ** 2))),
           "bias_z_rms_unapplied": float(np.sqrt(np.mean(df.get("bias_z_unapplied", df["bias_z"]) ** 2))),
           "mean_crps_skill": float(df["crps_skill"].mean()), "min_crps_skill": float(df["crps_skill"].min()),
           "coverage": {lv: float(np.mean([c[lv] for c in df["coverage"]])) for lv in ("0.5", "0.8", "0.95")}}
    if "crps_skill_unapplied" in df:
        out["unapplied"] = {
            "mean_bias": float(df["bias_unapplied"].mean()),
            "mean_crps_skill": float(df["crps_skill_unapplied"].mean()),
            "min_crps_skill": float(df["crps_skill_unapplied"].min()),
            "coverage": {lv: float(np.mean([c[lv] for c in df["coverage_unapplied"]])) for lv in ("0.5", "0.8", "0.95")}}
        out["mean_selection_gap"] = float(df["selection_gap"].mean())
    if len(deals):
        out["replayed"] = summarise(deals)
        if "units_miss" in deals:
            out["replayed_as_applied_cross_validated"] = summarise(cross_validated_claims(deals))
    return out


def pool(paths: list[str]) -> int:
    """Summaries of several runs pooled: their worlds and their replayed deals, by family."""
    worlds = [w for p in paths for w in json.loads(Path(p).read_text())["worlds"]]
    out = {}
    for family in sorted({w["family"] for w in worlds}):
        frames = [pd.read_csv(Path(p).with_suffix(f".{family}.deals.csv")) for p in paths
                  if Path(p).with_suffix(f".{family}.deals.csv").is_file()]
        deals = pd.concat(frames, ignore_index=True) if frames else pd.DataFrame()
        out[family] = family_summary([w for w in worlds if w["family"] == family], deals)
        out[family]["runs_with_replays"] = len(frames)
    print(json.dumps(out, indent=1, default=float))
    return 0


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--families", default="profile,drift")
    ap.add_argument("--seeds", default="1-15")
    ap.add_argument("--size", default="small")
    ap.add_argument("--lead", default="0,28,119", help="lead days, cycled over the seeds")
    ap.add_argument("--out", default=str(ROOT / "bench" / "worlds.json"))
    ap.add_argument("--apply", action="store_true",
                    help="score the plan weeks after widening the shared factors by the replays' scale, as "
                         "pledge forecast hindcast --apply and pledge demo do")
    ap.add_argument("--pool", nargs="+", help="summarise earlier runs' JSON (and their .FAMILY.deals.csv) together")
    args = ap.parse_args(argv)
    if args.pool:
        return pool(args.pool)
    leads = [int(x) for x in args.lead.split(",")]
    result = {"families": {}, "worlds": []}
    with tempfile.TemporaryDirectory() as tmp:
        for family in args.families.split(","):
            rows, frames = [], []
            for i, seed in enumerate(_seeds(args.seeds)):
                row, deals = run_world(family, seed, args.size, leads[i % len(leads)], Path(tmp), args.apply)
                rows.append(row)
                frames.append(deals)
                print(json.dumps({k: (round(v, 4) if isinstance(v, float) else v) for k, v in row.items()
                                  if k not in ("coverage", "weights", "baseline_bias")}), file=sys.stderr, flush=True)
            deals = pd.concat(frames, ignore_index=True)
            deals.to_csv(Path(args.out).with_suffix(f".{family}.deals.csv"), index=False)
            result["families"][family] = family_summary(rows, deals)
            result["worlds"] += rows
            Path(args.out).write_text(json.dumps(result, indent=1, default=float))
    print(json.dumps(result["families"], indent=1, default=float))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
