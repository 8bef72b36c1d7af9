"""One list of level factors (`forecasting.factors.LEVEL_FACTORS`): every place that lists them
derives from it, in contract order, and the table's total level sd is their root sum of squares."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from forecasting.backtest import COMPONENTS, FACTOR_COLUMNS, factor_sd_measured_and_law
from forecasting.factors import DRAWN, LEVEL_FACTORS, TABLE_COLUMNS, factor_named
from forecasting.pipeline import with_level_bands
from forecasting.scoring import layout_term
from forecasting.uncertainty import COMPONENT_KEYS
from planner.cli.forecast_cmds import FACTOR_LABELS, _factor_sds
from planner.delivery import OPTIONAL_LEVEL_COLS, REQUIRED, group_keys
from planner.hindcast import SHARED_COLUMNS
from planner.posterior import own, persistent, weekly_shared

NAMES = ["common", "network", "network_week", "flight", "week"]  # DEVELOPERS.md, "Forecast table"


def test_the_spec_lists_the_five_factors_of_the_contract_in_order():
    assert [f.name for f in LEVEL_FACTORS] == NAMES
    assert list(TABLE_COLUMNS) == ["level_sd_common", "level_sd_network", "level_sd_network_week",
                                   "level_sd_flight", "level_sd_week"]
    assert factor_named("flight").keys == ("zone", "network", "daypart", "demo")
    with pytest.raises(KeyError):
        factor_named("nope")


def test_the_model_backtest_reader_and_hindcast_lists_follow_the_spec():
    assert [c for c, _ in COMPONENT_KEYS] == [f"rel_sd_{n}" for n in NAMES]
    assert [k for _, k in COMPONENT_KEYS] == [[], ["network"], ["network", "week"],
                                              ["zone", "network", "daypart", "demo"], None]
    assert [k for _, k in COMPONENTS][:2] == [["block"], ["block", "network"]]
    assert list(FACTOR_COLUMNS) == NAMES
    assert [c for c in REQUIRED if c.startswith("level_sd")] == ["level_sd_network", "level_sd_flight",
                                                                 "level_sd_week"]
    assert sorted(OPTIONAL_LEVEL_COLS) == ["level_sd_common", "level_sd_network_week"]
    assert SHARED_COLUMNS == ("level_sd_common", "level_sd_network", "level_sd_network_week", "level_sd_flight")


def test_the_fit_prints_the_spec_labels_in_order():
    fs = {n: {"measured": m, "law": law} for n, m, law in
          zip(NAMES, [None, 0.05, 0.02, 0.10, 0.04], [0.01, 0.06, 0.03, 0.11, 0.05])}
    assert list(FACTOR_LABELS.values()) == ["network", "network-week", "flight", "own unit-week"]
    assert _factor_sds({"factor_sd": fs}) == (
        "network 5.0% (6.0%), network-week 2.0% (3.0%), flight 10.0% (11.0%), own unit-week 4.0% (5.0%); "
        "shared by all units: the law's 1.0%, one draw per block (see the bias)")


def test_the_backtest_reports_every_spec_factor_in_order():
    rng = np.random.default_rng(0)
    rows = pd.MultiIndex.from_product([["n1", "n2"], ["z1", "z2"], [1, 2, 3]], names=["network", "zone", "week"])
    scored = rows.to_frame(index=False).assign(daypart="prime", demo="A25-54", mean=100.0)
    scored["actual"] = 100.0 * (1 + 0.05 * rng.standard_normal(len(scored)))
    for n in NAMES:
        scored[f"rel_sd_{n}"] = 0.03
    out = factor_sd_measured_and_law(scored)
    assert list(out) == NAMES
    assert out["common"]["measured"] is None
    assert out["flight"]["law"] == pytest.approx(0.03)


def test_level_sd_is_the_root_sum_of_squares_of_the_spec_columns():
    # 3-4-12-13 and 13-84-85 triangles: level 13, one spot sqrt(13^2 + 84^2) = 85
    t = pd.DataFrame({"mean_impressions": [1000.0], "airing_sd": [84.0], "level_sd_common": [3.0],
                      "level_sd_network": [4.0], "level_sd_network_week": [0.0], "level_sd_flight": [12.0],
                      "level_sd_week": [0.0]})
    with_level_bands(t)
    assert t["level_sd"].iloc[0] == pytest.approx(13.0)
    # z(0.90) = 1.2816 (NIST/SEMATECH normal table): 1000 -+ 1.2816 x 85 = 1108.94 / 891.06
    assert t["q90_impressions"].iloc[0] == pytest.approx(1108.94, abs=0.01)
    assert t["q10_impressions"].iloc[0] == pytest.approx(891.06, abs=0.01)
    # a table from before the optional factors: 6-8-10
    old = pd.DataFrame({"mean_impressions": [50.0], "airing_sd": [0.0], "level_sd_network": [6.0],
                        "level_sd_flight": [8.0], "level_sd_week": [0.0], "level_sd_other": [99.0]})
    assert with_level_bands(old)["level_sd"].iloc[0] == pytest.approx(10.0)


def test_the_planner_roles_follow_the_spec():
    """Hand-written lists (DEVELOPERS.md, "Forecast table" and "Add a level factor"): the draw order
    of the samplers, the posterior's roles, the common factor of the refits' total check and the
    measured-sd layout terms, each derived from the specification."""
    assert [f.name for f in DRAWN] == ["network", "flight", "week", "network_week", "common"]
    assert [f.name for f in persistent()] == ["network", "flight", "common"]
    assert [f.name for f in weekly_shared()] == ["network_week"]
    assert [f.name for f in own()] == ["week"]
    assert [f.name for f in LEVEL_FACTORS if f.shared_by_all] == ["common"]
    assert [group_keys(f) for f in DRAWN] == [["network"], ["zone", "network", "daypart"],
                                            ["zone", "network", "daypart", "week"], ["network", "week"], []]
    assert [layout_term(f) for f in LEVEL_FACTORS if f.measured] == ["network", "network_week", "unit", "own"]
