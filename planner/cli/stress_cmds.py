"""`pledge stress SCENARIO`: Monte Carlo stress of the whole book (finance)."""
from __future__ import annotations

from pathlib import Path
from typing import List, Optional

import typer
from rich.markup import escape
from rich.table import Table

from planner.cli import app
from planner.cli.common import book_option, count, money, out_console, print_json, progress
from planner.cli.output import open_folder, print_table, short
from planner.errors import InputError
from planner.stress import DEFAULT_DRAWS


@app.command("stress")
def stress_cmd(
    scenario: Path = typer.Argument(..., help="Scenario folder."),
    draws: int = typer.Option(DEFAULT_DRAWS, "--draws", help="Monte Carlo draws."),
    seed: int = typer.Option(0, "--seed", min=0, help="Random seed (same seed, same numbers)."),
    shock: Optional[List[str]] = typer.Option(
        None, "--shock", help="network=NAME:-0.15, daypart=NAME:-0.10, zone=NAME:-0.1 or all:-0.05 (repeatable)."),
    preempt_multiplier: float = typer.Option(1.0, "--preempt-multiplier", help="Scale every preemption rate."),
    liability: str = typer.Option("refund", "--liability",
                                  help="refund: shortfall x price CPM / 1000; makegood: shortfall x plan cost per impression."),
    method: str = typer.Option("fast", "--method", help="fast (conditional normal), exact or per_spot (naive)."),
    book: Optional[Path] = book_option(),
    as_json: bool = typer.Option(False, "--json", help="Print one JSON object on stdout."),
) -> None:
    """Stress every committed deal at once: shortfall chances, liability, VaR95, CVaR95."""
    from planner.stress import CAUTION, LIABILITY_BASES, parse_shock
    from planner.workflows.stress import stress_book

    if not scenario.is_dir():
        raise InputError(f"{scenario}: not a scenario folder")
    if draws < 2:
        raise InputError(f"--draws {draws}: need at least 2 draws")
    if liability not in LIABILITY_BASES:
        raise InputError(f"--liability {liability!r}: expected one of {', '.join(LIABILITY_BASES)}")
    if preempt_multiplier < 0:
        raise InputError(f"--preempt-multiplier {preempt_multiplier}: must be >= 0")
    scn = open_folder(scenario)
    inv = scn.inventory
    shocks = [parse_shock(s, networks=inv["network"].astype(str).unique().tolist(),
                          dayparts=[d.name for d in scn.dayparts], zones=inv["zone"].astype(str).unique().tolist())
              for s in (shock or ())]
    with progress(f"stress: {draws:,} draws", total=draws) as advance:
        r = stress_book(scn, book, draws=draws, seed=seed, shocks=shocks, preempt_multiplier=preempt_multiplier,
                        liability=liability, method=method, keep_draws=False, advance=advance)
    from planner.forecast_job import forecast_caution

    caution = forecast_caution(scn, scenario)
    cautions = list(r.warnings) + ([caution] if caution else [])  # the book's own, then the forecast's
    brief = forecast_caution(scn, scenario, brief=True)
    if as_json:
        print_json({**r.as_dict(), "warnings": cautions})
        return
    cur = r.currency
    out_console.print(f"[bold]Book stress[/]: {r.draws:,} draws, seed {r.seed}, {r.method} sampler, "
                      f"liability basis {r.liability_basis}")
    out_console.print("  shocks: " + (", ".join(r.shocks) if r.shocks else "none")
                      + (f"; preemption x{r.preempt_multiplier:g}" if r.preempt_multiplier != 1 else ""))
    t = Table(title=f"deals (+- Monte Carlo standard error; impressions in each deal's demo, money in {cur})")
    t.add_column("deal", no_wrap=True)
    for c in ("guarantee (imp.)", "P(short)", "exp. shortfall (imp.)", f"exp. liability ({cur})",
              f"exp. margin ({cur})", "share of CVaR"):
        t.add_column(c, justify="right", no_wrap=True)
    cvar = r.book["cvar95"]
    for d in r.deals:
        t.add_row(d.deal, short(d.guarantee),
                  f"{100 * d.probability_of_shortfall:.2f}+-{100 * d.probability_of_shortfall_se:.2f}%",
                  f"{short(d.expected_shortfall)}+-{short(d.expected_shortfall_se)}",
                  f"{short(d.expected_liability)}+-{short(d.expected_liability_se)}",
                  short(d.expected_margin), f"{d.tail_contribution / cvar:.0%}" if cvar > 0 else "-")
    print_table(t)
    b = r.book
    out_console.print(f"[bold]book[/]: expected liability {money(b['expected_liability'], cur)} +- {count(b['expected_liability_se'])}; "
                      f"VaR95 {money(b['var95'], cur)} +- {count(b['var95_se']) if b['var95_se'] == b['var95_se'] else '-'}; "
                      f"CVaR95 {money(b['cvar95'], cur)} +- {count(b['cvar95_se'])}")
    out_console.print(f"  chance any deal falls short {b['probability_any_shortfall']:.1%}; "
                      f"expected margin {money(b['expected_margin'], cur)} on revenue {money(b['revenue'], cur)}")
    top = [n for n in r.networks if n["tail_liability"] > 0][:5]
    if top:
        out_console.print("  networks driving the tail (liability from their level error in the draws beyond VaR): "
                          + ", ".join(f"{n['network']} {money(n['tail_liability'], cur)}" for n in top))
    if r.joint:
        j = r.joint
        out_console.print(f"  most correlated pair {j['deals'][0]} / {j['deals'][1]} (corr {j['correlation']:.2f}): "
                          f"both short {j['probability_both_short']:.2%} vs {j['product_if_independent']:.2%} if independent")
    for c in list(r.warnings) + ([brief] if brief else []):
        out_console.print(f"[yellow]caution: {escape(c)}[/yellow]")
    out_console.print(CAUTION, style="dim")
