"""``calib serve``: the HTTP read API (and approval, with a token) under uvicorn.

Exit codes: 0 stopped; 2 a user mistake (database not initialised, unusable token file).
"""

from __future__ import annotations

import ipaddress
import os
from pathlib import Path
from typing import Annotated

import typer

from calib.api.timeouts import DEFAULT_TIMEOUT, TIMEOUT_ENV
from calib.api.tokens import TOKEN_ENV, TOKEN_FILE_ENV, read_token, token_from_env
from calib.cli.common import DbOption, open_store

LOOPBACK = "127.0.0.1"


def register(app: typer.Typer) -> None:
    """Add the ``serve`` command to ``app``."""
    app.command("serve")(serve_cmd)


def _is_loopback(host: str) -> bool:
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def serve_cmd(
    host: Annotated[
        str, typer.Option("--host", help="Address to listen on (loopback unless you say so).")
    ] = LOOPBACK,
    port: Annotated[int, typer.Option("--port", min=1, max=65535, help="TCP port.")] = 8000,
    workers: Annotated[int, typer.Option("--workers", min=1, help="Server processes.")] = 1,
    token_file: Annotated[
        Path | None,
        typer.Option(
            "--token-file",
            help=f"File holding the bearer token that enables approval over HTTP "
            f"(or set ${TOKEN_ENV}); without one the approval route does not exist.",
            show_default=False,
        ),
    ] = None,
    timeout: Annotated[
        float,
        typer.Option(
            "--timeout",
            min=0.001,
            metavar="SECONDS",
            help="Longest a database statement may run before the request answers 503 "
            f"(or set ${TIMEOUT_ENV}).",
        ),
    ] = DEFAULT_TIMEOUT,
    access_log: Annotated[
        bool, typer.Option("--access-log", help="Log every request (costs throughput).")
    ] = False,
    db: DbOption = None,
) -> None:
    """Serve the approved parameter sets over HTTP (OpenAPI schema at /openapi.json) and the
    morning review pages at /."""
    import uvicorn

    with open_store(db) as (store, settings):  # refuse to start on a database not at head
        url = settings.db_url
    if token_file is not None:
        read_token(token_file)
        os.environ[TOKEN_FILE_ENV] = str(token_file.resolve())
    token = token_from_env()
    os.environ["CALIB_DB"] = url  # the workers build the app from the environment
    os.environ[TIMEOUT_ENV] = repr(timeout)
    approve = "on (bearer token)" if token else "off (no token configured)"
    typer.echo(f"calib API on http://{host}:{port} ({store.url}); approval {approve}", err=True)
    typer.echo(f"review pages: open http://{host}:{port}/ in a browser", err=True)
    if not _is_loopback(host):
        typer.echo(f"caution: listening on {host}, beyond this machine", err=True)
        if token:
            typer.echo("caution: plain HTTP, the token crosses the network in clear", err=True)
    uvicorn.run(
        "calib.api.app:app_from_env",
        factory=True,
        host=host,
        port=port,
        workers=workers,
        access_log=access_log,
        log_level="warning",
    )
