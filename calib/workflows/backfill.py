"""Backfill: fit every stored trading day of a date range, re-solving one compiled problem.

Units of work
-------------
The calling process (the client) reads the days :data:`DAYS_PER_TASK` at a time, in one read
transaction and one query per quote table (:func:`calib.store.quotes.load_days`, which gives
each day exactly what :func:`~calib.store.quotes.load_day` gives it), and hands each batch to
an :class:`~calib.compute.executor.Executor` as plain data (a :class:`FitTask`: the days'
arrays, the estimate's parameters, the calibration settings). Workers fit them
(:func:`fit_days`, :func:`calib.workflows.fit.attempt_fit`) and never open the store. The
runs are written :data:`DAYS_PER_WRITE` days per write transaction
(:func:`calib.workflows.fit.store_attempts`, the code :func:`~calib.workflows.fit.fit_day`
uses for its one day): each run with its residuals and first event, every day of the batch
or, interrupted, none of them. The progress listener hears of a day only once its batch is
committed. A day the calibration refuses is stored as a failed run (status ``rejected``) with
its reason; a day with futures but no options is reported and nothing is stored for it.

Workers
-------
The executor is this process, local worker processes, or a Dask cluster: one code path. A
worker (process, or thread of a cluster worker) keeps one :class:`~calib.calibrate.Calibrator`
per settings and problem shape (forward mode: per number of expiry buckets) and re-solves it
for every day it is given (a fresh solver each time, no warm start: a day's result does not
depend on the days before it or on the worker, so one process, several, a cluster, and
:func:`calib.workflows.rerun.rerun` agree bit for bit). The calling process is the one
writer: it stores the days strictly in date order, so with ``auto_approve`` each day is gated
against, and supersedes, the approved set of the day before (an earlier day of the same batch
included). SQLite admits one writer at a time (WAL), and a day's write is a small part of its
fit, so one writer costs no parallelism.

Several commodities
-------------------
:func:`backfill_many` schedules the units of every commodity in one stream (commodity after
commodity, each in date order): the workers never wait for one commodity's writes to finish
before starting the next. Each commodity has its own estimate, settings, resume key and
report; a batch write holds days of one commodity only.

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

import threading
import time
from collections import Counter, deque
from collections.abc import Iterator, Sequence
from contextlib import closing
from dataclasses import dataclass, field
from datetime import date
from typing import Any, Protocol

from sqlalchemy.orm import Session

from calib.calibrate import CalibrationSettings, Calibrator, OptionQuotes, bucket_edges
from calib.calibrate.quotes import prepare
from calib.compute.executor import AHEAD_PER_WORKER, Executor, InlineExecutor
from calib.errors import BackfillRangeError
from calib.model.twofactor import TwoFactorParams
from calib.policy.settings import RunSettings, default_settings
from calib.record.codec import Encoded
from calib.store.engine import Store
from calib.store.quotes import DayQuotes, load_days, trade_dates
from calib.store.runs import run_keys
from calib.workflows.fit import (
    Attempt,
    attempt_fit,
    choose_estimate,
    store_attempts,
    study_settings,
)
from calib.workflows.provenance import inputs_sha256

DAYS_PER_TASK = 16
"""Days read in one query per table and shipped to a worker as one unit."""

DAYS_PER_WRITE = 16
"""Days stored per write transaction: every one of them, or (interrupted) none."""

TASKS_PER_WORKER = AHEAD_PER_WORKER
"""Units handed out ahead per worker (keeps the workers busy while the writer stores)."""

OUTCOMES = ("fitted", "failed", "no_quotes")
"""Per day: stored with parameters; stored as a failed (rejected) run; nothing to fit."""

NO_OPTIONS = "no options stored"


def settings_sha256(settings: RunSettings) -> str:
    """The resume key of a run's settings: SHA-256 of their canonical JSON."""
    return inputs_sha256(settings.to_dict())


# --- what a day gave ---------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class FitTask:
    """A unit of work as shipped to a worker: plain data, no database."""

    days: tuple[DayQuotes, ...]
    historical: TwoFactorParams
    """The estimate's parameters the fit holds fixed."""
    settings: CalibrationSettings


@dataclass(frozen=True, slots=True)
class DayFit:
    """What a worker gives back for a day (``attempt`` None: the day has no options)."""

    trade_date: date
    attempt: Attempt | None
    seconds: float


@dataclass(frozen=True, slots=True)
class BackfillDay(Encoded):
    """One day of a backfill as stored."""

    commodity: str
    trade_date: date
    outcome: str
    """One of :data:`OUTCOMES`."""
    run_id: int | None
    reason: str | None
    auto_approved: bool


@dataclass(frozen=True, slots=True)
class BackfillReport:
    """What a backfill did: the days it stored, those it skipped, failures with reasons, time.

    ``fit_seconds`` is the fitting time summed over the workers, ``read_seconds`` and
    ``write_seconds`` the caller's time reading the days and storing the runs, ``seconds`` the
    wall time from the start to this commodity's last write. ``workers`` is the units that
    could run at once, ``where`` where they ran (this process, local processes, a cluster).
    """

    commodity: str
    start: date
    end: date
    estimate_id: int
    settings_sha256: str
    workers: int
    where: str
    trade_dates: int
    skipped: tuple[date, ...]
    days: tuple[BackfillDay, ...]
    seconds: float
    fit_seconds: float
    read_seconds: float
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
            "where": self.where,
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
            "read_seconds": self.read_seconds,
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

_CALIBRATORS = threading.local()
"""Per worker thread: ``{(settings, buckets): Calibrator}`` (a calibrator is not shared
between threads: a cluster worker may run several units at once)."""

MAX_CALIBRATORS = 64
"""Calibrators kept per worker thread; beyond it the cache starts again (a cluster worker
may serve many backfills with different settings over its life)."""


def calibrator_for(settings: CalibrationSettings, quotes: OptionQuotes) -> Calibrator:
    """This thread's calibrator for ``settings`` and the day's shape (forward mode: its
    number of expiry buckets), built on first use."""
    cache: dict[tuple[CalibrationSettings, int], Calibrator] | None = getattr(
        _CALIBRATORS, "cache", None
    )
    if cache is None or len(cache) >= MAX_CALIBRATORS:
        cache = _CALIBRATORS.cache = {}
    n = 1
    if settings.mode == "forward":
        n = max(bucket_edges(prepare(quotes, settings).t_expiry).size - 1, 1)
    found = cache.get((settings, n))
    if found is None:
        found = cache[(settings, n)] = Calibrator(settings, n)
    return found


def fit_days(task: FitTask) -> list[DayFit]:
    """Fit each day of ``task`` in order (runs on a worker: no database)."""
    out = []
    for day in task.days:
        t0 = time.perf_counter()
        attempt = None
        if len(day.options):
            attempt = attempt_fit(
                day,
                task.historical,
                task.settings,
                calibrator_for=lambda quotes: calibrator_for(task.settings, quotes),
            )
        out.append(DayFit(day.trade_date, attempt, time.perf_counter() - t0))
    return out


# --- the unit of work --------------------------------------------------------------------------


@dataclass
class _Plan:
    """One commodity's share of a backfill, and what the caller has done for it so far."""

    commodity: str
    settings: RunSettings
    key: str
    estimate_id: int
    study: str | None
    historical: TwoFactorParams
    dates: list[date]
    todo: list[date]
    skipped: list[date]
    days: list[BackfillDay] = field(default_factory=list)
    fit_seconds: float = 0.0
    read_seconds: float = 0.0
    write_seconds: float = 0.0
    seconds: float = 0.0

    def stored_days(
        self, session: Session, start: date | None = None, end: date | None = None
    ) -> set[date]:
        """Days of the plan (within ``start..end`` when given) that have a run with its
        estimate and its settings."""
        if not self.dates:
            return set()
        keys = run_keys(
            session=session,
            commodity=self.commodity,
            start=start or self.dates[0],
            end=end or self.dates[-1],
        )
        return {
            k.trade_date
            for k in keys
            if k.estimate_id == self.estimate_id and inputs_sha256(dict(k.settings)) == self.key
        }


@dataclass(frozen=True, slots=True)
class BackfillJob:
    """One commodity of a backfill: its settings (defaults when None) and the historical
    estimate to hold fixed (default: its newest converged one)."""

    commodity: str
    settings: RunSettings | None = None
    estimate_id: int | None = None
    study: str | None = None
    """Store the runs as runs of this policy study (never approved or served; the name is
    part of their stored settings and so of the resume key)."""


def backfill(
    store: Store,
    commodity: str,
    start: date,
    end: date,
    *,
    by: str,
    settings: RunSettings | None = None,
    estimate_id: int | None = None,
    executor: Executor | None = None,
    auto_approve: bool = False,
    progress: Progress | None = None,
) -> BackfillReport:
    """:func:`backfill_many` of one commodity."""
    job = BackfillJob(commodity, settings, estimate_id)
    (report,) = backfill_many(
        store,
        [job],
        start,
        end,
        by=by,
        executor=executor,
        auto_approve=auto_approve,
        progress=progress,
    )
    return report


def backfill_many(
    store: Store,
    jobs: Sequence[BackfillJob],
    start: date,
    end: date,
    *,
    by: str,
    executor: Executor | None = None,
    auto_approve: bool = False,
    progress: Progress | None = None,
) -> tuple[BackfillReport, ...]:
    """Fit and store every trading day of ``start..end`` that has no run with these settings,
    for each job's commodity; one report per job, in their order.

    Parameters
    ----------
    store : the store (only this process opens it).
    jobs : the commodities (each once), with their settings and estimate.
    start, end : first and last trading day (inclusive); the days are those with futures.
    by : recorded as the runs' creator (and approver with ``auto_approve``).
    executor : where the days are fitted (default: this process); the caller closes it.
    auto_approve : approve each day whose gates all pass, in date order.
    progress : told the number of days to fit (all commodities) and of each stored day.

    Raises
    ------
    BackfillRangeError : ``start`` after ``end``, or a commodity named twice.
    UnknownCommodityError, NoEstimateError, UnknownEstimateError, NotConvergedEstimateError
    """
    if start > end:
        raise BackfillRangeError(f"--from {start} is after --to {end}")
    run = executor or InlineExecutor()
    progress = progress or _Silent()
    began = time.perf_counter()
    plans: list[_Plan] = []
    twice = [c for c, n in Counter((j.commodity, j.study) for j in jobs).items() if n > 1]
    if twice:
        raise BackfillRangeError(f"commodity {twice[0][0]} named twice")
    with store.sessions.begin() as session:
        for job in jobs:
            chosen = job.settings or default_settings()
            estimate = choose_estimate(session, job.commodity, job.estimate_id)
            dates = trade_dates(session=session, commodity=job.commodity, start=start, end=end)
            plan = _Plan(
                commodity=job.commodity,
                settings=chosen,
                key=inputs_sha256(study_settings(chosen, job.study)),
                estimate_id=estimate.estimate_id,
                study=job.study,
                historical=estimate.params,
                dates=dates,
                todo=[],
                skipped=[],
            )
            done = plan.stored_days(session)
            plan.todo = [d for d in dates if d not in done]
            plan.skipped = [d for d in dates if d in done]
            plans.append(plan)
    progress.start(sum(len(p.todo) for p in plans), sum(len(p.skipped) for p in plans))
    sent: deque[tuple[_Plan, tuple[DayQuotes, ...]]] = deque()

    def units() -> Iterator[FitTask]:
        """The work, read as the executor asks for it: every commodity's days in order."""
        for plan in plans:
            for i in range(0, len(plan.todo), DAYS_PER_TASK):
                t0 = time.perf_counter()
                with store.sessions.begin() as session:
                    days = tuple(
                        load_days(
                            session=session,
                            commodity=plan.commodity,
                            dates=plan.todo[i : i + DAYS_PER_TASK],
                        )
                    )
                plan.read_seconds += time.perf_counter() - t0
                sent.append((plan, days))
                yield FitTask(days, plan.historical, plan.settings.calibration)

    def write(plan: _Plan, batch: list[tuple[DayQuotes, DayFit]]) -> None:
        """Store ``batch`` in one transaction, then tell ``progress`` of each day in order."""
        t0 = time.perf_counter()
        fits = [(day, fit.attempt) for day, fit in batch if fit.attempt is not None]
        stored = iter(
            store_attempts(
                store.sessions,
                fits,
                plan.estimate_id,
                plan.settings,
                by=by,
                auto_approve=auto_approve and plan.study is None,
                # only the batch's days: the check costs the same on the last batch as on the first
                skip_stored=lambda session: plan.stored_days(
                    session, batch[0][0].trade_date, batch[-1][0].trade_date
                ),
                study=plan.study,
            )
        )
        plan.write_seconds += time.perf_counter() - t0
        plan.seconds = time.perf_counter() - began
        for day, fit in batch:
            if fit.attempt is None:
                done = BackfillDay(
                    plan.commodity, day.trade_date, "no_quotes", None, NO_OPTIONS, False
                )
            else:
                record = next(stored)
                if record.run_id is None:  # another backfill stored the day meanwhile
                    plan.skipped.append(day.trade_date)
                    continue
                failure = fit.attempt.failure
                outcome = "failed" if failure is not None else "fitted"
                done = BackfillDay(
                    plan.commodity,
                    day.trade_date,
                    outcome,
                    record.run_id,
                    failure,
                    record.auto_approved,
                )
            plan.days.append(done)
            progress.advance(done)

    fitted = run.map(fit_days, units(), ahead=TASKS_PER_WORKER * run.workers)
    with closing(fitted):  # an interruption stops handing out work at once
        batch: list[tuple[DayQuotes, DayFit]] = []
        current: _Plan | None = None
        for fits in fitted:
            plan, days = sent.popleft()
            if plan is not current:
                if current is not None and batch:
                    write(current, batch)
                batch, current = [], plan
            for day, fit in zip(days, fits, strict=True):
                plan.fit_seconds += fit.seconds
                batch.append((day, fit))
                if len(batch) == DAYS_PER_WRITE:
                    write(plan, batch)
                    batch = []
        if current is not None and batch:
            write(current, batch)
    return tuple(
        BackfillReport(
            commodity=p.commodity,
            start=start,
            end=end,
            estimate_id=p.estimate_id,
            settings_sha256=p.key,
            workers=run.workers,
            where=run.where,
            trade_dates=len(p.dates),
            skipped=tuple(sorted(p.skipped)),
            days=tuple(p.days),
            seconds=p.seconds if p.todo else time.perf_counter() - began,
            fit_seconds=p.fit_seconds,
            read_seconds=p.read_seconds,
            write_seconds=p.write_seconds,
        )
        for p in plans
    )
