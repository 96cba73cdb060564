"""Ingest quote files into the store: one file is one transaction.

A file (CSV or Parquet, columns as DESIGN §7) is read in chunks (:mod:`calib.inputs.files`),
every row is checked by the rules of its kind (:mod:`calib.inputs.rules`), good rows land in
the quote table and bad rows in quarantine with the line, field, reason and raw text, all in
one transaction with the batch that records the file. With ``strict`` any bad row refuses the
whole file (the batch is recorded as ``rejected`` with its quarantined rows; no quote lands),
which holds the file for review. The same content again (same sha256, same kind) is a no-op,
also when two processes bring it at once (the check runs under the writer's lock: SQLite's
``BEGIN IMMEDIATE``, a PostgreSQL advisory lock on the content).

Refused whole (:class:`~calib.errors.IngestFileError`, nothing stored): a file that cannot be
read, lacks required columns, has no row after the header, names an unknown commodity in a
futures file (unless ``create``), or brings options for a trade date whose zero curve is not
stored yet (the curve must come first: the no-arbitrage bounds discount with it). An unknown
commodity in an options row is a refused row like any other (options never register one).

Memory stays bounded by the chunk size and the good rows held in compact arrays until the
file's end, when the whole-file rules (repeated keys, day-on-day moves) run; the raw text of
rows refused there is read again from the file.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import asdict, dataclass, field
from datetime import date, datetime, timedelta
from pathlib import Path
from typing import Any, Literal

import numpy as np
import numpy.typing as npt
import pandas as pd
from sqlalchemy.orm import Session, sessionmaker

from calib import errors as msg
from calib.errors import IngestFileError, UnknownCommodityError
from calib.inputs.files import (
    MAX_LISTED,
    FileKind,
    QuoteFile,
    RowProblem,
    Table,
    file_sha256,
    listed,
)
from calib.inputs.rows import KEY_FIELD, DateArray, RowCheck, days, duplicate_reasons, key_hash
from calib.inputs.rules import (
    CODE,
    KEYS,
    MOVES,
    VALUES,
    Bands,
    Checked,
    Discounts,
    Forwards,
    check_futures,
    check_options,
    check_rates,
    commodity_codes,
    commodity_ids,
    contract_key,
    day_on_day,
    move_reasons,
)
from calib.store.base import CURRENCY_CHARS, UNIT_CHARS, USER_CHARS, check_text, utc_now
from calib.store.engine import begin_write, lock_for
from calib.store.quotes import (
    QUOTE_TABLES,
    add_batch,
    add_commodity,
    all_commodity_codes,
    commodity_american,
    current_quotes,
    find_loaded_batch,
    finish_batch,
    insert_columns,
    quarantine,
    zero_curves,
)
from calib.store.quotes import commodity_ids as stored_commodity_ids
from calib.types import EXERCISE_STYLES, FloatArray, IntArray

MAX_REPORTED = 20
"""How many row problems a report carries (the quarantine table has them all)."""


@dataclass(frozen=True)
class NewCommodity:
    """What ``create`` registers for an unknown commodity code (the name is the code)."""

    unit: str = "unit"
    currency: str = "USD"
    calendar_rule: str = "monthly"
    exercise: str = "european"
    """The default exercise style of its options (``european`` or ``american``)."""

    def __post_init__(self) -> None:
        check_text("the unit", self.unit, UNIT_CHARS)
        check_text("the currency", self.currency, CURRENCY_CHARS)
        if self.exercise not in EXERCISE_STYLES:
            raise ValueError(
                f"exercise must be one of {', '.join(EXERCISE_STYLES)}, not {self.exercise!r}"
            )


@dataclass(frozen=True)
class IngestReport:
    """The outcome of ingesting one file.

    ``status``: ``loaded`` (good rows stored, bad rows quarantined), ``rejected`` (strict and
    some row bad: nothing stored but the batch and its quarantine) or ``duplicate`` (same
    content already loaded as ``batch_id``; nothing done; the counts are that batch's).
    ``rows_quarantined`` counts the rows kept in quarantine (with ``strict`` the good rows of a
    refused file are counted rejected but not quarantined).
    """

    file: str
    kind: FileKind
    status: Literal["loaded", "rejected", "duplicate"]
    sha256: str
    batch_id: int
    rows_read: int
    rows_accepted: int
    rows_rejected: int
    rows_quarantined: int = 0
    problems: tuple[RowProblem, ...] = ()
    created: tuple[str, ...] = ()
    curve_missing: tuple[str, ...] = ()
    """Options: trade dates (ISO) without a stored zero curve, whose bounds used r = 0."""
    notes: tuple[str, ...] = field(default=())

    def to_dict(self) -> dict[str, Any]:
        """A JSON-ready dictionary."""
        out = asdict(self)
        out["problems"] = [asdict(p) for p in self.problems]
        out["created"] = list(self.created)
        out["curve_missing"] = list(self.curve_missing)
        out["notes"] = list(self.notes)
        return out


# --- what the rules need from the store --------------------------------------------------------


def _day_list(values: Iterable[Any]) -> DateArray:
    return np.asarray(np.array(list(values), dtype="datetime64[D]"))


def _forwards(session: Session) -> Forwards:
    def forwards(cid: IntArray, trade: DateArray, delivery: DateArray) -> FloatArray:
        first, last = trade.min().astype(date), trade.max().astype(date)
        stored = current_quotes(
            session=session,
            kind="futures",
            commodity_ids=np.unique(cid).tolist(),
            start=first,
            end=last,
        )
        if not len(stored):
            return np.full(len(cid), np.nan)
        index = pd.MultiIndex.from_arrays(
            [
                stored["commodity_id"].to_numpy(dtype=np.int64),
                days(_day_list(stored["trade_date"])),
                days(_day_list(stored["delivery"])),
            ]
        )
        pos = index.get_indexer(pd.MultiIndex.from_arrays([cid, days(trade), days(delivery)]))
        settle = stored["settle"].to_numpy(dtype=np.float64)
        return np.asarray(np.where(pos >= 0, settle[pos], np.nan))

    return forwards


def _discounts(session: Session) -> Discounts:
    def discounts(trade: DateArray, expiry: DateArray) -> FloatArray:
        out = np.full(len(trade), np.nan)
        unique, inverse = np.unique(trade, return_inverse=True)
        curves = zero_curves(
            session=session, start=unique[0].astype(date), end=unique[-1].astype(date)
        )
        for j, day in enumerate(unique):
            curve = curves.get(day.astype(date))
            if curve is not None and len(curve):
                members = np.flatnonzero(inverse == j)
                out[members] = curve.discount(expiry[members])
        return out

    return discounts


# --- the unit of work --------------------------------------------------------------------------


class _Run:
    """One file under ingestion: chunks checked as they come, good rows held compactly."""

    def __init__(
        self,
        session: Session,
        source: QuoteFile,
        batch_id: int,
        create: NewCommodity | None,
        bands: Bands,
    ) -> None:
        self.session = session
        self.source = source
        self.kind = source.kind
        self.batch_id = batch_id
        self.create = create
        self.bands = bands
        self.rows_read = 0
        self.quarantined = 0
        self.shown: list[RowProblem] = []
        self.parts: list[_Part] = []
        self.hashes: list[npt.NDArray[np.uint64]] = []
        self.offsets = np.zeros(1, dtype=np.int64)
        self.good = np.zeros(0, dtype=np.bool_)
        self.created: list[str] = []
        self.no_curve: set[date] = set()

    def add(self, table: Table) -> None:
        rows = RowCheck(table)
        if self.kind == "rates":
            checked = check_rates(rows)
        else:
            cid = self._commodities(rows)
            if self.kind == "futures":
                checked = check_futures(rows, cid)
            else:
                styles = commodity_american(session=self.session, ids=np.unique(cid).tolist())
                default = np.array([styles.get(int(c), False) for c in cid], dtype=np.bool_)
                checked = check_options(
                    rows, cid, _forwards(self.session), _discounts(self.session), default
                )
                self.no_curve.update(checked.no_curve)
        self.rows_read += rows.n + len(table.early)
        self._quarantine(rows.problems())
        self.parts.append(_Part(checked))
        self.hashes.append(key_hash([checked.columns[k] for k in KEYS[self.kind]]))

    def _commodities(self, rows: RowCheck) -> IntArray:
        factor, uniques = commodity_codes(rows)
        wanted = sorted({u for u in uniques if CODE.fullmatch(u)})
        known = stored_commodity_ids(session=self.session, codes=wanted)
        unknown = [c for c in wanted if c not in known]
        if unknown and self.kind == "futures":
            if self.create is None:
                codes = all_commodity_codes(session=self.session)
                hint = msg.HINT_KNOWN.format(known=listed(codes) or "none") + msg.HINT_CREATE
                detail = str(UnknownCommodityError(unknown[:MAX_LISTED], hint))
                raise IngestFileError(self.source.name, detail)
            for code in unknown:
                record = add_commodity(
                    session=self.session,
                    code=code,
                    name=code,
                    unit=self.create.unit,
                    currency=self.create.currency,
                    calendar_rule=self.create.calendar_rule,
                    exercise=self.create.exercise,
                )
                known[code] = record.id
                self.created.append(code)
        # options never register a code: an unknown one is a refused row naming the known ones
        registered = all_commodity_codes(session=self.session) if unknown else sorted(known)
        return commodity_ids(rows, factor, uniques, known, registered)

    def _quarantine(self, problems: Sequence[RowProblem]) -> None:
        if not problems:
            return
        self.quarantined += len(problems)
        self.shown = sorted(self.shown + list(problems[:MAX_REPORTED]), key=lambda p: p.line)[
            :MAX_REPORTED
        ]
        quarantine(
            session=self.session,
            rows=[
                {
                    "batch_id": self.batch_id,
                    "line": p.line,
                    "field": p.field,
                    "reason": p.reason,
                    "raw": p.raw,
                }
                for p in problems
            ],
        )

    def finish(self) -> int:
        """The whole-file rules (repeated keys, day-on-day moves) on the good rows of every
        chunk, which stay where they are; returns how many rows stay good.

        A 64-bit hash of each row's key finds the candidates for repetition; only they (and,
        day on day, the rows with a value to compare) are gathered into arrays.
        """
        sizes = np.array([len(p.lines) for p in self.parts], dtype=np.int64)
        self.offsets = np.concatenate([[0], np.cumsum(sizes)])
        total = int(self.offsets[-1])
        self.good = np.ones(total, dtype=np.bool_)
        found: dict[int, tuple[str, str]] = {}
        hashes = np.concatenate(self.hashes) if self.hashes else np.empty(0, np.uint64)
        self.hashes = []
        candidates = np.flatnonzero(pd.Series(hashes).duplicated(keep=False).to_numpy())
        del hashes
        if candidates.size:
            names = [*KEYS[self.kind], *VALUES[self.kind]]
            got, lines = self._gather(candidates, names)
            keys = [got[k] for k in KEYS[self.kind]]
            values = [got[v] for v in VALUES[self.kind]]
            ok = np.ones(candidates.size, dtype=np.bool_)
            for i, reason in duplicate_reasons(ok, lines, keys, values).items():
                found[int(candidates[i])] = (KEY_FIELD, reason)
        self.good[list(found)] = False
        if self.kind in MOVES:
            for i, reason in self._moves().items():
                found[i] = (MOVES[self.kind][0], reason)
            self.good[list(found)] = False
        if found:
            positions = np.array(sorted(found), dtype=np.int64)
            _, lines = self._gather(positions, [])
            raw = self.source.raw_rows(lines.tolist())
            problems = [
                RowProblem(int(line), *found[int(i)], raw.get(int(line), ""))
                for i, line in zip(positions, lines, strict=True)
            ]
            self._quarantine(sorted(problems, key=lambda p: p.line))
        return int(self.good.sum())

    def _gather(
        self, positions: IntArray, names: Sequence[str]
    ) -> tuple[dict[str, npt.NDArray[Any]], IntArray]:
        """Columns ``names`` and the lines of the good rows at ``positions`` (over all chunks)."""
        part = np.searchsorted(self.offsets, positions, side="right") - 1
        local = positions - self.offsets[part]
        out: dict[str, npt.NDArray[Any]] = {}
        lines = np.empty(positions.size, dtype=np.int64)
        for name in names:
            out[name] = np.empty(positions.size, dtype=self.parts[0].dtypes[name])
        for k in np.unique(part):
            at = np.flatnonzero(part == k)
            lines[at] = self.parts[k].lines[local[at]]
            for name in names:
                out[name][at] = self.parts[k].column(name)[local[at]]
        return out, lines

    def _moves(self) -> dict[int, str]:
        name, band = MOVES[self.kind]
        factor = float(getattr(self.bands, band))
        has_value = np.concatenate(
            [~np.isnan(p.column(name)) for p in self.parts] or [np.empty(0, np.bool_)]
        )
        positions = np.flatnonzero(has_value & self.good)
        if positions.size == 0:
            return {}
        columns, _ = self._gather(positions, [*KEYS[self.kind], name])
        trade = columns["trade_date"]
        first = trade.min().astype(date) - timedelta(days=self.bands.max_gap_days)
        last = trade.max().astype(date)
        cids = np.unique(columns["commodity_id"]).tolist()
        stored = current_quotes(
            session=self.session, kind=self.kind, commodity_ids=cids, start=first, end=last
        )
        old = {k: _stored_column(stored, k, columns[k].dtype) for k in (*KEYS[self.kind], name)}
        refused, previous, previous_day = day_on_day(
            contract_key(columns, self.kind),
            days(trade),
            columns[name],
            contract_key(old, self.kind),
            days(old["trade_date"]),
            np.asarray(old[name], dtype=np.float64),
            factor,
            self.bands.max_gap_days,
        )
        reasons = move_reasons(refused, columns[name], previous, previous_day, name, factor)
        return {int(positions[i]): reason for i, reason in reasons.items()}

    def store(self) -> None:
        """Insert the rows that stayed good, chunk by chunk."""
        table = QUOTE_TABLES[self.kind]
        for k, part in enumerate(self.parts):
            keep = self.good[self.offsets[k] : self.offsets[k + 1]]
            every = bool(keep.all())
            columns = {n: part.column(n) for n in part.dtypes}
            if not every:
                columns = {n: v[keep] for n, v in columns.items()}
            lines = part.lines if every else part.lines[keep]
            insert_columns(
                session=self.session,
                table=table,
                columns={"batch_id": self.batch_id, "line": lines, **columns},
                count=len(lines),
            )


class _Part:
    """One chunk's good rows, held compactly until the file's end: dates and ids as 32-bit
    integers, a float column with no value at all as nothing (about 40 bytes an option row)."""

    def __init__(self, checked: Checked) -> None:
        self.count = len(checked.lines)
        self.lines = checked.lines.astype(np.int32)
        self.dtypes = {name: values.dtype for name, values in checked.columns.items()}
        self.packed: dict[str, npt.NDArray[Any] | None] = {}
        for name, values in checked.columns.items():
            if values.dtype.kind == "M" or values.dtype.kind == "i":
                self.packed[name] = values.astype(np.int32)
            elif values.dtype.kind == "f" and np.isnan(values).all():
                self.packed[name] = None
            else:
                self.packed[name] = values

    def column(self, name: str) -> npt.NDArray[Any]:
        """Column ``name`` as the rules made it."""
        values = self.packed[name]
        if values is None:
            return np.full(self.count, np.nan)
        return values.astype(self.dtypes[name], copy=False)


def _stored_column(frame: pd.DataFrame, name: str, dtype: np.dtype[Any]) -> npt.NDArray[Any]:
    if dtype.kind == "M":
        return _day_list(frame[name])
    if dtype.kind == "f":
        return np.asarray(frame[name].to_numpy(dtype=np.float64, na_value=np.nan))
    return np.asarray(frame[name].to_numpy(dtype=dtype))


def ingest_file(
    sessions: sessionmaker[Session],
    path: Path,
    kind: FileKind,
    *,
    by: str,
    strict: bool = False,
    create: NewCommodity | None = None,
    received_at: datetime | None = None,
    bands: Bands | None = None,
) -> IngestReport:
    """Ingest one file in one transaction.

    Parameters
    ----------
    sessions : session factory of the store (the transaction is opened here).
    path : a ``.csv`` or ``.parquet`` file with the columns of ``kind`` (DESIGN §7).
    kind : ``futures``, ``options`` or ``rates``.
    by : recorded as the batch's ``received_by`` (at most
        :data:`~calib.store.base.USER_CHARS` characters).
    strict : refuse the whole file if any row is bad.
    create : register unknown commodity codes of a futures file with these details (default:
        refuse the file).
    received_at : the batch's receipt time (aware); default now. Readers' ``as_of`` compares
        against it.
    bands : day-on-day plausibility bands (default :class:`~calib.inputs.rules.Bands`).

    Returns
    -------
    IngestReport

    Raises
    ------
    IngestFileError
        The file cannot be read, lacks required columns, has no rows, names an unknown
        commodity in a futures file without ``create``, or brings options for a day without a
        stored zero curve; nothing is stored.
    TextTooLongError
        ``by`` is longer than the store keeps.
    """
    check_text("the user name", by, USER_CHARS)
    digest = file_sha256(path)
    source = QuoteFile(path, kind)
    with sessions.begin() as session:
        begin_write(session)
        lock_for(session, f"ingest:{kind}:{digest}")
        earlier = find_loaded_batch(session=session, kind=kind, sha256=digest)
        if earlier is not None:
            note = f"same content as batch {earlier.id} ({earlier.file_name}): nothing done"
            return IngestReport(
                file=source.name,
                kind=kind,
                status="duplicate",
                sha256=digest,
                batch_id=earlier.id,
                rows_read=earlier.rows_read,
                rows_accepted=earlier.rows_accepted,
                rows_rejected=earlier.rows_rejected,
                rows_quarantined=earlier.rows_rejected,
                notes=(note,),
            )
        batch_id = add_batch(
            session=session,
            kind=kind,
            status="loaded",
            file_name=path.name,
            sha256=digest,
            rows_read=0,
            rows_accepted=0,
            rows_rejected=0,
            received_at=received_at or utc_now(),
            received_by=by,
        )
        run = _Run(session, source, batch_id, create, bands or Bands())
        for table in source.chunks():
            run.add(table)
        if run.rows_read == 0:
            raise IngestFileError(source.name, msg.FILE_NO_ROWS)
        good = run.finish()
        refused = strict and run.quarantined > 0
        accepted = 0 if refused else good
        if not refused:
            run.store()
        finish_batch(
            session=session,
            batch_id=batch_id,
            status="rejected" if refused else "loaded",
            rows_read=run.rows_read,
            rows_accepted=accepted,
            rows_rejected=run.rows_read - accepted,
        )
    notes = []
    lacking = [str(d) for d in sorted(run.no_curve)]
    if lacking:
        notes.append(msg.NOTE_NO_CURVE.format(count=len(lacking), days=listed(lacking, 3)))
    if source.ignored:
        notes.append(f"ignored column(s): {listed(source.ignored)}")
    if refused:
        notes.append("strict: the whole file was refused")
    return IngestReport(
        file=source.name,
        kind=kind,
        status="rejected" if refused else "loaded",
        sha256=digest,
        batch_id=batch_id,
        rows_read=run.rows_read,
        rows_accepted=accepted,
        rows_rejected=run.rows_read - accepted,
        rows_quarantined=run.quarantined,
        problems=tuple(run.shown),
        created=tuple(run.created),
        curve_missing=tuple(lacking),
        notes=tuple(notes),
    )
