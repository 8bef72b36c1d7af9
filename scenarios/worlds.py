"""A small registry of invented "worlds": complete scenario folders made by either history family.

Benches and tests measure the forecast over several kinds of history: `make_world(dest, family,
seed)` writes a complete invented scenario folder (scenario.toml with a `[history_generator]`
table naming its family, zones/networks/universes, inventory, four deals sized against the
simulated plan weeks, history.parquet), and `world_truth_levels(scenario)` gives the simulated
truth of its plan weeks at the grain of the forecast table. Sizes: "small" (4 zones x 5 networks
x 2 demos, 490 days of history, 10 plan weeks; a couple of seconds) and "medium" (6 zones x 6
networks, 730 days, 13 weeks; for benches). Every name and number is invented.
"""
from __future__ import annotations

from dataclasses import dataclass
from datetime import date, timedelta
from pathlib import Path

import pandas as pd

from planner.scenario import load_scenario
from scenarios.actuals import true_unit_week_levels
from scenarios.build import (DEMO_NETWORKS, SMALL_MARKETS, DealSpec, finish_scenario, scenario_header,
                             toml_value, write_tables)
from scenarios.drift import DRIFT_KNOBS
from scenarios.families import FAMILIES

__all__ = ["FAMILIES", "SIZES", "WorldSize", "DEFAULT_LEAD_DAYS", "PLAN_START", "PROFILE_KNOBS", "DRIFT_KNOBS",
           "make_world", "world_truth_levels"]


@dataclass(frozen=True)
class WorldSize:
    """Layout of a world: zones, networks, days of history, plan weeks (2 demos: hh, a25-54)."""

    zones: int
    networks: int
    history_days: int
    weeks: int


SIZES = {
    "small": WorldSize(zones=4, networks=5, history_days=490, weeks=10),
    "medium": WorldSize(zones=6, networks=6, history_days=730, weeks=13),
}
#: days from the history's end to plan week 1 when `make_world` is not told (0: the next day)
DEFAULT_LEAD_DAYS = 28
#: the Monday that starts plan week 1 of every world (the history ends `lead_days` + 1 days before)
PLAN_START = date(2027, 3, 29)
#: profile-family knobs `make_world` passes to the [history_generator] table (scenarios.generate)
PROFILE_KNOBS = ("short_history", "short_history_days", "panel_fraction", "missing_qh_rate",
                 "missing_days_per_zone", "missing_days_per_series", "network_peak")
# Zones alternate between the two markets; networks of distinct genres (invented names, scenarios.build).
_ZONE_ORDER = (0, 3, 1, 4, 2, 5)
_NETWORK_ORDER = (0, 5, 2, 1, 3, 7, 4, 6, 8, 9)


def _deals(weeks: int) -> list[DealSpec]:
    """Four deals: comfortable, tight, paced under a network cap, not deliverable (invented advertisers)."""
    return [
        DealSpec("comfortable.toml", "world-comfortable", "Example Bakery (invented)", "a25-54", 1, weeks,
                 0.2, 1.6, "comfortably deliverable", mix={"max_network_share": 0.5}),
        DealSpec("tight.toml", "world-tight", "Example Hardware (invented)", "hh", 1, max(1, weeks // 2),
                 0.8, 1.15, "tight", risk="", mix={"daypart_min_share": {"prime": 0.3}}),
        DealSpec("paced.toml", "world-paced", "Example Florist (invented)", "a25-54", min(2, weeks), weeks,
                 0.45, 1.4, "deliverable under even pacing and a network cap", risk="confidence = 0.9",
                 mix={"max_network_share": 0.35, "weekly_tolerance": 0.25, "max_spots_per_unit": 8}),
        DealSpec("too-big.toml", "world-too-big", "Example Dairy (invented)", "hh", 1, weeks,
                 1.4, 1.3, "not deliverable (guarantee above what the avails carry)", risk="pad = 0.1"),
    ]


def _layout(size: WorldSize) -> tuple[dict, list[tuple[str, str]]]:
    zones = [z for zs in SMALL_MARKETS.values() for z in zs]
    if not 1 <= size.zones <= len(zones) or not 1 <= size.networks <= len(DEMO_NETWORKS):
        raise ValueError(f"a world has 1..{len(zones)} zones and 1..{len(DEMO_NETWORKS)} networks")
    pick = {zones[i][0] for i in _ZONE_ORDER[:size.zones]}
    markets = {m: [z for z in zs if z[0] in pick] for m, zs in SMALL_MARKETS.items()}
    markets = {m: zs for m, zs in markets.items() if zs}
    return markets, [DEMO_NETWORKS[i] for i in _NETWORK_ORDER[:size.networks]]


def _generator_lines(family: str, seed: int, start: date, end: date, table: dict) -> list[str]:
    lines = ["# Addition to the data contract: how history.parquet is generated when it is missing",
             f"# (family {family!r}: scenarios.{'drift' if family == 'drift' else 'generate'}, seeded; "
             "the history is invented).",
             "[history_generator]", f'family = "{family}"', f"seed = {seed}",
             f"start = {start.isoformat()}", f"end = {end.isoformat()}"]
    lines += [f"{k} = {toml_value(v)}" for k, v in table.items()]
    if family == "drift":
        lines.append("# knobs not listed keep their defaults (scenarios.drift.DriftSpec)")
    return lines + [""]


def make_world(dest: str | Path, family: str, seed: int, *, size: str = "small", lead_days: int | None = None,
               **knobs) -> Path:
    """Write a complete invented scenario folder whose history is made by `family`; return `dest`.

    Parameters
    ----------
    dest : a folder that does not exist yet or is empty.
    family : "profile" (scenarios.generate) or "drift" (scenarios.drift).
    seed : the whole folder (tables, inventory, deals, history) is a function of the arguments.
    size : "small" or "medium" (`SIZES`).
    lead_days : days from the history's end to plan week 1 (None: `DEFAULT_LEAD_DAYS`; 0: the
        plan starts the day after the history ends). Plan week 1 is `PLAN_START`.
    knobs : keys of the family's [history_generator] table: `DRIFT_KNOBS` for drift (e.g.
        network_shock_rho=0.8, launch_months=6, floor=0), `PROFILE_KNOBS` for profile (default
        there: the last zone x last network has 150 days of history).

    The deals (`_deals`): comfortable (20% of what its allowed avails deliver in expectation under
    its mix), tight (80%), paced (45%, weekly tolerance and a network cap), too big (140%), sized
    on the family's simulated plan weeks as `scenarios.build.finish_scenario` does.
    """
    if family not in FAMILIES:
        raise ValueError(f"family must be one of {', '.join(FAMILIES)}, got {family!r}")
    if size not in SIZES:
        raise ValueError(f"size must be one of {', '.join(SIZES)}, got {size!r}")
    allowed = DRIFT_KNOBS if family == "drift" else PROFILE_KNOBS
    unknown = [k for k in knobs if k not in allowed]
    if unknown:
        raise ValueError(f"unknown {family} knob(s) {', '.join(unknown)} (known: {', '.join(allowed)})")
    lead = DEFAULT_LEAD_DAYS if lead_days is None else int(lead_days)
    if lead < 0:
        raise ValueError(f"lead_days must be >= 0, got {lead_days}")
    dest = Path(dest)
    if dest.exists() and any(dest.iterdir()):
        raise ValueError(f"{dest}: exists and is not empty (make_world writes a new folder)")
    dest.mkdir(parents=True, exist_ok=True)

    lay = SIZES[size]
    markets, networks = _layout(lay)
    write_tables(dest, markets=markets, networks=networks, seed=seed)
    end = PLAN_START - timedelta(days=lead + 1)
    start = end - timedelta(days=lay.history_days - 1)
    table = dict(knobs)
    if family == "profile":
        last_zone = [z for zs in markets.values() for z in zs][-1][0]
        table.setdefault("short_history", [[last_zone, networks[-1][0]]] if lay.zones > 1 else [])
        table.setdefault("short_history_days", 150)
        table["horizon_days"] = lead + 7 * lay.weeks + 2
    lines = scenario_header(name=f"world-{family}-{size}-{seed}", first_week=PLAN_START, weeks=lay.weeks,
                            comment=f"Invented world ({family} family, {size}): every name and number is made up.")
    (dest / "scenario.toml").write_text("\n".join(lines + _generator_lines(family, seed, start, end, table)))
    finish_scenario(dest, _deals(lay.weeks), seed=seed)
    return dest


def world_truth_levels(scenario) -> pd.DataFrame:
    """The simulated truth of a generated scenario's plan weeks (either family): one row per zone x
    network x daypart x plan week x demo with `true_impressions`, the mean of the daypart's
    quarter-hour-day ratings of the week times the universe (people or homes per spot), the
    quantity a forecast table's `mean_impressions` estimates. `scenario`: a Scenario or a folder.
    Same as `scenarios.actuals.true_unit_week_levels`."""
    if not hasattr(scenario, "history_generator"):
        scenario = load_scenario(scenario)
    return true_unit_week_levels(scenario)
