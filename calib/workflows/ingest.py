"""Ingest quote files into the store: one file is one transaction.

A file is read whole (CSV or Parquet, columns as DESIGN §7), every row is checked with
vectorised rules, good rows land in the quote table and bad rows in quarantine with the line,
field, reason and raw text, all in one transaction with the batch that records the file. With
``strict`` any bad row refuses the whole file (the batch is recorded as ``rejected`` with its
quarantined rows; no quote lands). The same content again (same sha256, same kind) is a no-op.
Files that cannot be read at all, miss required columns or name an unknown commodity (unless
``create``) raise :class:`~calib.errors.IngestFileError` and store nothing.

Rules (each row; the first failure found is the one recorded)
-------------------------------------------------------------
* every required column present; values parse (numbers, ISO ``YYYY-MM-DD`` dates between
  :data:`DATE_MIN` and :data:`DATE_MAX`, ``call``/``put``); no empty required value;
* futures: ``settle > 0``, ``delivery >= trade_date``;
* options: ``strike > 0``; ``premium > 0`` and/or ``0 < implied_vol <=`` :data:`IMPLIED_VOL_MAX`
  (at least one of them); ``bid >= 0``, ``ask >= 0``, ``bid <= ask`` when given;
  ``trade_date <= expiry <= delivery``; the underlying future has a settlement stored for that
  trade date; a premium lies within the no-arbitrage bounds (below);
* rates: ``|zero_rate| <=`` :data:`ZERO_RATE_LIMIT`, ``maturity > trade_date``;
* inside one file, rows with the same key and different values are all refused; an exact
  repeat of an earlier row is refused as a repeat (the first one lands).

Notes
-----
No-arbitrage bounds of a European option on a future (Black 1976; common practice), with
``D = exp(-r(T) T)`` the discount factor to expiry from the day's stored zero curve (ACT/365,
linear in the zero rate, flat beyond its ends; ``D = 1`` if the day has no curve, which the
report notes) and ``tol =`` :data:`PREMIUM_BOUND_RTOL` ``* max(F, K)``:

.. math::
    D \\max(F - K, 0) - tol \\le C \\le D F + tol, \\qquad
    D \\max(K - F, 0) - tol \\le P \\le D K + tol.

Line numbers: CSV lines count from 1 at the header (a record spanning several lines is
numbered by its first line); Parquet rows count from 1. Blank CSV lines are skipped.
"""

from __future__ import annotations

import codecs
import csv
import functools
import hashlib
import io
import re
from collections.abc import Callable, Iterable, Sequence
from dataclasses import asdict, dataclass, field
from datetime import date, datetime
from pathlib import Path
from typing import Any, Literal

import numpy as np
import numpy.typing as npt
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pa_csv
from sqlalchemy.orm import Session, sessionmaker

from calib import errors as msg
from calib.errors import IngestFileError, UnknownCommodityError
from calib.model.black76 import undiscounted_price
from calib.store.base import utc_now
from calib.store.engine import begin_write
from calib.store.quotes import (
    QUOTE_TABLES,
    DateArray,
    add_batch,
    add_commodity,
    commodity_ids,
    find_loaded_batch,
    futures_settlements,
    insert_columns,
    quarantine,
    zero_curves,
)
from calib.types import BoolArray, FloatArray, IntArray

Kind = Literal["futures", "options", "rates"]
KINDS: tuple[Kind, ...] = ("futures", "options", "rates")

REQUIRED_COLUMNS: dict[Kind, tuple[str, ...]] = {
    "futures": ("trade_date", "commodity", "delivery", "settle"),
    "options": ("trade_date", "commodity", "delivery", "expiry", "kind", "strike"),
    "rates": ("trade_date", "maturity", "zero_rate"),
}
OPTIONAL_COLUMNS: dict[Kind, tuple[str, ...]] = {
    "futures": (),
    "options": ("premium", "implied_vol", "bid", "ask"),
    "rates": (),
}

IMPLIED_VOL_MAX = 5.0
"""Largest implied volatility accepted (500% a year): beyond it a quote is taken as a typo."""
ZERO_RATE_LIMIT = 1.0
"""Largest absolute zero rate accepted: a rate beyond 100% a year is taken as given in percent."""
PREMIUM_BOUND_RTOL = 1e-4
"""Tolerance of the no-arbitrage bounds, relative to ``max(F, K)``: settled premiums are rounded
to a tick, and a tick is of this order of the price level (common practice)."""
DATE_MIN = date(1900, 1, 1)
DATE_MAX = date(2199, 12, 31)
KEY_FIELD = "key"
"""The field named for a duplicate-key problem (the key is several columns)."""
MAX_REPORTED = 20
"""How many row problems a report carries (the quarantine table has them all)."""

_ISO_DATE = re.compile(r"[0-9]{4}-[0-9]{2}-[0-9]{2}")
_CODE = re.compile(r"[A-Za-z0-9_.\-]{1,32}")
ObjArray = npt.NDArray[np.object_]


@dataclass(frozen=True)
class RowProblem:
    """A refused row: where, which field, why, and the row as read."""

    line: int
    field: str
    reason: str
    raw: str


@dataclass(frozen=True)
class NewCommodity:
    """What ``create`` registers for an unknown commodity code (the name is the code)."""

    unit: str = "unit"
    currency: str = "USD"
    calendar_rule: str = "monthly"


@dataclass(frozen=True)
class IngestReport:
    """The outcome of ingesting one file.

    ``status``: ``loaded`` (good rows stored, bad rows quarantined), ``rejected`` (strict and
    some row bad: nothing stored but the batch and its quarantine) or ``duplicate`` (same
    content already loaded as ``batch_id``; nothing done).
    """

    file: str
    kind: Kind
    status: Literal["loaded", "rejected", "duplicate"]
    sha256: str
    batch_id: int
    rows_read: int
    rows_accepted: int
    rows_rejected: int
    problems: tuple[RowProblem, ...] = ()
    created: tuple[str, ...] = ()
    notes: tuple[str, ...] = field(default=())

    def to_dict(self) -> dict[str, Any]:
        """A JSON-ready dictionary."""
        out = asdict(self)
        out["problems"] = [asdict(p) for p in self.problems]
        out["created"] = list(self.created)
        out["notes"] = list(self.notes)
        return out


# --- reading -----------------------------------------------------------------------------------


@dataclass
class _Table:
    """A file read as text: one object array of stripped strings per column."""

    columns: dict[str, ObjArray]
    lines: IntArray
    raw: Callable[[int], str]
    early: list[RowProblem]
    """Rows refused while reading (wrong number of fields)."""
    ignored: list[str]
    numbers: dict[str, FloatArray] = field(default_factory=dict)
    """Columns the reader already parsed as numbers, every value of them (else absent)."""


def _csv_text(values: Iterable[str]) -> str:
    buf = io.StringIO()
    csv.writer(buf, lineterminator="").writerow(list(values))
    return buf.getvalue()


def _header(name: str, names: Sequence[str]) -> list[str]:
    header = [str(h).strip().lower() for h in names]
    if not any(header):
        raise IngestFileError(name, msg.FILE_NO_HEADER)
    seen = sorted({h for h in header if h and header.count(h) > 1})
    if seen:
        raise IngestFileError(name, msg.FILE_DUPLICATE_COLUMNS.format(columns=", ".join(seen)))
    return header


def _object(values: Sequence[str]) -> ObjArray:
    arr = np.empty(len(values), dtype=object)
    arr[:] = values
    return arr


def _decode(name: str, data: bytes) -> str:
    try:
        return data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        detail = f"byte {exc.start}"
        raise IngestFileError(name, msg.FILE_NOT_TEXT.format(detail=detail)) from None


def _text_array(column: pa.ChunkedArray) -> ObjArray:
    """An arrow text column as an object array; each distinct value is one ``str`` object."""
    encoded = pc.dictionary_encode(column).combine_chunks()
    distinct = encoded.dictionary.to_numpy(zero_copy_only=False)
    return np.asarray(distinct[encoded.indices.to_numpy()])


def _number_array(column: pa.ChunkedArray) -> FloatArray | None:
    """An arrow text column parsed as float64 if every value is a plain number, else ``None``.

    Arrow's grammar (optional sign, digits, point, exponent; ``nan``, ``inf``) accepts a subset
    of what :func:`pandas.to_numeric` does, so the rules see the same numbers either way.
    """
    try:
        pc.cast(column.slice(0, 1), pa.float64())  # a text column fails here, cheaply
        floats = pc.cast(column, pa.float64())
    except pa.ArrowInvalid:
        return None
    return np.asarray(floats.to_numpy(), dtype=np.float64)


def _read_plain_csv(name: str, text: str, data: bytes) -> _Table | None:
    """Fast path for the common file: no quotes, no blank lines, every line the same width.

    The body is parsed by pyarrow's CSV reader, every column as text. Returns ``None`` when
    the file is not that simple (the general reader takes over).
    """
    if '"' in text or "\x00" in text or text.count("\r") != text.count("\r\n"):
        return None  # quotes, NUL or a lone carriage return
    head, _, body = text.partition("\n")
    if not body or body.startswith(("\n", "\r\n")) or "\n\n" in body or "\n\r\n" in body:
        return None  # no row, or a blank line
    header = _header(name, head.removesuffix("\r").split(","))
    names = [f"c{j}" for j in range(len(header))]
    frame = pa_csv.read_csv(
        io.BytesIO(data.removeprefix(codecs.BOM_UTF8)),
        read_options=pa_csv.ReadOptions(column_names=names, skip_rows=1),
        parse_options=pa_csv.ParseOptions(quote_char=False),
        convert_options=pa_csv.ConvertOptions(column_types=dict.fromkeys(names, pa.string())),
    )
    count = body.count("\n") + (not body.endswith("\n"))
    if frame.num_rows != count:
        return None
    columns: dict[str, ObjArray] = {}
    numbers: dict[str, FloatArray] = {}
    for h, column in zip(header, frame.columns, strict=True):
        if not h:
            continue
        number = _number_array(column)
        if number is None:
            columns[h] = _text_array(column)
        else:
            columns[h] = np.asarray(column.to_numpy(zero_copy_only=False))
            numbers[h] = number
    body_lines = functools.cache(lambda: body.replace("\r\n", "\n").split("\n"))
    return _Table(
        columns=columns,
        lines=np.arange(2, count + 2, dtype=np.int64),
        raw=lambda i: body_lines()[i],
        early=[],
        ignored=[],
        numbers=numbers,
    )


def _read_csv(name: str, data: bytes) -> _Table:
    text = _decode(name, data)
    try:
        plain = _read_plain_csv(name, text, data)
    except pa.ArrowInvalid:  # a line of another width, or the like: the general reader says
        plain = None
    if plain is not None:
        return plain
    reader = csv.reader(io.StringIO(text, newline=""))
    records: list[list[str]] = []
    lines: list[int] = []
    early: list[RowProblem] = []
    try:
        first = next(reader, None)
        if first is None:
            raise IngestFileError(name, msg.FILE_NO_HEADER)
        header = _header(name, first)
        width = len(header)
        previous = reader.line_num
        for record in reader:
            start, previous = previous + 1, reader.line_num
            if len(record) == width:
                records.append(record)
                lines.append(start)
            elif record and any(f.strip() for f in record):
                reason = msg.ROW_FIELD_COUNT.format(expected=width, found=len(record))
                early.append(RowProblem(start, "*", reason, _csv_text(record)))
    except csv.Error as exc:
        detail = f"line {reader.line_num}: {exc}"
        raise IngestFileError(name, msg.FILE_UNREADABLE.format(detail=detail)) from None
    fields = list(zip(*records, strict=True)) if records else [()] * width
    columns = {h: _object(col) for h, col in zip(header, fields, strict=True) if h}
    return _Table(
        columns=columns,
        lines=np.asarray(lines, dtype=np.int64),
        raw=lambda i: _csv_text(records[i]),
        early=early,
        ignored=[],
    )


def _text_column(series: pd.Series) -> ObjArray:
    if pd.api.types.is_datetime64_any_dtype(series):
        text = series.dt.strftime("%Y-%m-%d")
    else:
        text = series.astype(str)
    return np.asarray(text.where(~series.isna(), "").str.strip().to_numpy(dtype=object))


def _read_parquet(name: str, data: bytes) -> _Table:
    try:
        frame = pd.read_parquet(io.BytesIO(data))
    except (ValueError, OSError, pa.ArrowException) as exc:
        detail = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise IngestFileError(name, msg.FILE_UNREADABLE.format(detail=detail)) from None
    header = _header(name, [str(c) for c in frame.columns])
    columns = {h: _text_column(frame.iloc[:, j]) for j, h in enumerate(header) if h}
    order = [h for h in header if h]

    def raw(i: int) -> str:
        return _csv_text(str(columns[h][i]) for h in order)

    return _Table(
        columns=columns,
        lines=np.arange(1, len(frame) + 1, dtype=np.int64),
        raw=raw,
        early=[],
        ignored=[],
    )


def read_table(name: str, data: bytes, kind: Kind, suffix: str) -> _Table:
    """Read ``data`` (CSV or Parquet by ``suffix``) and check its columns for ``kind``."""
    if suffix == ".csv":
        table = _read_csv(name, data)
    elif suffix in (".parquet", ".pq"):
        table = _read_parquet(name, data)
    else:
        raise IngestFileError(name, msg.FILE_FORMAT.format(suffix=suffix))
    required = REQUIRED_COLUMNS[kind]
    missing = [c for c in required if c not in table.columns]
    if missing:
        reason = msg.FILE_MISSING_COLUMNS.format(
            columns=", ".join(missing), kind=kind, required=", ".join(required)
        )
        raise IngestFileError(name, reason)
    if kind == "options" and not {"premium", "implied_vol"} & table.columns.keys():
        raise IngestFileError(name, msg.FILE_NO_PRICE_COLUMN)
    known = set(required) | set(OPTIONAL_COLUMNS[kind])
    table.ignored = sorted(set(table.columns) - known)
    return table


# --- checking ----------------------------------------------------------------------------------


class _Rows:
    """The rows of a table under check: which are still good, and why the others are not."""

    def __init__(self, table: _Table) -> None:
        self.table = table
        n = len(table.lines)
        self.n = n
        self.ok: BoolArray = np.ones(n, dtype=np.bool_)
        self.field: ObjArray = np.empty(n, dtype=object)
        self.reason: ObjArray = np.empty(n, dtype=object)

    def text(self, name: str) -> ObjArray:
        found = self.table.columns.get(name)
        return np.full(self.n, "", dtype=object) if found is None else found

    def reject(
        self, mask: BoolArray, name: str, reason: str | Callable[[IntArray], Iterable[str]]
    ) -> None:
        """Refuse the still-good rows of ``mask``, giving ``reason`` (text or per row)."""
        idx = np.flatnonzero(mask & self.ok)
        if idx.size == 0:
            return
        self.ok[idx] = False
        self.field[idx] = name
        reasons = [reason] * idx.size if isinstance(reason, str) else list(reason(idx))
        self.reason[idx] = np.array(reasons, dtype=object)

    def value_reason(
        self, name: str, template: str, **fixed: object
    ) -> Callable[[IntArray], Iterable[str]]:
        """Per-row reasons: ``template`` filled with the row's raw ``value`` and ``fixed``."""
        text = self.text(name)
        return lambda idx: (template.format(value=text[i], **fixed) for i in idx)

    # parsers: each refuses the rows it cannot parse and returns the parsed column

    def number(self, name: str, *, required: bool = True) -> FloatArray:
        if name not in self.table.columns and not required:
            return np.full(self.n, np.nan)
        text = self.text(name)
        parsed = self.table.numbers.get(name)
        values = np.array(
            pd.to_numeric(text, errors="coerce") if parsed is None else parsed, dtype=np.float64
        )
        empty = text == ""
        unparsed = np.flatnonzero(np.isnan(values) & ~empty)
        if unparsed.size:  # blanks count as empty; the others are not numbers
            empty[unparsed] = [not str(v).strip() for v in text[unparsed]]
        if required:
            self.reject(empty, name, msg.ROW_EMPTY)
        self.reject(np.isnan(values) & ~empty, name, self.value_reason(name, msg.ROW_NOT_NUMBER))
        self.reject(np.isinf(values), name, self.value_reason(name, msg.ROW_NOT_FINITE))
        values[empty] = np.nan
        return values

    def _factor(self, name: str, *, lower: bool = False) -> tuple[IntArray, list[str]]:
        """Row codes and the distinct values (stripped), for columns with few distinct values."""
        codes, uniques = pd.factorize(self.text(name))
        values = [str(u).strip() for u in uniques]
        if lower:
            values = [v.lower() for v in values]
        return np.asarray(codes, dtype=np.int64), values

    def date(self, name: str) -> DateArray:
        codes, uniques = self._factor(name)
        parsed = np.full(len(uniques) + 1, np.datetime64("NaT"), dtype="datetime64[D]")
        status = np.zeros(len(uniques) + 1, dtype=np.int64)  # 0 ok, 1 empty, 2 not ISO, 3 range
        for j, value in enumerate(uniques):
            if value == "":
                status[j] = 1
                continue
            try:
                day = date.fromisoformat(value) if _ISO_DATE.fullmatch(value) else None
            except ValueError:
                day = None
            if day is None:
                status[j] = 2
            elif not DATE_MIN <= day <= DATE_MAX:
                status[j] = 3
            else:
                parsed[j] = np.datetime64(day, "D")
        row_status = status[codes]
        self.reject(row_status == 1, name, msg.ROW_EMPTY)
        self.reject(row_status == 2, name, self.value_reason(name, msg.ROW_NOT_DATE))
        out_of_range = self.value_reason(name, msg.ROW_DATE_RANGE, low=DATE_MIN, high=DATE_MAX)
        self.reject(row_status == 3, name, out_of_range)
        return np.asarray(parsed[codes])

    def choice(
        self, name: str, pattern: re.Pattern[str], template: str, *, lower: bool = False
    ) -> tuple[IntArray, list[str]]:
        """Refuse values not matching ``pattern``; returns row codes and distinct values."""
        codes, uniques = self._factor(name, lower=lower)
        empty = np.array([u == "" for u in uniques] + [False], dtype=np.bool_)
        good = np.array([bool(pattern.fullmatch(u)) for u in uniques] + [True], dtype=np.bool_)
        self.reject(empty[codes], name, msg.ROW_EMPTY)
        self.reject(~good[codes], name, self.value_reason(name, template))
        return codes, uniques

    def problems(self) -> list[RowProblem]:
        bad = np.flatnonzero(~self.ok)
        return [
            RowProblem(
                int(self.table.lines[i]),
                str(self.field[i]),
                str(self.reason[i]),
                self.table.raw(int(i)),
            )
            for i in bad
        ]


def _days(values: DateArray) -> IntArray:
    return np.asarray(values.astype(np.int64))


def _reject_duplicates(
    rows: _Rows, keys: Sequence[npt.NDArray[Any]], values: Sequence[npt.NDArray[Any]]
) -> None:
    """Refuse same-key rows: all of them if their values differ, else the repeats."""
    idx = np.flatnonzero(rows.ok)
    if idx.size < 2:
        return
    frame = pd.DataFrame({f"k{j}": k[idx] for j, k in enumerate(keys)})
    dup = idx[frame.duplicated(keep=False).to_numpy()]
    if dup.size == 0:
        return
    groups: dict[tuple[Any, ...], list[int]] = {}
    for i in dup:
        groups.setdefault(tuple(k[i] for k in keys), []).append(int(i))
    conflicts: dict[int, str] = {}
    repeats: dict[int, str] = {}
    for members in groups.values():
        signature = [tuple(np.nan_to_num(v[i], nan=-np.inf) for v in values) for i in members]
        lines = [int(rows.table.lines[i]) for i in members]
        if len(set(signature)) > 1:
            for i, line in zip(members, lines, strict=True):
                others = ", ".join(str(x) for x in lines if x != line)
                conflicts[i] = msg.ROW_CONFLICT.format(lines=others)
        else:
            for i in members[1:]:
                repeats[i] = msg.ROW_REPEAT.format(line=lines[0])
    for found in (conflicts, repeats):
        if found:
            mask = np.zeros(rows.n, dtype=np.bool_)
            mask[sorted(found)] = True
            rows.reject(mask, KEY_FIELD, _lookup(found))


def _each(template: str, **columns: npt.NDArray[Any]) -> Callable[[IntArray], Iterable[str]]:
    """Per-row reasons: ``template`` filled with each refused row's values of ``columns``."""
    return lambda idx: (template.format(**{k: v[i] for k, v in columns.items()}) for i in idx)


def _lookup(reasons: dict[int, str]) -> Callable[[IntArray], Iterable[str]]:
    return lambda idx: (reasons[int(i)] for i in idx)


@dataclass
class _Checked:
    """Good rows ready to insert (column name -> values) and the notes for the report."""

    columns: dict[str, npt.NDArray[Any]]
    notes: list[str]


def _commodities(
    session: Session, name: str, rows: _Rows, create: NewCommodity | None
) -> tuple[IntArray, list[str]]:
    """Commodity id of every row (-1 where the code is bad); registers unknown codes if asked."""
    factor, uniques = rows.choice("commodity", _CODE, msg.ROW_BAD_CODE)
    valid = sorted({u for u in uniques if _CODE.fullmatch(u)})
    known = commodity_ids(session=session, codes=valid)
    unknown = [c for c in valid if c not in known]
    created: list[str] = []
    if unknown and create is None:
        raise IngestFileError(name, str(UnknownCommodityError(unknown, msg.HINT_CREATE)))
    for code in unknown:
        assert create is not None
        record = add_commodity(
            session=session,
            code=code,
            name=code,
            unit=create.unit,
            currency=create.currency,
            calendar_rule=create.calendar_rule,
        )
        known[code] = record.id
        created.append(code)
    lookup = np.array([known.get(u, -1) for u in uniques] + [-1], dtype=np.int64)
    return np.asarray(lookup[factor]), created


def _check_futures(session: Session, rows: _Rows, cid: IntArray) -> _Checked:
    trade = rows.date("trade_date")
    delivery = rows.date("delivery")
    settle = rows.number("settle")
    rows.reject(settle <= 0, "settle", rows.value_reason("settle", msg.ROW_NOT_POSITIVE))
    rows.reject(
        delivery < trade,
        "delivery",
        _each(msg.ROW_BEFORE_TRADE, value=delivery, trade_date=trade),
    )
    _reject_duplicates(rows, [cid, _days(trade), _days(delivery)], [settle])
    ok = rows.ok
    return _Checked(
        columns={
            "commodity_id": cid[ok],
            "trade_date": trade[ok],
            "delivery": delivery[ok],
            "settle": settle[ok],
        },
        notes=[],
    )


def _discount(
    session: Session, trade: DateArray, expiry: DateArray, sel: IntArray
) -> tuple[FloatArray, list[date]]:
    """Discount factor to expiry of the rows ``sel`` from their day's curve; days lacking one."""
    out = np.ones(len(trade), dtype=np.float64)
    if sel.size == 0:
        return out, []
    days, inverse = np.unique(trade[sel], return_inverse=True)
    first, last = days[0].astype(date), days[-1].astype(date)
    curves = zero_curves(session=session, start=first, end=last)
    order = np.argsort(inverse, kind="stable")
    groups = np.split(sel[order], np.cumsum(np.bincount(inverse))[:-1])
    missing: list[date] = []
    for day, members in zip(days, groups, strict=True):
        curve = curves.get(day.astype(date))
        if curve is None or len(curve) == 0:
            missing.append(day.astype(date))
        else:
            out[members] = curve.discount(expiry[members])
    return out, missing


def _check_options(session: Session, rows: _Rows, cid: IntArray) -> _Checked:
    trade = rows.date("trade_date")
    delivery = rows.date("delivery")
    expiry = rows.date("expiry")
    factor, kinds = rows.choice("kind", re.compile("call|put"), msg.ROW_NOT_KIND, lower=True)
    call = np.array([k == "call" for k in kinds] + [False], dtype=np.bool_)[factor]
    strike = rows.number("strike")
    premium = rows.number("premium", required=False)
    vol = rows.number("implied_vol", required=False)
    bid = rows.number("bid", required=False)
    ask = rows.number("ask", required=False)

    rows.reject(strike <= 0, "strike", rows.value_reason("strike", msg.ROW_NOT_POSITIVE))
    rows.reject(np.isnan(premium) & np.isnan(vol), "premium", msg.ROW_NO_PRICE)
    rows.reject(premium <= 0, "premium", rows.value_reason("premium", msg.ROW_NOT_POSITIVE))
    rows.reject(
        (vol <= 0) | (vol > IMPLIED_VOL_MAX),
        "implied_vol",
        rows.value_reason("implied_vol", msg.ROW_VOL_RANGE, high=IMPLIED_VOL_MAX),
    )
    rows.reject(bid < 0, "bid", rows.value_reason("bid", msg.ROW_NEGATIVE))
    rows.reject(ask < 0, "ask", rows.value_reason("ask", msg.ROW_NEGATIVE))
    rows.reject(bid > ask, "bid", _each(msg.ROW_BID_ASK, bid=bid, ask=ask))
    rows.reject(
        expiry < trade,
        "expiry",
        _each(msg.ROW_BEFORE_TRADE, value=expiry, trade_date=trade),
    )
    rows.reject(
        expiry > delivery,
        "expiry",
        _each(msg.ROW_AFTER_DELIVERY, value=expiry, delivery=delivery),
    )

    # the underlying future's settlement that day, as stored now
    forward = np.full(rows.n, np.nan)
    live = np.flatnonzero(rows.ok)
    if live.size:
        first, last = trade[live].min().astype(date), trade[live].max().astype(date)
        stored = futures_settlements(
            session=session, commodity_ids=np.unique(cid[live]).tolist(), start=first, end=last
        )
        if len(stored):
            index = pd.MultiIndex.from_arrays(
                [
                    stored["commodity_id"].to_numpy(dtype=np.int64),
                    _days(np.array(stored["trade_date"].tolist(), dtype="datetime64[D]")),
                    _days(np.array(stored["delivery"].tolist(), dtype="datetime64[D]")),
                ]
            )
            wanted = pd.MultiIndex.from_arrays(
                [cid[live], _days(trade[live]), _days(delivery[live])]
            )
            pos = index.get_indexer(wanted)
            settle = stored["settle"].to_numpy(dtype=np.float64)
            forward[live] = np.where(pos >= 0, settle[pos], np.nan)
    rows.reject(
        np.isnan(forward),
        "delivery",
        _each(msg.ROW_NO_FUTURE, delivery=delivery, trade_date=trade),
    )

    # no-arbitrage bounds of the premiums
    priced = np.flatnonzero(rows.ok & ~np.isnan(premium))
    disc, no_curve = _discount(session, trade, expiry, priced)
    lacking = np.isin(trade, np.array(no_curve, dtype="datetime64[D]"))
    intrinsic = undiscounted_price(forward, strike, 0.0, call)
    cap = np.where(call, forward, strike)
    tol = PREMIUM_BOUND_RTOL * np.maximum(forward, strike)

    def bound_reason(template: str, bound: FloatArray) -> Callable[[IntArray], Iterable[str]]:
        return lambda idx: (
            template.format(
                premium=premium[i],
                bound=bound[i],
                forward=forward[i],
                discount=disc[i],
                what="F" if call[i] else "K",
                curve=msg.ROW_NO_CURVE if lacking[i] else "",
            )
            for i in idx
        )

    low, high = disc * intrinsic, disc * cap
    rows.reject(premium < low - tol, "premium", bound_reason(msg.ROW_BELOW_INTRINSIC, low))
    rows.reject(premium > high + tol, "premium", bound_reason(msg.ROW_ABOVE_BOUND, high))

    keys = [cid, _days(trade), _days(delivery), _days(expiry), call, strike]
    _reject_duplicates(rows, keys, [premium, vol, bid, ask])
    ok = rows.ok
    notes = []
    if no_curve:
        shown = ", ".join(str(d) for d in no_curve[:3]) + (" ..." if len(no_curve) > 3 else "")
        notes.append(f"no zero curve stored for {len(no_curve)} trade date(s) ({shown}): r = 0")
    return _Checked(
        columns={
            "commodity_id": cid[ok],
            "trade_date": trade[ok],
            "delivery": delivery[ok],
            "expiry": expiry[ok],
            "is_call": call[ok],
            "strike": strike[ok],
            "premium": premium[ok],
            "implied_vol": vol[ok],
            "bid": bid[ok],
            "ask": ask[ok],
        },
        notes=notes,
    )


def _check_rates(rows: _Rows) -> _Checked:
    trade = rows.date("trade_date")
    maturity = rows.date("maturity")
    rate = rows.number("zero_rate")
    limit = rows.value_reason("zero_rate", msg.ROW_RATE_RANGE, limit=ZERO_RATE_LIMIT)
    rows.reject(np.abs(rate) > ZERO_RATE_LIMIT, "zero_rate", limit)
    rows.reject(
        maturity <= trade,
        "maturity",
        _each(msg.ROW_NOT_AFTER_TRADE, value=maturity, trade_date=trade),
    )
    _reject_duplicates(rows, [_days(trade), _days(maturity)], [rate])
    ok = rows.ok
    return _Checked(
        columns={
            "trade_date": trade[ok],
            "maturity": maturity[ok],
            "zero_rate": rate[ok],
        },
        notes=[],
    )


# --- the unit of work --------------------------------------------------------------------------


def ingest_file(
    sessions: sessionmaker[Session],
    path: Path,
    kind: Kind,
    *,
    user: str,
    strict: bool = False,
    create: NewCommodity | None = None,
    received_at: datetime | None = None,
) -> IngestReport:
    """Ingest one file in one transaction.

    Parameters
    ----------
    sessions : session factory of the store (the transaction is opened here).
    path : a ``.csv`` or ``.parquet`` file with the columns of ``kind`` (DESIGN §7).
    kind : ``futures``, ``options`` or ``rates``.
    user : recorded as the batch's ``received_by``.
    strict : refuse the whole file if any row is bad.
    create : register unknown commodity codes with these details (default: refuse the file).
    received_at : the batch's receipt time (aware); default now. Readers' ``as_of`` compares
        against it.

    Returns
    -------
    IngestReport

    Raises
    ------
    IngestFileError
        The file cannot be read, lacks required columns, or names an unknown commodity
        without ``create``; nothing is stored.
    """
    name = str(path)
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        raise IngestFileError(name, msg.FILE_NOT_FOUND) from None
    except OSError as exc:
        raise IngestFileError(name, msg.FILE_UNREADABLE.format(detail=exc.strerror)) from None
    digest = hashlib.sha256(data).hexdigest()
    table = read_table(name, data, kind, path.suffix.lower())
    with sessions.begin() as session:
        begin_write(session)
        earlier = find_loaded_batch(session=session, kind=kind, sha256=digest)
        if earlier is not None:
            return IngestReport(
                file=name,
                kind=kind,
                status="duplicate",
                sha256=digest,
                batch_id=earlier.id,
                rows_read=earlier.rows_read,
                rows_accepted=earlier.rows_accepted,
                rows_rejected=earlier.rows_rejected,
                notes=(f"same content as batch {earlier.id} ({earlier.file_name}): nothing done",),
            )
        rows = _Rows(table)
        created: list[str] = []
        if kind == "rates":
            checked = _check_rates(rows)
        else:
            cid, created = _commodities(session, name, rows, create)
            check = _check_futures if kind == "futures" else _check_options
            checked = check(session, rows, cid)
        problems = sorted(table.early + rows.problems(), key=lambda p: p.line)
        rows_read = rows.n + len(table.early)
        refused = strict and bool(problems)
        accepted = 0 if refused else int(rows.ok.sum())
        batch_id = add_batch(
            session=session,
            kind=kind,
            status="rejected" if refused else "loaded",
            file_name=path.name,
            sha256=digest,
            rows_read=rows_read,
            rows_accepted=accepted,
            rows_rejected=rows_read - accepted,
            received_at=received_at or utc_now(),
            received_by=user,
        )
        if not refused:
            _store(session, kind, batch_id, checked, table.lines[rows.ok])
        quarantine(
            session=session,
            rows=[
                {
                    "batch_id": batch_id,
                    "line": p.line,
                    "field": p.field,
                    "reason": p.reason,
                    "raw": p.raw,
                }
                for p in problems
            ],
        )
    notes = list(checked.notes)
    if table.ignored:
        notes.append(f"ignored column(s): {', '.join(table.ignored)}")
    if refused:
        notes.append("strict: the whole file was refused")
    return IngestReport(
        file=name,
        kind=kind,
        status="rejected" if refused else "loaded",
        sha256=digest,
        batch_id=batch_id,
        rows_read=rows_read,
        rows_accepted=accepted,
        rows_rejected=rows_read - accepted,
        problems=tuple(problems[:MAX_REPORTED]),
        created=tuple(created),
        notes=tuple(notes),
    )


def _store(session: Session, kind: Kind, batch_id: int, checked: _Checked, lines: IntArray) -> None:
    columns: dict[str, Any] = {"batch_id": batch_id, "line": lines, **checked.columns}
    insert_columns(session=session, table=QUOTE_TABLES[kind], columns=columns, count=len(lines))
