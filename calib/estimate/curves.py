"""Daily futures curves as the estimator sees them: one row a day, one column a contract slot.

Slot ``j`` on a day holds the ``j``-th nearest eligible delivery that day, so contracts roll
from slot to slot as they approach delivery; each slot has its own measurement noise.
Everything is numpy: dates are ``datetime64[D]`` (or floats in years), no I/O.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from calib.errors import (
    BadPriceError,
    CurveGapError,
    CurveShapeError,
    EmptySlotError,
    FirstCurveError,
    QuoteTableError,
    TooFewContractsError,
    TooFewDaysError,
)
from calib.types import ArrayLike, FloatArray, IntArray, readonly

DAYS_PER_YEAR = 365.0
"""ACT/365: year fractions are calendar days over 365 (common practice)."""


def _as_dates(dates: ArrayLike) -> np.ndarray[Any, Any]:
    d = np.asarray(dates)
    if np.issubdtype(d.dtype, np.datetime64):
        return d.astype("datetime64[D]")
    return d.astype(np.float64)


@dataclass(frozen=True, slots=True, eq=False)
class Curves:
    """Log futures prices by day and contract slot, with each price's time to maturity.

    Parameters
    ----------
    dates : (n_days,) ``datetime64[D]`` (gaps in ACT/365 years) or float years; strictly
        increasing.
    tau : (n_days, n_contracts) years from the day to the contract's maturity (> 0 where a price
        is present).
    log_price : (n_days, n_contracts) log futures prices, NaN where missing.
    delivery : optional (n_days, n_contracts) ``datetime64[D]`` delivery of each slot's contract.

    The arrays are copied and made read-only. Every day-0 curve needs two prices of distinct
    maturity (it starts the filter, see :mod:`calib.estimate.kalman`).
    """

    dates: np.ndarray[Any, Any]
    tau: FloatArray
    log_price: FloatArray
    delivery: np.ndarray[Any, Any] | None = None

    def __post_init__(self) -> None:
        dates = _as_dates(self.dates)
        tau = np.asarray(self.tau, dtype=np.float64)
        y = np.asarray(self.log_price, dtype=np.float64)
        if dates.ndim != 1 or y.ndim != 2 or tau.shape != y.shape or y.shape[0] != dates.size:
            raise CurveShapeError(
                f"need dates (n_days,) and tau, log_price (n_days, n_contracts); got "
                f"{dates.shape}, {tau.shape}, {y.shape}"
            )
        if dates.size and np.any(np.diff(dates) <= np.zeros(1, dtype=np.diff(dates).dtype)):
            i = int(np.argmax(np.diff(dates) <= np.zeros(1, dtype=np.diff(dates).dtype)))
            raise CurveShapeError(f"dates must increase strictly: {dates[i]} then {dates[i + 1]}")
        bad = np.isinf(y)
        if bad.any():
            t, j = np.argwhere(bad)[0]
            raise BadPriceError(
                "log price", float(y[t, j]), int(t), dates[t], int(j), "not a finite number"
            )
        present = ~np.isnan(y)
        bad = present & ~(tau > 0.0)
        if bad.any():
            t, j = np.argwhere(bad)[0]
            raise BadPriceError(
                "time to maturity", float(tau[t, j]), int(t), dates[t], int(j), "must be > 0"
            )
        empty = ~present.any(axis=0)
        if y.size and empty.any():
            raise EmptySlotError(int(np.argmax(empty)))
        if dates.size and np.unique(tau[0, present[0]]).size < 2:
            raise FirstCurveError(dates[0], int(present[0].sum()))
        object.__setattr__(self, "dates", readonly(dates))
        object.__setattr__(self, "tau", readonly(np.where(present, tau, np.nan)))
        object.__setattr__(self, "log_price", readonly(y))
        if self.delivery is not None:
            object.__setattr__(self, "delivery", readonly(_as_dates(self.delivery)))

    @classmethod
    def from_prices(
        cls,
        dates: ArrayLike,
        tau: ArrayLike,
        price: ArrayLike,
        delivery: ArrayLike | None = None,
    ) -> Curves:
        """Curves from futures prices (NaN where missing; others positive and finite)."""
        p = np.asarray(price, dtype=np.float64)
        bad = ~np.isnan(p) & ~(np.isfinite(p) & (p > 0.0))
        if bad.any():
            d = _as_dates(dates)
            t, j = np.argwhere(bad)[0]
            date = d[t] if d.ndim == 1 and t < d.size else "?"
            raise BadPriceError(
                "price", float(p[t, j]), int(t), date, int(j), "must be a positive finite number"
            )
        with np.errstate(invalid="ignore"):
            y = np.log(p)
        return cls(
            dates=np.asarray(dates),
            tau=np.asarray(tau, dtype=np.float64),
            log_price=y,
            delivery=None if delivery is None else np.asarray(delivery),
        )

    @property
    def n_days(self) -> int:
        return int(self.log_price.shape[0])

    @property
    def n_contracts(self) -> int:
        """Contract slots a day (columns of the panel: the j-th nearest contract)."""
        return int(self.log_price.shape[1])

    @property
    def n_obs(self) -> int:
        """Prices present (all days, the first one included)."""
        return int(np.count_nonzero(~np.isnan(self.log_price)))

    @property
    def gaps(self) -> FloatArray:
        """(n_days - 1,) years between consecutive days (ACT/365 for calendar dates)."""
        d = self.dates
        if np.issubdtype(d.dtype, np.datetime64):
            return np.diff(d).astype(np.float64) / DAYS_PER_YEAR
        return np.asarray(np.diff(d), dtype=np.float64)

    def gap_table(self) -> tuple[IntArray, FloatArray]:
        """``(index, distinct)``: the gaps as indices into their distinct values."""
        distinct, index = np.unique(self.gaps, return_inverse=True)
        return index.astype(np.int64), distinct.astype(np.float64)

    def check_usable(self, *, min_days: int, min_contracts: int, max_gap_days: float) -> None:
        """Raise the estimation data error that applies, if any.

        Raises
        ------
        TooFewDaysError, TooFewContractsError, CurveGapError
        """
        if self.n_days < min_days:
            raise TooFewDaysError(self.n_days, min_days)
        if self.n_contracts < min_contracts:
            raise TooFewContractsError(self.n_contracts, min_contracts)
        gap_days = self.gaps * DAYS_PER_YEAR
        too_long = gap_days > max_gap_days * (1.0 + 1e-12)
        if too_long.any():
            i = int(np.argmax(too_long))
            raise CurveGapError(
                float(gap_days[i]), self.dates[i], self.dates[i + 1], float(max_gap_days)
            )


def curves_from_quotes(
    trade_date: ArrayLike,
    delivery: ArrayLike,
    settle: ArrayLike,
    *,
    n_contracts: int = 5,
    min_days_to_delivery: int = 10,
) -> Curves:
    """Curves from a long table of settlement prices, one row per (trade date, delivery).

    Slot ``j`` on a trade date holds the ``j``-th nearest delivery that is *eligible* that day:
    at least ``min_days_to_delivery`` calendar days ahead and already quoted on or before that
    day. Where that contract has no settle on the day the slot is NaN (it is not replaced by
    the next one, so slots keep their meaning). Times to maturity are ACT/365 from the trade
    date to the delivery date.

    Parameters
    ----------
    trade_date, delivery : (n_rows,) dates (anything ``datetime64[D]`` accepts).
    settle : (n_rows,) settlement prices, positive and finite.
    n_contracts : slots per day.
    min_days_to_delivery : skip deliveries closer than this (near-expiry prices are thin).
    """
    td = np.asarray(trade_date, dtype="datetime64[D]")
    dl = np.asarray(delivery, dtype="datetime64[D]")
    px = np.asarray(settle, dtype=np.float64)
    if not (td.ndim == dl.ndim == px.ndim == 1 and td.size == dl.size == px.size):
        raise QuoteTableError(
            f"trade_date, delivery and settle must be 1-d of one length; got "
            f"{td.shape}, {dl.shape}, {px.shape}"
        )
    if n_contracts < 1:
        raise QuoteTableError(f"n_contracts must be >= 1, got {n_contracts}")
    bad = ~(np.isfinite(px) & (px > 0.0))
    if bad.any():
        i = int(np.argmax(bad))
        raise QuoteTableError(
            f"settle {float(px[i])!r} on row {i} (trade date {td[i]}, delivery {dl[i]}) "
            "must be a positive finite number"
        )
    days, day_ix = np.unique(td, return_inverse=True)
    dels, del_ix = np.unique(dl, return_inverse=True)
    grid = np.full((days.size, dels.size), np.nan)
    seen = np.zeros(grid.shape, dtype=bool)
    flat = day_ix * dels.size + del_ix
    dup = np.bincount(flat, minlength=grid.size) > 1
    if dup.any():
        k = int(np.argmax(dup))
        raise QuoteTableError(
            f"more than one settle for trade date {days[k // dels.size]}, "
            f"delivery {dels[k % dels.size]}"
        )
    grid[day_ix, del_ix] = px
    seen[day_ix, del_ix] = True
    days_ahead = (dels[None, :] - days[:, None]).astype(np.int64)
    listed = np.cumsum(seen, axis=0) > 0  # quoted on or before the day
    eligible = listed & (days_ahead >= min_days_to_delivery)
    rank = np.cumsum(eligible, axis=1) - 1
    take = eligible & (rank < n_contracts)
    t_ix, k_ix = np.nonzero(take)
    slot = rank[t_ix, k_ix]
    tau = np.full((days.size, n_contracts), np.nan)
    price = np.full((days.size, n_contracts), np.nan)
    slot_delivery = np.full((days.size, n_contracts), np.datetime64("NaT"), dtype="datetime64[D]")
    tau[t_ix, slot] = days_ahead[t_ix, k_ix] / DAYS_PER_YEAR
    price[t_ix, slot] = grid[t_ix, k_ix]
    slot_delivery[t_ix, slot] = dels[k_ix]
    return Curves.from_prices(days, tau, price, delivery=slot_delivery)
