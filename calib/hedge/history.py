"""The hedge account on one history, where a day may lack a parameter set or a price.

The workflow values the option and takes its hedge ratios on each day it can (a set in
force and every leg settled); :func:`book_history` keeps the account across the days it
cannot, never dropping a margin payment.

Notes
-----
Days ``k = 0 .. N`` at times ``t_k`` (``t_N`` the expiry). ``Delta_k`` is the day's hedge
ratio where it is known, else the position held before (*carried*). Futures are marked on the
days every leg settled; after a day without prices the variation margin of the whole gap is
paid on the next settled day, ``Delta_j . (F_k - F_j)`` with ``j`` the last settled day (no
rebalancing is possible without prices, so ``Delta_j`` is held across the gap). Cash grows
by ``g_k = exp(r_k (t_{k+1} - t_k))``: ``cash_0 = premium``,
``cash_{k+1} = cash_k g_k + margin_{k+1}``, and the P&L is ``cash_N - payoff``. The marked
account ``Pi_k = cash_k - V_k`` is known on the days the option was valued (``Pi_0 = 0``,
``V_N`` the payoff); a day's hedge error is ``Pi_k - Pi_j G(t_j, t_k)`` with ``j`` the last day
``Pi`` was known, so the errors grown to expiry add up to the P&L even across gaps.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from calib.errors import ParameterError
from calib.types import ArrayLike, BoolArray, FloatArray, readonly


@dataclass(frozen=True, slots=True)
class HistoryBook:
    """The account day by day (read-only arrays, length ``N + 1`` unless said).

    Attributes
    ----------
    positions : ``(N + 1, n_legs)`` futures held from each day to the next (the last row the
        position going into expiry, repeated).
    carried : ``(N + 1,)`` whether the day's position was carried (no value that day).
    margin : variation margin received on each day (0 on days without prices).
    cash : the cash account after each day's margin and interest.
    marked : ``Pi_k = cash_k - V_k`` where ``V_k`` is known, NaN elsewhere.
    hedge_error : the day's hedge error where ``Pi`` is known (0 on day 0), NaN elsewhere.
    pnl : final P&L in currency; ``premium``, ``payoff`` as booked.
    """

    positions: FloatArray
    carried: BoolArray
    margin: FloatArray
    cash: FloatArray
    marked: FloatArray
    hedge_error: FloatArray
    premium: float
    payoff: float
    pnl: float

    @property
    def pnl_pct(self) -> float:
        return 100.0 * self.pnl / self.premium


def book_history(
    times: ArrayLike,
    futures: ArrayLike,
    values: ArrayLike,
    ratios: ArrayLike,
    payoff: float,
    rates: ArrayLike,
) -> HistoryBook:
    """Book a short option hedged along one history with gaps (module Notes).

    Parameters
    ----------
    times : ``(N + 1,)`` strictly increasing times in years, ``t_N`` the expiry.
    futures : ``(N + 1, n_legs)`` settlements, NaN where a leg did not settle (day 0 needs all).
    values : ``(N,)`` the option's value on days ``0 .. N-1``, NaN where unknown (day 0 known).
    ratios : ``(N, n_legs)`` hedge ratios, NaN rows where unknown (day 0 known).
    payoff : paid at ``t_N``.
    rates : ``(N,)`` continuously compounded cash rate over each day's step.
    """
    t = np.asarray(times, dtype=np.float64)
    F = np.asarray(futures, dtype=np.float64)
    V = np.asarray(values, dtype=np.float64)
    D = np.asarray(ratios, dtype=np.float64)
    r = np.asarray(rates, dtype=np.float64)
    n = t.size - 1
    if n < 1 or np.any(np.diff(t) <= 0.0):
        raise ParameterError("times", t[:3].tolist(), "need >= 2 strictly increasing dates")
    if F.ndim != 2 or F.shape[0] != n + 1 or V.shape != (n,) or D.shape != (n, F.shape[1]):
        raise ParameterError("futures", F.shape, "shapes of futures, values, ratios disagree")
    if r.shape != (n,) or not np.all(np.isfinite(r)):
        raise ParameterError("rates", r.shape, f"need {n} finite rates")
    if not (np.all(np.isfinite(F[0])) and np.isfinite(V[0]) and np.all(np.isfinite(D[0]))):
        raise ParameterError("values", V[0], "day 0 needs prices, a value and hedge ratios")
    if not np.all(np.isfinite(F[-1])):
        raise ParameterError("futures", F[-1].tolist(), "the expiry needs every leg's price")
    growth = np.exp(r * np.diff(t))
    grown = np.concatenate([[1.0], np.cumprod(growth)])  # G_k: cash growth from day 0 to k
    steps = np.arange(n + 1)
    priced = np.all(np.isfinite(F), axis=1)
    rehedged = np.zeros(n + 1, dtype=bool)  # a new position is taken on the day
    rehedged[:n] = np.all(np.isfinite(D), axis=1) & priced[:n]
    source = np.maximum.accumulate(np.where(rehedged, steps, 0))  # the day a position is from
    positions = D[np.minimum(source, n - 1)]
    carried = ~rehedged
    carried[n] = False
    # margin on a settled day: the position held since the day before, times the move since
    # the last settled day (a gap's whole move is paid on the next settled day)
    last_priced = np.maximum.accumulate(np.where(priced, steps, 0))
    margin = np.zeros(n + 1)
    k = np.flatnonzero(priced[1:]) + 1
    margin[k] = np.einsum("ij,ij->i", positions[k - 1], F[k] - F[last_priced[k - 1]])
    cash = grown * (V[0] + np.cumsum(margin / grown))
    known = np.concatenate([np.isfinite(V), [True]])
    value = np.concatenate([V, [payoff]])
    marked = np.where(known, cash - value, np.nan)
    errors = np.full(n + 1, np.nan)
    errors[0] = 0.0
    last_known = np.maximum.accumulate(np.where(known, steps, 0))
    j = np.flatnonzero(known[1:]) + 1
    before = last_known[j - 1]
    errors[j] = marked[j] - marked[before] * grown[j] / grown[before]
    return HistoryBook(
        positions=readonly(positions),
        carried=readonly(carried),
        margin=readonly(margin),
        cash=readonly(cash),
        marked=readonly(marked),
        hedge_error=readonly(errors),
        premium=float(V[0]),
        payoff=float(payoff),
        pnl=float(cash[-1] - payoff),
    )
