"""Historical estimates as units of work: estimate from stored futures, or import from a file.

Notes
-----
**Interest rate.** The likelihood's futures formula takes one constant rate ``r``. It is the
mean, over the window's trade dates that have a stored zero curve, of each day's shortest
stored zero rate (the short rate of the day); with no curve stored in the window it is 0 and
the estimate's settings say so (``rate_source``).

**Convergence.** An estimate that does not converge is stored with ``converged = False`` and
its message, and is never picked by the calibration unless named (and then refused, see
:func:`calib.workflows.fit.fit_day`).
"""

from __future__ import annotations

import json
import math
from collections.abc import Callable
from dataclasses import dataclass
from datetime import date
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from sqlalchemy.orm import Session, sessionmaker

from calib import errors as msg
from calib.errors import EstimateFileError, NoQuotesError, ParameterError
from calib.estimate import Curves, curves_from_quotes
from calib.estimate.rolling import FitSettings, WindowFit, WindowTask, fit_window
from calib.model.twofactor import PARAM_NAMES, TwoFactorParams
from calib.store.base import utc_now
from calib.store.engine import begin_write
from calib.store.estimates import EstimateRecord, StatesIn, add_estimate, get_estimate
from calib.store.quotes import load_futures_history, require_commodity, zero_curves
from calib.workflows.provenance import code_version, inputs_sha256

Progress = Callable[[str], None]

MIN_DAYS = 250
"""Fewest trading days an estimate accepts by default (about a year; common practice)."""

MIN_DAYS_TO_DELIVERY = 10
"""Contracts closer to delivery than this many days are left out (thin near expiry)."""

IMPORT_KEYS = (*PARAM_NAMES, "window_start", "window_end")
"""Keys an imported estimate file must hold."""

IMPORT_OPTIONAL = ("converged", "message", "std_errors", "noise_sd", "loglik", "note")
"""Keys it may hold besides."""


def _quiet(_: str) -> None:
    return None


def none_if_nan(value: float) -> float | None:
    """``None`` for NaN or infinity (JSON has no such number), else the float."""
    return None if not math.isfinite(value) else float(value)


def window_rate(session: Session, start: date, end: date) -> tuple[float, str, list[int]]:
    """The constant rate for the window: ``(rate, how it was found, zero-curve row ids)``."""
    curves = zero_curves(session=session, start=start, end=end)
    short = [float(c.zero_rate[0]) for c in curves.values() if len(c)]
    if not short:
        return 0.0, "no zero curve stored in the window: r = 0", []
    rows = sorted(int(i) for c in curves.values() for i in c.row_id.tolist())
    how = f"mean of each day's shortest zero rate over {len(short)} day(s)"
    return float(np.mean(short)), how, rows


@dataclass(frozen=True, slots=True, eq=False)
class WindowInputs:
    """One window's curves, rate, inputs (ids) and settings, as an estimate stores them."""

    start: date
    end: date
    curves: Curves
    rate: float
    inputs: dict[str, Any]
    settings: dict[str, Any]

    def task(self, index: int = 0, *, check_cold: bool = False) -> WindowTask:
        """The window as a worker's unit of work (plain arrays)."""
        c = self.curves
        return WindowTask(index, c.dates, c.tau, c.log_price, self.rate, check_cold)


def window_inputs(
    session: Session,
    commodity: str,
    table: pd.DataFrame,
    start: date,
    end: date,
    *,
    n_contracts: int,
    min_days: int,
) -> WindowInputs:
    """The window ``start..end`` of the futures ``table`` (which may cover more days).

    Raises
    ------
    NoQuotesError
        No settlement in the window.
    EstimationDataError
        The settlements do not make curves (see :func:`calib.estimate.curves_from_quotes`).
    """
    days = table["trade_date"].to_numpy().astype("datetime64[D]")
    keep = (days >= np.datetime64(start, "D")) & (days <= np.datetime64(end, "D"))
    part = table[keep]
    if part.empty:
        raise NoQuotesError(commodity, f"no futures settlements stored in {start}..{end}")
    rate, rate_source, rate_rows = window_rate(session, start, end)
    curves = curves_from_quotes(
        part["trade_date"].to_numpy(),
        part["delivery"].to_numpy(),
        part["settle"].to_numpy(),
        n_contracts=n_contracts,
        min_days_to_delivery=MIN_DAYS_TO_DELIVERY,
    )
    inputs = {
        "batch_ids": sorted(set(part["batch_id"].tolist())),
        "futures_rows": sorted(part["row_id"].tolist()),
        "rate_rows": rate_rows,
    }
    settings: dict[str, Any] = {
        "n_contracts": n_contracts,
        "min_days": min_days,
        "min_days_to_delivery": MIN_DAYS_TO_DELIVERY,
        "rate_source": rate_source,
        "start": start.isoformat(),
        "end": end.isoformat(),
    }
    return WindowInputs(start, end, curves, rate, inputs, settings)


def store_window(
    session: Session,
    *,
    commodity_id: int,
    by: str,
    window: WindowInputs,
    result: WindowFit,
    series_id: int | None = None,
    settings: dict[str, Any] | None = None,
) -> int:
    """Insert the estimate ``result`` of ``window`` with its states; returns its id."""
    assert result.params is not None and result.noise_sd is not None
    assert result.std_errors is not None and result.covariance is not None
    assert result.filtered is not None and result.smoothed is not None
    dates = np.asarray(window.curves.dates, dtype="datetime64[D]")
    cov = [[none_if_nan(float(v)) for v in row] for row in result.covariance]
    return add_estimate(
        session=session,
        commodity_id=commodity_id,
        created_at=utc_now(),
        created_by=by,
        source="kalman",
        window_start=_day(dates[0]),
        window_end=_day(dates[-1]),
        params=result.params,
        converged=result.converged,
        message=result.message,
        std_errors={k: none_if_nan(v) for k, v in result.std_errors.items()},
        noise_sd=result.noise_sd.tolist(),
        inputs=window.inputs,
        inputs_sha256=inputs_sha256(window.inputs),
        settings={**window.settings, **(settings or {})},
        code_version=code_version(),
        n_contracts=result.n_contracts,
        n_days=result.n_days,
        n_obs=result.n_obs,
        loglik=result.loglik,
        rate=window.rate,
        states=StatesIn(
            trade_date=dates,
            log_spot_filtered=result.filtered[:, 0],
            yield_filtered=result.filtered[:, 1],
            log_spot_smoothed=result.smoothed[:, 0],
            yield_smoothed=result.smoothed[:, 1],
        ),
        series_id=series_id,
        covariance=cov,
    )


def estimate(
    sessions: sessionmaker[Session],
    commodity: str,
    start: date,
    end: date,
    *,
    by: str,
    n_contracts: int = 5,
    min_days: int = MIN_DAYS,
    progress: Progress = _quiet,
) -> EstimateRecord:
    """Estimate the two-factor model from the stored futures of ``start..end`` and store it.

    The data are read in one transaction, the likelihood is maximised outside any
    transaction (from the default starts: :func:`calib.estimate.rolling.fit_window`), and the
    estimate and its states are written in a second one.

    Raises
    ------
    UnknownCommodityError, NoQuotesError
        Unknown commodity, or no futures stored in the window.
    EstimationDataError
        Too few days or contracts, or a gap the filter cannot bridge (nothing stored).
    EstimationError
        No starting point gave a finite likelihood (nothing stored).
    """
    progress(f"loading {commodity} futures {start}..{end}")
    with sessions.begin() as session:
        cid = require_commodity(session=session, code=commodity).id
        table = load_futures_history(session=session, commodity=commodity, start=start, end=end)
        window = window_inputs(
            session, commodity, table, start, end, n_contracts=n_contracts, min_days=min_days
        )
    curves = window.curves
    progress(
        f"maximising the likelihood: {curves.n_days} days x {curves.n_contracts} contracts, "
        f"r = {window.rate:.4%}"
    )
    result = fit_window(window.task(), FitSettings(min_days=min_days), None)
    progress(f"storing the estimate ({result.message})")
    with sessions.begin() as session:
        begin_write(session)
        estimate_id = store_window(session, commodity_id=cid, by=by, window=window, result=result)
        record = get_estimate(session=session, estimate_id=estimate_id)
    assert record is not None
    return record


def _day(value: Any) -> date:
    return date.fromisoformat(str(np.datetime64(value, "D")))


def _iso_date(path: str, key: str, value: object) -> date:
    if isinstance(value, str):
        try:
            return date.fromisoformat(value)
        except ValueError:
            pass
    raise EstimateFileError(path, msg.ESTIMATE_FILE_DATE.format(key=key, value=value))


def read_estimate_file(path: Path) -> dict[str, Any]:
    """The checked content of an estimate file (see :func:`import_estimate`)."""
    name = str(path)
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise EstimateFileError(name, msg.FILE_NOT_FOUND) from None
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise EstimateFileError(name, msg.ESTIMATE_FILE_NOT_JSON.format(detail=exc)) from None
    if not isinstance(data, dict):
        detail = f"found {type(data).__name__}"
        raise EstimateFileError(name, msg.ESTIMATE_FILE_NOT_JSON.format(detail=detail))
    missing = [k for k in IMPORT_KEYS if k not in data]
    if missing:
        raise EstimateFileError(
            name,
            msg.ESTIMATE_FILE_MISSING.format(keys=", ".join(missing), required=list(IMPORT_KEYS)),
        )
    unknown = sorted(set(data) - set(IMPORT_KEYS) - set(IMPORT_OPTIONAL))
    if unknown:
        known = sorted((*IMPORT_KEYS, *IMPORT_OPTIONAL))
        raise EstimateFileError(
            name, msg.ESTIMATE_FILE_UNKNOWN.format(keys=", ".join(unknown), known=known)
        )
    try:
        params = TwoFactorParams.from_dict(data)
    except ParameterError as exc:
        raise EstimateFileError(name, str(exc)) from None
    start = _iso_date(name, "window_start", data["window_start"])
    end = _iso_date(name, "window_end", data["window_end"])
    if start > end:
        raise EstimateFileError(name, msg.ESTIMATE_FILE_WINDOW.format(start=start, end=end))
    return {**data, "params": params, "window_start": start, "window_end": end}


def import_estimate(
    sessions: sessionmaker[Session], commodity: str, path: Path, *, by: str
) -> EstimateRecord:
    """Register an estimate made elsewhere, marked ``imported``.

    The file is a JSON object with the seven parameter names (``mu``, ``kappa``, ``alpha``,
    ``lam``, ``sigma_spot``, ``sigma_yield``, ``rho``), ``window_start`` and ``window_end``
    (ISO dates); optionally ``converged`` (default true), ``message``, ``std_errors``,
    ``noise_sd``, ``loglik`` and ``note``.

    Raises
    ------
    EstimateFileError
        Unreadable file, missing or unknown keys, a parameter out of its domain, bad dates.
    """
    data = read_estimate_file(path)
    raw = path.read_bytes()
    inputs = {"file": path.name, "file_sha256": inputs_sha256({"bytes": raw.hex()})}
    with sessions.begin() as session:
        begin_write(session)
        cid = require_commodity(session=session, code=commodity).id
        estimate_id = add_estimate(
            session=session,
            commodity_id=cid,
            created_at=utc_now(),
            created_by=by,
            source="imported",
            window_start=data["window_start"],
            window_end=data["window_end"],
            params=data["params"],
            converged=bool(data.get("converged", True)),
            message=str(data.get("message", f"imported from {path.name}")),
            std_errors=dict(data.get("std_errors") or {}),
            noise_sd=list(data.get("noise_sd") or []),
            inputs=inputs,
            inputs_sha256=inputs_sha256(inputs),
            settings={"note": data["note"]} if "note" in data else {},
            code_version=code_version(),
            loglik=data.get("loglik"),
        )
        record = get_estimate(session=session, estimate_id=estimate_id)
    assert record is not None
    return record
