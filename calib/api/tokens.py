"""The bearer token that enables approval over HTTP: where it comes from, what it must be.

The server takes it from ``CALIB_API_TOKEN``, else from the file named by
``CALIB_API_TOKEN_FILE`` (what ``calib serve --token-file`` sets for its workers). Without
either, the approval route is not mounted. Without the web framework, so that the CLI can
read a token without importing it; the guard on the routes is :mod:`calib.api.guard`.
"""

from __future__ import annotations

import os
from pathlib import Path

from calib.errors import ApiTokenError

TOKEN_ENV = "CALIB_API_TOKEN"
TOKEN_FILE_ENV = "CALIB_API_TOKEN_FILE"


def read_token(path: Path) -> str:
    """The approval token in ``path`` (surrounding white space removed).

    Raises
    ------
    ApiTokenError
        The file cannot be read, or the token is shorter than ``ApiTokenError.MIN_LENGTH``.
    """
    try:
        token = path.read_text(encoding="utf-8").strip()
    except (OSError, UnicodeDecodeError) as exc:
        raise ApiTokenError(str(path), f"cannot be read ({exc})") from None
    return check_token(token, str(path))


def check_token(token: str, source: str) -> str:
    """``token`` if it is long enough to guard approvals (else :class:`ApiTokenError`)."""
    if len(token) < ApiTokenError.MIN_LENGTH:
        raise ApiTokenError(source, f"must be at least {ApiTokenError.MIN_LENGTH} characters")
    return token


def token_from_env() -> str | None:
    """The approval token from ``CALIB_API_TOKEN`` or the file ``CALIB_API_TOKEN_FILE``."""
    if os.environ.get(TOKEN_ENV):
        return check_token(os.environ[TOKEN_ENV], f"${TOKEN_ENV}")
    if os.environ.get(TOKEN_FILE_ENV):
        return read_token(Path(os.environ[TOKEN_FILE_ENV]))
    return None
