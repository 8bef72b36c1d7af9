"""The forecast job (cache, staleness) and the `pledge forecast` commands on a small scenario."""
from __future__ import annotations

import json
import shutil

import numpy as np
import pandas as pd
import pytest

from planner.cli import main
from planner.errors import InputError

CONTRACT = ["zone", "network", "daypart", "week", "demo", "universe", "mean_rating", "mean_impressions",
            "airing_sd", "level_sd", "level_sd_common", "level_sd_network", "level_sd_network_week",
            "level_sd_flight", "level_sd_week", "q10_impressions", "q90_impressions", "history_weeks"]


@pytest.fixture(scope="module")
def fitted_small(small_fit, fitted_copy, tmp_path_factory):
    """A copy of the session's fitted small scenario (tests/conftest.py: fitted once by `pledge
    forecast fit`), its scenario, and the `ForecastResult` that fit returned."""
    from planner.scenario import load_scenario

    dest = fitted_copy(small_fit.folder, tmp_path_factory.mktemp("fc") / "small")
    return dest, load_scenario(dest), small_fit.result


def test_table_follows_the_contract(fitted_small):
    dest, scn, first = fitted_small
    t = first.table
    assert first.fitted_now
    assert list(t.columns) == CONTRACT
    assert len(t) == len(scn.inventory) * len(scn.demos)
    assert not t[CONTRACT[5:]].isna().any().any()
    assert (t["level_sd_network"] > 0).all() and (t["level_sd_week"] > 0).all()
    assert (t["level_sd_network_week"] > 0).all() and (t["level_sd_common"] >= 0).all()
    # the common factor is one relative sd for every unit (a fraction of each unit's mean)
    assert (t["level_sd_common"] / t["mean_impressions"]).std() < 1e-9
    # q10/q90 of one spot: mean -+ z(0.90) sd with sd^2 = level^2 + airing^2
    # (z(0.90) = 1.2816, NIST/SEMATECH normal table), q10 floored at zero.
    from scipy.stats import norm

    z = norm.ppf(0.90)
    assert z == pytest.approx(1.2816, abs=1e-4)
    sd = np.sqrt(t["level_sd"] ** 2 + t["airing_sd"] ** 2)
    np.testing.assert_allclose(t["q90_impressions"], t["mean_impressions"] + z * sd, rtol=1e-9)
    np.testing.assert_allclose(t["q10_impressions"], np.maximum(t["mean_impressions"] - z * sd, 0),
                               rtol=1e-9, atol=1e-9)
    # Prime delivers more than overnight (common practice).
    by = t.groupby("daypart")["mean_rating"].mean()
    assert by["prime"] > by["overnight"]
    meta = json.loads((dest / "forecast" / "meta.json").read_text())
    assert meta["key"]["seed"] == 0 and meta["fit"]["folds"] >= 1
    cal = meta["fit"]["calibration"]
    assert set(cal["leave_one_fold_out_coverage"]) == {"0.5", "0.8", "0.95"}
    # one total check per refit, keyed by its origin date, the z its bias over its law sd
    assert set(cal["leave_one_fold_out_total"]) == set(meta["fit"]["fold_origins"])
    for t in cal["leave_one_fold_out_total"].values():
        assert t["bias_sd"] > 0 and t["z"] == pytest.approx(t["bias"] / t["bias_sd"])
    z = np.array([t["z"] for t in cal["leave_one_fold_out_total"].values()])
    assert cal["total_z_rms"] == pytest.approx(np.sqrt(np.mean(z ** 2)))
    # chi-square test of sum z^2, one degree of freedom per refit (scipy.stats.chi2, reference library)
    from scipy.stats import chi2

    assert cal["total_z_p"] == pytest.approx(chi2.sf(np.sum(z ** 2), len(z)), rel=1e-9)


def test_cache_reused_and_key_tracks_inputs(fitted_small):
    from planner.forecast_job import ensure_forecast, fit_key, load_forecast

    dest, scn, first = fitted_small
    again = ensure_forecast(scn)
    assert not again.fitted_now
    pd.testing.assert_frame_equal(again.table, first.table)
    pd.testing.assert_frame_equal(load_forecast(scn), first.table)
    base = fit_key(scn)
    inv = scn.inventory.copy()
    changed = type(scn)(**{**scn.__dict__, "inventory": inv[inv["week"] != inv["week"].max()]})
    assert fit_key(changed)["inventory"] != base["inventory"]
    dp = list(scn.dayparts)
    changed = type(scn)(**{**scn.__dict__, "dayparts": dp[:-1]})
    assert fit_key(changed)["dayparts"] != base["dayparts"]
    assert fit_key(scn, seed=3) != base


def test_load_forecast_without_fit_is_input_error(small_scenario, scenario_copy):
    from planner.forecast_job import load_forecast
    from planner.scenario import load_scenario

    scn = load_scenario(scenario_copy(small_scenario))
    import shutil

    shutil.rmtree(scn.path / "forecast", ignore_errors=True)
    with pytest.raises(InputError, match="no forecast yet"):
        load_forecast(scn)


def test_cli_show_and_errors(fitted_small, capsys):
    dest, scn, first = fitted_small
    zone, network = first.table.iloc[0][["zone", "network"]]
    assert main(["forecast", "show", str(dest), "--zone", zone, "--network", network, "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["zone"] == zone and len(out["rows"]) == int(((first.table["zone"] == zone)
                                                           & (first.table["network"] == network)
                                                           & (first.table["demo"] == scn.demos[0])).sum())
    assert main(["forecast", "show", str(dest), "--zone", "nowhere", "--network", network]) == 2
    assert "nowhere" in capsys.readouterr().err
    assert main(["forecast", "fit", str(dest), "--demo", "nobody"]) == 2
    assert main(["forecast", "fit", str(dest), "--engine", "abacus"]) == 2


@pytest.mark.slow
def test_backtest_json_on_small_scenario(fitted_small, capsys):
    dest, scn, first = fitted_small
    assert main(["forecast", "backtest", str(dest), "--holdout-weeks", "6", "--json"]) == 0
    s = json.loads(capsys.readouterr().out)
    assert set(s["coverage"]) == {"0.5", "0.8", "0.95"}
    assert set(s["baselines"]) == {"last_year", "trailing_8w"}
    # the scores' definitions (bias, coverage, CRPS) are checked against hand-worked values in
    # tests/test_faults.py::test_backtest_scores_a_known_forecast_against_hand_worked_bias_coverage_and_crps
    # bias = sum actual / sum forecast - 1, so |bias| <= WAPE x (1 + bias) (triangle inequality)
    assert abs(s["bias"]) <= s["wape"] * (1 + s["bias"]) + 1e-12
    assert s["coverage"]["0.5"] <= s["coverage"]["0.8"] <= s["coverage"]["0.95"]
    assert s["units"] > 100
    # the 5-95% range of coverage a calibrated forecast shows on these rows holds the nominal level
    cal = s["coverage_if_calibrated"]
    for lv, r in cal["levels"].items():
        assert 0 <= r["low"] <= float(lv) <= r["high"] <= 1 and 0 <= r["share_as_far"] <= 1
    assert 0 <= cal["share_within"] <= 1 and cal["tolerance"] == 0.05
    # each factor's sd as measured in the block and as the law has it (the common one: law only)
    fs = s["factor_sd"]
    assert list(fs) == ["common", "network", "network_week", "flight", "week"] and fs["common"]["measured"] is None
    assert all(v["law"] >= 0 for v in fs.values()) and fs["week"]["measured"] > 0 and fs["week"]["law"] > 0
    # --lead-days moves the cut-off: held-out days start that many days after it
    assert main(["forecast", "backtest", str(dest), "--holdout-weeks", "6", "--lead-days", "7", "--json"]) == 0
    h = json.loads(capsys.readouterr().out)["holdout"]
    assert h["lead_gap_days"] == 7 and h["first_day"] == s["holdout"]["first_day"]
    gap = (pd.Timestamp(h["first_day"]) - pd.Timestamp(h["cutoff_day"])).days
    assert gap == 8  # the cut-off day is the last training day
    assert main(["forecast", "backtest", str(dest), "--lead-days", "-1"]) == 2


@pytest.mark.slow
def test_backtest_pools_successive_blocks(fitted_small, capsys):
    """--windows K scores K adjacent blocks, each by its own refit (rolling origin, Tashman 2000),
    and pools them: the pooled coverage and CRPS are the unit-weighted means of the blocks', and
    the latest block scores exactly as a one-block backtest with the same settings."""
    dest, scn, first = fitted_small
    args = ["forecast", "backtest", str(dest), "--holdout-weeks", "4", "--lead-days", "7", "--json"]
    assert main(args) == 0
    one = json.loads(capsys.readouterr().out)
    assert main(args + ["--windows", "2"]) == 0
    two = json.loads(capsys.readouterr().out)
    b1, b2 = two["windows"]
    assert b1["holdout"] == one["holdout"] and b1["units"] == one["units"]
    assert b1["crps"] == pytest.approx(one["crps"], rel=1e-12)
    assert b1["coverage"] == one["coverage"]
    # blocks are adjacent and do not overlap; each cut-off is 7 + 1 days before its block
    assert (pd.Timestamp(b1["holdout"]["first_day"]) - pd.Timestamp(b2["holdout"]["last_day"])).days == 1
    for b in (b1, b2):
        h = b["holdout"]
        assert (pd.Timestamp(h["last_day"]) - pd.Timestamp(h["first_day"])).days == 27
        assert (pd.Timestamp(h["first_day"]) - pd.Timestamp(h["cutoff_day"])).days == 8
    n = np.array([b1["units"], b2["units"]], dtype=float)
    assert two["units"] == n.sum()
    for lv in ("0.5", "0.8", "0.95"):
        assert two["coverage"][lv] == pytest.approx((n * [b1["coverage"][lv], b2["coverage"][lv]]).sum() / n.sum())
    assert two["crps"] == pytest.approx((n * [b1["crps"], b2["crps"]]).sum() / n.sum())
    for name in ("last_year", "trailing_8w"):
        assert two["baselines"][name]["crps"] == pytest.approx(
            (n * [b1["baselines"][name]["crps"], b2["baselines"][name]["crps"]]).sum() / n.sum())
    assert two["holdout"]["blocks"] == 2 and two["holdout"]["first_day"] == b2["holdout"]["first_day"]
    assert main(args[:-1] + ["--windows", "2"]) == 0  # the table names each block and its cut-off
    text = capsys.readouterr().out
    assert "2 held-out blocks" in text and "block 2: " + b2["holdout"]["first_day"] in text
    assert "pooled over the blocks" in text and "a calibrated forecast would show" in text
    # two blocks are two independent draws of every network's factor: a narrower pooled range
    width = lambda sc: sc["coverage_if_calibrated"]["levels"]["0.8"]["high"] - sc["coverage_if_calibrated"]["levels"]["0.8"]["low"]  # noqa: E731
    assert width(two) < max(width(b1), width(b2))
    assert main(["forecast", "backtest", str(dest), "--windows", "0"]) == 2
    assert "--windows" in capsys.readouterr().err
    assert main(["forecast", "backtest", str(dest), "--windows", "40"]) == 2
    assert "too short" in capsys.readouterr().err


@pytest.mark.slow
def test_demo_forecast_table(demo_fitted):
    from planner.forecast_job import load_forecast
    from planner.scenario import load_scenario

    scn = load_scenario(demo_fitted)
    t = load_forecast(scn)
    assert len(t) == len(scn.inventory) * len(scn.demos)
    assert not t[CONTRACT[5:]].isna().any().any()
    rel = t["level_sd"] / t["mean_impressions"]
    # Short-history series (the demo has a few) get wider level bands than the rest.
    short = t["history_weeks"] < 30
    assert short.any()
    assert rel[short].median() > rel[~short].median()


def test_cli_fit_text_reports_the_refit_totals(small_fit):
    """What `pledge forecast fit` printed (the session's fit, tests/conftest.py) against the
    meta.json it wrote."""
    dest = small_fit.folder
    out = " ".join(small_fit.printed.split())  # undo the console's line wrapping
    cal = json.loads((dest / "forecast" / "meta.json").read_text())["fit"]["calibration"]
    assert "held-out total of each refit" in out
    for day, t in cal["leave_one_fold_out_total"].items():
        assert f"{day} {t['bias']:+.1%} ({t['bias_sd']:.1%})" in out
    le = json.loads((dest / "forecast" / "meta.json").read_text())["fit"]["level_error"]
    # refits missing beyond the law widen it (said), instead of a caution
    assert "caution: The forecast's refits missed their totals" not in out
    assert ("was widened by an sd of" in out) == (le["common_widened_by_sd"] > 0)
    if cal["total_z_rms"] > 1.0:
        assert le["common_widened_by_sd"] > 0


def test_ensure_forecast_fits_when_missing_stale_or_forced_and_reads_the_cache_otherwise(
        fitted_small, scenario_copy, monkeypatch):
    """`ensure_forecast` calls `fit_forecast` (stubbed here: the fit itself is the session's) when
    the folder has no forecast, when the fit key differs (another seed) and under `force`, and
    only then. Catches a cache that is never (or always) refitted."""
    import planner.forecast_job as fj
    from planner.scenario import load_scenario

    dest, scn, first = fitted_small
    calls = []
    monkeypatch.setattr(fj, "fit_forecast", lambda scenario, **kw: calls.append(kw) or "fitted")
    assert not fj.ensure_forecast(scn).fitted_now and calls == []
    assert fj.ensure_forecast(scn, seed=3) == "fitted" and calls[-1]["seed"] == 3
    assert fj.ensure_forecast(scn, force=True) == "fitted" and len(calls) == 2
    bare = scenario_copy(dest, "bare")
    shutil.rmtree(bare / "forecast")
    assert fj.ensure_forecast(load_scenario(bare)) == "fitted" and len(calls) == 3


def test_shared_error_caution_follows_the_chi_square_test():
    from planner.forecast_job import shared_error_caution

    def meta(p, excess):
        return {"fit": {"calibration": {"total_z_p": p, "total_excess_sd": excess,
                                        "leave_one_fold_out_total": {"a": {}, "b": {}, "c": {}}}}}

    assert shared_error_caution(None, "s") is None
    assert shared_error_caution({"fit": {"calibration": {}}}, "s") is None  # a fit from before the check
    assert shared_error_caution(meta(0.20, 0.02), "s") is None
    text = shared_error_caution(meta(0.003, 0.062), "demo")
    assert "p = 0.003)" in text and "6.2%" in text and "3 refits" in text
    held = meta(0.003, 0.02)
    held["fit"]["level_error"] = {"rel_sd_common": 0.065}
    assert "p = 0.003, even with the shift shared by all units that the law holds (sd 6.5%)" in (
        shared_error_caution(held, "demo"))
    assert "`pledge stress demo --shock all:-0.062`" in text
    assert "--shock" not in shared_error_caution(meta(0.01, 0.0), "demo")
    widened = meta(0.003, 0.062)
    widened["fit"]["level_error"] = {"rel_sd_common": 0.08, "common_widened_by_sd": 0.05}
    assert shared_error_caution(widened, "demo") is None  # the law holds the misses: no caution due


def test_table_level_columns_are_the_spec_factors_in_order(fitted_small):
    t = fitted_small[2].table
    level = [c for c in t.columns if c.startswith("level_sd_")]
    assert level == ["level_sd_common", "level_sd_network", "level_sd_network_week", "level_sd_flight",
                     "level_sd_week"]
    # level_sd is their root sum of squares, row by row
    rss = np.sqrt(sum(t[c].to_numpy(float) ** 2 for c in level))
    assert np.allclose(t["level_sd"].to_numpy(float), rss, rtol=1e-12)
