"""Calibration: recovery, optimality under binding constraints, invariances, failure paths."""

from __future__ import annotations

import itertools
import math
import warnings
from dataclasses import replace

import cvxpy
import numpy as np
import pytest
from scipy.optimize import minimize
from scipy.stats import norm

from calib.calibrate import CalibrationSettings, Calibrator, OptionQuotes, fit, frontier
from calib.calibrate.calibrator import BIND_TOL
from calib.errors import (
    CalibrationInaccurateWarning,
    CalibrationNotConvergedWarning,
    CalibrationShapeError,
    CalibrationSolverError,
    InfeasibleSettingsError,
    QuoteError,
    TooFewQuotesError,
)
from calib.model.twofactor import TwoFactorParams, variance_coefficients
from tests.calibrate.quotes_from_model import EXPIRIES, TRUE, make_quotes, vols_of

# vols and correlation from noise-free quotes, absolute: what remains is where the solver stops
# (gap and step 1e-10), under 1e-8 measured; a wrong optimum shows in the second decimal
VOL_TOL = 1e-6
# one objective's minimum by two methods (ours, SLSQP), relative: 1e-11 and below measured;
# another local minimum or a mishandled constraint differs at the percent level
OBJ_TOL = 1e-6
EXACT = CalibrationSettings(anchor_weight=0.0, smoothness=0.0, refit_costs=False)


@pytest.fixture(scope="module")
def quotes() -> OptionQuotes:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # quad's round-off note at 1e-14 relative
        return make_quotes(TRUE)


# --- recovery of noise-free quotes ------------------------------------------------------


@pytest.mark.parametrize("mode", ["constant", "held_rho"])
def test_every_constant_mode_recovers_the_generating_vols(quotes: OptionQuotes, mode: str) -> None:
    hist = TRUE.with_vols(0.3, 0.3, TRUE.rho)
    res = fit(quotes, hist, replace(EXACT, mode=mode))
    np.testing.assert_allclose(vols_of(res.params), vols_of(TRUE), atol=VOL_TOL)
    assert res.converged and res.flags == ()
    assert res.max_error < 1e-9 * 50.0  # premium per unit price, noise free
    assert res.params.kappa == hist.kappa and res.params.mu == hist.mu


def test_forward_mode_recovers_a_term_structure() -> None:
    # options on three futures per expiry identify each bucket's (P, Q, C)
    bucket_vols = [
        (0.40, 0.30, 0.80),
        (0.38, 0.28, 0.75),
        (0.36, 0.27, 0.70),
        (0.35, 0.25, 0.70),
        (0.33, 0.24, 0.68),
        (0.32, 0.22, 0.65),
    ]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        q = make_quotes(TRUE, bucket_vols=bucket_vols, maturity_gaps=(0.05, 0.5, 1.5))
    res = fit(q, TRUE, replace(EXACT, mode="forward"))
    assert len(res.buckets) == len(EXPIRIES)
    got = np.array([vols_of(b.params) for b in res.buckets])
    np.testing.assert_allclose(got, np.array(bucket_vols), atol=VOL_TOL)
    np.testing.assert_allclose([b.end for b in res.buckets], EXPIRIES)


# --- optimality with binding constraints --------------------------------------------------


def _independent_objective(
    q: OptionQuotes, res_weight: np.ndarray, hist: TwoFactorParams, w: float
):  # type: ignore[no-untyped-def]
    """Objective in (s1, s2, rho) by scipy's normal CDF (Black 1976), not calib's pricer."""
    a, b, c = variance_coefficients(q.t_expiry, q.t_delivery, hist.kappa)
    F, K, D = q.forward, q.strike, q.discount
    sign = np.where(q.is_call, 1.0, -1.0)
    scale = F.mean()

    def J(theta: np.ndarray) -> float:
        s1, s2, rho = theta
        V = a * s1 * s1 + b * s2 * s2 - 2.0 * c * rho * s1 * s2
        sd = np.sqrt(np.maximum(V, 1e-300))
        d1 = np.log(F / K) / sd + 0.5 * sd
        model = D * sign * (F * norm.cdf(sign * d1) - K * norm.cdf(sign * (d1 - sd)))
        e = (model - q.premium) / scale
        return float(np.sum(res_weight * e * e) + w * (s2 - hist.sigma_yield) ** 2)

    return J


def _feasible(theta: np.ndarray, hist: TwoFactorParams, q_floor: float) -> bool:
    s1, s2, rho = theta
    return (
        s2 <= rho * hist.kappa * s1 + 1e-12
        and s2 >= q_floor * hist.sigma_yield - 1e-12
        and abs(rho) <= 1.0
    )


def test_binding_decay_bound_is_optimal_against_slsqp_and_a_grid(quotes: OptionQuotes) -> None:
    # a yield anchor far above the market's 0.25 pushes sigma_yield onto the decay bound
    hist = TRUE.with_vols(0.3, 0.6, 0.7)
    settings = CalibrationSettings(anchor_weight=1e-4, refit_costs=True)
    res = fit(quotes, hist, settings)
    assert res.binding == ("decay_bound",)
    by_name = {c.name: c for c in res.constraints}
    # feasibility and complementary slackness
    for c in res.constraints:
        assert c.slack is not None and c.slack >= -BIND_TOL
        assert c.dual is not None and c.dual >= -1e-12
        assert abs(c.dual * c.slack) < 1e-12
    assert by_name["decay_bound"].dual > 1e-6
    assert by_name["decay_bound"].refit_cost is not None and by_name["decay_bound"].refit_cost > 0

    J = _independent_objective(quotes, res.weight, hist, settings.anchor_weight)
    theta = vols_of(res.params)
    assert J(theta) == pytest.approx(res.objective, rel=1e-10)
    # SLSQP in (s1, s2, rho) from many starts (scipy.optimize.minimize, method="SLSQP")
    rng = np.random.default_rng(7)
    cons = [
        {"type": "ineq", "fun": lambda t: t[2] * hist.kappa * t[0] - t[1]},
        {"type": "ineq", "fun": lambda t: t[1] - 0.5 * hist.sigma_yield},
    ]
    best = math.inf
    for start in rng.uniform([0.1, 0.1, 0.2], [0.8, 0.8, 1.0], size=(12, 3)):
        out = minimize(
            J,
            start,
            method="SLSQP",
            bounds=[(1e-4, 2), (0, 2), (-1, 1)],
            constraints=cons,
            options={"ftol": 1e-16, "maxiter": 500},
        )
        if _feasible(out.x, hist, 0.5):
            best = min(best, out.fun)
    assert res.objective <= best * (1.0 + OBJ_TOL)
    assert best <= res.objective * (1.0 + OBJ_TOL)
    # brute-force grid around the answer: no feasible neighbour is better
    grid = theta + np.stack(
        np.meshgrid(*[np.linspace(-0.02, 0.02, 9)] * 3, indexing="ij"), axis=-1
    ).reshape(-1, 3)
    values = [J(t) for t in grid if _feasible(t, hist, 0.5)]
    assert min(values) >= res.objective * (1.0 - 1e-12)


def test_held_rho_with_binding_floor_beats_a_brute_force_grid(quotes: OptionQuotes) -> None:
    # history says rho = 0.5 and sigma_yield = 0.5: the floor 0.9 * 0.5 = 0.45 binds
    hist = TRUE.with_vols(0.3, 0.5, 0.5)
    settings = CalibrationSettings(
        mode="held_rho", yield_floor=0.9, anchor_weight=0.0, decay_bound=False
    )
    res = fit(quotes, hist, settings)
    assert set(res.binding) == {"yield_floor", "held_rho"}
    assert res.params.rho == hist.rho
    assert res.params.sigma_yield == pytest.approx(0.45, abs=BIND_TOL)
    assert {c.name: c.refit_cost for c in res.constraints}["held_rho"] > 0.0
    J = _independent_objective(quotes, res.weight, hist, 0.0)
    assert J(vols_of(res.params)) == pytest.approx(res.objective, rel=1e-10)
    # brute force over (s1, s2 >= floor) at the held rho
    s1s = np.linspace(0.05, 1.0, 96)
    s2s = np.linspace(0.45, 1.0, 56)
    values = [J(np.array([a, b, hist.rho])) for a in s1s for b in s2s]
    assert res.objective <= min(values)
    # SLSQP in (s1, s2) from many starts
    rng = np.random.default_rng(11)
    best = min(
        minimize(
            lambda t: J(np.array([t[0], t[1], hist.rho])),
            x0,
            method="SLSQP",
            bounds=[(1e-3, 2.0), (0.45, 2.0)],
            options={"ftol": 1e-16, "maxiter": 500},
        ).fun
        for x0 in rng.uniform([0.1, 0.45], [1.0, 1.0], size=(10, 2))
    )
    assert res.objective == pytest.approx(best, rel=OBJ_TOL)


# --- invariances ---------------------------------------------------------------------------


def _fit_vols(q: OptionQuotes, settings: CalibrationSettings = EXACT) -> np.ndarray:
    hist = TRUE.with_vols(0.3, 0.6, 0.7)
    return vols_of(fit(q, hist, replace(settings, anchor_weight=1e-4)).params)


# vols of a binding fit re-solved from permuted/rescaled data: at an optimum J is flat to second
# order, so solver precision ~1e-13 in J leaves the vols determined to about its square root
INVARIANCE_TOL = 1e-6


def test_permuting_quotes_changes_nothing(quotes: OptionQuotes) -> None:
    perm = np.random.default_rng(3).permutation(len(quotes))
    permuted = quotes.take(perm)
    np.testing.assert_allclose(_fit_vols(permuted), _fit_vols(quotes), atol=INVARIANCE_TOL)


def test_scaling_prices_and_strikes_changes_nothing(quotes: OptionQuotes) -> None:
    assert quotes.premium is not None
    k = 37.0
    scaled = replace(
        quotes, strike=quotes.strike * k, forward=quotes.forward * k, premium=quotes.premium * k
    )
    np.testing.assert_allclose(_fit_vols(scaled), _fit_vols(quotes), atol=INVARIANCE_TOL)


def test_premium_and_implied_vol_inputs_give_the_same_fit(quotes: OptionQuotes) -> None:
    res = fit(quotes, TRUE, EXACT)
    as_vols = replace(quotes, premium=None, implied_vol=np.array(res.market_vol))
    np.testing.assert_allclose(_fit_vols(as_vols), _fit_vols(quotes), atol=INVARIANCE_TOL)


def test_put_and_call_at_the_same_strike_give_the_same_fit(quotes: OptionQuotes) -> None:
    # put-call parity for options on futures: C - P = D (F - K) (Black 1976)
    assert quotes.premium is not None
    flipped = ~quotes.is_call
    parity = quotes.discount * (quotes.forward - quotes.strike)
    premium = np.where(quotes.is_call, quotes.premium - parity, quotes.premium + parity)
    other = replace(quotes, is_call=flipped, premium=premium)
    eq = replace(EXACT, weighting="equal", error_measure="vol")
    np.testing.assert_allclose(_fit_vols(other, eq), _fit_vols(quotes, eq), atol=INVARIANCE_TOL)


# --- re-use, frontier, filters ------------------------------------------------------------


def test_a_calibrator_re_solves_days_like_fresh_fits(quotes: OptionQuotes) -> None:
    cal = Calibrator(EXACT)
    hists = [TRUE.with_vols(0.3, 0.6, 0.7), TRUE.with_vols(0.3, 0.6, 0.7)]
    other = replace(TRUE, sigma_spot=0.4)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        day2 = make_quotes(other)
    for q, h in zip((quotes, day2), hists, strict=True):
        np.testing.assert_allclose(
            vols_of(cal.fit(q, h).params), vols_of(fit(q, h, EXACT).params), atol=INVARIANCE_TOL
        )
    with pytest.raises(
        CalibrationShapeError, match="built for 2 expiry buckets, these quotes need 6"
    ):
        Calibrator(replace(EXACT, mode="forward"), n_buckets=2).fit(quotes, TRUE)


_WITHOUT = {
    "decay_bound": {"decay_bound": False},
    "yield_floor": {"yield_floor": 0.0},
    "held_rho": {"mode": "constant"},
}


@pytest.mark.parametrize(
    ("mode", "floor", "yield_sigmas", "families"),
    [
        ("constant", 0.9, (0.5, 0.25, 0.35, 0.5), {"decay_bound", "yield_floor"}),
        ("forward", 0.9, (0.5, 0.25, 0.35), {"decay_bound"}),
        ("held_rho", 0.5, (0.6, 0.25), {"decay_bound", "held_rho"}),
    ],
)
def test_a_re_used_calibrator_prices_constraints_as_fresh_fits_do(
    quotes: OptionQuotes,
    mode: str,
    floor: float,
    yield_sigmas: tuple[float, ...],
    families: set[str],
) -> None:
    # days on which different constraints bind (decay bound and floor, none, held rho): the
    # re-fits' cached calibrators must give bit for bit what a fresh fit without each gives
    settings = CalibrationSettings(mode=mode, yield_floor=floor, refit_costs=True)  # type: ignore[arg-type]
    cal = Calibrator(settings, n_buckets=len(EXPIRIES))
    priced: set[str] = set()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        day2 = make_quotes(replace(TRUE, sigma_spot=0.4))
        for k, s2 in enumerate(yield_sigmas):
            q, h = (quotes, day2)[k % 2], TRUE.with_vols(0.3, s2, 0.7)
            res = cal.fit(q, h)
            alone = fit(q, h, replace(settings, refit_costs=False))
            assert res.params == alone.params and res.objective == alone.objective
            for c in res.constraints:
                if c.refit_cost is None:
                    assert not c.binds or c.name == "psd"
                    continue
                off = replace(settings, refit_costs=False, **_WITHOUT[c.name])  # type: ignore[arg-type]
                assert c.refit_cost == res.objective - fit(q, h, off).objective
                priced.add(c.name)
    assert priced == families


def test_frontier_trades_fit_for_distance(quotes: OptionQuotes) -> None:
    hist = TRUE.with_vols(0.3, 0.32, 0.7)
    points = frontier(quotes, hist, [0.0, 1e-6, 1e-4, 1e-2], CalibrationSettings())
    dist = [p.distance for p in points]
    fits = [p.fit for p in points]
    assert dist[0] == pytest.approx(0.07, abs=1e-6)  # w = 0: the market's 0.25 vs 0.32
    assert all(a >= b for a, b in itertools.pairwise(dist))
    assert all(a <= b for a, b in itertools.pairwise(fits))
    assert dist[-1] < 0.01


def test_filters_drop_quotes_with_reasons(quotes: OptionQuotes) -> None:
    s = replace(EXACT, moneyness_band=(0.85, 1.2), min_days_to_expiry=60.0)
    res = fit(quotes, TRUE, s)
    reasons = {d.reason for d in res.dropped}
    assert reasons == {"under 60 days to expiry", "strike/forward outside [0.85, 1.2]"}
    assert len(res.dropped) + len(res.quote_index) == len(quotes)
    assert res.dropped[0].label == "q0"
    np.testing.assert_allclose(vols_of(res.params), vols_of(TRUE), atol=VOL_TOL)


def test_premium_below_intrinsic_is_dropped_with_the_reason(quotes: OptionQuotes) -> None:
    assert quotes.premium is not None
    premium = quotes.premium.copy()
    premium[0] = 0.0  # an out-of-the-money put at its intrinsic value 0
    premium[3] = 60.0  # a put above its discounted strike
    res = fit(replace(quotes, premium=premium), TRUE, EXACT)
    assert [d.index for d in res.dropped] == [0, 3]
    assert res.dropped[0].reason == (
        "no implied volatility: the premium equals the intrinsic value, so it carries no volatility"
    )
    assert res.dropped[1].reason.startswith("no implied volatility: the premium is at or above")


def test_spread_weighting_uses_inverse_squared_spreads() -> None:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        q = make_quotes(TRUE, spread=0.01)
    res = fit(q, TRUE, replace(EXACT, weighting="spread"))
    spread = (q.ask - q.bid) if q.ask is not None and q.bid is not None else None
    assert spread is not None
    w = 1.0 / spread**2
    np.testing.assert_allclose(res.weight, w / w.sum(), rtol=1e-12)
    np.testing.assert_allclose(vols_of(res.params), vols_of(TRUE), atol=VOL_TOL)


# --- failure paths -------------------------------------------------------------------------


def test_floor_above_what_the_decay_bound_allows_with_held_negative_rho(
    quotes: OptionQuotes,
) -> None:
    hist = TRUE.with_vols(0.3, 0.3, -0.2)
    with pytest.raises(
        InfeasibleSettingsError,
        match=r"yield_floor sigma_yield >= 0\.15 .* decay_bound .* <= 0 "
        r"\(rho held at -0\.2.*short by 0\.15",
    ):
        fit(quotes, hist, CalibrationSettings(mode="held_rho"))


def test_floor_above_what_the_spot_cap_and_decay_bound_allow(quotes: OptionQuotes) -> None:
    hist = TRUE.with_vols(0.3, 0.6, 0.7)
    s = CalibrationSettings(yield_floor=0.9, sigma_spot_cap=0.3)
    with pytest.raises(InfeasibleSettingsError, match=r"<= 0\.45 \(rho <= 1.*short by 0\.09"):
        fit(quotes, hist, s)


def test_too_few_usable_quotes_says_why(quotes: OptionQuotes) -> None:
    s = replace(EXACT, min_days_to_expiry=600.0)
    with pytest.raises(
        TooFewQuotesError,
        match=r"only 0 usable option quote\(s\) of 42, constant mode needs at least 3; "
        r"dropped: under 600 days to expiry \(42\)",
    ):
        fit(quotes, TRUE, s)


def test_spread_weighting_without_bid_ask_is_refused(quotes: OptionQuotes) -> None:
    with pytest.raises(QuoteError, match="spread weighting needs bid and ask"):
        fit(quotes, TRUE, replace(EXACT, weighting="spread"))


def test_solver_failure_is_our_error(quotes: OptionQuotes, monkeypatch: pytest.MonkeyPatch) -> None:
    def broken(self: object, *args: object, **kwargs: object) -> None:
        raise cvxpy.error.SolverError("numerical trouble in KKT solve")

    monkeypatch.setattr(cvxpy.Problem, "solve", broken)
    with pytest.raises(CalibrationSolverError, match="CLARABEL returned solver_error: numerical"):
        fit(quotes, TRUE, EXACT)


@pytest.mark.parametrize(
    ("status", "cause"),
    [
        (cvxpy.INFEASIBLE, "checked feasible beforehand"),
        (cvxpy.UNBOUNDED, "bounded below"),
        (cvxpy.SOLVER_ERROR, "no solution returned"),
    ],
)
def test_every_failed_status_is_our_error(
    quotes: OptionQuotes, monkeypatch: pytest.MonkeyPatch, status: str, cause: str
) -> None:
    real = cvxpy.Problem.solve

    def forced(self: cvxpy.Problem, *args: object, **kwargs: object) -> None:
        real(self, *args, **kwargs)
        self._status = status

    monkeypatch.setattr(cvxpy.Problem, "solve", forced)
    with pytest.raises(CalibrationSolverError, match=f"returned {status}: .*{cause}"):
        fit(quotes, TRUE, EXACT)


def test_inaccurate_solve_warns_and_flags(
    quotes: OptionQuotes, monkeypatch: pytest.MonkeyPatch
) -> None:
    real = cvxpy.Problem.solve

    def forced(self: cvxpy.Problem, *args: object, **kwargs: object) -> None:
        real(self, *args, **kwargs)
        self._status = cvxpy.OPTIMAL_INACCURATE

    monkeypatch.setattr(cvxpy.Problem, "solve", forced)
    with pytest.warns(CalibrationInaccurateWarning, match="optimal_inaccurate at Gauss-Newton"):
        res = fit(quotes, TRUE, EXACT)
    assert "inaccurate" in res.flags and res.status == "optimal_inaccurate"


def test_iteration_limit_warns_and_flags(quotes: OptionQuotes) -> None:
    hist = TRUE.with_vols(0.3, 0.6, 0.7)
    with pytest.warns(CalibrationNotConvergedWarning, match="did not converge in 1 iterations"):
        res = fit(quotes, hist, CalibrationSettings(max_iterations=1, refit_costs=False))
    assert not res.converged and res.flags == ("not_converged",)
