"""One definition of the set in force: the CLI, the client and the HTTP API agree on unusual
event histories, at every moment, on both engines."""

from __future__ import annotations

import json
import threading
import time
from datetime import datetime, timedelta

import pytest

from bench.serve_seed import CODE, candidate, commodity
from calib.api.app import create_app
from calib.client import Client
from calib.errors import IllegalTransitionError, NoApprovedSetError
from calib.settings import Settings
from calib.store import quick
from calib.store.base import utc_now
from calib.store.engine import Store, begin_write
from calib.store.runs import append_event, read_in_force
from calib.workflows.approve import approve
from tests.cli.test_store_cmds import run as run_cli
from tests.hooks import inside_each_write
from tests.serving.test_api import LATEST, serving

SECOND = timedelta(seconds=1)
SLOW_WRITE_SECONDS = 1.0
"""How long the slowed approval holds its write open: a reader that does not wait for it
answers well within this on any machine (a shorter pause could only let the test pass
without the fix, never fail with it)."""


def _move(store: Store, run_id: int, to: str, at: datetime) -> None:
    with store.sessions.begin() as s:
        begin_write(s)
        append_event(session=s, run_id=run_id, to_status=to, by="risk", note=to, at=at)


def _approve(store: Store, run_id: int, at: datetime, replaces: int | None) -> None:
    """What the approval unit of work appends, at a chosen time."""
    _move(store, run_id, "approved", at)
    if replaces is not None:
        _move(store, replaces, "superseded", at)


def test_cli_client_and_api_agree_on_unusual_histories(
    store: Store, db_url: str, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    cid, eid = commodity(store)
    a, b, c, d = (candidate(store, cid, eid, k) for k in (5, 6, 7, 1))  # d: the oldest day
    # events at chosen times after the candidates' own (which are now)
    t1 = utc_now().replace(microsecond=0) + timedelta(days=1)
    t2, t3, t4, t5 = (t1 + k * timedelta(hours=1) for k in (1, 2, 3, 4))
    _approve(store, a, t1, None)
    _move(store, c, "rejected", t1 + SECOND)  # a rejection never changes the set in force
    _approve(store, b, t2, a)  # same instant: a approved-and-superseded pair
    _approve(store, d, t3, b)  # an older trade date approved later is in force
    with pytest.raises(IllegalTransitionError):  # a superseded run is never approved again
        _approve(store, a, t3 + SECOND, d)
    _move(store, d, "superseded", t4)  # superseded with no newer approval: nothing in force
    e = candidate(store, cid, eid, 8)
    _approve(store, e, t5, None)

    expected = {
        t1 - SECOND: None,
        t1: a,
        t1 + SECOND: a,
        t2 - SECOND: a,
        t2: b,
        t3 + SECOND: d,
        t4 - SECOND: d,
        t4: None,
        t5 - SECOND: None,
        t5: e,
        t5 + timedelta(days=1): e,
    }

    def by_cli(when: datetime) -> int | None:
        code, out, _ = run_cli(
            capsys,
            monkeypatch,
            "latest",
            CODE,
            "--as-of",
            when.isoformat(),
            "--json",
            "--db",
            db_url,
        )
        assert code in (0, 2), out
        return None if code == 2 else int(json.loads(out)["run_id"])

    def by_client(client: Client, when: datetime) -> int | None:
        try:
            return client.latest(CODE, as_of=when).run_id
        except NoApprovedSetError:
            return None

    with Client(db_url) as client, serving(create_app(Settings(db_url=db_url))) as http:
        for when, run_id in expected.items():
            answer = http.get(LATEST, params={"as_of": when.isoformat()})
            assert answer.status_code in (200, 404), answer.text
            api = answer.json()["run_id"] if answer.status_code == 200 else None
            seen = {"cli": by_cli(when), "client": by_client(client, when), "api": api}
            assert seen == dict.fromkeys(seen, run_id), when
            # the CLI's quick SQLite read builds the very record the store does
            stored = read_in_force(store.sessions, CODE, as_of=when)
            assert (None if stored is None else stored.run_id) == run_id, when
            if db_url.startswith("sqlite"):
                assert quick.read_in_force(db_url, CODE, when) == stored, when
        # one set of names for the approval: the CLI's JSON and the API's bodies agree
        late = (t5 + timedelta(days=1)).isoformat()
        args = ("latest", CODE, "--as-of", late, "--json", "--db", db_url)
        _, out, _ = run_cli(capsys, monkeypatch, *args)
        shown, served = json.loads(out), http.get(LATEST, params={"as_of": late}).json()
        for key in ("approval_id", "approval_note", "approved_by", "approved_at"):
            assert shown[key] == served[key], key
        _, out, _ = run_cli(
            capsys, monkeypatch, "latest", CODE, "--history", "--json", "--db", db_url
        )
        assert json.loads(out) == http.get(f"/v1/commodities/{CODE}/history").json()
        assert "note" not in served and "note" not in json.loads(out)[0]


def test_the_set_in_force_at_a_past_moment_never_changes(store: Store, db_url: str) -> None:
    """An approval stamped before its commit: a read for a moment after the stamp, made
    while the write is still open, must give what the same read gives after the commit."""
    cid, eid = commodity(store)
    first, second = candidate(store, cid, eid, 1), candidate(store, cid, eid, 2)
    approve(store.sessions, first, by="risk", note="first")
    stamped = threading.Event()

    def slowed_write() -> None:  # inside the approval's write, its events flushed
        stamped.set()
        time.sleep(SLOW_WRITE_SECONDS)

    with Client(db_url) as client, inside_each_write(store.sessions, slowed_write):
        writer = threading.Thread(
            target=approve, args=(store.sessions, second), kwargs={"by": "risk", "note": "2nd"}
        )
        writer.start()
        assert stamped.wait(timeout=60)
        moment = utc_now()  # after the approval's stamp, before its commit
        during_client = client.latest(CODE, as_of=moment).run_id
        during_store = read_in_force(store.sessions, CODE, as_of=moment)
        if db_url.startswith("sqlite"):  # the CLI's quick read waits on the same lock
            during_quick = quick.read_in_force(db_url, CODE, moment)
            assert during_quick is not None and during_quick.run_id == second
        writer.join(timeout=60)
        after = client.latest(CODE, as_of=moment).run_id
    assert during_store is not None
    assert during_client == during_store.run_id == after == second


def test_a_bad_as_of_over_http_is_one_line_naming_the_field(store: Store, db_url: str) -> None:
    commodity(store)
    with serving(create_app(Settings(db_url=db_url))) as http:
        for bad in ("yesterday", "2033-13-40T00:00:00Z"):
            answer = http.get(LATEST, params={"as_of": bad})
            assert answer.status_code == 422
            detail = answer.json()["detail"]
            assert isinstance(detail, str) and "\n" not in detail, detail
            assert detail.startswith("as_of: ") and "ISO time" in detail
            assert bad not in detail  # the value is not echoed
