"""Reading and writing quotes: the store functions workflows call.

Every function takes the session as the keyword ``session`` and does one thing; the caller
owns the transaction (STYLE 13).

Versions
--------
Rows are never updated. A later batch carrying the same key (commodity, trade date, delivery
and, for options, expiry, kind and strike) supersedes the earlier value. Readers take an
``as_of`` time (default: now) and see, per key, the row of the latest batch received at or
before it (ties broken by batch id), i.e. what was known at that time.
"""

from __future__ import annotations

import io
import sqlite3
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import date, datetime
from typing import TYPE_CHECKING, Any, cast

import numpy as np
import numpy.typing as npt
from sqlalchemy import ColumnElement, Select, Table, func, insert, select, update
from sqlalchemy.exc import DBAPIError, OperationalError
from sqlalchemy.orm import Session

from calib.errors import UnknownCommodityError
from calib.record.codec import copy_fields
from calib.store.base import utc_now
from calib.store.models import (
    Commodity,
    FuturesSettlement,
    IngestBatch,
    OptionQuote,
    QuarantinedRow,
    RateQuote,
)
from calib.types import BoolArray, FloatArray, IntArray, readonly

if TYPE_CHECKING:  # imported where used: reading a run or the set in force needs neither
    import pandas as pd
    import pyarrow as pa

DateArray = npt.NDArray[np.datetime64]
"""``datetime64[D]`` array of calendar dates."""

DAYS_PER_YEAR = 365.0
"""ACT/365: the year fraction between two dates is their distance in days over 365."""

FUTURES_KEY = ("commodity_id", "trade_date", "delivery")
OPTIONS_KEY = ("commodity_id", "trade_date", "delivery", "expiry", "is_call", "strike")
RATES_KEY = ("trade_date", "maturity")

_futures = cast(Table, FuturesSettlement.__table__)
_options = cast(Table, OptionQuote.__table__)
_rates = cast(Table, RateQuote.__table__)
_batches = cast(Table, IngestBatch.__table__)
_quarantine = cast(Table, QuarantinedRow.__table__)


def _dates(values: Sequence[date]) -> DateArray:
    return np.asarray(readonly(list(values), "datetime64[D]"))


def year_fraction(start: date, end: date) -> float:
    """ACT/365 years from ``start`` to ``end``."""
    return (end - start).days / DAYS_PER_YEAR


def year_fractions(start: date, end: DateArray) -> FloatArray:
    """ACT/365 year fractions from ``start`` to each date of ``end``."""
    origin = np.datetime64(start, "D")
    days = (np.asarray(end, dtype="datetime64[D]") - origin) / np.timedelta64(1, "D")
    return np.asarray(days / DAYS_PER_YEAR, dtype=np.float64)


# --- records handed to workflows ---------------------------------------------------------------


@dataclass(frozen=True)
class FuturesCurve:
    """One day's futures settlements, sorted by delivery. Arrays are read-only."""

    delivery: DateArray
    settle: FloatArray
    row_id: IntArray

    def __len__(self) -> int:
        return len(self.settle)

    def settle_for(self, delivery: DateArray) -> FloatArray:
        """The settlement of each delivery in ``delivery`` (NaN where none is stored)."""
        wanted = np.asarray(delivery, dtype="datetime64[D]")
        pos = np.searchsorted(self.delivery, wanted).clip(0, max(len(self) - 1, 0))
        if len(self) == 0:
            return np.full(wanted.shape, np.nan)
        found = self.delivery[pos] == wanted
        return np.where(found, self.settle[pos], np.nan)


@dataclass(frozen=True)
class OptionChain:
    """One day's option quotes, sorted by (delivery, expiry, put before call, strike).

    ``premium``, ``implied_vol``, ``bid`` and ``ask`` are NaN where the file gave none (every
    row has a premium or an implied volatility or both); ``american`` is ``True`` for an
    American-style quote (its premium and implied volatility are American ones). Arrays are
    read-only.
    """

    delivery: DateArray
    expiry: DateArray
    is_call: BoolArray
    strike: FloatArray
    premium: FloatArray
    implied_vol: FloatArray
    bid: FloatArray
    ask: FloatArray
    row_id: IntArray
    american: BoolArray

    def __len__(self) -> int:
        return len(self.strike)


@dataclass(frozen=True)
class ZeroCurve:
    """One day's zero curve: continuously compounded rates, ACT/365, sorted by maturity."""

    trade_date: date
    maturity: DateArray
    zero_rate: FloatArray
    row_id: IntArray

    def __len__(self) -> int:
        return len(self.zero_rate)

    def discount(self, dates: DateArray) -> FloatArray:
        """Discount factors ``exp(-r(t) t)`` to ``dates``; 1 where the curve is empty.

        Notes
        -----
        ``t`` is the ACT/365 year fraction from the trade date; ``r(t)`` is interpolated
        linearly in ``t`` between the curve's points and held flat beyond its ends.
        """
        t = year_fractions(self.trade_date, dates)
        if len(self) == 0:
            return np.ones_like(t)
        nodes = year_fractions(self.trade_date, self.maturity)
        return np.asarray(np.exp(-np.interp(t, nodes, self.zero_rate) * t), dtype=np.float64)


@dataclass(frozen=True)
class DayQuotes:
    """Everything stored for one commodity on one trading day, as known at ``as_of``."""

    commodity: str
    commodity_id: int
    trade_date: date
    as_of: datetime
    futures: FuturesCurve
    options: OptionChain
    rates: ZeroCurve
    batch_ids: tuple[int, ...]
    """The batches the rows above came from (sorted)."""


@dataclass(frozen=True)
class CommodityRecord:
    """A registered commodity."""

    id: int
    code: str
    name: str
    unit: str
    currency: str
    calendar_rule: str
    exercise: str = "european"
    """The style of its options where an options file does not say."""


# --- commodities and batches -------------------------------------------------------------------


def _record(row: Commodity) -> CommodityRecord:
    return copy_fields(CommodityRecord, row)


def get_commodity(*, session: Session, code: str) -> CommodityRecord | None:
    """The commodity with ``code``, or ``None``."""
    row = session.scalars(select(Commodity).where(Commodity.code == code)).one_or_none()
    return None if row is None else _record(row)


def require_commodity(*, session: Session, code: str) -> CommodityRecord:
    """The commodity with ``code``; :class:`UnknownCommodityError` if there is none."""
    found = get_commodity(session=session, code=code)
    if found is None:
        raise UnknownCommodityError([code])
    return found


def list_commodities(*, session: Session) -> list[CommodityRecord]:
    """Every registered commodity, by code."""
    return [_record(row) for row in session.scalars(select(Commodity).order_by(Commodity.code))]


def commodity_ids(*, session: Session, codes: Sequence[str]) -> dict[str, int]:
    """Ids of those of ``codes`` that are registered."""
    rows = session.execute(select(Commodity.code, Commodity.id).where(Commodity.code.in_(codes)))
    return {code: id_ for code, id_ in rows}


def all_commodity_codes(*, session: Session) -> list[str]:
    """Every registered commodity code, sorted."""
    return list(session.scalars(select(Commodity.code).order_by(Commodity.code)))


def commodity_american(*, session: Session, ids: Sequence[int]) -> dict[int, bool]:
    """Id -> ``True`` where the commodity's default exercise style is American."""
    rows = session.execute(select(Commodity.id, Commodity.exercise).where(Commodity.id.in_(ids)))
    return {int(id_): style == "american" for id_, style in rows}


def add_commodity(
    *,
    session: Session,
    code: str,
    name: str,
    unit: str,
    currency: str,
    calendar_rule: str,
    exercise: str = "european",
) -> CommodityRecord:
    """Register a commodity (``exercise``: its options' default style); returns it with its
    new id."""
    row = Commodity(code=code, name=name, unit=unit, currency=currency, calendar_rule=calendar_rule)
    row.exercise = exercise
    session.add(row)
    session.flush()
    return _record(row)


def find_loaded_batch(*, session: Session, kind: str, sha256: str) -> IngestBatch | None:
    """The earliest ``loaded`` batch of ``kind`` with this content hash, if any."""
    stmt = (
        select(IngestBatch)
        .where(
            IngestBatch.sha256 == sha256, IngestBatch.kind == kind, IngestBatch.status == "loaded"
        )
        .order_by(IngestBatch.id)
        .limit(1)
    )
    return session.scalars(stmt).one_or_none()


def add_batch(
    *,
    session: Session,
    kind: str,
    status: str,
    file_name: str,
    sha256: str,
    rows_read: int,
    rows_accepted: int,
    rows_rejected: int,
    received_at: datetime,
    received_by: str,
) -> int:
    """Record a received file; returns the batch id."""
    batch = IngestBatch(
        kind=kind,
        status=status,
        file_name=file_name,
        sha256=sha256,
        rows_read=rows_read,
        rows_accepted=rows_accepted,
        rows_rejected=rows_rejected,
        received_at=received_at,
        received_by=received_by,
    )
    session.add(batch)
    session.flush()
    return batch.id


def finish_batch(
    *,
    session: Session,
    batch_id: int,
    status: str,
    rows_read: int,
    rows_accepted: int,
    rows_rejected: int,
) -> None:
    """Set a batch's outcome once its file is read, in the transaction that added it.

    A batch is added first (its rows and quarantine refer to it) and given its counts when the
    last chunk is in; no other transaction ever sees it before that.
    """
    session.execute(
        update(_batches)
        .where(_batches.c.id == batch_id)
        .values(
            status=status,
            rows_read=rows_read,
            rows_accepted=rows_accepted,
            rows_rejected=rows_rejected,
        )
    )


QUOTE_TABLES: Mapping[str, Table] = {"futures": _futures, "options": _options, "rates": _rates}
"""The quote table of each batch kind."""


def _sqlite_dates(values: DateArray) -> list[str]:
    """``YYYY-MM-DD`` text, as SQLAlchemy's SQLite ``Date`` stores it; one ``str`` per day."""
    import pandas as pd

    codes, uniques = pd.factorize(np.asarray(values, dtype="datetime64[D]").astype(np.int64))
    text = np.array(np.datetime_as_string(uniques.astype("datetime64[D]"), unit="D"), dtype=object)
    return list(text[codes])


def _sqlite_values(values: Any, count: int) -> list[Any]:
    """One column as the sqlite3 module binds it: dates as text, NaN as NULL."""
    if np.isscalar(values):
        return [values] * count
    arr = np.asarray(values)
    if arr.dtype.kind == "M":
        return _sqlite_dates(arr)
    if arr.dtype.kind == "f" and np.isnan(arr).any():
        out = arr.astype(object)
        out[np.isnan(arr)] = None
        return list(out.tolist())
    return list(arr.tolist())


def _arrow_values(values: Any, count: int) -> pa.Array:
    """One column as an arrow array (dates as ``date32``, NaN as null)."""
    import pyarrow as pa

    arr = np.full(count, values) if np.isscalar(values) else np.asarray(values)
    return pa.array(arr, from_pandas=arr.dtype.kind == "f")


def insert_columns(
    *, session: Session, table: Table, columns: Mapping[str, Any], count: int
) -> None:
    """Insert ``count`` rows given column by column, in bulk.

    Parameters
    ----------
    session : the open session; the rows join its transaction.
    table : the target table.
    columns : column name -> numpy array of ``count`` values, or one scalar for every row.
        ``datetime64`` arrays are dates; NaN in a float array is NULL.
    count : number of rows.

    Notes
    -----
    SQLAlchemy's per-row parameter processing would cost more than the database itself, so
    the values are converted column-wise here and handed to the driver in one go: SQLite's
    ``executemany``, PostgreSQL's ``COPY``. Only calib's own validated values come here.
    """
    if count == 0:
        return
    connection = session.connection()
    dialect = connection.dialect
    names = list(columns)
    quote = dialect.identifier_preparer.quote
    target = dialect.identifier_preparer.format_table(table)
    column_list = ", ".join(quote(name) for name in names)
    if dialect.name == "postgresql":
        import psycopg  # the postgres extra; only reached with a PostgreSQL engine

        try:
            _copy(connection, target, column_list, names, columns, count)
        except psycopg.OperationalError as exc:  # disk full, connection lost: the store says
            raise OperationalError("COPY", None, exc) from exc
        except psycopg.Error as exc:
            raise DBAPIError("COPY", None, exc) from exc
        return
    prepared = [_sqlite_values(columns[name], count) for name in names]
    marks = ", ".join("?" for _ in names)
    statement = f"INSERT INTO {target} ({column_list}) VALUES ({marks})"
    lite = cast(sqlite3.Connection, connection.connection.dbapi_connection).cursor()
    try:  # the driver's own executemany, fed row tuples as it goes
        lite.executemany(statement, zip(*prepared, strict=True))
    except sqlite3.OperationalError as exc:  # disk full, database locked: the store says
        raise OperationalError(statement, None, exc) from exc
    except sqlite3.Error as exc:
        raise DBAPIError(statement, None, exc) from exc
    finally:
        lite.close()


def _copy(
    connection: Any,
    target: str,
    column_list: str,
    names: Sequence[str],
    columns: Mapping[str, Any],
    count: int,
) -> None:
    """PostgreSQL's ``COPY`` of the rows, in CSV form written by arrow."""
    import psycopg
    import pyarrow as pa
    import pyarrow.csv as pa_csv

    # COPY in CSV form, written by arrow: ISO dates, shortest round-trip floats, empty = NULL
    text = io.BytesIO()
    pa_csv.write_csv(
        pa.table({name: _arrow_values(columns[name], count) for name in names}),
        text,
        pa_csv.WriteOptions(include_header=False),
    )
    raw = cast(psycopg.Connection[Any], connection.connection.dbapi_connection)
    with (
        raw.cursor() as cursor,
        cursor.copy(f"COPY {target} ({column_list}) FROM STDIN WITH (FORMAT csv)") as copy,
    ):
        copy.write(text.getbuffer())


def insert_rows(*, session: Session, table: Table, rows: Sequence[Mapping[str, Any]]) -> None:
    """Insert a few ``rows`` (one mapping per row) through SQLAlchemy's executemany."""
    if rows:
        session.execute(insert(table), list(rows))


def _storable(text: Any) -> Any:
    """Text as every engine stores it: a NUL character is shown as ``\\x00`` (PostgreSQL's
    text cannot hold one)."""
    return text.replace("\x00", "\\x00") if isinstance(text, str) and "\x00" in text else text


def quarantine(*, session: Session, rows: Sequence[Mapping[str, Any]]) -> None:
    """Store refused rows (``batch_id, line, field, reason, raw``); NUL shown as ``\\x00``."""
    insert_rows(
        session=session,
        table=_quarantine,
        rows=[{k: _storable(v) for k, v in row.items()} for row in rows],
    )


# --- versioned reads ---------------------------------------------------------------------------


def _latest(
    table: Table, key: Sequence[str], where: Sequence[ColumnElement[bool]], as_of: datetime
) -> Select[Any]:
    """Per ``key``, the row of the latest batch received at or before ``as_of``."""
    version = (
        func.row_number()
        .over(
            partition_by=[table.c[name] for name in key],
            order_by=(_batches.c.received_at.desc(), _batches.c.id.desc()),
        )
        .label("version")
    )
    ranked = (
        select(table, version)
        .join(_batches, _batches.c.id == table.c.batch_id)
        .where(*where, _batches.c.received_at <= as_of)
        .subquery()
    )
    return select(*[ranked.c[c.name] for c in table.columns]).where(ranked.c.version == 1)


def _frame(session: Session, stmt: Select[Any], columns: Sequence[str]) -> pd.DataFrame:
    import pandas as pd

    rows = [tuple(row) for row in session.execute(stmt)]  # plain tuples: pandas reads them fast
    return pd.DataFrame(rows, columns=list(columns))


def _to_days(series: pd.Series) -> DateArray:
    import pandas as pd

    return np.asarray(pd.to_datetime(series).to_numpy().astype("datetime64[D]"))


def current_quotes(
    *,
    session: Session,
    kind: str,
    commodity_ids: Sequence[int],
    start: date,
    end: date,
    as_of: datetime | None = None,
) -> pd.DataFrame:
    """Current futures settlements or option quotes (``kind``) of several commodities over
    ``start..end`` (inclusive).

    Columns as the quote table's (``id, batch_id, commodity_id, trade_date, ...``; dates as
    ``datetime.date``, NULL as ``None``); one row per key, as known at ``as_of``.
    """
    table = QUOTE_TABLES[kind]
    where = [table.c.commodity_id.in_(list(commodity_ids)), table.c.trade_date.between(start, end)]
    stmt = _latest(table, _KEYS[kind], where, as_of or utc_now())
    return _frame(session, stmt, [c.name for c in table.columns])


def zero_curves(
    *, session: Session, start: date, end: date, as_of: datetime | None = None
) -> dict[date, ZeroCurve]:
    """The stored zero curve of each trade date in ``start..end`` that has one."""
    where = [_rates.c.trade_date.between(start, end)]
    stmt = _latest(_rates, RATES_KEY, where, as_of or utc_now())
    rows = sorted(session.execute(stmt).all(), key=lambda r: (r.trade_date, r.maturity))
    by_day: dict[date, list[Any]] = {}
    for row in rows:
        by_day.setdefault(row.trade_date, []).append(row)
    return {
        day: ZeroCurve(
            trade_date=day,
            maturity=_dates([r.maturity for r in day_rows]),
            zero_rate=readonly([r.zero_rate for r in day_rows], np.float64),
            row_id=readonly([r.id for r in day_rows], np.int64),
        )
        for day, day_rows in by_day.items()
    }


def american_of(styles: Sequence[str] | npt.NDArray[Any]) -> BoolArray:
    """Stored exercise styles as a read-only boolean array (``True`` = American)."""
    return np.asarray(readonly([s == "american" for s in styles], np.bool_))


def nan_for_none(values: Sequence[float | None]) -> FloatArray:
    """A read-only float array with NaN where a stored value is NULL."""
    return np.asarray(readonly([np.nan if v is None else v for v in values], np.float64))


def load_day(
    *, session: Session, commodity: str, trade_date: date, as_of: datetime | None = None
) -> DayQuotes:
    """Futures, options and the zero curve of one commodity on one trading day.

    Parameters
    ----------
    session : an open session (the caller owns the transaction).
    commodity : commodity code.
    trade_date : the trading day.
    as_of : what was known at this time (aware datetime); default now.

    Raises
    ------
    UnknownCommodityError
        If ``commodity`` is not registered.
    """
    return load_days(session=session, commodity=commodity, dates=[trade_date], as_of=as_of)[0]


_DAY_COLUMNS: Mapping[str, Mapping[str, npt.DTypeLike]] = {
    "futures": {"delivery": "datetime64[D]", "settle": np.float64},
    "options": {
        "delivery": "datetime64[D]",
        "expiry": "datetime64[D]",
        "is_call": np.bool_,
        "strike": np.float64,
        "premium": np.float64,
        "implied_vol": np.float64,
        "bid": np.float64,
        "ask": np.float64,
        "exercise": np.object_,
    },
    "rates": {"maturity": "datetime64[D]", "zero_rate": np.float64},
}
"""Per quote table, the columns a :class:`DayQuotes` holds (besides row and batch ids)."""

_KEYS = {"futures": FUTURES_KEY, "options": OPTIONS_KEY, "rates": RATES_KEY}
"""Per quote table, the key a later batch's row supersedes an earlier one by."""

_DAY_ORDER = {
    "futures": ("delivery",),
    "options": ("delivery", "expiry", "is_call", "strike"),
    "rates": ("maturity",),
}
"""Per quote table, the sort order of a day's rows (put before call: ``False < True``)."""


class _DayRows:
    """The current rows of one quote table over several days, sorted by day then
    :data:`_DAY_ORDER`, column by column as numpy arrays (NULL is NaN)."""

    def __init__(
        self, session: Session, kind: str, where: Sequence[ColumnElement[bool]], as_of: datetime
    ) -> None:
        table = QUOTE_TABLES[kind]
        dtypes: dict[str, npt.DTypeLike] = {
            "trade_date": "datetime64[D]",
            **_DAY_COLUMNS[kind],
            "id": np.int64,
            "batch_id": np.int64,
        }
        rows = session.execute(_latest(table, _KEYS[kind], where, as_of)).all()
        names = [c.name for c in table.columns]
        values = dict(zip(names, list(zip(*rows, strict=True)) or [()] * len(names), strict=True))
        cols = {
            name: np.array([np.nan if v is None else v for v in values[name]], dtype=dtype)
            if dtype is np.float64
            else np.array(values[name], dtype=dtype)
            for name, dtype in dtypes.items()
        }
        keys = [cols[name] for name in reversed(_DAY_ORDER[kind])]  # lexsort: last key first
        perm = np.lexsort((*keys, cols["trade_date"]))
        self.columns = {name: col[perm] for name, col in cols.items()}

    def of(self, day: date) -> dict[str, Any]:
        """That day's rows: each column a fresh read-only array."""
        days = self.columns["trade_date"]
        at = np.datetime64(day, "D")
        rows = slice(
            int(np.searchsorted(days, at, "left")), int(np.searchsorted(days, at, "right"))
        )
        return {name: readonly(col[rows], col.dtype) for name, col in self.columns.items()}


def load_days(
    *,
    session: Session,
    commodity: str,
    dates: Sequence[date],
    as_of: datetime | None = None,
) -> list[DayQuotes]:
    """:func:`load_day` for each of ``dates`` (in their order), in one query per table.

    Every day gets exactly what :func:`load_day` gives it, all as known at the same ``as_of``
    (default now): futures sorted by delivery, options by (delivery, expiry, put before call,
    strike), the zero curve by maturity, read-only arrays, the source batches. A day without
    futures, options or rates gets empty arrays for them. The dates enter the queries as one
    ``IN`` list, so hand over tens or hundreds of days at a time, not years.

    Raises
    ------
    UnknownCommodityError
        If ``commodity`` is not registered.
    """
    as_of = as_of or utc_now()
    cid = require_commodity(session=session, code=commodity).id
    wanted = sorted(set(dates))
    tables = {
        kind: _DayRows(
            session,
            kind,
            [table.c.trade_date.in_(wanted)]
            + ([] if kind == "rates" else [table.c.commodity_id == cid]),
            as_of,
        )
        for kind, table in QUOTE_TABLES.items()
    }
    out: list[DayQuotes] = []
    for d in dates:
        fut, opt, rat = (tables[kind].of(d) for kind in ("futures", "options", "rates"))
        batches = {int(b) for part in (fut, opt, rat) for b in part["batch_id"].tolist()}
        out.append(
            DayQuotes(
                commodity=commodity,
                commodity_id=cid,
                trade_date=d,
                as_of=as_of,
                futures=FuturesCurve(
                    delivery=fut["delivery"], settle=fut["settle"], row_id=fut["id"]
                ),
                options=OptionChain(
                    **{name: opt[name] for name in _DAY_COLUMNS["options"] if name != "exercise"},
                    row_id=opt["id"],
                    american=american_of(opt["exercise"]),
                ),
                rates=ZeroCurve(
                    trade_date=d,
                    maturity=rat["maturity"],
                    zero_rate=rat["zero_rate"],
                    row_id=rat["id"],
                ),
                batch_ids=tuple(sorted(batches)),
            )
        )
    return out


def trade_dates(
    *,
    session: Session,
    commodity: str,
    start: date | None = None,
    end: date | None = None,
    as_of: datetime | None = None,
) -> list[date]:
    """Trading days (ascending) with at least one futures settlement known at ``as_of``.

    ``start`` and ``end`` bound the days (inclusive) when given.
    """
    cid = require_commodity(session=session, code=commodity).id
    stmt = (
        select(_futures.c.trade_date)
        .join(_batches, _batches.c.id == _futures.c.batch_id)
        .where(_futures.c.commodity_id == cid, _batches.c.received_at <= (as_of or utc_now()))
        .distinct()
        .order_by(_futures.c.trade_date)
    )
    if start is not None:
        stmt = stmt.where(_futures.c.trade_date >= start)
    if end is not None:
        stmt = stmt.where(_futures.c.trade_date <= end)
    return list(session.scalars(stmt))


def previous_trade_date(
    *, session: Session, commodity_id: int, before: date, as_of: datetime | None = None
) -> date | None:
    """The last trading day strictly before ``before`` with a futures settlement known at
    ``as_of`` (the last of :func:`trade_dates` up to the day before), or ``None``.

    One indexed look-up, however long the history.
    """
    stmt = (
        select(_futures.c.trade_date)
        .join(_batches, _batches.c.id == _futures.c.batch_id)
        .where(
            _futures.c.commodity_id == commodity_id,
            _futures.c.trade_date < before,
            _batches.c.received_at <= (as_of or utc_now()),
        )
        .order_by(_futures.c.trade_date.desc())
        .limit(1)
    )
    found: date | None = session.scalars(stmt).first()
    return found


def load_futures_history(
    *,
    session: Session,
    commodity: str,
    start: date | None = None,
    end: date | None = None,
    as_of: datetime | None = None,
) -> pd.DataFrame:
    """Every futures settlement of ``commodity`` over ``start..end``, as known at ``as_of``.

    Returns
    -------
    pandas.DataFrame
        Columns ``trade_date`` and ``delivery`` (``datetime64``), ``settle`` (float64),
        ``row_id`` and ``batch_id`` (int64); sorted by trade date, then delivery; one row per
        (trade date, delivery).
    """
    cid = require_commodity(session=session, code=commodity).id
    where: list[ColumnElement[bool]] = [_futures.c.commodity_id == cid]
    if start is not None:
        where.append(_futures.c.trade_date >= start)
    if end is not None:
        where.append(_futures.c.trade_date <= end)
    frame = _frame(
        session,
        _latest(_futures, FUTURES_KEY, where, as_of or utc_now()),
        [c.name for c in _futures.columns],
    )
    import pandas as pd

    out = pd.DataFrame(
        {
            "trade_date": _to_days(frame["trade_date"]),
            "delivery": _to_days(frame["delivery"]),
            "settle": frame["settle"].to_numpy(dtype=np.float64),
            "row_id": frame["id"].to_numpy(dtype=np.int64),
            "batch_id": frame["batch_id"].to_numpy(dtype=np.int64),
        }
    )
    return out.sort_values(["trade_date", "delivery"], ignore_index=True)


def quarantined_rows(*, session: Session, batch_id: int) -> list[QuarantinedRow]:
    """The rows refused in a batch, in file order."""
    stmt = (
        select(QuarantinedRow)
        .where(QuarantinedRow.batch_id == batch_id)
        .order_by(QuarantinedRow.line, QuarantinedRow.id)
    )
    return list(session.scalars(stmt))
