"""Pieces shared by the command modules: opening a scenario folder, tables, warnings, plan files.

The command modules import from here (and `planner.cli.common`), never from one another.
"""
from __future__ import annotations

import re
from pathlib import Path

from rich.markup import escape
from rich.table import Table

from planner.cli.common import info, out_console


def open_folder(scenario: Path):
    """The scenario of folder `scenario` (`planner.workflows.open_scenario`: its invented history
    made first when it has none, with a note on stderr)."""
    from planner.workflows.scenario import open_scenario  # the CLI imports the API on first use (start-up time)

    return open_scenario(scenario, info=info)


def print_table(table: Table) -> None:
    """Print a table on stdout (when stdout is not a terminal, on a page wide enough not to wrap)."""
    out_console.print(table)


def short(value) -> str:
    """Compact number: 1,076,000 -> '1.08M', 73,550 -> '73.6k'."""
    if value is None:
        return "-"
    v = float(value)
    for unit, size in (("B", 1e9), ("M", 1e6), ("k", 1e3)):
        if abs(v) >= size:
            return f"{v / size:.3g}{unit}"
    return f"{v:,.0f}"


def print_warnings(warnings) -> None:
    """Data warnings, part of the answer on stdout (never silenced by --quiet)."""
    for w in warnings:
        out_console.print(f"[bold yellow]warning[/]: {escape(w)}", highlight=False)


def _safe(name: str) -> str:
    return re.sub(r"[^A-Za-z0-9._-]+", "_", str(name))


def write_plan_files(frame, out: Path, split_by: str | None) -> list[Path]:
    """Write a plan CSV (`planner.deals.plan_frame`; or one per zone) atomically; return the paths."""
    from planner.atomic import write_with_atomic

    if split_by is None:
        write_with_atomic(out, lambda p: frame.to_csv(p, index=False))
        return [out]
    paths = []
    for key, part in frame.groupby(split_by, sort=True, observed=True):
        key = key[0] if isinstance(key, tuple) else key
        path = out.with_name(f"{out.stem}-{_safe(key)}{out.suffix or '.csv'}")
        write_with_atomic(path, lambda p, part=part: part.to_csv(p, index=False))
        paths.append(path)
    return paths
