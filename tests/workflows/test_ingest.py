"""Ingestion: every rule, quarantine, strict, duplicates of files, corrections; both engines.

The scenario is invented (tests/workflows/ingest_day.py): commodity QRX, trade date 2031-03-03,
two futures, a zero curve.
"""

from __future__ import annotations

import csv
import math
from datetime import UTC, date, datetime
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from sqlalchemy import func, select

from calib.errors import IngestFileError
from calib.inputs.rules import IMPLIED_VOL_MAX, PREMIUM_BOUND_RTOL
from calib.store.engine import Store
from calib.store.models import Commodity, FuturesSettlement, IngestBatch, OptionQuote
from calib.store.quotes import load_day, quarantined_rows
from calib.workflows.ingest import NewCommodity
from tests.workflows.ingest_day import (
    EXPIRY,
    F1,
    OPTION_HEADER,
    TD,
    D,
    fair,
    ingest,
    only_problem,
    option,
    store_day,
    write_csv,
)


@pytest.fixture
def day(store: Store, tmp_path: Path) -> Store:
    """QRX registered, its futures and the zero curve of TD stored."""
    return store_day(store, tmp_path)


# --- file-level refusals ---------------------------------------------------------------------


def test_missing_required_column_refuses_file(day: Store, tmp_path: Path) -> None:
    path = write_csv(tmp_path / "o.csv", [*OPTION_HEADER[:-2], "premium"], [])
    with pytest.raises(IngestFileError, match=r"missing required column.*strike"):
        ingest(day, path, "options")


def test_options_need_premium_or_vol_column(day: Store, tmp_path: Path) -> None:
    path = write_csv(tmp_path / "o.csv", OPTION_HEADER[:-1], [])
    with pytest.raises(IngestFileError, match="premium or an implied_vol column"):
        ingest(day, path, "options")


@pytest.mark.parametrize(
    ("content", "suffix", "match"),
    [
        (b"", ".csv", "empty file"),
        (b"\xff\xfe\x00bad", ".csv", "not UTF-8"),
        (b"a,a,b\n", ".csv", "more than once"),
        (b"x", ".txt", "unknown format"),
        (b"not parquet", ".parquet", "cannot be read"),
    ],
)
def test_unreadable_files_refused(
    day: Store, tmp_path: Path, content: bytes, suffix: str, match: str
) -> None:
    path = tmp_path / f"f{suffix}"
    path.write_bytes(content)
    with pytest.raises(IngestFileError, match=match):
        ingest(day, path, "futures")


def test_unknown_commodity_refused_then_created(store: Store, tmp_path: Path) -> None:
    path = write_csv(
        tmp_path / "f.csv",
        ["trade_date", "commodity", "delivery", "settle"],
        [[TD, "ZZV", "2031-05-01", 10.0]],
    )
    with pytest.raises(IngestFileError, match=r"unknown commodity 'ZZV'.*--create"):
        ingest(store, path, "futures")
    with store.sessions() as s:
        assert s.scalar(select(func.count()).select_from(IngestBatch)) == 0
    report = ingest(store, path, "futures", create=NewCommodity(currency="EUR"))
    assert report.created == ("ZZV",) and report.rows_accepted == 1
    with store.sessions() as s:
        assert s.scalars(select(Commodity.currency)).one() == "EUR"


# --- row rules -------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("row", "field", "reason"),
    [
        ([TD, "QRX", "2031-05-01", "abc"], "settle", "not a number"),
        ([TD, "QRX", "2031-05-01", ""], "settle", "empty"),
        ([TD, "QRX", "2031-05-01", "inf"], "settle", "not a finite"),
        ([TD, "QRX", "2031-05-01", "1e999"], "settle", "not a finite"),
        ([TD, "QRX", "2031-05-01", "0"], "settle", "must be > 0"),
        ([TD, "QRX", "2031-05-01", "-3"], "settle", "must be > 0"),
        (["2031/03/03", "QRX", "2031-05-01", "5"], "trade_date", "not an ISO date"),
        (["2031-3-3", "QRX", "2031-05-01", "5"], "trade_date", "not an ISO date"),
        (["2031-02-30", "QRX", "2031-05-01", "5"], "trade_date", "not an ISO date"),
        (["3031-01-01", "QRX", "3031-05-01", "5"], "trade_date", "outside"),
        ([TD, "QRX", "2031-02-01", "5"], "delivery", "before the trade date"),
        ([TD, "Q R X;--", "2031-05-01", "5"], "commodity", "commodity code"),
    ],
)
def test_futures_row_rules(
    day: Store, tmp_path: Path, row: list[object], field: str, reason: str
) -> None:
    good = [TD, "QRX", "2031-07-01", 53.0]
    path = write_csv(
        tmp_path / "f.csv", ["trade_date", "commodity", "delivery", "settle"], [good, row]
    )
    report = ingest(day, path, "futures")
    assert (report.rows_read, report.rows_accepted, report.rows_rejected) == (2, 1, 1)
    (problem,) = report.problems
    assert problem.line == 3 and problem.field == field and reason in problem.reason


@pytest.mark.parametrize(
    ("row", "field", "reason"),
    [
        (option(-1.0, 1.0), "strike", "must be > 0"),
        (option(50.0, 0.0), "premium", "must be > 0"),
        (option(50.0, 1.0, kind="straddle"), "kind", "call or put"),
        (option(50.0, 1.0, expiry="2031-03-02"), "expiry", "before the trade date"),
        (option(50.0, 1.0, expiry="2031-05-02"), "expiry", "after the delivery"),
        (
            option(50.0, 1.0, delivery="2031-09-01", expiry="2031-08-25"),
            "delivery",
            "no futures settlement",
        ),
        (option(50.0, ""), "premium", "needs a premium or an implied_vol"),
    ],
)
def test_option_row_rules(
    day: Store, tmp_path: Path, row: list[object], field: str, reason: str
) -> None:
    path = write_csv(tmp_path / "o.csv", OPTION_HEADER, [option(50.0, fair(50.0)), row])
    got_field, got_reason = only_problem(day, path)
    assert got_field == field and reason in got_reason


def test_expiry_on_trade_date_and_on_delivery_accepted(day: Store, tmp_path: Path) -> None:
    rows = [option(60.0, 0.5, expiry=TD), option(60.0, 0.5, expiry="2031-05-01")]
    path = write_csv(tmp_path / "o.csv", OPTION_HEADER, rows)
    assert ingest(day, path, "options").rows_rejected == 0


@pytest.mark.parametrize(
    ("vol", "ok"),
    [
        (0.0, False),
        (1e-9, True),
        (IMPLIED_VOL_MAX, True),
        (IMPLIED_VOL_MAX + 1e-9, False),
        (-0.2, False),
    ],
)
def test_implied_vol_range(day: Store, tmp_path: Path, vol: float, ok: bool) -> None:
    header = [*OPTION_HEADER[:-1], "implied_vol"]
    path = write_csv(tmp_path / "o.csv", header, [option(50.0, vol)])
    report = ingest(day, path, "options")
    assert report.rows_accepted == int(ok)
    if not ok:
        assert report.problems[0].field == "implied_vol"


def test_bid_ask_rules(day: Store, tmp_path: Path) -> None:
    header = [*OPTION_HEADER, "bid", "ask"]
    p = fair(50.0)
    rows = [
        [*option(50.0, p), p - 0.1, p + 0.1],
        [*option(51.0, fair(51.0)), 2.0, 1.0],
        [*option(52.0, fair(52.0)), -1.0, 1.0],
        [*option(53.0, fair(53.0)), "", ""],
    ]
    report = ingest(day, write_csv(tmp_path / "o.csv", header, rows), "options")
    assert report.rows_accepted == 2
    assert [(p.line, p.field) for p in report.problems] == [(3, "bid"), (4, "bid")]


# No-arbitrage bounds (Black 1976; common practice): D max(F-K,0) <= C <= D F,
# D max(K-F,0) <= P <= D K, tolerance PREMIUM_BOUND_RTOL * max(F, K).
@pytest.mark.parametrize(
    ("strike", "kind", "premium", "ok"),
    [
        (40.0, "call", D * 10.0 - 2.0 * PREMIUM_BOUND_RTOL * 50, False),  # below intrinsic
        (40.0, "call", D * 10.0 - 0.5 * PREMIUM_BOUND_RTOL * 50, True),  # within tolerance
        (40.0, "call", D * 50.0 + 2.0 * PREMIUM_BOUND_RTOL * 50, False),  # above D F
        (60.0, "put", D * 10.0 - 2.0 * PREMIUM_BOUND_RTOL * 60, False),  # put below intrinsic
        (60.0, "put", D * 60.0 + 2.0 * PREMIUM_BOUND_RTOL * 60, False),  # put above D K
        (60.0, "put", D * 60.0 - 0.001, True),
    ],
)
def test_no_arbitrage_bounds(
    day: Store, tmp_path: Path, strike: float, kind: str, premium: float, ok: bool
) -> None:
    path = write_csv(tmp_path / "o.csv", OPTION_HEADER, [option(strike, premium, kind=kind)])
    report = ingest(day, path, "options")
    assert report.rows_accepted == int(ok), report.problems
    if not ok:
        assert report.problems[0].field == "premium"
        assert ("below" in report.problems[0].reason) == (premium < D * 20)


def test_bounds_without_curve_use_zero_rate_and_say_so(day: Store, tmp_path: Path) -> None:
    other = "2031-03-04"
    fut = write_csv(
        tmp_path / "f2.csv",
        ["trade_date", "commodity", "delivery", "settle"],
        [[other, "QRX", "2031-05-01", F1]],
    )
    ingest(day, fut, "futures")
    # D = 1 without a curve: a call worth exactly the undiscounted intrinsic value passes
    path = write_csv(tmp_path / "o.csv", OPTION_HEADER, [option(40.0, 10.0, trade_date=other)])
    report = ingest(day, path, "options")
    assert report.rows_accepted == 1
    assert any("no zero curve" in note for note in report.notes)


def test_rates_rules(store: Store, tmp_path: Path) -> None:
    rows = [[TD, "2031-06-03", 0.04], [TD, "2031-03-03", 0.04], [TD, "2032-03-03", 4.5]]
    report = ingest(
        store, write_csv(tmp_path / "r.csv", ["trade_date", "maturity", "zero_rate"], rows), "rates"
    )
    assert report.rows_accepted == 1
    assert [(p.field, p.reason.split(":")[0]) for p in report.problems] == [
        ("maturity", "2031-03-03 is not after the trade date 2031-03-03"),
        ("zero_rate", "zero rate must be within +-1 (a decimal, not percent)"),
    ]


def test_conflicting_duplicates_all_refused_repeats_once(day: Store, tmp_path: Path) -> None:
    p = fair(50.0)
    rows = [
        option(50.0, p),
        option(50.0, p + 0.5),
        option(55.0, fair(55.0)),
        option(55.0, fair(55.0)),
        option(45.0, fair(45.0)),
    ]
    report = ingest(day, write_csv(tmp_path / "o.csv", OPTION_HEADER, rows), "options")
    assert report.rows_accepted == 2  # 55 once, 45
    reasons = {p.line: p.reason for p in report.problems}
    assert reasons == {
        2: "same key as line(s) 3 with different values",
        3: "same key as line(s) 2 with different values",
        5: "repeats line 4",
    }


def test_ragged_line_quarantined_with_raw_text(day: Store, tmp_path: Path) -> None:
    path = tmp_path / "f.csv"
    path.write_text(
        f"trade_date,commodity,delivery,settle\n{TD},QRX,2031-07-01,53\n\n"
        f'{TD},QRX,"2031-08-01",54,extra\n'
    )
    report = ingest(day, path, "futures")
    assert (report.rows_read, report.rows_accepted) == (2, 1)
    (problem,) = report.problems
    assert (problem.line, problem.field) == (4, "*")
    assert "expected 4 fields, found 5" in problem.reason
    with day.sessions() as s:
        (stored,) = quarantined_rows(session=s, batch_id=report.batch_id)
    assert stored.raw == f"{TD},QRX,2031-08-01,54,extra" and stored.line == 4


def test_whitespace_and_case_tolerated(day: Store, tmp_path: Path) -> None:
    path = tmp_path / "o.csv"
    path.write_text(
        "Trade_Date , commodity,delivery,expiry,KIND,strike,premium\n"
        f" {TD} ,QRX , 2031-05-01,{EXPIRY}, Call , 50 , {fair(50.0)} \n"
    )
    assert ingest(day, path, "options").rows_accepted == 1


@pytest.mark.parametrize("newline", ["\n", "\r\n"])
def test_plain_and_quoted_files_read_alike(day: Store, tmp_path: Path, newline: str) -> None:
    # An unquoted file takes the fast reader, the same rows fully quoted the general one: the
    # rules must see the same values either way (numbers in forms only one parser might take).
    header = [*OPTION_HEADER, "implied_vol"]
    body = [
        [*option(50.0, fair(50.0)), ""],
        [*option(50.0, "1_0", kind="put"), ""],
        [*option(48.0, "nan"), ""],
        [*option(46.0, "inf"), ""],
        [*option(0, 1)[:5], "nan", 1.0, ""],  # strikes: every other one arrow can parse
        [*option(0, 1)[:5], "-inf", 1.0, ""],
        [*option(0, 1)[:5], "-0", 1.0, ""],
        [*option(44.0, f"+{fair(44.0)}"), ""],
        [*option(42.0, "0x1"), ""],
        [*option(0.0, 1.0), ""],
        [*option(52.0, ""), "0.3"],
        [*option(54.0, ""), ""],
    ]
    seen = []
    for name, quoting in (("plain.csv", csv.QUOTE_MINIMAL), ("quoted.csv", csv.QUOTE_ALL)):
        path = tmp_path / name
        with path.open("w", newline="") as handle:
            writer = csv.writer(handle, quoting=quoting, lineterminator=newline)
            writer.writerow(header)
            writer.writerows(body)
        report = ingest(day, path, "options")
        seen.append((report.rows_accepted, [(p.line, p.field, p.reason) for p in report.problems]))
        if quoting == csv.QUOTE_MINIMAL:
            assert '"' not in path.read_text()
            assert report.problems[0].raw == ",".join(str(v) for v in body[1])
    assert seen[0] == seen[1]
    assert seen[0][0] == 3, seen[0]


# --- files as units ----------------------------------------------------------------------------


def test_strict_refuses_whole_file(day: Store, tmp_path: Path) -> None:
    rows = [option(50.0, fair(50.0)), option(50.0, -1.0, kind="put")]
    path = write_csv(tmp_path / "o.csv", OPTION_HEADER, rows)
    report = ingest(day, path, "options", strict=True)
    assert (report.status, report.rows_accepted, report.rows_rejected) == ("rejected", 0, 2)
    with day.sessions() as s:
        assert s.scalar(select(func.count()).select_from(OptionQuote)) == 0
        assert len(quarantined_rows(session=s, batch_id=report.batch_id)) == 1
    # a refused file may come again (not a no-op) and, without --strict, its good row lands
    assert ingest(day, path, "options").rows_accepted == 1


def test_same_file_twice_is_a_noop(day: Store, tmp_path: Path) -> None:
    path = write_csv(tmp_path / "o.csv", OPTION_HEADER, [option(50.0, fair(50.0))])
    first = ingest(day, path, "options")
    again = ingest(day, path, "options")
    assert again.status == "duplicate" and again.batch_id == first.batch_id
    with day.sessions() as s:
        assert s.scalar(select(func.count()).select_from(OptionQuote)) == 1


def test_correction_supersedes_and_as_of_sees_the_past(day: Store, tmp_path: Path) -> None:
    first = datetime(2025, 3, 3, 18, tzinfo=UTC)  # receipt times before the test runs
    later = datetime(2025, 3, 4, 9, tzinfo=UTC)
    a = write_csv(tmp_path / "a.csv", OPTION_HEADER, [option(50.0, 2.0), option(55.0, 1.0)])
    b = write_csv(tmp_path / "b.csv", OPTION_HEADER, [option(50.0, 2.1)])
    ingest(day, a, "options", received_at=first)
    ingest(day, b, "options", received_at=later)
    with day.sessions() as s:
        now = load_day(session=s, commodity="QRX", trade_date=date(2031, 3, 3))
        then = load_day(
            session=s,
            commodity="QRX",
            trade_date=date(2031, 3, 3),
            as_of=datetime(2025, 3, 4, tzinfo=UTC),
        )
        assert s.scalar(select(func.count()).select_from(OptionQuote)) == 3  # both stay
    np.testing.assert_array_equal(now.options.premium, [2.1, 1.0])
    np.testing.assert_array_equal(then.options.premium, [2.0, 1.0])


def test_parquet_input(day: Store, tmp_path: Path) -> None:
    frame = pd.DataFrame(
        {
            "trade_date": [date(2031, 3, 3)] * 2,
            "commodity": ["QRX", "QRX"],
            "delivery": [date(2031, 5, 1)] * 2,
            "expiry": [date(2031, 4, 25)] * 2,
            "kind": ["call", "put"],
            "strike": [50.0, 50.0],
            "premium": [fair(50.0), None],
            "implied_vol": [None, 0.3],
        }
    )
    path = tmp_path / "o.parquet"
    frame.to_parquet(path)
    report = ingest(day, path, "options")
    assert report.rows_accepted == 2, report.problems
    with day.sessions() as s:
        got = load_day(session=s, commodity="QRX", trade_date=date(2031, 3, 3)).options
    np.testing.assert_array_equal(got.is_call, [False, True])  # puts sort first
    assert math.isnan(got.premium[0]) and got.implied_vol[0] == 0.3
    assert got.premium[1] == fair(50.0)  # stored exactly (float64 round trip)


def test_values_round_trip_exactly(day: Store, tmp_path: Path) -> None:
    settle = 0.1 + 0.2  # not representable in few digits
    path = write_csv(
        tmp_path / "f.csv",
        ["trade_date", "commodity", "delivery", "settle"],
        [[TD, "QRX", "2031-08-01", repr(settle)]],
    )
    ingest(day, path, "futures")
    with day.sessions() as s:
        stored = s.scalars(
            select(FuturesSettlement.settle).where(FuturesSettlement.delivery == date(2031, 8, 1))
        ).one()
    assert stored == settle
