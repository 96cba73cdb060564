"""The hedge account: an option sold at its model value, rehedged in its futures.

:func:`settle` does the bookkeeping for values and hedge ratios computed elsewhere (one path of
history or many simulated paths); :func:`hedge_paths` computes them from a pricing set along
given futures paths and settles.

Notes
-----
Dates ``t_0 = 0 < t_1 < ... < t_N = expiry``. At ``t_k`` (``k < N``) the seller holds
``Delta_k = dV/dF`` futures per option (the model's ratios in the futures themselves, DESIGN
section 8); futures cost nothing to enter and pay the variation margin
``Delta_k . (F_{k+1} - F_k)`` at ``t_{k+1}``; cash accrues at ``r_k`` over ``[t_k, t_{k+1}]``
(growth ``g_k = exp(r_k (t_{k+1} - t_k))``); at expiry the payoff ``V_N`` is paid. With the
account ``Pi_k = cash_k - V_k`` (``Pi_0 = 0``), the step's hedge error is

``e_k = V_k (g_k - 1) + Delta_k . (F_{k+1} - F_k) - (V_{k+1} - V_k)``,
``Pi_{k+1} = Pi_k g_k + e_k``,

so the P&L ``Pi_N = sum_k e_k G_{k+1}`` with ``G_k = prod_{j >= k} g_j`` the growth from ``t_k`` to
expiry. Telescoping gives the accounting identity
``premium G_0 + sum_k Delta_k . (F_{k+1} - F_k) G_{k+1} - payoff = P&L``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from calib.errors import ParameterError
from calib.hedge.instruments import HedgedOption, RemainingLaw, remaining_law
from calib.hedge.valuation import values_on_grid
from calib.model.spread import DEFAULT_NODES, ForwardVols
from calib.model.twofactor import TwoFactorParams
from calib.types import ArrayLike, FloatArray, readonly


@dataclass(frozen=True, slots=True)
class HedgeResult:
    """Per-path outcome of a hedged short option (read-only arrays).

    Attributes
    ----------
    times : ``(N + 1,)`` rebalancing dates in years, the last one the expiry.
    premium : ``(n_paths,)`` the option's value at ``t_0`` (what it was sold for).
    values : ``(n_paths, N)`` the option's value at each rebalancing date (before expiry).
    positions : ``(n_paths, N, n_legs)`` futures held per option over ``[t_k, t_{k+1}]``.
    hedge_error : ``(n_paths, N)`` the step's hedge error ``e_k`` in currency at ``t_{k+1}``.
    payoff : ``(n_paths,)`` paid at expiry.
    growth : ``(N + 1,)`` cash growth ``G_k`` from ``t_k`` to expiry.
    pnl : ``(n_paths,)`` the seller's P&L at expiry, in currency.
    """

    times: FloatArray
    premium: FloatArray
    values: FloatArray
    positions: FloatArray
    hedge_error: FloatArray
    payoff: FloatArray
    growth: FloatArray
    pnl: FloatArray

    @property
    def pnl_pct(self) -> FloatArray:
        """P&L in % of the premium."""
        return np.asarray(100.0 * self.pnl / self.premium)

    @property
    def n_paths(self) -> int:
        return int(self.pnl.shape[0])

    @property
    def steps(self) -> int:
        return int(self.times.shape[0] - 1)


def check_grid(times: ArrayLike, t_expiry: float) -> FloatArray:
    """Validate rebalancing dates: ``0 = t_0 < ... < t_N = t_expiry``, ``N >= 1``."""
    t = np.asarray(times, dtype=np.float64)
    if t.ndim != 1 or t.size < 2 or not np.all(np.isfinite(t)):
        raise ParameterError("times", t.shape, "need at least two finite dates")
    if t[0] != 0.0 or np.any(np.diff(t) <= 0.0):
        raise ParameterError("times", t[:3].tolist(), "must start at 0 and strictly increase")
    if not math.isclose(float(t[-1]), t_expiry, rel_tol=1e-12, abs_tol=1e-14):
        raise ParameterError("times", float(t[-1]), f"the last date must be the expiry {t_expiry}")
    return t


def settle(
    times: ArrayLike,
    futures: FloatArray,
    values: FloatArray,
    positions: FloatArray,
    payoff: FloatArray,
    rates: ArrayLike,
) -> HedgeResult:
    """Book the hedge account from values and positions computed elsewhere (module Notes).

    Parameters
    ----------
    times : ``(N + 1,)`` dates in years, strictly increasing (the last one the expiry).
    futures : ``(n_paths, N + 1, n_legs)`` the legs' prices at the dates.
    values : ``(n_paths, N)`` the option's value at ``t_0 .. t_{N-1}``.
    positions : ``(n_paths, N, n_legs)`` futures held from each date to the next.
    payoff : ``(n_paths,)`` paid at expiry.
    rates : ``(N,)`` or scalar: continuously compounded cash rate over each step.
    """
    t = np.asarray(times, dtype=np.float64)
    n_steps = t.size - 1
    n_paths = values.shape[0]
    if values.shape != (n_paths, n_steps) or futures.shape[:2] != (n_paths, n_steps + 1):
        raise ParameterError("values", values.shape, f"need ({n_paths}, {n_steps}) with futures")
    if positions.shape != (n_paths, n_steps, futures.shape[2]) or payoff.shape != (n_paths,):
        raise ParameterError("positions", positions.shape, "must match the futures legs")
    r = np.broadcast_to(np.asarray(rates, dtype=np.float64), (n_steps,))
    step_growth = np.exp(r * np.diff(t))
    growth = np.ones(n_steps + 1)
    growth[:-1] = np.cumprod(step_growth[::-1])[::-1]
    gains = np.einsum("pkl,pkl->pk", positions, np.diff(futures, axis=1))
    after = np.concatenate([values[:, 1:], payoff[:, None]], axis=1)
    errors = values * (step_growth - 1.0) + gains - (after - values)
    pnl = errors @ growth[1:]
    return HedgeResult(
        times=readonly(t),
        premium=readonly(values[:, 0]),
        values=readonly(values),
        positions=readonly(positions),
        hedge_error=readonly(errors),
        payoff=readonly(payoff),
        growth=readonly(growth),
        pnl=readonly(pnl),
    )


def hedge_paths(
    option: HedgedOption,
    vols: TwoFactorParams | ForwardVols,
    times: ArrayLike,
    futures: FloatArray,
    rate: float,
    *,
    nodes: int = DEFAULT_NODES,
    adaptive: bool = True,
) -> HedgeResult:
    """Sell ``option`` at ``t_0`` and hedge it along every futures path with one pricing set.

    Parameters
    ----------
    option : the option (times in years from ``t_0``).
    vols : the pricing set (constant or forward volatilities; forward bucket edges in years
        from ``t_0``, the last reaching the expiry).
    times : ``(N + 1,)`` rebalancing dates, ``0 = t_0 < ... < t_N = option.t_expiry``.
    futures : ``(n_paths, N + 1, n_legs)`` the legs' prices (near, far for a spread).
    rate : continuously compounded rate: discounting of the option and cash accrual.
    nodes : Gauss-Hermite nodes of the spread price.
    adaptive : price each path at each date with two small rules where they agree, and with
        ``nodes`` where they do not (:mod:`calib.hedge.valuation`); ``False`` prices every
        date with ``nodes``.
    """
    t = check_grid(times, option.t_expiry)
    F = np.asarray(futures, dtype=np.float64)
    n_legs = len(option.t_legs)
    if F.ndim != 3 or F.shape[1:] != (t.size, n_legs):
        raise ParameterError(
            "futures", F.shape, f"need (n_paths, {t.size} dates, {n_legs} legs) prices"
        )
    if not np.all(F > 0.0) or not np.all(np.isfinite(F)):
        raise ParameterError("futures", float(np.nanmin(F)), "futures prices must be > 0")
    law = remaining_law(option, vols, t)
    before = RemainingLaw(law.var_near[:-1], law.var_far[:-1], law.cov[:-1])  # the dates t_k < T
    discount = np.exp(-rate * (option.t_expiry - t[:-1]))
    values, positions = values_on_grid(
        option, before, F[:, :-1], discount, nodes=nodes, adaptive=adaptive
    )
    return settle(t, F, values, positions, option.payoff(F[:, -1]), rate)
