"""Historical estimates as units of work: estimate from stored futures, or import from a file.

Notes
-----
**Interest rate.** The likelihood's futures formula takes one constant rate ``r``. It is the
mean, over the window's trade dates that have a stored zero curve, of each day's shortest
stored zero rate (the short rate of the day); with no curve stored in the window it is 0 and
the estimate's settings say so (``rate_source``).

**Convergence.** An estimate that does not converge is stored with ``converged = False`` and
its message, and is never picked by the calibration unless named (and then refused, see
:func:`calib.workflows.runs.fit_day`).
"""

from __future__ import annotations

import json
import math
import warnings
from collections.abc import Callable
from datetime import date
from pathlib import Path
from typing import Any

import numpy as np
from sqlalchemy.orm import Session, sessionmaker

from calib import errors as msg
from calib.errors import EstimateFileError, EstimationWarning, NoQuotesError, ParameterError
from calib.estimate import curves_from_quotes, fit
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


def _none_if_nan(value: float) -> float | None:
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


def estimate(
    sessions: sessionmaker[Session],
    commodity: str,
    start: date,
    end: date,
    *,
    user: str,
    n_contracts: int = 5,
    min_days: int = MIN_DAYS,
    progress: Progress = _quiet,
) -> EstimateRecord:
    """Estimate the two-factor model from the stored futures of ``start..end`` and store it.

    The data are read in one transaction, the likelihood is maximised outside any
    transaction, and the estimate and its states are written in a second one.

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
        rate, rate_source, rate_rows = window_rate(session, start, end)
    if table.empty:
        raise NoQuotesError(commodity, f"no futures settlements stored in {start}..{end}")
    curves = curves_from_quotes(
        table["trade_date"].to_numpy(),
        table["delivery"].to_numpy(),
        table["settle"].to_numpy(),
        n_contracts=n_contracts,
        min_days_to_delivery=MIN_DAYS_TO_DELIVERY,
    )
    progress(
        f"maximising the likelihood: {curves.n_days} days x {curves.n_slots} contracts, "
        f"r = {rate:.4%}"
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", EstimationWarning)  # the flag is stored and printed
        result = fit(curves, rate, min_days=min_days)
    progress(f"storing the estimate ({result.message})")
    states = result.states
    inputs = {
        "batch_ids": sorted(set(table["batch_id"].tolist())),
        "futures_rows": sorted(table["row_id"].tolist()),
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
    with sessions.begin() as session:
        begin_write(session)
        estimate_id = add_estimate(
            session=session,
            commodity_id=cid,
            created_at=utc_now(),
            created_by=user,
            source="kalman",
            window_start=_day(result.window_start),
            window_end=_day(result.window_end),
            params=result.params,
            converged=result.converged,
            message=result.message,
            std_errors={k: _none_if_nan(v) for k, v in result.std_errors.items()},
            noise_sd=result.noise_sd.tolist(),
            inputs=inputs,
            inputs_sha256=inputs_sha256(inputs),
            settings=settings,
            code_version=code_version(),
            n_contracts=result.n_contracts,
            n_days=result.n_days,
            n_obs=result.n_obs,
            loglik=result.loglik,
            rate=result.rate,
            states=StatesIn(
                trade_date=np.asarray(curves.dates, dtype="datetime64[D]"),
                log_spot_filtered=states.filtered[:, 0],
                yield_filtered=states.filtered[:, 1],
                log_spot_smoothed=states.smoothed[:, 0],
                yield_smoothed=states.smoothed[:, 1],
            ),
        )
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
    sessions: sessionmaker[Session], commodity: str, path: Path, *, user: str
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
            created_by=user,
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
