"""Alembic environment for calib.

The connection comes from ``config.attributes["connection"]`` when calib runs the migrations
(:mod:`calib.store.migrate`); otherwise (the ``alembic`` command line, for developers) the URL
comes from the same settings object as the program (``CALIB_DB`` or the default file).
"""

from __future__ import annotations

from alembic import context
from sqlalchemy import Connection

import calib.store.models  # noqa: F401  (registers the tables on Base.metadata)
from calib.settings import get_settings
from calib.store import run_models  # noqa: F401  (the run and estimate tables)
from calib.store.base import Base
from calib.store.engine import create_store_engine

target_metadata = Base.metadata


def _run(connection: Connection) -> None:
    context.configure(
        connection=connection,
        target_metadata=target_metadata,
        render_as_batch=connection.dialect.name == "sqlite",
        compare_type=True,
    )
    with context.begin_transaction():
        context.run_migrations()


def run_migrations_online() -> None:
    connection = context.config.attributes.get("connection")
    if connection is not None:
        _run(connection)
        return
    engine = create_store_engine(get_settings().db_url)
    try:
        with engine.begin() as conn:
            _run(conn)
    finally:
        engine.dispose()


if context.is_offline_mode():
    raise SystemExit("calib's migrations run online only (give a database URL)")
run_migrations_online()
