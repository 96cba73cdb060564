"""Schema versions: upgrade a database to this program's head, or refuse a newer one.

Alembic revisions in ``migrations/`` are the only way the schema is created or changed. The
configuration is built in code (no ``alembic.ini`` lookup), so ``calib init`` works from any
folder; ``alembic.ini`` at the repository root serves developers writing new revisions.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from alembic import command
from alembic.config import Config
from alembic.runtime.migration import MigrationContext
from alembic.script import ScriptDirectory
from alembic.util.exc import CommandError
from sqlalchemy import Connection, Engine

from calib.errors import SchemaTooNewError, StoreNotInitialisedError, StoreOutdatedError
from calib.store.engine import sqlite_file

MIGRATIONS_DIR = Path(__file__).resolve().parents[2] / "migrations"
"""The Alembic environment (``env.py``) and its ``versions/``."""


def alembic_config(connection: Connection | None = None) -> Config:
    """Alembic configuration for calib's migrations; ``connection`` is used by ``env.py``."""
    config = Config()
    config.set_main_option("script_location", str(MIGRATIONS_DIR))
    if connection is not None:
        config.attributes["connection"] = connection
    return config


def head_revision() -> str:
    """The newest revision this program knows."""
    head = ScriptDirectory.from_config(alembic_config()).get_current_head()
    assert head is not None, "migrations/versions holds no revision"
    return head


def current_revision(connection: Connection) -> str | None:
    """The revision the database is at (``None``: no calib schema)."""
    return MigrationContext.configure(connection).get_current_revision()


def _known(revision: str) -> bool:
    script = ScriptDirectory.from_config(alembic_config())
    try:
        return script.get_revision(revision) is not None
    except CommandError:
        return False


@dataclass(frozen=True)
class UpgradeResult:
    """What :func:`upgrade` did: the revision found and the revision left."""

    before: str | None
    after: str

    @property
    def changed(self) -> bool:
        """True if a migration ran."""
        return self.before != self.after


def upgrade(engine: Engine, revision: str = "head") -> UpgradeResult:
    """Upgrade the database to ``revision`` (default: head), creating it if empty.

    A SQLite file's folder is created if missing.

    Raises
    ------
    SchemaTooNewError
        If the database is at a revision this program does not know (written by a newer
        calib); nothing is changed.
    """
    path = sqlite_file(engine.url)
    if path is not None:
        path.parent.mkdir(parents=True, exist_ok=True)
    with engine.begin() as connection:
        before = current_revision(connection)
        if before is not None and not _known(before):
            raise SchemaTooNewError(before, head_revision())
        command.upgrade(alembic_config(connection), revision)
        after = current_revision(connection)
    assert after is not None
    return UpgradeResult(before=before, after=after)


def downgrade(engine: Engine, revision: str = "base") -> None:
    """Downgrade the database to ``revision`` (default: empty). For tests and repairs."""
    with engine.begin() as connection:
        command.downgrade(alembic_config(connection), revision)


def check_current(engine: Engine) -> str:
    """The database's revision, which must be this program's head.

    Raises
    ------
    StoreNotInitialisedError
        No calib schema (run ``calib init``).
    StoreOutdatedError
        An older revision (run ``calib init`` to upgrade).
    SchemaTooNewError
        A revision this program does not know.
    """
    path = sqlite_file(engine.url)
    if path is not None and not path.exists():
        raise StoreNotInitialisedError(engine.url.render_as_string(hide_password=True))
    with engine.connect() as connection:
        found = current_revision(connection)
    head = head_revision()
    if found is None:
        raise StoreNotInitialisedError(engine.url.render_as_string(hide_password=True))
    if found != head:
        if not _known(found):
            raise SchemaTooNewError(found, head)
        raise StoreOutdatedError(found, head)
    return found
