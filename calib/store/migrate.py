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

import re
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

from sqlalchemy import Connection, Engine, text
from sqlalchemy.exc import DBAPIError

from calib.errors import SchemaTooNewError, StoreNotInitialisedError, StoreOutdatedError
from calib.store.engine import sqlite_file

if TYPE_CHECKING:
    from alembic.config import Config

MIGRATIONS_DIR = Path(__file__).resolve().parents[2] / "migrations"
"""The Alembic environment (``env.py``) and its ``versions/``."""
VERSION_TABLE = "alembic_version"
"""Where Alembic records a database's revision (its default name)."""
_REVISION_LINE = re.compile(r"""^(down_revision|revision)\s*(?::[^=]*)?=\s*['"]?([^'"\s]*)""", re.M)


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


def quick_head() -> str | None:
    """The head read from the revision files without Alembic (``None`` if not exactly one).

    Each file's ``revision = "..."`` and ``down_revision = "..."`` lines; the head is the one
    revision no other revises. :func:`head_revision` is the authority; a test keeps them equal.
    """
    revisions: set[str] = set()
    revised: set[str] = set()
    for path in (MIGRATIONS_DIR / "versions").glob("*.py"):
        for key, value in _REVISION_LINE.findall(path.read_text(encoding="utf-8")):
            (revisions if key == "revision" else revised).add(value)
    heads = revisions - revised
    return heads.pop() if len(heads) == 1 else None


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
    from alembic import command

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
