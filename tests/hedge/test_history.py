"""The hedge account on one history with gaps, against the simulation's account."""

from __future__ import annotations

import numpy as np
import pytest

from calib.errors import ParameterError
from calib.hedge.engine import settle
from calib.hedge.history import book_history


def _history(rng: np.random.Generator, n: int = 12) -> tuple[np.ndarray, ...]:
    t = np.cumsum(np.r_[0.0, rng.uniform(1, 4, n)]) / 365.0
    F = 50.0 * np.exp(np.cumsum(0.02 * rng.standard_normal((n + 1, 2)), axis=0))
    V = rng.uniform(1.0, 2.0, n)
    D = rng.uniform(-1.0, 1.0, (n, 2))
    r = rng.uniform(0.0, 0.05, n)
    return t, F, V, D, r


def test_without_gaps_the_book_is_the_simulations_account(rng: np.random.Generator) -> None:
    # calib.hedge.engine.settle books the same account for many paths (its module Notes).
    t, F, V, D, r = _history(rng)
    book = book_history(t, F, V, D, 1.3, r)
    sim = settle(t, F[None], V[None], D[None], np.array([1.3]), r)
    assert book.pnl == pytest.approx(float(sim.pnl[0]), rel=1e-13, abs=1e-13)
    np.testing.assert_allclose(book.hedge_error[1:], sim.hedge_error[0], rtol=1e-12, atol=1e-13)
    np.testing.assert_array_equal(book.positions[:-1], D)
    assert not book.carried.any()


def test_gaps_carry_the_hedge_and_keep_every_margin(rng: np.random.Generator) -> None:
    t, F, V, D, r = _history(rng)
    F[3, 1] = np.nan  # a leg not settled on day 3
    F[6] = np.nan  # a day without settlements
    V[[3, 5, 6]] = np.nan  # no value: no price (3, 6) or no set (5)
    D[[3, 5, 6]] = np.nan
    book = book_history(t, F, V, D, 0.7, r)
    assert book.carried.tolist() == [k in (3, 5, 6) for k in range(13)]
    np.testing.assert_array_equal(book.positions[3], D[2])
    np.testing.assert_array_equal(book.positions[6], D[4])
    # margin of the gap over days 2..4 paid on day 4 with the position of day 2
    assert book.margin[3] == 0.0
    assert book.margin[4] == pytest.approx(D[2] @ (F[4] - F[2]), rel=1e-14)
    assert book.margin[7] == pytest.approx(D[5 - 1] @ (F[7] - F[5]), rel=1e-14)
    # DESIGN section 8 identity: premium x growth + sum(margin x growth) - payoff = P&L
    grow = np.r_[np.cumprod(np.exp(r * np.diff(t))[::-1])[::-1], 1.0]
    want = V[0] * grow[0] + book.margin @ grow - 0.7
    assert book.pnl == pytest.approx(want, rel=1e-12)
    # the known days' errors grown to expiry add up to the P&L
    known = ~np.isnan(book.hedge_error)
    assert known.tolist() == [k not in (3, 5, 6) for k in range(13)]
    assert np.nansum(book.hedge_error * grow) == pytest.approx(book.pnl, rel=1e-12, abs=1e-12)


def test_day_zero_needs_a_price_value_and_ratios(rng: np.random.Generator) -> None:
    t, F, V, D, r = _history(rng)
    V[0] = np.nan
    with pytest.raises(ParameterError, match="day 0"):
        book_history(t, F, V, D, 0.0, r)
