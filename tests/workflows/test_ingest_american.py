"""American-style options in the store: the exercise column, the commodity's default style,
the bounds by style, and the stored style read back.

Bounds of an American option on a future (common practice): it can be exercised now for the
undiscounted intrinsic value and never pays more than F (call) or K (put), so
max(F-K,0) <= C <= F and max(K-F,0) <= P <= K, tolerance PREMIUM_BOUND_RTOL * max(F, K).
"""

from __future__ import annotations

from datetime import date
from pathlib import Path

import pytest

from calib.inputs.rules import PREMIUM_BOUND_RTOL
from calib.store.engine import Store
from calib.store.quotes import load_day
from calib.workflows.ingest import NewCommodity
from tests.workflows.ingest_day import (
    F1,
    OPTION_HEADER,
    TD,
    D,
    ingest,
    option,
    store_day,
    write_csv,
)

HEADER = [*OPTION_HEADER, "exercise"]


@pytest.fixture
def day(store: Store, tmp_path: Path) -> Store:
    return store_day(store, tmp_path)


def _stored_styles(store: Store) -> dict[float, bool]:
    with store.sessions.begin() as session:
        o = load_day(session=session, commodity="QRX", trade_date=date(2031, 3, 3)).options
    return {float(k): bool(a) for k, a in zip(o.strike, o.american, strict=True)}


def test_the_exercise_column_is_stored_and_read_back(day: Store, tmp_path: Path) -> None:
    rows = [
        [*option(40.0, 10.5), "American"],
        [*option(45.0, 6.0), "european"],
        [*option(50.0, 2.5), ""],  # empty: the commodity's default (European)
        [*option(55.0, 1.0), "bermudan"],
    ]
    report = ingest(day, write_csv(tmp_path / "o.csv", HEADER, rows), "options")
    assert report.rows_accepted == 3
    (problem,) = report.problems
    assert problem.field == "exercise" and "european or american" in problem.reason
    assert _stored_styles(day) == {40.0: True, 45.0: False, 50.0: False}


def test_a_commodity_registered_american_gives_its_options_that_style(
    store: Store, tmp_path: Path
) -> None:
    fut = write_csv(
        tmp_path / "f.csv",
        ["trade_date", "commodity", "delivery", "settle"],
        [[TD, "QRX", "2031-05-01", F1]],
    )
    ingest(store, fut, "futures", create=NewCommodity(exercise="american"))
    rows = [[*option(40.0, 10.5), ""], [*option(45.0, 6.0), "european"]]
    assert ingest(store, write_csv(tmp_path / "o.csv", HEADER, rows), "options").rows_accepted == 2
    assert _stored_styles(store) == {40.0: True, 45.0: False}
    plain = write_csv(tmp_path / "o2.csv", OPTION_HEADER, [option(50.0, 2.5)])
    assert ingest(store, plain, "options").rows_accepted == 1
    assert _stored_styles(store)[50.0] is True


TOL = PREMIUM_BOUND_RTOL


@pytest.mark.parametrize(
    ("strike", "kind", "premium", "style", "ok"),
    [
        # a call worth its discounted intrinsic value: fine European, below American intrinsic
        (40.0, "call", D * 10.0, "european", True),
        (40.0, "call", D * 10.0, "american", False),
        (40.0, "call", 10.0, "american", True),  # exactly the undiscounted intrinsic value
        (40.0, "call", 10.0 - 2 * TOL * 50, "american", False),
        (60.0, "put", 10.0 - 2 * TOL * 60, "american", False),
        # above the discounted bound D F but below F: American only
        (40.0, "call", 0.5 * (D * 50.0 + 50.0), "european", False),
        (40.0, "call", 0.5 * (D * 50.0 + 50.0), "american", True),
        (40.0, "call", 50.0 + 2 * TOL * 50, "american", False),
        (60.0, "put", 60.0 + 2 * TOL * 60, "american", False),
    ],
)
def test_bounds_follow_the_style(
    day: Store, tmp_path: Path, strike: float, kind: str, premium: float, style: str, ok: bool
) -> None:
    rows = [[*option(strike, premium, kind=kind), style]]
    report = ingest(day, write_csv(tmp_path / "o.csv", HEADER, rows), "options")
    assert report.rows_accepted == int(ok), report.problems
    if not ok:
        (problem,) = report.problems
        assert problem.field == "premium"
        if style == "american":
            assert "American" in problem.reason and "undiscounted" in problem.reason


def test_same_key_with_another_style_is_a_conflict(day: Store, tmp_path: Path) -> None:
    rows = [[*option(40.0, 10.5), "american"], [*option(40.0, 10.5), "european"]]
    report = ingest(day, write_csv(tmp_path / "o.csv", HEADER, rows), "options")
    assert report.rows_accepted == 0
    assert all("different values" in p.reason for p in report.problems)
