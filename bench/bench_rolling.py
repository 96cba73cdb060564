"""Rolling re-estimation: warm-started windows against cold-started ones, same windows, same run.

Data: ten years of business days of an invented commodity, five rolling contracts, states
simulated exactly (the curves of ``bench_kalman``). Windows of two years whose ends step by a
month from the end of year two (96 windows), estimated in worker processes
(:class:`calib.compute.executor.ProcessExecutor`, two workers):

* warm: as the workflow runs them (:func:`calib.estimate.rolling.estimate_windows`): the
  first window cold, then chunks of :data:`calib.workflows.rolling.CHUNK` consecutive windows,
  each warm-started from the previous optimum (a chunk's first from the first window's), one
  in :data:`calib.workflows.rolling.COLD_CHECK_EVERY` also from a cold start;
* cold (the peer): every window from the default starts.

Both include the workers' start-up. Target: warm <= 30 s on the two-core machine. The store's
reads and writes are not timed here (a few tenths of a second for 96 windows).
"""

from __future__ import annotations

import os
import resource
import time
from collections.abc import Iterator
from datetime import date

import numpy as np

from bench.bench_kalman import RATE, make_curves
from calib.compute.executor import ProcessExecutor
from calib.estimate import Curves
from calib.estimate.rolling import (
    ChunkTask,
    FitSettings,
    WindowFit,
    WindowTask,
    estimate_windows,
    fit_chunk,
    parse_period,
    window_ends,
    window_start,
)
from calib.workflows.rolling import CHUNK, COLD_CHECK_EVERY

N_DAYS = 2610  # ten years of business days
WORKERS = 2


def _day(d: np.datetime64) -> date:
    return date.fromisoformat(str(d))


def windows(curves: Curves) -> list[WindowTask]:
    """Two-year windows ending monthly from two years after the first day."""
    first, last = _day(curves.dates[0]), _day(curves.dates[-1])
    length, step = parse_period("--rolling", "2y"), parse_period("--step", "1m")
    ends = window_ends(length.after(first), last, step)
    days = np.asarray(curves.dates, dtype="datetime64[D]")
    out = []
    for i, end in enumerate(ends):
        a = np.datetime64(window_start(end, length), "D")
        keep = (days >= a) & (days <= np.datetime64(end, "D"))
        out.append(
            WindowTask(
                i,
                days[keep],
                curves.tau[keep],
                curves.log_price[keep],
                RATE,
                check_cold=i % COLD_CHECK_EVERY == COLD_CHECK_EVERY // 2,
            )
        )
    return out


def _cpu() -> float:
    me, kids = (resource.getrusage(w) for w in (resource.RUSAGE_SELF, resource.RUSAGE_CHILDREN))
    return me.ru_utime + me.ru_stime + kids.ru_utime + kids.ru_stime


def _timed(batches: Iterator[list[WindowFit]]) -> tuple[float, float, list[WindowFit]]:
    """Wall seconds, CPU seconds (this process and its finished workers), the fits."""
    started, cpu = time.perf_counter(), _cpu()
    fits = [f for batch in batches for f in batch]
    return time.perf_counter() - started, _cpu() - cpu, fits


def main() -> None:
    curves = make_curves(N_DAYS)
    wins = windows(curves)
    settings = FitSettings()
    pool = ProcessExecutor(WORKERS)
    cold_tasks = [
        ChunkTask((WindowTask(w.index, w.dates, w.tau, w.log_price, w.rate),), settings)
        for w in wins
    ]
    load = os.getloadavg()[0]
    warm_s, warm_cpu, warm = _timed(estimate_windows(wins, settings, pool, chunk=CHUNK))
    cold_s, cold_cpu, cold = _timed(pool.map(fit_chunk, cold_tasks))
    gap = np.array([w.loglik - c.loglik for w, c in zip(warm, cold, strict=True)])
    starts = [w.start for w in warm]
    print(
        f"{len(wins)} windows of 2y x 5 contracts (about {wins[0].dates.size} days each), "
        f"{WORKERS} worker processes"
    )
    print(f"  load average before: {load:.2f} on {os.cpu_count()} cores (figures scale with it)")
    print(
        f"  warm starts  {warm_s:7.2f} s wall, {warm_cpu:6.1f} s CPU   "
        f"({starts.count('warm')} warm, "
        f"{starts.count('cold')} cold, {starts.count('cold-retry')} redone cold; "
        f"{sum(w.cold_loglik is not None for w in warm)} cold-checked, "
        f"{sum(w.local_optimum is not None for w in warm)} local optima)"
    )
    print(
        f"  cold starts  {cold_s:7.2f} s wall, {cold_cpu:6.1f} s CPU   (peer: default starts "
        "on every window)"
    )
    print(
        f"  ratio cold / warm: {cold_s / warm_s:.2f}x wall, {cold_cpu / warm_cpu:.2f}x CPU; "
        f"target warm <= 30 s wall (CPU / {WORKERS} = {warm_cpu / WORKERS:.1f} s on idle cores)"
    )
    print(
        f"  converged: warm {sum(w.converged for w in warm)}, cold {sum(c.converged for c in cold)}"
        f"; max |loglik warm - cold| {np.max(np.abs(gap)):.2e} nats"
    )
