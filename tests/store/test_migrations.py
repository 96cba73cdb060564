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


def test_sqlite_store_with_data_upgrades_through_table_rebuilds(tmp_path) -> None:  # type: ignore[no-untyped-def]
    """A populated SQLite store at revision 0002 upgrades to head and back.

    Later revisions rebuild tables that other rows reference (SQLite alters constraints by
    copy, drop and rename); with foreign keys enforced mid-change that used to fail with
    "FOREIGN KEY constraint failed" on a store that held estimates.
    """
    engine = create_store_engine(f"sqlite:///{tmp_path / 'old.sqlite'}")
    try:
        upgrade(engine, "0002")
        with engine.begin() as conn:
            conn.exec_driver_sql(
                "INSERT INTO commodities (id, code, name, unit, currency, calendar_rule)"
                " VALUES (1, 'QLM', 'Quellium', 't', 'USD', 'm')"
            )
            conn.exec_driver_sql(
                "INSERT INTO historical_estimates (id, commodity_id, created_at, created_by,"
                " source, window_start, window_end, converged, message, mu, kappa, alpha, lam,"
                " sigma_spot, sigma_yield, rho, std_errors, noise_sd, inputs, inputs_sha256,"
                " settings, code_version) VALUES (1, 1, '2031-01-06 07:00:00', 'tester',"
                " 'imported', '2030-01-02', '2030-12-30', 1, 'imported', 0.05, 1.2, 0.06, 0.02,"
                " 0.3, 0.2, 0.7, '{}', '[]', '{}', 'x', '{}', 'v')"
            )
            conn.exec_driver_sql(
                "INSERT INTO estimate_states (estimate_id, trade_date, log_spot_filtered,"
                " yield_filtered, log_spot_smoothed, yield_smoothed)"
                " VALUES (1, '2030-12-30', 4.0, 0.05, 4.0, 0.05)"
            )
        assert upgrade(engine).after == head_revision()
        with engine.connect() as conn:
            assert conn.exec_driver_sql("SELECT count(*) FROM estimate_states").scalar() == 1
            assert conn.exec_driver_sql("SELECT count(*) FROM historical_estimates").scalar() == 1
            assert conn.exec_driver_sql("PRAGMA foreign_keys").scalar() == 1  # on again
        downgrade(engine, "0002")
        with engine.connect() as conn:
            assert conn.exec_driver_sql("SELECT count(*) FROM estimate_states").scalar() == 1
    finally:
        engine.dispose()
