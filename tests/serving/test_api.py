"""The HTTP API over real HTTP (uvicorn on a free loopback port, httpx): JSON, ETag and 304,
as-of, 404s, the OpenAPI schema, approval only with a token; and ``calib serve`` itself."""

from __future__ import annotations

import os
import socket
import subprocess
import sys
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import httpx
import pytest
import uvicorn
from fastapi import FastAPI

from bench.serve_seed import CODE, candidate, commodity
from calib.api.app import create_app
from calib.cli import main
from calib.model.twofactor import PARAM_NAMES
from calib.settings import Settings
from calib.store.base import utc_now
from calib.store.engine import Store
from calib.workflows.approve import approve

REPO = Path(__file__).resolve().parents[2]
TOKEN = "s3cret-token-for-tests-only"
LATEST = f"/v1/commodities/{CODE}/latest"
HANG_SECONDS = 120.0
"""Bound on a wait for the server (start-up, one answer): only a hung server reaches it, a
loaded machine does not (these tests assert no speed)."""


@contextmanager
def serving(app: FastAPI) -> Iterator[httpx.Client]:
    """``app`` under uvicorn in a thread on a free loopback port, and a client for it."""
    sock = socket.socket()
    sock.bind(("127.0.0.1", 0))
    port = sock.getsockname()[1]
    server = uvicorn.Server(uvicorn.Config(app, log_level="warning", access_log=False))
    thread = threading.Thread(target=server.run, kwargs={"sockets": [sock]}, daemon=True)
    thread.start()
    deadline = time.monotonic() + HANG_SECONDS
    while not server.started and thread.is_alive() and time.monotonic() < deadline:
        time.sleep(0.01)
    assert server.started, "server did not start"
    try:
        with httpx.Client(base_url=f"http://127.0.0.1:{port}", timeout=HANG_SECONDS) as http:
            yield http
    finally:
        server.should_exit = True
        thread.join(timeout=10)
        sock.close()


def test_latest_etag_304_as_of_history_and_runs(store: Store, db_url: str) -> None:
    cid, eid = commodity(store)
    first = candidate(store, cid, eid, 1)
    approve(store.sessions, first, by="risk", note="first")
    between = utc_now()
    with serving(create_app(Settings(db_url=db_url))) as http:
        got = http.get(LATEST)
        assert got.status_code == 200 and got.headers["content-type"] == "application/json"
        body = got.json()
        assert body["run_id"] == first and body["commodity"] == CODE
        assert body["trade_date"] == "2031-01-07" and body["approved_by"] == "risk"
        assert {n: body[n] for n in PARAM_NAMES}["sigma_spot"] == 0.31
        etag = got.headers["etag"]
        assert etag.startswith('"') and got.headers["cache-control"] == "no-cache"

        again = http.get(LATEST, headers={"If-None-Match": etag})
        assert again.status_code == 304 and again.content == b"" and again.headers["etag"] == etag
        weak = http.get(LATEST, headers={"If-None-Match": f'"other", W/{etag}'})
        assert weak.status_code == 304  # If-None-Match compares weakly (RFC 9110 13.1.2)

        second = candidate(store, cid, eid, 2)
        approve(store.sessions, second, by="risk", note="second")
        changed = http.get(LATEST, headers={"If-None-Match": etag})
        assert changed.status_code == 200 and changed.json()["run_id"] == second
        assert changed.headers["etag"] != etag

        past = http.get(LATEST, params={"as_of": between.isoformat()})
        assert past.status_code == 200 and past.json()["run_id"] == first
        assert past.headers["etag"] == etag  # the same set, the same tag

        history = http.get(f"/v1/commodities/{CODE}/history").json()
        assert [h["run_id"] for h in history] == [first, second]
        assert history[0]["superseded_at"] == history[1]["approved_at"]

        run = http.get(f"/v1/runs/{first}")
        assert run.status_code == 200 and run.json()["status"] == "superseded"
        assert (
            http.get(
                f"/v1/runs/{first}", headers={"If-None-Match": run.headers["etag"]}
            ).status_code
            == 304
        )
        assert (
            http.get(f"/v1/runs/{first}", params={"as_of": between.isoformat()}).json()["status"]
            == "approved"
        )


def test_not_found_openapi_and_no_approval_without_a_token(store: Store, db_url: str) -> None:
    commodity(store)
    with serving(create_app(Settings(db_url=db_url))) as http:
        unknown = http.get("/v1/commodities/XYZ/latest")
        assert unknown.status_code == 404 and unknown.json() == {
            "detail": "unknown commodity 'XYZ'"
        }
        none = http.get(LATEST)
        assert none.status_code == 404 and none.json()["detail"] == (
            "QLM: no approved parameter set now"
        )
        assert http.get("/v1/runs/999").json() == {"detail": "no calibration run 999"}
        assert http.get(LATEST, params={"as_of": "yesterday"}).status_code == 422
        schema = http.get("/openapi.json").json()
        assert set(schema["paths"]) == {
            "/v1/commodities/{commodity}/latest",
            "/v1/commodities/{commodity}/history",
            "/v1/runs/{run_id}",
        }
        latest = schema["paths"]["/v1/commodities/{commodity}/latest"]["get"]
        assert {"200", "304", "404"} <= set(latest["responses"])
        fields = schema["components"]["schemas"]["ApprovedSetBody"]["properties"]
        assert set(PARAM_NAMES) <= set(fields)
        refused = http.post("/v1/runs/1/approve", json={"by": "x", "note": "y"})
        assert refused.status_code == 404  # the route does not exist


def test_approval_needs_the_configured_token(store: Store, db_url: str) -> None:
    cid, eid = commodity(store)
    first, second = candidate(store, cid, eid, 1), candidate(store, cid, eid, 2)
    approve(store.sessions, first, by="risk", note="")
    decision = {"by": "risk officer", "note": "checked the fit"}
    with serving(create_app(Settings(db_url=db_url), token=TOKEN)) as http:
        assert "/v1/runs/{run_id}/approve" in http.get("/openapi.json").json()["paths"]
        url = f"/v1/runs/{second}/approve"
        for headers in ({}, {"Authorization": "Bearer wrong"}, {"Authorization": f"Basic {TOKEN}"}):
            refused = http.post(url, json=decision, headers=headers)
            assert refused.status_code == 401, headers
            assert refused.headers["www-authenticate"] == "Bearer"
        assert http.get(LATEST).json()["run_id"] == first

        auth = {"Authorization": f"Bearer {TOKEN}"}
        assert http.post(url, json={"by": "", "note": "x"}, headers=auth).status_code == 422
        done = http.post(url, json=decision, headers=auth)
        assert done.status_code == 200
        body = done.json()
        assert body["status"] == "approved" and body["superseded_run_id"] == first
        assert body["approved_by"] == "risk officer" and body["approval_note"] == "checked the fit"
        assert http.get(LATEST).json()["run_id"] == second
        twice = http.post(url, json=decision, headers=auth)
        assert twice.status_code == 409 and "cannot become approved" in twice.json()["detail"]
        assert http.post("/v1/runs/999/approve", json=decision, headers=auth).status_code == 404


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def test_calib_serve_refuses_a_short_token(
    db_url: str, tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    short = tmp_path / "short.token"
    short.write_text("abc\n")
    monkeypatch.setattr(sys, "argv", ["calib", "serve", "--db", db_url, "--token-file", str(short)])
    with pytest.raises(SystemExit) as exit_info:
        main()
    assert exit_info.value.code == 2
    assert capsys.readouterr().err.strip() == (
        f"error: approval token {short}: must be at least 16 characters"
    )


@pytest.mark.slow
def test_calib_serve_command(store: Store, db_url: str, tmp_path: Path) -> None:
    if not db_url.startswith("sqlite"):
        pytest.skip("the command's wiring does not depend on the engine")
    cid, eid = commodity(store)
    first, second = candidate(store, cid, eid, 1), candidate(store, cid, eid, 2)
    approve(store.sessions, first, by="risk", note="")
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    env.pop("CALIB_API_TOKEN", None)
    calib = [sys.executable, "-m", "calib", "serve", "--db", db_url]

    token_file = tmp_path / "api.token"
    token_file.write_text(TOKEN + "\n")
    port = _free_port()
    server = subprocess.Popen(
        [*calib, "--port", str(port), "--token-file", str(token_file)],
        env=env,
        stderr=subprocess.PIPE,
        text=True,
    )
    try:
        base = f"http://127.0.0.1:{port}"
        deadline = time.monotonic() + HANG_SECONDS
        while True:
            assert server.poll() is None, server.stderr.read() if server.stderr else ""
            try:
                got = httpx.get(base + LATEST, timeout=2)
                break
            except httpx.TransportError:
                assert time.monotonic() < deadline, "calib serve did not start"
                time.sleep(0.1)
        assert got.json()["run_id"] == first
        done = httpx.post(
            f"{base}/v1/runs/{second}/approve",
            json={"by": "risk", "note": "over HTTP"},
            headers={"Authorization": f"Bearer {TOKEN}"},
        )
        assert done.status_code == 200 and httpx.get(base + LATEST).json()["run_id"] == second
    finally:
        server.terminate()
        server.wait(timeout=15)
    assert server.stderr is not None
    banner = server.stderr.read()
    assert f"calib API on http://127.0.0.1:{port}" in banner and "approval on" in banner
