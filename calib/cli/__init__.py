"""The ``calib`` command line: thin wrappers that parse, call a workflow and print.

Each command group lives in its own module with a ``register(app)`` function. A command module
imports only the standard library, typer and the light parts of calib at the top; the numeric
stack (numpy, scipy, cvxpy, pandas, numba, matplotlib) and the store are imported inside the
commands that use them, so ``calib --help`` and the read-only commands start quickly
(``tests/cli/test_startup.py`` guards it).

:func:`main` runs typer in its standalone mode, so a usage error (a missing or malformed
option, an unknown command) prints the usual short usage message naming the option as typed
and exits 2; calib's own errors become one clear line on stderr: exit 2 for a user mistake
(:class:`~calib.errors.InputError`), 1 for any other calib failure. Never a traceback for
a user mistake.
"""

from __future__ import annotations

import json
import sys
from functools import cache
from typing import Annotated

import typer

from calib.errors import CalibError, InputError

EXIT_USAGE = 2
"""A usage error (typer/click) or a user mistake (:class:`~calib.errors.InputError`)."""
EXIT_FAILED = 1
"""A calib failure that is not the user's mistake (solver, database unavailable, ...)."""

app = typer.Typer(
    name="calib",
    help="Calibrate the two-factor commodity model to settled futures and option quotes.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
    # help texts are plain text: "[calibration]" must print as written, not vanish as markup
    rich_markup_mode=None,
)


@app.command("version")
def version_cmd(
    as_json: Annotated[bool, typer.Option("--json", help="Print the result as JSON.")] = False,
) -> None:
    """Print calib's version as runs and estimates record it (``+g<commit>`` from a checkout)."""
    from calib.workflows.provenance import code_version

    version = code_version()
    typer.echo(json.dumps({"version": version}) if as_json else version)


@cache
def _register_all() -> None:
    """Add every command group to ``app``, once per process (``main`` may run many times in
    one process, as in the tests: registering again would stack duplicate commands)."""
    from importlib import import_module

    for name in _COMMAND_MODULES:
        import_module(f"calib.cli.{name}").register(app)


# Command modules, each with register(app); one line per group keeps merges simple.
_COMMAND_MODULES: list[str] = [
    # one module name per line
    "store_cmds",
    "run_cmds",
    "serve_cmds",
    "backfill_cmds",
    "price_cmds",
    "risk_cmds",
    "stability_cmds",
    "hedge_cmds",
]


def main() -> None:
    """Entry point of the ``calib`` console script."""
    _register_all()
    try:
        # standalone: typer/click print their own usage errors and exit 2, and pass on the code
        # of typer.Exit / SystemExit; only calib's errors reach the handlers below
        app(prog_name="calib")
    except InputError as exc:
        typer.echo(f"error: {exc}", err=True)
        sys.exit(EXIT_USAGE)
    except CalibError as exc:
        typer.echo(f"failed: {exc}", err=True)
        sys.exit(EXIT_FAILED)
