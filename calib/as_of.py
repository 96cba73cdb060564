"""The ``as_of`` moment: a wall-clock time (when something was approved or stored), never a
trade date. One parser for every layer that reads it from text (the CLI's ``--as-of``, the
HTTP API's ``as_of``); standard library only, so any layer may import it.

Accepted: an ISO 8601 date (``2033-06-01``, midnight) or date and time (``2033-06-01T17:00``,
seconds and fractions optional, ``T`` or a space), UTC unless an offset or ``Z`` is given. A
bare number such as ``20330601`` is refused, never read as a Unix time.
"""

from __future__ import annotations

import re
from datetime import UTC, datetime

from calib.errors import AsOfError

AS_OF_HELP = (
    "Wall-clock time (when sets were approved or quotes stored), not a trade date: "
    "ISO date or date-time, UTC unless a zone is given"
)
"""What an ``as_of`` is, for option help and API docs."""

_ISO = re.compile(
    r"\d{4}-\d{2}-\d{2}"
    r"(?:[T ]\d{2}:\d{2}(?::\d{2}(?:\.\d{1,6})?)?(?:Z|[+-]\d{2}:?\d{2})?)?"
)


def parse_as_of(text: str) -> datetime:
    """``text`` as a zone-aware UTC datetime (see the module for the accepted forms).

    Raises
    ------
    AsOfError
        Not one of the accepted forms (a bare number included), not a real date or time, or
        outside the range a datetime holds once moved to UTC.
    """
    value = text.strip()
    if not _ISO.fullmatch(value):
        raise AsOfError(text, "not an ISO date or time (e.g. 2033-06-01 or 2033-06-01T17:00Z)")
    try:
        moment = datetime.fromisoformat(value)
    except ValueError as exc:
        raise AsOfError(text, str(exc)) from None
    if moment.tzinfo is None:
        return moment.replace(tzinfo=UTC)
    try:
        return moment.astimezone(UTC)
    except OverflowError:
        raise AsOfError(text, "outside the dates a time can hold once moved to UTC") from None
