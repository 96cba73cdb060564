"""Edge cases of the fit: held-correlation limits, re-fits that cannot run, every bound
reported, what the gates judge, and numerical failures surfacing as calibration errors.

Each test here failed before its fix (issue 18 defects 1-5, issue 19 item 2).
"""

from __future__ import annotations

import warnings
from dataclasses import replace

import cvxpy
import pytest

from calib.calibrate import CalibrationSettings, OptionQuotes, fit
from calib.calibrate.constraints import FAMILIES, SPOT_VOL_LIMIT, active
from calib.errors import (
    CALIBRATION_ERRORS,
    CalibrationNumericalError,
    InfeasibleSettingsError,
)
from calib.model.twofactor import TwoFactorParams
from calib.workflows.fit import CALIBRATION_FAILURES
from tests.calibrate.quotes_from_model import TRUE, make_quotes


@pytest.fixture(scope="module")
def quotes() -> OptionQuotes:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # quad's round-off note at 1e-14 relative
        return make_quotes(TRUE)


def _quiet_quotes(params: TwoFactorParams, **kw: object) -> OptionQuotes:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return make_quotes(params, **kw)  # type: ignore[arg-type]


# --- defect 1: the feasibility check uses the scan's own limits ----------------------------


def test_held_rho_floor_beyond_the_scans_spot_limit_is_a_stored_refusal(
    quotes: OptionQuotes,
) -> None:
    # the historical estimate of the audit: the floor 0.5 x 0.308 = 0.154 needs
    # sigma_spot >= 0.154 / (0.26 x 0.0525) = 11.3 > 10, the scan's limit without a cap
    hist = TRUE.with_vols(0.3, 0.308, 0.26)
    hist = replace(hist, kappa=0.0525)
    with pytest.raises(InfeasibleSettingsError, match=r"scan limit sigma_spot <= 10") as info:
        fit(quotes, hist, CalibrationSettings(mode="held_rho"))
    # what the morning run stores as a rejected run with the reason (not exit 2)
    assert isinstance(info.value, CALIBRATION_FAILURES)
    assert isinstance(info.value, CALIBRATION_ERRORS)
    assert info.value.shortfall == pytest.approx(0.154 - 0.26 * 0.0525 * SPOT_VOL_LIMIT)


# --- defect 2: a re-fit that cannot run is reported, the fit stands -----------------------


def test_held_rho_with_two_quotes_fits_and_reports_the_refit_as_not_available() -> None:
    q = _quiet_quotes(TRUE, expiries=(0.5, 1.0), moneyness=(1.0,))
    assert len(q) == 2
    res = fit(q, TRUE.with_vols(0.3, 0.3, TRUE.rho), CalibrationSettings(mode="held_rho"))
    held = {c.name: c for c in res.constraints}["held_rho"]
    assert held.binds and held.refit_cost is None
    assert held.refit_note is not None
    assert held.refit_note.startswith("not available: only 2 usable option quote(s)")
    assert "constant mode needs at least 3" in held.refit_note


# --- defect 3: held rho <= 0 with the decay bound is one rule ------------------------------


@pytest.mark.parametrize("rho", [-0.2, 0.0])
@pytest.mark.parametrize("floor", [0.0, 0.5])
def test_held_non_positive_rho_with_the_decay_bound_is_refused(
    quotes: OptionQuotes, rho: float, floor: float
) -> None:
    hist = TRUE.with_vols(0.3, 0.3, rho)
    s = CalibrationSettings(mode="held_rho", yield_floor=floor)
    with pytest.raises(InfeasibleSettingsError, match="decay_bound") as info:
        fit(quotes, hist, s)
    assert isinstance(info.value, CALIBRATION_FAILURES)


def test_no_result_is_optimal_with_a_violated_constraint(quotes: OptionQuotes) -> None:
    # the audit's case: held rho <= 0, decay bound on, no floor returned sigma_yield = 0,
    # "optimal", with the decay slack -0.099 listed as binding
    for rho in (-0.5, -0.01, 0.0):
        with pytest.raises(InfeasibleSettingsError):
            fit(
                quotes,
                TRUE.with_vols(0.3, 0.3, rho),
                CalibrationSettings(mode="held_rho", yield_floor=0.0),
            )
    # with the decay bound off the same histories fit, and every constraint holds
    res = fit(
        quotes,
        TRUE.with_vols(0.3, 0.3, -0.2),
        CalibrationSettings(mode="held_rho", yield_floor=0.0, decay_bound=False),
    )
    assert res.constraints_met


# --- defect 4: every bound the solver uses is listed, and reported when it binds ----------


def test_held_scan_ratio_limit_is_listed_and_binds(quotes: OptionQuotes) -> None:
    # the market's sigma_yield / sigma_spot is 0.25 / 0.35 = 0.71; the scan stops at 0.5
    s = CalibrationSettings(
        mode="held_rho", decay_bound=False, max_vol_ratio=0.5, anchor_weight=0.0
    )
    res = fit(quotes, TRUE, s)
    by_name = {c.name: c for c in res.constraints}
    assert set(by_name) == {"yield_floor", "spot_limit", "held_rho", "ratio_limit"}
    ratio = by_name["ratio_limit"]
    assert ratio.binds and ratio.slack == pytest.approx(0.0, abs=1e-9)
    assert res.params.sigma_yield / res.params.sigma_spot == pytest.approx(0.5, rel=1e-9)
    assert "ratio_limit" in res.binding
    assert ratio.refit_note == "not available: the constraint has no switch"
    assert by_name["spot_limit"].slack == pytest.approx(SPOT_VOL_LIMIT - res.params.sigma_spot)


def test_held_scan_spot_limit_binds_when_the_market_asks_for_more() -> None:
    # a market whose spot volatility is 12 (1200 % a year): the scan stops at 10
    wild = TRUE.with_vols(12.0, 0.5, 0.7)
    q = _quiet_quotes(wild, expiries=(0.05, 0.1, 0.15), moneyness=(0.9, 1.0, 1.1))
    s = CalibrationSettings(
        mode="held_rho",
        decay_bound=False,
        anchor_weight=0.0,
        min_days_to_expiry=0.0,
        refit_costs=False,
        min_vega=0.0,
        moneyness_band=(0.01, 100.0),
    )
    res = fit(q, wild, s)
    spot = {c.name: c for c in res.constraints}["spot_limit"]
    assert spot.binds and res.params.sigma_spot == pytest.approx(SPOT_VOL_LIMIT, rel=1e-12)


def test_every_family_has_one_name_form_and_switch() -> None:
    names = [c.name for c in FAMILIES]
    assert len(set(names)) == len(names)
    s = CalibrationSettings(sigma_spot_cap=1.0)
    assert [c.name for c in active(s)] == ["psd", "decay_bound", "yield_floor", "sigma_spot_cap"]
    held = replace(s, mode="held_rho", sigma_spot_cap=None, decay_bound=False)
    assert [c.name for c in active(held)] == [
        "yield_floor",
        "spot_limit",
        "held_rho",
        "ratio_limit",
    ]


# --- defect 5: the final solution, with tolerances from the solver's precision ------------


def test_an_inaccurate_first_sub_solve_does_not_flag_an_exact_final_solution(
    quotes: OptionQuotes, monkeypatch: pytest.MonkeyPatch
) -> None:
    real = cvxpy.Problem.solve
    calls = {"n": 0}

    def first_inaccurate(self: cvxpy.Problem, *args: object, **kwargs: object) -> None:
        real(self, *args, **kwargs)
        calls["n"] += 1
        if calls["n"] == 1:
            self._status = cvxpy.OPTIMAL_INACCURATE

    monkeypatch.setattr(cvxpy.Problem, "solve", first_inaccurate)
    res = fit(quotes, TRUE.with_vols(0.3, 0.6, 0.7), CalibrationSettings(refit_costs=False))
    assert res.flags == () and res.status == "optimal" and res.final_optimal
    assert res.inaccurate_steps == 1


def test_constraint_tolerances_follow_the_solvers_precision(quotes: OptionQuotes) -> None:
    hist = TRUE.with_vols(0.3, 0.6, 0.7)  # the decay bound binds
    tight = fit(quotes, hist, CalibrationSettings(refit_costs=False))
    loose = fit(quotes, hist, CalibrationSettings(refit_costs=False, solver_tol=1e-7))
    for res in (tight, loose):
        assert res.constraints_met and res.binding == ("decay_bound",)
        assert all(c.tolerance > 0.0 for c in res.constraints)
    t_decay = {c.name: c.tolerance for c in tight.constraints}["decay_bound"]
    l_decay = {c.name: c.tolerance for c in loose.constraints}["decay_bound"]
    assert l_decay == pytest.approx(1e3 * t_decay, rel=0.5)
    assert tight.solver_precision < loose.solver_precision


# --- issue 19: numerical failures are calibration errors ----------------------------------


@pytest.mark.parametrize("mode", ["constant", "held_rho", "forward"])
@pytest.mark.parametrize("settle", [1e308, 1.797e308, 1e-300, 5e-324])
def test_absurd_settles_never_escape_as_python_errors(
    quotes: OptionQuotes, mode: str, settle: float
) -> None:
    forward = quotes.forward.copy()
    forward[:7] = settle  # the first expiry's futures settlement
    day = replace(quotes, forward=forward)
    try:
        res = fit(day, TRUE, CalibrationSettings(mode=mode, refit_costs=False))  # type: ignore[arg-type]
    except CALIBRATION_ERRORS:
        return
    assert {d.index for d in res.dropped} >= set(range(7))
    assert res.constraints_met


def test_a_division_by_zero_inside_the_fit_is_a_calibration_error(
    quotes: OptionQuotes, monkeypatch: pytest.MonkeyPatch
) -> None:
    from calib.calibrate import calibrator

    def broken(*args: object, **kwargs: object) -> None:
        raise ZeroDivisionError("division by zero")

    monkeypatch.setattr(calibrator, "variance_coefficients", broken)
    with pytest.raises(
        CalibrationNumericalError, match="ZeroDivisionError: division by zero"
    ) as info:
        fit(quotes, TRUE, CalibrationSettings())
    assert isinstance(info.value, CALIBRATION_FAILURES)
