#!/usr/bin/env python
"""Generate a large invented scenario for the scale benchmarks (seeded, chunked, out of core).

Everything here is invented. Default size: 200 zones x 40 networks x 7 dayparts x 13 weeks
(728,000 units per demo), 2 demos, 730 days of quarter-hour history (about 1.1 billion rows),
and a book of 20 committed deals, most of them national.

Layout written under OUT (the project's data contract, plus two documented additions):

    scenario.toml zones.csv networks.csv universes.csv inventory.csv deals/*.toml
    history/part-<zone>.parquet   one Parquet part per zone (all contract columns in every part),
                                  written one zone at a time, so memory stays at one zone's rows
    forecast/forecast.parquet     a BASELINE forecast table (see below)
    book.sqlite                   20 committed deals (planner.book)

The history comes from the project's own vectorised generator (`scenarios.generate`: the same
structure as the demo's history), simulated one zone at a time.

The forecast table is a baseline computed while generating, NOT the product forecaster: per unit,
the mean of the last 8 weeks of the daypart's quarter-hours (the trailing-mean baseline), the
airing sd from the spread of those quarter-hours, the level sd from the spread of the 8 weekly
means, split into network / flight / week factors in fixed proportions (0.5, 0.6, rest). It exists
so the allocator and stress benchmarks run at full size without fitting 11 million profiles; the
forecaster's own fit is benchmarked separately (bench/bench_scale_fit.py).

The book's 20 deals are held with a simple proportional plan per deal (a share of the avails of
the deal's units), committed through `planner.book.commit_deal` with a custom planner, and each
deal's guarantee is set to its plan's expected delivery / 1.10 (pad 0.10). One more proposed deal,
`national-check`, is left uncommitted for the allocation benchmark.

Usage:
    python bench/generate_large.py /work/large/national            # full size
    python bench/generate_large.py /tmp/mid --zones 20 --networks 10 --days 120
"""
from __future__ import annotations

import argparse
import json
import shutil
import sys
import time
from datetime import date, timedelta
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

from scenarios import generate as gen  # noqa: E402

QH = 96
#: name, start, end (clock), spot CPM in currency for hh, avails per unit-week (typical)
DAYPARTS = [
    ("early_morning", "05:00", "09:00", 9.0, 6),
    ("daytime", "09:00", "16:00", 7.0, 10),
    ("early_fringe", "16:00", "19:00", 11.0, 6),
    ("prime_access", "19:00", "20:00", 16.0, 3),
    ("prime", "20:00", "23:00", 22.0, 6),
    ("late_fringe", "23:00", "01:00", 12.0, 4),
    ("overnight", "01:00", "05:00", 5.0, 8),
]
DEMOS = ["hh", "a25-54"]
DEAL_PAD = 0.10
TRAIL_WEEKS = 8
LEVEL_SPLIT = (0.5, 0.6)  # network, flight loadings as fractions of the level sd; week takes the rest


def _qh(clock: str) -> int:
    h, m = clock.split(":")
    return int(h) * 4 + int(m) // 15


def daypart_quarter_hours(start: str, end: str) -> np.ndarray:
    """Quarter-hour indices of a daypart relative to its start day (>= 96: next day)."""
    s, e = _qh(start), _qh(end)
    if e <= s:
        e += QH
    return np.arange(s, e)


def _log(msg: str) -> None:
    print(msg, file=sys.stderr, flush=True)


# ----------------------------------------------------------------------------- static files

def _names(n: int, prefix: str, width: int) -> list[str]:
    return [f"{prefix}{i + 1:0{width}d}" for i in range(n)]


def write_static(out: Path, *, zones: int, networks: int, days: int, demos: list[str], weeks: int,
                 seed: int) -> dict:
    """scenario.toml, zones.csv, networks.csv, universes.csv; returns the layout as a dict."""
    rng = np.random.default_rng([seed, 1])
    zone_names = _names(zones, "zone-", 3)
    markets = [f"market-{(i // 4) + 1:02d}" for i in range(zones)]
    net_names = _names(networks, "net-", 2)
    genres = [gen.GENRES[i % len(gen.GENRES)] for i in range(networks)]
    hh = np.round(np.exp(rng.normal(np.log(250_000), 0.6, zones)), -2).clip(20_000, 3_000_000)
    uni = {"hh": hh, "a25-54": np.round(hh * rng.uniform(0.95, 1.25, zones), -2)}
    start = date(2025, 1, 6)  # a Monday
    end = start + timedelta(days=days - 1)
    first_week = end + timedelta(days=(7 - end.weekday()) % 7 or 7)  # the Monday after the history
    out.mkdir(parents=True, exist_ok=True)
    pd.DataFrame({"zone": zone_names, "market": markets}).to_csv(out / "zones.csv", index=False)
    pd.DataFrame({"network": net_names, "genre": genres}).to_csv(out / "networks.csv", index=False)
    pd.DataFrame({"zone": np.repeat(zone_names, len(demos)), "demo": demos * zones,
                  "universe": np.column_stack([uni[d] for d in demos]).ravel()}).to_csv(
        out / "universes.csv", index=False)
    lines = [
        "# Invented large scenario for the scale benchmarks (bench/generate_large.py).",
        'name = "national-large"',
        f"first_week = {first_week.isoformat()}",
        f"weeks = {weeks}",
        'currency = "USD"',
        "preempt_rate = 0.03",
        f"demos = [{', '.join(json.dumps(d) for d in demos)}]",
        "",
    ]
    for name, s, e, _, _ in DAYPARTS:
        lines += ["[[daypart]]", f'name = "{name}"', f'start = "{s}"', f'end = "{e}"',
                  'days = ["mon", "tue", "wed", "thu", "fri", "sat", "sun"]', ""]
    (out / "scenario.toml").write_text("\n".join(lines))
    return dict(zones=zone_names, networks=net_names, genres=genres, demos=demos,
                universes=np.column_stack([uni[d] for d in demos]), start=start, end=end,
                first_week=first_week, weeks=weeks)


# ----------------------------------------------------------------------------- history + baseline

def _baseline_zone(ratings: np.ndarray, hist_days: int, dow0: int, universe: np.ndarray) -> dict:
    """Baseline forecast figures of one zone from its last TRAIL_WEEKS weeks of history.

    ratings: float32 (networks, demos, days, 96) with days >= hist_days + 1 (the day after the
    history feeds the wrapping daypart's last night). Returns arrays (dayparts, networks, demos).
    """
    n_days = TRAIL_WEEKS * 7
    lo = hist_days - n_days
    block = ratings[:, :, lo:hist_days + 1, :].astype(np.float64)  # one extra day for wraps
    ext = np.concatenate([block[:, :, :-1, :], block[:, :, 1:, :]], axis=3)  # (n, d, days, 192)
    out = {k: [] for k in ("mean", "airing_sd", "level_sd")}
    for _, s, e, _, _ in DAYPARTS:
        qh = daypart_quarter_hours(s, e)
        vals = ext[:, :, :, qh]                                   # (n, d, days, q)
        weekly = vals.reshape(*vals.shape[:2], TRAIL_WEEKS, 7 * len(qh)).mean(axis=3)
        mean = vals.mean(axis=(2, 3))
        out["mean"].append(mean)
        out["airing_sd"].append(vals.std(axis=(2, 3)))
        out["level_sd"].append(np.maximum(weekly.std(axis=2, ddof=1), 0.04 * mean))
    res = {k: np.stack(v) * universe[None, None, :] for k, v in out.items()}  # impressions
    res["mean_rating"] = np.stack(out["mean"])
    return res


def _baseline_frame(zone, nets, demos, dp_names, universe, base) -> pd.DataFrame:
    d_i, n_i, m_i = (a.ravel() for a in np.indices(base["mean"].shape))  # (dayparts, networks, demos)
    return pd.DataFrame({
        "zone": zone, "network": np.asarray(nets)[n_i], "daypart": np.asarray(dp_names)[d_i],
        "demo": np.asarray(demos)[m_i], "universe": universe[m_i],
        "mean_rating": base["mean_rating"].ravel(), "mean_impressions": base["mean"].ravel(),
        "airing_sd": base["airing_sd"].ravel(), "level_sd": base["level_sd"].ravel(),
    })


def write_history_and_baseline(out: Path, layout: dict, *, seed: int, history: bool = True,
                               history_zones: int | None = None) -> dict:
    """Simulate one zone at a time; write history/part-<zone>.parquet and forecast/forecast.parquet.

    `history_zones`: only the first that many zones get history parts (None: all). The others'
    baseline comes from a short simulation of the last TRAIL_WEEKS weeks only (cheap).
    """
    zones, nets, demos = layout["zones"], layout["networks"], layout["demos"]
    start, end, first_week, weeks = layout["start"], layout["end"], layout["first_week"], layout["weeks"]
    hist_days = (end - start).days + 1
    horizon = (first_week - end).days + 7 * weeks
    spec = gen.make_spec(zones=zones, networks=nets, genres=layout["genres"], demos=demos,
                         universes=layout["universes"], start=start, end=end, seed=seed,
                         horizon_days=horizon)
    sim = gen.ProfileSim(spec)
    n_hist = len(zones) if history_zones is None else max(0, min(int(history_zones), len(zones)))
    short_start = end - timedelta(days=7 * TRAIL_WEEKS - 1)
    short = None
    if n_hist < len(zones):
        short = gen.ProfileSim(gen.make_spec(zones=zones, networks=nets, genres=layout["genres"], demos=demos,
                                       universes=layout["universes"], start=short_start, end=end,
                                       seed=seed, horizon_days=2))
    n_net, n_dem = len(nets), len(demos)
    net_i = np.repeat(np.arange(n_net, dtype=np.int32), n_dem * hist_days * QH)
    dem_i = np.tile(np.repeat(np.arange(n_dem, dtype=np.int32), hist_days * QH), n_net)
    day_i = np.tile(np.repeat(np.arange(hist_days, dtype=np.int32), QH), n_net * n_dem)
    qh_i = np.tile(np.arange(QH, dtype=np.int16), n_net * n_dem * hist_days)
    day0 = int((np.datetime64(start, "D") - np.datetime64("1970-01-01", "D")).astype(int))
    hdir = out / "history"
    if history:
        if hdir.exists():
            shutil.rmtree(hdir)
        hdir.mkdir(parents=True)
    rows = 0
    frames = []
    t0 = time.perf_counter()
    dp_names = [d[0] for d in DAYPARTS]
    for zi, zone in enumerate(zones):
        if zi >= n_hist:                             # baseline only, from the short simulation
            base = _baseline_zone(short.zone(zi), 7 * TRAIL_WEEKS, short_start.weekday(),
                                  layout["universes"][zi])
            frames.append(_baseline_frame(zone, nets, demos, dp_names, layout["universes"][zi], base))
            continue
        ratings = sim.zone(zi)                       # (net, demo, total_days, 96) float32
        if history:
            keep = sim.history_mask(zi).reshape(-1)
            flat = ratings[:, :, :hist_days, :].reshape(-1)
            n = int(keep.sum())
            table = pa.table({
                "zone": gen._dict_column([zone], np.zeros(n, dtype=np.int32)),
                "network": gen._dict_column(nets, net_i[keep]),
                "demo": gen._dict_column(demos, dem_i[keep]),
                "date": pa.array(day0 + day_i[keep], type=pa.int32()).cast(pa.date32()),
                "quarter_hour": pa.array(qh_i[keep]),
                "rating": pa.array(flat[keep]),
            }, schema=gen.HISTORY_SCHEMA)
            tmp = hdir / f".part-{zone}.parquet.tmp"
            pq.write_table(table, tmp, compression="zstd", row_group_size=1 << 20)
            tmp.rename(hdir / f"part-{zone}.parquet")
            rows += n
            del table, keep, flat
        base = _baseline_zone(ratings, hist_days, start.weekday(), layout["universes"][zi])
        frames.append(_baseline_frame(zone, nets, demos, dp_names, layout["universes"][zi], base))
        if (zi + 1) % 10 == 0 or zi + 1 == n_hist:
            el = time.perf_counter() - t0
            _log(f"  zone {zi + 1}/{len(zones)}: {rows:,} history rows, {el:.0f} s")
    per_unit = pd.concat(frames, ignore_index=True)
    forecast = per_unit.loc[per_unit.index.repeat(weeks)].reset_index(drop=True)
    forecast.insert(3, "week", np.tile(np.arange(1, weeks + 1), len(per_unit)))
    a, b = LEVEL_SPLIT
    lvl = forecast["level_sd"].to_numpy()
    forecast["level_sd_network"] = a * lvl
    forecast["level_sd_flight"] = b * lvl
    forecast["level_sd_week"] = np.sqrt(max(1 - a * a - b * b, 0.0)) * lvl
    sd = np.sqrt(forecast["airing_sd"] ** 2 + lvl ** 2)
    mu = forecast["mean_impressions"]
    forecast["q10_impressions"] = np.maximum(mu - 1.2816 * sd, 0.0)   # normal approximation
    forecast["q90_impressions"] = mu + 1.2816 * sd
    forecast["history_weeks"] = hist_days // 7
    forecast = forecast[["zone", "network", "daypart", "week", "demo", "universe", "mean_rating",
                         "mean_impressions", "airing_sd", "level_sd", "level_sd_network",
                         "level_sd_flight", "level_sd_week", "q10_impressions", "q90_impressions",
                         "history_weeks"]]
    fdir = out / "forecast"
    fdir.mkdir(exist_ok=True)
    forecast.to_parquet(fdir / "forecast.parquet", index=False)
    (fdir / "BASELINE.txt").write_text(
        "Baseline forecast written by bench/generate_large.py (trailing 8-week mean and spreads),\n"
        "for the allocator and stress benchmarks only. Invented data; estimates, not promises.\n")
    return {"history_rows": rows, "forecast_rows": len(forecast), "seconds": time.perf_counter() - t0}


# ----------------------------------------------------------------------------- inventory + deals

def write_inventory(out: Path, layout: dict, forecast: pd.DataFrame, *, seed: int) -> pd.DataFrame:
    """inventory.csv: avails by daypart, rate = hh CPM of the daypart x expected hh impressions."""
    rng = np.random.default_rng([seed, 2])
    hh = forecast[forecast["demo"] == layout["demos"][0]]
    inv = hh[["zone", "network", "daypart", "week", "mean_impressions"]].copy()
    cpm = inv["daypart"].map({d[0]: d[3] for d in DAYPARTS}).to_numpy(float)
    typical = inv["daypart"].map({d[0]: d[4] for d in DAYPARTS}).to_numpy(float)
    n = len(inv)
    inv["avails"] = rng.poisson(typical).astype(np.int64)
    rate = cpm * rng.lognormal(0.0, 0.25, n) * np.maximum(inv["mean_impressions"].to_numpy(), 1.0) / 1000.0
    inv["rate"] = np.round(np.maximum(rate, 1.0), 2)
    inv = inv.drop(columns="mean_impressions").reset_index(drop=True)
    inv.to_csv(out / "inventory.csv", index=False)
    return inv


def _deal_toml(name: str, advertiser: str, demo: str, guarantee: float, first: int, last: int,
               cpm: float, risk: str, mix: dict) -> str:
    lines = [f'name = "{name}"', f'advertiser = "{advertiser}"', f'demo = "{demo}"',
             f"impressions = {int(guarantee)}", f"first_week = {first}", f"last_week = {last}",
             f"price_cpm = {cpm:.2f}", risk, "", "[mix]"]
    for k, v in mix.items():
        if isinstance(v, dict):
            inner = ", ".join(f"{kk} = {vv}" for kk, vv in v.items())
            lines.append(f"{k} = {{ {inner} }}")
        elif isinstance(v, list):
            lines.append(f"{k} = [{', '.join(json.dumps(x) for x in v)}]")
        else:
            lines.append(f"{k} = {v}")
    return "\n".join(lines) + "\n"


def book_plans(layout: dict, forecast: pd.DataFrame, inventory: pd.DataFrame, *, n_deals: int,
               seed: int) -> list[dict]:
    """Proportional plans for the book's deals: a share of each in-scope unit's avails left."""
    rng = np.random.default_rng([seed, 3])
    key = ["zone", "network", "daypart", "week"]
    left = inventory.set_index(key)["avails"].astype(np.int64).copy()
    zones = np.asarray(layout["zones"])
    markets = np.array([f"market-{(i // 4) + 1:02d}" for i in range(len(zones))])
    nets = np.asarray(layout["networks"])
    dps = np.asarray([d[0] for d in DAYPARTS])
    fc = forecast.set_index(key + ["demo"])
    plans = []
    for k in range(n_deals):
        demo = layout["demos"][k % len(layout["demos"])]
        first = int(rng.integers(1, 5))
        last = int(rng.integers(min(first + 3, layout["weeks"]), layout["weeks"] + 1))
        if k < max(1, int(0.6 * n_deals)):
            zsel = zones                                               # national
        else:
            ms = rng.choice(np.unique(markets), size=max(1, len(np.unique(markets)) // 3), replace=False)
            zsel = zones[np.isin(markets, ms)]                         # regional
        nsel = rng.choice(nets, size=max(1, int(rng.integers(len(nets) // 4, len(nets) // 2 + 1))), replace=False)
        dsel = rng.choice(dps, size=int(rng.integers(3, 7)), replace=False)
        idx = pd.MultiIndex.from_product([zsel, nsel, dsel, range(first, last + 1)], names=key)
        avail = left.reindex(idx).fillna(0).to_numpy(np.int64)
        share = rng.uniform(0.08, 0.2)
        spots = np.floor(avail * share + rng.random(len(avail))).astype(np.int64)
        spots = np.minimum(spots, avail)
        keep = spots > 0
        idx, spots = idx[keep], spots[keep]
        left.loc[idx] = left.loc[idx].to_numpy() - spots
        units = fc.reindex(pd.MultiIndex.from_arrays(
            [idx.get_level_values(i) for i in range(4)] + [np.full(len(idx), demo)], names=key + ["demo"]))
        frame = idx.to_frame(index=False)
        frame["spots"] = spots
        rate = inventory.set_index(key)["rate"].reindex(idx).to_numpy()
        frame["rate"] = rate
        frame["cost"] = rate * spots
        frame["expected_impressions"] = spots * 0.97 * units["mean_impressions"].to_numpy()
        plans.append(dict(name=f"book-deal-{k + 1:02d}", demo=demo, first=first, last=last,
                          spots=frame, units=units.reset_index()))
    return plans


def write_deals(out: Path, layout: dict, plans: list[dict], forecast: pd.DataFrame,
                inventory: pd.DataFrame, *, seed: int) -> None:
    rng = np.random.default_rng([seed, 4])
    ddir = out / "deals"
    if ddir.exists():
        shutil.rmtree(ddir)
    ddir.mkdir()
    for p in plans:
        exp = float(p["spots"]["expected_impressions"].sum())
        g = exp / (1 + DEAL_PAD)
        cpm = float(p["spots"]["cost"].sum()) / g * 1000 * rng.uniform(1.15, 1.4)
        (ddir / f"{p['name']}.toml").write_text(_deal_toml(
            p["name"], f"Invented Advertiser {p['name'][-2:]}", p["demo"], g, p["first"], p["last"],
            cpm, f"pad = {DEAL_PAD}", {}))
    write_check_deal(out, layout, forecast, inventory, held=None)


CHECK_SHARE = 0.08  # the national deal asks for this share of what the avails left can deliver


def write_check_deal(out: Path, layout: dict, forecast: pd.DataFrame, inventory: pd.DataFrame,
                     held: pd.DataFrame | None) -> float:
    """deals/national-check.toml, the deal the allocation benchmark checks (never committed).

    All zones, networks and dayparts, every week, confidence 95%, mix rules; the guarantee is
    CHECK_SHARE of the expected hh impressions of the avails left after `held` (capped at 3 per
    unit), so it is deliverable but not trivially. Returns the guarantee.
    """
    key = ["zone", "network", "daypart", "week"]
    hh = forecast[forecast["demo"] == layout["demos"][0]].merge(inventory, on=key)
    avail = hh["avails"].to_numpy(float)
    if held is not None and len(held):
        h = held.groupby(key, as_index=False)["spots"].sum()
        avail = avail - hh[key].merge(h, on=key, how="left")["spots"].fillna(0).to_numpy(float)
    cap = float((np.minimum(np.maximum(avail, 0), 3) * 0.97 * hh["mean_impressions"]).sum())
    g = CHECK_SHARE * cap
    (out / "deals" / "national-check.toml").write_text(_deal_toml(
        "national-check", "Invented Advertiser National", layout["demos"][0], g, 1, layout["weeks"],
        24.0, "confidence = 0.95",
        {"max_network_share": max(0.10, round(2.5 / len(layout["networks"]), 2)),
         "daypart_min_share": {"prime": 0.2}, "weekly_tolerance": 0.25, "max_spots_per_unit": 3}))
    return g


class _FixedPlan:
    """What `planner.book.commit_deal` needs from a plan: spots and headline figures."""

    def __init__(self, spots: pd.DataFrame, summary: dict):
        self.spots = spots
        self.deliverable = True
        for k, v in summary.items():
            setattr(self, k, v)


def commit_book(out: Path, plans: list[dict]) -> float:
    """Commit every plan through planner.book.commit_deal; returns seconds."""
    from planner.book import book_path
    from planner.workflows import commit_deal
    from planner.delivery import DeliveryModel
    from planner.scenario import load_scenario

    t0 = time.perf_counter()
    scenario = load_scenario(out)
    path = book_path(scenario)
    for f in (path, Path(str(path) + "-wal"), Path(str(path) + "-shm")):
        if f.exists():
            f.unlink()
    inv = scenario.inventory.set_index(["zone", "network", "daypart", "week"])["preempt_rate"]
    for p in plans:
        units = p["units"].copy()
        units["preempt_rate"] = inv.reindex(pd.MultiIndex.from_frame(
            units[["zone", "network", "daypart", "week"]])).to_numpy()
        x = p["spots"]["spots"].to_numpy(float)
        model = DeliveryModel.from_units(units)
        deal = scenario.deals[p["name"]]
        summary = dict(cost=float(p["spots"]["cost"].sum()), expected_impressions=model.mean(x),
                       sd=model.sd(x), probability=model.probability(x, deal.impressions))
        plan = _FixedPlan(p["spots"], summary)
        res = commit_deal(scenario, p["name"], planner=lambda *a, _plan=plan, **k: _plan)
        if not res.committed:
            raise RuntimeError(f"{p['name']}: not committed ({res.reason})")
    return time.perf_counter() - t0


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("out", type=Path)
    ap.add_argument("--zones", type=int, default=200)
    ap.add_argument("--networks", type=int, default=40)
    ap.add_argument("--days", type=int, default=730, help="days of quarter-hour history")
    ap.add_argument("--demos", type=int, default=2, choices=[1, 2])
    ap.add_argument("--weeks", type=int, default=13)
    ap.add_argument("--deals", type=int, default=20, help="deals committed to the book")
    ap.add_argument("--seed", type=int, default=2027)
    ap.add_argument("--no-history", action="store_true", help="skip writing the history parts")
    ap.add_argument("--history-zones", type=int, default=None,
                    help="write history for the first N zones only (default: every zone)")
    ap.add_argument("--no-book", action="store_true", help="skip committing the book")
    args = ap.parse_args(argv)
    if args.no_history and not args.no_book:
        ap.error("--no-history needs --no-book: committing the book loads the scenario, and a "
                 "scenario needs its history (the data contract)")
    if args.days < 7 * TRAIL_WEEKS:
        ap.error(f"--days must be at least {7 * TRAIL_WEEKS} (the baseline uses {TRAIL_WEEKS} weeks)")
    out = args.out.resolve()
    if ROOT in out.parents or out == ROOT:
        ap.error("write the large instance outside the repository (e.g. /work/large or /tmp)")
    t0 = time.perf_counter()
    layout = write_static(out, zones=args.zones, networks=args.networks, days=args.days,
                          demos=DEMOS[: args.demos], weeks=args.weeks, seed=args.seed)
    _log(f"{out}: {args.zones} zones x {args.networks} networks x {len(DAYPARTS)} dayparts x "
         f"{args.weeks} weeks = {args.zones * args.networks * len(DAYPARTS) * args.weeks:,} units per demo")
    hist = write_history_and_baseline(out, layout, seed=args.seed, history=not args.no_history,
                                      history_zones=args.history_zones)
    forecast = pd.read_parquet(out / "forecast" / "forecast.parquet")
    inventory = write_inventory(out, layout, forecast, seed=args.seed)
    plans = book_plans(layout, forecast, inventory, n_deals=args.deals, seed=args.seed)
    write_deals(out, layout, plans, forecast, inventory, seed=args.seed)
    book_s = 0.0 if args.no_book else commit_book(out, plans)
    if not args.no_book:  # size the checked deal against the avails the book leaves
        from planner.book import held_spots
        from planner.scenario import load_scenario

        write_check_deal(out, layout, forecast, inventory, held_spots(load_scenario(out)))
    held = sum(int(p["spots"]["spots"].sum()) for p in plans)
    facts = {"out": str(out), "zones": args.zones, "networks": args.networks, "dayparts": len(DAYPARTS),
             "weeks": args.weeks, "demos": args.demos, "days": args.days,
             "units_per_demo": len(inventory), "history_rows": hist["history_rows"],
             "history_parts": 0 if args.no_history else len(list((out / "history").glob("*.parquet"))),
             "history_zones": 0 if args.no_history else min(args.history_zones or args.zones, args.zones),
             "forecast_rows": hist["forecast_rows"], "book_deals": 0 if args.no_book else len(plans),
             "book_spots": 0 if args.no_book else held, "book_units": int(sum(len(p["spots"]) for p in plans)),
             "seconds": round(time.perf_counter() - t0, 1), "book_seconds": round(book_s, 1),
             "seed": args.seed}
    (out / "LARGE.json").write_text(json.dumps(facts, indent=2))
    print(json.dumps(facts, indent=2))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
