"""The demo's fitted forecast scored on the plan weeks it was made for, against the generator's
simulated future (known truth: the invented generator runs past the end of the history)."""
from __future__ import annotations

import numpy as np
import pytest

from forecasting.backtest import score_levels

# The demo's fit (about 45 s) is the quick suite's largest cost; the faults these tests caught first
# (a table scaled after the fit, bands narrowed) are killed in seconds by tests/test_faults.py
# (bench/faults.py), so the whole module runs with the slow suite (CI runs both).
pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def scored(demo_fitted):
    from planner.forecast_job import load_forecast
    from planner.scenario import load_scenario
    from scenarios.actuals import true_unit_week_levels

    scn = load_scenario(demo_fitted)
    table = load_forecast(scn)
    truth = true_unit_week_levels(scn)
    m = table.merge(truth, on=["zone", "network", "daypart", "week", "demo"], how="inner", validate="1:1")
    assert len(m) == len(table)
    return m


def test_plan_week_bands_cover_the_simulated_truth(scored):
    # Central 50/80/95% intervals of N(mean_impressions, level_sd^2) on 21,840 unit-weeks of
    # the 13 plan weeks, made 17 weeks ahead by the model the planner uses. Measured 2026-12-02
    # on the demo's history: 53.9 / 84.8 / 97.0%. One window is one draw of the ten networks'
    # shocks: over five generator seeds (bench/bench_calibration.py) the same figure ranged
    # 31-54% at 50%, so this test holds the demo's own draw to 8 points, not the 5.
    s = score_levels(scored["true_impressions"], scored["mean_impressions"], scored["level_sd"])
    for level, got in s["coverage"].items():
        assert abs(got - float(level)) <= 0.08, (level, got)
    total_bias = scored["true_impressions"].sum() / scored["mean_impressions"].sum() - 1.0
    assert abs(total_bias) < 0.05
    assert s["wape"] < 0.15


def test_short_histories_get_wider_bands_that_still_cover(scored):
    # The demo has 3 zone x network series launched 150 days (21 weeks) before the history ends.
    short = scored[scored["history_weeks"] < 30]
    assert len(short) > 0
    rel = (scored["level_sd"] / scored["mean_impressions"])
    assert rel[short.index].median() > 1.05 * rel[scored["history_weeks"] >= 60].median()
    inside = np.abs(short["true_impressions"] - short["mean_impressions"]) <= 1.2816 * short["level_sd"]
    assert inside.mean() >= 0.70  # the 80% band; z(0.90) = 1.2816, NIST/SEMATECH normal table


def test_network_week_errors_are_shared_across_zones(scored):
    # The network-week factor exists because errors of one network in one week move together in
    # every zone: the mean relative error of a network-week (over its zones, dayparts, demos)
    # varies far more than independent unit-week errors would allow.
    e = scored["true_impressions"] / scored["mean_impressions"] - 1.0
    g = e.groupby([scored["network"], scored["week"]])
    flight_mean = e.groupby([scored["zone"], scored["network"], scored["daypart"], scored["demo"]]).transform("mean")
    r = e - flight_mean
    nw_mean = r.groupby([scored["network"], scored["week"]]).mean()
    n = g.size().median()
    assert nw_mean.var() > 3 * r.var() / n
    rel_nw = (scored["level_sd_network_week"] / scored["mean_impressions"]).median()
    assert 0.3 * np.sqrt(nw_mean.var()) < rel_nw < 3 * np.sqrt(nw_mean.var())


def test_plan_week_total_bias_sd_follows_the_table_factors(demo_fitted, scored):
    from planner.forecast_job import load_forecast
    from planner.scenario import load_scenario
    from scenarios.actuals import plan_week_scores

    scn = load_scenario(demo_fitted)
    s = plan_week_scores(scn, load_forecast(scn))
    assert s["bias_z"] == pytest.approx(s["bias"] / s["bias_sd"])
    mu = scored["mean_impressions"].to_numpy()
    w = mu / mu.sum()
    # Bienaymé: with every factor of its own unit the total's sd would be sqrt(sum w^2 sd^2); the
    # network factor alone, shared by all units of a network, gives sqrt(sum_n (sum_i w_i sd_i)^2)
    alone = np.sqrt(np.sum((w * scored["level_sd"].to_numpy() / mu) ** 2))
    by_net = (w * scored["level_sd_network"].to_numpy() / mu)
    network_only = np.sqrt(np.sum(np.bincount(scored.groupby("network").ngroup().to_numpy(), weights=by_net) ** 2))
    assert s["bias_sd"] > network_only > alone
    assert s["bias_sd"] < np.sum(w * scored["level_sd"].to_numpy() / mu)  # below full correlation
