"""Replayed deals (a hindcast): how often did plans claimed at a chance of delivery deliver?

At each rolling-origin refit of the fitted forecast (past origins, at the real lead), deals shaped
like the scenario's own (their demo, flight weeks, mix rules and risk margin, and the same shapes at
other confidences) are sized at several fractions of what the avails could carry, planned whole-spot
by the allocator on the forecast that would have been made then
(`forecasting.pipeline.DaypartForecaster.heldout_table`), and delivered from the recorded history:
each unit's spots that air (preemption drawn per spot, seeded) x the unit-week's realised mean
rating x universe. The claimed chance of each plan is set against how often such plans delivered
(a reliability table), with the deal totals' bias and PIT.

The inventory (avails, rates) of the plan weeks stands in for the past weeks' (same week numbers
from the first held-out week). Deals replayed at one origin share its shocks, so the effective
number of independent outcomes is smaller than the count: it is estimated by the design effect
``1 + (m - 1) rho`` of the PIT z-scores' intra-origin correlation rho (m deals per origin).

The scale of the shared level factors that makes the PIT of the replayed deal totals uniform
(`shared_scale`) is the factor k on the quadratic (shared) part of each deal's variance,
``sd^2 = k^2 q + l``, minimising the Cramer-von Mises distance of the PIT to uniform.

References
----------
Gneiting, T., Balabdaoui, F. & Raftery, A. E. (2007). Probabilistic forecasts, calibration and
    sharpness. JRSS B 69(2) (PIT, reliability); Murphy, A. H. & Winkler, R. L. (1977). Reliability
    of subjective probability forecasts of precipitation and temperature. JRSS C 26(1)
    (reliability tables); Kish, L. (1965). Survey Sampling. Wiley (design effect of clustered
    samples); Anderson, T. W. (1962). On the distribution of the two-sample Cramer-von Mises
    criterion. Ann. Math. Statist. 33(3).
"""
from __future__ import annotations

import json
from dataclasses import dataclass, field, replace
from typing import Callable, Sequence

import numpy as np
import pandas as pd
from scipy.stats import norm

from forecasting.factors import LEVEL_FACTORS
from forecasting.pipeline import with_level_bands
from planner import allocate as al
from planner.atomic import write_text_atomic, write_with_atomic
from planner.deals import rules_of
from planner.forecast_job import (META_FILE, TABLE_FILE, ensure_forecast, forecast_dir, forecast_meta,
                                  load_model)

#: claimed-chance bins of the reliability table (lower edges inclusive)
CLAIM_BINS = ((0.5, 0.8), (0.8, 0.9), (0.9, 0.97), (0.97, 1.0 + 1e-9))
#: sizes of the replayed deals, as fractions of the most the avails could carry at the deal's rules
FRACTIONS = (0.3, 0.6, 0.85)
#: confidences replayed besides each deal's own risk margin
CONFIDENCES = (0.65, 0.85, 0.95, 0.99)

Progress = Callable[[str, float], None]


@dataclass
class HindcastResult:
    """Replayed deals (`deals`, one row each) and their summary (`summary`, JSON-able)."""

    deals: pd.DataFrame
    summary: dict = field(default_factory=dict)


def _variants(deal, confidences: Sequence[float]):
    """The deal's own risk margin, then the same shape at each of `confidences`."""
    yield deal
    for c in confidences:
        if deal.pad is None and abs((deal.confidence or 0) - c) < 1e-9:
            continue
        yield replace(deal, confidence=float(c), pad=None)


def _units(scenario, table: pd.DataFrame, deal) -> pd.DataFrame:
    fc = table[table["demo"] == deal.demo].astype({"week": "int64"})
    inv = scenario.inventory.astype({"week": "int64"})
    return inv.merge(fc, on=["zone", "network", "daypart", "week"], how="inner")


def scope_miss(scope: pd.DataFrame) -> float:
    """The miss of the units a deal could buy, taken together: ``sum actual / sum forecast - 1``
    over the scope's unit-weeks (impressions per spot; rows with both known), NaN without any.
    A deal's own miss beyond it is what choosing among them did (`selection_gap`)."""
    a = scope["actual_impressions"].to_numpy(float)
    m = scope["mean_impressions"].to_numpy(float)
    ok = np.isfinite(a) & np.isfinite(m) & (m > 0)
    return float(a[ok].sum() / m[ok].sum() - 1.0) if ok.any() else float("nan")


def _replay_one(scope: pd.DataFrame, deal, guarantee: float, rng: np.random.Generator, solver: str) -> dict | None:
    """Plan one sized deal on a past forecast and deliver it from what happened; None if undeliverable."""
    prob = al.make_problem(scope, guarantee, rules_of(deal), deal.weeks)
    alloc = al.allocate(prob, solver=solver)
    if not alloc.feasible or alloc.x is None:
        return None
    x = np.round(np.asarray(alloc.x, float))
    m = prob.model
    units = prob.units
    aired = rng.binomial(x.astype(np.int64), 1.0 - units["preempt_rate"].to_numpy(float))
    delivered = float(np.sum(aired * units["actual_impressions"].to_numpy(float)))
    return {"guarantee": guarantee, "claimed": m.probability(x, guarantee), "expected": m.mean(x),
            "sd": m.sd(x), "shared_var": m.quadratic_variance(x), "other_var": m.linear_variance(x),
            "delivered": delivered, "spots": int(x.sum()), "cost": float(np.sum(aired * units["rate"].to_numpy(float)))}  # aired spots are billed


def replay_deals(scenario, forecaster, *, fractions: Sequence[float] = FRACTIONS,
                 confidences: Sequence[float] = CONFIDENCES, seed: int = 0, solver: str = "highs",
                 progress: Progress | None = None) -> HindcastResult:
    """Replay deals shaped like the scenario's at every refit origin of `forecaster` (a fitted
    `DaypartForecaster`) and score their claimed chances against what the history delivered.

    Returns
    -------
    HindcastResult: ``deals`` has one row per replayed plan (``origin, template, risk, fraction,
    guarantee, claimed, expected, sd, shared_var, other_var, delivered, met, z, pit``; impressions,
    variances in impressions^2); ``summary`` is `summarise` of them.
    """
    progress = progress or (lambda m, f: None)
    rows = []
    J = len(forecaster.fold_results_)
    templates = list(scenario.deals.values())
    for j in range(J):
        origin = str((forecaster.day0_ + pd.Timedelta(days=int(forecaster.folds_[j]))).date())
        progress(f"replaying deals at origin {origin} ({j + 1}/{J})", j / J)
        table = forecaster.heldout_table(j, scenario.universes, units=scenario.inventory)
        rng = np.random.default_rng([seed, 606, j])
        for deal in templates:
            mix = deal.mix  # the variants differ in their risk margin only: one scope serves them all
            scope = al.candidate_units(_units(scenario, table, deal), weeks=deal.weeks,
                                       exclude_networks=mix.exclude_networks, exclude_zones=mix.exclude_zones,
                                       max_spots_per_unit=mix.max_spots_per_unit)
            miss = scope_miss(scope)
            for variant in _variants(deal, confidences):
                cap = al.max_guarantee(al.make_problem(scope, 1.0, rules_of(variant), variant.weeks)).value
                if not cap or cap <= 0:
                    continue
                risk = f"pad {variant.pad:.0%}" if variant.pad is not None else f"confidence {variant.confidence:.0%}"
                for frac in fractions:
                    out = _replay_one(scope, variant, float(frac) * cap, rng, solver)
                    if out is not None:
                        rows.append({"origin": origin, "template": deal.name, "risk": risk, "fraction": float(frac),
                                     "units_miss": miss, **out})
    progress("scoring the replayed deals", 1.0)
    deals = pd.DataFrame(rows)
    if deals.empty:
        return HindcastResult(deals, {"deals": 0})
    deals["met"] = deals["delivered"] >= deals["guarantee"]
    deals["z"] = (deals["delivered"] - deals["expected"]) / deals["sd"]
    deals["pit"] = norm.cdf(deals["z"])
    return HindcastResult(deals, summarise(deals))


def effective_count(z: np.ndarray, cluster: np.ndarray) -> tuple[float, float]:
    """(effective number of independent outcomes, intra-cluster correlation rho) of `z` grouped by
    `cluster`: ``n / (1 + (m - 1) rho)`` with m the mean cluster size and rho the one-way ANOVA
    estimate of the intra-class correlation, clipped to [0, 1] (Kish 1965)."""
    df = pd.DataFrame({"z": z, "c": cluster})
    n, k = len(df), df["c"].nunique()
    if k < 2 or n <= k:
        return float(n), 0.0
    g = df.groupby("c")["z"]
    sizes = g.size().to_numpy(float)
    m0 = (n - np.sum(sizes ** 2) / n) / (k - 1)
    msb = np.sum(sizes * (g.mean().to_numpy() - df["z"].mean()) ** 2) / (k - 1)
    msw = np.sum((df["z"] - g.transform("mean")) ** 2) / (n - k)
    rho = float(np.clip((msb - msw) / (msb + (m0 - 1) * msw), 0.0, 1.0)) if msb + (m0 - 1) * msw > 0 else 0.0
    return float(n / (1.0 + (n / k - 1.0) * rho)), rho


def cramer_von_mises(u: np.ndarray) -> float:
    """Cramer-von Mises statistic of a sample against the uniform law on [0, 1]:
    ``1/(12 n) + sum_i ((2i - 1)/(2n) - u_(i))^2``."""
    u = np.sort(np.asarray(u, float))
    n = len(u)
    return float(1.0 / (12 * n) + np.sum(((2 * np.arange(1, n + 1) - 1) / (2 * n) - u) ** 2))


def selection_gap(deals: pd.DataFrame) -> dict:
    """How much less (or more) the replayed deals delivered than the units they could buy, taken
    together: the optimizer's curse of a plan that picks the units whose forecast runs high.

    Per deal ``r = (delivered / expected) / (1 + units_miss) - 1`` (its miss beyond its scope's
    miss, `scope_miss`, which takes out the shocks the origin's units shared); per origin the
    mean of r; ``gap`` the mean over origins, ``se`` their sd / sqrt(origins) (NaN with one).
    ``factor`` is the multiplier on planned delivery to apply, ``1 + gap max(0, 1 - se^2 / gap^2)``:
    the gap shrunk by its own noise (none applied when it is within one se of 0, or unknown).

    References
    ----------
    Smith, J. E. & Winkler, R. L. (2006). The optimizer's curse: skepticism and postdecision
    surprise in decision analysis. Management Science 52(3), 311-322.
    """
    if "units_miss" not in deals or deals.empty:
        return {"gap": 0.0, "se": float("nan"), "origins": 0, "factor": 1.0}
    r = deals["delivered"] / deals["expected"] / (1.0 + deals["units_miss"]) - 1.0
    ok = np.isfinite(r.to_numpy(float))
    per = r[ok].groupby(deals.loc[ok, "origin"]).mean()
    n = int(len(per))
    if n == 0:
        return {"gap": 0.0, "se": float("nan"), "origins": 0, "factor": 1.0}
    gap = float(per.mean())
    se = float(per.std(ddof=1) / np.sqrt(n)) if n > 1 else float("nan")
    keep = max(0.0, 1.0 - se * se / (gap * gap)) if np.isfinite(se) and gap != 0.0 else 0.0
    return {"gap": gap, "se": se, "origins": n, "factor": float(1.0 + gap * keep)}


def shared_scale(deals: pd.DataFrame, grid=np.arange(0.5, 4.0001, 0.01), factor: float = 1.0) -> float:
    """The factor k on the shared (quadratic) part of each replayed deal's variance that makes the
    PIT of the deal totals closest to uniform (Cramer-von Mises), ``sd^2 = k^2 shared + other``,
    the planned delivery (mean and sds) first multiplied by `factor` (`selection_gap`)."""
    d = deals["delivered"].to_numpy(float) - factor * deals["expected"].to_numpy(float)
    q = factor ** 2 * deals["shared_var"].to_numpy(float)
    lin = factor ** 2 * deals["other_var"].to_numpy(float)
    stats = [cramer_von_mises(norm.cdf(d / np.sqrt(k * k * q + lin))) for k in grid]
    return float(grid[int(np.argmin(stats))])


#: independent outcomes' worth of pull of the applied scale toward 1 (see `applied_scale`)
SCALE_PRIOR_OUTCOMES = 4.0


def applied_scale(scale: float, effective_deals: float, prior: float = SCALE_PRIOR_OUTCOMES) -> float:
    """The shared-factor scale to apply: the PIT-uniform `scale` with its log shrunk toward 0 by
    ``n_eff / (n_eff + prior)`` and never below 1. Replayed deals amount to a few independent
    outcomes (one per origin, about), so the raw scale is a noisy estimate (its log has an sd of
    roughly 1 / sqrt(2 n_eff)); shrinking it keeps one unlucky origin from tripling every band."""
    n = max(float(effective_deals), 0.0)
    return float(max(np.exp(np.log(max(scale, 1e-9)) * n / (n + prior)), 1.0))


def summarise(deals: pd.DataFrame) -> dict:
    """Reliability table (claimed chance bins: mean claim, realised frequency, count, effective
    count, standard error), deal-total bias, PIT histogram (10 bins) and the shared-factor scale."""
    n_eff, rho = effective_count(deals["z"].to_numpy(float), deals["origin"].to_numpy())
    design = len(deals) / n_eff if n_eff > 0 else 1.0
    sel = selection_gap(deals)
    scale = shared_scale(deals, factor=sel["factor"])
    bins = []
    for lo, hi in CLAIM_BINS:
        b = deals[(deals["claimed"] >= lo) & (deals["claimed"] < hi)]
        if b.empty:
            bins.append({"low": lo, "high": min(hi, 1.0), "deals": 0})
            continue
        freq = float(b["met"].mean())
        eff = len(b) / design
        claim = float(b["claimed"].mean())
        se = float(np.sqrt(max(claim * (1 - claim), 1e-4) / max(eff, 1.0)))
        bins.append({"low": lo, "high": min(hi, 1.0), "deals": int(len(b)), "effective_deals": float(eff),
                     "mean_claimed": claim, "realised": freq, "se": se,
                     "within": bool(abs(freq - claim) <= max(0.03, 2 * se))})
    at95 = deals[(deals["claimed"] >= 0.945) & (deals["claimed"] < 0.97)]
    return {
        "deals": int(len(deals)), "origins": int(deals["origin"].nunique()),
        "effective_deals": float(n_eff), "intra_origin_correlation": rho,
        "reliability": bins,
        "claimed_95": {"deals": int(len(at95)), "realised": float(at95["met"].mean()) if len(at95) else None},
        "deal_total_bias": float(deals["delivered"].sum() / deals["expected"].sum() - 1.0),
        "z_rms": float(np.sqrt(np.mean(deals["z"] ** 2))),
        "pit_histogram": np.histogram(deals["pit"], bins=10, range=(0, 1))[0].tolist(),
        "selection": sel,
        "deal_factor_to_apply": sel["factor"],
        "shared_scale": scale,
        "scale_to_apply": applied_scale(scale, n_eff),
    }


def reliability_for(summary: dict | None, claimed: float) -> dict | None:
    """The reliability bin of a hindcast `summary` that a claimed chance falls in, or None."""
    for b in (summary or {}).get("reliability", []):
        if b["low"] <= claimed < b["high"] + (1e-9 if b["high"] >= 1.0 else 0.0) and b.get("deals"):
            return b
    return None


# ----------------------------------------------------------------------------- scenario level
HINDCAST_FILE = "hindcast.json"
#: level-sd columns of the forecast table that a shared-factor scale multiplies
SHARED_COLUMNS = tuple(f.table_column for f in LEVEL_FACTORS if f.shared)


def _columns_times(table: pd.DataFrame, columns: Sequence[str], factor: float) -> pd.DataFrame:
    """A copy of forecast `table` with `columns` (those it has) times `factor`, ``level_sd`` and the
    spot quantiles recomputed (`forecasting.pipeline.with_level_bands`)."""
    table = table.copy()
    for col in columns:
        if col in table:
            table[col] = table[col] * factor
    return with_level_bands(table)


def scale_shared_factors(table: pd.DataFrame, factor: float) -> pd.DataFrame:
    """A copy of forecast `table` with its shared level sds (`SHARED_COLUMNS`) times `factor` and
    ``level_sd`` and the spot quantiles recomputed (`forecasting.pipeline.with_level_bands`)."""
    return _columns_times(table, SHARED_COLUMNS, factor)


#: columns of the forecast table in impressions (or ratings) per spot that a planned-delivery factor multiplies
DELIVERY_COLUMNS = ("mean_rating", "mean_impressions", "airing_sd", *(f.table_column for f in LEVEL_FACTORS))


def scale_planned_delivery(table: pd.DataFrame, factor: float) -> pd.DataFrame:
    """A copy of forecast `table` whose expected delivery per spot and its sds (`DELIVERY_COLUMNS`)
    are times `factor` (relative sds unchanged), ``level_sd`` and the spot quantiles recomputed:
    what the allocator, the book and the stress test then plan on (`selection_gap`)."""
    return _columns_times(table, DELIVERY_COLUMNS, factor)


def applied_table(table: pd.DataFrame, factor: float, scale: float, previous_factor: float = 1.0,
                  previous_scale: float = 1.0) -> pd.DataFrame:
    """The cached forecast `table` (which holds `previous_factor` and `previous_scale` from an
    earlier `--apply`) with planned delivery times `factor` (`scale_planned_delivery`) and the
    shared level sds times `scale` (`scale_shared_factors`) in place of those: applying twice
    does not compound."""
    table = scale_planned_delivery(table, factor / previous_factor)
    return scale_shared_factors(table, scale / previous_scale)


def hindcast_scenario(scenario, *, seed: int = 0, solver: str = "highs", apply: bool = False,
                      progress: Progress | None = None) -> dict:
    """Replay deals on the scenario's fitted forecast (fitted now when missing or stale) and write
    ``<scenario>/forecast/hindcast.json``; with `apply`, multiply the cached table's shared level
    sds (`SHARED_COLUMNS`) by the hindcast's `scale_to_apply` (`applied_scale`: the PIT-uniform
    scale shrunk by the few independent outcomes behind it, never below 1: a few origins' worth of
    shared shocks is too little to narrow the law measured on every held-out unit-week), and record
    it in ``meta.json``. A refit drops the scale (run the hindcast again). Returns the summary."""
    progress = progress or (lambda m, f: None)
    res = ensure_forecast(scenario, seed=seed, progress=lambda m, f: progress(m, 0.3 * f))
    model = load_model(scenario)
    out = replay_deals(scenario, model, seed=seed, solver=solver, progress=lambda m, f: progress(m, 0.3 + 0.7 * f))
    summary = dict(out.summary)
    summary["fit_key"] = res.meta.get("key")
    # what the cached table holds now (an earlier --apply), unless applied afresh below
    applied = float(res.meta.get("hindcast_scale", 1.0))
    factor = float(res.meta.get("hindcast_deal_factor", 1.0))
    if apply and summary.get("deals"):
        applied, factor = float(summary["scale_to_apply"]), float(summary["deal_factor_to_apply"])
        table = applied_table(res.table, factor, applied, float(res.meta.get("hindcast_deal_factor", 1.0)),
                              float(res.meta.get("hindcast_scale", 1.0)))
        folder = forecast_dir(scenario)
        write_with_atomic(folder / TABLE_FILE, lambda p: table.to_parquet(p, index=False))
        meta = dict(res.meta, hindcast_scale=applied, hindcast_deal_factor=factor)
        write_text_atomic(folder / META_FILE, json.dumps(meta, indent=2, default=str))
    summary["applied_scale"] = applied
    summary["applied_deal_factor"] = factor
    write_text_atomic(forecast_dir(scenario) / HINDCAST_FILE, json.dumps(summary, indent=2, default=str))
    return summary


def cached_hindcast(scenario) -> dict | None:
    """The scenario's ``hindcast.json`` when it was made on the forecast now cached, else None."""
    path = forecast_dir(scenario) / HINDCAST_FILE
    meta = forecast_meta(scenario)
    if not path.is_file() or meta is None:
        return None
    try:
        summary = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    return summary if summary.get("fit_key") == meta.get("key") else None
