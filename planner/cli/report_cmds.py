"""`pledge report` (one self-contained HTML file) and `pledge demo` (the whole job on the demo)."""
from __future__ import annotations

from pathlib import Path
from typing import List, Optional

import typer
from rich import box
from rich.markup import escape
from rich.table import Table

from planner.cli import app
from planner.cli.common import book_option, count, info, money, out_console, print_json, progress
from planner.cli.output import open_folder
from planner.errors import InputError
from planner.forecast_job import forecast_caution
from planner.stress import DEFAULT_DRAWS

CAUTION = ("Forecasts are estimates from past audiences; contract terms decide what is owed on "
           "under-delivery; review a plan with the people accountable for the money before committing.")


def _pct(v) -> str:
    return "-" if v is None else f"{100 * float(v):.1f}%"


def _k(v) -> str:
    """Impressions in thousands, grouped: 26,729,000 -> '26,729'."""
    return "-" if v is None else f"{float(v) / 1000:,.0f}"


def book_line(b: dict, basis: str, currency: str) -> str:
    """'expected liability (refund basis) USD 4,764 +- 61, VaR95 USD 15,711 +- 420, CVaR95 ...'
    from a stress result's `book` dict (Monte Carlo standard errors after +-)."""
    def fig(key: str) -> str:
        se = b.get(key + "_se")
        return money(b[key], currency) + ("" if se is None or se != se else f" +- {count(se)}")

    return (f"expected liability ({basis} basis) {fig('expected_liability')}, VaR95 {fig('var95')}, "
            f"CVaR95 {fig('cvar95')}")


def print_cautions(warnings, full: str | None, brief: str | None) -> None:
    """The report's cautions on stdout, the forecast's own in its brief form (`full` replaced by
    `brief`; the whole text is in the report and in --json)."""
    for w in warnings:
        out_console.print(f"[yellow]caution: {escape(brief if (full is not None and w == full) else w)}[/yellow]",
                          highlight=False)


def _verdict_table(checks: dict[str, dict], currency: str, committed: set[str] | None = None) -> Table:
    """One line per deal, narrow enough for an 80-column terminal."""
    t = Table(title=f"deals: money in {currency}; impressions (000) in each deal's demo", box=box.SIMPLE_HEAD,
              title_justify="left", pad_edge=False, padding=(0, 1, 0, 0), show_edge=False)
    cols = ["deal", "verdict", "guarantee", "cost", "margin", "P(deliv.)", "max"]
    for c in cols:
        t.add_column(c, justify="left" if c in ("deal", "verdict") else "right", no_wrap=True)
    for name, v in checks.items():
        ok = bool(v.get("deliverable"))
        verdict = ("held" if name in committed else "yes") if (ok and committed is not None) else ("yes" if ok else "NO")
        t.add_row(name, verdict, _k(v.get("guarantee")),
                  count(v["cost"]) if v.get("cost") is not None else "-",
                  count(v["margin"]) if v.get("margin") is not None else "-",
                  _pct(v.get("probability_of_delivery")), _k(v.get("max_guarantee")))
    if committed is not None:
        t.caption = ("verdict: held = in the book (its held plan and terms, from the book), yes/NO = deliverable "
                     "or not against the book's holds; max: the largest deliverable guarantee against the other "
                     "deals' holds")
        t.caption_justify = "left"
    return t


@app.command("report")
def report_cmd(
    scenario: Path = typer.Argument(..., help="Scenario folder."),
    out: Path = typer.Option(..., "--out", help="HTML file to write (self-contained, opens from disk)."),
    deal: Optional[List[str]] = typer.Option(None, "--deal", help="Deal to include (repeatable; default: every deal)."),
    draws: int = typer.Option(DEFAULT_DRAWS, "--draws", help="Monte Carlo draws for the book's stress test."),
    seed: int = typer.Option(0, "--seed", min=0, help="Random seed of the stress test."),
    solver: str = typer.Option("cbc", "--solver", help="cbc or highs."),
    book: Optional[Path] = book_option(),
    as_json: bool = typer.Option(False, "--json", help="Print one JSON object on stdout."),
) -> None:
    """Write one HTML report: verdicts, frontier, pacing, where the money goes, stress, forecast bands."""
    from planner.book import list_deals
    from planner.report import write_report
    from planner.workflows.report import build_report

    if not scenario.is_dir():
        raise InputError(f"{scenario}: not a scenario folder")
    if out.suffix.lower() not in (".html", ".htm"):
        raise InputError(f"--out {out}: the report is an HTML file; give a name ending in .html")
    if out.is_dir():
        raise InputError(f"--out {out}: is a folder; give a file name ending in .html")
    if draws < 2:
        raise InputError(f"--draws {draws}: need at least 2 draws")
    scn = open_folder(scenario)
    known = set(scn.deals) | {d.name for d in list_deals(scn, book)}
    for name in deal or ():
        if name not in known:
            raise InputError(f"{scenario}: no deal named {name!r} in deals/ or the book (known: "
                             f"{', '.join(sorted(known))})")
    with progress("building the report"):
        data = build_report(scn, deals=deal or None, draws=draws, seed=seed, solver=solver, book=book,
                            stage=lambda text: info(f"  {text}"))
        path = write_report(data, out)
    checks = {d.name: d.verdict for d in data.deals}
    if as_json:
        print_json({"report": str(path), "scenario": scn.name, "currency": scn.currency, "seed": seed,
                    "deals": list(checks.values()),
                    "book": None if data.book is None else {
                        "deals": list(data.book.deals), "expected_liability": data.book.expected_liability,
                        "var95": data.book.var95, "cvar95": data.book.cvar95, "draws": data.book.draws},
                    "warnings": data.warnings, "caution": CAUTION})
        return
    out_console.print(_verdict_table(checks, scn.currency, {d.name for d in data.deals if d.in_book}))
    if data.book is not None:
        b = data.book
        out_console.print(f"book: {len(b.deals)} deal(s), {book_line(b.extra, b.liability_basis, scn.currency)} "
                          f"({count(b.draws)} draws, seed {b.seed})")
    print_cautions(data.warnings, forecast_caution(scn), forecast_caution(scn, brief=True))
    out_console.print(f"report written to [bold]{path}[/]")
    out_console.print(CAUTION, style="dim")


@app.command("demo")
def demo_cmd(
    out: Path = typer.Option(Path("pledge-demo"), "--out", help="Working folder for the demo (created, or reused if it is one)."),
    draws: int = typer.Option(DEFAULT_DRAWS, "--draws", help="Monte Carlo draws for the book's stress test."),
    seed: int = typer.Option(0, "--seed", min=0, help="Random seed of the stress test."),
    solver: str = typer.Option("cbc", "--solver", help="cbc or highs."),
    as_json: bool = typer.Option(False, "--json", help="Print one JSON object on stdout."),
) -> None:
    """The whole job on the invented demo: copy, fit, check, commit, stress, report."""
    import contextlib
    import time

    from planner.workflows.demo import run_demo

    t0 = time.perf_counter()

    @contextlib.contextmanager
    def stage(description: str, total: float | None = None):
        t = time.perf_counter()
        with progress(description, total=total) as advance:
            yield advance
        info(f"{description}: done in {time.perf_counter() - t:,.1f} s")

    result = run_demo(out, draws=draws, seed=seed, solver=solver, stage=stage, say=lambda text: info(f"  {text}"),
                      info=info)
    elapsed = time.perf_counter() - t0
    if as_json:
        print_json({**result.as_dict(), "elapsed_seconds": round(elapsed, 1), "caution": CAUTION})
        return
    cur = result.currency
    out_console.print(f"[bold]pledge demo[/]: scenario {result.scenario} (invented data) in {result.folder}")
    out_console.print(_verdict_table(result.checks, cur, set(result.committed)))
    for name, why in result.not_committed.items():
        out_console.print(f"  {name}: not committed ({why})")
    if result.stress:
        b = result.stress["book"]
        basis = result.stress.get("liability_basis", "refund")
        out_console.print(f"book of {len(result.committed)} deal(s): {book_line(b, basis, cur)} "
                          f"({count(result.draws)} draws, seed {result.seed})")
    scn = open_folder(result.folder)
    print_cautions(result.warnings, forecast_caution(scn), forecast_caution(scn, brief=True))
    out_console.print(f"report: [bold]{result.report}[/]   (done in {elapsed:,.0f} s)")
    if result.actuals_example is not None:
        out_console.print(f"mid-flight: invented posted actuals of {result.actuals_deal}'s first weeks; try "
                          f"pledge rebalance {result.folder} {result.actuals_deal} --actuals {result.actuals_example}",
                          highlight=False)
    out_console.print(CAUTION, style="dim")
