"""Store queries: one day, trading days, futures history, versions, and the day index seek."""

from __future__ import annotations

import os
from datetime import UTC, date, datetime
from pathlib import Path

import numpy as np
import pytest
from sqlalchemy import select, text
from sqlalchemy.exc import DBAPIError

from calib.errors import StoreURLError, UnknownCommodityError
from calib.store.engine import Store, make_store, parse_url
from calib.store.migrate import upgrade
from calib.store.models import Commodity
from calib.store.quotes import (
    DayQuotes,
    add_commodity,
    load_day,
    load_days,
    load_futures_history,
    trade_dates,
    zero_curves,
)
from calib.workflows.ingest import NewCommodity, ingest_file

FUT_HEADER = "trade_date,commodity,delivery,settle\n"
T1 = datetime(2025, 1, 1, tzinfo=UTC)  # receipt times in the past of the test run
T2 = datetime(2025, 1, 2, tzinfo=UTC)


def _put(store: Store, path: Path, body: str, kind: str, when: datetime) -> int:
    path.write_text(body)
    report = ingest_file(
        store.sessions,
        path,
        kind,
        by="t",
        create=NewCommodity(),
        received_at=when,  # type: ignore[arg-type]
    )
    assert report.rows_rejected == 0, report.problems
    return report.batch_id


@pytest.fixture
def history(store: Store, tmp_path: Path) -> tuple[Store, int, int]:
    first = _put(
        store,
        tmp_path / "a.csv",
        FUT_HEADER
        + "2031-03-03,QRX,2031-05-01,50\n2031-03-03,QRX,2031-06-01,52\n"
        + "2031-03-04,QRX,2031-05-01,51\n2031-03-05,QRX,2031-05-01,49\n"
        + "2031-03-03,OTH,2031-05-01,7\n",
        "futures",
        T1,
    )
    second = _put(
        store, tmp_path / "b.csv", FUT_HEADER + "2031-03-04,QRX,2031-05-01,51.5\n", "futures", T2
    )
    _put(
        store,
        tmp_path / "r.csv",
        "trade_date,maturity,zero_rate\n2031-03-03,2032-03-03,0.05\n2031-03-03,2031-06-03,0.04\n",
        "rates",
        T1,
    )
    return store, first, second


def test_load_day_returns_sorted_read_only_arrays(history: tuple[Store, int, int]) -> None:
    store, first, _ = history
    with store.sessions() as s:
        day = load_day(session=s, commodity="QRX", trade_date=date(2031, 3, 3))
    np.testing.assert_array_equal(
        day.futures.delivery, np.array(["2031-05-01", "2031-06-01"], dtype="datetime64[D]")
    )
    np.testing.assert_array_equal(day.futures.settle, [50.0, 52.0])
    np.testing.assert_array_equal(day.rates.zero_rate, [0.04, 0.05])  # sorted by maturity
    assert first in day.batch_ids and len(day.options) == 0
    assert not day.futures.settle.flags.writeable
    np.testing.assert_array_equal(
        day.futures.settle_for(np.array(["2031-06-01", "2031-07-01"], dtype="datetime64[D]")),
        [52.0, np.nan],
    )
    # ACT/365, flat beyond the last point: exp(-0.05 * 730/365) (common practice)
    far = day.rates.discount(np.array(["2033-03-02"], dtype="datetime64[D]"))
    np.testing.assert_allclose(far, np.exp(-0.05 * 730 / 365), rtol=1e-15)


OPT_HEADER = "trade_date,commodity,delivery,expiry,kind,strike,premium\n"


def _same_day(a: DayQuotes, b: DayQuotes) -> None:
    assert (a.commodity, a.commodity_id, a.trade_date, a.as_of, a.batch_ids) == (
        b.commodity,
        b.commodity_id,
        b.trade_date,
        b.as_of,
        b.batch_ids,
    )
    for part in ("futures", "options", "rates"):
        x, y = getattr(a, part), getattr(b, part)
        for name, value in vars(x).items():
            other = getattr(y, name)
            if isinstance(value, np.ndarray):
                assert value.dtype == other.dtype and not value.flags.writeable, (part, name)
                np.testing.assert_array_equal(value, other, err_msg=f"{part}.{name}")
            else:
                assert value == other


def test_load_days_gives_each_day_what_load_day_gives(
    history: tuple[Store, int, int], tmp_path: Path
) -> None:
    store, first, second = history
    # options of two days, out of order in the file; a later batch re-states one quote
    early = _put(
        store,
        tmp_path / "o1.csv",
        OPT_HEADER
        + "2031-03-04,QRX,2031-05-01,2031-04-25,call,50,2.5\n"
        + "2031-03-03,QRX,2031-06-01,2031-05-26,call,48,5.0\n"
        + "2031-03-03,QRX,2031-05-01,2031-04-25,call,50,2.1\n"
        + "2031-03-03,QRX,2031-05-01,2031-04-25,put,50,1.9\n"
        + "2031-03-03,QRX,2031-05-01,2031-04-25,call,45,5.2\n",
        "options",
        T1,
    )
    late = _put(
        store,
        tmp_path / "o2.csv",
        OPT_HEADER + "2031-03-03,QRX,2031-05-01,2031-04-25,put,50,2.0\n",
        "options",
        T2,
    )
    wanted = [date(2031, 3, 5), date(2031, 3, 3), date(2031, 3, 9), date(2031, 3, 4)]
    for as_of in (datetime(2025, 1, 1, 12, tzinfo=UTC), datetime(2025, 1, 3, tzinfo=UTC)):
        with store.sessions() as s:
            days = load_days(session=s, commodity="QRX", dates=wanted, as_of=as_of)
            one_by_one = [
                load_day(session=s, commodity="QRX", trade_date=d, as_of=as_of) for d in wanted
            ]
        assert [d.trade_date for d in days] == wanted
        for batched, alone in zip(days, one_by_one, strict=True):
            _same_day(batched, alone)
    # as known now: sorted by delivery, expiry, put before call, strike; the re-stated put
    third = days[1]
    assert third.options.strike.tolist() == [50.0, 45.0, 50.0, 48.0]
    assert third.options.is_call.tolist() == [False, True, True, True]
    assert third.options.premium.tolist() == [2.0, 5.2, 2.1, 5.0]
    assert np.isnan(third.options.implied_vol).all()
    assert {first, early, late} < set(third.batch_ids) and len(third.batch_ids) == 4  # + rates
    assert len(days[2].futures) == len(days[2].options) == len(days[2].rates) == 0
    assert days[3].futures.settle.tolist() == [51.5] and second in days[3].batch_ids


def test_trade_dates_and_history_follow_as_of(history: tuple[Store, int, int]) -> None:
    store, first, second = history
    with store.sessions() as s:
        days = trade_dates(session=s, commodity="QRX")
        bounded = trade_dates(
            session=s, commodity="QRX", start=date(2031, 3, 4), end=date(2031, 3, 4)
        )
        now = load_futures_history(session=s, commodity="QRX")
        then = load_futures_history(
            session=s, commodity="QRX", as_of=datetime(2025, 1, 1, 12, tzinfo=UTC)
        )
        before = trade_dates(session=s, commodity="QRX", as_of=datetime(2024, 1, 1, tzinfo=UTC))
    assert days == [date(2031, 3, 3), date(2031, 3, 4), date(2031, 3, 5)]
    assert bounded == [date(2031, 3, 4)] and before == []
    assert list(now.columns) == ["trade_date", "delivery", "settle", "row_id", "batch_id"]
    assert now["settle"].tolist() == [50.0, 52.0, 51.5, 49.0]
    assert now["batch_id"].tolist() == [first, first, second, first]
    assert then["settle"].tolist() == [50.0, 52.0, 51.0, 49.0]


def test_unknown_commodity_in_queries(store: Store) -> None:
    with store.sessions() as s, pytest.raises(UnknownCommodityError, match="'NOPE'"):
        load_day(session=s, commodity="NOPE", trade_date=date(2031, 3, 3))


def test_one_day_is_one_index_seek(store: Store) -> None:
    dialect = store.engine.dialect.name
    with store.engine.connect() as conn:
        if dialect == "sqlite":
            plan = conn.exec_driver_sql(
                "EXPLAIN QUERY PLAN SELECT * FROM option_quotes "
                "WHERE commodity_id = 1 AND trade_date = '2031-03-03'"
            ).all()
            detail = " ".join(str(row[-1]) for row in plan)
            assert "USING INDEX" in detail and "(commodity_id=? AND trade_date=?)" in detail
        else:
            conn.execute(text("SET enable_seqscan = off"))  # tiny tables would be scanned
            plan = conn.execute(
                text(
                    "EXPLAIN SELECT * FROM option_quotes "
                    "WHERE commodity_id = 1 AND trade_date = '2031-03-03'"
                )
            ).all()
            detail = " ".join(str(row[0]) for row in plan)
            assert "uq_option_quotes_commodity_id" in detail


@pytest.mark.parametrize("url", ["mysql://u:PASSWORD@h/d", "postgresql://u:PASSWORD@h:notaport/d"])
def test_unusable_url_never_echoes_the_password(url: str) -> None:
    with pytest.raises(StoreURLError) as info:
        parse_url(url)
    assert "PASSWORD" not in str(info.value) and "u:***@h" in str(info.value)


def test_read_only_store_reads_and_refuses_writes(
    store: Store, db_url: str, tmp_path: Path
) -> None:
    _put(
        store,
        tmp_path / "r.csv",
        "trade_date,maturity,zero_rate\n2031-03-03,2032-03-03,0.05\n",
        "rates",
        T1,
    )
    reader = make_store(db_url, read_only=True)
    try:
        with reader.sessions() as s:
            curves = zero_curves(session=s, start=date(2031, 3, 3), end=date(2031, 3, 3))
            assert curves[date(2031, 3, 3)].zero_rate.tolist() == [0.05]
        with pytest.raises(DBAPIError, match=r"(?i)read-?only"), reader.sessions.begin() as s:
            add_commodity(
                session=s, code="NEW", name="n", unit="t", currency="USD", calendar_rule="m"
            )
    finally:
        reader.engine.dispose()


def test_read_only_sqlite_on_a_folder_it_cannot_write(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # A read-only mount: no WAL side file can be made, so the file is opened immutable.
    url = f"sqlite:///{tmp_path / 'ro.sqlite'}"
    writer = make_store(url)
    upgrade(writer.engine)
    writer.engine.dispose()  # the last connection checkpoints and removes the WAL files
    monkeypatch.setattr(os, "access", lambda *_a, **_k: False)
    reader = make_store(url, read_only=True)
    try:
        with reader.sessions() as s:
            assert s.scalars(select(Commodity.code)).all() == []
        assert not (tmp_path / "ro.sqlite-shm").exists()
    finally:
        reader.engine.dispose()
