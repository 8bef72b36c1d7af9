"""What the desk reads (issue 19): the answer first, the forecast's long caution once and brief,
labels that say their units, lines that are not wrapped when piped."""
from __future__ import annotations

import json
import sys
from pathlib import Path

import pandas as pd
import pytest

sys.path.insert(0, str(Path(__file__).resolve().parent))
from test_book import synthetic_forecast, use_forecast  # noqa: E402

FULL_ONLY = "(README, Cautions)"  # a phrase of the caution's whole text only


def _cli(capsys, *argv):
    from planner.cli import main

    code = main([str(a) for a in argv])
    out = capsys.readouterr()
    return code, out.out, out.err


@pytest.fixture()
def cautioned(small_scenario, scenario_copy, monkeypatch):
    """A copy of the small scenario whose (invented) fit calls for the shared-error caution, with
    one deal committed; the forecast table is the invented synthetic one."""
    from planner import book as bk
    from planner.scenario import load_scenario

    folder = scenario_copy(small_scenario)
    scn = load_scenario(folder)
    fc = synthetic_forecast(scn)
    use_forecast(monkeypatch, fc)
    (folder / "forecast").mkdir(exist_ok=True)
    fc.to_parquet(folder / "forecast" / "forecast.parquet")
    meta = {"fit": {"calibration": {"total_z_p": 0.003, "total_excess_sd": 0.021,
                                    "leave_one_fold_out_total": {"a": {}, "b": {}, "c": {}}},
                    "level_error": {"rel_sd_common": 0.065}}}
    (folder / "forecast" / "meta.json").write_text(json.dumps(meta))
    assert bk.commit_deal(scn, "small-comfortable", forecast=fc, solver="highs").committed
    return folder, scn, fc


def test_the_forecasts_caution_is_printed_once_in_two_lines_and_whole_in_json(cautioned, capsys):
    """QA finding: the same 6-7-line caution followed every answer (check: 16 answer lines, 10
    caution lines). Answers now print it once, in at most two 80-column lines, pointing to
    `pledge forecast fit` and the report; --json keeps the whole text."""
    from planner.forecast_job import forecast_caution

    folder, scn, fc = cautioned
    full = forecast_caution(scn, folder)
    brief = forecast_caution(scn, folder, brief=True)
    assert FULL_ONLY in full and len("caution: " + brief) <= 160
    assert "pledge forecast fit" in brief and "report" in brief
    runs = {"check": ["check", folder, "small-tight", "--solver", "highs"],
            "plan": ["plan", folder, "small-tight", "--solver", "highs", "--out", folder / "p.csv"],
            "stress": ["stress", folder, "--draws", 2000],
            "report": ["report", folder, "--out", folder / "r.html", "--draws", 2000, "--solver", "highs"]}
    for name, argv in runs.items():
        code, out, err = _cli(capsys, *argv)
        assert code == 0, (name, err)
        assert out.count("refits missed") == 1 and FULL_ONLY not in out, (name, out)
        assert any(brief in line and len(line) <= 160 for line in out.splitlines()), name
        code, out, _ = _cli(capsys, *argv, "--json")
        assert FULL_ONLY in out and full in json.dumps(json.loads(out)), name
    assert FULL_ONLY in (folder / "r.html").read_text()  # the report has the whole text


def test_piped_output_is_not_wrapped(cautioned, capsys):
    """QA finding: piped output was wrapped at 80 columns and split figures from their labels
    ("VaR95 USD" / "15,711"). Not a terminal: one line per statement."""
    folder, _, _ = cautioned
    code, out, _ = _cli(capsys, "stress", folder, "--draws", 2000)
    book = next(line for line in out.splitlines() if line.startswith("book: expected liability"))
    assert "VaR95 USD " in book and "CVaR95 USD " in book and book.rstrip()[-1].isdigit()
    code, out, _ = _cli(capsys, "check", folder, "small-tight", "--solver", "highs")
    caution = next(line for line in out.splitlines() if line.startswith("Forecasts are estimates"))
    assert caution.rstrip().endswith("before committing.")
