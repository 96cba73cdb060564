"""One settings object for the whole program (STYLE 12).

Values come from the environment (``CALIB_*``) with defaults; the CLI's ``--db`` overrides the
database URL. Nothing here creates an engine or touches a file.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path

DEFAULT_DB_FILE = Path("db") / "calib.sqlite"


def _default_db_url() -> str:
    return os.environ.get("CALIB_DB") or f"sqlite:///{DEFAULT_DB_FILE.as_posix()}"


@dataclass(frozen=True)
class Settings:
    """Program-wide settings.

    Attributes
    ----------
    db_url : SQLAlchemy URL; ``CALIB_DB`` or ``sqlite:///db/calib.sqlite`` under the working
        folder.
    user : who is recorded on ingests, approvals and events; ``CALIB_USER`` or the login name.
    """

    db_url: str = field(default_factory=_default_db_url)
    user: str = field(
        default_factory=lambda: os.environ.get("CALIB_USER") or os.environ.get("USER") or "unknown"
    )


def get_settings(db_url: str | None = None) -> Settings:
    """Settings from the environment, with an explicit database URL taking precedence."""
    base = Settings()
    if db_url:
        return Settings(db_url=db_url, user=base.user)
    return base
