"""Start-up: ``calib --help`` and ``calib latest`` load no part of the numeric stack (issue 11
item 7, issue 12). Checked by the modules a real ``calib`` process has loaded when it exits,
not by a clock; the times themselves are measured outside the tests."""

from __future__ import annotations

import sys
from pathlib import Path

import pytest

from calib.cli import backfill_cmds, price_cmds, run_cmds
from calib.cli.backfill_cmds import rate_text
from calib.store.migrate import head_revision
from calib.store.quick import quick_head
from tests.cli.console import calib

HEAVY = ("cvxpy", "scipy", "numba", "pandas", "matplotlib", "pyarrow", "clarabel")
"""Packages a command that does no numerics must not import."""

PROBE = (
    "import atexit, sys\n"
    f"atexit.register(lambda: sys.stderr.write('\\nloaded: ' + ' '.join("
    f"m for m in {HEAVY!r} if m in sys.modules) + '\\n'))\n"
)


def _loaded(*args: str, db: str | None = None) -> tuple[int, list[str]]:
    done = calib(*args, env=None if db is None else {"CALIB_DB": db}, prelude=PROBE)
    last = done.stderr.rstrip("\n").rsplit("\n", 1)[-1]
    assert last.startswith("loaded:"), done.stderr
    return done.returncode, last.removeprefix("loaded:").split()


def test_help_loads_no_numeric_package() -> None:
    assert _loaded("--help") == (0, [])
    assert _loaded("fit", "--help") == (0, [])
    assert "numpy" not in calib("--help", prelude=PROBE.replace(repr(HEAVY), "('numpy',)")).stderr


def test_latest_loads_no_numeric_package(tmp_path: Path) -> None:
    db = f"sqlite:///{tmp_path / 'c.sqlite'}"
    assert calib("init", env={"CALIB_DB": db}).returncode == 0
    futures = tmp_path / "f.csv"
    futures.write_text("trade_date,commodity,delivery,settle\n2033-06-01,QLM,2033-07-12,50\n")
    done = calib("ingest", "futures", str(futures), "--create", env={"CALIB_DB": db})
    assert done.returncode == 0, done.stderr
    # no approved set: the query runs in full, the command says so and exits 2
    assert _loaded("latest", "QLM", db=db) == (2, [])
    assert _loaded("latest", "QLM", "--as-of", "2033-06-01", db=db) == (2, [])
    assert _loaded("latest", "QLM", "--history", db=db) == (0, [])
    # on an ordinary SQLite file the set in force is read through sqlite3 alone
    light = PROBE.replace(repr(HEAVY), repr(("numpy", "sqlalchemy")))
    done = calib("latest", "QLM", env={"CALIB_DB": db}, prelude=light)
    assert done.returncode == 2 and done.stderr.rstrip("\n").endswith("loaded: "), done.stderr


def test_quick_schema_check_agrees_with_alembic() -> None:
    # check_current skips Alembic when the database is at the head read from the files
    assert quick_head() == head_revision()


@pytest.mark.parametrize(
    ("cli_value", "where", "name"),
    [
        (run_cmds.MIN_DAYS, "calib.workflows.estimates", "MIN_DAYS"),
        (price_cmds.MC_PATHS, "calib.workflows.pricing", "MC_PATHS"),
        (price_cmds.MC_SEED, "calib.workflows.pricing", "MC_SEED"),
    ],
)
def test_option_defaults_equal_the_workflow_defaults(cli_value: int, where: str, name: str) -> None:
    # the commands state these defaults without importing their workflow
    from importlib import import_module

    assert cli_value == getattr(import_module(where), name)


def test_backfill_rate_is_the_average_since_the_start() -> None:
    # issue 12, defect 4: 7 days in 0.7 s read "103289.8 days/s" (a burst estimate)
    assert rate_text(7, 0.7) == "10.0 days/s"
    assert rate_text(0, 0.0) == "-- days/s" and rate_text(3, 0.0) == "-- days/s"
    now = [0.0]
    bar = backfill_cmds._Bar(clock=lambda: now[0])
    bar.start(total=7, skipped=0)
    for day in range(7):  # the seven days land together at the end, as in the report
        now[0] = 0.7 + day * 1e-6
        bar.advance(None)  # type: ignore[arg-type]
    assert bar.bar.tasks[0].fields["rate"] == "10.0 days/s"


def test_commands_are_registered_once_however_often_main_runs(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """In one process (the tests) ``main`` runs many times; the app must not grow each time."""
    from calib.cli import app, main

    def commands() -> int:
        return len(app.registered_commands) + len(app.registered_groups)

    monkeypatch.setattr(sys, "argv", ["calib", "--help"])
    for _ in range(2):
        with pytest.raises(SystemExit):
            main()
    once = commands()
    with pytest.raises(SystemExit):
        main()
    assert commands() == once
