"""Shared test set-up: hypothesis profiles, the kernel cache of a parallel run, seeded random
generators, databases on each engine, the command line in this process."""

from __future__ import annotations

import os

import numpy as np
import pytest
from hypothesis import HealthCheck, settings

settings.register_profile("dev", max_examples=100, deadline=None)
settings.register_profile(
    "ci", max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow]
)
settings.load_profile(os.environ.get("HYPOTHESIS_PROFILE", "dev"))


# --- a parallel run (pytest -n N): calib's compiled kernels made once, before the test processes

import subprocess  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402

WARMUP_PROCESSES = (("estimate",), ("options", "hedge"))
"""The groups of :mod:`tests.numba_warmup`, one process each: about 30 s and 25 s of CPU on a
fresh checkout (compiling), 2-3 s each once cached (imports and loading)."""


def pytest_configure(config: pytest.Config) -> None:
    """In the controller of a parallel run, before the test processes start: compile calib's
    numba kernels into their cache once, in two processes (see :mod:`tests.numba_warmup`),
    instead of in every test process that reaches them first. A failed warm-up is reported
    and the run goes on (each test then compiles what it needs, as without it)."""
    if not getattr(config.option, "numprocesses", None) or hasattr(config, "workerinput"):
        return
    root = Path(__file__).resolve().parents[1]
    path = [str(root), *filter(None, [os.environ.get("PYTHONPATH")])]
    env = {**os.environ, "PYTHONPATH": os.pathsep.join(path)}
    t0 = time.monotonic()
    started = [
        subprocess.Popen(
            [sys.executable, "-m", "tests.numba_warmup", *groups],
            cwd=root,
            env=env,
            stdout=subprocess.PIPE,
            stderr=subprocess.STDOUT,
            text=True,
        )
        for groups in WARMUP_PROCESSES
    ]
    for groups, process in zip(WARMUP_PROCESSES, started, strict=True):
        out, _ = process.communicate()
        if process.returncode != 0:
            tail = "\n".join(out.splitlines()[-15:])
            name = " ".join(groups)
            sys.stderr.write(f"numba warm-up {name} failed (the tests compile):\n{tail}\n")
    sys.stderr.write(f"numba kernels compiled or loaded in {time.monotonic() - t0:.0f} s\n")


@pytest.fixture
def rng() -> np.random.Generator:
    """A seeded generator; every random test is reproducible."""
    return np.random.default_rng(20261201)


# --- databases: every store test runs on SQLite and on PostgreSQL ------------------------------
# PostgreSQL comes from CALIB_TEST_PG_URL; each run works in its own schema, dropped afterwards.

import uuid  # noqa: E402
from collections.abc import Iterator  # noqa: E402
from contextlib import contextmanager  # noqa: E402
from pathlib import Path  # noqa: E402

import calib.store.models  # noqa: E402, F401  (registers the tables on Base.metadata)
from calib.store import run_models  # noqa: E402, F401  (the run and estimate tables)
from calib.store.base import Base  # noqa: E402
from calib.store.engine import Store, create_store_engine, make_store  # noqa: E402
from calib.store.migrate import upgrade  # noqa: E402

PG_URL_VAR = "CALIB_TEST_PG_URL"
ENGINES = [
    pytest.param("sqlite", id="sqlite"),
    pytest.param("postgresql", id="postgresql", marks=pytest.mark.postgres),
]


def with_schema(url: str, schema: str) -> str:
    """``url`` with PostgreSQL's search path set to ``schema`` (psycopg connection option)."""
    sep = "&" if "?" in url else "?"
    return f"{url}{sep}options=-csearch_path%3D{schema}"


@contextmanager
def fresh_database(engine: str, folder: Path) -> Iterator[str]:
    """The URL of a new, empty database of ``engine`` ("sqlite" or "postgresql")."""
    if engine == "sqlite":
        yield f"sqlite:///{folder / f'calib-{uuid.uuid4().hex[:8]}.sqlite'}"
        return
    base = os.environ.get(PG_URL_VAR)
    if not base:
        pytest.skip(f"PostgreSQL tests skipped: {PG_URL_VAR} is not set")
    schema = f"calib_test_{uuid.uuid4().hex[:12]}"
    admin = create_store_engine(base)
    with admin.begin() as conn:
        conn.exec_driver_sql(f"CREATE SCHEMA {schema}")
    try:
        yield with_schema(base, schema)
    finally:
        with admin.begin() as conn:
            conn.exec_driver_sql(f"DROP SCHEMA {schema} CASCADE")
        admin.dispose()


@pytest.fixture(params=ENGINES)
def empty_db_url(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[str]:
    """A new empty database (no schema), on each engine."""
    with fresh_database(request.param, tmp_path) as url:
        yield url


@pytest.fixture(scope="session", params=ENGINES)
def _migrated_db_url(
    request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory
) -> Iterator[str]:
    with fresh_database(request.param, tmp_path_factory.mktemp("db")) as url:
        engine = create_store_engine(url)
        upgrade(engine)
        engine.dispose()
        yield url


@pytest.fixture
def db_url(_migrated_db_url: str) -> Iterator[str]:
    """A database migrated to head, on each engine; emptied after each test."""
    yield _migrated_db_url
    engine = create_store_engine(_migrated_db_url)
    with engine.begin() as conn:
        for table in reversed(Base.metadata.sorted_tables):
            conn.execute(table.delete())
    engine.dispose()


@pytest.fixture
def store(db_url: str) -> Iterator[Store]:
    """A :class:`~calib.store.engine.Store` on ``db_url``."""
    made = make_store(db_url)
    yield made
    made.engine.dispose()


# --- the command line in this process, on the test's database -----------------------------------

from collections.abc import Callable  # noqa: E402

Cli = Callable[..., tuple[int, str, str]]
"""``cli(*ARGS)``: ``calib ARGS... --db <the test's database>``; (exit code, stdout, stderr)."""


@pytest.fixture
def cli(db_url: str, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch) -> Cli:
    """Run ``calib`` in this process on ``db_url`` (see :data:`Cli`)."""
    from tests.cli.test_store_cmds import run

    def call(*args: str) -> tuple[int, str, str]:
        return run(capsys, monkeypatch, *args, "--db", db_url)  # type: ignore[no-any-return]

    return call
