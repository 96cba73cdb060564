"""A command killed with SIGKILL leaves none of its worker processes behind (nor the
multiprocessing resource tracker): they die with their parent."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import psutil
import pytest

from calib.store.engine import Store, make_store
from calib.store.migrate import upgrade
from tests.workflows.small_day import load_with_estimate

ROOT = Path(__file__).resolve().parents[2]
GONE_WITHIN = 10.0
"""Seconds the workers get to end after their parent is killed (the parent-death signal
is immediate; the margin is for a loaded machine)."""


def _start(code: str) -> subprocess.Popen[bytes]:
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    return subprocess.Popen(
        [sys.executable, "-c", code],
        cwd=ROOT,
        env=env,
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )


def _workers_started(
    parent: psutil.Process, n: int, timeout: float = 120.0
) -> list[psutil.Process]:
    """The parent's descendants once ``n`` worker processes (and the tracker) are up."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        found = parent.children(recursive=True)
        workers = [p for p in found if "spawn_main" in " ".join(_cmdline(p))]
        if len(workers) >= n:
            time.sleep(1.0)  # let them take work
            return parent.children(recursive=True)
        time.sleep(0.2)
    pytest.fail(f"the command did not start {n} workers within {timeout:.0f} s")


def _cmdline(p: psutil.Process) -> list[str]:
    try:
        return p.cmdline()
    except psutil.Error:
        return []


def _kill_and_check(proc: subprocess.Popen[bytes], workers: int) -> None:
    parent = psutil.Process(proc.pid)
    children = _workers_started(parent, workers)
    assert any("resource_tracker" in " ".join(_cmdline(p)) for p in children)
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait(timeout=10)
    _, alive = psutil.wait_procs(children, timeout=GONE_WITHIN)
    try:
        assert not alive, f"still running after the parent's SIGKILL: {[p.pid for p in alive]}"
    finally:
        for p in alive:  # do not leave them to the rest of the suite
            p.kill()


@pytest.fixture
def loaded_store(tmp_path: Path) -> Iterator[tuple[Store, str, str]]:
    url = f"sqlite:///{tmp_path / 'orphans.sqlite'}"
    store = make_store(url)
    upgrade(store.engine)
    loaded = load_with_estimate(store, tmp_path)
    yield store, url, loaded.code
    store.engine.dispose()


def test_backfill_workers_die_with_the_command(loaded_store: tuple[Store, str, str]) -> None:
    _, url, code = loaded_store
    argv = ["calib", "backfill", code, "--from", "2031-01-01", "--to", "2031-12-31"]
    argv += ["--workers", "2", "--db", url, "--json"]
    proc = _start(f"import sys; from calib.cli import main; sys.argv = {argv!r}; main()")
    _kill_and_check(proc, 2)


def test_local_process_workers_die_with_their_parent() -> None:
    # the pool behind rolling estimates (and any map on local processes)
    script = (
        "import time\n"
        "from calib.compute.executor import ProcessExecutor\n"
        "for _ in ProcessExecutor(2).map(time.sleep, [30.0] * 4):\n"
        "    pass\n"
    )
    _kill_and_check(_start(script), 2)
