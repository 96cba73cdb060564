"""Gates judge the final solution at the solver's stated precision (false alarms of an audit)."""

from __future__ import annotations

from dataclasses import replace

import pytest

from calib.calibrate import CalibrationResult, fit
from calib.model.twofactor import TwoFactorParams
from calib.policy.gates import GateLimits, evaluate_gates
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
