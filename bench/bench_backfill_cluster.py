"""Backfill of 2,500 mornings on a Dask cluster against local worker processes.

Own: :func:`calib.workflows.backfill.backfill` on a Dask cluster of two worker processes (one
thread each) through ``--cluster``'s code path (:func:`calib.compute.cluster.connect`): the
caller reads the days 16 at a time, ships them to the cluster as plain arrays, gets the fits
back and stores them in date order. The cluster is started here the way the README has a user
start one, as processes of its own: ``dask scheduler`` and ``dask worker --nworkers 2
--nthreads 1`` (a ``LocalCluster`` would run the scheduler and the workers' nannies inside
the calling process, where their event loop takes the GIL from the one writer: not what a
deployment looks like).

Peer, in the same run: the same backfill on two local worker processes
(:class:`calib.compute.executor.ProcessExecutor`), the code path without ``--cluster``.
Each fits every day on its own copy of the ingested store, and their stored parameters are
checked equal. The ratio is peer seconds / own seconds (target >= 0.8: the
engine's overhead stays small). Data: the invented demo scenario over ten years with 5
strikes per expiry (quick to generate and ingest), its true parameters as the estimate.
Startup of the local pool (spawning the workers, importing calib there) is inside its time;
the cluster is running before its backfill starts (as a deployed one is), and its workers
import calib on their first unit, inside its time.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from collections.abc import Iterator
from contextlib import ExitStack, closing, contextmanager
from pathlib import Path

from bench.bench_backfill import prepared_store
from calib.compute.cluster import connect
from calib.compute.executor import Executor, ProcessExecutor, die_with_parent
from calib.policy.settings import RunSettings
from calib.store.engine import Store, make_store
from calib.store.runs import require_run
from calib.workflows.backfill import BackfillReport, backfill
from calib.workflows.demo.scenario import ScenarioSpec

N_DATES = int(os.environ.get("BENCH_BACKFILL_DATES", "2500"))
"""Mornings fitted by each side (set ``BENCH_BACKFILL_DATES`` for a shorter run)."""
WORKERS = 2
TARGET_RATIO = 0.8
SPEC = ScenarioSpec(years=10, n_strikes=5)
START_SECONDS = 60.0
"""How long the scheduler and the workers may take to start (a loaded machine is slow)."""


def _start(command: list[str], log: Path) -> subprocess.Popen[bytes]:
    """``python -m dask COMMAND`` in its own process group, its output in ``log``; it ends
    with this process (parent-death signal), or by :func:`_stop`."""
    parent = os.getpid()
    with log.open("wb") as out:
        return subprocess.Popen(
            [sys.executable, "-m", "dask", *command],
            stdout=out,
            stderr=subprocess.STDOUT,
            start_new_session=True,
            preexec_fn=lambda: die_with_parent(parent),
        )


def _stop(process: subprocess.Popen[bytes]) -> None:
    """End ``process`` and its process group (a ``dask worker``'s nannies and workers)."""
    if process.poll() is None:
        os.killpg(process.pid, signal.SIGTERM)
        try:
            process.wait(timeout=30)
        except subprocess.TimeoutExpired:
            os.killpg(process.pid, signal.SIGKILL)
            process.wait()


@contextmanager
def dask_cluster(workers: int) -> Iterator[str]:
    """A scheduler and ``workers`` worker processes of one thread each, started with Dask's
    own commands on this machine; yields the scheduler's address once every worker is in."""
    from distributed import Client

    with tempfile.TemporaryDirectory() as tmp, ExitStack() as stack:
        folder = Path(tmp)
        found = folder / "scheduler.json"
        scheduler = _start(
            ["scheduler", "--host", "127.0.0.1", "--port", "0", "--no-dashboard",
             "--scheduler-file", str(found)],
            folder / "scheduler.log",
        )  # fmt: skip
        stack.callback(_stop, scheduler)
        deadline = time.monotonic() + START_SECONDS
        while not found.exists() or not found.read_text().strip():
            if scheduler.poll() is not None or time.monotonic() > deadline:
                raise RuntimeError(f"dask scheduler did not start: {folder / 'scheduler.log'}")
            time.sleep(0.1)
        address = str(json.loads(found.read_text())["address"])
        pool = _start(
            ["worker", address, "--nworkers", str(workers), "--nthreads", "1",
             "--no-dashboard", "--death-timeout", str(int(START_SECONDS))],
            folder / "workers.log",
        )  # fmt: skip
        stack.callback(_stop, pool)
        with Client(address, set_as_default=False) as client:
            client.wait_for_workers(workers, timeout=START_SECONDS)
        yield address


def main() -> None:
    settings = RunSettings.from_dict({})
    with prepared_store(SPEC, N_DATES) as prepared:
        store, code, dates = prepared.store, prepared.code, prepared.dates

        # each side on its own copy of the store: neither pays for the other's stored runs
        path = Path(store.engine.url.database or "")
        store.engine.dispose()  # the last connection closed: the WAL is checkpointed into path
        copy = make_store(f"sqlite:///{shutil.copy(path, path.with_name('own.sqlite'))}")

        def run(executor: Executor, on: Store) -> tuple[BackfillReport, float]:
            began = time.perf_counter()
            report = backfill(
                on, code, dates[0], dates[-1], by="bench", settings=settings, executor=executor
            )
            return report, time.perf_counter() - began

        local, local_s = run(ProcessExecutor(WORKERS), store)
        with dask_cluster(WORKERS) as address, closing(connect(address)) as on_cluster:
            remote, remote_s = run(on_cluster, copy)
        n = len(dates)
        print(
            f"peer {WORKERS} local processes: {local_s:.1f} s for {n} days "
            f"({1e3 * local_s / n:.1f} ms/day; {local.count('fitted')} fitted)"
        )
        print(
            f"own  dask scheduler + dask worker, {WORKERS} workers x 1 thread: {remote_s:.1f} s "
            f"({1e3 * remote_s / n:.1f} ms/day; {remote.count('fitted')} fitted); "
            f"reads {remote.read_seconds:.1f} s, writes {remote.write_seconds:.1f} s in the caller"
        )
        with store.sessions() as s, copy.sessions() as t:
            same = all(
                require_run(session=s, run_id=a.run_id).params  # type: ignore[arg-type]
                == require_run(session=t, run_id=b.run_id).params  # type: ignore[arg-type]
                for a, b in zip(local.days, remote.days, strict=True)
            )
        copy.engine.dispose()
        print(f"same parameters every day: {same}")
        print(f"ratio peer / own: {local_s / remote_s:.2f} (target >= {TARGET_RATIO})")


if __name__ == "__main__":
    main()
