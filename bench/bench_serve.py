"""Serving: the pricers' latest-approved read, in process and over HTTP.

In process (SQLite file, WAL, one commodity with a short approval history):

* calib's :class:`calib.client.Client` ``latest`` (the set reused while in force, and built
  afresh with ``cache_size=0``);
* peer, the ceiling: the sqlite3 module running the same compiled statement on a held
  connection, fetching the row and building nothing;
* peer, the usual way: an ORM session per read with :func:`calib.store.runs.latest_approved`.

Over HTTP on loopback: ``calib serve`` (uvicorn, 1 and 2 workers) answering
``/v1/commodities/QLM/latest``, full 200 answers and the 304 answer to ``If-None-Match``.
The load comes from a separate process: a small asyncio client holding keep-alive
connections, one request in flight on each. Peer: uvicorn serving a bare ASGI callable that
answers the same bytes (the web server's own ceiling on this machine).
"""

from __future__ import annotations

import asyncio
import multiprocessing as mp
import os
import socket
import sqlite3
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from bench.serve_seed import CODE, candidate, commodity
from calib.client import Client
from calib.store.engine import Store, make_store
from calib.store.migrate import upgrade
from calib.store.runs import in_force_stmt, latest_approved
from calib.workflows.approve import approve

N_READS = 20_000
N_ORM_READS = 2_000
HTTP_SECONDS = 4.0
CONNECTIONS = 16
ROOT = Path(__file__).resolve().parents[1]


def seed(store: Store, n_runs: int = 5) -> int:
    """A commodity with ``n_runs`` runs approved one after the other; the last one's id."""
    cid, eid = commodity(store, CODE)
    run_id = 0
    for k in range(n_runs):
        run_id = candidate(store, cid, eid, k)
        approve(store.sessions, run_id, by="bench", note="bench")
    return run_id


def _percentiles(read: Callable[[], object], n: int) -> tuple[float, float]:
    """p50 and p99 of ``read`` in microseconds over ``n`` calls (after a warm-up)."""
    for _ in range(min(n, 500)):
        read()
    clock = time.perf_counter_ns
    samples = []
    for _ in range(n):
        start = clock()
        read()
        samples.append(clock() - start)
    samples.sort()
    return samples[n // 2] / 1e3, samples[int(n * 0.99)] / 1e3


def _raw_reader(path: Path) -> Callable[[], object]:
    """The client's statement on a plain sqlite3 connection: one execute, one fetch."""
    from sqlalchemy.dialects import sqlite

    compiled = in_force_stmt().compile(dialect=sqlite.dialect())
    conn = sqlite3.connect(path, isolation_level=None)
    conn.execute("PRAGMA journal_mode=WAL")
    cid = conn.execute("SELECT id FROM commodities WHERE code = ?", (CODE,)).fetchone()[0]
    cursor = conn.cursor()
    sql = compiled.string
    order = list(compiled.positiontup or [])
    fixed = dict(compiled.params)

    def read() -> object:
        now = datetime.now(UTC).replace(tzinfo=None).strftime("%Y-%m-%d %H:%M:%S.%f")
        values = {**fixed, "cid": cid, "t": now}
        cursor.execute(sql, tuple(values[k] for k in order))
        return cursor.fetchone()

    return read


def bench_client(folder: Path) -> None:
    path = folder / "serve.sqlite"
    url = f"sqlite:///{path}"
    store = make_store(url)
    upgrade(store.engine)
    last = seed(store)
    with Client(url) as cached, Client(url, cache_size=0) as fresh:
        assert cached.latest(CODE).run_id == fresh.latest(CODE).run_id == last
        figures = {
            "calib Client.latest (set reused)": _percentiles(lambda: cached.latest(CODE), N_READS),
            "calib Client.latest (built afresh)": _percentiles(lambda: fresh.latest(CODE), N_READS),
            "peer: raw sqlite3, same statement": _percentiles(_raw_reader(path), N_READS),
        }

    def orm_read() -> object:
        with store.sessions() as session:
            return latest_approved(session=session, commodity=CODE)

    figures["peer: ORM session per read"] = _percentiles(orm_read, N_ORM_READS)
    store.engine.dispose()
    own = figures["calib Client.latest (set reused)"][0]
    print(f"latest-approved read, SQLite file (WAL), {N_READS} reads; p50 / p99 in us")
    for name, (p50, p99) in figures.items():
        print(f"  {name:<38} {p50:8.1f} {p99:9.1f}   p50 / calib {p50 / own:6.2f}")
    print("  target: calib p50 <= 50 us")


# --- HTTP ----------------------------------------------------------------------------------------


async def _one_connection(
    port: int, request: bytes, deadline: float, counts: list[int], statuses: dict[int, int]
) -> None:
    reader, writer = await asyncio.open_connection("127.0.0.1", port)
    try:
        while time.monotonic() < deadline:
            writer.write(request)
            head = await reader.readuntil(b"\r\n\r\n")
            status = int(head[9:12])
            length = 0
            for line in head.split(b"\r\n"):
                if line[:15].lower() == b"content-length:":
                    length = int(line[15:])
            if length:
                await reader.readexactly(length)
            statuses[status] = statuses.get(status, 0) + 1
            counts[0] += 1
    finally:
        writer.close()


def _load(port: int, request: bytes, seconds: float, connections: int, out: Any) -> None:
    """The load process: ``connections`` keep-alive connections for ``seconds``."""

    async def run() -> tuple[int, dict[int, int]]:
        counts = [0]
        statuses: dict[int, int] = {}
        deadline = time.monotonic() + seconds
        await asyncio.gather(
            *(
                _one_connection(port, request, deadline, counts, statuses)
                for _ in range(connections)
            )
        )
        return counts[0], statuses

    started = time.monotonic()
    done, statuses = asyncio.run(run())
    out.put((done / (time.monotonic() - started), statuses))


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _wait_up(port: int, process: subprocess.Popen[bytes], timeout: float = 30.0) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if process.poll() is not None:
            raise RuntimeError(f"server exited with {process.returncode}")
        try:
            with socket.create_connection(("127.0.0.1", port), timeout=0.2):
                return
        except OSError:
            time.sleep(0.1)
    raise RuntimeError("server did not start")


def _requests_per_second(port: int, path: str, headers: str = "") -> tuple[float, dict[int, int]]:
    request = f"GET {path} HTTP/1.1\r\nHost: 127.0.0.1\r\n{headers}\r\n".encode()
    ctx = mp.get_context("spawn")
    out = ctx.Queue()
    load = ctx.Process(target=_load, args=(port, request, HTTP_SECONDS, CONNECTIONS, out))
    load.start()
    rate, statuses = out.get(timeout=HTTP_SECONDS + 60)
    load.join(timeout=30)
    return float(rate), dict(statuses)


def _serve(argv: list[str], port: int, env: dict[str, str]) -> subprocess.Popen[bytes]:
    process = subprocess.Popen([sys.executable, *argv], cwd=ROOT, env=env)
    _wait_up(port, process)
    return process


def _stop(process: subprocess.Popen[bytes]) -> None:
    process.terminate()
    try:
        process.wait(timeout=15)
    except subprocess.TimeoutExpired:
        process.kill()
        process.wait()


def fixed_app_source(body: bytes) -> str:
    """A bare ASGI app answering ``body`` to every request, as a ``python -c`` program."""
    return (
        "import uvicorn, sys\n"
        f"BODY = {body!r}\n"
        "async def app(scope, receive, send):\n"
        "    if scope['type'] != 'http':\n"
        "        return\n"
        "    await send({'type': 'http.response.start', 'status': 200, 'headers': "
        "[(b'content-type', b'application/json'), (b'content-length', str(len(BODY)).encode())]})\n"
        "    await send({'type': 'http.response.body', 'body': BODY})\n"
        "uvicorn.run(app, host='127.0.0.1', port=int(sys.argv[1]), workers=1, "
        "access_log=False, log_level='warning')\n"
    )


def bench_http(folder: Path) -> None:
    import httpx

    url = f"sqlite:///{folder / 'serve.sqlite'}"
    env = {**os.environ, "PYTHONPATH": str(ROOT), "CALIB_DB": url}
    env.pop("CALIB_API_TOKEN", None)
    path = f"/v1/commodities/{CODE}/latest"
    print(
        f"HTTP GET {path} on loopback, {CONNECTIONS} keep-alive connections from one load process,"
        f" {HTTP_SECONDS:.0f} s each; requests/s"
    )
    results: dict[str, float] = {}
    body = b""
    for workers in (1, 2):
        port = _free_port()
        server = _serve(
            ["-m", "calib", "serve", "--port", str(port), "--workers", str(workers)], port, env
        )
        try:
            first = httpx.get(f"http://127.0.0.1:{port}{path}")
            first.raise_for_status()
            body, etag = first.content, first.headers["etag"]
            for label, headers, want in (
                ("200 answers", "", 200),
                ("304 (If-None-Match)", f"If-None-Match: {etag}\r\n", 304),
            ):
                rate, statuses = _requests_per_second(port, path, headers)
                assert set(statuses) == {want}, statuses
                results[f"calib serve --workers {workers}, {label}"] = rate
        finally:
            _stop(server)
    port = _free_port()
    server = _serve(["-c", fixed_app_source(body), str(port)], port, env)
    try:
        results["peer: bare ASGI app, same body, 1 worker"] = _requests_per_second(port, path)[0]
    finally:
        _stop(server)
    own = results["calib serve --workers 1, 200 answers"]
    for name, rate in results.items():
        print(f"  {name:<44} {rate:9.0f}   / calib 1 worker {rate / own:5.2f}")
    print("  target: >= 2,000 requests/s")


def main() -> None:
    with tempfile.TemporaryDirectory(prefix="calib-bench-serve-") as tmp:
        folder = Path(tmp)
        bench_client(folder)
        bench_http(folder)


if __name__ == "__main__":
    main()
