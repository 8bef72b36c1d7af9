"""Invented posted actuals: what bought spots delivered in the generator's simulated future.

The history generators (either family, `scenarios.families.simulate_scenario_truth`) simulate
past the end of the history, so the plan weeks have a "true" audience. `posted_actuals` airs a
buy plan against it: each bought spot is preempted with the unit's preemption chance, and an
aired spot lands on a random day of the daypart in its week and a random quarter-hour of the
daypart, delivering that quarter-hour's simulated rating x universe. The result has the
posted-actuals layout of the data contract, for mid-flight demos and tests. Everything is invented.
"""
from __future__ import annotations

from typing import Iterable

import numpy as np
import pandas as pd

from forecasting.backtest import score_levels
from forecasting.dayparts import as_specs, daypart_week_means
from forecasting.factors import LEVEL_FACTORS
from forecasting.scoring import total_bias_sd
from forecasting.uncertainty import factor_components
from scenarios.families import simulate_scenario_truth
from scenarios.generate import QH

ACTUALS_COLUMNS = ["zone", "network", "daypart", "week", "spots_aired", "impressions"]


def posted_actuals(scenario, spots: pd.DataFrame, demo: str, *, weeks: Iterable[int], seed: int = 0) -> pd.DataFrame:
    """Posted actuals of a plan for the plan weeks `weeks` (spots aired, impressions in `demo`).

    Parameters
    ----------
    scenario : a loaded Scenario with a `[history_generator]` table.
    spots : DataFrame zone, network, daypart, week, spots (whole spots bought per unit-week).
    demo : the deal's demo.
    weeks : plan weeks that have aired.
    seed : preemption and airing-slot draws.

    Returns a DataFrame zone, network, daypart, week, spots_aired (int), impressions (float,
    people or homes), one row per unit-week of `spots` in `weeks` with spots > 0.
    """
    if scenario.history_generator is None:
        raise ValueError("posted_actuals needs a scenario with a [history_generator] table")
    sim = simulate_scenario_truth(scenario)
    weeks = sorted(set(int(w) for w in weeks))
    plan = spots[spots["week"].isin(weeks) & (spots["spots"] > 0)].reset_index(drop=True)
    if plan.empty:
        return pd.DataFrame({c: pd.Series(dtype="int64" if c in ("week", "spots_aired") else
                                          ("float64" if c == "impressions" else "str")) for c in ACTUALS_COLUMNS})
    inv = scenario.inventory[["zone", "network", "daypart", "week", "preempt_rate"]]
    plan = plan.merge(inv, on=["zone", "network", "daypart", "week"], how="left")
    plan["preempt_rate"] = plan["preempt_rate"].fillna(scenario.preempt_rate)
    rng = np.random.default_rng([seed, 4242])
    aired = rng.binomial(plan["spots"].to_numpy().astype(np.int64), 1.0 - plan["preempt_rate"].to_numpy())
    plan["spots_aired"] = aired

    start = np.datetime64(sim.start, "D")
    di = sim.demos.index(demo)
    uni = scenario.universes.set_index(["zone", "demo"])["universe"]
    total = np.zeros(len(plan))
    for zone, rows in plan.groupby("zone").groups.items():
        rows = np.asarray(rows)
        flat = sim.zone(sim.zones.index(zone))[:, di].reshape(len(sim.networks), -1)  # (networks, days*96)
        r = plan.loc[rows]
        n_air = r["spots_aired"].to_numpy()
        rep = np.repeat(np.arange(len(r)), n_air)  # one entry per aired spot
        if rep.size == 0:
            continue
        net = r["network"].map({n: i for i, n in enumerate(sim.networks)}).to_numpy()[rep]
        idx = np.empty(rep.size, dtype=np.int64)
        # Draw the airing slot per spot, daypart by daypart (days and quarter-hours differ).
        for dp in scenario.dayparts:
            sel = (r["daypart"].to_numpy() == dp.name)[rep]
            if not sel.any():
                continue
            wk = r["week"].to_numpy()[rep][sel]
            monday = (np.array([np.datetime64(scenario.week_start(w), "D") for w in wk]) - start).astype(np.int64)
            days = np.asarray(dp.days)
            day = monday + days[rng.integers(0, days.size, sel.sum())]
            q = np.asarray(dp.quarter_hours)[rng.integers(0, len(dp.quarter_hours), sel.sum())]
            idx[sel] = day * QH + q
        if idx.max() >= flat.shape[1]:
            raise ValueError("plan weeks run past the simulated horizon: raise horizon_days")
        imp = flat[net, idx].astype(float) * float(uni[(zone, demo)])
        total[rows] = np.bincount(rep, weights=imp, minlength=len(r))
    plan["impressions"] = np.round(total)  # posted impressions are whole people (or homes)
    return plan[ACTUALS_COLUMNS].astype({"week": "int64", "spots_aired": "int64", "impressions": "float64"})


def true_unit_week_levels(scenario, demos: Iterable[str] | None = None) -> pd.DataFrame:
    """The simulated plan weeks' true unit-week levels: what one spot rotated across a daypart's
    quarter-hours and days delivered on average that week, in the generator's simulated future.

    The quantity the forecast table's `mean_impressions` and `level_sd` describe (the mean of the
    daypart's quarter-hour-day ratings of the week, times the universe), so a forecast can be
    scored on the weeks it was made for. Everything is invented.

    Returns a DataFrame zone, network, daypart, week, demo, true_impressions (people or homes per
    spot), one row per series x daypart x plan week.
    """

    if scenario.history_generator is None:
        raise ValueError("true_unit_week_levels needs a scenario with a [history_generator] table")
    sim = simulate_scenario_truth(scenario)
    demos = list(demos) if demos is not None else list(sim.demos)
    specs = as_specs(scenario.dayparts)
    start = np.datetime64(sim.start, "D")
    p0 = int((np.datetime64(scenario.week_start(1), "D") - start).astype(np.int64))
    W = int(scenario.weeks)
    span = 7 * W + 1  # one day more: a daypart past midnight ends on the next day
    uni = scenario.universes.set_index(["zone", "demo"])["universe"]
    names = np.array([d.name for d in specs])
    wd = pd.Timestamp(scenario.week_start(1)).day_of_week  # weekday of the slice's first day
    frames = []
    for zi, zone in enumerate(sim.zones):
        cube = sim.zone(zi)  # (networks, demos, days, 96)
        if p0 + span > cube.shape[2]:
            raise ValueError("plan weeks run past the simulated horizon: raise horizon_days")
        for demo in demos:
            di = sim.demos.index(demo)
            vals = cube[:, di, p0:p0 + span]  # (networks, span, 96)
            mean, _ = daypart_week_means(vals, wd, 7 * np.arange(W), specs)  # (networks, P, W)
            n, p, w = np.meshgrid(np.arange(len(sim.networks)), np.arange(len(specs)), np.arange(W), indexing="ij")
            frames.append(pd.DataFrame({
                "zone": zone, "network": np.asarray(sim.networks)[n.ravel()], "daypart": names[p.ravel()],
                "week": w.ravel() + 1, "demo": demo,
                "true_impressions": mean.ravel().astype(float) * float(uni[(zone, demo)])}))
    return pd.concat(frames, ignore_index=True)


def plan_week_scores(scenario, table: pd.DataFrame) -> dict:
    """Scores of a forecast table's unit-week bands on the plan weeks against the simulated truth
    (`true_unit_week_levels`): `forecasting.backtest.score_levels` of N(mean_impressions,
    level_sd^2), plus ``units``, ``bias`` (sum actual / sum forecast - 1, fraction), ``bias_sd``
    (the sd the table's error law gives that total: `forecasting.scoring.total_bias_sd` with
    each level factor shared as the table's columns say) and ``bias_z`` (bias / bias_sd)."""
    m = table.merge(true_unit_week_levels(scenario), on=["zone", "network", "daypart", "week", "demo"], how="inner")
    out = score_levels(m["true_impressions"], m["mean_impressions"], m["level_sd"])
    out["units"] = int(len(m))
    mu = m["mean_impressions"].to_numpy(float)
    # the table's level_sd_* columns are the level model's rel_sd_* components times the mean
    spec = [(f.table_column, None if f.keys is None else list(f.keys)) for f in LEVEL_FACTORS]
    out["bias_sd"] = total_bias_sd(mu, factor_components(m, spec, divide_by=mu))
    out["bias_z"] = out["bias"] / out["bias_sd"]
    return out


def true_network_shock_week_sd(scenario, first_days: Iterable, weeks: int = 13) -> list[float]:
    """How turbulent the generator's network shocks were in each window of `weeks` weeks.

    Per window: the sd, over networks and weeks, of each network's weekly mean shock (log
    multiplier shared by a network in every zone: the profile family's drift and episodes, the
    drift family's weekly AR(1) shock; seasonality, trend and day-of-week left out) around its
    mean over the window. It is the truth behind the
    network-week factor a backtest block measures (`forecasting.backtest.factor_sd_measured_and_law`),
    so a block can be told calm or turbulent against the windows its error law was estimated on.
    Invented data only.

    Parameters
    ----------
    scenario : a scenario with a [history_generator] table.
    first_days : first day of each window (dates or ISO strings).
    weeks : window length (weeks).

    Returns
    -------
    list of sds (log units, about fractions), one per window.
    """
    if scenario.history_generator is None:
        raise ValueError("true_network_shock_week_sd needs a scenario with a [history_generator] table")
    sim = simulate_scenario_truth(scenario)
    shock = sim.network_shock()
    start = np.datetime64(sim.start, "D")
    out = []
    for first in first_days:
        i0 = int((np.datetime64(pd.Timestamp(first).date(), "D") - start).astype(np.int64))
        x = shock[:, i0:i0 + 7 * int(weeks)]
        if i0 < 0 or x.shape[1] < 7 * int(weeks):
            raise ValueError(f"window from {first} is outside the simulated span")
        weekly = x.reshape(x.shape[0], int(weeks), 7).mean(axis=2)
        out.append(float((weekly - weekly.mean(axis=1, keepdims=True)).std()))
    return out
