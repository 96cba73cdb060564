"""Eight reader processes poll the latest approved set while a writer fits and approves.

The writer runs the morning run (:func:`calib.workflows.fit.fit_day`) on ``FITS`` days of a
small generated scenario and approves, rejects or auto-approves what it fitted; after each
approval it waits until every reader has read the new set, so the test is driven by counts,
not by a clock: every reader sees every set, however slow the machine. Each reader
(a ``spawn``ed process with its own :class:`calib.client.Client`) checks every answer: the set
never goes back in time and was approved before it was read; and each set it has not seen
before is checked against the store: the run has its residuals, its parameters are the stored
ones, and at its approval time it is the one and only set in force (its predecessor is
superseded by then). Any exception in a reader is an error. On SQLite (WAL) and PostgreSQL.
"""

from __future__ import annotations

import multiprocessing as mp
import os
import queue
import time
from pathlib import Path
from typing import Any

import pytest

from calib.policy.settings import RunSettings
from calib.store.engine import Store
from calib.workflows.approve import approve, reject
from calib.workflows.fit import fit_day
from tests.serving.poller import START_TIMEOUT, poll
from tests.workflows.small_day import load_with_estimate

READERS = 8
FITS = int(os.environ.get("CALIB_TEST_READER_FITS", "12"))
"""Mornings the writer fits (``CALIB_TEST_READER_FITS`` changes it for a local run)."""
SEEN_TIMEOUT = 120.0
"""Seconds the writer waits for every reader to read a new set: only a reader that stopped
reading takes that long."""
READER_SECONDS = 3600.0
"""A bound on a reader's life should the test die without telling it to stop."""

# rho held at history: with three expiries a day a free rho swings between days
HELD = RunSettings.from_dict({"calibration": {"mode": "held_rho"}})


def _write(
    store: Store, code: str, days: list[Any], seen: Any, readers: list[Any]
) -> dict[str, int]:
    """Fit ``FITS`` days: approve two in three, reject or auto-approve the rest; after each
    approval wait until every reader has read the new set (``seen``)."""
    counts = {"fits": 0, "approved": 0, "rejected": 0, "failed": 0}
    for k in range(FITS):
        day = days[k % len(days)]
        outcome = fit_day(
            store.sessions, code, day, by="writer", settings=HELD, auto_approve=k % 3 == 2
        )
        counts["fits"] += 1
        run = outcome.run
        approval_id = None
        if run.outcome == "failed":
            counts["failed"] += 1
        elif outcome.auto_approved:
            approval_id = run.approval_id
        elif k % 3 == 1 and k % 2 == 0:
            reject(store.sessions, run.run_id, by="writer", note="test")
            counts["rejected"] += 1
        else:
            approval_id = approve(
                store.sessions, run.run_id, by="writer", note="test"
            ).run.approval_id
        if approval_id is not None:
            counts["approved"] += 1
            _wait_until_seen(seen, approval_id, readers)
    return counts


def _wait_until_seen(seen: Any, approval_id: int, readers: list[Any]) -> None:
    deadline = time.monotonic() + SEEN_TIMEOUT
    while min(seen[:]) < approval_id:
        dead = [r.exitcode for r in readers if r.exitcode is not None]
        assert not dead, f"reader(s) ended with exit codes {dead}"
        assert time.monotonic() < deadline, f"readers {seen[:]} never read approval {approval_id}"
        time.sleep(0.01)


def _receive(
    out: Any, readers: list[Any], kind: str, timeout: float, count: int = READERS
) -> list[tuple[Any, ...]]:
    """``count`` messages of ``kind`` (or ``done``) from the readers; fails at once if a reader
    died without a word, and after ``timeout`` seconds otherwise."""
    got: list[tuple[Any, ...]] = []
    deadline = time.monotonic() + timeout
    while len(got) < count:
        try:
            message = out.get(timeout=0.5)
        except queue.Empty:
            dead = [r.exitcode for r in readers if r.exitcode not in (None, 0)]
            assert not dead, f"reader(s) died with exit codes {dead}"
            assert time.monotonic() < deadline, f"waited {timeout} s for {kind} from readers"
            continue
        if message[0] in (kind, "done"):
            got.append(message)
    return got


@pytest.mark.slow
def test_eight_readers_poll_while_a_writer_fits_and_approves(
    store: Store, db_url: str, tmp_path: Path
) -> None:
    data = load_with_estimate(store, tmp_path)
    days = data.days[-30:]
    first = fit_day(store.sessions, data.code, days[0], by="writer", settings=HELD)
    approve(store.sessions, first.run.run_id, by="writer", note="the first set")

    ctx = mp.get_context("spawn")
    stop = ctx.Event()
    out = ctx.Queue()
    seen = ctx.Array("q", READERS)
    args = (db_url, data.code, READER_SECONDS, stop, out, seen)
    readers = [ctx.Process(target=poll, args=(*args, me)) for me in range(READERS)]
    for r in readers:
        r.start()
    results: list[tuple[Any, ...]] = []
    try:
        ready = _receive(out, readers, "ready", START_TIMEOUT)
        results += [m for m in ready if m[0] == "done"]  # a reader that failed at start
        counts = _write(store, data.code, days[1:], seen, readers)
    finally:
        stop.set()
        results += _receive(out, readers, "done", 60.0, READERS - len(results))
        for r in readers:
            r.join(timeout=30)
            if r.is_alive():
                r.kill()
    errors = [e for m in results for e in m[4]]
    problems = [p for m in results for p in m[3]]
    assert not errors, errors
    assert not problems, problems
    reads = [m[1] for m in results]
    assert all(n > 0 for n in reads), reads
    # the test means something only if the readers saw the set change under them: every
    # reader read the first set and each approval's
    assert counts["approved"] >= 3, counts
    assert [m[2] for m in results] == [counts["approved"] + 1] * READERS, counts
    assert all(r.exitcode == 0 for r in readers)
