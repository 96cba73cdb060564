"""Historical estimates: the store functions workflows call (sessions handed in, STYLE 13).

An estimate is inserted once with its states and never changed. The calibration holds its
slow parameters at the newest *converged* estimate of the commodity (:func:`latest_estimate`)
unless the user names another; an estimate that did not converge is stored (so the attempt is
on record) but never picked by default, and neither is a window of a rolling series (it is one
point of a stability study, see :mod:`calib.workflows.rolling`).
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from datetime import date, datetime
from types import MappingProxyType
from typing import Any, TypeVar, cast

import pandas as pd
from sqlalchemy import Table, select
from sqlalchemy.orm import Session

from calib.model.twofactor import PARAM_NAMES, TwoFactorParams
from calib.record.codec import Encoded, copy_fields, encode
from calib.record.run import flat_params
from calib.store.models import Commodity
from calib.store.quotes import DateArray, insert_columns, require_commodity
from calib.store.run_models import EstimateState, HistoricalEstimate, RollingSeries
from calib.types import FloatArray

STATE_COLUMNS = ("log_spot_filtered", "yield_filtered", "log_spot_smoothed", "yield_smoothed")

_states = cast(Table, EstimateState.__table__)


@dataclass(frozen=True, slots=True)
class EstimateRecord:
    """A stored historical estimate (read-only); ``std_errors`` values are ``None`` if unknown."""

    estimate_id: int
    commodity: str
    created_at: datetime
    created_by: str
    source: str
    window_start: date
    window_end: date
    n_contracts: int | None
    n_days: int | None
    n_obs: int | None
    loglik: float | None
    rate: float | None
    converged: bool
    message: str
    params: TwoFactorParams
    std_errors: Mapping[str, float | None]
    noise_sd: tuple[float, ...]
    inputs_sha256: str
    settings: Mapping[str, Any]
    code_version: str
    series_id: int | None = None
    covariance: tuple[tuple[float | None, ...], ...] | None = None
    """Asymptotic covariance of ``(mu..rho, xi_1..)`` (``None`` where not stored)."""

    def to_dict(self) -> dict[str, Any]:
        """Plain values for JSON, the seven parameter names at the top level."""
        return flat_params(encode(self))


def _record(row: HistoricalEstimate, code: str) -> EstimateRecord:
    return copy_fields(
        EstimateRecord,
        row,
        estimate_id=row.id,
        commodity=code,
        params=TwoFactorParams(**{n: getattr(row, n) for n in PARAM_NAMES}),
        std_errors=MappingProxyType(dict(row.std_errors)),
        noise_sd=tuple(row.noise_sd),
        settings=MappingProxyType(dict(row.settings)),
        covariance=None
        if row.covariance is None
        else tuple(tuple(None if v is None else float(v) for v in r) for r in row.covariance),
    )


@dataclass(frozen=True, slots=True)
class StatesIn:
    """The states to store with an estimate: (n_days,) dates and four aligned columns."""

    trade_date: DateArray
    log_spot_filtered: FloatArray
    yield_filtered: FloatArray
    log_spot_smoothed: FloatArray
    yield_smoothed: FloatArray


def add_estimate(
    *,
    session: Session,
    commodity_id: int,
    created_at: datetime,
    created_by: str,
    source: str,
    window_start: date,
    window_end: date,
    params: TwoFactorParams,
    converged: bool,
    message: str,
    std_errors: Mapping[str, float | None],
    noise_sd: Sequence[float],
    inputs: Mapping[str, Any],
    inputs_sha256: str,
    settings: Mapping[str, Any],
    code_version: str,
    n_contracts: int | None = None,
    n_days: int | None = None,
    n_obs: int | None = None,
    loglik: float | None = None,
    rate: float | None = None,
    states: StatesIn | None = None,
    series_id: int | None = None,
    covariance: Sequence[Sequence[float | None]] | None = None,
) -> int:
    """Insert an estimate (and its states, in bulk); returns its id."""
    row = HistoricalEstimate(
        commodity_id=commodity_id,
        created_at=created_at,
        created_by=created_by,
        source=source,
        window_start=window_start,
        window_end=window_end,
        n_contracts=n_contracts,
        n_days=n_days,
        n_obs=n_obs,
        loglik=loglik,
        rate=rate,
        converged=converged,
        message=message,
        std_errors=dict(std_errors),
        noise_sd=[float(x) for x in noise_sd],
        inputs=dict(inputs),
        inputs_sha256=inputs_sha256,
        settings=dict(settings),
        code_version=code_version,
        series_id=series_id,
        covariance=None if covariance is None else [list(r) for r in covariance],
        **params.to_dict(),
    )
    session.add(row)
    session.flush()
    if states is not None:
        insert_columns(
            session=session,
            table=_states,
            columns={
                "estimate_id": row.id,
                "trade_date": states.trade_date,
                **{name: getattr(states, name) for name in STATE_COLUMNS},
            },
            count=len(states.trade_date),
        )
    return row.id


def _code(session: Session, commodity_id: int) -> str:
    return session.scalars(select(Commodity.code).where(Commodity.id == commodity_id)).one()


def get_estimate(*, session: Session, estimate_id: int) -> EstimateRecord | None:
    """The estimate ``estimate_id``, or ``None``."""
    return _get(session, HistoricalEstimate, estimate_id, _record)


def list_estimates(*, session: Session, commodity: str) -> list[EstimateRecord]:
    """Every estimate of ``commodity``, newest first."""
    return _newest_first(session, HistoricalEstimate, commodity, _record)


_Row = TypeVar("_Row", HistoricalEstimate, RollingSeries)
_Record = TypeVar("_Record")


def _get(
    session: Session, model: type[_Row], row_id: int, build: Callable[[_Row, str], _Record]
) -> _Record | None:
    """The record of the row ``row_id`` of ``model``, or ``None``."""
    row = session.get(model, row_id)
    return None if row is None else build(row, _code(session, row.commodity_id))


def _newest_first(
    session: Session, model: type[_Row], commodity: str, build: Callable[[_Row, str], _Record]
) -> list[_Record]:
    """The records of every row of ``model`` of ``commodity``, newest first."""
    cid = require_commodity(session=session, code=commodity).id
    stmt = select(model).where(model.commodity_id == cid).order_by(model.id.desc())
    return [build(row, commodity) for row in session.scalars(stmt)]


def latest_estimate(
    *, session: Session, commodity: str, converged_only: bool = True
) -> EstimateRecord | None:
    """The newest single estimate of ``commodity`` (by default the newest converged one), or
    ``None``; the windows of rolling series are never picked here (only when named)."""
    cid = require_commodity(session=session, code=commodity).id
    stmt = select(HistoricalEstimate).where(
        HistoricalEstimate.commodity_id == cid, HistoricalEstimate.series_id.is_(None)
    )
    if converged_only:
        stmt = stmt.where(HistoricalEstimate.converged.is_(True))
    row = session.scalars(stmt.order_by(HistoricalEstimate.id.desc()).limit(1)).one_or_none()
    return None if row is None else _record(row, commodity)


def unconverged_estimate_ids(*, session: Session, commodity: str) -> list[int]:
    """Ids of the commodity's estimates that did not converge, newest first."""
    cid = require_commodity(session=session, code=commodity).id
    stmt = (
        select(HistoricalEstimate.id)
        .where(HistoricalEstimate.commodity_id == cid, HistoricalEstimate.converged.is_(False))
        .order_by(HistoricalEstimate.id.desc())
    )
    return list(session.scalars(stmt))


def estimate_states(*, session: Session, estimate_id: int) -> pd.DataFrame:
    """Columns ``trade_date`` and :data:`STATE_COLUMNS`, by trade date (empty if imported)."""
    stmt = (
        select(_states.c.trade_date, *[_states.c[c] for c in STATE_COLUMNS])
        .where(_states.c.estimate_id == estimate_id)
        .order_by(_states.c.trade_date)
    )
    return pd.DataFrame(session.execute(stmt).all(), columns=["trade_date", *STATE_COLUMNS])


# --- rolling series ----------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class SeriesRecord(Encoded):
    """A stored rolling series (read-only)."""

    series_id: int
    commodity: str
    created_at: datetime
    created_by: str
    window_length: str
    step: str
    first_end: date
    last_end: date
    settings: Mapping[str, Any]
    settings_sha256: str


def _series(row: RollingSeries, code: str) -> SeriesRecord:
    return copy_fields(
        SeriesRecord,
        row,
        series_id=row.id,
        commodity=code,
        settings=MappingProxyType(dict(row.settings)),
    )


def find_series(*, session: Session, commodity: str, settings_sha256: str) -> SeriesRecord | None:
    """The commodity's series with these settings (their sha256), or ``None``."""
    cid = require_commodity(session=session, code=commodity).id
    stmt = select(RollingSeries).where(
        RollingSeries.commodity_id == cid, RollingSeries.settings_sha256 == settings_sha256
    )
    row = session.scalars(stmt).one_or_none()
    return None if row is None else _series(row, commodity)


def add_series(
    *,
    session: Session,
    commodity_id: int,
    created_at: datetime,
    created_by: str,
    window_length: str,
    step: str,
    first_end: date,
    last_end: date,
    settings: Mapping[str, Any],
    settings_sha256: str,
) -> int:
    """Insert a rolling series; returns its id."""
    row = RollingSeries(
        commodity_id=commodity_id,
        created_at=created_at,
        created_by=created_by,
        window_length=window_length,
        step=step,
        first_end=first_end,
        last_end=last_end,
        settings=dict(settings),
        settings_sha256=settings_sha256,
    )
    session.add(row)
    session.flush()
    return row.id


def get_series(*, session: Session, series_id: int) -> SeriesRecord | None:
    """The series ``series_id``, or ``None``."""
    return _get(session, RollingSeries, series_id, _series)


def list_series(*, session: Session, commodity: str) -> list[SeriesRecord]:
    """The commodity's rolling series, newest first."""
    return _newest_first(session, RollingSeries, commodity, _series)


def series_estimates(*, session: Session, series_id: int) -> list[EstimateRecord]:
    """The estimates of a series, by window end (then id)."""
    row = session.get(RollingSeries, series_id)
    if row is None:
        return []
    code = _code(session, row.commodity_id)
    stmt = (
        select(HistoricalEstimate)
        .where(HistoricalEstimate.series_id == series_id)
        .order_by(HistoricalEstimate.window_end, HistoricalEstimate.id)
    )
    return [_record(r, code) for r in session.scalars(stmt)]
