"""Tables of historical estimates, calibration runs and their approval events.

Every row here is written once and never updated or deleted.

* ``historical_estimates``: one Kalman-filter estimate (or an imported one) per row: the
  commodity, window, size of the data, log-likelihood, convergence flag and message, the seven
  parameters as columns named like :class:`~calib.model.twofactor.TwoFactorParams`, standard
  errors and noise sds (JSON), inputs (quote batch and row ids, JSON) with their sha256, the
  settings used and the code version. ``estimate_states`` holds its filtered and smoothed
  (log spot, convenience yield) per trade date.
* ``calibration_runs``: one morning fit per row: commodity, trade date, the estimate it held
  fixed, mode and settings, inputs (ids of the quote rows and batches used) with their
  sha256, outcome ``fitted`` or ``failed`` (with the reason), the seven parameters (NULL when
  failed), forward buckets, diagnostics (fit quality, constraints, solver, gates) and code
  version; ``study`` names the policy study of a run that may never be approved or served
  (NULL: a production run). ``run_residuals`` holds one row per fitted quote, keyed to
  ``option_quotes``.
* ``run_events``: the status history, append-only: ``candidate``, then ``approved`` or
  ``rejected``; an approved run becomes ``superseded`` when a newer run of the same commodity
  is approved (both events in one transaction). A run's status at time ``t`` is its newest
  event at or before ``t``. Each status is entered at most once per run (unique
  ``(run_id, to_status)``), which also stops two writers approving the same run twice.

"Latest approved set of commodity C as of t" is the newest ``approved`` event of C at or
before t, one seek on ``ix_run_events_commodity_id`` = ``(commodity_id, to_status, at, id)``::

    SELECT run_id FROM run_events
    WHERE commodity_id = :c AND to_status = 'approved' AND at <= :t
    ORDER BY at DESC, id DESC LIMIT 1

(On SQLite ``at`` is naive UTC text ``YYYY-MM-DD HH:MM:SS.ffffff``, see
:class:`~calib.store.base.UtcDateTime`; a raw query must bind ``:t`` in that form.)
"""

from __future__ import annotations

from datetime import date, datetime
from typing import Any

from sqlalchemy import (
    JSON,
    Boolean,
    CheckConstraint,
    Date,
    Float,
    ForeignKey,
    Index,
    Integer,
    String,
    Text,
    UniqueConstraint,
)
from sqlalchemy.orm import Mapped, mapped_column

from calib.model.twofactor import PARAM_NAMES
from calib.store.base import Base, UtcDateTime, in_check

ESTIMATE_SOURCES = ("kalman", "imported")
"""``kalman``: estimated here from stored futures; ``imported``: registered from a file."""

RUN_OUTCOMES = ("fitted", "failed")
"""``fitted``: parameters stored; ``failed``: the calibration raised, its reason stored."""

RUN_STATUSES = ("candidate", "approved", "rejected", "superseded")
"""What a run's events move it to (see :data:`calib.store.runs.TRANSITIONS`)."""

PARAM_COLUMNS = PARAM_NAMES
"""The seven parameter columns, named and ordered as ``TwoFactorParams``."""


class HistoricalEstimate(Base):
    """A maximum-likelihood (or imported) estimate of the two-factor model for one commodity."""

    __tablename__ = "historical_estimates"
    __table_args__ = (
        CheckConstraint(in_check("source", ESTIMATE_SOURCES), name="source"),
        Index(None, "commodity_id", "converged", "id"),
    )

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    commodity_id: Mapped[int] = mapped_column(ForeignKey("commodities.id"))
    created_at: Mapped[datetime] = mapped_column(UtcDateTime())
    created_by: Mapped[str] = mapped_column(String(128))
    source: Mapped[str] = mapped_column(String(16))
    window_start: Mapped[date] = mapped_column(Date)
    window_end: Mapped[date] = mapped_column(Date)
    n_contracts: Mapped[int | None] = mapped_column(Integer)
    n_days: Mapped[int | None] = mapped_column(Integer)
    n_obs: Mapped[int | None] = mapped_column(Integer)
    loglik: Mapped[float | None] = mapped_column(Float)
    rate: Mapped[float | None] = mapped_column(Float)
    """The constant interest rate the likelihood used (NULL when imported)."""
    converged: Mapped[bool] = mapped_column(Boolean)
    message: Mapped[str] = mapped_column(Text)
    mu: Mapped[float] = mapped_column(Float)
    kappa: Mapped[float] = mapped_column(Float)
    alpha: Mapped[float] = mapped_column(Float)
    lam: Mapped[float] = mapped_column(Float)
    sigma_spot: Mapped[float] = mapped_column(Float)
    sigma_yield: Mapped[float] = mapped_column(Float)
    rho: Mapped[float] = mapped_column(Float)
    std_errors: Mapped[dict[str, Any]] = mapped_column(JSON)
    """Standard error by name (``mu``.. ``rho``, ``xi_1``..); NULL (JSON null) where unknown."""
    noise_sd: Mapped[list[float]] = mapped_column(JSON)
    inputs: Mapped[dict[str, Any]] = mapped_column(JSON)
    """``{"batch_ids": [...], "futures_rows": [...]}`` (imported: ``{"file": ..., ...}``)."""
    inputs_sha256: Mapped[str] = mapped_column(String(64))
    settings: Mapped[dict[str, Any]] = mapped_column(JSON)
    code_version: Mapped[str] = mapped_column(String(64))
    series_id: Mapped[int | None] = mapped_column(ForeignKey("rolling_series.id"), index=True)
    """The rolling series the estimate is one window of (NULL: a single estimate)."""
    covariance: Mapped[list[list[float | None]] | None] = mapped_column(JSON)
    """Asymptotic covariance of (``mu``.. ``rho``, ``xi_1``..), rows in that order (NULL if
    unknown: imported, or stored before covariances were kept)."""


class RollingSeries(Base):
    """A rolling re-estimation: one estimate per window end, all with the same settings."""

    __tablename__ = "rolling_series"
    __table_args__ = (UniqueConstraint("commodity_id", "settings_sha256"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    commodity_id: Mapped[int] = mapped_column(ForeignKey("commodities.id"))
    created_at: Mapped[datetime] = mapped_column(UtcDateTime())
    created_by: Mapped[str] = mapped_column(String(128))
    window_length: Mapped[str] = mapped_column(String(16))
    """Length of each window, e.g. ``2y``."""
    step: Mapped[str] = mapped_column(String(16))
    """Between consecutive window ends, e.g. ``1m``."""
    first_end: Mapped[date] = mapped_column(Date)
    last_end: Mapped[date] = mapped_column(Date)
    settings: Mapped[dict[str, Any]] = mapped_column(JSON)
    settings_sha256: Mapped[str] = mapped_column(String(64))


class EstimateState(Base):
    """Filtered and smoothed (log spot, convenience yield) of an estimate on one trade date."""

    __tablename__ = "estimate_states"

    estimate_id: Mapped[int] = mapped_column(
        ForeignKey("historical_estimates.id"), primary_key=True
    )
    trade_date: Mapped[date] = mapped_column(Date, primary_key=True)
    log_spot_filtered: Mapped[float] = mapped_column(Float)
    yield_filtered: Mapped[float] = mapped_column(Float)
    log_spot_smoothed: Mapped[float] = mapped_column(Float)
    yield_smoothed: Mapped[float] = mapped_column(Float)


class CalibrationRun(Base):
    """One calibration of one commodity on one trade date; immutable."""

    __tablename__ = "calibration_runs"
    __table_args__ = (
        CheckConstraint(in_check("outcome", RUN_OUTCOMES), name="outcome"),
        CheckConstraint(
            "outcome = 'failed' OR ("
            + " AND ".join(f"{c} IS NOT NULL" for c in PARAM_COLUMNS)
            + ")",
            name="params_when_fitted",
        ),
        CheckConstraint(
            "outcome = 'fitted' OR failure_reason IS NOT NULL", name="reason_when_failed"
        ),
        Index(None, "commodity_id", "trade_date"),
    )

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    commodity_id: Mapped[int] = mapped_column(ForeignKey("commodities.id"))
    trade_date: Mapped[date] = mapped_column(Date)
    created_at: Mapped[datetime] = mapped_column(UtcDateTime())
    created_by: Mapped[str] = mapped_column(String(128))
    estimate_id: Mapped[int] = mapped_column(ForeignKey("historical_estimates.id"))
    mode: Mapped[str] = mapped_column(String(16))
    settings: Mapped[dict[str, Any]] = mapped_column(JSON)
    """``{"calibration": CalibrationSettings.to_dict(), "gates": GateLimits.to_dict()}``."""
    inputs: Mapped[dict[str, Any]] = mapped_column(JSON)
    """Ids of the rows used: ``futures_rows``, ``option_rows``, ``rate_rows``, ``batch_ids``."""
    inputs_sha256: Mapped[str] = mapped_column(String(64))
    outcome: Mapped[str] = mapped_column(String(16))
    failure_reason: Mapped[str | None] = mapped_column(Text)
    mu: Mapped[float | None] = mapped_column(Float)
    kappa: Mapped[float | None] = mapped_column(Float)
    alpha: Mapped[float | None] = mapped_column(Float)
    lam: Mapped[float | None] = mapped_column(Float)
    sigma_spot: Mapped[float | None] = mapped_column(Float)
    sigma_yield: Mapped[float | None] = mapped_column(Float)
    rho: Mapped[float | None] = mapped_column(Float)
    buckets: Mapped[list[dict[str, Any]] | None] = mapped_column(JSON)
    """``[{"start", "end", "params": {...}}]`` in years from the trade date (NULL when failed)."""
    diagnostics: Mapped[dict[str, Any]] = mapped_column(JSON)
    """The rest of the stored-fit record (:class:`calib.record.fit.FitRecord`, with its
    ``schema_version``); ``{"failure": reason}`` for a failed run."""
    code_version: Mapped[str] = mapped_column(String(64))
    study: Mapped[str | None] = mapped_column(String(64))
    """The policy study the run belongs to (``calib hedge policies``); NULL for a production
    run. A study run is never approved or served."""


class RunResidual(Base):
    """How one option quote was fitted by a run (model minus market)."""

    __tablename__ = "run_residuals"

    run_id: Mapped[int] = mapped_column(ForeignKey("calibration_runs.id"), primary_key=True)
    quote_id: Mapped[int] = mapped_column(ForeignKey("option_quotes.id"), primary_key=True)
    market_price: Mapped[float] = mapped_column(Float)
    model_price: Mapped[float] = mapped_column(Float)
    market_vol: Mapped[float] = mapped_column(Float)
    model_vol: Mapped[float] = mapped_column(Float)
    price_residual: Mapped[float] = mapped_column(Float)
    vol_residual: Mapped[float] = mapped_column(Float)
    weight: Mapped[float] = mapped_column(Float)


class RunEvent(Base):
    """A status change of a run: who moved it where, when and why (append-only)."""

    __tablename__ = "run_events"
    __table_args__ = (
        CheckConstraint(in_check("to_status", RUN_STATUSES), name="to_status"),
        UniqueConstraint("run_id", "to_status"),
        Index(None, "commodity_id", "to_status", "at", "id"),
    )

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    run_id: Mapped[int] = mapped_column(ForeignKey("calibration_runs.id"))
    commodity_id: Mapped[int] = mapped_column(ForeignKey("commodities.id"))
    """The run's commodity, repeated so the latest-approved query needs no join."""
    to_status: Mapped[str] = mapped_column(String(16))
    at: Mapped[datetime] = mapped_column(UtcDateTime())
    by: Mapped[str] = mapped_column("actor", String(128))
    """Who moved the run (column ``actor``)."""
    note: Mapped[str] = mapped_column(Text)
