"""Scenario loader: boundary validation (one message per bad input), dayparts, deals, history."""
from __future__ import annotations

import json
import os
import re
from datetime import date

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute  # noqa: F401 - pa.compute
import pyarrow.parquet as pq
import pytest

from planner.cli import main
from planner.errors import InputError, ScenarioError
from planner.workflows import open_scenario
from planner.scenario import (DEFAULT_CONFIDENCE, daypart_quarter_hours, history_fingerprint, load_history,
                              load_scenario, parse_clock, validate_history)


# ----------------------------------------------------------------------------- mutation helpers

def _edit_text(folder, name, old, new, count=1):
    p = folder / name
    text = p.read_text()
    assert old in text, f"{old!r} not in {name}"
    p.write_text(text.replace(old, new, count))


def _edit_csv(folder, name, fn):
    p = folder / name
    df = pd.read_csv(p, dtype=str, keep_default_na=False)
    df = fn(df)
    df.to_csv(p, index=False)


def _set_cell(name, row, col, value):
    """Set 0-based data row `row`, column `col` of a CSV to `value`."""
    def fn(folder):
        def f(df):
            df.loc[row, col] = value
            return df
        _edit_csv(folder, name, f)
    return fn


def _edit_history(fn):
    def mutate(folder):
        p = folder / "history.parquet"
        t = pq.read_table(p).slice(0, 30_000).to_pandas()  # a small file keeps the test fast
        t = fn(t)
        pq.write_table(pa.Table.from_pandas(t, preserve_index=False), p)
    return mutate


def _deal(folder, name="comfortable.toml"):
    return folder / "deals" / name


def _write_deal(folder, text, name="extra.toml"):
    (folder / "deals" / name).write_text(text)


_GOOD_DEAL = """name = "{name}"
advertiser = "Example Grocer (invented)"
demo = "hh"
impressions = 100_000
first_week = 1
last_week = 2
price_cpm = 15.0
{extra}
"""


def _extra_deal(extra="", name="extra-deal"):
    return lambda f: _write_deal(f, _GOOD_DEAL.format(name=name, extra=extra))


def _drop_zone_demo(folder):
    _edit_csv(folder, "universes.csv", lambda df: df[~((df["zone"] == "wyncote-east") & (df["demo"] == "a25-54"))])


def _dup_inventory(folder):
    _edit_csv(folder, "inventory.csv", lambda df: pd.concat([df, df.iloc[[2]]], ignore_index=True))


def _dup_zone(folder):
    _edit_csv(folder, "zones.csv", lambda df: pd.concat([df, df.iloc[[0]]], ignore_index=True))


def _drop_column(name, col):
    return lambda folder: _edit_csv(folder, name, lambda df: df.drop(columns=[col]))


def _no_history_no_generator(folder):
    (folder / "history.parquet").unlink()
    text = (folder / "scenario.toml").read_text()
    (folder / "scenario.toml").write_text(text.split("[history_generator]")[0])


def _dup_deal_name(folder):
    text = _deal(folder).read_text()
    _write_deal(folder, text, "copy-of-comfortable.toml")


def _history_dup(t):
    return pd.concat([t, t.iloc[[10]]], ignore_index=True)


def _history_set(col, value, row=5):
    def fn(t):
        if col == "network":
            t[col] = t[col].astype(object)
        t.loc[row, col] = value
        return t
    return fn


def _history_csv_bad_date(folder):
    t = pq.read_table(folder / "history.parquet").slice(0, 5000).to_pandas()
    t["date"] = t["date"].astype(str)
    t.loc[7, "date"] = "2026-02-30"
    t.to_csv(folder / "history.csv", index=False)
    (folder / "history.parquet").unlink()


# (id, mutation, stage, expected message pattern). Stage "load": load_scenario raises;
# "history": validate_history raises. Row numbers are 1-based data rows.
BAD_INPUTS = [
    ("toml-syntax", lambda f: _edit_text(f, "scenario.toml", "weeks = 8", "weeks = = 8"), "load",
     r"scenario\.toml: not valid TOML"),
    ("zones-missing", lambda f: (f / "zones.csv").unlink(), "load", r"zones\.csv: file is missing"),
    ("inventory-missing-column", _drop_column("inventory.csv", "rate"), "load",
     r"inventory\.csv: missing column\(s\) rate"),
    ("avails-negative", _set_cell("inventory.csv", 4, "avails", "-3"), "load",
     r"inventory\.csv row 5: avails must be >= 0, got '-3'"),
    ("avails-fraction", _set_cell("inventory.csv", 6, "avails", "3.5"), "load",
     r"inventory\.csv row 7: avails must be a whole number of spots, got '3\.5'"),
    ("avails-text", _set_cell("inventory.csv", 0, "avails", "many"), "load",
     r"inventory\.csv row 1: avails must be a number, got 'many'"),
    ("rate-negative", _set_cell("inventory.csv", 9, "rate", "-1.5"), "load",
     r"inventory\.csv row 10: rate must be >= 0, got '-1\.5'"),
    ("week-zero", _set_cell("inventory.csv", 2, "week", "0"), "load",
     r"inventory\.csv row 3: week must be a whole plan week 1\.\.8, got '0'"),
    ("week-past-end", _set_cell("inventory.csv", 3, "week", "9"), "load",
     r"inventory\.csv row 4: week must be a whole plan week 1\.\.8, got '9'"),
    ("inventory-unknown-zone", _set_cell("inventory.csv", 0, "zone", "atlantis"), "load",
     r"inventory\.csv row 1: unknown zone \(not in zones\.csv\), got 'atlantis'"),
    ("inventory-unknown-network", _set_cell("inventory.csv", 1, "network", "nowhere-tv"), "load",
     r"inventory\.csv row 2: unknown network \(not in networks\.csv\), got 'nowhere-tv'"),
    ("inventory-unknown-daypart", _set_cell("inventory.csv", 1, "daypart", "brunch"), "load",
     r"inventory\.csv row 2: unknown daypart \(not in the dayparts of scenario\.toml\), got 'brunch'"),
    ("inventory-duplicate-key", _dup_inventory, "load",
     r"inventory\.csv row \d+: duplicate key \(zone=.*week=3\), first seen at row 3"),
    ("inventory-preempt",
     lambda f: _edit_csv(f, "inventory.csv", lambda df: df.assign(preempt_rate=["1.2"] + [""] * (len(df) - 1))),
     "load", r"inventory\.csv row 1: preempt_rate must be a number with 0 <= p < 1, got '1\.2'"),
    ("inventory-blank", _set_cell("inventory.csv", 0, "rate", ""), "load", r"inventory\.csv row 1: rate is empty"),
    ("zones-duplicate", _dup_zone, "load", r"zones\.csv row 4: duplicate key \(zone=.*\), first seen at row 1"),
    ("universe-lacking-demo", _drop_zone_demo, "load",
     r"universes\.csv: zone 'wyncote-east' has no row for demo\(s\) a25-54"),
    ("universe-zero", _set_cell("universes.csv", 1, "universe", "0"), "load",
     r"universes\.csv row 2: universe must be a positive number, got '0'"),
    ("universe-unknown-zone", _set_cell("universes.csv", 0, "zone", "atlantis"), "load",
     r"universes\.csv row 1: unknown zone"),
    ("daypart-overlap", lambda f: _edit_text(f, "scenario.toml", 'end = "23:00"', 'end = "23:30"'), "load",
     r"dayparts 'prime' and 'late_fringe' overlap \(mon 23:00\)"),
    ("daypart-overlap-wrap", lambda f: _edit_text(f, "scenario.toml", 'end = "01:00"', 'end = "01:30"'), "load",
     r"dayparts 'late_fringe' and 'overnight' overlap \(mon 01:00\)"),
    ("daypart-off-quarter", lambda f: _edit_text(f, "scenario.toml", 'start = "20:00"', 'start = "20:10"'),
     "load", r"daypart 5 \('prime'\): start: clock time must be on a quarter-hour.*'20:10'"),
    ("daypart-bad-day", lambda f: _edit_text(f, "scenario.toml", '"sun"]', '"sunday", "funday"]'), "load",
     r"daypart 1 \('early_morning'\): unknown day 'funday'"),
    ("first-week-not-monday", lambda f: _edit_text(f, "scenario.toml", "first_week = 2026-06-22",
                                                   "first_week = 2026-06-24"), "load",
     r"scenario\.toml: first_week 2026-06-24 is a wed, not a Monday"),
    ("first-week-unparsable", lambda f: _edit_text(f, "scenario.toml", "first_week = 2026-06-22",
                                                   'first_week = "2026-13-45"'), "load",
     r"scenario\.toml: first_week: date does not parse"),
    ("preempt-one", lambda f: _edit_text(f, "scenario.toml", "preempt_rate = 0.03", "preempt_rate = 1.0"), "load",
     r"scenario\.toml: preempt_rate must be a number with 0 <= p < 1, got 1\.0"),
    ("weeks-zero", lambda f: _edit_text(f, "scenario.toml", "weeks = 8", "weeks = 0"), "load",
     r"scenario\.toml: weeks must be a whole number >= 1, got 0"),
    ("deal-unknown-demo", lambda f: _edit_text(f, "deals/comfortable.toml", 'demo = "a25-54"', 'demo = "w18-34"'),
     "load", r"deals/comfortable\.toml: demo 'w18-34' is unknown"),
    ("deal-week-outside", lambda f: _edit_text(f, "deals/comfortable.toml", "last_week = 8", "last_week = 14"),
     "load", r"deals/comfortable\.toml: last_week must be a plan week 1\.\.8 of the inventory, got 14"),
    # the edge: scenario.toml says weeks = 8, so week 9 is one past the plan (catches an off-by-one bound)
    ("deal-week-one-past-end", lambda f: _edit_text(f, "deals/comfortable.toml", "last_week = 8", "last_week = 9"),
     "load", r"deals/comfortable\.toml: last_week must be a plan week 1\.\.8 of the inventory, got 9"),
    ("deal-weeks-reversed", lambda f: _edit_text(f, "deals/comfortable.toml", "first_week = 1", "first_week = 6")
     or _edit_text(f, "deals/comfortable.toml", "last_week = 8", "last_week = 3"), "load",
     r"deals/comfortable\.toml: first_week 6 is after last_week 3"),
    ("deal-share-outside", _extra_deal("[mix]\ndaypart_min_share = { prime = 1.5 }"), "load",
     r"deals/extra\.toml: \[mix\] daypart_min_share\.prime must be a share in \[0, 1\], got 1\.5"),
    ("deal-min-shares-sum", _extra_deal("[mix]\ndaypart_min_share = { prime = 0.7, daytime = 0.5 }"), "load",
     r"deals/extra\.toml: \[mix\] daypart_min_share shares sum to 1\.2, more than 1"),
    ("deal-guarantee-nonpositive",
     lambda f: _write_deal(f, _GOOD_DEAL.format(name="x", extra="").replace("100_000", "0")), "load",
     r"deals/extra\.toml: impressions \(the guarantee\) must be a positive number, got 0"),
    ("deal-confidence-low", _extra_deal("confidence = 0.4"), "load",
     r"deals/extra\.toml: confidence must be a number in \(0\.5, 0\.999\), got 0\.4"),
    ("deal-confidence-one", _extra_deal("confidence = 1.0"), "load",
     r"deals/extra\.toml: confidence must be a number in \(0\.5, 0\.999\), got 1\.0"),
    ("deal-confidence-and-pad", _extra_deal("confidence = 0.9\npad = 0.1"), "load",
     r"deals/extra\.toml: give either confidence or pad, not both"),
    ("deal-negative-pad", _extra_deal("pad = -0.1"), "load", r"deals/extra\.toml: pad must be a number >= 0"),
    ("deal-duplicate-name", _dup_deal_name, "load",
     r"deals/(copy-of-)?comfortable\.toml: duplicate deal name 'small-comfortable'"),
    ("deal-unknown-mix-key", _extra_deal("[mix]\nmax_netwrk_share = 0.3"), "load",
     r"deals/extra\.toml: \[mix\] unknown key 'max_netwrk_share'"),
    ("deal-misspelt-key", _extra_deal("confidance = 0.99"), "load",
     r"deals/extra\.toml: unknown key 'confidance' \(did you mean 'confidence'\? known: name, "),
    ("deal-unknown-key", _extra_deal("budget = 5"), "load", r"deals/extra\.toml: unknown key 'budget' \(known: "),
    ("deal-exclude-unknown-network", _extra_deal('[mix]\nexclude_networks = ["nowhere-tv"]'), "load",
     r"deals/extra\.toml: \[mix\] exclude_networks: unknown network 'nowhere-tv'"),
    ("deal-mix-unknown-daypart", _extra_deal("[mix]\ndaypart_max_share = { primetime = 0.2 }"), "load",
     r"deals/extra\.toml: \[mix\] daypart_max_share: unknown daypart 'primetime'"),
    ("deal-missing-key", lambda f: _write_deal(f, 'name = "y"\ndemo = "hh"\n'), "load",
     r"deals/extra\.toml: missing key 'advertiser'"),
    ("deal-bad-toml", lambda f: _write_deal(f, 'name = "y\n'), "load", r"deals/extra\.toml: not valid TOML"),
    ("deal-network-share-zero", _extra_deal("[mix]\nmax_network_share = 0"), "load",
     r"deals/extra\.toml: \[mix\] max_network_share must be a share in \(0, 1\], got 0"),
    ("deal-weekly-tolerance-negative", _extra_deal("[mix]\nweekly_tolerance = -0.2"), "load",
     r"deals/extra\.toml: \[mix\] weekly_tolerance must be a number >= 0, got -0\.2"),
    ("deal-max-spots-fraction", _extra_deal("[mix]\nmax_spots_per_unit = 2.5"), "load",
     r"deals/extra\.toml: \[mix\] max_spots_per_unit must be a whole number >= 1, got 2\.5"),
    ("deal-min-above-max", _extra_deal("[mix]\ndaypart_min_share = { prime = 0.4 }\ndaypart_max_share = { prime = 0.2 }"),
     "load", r"deals/extra\.toml: \[mix\] daypart 'prime': min share 0\.4 is above max share 0\.2"),
    ("deal-impressions-text", lambda f: _write_deal(f, _GOOD_DEAL.format(name="x", extra="").replace(
        "100_000", '"lots"')), "load", r"deals/extra\.toml: impressions \(the guarantee\) must be a positive number"),
    ("inventory-no-rows", lambda f: _edit_csv(f, "inventory.csv", lambda df: df.iloc[:0]), "load",
     r"inventory\.csv: no rows \(nothing can be bought\)"),
    ("no-scenario-toml", lambda f: (f / "scenario.toml").unlink(), "load",
     r"copy: not a scenario folder \(scenario\.toml is missing\)"),
    ("networks-duplicate", lambda f: _edit_csv(f, "networks.csv", lambda df: pd.concat([df, df.iloc[[1]]])), "load",
     r"networks\.csv row 4: duplicate key \(network=driftmoor-drama\), first seen at row 2"),
    ("zones-blank-market", _set_cell("zones.csv", 2, "market", ""), "load", r"zones\.csv row 3: market is empty"),
    ("daypart-same-start-end", lambda f: _edit_text(f, "scenario.toml", 'end = "09:00"', 'end = "06:00"'), "load",
     r"daypart 1 \('early_morning'\): start and end are the same clock time"),
    ("daypart-duplicate-name", lambda f: _edit_text(f, "scenario.toml", 'name = "daytime"', 'name = "prime"'),
     "load", r"daypart 5 \('prime'\): duplicate daypart name 'prime'"),
    ("daypart-bad-name", lambda f: _edit_text(f, "scenario.toml", 'name = "daytime"', 'name = "Day Time"'),
     "load", r"daypart 2 \('Day Time'\): name must be a lower-case identifier"),
    ("generator-bad-seed", lambda f: _edit_text(f, "scenario.toml", "seed = 11", 'seed = "eleven"'), "load",
     r"scenario\.toml \[history_generator\]: seed must be an integer, got 'eleven'"),
    ("generator-unknown-short", lambda f: _edit_text(f, "scenario.toml", '[["pellham-lower"', '[["atlantis"'),
     "load", r"short_history \['atlantis', 'marbleberry-kids'\] names an unknown zone or network"),
    ("deal-terms-unknown-key", _extra_deal("[terms]\nthreshhold = 0.9"), "load",
     r"deals/extra\.toml: \[terms\] unknown key 'threshhold' \(did you mean 'threshold'\? known: settlement, "),
    ("deal-terms-settlement", _extra_deal('[terms]\nsettlement = "barter"'), "load",
     r"deals/extra\.toml: \[terms\] settlement must be one of units, cash, both, got 'barter'"),
    ("deal-terms-threshold-above-one", _extra_deal("[terms]\nthreshold = 1.1"), "load",
     r"deals/extra\.toml: \[terms\] threshold must be a fraction of the guarantee, 0 < t <= 1, got 1\.1"),
    ("deal-terms-cap-zero", _extra_deal("[terms]\ncap = 0"), "load",
     r"deals/extra\.toml: \[terms\] cap must be a fraction of the guarantee, 0 < c <= 1, got 0"),
    ("deal-terms-window-fraction", _extra_deal("[terms]\nwindow_weeks = 2.5"), "load",
     r"deals/extra\.toml: \[terms\] window_weeks must be a whole number of weeks 1\.\.52, got 2\.5"),
    ("deal-terms-not-table", _extra_deal('terms = "units"'), "load", r"deals/extra\.toml: \[terms\] must be a table"),
    ("scenario-terms-unknown-key", lambda f: _edit_text(f, "scenario.toml", "[history_generator]",
                                                        "[terms]\nwindow = 4\n\n[history_generator]"), "load",
     r"scenario\.toml: \[terms\] unknown key 'window' \(did you mean 'window_weeks'\?"),
    ("history-none", _no_history_no_generator, "load", r"history\.parquet: file is missing"),
    ("history-missing-column", _edit_history(lambda t: t.drop(columns=["rating"])), "load",
     r"history\.parquet: missing column\(s\) rating"),
    ("history-rating-above-one", _edit_history(_history_set("rating", 1.5, row=5)), "history",
     r"history\.parquet row 6: rating must be a fraction in \[0, 1\], got '1\.5'"),
    ("history-rating-negative", _edit_history(_history_set("rating", -0.01, row=0)), "history",
     r"history\.parquet row 1: rating must be a fraction in \[0, 1\]"),
    ("history-unknown-network", _edit_history(_history_set("network", "nowhere-tv", row=3)), "history",
     r"history\.parquet row 4: unknown network \(not in networks\.csv\), got 'nowhere-tv'"),
    ("history-quarter-hour", _edit_history(_history_set("quarter_hour", 96, row=2)), "history",
     r"history\.parquet row 3: quarter_hour must be a whole number 0\.\.95, got '96'"),
    ("history-duplicate-key", _edit_history(_history_dup), "history",
     r"history\.parquet: duplicate key \(zone=.*quarter_hour=\d+\) appears 2 times"),
    ("history-csv-bad-date", _history_csv_bad_date, "history",
     r"history\.csv row 8: date does not parse \(use YYYY-MM-DD\), got '2026-02-30'"),
]


@pytest.mark.parametrize("mutate,stage,pattern", [b[1:] for b in BAD_INPUTS], ids=[b[0] for b in BAD_INPUTS])
def test_bad_input_message(small_scenario, scenario_copy, mutate, stage, pattern):
    folder = scenario_copy(small_scenario)
    mutate(folder)
    if stage == "load":
        with pytest.raises(ScenarioError) as err:
            load_scenario(folder)
    else:
        sc = load_scenario(folder)
        with pytest.raises(ScenarioError) as err:
            validate_history(sc)
    assert isinstance(err.value, InputError)  # the CLI turns it into exit 2
    assert re.search(pattern, str(err.value)), str(err.value)


def test_at_least_twenty_distinct_bad_inputs():
    assert len({b[0] for b in BAD_INPUTS}) >= 20
    assert len({b[3] for b in BAD_INPUTS}) == len(BAD_INPUTS)


def test_several_problems_collected(small_scenario, scenario_copy):
    folder = scenario_copy(small_scenario)
    _set_cell("inventory.csv", 0, "avails", "-1")(folder)
    _set_cell("inventory.csv", 1, "rate", "-2")(folder)
    with pytest.raises(ScenarioError) as err:
        load_scenario(folder)
    assert str(err.value).startswith("2 problems:")
    assert len(err.value.problems) == 2


# ----------------------------------------------------------------------------- loader results

def test_small_scenario_loads(small_scenario):
    sc = load_scenario(small_scenario)
    assert sc.weeks == 8 and len(sc.dayparts) == 7
    assert sc.demos == ["hh", "a25-54"]
    inv = sc.inventory
    assert list(inv.columns) == ["zone", "network", "daypart", "week", "avails", "rate", "preempt_rate"]
    assert inv["avails"].dtype.kind == "i" and inv["week"].dtype.kind == "i"
    assert (inv["preempt_rate"] == 0.03).all()  # the scenario default filled in
    assert set(inv["week"]) == set(range(1, 9))
    assert len(inv) == len(sc.zones) * len(sc.networks) * 7 * 8
    assert sc.universe("pellham-upper", "hh") == 700_000


def test_wrapping_daypart_quarter_hours(small_scenario):
    sc = load_scenario(small_scenario)
    late = sc.daypart("late_fringe")  # 23:00-01:00 belongs to the day it starts on
    assert late.quarter_hours == tuple(range(92, 100))
    assert late.wraps and late.hours == 2.0
    night = sc.daypart("overnight")
    assert night.quarter_hours == tuple(range(4, 24)) and not night.wraps
    # The seven dayparts tile the whole week exactly once (6:00..6:00 with no gap, no overlap).
    slots = [s for d in sc.dayparts for s in d.slots()]
    assert sorted(slots) == list(range(7 * 96))


def test_clock_parsing():
    assert parse_clock("00:00") == 0 and parse_clock("23:45") == 95 and parse_clock("06:15") == 25
    assert parse_clock("24:00", allow_24=True) == 96
    with pytest.raises(ValueError):
        parse_clock("24:00")
    with pytest.raises(ValueError):
        parse_clock("7:05")
    assert daypart_quarter_hours(88, 96) == tuple(range(88, 96))  # 22:00-24:00 does not wrap
    assert daypart_quarter_hours(92, 0) == tuple(range(92, 96))  # 23:00-00:00 wraps to the midnight


def test_deal_terms_defaults_and_overrides(small_scenario, scenario_copy):
    """Faults caught: scenario.toml's [terms] not reaching a deal without its own, a deal's key not
    overriding it, or a key the deal leaves out not inherited. Expected values are the ones written
    in the files here (defaults when neither says: planner.terms.Terms())."""
    from planner.terms import Terms

    plain = load_scenario(small_scenario)
    assert plain.terms == Terms() and all(d.terms == Terms() for d in plain.deals.values())  # files stay valid
    folder = scenario_copy(small_scenario)
    _edit_text(folder, "scenario.toml", "[history_generator]",
               '[terms]\nsettlement = "cash"\nthreshold = 0.9\ncap = 0.5\n\n[history_generator]')
    _extra_deal('[terms]\nsettlement = "units"\nwindow_weeks = 6')(folder)
    sc = load_scenario(folder)
    assert sc.terms == Terms(settlement="cash", threshold=0.9, window_weeks=4, cap=0.5)
    assert sc.deals["small-comfortable"].terms == sc.terms
    assert sc.deals["extra-deal"].terms == Terms(settlement="units", threshold=0.9, window_weeks=6, cap=0.5)


def test_bad_terms_exit_two_naming_file_and_key(small_scenario, scenario_copy, capsys):
    """Fault caught: a bad [terms] key reaching the user as a traceback or exit 1 (the CLI must say
    which file and key, exit status 2)."""
    folder = scenario_copy(small_scenario)
    _extra_deal("[terms]\ncap = 2")(folder)
    assert main(["validate", str(folder)]) == 2
    err = capsys.readouterr().err
    assert "deals/extra.toml: [terms] cap must be a fraction" in err


def test_deal_risk_defaults(small_scenario):
    sc = load_scenario(small_scenario)
    tight = sc.deals["small-tight"]  # the file gives neither confidence nor pad
    assert tight.confidence == DEFAULT_CONFIDENCE == 0.95 and tight.pad is None and tight.risk_default_used
    big = sc.deals["small-too-big"]
    assert big.pad == pytest.approx(0.1) and big.confidence is None and not big.risk_default_used
    comf = sc.deals["small-comfortable"]
    assert comf.confidence == 0.95 and not comf.risk_default_used
    assert comf.mix.max_network_share == 0.6 and comf.weeks == list(range(1, 9))
    # Common practice: revenue = impressions / 1000 x CPM.
    assert comf.revenue == pytest.approx(comf.impressions / 1000 * comf.price_cpm)


def test_week_start(small_scenario):
    sc = load_scenario(small_scenario)
    assert sc.week_start(1) == sc.first_week == date(2026, 6, 22)
    assert sc.week_start(3) == date(2026, 7, 6)
    assert sc.week_end(1) == date(2026, 6, 28)
    assert all(sc.week_start(w).weekday() == 0 for w in range(1, sc.weeks + 1))


def test_validate_history_summary(small_scenario):
    sc = load_scenario(small_scenario)
    h = validate_history(sc)
    full = len(sc.zones) * len(sc.networks) * 2 * 420 * 96
    assert h.series == len(sc.zones) * len(sc.networks) * 2
    assert h.days == 420 and h.end == date(2026, 5, 31)
    assert 0.8 * full < h.rows < full
    assert h.completeness == pytest.approx(h.rows / full)
    assert 0 < h.zero_share < 0.5
    assert len(h.short_series) == 2  # one zone x network, both demos
    assert h.missing_series == []


def test_validate_history_names_sold_series_without_history(small_scenario, scenario_copy):
    folder = scenario_copy(small_scenario)
    t = pq.read_table(folder / "history.parquet")
    keep = pa.compute.invert(pa.compute.and_(pa.compute.equal(t["zone"], "wyncote-east"),
                                             pa.compute.equal(t["demo"], "a25-54")))
    pq.write_table(t.filter(keep), folder / "history.parquet")
    h = validate_history(load_scenario(folder))
    assert sorted(x["network"] for x in h.missing_series) == sorted(load_scenario(folder).network_names)
    assert {(x["zone"], x["demo"]) for x in h.missing_series} == {("wyncote-east", "a25-54")}


def test_history_csv_accepted(small_scenario, scenario_copy):
    folder = scenario_copy(small_scenario)
    t = pq.read_table(folder / "history.parquet").slice(0, 20_000).to_pandas()
    t.to_csv(folder / "history.csv", index=False)
    (folder / "history.parquet").unlink()
    sc = load_scenario(folder)
    assert sc.history_path.name == "history.csv"
    assert validate_history(sc).rows == 20_000
    df = load_history(sc)
    assert len(df) == 20_000 and df["date"].dtype.kind == "M"
    assert (df["rating"].to_numpy() == t["rating"].to_numpy()).all()


def test_load_history_columns_and_filters(small_scenario):
    sc = load_scenario(small_scenario)
    df = load_history(sc, columns=["zone", "date", "quarter_hour", "rating"], filters=[("demo", "=", "hh")])
    assert list(df.columns) == ["zone", "date", "quarter_hour", "rating"]
    assert df["quarter_hour"].dtype == "int16" and df["rating"].dtype == "float32"
    assert df["date"].dtype.kind == "M"
    everything = load_history(sc, columns=["demo"])
    assert len(df) == int((everything["demo"] == "hh").sum()) > 0


def test_history_fingerprint_changes(small_scenario, scenario_copy):
    folder = scenario_copy(small_scenario)
    sc = load_scenario(folder)
    a = history_fingerprint(sc)
    assert a == history_fingerprint(load_scenario(folder))
    st = os.stat(sc.history_path)
    os.utime(sc.history_path, ns=(st.st_atime_ns, st.st_mtime_ns + 1_000_000_000))
    assert history_fingerprint(sc) != a


def test_history_generated_on_first_use(small_scenario, scenario_copy):
    folder = scenario_copy(small_scenario)
    original = pq.read_table(folder / "history.parquet")
    (folder / "history.parquet").unlink()
    sc = open_scenario(folder)
    assert sc.history_path.is_file()
    assert pq.read_table(sc.history_path).equals(original)  # seeded: the same history again


# ----------------------------------------------------------------------------- CLI

def test_cli_validate_ok_json(small_scenario, capsys):
    code = main(["validate", str(small_scenario), "--json"])
    assert code == 0
    out = json.loads(capsys.readouterr().out)
    assert out["zones"] == 3 and out["markets"] == 2 and out["networks"] == 3
    assert [d["name"] for d in out["dayparts"]][4] == "prime"
    assert out["dayparts"][5] == {"name": "late_fringe", "start": "23:00", "end": "01:00", "hours_per_day": 2.0,
                                  "days": 7, "wraps_midnight": True}
    assert out["units"] == 3 * 3 * 7 and len(out["deals"]) == 3
    assert 0.8 < out["history"]["completeness"] < 1.0
    assert {(x["zone"], x["network"]) for x in out["history"]["short_series_list"]} == {
        ("pellham-lower", "marbleberry-kids")}


def test_cli_validate_bad_exits_2(small_scenario, scenario_copy, capsys):
    folder = scenario_copy(small_scenario)
    _set_cell("inventory.csv", 4, "avails", "-3")(folder)
    assert main(["validate", str(folder)]) == 2
    err = capsys.readouterr().err
    assert "inventory.csv row 5: avails must be >= 0" in err and "Traceback" not in err


def test_cli_validate_missing_folder(tmp_path, capsys):
    assert main(["validate", str(tmp_path / "nope")]) == 2


def test_generated_history_remade_when_settings_change(small_scenario, scenario_copy):
    folder = scenario_copy(small_scenario)
    before = pq.read_table(folder / "history.parquet")
    text = (folder / "scenario.toml").read_text()
    (folder / "scenario.toml").write_text(text.replace("seed = 11", "seed = 12"))
    after = pq.read_table(open_scenario(folder).history_path)
    assert not after.equals(before)
    # A history the generator did not make is never replaced.
    user = folder / "history.parquet"
    pq.write_table(before.replace_schema_metadata(None), user)
    open_scenario(folder)
    assert pq.read_table(user).equals(before.replace_schema_metadata(None))


def test_dayparts_on_different_days_do_not_overlap(small_scenario, scenario_copy):
    folder = scenario_copy(small_scenario)
    _edit_text(folder, "scenario.toml", 'name = "daytime"\nstart = "09:00"\nend = "16:00"\n'
               'days = ["mon", "tue", "wed", "thu", "fri", "sat", "sun"]',
               'name = "daytime"\nstart = "09:00"\nend = "16:00"\ndays = ["mon", "tue", "wed", "thu", "fri"]\n\n'
               '[[daypart]]\nname = "weekend_day"\nstart = "09:00"\nend = "16:00"\ndays = ["sat", "sun"]')
    sc = load_scenario(folder)
    assert sc.daypart("daytime").days == (0, 1, 2, 3, 4) and sc.daypart("weekend_day").days == (5, 6)
    assert sorted(s for d in sc.dayparts for s in d.slots()) == list(range(7 * 96))


def test_cli_validate_text(small_scenario, capsys):
    assert main(["validate", str(small_scenario)]) == 0
    out = capsys.readouterr().out
    assert "late_fringe 23:00-01:00" in out and "completeness" in out and "small-tight" in out
    assert "estimates" in out  # the caution travels with the summary


def test_history_rows_in_any_order(small_scenario, scenario_copy):
    folder = scenario_copy(small_scenario)
    t = pq.read_table(folder / "history.parquet").slice(0, 30_000)
    shuffled = t.take(pa.array(np.random.default_rng(0).permutation(t.num_rows)))
    pq.write_table(shuffled, folder / "history.parquet")
    h = validate_history(load_scenario(folder))
    assert h.rows == 30_000


def test_csv_with_byte_order_mark_and_non_utf8(small_scenario, scenario_copy):
    folder = scenario_copy(small_scenario)
    text = (folder / "zones.csv").read_text()
    (folder / "zones.csv").write_bytes(b"\xef\xbb\xbf" + text.encode())  # spreadsheet exports add a BOM
    assert len(load_scenario(folder).zones) == 3
    (folder / "zones.csv").write_bytes(text.replace("pellham", "p\xe9llham").encode("latin-1"))
    with pytest.raises(ScenarioError, match=r"zones\.csv: not UTF-8 text"):
        load_scenario(folder)
