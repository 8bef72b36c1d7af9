"""`pledge book commit|list|show|release|check|events` and `pledge rebalance`: the book of sold deals.

Exit status: 0 for an answer (a deal that cannot be delivered and is therefore not committed is
an answer: the verdict says "not committed"), 2 for bad input, 1 for an internal error.
"""
from __future__ import annotations

from pathlib import Path
from typing import Optional

import typer
from rich.markup import escape
from rich.table import Table

from planner.cli import app
from planner.cli.common import book_option, count, money, out_console, print_json, progress
from planner.cli.output import open_folder, print_table, print_warnings, short, write_plan_files
from planner.errors import InputError

book_app = typer.Typer(help="The book of sold deals: commit, list, show, release, check, events.", no_args_is_help=True)
app.add_typer(book_app, name="book")

#: exit status of `pledge book check` when the book is not consistent (an answer, not bad input)
EXIT_INCONSISTENT = 3

CAUTION = ("Forecasts are estimates from past audiences; contract terms decide what is owed on "
           "under-delivery. Review a plan with the people accountable for the money before committing.")

_BOOK_OPT = book_option()
_JSON_OPT = typer.Option(False, "--json", help="Print one JSON object on stdout.")


def _folder(scenario: Path) -> Path:
    if not scenario.is_dir():
        raise InputError(f"{scenario}: not a scenario folder")
    return scenario


def _load(scenario: Path):
    return open_folder(_folder(scenario))


def book_warnings(scn, book) -> list[str]:
    """`planner.book.book_warnings`: the book held over the scenario's avails ([] without a
    scenario: a folder that holds only a book)."""
    from planner.book import book_warnings as warnings_of

    return [] if scn is None else warnings_of(scn, book)


def _load_if_scenario(scenario: Path):
    """The scenario of the folder, or None when it holds no scenario.toml (a book alone)."""
    return _load(scenario) if (_folder(scenario) / "scenario.toml").is_file() else None


def _f(value, fmt="{:,.0f}", none="-"):
    return none if value is None else fmt.format(value)


@book_app.command("commit")
def commit_cmd(
    scenario: Path = typer.Argument(..., help="Scenario folder."),
    deal: str = typer.Argument(..., help="Deal name (deals/NAME.toml)."),
    book: Optional[Path] = book_option(must_exist=False),
    solver: str = typer.Option("cbc", "--solver", help="cbc or highs."),
    as_json: bool = _JSON_OPT,
) -> None:
    """Plan DEAL against the avails not already held and commit it with its spots (one transaction)."""
    from planner.workflows.deal import commit_deal

    scn = _load(scenario)
    with progress(f"planning and committing {deal}"):
        result = commit_deal(scn, deal, book, solver=solver)
    warnings = book_warnings(scn, book)
    if as_json:
        print_json({**result.as_dict(), "warnings": warnings, "caution": CAUTION})
        return
    s = result.summary
    if result.committed:
        out_console.print(f"[bold green]committed[/] {deal} to {result.book}")
        out_console.print(f"  spots held {count(s.get('spots') or 0)}, cost {_f(s.get('cost'))} {scn.currency}, "
                          f"expected impressions {_f(s.get('expected_impressions'))}, "
                          f"chance of delivery {_f(s.get('probability'), '{:.1%}')}")
        if result.replanned:
            out_console.print("  (another desk committed meanwhile: re-planned under the book's write lock)")
    else:
        out_console.print(f"[bold red]not committed[/] {deal}: {result.reason}")
    print_warnings(warnings)
    out_console.print(CAUTION, style="dim")


@book_app.command("list")
def list_cmd(
    scenario: Path = typer.Argument(..., help="Scenario folder."),
    book: Optional[Path] = _BOOK_OPT,
    as_json: bool = _JSON_OPT,
) -> None:
    """List the committed deals."""
    from planner.book import book_path, list_deals

    scn = _load_if_scenario(scenario)
    deals = list_deals(scenario, book)
    warnings = book_warnings(scn, book)
    if as_json:
        print_json({"book": str(book_path(scenario, book)), "deals": [d.as_dict() for d in deals],
                    "warnings": warnings})
        return
    if not deals:
        out_console.print(f"no deals committed in {book_path(scenario, book)}")
        return
    t = Table(title=f"book {book_path(scenario, book)}")
    t.add_column("deal", no_wrap=True)
    for c in ("demo", "weeks", "guarantee", "CPM", "cost", "spots", "P(deliver)"):
        t.add_column(c, justify="left" if c == "demo" else "right", no_wrap=True)
    for d in deals:
        t.add_row(d.name, d.demo, f"{d.first_week}-{d.last_week}", short(d.guarantee), f"{d.price_cpm:.2f}",
                  short(d.cost), _f(d.spots), _f(d.probability, "{:.1%}"))
    print_table(t)
    print_warnings(warnings)


@book_app.command("show")
def show_cmd(
    scenario: Path = typer.Argument(..., help="Scenario folder."),
    name: str = typer.Argument(..., help="Committed deal name."),
    book: Optional[Path] = _BOOK_OPT,
    as_json: bool = _JSON_OPT,
) -> None:
    """Show one committed deal and the spots it holds."""
    from planner.book import get_deal

    scn = _load_if_scenario(scenario)
    d = get_deal(scenario, name, book)
    warnings = book_warnings(scn, book)
    if as_json:
        print_json({**d.as_dict(with_holds=True), "warnings": warnings})
        return
    out_console.print(f"[bold]{d.name}[/] ({d.advertiser or '-'}), demo {d.demo}, weeks {d.first_week}-{d.last_week}, "
                      f"guarantee {count(d.guarantee)} at CPM {d.price_cpm:.2f}, committed {d.committed_at}")
    out_console.print(f"  cost {_f(d.cost)}, expected impressions {_f(d.expected_impressions)}, "
                      f"chance of delivery {_f(d.probability, '{:.1%}')}, spots {_f(d.spots)}")
    holds = d.holds
    if holds is not None and len(holds):
        by_week = holds.groupby("week", as_index=False).agg(spots=("spots", "sum"), cost=("cost", "sum"),
                                                            expected_impressions=("expected_impressions", "sum"))
        t = Table(title="holds by week")
        for c in ("week", "spots", "cost", "expected impressions"):
            t.add_column(c, justify="right")
        for r in by_week.itertuples(index=False):
            t.add_row(str(r.week), count(r.spots), count(r.cost), count(r.expected_impressions))
        print_table(t)
    print_warnings(warnings)


@book_app.command("events")
def events_cmd(
    scenario: Path = typer.Argument(..., help="Scenario folder."),
    deal: Optional[str] = typer.Option(None, "--deal", help="Only this deal's events."),
    book: Optional[Path] = _BOOK_OPT,
    as_json: bool = _JSON_OPT,
) -> None:
    """The book's audit trail: every commit, release and re-plan with its time (UTC) and user."""
    from planner.book import book_path, events

    scn = _load_if_scenario(scenario)
    log = events(scenario, book)
    warnings = book_warnings(scn, book)
    if deal is not None:
        log = log[log["deal"] == deal]
    if as_json:
        print_json({"book": str(book_path(scenario, book)), "events": log.to_dict(orient="records"),
                    "warnings": warnings})
        return
    print_warnings(warnings)
    if log.empty:
        out_console.print(f"no events in {book_path(scenario, book)}")
        return
    t = Table(title=f"events of book {book_path(scenario, book)} (oldest first)", title_justify="left")
    for c in ("time (UTC)", "action", "deal", "user", "spots"):
        t.add_column(c, justify="right" if c == "spots" else "left", no_wrap=True)
    for r in log.itertuples(index=False):  # one row per event: a log, not a large table
        spots = r.detail.get("spots") if isinstance(r.detail, dict) else None
        t.add_row(str(r.at).replace("+00:00", ""), r.action, r.deal, r.user or "-", _f(spots))
    print_table(t)


@book_app.command("release")
def release_cmd(
    scenario: Path = typer.Argument(..., help="Scenario folder."),
    name: str = typer.Argument(..., help="Committed deal name."),
    book: Optional[Path] = _BOOK_OPT,
    as_json: bool = _JSON_OPT,
) -> None:
    """Release a committed deal: remove it and free the spots it holds."""
    from planner.book import release_deal

    scn = _load_if_scenario(scenario)
    d = release_deal(scenario, name, book)
    warnings = book_warnings(scn, book)
    if as_json:
        print_json({"released": d.name, "spots_freed": d.spots, "warnings": warnings})
        return
    out_console.print(f"released {d.name}: {count(d.spots or 0)} spots freed")
    print_warnings(warnings)


@book_app.command("check")
def check_cmd(
    scenario: Path = typer.Argument(..., help="Scenario folder."),
    book: Optional[Path] = _BOOK_OPT,
    as_json: bool = _JSON_OPT,
) -> None:
    """Check the book: database integrity, units held beyond their avails, orphan holds.

    Exit status 0 when consistent, 3 when not (an answer about the book), 2 for bad input."""
    from planner.book import book_path, check_book

    scn = _load(scenario)
    r = check_book(scn, book)
    ok = r.get("integrity", "ok") == "ok" and not (r["over_avails"] or r["orphan_holds"] or r["spot_count_mismatch"])
    warnings = book_warnings(scn, book)
    if as_json:
        print_json({"book": str(book_path(scenario, book)), "consistent": ok, **r, "warnings": warnings})
    else:
        out_console.print(f"book {book_path(scenario, book)}: {r['deals']} deal(s); "
                          f"{'consistent' if ok else 'NOT consistent'} (integrity {r.get('integrity', 'ok')}, "
                          f"units over avails {r['over_avails']}, orphan holds {r['orphan_holds']}, "
                          f"spot-count mismatches {r['spot_count_mismatch']})")
        print_warnings(warnings)
    if not ok:
        raise typer.Exit(EXIT_INCONSISTENT)


@app.command("rebalance")
def rebalance_cmd(
    scenario: Path = typer.Argument(..., help="Scenario folder."),
    deal: str = typer.Argument(..., help="Committed deal name."),
    actuals: Path = typer.Option(..., "--actuals", help="Posted actuals CSV: zone,network,daypart,week,spots_aired,impressions."),
    book: Optional[Path] = _BOOK_OPT,
    commit: bool = typer.Option(False, "--commit", help="Replace the deal's holds in the book by the re-plan "
                                                        "(refused, exit 2, when the postings look wrong)."),
    unposted_as_zero: bool = typer.Option(False, "--unposted-as-zero",
                                          help="Accept held unit-weeks up to the last posted week that have no "
                                               "posted row as delivering nothing (otherwise --commit refuses)."),
    out: Optional[Path] = typer.Option(None, "--out", help="CSV file for the re-planned remaining weeks, in the "
                                                           "plan CSV's format plus held and change columns."),
    solver: str = typer.Option("cbc", "--solver", help="cbc or highs."),
    as_json: bool = _JSON_OPT,
) -> None:
    """Mid-flight: update the forecast from posted actuals and re-plan the remaining weeks."""
    from planner.deals import plan_frame
    from planner.forecast_job import forecast_caution
    from planner.workflows.rebalance import rebalance_deal

    if out is not None and out.is_dir():
        raise InputError(f"--out {out}: is a folder, give a file name")
    scn = _load(scenario)
    with progress(f"rebalancing {deal}"):
        r = rebalance_deal(scn, deal, actuals, book, commit=commit, solver=solver,
                           unposted_as_zero=unposted_as_zero)
    files = []
    if out is not None and r.order is not None:
        files = write_plan_files(plan_frame(scn, deal, r.order, extra=("held", "change")), out, None)
    shared = forecast_caution(scn, scenario)
    if as_json:
        print_json({**r.as_dict(), "files": [str(p) for p in files], "shared_error_caution": shared,
                    "caution": CAUTION})
        return
    cur = scn.currency
    out_console.print(f"[bold]{deal}[/]: weeks aired {r.aired_weeks[0] if r.aired_weeks else '-'}-"
                      f"{r.aired_weeks[-1] if r.aired_weeks else '-'}, delivered {count(r.delivered)} of "
                      f"{count(r.guarantee)} ({r.delivered / r.guarantee:.1%}); posted vs forecast "
                      f"{r.posted_vs_forecast:+.1%}")
    for p in r.problems:  # part of the answer, never silenced
        out_console.print(f"[bold red]warning[/]: {escape(p)}", highlight=False)
    if r.problems:
        out_console.print("  [red]these postings look wrong: --commit would be refused[/]")
    for w in r.warnings:
        out_console.print(f"[yellow]warning[/]: {escape(w)}", highlight=False)
    out_console.print(f"  remaining guarantee {count(r.remaining_guarantee)} over weeks "
                      f"{r.remaining_weeks[0] if r.remaining_weeks else '-'}-{r.remaining_weeks[-1] if r.remaining_weeks else '-'}")
    out_console.print(f"  chance of delivery with the current holds, updated forecast: {r.probability_before:.1%}")
    if r.deliverable:
        out_console.print(f"  [green]re-plan meets the guarantee[/] at {r.confidence_label}: chance of delivery "
                          f"{r.probability_after:.1%}; catch-up spots {r.added_spots:+,d}, added cost "
                          f"{money(r.added_cost, cur)}")
    else:
        out_console.print(f"  [red]cannot be met[/] at {r.confidence_label}: the most the remaining avails can "
                          f"deliver at that confidence is {count(r.max_deliverable)}, short by {count(r.unmet)} "
                          f"impressions; best-effort plan chance of delivery {r.probability_after:.1%}")
    if files:
        out_console.print(f"  re-planned remaining weeks written to {', '.join(map(str, files))}")
    if r.committed:
        out_console.print("  book updated with the re-plan's holds")
    elif commit:
        out_console.print(f"  book not updated ({r.not_committed_reason})")
    brief = forecast_caution(scn, scenario, brief=True)
    if brief:
        out_console.print(f"[yellow]caution: {escape(brief)}[/yellow]")
    out_console.print(CAUTION, style="dim")
