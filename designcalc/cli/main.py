"""The ``designcalc`` command: one sub-module per subcommand, user errors as exit code 2."""

from __future__ import annotations

import os
import sys

import typer
from rich.console import Console
from rich.markup import escape

from designcalc.errors import DesignCalcError

app = typer.Typer(
    name="designcalc",
    help="Plan randomized experiments on social networks: power, minimum detectable effects, sample sizes, reports.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)


def stderr_console() -> Console:
    return Console(stderr=True, no_color=bool(os.environ.get("NO_COLOR")), highlight=False)


def stdout_console() -> Console:
    return Console(no_color=bool(os.environ.get("NO_COLOR")), highlight=False, width=200 if not sys.stdout.isatty() else None)


def _register() -> None:
    from designcalc.cli import check, compare, fit, mde, measure, power, report, size, store

    check.register(app)
    power.register(app)
    mde.register(app)
    size.register(app)
    compare.register(app)
    report.register(app)
    store.register(app)
    fit.register(app)
    measure.register(app)


_register()


def run() -> None:
    """Entry point: user mistakes print one clear message and exit 2, never a traceback."""
    try:
        code = app(standalone_mode=False)
    except DesignCalcError as exc:
        # The message is text, not markup: "[population]" in a hint must print as written.
        stderr_console().print(f"[bold red]error:[/] {escape(str(exc))}", markup=True, soft_wrap=True)
        sys.exit(2)
    except (typer.Abort, KeyboardInterrupt):
        stderr_console().print("interrupted")
        sys.exit(130)
    except typer.Exit as exc:
        sys.exit(exc.exit_code)
    except Exception as exc:
        # Usage errors of the option parser (click's, or typer's vendored copy)
        # know how to show themselves; anything else is a bug and keeps its traceback.
        show = getattr(exc, "show", None)
        if callable(show) and hasattr(exc, "exit_code"):
            show()
            sys.exit(2)
        raise
    sys.exit(code if isinstance(code, int) else 0)
