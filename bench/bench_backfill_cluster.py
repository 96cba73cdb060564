"""Backfill of 2,500 mornings on a Dask cluster against local worker processes.

Own: :func:`calib.workflows.backfill.backfill` on a ``LocalCluster`` of two worker processes
(one thread each) started here, through ``--cluster``'s code path
(:func:`calib.compute.cluster.connect`): the caller reads the days 16 at a time, ships them
to the cluster as plain arrays, gets the fits back and stores them in date order.

Peer, in the same run: the same backfill on two local worker processes
(:class:`calib.compute.executor.ProcessExecutor`), the code path without ``--cluster``.
Each fits every day on its own copy of the ingested store, and their stored parameters are
checked equal. The ratio is peer seconds / own seconds (target >= 0.8: the
engine's overhead stays small). Data: the invented demo scenario over ten years with 5
strikes per expiry (quick to generate and ingest), its true parameters as the estimate.
Startup of either pool (spawning the workers, importing calib there) is inside its time.
"""

from __future__ import annotations

import logging
import os
import shutil
import time
from contextlib import closing
from pathlib import Path

from bench.bench_backfill import prepared_store
from calib.compute.cluster import connect
from calib.compute.executor import Executor, ProcessExecutor
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


def main() -> None:
    from distributed import LocalCluster

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
        with (
            LocalCluster(
                n_workers=WORKERS,
                threads_per_worker=1,
                processes=True,
                dashboard_address=None,
                silence_logs=logging.ERROR,
            ) as cluster,
            closing(connect(cluster.scheduler_address)) as on_cluster,
        ):
            remote, remote_s = run(on_cluster, copy)
        n = len(dates)
        print(
            f"peer {WORKERS} local processes: {local_s:.1f} s for {n} days "
            f"({1e3 * local_s / n:.1f} ms/day; {local.count('fitted')} fitted)"
        )
        print(
            f"own  LocalCluster, {WORKERS} workers x 1 thread: {remote_s:.1f} s "
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
