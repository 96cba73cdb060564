"""Backfill of 2,500 trading days (12 expiries x 15 strikes) against a fresh fit per day.

Own: :func:`calib.workflows.backfill.backfill` with two worker processes on a temporary SQLite
store (the caller reads the days 16 at a time and ships them to the workers, each of which
re-solves one compiled problem, and those of the re-fits without a binding constraint, every
day; the caller, the one writer, stores the runs, their residuals and events, 16 days per
transaction). Besides the wall time it prints the CPU time
of the backfill (this process and its workers), which a shared machine's load inflates far
less: on two idle cores the wall time is about half of it.

Peer, in the same run: the same days read and fitted by a fresh :func:`calib.calibrate.fit`
each (problem rebuilt every day), one process, nothing stored, on every ``SUBSAMPLE``-th day,
scaled to all the days. Data: the invented demo scenario over ten years with 15 strikes, and
its true parameters imported as the historical estimate.
"""

from __future__ import annotations

import json
import resource
import tempfile
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, replace
from datetime import date
from pathlib import Path

from calib.compute.executor import ProcessExecutor
from calib.policy.settings import RunSettings
from calib.store.engine import Store, make_store
from calib.store.estimates import EstimateRecord
from calib.store.migrate import upgrade
from calib.store.quotes import load_day, trade_dates
from calib.workflows.backfill import backfill
from calib.workflows.demo.scenario import Scenario, ScenarioSpec, generate, write_csv
from calib.workflows.estimates import import_estimate
from calib.workflows.fit import attempt_fit
from calib.workflows.ingest import NewCommodity, ingest_file

N_DATES = 2_500
WORKERS = 2
SUBSAMPLE = 50
TARGET_SECONDS = 30.0
SPEC = ScenarioSpec(years=10, n_strikes=15)


def _cpu_seconds() -> float:
    """User and system CPU time of this process and of its children that have ended."""
    total = 0.0
    for who in (resource.RUSAGE_SELF, resource.RUSAGE_CHILDREN):
        usage = resource.getrusage(who)
        total += usage.ru_utime + usage.ru_stime
    return total


@dataclass(frozen=True)
class Prepared:
    """A temporary SQLite store with the scenario ingested and its true parameters imported."""

    store: Store
    scenario: Scenario
    code: str
    estimate: EstimateRecord
    dates: list[date]
    estimate_file: Path


@contextmanager
def prepared_store(spec: ScenarioSpec, n_dates: int) -> Iterator[Prepared]:
    """:func:`prepare_store` in a temporary folder, its set-up time printed; removed after."""
    with tempfile.TemporaryDirectory() as tmp:
        t0 = time.perf_counter()
        prepared = prepare_store(Path(tmp), spec, n_dates)
        print(
            f"setup (generate, ingest {len(prepared.scenario.options):,} options): "
            f"{time.perf_counter() - t0:.1f} s; {len(prepared.dates)} trade dates"
        )
        try:
            yield prepared
        finally:
            prepared.store.engine.dispose()


def prepare_store(folder: Path, spec: ScenarioSpec, n_dates: int) -> Prepared:
    """Generate ``spec`` under ``folder``, ingest it, import its parameters as the estimate;
    the first ``n_dates`` trade dates."""
    scenario = generate(spec)
    paths = write_csv(scenario, folder)
    store = make_store(f"sqlite:///{folder / 'bench.sqlite'}")
    upgrade(store.engine)
    new = NewCommodity(unit="tonne", currency="USD", calendar_rule="monthly")
    for kind in ("futures", "rates", "options"):
        ingest_file(store.sessions, paths[kind], kind, by="bench", create=new)
    estimate_file = folder / "estimate.json"
    window = {"window_start": "2031-01-06", "window_end": "2031-12-31"}
    estimate_file.write_text(json.dumps({**scenario.params.to_dict(), **window}))
    code = scenario.commodity["code"]
    estimate = import_estimate(store.sessions, code, estimate_file, by="bench")
    with store.sessions() as s:
        dates = trade_dates(session=s, commodity=code)[:n_dates]
    return Prepared(store, scenario, code, estimate, dates, estimate_file)


def main() -> None:
    settings = RunSettings.from_dict({})
    with prepared_store(SPEC, N_DATES) as prepared:
        store, code = prepared.store, prepared.code
        estimate, dates = prepared.estimate, prepared.dates

        cpu0 = _cpu_seconds()
        report = backfill(
            store, code, dates[0], dates[-1], by="bench", executor=ProcessExecutor(WORKERS)
        )
        cpu = _cpu_seconds() - cpu0  # the workers are joined, so their time is counted
        n = len(report.days)
        print(
            f"own  backfill, {WORKERS} workers: {report.seconds:.1f} s for {n} days "
            f"({1e3 * report.seconds / n:.1f} ms/day; {report.count('fitted')} fitted, "
            f"{len(report.failures)} failed); target <= {TARGET_SECONDS:.0f} s"
        )
        print(
            f"     where the time goes: fit {report.fit_seconds:.1f} s summed over the "
            f"workers ({1e3 * report.fit_seconds / n:.1f} ms/day/worker), reads "
            f"{report.read_seconds:.1f} s and writes "
            f"{report.write_seconds:.1f} s in the writer "
            f"({1e3 * report.write_seconds / n:.1f} ms/day)"
        )
        print(
            f"     CPU time, writer and workers: {cpu:.1f} s ({1e3 * cpu / n:.1f} ms/day), "
            f"so about {cpu / WORKERS:.1f} s on {WORKERS} idle cores"
        )

        sample = dates[::SUBSAMPLE]
        t1 = time.perf_counter()
        with store.sessions() as s:
            for d in sample:
                day = load_day(session=s, commodity=code, trade_date=d)
                attempt_fit(day, estimate.params, settings.calibration)
        peer_each = (time.perf_counter() - t1) / len(sample)
        peer = peer_each * len(dates)
        print(
            f"peer fresh fit per day, 1 process: {1e3 * peer_each:.1f} ms/day on {len(sample)} "
            f"days, scaled to {len(dates)}: {peer:.1f} s"
        )
        print(f"ratio peer / own: {peer / report.seconds:.2f}")
        fast = replace(settings.calibration, refit_costs=False)
        t2 = time.perf_counter()
        with store.sessions() as s:
            for d in sample:
                day = load_day(session=s, commodity=code, trade_date=d)
                attempt_fit(day, estimate.params, fast)
        print(
            f"note: refit_costs=False, fresh fit per day: "
            f"{1e3 * (time.perf_counter() - t2) / len(sample):.1f} ms/day"
        )


if __name__ == "__main__":
    main()
