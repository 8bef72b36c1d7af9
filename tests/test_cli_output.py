"""What the desk reads (issue 19): the answer first, the forecast's long caution once and brief,
labels that say their units, lines that are not wrapped when piped."""
from __future__ import annotations

import json
import sys
from pathlib import Path

import pytest

from planner import workflows as wf

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
    assert wf.commit_deal(scn, "small-comfortable", forecast=fc, solver="highs").committed
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


def test_one_default_draw_count_for_stress_report_and_demo():
    """QA finding: report and demo drew 20,000 times, stress 100,000: one book, two answers
    (VaR95 USD 15,711 against 18,443). One default everywhere."""
    import inspect

    import typer

    from planner.cli import app
    from planner.workflows import run_demo
    from planner.workflows import build_report
    from planner.stress import DEFAULT_DRAWS
    from planner.workflows import stress_book

    cmd = typer.main.get_command(app)
    defaults = {name: next(p.default for p in cmd.commands[name].params if p.name == "draws")
                for name in ("stress", "report", "demo")}
    api = {f.__name__: inspect.signature(f).parameters["draws"].default for f in (stress_book, build_report, run_demo)}
    assert set(defaults.values()) | set(api.values()) == {DEFAULT_DRAWS}, (defaults, api)


def test_the_report_gives_var_and_cvar_with_standard_errors_and_names_the_basis(cautioned, capsys):
    from test_report import report_fields

    folder, _, _ = cautioned
    code, out, _ = _cli(capsys, "report", folder, "--out", folder / "r.html", "--draws", 4000, "--seed", 3,
                        "--solver", "highs")
    assert code == 0
    code, st, _ = _cli(capsys, "stress", folder, "--draws", 4000, "--seed", 3, "--json")
    book = json.loads(st)["book"]
    fields = report_fields(folder / "r.html").fields
    for key in ("expected_liability", "var95", "cvar95"):
        assert float(fields[("_book", key + "_se")]) == pytest.approx(book[key + "_se"], rel=1e-9)
    line = next(x for x in out.splitlines() if x.startswith("book: "))
    assert f"VaR95 USD {book['var95']:,.0f} +- {book['var95_se']:,.0f}" in line
    assert f"CVaR95 USD {book['cvar95']:,.0f} +- {book['cvar95_se']:,.0f}" in line
    assert "refund basis" in line


def test_liability_labels_name_their_units_and_basis(cautioned, capsys):
    """QA findings: "exp. shortfall" (impressions) sat under a caption saying money in USD; the
    report's histogram was titled make-good liability on a refund basis."""
    import numpy as np

    from planner import plots

    folder, _, _ = cautioned
    code, out, _ = _cli(capsys, "stress", folder, "--draws", 2000)
    header = next(x for x in out.splitlines() if "exp. shortfall" in x)
    assert "exp. shortfall (imp.)" in header and "exp. liability (USD)" in header
    draws = np.random.default_rng(0).exponential(1000.0, 500)
    refund = plots.liability_svg(draws, 2000.0, 3000.0, "USD", "refund")
    makegood = plots.liability_svg(draws, 2000.0, 3000.0, "USD", "makegood")
    assert "Refund liability" in refund and "Make-good" not in refund
    assert "Make-good liability" in makegood and "Refund" not in makegood
