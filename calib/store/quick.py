"""Quick reads of a SQLite store through the sqlite3 module alone, for a fast CLI start.

``calib latest`` answers one question, yet importing SQLAlchemy, the ORM models and numpy
costs several times what the answer does. :func:`read_in_force` reads the same rows through
sqlite3 and builds the same :class:`~calib.record.run.RunRecord` as
:func:`calib.store.runs.read_in_force`, under the same shared approval lock.

It answers only in the ordinary case: a ``sqlite:///`` file URL, the file there, its schema at
this program's head (read from the revision files, :func:`quick_head`), the commodity
registered. Anything else raises :class:`NotReadError` and the caller takes the store's own path,
which explains the problem (and reads PostgreSQL).

:data:`IN_FORCE_SQL` is the text of :func:`calib.store.runs.in_force_stmt`, the one definition
of the set in force, written out for sqlite3 (which cannot import it without SQLAlchemy);
tests/serving/test_in_force.py checks that both give the same run at every moment of unusual
event histories.
"""

from __future__ import annotations

import fcntl
import json
import os
import re
import sqlite3
from collections.abc import Iterator
from contextlib import contextmanager
from datetime import UTC, date, datetime
from pathlib import Path
from typing import Any

from calib.record.run import EVENT_COLUMNS, RUN_COLUMNS, EventRecord, RunRecord, run_record

MIGRATIONS_DIR = Path(__file__).resolve().parents[2] / "migrations"
"""The Alembic environment (``env.py``) and its ``versions/``."""
VERSION_TABLE = "alembic_version"
"""Where Alembic records a database's revision (its default name)."""
_REVISION_LINE = re.compile(r"""^(down_revision|revision)\s*(?::[^=]*)?=\s*['"]?([^'"\s]*)""", re.M)

SQLITE_TIME = "%Y-%m-%d %H:%M:%S.%f"
"""How :class:`~calib.store.base.UtcDateTime` stores a time on SQLite (naive UTC text)."""

DATE_COLUMNS = frozenset({"trade_date"})
TIME_COLUMNS = frozenset({"created_at", "at"})
JSON_COLUMNS = frozenset({"settings", "inputs", "buckets", "diagnostics"})
"""How the columns read here are stored on SQLite (a test checks them against the models)."""

IN_FORCE_SQL = """
SELECT e.run_id FROM run_events AS e JOIN calibration_runs AS r ON r.id = e.run_id
WHERE e.commodity_id = :cid AND e.to_status = 'approved' AND e.at <= :t AND r.study IS NULL
  AND NOT EXISTS (
    SELECT 1 FROM run_events AS ended
    WHERE ended.run_id = e.run_id AND ended.to_status = 'superseded' AND ended.at <= :t
  )
ORDER BY e.at DESC, e.id DESC
LIMIT 1
"""
"""The run of the set in force for commodity ``:cid`` at ``:t`` (see ``in_force_stmt``)."""


class NotReadError(Exception):
    """The quick path does not answer this case; use the store's own path."""


def quick_head() -> str | None:
    """The head read from the revision files without Alembic (``None`` if not exactly one).

    Each file's ``revision = "..."`` and ``down_revision = "..."`` lines; the head is the one
    revision no other revises. :func:`calib.store.migrate.head_revision` is the authority; a
    test keeps them equal.
    """
    revisions: set[str] = set()
    revised: set[str] = set()
    for path in (MIGRATIONS_DIR / "versions").glob("*.py"):
        for key, value in _REVISION_LINE.findall(path.read_text(encoding="utf-8")):
            (revisions if key == "revision" else revised).add(value)
    heads = revisions - revised
    return heads.pop() if len(heads) == 1 else None


def sqlite_path(url: str) -> Path | None:
    """The file of a plain ``sqlite:///PATH`` URL (``None`` for anything else: other engines,
    in-memory, query options or escapes, which the store's own URL parsing handles)."""
    prefix = "sqlite:///"
    if not url.startswith(prefix):
        return None
    rest = url[len(prefix) :]
    if not rest or rest == ":memory:" or any(c in rest for c in "?%#"):
        return None
    return Path(rest)


def approval_lock_path(database: Path) -> Path:
    """The file whose ``flock`` guards approvals on the SQLite store ``database``."""
    return database.with_name(database.name + "-approvals.lock")


def sqlite_read_flag(path: Path) -> str:
    """How a reader opens the SQLite file ``path``: ``immutable=1`` when nothing can write it
    (a read-only mount, or neither the file nor its folder has a write bit, or this process
    may not write the folder) and no write-ahead log is pending, so that no ``-wal``/``-shm``
    file is needed or made; else ``mode=ro`` (the side files are shared with the writers)."""
    folder = path.parent if str(path.parent) else Path(".")
    try:
        mount_read_only = bool(os.statvfs(folder).f_flag & os.ST_RDONLY)
        no_write_bits = not (path.stat().st_mode & 0o222 and folder.stat().st_mode & 0o222)
        wal = path.with_name(path.name + "-wal")
        pending = wal.exists() and wal.stat().st_size > 0
    except OSError:  # a file that is not there: mode=ro says so when connecting
        return "mode=ro"
    frozen = mount_read_only or no_write_bits or not os.access(folder, os.W_OK)
    return "immutable=1" if frozen and not pending else "mode=ro"


@contextmanager
def _shared_lock(database: Path) -> Iterator[None]:
    """The approval lock held shared (skipped where the lock file is not there, and so no
    approval is being written, or cannot be opened: a reader never makes it)."""
    try:
        handle = approval_lock_path(database).open("r")
    except OSError:
        yield
        return
    with handle:
        fcntl.flock(handle, fcntl.LOCK_SH)
        try:
            yield
        finally:
            fcntl.flock(handle, fcntl.LOCK_UN)


def _value(name: str, value: Any) -> Any:
    """A column's value as the models type it."""
    if value is None:
        return None
    if name in DATE_COLUMNS:
        return date.fromisoformat(value)
    if name in TIME_COLUMNS:
        return datetime.fromisoformat(value).replace(tzinfo=UTC)
    if name in JSON_COLUMNS:
        return json.loads(value)
    return value


def _typed(names: tuple[str, ...], row: tuple[Any, ...]) -> dict[str, Any]:
    return {name: _value(name, v) for name, v in zip(names, row, strict=True)}


def _read(db: sqlite3.Connection, commodity: str, when: datetime) -> RunRecord | None:
    """The reads, in one transaction (one snapshot)."""
    version = db.execute(f"SELECT version_num FROM {VERSION_TABLE}").fetchall()
    if len(version) != 1 or version[0][0] != quick_head():
        raise NotReadError
    found = db.execute("SELECT id FROM commodities WHERE code = ?", (commodity,)).fetchone()
    if found is None:
        raise NotReadError  # the store's path names the unknown commodity
    t = when.astimezone(UTC).replace(tzinfo=None).strftime(SQLITE_TIME)
    row = db.execute(IN_FORCE_SQL, {"cid": found[0], "t": t}).fetchone()
    if row is None:
        return None
    columns = ", ".join(RUN_COLUMNS)
    run = db.execute(f"SELECT {columns} FROM calibration_runs WHERE id = ?", (row[0],)).fetchone()
    events = db.execute(
        f"SELECT {', '.join(EVENT_COLUMNS)} FROM run_events WHERE run_id = ? AND at <= ? "
        "ORDER BY at, id",
        (row[0], t),
    ).fetchall()
    return run_record(
        _typed(RUN_COLUMNS, run),
        commodity,
        [EventRecord(*_typed(EVENT_COLUMNS, e).values()) for e in events],
    )


def read_in_force(url: str, commodity: str, as_of: datetime | None = None) -> RunRecord | None:
    """:func:`calib.store.runs.read_in_force` on a SQLite file, through sqlite3 alone.

    Raises
    ------
    NotReadError
        Not the ordinary case (see the module notes): ask the store.
    """
    path = sqlite_path(url)
    if path is None or not path.is_file():
        raise NotReadError
    when = as_of or datetime.now(UTC)
    try:
        db = sqlite3.connect(
            f"{path.resolve().as_uri()}?{sqlite_read_flag(path)}", uri=True, isolation_level=None
        )
    except sqlite3.Error:
        raise NotReadError from None
    try:
        with _shared_lock(path):
            db.execute("BEGIN")
            try:
                return _read(db, commodity, when)
            finally:
                db.execute("ROLLBACK")
    except sqlite3.Error:
        raise NotReadError from None
    finally:
        db.close()
