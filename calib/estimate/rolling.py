"""Rolling re-estimation: one maximum-likelihood estimate per window end (numpy only, no I/O).

* :func:`parse_period`, :func:`window_ends`, :func:`window_start`: the calendar of a series
  (``2y`` windows whose ends step by ``1m`` from one date to another).
* :class:`WindowTask`, :class:`ChunkTask`: the plain-array work units a worker receives.
* :func:`fit_chunk`: estimates a chunk of consecutive windows, each warm-started from the
  previous one, and checks a sample of them against a cold start.

Notes
-----
**Warm starts.** Consecutive windows share most of their days, so the previous window's
optimum is close to the next one's: one start run to convergence replaces the global stage's
several (:func:`calib.estimate.mle.default_starts`). The first window of a chunk starts cold
unless the caller hands it a start (:func:`estimate_windows` hands every chunk the optimum
of the series' first window, so only that one starts cold). A warm fit that does not converge
is redone cold.

The previous optimum's covariance goes with it (``warm_cov``): the search runs in coordinates
where the likelihood's curvature there is the identity (``start_covariance`` of
:func:`calib.estimate.fit`). Consecutive windows' curvatures differ little, so a warm fit takes
a handful of L-BFGS-B steps where it took dozens in the raw parameters (whose curvatures span
orders of magnitude), and costs little more than the Newton polish and certificate.

**Cold check.** On the windows marked ``check_cold`` the estimate is also made from the
default starts. When the two log-likelihoods differ by more than :data:`LOCAL_OPTIMUM_TOL`
the better one is kept and the window is reported: one of the two stopped at a local optimum.
"""

from __future__ import annotations

import math
import re
import warnings
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from datetime import date, timedelta
from typing import Any, Literal

import numpy as np

from calib.compute.executor import Executor
from calib.errors import EstimationDataError, EstimationError, EstimationWarning, PeriodError
from calib.estimate.curves import Curves
from calib.estimate.mle import Estimate, fit
from calib.model.twofactor import TwoFactorParams
from calib.types import FloatArray

LOCAL_OPTIMUM_TOL = 1e-3
"""Log-likelihood gap (nats) between warm and cold start above which a window is reported.
Both fits stop at a Newton decrement below 1e-6, so equal optima agree far closer than this."""

Unit = Literal["y", "m", "w", "d"]
_PERIOD = re.compile(r"^\s*(\d+)\s*([ymwd])\s*$", re.IGNORECASE)


@dataclass(frozen=True, slots=True)
class Period:
    """A calendar period: ``count`` years, months, weeks or days (``2y``, ``1m``, ``10d``)."""

    count: int
    unit: Unit

    def __str__(self) -> str:
        return f"{self.count}{self.unit}"

    def before(self, day: date) -> date:
        """``day`` moved back by the period (month ends clipped: 31 Mar - 1m = 28/29 Feb)."""
        return self.after(day, -1)

    def after(self, day: date, times: int = 1) -> date:
        """``day`` moved forward by ``times`` periods (month ends clipped)."""
        n = self.count * times
        if self.unit == "d":
            return day + timedelta(days=n)
        if self.unit == "w":
            return day + timedelta(weeks=n)
        months = n * (12 if self.unit == "y" else 1)
        y, m = divmod(day.year * 12 + day.month - 1 + months, 12)
        m += 1
        last = (date(y + m // 12, m % 12 + 1, 1) - timedelta(days=1)).day
        return date(y, m, min(day.day, last))


def parse_period(option: str, text: str) -> Period:
    """``"2y"`` -> ``Period(2, "y")``; units y (years), m (months), w (weeks), d (days).

    Raises
    ------
    PeriodError
        Not a positive whole number followed by one of the units.
    """
    found = _PERIOD.match(text)
    if found is None or int(found.group(1)) <= 0:
        raise PeriodError(option, text)
    unit = found.group(2).lower()
    assert unit in ("y", "m", "w", "d")
    return Period(int(found.group(1)), unit)  # type: ignore[arg-type]


def window_ends(first: date, last: date, step: Period) -> list[date]:
    """``first``, ``first + step``, ... up to ``last`` (inclusive); counted from ``first`` so
    month-end clipping does not drift."""
    out: list[date] = []
    k = 0
    while (end := step.after(first, k)) <= last:
        out.append(end)
        k += 1
    return out


def window_start(end: date, length: Period) -> date:
    """First day of the window that ends on ``end``: ``end - length + 1 day``."""
    return length.before(end) + timedelta(days=1)


# --- work units ----------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class FitSettings:
    """The estimator's settings for every window of a series (see :func:`calib.estimate.fit`)."""

    min_days: int = 250
    min_contracts: int = 3
    max_gap_days: float = 14.0
    loglik_tol: float = 1e-6


@dataclass(frozen=True, slots=True, eq=False)
class WindowTask:
    """One window's data as plain arrays; ``index`` is its place in the series."""

    index: int
    dates: np.ndarray[Any, Any]
    tau: FloatArray
    log_price: FloatArray
    rate: float
    check_cold: bool = False


@dataclass(frozen=True, slots=True, eq=False)
class ChunkTask:
    """Consecutive windows for one worker; ``warm`` optionally starts the first one
    (``warm_cov``: the covariance of that optimum, see the module notes)."""

    windows: tuple[WindowTask, ...]
    settings: FitSettings
    warm: tuple[TwoFactorParams, FloatArray] | None = None
    warm_cov: FloatArray | None = None


@dataclass(frozen=True, slots=True, eq=False)
class WindowFit:
    """What a worker returns for one window (picklable: plain values and arrays).

    ``error`` is set (and the estimate fields are empty) when the window's data cannot be
    estimated. ``start`` is how the kept estimate was started: ``warm``, ``cold`` (no
    previous optimum, or the cold check found a better one) or ``cold-retry`` (the warm fit
    did not converge). ``cold_loglik`` is the cold start's log-likelihood where it was run;
    ``local_optimum`` describes a disagreement between the two.
    """

    index: int
    error: str | None = None
    params: TwoFactorParams | None = None
    noise_sd: FloatArray | None = None
    std_errors: dict[str, float] | None = None
    covariance: FloatArray | None = None
    loglik: float = math.nan
    n_obs: int = 0
    n_days: int = 0
    n_contracts: int = 0
    converged: bool = False
    message: str = ""
    iterations: int = 0
    start: str = "cold"
    cold_loglik: float | None = None
    local_optimum: str | None = None
    filtered: FloatArray | None = None
    smoothed: FloatArray | None = None


def _fit(
    curves: Curves, rate: float, s: FitSettings, starts: Any = None, cov: FloatArray | None = None
) -> Estimate:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", EstimationWarning)  # the flag is on the result
        return fit(
            curves,
            rate,
            starts=starts,
            start_covariance=cov,
            min_days=s.min_days,
            min_contracts=s.min_contracts,
            max_gap_days=s.max_gap_days,
            loglik_tol=s.loglik_tol,
        )


def _result(index: int, e: Estimate, start: str, cold: float | None, note: str | None) -> WindowFit:
    return WindowFit(
        index=index,
        params=e.params,
        noise_sd=np.array(e.noise_sd),
        std_errors=dict(e.std_errors),
        covariance=np.array(e.covariance),
        loglik=e.loglik,
        n_obs=e.n_obs,
        n_days=e.n_days,
        n_contracts=e.n_contracts,
        converged=e.converged,
        message=e.message,
        iterations=e.iterations,
        start=start,
        cold_loglik=cold,
        local_optimum=note,
        filtered=np.array(e.states.filtered),
        smoothed=np.array(e.states.smoothed),
    )


def fit_window(
    task: WindowTask,
    settings: FitSettings,
    warm: tuple[TwoFactorParams, FloatArray] | None,
    warm_cov: FloatArray | None = None,
) -> WindowFit:
    """Estimate one window (warm-started when ``warm`` is given, in the coordinates of
    ``warm_cov`` when that is given too; see the module notes).

    Raises
    ------
    EstimationDataError, EstimationError
        As :func:`calib.estimate.fit`.
    """
    curves = Curves(task.dates, task.tau, task.log_price)
    if warm is None:
        return _result(task.index, _fit(curves, task.rate, settings), "cold", None, None)
    hot = _fit(curves, task.rate, settings, starts=[warm], cov=warm_cov)
    if not hot.converged:
        cold = _fit(curves, task.rate, settings)
        keep = cold if cold.loglik >= hot.loglik or cold.converged else hot
        return _result(task.index, keep, "cold-retry", cold.loglik, None)
    if not task.check_cold:
        return _result(task.index, hot, "warm", None, None)
    cold = _fit(curves, task.rate, settings)
    gap = cold.loglik - hot.loglik
    if abs(gap) <= LOCAL_OPTIMUM_TOL:
        return _result(task.index, hot, "warm", cold.loglik, None)
    worse = "warm" if gap > 0 else "cold"
    note = (
        f"warm and cold starts disagree: log-likelihood {hot.loglik:.4f} (warm) vs "
        f"{cold.loglik:.4f} (cold); the {worse} start stopped at a local optimum"
    )
    if gap > 0:
        return _result(task.index, cold, "cold", cold.loglik, note)
    return _result(task.index, hot, "warm", cold.loglik, note)


def fit_chunk(task: ChunkTask) -> list[WindowFit]:
    """Estimate a chunk's windows in order, each warm-started from the previous optimum."""
    out: list[WindowFit] = []
    warm, warm_cov = task.warm, task.warm_cov
    for window in task.windows:
        try:
            result = fit_window(window, task.settings, warm, warm_cov)
        except (EstimationDataError, EstimationError) as exc:
            result = WindowFit(index=window.index, error=f"{type(exc).__name__}: {exc}")
        out.append(result)
        if result.params is not None and result.noise_sd is not None and result.converged:
            warm, warm_cov = (result.params, result.noise_sd), result.covariance
    return out


def estimate_windows(
    windows: Sequence[WindowTask],
    settings: FitSettings,
    executor: Executor,
    *,
    chunk: int,
    warm: tuple[TwoFactorParams, FloatArray] | None = None,
    warm_cov: FloatArray | None = None,
) -> Iterator[list[WindowFit]]:
    """Estimate consecutive windows; yields each chunk's results in window order.

    Without ``warm``, the first window is estimated cold in this process and its optimum
    starts the first window of every chunk (parameters move slowly along a series, so even a
    distant window's optimum is a better start than the default ones; a warm fit that does
    not converge is redone cold), with its covariance (``warm_cov`` otherwise: the covariance
    at ``warm``, if known). The chunks then run on ``executor``.
    """
    rest = list(windows)
    if warm is None and rest:
        first = fit_chunk(ChunkTask((rest.pop(0),), settings))
        yield first
        (seed,) = first
        if seed.params is not None and seed.noise_sd is not None and seed.converged:
            warm, warm_cov = (seed.params, seed.noise_sd), seed.covariance
    size = max(1, chunk)
    tasks = [
        ChunkTask(tuple(rest[i : i + size]), settings, warm, warm_cov)
        for i in range(0, len(rest), size)
    ]
    yield from executor.map(fit_chunk, tasks)
