"""`pledge check` (sales desk) and `pledge plan` (buyer): thin commands over `planner.deals`.

Exit status: 0 for an answer (a deal that is not deliverable is an answer), 2 for bad input.
"""
from __future__ import annotations

from pathlib import Path
from typing import Optional

import typer
from rich.markup import escape
from rich.table import Table

from planner.cli import app
from planner.cli.common import book_option, count, info, money, out_console, print_json, progress
from planner.cli.output import open_folder, print_warnings, write_plan_files
from planner.errors import InputError

_JSON_OPT = typer.Option(False, "--json", help="Print one JSON object on stdout.")
_SOLVER_OPT = typer.Option("cbc", "--solver", help="Integer solver: cbc (shipped with pulp) or highs.")
_BOOK_OPT = book_option("Book of committed deals whose spots are held (default: SCENARIO/book.sqlite if it exists).")


def _load(scenario: Path):
    if not scenario.is_dir():
        raise InputError(f"{scenario}: not a scenario folder")
    return open_folder(scenario)


def _pct(v, digits=1) -> str:
    return "-" if v is None else f"{100 * v:.{digits}f}%"


def _num(v) -> str:
    return "-" if v is None else count(v)


def _money(v, cur) -> str:
    return "-" if v is None else money(v, cur)


def _risk(r) -> str:
    if r.risk_rule == "pad":
        return f"pad {_pct(r.pad, 0)} (expected delivery >= {_pct(1 + r.pad, 0)} of the guarantee)"
    text = f"confidence {_pct(r.confidence)}"
    return text + (" (default: the deal sets neither)" if r.default_confidence_used else " (chance constraint)")


def _fit_note(r) -> None:
    if r.fitted_forecast_first:
        info("fitted forecast first (it was missing or its history changed)")


def _cautions(r) -> None:
    for c in r.cautions:
        out_console.print(c, style="dim", highlight=False)


def _hindcast_claim(scn, chance) -> dict | None:
    """What `pledge forecast hindcast` found on this history for claims like `chance`, or None."""
    from planner.hindcast import cached_hindcast, reliability_for

    return reliability_for(cached_hindcast(scn), chance) if chance is not None else None


def _hindcast_text(b: dict | None) -> str:
    if b is None:
        return "no hindcast yet (pledge forecast hindcast)"
    return (f"{_pct(b['realised'])} of {b['deals']} replays claimed {100 * b['low']:.0f}-{_pct(b['high'], 0)} "
            f"(~{b.get('effective_deals', 0):.0f} independent)")


def _terms_text(t: dict) -> str:
    """Make-good terms, short: 'ADUs within 4 weeks; owed below 90% of the guarantee, cap 50%'."""
    how = {"units": f"ADUs within {t['window_weeks']} weeks", "cash": "cash at the CPM",
           "both": f"ADUs ({t['window_weeks']} weeks) or cash, the dearer"}[t["settlement"]]
    return (f"{how}; owed below {_pct(t['threshold'], 0)} of the guarantee"
            + (f", cap {_pct(t['cap'], 0)}" if t["cap"] < 1 else ""))


def _makegood_rows(r, cur) -> list:
    """The expected make-good lines of a check or plan answer."""
    return [("expected shortfall owed", f"{_num(r.expected_shortfall_impressions)} impressions"),
            ("  under the terms", _terms_text(r.makegood_terms)),
            ("expected make-good cost", _money(r.expected_makegood_cost, cur)),
            ("margin net of make-goods", _money(r.margin_net_of_makegoods, cur))]


def _kv_table(rows) -> Table:
    t = Table(show_header=False, box=None, pad_edge=False)
    t.add_column("", style="bold")
    t.add_column("", justify="right")
    for k, v in rows:
        t.add_row(k, v)
    return t


@app.command("check")
def check_cmd(
    scenario: Path = typer.Argument(..., help="Scenario folder."),
    deal: str = typer.Argument(..., help="Deal name (deals/NAME.toml)."),
    target_margin: Optional[float] = typer.Option(None, "--target-margin",
                                                  help="Margin wanted, a fraction of revenue (0.25 = 25%): "
                                                       "prints the price CPM needed."),
    frontier: bool = typer.Option(False, "--frontier", help="Also cost and chance of delivery at other guarantee sizes."),
    solver: str = _SOLVER_OPT,
    time_limit: float = typer.Option(60.0, "--time-limit", min=1.0,
                                     help="Seconds per integer solve (LP relaxations get 10x, at least 600 s)."),
    book: Optional[Path] = _BOOK_OPT,
    as_json: bool = _JSON_OPT,
) -> None:
    """Is DEAL deliverable with the avails not held by committed deals? Cost, margin, chance, max guarantee."""
    from planner.workflows.deal import check_deal

    scn = _load(scenario)
    with progress(f"checking {deal}"):
        r = check_deal(scn, deal, solver=solver, target_margin=target_margin, frontier=frontier, book=book,
                      time_limit=time_limit)
    _fit_note(r)
    claim = _hindcast_claim(scn, r.probability_of_delivery if r.deliverable else None)
    if as_json:
        print_json({**r.to_json(), "hindcast_for_claim": claim})
        return
    cur = r.currency
    colour = "green" if r.deliverable else "red"
    out_console.print(f"[bold]{r.deal}[/] ({r.advertiser}, {r.demo}, weeks {r.first_week}-{r.last_week}): "
                      f"[bold {colour}]{r.verdict.upper()}[/]", highlight=False)
    print_warnings(r.warnings)
    rows = [("guarantee", f"{_num(r.guarantee)} impressions"), ("risk margin", _risk(r))]
    if r.deliverable:
        rows += [
            ("expected delivery", f"{_num(r.expected_impressions)} (sd {_num(r.sd_impressions)})"),
            ("chance of delivery", _pct(r.probability_of_delivery)),
            ("  claims like it on this history", _hindcast_text(claim)),
            ("  if errors were independent", f"{_pct(r.probability_if_independent)} (overstated)"),
            ("cost (spots that air)", f"{_money(r.cost, cur)} (sd {_money(r.cost_sd, cur)})"),
            ("revenue", f"{_money(r.revenue, cur)} at {r.price_cpm:,.2f} CPM"),
            ("margin", f"{_money(r.margin, cur)} ({_pct(r.margin_pct)})"),
            *_makegood_rows(r, cur),
            ("cost per thousand guaranteed", f"{r.cost_cpm:,.2f}"),
            ("spots", f"{_num(r.spots)} in {_num(r.units_bought)} units"),
        ]
        if r.cpm_needed is not None:
            rows.append((f"CPM for a {_pct(r.target_margin, 0)} margin", f"{r.cpm_needed:,.2f}"))
            net = r.cpm_needed_net_of_makegoods
            rows.append(("  net of expected make-goods", "unreachable (cash owed too large)" if net is None
                         else f"{net:,.2f}"))
    else:
        rows.append(("revenue asked", f"{_money(r.revenue, cur)} at {r.price_cpm:,.2f} CPM"))
    rows.append(("largest deliverable guarantee", f"{_num(r.max_guarantee)} impressions"))
    if r.deliverable:
        rows.append(("solver", f"{r.solver}, gap {_pct(r.gap, 2)}, LP bound {_money(r.lp_bound, cur)}, "
                               f"{r.cuts} cuts, {r.solve_seconds:.1f} s"))
    out_console.print(_kv_table(rows))
    if r.binding:
        out_console.print("[bold]what binds[/]" if r.deliverable else "[bold]what limits it[/]")
        for b in r.binding:
            out_console.print(f"  - {b}", highlight=False)
    for n in r.notes:
        out_console.print(f"[bold yellow]note[/]: {escape(n)}", highlight=False)
    if r.frontier:
        t = Table(title="frontier (LP relaxation: continuous spots)", title_justify="left")
        for c in ("guarantee", "deliverable", "cost", "cost per 1000", "chance of delivery"):
            t.add_column(c, justify="right")
        for f in r.frontier:
            t.add_row(_num(f["guarantee"]), "yes" if f["deliverable"] else "no", _money(f["cost"], cur),
                      "-" if f["cost_cpm"] is None else f"{f['cost_cpm']:,.2f}", _pct(f["probability_of_delivery"]))
        out_console.print(t)
    _cautions(r)


@app.command("plan")
def plan_cmd(
    scenario: Path = typer.Argument(..., help="Scenario folder."),
    deal: str = typer.Argument(..., help="Deal name (deals/NAME.toml)."),
    out: Path = typer.Option(..., "--out", help="CSV file for the buy plan (with --split-by: the name stem)."),
    split_by: Optional[str] = typer.Option(None, "--split-by", help="zone: one order file per zone (OUT-ZONE.csv)."),
    solver: str = _SOLVER_OPT,
    time_limit: float = typer.Option(60.0, "--time-limit", min=1.0,
                                     help="Seconds per integer solve (LP relaxations get 10x, at least 600 s)."),
    book: Optional[Path] = _BOOK_OPT,
    as_json: bool = _JSON_OPT,
) -> None:
    """The whole-spot buy plan of DEAL at least cost, with totals and the weekly pacing table."""
    from planner.deals import plan_frame
    from planner.workflows.deal import plan_deal

    if split_by is not None and split_by != "zone":
        raise InputError(f"--split-by {split_by!r}: only 'zone' is supported")
    if out.exists() and out.is_dir():
        raise InputError(f"--out {out}: is a folder, give a file name")
    scn = _load(scenario)
    with progress(f"planning {deal}"):
        r = plan_deal(scn, deal, solver=solver, book=book, time_limit=time_limit)
    _fit_note(r)
    files = write_plan_files(plan_frame(scn, deal, r.spots), out, split_by) if r.deliverable else []
    claim = _hindcast_claim(scn, r.totals.get("probability_of_delivery") if r.deliverable else None)
    if as_json:
        print_json({"deal": r.deal, "deliverable": r.deliverable, "verdict": r.verdict, "reason": r.reason,
                    "currency": r.currency, "guarantee": r.guarantee, "risk_rule": r.risk_rule,
                    "confidence": r.confidence, "pad": r.pad, "default_confidence_used": r.default_confidence_used,
                    "cost": r.cost, "cost_sd": r.cost_sd,
                    **{k: getattr(r, k) for k in ("expected_shortfall_impressions", "expected_makegood_cost",
                                                  "margin_net_of_makegoods")},
                    "makegood_terms": r.makegood_terms, "totals": r.totals, "pacing": r.pacing.to_dict(orient="records"),
                    "files": [str(p) for p in files], "solver": r.solver, "gap": r.gap, "lp_bound": r.lp_bound,
                    "cuts": r.cuts, "binding": r.binding, "fitted_forecast_first": r.fitted_forecast_first,
                    "warnings": r.warnings, "notes": r.notes, "cautions": r.cautions,
                    "shared_error_caution": r.shared_error_caution, "hindcast_for_claim": claim})
        return
    cur = r.currency
    if not r.deliverable:
        out_console.print(f"[bold]{r.deal}[/]: [bold red]NOT DELIVERABLE[/], no plan written", highlight=False)
        print_warnings(r.warnings)
        for b in r.binding:
            out_console.print(f"  - {b}", highlight=False)
        _cautions(r)
        return
    t = r.totals
    out_console.print(f"[bold]{r.deal}[/]: buy plan written to {', '.join(map(str, files))}", highlight=False)
    print_warnings(r.warnings)
    out_console.print(_kv_table([
        ("spots", f"{_num(t['spots'])} in {_num(t['units'])} units"),
        ("cost (spots that air)", f"{_money(t['cost'], cur)} (sd {_money(t['cost_sd'], cur)})"),
        ("guarantee", _num(t["guarantee"])),
        ("expected delivery", f"{_num(t['expected_impressions'])} (sd {_num(t['sd_impressions'])})"),
        ("chance of delivery", _pct(t["probability_of_delivery"])),
        ("  claims like it on this history", _hindcast_text(claim)),
        ("margin", f"{_money(t['margin'], cur)} ({_pct(t['margin_pct'])})"),
        *_makegood_rows(r, cur),
        ("risk margin", _risk(r)),
        ("solver", f"{r.solver}, gap {_pct(r.gap, 2)}"),
    ]))
    pt = Table(title="weekly pacing (expected impressions, 10%-90% band)", title_justify="left")
    for c in ("week", "expected", "p10", "p90", "even pacing", "vs even"):
        pt.add_column(c, justify="right")
    for row in r.pacing.itertuples(index=False):  # one row per flight week
        dev = row.expected_impressions / row.even_pacing - 1 if row.even_pacing else 0.0
        pt.add_row(str(row.week), _num(row.expected_impressions), _num(row.p10), _num(row.p90),
                   _num(row.even_pacing), f"{100 * dev:+.1f}%")
    out_console.print(pt)
    for n in r.notes:
        out_console.print(f"[bold yellow]note[/]: {escape(n)}", highlight=False)
    _cautions(r)
