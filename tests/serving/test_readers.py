"""Eight reader processes poll the latest approved set while a writer fits and approves.

The writer runs the morning run (:func:`calib.workflows.runs.fit_day`) on the days of a small
generated scenario and approves, rejects or auto-approves what it fitted, for
``POLL_SECONDS`` (30 s; ``CALIB_TEST_POLL_SECONDS`` shortens it for a local run). Each reader
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

from calib.store.engine import Store
from calib.workflows import runs as flow
from calib.workflows.estimates import import_estimate
from tests.serving.poller import START_TIMEOUT, poll
from tests.workflows.small_day import load_scenario, write_estimate_file

READERS = 8
POLL_SECONDS = float(os.environ.get("CALIB_TEST_POLL_SECONDS", "30"))

# rho held at history: with three expiries a day a free rho swings between days
HELD = flow.RunSettings.from_dict({"calibration": {"mode": "held_rho"}})


def _write(store: Store, code: str, days: list[Any], seconds: float) -> dict[str, int]:
    """Fit day after day for ``seconds``: approve two in three, reject or auto-approve the rest."""
    counts = {"fits": 0, "approved": 0, "rejected": 0, "failed": 0}
    end = time.monotonic() + seconds
    k = 0
    while time.monotonic() < end:
        day = days[k % len(days)]
        outcome = flow.fit_day(
            store.sessions, code, day, user="writer", settings=HELD, auto_approve=k % 3 == 2
        )
        counts["fits"] += 1
        run = outcome.run
        if run.outcome == "failed":
            counts["failed"] += 1
        elif outcome.auto_approved:
            counts["approved"] += 1
        elif k % 3 == 1 and k % 2 == 0:
            flow.reject(store.sessions, run.run_id, by="writer", note="test")
            counts["rejected"] += 1
        else:
            flow.approve(store.sessions, run.run_id, by="writer", note="test")
            counts["approved"] += 1
        k += 1
    return counts


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
    data = load_scenario(store, tmp_path)
    import_estimate(
        store.sessions,
        data.code,
        write_estimate_file(tmp_path / "e.json", data.scenario),
        user="tester",
    )
    days = data.days[-30:]
    first = flow.fit_day(store.sessions, data.code, days[0], user="writer", settings=HELD)
    flow.approve(store.sessions, first.run.run_id, by="writer", note="the first set")

    ctx = mp.get_context("spawn")
    stop = ctx.Event()
    out = ctx.Queue()
    args = (db_url, data.code, POLL_SECONDS, stop, out)
    readers = [ctx.Process(target=poll, args=args) for _ in range(READERS)]
    for r in readers:
        r.start()
    results: list[tuple[Any, ...]] = []
    try:
        ready = _receive(out, readers, "ready", START_TIMEOUT)
        results += [m for m in ready if m[0] == "done"]  # a reader that failed at start
        counts = _write(store, data.code, days[1:], POLL_SECONDS)
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
    # the test means something only if the readers saw the set change under them
    assert counts["approved"] >= 3, counts
    assert max(m[2] for m in results) >= 3, (counts, [m[2] for m in results])
    assert all(r.exitcode == 0 for r in readers)
