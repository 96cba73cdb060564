"""How long the server lets one database statement run: a slow or blocked read answers
``503`` after it instead of holding a worker (and the clients queued behind it).

The server takes it from ``CALIB_API_TIMEOUT`` (seconds; what ``calib serve --timeout`` sets
for its workers), else :data:`DEFAULT_TIMEOUT`. On PostgreSQL it is each session's
``statement_timeout``; on SQLite, how long an approval waits for the write lock.
"""

from __future__ import annotations

import math
import os

from calib.errors import SettingError

TIMEOUT_ENV = "CALIB_API_TIMEOUT"
DEFAULT_TIMEOUT = 5.0
"""Seconds: far above a served read (one indexed statement, well under a millisecond on a
warm store) and below the patience of a pricer polling for its set (common practice)."""


def check_timeout(value: object, source: str) -> float:
    """``value`` as seconds if it is a finite number above zero (else :class:`SettingError`)."""
    try:
        seconds = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        seconds = math.nan
    if isinstance(value, bool) or not (math.isfinite(seconds) and seconds > 0):
        raise SettingError(source, value, "must be a number of seconds above zero")
    return seconds


def timeout_from_env() -> float:
    """The statement timeout from ``CALIB_API_TIMEOUT``, else :data:`DEFAULT_TIMEOUT`."""
    text = os.environ.get(TIMEOUT_ENV)
    return DEFAULT_TIMEOUT if not text else check_timeout(text.strip(), f"${TIMEOUT_ENV}")
