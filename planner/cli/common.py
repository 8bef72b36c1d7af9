"""Shared pieces of the command line: JSON output, progress display, error exit codes."""
from __future__ import annotations

import contextlib
import json
import sys
from pathlib import Path
from typing import Any, Iterator

import typer
from rich.console import Console
from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn

from planner.plain import plain

# Progress and messages go to stderr so that `--json` keeps stdout one clean JSON object
# (not wrapped either when stderr is not a terminal).
err_console = Console(stderr=True, soft_wrap=not bool(getattr(sys.stderr, "isatty", lambda: False)()))
# Answers go to stdout. Piped or redirected (not a terminal), lines are never wrapped, so a
# figure is never split from its label and scripts can grep whole lines; tables get a wide page.
_STDOUT_TTY = bool(getattr(sys.stdout, "isatty", lambda: False)())
out_console = Console() if _STDOUT_TTY else Console(soft_wrap=True, width=400)

_QUIET = {"on": False}


def set_quiet(quiet: bool) -> None:
    _QUIET["on"] = bool(quiet)


def is_quiet() -> bool:
    return _QUIET["on"]


def print_json(obj: Any) -> None:
    """Print one JSON object on stdout (NaN/inf become null, numpy types become plain)."""
    sys.stdout.write(json.dumps(plain(obj), indent=2) + "\n")
    sys.stdout.flush()


def info(message: str) -> None:
    """A progress or status line on stderr (silenced by --quiet)."""
    if not is_quiet():
        err_console.print(message)


@contextlib.contextmanager
def progress(description: str, total: float | None = None) -> Iterator[Any]:
    """A progress bar on stderr. Yields `advance(n=1, description=None)`."""
    if is_quiet() or not sys.stderr.isatty():
        info(f"{description} ...")

        def advance(n: float = 1, description: str | None = None) -> None:
            return None

        yield advance
        return
    with Progress(
        TextColumn("{task.description}"), BarColumn(), TextColumn("{task.percentage:>3.0f}%"),
        TimeElapsedColumn(), console=err_console, transient=True,
    ) as bar:
        task = bar.add_task(description, total=total)

        def advance(n: float = 1, description: str | None = None) -> None:
            bar.update(task, advance=n, **({"description": description} if description else {}))

        yield advance


def money(value: float, currency: str = "USD") -> str:
    """Format money with grouping: 'USD 1,234,567'."""
    return f"{currency} {value:,.0f}"


def count(value: float) -> str:
    """Format a large count with grouping: '12,345,678'."""
    return f"{value:,.0f}"


def existing_book(value: Path | None) -> Path | None:
    """Typer callback of a `--book` option that reads a book: a book file named there must exist
    (a mistyped path would otherwise read as an empty book and give an optimistic answer)."""
    if value is not None and not Path(value).is_file():
        raise typer.BadParameter(f"{value}: no book file there (a book is created by pledge book commit)")
    return value


def book_option(help_text: str = "Book file (default: SCENARIO/book.sqlite).", *, must_exist: bool = True):
    """The `--book` option; `must_exist` for every command but the one that creates a book."""
    return typer.Option(None, "--book", help=help_text, callback=existing_book if must_exist else None)
