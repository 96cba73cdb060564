"""The invented day the ingestion tests share: commodity QRX, trade date 2031-03-03, two
futures and a zero curve; helpers to write files and ingest them."""

from __future__ import annotations

import csv
import math
from pathlib import Path

from calib.model.black76 import price
from calib.store.engine import Store
from calib.workflows.ingest import NewCommodity, ingest_file

TD = "2031-03-03"
F1, F2 = 50.0, 52.0
EXPIRY = "2031-04-25"
R_SHORT = 0.04
# Discount factor to EXPIRY: 53 days, before the curve's first point (92 days), so the rate is
# the first point's, held flat (the curve convention of calib.store.quotes.ZeroCurve).
D = math.exp(-R_SHORT * 53 / 365)
OPTION_HEADER = ["trade_date", "commodity", "delivery", "expiry", "kind", "strike", "premium"]


def write_csv(path: Path, header: list[str], rows: list[list[object]]) -> Path:
    with path.open("w", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(header)
        writer.writerows(rows)
    return path


def ingest(store: Store, path: Path, kind: str, **kw: object):  # type: ignore[no-untyped-def]
    return ingest_file(store.sessions, path, kind, by="tester", **kw)  # type: ignore[arg-type]


def store_day(store: Store, tmp_path: Path) -> Store:
    """QRX registered, its futures and the zero curve of TD stored (the ``day`` fixture)."""
    fut = write_csv(
        tmp_path / "fut.csv",
        ["trade_date", "commodity", "delivery", "settle"],
        [[TD, "QRX", "2031-05-01", F1], [TD, "QRX", "2031-06-01", F2]],
    )
    assert ingest(store, fut, "futures", create=NewCommodity()).rows_accepted == 2
    rates = write_csv(
        tmp_path / "rates.csv",
        ["trade_date", "maturity", "zero_rate"],
        [[TD, "2031-06-03", R_SHORT], [TD, "2032-03-03", 0.05]],
    )
    assert ingest(store, rates, "rates").rows_accepted == 2
    return store


def option(strike: float, premium: object, kind: str = "call", **over: object) -> list[object]:
    row = {
        "trade_date": TD,
        "commodity": "QRX",
        "delivery": "2031-05-01",
        "expiry": EXPIRY,
        "kind": kind,
        "strike": strike,
        "premium": premium,
    }
    row.update(over)
    return [row[c] for c in OPTION_HEADER]


def fair(strike: float, kind: str = "call", forward: float = F1) -> float:
    return float(price(forward, strike, 53 / 365, R_SHORT, 0.3, kind))


def only_problem(store: Store, path: Path, kind: str = "options") -> tuple[str, str]:
    report = ingest(store, path, kind)
    assert report.rows_rejected == 1, report
    (problem,) = report.problems
    return problem.field, problem.reason
