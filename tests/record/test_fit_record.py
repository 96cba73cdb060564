"""The stored-fit contract: one encoder and decoder, the earlier layout still reads."""

from __future__ import annotations

import dataclasses
import json
import math
from datetime import UTC, date, datetime

import pytest

from bench.serve_seed import PARAMS
from calib.record.codec import decode, encode
from calib.record.fit import (
    SCHEMA_VERSION,
    BucketVols,
    ConstraintReport,
    Dropped,
    FitRecord,
    Gate,
    fit_from_columns,
    fit_from_json,
    fit_to_columns,
)

FRONT = PARAMS.with_vols(0.32, 0.21, 0.71)


def record() -> FitRecord:
    return FitRecord(
        params=FRONT,
        buckets=(BucketVols(0.0, 0.25, FRONT), BucketVols(0.25, 1.5, PARAMS)),
        rmse=0.0123,
        max_error=0.05,
        error_measure="price",
        objective=2.5e-4,
        fit=2.4e-4,
        solver="CLARABEL",
        status="optimal_inaccurate",
        iterations=4,
        converged=False,
        flags=("inaccurate", "not_converged"),
        warnings=("the solver reported an inaccurate solution",),
        n_quotes=42,
        constraints=(
            ConstraintReport("psd", "|rho| <= 1", 0, 0.29, False, 0.0, None),
            ConstraintReport("decay_bound", "s2 <= rho kappa s1", 1, 0.0, True, 1e-3, 2e-5),
        ),
        dropped=(Dropped(17, "premium below intrinsic value"),),
        gates=(
            Gate("solver_optimal", "CLARABEL: optimal_inaccurate", "optimal", False, ""),
            Gate("rmse_vol", 0.4, 1.0, True, "vol points"),
            Gate("jump_rho", None, 0.2, True, "no approved set yet"),
        ),
    )


def test_round_trip_through_json_text_is_exact() -> None:
    original = record()
    text = json.dumps(encode(original), allow_nan=False)
    assert fit_from_json(json.loads(text)) == original
    params, buckets, diagnostics = fit_to_columns(original)
    assert diagnostics["schema_version"] == SCHEMA_VERSION and "params" not in diagnostics
    assert fit_from_columns(params, json.loads(json.dumps(buckets)), diagnostics) == original


def test_derived_keys_are_shown_not_stored() -> None:
    shown = record().to_dict()
    assert shown["binding"] == ["decay_bound@1"] and shown["all_gates_pass"] is False
    _, _, stored = fit_to_columns(record())
    assert "binding" not in stored and "all_gates_pass" not in stored


# What the morning run stored before the record existed (version 1: no schema_version, the
# derived keys stored, gate values possibly NaN); copied from a run written by that code.
V1_DIAGNOSTICS = {
    "rmse": 0.0123,
    "max_error": 0.05,
    "error_measure": "price",
    "objective": 2.5e-4,
    "fit": 2.4e-4,
    "constraints": [
        {
            "name": "psd",
            "form": "|rho| <= 1",
            "bucket": 0,
            "slack": 0.29,
            "binds": False,
            "dual": 0.0,
            "refit_cost": None,
        },
        {
            "name": "decay_bound",
            "form": "s2 <= rho kappa s1",
            "bucket": 1,
            "slack": 0.0,
            "binds": True,
            "dual": 1e-3,
            "refit_cost": 2e-5,
        },
    ],
    "binding": ["decay_bound@1"],
    "solver": "CLARABEL",
    "status": "optimal_inaccurate",
    "iterations": 4,
    "converged": False,
    "flags": ["inaccurate", "not_converged"],
    "warnings": ["the solver reported an inaccurate solution"],
    "n_quotes": 42,
    "dropped": [{"quote_id": 17, "reason": "premium below intrinsic value"}],
    "gates": [
        {
            "name": "solver_optimal",
            "value": "CLARABEL: optimal_inaccurate",
            "limit": "optimal",
            "passed": False,
            "detail": "",
        },
        {"name": "rmse_vol", "value": 0.4, "limit": 1.0, "passed": True, "detail": "vol points"},
        {
            "name": "jump_rho",
            "value": None,
            "limit": 0.2,
            "passed": True,
            "detail": "no approved set yet",
        },
    ],
    "all_gates_pass": False,
}
V1_BUCKETS = [
    {"start": 0.0, "end": 0.25, "params": FRONT.to_dict()},
    {"start": 0.25, "end": 1.5, "params": PARAMS.to_dict()},
]


def test_version_1_layout_decodes_to_the_same_record() -> None:
    old = fit_from_columns(FRONT, V1_BUCKETS, V1_DIAGNOSTICS)
    assert old == dataclasses.replace(record(), schema_version=SCHEMA_VERSION)


def test_a_nan_gate_value_of_version_1_reads_as_unmeasured() -> None:
    nan_gate = {**V1_DIAGNOSTICS, "gates": [{**V1_DIAGNOSTICS["gates"][1], "value": math.nan}]}  # type: ignore[dict-item]
    (gate,) = fit_from_columns(FRONT, V1_BUCKETS, nan_gate).gates
    assert isinstance(gate.value, float) and math.isnan(gate.value)


@dataclasses.dataclass(frozen=True, slots=True)
class _Grown:
    """A record that gained fields after rows were stored."""

    when: datetime
    day: date
    values: tuple[float, ...]
    note: str = "none"
    spread: float | None = None


def test_a_field_added_with_a_default_needs_no_codec_change() -> None:
    old_row = {"when": "2031-01-06T07:00:00+00:00", "day": "2031-01-06", "values": [1, 2.5]}
    grown = decode(_Grown, {**old_row, "written_by_a_newer_version": 1})
    assert grown == _Grown(datetime(2031, 1, 6, 7, tzinfo=UTC), date(2031, 1, 6), (1.0, 2.5))
    assert decode(_Grown, encode(grown)) == grown


def test_a_row_that_does_not_fit_is_refused_with_the_field() -> None:
    with pytest.raises(ValueError, match="missing 'rmse'"):
        fit_from_json({"params": PARAMS.to_dict(), "buckets": []})
    bad = {**V1_DIAGNOSTICS, "n_quotes": "many"}
    with pytest.raises(TypeError, match=r"FitRecord\.n_quotes"):
        fit_from_columns(FRONT, V1_BUCKETS, bad)
