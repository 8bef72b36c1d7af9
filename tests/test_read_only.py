"""A read-only scenario folder (issue 19): commands that only read work; a fit that cannot write
its forecast says where and exits 2, before fitting."""
from __future__ import annotations

import json
import shutil
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from test_book import read_only, synthetic_forecast, use_forecast  # noqa: E402


def _cli(capsys, *argv):
    from planner.cli import main

    code = main([str(a) for a in argv])
    out = capsys.readouterr()
    return code, out.out, out.err


def test_read_only_commands_work_and_a_fit_that_cannot_write_exits_2(small_scenario, scenario_copy, monkeypatch,
                                                                      capsys):
    from planner.scenario import load_scenario

    folder = scenario_copy(small_scenario)
    shutil.rmtree(folder / "forecast", ignore_errors=True)  # a fit would have to make it
    scn = load_scenario(folder)
    use_forecast(monkeypatch, synthetic_forecast(scn))
    assert _cli(capsys, "book", "commit", folder, "small-comfortable", "--solver", "highs")[0] == 0
    code, out, _ = _cli(capsys, "check", folder, "small-tight", "--solver", "highs", "--json")
    want = json.loads(out)
    monkeypatch.undo()  # the real forecast job for the fit below
    use_forecast(monkeypatch, synthetic_forecast(scn))
    with read_only(folder):
        code, out, err = _cli(capsys, "check", folder, "small-tight", "--solver", "highs", "--json")
        assert code == 0, err
        got = json.loads(out)
        assert (got["max_guarantee"], got["held_spots_excluded"]) == (want["max_guarantee"], want["held_spots_excluded"])
        code, out, err = _cli(capsys, "book", "list", folder, "--json")
        assert code == 0 and [d["name"] for d in json.loads(out)["deals"]] == ["small-comfortable"], err
        code, out, err = _cli(capsys, "stress", folder, "--draws", 2000, "--json")
        assert code == 0, err
        monkeypatch.undo()
        code, out, err = _cli(capsys, "forecast", "fit", folder)
        assert code == 2, err
        last = err.strip().splitlines()[-1]  # after the progress line
        assert last.startswith(f"error: {folder / 'forecast'}: cannot write the fitted forecast here"), err
        assert "Traceback" not in err and not (folder / "forecast").exists()
