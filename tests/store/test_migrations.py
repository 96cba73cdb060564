"""Migrations: empty -> head -> empty on both engines; models match; versions checked."""

from __future__ import annotations

import pytest
import sqlalchemy as sa
from alembic.autogenerate import compare_metadata
from alembic.runtime.migration import MigrationContext

from calib.errors import SchemaTooNewError, StoreNotInitialisedError
from calib.store.base import Base
from calib.store.engine import create_store_engine
from calib.store.migrate import check_current, downgrade, head_revision, upgrade

TABLES = {
    "commodities",
    "ingest_batches",
    "futures_settlements",
    "option_quotes",
    "rate_quotes",
    "quarantined_rows",
}


def test_upgrade_from_empty_then_downgrade_to_empty(empty_db_url: str) -> None:
    engine = create_store_engine(empty_db_url)
    try:
        result = upgrade(engine)
        assert (result.before, result.after) == (None, head_revision())
        assert set(sa.inspect(engine).get_table_names()) >= TABLES
        assert not upgrade(engine).changed  # again: nothing to do
        downgrade(engine)
        assert set(sa.inspect(engine).get_table_names()) <= {"alembic_version"}
        assert upgrade(engine).after == head_revision()  # an older (empty) schema is upgraded
    finally:
        engine.dispose()


def test_models_match_migrated_schema(db_url: str) -> None:
    engine = create_store_engine(db_url)
    try:
        with engine.connect() as conn:
            context = MigrationContext.configure(conn, opts={"compare_type": True})
            assert compare_metadata(context, Base.metadata) == []
    finally:
        engine.dispose()


def test_newer_schema_is_refused_untouched(empty_db_url: str) -> None:
    engine = create_store_engine(empty_db_url)
    try:
        upgrade(engine)
        with engine.begin() as conn:
            conn.exec_driver_sql("UPDATE alembic_version SET version_num = '9999'")
        with pytest.raises(SchemaTooNewError, match=r"9999.*newer calib"):
            upgrade(engine)
        with pytest.raises(SchemaTooNewError):
            check_current(engine)
        with engine.connect() as conn:
            assert (
                conn.exec_driver_sql("SELECT version_num FROM alembic_version").scalar() == "9999"
            )
    finally:
        engine.dispose()


def test_uninitialised_database_says_run_init(empty_db_url: str) -> None:
    engine = create_store_engine(empty_db_url)
    try:
        with pytest.raises(StoreNotInitialisedError, match="calib init"):
            check_current(engine)
    finally:
        engine.dispose()


def test_sqlite_connections_use_wal_foreign_keys_and_busy_timeout(tmp_path) -> None:  # type: ignore[no-untyped-def]
    engine = create_store_engine(f"sqlite:///{tmp_path / 'x.sqlite'}")
    try:
        with engine.connect() as conn:
            assert conn.exec_driver_sql("PRAGMA journal_mode").scalar() == "wal"
            assert conn.exec_driver_sql("PRAGMA foreign_keys").scalar() == 1
            assert conn.exec_driver_sql("PRAGMA busy_timeout").scalar() == 10_000
    finally:
        engine.dispose()
