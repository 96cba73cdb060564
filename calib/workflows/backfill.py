"""Backfill: fit every stored trading day of a date range, re-solving one compiled problem.

Units of work
-------------
Days are read :data:`DAYS_PER_TASK` at a time, in one read transaction and one query per
quote table (:func:`calib.store.quotes.load_days`, which gives each day exactly what
:func:`~calib.store.quotes.load_day` gives it), and fitted outside any transaction
(:func:`calib.workflows.fit.attempt_fit`). The runs are written :data:`DAYS_PER_WRITE` days
per write transaction (:func:`calib.workflows.fit.store_attempts`, the code
:func:`~calib.workflows.fit.fit_day` uses for its one day): each run with its residuals and
first event, every day of the batch or, interrupted, none of them. The progress listener
hears of a day only once its batch is committed. A day the calibration refuses is stored as
a failed run (status ``rejected``) with its reason; a day with futures but no options is
reported and nothing is stored for it.

Workers
-------
With ``workers > 1`` a :class:`concurrent.futures.ProcessPoolExecutor` (``spawn`` context) reads
and fits the tasks in parallel; each worker process builds one
:class:`~calib.calibrate.Calibrator` per problem shape (forward mode: per number of expiry
buckets) and re-solves it for every day it is given (a fresh solver each time, no warm
start: a day's result does not depend on the days before it, so one worker, two, and
:func:`calib.workflows.rerun.rerun` agree bit for bit). The calling process is the one writer:
it stores the days strictly in date order, so with ``auto_approve`` each day is gated
against, and supersedes, the approved set of the day before (an earlier day of the same
batch included). SQLite admits one writer at a time (WAL), and a day's write is a small part
of its fit, so one writer costs no parallelism.

Resume
------
A backfill interrupted at any point leaves every day it stored complete (whole batches of
complete runs). A day is skipped when it already has a run of the commodity keyed by the same
**estimate id** and the same **settings hash**: the SHA-256 of the canonical JSON (sorted keys,
no spaces) of the run's stored settings, ``{"calibration": ..., "gates": ...}``. So a rerun of
the same command fits only the days still missing; changed settings (or another estimate) fit
every day again, as new runs beside the old ones. Two backfills of the same range at once
never store a day twice: each write transaction asks again, under the commodity's write lock,
which days are stored, and skips those (they are reported as skipped).
"""

from __future__ import annotations

import itertools
import multiprocessing
import time
from collections import Counter, deque
from collections.abc import Generator, Sequence
from concurrent.futures import Future, ProcessPoolExecutor
from contextlib import closing
from dataclasses import dataclass, field
from datetime import date
from typing import Any, Protocol

from sqlalchemy.orm import Session

from calib.calibrate import CalibrationSettings, Calibrator, OptionQuotes, bucket_edges
from calib.calibrate.quotes import prepare
from calib.errors import BackfillRangeError
from calib.model.twofactor import TwoFactorParams
from calib.policy.settings import RunSettings, default_settings
from calib.store.engine import Store, make_store
from calib.store.quotes import DayQuotes, load_days, trade_dates
from calib.store.runs import run_keys
from calib.workflows.fit import Attempt, attempt_fit, choose_estimate, store_attempts
from calib.workflows.provenance import inputs_sha256

DAYS_PER_TASK = 16
"""Days a worker reads in one query per table and fits before handing them back."""

DAYS_PER_WRITE = 16
"""Days stored per write transaction: every one of them, or (interrupted) none."""

TASKS_PER_WORKER = 2
"""Tasks handed out ahead per worker (keeps the workers busy while the writer stores)."""

OUTCOMES = ("fitted", "failed", "no_quotes")
"""Per day: stored with parameters; stored as a failed (rejected) run; nothing to fit."""


def settings_sha256(settings: RunSettings) -> str:
    """The resume key of a run's settings: SHA-256 of their canonical JSON."""
    return inputs_sha256(settings.to_dict())


# --- what a day gave ---------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class FittedDay:
    """A day read and fitted by a worker, ready to be stored (``day`` is None: no quotes)."""

    trade_date: date
    day: DayQuotes | None
    attempt: Attempt | None
    reason: str | None
    seconds: float


@dataclass(frozen=True, slots=True)
class BackfillDay:
    """One day of a backfill as stored."""

    trade_date: date
    outcome: str
    """One of :data:`OUTCOMES`."""
    run_id: int | None
    reason: str | None
    auto_approved: bool

    def to_dict(self) -> dict[str, Any]:
        return {
            "trade_date": self.trade_date.isoformat(),
            "outcome": self.outcome,
            "run_id": self.run_id,
            "reason": self.reason,
            "auto_approved": self.auto_approved,
        }


@dataclass(frozen=True, slots=True)
class BackfillReport:
    """What a backfill did: the days it stored, those it skipped, failures with reasons, time.

    ``fit_seconds`` is the reading and fitting time summed over the workers, ``write_seconds``
    the writer's time, ``seconds`` the wall time.
    """

    commodity: str
    start: date
    end: date
    estimate_id: int
    settings_sha256: str
    workers: int
    trade_dates: int
    skipped: tuple[date, ...]
    days: tuple[BackfillDay, ...]
    seconds: float
    fit_seconds: float
    write_seconds: float

    def count(self, outcome: str) -> int:
        return sum(1 for d in self.days if d.outcome == outcome)

    @property
    def failures(self) -> tuple[BackfillDay, ...]:
        """Days that gave no parameters, in date order."""
        return tuple(d for d in self.days if d.outcome != "fitted")

    @property
    def approved(self) -> int:
        return sum(1 for d in self.days if d.auto_approved)

    def failure_kinds(self) -> dict[str, int]:
        """Failures counted by kind: the error class of the reason (``no_quotes`` for days
        without options), most frequent first."""
        kinds = Counter(
            (d.reason or "").split(":", 1)[0] if d.outcome == "failed" else d.outcome
            for d in self.failures
        )
        return dict(kinds.most_common())

    def to_dict(self) -> dict[str, Any]:
        return {
            "commodity": self.commodity,
            "from": self.start.isoformat(),
            "to": self.end.isoformat(),
            "estimate_id": self.estimate_id,
            "settings_sha256": self.settings_sha256,
            "workers": self.workers,
            "trade_dates": self.trade_dates,
            "skipped": len(self.skipped),
            "fitted": self.count("fitted"),
            "failed": self.count("failed"),
            "no_quotes": self.count("no_quotes"),
            "auto_approved": self.approved,
            "failure_kinds": self.failure_kinds(),
            "failures": [d.to_dict() for d in self.failures],
            "days": [d.to_dict() for d in self.days],
            "seconds": self.seconds,
            "fit_seconds": self.fit_seconds,
            "write_seconds": self.write_seconds,
        }


class Progress(Protocol):
    """Told how many days there are to fit, then of each day as it is stored."""

    def start(self, total: int, skipped: int) -> None: ...

    def advance(self, day: BackfillDay) -> None: ...


class _Silent:
    def start(self, total: int, skipped: int) -> None:
        pass

    def advance(self, day: BackfillDay) -> None:
        pass


# --- the workers -------------------------------------------------------------------------------


@dataclass
class Calibrators:
    """One compiled :class:`~calib.calibrate.Calibrator` per problem shape, re-solved for
    every day of that shape (forward mode: the day's number of expiry buckets)."""

    settings: CalibrationSettings
    _by_shape: dict[int, Calibrator] = field(default_factory=dict, init=False, repr=False)

    def __call__(self, quotes: OptionQuotes) -> Calibrator:
        """The calibrator for this day's shape."""
        n = 1
        if self.settings.mode == "forward":
            n = max(bucket_edges(prepare(quotes, self.settings).expiry).size - 1, 1)
        found = self._by_shape.get(n)
        if found is None:
            found = self._by_shape[n] = Calibrator(self.settings, n)
        return found


@dataclass
class DayFitter:
    """Reads and fits days of one commodity; one per process, its calibrators re-solved.

    Parameters
    ----------
    url : the store's URL (each process opens its own engine).
    commodity : commodity code.
    historical : the estimate's parameters the fit holds fixed.
    settings : the calibration settings.
    """

    url: str
    commodity: str
    historical: TwoFactorParams
    settings: CalibrationSettings
    _store: Store | None = field(default=None, init=False, repr=False)
    _calibrators: Calibrators | None = field(default=None, init=False, repr=False)

    def calibrator_for(self, quotes: OptionQuotes) -> Calibrator:
        """The calibrator for this day's shape (forward mode: its number of buckets)."""
        if self._calibrators is None:
            self._calibrators = Calibrators(self.settings)
        return self._calibrators(quotes)

    def __call__(self, dates: Sequence[date]) -> list[FittedDay]:
        """Read ``dates`` in one read transaction (:func:`~calib.store.quotes.load_days`),
        then fit each; a day's ``seconds`` is its fit and its share of the read."""
        started = time.perf_counter()
        if self._store is None:
            self._store = make_store(self.url)
        with self._store.sessions.begin() as session:
            days = load_days(session=session, commodity=self.commodity, dates=dates)
        read_share = (time.perf_counter() - started) / max(len(days), 1)
        out = []
        for day in days:
            t0 = time.perf_counter()
            if not len(day.options):
                fitted = FittedDay(day.trade_date, None, None, "no options stored", read_share)
            else:
                attempt = attempt_fit(
                    day, self.historical, self.settings, calibrator_for=self.calibrator_for
                )
                seconds = read_share + time.perf_counter() - t0
                fitted = FittedDay(day.trade_date, day, attempt, None, seconds)
            out.append(fitted)
        return out

    def close(self) -> None:
        if self._store is not None:
            self._store.engine.dispose()
            self._store = None


_WORKER: DayFitter | None = None


def _start_worker(fitter: DayFitter) -> None:
    global _WORKER
    _WORKER = fitter


def _fit_in_worker(dates: list[date]) -> list[FittedDay]:
    assert _WORKER is not None, "worker not initialised"
    return _WORKER(dates)


def _fitted_in_order(
    fitter: DayFitter, dates: list[date], workers: int
) -> Generator[FittedDay, None, None]:
    """The days fitted, in date order: in this process, or by ``workers`` spawned processes,
    :data:`DAYS_PER_TASK` days at a time."""
    tasks = [dates[i : i + DAYS_PER_TASK] for i in range(0, len(dates), DAYS_PER_TASK)]
    if workers <= 1:
        try:
            for task in tasks:
                yield from fitter(task)
        finally:
            fitter.close()
        return
    context = multiprocessing.get_context("spawn")
    pool = ProcessPoolExecutor(
        max_workers=workers, mp_context=context, initializer=_start_worker, initargs=(fitter,)
    )
    pending: deque[Future[list[FittedDay]]] = deque()
    todo = iter(tasks)
    try:
        for task in itertools.islice(todo, TASKS_PER_WORKER * workers):
            pending.append(pool.submit(_fit_in_worker, task))
        while pending:
            done = pending.popleft().result()
            nxt = next(todo, None)
            if nxt is not None:
                pending.append(pool.submit(_fit_in_worker, nxt))
            yield from done
    finally:
        pool.shutdown(wait=True, cancel_futures=True)


# --- the unit of work --------------------------------------------------------------------------


def backfill(
    store: Store,
    commodity: str,
    start: date,
    end: date,
    *,
    by: str,
    settings: RunSettings | None = None,
    estimate_id: int | None = None,
    workers: int = 1,
    auto_approve: bool = False,
    progress: Progress | None = None,
) -> BackfillReport:
    """Fit and store every trading day of ``start..end`` that has no run with these settings.

    Parameters
    ----------
    store : the store (its URL is opened again by each worker process).
    commodity : commodity code.
    start, end : first and last trading day (inclusive); the days are those with futures.
    by : recorded as the runs' creator (and approver with ``auto_approve``).
    settings : calibration settings and gate limits (defaults when None).
    estimate_id : the historical estimate to hold fixed (default: newest converged).
    workers : processes that read and fit; 1 fits in this process.
    auto_approve : approve each day whose gates all pass, in date order.
    progress : told the number of days to fit and of each stored day.

    Raises
    ------
    BackfillRangeError : ``start`` after ``end``, or ``workers < 1``.
    UnknownCommodityError, NoEstimateError, UnknownEstimateError, NotConvergedEstimateError
    """
    if start > end:
        raise BackfillRangeError(f"--from {start} is after --to {end}")
    if workers < 1:
        raise BackfillRangeError(f"workers must be at least 1, not {workers}")
    settings = settings or default_settings()
    progress = progress or _Silent()
    key = settings_sha256(settings)
    began = time.perf_counter()
    with store.sessions.begin() as session:
        estimate = choose_estimate(session, commodity, estimate_id)
        dates = trade_dates(session=session, commodity=commodity, start=start, end=end)

        def stored_days(session: Session) -> set[date]:
            """Days of the range that have a run with this estimate and these settings."""
            return {
                k.trade_date
                for k in run_keys(session=session, commodity=commodity, start=start, end=end)
                if k.estimate_id == estimate.estimate_id and inputs_sha256(dict(k.settings)) == key
            }

        done = stored_days(session)
    todo = [d for d in dates if d not in done]
    skipped = [d for d in dates if d in done]
    progress.start(len(todo), len(skipped))
    fitter = DayFitter(
        store.engine.url.render_as_string(hide_password=False),
        commodity,
        estimate.params,
        settings.calibration,
    )
    days: list[BackfillDay] = []
    fit_seconds = write_seconds = 0.0

    def write(batch: list[FittedDay]) -> None:
        """Store ``batch`` in one transaction, then tell ``progress`` of each day in order."""
        nonlocal write_seconds
        t0 = time.perf_counter()
        fits = [(f.day, f.attempt) for f in batch if f.day is not None and f.attempt is not None]
        stored = iter(
            store_attempts(
                store.sessions,
                fits,
                estimate.estimate_id,
                settings,
                by=by,
                auto_approve=auto_approve,
                skip_stored=stored_days,
            )
        )
        write_seconds += time.perf_counter() - t0
        for f in batch:
            if f.day is None or f.attempt is None:
                day = BackfillDay(f.trade_date, "no_quotes", None, f.reason, False)
            else:
                run = next(stored)
                if run.run_id is None:  # another backfill stored the day meanwhile
                    skipped.append(f.trade_date)
                    continue
                failure = f.attempt.failure
                outcome = "failed" if failure is not None else "fitted"
                day = BackfillDay(f.trade_date, outcome, run.run_id, failure, run.auto_approved)
            days.append(day)
            progress.advance(day)

    fitted_days = _fitted_in_order(fitter, todo, workers)
    with closing(fitted_days):  # an interruption stops the workers at once
        batch: list[FittedDay] = []
        for fitted in fitted_days:
            fit_seconds += fitted.seconds
            batch.append(fitted)
            if len(batch) == DAYS_PER_WRITE:
                write(batch)
                batch = []
        write(batch)
    return BackfillReport(
        commodity=commodity,
        start=start,
        end=end,
        estimate_id=estimate.estimate_id,
        settings_sha256=key,
        workers=workers,
        trade_dates=len(dates),
        skipped=tuple(sorted(skipped)),
        days=tuple(days),
        seconds=time.perf_counter() - began,
        fit_seconds=fit_seconds,
        write_seconds=write_seconds,
    )
