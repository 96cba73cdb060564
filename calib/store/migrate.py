"""Schema versions: upgrade a database to this program's head, or refuse a newer one.

Alembic revisions in ``migrations/`` are the only way the schema is created or changed. The
configuration is built in code (no ``alembic.ini`` lookup), so ``calib init`` works from any
folder; ``alembic.ini`` at the repository root serves developers writing new revisions.

Every command checks the schema revision first (:func:`check_current`). A database at head
passes without importing Alembic (a tenth of a second or more at start-up): the revision is read
with one query and the head from the revision files' ``revision``/``down_revision`` lines;
anything else goes through Alembic itself.
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from typing import TYPE_CHECKING

from sqlalchemy import Connection, Engine, text
from sqlalchemy.exc import DBAPIError

from calib.errors import (
    SchemaTooNewError,
    StoreNotInitialisedError,
    StoreOutdatedError,
    StoreUnavailableError,
)
from calib.store.engine import sqlite_file
from calib.store.quick import MIGRATIONS_DIR, VERSION_TABLE, quick_head

if TYPE_CHECKING:
    from alembic.config import Config


def alembic_config(connection: Connection | None = None) -> Config:
    """Alembic configuration for calib's migrations; ``connection`` is used by ``env.py``."""
    from alembic.config import Config

    config = Config()
    config.set_main_option("script_location", str(MIGRATIONS_DIR))
    if connection is not None:
        config.attributes["connection"] = connection
    return config


def head_revision() -> str:
    """The newest revision this program knows."""
    from alembic.script import ScriptDirectory

    head = ScriptDirectory.from_config(alembic_config()).get_current_head()
    assert head is not None, "migrations/versions holds no revision"
    return head


def current_revision(connection: Connection) -> str | None:
    """The revision the database is at (``None``: no calib schema)."""
    from alembic.runtime.migration import MigrationContext

    return MigrationContext.configure(connection).get_current_revision()


def _stored_revision(connection: Connection) -> str | None:
    """The revision in the version table by one query (``None``: no single row, no table)."""
    try:
        rows = connection.execute(text(f"SELECT version_num FROM {VERSION_TABLE}")).all()
    except DBAPIError:
        connection.rollback()
        return None
    return str(rows[0][0]) if len(rows) == 1 else None


def _known(revision: str) -> bool:
    from alembic.script import ScriptDirectory
    from alembic.util.exc import CommandError

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
    from alembic import command

    path = sqlite_file(engine.url)
    if path is not None:
        path.parent.mkdir(parents=True, exist_ok=True)
    with _migrating(engine) as connection:
        before = current_revision(connection)
        if before is not None and not _known(before):
            raise SchemaTooNewError(before, head_revision())
        command.upgrade(alembic_config(connection), revision)
        after = current_revision(connection)
    assert after is not None
    return UpgradeResult(before=before, after=after)


@contextmanager
def _migrating(engine: Engine) -> Iterator[Connection]:
    """One transaction for a schema change; on SQLite with foreign keys enforced only at the end.

    SQLite changes a table's constraints by rebuilding it (copy, drop, rename: Alembic's batch
    mode), and with ``foreign_keys=ON`` dropping a table that other rows reference fails. The
    procedure of the SQLite documentation ("Making Other Kinds Of Table Schema Changes",
    lang_altertable.html) is followed: foreign keys off outside the transaction, the change,
    ``PRAGMA foreign_key_check`` before the commit (a violation rolls everything back), foreign
    keys on again.
    """
    with engine.connect() as connection:
        if connection.dialect.name != "sqlite":
            with connection.begin():
                yield connection
            return
        raw = connection.connection.driver_connection
        assert raw is not None
        raw.execute("PRAGMA foreign_keys=OFF")  # no effect inside a transaction: set before it
        try:
            with connection.begin():
                yield connection
                broken = connection.exec_driver_sql("PRAGMA foreign_key_check").all()
                if broken:
                    raise StoreUnavailableError(
                        engine.url.render_as_string(hide_password=True),
                        f"the schema change would leave {len(broken)} rows with a broken"
                        " foreign key; nothing was changed",
                    )
        finally:
            raw.execute("PRAGMA foreign_keys=ON")


def downgrade(engine: Engine, revision: str = "base") -> None:
    """Downgrade the database to ``revision`` (default: empty). For tests and repairs."""
    from alembic import command

    with _migrating(engine) as connection:
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
        quick = _stored_revision(connection)
        if quick is not None and quick == quick_head():
            return quick
        found = current_revision(connection)
    head = head_revision()
    if found is None:
        raise StoreNotInitialisedError(engine.url.render_as_string(hide_password=True))
    if found != head:
        if not _known(found):
            raise SchemaTooNewError(found, head)
        raise StoreOutdatedError(found, head)
    return found
