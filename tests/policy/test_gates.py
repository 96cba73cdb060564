"""Gates judge the final solution at the solver's stated precision (false alarms of an audit)."""

from __future__ import annotations

import math
from dataclasses import replace
from datetime import date

import numpy as np
import pytest

from calib.calibrate import CalibrationResult, fit
from calib.errors import SettingError
from calib.model.twofactor import TwoFactorParams
from calib.policy.gates import CurveMove, GateLimits, curve_move, evaluate_gates
from calib.record.fit import Gate
from tests.calibrate.quotes_from_model import make_quotes

TRUE = TwoFactorParams(
    mu=0.05, kappa=1.5, alpha=0.04, lam=0.01, sigma_spot=0.35, sigma_yield=0.25, rho=0.8
)


@pytest.fixture(scope="module")
def clean() -> CalibrationResult:
    """A fit of quotes priced from TRUE: optimal, every constraint met, identified."""
    return fit(make_quotes(TRUE, maturity_gaps=(0.05, 0.5)), TRUE)


def _gate(result: CalibrationResult, name: str) -> bool:
    return {g.name: g.passed for g in evaluate_gates(result, GateLimits(), None)}[name]


def test_clean_fit_passes_the_solver_constraint_and_identification_gates(
    clean: CalibrationResult,
) -> None:
    gates = {g.name: g for g in evaluate_gates(clean, GateLimits(), None)}
    assert clean.final_optimal and clean.constraints_met and not clean.not_identified
    for name in ("solver_optimal", "decay_bound", "constraints", "identified"):
        assert gates[name].passed, gates[name]


def test_an_inaccurate_first_sub_solve_does_not_fail_an_optimal_final_solution(
    clean: CalibrationResult,
) -> None:
    earlier = replace(clean, inaccurate_steps=1)
    assert _gate(earlier, "solver_optimal")
    final = replace(clean, flags=("inaccurate",))
    assert not _gate(final, "solver_optimal")


def test_decay_slack_within_the_solver_precision_passes(clean: CalibrationResult) -> None:
    decay = [c for c in clean.constraints if c.name == "decay_bound"]
    assert decay, "the default settings impose the decay bound"
    noisy = tuple(
        replace(c, slack=-3e-7, tolerance=1e-6) if c.name == "decay_bound" else c
        for c in clean.constraints
    )
    assert _gate(replace(clean, constraints=noisy), "decay_bound")
    broken = tuple(
        replace(c, slack=-1e-3, tolerance=1e-6) if c.name == "decay_bound" else c
        for c in clean.constraints
    )
    assert not _gate(replace(clean, constraints=broken), "decay_bound")
    assert not _gate(replace(clean, constraints=broken), "constraints")


def test_a_parameter_the_quotes_do_not_identify_fails_its_gate(clean: CalibrationResult) -> None:
    vague = replace(clean, not_identified=("sigma_yield",), not_identified_reason="one expiry")
    gates = {g.name: g for g in evaluate_gates(vague, GateLimits(), None)}
    assert not gates["identified"].passed and gates["identified"].detail == "one expiry"


# --- the day's curve move against the previous stored day -------------------------------------

DAYS = np.array(["2031-02-11", "2031-03-11", "2031-04-08"], dtype="datetime64[D]")
BEFORE = np.array([1621.0, 1630.5, 1641.0])


def _curve_gate(
    clean: CalibrationResult, move: CurveMove | None, limits: GateLimits | None = None
) -> Gate:
    gates = evaluate_gates(clean, limits or GateLimits(), None, move)
    (gate,) = [g for g in gates if g.name == "curve_move"]
    return gate


def test_a_settle_typed_ten_times_fails_the_curve_move_gate(clean: CalibrationResult) -> None:
    def _curve(settle: list[float], limits: GateLimits | None = None) -> Gate:
        move = curve_move(DAYS, np.array(settle), DAYS[::-1], BEFORE[::-1], date(2031, 1, 10))
        return _curve_gate(clean, move, limits)

    typo = _curve([16210.0, 1631.0, 1640.0])  # 1621.0 typed as 16210.0
    assert not typo.passed and typo.value == pytest.approx(math.log(10.0), rel=1e-12)
    assert "2031-02-11" in typo.detail and "2031-01-10" in typo.detail
    shrunk = _curve([1621.0, 163.05, 1641.0])  # a digit lost: the same size the other way
    assert not shrunk.passed and shrunk.value == pytest.approx(math.log(10.0), rel=1e-12)
    usual = _curve([1625.0, 1633.0, 1639.5])
    assert usual.passed and usual.value == pytest.approx(math.log(1625.0 / 1621.0), rel=1e-12)
    wide = GateLimits.from_dict({"max_curve_move": 3.0})  # the band is the settings file's
    assert _curve([16210.0, 1631.0, 1640.0], wide).passed


def test_curve_move_with_nothing_to_compare_passes_without_a_value(
    clean: CalibrationResult,
) -> None:
    gate = _curve_gate(clean, None)
    assert gate.passed and gate.value is None and "no earlier trading day" in gate.detail
    apart = curve_move(DAYS, BEFORE, DAYS + 1, BEFORE, date(2031, 1, 10))
    assert apart.size is None and apart.common == 0
    negative = curve_move(DAYS, np.array([-1.0, 1630.5, 1641.0]), DAYS, BEFORE, date(2031, 1, 10))
    assert negative.size == math.inf  # not a price: the gate cannot pass it


def test_the_curve_move_band_is_checked_like_the_other_limits() -> None:
    with pytest.raises(SettingError, match="max_curve_move"):
        GateLimits.from_dict({"max_curve_move": -0.1})
