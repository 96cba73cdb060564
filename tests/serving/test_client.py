"""The pricers' client: latest approved set (now and as of a time), runs, history, caching,
threads and fork. Every test runs on SQLite and PostgreSQL."""

from __future__ import annotations

import dataclasses
import multiprocessing as mp
import threading
from datetime import UTC, datetime, timedelta

import pytest

from bench.serve_seed import CODE, candidate, commodity
from calib.client import ApprovedSet, Client
from calib.errors import NoApprovedSetError, UnknownCommodityError, UnknownRunError
from calib.store.base import utc_now
from calib.store.engine import Store, begin_write
from calib.store.runs import append_event, get_run
from calib.workflows.approve import approve


def _stored_params(store: Store, run_id: int) -> object:
    with store.sessions() as s:
        run = get_run(session=s, run_id=run_id)
        assert run is not None
        return run.params


def test_latest_as_of_run_and_history(store: Store, db_url: str) -> None:
    cid, eid = commodity(store)
    first = candidate(store, cid, eid, 1)
    before = utc_now()
    approve(store.sessions, first, by="risk", note="first")
    between = utc_now()
    second = candidate(store, cid, eid, 2)
    approve(store.sessions, second, by="head of risk", note="second")
    candidate(store, cid, eid, 3)  # a candidate is never served
    with Client(db_url) as client:
        now = client.latest(CODE)
        assert isinstance(now, ApprovedSet)
        shown = (now.run_id, now.approved_by, now.approval_note)
        assert shown == (second, "head of risk", "second")
        assert now.params == _stored_params(store, second)
        assert now.trade_date.isoformat() == "2031-01-08" and now.mode == "constant"
        assert now.approved_at.tzinfo is not None and between <= now.approved_at <= utc_now()
        assert [b.params for b in now.buckets] == [now.params]
        past = client.latest(CODE, as_of=between)
        assert past.run_id == first and past.params == _stored_params(store, first)
        naive = between.astimezone(UTC).replace(tzinfo=None)  # naive is read as UTC
        assert client.latest(CODE, as_of=naive).run_id == first
        with pytest.raises(NoApprovedSetError, match="QLM: no approved parameter set at"):
            client.latest(CODE, as_of=before)
        with pytest.raises(UnknownCommodityError, match="'XYZ'"):
            client.latest("XYZ")
        assert client.run(first).status == "superseded"
        assert client.run(first, as_of=between).status == "approved"
        with pytest.raises(UnknownRunError):
            client.run(10_000)
        history = client.history(CODE)
        assert [a.run_id for a in history] == [first, second]
        assert history[0].superseded_at == history[1].approved_at
        assert history[1].superseded_at is None
        with pytest.raises(dataclasses.FrozenInstanceError):
            now.run_id = 0  # type: ignore[misc]


def test_a_superseded_approval_is_never_served(store: Store, db_url: str) -> None:
    cid, eid = commodity(store)
    run = candidate(store, cid, eid, 1)
    with Client(db_url) as client:
        with pytest.raises(NoApprovedSetError, match="now"):
            client.latest(CODE)
        approve(store.sessions, run, by="risk", note="ok")
        assert client.latest(CODE).run_id == run
        # withdrawn without a successor (not what the workflow does, but the store allows it)
        with store.sessions.begin() as s:
            begin_write(s)
            append_event(session=s, run_id=run, to_status="superseded", by="risk", note="no")
        with pytest.raises(NoApprovedSetError):
            client.latest(CODE)


def test_the_set_is_reused_until_another_is_approved(store: Store, db_url: str) -> None:
    cid, eid = commodity(store)
    approve(store.sessions, candidate(store, cid, eid, 1), by="risk", note="")
    with Client(db_url) as client, Client(db_url, cache_size=0) as fresh:
        a, b = client.latest(CODE), client.latest(CODE)
        assert a is b
        assert fresh.latest(CODE) == a and fresh.latest(CODE) is not a
        newer = candidate(store, cid, eid, 2, mode="forward")
        approve(store.sessions, newer, by="risk", note="")
        c = client.latest(CODE)
        assert c.run_id == newer and c is not a and len(c.buckets) == 2
        assert c.buckets[1].start == 0.5 and c.buckets[1].params.sigma_spot == 0.3
        assert client.latest(CODE, as_of=c.approved_at - timedelta(microseconds=1)) is a


def test_one_client_shared_by_threads(store: Store, db_url: str) -> None:
    cid, eid = commodity(store)
    run = candidate(store, cid, eid, 1)
    approve(store.sessions, run, by="risk", note="")
    seen: list[int] = []
    errors: list[BaseException] = []
    with Client(db_url) as client:

        def read() -> None:
            try:
                seen.extend(client.latest(CODE).run_id for _ in range(200))
            except BaseException as exc:  # collected, the assertion below reports it
                errors.append(exc)

        threads = [threading.Thread(target=read) for _ in range(4)]
        for t in threads:
            t.start()
        for t in threads:
            t.join(timeout=30)
    assert not errors and seen == [run] * 800


def _read_in_child(client: Client, out: mp.Queue[object]) -> None:
    out.put(client.latest(CODE).run_id)


def test_a_forked_child_opens_its_own_connection(store: Store, db_url: str) -> None:
    cid, eid = commodity(store)
    run = candidate(store, cid, eid, 1)
    approve(store.sessions, run, by="risk", note="")
    ctx = mp.get_context("fork")
    out: mp.Queue[object] = ctx.Queue()
    with Client(db_url) as client:
        assert client.latest(CODE, as_of=datetime.now(UTC)).run_id == run
        held = client._conn
        child = ctx.Process(target=_read_in_child, args=(client, out))
        child.start()
        child.join(timeout=30)
        assert child.exitcode == 0 and out.get(timeout=5) == run
        assert client.latest(CODE).run_id == run
        assert client._conn is held  # the parent's connection was not replaced after a failure
