"""The quick SQLite read of the set in force (calib.store.quick): it reads the columns as the
models store them, and steps aside (NotReadError) whenever the case is not ordinary. That it
gives the store's answer on unusual event histories is tests/serving/test_in_force.py."""

from __future__ import annotations

from pathlib import Path
from typing import Any, cast

import pytest
from sqlalchemy import JSON, Date, Table

from bench.serve_seed import CODE, candidate, commodity
from calib.record.run import EVENT_COLUMNS, RUN_COLUMNS
from calib.store import quick
from calib.store.base import UtcDateTime
from calib.store.engine import create_store_engine, make_store
from calib.store.migrate import upgrade
from calib.store.run_models import CalibrationRun, RunEvent
from calib.workflows.approve import approve


def test_column_kinds_match_the_models() -> None:
    for table, names in (
        (CalibrationRun.__table__, RUN_COLUMNS),
        (RunEvent.__table__, EVENT_COLUMNS),
    ):
        for name in names:
            kind: Any = cast(Table, table).c[name].type
            assert (name in quick.DATE_COLUMNS) == isinstance(kind, Date), name
            assert (name in quick.TIME_COLUMNS) == isinstance(kind, UtcDateTime), name
            assert (name in quick.JSON_COLUMNS) == isinstance(kind, JSON), name


@pytest.mark.parametrize(
    "url",
    [
        "postgresql://calib@localhost/calib",
        "sqlite://",
        "sqlite:///:memory:",
        "sqlite:///a%20b.sqlite",
        "sqlite:///c.sqlite?mode=ro",
        "sqlite:///no/such/file.sqlite",
    ],
)
def test_anything_but_a_plain_sqlite_file_goes_to_the_store(url: str) -> None:
    with pytest.raises(quick.NotReadError):
        quick.read_in_force(url, CODE)


def test_an_unknown_commodity_or_another_schema_revision_goes_to_the_store(
    tmp_path: Path,
) -> None:
    url = f"sqlite:///{tmp_path / 'q.sqlite'}"
    engine = create_store_engine(url)
    upgrade(engine)
    store = make_store(url)
    try:
        cid, eid = commodity(store)
        approve(store.sessions, candidate(store, cid, eid, 1), by="risk", note="ok")
        found = quick.read_in_force(url, CODE)
        assert found is not None and found.status == "approved"
        with pytest.raises(quick.NotReadError):  # the store names the unknown code
            quick.read_in_force(url, "NOPE")
        with engine.begin() as conn:
            conn.exec_driver_sql(f"UPDATE {quick.VERSION_TABLE} SET version_num = 'older'")
        with pytest.raises(quick.NotReadError):  # the store says what to do
            quick.read_in_force(url, CODE)
    finally:
        store.engine.dispose()
        engine.dispose()
