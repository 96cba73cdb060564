"""The rules of each file kind, written in the row-rule language of :mod:`calib.inputs.rows`.

Rules (each row; the first failure found is the one recorded)
-------------------------------------------------------------
* every required column present; values parse (numbers, ISO ``YYYY-MM-DD`` dates between
  :data:`~calib.inputs.rows.DATE_MIN` and :data:`~calib.inputs.rows.DATE_MAX`, ``call``/``put``);
  no empty required value; no NUL character in a field;
* dates ahead of the trade date (delivery, expiry, maturity) at most :data:`HORIZON_YEARS`
  after it;
* futures: :data:`PRICE_MIN` ``<= settle <=`` :data:`PRICE_MAX`, ``delivery >= trade_date``;
* options: the commodity is registered (an unknown code is a refused row naming the known
  ones); ``strike > 0``; ``premium > 0`` and/or :data:`IMPLIED_VOL_MIN` ``<= implied_vol <=``
  :data:`IMPLIED_VOL_MAX` (at least one of them); ``bid >= 0``, ``ask >= 0``, ``bid <= ask``
  when given, prices at most :data:`PRICE_MAX`; ``trade_date <= expiry <= delivery``; the
  underlying future has a settlement stored for that trade date, and the strike lies within a
  factor :data:`STRIKE_RATIO_MAX` of it; a premium lies within the no-arbitrage bounds (below)
  and is at least :data:`PREMIUM_MIN_RATIO` of ``max(F, K)``; ``exercise``, when the file has
  the column, is ``european`` or ``american`` (any case); an empty value takes the
  commodity's default style;
* rates: ``|zero_rate| <=`` :data:`ZERO_RATE_LIMIT`, ``maturity > trade_date``;
* inside one file, rows with the same key and different values are all refused; an exact
  repeat of an earlier row is refused as a repeat (the first one lands);
* day on day (:class:`Bands`): a settlement, or an implied volatility, that moved from the same
  contract's previous value (within :attr:`Bands.max_gap_days`) by more than the band's factor
  either way is refused, naming both values.

Notes
-----
No-arbitrage bounds of a European option on a future (Black 1976; common practice), with
``D = exp(-r(T) T)`` the discount factor to expiry from the day's stored zero curve (ACT/365,
linear in the zero rate, flat beyond its ends) and ``tol =`` :data:`PREMIUM_BOUND_RTOL`
``* max(F, K)``:

.. math::
    D \\max(F - K, 0) - tol \\le C \\le D F + tol, \\qquad
    D \\max(K - F, 0) - tol \\le P \\le D K + tol.

An American option (exercisable any day up to expiry) can be exercised now for the
*undiscounted* intrinsic value, and is worth at most what exercising into the future at once
could ever pay (common practice):

.. math::
    \\max(F - K, 0) - tol \\le C \\le F + tol, \\qquad \\max(K - F, 0) - tol \\le P \\le K + tol.

The curve should be stored before the options of its day: on a day without one the bounds
are checked with ``D = 1`` (r = 0; a row's reason says so), the day is listed in
:attr:`Checked.no_curve`, and the unit of work reports it (the CLI exits 1).
"""

from __future__ import annotations

import re
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field
from datetime import date
from typing import Any

import numpy as np
import numpy.typing as npt
import pandas as pd

from calib import errors as msg
from calib.inputs.files import listed
from calib.inputs.rows import DateArray, RowCheck, days, each
from calib.types import EXERCISE_STYLES, BoolArray, FloatArray, IntArray

IMPLIED_VOL_MAX = 5.0
"""Largest implied volatility accepted (500% a year): beyond it a quote is taken as a typo."""
IMPLIED_VOL_MIN = 1e-9
"""Smallest implied volatility accepted: below it the total variance is lost in rounding."""
ZERO_RATE_LIMIT = 1.0
"""Largest absolute zero rate accepted: a rate beyond 100% a year is taken as given in percent."""
PREMIUM_BOUND_RTOL = 1e-4
"""Tolerance of the no-arbitrage bounds, relative to ``max(F, K)``: settled premiums are rounded
to a tick, and a tick is of this order of the price level (common practice)."""
PRICE_MIN = 1e-6
"""Smallest settlement or strike accepted, in the quote currency per unit."""
PRICE_MAX = 1e9
"""Largest price accepted: far below float64's range, so products and squares of prices, and
of their ratios, stay representable with a wide margin."""
PREMIUM_MIN_RATIO = 1e-12
"""Smallest premium accepted, relative to ``max(F, K)``: below it a premium carries no
information a fit can use and its implied volatility underflows."""
STRIKE_RATIO_MAX = 100.0
"""A strike must lie within this factor of its underlying future's settlement either way."""
HORIZON_YEARS = 60
"""Delivery, expiry and maturity at most this many years after the trade date (listed futures
run about ten years out and zero curves fifty; common practice)."""
_HORIZON_DAYS = int(HORIZON_YEARS * 366)

CODE = re.compile(r"[A-Za-z0-9_.\-]{1,32}")
"""A commodity code as files carry it."""


@dataclass(frozen=True)
class Bands:
    """Day-on-day plausibility bands: a value may move by at most a factor either way.

    Attributes
    ----------
    settle_move : a futures settlement may be at most this factor above or below the same
        contract's previous settlement (default 2: a move beyond x2 in one day is taken as a
        typo; listed futures' daily limits are far tighter, common practice).
    vol_move : the same for an option's implied volatility against the same option's previous
        one (default 3).
    max_gap_days : the previous value counts if it is at most this many calendar days older.
    """

    settle_move: float = 2.0
    vol_move: float = 3.0
    max_gap_days: int = 10

    def __post_init__(self) -> None:
        for name in ("settle_move", "vol_move"):
            value = getattr(self, name)
            if not value > 1.0 or not np.isfinite(value):
                raise ValueError(f"{name} must be a finite factor > 1, not {value!r}")
        if self.max_gap_days < 1:
            raise ValueError(f"max_gap_days must be >= 1, not {self.max_gap_days!r}")


@dataclass
class Checked:
    """The good rows of one chunk (column name -> values) and what the rules found."""

    columns: dict[str, npt.NDArray[Any]]
    lines: IntArray
    no_curve: list[date] = field(default_factory=list)
    """Options: trade dates of rows whose day has no zero curve stored (checked with r = 0)."""


Forwards = Callable[[IntArray, DateArray, DateArray], FloatArray]
"""Settlement of each row's underlying future (commodity id, trade date, delivery); NaN if none."""
Discounts = Callable[[DateArray, DateArray], FloatArray]
"""Discount factor from each trade date to each expiry; NaN where the day has no zero curve."""


def _good(rows: RowCheck, **columns: npt.NDArray[Any]) -> Checked:
    """The still-good rows of ``columns`` (named as the quote table's columns)."""
    ok = rows.ok
    return Checked(
        columns={name: values[ok] for name, values in columns.items()},
        lines=rows.table.lines[ok],
    )


def _horizon(rows: RowCheck, trade: DateArray, ahead: DateArray, name: str) -> None:
    rows.reject(
        days(ahead) - days(trade) > _HORIZON_DAYS,
        name,
        each(msg.ROW_BEYOND_HORIZON, value=ahead, trade_date=trade, years=HORIZON_YEARS),
    )


def _price_range(rows: RowCheck, values: FloatArray, name: str, low: float) -> None:
    rule = rows.value_reason(name, msg.ROW_PRICE_RANGE, low=low, high=PRICE_MAX)
    rows.reject((values < low) | (values > PRICE_MAX), name, rule)


def commodity_codes(rows: RowCheck) -> tuple[IntArray, list[str]]:
    """Row codes and the distinct well-formed commodity codes (malformed ones are refused)."""
    factor, uniques = rows.choice("commodity", CODE, msg.ROW_BAD_CODE)
    return factor, uniques


def commodity_ids(
    rows: RowCheck,
    factor: IntArray,
    uniques: Sequence[str],
    known: dict[str, int],
    registered: Sequence[str],
) -> IntArray:
    """Commodity id of every row (-1 where refused): ``known`` maps codes to ids; rows of other
    codes are refused, the reason listing the ``registered`` codes."""
    lookup_ids = np.array([known.get(u, -1) for u in uniques] + [-1], dtype=np.int64)
    ids = np.asarray(lookup_ids[factor])
    known_codes = listed(list(registered)) or "none"
    reason = rows.value_reason("commodity", msg.ROW_UNKNOWN_COMMODITY, known=known_codes)
    rows.reject(ids < 0, "commodity", reason)
    return ids


def check_futures(rows: RowCheck, cid: IntArray) -> Checked:
    trade = rows.date("trade_date")
    delivery = rows.date("delivery")
    settle = rows.number("settle")
    rows.reject(settle <= 0, "settle", rows.value_reason("settle", msg.ROW_NOT_POSITIVE))
    _price_range(rows, settle, "settle", PRICE_MIN)
    rows.reject(
        delivery < trade,
        "delivery",
        each(msg.ROW_BEFORE_TRADE, value=delivery, trade_date=trade),
    )
    _horizon(rows, trade, delivery, "delivery")
    return _good(rows, commodity_id=cid, trade_date=trade, delivery=delivery, settle=settle)


def check_options(
    rows: RowCheck,
    cid: IntArray,
    forwards: Forwards,
    discounts: Discounts,
    default_american: BoolArray | None = None,
) -> Checked:
    """The option rules; ``default_american`` is each row's commodity default style (``True``
    for American; default: every commodity European), taken where the row gives none."""
    trade = rows.date("trade_date")
    delivery = rows.date("delivery")
    expiry = rows.date("expiry")
    factor, rights = rows.choice("kind", re.compile("call|put"), msg.ROW_NOT_KIND, lower=True)
    call = np.array([k == "call" for k in rights] + [False], dtype=np.bool_)[factor]
    strike = rows.number("strike")
    premium = rows.number("premium", required=False)
    vol = rows.number("implied_vol", required=False)
    bid = rows.number("bid", required=False)
    ask = rows.number("ask", required=False)
    style = rows.optional_choice("exercise", EXERCISE_STYLES, msg.ROW_NOT_EXERCISE)
    am = np.zeros(rows.n, np.bool_) if default_american is None else default_american.copy()
    if style is not None:
        am = np.where(style == "", am, style == "american")

    rows.reject(strike <= 0, "strike", rows.value_reason("strike", msg.ROW_NOT_POSITIVE))
    _price_range(rows, strike, "strike", PRICE_MIN)
    rows.reject(np.isnan(premium) & np.isnan(vol), "premium", msg.ROW_NO_PRICE)
    rows.reject(premium <= 0, "premium", rows.value_reason("premium", msg.ROW_NOT_POSITIVE))
    _too_high(rows, premium, "premium")
    rows.reject(
        (vol <= 0) | (vol > IMPLIED_VOL_MAX),
        "implied_vol",
        rows.value_reason("implied_vol", msg.ROW_VOL_RANGE, high=IMPLIED_VOL_MAX),
    )
    vol_low = rows.value_reason("implied_vol", msg.ROW_VOL_LOW, low=IMPLIED_VOL_MIN)
    rows.reject(vol < IMPLIED_VOL_MIN, "implied_vol", vol_low)
    rows.reject(bid < 0, "bid", rows.value_reason("bid", msg.ROW_NEGATIVE))
    rows.reject(ask < 0, "ask", rows.value_reason("ask", msg.ROW_NEGATIVE))
    _too_high(rows, bid, "bid")
    _too_high(rows, ask, "ask")
    rows.reject(bid > ask, "bid", each(msg.ROW_BID_ASK, bid=bid, ask=ask))
    rows.reject(
        expiry < trade,
        "expiry",
        each(msg.ROW_BEFORE_TRADE, value=expiry, trade_date=trade),
    )
    rows.reject(
        expiry > delivery,
        "expiry",
        each(msg.ROW_AFTER_DELIVERY, value=expiry, delivery=delivery),
    )
    _horizon(rows, trade, delivery, "delivery")

    # the underlying future's settlement that day, as stored now
    forward = np.full(rows.n, np.nan)
    live = np.flatnonzero(rows.ok)
    if live.size:
        forward[live] = forwards(cid[live], trade[live], delivery[live])
    rows.reject(
        np.isnan(forward),
        "delivery",
        each(msg.ROW_NO_FUTURE, delivery=delivery, trade_date=trade),
    )
    ratio = strike / forward
    rows.reject(
        (ratio > STRIKE_RATIO_MAX) | (ratio < 1.0 / STRIKE_RATIO_MAX),
        "strike",
        each(msg.ROW_STRIKE_RATIO, strike=strike, forward=forward, limit=STRIKE_RATIO_MAX),
    )

    # the day's discount factors: the curve must come first
    disc = np.ones(rows.n)
    live = np.flatnonzero(rows.ok)
    if live.size:
        disc[live] = discounts(trade[live], expiry[live])
    lacking = rows.ok & np.isnan(disc)
    no_curve = sorted({d.astype(date) for d in np.unique(trade[lacking])})
    disc[lacking] = 1.0  # r = 0 on a day without a curve

    # no-arbitrage bounds of the premiums
    intrinsic = np.maximum(np.where(call, forward - strike, strike - forward), 0.0)
    cap = np.where(call, forward, strike)
    scale = np.maximum(forward, strike)
    tol = PREMIUM_BOUND_RTOL * scale

    def bound_reason(template: str, bound: FloatArray) -> Callable[[IntArray], Iterable[str]]:
        return lambda idx: (
            template.format(
                premium=premium[i],
                bound=bound[i],
                forward=forward[i],
                discount=disc[i],
                what="F" if call[i] else "K",
                curve=msg.ROW_NO_CURVE if lacking[i] else "",
            )
            for i in idx
        )

    # an American option's bounds are undiscounted: it can be exercised now
    low, high = np.where(am, 1.0, disc) * intrinsic, np.where(am, 1.0, disc) * cap
    for sel, below, above in (
        (~am, msg.ROW_BELOW_INTRINSIC, msg.ROW_ABOVE_BOUND),
        (am, msg.ROW_BELOW_INTRINSIC_AMERICAN, msg.ROW_ABOVE_BOUND_AMERICAN),
    ):
        rows.reject(sel & (premium < low - tol), "premium", bound_reason(below, low))
        rows.reject(sel & (premium > high + tol), "premium", bound_reason(above, high))
    rows.reject(
        premium < PREMIUM_MIN_RATIO * scale,
        "premium",
        each(msg.ROW_PREMIUM_TINY, premium=premium, ratio=PREMIUM_MIN_RATIO),
    )
    checked = _good(
        rows,
        commodity_id=cid,
        trade_date=trade,
        delivery=delivery,
        expiry=expiry,
        is_call=call,
        strike=strike,
        premium=premium,
        implied_vol=vol,
        bid=bid,
        ask=ask,
        exercise=np.where(am, "american", "european").astype(object),
    )
    checked.no_curve = no_curve
    return checked


def _too_high(rows: RowCheck, values: FloatArray, name: str) -> None:
    rule = rows.value_reason(name, msg.ROW_TOO_HIGH, high=PRICE_MAX)
    rows.reject(values > PRICE_MAX, name, rule)


def check_rates(rows: RowCheck) -> Checked:
    trade = rows.date("trade_date")
    maturity = rows.date("maturity")
    rate = rows.number("zero_rate")
    limit = rows.value_reason("zero_rate", msg.ROW_RATE_RANGE, limit=ZERO_RATE_LIMIT)
    rows.reject(np.abs(rate) > ZERO_RATE_LIMIT, "zero_rate", limit)
    rows.reject(
        maturity <= trade,
        "maturity",
        each(msg.ROW_NOT_AFTER_TRADE, value=maturity, trade_date=trade),
    )
    _horizon(rows, trade, maturity, "maturity")
    return _good(rows, trade_date=trade, maturity=maturity, zero_rate=rate)


# --- whole-file rules: duplicates and day-on-day moves -----------------------------------------

KEYS: dict[str, tuple[str, ...]] = {
    "futures": ("commodity_id", "trade_date", "delivery"),
    "options": ("commodity_id", "trade_date", "delivery", "expiry", "is_call", "strike"),
    "rates": ("trade_date", "maturity"),
}
"""The key of each file kind's rows (a later batch's row supersedes an earlier one by it)."""
VALUES: dict[str, tuple[str, ...]] = {
    "futures": ("settle",),
    "options": ("premium", "implied_vol", "bid", "ask", "exercise"),
    "rates": ("zero_rate",),
}
"""The values a row carries besides its key."""
MOVES: dict[str, tuple[str, str]] = {
    "futures": ("settle", "settle_move"),
    "options": ("implied_vol", "vol_move"),
}
"""Per file kind, the value checked day on day and the :class:`Bands` field bounding it."""


def contract_key(columns: dict[str, npt.NDArray[Any]], kind: str) -> list[npt.NDArray[Any]]:
    """The key columns of ``kind`` without the trade date: what identifies a contract."""
    return [columns[k] for k in KEYS[kind] if k != "trade_date"]


def day_on_day(
    new_keys: Sequence[npt.NDArray[Any]],
    new_day: IntArray,
    new_value: FloatArray,
    old_keys: Sequence[npt.NDArray[Any]],
    old_day: IntArray,
    old_value: FloatArray,
    factor: float,
    max_gap_days: int,
) -> tuple[IntArray, FloatArray, IntArray]:
    """Rows of a file whose value moved beyond ``factor`` from their contract's previous value.

    The previous value of a row is the latest earlier one of the same contract (same
    ``new_keys``), from the file's rows or from stored ones (``old_*``; a stored row of the same
    contract and day as a file row is replaced by it), at most ``max_gap_days`` older, and
    itself not refused: a refused value is passed over for the one before it. NaN values are
    not checked.

    Returns
    -------
    positions, previous values, previous days
        The refused file rows (positions into ``new_*``) and what each was compared with.
    """
    n_new = len(new_day)
    keep = ~np.isnan(new_value)
    if n_new == 0 or not keep.any():
        return np.empty(0, np.int64), np.empty(0), np.empty(0, np.int64)
    frame = pd.DataFrame(
        {
            f"k{j}": np.concatenate([np.asarray(a), np.asarray(b)])
            for j, (a, b) in enumerate(zip(new_keys, old_keys, strict=True))
        }
    )
    group = frame.groupby(list(frame.columns), sort=False, dropna=False).ngroup().to_numpy()
    day = np.concatenate([new_day, old_day]).astype(np.int64)
    value = np.concatenate([new_value, old_value]).astype(np.float64)
    is_new = np.arange(len(day)) < n_new
    # a stored row of a (contract, day) the file carries is superseded by the file's row
    pair = pd.MultiIndex.from_arrays([group, day])
    superseded = ~is_new & pair.isin(pair[:n_new])
    usable = ~np.isnan(value) & ~superseded
    order = np.flatnonzero(usable)
    order = order[np.lexsort((day[order], group[order]))]
    prev = np.full(len(day), -1, dtype=np.int64)
    same = group[order[1:]] == group[order[:-1]]
    prev[order[1:][same]] = order[:-1][same]

    def moved(rows: IntArray) -> BoolArray:
        p = prev[rows]
        has = (p >= 0) & (day[rows] - day[np.maximum(p, 0)] <= max_gap_days)
        ratio = value[rows] / value[np.maximum(p, 0)]
        return np.asarray(has & ((ratio > factor) | (ratio < 1.0 / factor)))

    candidates = np.flatnonzero(is_new & usable)
    flagged = np.zeros(len(day), dtype=np.bool_)
    flagged[candidates] = moved(candidates)
    for _ in range(8):  # pass over refused values, for the rows that followed one
        behind = candidates[(prev[candidates] >= 0) & flagged[np.maximum(prev[candidates], 0)]]
        if behind.size == 0:
            break
        prev[behind] = prev[prev[behind]]
        flagged[behind] = moved(behind)
    out = np.flatnonzero(flagged[:n_new])
    p = prev[out]
    return out, value[p], day[p]


def move_reasons(
    positions: IntArray,
    value: FloatArray,
    previous: FloatArray,
    previous_day: IntArray,
    name: str,
    factor: float,
) -> dict[int, str]:
    """Position -> reason for :func:`day_on_day`'s refused rows."""
    return {
        int(i): msg.ROW_DAY_MOVE.format(
            name=name,
            value=value[i],
            previous=prev,
            day=np.datetime64(int(d), "D"),
            ratio=value[i] / prev,
            limit=factor,
        )
        for i, prev, d in zip(positions, previous, previous_day, strict=True)
    }
