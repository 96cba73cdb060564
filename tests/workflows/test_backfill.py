"""Backfill on a generated scenario: resume after an interruption, failures with reasons,
auto-approval in date order, and the same parameters from one process or two."""

from __future__ import annotations

import datetime as dt
import itertools
from pathlib import Path

import pytest
from sqlalchemy import text

from calib.compute.executor import ProcessExecutor
from calib.errors import BackfillRangeError
from calib.policy.settings import RunSettings
from calib.store.engine import Store
from calib.store.runs import (
    approved_history,
    latest_approved,
    require_run,
    run_keys,
    run_status,
)
from calib.workflows import backfill as flow
from calib.workflows.estimates import import_estimate
from calib.workflows.fit import fit_day
from calib.workflows.rerun import rerun
from tests.hooks import inside_each_write
from tests.workflows.small_day import Loaded, load_with_estimate, write_estimate_file

N_DAYS = 8
FAST = RunSettings.from_dict({"calibration": {"refit_costs": False}})
# with three expiries a day a free rho swings between days: loose jump gates (test data only)
LOOSE = RunSettings.from_dict(
    {
        "calibration": {"refit_costs": False},
        "gates": {
            "max_rmse_vol_points": 1.4,
            "max_error_vol_points": 3.5,
            "max_jump_rho": 2.0,
            "max_jump_sigma_spot": 1.0,
            "max_jump_sigma_yield": 1.0,
        },
    }
)


@pytest.fixture
def loaded(store: Store, tmp_path: Path) -> Loaded:
    return load_with_estimate(store, tmp_path)


class StopRequestedError(Exception):
    """Stands for Ctrl-C part way through."""


class StopAfter:
    """A progress listener that interrupts the backfill after ``k`` stored days."""

    def __init__(self, k: int) -> None:
        self.k = k
        self.total: int | None = None
        self.seen: list[flow.BackfillDay] = []

    def start(self, total: int, skipped: int) -> None:
        self.total = total

    def advance(self, day: flow.BackfillDay) -> None:
        self.seen.append(day)
        if len(self.seen) == self.k:
            raise StopRequestedError


def _keys(store: Store, loaded: Loaded) -> list[tuple[dt.date, int]]:
    with store.sessions() as s:
        keys = run_keys(session=s, commodity=loaded.code, start=loaded.days[0], end=loaded.days[-1])
    return [(k.trade_date, k.estimate_id) for k in keys]


def test_interrupted_backfill_resumes_without_duplicates(
    store: Store, loaded: Loaded, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr(flow, "DAYS_PER_WRITE", 2)
    days = loaded.days[:N_DAYS]
    stop = StopAfter(3)  # told of a day once its write transaction has committed
    with pytest.raises(StopRequestedError):
        flow.backfill(store, loaded.code, days[0], days[-1], by="q", settings=FAST, progress=stop)
    assert stop.total == N_DAYS
    assert sorted(d for d, _ in _keys(store, loaded)) == days[:4]  # two complete writes

    again = flow.backfill(store, loaded.code, days[0], days[-1], by="q", settings=FAST)
    assert again.skipped == tuple(days[:4])
    assert [d.trade_date for d in again.days] == days[4:]
    assert again.count("fitted") == N_DAYS - 4 and not again.failures
    stored = sorted(d for d, _ in _keys(store, loaded))
    assert stored == days  # every day once: none twice, none missing

    # the resume key is (estimate, settings hash): the same command does nothing now,
    # other settings fit every day again as new runs beside the old ones
    idle = flow.backfill(store, loaded.code, days[0], days[-1], by="q", settings=FAST)
    assert len(idle.skipped) == N_DAYS and not idle.days
    other = RunSettings.from_dict({"calibration": {"refit_costs": True}})
    redo = flow.backfill(store, loaded.code, days[0], days[2], by="q", settings=other)
    assert not redo.skipped and redo.count("fitted") == 3
    assert redo.settings_sha256 != again.settings_sha256 == flow.settings_sha256(FAST)


class OtherBackfillMeanwhile:
    """A progress listener that, once the backfill has chosen its days (and before it stores
    any), runs a second backfill of part of the same range to its end: two overlapping runs."""

    def __init__(self, store: Store, loaded: Loaded, days: list[dt.date]) -> None:
        self.store, self.loaded, self.days = store, loaded, days
        self.other: flow.BackfillReport | None = None

    def start(self, total: int, skipped: int) -> None:
        code, days = self.loaded.code, self.days
        self.other = flow.backfill(self.store, code, days[2], days[5], by="q", settings=FAST)

    def advance(self, day: flow.BackfillDay) -> None:
        pass


def test_overlapping_backfills_store_each_day_once(
    store: Store, loaded: Loaded, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr(flow, "DAYS_PER_WRITE", 3)
    days = loaded.days[:N_DAYS]
    meanwhile = OtherBackfillMeanwhile(store, loaded, days)
    first = flow.backfill(
        store, loaded.code, days[0], days[-1], by="q", settings=FAST, progress=meanwhile
    )
    assert meanwhile.other is not None and meanwhile.other.count("fitted") == 4
    stored = sorted(d for d, _ in _keys(store, loaded))
    assert stored == days  # every day once, whoever stored it
    assert first.skipped == tuple(days[2:6])  # claimed by the other backfill meanwhile
    assert [d.trade_date for d in first.days] == days[:2] + days[6:]


def test_a_write_interrupted_before_its_commit_stores_none_of_its_days(
    store: Store, loaded: Loaded, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr(flow, "DAYS_PER_WRITE", 3)
    writes = itertools.count(1)

    def interrupt_the_second_write() -> None:  # inside the transaction, rows inserted
        if next(writes) == 2:
            raise StopRequestedError

    days = loaded.days[:N_DAYS]
    with (
        inside_each_write(store.sessions, interrupt_the_second_write),
        pytest.raises(StopRequestedError),
    ):
        flow.backfill(store, loaded.code, days[0], days[-1], by="q", settings=FAST)
    assert sorted(d for d, _ in _keys(store, loaded)) == days[:3]
    with store.engine.connect() as conn:  # nothing of the rolled-back days is left behind
        runs = conn.execute(text("SELECT count(*) FROM calibration_runs")).scalar_one()
        events = conn.execute(text("SELECT count(*) FROM run_events")).scalar_one()
        orphans = conn.execute(
            text(
                "SELECT count(*) FROM run_residuals WHERE run_id NOT IN "
                "(SELECT id FROM calibration_runs)"
            )
        ).scalar_one()
    assert (runs, events, orphans) == (3, 3, 0)
    again = flow.backfill(store, loaded.code, days[0], days[-1], by="q", settings=FAST)
    assert again.skipped == tuple(days[:3]) and again.count("fitted") == N_DAYS - 3


def test_failures_are_summarised_with_reasons(store: Store, loaded: Loaded, tmp_path: Path) -> None:
    # a trading day with futures but no options (an extra futures file for a Saturday)
    saturday = loaded.days[0] + dt.timedelta(days=(5 - loaded.days[0].weekday()) % 7)
    row = loaded.scenario.futures.iloc[0]
    extra = tmp_path / "extra_futures.csv"
    extra.write_text(
        "trade_date,commodity,delivery,settle\n"
        f"{saturday},{loaded.code},{row['delivery']:%Y-%m-%d},{row['settle']}\n"
    )
    from calib.workflows.ingest import ingest_file

    ingest_file(store.sessions, extra, "futures", by="tester")
    # and every quote filtered out: each day a TooFewQuotesError, stored as a rejected run
    settings = RunSettings.from_dict({"calibration": {"min_days_to_expiry": 400.0}})
    end = saturday + dt.timedelta(days=2)
    report = flow.backfill(store, loaded.code, loaded.days[0], end, by="q", settings=settings)
    dates = [d for d in loaded.days if d <= end]
    assert report.trade_dates == len(dates) + 1
    assert report.count("fitted") == 0 and report.count("failed") == len(dates)
    assert report.failure_kinds() == {"TooFewQuotesError": len(dates), "no_quotes": 1}
    quiet = next(d for d in report.failures if d.outcome == "no_quotes")
    assert quiet.trade_date == saturday and quiet.run_id is None
    assert quiet.reason == "no options stored"
    failed = [d for d in report.failures if d.outcome == "failed"]
    assert all(d.reason and d.reason.startswith("TooFewQuotesError: ") for d in failed)
    with store.sessions() as s:
        assert {run_status(session=s, run_id=d.run_id) for d in failed} == {"rejected"}  # type: ignore[arg-type]
    payload = report.to_dict()
    assert payload["failed"] == len(dates) and len(payload["failures"]) == len(dates) + 1
    with pytest.raises(BackfillRangeError, match="is after"):
        flow.backfill(store, loaded.code, end, loaded.days[0], by="q")


def test_auto_approve_supersedes_in_date_order(store: Store, loaded: Loaded) -> None:
    days = loaded.days[10 : 10 + N_DAYS]
    report = flow.backfill(
        store, loaded.code, days[0], days[-1], by="q", settings=LOOSE, auto_approve=True
    )
    passed = [d for d in report.days if d.auto_approved]
    assert 2 <= len(passed) < N_DAYS  # some days miss the rmse gate and stay candidates
    with store.sessions() as s:
        history = approved_history(session=s, commodity=loaded.code)
        current = latest_approved(session=s, commodity=loaded.code)
        for d in report.days:
            run = require_run(session=s, run_id=d.run_id)  # type: ignore[arg-type]
            assert run.fit is not None
            assert run.fit.all_gates_pass == d.auto_approved
            if not d.auto_approved:
                assert run.status == "candidate"
    # approved oldest day first, each superseding the one before
    assert [a.trade_date for a in history] == [d.trade_date for d in passed]
    assert [a.run_id for a in history] == [d.run_id for d in passed]
    for earlier, later in itertools.pairwise(history):
        assert earlier.superseded_at is not None and earlier.superseded_at <= later.approved_at
    assert history[-1].superseded_at is None
    assert current is not None and current.trade_date == passed[-1].trade_date


def test_each_day_is_gated_on_its_curve_move_as_a_morning_run_is(
    store: Store, loaded: Loaded, monkeypatch: pytest.MonkeyPatch
) -> None:
    # a write batch spans two reads (two as-of times) and starts after the range's first day
    monkeypatch.setattr(flow, "DAYS_PER_TASK", 3)
    monkeypatch.setattr(flow, "DAYS_PER_WRITE", 4)
    days = loaded.days[20 : 20 + N_DAYS]  # the first day's previous trading day is outside
    report = flow.backfill(store, loaded.code, days[0], days[-1], by="q", settings=FAST)
    with store.sessions() as s:
        runs = [require_run(session=s, run_id=d.run_id) for d in report.days]  # type: ignore[arg-type]
    for run in runs:
        alone = fit_day(store.sessions, loaded.code, run.trade_date, by="q", settings=FAST)
        assert run.fit is not None
        (mine,) = [g for g in run.fit.gates if g.name == "curve_move"]
        (theirs,) = [g for g in alone.gates if g.name == "curve_move"]
        assert mine == theirs and isinstance(mine.value, float)  # the same day compared
    first = {g.name: g for g in runs[0].fit.gates}["curve_move"]  # type: ignore[union-attr]
    assert loaded.days[19].isoformat() in first.detail


@pytest.mark.slow
def test_two_worker_processes_give_the_same_parameters(
    store: Store, loaded: Loaded, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr(flow, "DAYS_PER_TASK", 3)  # both workers get days, three at a time
    days = loaded.days[:N_DAYS]
    priced = RunSettings.from_dict({})  # re-fits without each binding constraint too
    one = flow.backfill(store, loaded.code, days[0], days[-1], by="q", settings=priced)
    # the same estimate imported again: a new estimate id, so the days are fitted again
    second = import_estimate(
        store.sessions,
        loaded.code,
        write_estimate_file(tmp_path / "e2.json", loaded.scenario),
        by="tester",
    )
    two = flow.backfill(
        store,
        loaded.code,
        days[0],
        days[-1],
        by="q",
        settings=priced,
        estimate_id=second.estimate_id,
        executor=ProcessExecutor(2),
    )
    assert [d.trade_date for d in two.days] == days  # stored in date order
    with store.sessions() as s:
        runs_one = [require_run(session=s, run_id=d.run_id) for d in one.days]  # type: ignore[arg-type]
        runs_two = [require_run(session=s, run_id=d.run_id) for d in two.days]  # type: ignore[arg-type]
    assert all(r.params is not None for r in runs_one)
    assert [r.params for r in runs_one] == [r.params for r in runs_two]  # bit for bit
    constraints = [r.fit.constraints for r in runs_one if r.fit is not None]
    assert constraints == [r.fit.constraints for r in runs_two if r.fit is not None]
    assert len(constraints) == len(runs_one)
    assert any(c.refit_cost is not None for day in constraints for c in day)
    # and equal to a fresh fit of the day from its stored rows (problem rebuilt)
    again = rerun(store.sessions, two.days[-1].run_id)  # type: ignore[arg-type]
    assert again.identical


def test_cli_json_then_resume_message(
    db_url: str,
    store: Store,
    loaded: Loaded,
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    import json
    import sys

    from calib.cli import main

    toml = tmp_path / "s.toml"
    toml.write_text("[calibration]\nrefit_costs = false\n")
    days = loaded.days[:3]
    args = ["calib", "backfill", loaded.code, "--from", str(days[0]), "--to", str(days[-1])]
    args += ["--settings", str(toml), "--db", db_url]
    for extra in (["--json"], []):
        monkeypatch.setattr(sys, "argv", [*args, *extra])
        with pytest.raises(SystemExit) as exit_info:
            main()
            raise SystemExit(0)
        assert (exit_info.value.code or 0) == 0
        out = capsys.readouterr()
        if extra:
            payload = json.loads(out.out)
            assert payload["fitted"] == 3 and payload["skipped"] == 0 and out.err == ""
            assert payload["settings_sha256"] == flow.settings_sha256(FAST)
        else:
            assert "3 skipped (already fitted), 0 fitted" in out.out
            assert "already fitted with these settings: skipped" in out.err
