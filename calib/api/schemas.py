"""The shapes of the HTTP API's bodies, for its OpenAPI schema and for parsing requests.

Responses are rendered by the routes themselves (plain JSON of the records' ``to_dict``); these
models document them. The seven parameter names of
:class:`~calib.model.twofactor.TwoFactorParams` are stable top-level keys.
"""

from __future__ import annotations

from typing import Any

from pydantic import BaseModel, Field


class Parameters(BaseModel):
    """The seven parameters of the two-factor model."""

    mu: float = Field(description="Real-world drift of the spot price, per year.")
    kappa: float = Field(description="Mean-reversion speed of the convenience yield, per year.")
    alpha: float = Field(description="Real-world long-run convenience yield.")
    lam: float = Field(description="Market price of convenience-yield risk.")
    sigma_spot: float = Field(description="Volatility of the spot price.")
    sigma_yield: float = Field(description="Volatility of the convenience yield.")
    rho: float = Field(description="Correlation of the two Brownian motions.")


class Bucket(BaseModel):
    """Parameters in force over one stretch of time (years from the trade date)."""

    start: float
    end: float
    params: Parameters


class ApprovedSetBody(Parameters):
    """The approved parameter set in force: parameters, run and approval."""

    run_id: int
    commodity: str
    trade_date: str = Field(description="ISO date of the trading day fitted.")
    approved_at: str = Field(description="ISO time (UTC) of the approval.")
    approved_by: str
    note: str
    approval_id: int = Field(description="Id of the approval event.")
    mode: str = Field(description="Calibration mode: constant, forward or held_rho.")
    buckets: list[Bucket]


class ApprovalBody(Parameters):
    """One approval of a commodity's history."""

    run_id: int
    trade_date: str
    approved_at: str
    approved_by: str
    note: str
    superseded_at: str | None = Field(description="When a later approval replaced it.")


class EventBody(BaseModel):
    """One status change of a run."""

    event_id: int
    run_id: int
    to_status: str
    at: str
    by: str
    note: str


class RunBody(BaseModel):
    """A stored calibration run with its status (parameters null when the fit failed)."""

    run_id: int
    commodity: str
    trade_date: str
    status: str = Field(description="candidate, approved, rejected or superseded.")
    outcome: str = Field(description="fitted or failed.")
    mu: float | None
    kappa: float | None
    alpha: float | None
    lam: float | None
    sigma_spot: float | None
    sigma_yield: float | None
    rho: float | None
    failure_reason: str | None
    estimate_id: int
    mode: str
    buckets: list[dict[str, Any]]
    diagnostics: dict[str, Any]
    settings: dict[str, Any]
    inputs_sha256: str
    created_at: str
    created_by: str
    code_version: str
    approved_at: str | None
    approved_by: str | None
    approval_note: str | None
    events: list[EventBody]


class ApprovedBody(RunBody):
    """The run just approved, and the run it superseded."""

    superseded_run_id: int | None


class ApproveRequest(BaseModel):
    """Who approves a run, and why (recorded on the approval event)."""

    by: str = Field(min_length=1, max_length=128)
    note: str = Field(min_length=1)


class ErrorBody(BaseModel):
    """What went wrong, in one line."""

    detail: str
