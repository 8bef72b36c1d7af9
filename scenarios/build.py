"""Build invented scenario folders: the shipped demo and small scenarios for tests.

Inventory (avails, rates) and deal guarantees are derived from what the generator really
delivers over the plan weeks (`simulate_truth`), so that the deals' intended verdicts hold:
each deal's guarantee is a stated fraction of the most the allowed inventory can deliver in
expectation under the deal's mix rules (a linear programme, scipy's HiGHS). All names invented.

Run `python -m scenarios.build` to rewrite `scenarios/demo/` (except its history, which the
loader generates on first use from `[history_generator]`).
"""
from __future__ import annotations

import shutil
from dataclasses import dataclass, field
from datetime import date, timedelta
from pathlib import Path

import numpy as np
import pandas as pd
from scipy.optimize import linprog

from planner.rules import Rules, linear_rows
from planner.scenario import load_scenario
from scenarios.families import ensure_history, simulate_scenario_truth
from scenarios.generate import QH, demo_path

# Seven dayparts, every day of the week; late fringe wraps past midnight.
DAYPARTS = [
    ("early_morning", "06:00", "09:00"),
    ("daytime", "09:00", "16:00"),
    ("early_fringe", "16:00", "18:00"),
    ("prime_access", "18:00", "20:00"),
    ("prime", "20:00", "23:00"),
    ("late_fringe", "23:00", "01:00"),
    ("overnight", "01:00", "06:00"),
]
# Local avails offered per hour of the daypart (what is left unsold), and household CPM of the rate card.
_AVAILS_PER_HOUR = {"early_morning": 1.1, "daytime": 0.8, "early_fringe": 1.2, "prime_access": 1.4,
                    "prime": 1.6, "late_fringe": 1.2, "overnight": 0.6}
_HH_CPM = {"early_morning": 8.0, "daytime": 6.0, "early_fringe": 9.0, "prime_access": 12.0,
           "prime": 17.0, "late_fringe": 10.0, "overnight": 3.0}

# Smallest rate the card carries per daypart (tiny zones and networks), dollars per spot.
_MIN_RATE = {"early_morning": 1.5, "daytime": 1.0, "early_fringe": 1.5, "prime_access": 2.0,
             "prime": 3.0, "late_fringe": 1.5, "overnight": 1.0}

DEMO_MARKETS = {  # market -> [(zone, households)]  (invented places)
    "marrowdale": [("marrowdale-north", 1_450_000), ("marrowdale-central", 1_820_000), ("marrowdale-south", 960_000)],
    "quenby-bay": [("quenby-bay-east", 640_000), ("quenby-bay-west", 520_000), ("quenby-bay-harbor", 380_000)],
    "tolliver": [("tolliver-city", 450_000), ("tolliver-valley", 260_000), ("tolliver-ridge", 180_000)],
    "ashcombe": [("ashcombe-town", 210_000), ("ashcombe-fields", 130_000), ("ashcombe-lakes", 95_000)],
}
DEMO_NETWORKS = [  # invented cable networks
    ("kestrel-news", "news"), ("ironwood-sports", "sports"), ("marbleberry-kids", "kids"),
    ("velvetreel-movies", "movies"), ("hearthloom-home", "lifestyle"), ("driftmoor-drama", "drama"),
    ("fernquest-docs", "documentary"), ("neonfable-music", "music"), ("tallyglass-business", "business"),
    ("jestwick-comedy", "comedy"),
]


@dataclass
class DealSpec:
    """A deal to size: `fraction` of the most its allowed inventory delivers in expectation."""

    file: str
    name: str
    advertiser: str
    demo: str
    first_week: int
    last_week: int
    fraction: float
    markup: float  # price CPM over the cheapest plan's cost CPM
    kind: str
    risk: str = "confidence = 0.95"
    mix: dict = field(default_factory=dict)
    terms: dict = field(default_factory=dict)  # the deal file's [terms] (make-good terms, planner.terms)


def toml_value(v) -> str:
    """A Python value as TOML text (strings, numbers, booleans, dates, lists, inline tables); floats
    of 0.001 and above rounded to 6 decimals."""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, str):
        return f'"{v}"'
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{k} = {toml_value(x)}" for k, x in v.items()) + " }"
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(toml_value(x) for x in v) + "]"
    if isinstance(v, float):
        return repr(round(v, 6)) if abs(v) >= 1e-3 else repr(v)
    if isinstance(v, date):
        return v.isoformat()
    return str(v)


def scenario_header(*, name: str, first_week: date, weeks: int, preempt_rate: float = 0.03,
                    comment: str = "") -> list[str]:
    """Lines of a scenario.toml before its [history_generator] table: calendar, demos hh and
    a25-54, the seven dayparts (every day of the week)."""
    lines = [f"# {comment}" if comment else "# Invented scenario: every name and number is made up.",
             f'name = "{name}"', f"first_week = {first_week.isoformat()}", f"weeks = {weeks}",
             'currency = "USD"', f"preempt_rate = {preempt_rate}", 'demos = ["hh", "a25-54"]', ""]
    for dp, s, e in DAYPARTS:
        lines += ["[[daypart]]", f'name = "{dp}"', f'start = "{s}"', f'end = "{e}"',
                  'days = ["mon", "tue", "wed", "thu", "fri", "sat", "sun"]', ""]
    return lines


def scenario_toml(*, name: str, first_week: date, weeks: int, seed: int, start: date, end: date,
                  short_history: list[tuple[str, str]], short_history_days: int, horizon_days: int,
                  preempt_rate: float = 0.03, comment: str = "", terms: dict | None = None) -> str:
    """Text of a scenario.toml with the seven dayparts, the default make-good `terms` of its deals
    (a [terms] table, when given) and a [history_generator] table (profile family)."""
    lines = scenario_header(name=name, first_week=first_week, weeks=weeks, preempt_rate=preempt_rate,
                            comment=comment)
    if terms:
        lines += ["# Make-good terms of every deal file without its own [terms] (planner.terms).",
                  "[terms]"] + [f"{k} = {toml_value(v)}" for k, v in terms.items()] + [""]
    lines += ["# Addition to the data contract: how history.parquet is generated when it is missing",
              "# (scenarios.generate, seeded; the history is invented).",
              "[history_generator]", f"seed = {seed}", f"start = {start.isoformat()}", f"end = {end.isoformat()}",
              f"short_history = {toml_value([list(x) for x in short_history])}",
              f"short_history_days = {short_history_days}", f"horizon_days = {horizon_days}", ""]
    return "\n".join(lines)


def unit_truth(scenario) -> pd.DataFrame:
    """Mean measured rating per zone x network x daypart x week x demo over the plan weeks.

    From the generator's own simulation past the end of the history (what the future brings), of
    the scenario's history family (`scenarios.families.simulate_scenario_truth`).
    Columns zone, network, daypart, week, demo, rating (fraction), impressions (per spot).
    """
    sim = simulate_scenario_truth(scenario)
    truth = sim.ratings()
    nz, nn, nd, ndays, _ = truth.shape
    flat = truth.reshape(nz, nn, nd, ndays * QH)
    start = np.datetime64(sim.start, "D")
    out = []
    for dp in scenario.dayparts:
        q = np.asarray(dp.quarter_hours)
        for w in range(1, scenario.weeks + 1):
            d0 = np.datetime64(scenario.week_start(w), "D")
            days = d0 + np.arange(7)
            dows = (days.astype(int) + 3) % 7
            days = days[np.isin(dows, dp.days)]
            di = (days - start).astype(int)
            idx = (di[:, None] * QH + q[None, :]).ravel()
            if idx.max() >= ndays * QH:
                raise ValueError("plan weeks run past the simulated horizon: raise horizon_days")
            mean = flat[..., idx].mean(axis=-1)  # (zones, networks, demos)
            zi, ni, ki = np.meshgrid(np.arange(nz), np.arange(nn), np.arange(nd), indexing="ij")
            out.append(pd.DataFrame({
                "zone": np.asarray(sim.zones)[zi.ravel()], "network": np.asarray(sim.networks)[ni.ravel()],
                "daypart": dp.name, "week": w, "demo": np.asarray(sim.demos)[ki.ravel()],
                "rating": mean.ravel().astype(float)}))
    df = pd.concat(out, ignore_index=True)
    uni = scenario.universes.rename(columns={"universe": "u"})
    df = df.merge(uni, on=["zone", "demo"], how="left")
    df["impressions"] = df["rating"] * df["u"]
    return df.drop(columns="u")


def make_inventory(truth: pd.DataFrame, scenario, seed: int) -> pd.DataFrame:
    """Avails and rates per unit-week from the expected household audience (invented rate card)."""
    rng = np.random.default_rng([seed, 77])
    hh = truth[truth["demo"] == "hh"].sort_values(["zone", "network", "daypart", "week"]).reset_index(drop=True)
    hours = hh["daypart"].map({d.name: d.hours * len(d.days) for d in scenario.dayparts})
    per_hour = hh["daypart"].map(_AVAILS_PER_HOUR).fillna(1.0)
    uk = hh[["zone", "network", "daypart"]].drop_duplicates()
    uk = uk.assign(f_av=np.exp(rng.normal(0, 0.3, len(uk))), f_rate=np.exp(rng.normal(0, 0.12, len(uk))))
    hh = hh.merge(uk, on=["zone", "network", "daypart"], how="left")
    lam = hours * per_hour * hh["f_av"] * np.exp(rng.normal(0, 0.15, len(hh)))
    avails = rng.poisson(lam.to_numpy())
    avails[rng.random(len(hh)) < 0.03] = 0  # sold out
    uni = scenario.universes[scenario.universes["demo"] == "hh"].set_index("zone")["universe"]
    size = hh["zone"].map(uni / uni.median()) ** 0.08  # big zones command a small CPM premium
    cpm = hh["daypart"].map(_HH_CPM).fillna(8.0)
    rate = cpm * hh["impressions"] / 1000.0 * size * hh["f_rate"]
    floor = hh["daypart"].map(_MIN_RATE).fillna(1.0)
    rate = np.maximum(np.round(rate * 2) / 2, floor)  # rate card in half dollars, a floor per daypart
    return pd.DataFrame({"zone": hh["zone"], "network": hh["network"], "daypart": hh["daypart"],
                         "week": hh["week"].astype(int), "avails": avails.astype(int), "rate": rate.round(2)})


def _lp_rows(units: pd.DataFrame, spec: DealSpec, dayparts: list[str]):
    """Inequality rows A x <= b of the deal's mix rules, in terms of expected impressions: the
    allocator's own rule rows (`planner.rules.linear_rows`) with the plan total substituted."""
    mix = spec.mix
    rules = Rules(max_network_share=mix.get("max_network_share"),
                  daypart_min_share=dict(mix.get("daypart_min_share", {})),
                  daypart_max_share=dict(mix.get("daypart_max_share", {})),
                  weekly_tolerance=mix.get("weekly_tolerance"))
    weeks = list(range(spec.first_week, spec.last_week + 1))
    return linear_rows(rules, units, weeks, units["impressions"].to_numpy())


def deal_units(truth: pd.DataFrame, inventory: pd.DataFrame, spec: DealSpec) -> pd.DataFrame:
    """Units a deal may buy: its demo, weeks and allowed zones/networks, with avails and rates."""
    t = truth[(truth["demo"] == spec.demo) & truth["week"].between(spec.first_week, spec.last_week)]
    u = t.merge(inventory, on=["zone", "network", "daypart", "week"])
    mix = spec.mix
    u = u[~u["network"].isin(mix.get("exclude_networks", [])) & ~u["zone"].isin(mix.get("exclude_zones", []))]
    cap = mix.get("max_spots_per_unit")
    u = u.assign(ub=np.minimum(u["avails"], cap) if cap else u["avails"])
    return u[u["ub"] > 0].reset_index(drop=True)


def capacity(units: pd.DataFrame, spec: DealSpec, dayparts: list[str]) -> float:
    """Most expected impressions the units can deliver within avails and the mix (LP, HiGHS)."""
    A, b = _lp_rows(units, spec, dayparts)
    res = linprog(-units["impressions"].to_numpy(), A_ub=A, b_ub=b, bounds=list(zip(np.zeros(len(units)), units["ub"])),
                  method="highs")
    return float(-res.fun) if res.status == 0 else 0.0


def cheapest_cpm(units: pd.DataFrame, spec: DealSpec, dayparts: list[str], guarantee: float) -> float:
    """Cost CPM of the cheapest (continuous) plan delivering `guarantee` in expectation; nan if none."""
    A, b = _lp_rows(units, spec, dayparts)
    m = units["impressions"].to_numpy()
    A2 = -m[None, :] if A is None else np.vstack([A, -m[None, :]])
    b2 = np.array([-guarantee]) if b is None else np.append(b, -guarantee)
    res = linprog(units["rate"].to_numpy(), A_ub=A2, b_ub=b2, bounds=list(zip(np.zeros(len(units)), units["ub"])),
                  method="highs")
    return float(res.fun / guarantee * 1000.0) if res.status == 0 else float("nan")


def deal_toml(spec: DealSpec, impressions: int, price_cpm: float, cap: float) -> str:
    lines = [f"# Invented deal (invented advertiser). Intended verdict: {spec.kind}.",
             f"# Sized at {spec.fraction:.0%} of the most the allowed inventory delivers in expectation",
             f"# under this mix ({cap:,.0f} impressions, from the generator's own plan-week audience).",
             f'name = "{spec.name}"', f'advertiser = "{spec.advertiser}"', f'demo = "{spec.demo}"',
             f"impressions = {impressions:_}", f"first_week = {spec.first_week}", f"last_week = {spec.last_week}",
             f"price_cpm = {price_cpm:.2f}"]
    if spec.risk:
        lines.append(spec.risk)
    else:
        lines.append("# no confidence or pad given: the default confidence (0.95) applies")
    if spec.mix:
        lines += ["", "[mix]"] + [f"{k} = {toml_value(v)}" for k, v in spec.mix.items()]
    if spec.terms:
        lines += ["", "[terms]"] + [f"{k} = {toml_value(v)}" for k, v in spec.terms.items()]
    return "\n".join(lines) + "\n"


def write_tables(dest: Path, *, markets: dict, networks: list[tuple[str, str]], seed: int) -> None:
    """zones.csv, networks.csv and universes.csv of an invented scenario."""
    rng = np.random.default_rng([seed, 55])
    zrows, urows = [], []
    for market, zs in markets.items():
        for z, hh in zs:
            zrows.append({"zone": z, "market": market})
            urows.append({"zone": z, "demo": "hh", "universe": int(hh)})
            urows.append({"zone": z, "demo": "a25-54", "universe": int(round(hh * rng.uniform(0.88, 1.02), -2))})
    pd.DataFrame(zrows).to_csv(dest / "zones.csv", index=False)
    pd.DataFrame(urows).to_csv(dest / "universes.csv", index=False)
    pd.DataFrame(networks, columns=["network", "genre"]).to_csv(dest / "networks.csv", index=False)


def finish_scenario(dest: Path, deal_specs: list[DealSpec], *, seed: int, generate: bool = True) -> dict:
    """Given scenario.toml and the zone/network/universe tables in `dest`, write inventory and deals.

    Returns {deal name: (impressions, capacity, price_cpm)}.
    """
    # Inventory placeholder so the loader accepts the folder while we compute the real one.
    (dest / "inventory.csv").write_text("zone,network,daypart,week,avails,rate\n")
    deals_dir = dest / "deals"
    if deals_dir.exists():
        shutil.rmtree(deals_dir)
    sc = load_scenario(dest, allow_empty_inventory=True)
    truth = unit_truth(sc)
    inv = make_inventory(truth, sc, seed)
    inv.to_csv(dest / "inventory.csv", index=False)
    deals_dir.mkdir()
    dps = [d.name for d in sc.dayparts]
    sized = {}
    for spec in deal_specs:
        units = deal_units(truth, inv, spec)
        cap = capacity(units, spec, dps)
        g = int(round(spec.fraction * cap, -3))
        probe = min(g, 0.9 * cap)  # an infeasible guarantee is priced off the most that can be done
        price = cheapest_cpm(units, spec, dps, probe) * spec.markup
        (deals_dir / spec.file).write_text(deal_toml(spec, g, price, cap))
        sized[spec.name] = (g, cap, price)
    if generate:
        ensure_history(dest)  # generates and caches history.parquet
    return sized


SMALL_MARKETS = {
    "pellham": [("pellham-upper", 700_000), ("pellham-lower", 240_000), ("pellham-mills", 150_000)],
    "wyncote": [("wyncote-east", 420_000), ("wyncote-west", 110_000), ("wyncote-glen", 90_000)],
}


def write_scenario(dest, *, seed: int = 0, n_zones: int = 3, n_networks: int = 3, history_days: int = 420,
                   weeks: int = 8) -> Path:
    """A complete small invented scenario folder (for tests); see `scenarios.folders.make_small_scenario`."""
    dest = Path(dest)
    dest.mkdir(parents=True, exist_ok=True)
    zones = [z for zs in SMALL_MARKETS.values() for z in zs]
    if not 1 <= n_zones <= len(zones):
        raise ValueError(f"n_zones must be 1..{len(zones)}")
    # Alternate markets so two markets appear as soon as n_zones >= 2.
    order = [zones[i] for i in (0, 3, 1, 4, 2, 5)][:n_zones]
    markets: dict = {}
    for m, zs in SMALL_MARKETS.items():
        pick = [z for z in zs if z in order]
        if pick:
            markets[m] = pick
    nets = [DEMO_NETWORKS[i] for i in (0, 5, 2, 1, 3, 7, 4, 6, 8, 9)][:n_networks]
    write_tables(dest, markets=markets, networks=nets, seed=seed)
    end = date(2026, 5, 31)
    start = end - timedelta(days=history_days - 1)
    first_week = end + timedelta(days=1 + (7 - (end + timedelta(days=1)).weekday()) % 7 + 21)
    horizon = (first_week - end).days + 7 * weeks + 2
    short = [(order[-1][0], nets[-1][0])] if n_zones >= 2 and n_networks >= 2 else []
    (dest / "scenario.toml").write_text(scenario_toml(
        name=f"small-{seed}", first_week=first_week, weeks=weeks, seed=seed, start=start, end=end,
        short_history=short, short_history_days=min(100, history_days // 2), horizon_days=horizon,
        comment="Invented small scenario for tests: every name and number is made up."))
    specs = [
        DealSpec("comfortable.toml", "small-comfortable", "Example Bakery (invented)", "a25-54", 1, weeks,
                 0.2, 1.6, "comfortably deliverable", mix={"max_network_share": 0.6}),
        DealSpec("tight.toml", "small-tight", "Example Hardware (invented)", "hh", 1, max(1, weeks // 2),
                 0.8, 1.15, "tight", risk="", mix={"daypart_min_share": {"prime": 0.3}}),
        DealSpec("too-big.toml", "small-too-big", "Example Dairy (invented)", "hh", 1, weeks,
                 1.4, 1.3, "not deliverable (guarantee above what the avails carry)", risk="pad = 0.1"),
    ]
    finish_scenario(dest, specs, seed=seed)
    return dest


DEMO_SEED = 20261129
DEMO_SHORT = [("ashcombe-town", "neonfable-music"), ("ashcombe-fields", "neonfable-music"),
              ("tolliver-ridge", "fernquest-docs")]

DEMO_DEALS = [
    DealSpec("brambleford-outdoor.toml", "brambleford-spring", "Brambleford Outdoor Supply (invented)", "a25-54",
             1, 13, 0.15, 1.6, "comfortably deliverable",
             mix={"max_network_share": 0.3, "daypart_min_share": {"prime": 0.2},
                  "daypart_max_share": {"overnight": 0.05}, "weekly_tolerance": 0.25},
             terms={"settlement": "units", "window_weeks": 6}),
    DealSpec("corvella-motors.toml", "corvella-launch", "Corvella Motors (invented)", "hh", 3, 8, 0.73, 1.35,
             "tight (most of the allowed avails, thin margin)", risk="",
             mix={"max_network_share": 0.25, "daypart_min_share": {"prime": 0.4, "prime_access": 0.15},
                  "exclude_networks": ["marbleberry-kids"], "weekly_tolerance": 0.2},
             terms={"settlement": "cash", "threshold": 0.95, "cap": 0.25}),
    DealSpec("saltmarsh-pharmacy.toml", "saltmarsh-flu", "Saltmarsh Pharmacy (invented)", "a25-54", 1, 4, 1.35, 1.3,
             "not deliverable (guarantee larger than the avails can carry under the mix)",
             risk="confidence = 0.9",
             mix={"daypart_min_share": {"daytime": 0.3}, "exclude_zones": ["marrowdale-central"]}),
    DealSpec("wrenfield-grocers.toml", "wrenfield-weekly", "Wrenfield Grocers (invented)", "hh", 5, 13, 0.3, 1.7,
             "deliverable with room to spare (risk margin given as a pad)", risk="pad = 0.1",
             mix={"max_network_share": 0.35, "daypart_max_share": {"overnight": 0.1}, "max_spots_per_unit": 6},
             terms={"settlement": "both"}),
]
#: the demo's default make-good terms (scenario.toml [terms]); saltmarsh-flu has none of its own
DEMO_TERMS = {"settlement": "units", "threshold": 0.9, "window_weeks": 4, "cap": 0.5}


def build_demo(dest: Path | None = None) -> dict:
    """Rewrite the demo scenario folder (tables, inventory, deals); history is made on first use."""
    dest = Path(dest) if dest else demo_path()
    dest.mkdir(parents=True, exist_ok=True)
    write_tables(dest, markets=DEMO_MARKETS, networks=DEMO_NETWORKS, seed=DEMO_SEED)
    (dest / "scenario.toml").write_text(scenario_toml(
        name="demo-spring-2027", first_week=date(2027, 3, 29), weeks=13, seed=DEMO_SEED,
        start=date(2024, 11, 30), end=date(2026, 11, 29), short_history=DEMO_SHORT, short_history_days=150,
        horizon_days=240, terms=DEMO_TERMS,
        comment="Invented demo scenario: every zone, market, network, advertiser and number is made up."))
    return finish_scenario(dest, DEMO_DEALS, seed=DEMO_SEED, generate=False)


if __name__ == "__main__":
    for k, (g, cap, price) in build_demo().items():
        print(f"{k}: guarantee {g:,} of capacity {cap:,.0f} ({g / cap:.0%}), price CPM {price:.2f}")
