"""Rolling re-estimation as a unit of work: one stored estimate per window end.

:func:`estimate_rolling` reads every window's futures, rate and input ids in one read
transaction, hands the windows to an :class:`~calib.compute.executor.Executor` in chunks of
consecutive windows (plain arrays: workers never touch the store), and writes each chunk's
estimates in window order, one write transaction per chunk, as the results arrive.

Notes
-----
**Series.** A series is keyed by its settings (commodity, window length, step, first and last
window end, contracts, fewest days); running the same request again finds the series and
estimates only the window ends it does not hold yet, so an interrupted run resumes where it
stopped (a finished chunk is stored; an unfinished one is redone). Its estimates are marked
with the series and are never the calibration's default (:func:`~calib.store.estimates.
latest_estimate`); naming one with ``--estimate`` uses it.

**Windows.** The window ending on ``E`` covers trade dates ``E - length + 1 day .. E``; its
data, rate and settings are exactly those of ``calib estimate --from .. --to ..`` on the same
dates, so a window's stored estimate is the single estimate of that window (a test checks it).
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import date
from typing import Any

import numpy as np
from sqlalchemy.orm import Session, sessionmaker

from calib.compute.executor import Executor, InlineExecutor
from calib.errors import (
    ROLLING_NO_WINDOWS,
    EstimationDataError,
    NoQuotesError,
    RollingRequestError,
)
from calib.estimate.rolling import (
    FitSettings,
    Period,
    WindowFit,
    estimate_windows,
    window_ends,
    window_start,
)
from calib.record.codec import Encoded
from calib.store.base import utc_now
from calib.store.engine import begin_write
from calib.store.estimates import add_series, find_series, series_estimates
from calib.store.quotes import load_futures_history, require_commodity
from calib.workflows.estimates import MIN_DAYS, WindowInputs, store_window, window_inputs
from calib.workflows.provenance import inputs_sha256

CHUNK = 8
"""Consecutive windows per work unit (each warm-starts from the one before it)."""

COLD_CHECK_EVERY = 8
"""Every this many windows one is also estimated from a cold start (the sample checked)."""

WindowDone = Callable[["RollingWindow"], None]


def _nothing(_: RollingWindow) -> None:
    return None


@dataclass(frozen=True, slots=True)
class RollingWindow(Encoded):
    """One window end of a series and what became of it in this run.

    ``status``: ``stored`` (estimated now), ``held`` (stored by an earlier run), ``failed``
    (the window's data cannot be estimated; ``detail`` says why; nothing stored).
    """

    index: int
    end: date
    start: date
    status: str
    estimate_id: int | None = None
    converged: bool | None = None
    started: str | None = None
    local_optimum: str | None = None
    detail: str | None = None


@dataclass(frozen=True, slots=True)
class RollingReport:
    """The outcome of :func:`estimate_rolling`."""

    series_id: int
    commodity: str
    window_length: str
    step: str
    windows: tuple[RollingWindow, ...]
    workers: int
    seconds: float
    cold_checked: int
    settings: dict[str, Any] = field(default_factory=dict)

    def count(self, status: str) -> int:
        return sum(1 for w in self.windows if w.status == status)

    @property
    def local_optima(self) -> tuple[RollingWindow, ...]:
        return tuple(w for w in self.windows if w.local_optimum)

    def to_dict(self) -> dict[str, Any]:
        return {
            "series_id": self.series_id,
            "commodity": self.commodity,
            "window_length": self.window_length,
            "step": self.step,
            "n_windows": len(self.windows),
            "stored": self.count("stored"),
            "held": self.count("held"),
            "failed": self.count("failed"),
            "not_converged": sum(1 for w in self.windows if w.converged is False),
            "cold_checked": self.cold_checked,
            "local_optima": [w.index for w in self.local_optima],
            "workers": self.workers,
            "seconds": self.seconds,
            "settings": self.settings,
            "windows": [w.to_dict() for w in self.windows],
        }


def series_settings(
    commodity: str,
    length: Period,
    step: Period,
    first: date,
    last: date,
    *,
    n_contracts: int,
    min_days: int,
) -> dict[str, Any]:
    """What identifies a series (its sha256 is the key a rerun finds it by)."""
    return {
        "commodity": commodity,
        "window_length": str(length),
        "step": str(step),
        "first_end": first.isoformat(),
        "last_end": last.isoformat(),
        "n_contracts": n_contracts,
        "min_days": min_days,
    }


def estimate_rolling(
    sessions: sessionmaker[Session],
    commodity: str,
    first: date,
    last: date,
    length: Period,
    step: Period,
    *,
    by: str,
    n_contracts: int = 5,
    min_days: int = MIN_DAYS,
    executor: Executor | None = None,
    chunk: int = CHUNK,
    cold_every: int = COLD_CHECK_EVERY,
    on_window: WindowDone = _nothing,
    on_start: Callable[[int], None] | None = None,
) -> RollingReport:
    """Estimate every window of ``length`` ending on ``first``, ``first + step``, .. ``last``.

    Parameters
    ----------
    sessions : session factory of the store.
    commodity : commodity code.
    first, last : first and last window end (inclusive).
    length, step : window length and the step between window ends.
    by : recorded on the series and its estimates.
    n_contracts, min_days : as :func:`calib.workflows.estimates.estimate`.
    executor : where the windows are estimated (default: in this process).
    chunk : consecutive windows per work unit.
    cold_every : one window in this many is checked against a cold start (0: none).
    on_window : called with each window as it is stored (or found held / failed).
    on_start : called once with the number of windows to estimate in this run.

    Raises
    ------
    RollingRequestError
        No window end in ``first..last``.
    UnknownCommodityError
    """
    started = time.monotonic()
    ends = window_ends(first, last, step)
    if not ends:
        raise RollingRequestError(commodity, ROLLING_NO_WINDOWS.format(first=first, last=last))
    starts = [window_start(e, length) for e in ends]
    settings = series_settings(
        commodity, length, step, first, last, n_contracts=n_contracts, min_days=min_days
    )
    key = inputs_sha256(settings)
    with sessions.begin() as session:
        begin_write(session)
        cid = require_commodity(session=session, code=commodity).id
        series = find_series(session=session, commodity=commodity, settings_sha256=key)
        if series is None:
            series_id = add_series(
                session=session,
                commodity_id=cid,
                created_at=utc_now(),
                created_by=by,
                window_length=str(length),
                step=str(step),
                first_end=first,
                last_end=last,
                settings=settings,
                settings_sha256=key,
            )
        else:
            series_id = series.series_id
        stored = series_estimates(session=session, series_id=series_id)
    held = {e.settings.get("end"): e for e in stored}
    results: dict[int, RollingWindow] = {}
    todo: list[int] = []
    for i, (s, e) in enumerate(zip(starts, ends, strict=True)):
        h = held.get(e.isoformat())
        if h is not None:
            results[i] = RollingWindow(i, e, s, "held", h.estimate_id, h.converged, None)
            on_window(results[i])
        else:
            todo.append(i)
    if on_start is not None:
        on_start(len(todo))
    windows: dict[int, WindowInputs] = {}
    if todo:
        with sessions.begin() as session:
            table = load_futures_history(
                session=session, commodity=commodity, start=starts[todo[0]], end=ends[todo[-1]]
            )
            for i in todo:
                try:
                    windows[i] = window_inputs(
                        session,
                        commodity,
                        table,
                        starts[i],
                        ends[i],
                        n_contracts=n_contracts,
                        min_days=min_days,
                    )
                except (NoQuotesError, EstimationDataError) as exc:
                    results[i] = RollingWindow(
                        i, ends[i], starts[i], "failed", detail=f"{type(exc).__name__}: {exc}"
                    )
                    on_window(results[i])
    ready = [i for i in todo if i in windows]
    run = executor or InlineExecutor()
    cold_checked = 0
    # consecutive runs of ready windows: each run warm-starts from the held window before it
    runs: list[list[int]] = []
    for i in ready:
        if runs and runs[-1][-1] == i - 1:
            runs[-1].append(i)
        else:
            runs.append([i])
    for part in runs:
        prev = held.get(ends[part[0] - 1].isoformat()) if part[0] > 0 else None
        warm, warm_cov = None, None
        if prev is not None and prev.converged:
            warm = (prev.params, np.asarray(prev.noise_sd, dtype=np.float64))
            if prev.covariance is not None:  # None entries (not stored) become NaN: unused
                warm_cov = np.array(prev.covariance, dtype=np.float64)
        tasks = [
            windows[i].task(i, check_cold=cold_every > 0 and i % cold_every == cold_every // 2)
            for i in part
        ]
        for fits in estimate_windows(
            tasks, FitSettings(min_days=min_days), run, chunk=chunk, warm=warm, warm_cov=warm_cov
        ):
            cold_checked += sum(1 for f in fits if f.cold_loglik is not None)
            stored_now = _store_chunk(sessions, cid, by, series_id, length, step, windows, fits)
            for f, estimate_id in zip(fits, stored_now, strict=True):
                i = f.index
                if f.error is not None:
                    results[i] = RollingWindow(i, ends[i], starts[i], "failed", detail=f.error)
                else:
                    results[i] = RollingWindow(
                        i, ends[i], starts[i], "stored", estimate_id, f.converged, f.start,
                        f.local_optimum,
                    )  # fmt: skip
                on_window(results[i])
    return RollingReport(
        series_id=series_id,
        commodity=commodity,
        window_length=str(length),
        step=str(step),
        windows=tuple(results[i] for i in range(len(ends))),
        workers=run.workers,
        seconds=time.monotonic() - started,
        cold_checked=cold_checked,
        settings=settings,
    )


def _store_chunk(
    sessions: sessionmaker[Session],
    commodity_id: int,
    by: str,
    series_id: int,
    length: Period,
    step: Period,
    windows: dict[int, WindowInputs],
    fits: list[WindowFit],
) -> list[int | None]:
    """One write transaction: the chunk's estimates in window order (failed ones skipped)."""
    out: list[int | None] = []
    with sessions.begin() as session:
        begin_write(session)
        for f in fits:
            if f.error is not None:
                out.append(None)
                continue
            extra = {
                "rolling": {
                    "series_id": series_id,
                    "window_length": str(length),
                    "step": str(step),
                },
                "start_point": f.start,
                "cold_check_loglik": f.cold_loglik,
                "local_optimum": f.local_optimum,
            }
            out.append(
                store_window(
                    session,
                    commodity_id=commodity_id,
                    by=by,
                    window=windows[f.index],
                    result=f,
                    series_id=series_id,
                    settings=extra,
                )
            )
    return out
