"""Property: hostile files never raise an unhandled exception nor leave a half-ingested batch.

Runs on SQLite only: 1,000 examples each make a transaction, and on PostgreSQL that would cost
several times the suite's time budget; the rules under test (parsing, validation, one
transaction per file) are the same code on both engines, covered there by test_ingest.py.
"""

from __future__ import annotations

import csv
import io
from collections.abc import Iterator
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from sqlalchemy import func, select

from calib.errors import IngestFileError
from calib.inputs.files import REQUIRED_COLUMNS
from calib.store.engine import Store, make_store
from calib.store.migrate import upgrade
from calib.store.models import FuturesSettlement, IngestBatch, OptionQuote, QuarantinedRow
from calib.workflows.ingest import NewCommodity, ingest_file

VALID = {
    "trade_date": ["2031-03-03"],
    "commodity": ["QRX"],
    "delivery": ["2031-05-01", "2031-06-01"],
    "expiry": ["2031-04-25"],
    "kind": ["call", "put"],
    "strike": ["50", "45.5"],
    "premium": ["2.5", "0.75"],
    "implied_vol": ["0.3"],
    "settle": ["50", "52"],
}
HOSTILE = [
    "",
    " ",
    "NaN",
    "nan",
    "inf",
    "-inf",
    "1e999",
    "-1e999",
    "9" * 400,
    "0",
    "-0",
    "1e-320",
    "'; DROP TABLE option_quotes; --",
    "Robert'); DELETE FROM ingest_batches;--",
    '"',
    '""',
    "a,b",
    "\n",
    "\r\n",
    "\x00",
    "2031-02-30",
    "0000-00-00",
    "2031-13-01",
    "31/12/2031",
    "QRX\u200b",
    "Ｑ",
    "٣",
    "🙂",
    "NULL",
    "None",
    "True",
    "0x1F",
    "1_000",
    "call put",
]
COLUMNS = sorted({c for cols in REQUIRED_COLUMNS.values() for c in cols} | set(VALID) | {"bid"})

cell = st.one_of(
    st.sampled_from([v for vs in VALID.values() for v in vs]),
    st.sampled_from(HOSTILE),
    st.text(max_size=12),
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
)


@st.composite
def csv_files(draw: st.DrawFn) -> bytes:
    kind = draw(st.sampled_from(["futures", "options"]))
    header = list(REQUIRED_COLUMNS[kind]) + (["premium"] if kind == "options" else [])
    if draw(st.booleans()):
        header = draw(st.lists(st.sampled_from(COLUMNS), max_size=9))
    rows = []
    for _ in range(draw(st.integers(0, 6))):
        row = [draw(st.sampled_from(VALID.get(c, [""]))) for c in header]
        for j in draw(st.lists(st.integers(0, max(len(header) - 1, 0)), max_size=3)):
            if row:
                row[j] = draw(cell)
        if draw(st.integers(0, 9)) == 0:
            row = [*row, draw(cell)]  # a ragged line
        rows.append(row)
    buf = io.StringIO()
    writer = csv.writer(buf)
    writer.writerow(header)
    writer.writerows(rows)
    text = buf.getvalue()
    if draw(st.integers(0, 19)) == 0:
        text = text[: draw(st.integers(0, len(text)))]  # truncated anywhere
    data = text.encode()
    if draw(st.integers(0, 19)) == 0:
        data = draw(st.binary(max_size=60))  # not text at all
    return data


@pytest.fixture(scope="module")
def seeded(tmp_path_factory: pytest.TempPathFactory) -> Iterator[tuple[Store, Path]]:
    folder = tmp_path_factory.mktemp("hostile")
    store = make_store(f"sqlite:///{folder / 'h.sqlite'}")
    upgrade(store.engine)
    fut = folder / "seed.csv"
    fut.write_text("trade_date,commodity,delivery,settle\n2031-03-03,QRX,2031-05-01,50\n")
    ingest_file(store.sessions, fut, "futures", by="t", create=NewCommodity())
    rates = folder / "rates.csv"
    rates.write_text("trade_date,maturity,zero_rate\n2031-03-03,2032-03-03,0.03\n")
    ingest_file(store.sessions, rates, "rates", by="t")
    yield store, folder
    store.engine.dispose()


def _counts(store: Store) -> dict[int, tuple[str, int, int, int, int]]:
    with store.sessions() as s:
        batches = s.execute(
            select(
                IngestBatch.id,
                IngestBatch.status,
                IngestBatch.rows_accepted,
                IngestBatch.rows_rejected,
            )
        ).all()
        stored: dict[int, int] = {}
        for table in (FuturesSettlement, OptionQuote):
            for bid, n in s.execute(select(table.batch_id, func.count()).group_by(table.batch_id)):
                stored[bid] = stored.get(bid, 0) + n
        held = dict(
            s.execute(
                select(QuarantinedRow.batch_id, func.count()).group_by(QuarantinedRow.batch_id)
            ).all()
        )
    return {
        b.id: (b.status, b.rows_accepted, b.rows_rejected, stored.get(b.id, 0), held.get(b.id, 0))
        for b in batches
    }


@pytest.mark.slow
@settings(max_examples=1000, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(data=csv_files(), kind=st.sampled_from(["futures", "options"]), strict=st.booleans())
def test_hostile_files_are_handled_whole(
    seeded: tuple[Store, Path], data: bytes, kind: str, strict: bool
) -> None:
    store, folder = seeded
    path = folder / "in.csv"
    path.write_bytes(data)
    before = _counts(store)
    try:
        report = ingest_file(store.sessions, path, kind, by="t", strict=strict)  # type: ignore[arg-type]
    except IngestFileError as exc:
        assert str(exc).startswith(str(path))
        assert _counts(store) == before  # nothing stored
        return
    after = _counts(store)
    if report.status == "duplicate":
        assert after == before
        return
    assert set(after) - set(before) == {report.batch_id}
    status, accepted, rejected, stored, held = after[report.batch_id]
    assert report.rows_read == accepted + rejected
    if status == "loaded":
        assert (stored, held) == (accepted, rejected)
    else:
        assert strict and stored == 0 and accepted == 0 and 1 <= held <= rejected
