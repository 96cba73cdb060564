"""The same file brought by two processes at once is stored once, on both engines.

Two worker processes, started once, meet at a barrier before each trial and ingest the same
file at the same moment; every trial is a file of new content. Exactly one of them loads it,
the other finds it loaded (a no-op), and every row is stored once.
"""

from __future__ import annotations

import multiprocessing as mp
from multiprocessing.queues import Queue
from multiprocessing.synchronize import Barrier
from pathlib import Path

from sqlalchemy import func, select

from calib.store.engine import Store
from calib.store.models import IngestBatch, RateQuote

TRIALS = 12
ROWS = 40


def _worker(url: str, paths: list[str], barrier: Barrier, results: Queue[tuple[str, str]]) -> None:
    from calib.store.engine import make_store
    from calib.workflows.ingest import ingest_file

    store = make_store(url)
    try:
        for path in paths:
            barrier.wait(timeout=120)
            report = ingest_file(store.sessions, Path(path), "rates", by="racer")
            results.put((path, report.status))
    finally:
        store.engine.dispose()


def _rates_file(folder: Path, trial: int) -> str:
    path = folder / f"rates{trial}.csv"
    lines = [f"2031-03-03,{2032 + k}-03-03,{0.01 + trial / 1000:.4f}" for k in range(ROWS)]
    path.write_text("trade_date,maturity,zero_rate\n" + "\n".join(lines) + "\n")
    return str(path)


def test_same_file_by_two_processes_at_once_is_stored_once(
    store: Store, db_url: str, tmp_path: Path
) -> None:
    paths = [_rates_file(tmp_path, trial) for trial in range(TRIALS)]
    context = mp.get_context("spawn")
    barrier = context.Barrier(2)
    results: Queue[tuple[str, str]] = context.Queue()
    workers = [
        context.Process(target=_worker, args=(db_url, paths, barrier, results)) for _ in range(2)
    ]
    for worker in workers:
        worker.start()
    outcomes: dict[str, list[str]] = {}
    for _ in range(2 * TRIALS):
        path, status = results.get(timeout=300)
        outcomes.setdefault(path, []).append(status)
    for worker in workers:
        worker.join(timeout=60)
        assert worker.exitcode == 0
    assert {p: sorted(s) for p, s in outcomes.items()} == {
        p: ["duplicate", "loaded"] for p in paths
    }
    with store.sessions() as s:
        assert s.scalar(select(func.count()).select_from(IngestBatch)) == TRIALS
        assert s.scalar(select(func.count()).select_from(RateQuote)) == TRIALS * ROWS
