"""Where independent units of work run: in this process, or in local worker processes.

The interface is one method, ``map(fn, items)``: results come back in the order of ``items``
(whatever order the workers finish in). ``fn`` must be a module-level function and each item
plain data (numpy arrays, numbers, frozen dataclasses of those) so that any backend can ship
it: workers never open the store; the caller writes the results. A cluster backend (Dask
distributed's ``Client.map`` then ``gather``) fits the same interface.
"""

from __future__ import annotations

import multiprocessing
import os
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import ProcessPoolExecutor
from typing import Protocol, TypeVar

T = TypeVar("T")
R = TypeVar("R")


class Executor(Protocol):
    """Runs ``fn`` over ``items`` and yields the results in the order of ``items``."""

    @property
    def workers(self) -> int: ...

    def map(self, fn: Callable[[T], R], items: Sequence[T]) -> Iterator[R]: ...


class InlineExecutor:
    """Every item in this process, one after another (debugging, tests, one core)."""

    @property
    def workers(self) -> int:
        return 1

    def map(self, fn: Callable[[T], R], items: Sequence[T]) -> Iterator[R]:
        for item in items:
            yield fn(item)


class ProcessExecutor:
    """Local worker processes (``concurrent.futures.ProcessPoolExecutor``).

    Workers are started with ``spawn``: they share nothing with the caller (no inherited
    database connections or thread state) and import what ``fn`` needs once each.
    """

    def __init__(self, workers: int | None = None) -> None:
        self._workers = max(1, workers if workers is not None else (os.cpu_count() or 1))

    @property
    def workers(self) -> int:
        return self._workers

    def map(self, fn: Callable[[T], R], items: Sequence[T]) -> Iterator[R]:
        if not items:
            return
        n = min(self._workers, len(items))
        context = multiprocessing.get_context("spawn")
        with ProcessPoolExecutor(max_workers=n, mp_context=context) as pool:
            yield from pool.map(fn, items)


def local_executor(workers: int | None = None) -> Executor:
    """One process when ``workers == 1``, else a pool of ``workers`` (default: the cores)."""
    if workers == 1:
        return InlineExecutor()
    return ProcessExecutor(workers)
