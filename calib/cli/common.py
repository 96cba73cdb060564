"""Pieces every command shares: the ``--db`` and ``--json`` options and opening the store.

A command that touches the database takes ``db: DbOption = None`` and opens the store with
``with open_store(db) as store:``; the URL is ``--db``, else ``CALIB_DB``, else
``sqlite:///db/calib.sqlite`` (see :mod:`calib.settings`).
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from contextlib import contextmanager
from datetime import datetime
from pathlib import Path
from typing import TYPE_CHECKING, Annotated, Any

import typer

from calib.as_of import AS_OF_HELP, parse_as_of
from calib.errors import AsOfError, StoreUnavailableError
from calib.record.codec import encode
from calib.settings import Settings, get_settings

if TYPE_CHECKING:
    from calib.store.engine import Store

DbOption = Annotated[
    str | None,
    typer.Option(
        "--db",
        metavar="URL",
        help="Database URL (default: $CALIB_DB, else sqlite:///db/calib.sqlite).",
        show_default=False,
    ),
]
JsonOption = Annotated[bool, typer.Option("--json", help="Print the result as JSON.")]


def _as_of(text: str) -> datetime:
    try:
        return parse_as_of(text)
    except AsOfError as exc:  # typer names the option; the reason follows
        raise typer.BadParameter(f"{exc.value!r}: {exc.reason}") from None


AsOfOption = Annotated[
    datetime | None,
    typer.Option(
        "--as-of",
        metavar="TIME",
        parser=_as_of,
        help=f"{AS_OF_HELP}; default now.",
        show_default=False,
    ),
]
"""``--as-of TIME``: parsed by :func:`calib.as_of.parse_as_of` to a UTC datetime."""


def output_file(flag: str, help: str) -> Any:
    """An optional ``Path`` option naming a file a command writes (no default shown)."""
    return typer.Option(flag, help=help, show_default=False)


SettingsOption = Annotated[
    Path | None,
    typer.Option(
        "--settings",
        metavar="TOML",
        help="Settings file (TOML) with [calibration] and [gates] tables.",
        show_default=False,
    ),
]
EstimateOption = Annotated[
    int | None,
    typer.Option(
        "--estimate", help="Historical estimate id (default: newest converged).", show_default=False
    ),
]

ClusterOption = Annotated[
    str | None,
    typer.Option(
        "--cluster",
        metavar="ADDRESS",
        help="Run the work on the Dask cluster whose scheduler is at ADDRESS "
        "(tcp://host:8786; needs the 'cluster' extra); the store stays where --db says.",
        show_default=False,
    ),
]
"""``--cluster ADDRESS``: hand to :func:`calib.compute.executor.open_executor`."""
WorkersOption = Annotated[
    int | None,
    typer.Option(
        "--workers",
        min=1,
        help="Local worker processes (default: 1; rolling estimates: the cores).",
        show_default=False,
    ),
]
CommoditiesOption = Annotated[
    list[str] | None,
    typer.Option(
        "--commodity",
        metavar="CODE",
        help="A commodity (repeat for several).",
        show_default=False,
    ),
]
AllCommoditiesOption = Annotated[
    bool, typer.Option("--all", help="Every registered commodity.", show_default=False)
]


def chosen_commodities(store: Store, named: list[str | None] | list[str], every: bool) -> list[str]:
    """The commodities a command was given: those ``named`` (positional and ``--commodity``,
    first mention first), or with ``every`` (``--all``) every registered one.

    Raises
    ------
    CommoditySelectionError
        None named and no ``--all``; names together with ``--all``; ``--all`` on a store
        with no commodity.
    """
    from calib.errors import CommoditySelectionError
    from calib.store.quotes import all_commodity_codes

    codes = list(dict.fromkeys(c for c in named if c))
    if every and codes:
        raise CommoditySelectionError("name commodities or give --all, not both")
    if every:
        with store.sessions() as session:
            codes = all_commodity_codes(session=session)
        if not codes:
            raise CommoditySelectionError("--all: no commodity is registered in the store")
    if not codes:
        raise CommoditySelectionError("name a commodity (COMMODITY or --commodity) or give --all")
    return codes


@contextmanager
def open_store(
    db: str | None, *, check: bool = True, read_only: bool = False
) -> Iterator[tuple[Store, Settings]]:
    """The store named by ``--db`` (or the settings) and the settings, for a ``with`` block.

    With ``check`` (the default) the database must be at this program's schema revision
    (:func:`calib.store.migrate.check_current`). A command that only reads passes
    ``read_only``: the store is opened for reading only (SQLite: no write, no ``-wal``/``-shm``
    file where the file or its folder is read-only, so it works on a read-only mount; see
    :func:`calib.store.engine.create_store_engine`). A database that cannot be reached raises
    :class:`~calib.errors.StoreUnavailableError` (one line, no traceback).
    """
    from sqlalchemy.exc import OperationalError

    from calib.store.engine import store_for

    settings = get_settings(db)
    with store_for(settings.db_url, read_only=read_only) as store:
        try:
            if check:
                from calib.store.migrate import check_current

                check_current(store.engine)
            yield store, settings
        except OperationalError as exc:
            detail = str(exc.orig).strip().splitlines()[0] if exc.orig else str(exc)
            raise StoreUnavailableError(store.url, detail) from None


def echo_json(payload: object) -> None:
    """Print ``payload`` as indented JSON (dates in ISO form, numpy values as numbers)."""
    typer.echo(json.dumps(payload, indent=2, default=encode, allow_nan=False))
