"""Ingest throughput: one year of a daily option chain, validated and stored.

The chain (invented commodity ``QRX``): 24 monthly futures, 24 option expiries x 20 strikes x
call/put on each of ~240 trading days, about 230,000 option rows, Black-76 premiums. Figures:
calib's ``ingest_file`` (read CSV, validate every rule, store in one transaction) into a fresh
SQLite file, and the peer: the sqlite3 module's ``executemany`` of the same rows, already as
tuples, into a table of the same shape, with no reading and no validation (the ceiling). If
``CALIB_TEST_PG_URL`` is set, calib's figure on PostgreSQL too (in a throw-away schema).

Memory: the same year with 180 strikes a side (about 2.07 million option rows, a 120 MB CSV)
ingested in a fresh process, whose peak resident memory is printed with its rows/s (wall and
CPU time: the machine may be shared); the peer is ``pandas.read_csv`` of the same file in a
fresh process (reading only). ``CALIB_BENCH_LARGE=0`` skips this part.
"""

from __future__ import annotations

import csv
import os
import resource
import sqlite3
import subprocess
import sys
import tempfile
import time
import uuid
from datetime import date, timedelta
from pathlib import Path

import numpy as np

from calib.store.engine import Store, create_store_engine, make_store
from calib.store.migrate import upgrade
from calib.workflows.ingest import NewCommodity, ingest_file

COMMODITY = "QRX"
N_DAYS = 240
N_FUTURES = 24
N_STRIKES = 20
MATURITIES_MONTHS = (1, 3, 6, 12, 24)


def _weekdays(start: date, count: int) -> list[date]:
    days: list[date] = []
    day = start
    while len(days) < count:
        if day.weekday() < 5:
            days.append(day)
        day += timedelta(days=1)
    return days


def _month(d: date, ahead: int) -> date:
    m = d.month - 1 + ahead
    return date(d.year + m // 12, m % 12 + 1, 1)


def write_year(
    folder: Path, seed: int = 7, strikes: int = N_STRIKES
) -> tuple[Path, Path, Path, list[tuple[object, ...]]]:
    """Write futures, rates and options CSV files for one invented year; also the option rows."""
    from calib.model.black76 import price  # not in the memory run's fresh process

    rng = np.random.default_rng(seed)
    days = _weekdays(date(2031, 1, 6), N_DAYS)
    fut_rows: list[tuple[object, ...]] = []
    rate_rows: list[tuple[object, ...]] = []
    opt_rows: list[tuple[object, ...]] = []
    level = 60.0
    rate = 0.03
    for day in days:
        level *= float(np.exp(0.02 * rng.standard_normal()))
        deliveries = [_month(day, k) for k in range(2, N_FUTURES + 2)]
        settles = level * np.exp(0.01 * np.arange(N_FUTURES))
        fut_rows += [
            (day, COMMODITY, d, round(float(s), 4))
            for d, s in zip(deliveries, settles, strict=True)
        ]
        rate_rows += [(day, _month(day, m), rate) for m in MATURITIES_MONTHS]
        for d, f in zip(deliveries, settles, strict=True):
            f = round(float(f), 4)
            expiry = d - timedelta(days=5)
            t = (expiry - day).days / 365.0
            grid = np.round(f * np.linspace(0.6, 1.4, strikes), 2)
            for is_call in (True, False):
                prem = price(f, grid, t, rate, 0.35, "call" if is_call else "put")
                kind = "call" if is_call else "put"
                opt_rows += [
                    (day, COMMODITY, d, expiry, kind, float(k), round(float(p), 6))
                    for k, p in zip(grid, prem, strict=True)
                    if p > 1e-6
                ]
    paths = (folder / "futures.csv", folder / "rates.csv", folder / "options.csv")
    headers = (
        ("trade_date", "commodity", "delivery", "settle"),
        ("trade_date", "maturity", "zero_rate"),
        ("trade_date", "commodity", "delivery", "expiry", "kind", "strike", "premium"),
    )
    for path, header, rows in zip(paths, headers, (fut_rows, rate_rows, opt_rows), strict=True):
        with path.open("w", newline="") as handle:
            writer = csv.writer(handle)
            writer.writerow(header)
            writer.writerows(rows)
    return paths[0], paths[1], paths[2], opt_rows


def _calib(store: Store, futures: Path, rates: Path, options: Path) -> tuple[float, int]:
    upgrade(store.engine)
    new = NewCommodity()
    ingest_file(store.sessions, futures, "futures", by="bench", create=new)
    ingest_file(store.sessions, rates, "rates", by="bench")
    start = time.perf_counter()
    report = ingest_file(store.sessions, options, "options", by="bench")
    elapsed = time.perf_counter() - start
    assert report.rows_rejected == 0, report.problems[:3]
    return elapsed, report.rows_accepted


def _peer(path: Path, rows: list[tuple[object, ...]]) -> float:
    con = sqlite3.connect(path, isolation_level=None)
    con.execute("PRAGMA journal_mode=WAL")
    con.execute("PRAGMA synchronous=NORMAL")
    con.execute(
        "CREATE TABLE option_quotes (id INTEGER PRIMARY KEY, batch_id INTEGER, commodity_id "
        "INTEGER, trade_date DATE, delivery DATE, expiry DATE, is_call BOOLEAN, strike FLOAT, "
        "premium FLOAT, implied_vol FLOAT, bid FLOAT, ask FLOAT, line INTEGER, UNIQUE "
        "(commodity_id, trade_date, delivery, expiry, is_call, strike, batch_id))"
    )
    tuples = [
        (1, 1, str(r[0]), str(r[2]), str(r[3]), r[4] == "call", r[5], r[6], None, None, None, j)
        for j, r in enumerate(rows, start=2)
    ]
    start = time.perf_counter()
    con.execute("BEGIN")
    con.executemany(
        "INSERT INTO option_quotes (batch_id, commodity_id, trade_date, delivery, expiry, "
        "is_call, strike, premium, implied_vol, bid, ask, line) "
        "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
        tuples,
    )
    con.execute("COMMIT")
    elapsed = time.perf_counter() - start
    con.close()
    return elapsed


LARGE_STRIKES = 180
"""Strikes a side in the memory run: about 2.07 million option rows."""


def _peak_mb() -> float:
    """This process's peak resident memory (VmHWM: unlike ``ru_maxrss`` it starts afresh at
    exec, not at the parent's high-water mark)."""
    with open("/proc/self/status") as status:
        for line in status:
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024  # kB
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def _child(task: str, folder: Path) -> None:
    """Run in a fresh process: ingest the large options file (or read it with pandas)."""
    options = folder / "options.csv"
    if task == "peer":
        import pandas as pd

        start = time.perf_counter()
        count = len(pd.read_csv(options))
        print(f"{count} {time.perf_counter() - start} 0 {_peak_mb()}")
        return
    store = make_store(f"sqlite:///{folder / 'large.sqlite'}")
    try:
        before = resource.getrusage(resource.RUSAGE_SELF)
        start = time.perf_counter()
        report = ingest_file(store.sessions, options, "options", by="bench")
        wall = time.perf_counter() - start
        after = resource.getrusage(resource.RUSAGE_SELF)
    finally:
        store.engine.dispose()
    assert report.rows_rejected == 0, report.problems[:3]
    cpu = after.ru_utime + after.ru_stime - before.ru_utime - before.ru_stime
    print(f"{report.rows_accepted} {wall} {cpu} {_peak_mb()}")


def _run_child(task: str, folder: Path) -> tuple[int, float, float, float]:
    out = subprocess.run(
        [sys.executable, "-m", "bench.bench_ingest", task, str(folder)],
        check=True,
        capture_output=True,
        text=True,
    ).stdout.split()
    return int(out[0]), float(out[1]), float(out[2]), float(out[3])


def _memory() -> None:
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        futures, rates, options, rows = write_year(folder, strikes=LARGE_STRIKES)
        del rows
        size = options.stat().st_size / 2**20
        store = make_store(f"sqlite:///{folder / 'large.sqlite'}")
        try:
            upgrade(store.engine)
            ingest_file(store.sessions, futures, "futures", by="bench", create=NewCommodity())
            ingest_file(store.sessions, rates, "rates", by="bench")
        finally:
            store.engine.dispose()
        count, wall, cpu, peak = _run_child("child", folder)
        _, _, _, peer = _run_child("peer", folder)
        print(f"large file: {count:,} option rows, {size:.0f} MB CSV")
        print(
            f"calib ingest, SQLite, fresh process: peak RSS {peak:,.0f} MB; "
            f"{count / wall:,.0f} rows/s wall, {count / cpu:,.0f} rows/s CPU"
        )
        print(f"peer: pandas.read_csv of the file, fresh process: peak RSS {peer:,.0f} MB")
        print(f"ratio calib / peer (peak RSS): {peak / peer:.2f}")


def main() -> None:
    """Print calib's and the peer's option rows per second on SQLite, the ratio, and PostgreSQL."""
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        futures, rates, options, rows = write_year(folder)
        store = make_store(f"sqlite:///{folder / 'bench.sqlite'}")
        try:
            own, count = _calib(store, futures, rates, options)
        finally:
            store.engine.dispose()
        peer = _peer(folder / "peer.sqlite", rows)
        print(f"option rows: {count} over {N_DAYS} trading days")
        print(f"calib ingest (read CSV + validate + store), SQLite: {count / own:,.0f} rows/s")
        print(f"peer: sqlite3 executemany, no read, no validation: {count / peer:,.0f} rows/s")
        print(f"ratio calib / peer: {peer / own:.2f}")
        pg = os.environ.get("CALIB_TEST_PG_URL")
        if pg:
            schema = f"calib_bench_{uuid.uuid4().hex[:8]}"
            admin = create_store_engine(pg)
            with admin.begin() as conn:
                conn.exec_driver_sql(f"CREATE SCHEMA {schema}")
            sep = "&" if "?" in pg else "?"
            store = make_store(f"{pg}{sep}options=-csearch_path%3D{schema}")
            try:
                own_pg, count = _calib(store, futures, rates, options)
                print(f"calib ingest, PostgreSQL: {count / own_pg:,.0f} rows/s")
            finally:
                store.engine.dispose()
                with admin.begin() as conn:
                    conn.exec_driver_sql(f"DROP SCHEMA {schema} CASCADE")
                admin.dispose()
        else:
            print("PostgreSQL: skipped (CALIB_TEST_PG_URL not set)")
    if os.environ.get("CALIB_BENCH_LARGE", "1") != "0":
        _memory()


if __name__ == "__main__":  # a fresh process of the memory run
    _child(sys.argv[1], Path(sys.argv[2]))
