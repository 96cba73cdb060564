"""Where independent units of work run: in this process, local worker processes, or a cluster.

The interface is one method, ``map(fn, items)``: results come back in the order of ``items``
(whatever order the workers finish in), with at most ``ahead`` units handed out and not yet
taken back, so ``items`` may be a lazy iterable the caller fills as it goes (a backfill reads
its next days while the workers fit the previous ones). ``fn`` must be a module-level function
and each item plain data (numpy arrays, numbers, frozen dataclasses of those) so that any
backend can ship it: workers never open the store; the caller writes the results.

Local processes and a Dask cluster (:mod:`calib.compute.cluster`) share one code path,
:func:`ordered_map` over a :class:`concurrent.futures.Executor` (a
:class:`~concurrent.futures.ProcessPoolExecutor`, or the Dask client's executor).

Local worker processes die with the process that started them (Linux: the parent-death
signal; elsewhere a thread watching the parent's pid), so a killed command leaves no worker
behind (the multiprocessing resource tracker then ends too: its last client is gone).
"""

from __future__ import annotations

import ctypes
import multiprocessing
import os
import signal
import sys
import threading
import time
from abc import ABC, abstractmethod
from collections import deque
from collections.abc import Callable, Generator, Iterable
from concurrent.futures import Executor as FuturesExecutor
from concurrent.futures import Future, ProcessPoolExecutor
from itertools import islice
from typing import Protocol, TypeVar

T = TypeVar("T")
R = TypeVar("R")

AHEAD_PER_WORKER = 2
"""Units handed out ahead per worker by default (keeps the workers busy while the caller
stores what came back)."""

PR_SET_PDEATHSIG = 1
"""``prctl`` option (linux/prctl.h): the signal a process gets when its parent ends."""

WATCH_SECONDS = 0.5
"""How often a worker without the parent-death signal checks that its parent lives."""


class Executor(Protocol):
    """Runs ``fn`` over ``items`` and yields the results in the order of ``items``; ``close()``
    releases what it holds (use ``with contextlib.closing(executor)``)."""

    @property
    def workers(self) -> int:
        """Units that can run at once (processes, or the cluster's worker threads)."""
        ...

    @property
    def where(self) -> str:
        """Where the units run, for reports: ``"this process"``, ``"2 local process(es)"``,
        ``"cluster tcp://host:8786"``."""
        ...

    def map(
        self, fn: Callable[[T], R], items: Iterable[T], *, ahead: int | None = None
    ) -> Generator[R, None, None]: ...

    def close(self) -> None: ...


def ordered_map(
    pool: FuturesExecutor, fn: Callable[[T], R], items: Iterable[T], ahead: int
) -> Generator[R, None, None]:
    """``fn`` over ``items`` on ``pool``, results in the order of ``items``, at most ``ahead``
    submitted and not yet yielded. Closing the generator cancels what has not started."""
    pending: deque[Future[R]] = deque()
    todo = iter(items)
    try:
        for item in islice(todo, max(1, ahead)):
            pending.append(pool.submit(fn, item))
        while pending:
            result = pending.popleft().result()
            for item in islice(todo, 1):  # the next unit before the caller takes this one
                pending.append(pool.submit(fn, item))
            yield result
    finally:
        for future in pending:
            future.cancel()


class InlineExecutor:
    """Every item in this process, one after another (debugging, tests, one core)."""

    def close(self) -> None:
        pass

    @property
    def workers(self) -> int:
        return 1

    @property
    def where(self) -> str:
        return "this process"

    def map(
        self, fn: Callable[[T], R], items: Iterable[T], *, ahead: int | None = None
    ) -> Generator[R, None, None]:
        for item in items:
            yield fn(item)


def _watch_parent(parent: int) -> None:
    while os.getppid() == parent:
        time.sleep(WATCH_SECONDS)
    os._exit(1)


def die_with_parent(parent: int) -> None:
    """Worker initializer: end this process when ``parent`` ends.

    On Linux the kernel sends SIGKILL on the parent's death (``prctl(PR_SET_PDEATHSIG)``); the
    parent having died before the call is caught by comparing ``getppid()``. Elsewhere a daemon
    thread polls the parent pid every :data:`WATCH_SECONDS`.
    """
    if sys.platform.startswith("linux"):
        libc = ctypes.CDLL(None, use_errno=True)
        if libc.prctl(PR_SET_PDEATHSIG, signal.SIGKILL, 0, 0, 0) == 0:
            if os.getppid() != parent:
                os._exit(1)
            return
    threading.Thread(target=_watch_parent, args=(parent,), daemon=True).start()


class PoolExecutor(ABC):
    """An executor whose units go through a :class:`concurrent.futures.Executor` opened for
    each ``map`` (:func:`ordered_map`): local processes and a Dask cluster alike."""

    @property
    @abstractmethod
    def workers(self) -> int: ...

    @abstractmethod
    def pool(self) -> FuturesExecutor:
        """A ``concurrent.futures`` executor for one ``map`` (shut down at its end)."""

    def map(
        self, fn: Callable[[T], R], items: Iterable[T], *, ahead: int | None = None
    ) -> Generator[R, None, None]:
        with self.pool() as pool:
            yield from ordered_map(pool, fn, items, ahead or AHEAD_PER_WORKER * self.workers)


class ProcessExecutor(PoolExecutor):
    """Local worker processes (``concurrent.futures.ProcessPoolExecutor``), one pool per map.

    Workers are started with ``spawn``: they share nothing with the caller (no inherited
    database connections or thread state) and import what ``fn`` needs once each. They end
    with the calling process (:func:`die_with_parent`); the pool is started by the thread
    that calls ``map`` and lives no longer than that call.
    """

    def __init__(self, workers: int | None = None) -> None:
        self._workers = max(1, workers if workers is not None else (os.cpu_count() or 1))

    @property
    def workers(self) -> int:
        return self._workers

    @property
    def where(self) -> str:
        return f"{self._workers} local process(es)"

    def close(self) -> None:
        pass  # each map's pool is shut down at the end of the map

    def pool(self) -> FuturesExecutor:
        return ProcessPoolExecutor(
            max_workers=self._workers,
            mp_context=multiprocessing.get_context("spawn"),
            initializer=die_with_parent,
            initargs=(os.getpid(),),
        )


def local_executor(workers: int | None = None) -> Executor:
    """One process when ``workers == 1``, else a pool of ``workers`` (default: the cores)."""
    if workers == 1:
        return InlineExecutor()
    return ProcessExecutor(workers)


def open_executor(workers: int | None = None, cluster: str | None = None) -> Executor:
    """The executor a command asked for: the Dask cluster at ``cluster`` (connected now,
    see :func:`calib.compute.cluster.connect`), else :func:`local_executor` of ``workers``.
    Use it in ``with contextlib.closing(...)`` (a cluster's connection is closed at the end).

    Raises
    ------
    ClusterError
        ``cluster`` together with ``workers``; dask not installed; no answer at ``cluster``.
    """
    if cluster is None:
        return local_executor(workers)
    from calib.compute.cluster import connect
    from calib.errors import ClusterError

    if workers is not None:
        raise ClusterError(cluster, "--workers is for local processes; leave it out")
    return connect(cluster)
