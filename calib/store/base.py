"""Declarative base shared by every table, and the column types they have in common.

The naming convention gives every index and constraint a deterministic name, so that Alembic
revisions written against SQLite and PostgreSQL name the same objects the same way and a later
revision can drop or alter them by name.
"""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Any

from sqlalchemy import DateTime, MetaData
from sqlalchemy.engine import Dialect
from sqlalchemy.orm import DeclarativeBase
from sqlalchemy.types import TypeDecorator

from calib.errors import TextTooLongError

NAMING_CONVENTION: dict[str, str] = {
    "ix": "ix_%(table_name)s_%(column_0_name)s",
    "uq": "uq_%(table_name)s_%(column_0_name)s",
    "ck": "ck_%(table_name)s_%(constraint_name)s",
    "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s",
    "pk": "pk_%(table_name)s",
}
"""Names ``<kind>_<table>_<first column>`` (check constraints: ``ck_<table>_<name>``).

The first column only, because PostgreSQL truncates names beyond 63 characters.
"""


def in_check(column: str, values: tuple[str, ...]) -> str:
    """SQL of a check constraint that ``column`` is one of ``values``."""
    return f"{column} IN ({', '.join(repr(v) for v in values)})"


class Base(DeclarativeBase):
    """Base class of every calib table; ``Base.metadata`` is Alembic's target."""

    metadata = MetaData(naming_convention=NAMING_CONVENTION)


class UtcDateTime(TypeDecorator[datetime]):
    """A point in time, stored in UTC and read back as an aware UTC ``datetime``.

    PostgreSQL keeps it as ``timestamp with time zone``; SQLite has no time zones, so the value
    is stored as naive UTC text. Naive datetimes are refused on the way in: a time without a
    zone is ambiguous.
    """

    impl = DateTime(timezone=True)
    cache_ok = True

    def process_bind_param(self, value: datetime | None, dialect: Dialect) -> datetime | None:
        if value is None:
            return None
        if value.tzinfo is None:
            raise ValueError(f"naive datetime {value!r}: give a time zone")
        utc = value.astimezone(UTC)
        return utc.replace(tzinfo=None) if dialect.name == "sqlite" else utc

    def process_result_value(self, value: Any, dialect: Dialect) -> datetime | None:
        if value is None:
            return None
        assert isinstance(value, datetime)
        if value.tzinfo is None:
            return value.replace(tzinfo=UTC)
        return value.astimezone(UTC)


def utc_now() -> datetime:
    """The current time, aware, in UTC."""
    return datetime.now(UTC)


# --- text limits: the same on every engine ------------------------------------------------------
# PostgreSQL refuses a longer value than its column holds, SQLite keeps any length: values are
# checked against these before they reach the database (the columns are declared with them).

CODE_CHARS = 32
"""Longest commodity code."""
NAME_CHARS = 200
"""Longest commodity name."""
UNIT_CHARS = 32
"""Longest unit of a commodity (``tonne``, ``bbl``)."""
CURRENCY_CHARS = 8
"""Longest quote currency code."""
USER_CHARS = 128
"""Longest user name recorded (who ingested, fitted, approved; ``CALIB_USER``, ``--by``)."""


def check_text(what: str, value: str, limit: int) -> str:
    """``value`` if it has at most ``limit`` characters, else :class:`TextTooLongError`.

    ``what`` names the value in the one-line message (``"the user name"``, ``"--by"``).
    """
    if len(value) > limit:
        raise TextTooLongError(what, len(value), limit)
    return value
