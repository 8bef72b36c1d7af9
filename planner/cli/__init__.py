"""The `pledge` command line: a thin layer over the planner and forecasting APIs.

Each command group lives in its own module and registers itself on `app`.
Exit status: 0 answered (a not-deliverable verdict is an answer), 2 bad input, 1 internal error.
"""
from __future__ import annotations

import sys

import typer

from planner.errors import InputError

from .common import err_console, set_quiet

# Typer's parse errors derive from click's ClickException (click's own, or the copy newer Typer
# versions carry inside themselves): found by name so that both work.
_CLICK_EXCEPTION = next(c for c in typer.BadParameter.__mro__ if c.__name__ == "ClickException")

app = typer.Typer(
    name="pledge",
    help="Forecast daypart audiences and plan risk-aware airtime buys for guaranteed deals.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)


@app.callback()
def _root(quiet: bool = typer.Option(False, "--quiet", "-q", help="Silence progress output.")) -> None:
    set_quiet(quiet)


def _register() -> None:
    # Import for side effects: each module adds its commands to `app`.
    import importlib

    for name in ("scenario_cmds", "forecast_cmds", "deal_cmds", "book_cmds", "stress_cmds", "report_cmds"):
        try:
            importlib.import_module(f"planner.cli.{name}")
        except ModuleNotFoundError as exc:  # a command group not written yet
            if exc.name != f"planner.cli.{name}":
                raise


_register()


def main(argv: list[str] | None = None) -> int:
    """Console entry point. Returns (and exits with) the documented status code."""
    try:
        rv = app(args=argv, prog_name="pledge", standalone_mode=False)
        code = rv if isinstance(rv, int) else 0  # --help and friends return their exit code
    except SystemExit as exc:
        code = exc.code if isinstance(exc.code, int) else (0 if exc.code is None else 1)
    except _CLICK_EXCEPTION as exc:
        ctx = getattr(exc, "ctx", None)
        if type(exc).__name__ == "NoArgsIsHelpError" and ctx is not None:  # `pledge` or a group alone
            err_console.print(ctx.get_help(), markup=False, highlight=False)
        else:  # a bad option or argument: one line
            where = ctx.command_path if ctx is not None else "pledge"
            err_console.print(f"error: {where}: {exc.format_message()} (see {where} --help)",
                              markup=False, highlight=False, soft_wrap=True)
        code = exc.exit_code
    except typer.Abort:
        err_console.print("aborted")
        code = 1
    except InputError as exc:
        err_console.print(f"error: {exc}", markup=False, highlight=False, soft_wrap=True)
        code = 2
    except KeyboardInterrupt:
        err_console.print("interrupted")
        code = 1
    except Exception as exc:  # noqa: BLE001 - the documented 'internal error' exit
        err_console.print(f"internal error: {type(exc).__name__}: {exc}", markup=False, highlight=False, soft_wrap=True)
        code = 1
    if argv is None:
        sys.exit(code)
    return code
