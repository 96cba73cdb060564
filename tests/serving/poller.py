"""A reader process of the reliability test: polls the latest approved set and checks it.

Kept apart from the test module so that a ``spawn``ed reader imports only the client and the
store (not the calibration stack the writer needs).
"""

from __future__ import annotations

import os
import time
from typing import Any

from sqlalchemy import func, select

from calib.client import ApprovedSet, Client
from calib.store.base import utc_now
from calib.store.engine import Store, store_for
from calib.store.run_models import RunResidual
from calib.store.runs import approved_history, get_run

POLL_PAUSE = 0.005
"""Seconds a reader sleeps between reads (a poller, not a busy loop starving the writer)."""
START_TIMEOUT = 180.0
"""Seconds the readers may take to start (eight interpreters importing on two cores)."""


def _check_new_set(store: Store, got: ApprovedSet) -> list[str]:
    """What is wrong with ``got``, checked against the store (empty: nothing)."""
    problems: list[str] = []
    with store.sessions() as session:
        count = session.scalar(
            select(func.count()).select_from(RunResidual).where(RunResidual.run_id == got.run_id)
        )
        if not count:
            problems.append(f"run {got.run_id} served without residuals")
        stored = get_run(session=session, run_id=got.run_id, as_of=got.approved_at)
        if stored is None or stored.status != "approved" or stored.params != got.params:
            status = None if stored is None else stored.status
            problems.append(f"run {got.run_id} served but stored as {status} at its approval")
        at = got.approved_at
        in_force = [
            a.run_id
            for a in approved_history(session=session, commodity=got.commodity)
            if a.approved_at <= at and (a.superseded_at is None or a.superseded_at > at)
        ]
        if in_force != [got.run_id]:
            problems.append(f"sets in force at {at.isoformat()}: {in_force}, served {got.run_id}")
    return problems


def poll(url: str, code: str, seconds: float, stop: Any, out: Any, seen: Any, me: int) -> None:
    """One reader: poll ``latest`` until ``stop`` is set (or ``seconds`` pass); report to
    ``out``, and publish the approval id of each set it reads in ``seen[me]`` (the writer
    waits for it before the next approval, so every reader sees every set)."""
    reads, sets, problems, errors = 0, 0, [], []
    try:
        with Client(url) as client, store_for(url) as store:
            out.put(("ready", os.getpid()))
            bound = time.monotonic() + seconds + START_TIMEOUT
            last: ApprovedSet | None = None
            while not stop.is_set() and time.monotonic() < bound:
                got = client.latest(code)
                read_at = utc_now()
                reads += 1
                if got.approved_at > read_at:
                    problems.append(f"run {got.run_id} approved after it was read")
                if last is None or got.approval_id != last.approval_id:
                    if last is not None and got.approved_at < last.approved_at:
                        problems.append(f"went back from run {last.run_id} to {got.run_id}")
                    sets += 1
                    problems += _check_new_set(store, got)
                    seen[me] = got.approval_id
                last = got
                time.sleep(POLL_PAUSE)
    except Exception as exc:  # every failure is reported; the test asserts there are none
        errors.append(f"{type(exc).__name__}: {exc}")
        out.put(("ready", os.getpid()))  # never leave the test waiting for this reader
    out.put(("done", reads, sets, problems, errors))
