"""The whole job on the invented demo scenario, in one call.

`run_demo(out)` copies the demo scenario into a working folder, fits the forecasts (or reuses a
fit already there), checks every demo deal, commits the deliverable ones to the folder's book,
stress-tests the book and writes the HTML report. Re-running on the same folder reuses the
scenario and the fitted forecast, and rebuilds the demo's book from scratch (the demo deals a
previous run committed are released first), so a re-run gives the same numbers. A folder that
exists but is not a demo folder is refused.
"""
from __future__ import annotations

import contextlib
import json
import time
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, ContextManager

from planner import forecast_job
from planner.atomic import write_text_atomic, write_with_atomic
from planner.book import get_deal, held_spots, list_deals, release_deal
from planner.deals import check_solver, plan_result
from planner.errors import InputError
from planner.hindcast import cached_hindcast, hindcast_scenario
from planner.plain import plain
from planner.report import write_report
from planner.scenario import load_scenario
from planner.stress import DEFAULT_DRAWS
from planner.workflows.deal import commit_deal, plan_deal, run_deal
from planner.workflows.report import build_report
from planner.workflows.stress import stress_book
from scenarios.actuals import posted_actuals
from scenarios.folders import copy_demo, demo_path

DEFAULT_FOLDER = "pledge-demo"
REPORT_NAME = "report.html"
SUMMARY_NAME = "demo-summary.json"
DEFAULT_SEED = 0
EXAMPLE_WEEKS = 4  # weeks of invented posted actuals the demo leaves for `pledge rebalance`


@dataclass
class DemoResult:
    """What a demo run did. Money in the scenario currency, impressions in each deal's demo."""

    folder: Path
    report: Path
    scenario: str
    currency: str
    reused_folder: bool
    reused_forecast: bool
    checks: dict[str, dict]
    committed: list[str]
    not_committed: dict[str, str]
    released: list[str]
    stress: dict | None
    seconds: dict[str, float] = field(default_factory=dict)
    draws: int = DEFAULT_DRAWS
    seed: int = DEFAULT_SEED
    warnings: list[str] = field(default_factory=list)  # cautions about this forecast (the report's)
    # invented posted actuals of a committed deal's first weeks (`example_actuals`), to try rebalance
    actuals_example: Path | None = None
    actuals_deal: str | None = None

    def as_dict(self) -> dict:
        return {
            "folder": str(self.folder), "report": str(self.report), "scenario": self.scenario,
            "currency": self.currency, "reused_folder": self.reused_folder,
            "reused_forecast": self.reused_forecast, "checks": self.checks, "committed": self.committed,
            "not_committed": self.not_committed, "released_before_rerun": self.released,
            "stress": self.stress, "draws": self.draws, "seed": self.seed, "seconds": self.seconds,
            "warnings": self.warnings,
            "actuals_example": None if self.actuals_example is None else str(self.actuals_example),
            "actuals_deal": self.actuals_deal,
        }


def _null_stage(description: str, total: float | None = None) -> ContextManager:
    @contextlib.contextmanager
    def cm():
        yield lambda n=1, description=None: None

    return cm()


def _demo_name() -> str:
    with open(demo_path() / "scenario.toml", "rb") as fh:
        return str(tomllib.load(fh).get("name", ""))


def prepare_folder(out: str | Path, info: Callable[[str], None] | None = None) -> tuple[Path, bool]:
    """Copy the demo into `out` or reuse a demo folder already there. Returns (folder, reused).

    Raises InputError when `out` is a file, or a non-empty folder that is not a demo folder.
    `info` receives the note that the history is being generated.
    """
    out = Path(out)
    if out.exists() and not out.is_dir():
        raise InputError(f"{out}: exists and is not a folder; choose another --out")
    if out.is_dir() and any(out.iterdir()):
        toml = out / "scenario.toml"
        name = None
        if toml.is_file():
            try:
                with open(toml, "rb") as fh:
                    name = tomllib.load(fh).get("name")
            except (OSError, tomllib.TOMLDecodeError):
                name = None
        if name != _demo_name():
            raise InputError(f"{out}: folder exists and is not a pledge demo folder (no demo scenario.toml); "
                             f"choose another --out or remove it")
        if not (out / "history.parquet").exists():  # a copy interrupted before its history was made
            copy_demo(out, info=info)
        return out, True
    copy_demo(out, info=info)
    return out, False


def _reuse_plan(plan: Any, forecast: Any) -> Callable[..., Any]:
    """A planner for `commit_deal` that hands over the plan already made for these holds the first
    time and plans afresh if the book asks again (another desk committed in between)."""
    calls = {"n": 0}

    def planner(scenario, deal_name, *, held, **kwargs):
        calls["n"] += 1
        if calls["n"] == 1:
            return plan
        return plan_deal(scenario, deal_name, held=held, forecast=forecast, **kwargs)

    return planner


def example_actuals(scenario: Any, deal_name: str, weeks: int = EXAMPLE_WEEKS, seed: int = 0) -> Path:
    """Write invented posted actuals of a committed deal's first `weeks` plan weeks beside the
    scenario (`posted-actuals-DEAL.csv`, the data contract's layout) and return the path.

    The held spots air against the invented generator's simulated future
    (`scenarios.actuals.posted_actuals`), as a station's posting would report them.
    """
    d = get_deal(scenario, deal_name)
    aired = range(d.first_week, min(d.first_week + weeks, d.last_week + 1))
    acts = posted_actuals(scenario, d.holds[["zone", "network", "daypart", "week", "spots"]], d.demo,
                          weeks=aired, seed=seed)
    acts = acts.assign(impressions=acts["impressions"].round())
    path = Path(scenario.path) / f"posted-actuals-{deal_name}.csv"
    return write_with_atomic(path, lambda p: acts.to_csv(p, index=False))




def _check_options(solver: str, draws: int, seed: int) -> None:
    """Every option is checked before the folder or its book is touched."""
    check_solver(solver)
    if int(draws) < 2:
        raise InputError(f"--draws {draws}: need at least 2 draws")
    if int(seed) < 0:
        raise InputError(f"--seed {seed}: must be a whole number >= 0")


def _timer(stage: Callable[..., ContextManager], seconds: dict[str, float]) -> Callable[..., ContextManager]:
    """`timed(key, description, total)`: `stage` around a block, its duration (s) into `seconds[key]`."""

    def timed(key: str, description: str, total: float | None = None):
        @contextlib.contextmanager
        def cm():
            t0 = time.perf_counter()
            with stage(description, total=total) as advance:
                yield advance
            seconds[key] = round(time.perf_counter() - t0, 2)

        return cm()

    return timed


def _fit_and_replay(scn: Any) -> tuple[Any, bool, dict]:
    """The folder's forecast (fitted, or reused) widened by replayed deals when it has no hindcast
    of that fit (`pledge forecast hindcast --apply`). Returns (ForecastResult, reused, hindcast)."""
    fc = forecast_job.ensure_forecast(scn)
    reused = not bool(fc.fitted_now)
    hindcast = cached_hindcast(scn)
    if hindcast is None:  # replayed deals set the shared factors' scale (pledge forecast hindcast --apply)
        hindcast = hindcast_scenario(scn, apply=True)
        fc = forecast_job.ensure_forecast(scn)
    return fc, reused, hindcast


def _say_forecast(folder: Path, reused: bool, hindcast: dict, say: Callable[[str], None]) -> None:
    say(f"forecast {'reused from' if reused else 'fitted and saved in'} {folder / 'forecast'}")
    if hindcast.get("deals"):
        c95 = hindcast["claimed_95"]
        came = f"claims of 95% came true in {c95['realised']:.0%}; " if c95.get("realised") is not None else ""
        say(f"replayed {hindcast['deals']} deals at {hindcast['origins']} past origins: {came}planned delivery "
            f"x{hindcast.get('applied_deal_factor', 1.0):.3f}, shared level factors widened "
            f"x{hindcast['applied_scale']:.2f} (pledge forecast hindcast)")


def _release_demo_deals(scn: Any, say: Callable[[str], None]) -> list[str]:
    """Release the demo's deals a previous run committed (the book starts afresh)."""
    released = []
    for d in list_deals(scn):
        if d.name in scn.deals:
            release_deal(scn, d.name)
            released.append(d.name)
    if released:
        say(f"re-run: released {', '.join(released)} from the demo book to start it afresh")
    return released


def _commit_in_turn(scn: Any, forecast: Any, solver: str, advance: Callable) -> tuple[list[str], dict[str, str]]:
    """The desk's order of work: plan a deal against the book as it stands, commit it if it is
    deliverable, then the next deal (it sees the spots the earlier ones hold)."""
    committed: list[str] = []
    not_committed: dict[str, str] = {}
    for name in scn.deals:
        plan = plan_result(run_deal(scn, name, solver=solver, held=held_spots(scn), forecast=forecast),
                           explain=False)
        if plan.deliverable:
            r = commit_deal(scn, name, planner=_reuse_plan(plan, forecast), solver=solver)
            if r.committed:
                committed.append(name)
            else:
                not_committed[name] = r.reason
        else:
            not_committed[name] = "not deliverable"
        advance(1)
    return committed, not_committed


def run_demo(out: str | Path = DEFAULT_FOLDER, *, draws: int = DEFAULT_DRAWS, seed: int = DEFAULT_SEED,
             solver: str = "cbc", stage: Callable[..., ContextManager] | None = None,
             say: Callable[[str], None] | None = None, info: Callable[[str], None] | None = None) -> DemoResult:
    """Run the whole job on the demo scenario in folder `out`; see the module docstring.

    `stage(description)` is a context manager factory shown around each stage (the CLI passes
    its progress display); `say(text)` receives one-line notes; `info(text)` the note that the
    invented history is being generated. Returns a `DemoResult`.
    """
    _check_options(solver, draws, seed)
    say = say or (lambda text: None)
    seconds: dict[str, float] = {}
    timed = _timer(stage or _null_stage, seconds)
    with timed("copy", "1/5 copying the invented demo scenario"):
        folder, reused_folder = prepare_folder(out, info=info)
        scn = load_scenario(folder)
    say(f"{'reusing' if reused_folder else 'created'} demo folder {folder}")
    with timed("forecast", "2/5 fitting the forecasts, replaying past deals (reused when already done)"):
        fc, reused_forecast, hindcast = _fit_and_replay(scn)
    _say_forecast(folder, reused_forecast, hindcast, say)
    released = _release_demo_deals(scn, say)
    names = list(scn.deals)
    with timed("check_commit", f"3/5 checking {len(names)} demo deals, committing the deliverable ones",
               total=len(names)) as advance:
        committed, not_committed = _commit_in_turn(scn, fc.table, solver, advance)
    example, deal = None, None
    if committed:
        # a deal with weeks left after the example's weeks, the longest flight first
        deal = max(committed, key=lambda n: scn.deals[n].last_week - scn.deals[n].first_week)
        example = example_actuals(scn, deal)
        say(f"invented posted actuals of {deal}'s first weeks in {example}")
    stress = None
    if committed:
        with timed("stress", f"4/5 stress test of the book ({draws:,} draws)"):
            stress = stress_book(scn, draws=draws, seed=seed, forecast=fc.table)
    report = folder / REPORT_NAME
    with timed("report", "5/5 writing the report"):
        # The report checks every deal against the book as it now stands (not the demo's own
        # checks, made as the book filled): the same answers `pledge report` gives on this folder.
        data = build_report(scn, forecast=fc.table, stress=stress, seed=seed, solver=solver,
                            check_note="The demo checked each deal in turn against the book as it stood (the "
                                       "deals committed before it) and committed it when deliverable; below, a "
                                       "deal not in the book is checked against every deal's holds.")
        write_report(data, report)
    # One book, one answer: the demo's table is the report's (a deal in the book from the book,
    # its largest guarantee against the other deals' holds).
    result = DemoResult(folder=folder, report=report, scenario=scn.name, currency=scn.currency,
                        reused_folder=reused_folder, reused_forecast=reused_forecast,
                        checks={d.name: d.verdict for d in data.deals}, committed=committed,
                        not_committed=not_committed, released=released,
                        stress=stress.as_dict() if stress is not None else None, seconds=seconds,
                        draws=draws, seed=seed, warnings=list(data.warnings), actuals_example=example,
                        actuals_deal=deal if example is not None else None)
    write_text_atomic(folder / SUMMARY_NAME, json.dumps(plain(result.as_dict()), indent=2) + "\n")
    return result
