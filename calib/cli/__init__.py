"""The ``calib`` command line: thin wrappers that parse, call a workflow and print.

Each command group lives in its own module with a ``register(app)`` function; :func:`main`
turns calib's own errors into one clear line on stderr and exit code 2 (never a traceback for
a user mistake).
"""

from __future__ import annotations

import sys

import typer

from calib import __version__
from calib.errors import CalibError, InputError

app = typer.Typer(
    name="calib",
    help="Calibrate the two-factor commodity model to settled futures and option quotes.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)


@app.command("version")
def version_cmd() -> None:
    """Print calib's version."""
    typer.echo(__version__)


def _register_all() -> None:
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
        code = app(standalone_mode=False)
    except InputError as exc:
        typer.echo(f"error: {exc}", err=True)
        sys.exit(2)
    except CalibError as exc:
        typer.echo(f"failed: {exc}", err=True)
        sys.exit(1)
    except typer.Exit as exc:
        sys.exit(exc.exit_code)
    except typer.Abort:
        typer.echo("aborted", err=True)
        sys.exit(130)
    except Exception as exc:  # click's usage errors come through here in non-standalone mode
        import click

        if isinstance(exc, click.ClickException):
            exc.show()
            sys.exit(exc.exit_code)
        raise
    # click returns the code of typer.Exit(code) instead of exiting when not standalone
    if isinstance(code, int) and code != 0:
        sys.exit(code)
