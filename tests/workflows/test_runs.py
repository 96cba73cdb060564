"""The morning run on a generated day: fit, gates, approval, supersession, rerun, failures,
and a fit killed mid-write. Every test runs on SQLite and PostgreSQL."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
from pathlib import Path

import pytest
from sqlalchemy import func, select

from calib.errors import NoEstimateError, NotConvergedEstimateError, SettingsFileError
from calib.policy.settings import RunSettings, load_settings
from calib.store.engine import Store
from calib.store.run_models import CalibrationRun, RunResidual
from calib.store.runs import latest_approved, run_residuals, run_status
from calib.workflows.approve import approve
from calib.workflows.estimates import import_estimate
from calib.workflows.fit import FitOutcome, fit_day
from calib.workflows.rerun import rerun
from tests.hooks import PAUSE_LINE, PAUSED_CLI
from tests.workflows.small_day import Loaded, load_scenario, load_with_estimate, write_estimate_file

REPO = Path(__file__).resolve().parents[2]


@pytest.fixture
def loaded(store: Store, tmp_path: Path) -> Loaded:
    return load_with_estimate(store, tmp_path)


def _latest_id(store: Store, code: str) -> int | None:
    with store.sessions() as s:
        run = latest_approved(session=s, commodity=code)
        return None if run is None else run.run_id


def test_fit_gates_approve_supersede_and_rerun(store: Store, loaded: Loaded) -> None:
    # rho held at history: with three expiries a day a free rho swings between days
    held = RunSettings.from_dict({"calibration": {"mode": "held_rho"}})
    first = fit_day(store.sessions, loaded.code, loaded.days[-2], by="quant", settings=held)
    assert first.run.status == "candidate" and first.previous is None
    names = [g.name for g in first.gates]
    assert names == [
        "solver_optimal",
        "decay_bound",
        "rmse_vol",
        "max_error_vol",
        "jump_sigma_spot",
        "jump_sigma_yield",
        "jump_rho",
        "constraints",
        "identified",
        "curve_move",
    ]
    with store.sessions() as s:
        residuals = run_residuals(session=s, run_id=first.run.run_id)
    assert first.run.fit is not None and len(residuals) == first.run.fit.n_quotes > 0
    # the gate value is the stored residuals' RMSE in vol points
    rmse = 100 * float((residuals["vol_residual"] ** 2).mean() ** 0.5)
    assert first.gates[2].value == pytest.approx(rmse, rel=1e-12)

    approval = approve(store.sessions, first.run.run_id, by="risk", note="looks fine")
    assert approval.superseded is None and approval.run.approved_by == "risk"
    assert _latest_id(store, loaded.code) == first.run.run_id

    second = fit_day(
        store.sessions, loaded.code, loaded.days[-1], by="quant", settings=held, auto_approve=True
    )
    assert second.previous is not None and second.previous.run_id == first.run.run_id
    jumps = {g.name: g for g in second.gates if g.name.startswith("jump")}
    spot_jump = abs(second.run.params.sigma_spot / first.run.params.sigma_spot - 1)  # type: ignore[union-attr]
    assert jumps["jump_sigma_spot"].value == pytest.approx(spot_jump, rel=1e-12)
    assert second.auto_approved and all(g.passed for g in second.gates), second.gates
    with store.sessions() as s:
        assert run_status(session=s, run_id=first.run.run_id) == "superseded"
        past = latest_approved(session=s, commodity=loaded.code, as_of=second.run.created_at)
    assert _latest_id(store, loaded.code) == second.run.run_id
    assert past is not None and past.run_id == first.run.run_id

    again = rerun(store.sessions, first.run.run_id)
    assert again.identical and again.params == first.run.params and not again.differences


def test_tight_gates_block_auto_approval(store: Store, loaded: Loaded, tmp_path: Path) -> None:
    toml = tmp_path / "s.toml"
    toml.write_text("[gates]\nmax_rmse_vol_points = 5.0\n[gates.QLM]\nmax_rmse_vol_points = 0.0\n")
    settings = load_settings(toml, loaded.code)
    assert settings.gates.max_rmse_vol_points == 0.0  # the commodity's own table wins
    outcome = _auto_approved_last_day(store, loaded, settings)
    failed = [g.name for g in outcome.gates if not g.passed]
    assert "rmse_vol" in failed and not outcome.auto_approved
    assert outcome.run.status == "candidate" and _latest_id(store, loaded.code) is None
    toml.write_text("[calibration]\nmode = 'sideways'\n")
    with pytest.raises(SettingsFileError, match="mode = 'sideways' is invalid"):
        load_settings(toml, loaded.code)


def _auto_approved_last_day(store: Store, loaded: Loaded, settings: RunSettings) -> FitOutcome:
    """The last day fitted with ``settings``, approved if its gates pass."""
    return fit_day(
        store.sessions, loaded.code, loaded.days[-1], by="q", settings=settings, auto_approve=True
    )


def test_failed_fit_is_stored_rejected_and_never_replaces_the_approved_set(
    store: Store, loaded: Loaded
) -> None:
    good = fit_day(store.sessions, loaded.code, loaded.days[-2], by="q")
    approve(store.sessions, good.run.run_id, by="risk", note="ok")
    # every quote is under a year to expiry, so this filter leaves none: TooFewQuotesError
    settings = RunSettings.from_dict({"calibration": {"min_days_to_expiry": 400.0}})
    bad = _auto_approved_last_day(store, loaded, settings)
    assert bad.run.outcome == "failed" and bad.run.status == "rejected"
    assert bad.run.params is None and "TooFewQuotesError" in (bad.run.failure_reason or "")
    assert [e.to_status for e in bad.run.events] == ["rejected"]
    assert _latest_id(store, loaded.code) == good.run.run_id
    with store.sessions() as s:
        assert run_residuals(session=s, run_id=bad.run.run_id).empty


def test_estimate_choice_never_uses_an_unconverged_one(
    store: Store, loaded: Loaded, tmp_path: Path
) -> None:
    bad = import_estimate(
        store.sessions,
        loaded.code,
        write_estimate_file(tmp_path / "bad.json", loaded.scenario, converged=False),
        by="t",
    )
    outcome = fit_day(store.sessions, loaded.code, loaded.days[-1], by="q")
    assert outcome.run.estimate_id == bad.estimate_id - 1  # the converged import
    with pytest.raises(NotConvergedEstimateError, match=f"estimate {bad.estimate_id} did not"):
        fit_day(store.sessions, loaded.code, loaded.days[-1], by="q", estimate_id=bad.estimate_id)


def test_no_estimate_is_a_clear_error(store: Store, tmp_path: Path) -> None:
    data = load_scenario(store, tmp_path)
    with pytest.raises(NoEstimateError, match="no converged historical estimate for QLM"):
        fit_day(store.sessions, data.code, data.days[-1], by="q")


@pytest.mark.slow
def test_fit_killed_mid_write_leaves_no_partial_run(
    store: Store, loaded: Loaded, db_url: str
) -> None:
    good = fit_day(store.sessions, loaded.code, loaded.days[-2], by="q")
    approve(store.sessions, good.run.run_id, by="risk", note="ok")
    env = {**os.environ, "PYTHONPATH": str(REPO)}
    command = [
        sys.executable,
        "-c",
        PAUSED_CLI,
        "60",
        "fit",
        loaded.code,
        "--date",
        str(loaded.days[-1]),
        "--auto-approve",
        "--db",
        db_url,
    ]
    child = subprocess.Popen(command, env=env, stderr=subprocess.PIPE, text=True, cwd=REPO)
    try:
        assert child.stderr is not None
        line = child.stderr.readline()  # printed inside the transaction, after the inserts
        assert PAUSE_LINE in line, line
        child.send_signal(signal.SIGKILL)
    finally:
        child.wait(timeout=30)
    assert child.returncode == -signal.SIGKILL
    with store.sessions() as s:
        assert s.scalar(select(func.count()).select_from(CalibrationRun)) == 1
        assert (
            s.scalar(
                select(func.count())
                .select_from(RunResidual)
                .where(RunResidual.run_id != good.run.run_id)
            )
            == 0
        )
        if s.get_bind().dialect.name == "sqlite":
            assert s.connection().exec_driver_sql("PRAGMA integrity_check").scalar() == "ok"
    assert _latest_id(store, loaded.code) == good.run.run_id
