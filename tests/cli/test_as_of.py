"""The one ``as_of`` parser (CLI ``--as-of``, HTTP ``as_of``): ISO forms only, UTC unless a
zone is given, a bare number refused rather than read as a Unix time (issue 19, point 14)."""

from __future__ import annotations

from datetime import UTC, datetime

import pytest

from calib.as_of import parse_as_of
from calib.errors import AsOfError, InputError


@pytest.mark.parametrize(
    ("text", "moment"),
    [
        ("2033-06-01", datetime(2033, 6, 1, tzinfo=UTC)),
        ("2033-06-01T17:00", datetime(2033, 6, 1, 17, tzinfo=UTC)),
        ("2033-06-01 17:00:05.5", datetime(2033, 6, 1, 17, 0, 5, 500000, tzinfo=UTC)),
        ("2033-06-01T17:00:00Z", datetime(2033, 6, 1, 17, tzinfo=UTC)),
        ("2033-06-01T17:00+02:00", datetime(2033, 6, 1, 15, tzinfo=UTC)),
        (" 2033-06-01T17:00:00-0130 ", datetime(2033, 6, 1, 18, 30, tzinfo=UTC)),
    ],
)
def test_accepted_forms_give_utc(text: str, moment: datetime) -> None:
    parsed = parse_as_of(text)
    assert parsed == moment and parsed.utcoffset() is not None and parsed.tzinfo == UTC


@pytest.mark.parametrize(
    ("text", "reason"),
    [
        ("20330601", "not an ISO date"),  # never 1970-08-24 (seconds since the epoch)
        ("1780272000", "not an ISO date"),
        ("yesterday", "not an ISO date"),
        ("06/01/2033", "not an ISO date"),
        ("2033-02-30", "day is out of range"),
        ("2033-06-01T25:00", "hour must be in"),
        ("9999-12-31T23:00-05:00", "outside the dates"),
        ("0001-01-01T00:30+01:00", "outside the dates"),
        ("", "not an ISO date"),
    ],
)
def test_refusals_are_input_errors_with_a_reason(text: str, reason: str) -> None:
    with pytest.raises(AsOfError, match=reason) as refused:
        parse_as_of(text)
    assert isinstance(refused.value, InputError) and refused.value.value == text
