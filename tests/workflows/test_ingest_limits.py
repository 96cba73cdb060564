"""Ingestion at its limits: absurd values, day-on-day moves, wide headers, NUL, long lines and
fields, unbalanced quotes, empty files, unknown codes in options, text limits; both engines.

The scenario is the invented one of ingest_day.py (commodity QRX, trade date 2031-03-03).
"""

from __future__ import annotations

import csv
from pathlib import Path

import pytest
from sqlalchemy import func, select

from calib.errors import IngestFileError, TextTooLongError
from calib.inputs.files import MAX_COLUMNS, MAX_LINE_CHARS
from calib.inputs.rules import HORIZON_YEARS, Bands
from calib.store.base import UNIT_CHARS, USER_CHARS
from calib.store.engine import Store
from calib.store.models import IngestBatch, OptionQuote
from calib.store.quotes import quarantined_rows
from calib.workflows.ingest import NewCommodity, ingest_file
from tests.workflows.ingest_day import OPTION_HEADER, TD, fair, ingest, option, store_day, write_csv

FUT = ["trade_date", "commodity", "delivery", "settle"]
RATES = ["trade_date", "maturity", "zero_rate"]


@pytest.fixture
def day(store: Store, tmp_path: Path) -> Store:
    """QRX registered, its futures and the zero curve of TD stored."""
    return store_day(store, tmp_path)


def _batches(store: Store) -> int:
    with store.sessions() as s:
        return int(s.scalar(select(func.count()).select_from(IngestBatch)) or 0)


# --- files that are not what they claim --------------------------------------------------------


@pytest.mark.parametrize(
    "body",
    ["trade_date,commodity,delivery,settle\n", "trade_date,commodity,delivery,settle\r\n\r\n\n"],
)
def test_header_only_file_is_refused(day: Store, tmp_path: Path, body: str) -> None:
    path = tmp_path / "f.csv"
    path.write_text(body)
    before = _batches(day)
    with pytest.raises(IngestFileError, match="no rows after the header"):
        ingest(day, path, "futures")
    assert _batches(day) == before


def test_again_a_file_whose_first_ingest_quarantined_rows_says_so(
    day: Store, tmp_path: Path
) -> None:
    rows = [option(50.0, fair(50.0)), option(50.0, -1.0, kind="put")]
    path = write_csv(tmp_path / "o.csv", OPTION_HEADER, rows)
    first = ingest(day, path, "options")
    again = ingest(day, path, "options")
    assert (first.status, first.rows_quarantined) == ("loaded", 1)
    assert (again.status, again.batch_id, again.rows_quarantined) == (
        "duplicate",
        first.batch_id,
        1,
    )


def test_unknown_commodity_in_an_options_row_is_one_quarantined_row(
    day: Store, tmp_path: Path
) -> None:
    rows = [option(50.0, fair(50.0)), option(50.0, fair(50.0), commodity="QRY")]
    path = write_csv(tmp_path / "o.csv", OPTION_HEADER, rows)
    report = ingest(day, path, "options", create=NewCommodity())  # options never register
    assert (report.rows_read, report.rows_accepted, report.rows_quarantined) == (2, 1, 1)
    (problem,) = report.problems
    assert (problem.line, problem.field) == (3, "commodity")
    assert problem.reason == "unknown commodity 'QRY'; known: QRX"
    assert report.created == ()


def test_unknown_commodity_in_a_futures_file_names_the_known_ones(
    day: Store, tmp_path: Path
) -> None:
    path = write_csv(tmp_path / "f.csv", FUT, [[TD, "QRY", "2031-05-01", 50.0]])
    with pytest.raises(IngestFileError, match=r"unknown commodity 'QRY' \(known: QRX\).*--create"):
        ingest(day, path, "futures")


# --- absurd values ------------------------------------------------------------------------------


@pytest.mark.parametrize("settle", ["1e308", "1.797e308", "1e-300", "5e-324"])
def test_absurd_settlements_are_refused(day: Store, tmp_path: Path, settle: str) -> None:
    path = write_csv(tmp_path / "f.csv", FUT, [[TD, "QRX", "2031-07-01", settle]])
    report = ingest(day, path, "futures")
    (problem,) = report.problems
    assert problem.field == "settle" and "must be within 1e-06..1e+09" in problem.reason


def test_delivery_beyond_the_horizon_is_refused(day: Store, tmp_path: Path) -> None:
    path = write_csv(tmp_path / "f.csv", FUT, [[TD, "QRX", "2199-12-31", 50.0]])
    (problem,) = ingest(day, path, "futures").problems
    assert problem.field == "delivery"
    assert f"more than {HORIZON_YEARS} years after the trade date" in problem.reason


@pytest.mark.parametrize(
    ("row", "field", "reason"),
    [
        (option(1e308, 1.0), "strike", "must be within"),
        (option(5001.0, 1.0), "strike", "beyond x100 of the future's settlement 50"),
        (option(60.0, 5e-324), "premium", "below 1e-12 of max(F, K)"),
    ],
)
def test_absurd_option_values_are_refused(
    day: Store, tmp_path: Path, row: list[object], field: str, reason: str
) -> None:
    path = write_csv(tmp_path / "o.csv", OPTION_HEADER, [row])
    (problem,) = ingest(day, path, "options").problems
    assert problem.field == field and reason in problem.reason, problem


def test_tiny_implied_vol_is_refused(day: Store, tmp_path: Path) -> None:
    header = [*OPTION_HEADER[:-1], "implied_vol"]
    path = write_csv(tmp_path / "o.csv", header, [option(50.0, 1e-300)])
    (problem,) = ingest(day, path, "options").problems
    assert problem.field == "implied_vol" and "below 1e-09" in problem.reason


# --- day on day ----------------------------------------------------------------------------------


def test_tenfold_settlement_typo_is_refused_against_the_stored_day(
    day: Store, tmp_path: Path
) -> None:
    # the day fixture stored 2031-05-01 at 50 on TD; the next day a x10 typo
    rows = [["2031-03-04", "QRX", "2031-05-01", 500.0], ["2031-03-04", "QRX", "2031-06-01", 52.5]]
    path = write_csv(tmp_path / "f.csv", FUT, rows)
    held = ingest(day, path, "futures", strict=True)  # held for review: nothing lands
    assert (held.status, held.rows_accepted, held.rows_quarantined) == ("rejected", 0, 1)
    (problem,) = held.problems
    assert (problem.line, problem.field) == (2, "settle")
    assert "settle 500 is x10 the previous 50 of 2031-03-03" in problem.reason
    assert problem.raw == "2031-03-04,QRX,2031-05-01,500.0"
    loaded = ingest(day, path, "futures")
    assert (loaded.rows_accepted, loaded.rows_quarantined) == (1, 1)
    # a genuine move, after review: a wider band lets it through (a new file: a correction)
    again = write_csv(tmp_path / "f2.csv", FUT, rows[:1])
    assert ingest(day, again, "futures", bands=Bands(settle_move=20.0)).rows_accepted == 1


def test_typo_inside_a_file_is_passed_over_by_the_following_day(day: Store, tmp_path: Path) -> None:
    rows = [
        ["2031-03-04", "QRX", "2031-05-01", 51.0],
        ["2031-03-05", "QRX", "2031-05-01", 5.2],  # a /10 typo
        ["2031-03-06", "QRX", "2031-05-01", 52.0],  # compared with 51, not with the typo
        ["2031-04-30", "QRX", "2031-05-01", 200.0],  # previous one too old to compare
    ]
    report = ingest(day, write_csv(tmp_path / "f.csv", FUT, rows), "futures")
    assert [(p.line, p.field) for p in report.problems] == [(3, "settle")]
    assert report.rows_accepted == 3


def test_implied_vol_jump_is_refused(day: Store, tmp_path: Path) -> None:
    header = [*OPTION_HEADER[:-1], "implied_vol"]
    rows = [option(50.0, 0.3), option(55.0, 0.3)]
    ingest(day, write_csv(tmp_path / "o1.csv", header, rows), "options")
    nxt = "2031-03-04"
    ingest(day, write_csv(tmp_path / "f.csv", FUT, [[nxt, "QRX", "2031-05-01", 50.5]]), "futures")
    ingest(day, write_csv(tmp_path / "r.csv", RATES, [[nxt, "2031-06-03", 0.04]]), "rates")
    rows = [option(50.0, 3.0, trade_date=nxt), option(55.0, 0.32, trade_date=nxt)]
    report = ingest(day, write_csv(tmp_path / "o2.csv", header, rows), "options")
    (problem,) = report.problems
    assert problem.field == "implied_vol" and "x10 the previous 0.3 of 2031-03-03" in problem.reason


# --- wide headers, long lines, quotes, NUL -------------------------------------------------


@pytest.mark.parametrize(
    ("columns", "match"),
    [
        (MAX_COLUMNS + 1, f"the header has {MAX_COLUMNS + 1} columns; at most {MAX_COLUMNS}"),
        (30_000, "the header line is longer than 65536 bytes"),
        (1_000_000, "the header line is longer than 65536 bytes"),
    ],
)
def test_very_wide_header_is_refused_in_one_short_line(
    day: Store, tmp_path: Path, columns: int, match: str
) -> None:
    path = tmp_path / "w.csv"
    names = ["trade_date", "commodity", "delivery", "settle"]
    names += [f"extra{j}" for j in range(columns - len(names))]
    path.write_text(",".join(names) + "\n" + ",".join("1" for _ in names) + "\n")
    with pytest.raises(IngestFileError, match=match) as info:
        ingest(day, path, "futures")
    assert len(str(info.value)) < 200 + len(str(path)) and "\n" not in str(info.value)


def test_repeated_and_ignored_column_lists_are_capped(day: Store, tmp_path: Path) -> None:
    base = ["trade_date", "commodity", "delivery", "settle"]
    extra = [f"x{j}" for j in range(100)]
    path = tmp_path / "d.csv"
    path.write_text(",".join(base + extra + extra) + "\n")
    with pytest.raises(IngestFileError, match=r"'x0', .*'x17' and 90 more appear more than once"):
        ingest(day, path, "futures")
    path = write_csv(tmp_path / "i.csv", base + extra, [[TD, "QRX", "2031-07-01", 53, *extra]])
    report = ingest(day, path, "futures")
    (note,) = report.notes
    assert note.endswith("and 90 more") and len(note) < 200


def test_nul_in_a_field_is_one_quarantined_row(day: Store, tmp_path: Path) -> None:
    path = tmp_path / "n.csv"
    path.write_bytes(
        b"trade_date,commodity,delivery,settle\n"
        + f"{TD},QRX,2031-07-01,53\n{TD},QRX,2031-08-01,5\x004\n".encode()
    )
    report = ingest(day, path, "futures")
    assert (report.rows_read, report.rows_accepted) == (2, 1)
    (problem,) = report.problems
    assert (problem.line, problem.field, problem.reason) == (
        3,
        "settle",
        "contains a NUL character",
    )
    with day.sessions() as s:
        (stored,) = quarantined_rows(session=s, batch_id=report.batch_id)
    assert stored.raw == f"{TD},QRX,2031-08-01,5\\x004"


def test_field_over_the_line_limit_is_one_quarantined_row(day: Store, tmp_path: Path) -> None:
    # quoted, so the line-by-line reader (whose field limit used to refuse the file) reads it
    good = [[TD, "QRX", f"2031-{m:02d}-01", 50.0 + m] for m in range(7, 12)]
    huge = [TD, "QRX" + "x" * (MAX_LINE_CHARS + 10), "2031-12-01", 60.0]
    path = tmp_path / "h.csv"
    with path.open("w", newline="") as handle:
        csv.writer(handle, quoting=csv.QUOTE_ALL).writerows([FUT, good[0], huge, *good[1:]])
    report = ingest(day, path, "futures")
    assert (report.rows_read, report.rows_accepted, report.rows_quarantined) == (6, 5, 1)
    (problem,) = report.problems
    assert problem.line == 3 and "at most 131072 are read" in problem.reason
    assert len(problem.raw) < 5000


@pytest.mark.parametrize("strict", [False, True])
def test_unbalanced_quote_is_one_quarantined_row_with_exact_counts(
    day: Store, tmp_path: Path, strict: bool
) -> None:
    path = tmp_path / "q.csv"
    path.write_text(
        "trade_date,commodity,delivery,settle\n"
        f'{TD},QRX,"2031-07-01,53\n'
        + "".join(f"{TD},QRX,2031-{m:02d}-01,{50 + m}\n" for m in range(8, 13))
    )
    report = ingest(day, path, "futures", strict=strict)
    assert (report.rows_read, report.rows_quarantined) == (6, 1)
    assert report.rows_accepted == (0 if strict else 5)
    (problem,) = report.problems
    assert (problem.line, problem.field) == (2, "*")
    assert problem.reason == "unbalanced quote: 1 quote character(s) on the line"
    with day.sessions() as s:
        assert len(quarantined_rows(session=s, batch_id=report.batch_id)) == 1


def test_rows_read_in_several_chunks_keep_their_lines(
    day: Store, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    import calib.inputs.files as files

    monkeypatch.setattr(files, "CHUNK_BYTES", 64)  # a chunk of about two lines
    rows = [option(40.0 + k, fair(40.0 + k)) for k in range(12)]
    rows[7] = option(47.0, -1.0)
    rows.append(option(40.0, fair(40.0) + 0.5))  # conflicts with line 2, in another chunk
    path = write_csv(tmp_path / "o.csv", OPTION_HEADER, rows)
    report = ingest(day, path, "options")
    assert (report.rows_read, report.rows_accepted) == (13, 10)
    assert [(p.line, p.field) for p in report.problems] == [(2, "key"), (9, "premium"), (14, "key")]
    assert report.problems[0].raw == ",".join(str(v) for v in rows[0])
    with day.sessions() as s:
        lines = sorted(s.scalars(select(OptionQuote.line)))
    assert lines == [3, 4, 5, 6, 7, 8, 10, 11, 12, 13]


# --- text limits: the same on both engines -----------------------------------------------------


def test_long_unit_and_user_are_refused_at_the_boundary(store: Store, tmp_path: Path) -> None:
    with pytest.raises(
        TextTooLongError, match=f"the unit is 200 characters long; at most {UNIT_CHARS}"
    ):
        NewCommodity(unit="u" * 200)
    path = write_csv(tmp_path / "f.csv", FUT, [[TD, "QRX", "2031-07-01", 50.0]])
    with pytest.raises(TextTooLongError, match=f"at most {USER_CHARS} are stored"):
        ingest_file(store.sessions, path, "futures", by="x" * 200, create=NewCommodity())
    assert _batches(store) == 0


# --- a full disk ---------------------------------------------------------------------------


def test_disk_full_during_the_bulk_insert_is_one_line(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    # SQLite's max_page_count makes the database full (SQLITE_FULL, what a full disk gives)
    # once the batch row is in and the bulk insert of the quotes begins.
    import sqlite3
    import sys
    from typing import Any

    import calib.store.engine as engine_module
    from calib.cli import main

    db = f"sqlite:///{tmp_path / 'full.sqlite'}"

    def cli(*args: str) -> tuple[int, str]:
        monkeypatch.setattr(sys, "argv", ["calib", *args, "--db", db])
        with pytest.raises(SystemExit) as info:
            main()
            raise SystemExit(0)
        return int(info.value.code or 0), capsys.readouterr().err

    assert cli("init")[0] == 0
    original = engine_module._sqlite_on_connect

    def nearly_full(connection: sqlite3.Connection, record: Any, **options: Any) -> None:
        original(connection, record, **options)
        pages = connection.execute("PRAGMA page_count").fetchone()[0]
        connection.execute(f"PRAGMA max_page_count={pages + 2}")

    monkeypatch.setattr(engine_module, "_sqlite_on_connect", nearly_full)
    rows = [["2031-03-03", f"{2032 + k // 12}-{k % 12 + 1:02d}-03", 0.03] for k in range(500)]
    path = write_csv(tmp_path / "r.csv", ["trade_date", "maturity", "zero_rate"], rows)
    code, err = cli("ingest", "rates", str(path))
    assert code == 1 and err.count("\n") == 1, err
    assert "full" in err and "Traceback" not in err


def test_options_before_their_days_curve_are_reported(day: Store, tmp_path: Path) -> None:
    other = "2031-03-04"
    fut = write_csv(tmp_path / "f2.csv", FUT, [[other, "QRX", "2031-05-01", 50.0]])
    ingest(day, fut, "futures")
    rows = [option(40.0, 10.0, trade_date=other), option(50.0, fair(50.0))]
    report = ingest(day, write_csv(tmp_path / "o.csv", OPTION_HEADER, rows), "options")
    assert report.rows_accepted == 2 and report.curve_missing == (other,)
    assert report.to_dict()["curve_missing"] == [other]
