"""The HTTP API at its edges: inputs no client should send get one-line 4xx answers on both
engines, ``as_of`` is read as the CLI reads it, and a blocked statement answers 503 after the
server's timeout while the rest of the server keeps answering."""

from __future__ import annotations

import sqlite3
import threading
import time

import httpx
import pytest
from sqlalchemy import create_engine, text

from bench.serve_seed import CODE, candidate, commodity
from calib.api.app import create_app
from calib.api.timeouts import DEFAULT_TIMEOUT, TIMEOUT_ENV, timeout_from_env
from calib.errors import SettingError
from calib.settings import Settings
from calib.store.engine import Store
from calib.workflows.approve import approve
from tests.serving.test_api import HANG_SECONDS, TOKEN, serving

LATEST = f"/v1/commodities/{CODE}/latest"
AUTH = {"Authorization": f"Bearer {TOKEN}"}
SHORT = 0.5
"""Seconds of statement timeout in these tests: long beside a served read (well under a
millisecond), short enough to keep the tests quick."""


def _one_line(answer: httpx.Response, status: int) -> str:
    assert answer.status_code == status, (answer.status_code, answer.text)
    detail = answer.json()["detail"]
    assert isinstance(detail, str) and detail and "\n" not in detail, detail
    return detail


EDGE_PATHS = [
    ("/v1/runs/99999999999999999999", "run_id"),  # beyond 64 bits
    ("/v1/runs/9223372036854775808", "run_id"),  # 2**63: past 64 bits too
    ("/v1/runs/2147483648", "run_id"),  # 2**31: past the INTEGER id columns
    ("/v1/runs/0", "run_id"),
    (f"{LATEST}?as_of=9999-12-31T23:00:00-05:00", "as_of"),  # past year 9999 in UTC
    (f"{LATEST}?as_of=0001-01-01T00:00:00%2B05:00", "as_of"),  # before year 1 in UTC
    ("/v1/runs/1?as_of=9999-12-31T23:00:00-05:00", "as_of"),
    (f"{LATEST}?as_of=20330601", "as_of"),  # a bare number is not a Unix time
    (f"{LATEST}?as_of=1780000000", "as_of"),
    ("/v1/commodities/A%00B/latest", "commodity"),  # NUL: PostgreSQL cannot compare it
    ("/v1/commodities/A%00B/history", "commodity"),
    ("/v1/commodities/" + "Q" * 33 + "/latest", "commodity"),
    ("/runs/99999999999999999999", "run_id"),  # the review pages
    ("/runs/2147483648/figures/fit.png", "run_id"),
    ("/commodities/A%00B", "code"),
    ("/commodities/A%00B/compare.png", "code"),
]
"""Requests that once answered 500 (or, for the bare numbers, a set of 1970), and the field
each names."""

BAD_BODIES = [
    b'{"by": "\\ud800", "note": "x"}',  # a lone surrogate (not a character)
    b'{"by": "risk", "note": "\\udfff"}',
    b'{"\\ud800": 1, "by": 2, "note": "x"}',
    b'{"by": "risk", "note": "\\ud800',  # not JSON at all
    b'{"by": "ri\\u0000sk", "note": "x"}',  # NUL: PostgreSQL cannot store it
    b'{"by": "risk", "note": "a\\u0000"}',
]


def test_edge_inputs_are_a_one_line_422_naming_the_field(store: Store, db_url: str) -> None:
    cid, eid = commodity(store)
    run_id = candidate(store, cid, eid, 1)
    with serving(create_app(Settings(db_url=db_url), token=TOKEN)) as http:
        for path, field in EDGE_PATHS:
            detail = _one_line(http.get(path), 422)
            assert detail.startswith(f"{field}: "), (path, detail)
            assert "20330601" not in detail and "9999" not in detail  # no echo of the value
        headers = {**AUTH, "Content-Type": "application/json"}
        for body in BAD_BODIES:
            for action in ("approve", "reject"):
                answer = http.post(f"/v1/runs/{run_id}/{action}", content=body, headers=headers)
                assert "\\" not in _one_line(answer, 422), body
        assert http.get(f"/v1/runs/{run_id}").json()["status"] == "candidate"


def test_as_of_is_read_by_the_cli_parser(store: Store, db_url: str) -> None:
    cid, eid = commodity(store)
    approve(store.sessions, candidate(store, cid, eid, 1), by="risk", note="first")
    with serving(create_app(Settings(db_url=db_url))) as http:
        before = _one_line(http.get(LATEST, params={"as_of": "2020-01-01"}), 404)
        assert before == f"{CODE}: no approved parameter set at 2020-01-01T00:00:00+00:00"
        later = http.get(LATEST, params={"as_of": "9999-12-31 23:59:59.999999"})
        assert later.status_code == 200 and later.json()["commodity"] == CODE
        detail = _one_line(http.get(LATEST, params={"as_of": "20330601"}), 422)
    assert "not an ISO date or time" in detail  # calib.as_of's reason, as the CLI gives it


@pytest.mark.parametrize("_migrated_db_url", ["sqlite"], indirect=True)
def test_an_approval_waiting_on_sqlite_write_lock_is_a_503(store: Store, db_url: str) -> None:
    cid, eid = commodity(store)
    run_id = candidate(store, cid, eid, 1)
    path = db_url.removeprefix("sqlite:///")
    holder = sqlite3.connect(path, isolation_level=None)
    app = create_app(Settings(db_url=db_url), token=TOKEN, timeout=SHORT)
    with serving(app) as http:
        holder.execute("BEGIN IMMEDIATE")  # another process writing
        try:
            answer = http.post(
                f"/v1/runs/{run_id}/approve", json={"by": "risk", "note": "x"}, headers=AUTH
            )
            detail = _one_line(answer, 503)
            assert "locked" in detail and answer.headers["retry-after"] == "1"
            assert http.get(LATEST).status_code == 404  # readers still answer
        finally:
            holder.execute("ROLLBACK")
            holder.close()
        done = http.post(
            f"/v1/runs/{run_id}/approve", json={"by": "risk", "note": "x"}, headers=AUTH
        )
        assert done.status_code == 200


@pytest.mark.postgres
@pytest.mark.parametrize("_migrated_db_url", ["postgresql"], indirect=True)
def test_a_blocked_read_is_a_503_and_the_server_keeps_answering(store: Store, db_url: str) -> None:
    cid, eid = commodity(store)
    approve(store.sessions, candidate(store, cid, eid, 1), by="risk", note="first")
    app = create_app(Settings(db_url=db_url), timeout=SHORT)
    locker = create_engine(db_url)
    with serving(app) as http, locker.connect() as lock:
        assert http.get(LATEST).status_code == 200  # the client's connection is open
        lock.execute(text("LOCK TABLE run_events IN ACCESS EXCLUSIVE MODE"))
        answers: list[httpx.Response] = []
        reader = threading.Thread(target=lambda: answers.append(http.get(LATEST)))
        reader.start()
        try:
            _wait_for_a_blocked_statement(lock)
            schema = http.get("/openapi.json", timeout=SHORT * 20)
            assert schema.status_code == 200  # answered while the read is blocked
            reader.join(timeout=SHORT * 20)
            assert not reader.is_alive(), "the blocked read did not give up"
            detail = _one_line(answers[0], 503)
            assert "statement timeout" in detail
            assert lock.execute(
                text(
                    "SELECT count(*) FROM pg_locks WHERE granted AND mode = "
                    "'AccessExclusiveLock' AND pid = pg_backend_pid()"
                )
            ).scalar()
        finally:
            lock.rollback()
            reader.join(timeout=30)
        assert http.get(LATEST).status_code == 200  # the lock gone, reads answer again
    locker.dispose()


def _wait_for_a_blocked_statement(lock: object) -> None:
    """Until another session waits on a lock (the reader's statement is in the database)."""
    query = text(
        "SELECT count(*) FROM pg_stat_activity WHERE wait_event_type = 'Lock' "
        "AND pid <> pg_backend_pid() AND query LIKE '%run_events%'"
    )
    deadline = time.monotonic() + HANG_SECONDS  # only a hang reaches it, not a slow machine
    while time.monotonic() < deadline:
        if lock.execute(query).scalar():  # type: ignore[attr-defined]
            return
        time.sleep(0.01)
    raise AssertionError("the read never reached the lock")


def test_the_server_timeout_comes_from_the_environment_and_is_checked(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    monkeypatch.delenv(TIMEOUT_ENV, raising=False)
    assert timeout_from_env() == DEFAULT_TIMEOUT
    monkeypatch.setenv(TIMEOUT_ENV, " 2.5 ")
    assert timeout_from_env() == 2.5
    for bad in ("0", "-1", "nan", "inf", "soon"):
        monkeypatch.setenv(TIMEOUT_ENV, bad)
        with pytest.raises(SettingError, match=r"\$CALIB_API_TIMEOUT = .* seconds above zero"):
            timeout_from_env()
    with pytest.raises(SettingError, match="timeout"):
        create_app(Settings(db_url="sqlite:///unused.sqlite"), timeout=0.0)
