"""calib.errors: one template mechanism; messages, attributes and pickling (worker processes
send errors back to the parent) come from the fields."""

from __future__ import annotations

import pickle
from dataclasses import fields
from string import Formatter

import pytest

from calib import errors
from calib.errors import (
    EstimateFileError,
    FileError,
    IllegalTransitionError,
    IngestFileError,
    InputError,
    SettingsFileError,
    TemplatedError,
    TooFewQuotesError,
    UnknownCommodityError,
)


def test_message_and_attributes_come_from_the_fields() -> None:
    exc = TooFewQuotesError(3, 10, "constant", 5, {"no implied volatility": 2})
    assert str(exc) == (
        "only 3 usable option quote(s) of 10, constant mode needs at least 5; "
        "dropped: no implied volatility (2)"
    )
    assert (exc.usable, exc.needed, exc.dropped) == (3, 5, {"no implied volatility": 2})
    assert str(IllegalTransitionError(4, "rejected", "approved", [])) == (
        "run 4 is rejected: it cannot become approved (allowed: none, it is final)"
    )
    assert str(UnknownCommodityError(["QLX", "QLY"])) == "unknown commodity 'QLX', 'QLY'"


@pytest.mark.parametrize("kind", [IngestFileError, EstimateFileError, SettingsFileError])
def test_the_file_errors_share_one_form(kind: type[FileError]) -> None:
    exc = kind("a.csv", "no such file")
    assert str(exc) == "a.csv: no such file" and isinstance(exc, FileError | InputError)
    assert (exc.file, exc.reason) == ("a.csv", "no such file")


def test_errors_survive_a_trip_to_another_process() -> None:
    exc = TooFewQuotesError(3, 10, "constant", 5, {"x": 1})
    back = pickle.loads(pickle.dumps(exc))
    assert type(back) is TooFewQuotesError and str(back) == str(exc) and back.dropped == {"x": 1}


def test_every_template_names_only_fields() -> None:
    kinds = [
        v
        for v in vars(errors).values()
        if isinstance(v, type) and issubclass(v, TemplatedError) and v is not TemplatedError
    ]
    assert len(kinds) > 30
    for kind in kinds:
        named = {name for _, name, _, _ in Formatter().parse(kind.TEMPLATE) if name}
        assert named and named <= {f.name for f in fields(kind)}, kind.__name__
