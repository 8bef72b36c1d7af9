"""The faults `bench/bench_faults.py` puts into a copy of the code, one at a time.

A fault is one plausible mistake: an exact source snippet `old` (found by searching every .py
file under planner/, forecasting/ and scenarios/, so it follows the code when files move; it must
occur exactly once) and its replacement `new`, with the tests that should catch it (`tests`:
files or node ids under tests/, run as the selection). Every new rule or factor gets an entry
(DEVELOPERS.md, "Add a fault"). Keep `old` short but unique; `new` keeps `old`'s indentation.
"""
from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class Fault:
    """One mistake put into the code: `old` replaced by `new` where `old` occurs (exactly once)."""

    name: str
    description: str
    old: str
    new: str
    tests: tuple[str, ...]


FAULTS: tuple[Fault, ...] = (
    # ------------------------------------------------------------------ allocation
    Fault("slack-sign",
          "allocate: the chance-constraint slack mean - z sqrt(q + l) made mean + z sqrt(q + l)",
          "return dm.mean(x) - z_value(prob.rules.confidence) * math.sqrt(dm.quadratic_variance(x) + l) - target",
          "return dm.mean(x) + z_value(prob.rules.confidence) * math.sqrt(dm.quadratic_variance(x) + l) - target",
          ("tests/test_allocate.py",)),
    Fault("cut-sign",
          "allocate: the tangent cut of mean - z sqrt(q + l0) with the gradient's sign turned",
          "coef = (dm.m - z * g) * SCALE",
          "coef = (dm.m + z * g) * SCALE",
          ("tests/test_allocate.py",)),
    Fault("flight-short",
          "Deal.weeks: range(first, last + 1) made range(first, last) (a flight one week short)",
          "return list(range(self.first_week, self.last_week + 1))",
          "return list(range(self.first_week, self.last_week))",
          ("tests/test_deals.py",)),
    Fault("run-deal-weeks-short",
          "run_deal: candidate units of deal.weeks[:-1] (the plan never buys the flight's last week)",
          "scope = al.candidate_units(units, weeks=deal.weeks, exclude_networks=",
          "scope = al.candidate_units(units, weeks=deal.weeks[:-1], exclude_networks=",
          ("tests/test_deals.py",)),
    Fault("held-twice",
          "candidate_units: avails - 2 x held spots (holds subtracted twice)",
          'avail = avail - u["spots"].fillna(0).to_numpy(float)',
          'avail = avail - 2 * u["spots"].fillna(0).to_numpy(float)',
          ("tests/test_deals.py", "tests/test_allocate.py")),
    Fault("deals-own-holds",
          "deals._held: held_spots(..., exclude=()) (a booked deal competes with its own holds)",
          "return bk.held_spots(scenario, book, exclude=(deal_name,))",
          "return bk.held_spots(scenario, book, exclude=())",
          ("tests/test_deals.py", "tests/test_book.py")),
    # ------------------------------------------------------------------ delivery model
    Fault("delivery-common-per-unit",
          "DeliveryModel: the common level factor drawn per unit (independent) instead of shared by all",
          '("common", self.a_common, np.zeros(self.n, dtype=np.int64), 1)',
          '("common", self.a_common, None, self.n)',
          ("tests/test_delivery.py",)),
    Fault("delivery-network-week-per-unit",
          "DeliveryModel: the network-week factor drawn per unit instead of shared by the network's units that week",
          '("network_week", self.a_nw, self.nw_code, self.n_nw)',
          '("network_week", self.a_nw, None, self.n)',
          ("tests/test_delivery.py",)),
    Fault("delivery-preemption-variance-dropped",
          "DeliveryModel: the preemption term p (1 - p)(mu^2 + level^2) left out of the per-spot variance",
          "self.v_lin = keep * self.airing_sd ** 2 + self.p * keep * (self.mu ** 2 + self.level_var)",
          "self.v_lin = keep * self.airing_sd ** 2",
          ("tests/test_delivery.py",)),
    # ------------------------------------------------------------------ forecast
    Fault("common-sd-heldout",
          "error law: the forecast's common sd taken as the held-out one ((1 - 1/J) of the shift, not (1 + 1/J))",
          '"rel_sd_common": np.full(len(units), np.sqrt(max(self.var_common_, self.common_floor_var_))),',
          '"rel_sd_common": np.full(len(units), np.sqrt(max(self.var_common_heldout_, self.common_floor_var_))),',
          ("tests/test_forecast_uncertainty.py",)),
    Fault("common-widening-unscaled",
          "error law: widen_common adds the refits' shared shift to the forecast's common variance without (1 + 1/J)",
          "self.var_common_ += (1.0 + 1.0 / n_refits) * var_shift",
          "self.var_common_ += var_shift",
          ("tests/test_forecast_uncertainty.py",)),
    Fault("fit-origin-late",
          "forecast_job: the fit's origin first_week + 7 days (forecasts for the wrong weeks)",
          "fc.fit(cube, info, scenario.dayparts, pd.Timestamp(scenario.first_week), scenario.weeks,",
          "fc.fit(cube, info, scenario.dayparts, pd.Timestamp(scenario.first_week) + pd.Timedelta(days=7), "
          "scenario.weeks,",
          ("tests/test_faults.py",)),
    Fault("disagreement-floor-dropped",
          "plan law: the candidates' disagreement about the total not put under the common factor",
          "return self.level_.with_daypart_scale(scale).with_common_floor(self.plan_disagreement_var_)",
          "return self.level_.with_daypart_scale(scale)",
          ("tests/test_candidates.py",)),
    Fault("common-floor-added",
          "error law: the common floor added to the common variance instead of taken as a minimum",
          '"rel_sd_common": np.full(len(units), np.sqrt(max(self.var_common_, self.common_floor_var_))),',
          '"rel_sd_common": np.full(len(units), np.sqrt(self.var_common_ + self.common_floor_var_)),',
          ("tests/test_forecast_uncertainty.py",)),
    Fault("law-scale-inverted",
          "plan law: the refits' mixture variance over the plan's (the daypart scale inverted)",
          "ratio = (target[:, 0] / target[:, 1]) / (pooled[:, 0] / pooled[:, 1])",
          "ratio = (pooled[:, 0] / pooled[:, 1]) / (target[:, 0] / target[:, 1])",
          ("tests/test_candidates.py", "tests/test_forecast_model.py")),
    Fault("prior-by-sd",
          "stacking prior: candidates weighed by their inverse held-out sd instead of variance",
          "w0 = w0 / np.maximum(spread.reindex(w.index).astype(float).fillna(1.0), 1e-3) ** 2",
          "w0 = w0 / np.maximum(spread.reindex(w.index).astype(float).fillna(1.0), 1e-3)",
          ("tests/test_candidates.py",)),
    Fault("last-year-window-off-centre",
          "last_year_scaled: the window around last year's week shifted one week late",
          "for d in range(-half_width, half_width + 1):",
          "for d in range(-half_width + 1, half_width + 2):",
          ("tests/test_candidates.py",)),
    Fault("table-mean-high",
          "forecast_table: mean rating x 1.2",
          "t = self._table(self.plan_mean_, self.history_weeks_, universes, units, self.plan_law())",
          "t = self._table(1.2 * self.plan_mean_, self.history_weeks_, universes, units, self.plan_law())",
          ("tests/test_faults.py",)),
    Fault("job-table-high",
          "forecast_job: every mean, sd and quantile column x 1.2 after the fit",
          "table = fc.forecast_table(scenario.universes, units=scenario.inventory)",
          "table = fc.forecast_table(scenario.universes, units=scenario.inventory)\n"
          "    scaled = [c for c in table.columns if c.startswith(('mean_', 'level_sd', 'q10_', 'q90_'))"
          " or c == 'airing_sd']\n"
          "    table[scaled] = table[scaled] * 1.2",
          ("tests/test_faults.py",)),
    Fault("job-level-narrow",
          "forecast_job: level sds x 0.8 after the fit, level_sd and quantiles recomputed",
          "table = fc.forecast_table(scenario.universes, units=scenario.inventory)",
          "table = fc.forecast_table(scenario.universes, units=scenario.inventory)\n"
          "    narrow = [c for c in table.columns if c.startswith('level_sd_')]\n"
          "    table[narrow] = table[narrow] * 0.8\n"
          "    from forecasting.pipeline import with_level_bands\n"
          "    table = with_level_bands(table)",
          ("tests/test_faults.py",)),
    Fault("table-level-narrow",
          "forecast table: every level loading x 0.8 (bands 20% too narrow, quantiles recomputed)",
          "t[f.table_column] = sd[f.rel_column].to_numpy() * mu",
          "t[f.table_column] = 0.8 * sd[f.rel_column].to_numpy() * mu",
          ("tests/test_faults.py",)),
    Fault("backtest-mean-high",
          "backtest: the model's mean x 1.2 (a model other than the one fitted is scored)",
          "model_mean = fc.combine_plan(model_raw) * fc.level_factor(fc.plan_recent_)",
          "model_mean = 1.2 * fc.combine_plan(model_raw) * fc.level_factor(fc.plan_recent_)",
          ("tests/test_faults.py",)),
    Fault("stacking-weights-ignored",
          "stacking: the CRPS-optimal weights thrown away (equal weights kept)",
          "w = np.clip(res.x, 0.0, None) if res.success else start",
          "w = start",
          ("tests/test_candidates.py",)),
    Fault("stacking-ratio-ignored",
          "stacking: the combined mean without each candidate's level ratio b_k",
          "out = (np.where(ok, stack * b, 0.0) * wk).sum(axis=0) / total",
          "out = (np.where(ok, stack, 0.0) * wk).sum(axis=0) / total",
          ("tests/test_candidates.py",)),
    # ------------------------------------------------------------------ hindcast
    Fault("hindcast-bin-edge",
          "hindcast reliability bins: lower edge exclusive (a claim of exactly 80/90/97% in no bin)",
          'b = deals[(deals["claimed"] >= lo) & (deals["claimed"] < hi)]',
          'b = deals[(deals["claimed"] > lo) & (deals["claimed"] < hi)]',
          ("tests/test_hindcast.py",)),
    Fault("hindcast-no-design-effect",
          "hindcast reliability bins: effective count = raw count (shared shocks ignored, se too small)",
          "eff = len(b) / design",
          "eff = float(len(b))",
          ("tests/test_hindcast.py",)),
    Fault("hindcast-apply-skips-common",
          "hindcast --apply: the common factor left out of the shared sds it widens",
          "SHARED_COLUMNS = tuple(f.table_column for f in LEVEL_FACTORS if f.shared)",
          'SHARED_COLUMNS = tuple(f.table_column for f in LEVEL_FACTORS if f.shared and f.name != "common")',
          ("tests/test_hindcast.py",)),
    # ------------------------------------------------------------------ book, stress, rebalance
    Fault("stress-network-independent",
          "stress fast sampler: the network term drawn independently per deal (same marginal sd)",
          "dev = z_net @ L + z_other @ F.T",
          "dev = rng.standard_normal((k, D), dtype=np.float32) * np.sqrt((L ** 2).sum(axis=0)) + z_other @ F.T",
          ("tests/test_stress.py",)),
    Fault("book-cov-diagonal",
          "book model: only the diagonal of the cross-deal covariance of the non-network factors kept",
          "other = other + (B @ B.T).toarray()",
          "other = other + np.diag(np.diag((B @ B.T).toarray()))",
          ("tests/test_stress.py",)),
    Fault("stress-exact-common-per-row",
          "stress exact sampler: the common factor drawn per hold row instead of once per draw",
          "level += wc * rng.standard_normal((k, 1))\n        if per_spot:",
          "level += wc * rng.standard_normal((k, R))\n        if per_spot:",
          ("tests/test_stress.py",)),
    Fault("stress-aired-holds-kept",
          "stress: a rebalanced deal's aired-week holds kept (delivery counted twice)",
          'units = units[~((units["deal"] == d.name) & (units["week"] <= int(after)))]',
          'units = units[~((units["deal"] == d.name) & (units["week"] < 0))]',
          ("tests/test_stress.py", "tests/test_rebalance.py")),
    Fault("rebalance-own-holds",
          "rebalance: re-plan with held_spots(..., exclude=[]) (its own holds counted against it)",
          "others=held_spots(scenario, book, exclude=[deal_name])",
          "others=held_spots(scenario, book, exclude=[])",
          ("tests/test_faults.py", "tests/test_rebalance.py")),
    Fault("rebalance-chance-complement",
          "rebalance._probability_of returning 1 - p",
          'return dm.probability(u["spots"].to_numpy(float), guarantee)',
          'return 1.0 - dm.probability(u["spots"].to_numpy(float), guarantee)',
          ("tests/test_faults.py", "tests/test_rebalance.py")),
    # ------------------------------------------------------------------ report, scenario
    Fault("report-shortfall-complement",
          "report: the book table shows 1 - P(shortfall)",
          "<td>{fmt_pct(r['probability_of_shortfall'])}</td>",
          "<td>{fmt_pct(1 - r['probability_of_shortfall'])}</td>",
          ("tests/test_faults.py", "tests/test_report.py")),
    Fault("report-cpm-per-impression",
          "report: the zone table's CPM without the x 1000",
          "(1000 * r.cost / r.expected_impressions)",
          "(r.cost / r.expected_impressions)",
          ("tests/test_faults.py", "tests/test_report.py")),
    Fault("deal-week-past-plan",
          "scenario loader: a deal's plan week weeks + 1 accepted",
          "if not _is_int(v) or not 1 <= v <= weeks:",
          "if not _is_int(v) or not 1 <= v <= weeks + 1:",
          ("tests/test_scenario.py",)),
    Fault("inventory-week-past-plan",
          "scenario loader: an inventory row of plan week weeks + 1 accepted",
          "(wk >= 1) & (wk <= weeks) & (wk == np.round(wk))",
          "(wk >= 1) & (wk <= weeks + 1) & (wk == np.round(wk))",
          ("tests/test_scenario.py",)),
)


def by_name() -> dict[str, Fault]:
    """{name: fault}; names are unique."""
    out = {f.name: f for f in FAULTS}
    assert len(out) == len(FAULTS), "fault names must be unique"
    return out
