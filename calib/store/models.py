"""The quote store's tables.

Quotes are stored as they arrived and never updated: each file becomes one
:class:`IngestBatch`; its good rows land in the quote tables, its bad rows in
:class:`QuarantinedRow`. A correction is a later batch carrying new values for the same keys;
readers pick, per key, the row of the latest batch received at or before their ``as_of`` time
(see :mod:`calib.store.quotes`).

The unique constraint of each quote table starts with ``(commodity_id, trade_date)``, so
"every quote of commodity C on day D" is one seek on that index; it also forbids two rows
with the same key inside one batch.
"""

from __future__ import annotations

from datetime import date, datetime

from sqlalchemy import (
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

from calib.store.base import (
    CODE_CHARS,
    CURRENCY_CHARS,
    NAME_CHARS,
    UNIT_CHARS,
    USER_CHARS,
    Base,
    UtcDateTime,
    in_check,
)
from calib.types import EXERCISE_STYLES

BATCH_KINDS = ("futures", "options", "rates")
"""What an ingest batch holds; one file is one kind."""

BATCH_STATUSES = ("loaded", "rejected")
"""``loaded``: good rows stored (bad ones quarantined); ``rejected``: ``--strict`` refused it."""


class Commodity(Base):
    """A commodity whose futures and options are quoted (code is what files carry)."""

    __tablename__ = "commodities"
    __table_args__ = (CheckConstraint(in_check("exercise", EXERCISE_STYLES), name="exercise"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    code: Mapped[str] = mapped_column(String(CODE_CHARS), unique=True)
    name: Mapped[str] = mapped_column(String(NAME_CHARS))
    unit: Mapped[str] = mapped_column(String(UNIT_CHARS))
    currency: Mapped[str] = mapped_column(String(CURRENCY_CHARS))
    calendar_rule: Mapped[str] = mapped_column(Text)
    """Free text naming the contract calendar (e.g. ``monthly``); read by people, not code."""
    exercise: Mapped[str] = mapped_column(String(8), server_default="european")
    """The style of its options where an options file does not say (``european``/``american``)."""


class IngestBatch(Base):
    """One received file: what it was, who sent it, when, and how many rows landed."""

    __tablename__ = "ingest_batches"
    __table_args__ = (
        CheckConstraint(in_check("kind", BATCH_KINDS), name="kind"),
        CheckConstraint(in_check("status", BATCH_STATUSES), name="status"),
        CheckConstraint("rows_read = rows_accepted + rows_rejected", name="row_counts"),
        Index(None, "sha256"),
        Index(None, "received_at"),
    )

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    kind: Mapped[str] = mapped_column(String(16))
    status: Mapped[str] = mapped_column(String(16))
    file_name: Mapped[str] = mapped_column(Text)
    sha256: Mapped[str] = mapped_column(String(64))
    rows_read: Mapped[int] = mapped_column(Integer)
    rows_accepted: Mapped[int] = mapped_column(Integer)
    rows_rejected: Mapped[int] = mapped_column(Integer)
    received_at: Mapped[datetime] = mapped_column(UtcDateTime())
    received_by: Mapped[str] = mapped_column(String(USER_CHARS))


class FuturesSettlement(Base):
    """A futures contract's settlement price on one trading day."""

    __tablename__ = "futures_settlements"
    __table_args__ = (UniqueConstraint("commodity_id", "trade_date", "delivery", "batch_id"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    batch_id: Mapped[int] = mapped_column(ForeignKey("ingest_batches.id"), index=True)
    commodity_id: Mapped[int] = mapped_column(ForeignKey("commodities.id"))
    trade_date: Mapped[date] = mapped_column(Date)
    delivery: Mapped[date] = mapped_column(Date)
    settle: Mapped[float] = mapped_column(Float)
    line: Mapped[int] = mapped_column(Integer)


class OptionQuote(Base):
    """A settled option on a future: a premium, an implied volatility, or both."""

    __tablename__ = "option_quotes"
    __table_args__ = (
        UniqueConstraint(
            "commodity_id", "trade_date", "delivery", "expiry", "is_call", "strike", "batch_id"
        ),
        CheckConstraint("premium IS NOT NULL OR implied_vol IS NOT NULL", name="price_given"),
        CheckConstraint(in_check("exercise", EXERCISE_STYLES), name="exercise"),
    )

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    batch_id: Mapped[int] = mapped_column(ForeignKey("ingest_batches.id"), index=True)
    commodity_id: Mapped[int] = mapped_column(ForeignKey("commodities.id"))
    trade_date: Mapped[date] = mapped_column(Date)
    delivery: Mapped[date] = mapped_column(Date)
    expiry: Mapped[date] = mapped_column(Date)
    is_call: Mapped[bool] = mapped_column(Boolean)
    strike: Mapped[float] = mapped_column(Float)
    premium: Mapped[float | None] = mapped_column(Float)
    implied_vol: Mapped[float | None] = mapped_column(Float)
    bid: Mapped[float | None] = mapped_column(Float)
    ask: Mapped[float | None] = mapped_column(Float)
    line: Mapped[int] = mapped_column(Integer)
    exercise: Mapped[str] = mapped_column(String(8), server_default="european")
    """``european`` (Black-76) or ``american`` (exercisable any day up to expiry)."""


class RateQuote(Base):
    """A point of the day's zero curve: continuously compounded rate, ACT/365."""

    __tablename__ = "rate_quotes"
    __table_args__ = (UniqueConstraint("trade_date", "maturity", "batch_id"),)

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    batch_id: Mapped[int] = mapped_column(ForeignKey("ingest_batches.id"), index=True)
    trade_date: Mapped[date] = mapped_column(Date)
    maturity: Mapped[date] = mapped_column(Date)
    zero_rate: Mapped[float] = mapped_column(Float)
    line: Mapped[int] = mapped_column(Integer)


class QuarantinedRow(Base):
    """A row that was refused, kept with the first reason found and its raw text."""

    __tablename__ = "quarantined_rows"

    id: Mapped[int] = mapped_column(Integer, primary_key=True)
    batch_id: Mapped[int] = mapped_column(ForeignKey("ingest_batches.id"), index=True)
    line: Mapped[int] = mapped_column(Integer)
    field: Mapped[str] = mapped_column(String(64))
    reason: Mapped[str] = mapped_column(Text)
    raw: Mapped[str] = mapped_column(Text)
