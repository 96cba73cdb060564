"""One settings object for the whole program (STYLE 12).

Values come from the environment (``CALIB_*``) with defaults; the CLI's ``--db`` overrides the
database URL. Nothing here creates an engine or touches a file.
"""

from __future__ import annotations

import getpass
import os
from dataclasses import dataclass, field
from pathlib import Path

DEFAULT_DB_FILE = Path("db") / "calib.sqlite"


def os_user() -> str:
    """The login name of this process (``CALIB_USER`` first): the environment's ``LOGNAME``,
    ``USER``..., else the password database's entry for the user id, else ``uid <n>``."""
    if os.environ.get("CALIB_USER"):
        return os.environ["CALIB_USER"]
    try:
        return getpass.getuser()
    except (OSError, KeyError):  # no name variable and no passwd entry (a bare container)
        return f"uid {os.getuid()}"


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
    user: str = field(default_factory=os_user)


def get_settings(db_url: str | None = None) -> Settings:
    """Settings from the environment, with an explicit database URL taking precedence."""
    base = Settings()
    if db_url:
        return Settings(db_url=db_url, user=base.user)
    return base
