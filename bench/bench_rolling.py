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

Before either is timed, one window is estimated in a process of its own: on a machine where
numba's on-disk cache of the compiled Kalman kernels is empty or stale (a fresh checkout, an
edited kernel) that compiles them (about half a minute of CPU), once per machine. Untimed, that
compile fell on whichever run came first, the warm one, and made warm starts look slower than
cold ones. It is printed on its own line; both runs then load the kernels from the cache.
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
from calib.model.twofactor import PARAM_NAMES
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


def _compile(window: WindowTask, settings: FitSettings) -> float:
    """Wall seconds of one window estimated in a process of its own (compiles the kernels
    into numba's cache if it does not hold them yet)."""
    started = time.perf_counter()
    list(ProcessExecutor(1).map(fit_chunk, [ChunkTask((window,), settings)]))
    return time.perf_counter() - started


def _param_gap(warm: list[WindowFit], cold: list[WindowFit]) -> float:
    """Largest ``|theta_warm - theta_cold| / s.e.`` over the windows and parameters."""
    worst = 0.0
    for w, c in zip(warm, cold, strict=True):
        if w.params is None or c.params is None or c.std_errors is None:
            continue
        for n in PARAM_NAMES:
            d = abs(getattr(w.params, n) - getattr(c.params, n)) / c.std_errors[n]
            worst = max(worst, d)
    return worst


def main() -> None:
    curves = make_curves(N_DAYS)
    wins = windows(curves)
    settings = FitSettings()
    pool = ProcessExecutor(WORKERS)
    compile_s = _compile(wins[0], settings)
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
        f"  untimed first: one window in its own process, {compile_s:.1f} s wall (compiles the "
        "kernels where numba's cache lacks them)"
    )
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
        f"; max |loglik warm - cold| {np.max(np.abs(gap)):.2e} nats, "
        f"max |theta warm - theta cold| {_param_gap(warm, cold):.1e} s.e."
    )
