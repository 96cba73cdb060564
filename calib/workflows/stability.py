"""The stability view of a rolling series: each parameter over time with its band, the
estimate in use, drift and decay-bound flags, and how often to re-estimate.

One read transaction gathers the series' estimates and the estimate in use (named, else the
one the latest approved run held fixed, else the morning fit's default); the numbers come from
:mod:`calib.estimate.stability`; :mod:`calib.output.stability` draws a report's CSV and chart.

Cautions: an estimate is a statistic with an error; the ``+-2 s.e.`` band is the asymptotic
normal approximation (it can be too narrow on short windows and for poorly identified
drifts), and a quiet history does not promise a quiet future.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from datetime import date
from typing import Any

import numpy as np
from sqlalchemy.orm import Session, sessionmaker

from calib.errors import (
    STABILITY_EMPTY,
    STABILITY_NO_SERIES,
    STABILITY_UNKNOWN_SERIES,
    RollingRequestError,
    UnknownEstimateError,
)
from calib.estimate.rolling import parse_period
from calib.estimate.stability import decay_slack, drift_z, longest_quiet_interval
from calib.model.twofactor import PARAM_NAMES
from calib.record.codec import encode
from calib.record.run import flat_params
from calib.store.estimates import (
    EstimateRecord,
    SeriesRecord,
    get_estimate,
    get_series,
    latest_estimate,
    list_series,
    series_estimates,
)
from calib.store.quotes import require_commodity
from calib.store.runs import latest_approved

DEFAULT_K = 3.0
"""Standard errors of the difference beyond which a window is flagged (``--k``)."""

CAUTION = (
    "An estimate is a statistic with an error: the +-2 s.e. band is asymptotic (normal "
    "approximation to the likelihood), too narrow on short windows and for poorly identified "
    "drifts; a quiet past does not promise a quiet future. Validate before use; the firm's "
    "model-validation policy prevails."
)


def _se(e: EstimateRecord, name: str) -> float:
    v = e.std_errors.get(name)
    return float("nan") if v is None else float(v)


@dataclass(frozen=True, slots=True)
class StabilityWindow:
    """One window of the series as the stability view sees it."""

    estimate_id: int
    window_start: date
    window_end: date
    converged: bool
    params: dict[str, float]
    std_errors: dict[str, float]
    z: dict[str, float]
    """(window - in use) / sqrt(se_window^2 + se_in_use^2) by parameter."""
    flags: tuple[str, ...]
    """Parameters beyond ``k``, plus ``decay_bound`` where it fails, ``not_converged``."""
    decay_slack: float
    in_use: bool

    def to_dict(self) -> dict[str, Any]:
        """Plain values for JSON (a NaN as ``null``), the parameters at the top level."""
        return flat_params(encode(self))


@dataclass(frozen=True, slots=True)
class StabilityReport:
    """The stability of one rolling series against the estimate in use."""

    series: SeriesRecord
    in_use: EstimateRecord
    in_use_how: str
    k: float
    windows: tuple[StabilityWindow, ...]
    quiet_steps: int
    recommendation: str

    @property
    def flagged(self) -> tuple[StabilityWindow, ...]:
        return tuple(w for w in self.windows if w.flags)

    def to_dict(self) -> dict[str, Any]:
        use = self.in_use
        return {
            "commodity": self.series.commodity,
            "series": self.series.to_dict(),
            "k": self.k,
            "in_use": {
                "estimate_id": use.estimate_id,
                "how": self.in_use_how,
                "window_start": use.window_start.isoformat(),
                "window_end": use.window_end.isoformat(),
                **use.params.to_dict(),
                "std_errors": {n: use.std_errors.get(n) for n in PARAM_NAMES},
            },
            "windows": [w.to_dict() for w in self.windows],
            "n_flagged": len(self.flagged),
            "quiet_steps": self.quiet_steps,
            "recommendation": self.recommendation,
            "caution": CAUTION,
        }


def _in_use(
    session: Session, commodity: str, estimate_id: int | None
) -> tuple[EstimateRecord, str]:
    if estimate_id is not None:
        named = get_estimate(session=session, estimate_id=estimate_id)
        if named is None:
            raise UnknownEstimateError(estimate_id)
        if named.commodity != commodity:
            raise UnknownEstimateError(estimate_id, f" for {commodity} (it is {named.commodity}'s)")
        return named, "named"
    run = latest_approved(session=session, commodity=commodity)
    if run is not None:
        held = get_estimate(session=session, estimate_id=run.estimate_id)
        if held is not None:
            return held, f"held fixed by the latest approved run {run.run_id}"
    default = latest_estimate(session=session, commodity=commodity)
    if default is None:
        raise RollingRequestError(commodity, "no converged estimate to compare the series with")
    return default, "the morning fit's default (newest converged single estimate)"


def _recommend(series: SeriesRecord, n: int, quiet: int, k: float, decay_bad: int) -> str:
    step = parse_period("step", series.step)
    if n < 2:
        text = "one window only: nothing to compare yet"
    elif quiet >= n - 1:
        span = f"{quiet * step.count}{step.unit}"
        text = (
            f"no two windows differ by more than {k:g} s.e. over the whole history: "
            f"re-estimating every {span} ({quiet} steps) or less raised no flag"
        )
    elif quiet == 0:
        text = (
            f"neighbouring windows already differ by more than {k:g} s.e.: the estimate is "
            f"not stable at a {series.step} step; re-estimate at every step and investigate"
        )
    else:
        span = f"{quiet * step.count}{step.unit}"
        text = (
            f"re-estimate at least every {span} ({quiet} steps of {series.step}): the longest "
            f"interval over which no window differed by more than {k:g} s.e. from a later one"
        )
    if decay_bad:
        text += f"; {decay_bad} window(s) fail the decay bound"
    return text


def assemble(
    series: SeriesRecord,
    records: Sequence[EstimateRecord],
    in_use: EstimateRecord,
    how: str,
    k: float = DEFAULT_K,
) -> StabilityReport:
    """The stability view of ``records`` (windows of ``series``, in order) against ``in_use``.

    Pure: no store access. :func:`stability` reads its inputs and calls this; the fit report
    calls it with the windows known on the run's trade date and the estimate the run held.
    """
    values = np.array([[getattr(e.params, n) for n in PARAM_NAMES] for e in records])
    se = np.array([[_se(e, n) for n in PARAM_NAMES] for e in records])
    ok = np.array([e.converged for e in records])
    ref = np.array([getattr(in_use.params, n) for n in PARAM_NAMES])
    ref_se = np.array([_se(in_use, n) for n in PARAM_NAMES])
    z = drift_z(values, se, ref, ref_se)
    p = {n: values[:, i] for i, n in enumerate(PARAM_NAMES)}
    slack = decay_slack(p["kappa"], p["rho"], p["sigma_spot"], p["sigma_yield"])
    windows = []
    for i, e in enumerate(records):
        flags = [n for j, n in enumerate(PARAM_NAMES) if abs(z[i, j]) > k]
        if slack[i] < 0.0:
            flags.append("decay_bound")
        if not e.converged:
            flags.append("not_converged")
        windows.append(
            StabilityWindow(
                estimate_id=e.estimate_id,
                window_start=e.window_start,
                window_end=e.window_end,
                converged=e.converged,
                params=e.params.to_dict(),
                std_errors={n: float(se[i, j]) for j, n in enumerate(PARAM_NAMES)},
                z={n: float(z[i, j]) for j, n in enumerate(PARAM_NAMES)},
                flags=tuple(flags),
                decay_slack=float(slack[i]),
                in_use=e.estimate_id == in_use.estimate_id,
            )
        )
    quiet = longest_quiet_interval(values[ok], se[ok], k)
    decay_bad = int(np.count_nonzero(slack < 0.0))
    return StabilityReport(
        series=series,
        in_use=in_use,
        in_use_how=how,
        k=float(k),
        windows=tuple(windows),
        quiet_steps=quiet,
        recommendation=_recommend(series, int(ok.sum()), quiet, k, decay_bad),
    )


def stability(
    sessions: sessionmaker[Session],
    commodity: str,
    *,
    series_id: int | None = None,
    estimate_id: int | None = None,
    k: float = DEFAULT_K,
) -> StabilityReport:
    """The stability view of a rolling series (default: the commodity's newest).

    Raises
    ------
    RollingRequestError
        No series, an unknown or empty series, or no estimate to compare with.
    UnknownEstimateError, UnknownCommodityError
    """
    with sessions.begin() as session:
        require_commodity(session=session, code=commodity)
        if series_id is None:
            found = list_series(session=session, commodity=commodity)
            if not found:
                raise RollingRequestError(
                    commodity, STABILITY_NO_SERIES.format(commodity=commodity)
                )
            series = found[0]
        else:
            got = get_series(session=session, series_id=series_id)
            if got is None or got.commodity != commodity:
                raise RollingRequestError(
                    commodity, STABILITY_UNKNOWN_SERIES.format(series_id=series_id)
                )
            series = got
        records = series_estimates(session=session, series_id=series.series_id)
        if not records:
            raise RollingRequestError(commodity, STABILITY_EMPTY.format(series_id=series.series_id))
        in_use, how = _in_use(session, commodity, estimate_id)
    return assemble(series, records, in_use, how, k)
