"""What a stored run looks like to its readers: run, status events, approvals, the set in force.

Frozen records with plain values, built by the store (:mod:`calib.store.runs`) and by the
fast SQLite reads of the CLI (:mod:`calib.store.fast_read`) from the same columns; neither
numpy nor SQLAlchemy is imported here.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import date, datetime
from types import MappingProxyType
from typing import Any

from calib.model.params import PARAM_NAMES, TwoFactorParams
from calib.record.codec import Encoded, encode
from calib.record.fit import BucketVols, FitRecord, fit_from_columns


@dataclass(frozen=True, slots=True)
class EventRecord(Encoded):
    """One status change of a run: to what, when, by whom and why."""

    event_id: int
    run_id: int
    to_status: str
    at: datetime
    by: str
    note: str


@dataclass(frozen=True, slots=True)
class RunRecord:
    """A stored calibration run with its status at a time (read-only).

    ``fit`` is the stored-fit record (:class:`~calib.record.fit.FitRecord`), ``None`` for a
    failed run. ``status`` is the status at the time the record was read for (``as_of``,
    default now); ``approved_at`` / ``approved_by`` / ``approval_note`` / ``approval_id``
    come from its ``approved`` event if it had one by then.
    """

    run_id: int
    commodity: str
    trade_date: date
    status: str
    outcome: str
    fit: FitRecord | None
    settings: Mapping[str, Any]
    inputs: Mapping[str, Any] = field(repr=False)
    inputs_sha256: str
    estimate_id: int
    mode: str
    failure_reason: str | None
    created_at: datetime
    created_by: str
    code_version: str
    approved_at: datetime | None
    approved_by: str | None
    approval_note: str | None
    approval_id: int | None
    events: tuple[EventRecord, ...]
    study: str | None = None
    """The policy study the run belongs to (``None``: a production run); a study run is
    never approved or served."""

    @property
    def params(self) -> TwoFactorParams | None:
        """The parameter set (``None`` for a failed run)."""
        return None if self.fit is None else self.fit.params

    @property
    def buckets(self) -> tuple[BucketVols, ...]:
        """The forward buckets (empty for a failed run)."""
        return () if self.fit is None else self.fit.buckets

    def to_dict(self, *, with_inputs: bool = False) -> dict[str, Any]:
        """Plain values for JSON: the seven parameter names at the top level (null if failed),
        ``buckets`` and ``diagnostics`` (the rest of the fit record; ``{"failure": reason}``
        for a failed run)."""
        diagnostics: dict[str, Any]
        if self.fit is None:
            params: dict[str, Any] = dict.fromkeys(PARAM_NAMES)
            buckets: list[Any] = []
            diagnostics = {"failure": self.failure_reason}
        else:
            params = self.fit.params.to_dict()
            diagnostics = self.fit.to_dict()
            buckets = diagnostics.pop("buckets")
            del diagnostics["params"]
        out: dict[str, Any] = {
            "run_id": self.run_id,
            "commodity": self.commodity,
            "trade_date": self.trade_date.isoformat(),
            "status": self.status,
            "outcome": self.outcome,
            **params,
            "failure_reason": self.failure_reason,
            "estimate_id": self.estimate_id,
            "mode": self.mode,
            "buckets": buckets,
            "diagnostics": diagnostics,
            "settings": dict(self.settings),
            "inputs_sha256": self.inputs_sha256,
            "created_at": self.created_at.isoformat(),
            "created_by": self.created_by,
            "code_version": self.code_version,
            "approved_at": None if self.approved_at is None else self.approved_at.isoformat(),
            "approved_by": self.approved_by,
            "approval_note": self.approval_note,
            "approval_id": self.approval_id,
            "events": [e.to_dict() for e in self.events],
            "study": self.study,
        }
        if with_inputs:
            out["inputs"] = dict(self.inputs)
        return out


@dataclass(frozen=True, slots=True)
class ApprovalRecord:
    """One approval of a commodity's history: the set, who approved it, and until when."""

    run_id: int
    trade_date: date
    params: TwoFactorParams
    approved_at: datetime
    approved_by: str
    approval_note: str
    approval_id: int
    superseded_at: datetime | None
    """When a later approval replaced it (``None``: still in force)."""

    def to_dict(self) -> dict[str, Any]:
        """Plain values for JSON: the seven parameter names at the top level."""
        return flat_params(encode(self))


@dataclass(frozen=True, slots=True)
class ApprovedSet:
    """An approved parameter set of one commodity, as a pricer uses it (read-only).

    Attributes
    ----------
    run_id : the calibration run the set comes from.
    commodity : commodity code.
    trade_date : the trading day the run was fitted to.
    approved_at, approved_by, approval_note : the approval event (UTC time, who, why).
    approval_id : the approval event's id (changes whenever another set comes into force).
    mode : calibration mode (``constant``, ``forward``, ``held_rho``).
    params : the parameter set (in forward mode the first bucket's volatilities).
    buckets : the forward buckets, in years from the trade date (one in constant mode).
    """

    run_id: int
    commodity: str
    trade_date: date
    approved_at: datetime
    approved_by: str
    approval_note: str
    approval_id: int
    mode: str
    params: TwoFactorParams
    buckets: tuple[BucketVols, ...]

    def to_dict(self) -> dict[str, Any]:
        """Plain values for JSON: the seven parameter names at the top level."""
        return flat_params(encode(self))


def flat_params(data: dict[str, Any]) -> dict[str, Any]:
    """``data`` with its ``params`` object spread into the top level (the stable keys)."""
    out: dict[str, Any] = {}
    for key, value in data.items():
        if key == "params":
            out.update(value)
        else:
            out[key] = value
    return out


RUN_COLUMNS: tuple[str, ...] = (
    "id",
    "trade_date",
    "outcome",
    "failure_reason",
    *PARAM_NAMES,
    "buckets",
    "diagnostics",
    "settings",
    "inputs",
    "inputs_sha256",
    "estimate_id",
    "mode",
    "created_at",
    "created_by",
    "code_version",
    "study",
)
"""The columns of ``calibration_runs`` a :class:`RunRecord` is built from (:func:`run_record`)."""

EVENT_COLUMNS = ("id", "run_id", "to_status", "at", "actor", "note")
"""The columns of ``run_events`` an :class:`EventRecord` is built from, in its fields' order."""


def run_record(
    values: Mapping[str, Any], commodity: str, events: Sequence[EventRecord]
) -> RunRecord:
    """The :class:`RunRecord` of a run row (``values`` by :data:`RUN_COLUMNS`, typed: dates,
    aware UTC times, decoded JSON) and its events up to the time asked for, oldest first."""
    v = values
    fit = None
    if v["outcome"] == "fitted":
        params = TwoFactorParams(**{name: v[name] for name in PARAM_NAMES})
        fit = fit_from_columns(params, v["buckets"], v["diagnostics"])
    approved = next((e for e in events if e.to_status == "approved"), None)
    return RunRecord(
        run_id=v["id"],
        commodity=commodity,
        trade_date=v["trade_date"],
        status=events[-1].to_status if events else "unknown",
        outcome=v["outcome"],
        fit=fit,
        settings=MappingProxyType(v["settings"]),
        inputs=MappingProxyType(v["inputs"]),
        inputs_sha256=v["inputs_sha256"],
        estimate_id=v["estimate_id"],
        mode=v["mode"],
        failure_reason=v["failure_reason"],
        created_at=v["created_at"],
        created_by=v["created_by"],
        code_version=v["code_version"],
        approved_at=None if approved is None else approved.at,
        approved_by=None if approved is None else approved.by,
        approval_note=None if approved is None else approved.note,
        approval_id=None if approved is None else approved.event_id,
        events=tuple(events),
        study=v["study"],
    )
