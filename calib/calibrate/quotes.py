"""One day's option quotes, and the filters and weights that turn them into fit data.

Exercise styles
---------------
A quote is European (Black-76) or American (:mod:`calib.model.american`). An American quote's
market volatility is its American implied volatility, its vega the American one, and the fit
prices it with the American pricer at the model's total variance ``V`` taken as a constant
volatility ``sqrt(V / T)`` over the option's life. The two-factor futures volatility is not
constant in time (it rises towards the future's maturity), and the early-exercise premium
depends a little on how the variance is spread over the life, not only on its total: this is
the constant-volatility-equivalent approximation (common practice). Its size was measured
against a Crank-Nicolson solution with the model's time-dependent volatility
(``tests/calibrate/test_american_fit.py``): see the README's figures.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt

from calib.calibrate.settings import CalibrationSettings
from calib.errors import (
    AMERICAN_IMPLIED_VOL_REASONS,
    IMPLIED_VOL_REASONS,
    CalibrationNumericalError,
    QuoteError,
)
from calib.model import american, black76
from calib.types import EXERCISE_STYLES, ArrayLike, BoolArray, FloatArray, IntArray, readonly

DAYS_PER_YEAR = 365.0  # ACT/365, as the inputs (DESIGN §7)

CONTRACT_FIELDS = ("t_expiry", "t_delivery", "is_call", "strike", "forward", "discount")
"""The arrays of :class:`OptionQuotes` that define each option (and of :class:`FitData`)."""


@dataclass(frozen=True, slots=True, eq=False)
class OptionQuotes:
    """A day's options on futures, European or American (frozen; arrays are read-only copies).

    Attributes
    ----------
    t_expiry : option expiry, years from today (> 0).
    t_delivery : delivery of the underlying future, years from today (>= ``t_expiry``).
    is_call : ``True`` for a call.
    strike, forward : strike and futures price (> 0).
    discount : discount factor to the premium payment date, in (0, 1.5].
    premium : settled premium, or ``None`` when ``implied_vol`` is given.
    implied_vol : Black volatility, or ``None`` when ``premium`` is given.
    bid, ask : optional premiums (both or neither), used by spread weighting.
    labels : optional quote ids, carried into the result.
    american : ``True`` for an American-style quote; ``None`` (the default) for a day of
        European quotes only.

    Use :meth:`from_arrays` to build from a rate instead of a discount factor.
    """

    t_expiry: FloatArray
    t_delivery: FloatArray
    is_call: BoolArray
    strike: FloatArray
    forward: FloatArray
    discount: FloatArray
    premium: FloatArray | None = None
    implied_vol: FloatArray | None = None
    bid: FloatArray | None = None
    ask: FloatArray | None = None
    labels: tuple[str, ...] | None = None
    american: BoolArray | None = None

    def __post_init__(self) -> None:
        t = np.atleast_1d(np.asarray(self.t_expiry, dtype=np.float64))
        n = t.shape[0]
        if t.ndim != 1 or n == 0:
            raise QuoteError("t_expiry", "must be a non-empty 1-D array")

        def arr(name: str, value: ArrayLike, dtype: type = np.float64) -> npt.NDArray[Any]:
            a: npt.NDArray[Any] = np.atleast_1d(np.asarray(value, dtype=dtype))
            if a.shape != (n,):
                raise QuoteError(name, f"has shape {a.shape}, expected ({n},)")
            if dtype is np.float64 and not np.all(np.isfinite(a)):
                raise QuoteError(name, f"is not finite at index {int(np.argmin(np.isfinite(a)))}")
            return readonly(a)

        set_ = object.__setattr__
        set_(self, "t_expiry", arr("t_expiry", t))
        for name in ("t_delivery", "strike", "forward", "discount"):
            set_(self, name, arr(name, getattr(self, name)))
        call = np.atleast_1d(np.asarray(self.is_call))
        if call.dtype != np.bool_:
            raise QuoteError("is_call", "must be booleans (True = call)")
        set_(self, "is_call", arr("is_call", call, np.bool_))
        _positive("t_expiry", self.t_expiry)
        _positive("strike", self.strike)
        _positive("forward", self.forward)
        _positive("discount", self.discount)
        if np.any(self.discount > 1.5):
            raise QuoteError("discount", "is a discount factor and must be <= 1.5")
        if np.any(self.t_delivery < self.t_expiry):
            i = int(np.argmax(self.t_delivery < self.t_expiry))
            raise QuoteError("t_delivery", f"precedes the option expiry at index {i}")
        if (self.premium is None) == (self.implied_vol is None):
            raise QuoteError("premium", "give exactly one of premium and implied_vol")
        if self.premium is not None:
            set_(self, "premium", arr("premium", self.premium))
            if np.any(self.premium < 0.0):
                raise QuoteError("premium", "must be >= 0")
        if self.implied_vol is not None:
            set_(self, "implied_vol", arr("implied_vol", self.implied_vol))
            _positive("implied_vol", self.implied_vol)
        if (self.bid is None) != (self.ask is None):
            raise QuoteError("bid", "give both bid and ask, or neither")
        if self.bid is not None and self.ask is not None:
            set_(self, "bid", arr("bid", self.bid))
            set_(self, "ask", arr("ask", self.ask))
            if np.any(self.ask < self.bid):
                i = int(np.argmax(self.ask < self.bid))
                raise QuoteError("ask", f"is below the bid at index {i}")
        if self.labels is not None:
            labels = tuple(str(x) for x in self.labels)
            if len(labels) != n:
                raise QuoteError("labels", f"has {len(labels)} entries, expected {n}")
            set_(self, "labels", labels)
        if self.american is not None:
            style = np.atleast_1d(np.asarray(self.american))
            if style.dtype != np.bool_:
                raise QuoteError("american", "must be booleans (True = American)")
            set_(self, "american", arr("american", style, np.bool_))

    @classmethod
    def from_arrays(
        cls,
        *,
        t_expiry: ArrayLike,
        t_delivery: ArrayLike,
        is_call: ArrayLike,
        strike: ArrayLike,
        forward: ArrayLike,
        discount: ArrayLike | None = None,
        rate: ArrayLike | None = None,
        premium: ArrayLike | None = None,
        implied_vol: ArrayLike | None = None,
        bid: ArrayLike | None = None,
        ask: ArrayLike | None = None,
        labels: tuple[str, ...] | list[str] | None = None,
        american: ArrayLike | None = None,
    ) -> OptionQuotes:
        """Build from array-likes; give ``discount`` or a continuously compounded ``rate``.

        ``is_call`` may also be ``"call"``/``"put"`` strings, ``american`` booleans or
        ``"american"``/``"european"`` strings.
        """
        if (discount is None) == (rate is None):
            raise QuoteError("discount", "give exactly one of discount and rate")
        t = np.asarray(t_expiry, dtype=np.float64)
        disc = np.exp(-np.asarray(rate, dtype=np.float64) * t) if discount is None else discount

        def opt(x: ArrayLike | None) -> FloatArray | None:
            return None if x is None else np.asarray(x, dtype=np.float64)

        return cls(
            t_expiry=t,
            t_delivery=np.asarray(t_delivery, dtype=np.float64),
            is_call=black76.is_call(is_call),
            strike=np.asarray(strike, dtype=np.float64),
            forward=np.asarray(forward, dtype=np.float64),
            discount=np.asarray(disc, dtype=np.float64),
            premium=opt(premium),
            implied_vol=opt(implied_vol),
            bid=opt(bid),
            ask=opt(ask),
            labels=None if labels is None else tuple(labels),
            american=None if american is None else is_american(american),
        )

    def __len__(self) -> int:
        return int(self.t_expiry.shape[0])

    def take(self, index: ArrayLike) -> OptionQuotes:
        """The quotes at positions ``index`` (in that order, repeats allowed), as a new day."""
        i = np.asarray(index, dtype=np.int64)

        def pick(x: FloatArray | None) -> FloatArray | None:
            return None if x is None else x[i]

        return OptionQuotes(
            **self.contracts(i),
            premium=pick(self.premium),
            implied_vol=pick(self.implied_vol),
            bid=pick(self.bid),
            ask=pick(self.ask),
            labels=None if self.labels is None else tuple(self.labels[j] for j in i.tolist()),
            american=None if self.american is None else self.american[i],
        )

    def contracts(self, i: IntArray) -> dict[str, npt.NDArray[Any]]:
        """The arrays that define each option (:data:`CONTRACT_FIELDS`) at positions ``i``."""
        return {name: getattr(self, name)[i] for name in CONTRACT_FIELDS}

    @property
    def rate(self) -> FloatArray:
        """Continuously compounded rate implied by the discount factor, ``-ln D / T``."""
        return np.asarray(-np.log(self.discount) / self.t_expiry)

    def label(self, i: int) -> str:
        """The quote's label, or its index as text."""
        return self.labels[i] if self.labels is not None else str(i)

    @property
    def is_american(self) -> BoolArray:
        """``True`` for each American-style quote (all ``False`` for a European day)."""
        if self.american is None:
            return np.zeros(len(self), dtype=np.bool_)
        return self.american


def is_american(style: ArrayLike) -> BoolArray:
    """Booleans (True = American) from booleans or ``"american"``/``"european"`` strings."""
    a = np.atleast_1d(np.asarray(style))
    if a.dtype == np.bool_:
        return a
    text = np.char.lower(a.astype(str))
    bad = ~np.isin(text, EXERCISE_STYLES)
    if bad.any():
        raise QuoteError(
            "american",
            f"exercise style {a[np.argmax(bad)]!r} is not one of {', '.join(EXERCISE_STYLES)}",
        )
    return np.asarray(text == "american")


TINY_VARIANCE = 1e-300
"""Floor of a total variance in the fit: keeps derivatives finite at ``V = 0`` (a degenerate,
zero-vol model)."""


def equivalent_vol(V: FloatArray, T: FloatArray) -> FloatArray:
    """The constant volatility with total variance ``V`` over ``T`` years (``V`` floored)."""
    return np.asarray(np.sqrt(np.maximum(V, TINY_VARIANCE)) / np.sqrt(T))


class AmericanPrices:
    """A day's American quotes priced at constant volatilities, each result remembered.

    The fit prices the same quotes at the same volatilities more than once (the objective at
    a point, then its slope there; the final point in the result and the standard errors), and
    an American premium costs about a thousand Black-76 ones. Results are kept per volatility
    array (its bytes), the last :attr:`KEEP` of them; the pricer is deterministic, so a
    remembered premium is the very one a new pricing would give.
    """

    KEEP = 8

    def __init__(
        self, F: FloatArray, K: FloatArray, T: FloatArray, r: FloatArray, call: BoolArray
    ) -> None:
        self.args = (F, K, T, r)
        self.is_call = call
        self._memo: dict[tuple[tuple[int, ...], bytes], tuple[FloatArray, FloatArray | None]] = {}

    def _key(self, vol: FloatArray) -> tuple[tuple[int, ...], bytes]:
        return vol.shape, np.ascontiguousarray(vol).tobytes()

    def _keep(
        self, key: tuple[tuple[int, ...], bytes], value: tuple[FloatArray, FloatArray | None]
    ) -> None:
        if len(self._memo) >= self.KEEP:
            del self._memo[next(iter(self._memo))]
        self._memo[key] = value

    def remember(self, vol: FloatArray, price: FloatArray, vega: FloatArray) -> None:
        """Keep premiums and vegas priced elsewhere at ``vol`` by the same pricer."""
        self._keep(self._key(vol), (price, vega))

    def price(self, vol: FloatArray) -> FloatArray:
        """Premiums at ``vol`` (quotes on the last axis)."""
        key = self._key(vol)
        hit = self._memo.get(key)
        if hit is not None:
            return hit[0]
        value = american.price(*self.args, vol, self.is_call)
        self._keep(key, (value, None))
        return value

    def price_vega(self, vol: FloatArray) -> tuple[FloatArray, FloatArray]:
        """Premiums and vegas (per unit vol, :func:`calib.model.american.greeks`)."""
        key = self._key(vol)
        hit = self._memo.get(key)
        if hit is not None and hit[1] is not None:
            return hit[0], hit[1]
        known = None if hit is None else hit[0]
        g = american.greeks(*self.args, vol, self.is_call, delta=False, value=known)
        value, vega = g["price"], g["vega"]
        self._keep(key, (value, vega))
        return value, vega


@dataclass(frozen=True, slots=True)
class DroppedQuote:
    """A quote the filters left out, and why."""

    index: int
    label: str
    reason: str


@dataclass(frozen=True, slots=True, eq=False)
class FitData:
    """The usable quotes of a day, in the arrays the fit works on (internal)."""

    index: IntArray
    strike: FloatArray
    is_call: BoolArray
    t_expiry: FloatArray
    t_delivery: FloatArray
    forward: FloatArray
    discount: FloatArray
    price: FloatArray
    vol: FloatArray
    weight: FloatArray
    scale: float
    dropped: tuple[DroppedQuote, ...]
    vega: FloatArray
    """Market vega per unit of ``scale``: the price error of one unit of volatility."""
    threshold: FloatArray | None
    """Huber thresholds per quote in the error measure's units (``None``: squared loss)."""
    american: IntArray | None = None
    """Positions (in these arrays) of the American quotes; ``None`` when there is none."""
    american_prices: AmericanPrices | None = None
    """Their pricer at constant volatilities (remembering what it priced)."""

    @property
    def rate(self) -> FloatArray:
        """Continuously compounded rate implied by the discount factor, ``-ln D / T``."""
        return np.asarray(-np.log(self.discount) / self.t_expiry)

    @property
    def n(self) -> int:
        return int(self.index.shape[0])


def _positive(name: str, x: FloatArray) -> None:
    if np.any(x <= 0.0):
        raise QuoteError(name, f"must be > 0 (index {int(np.argmax(x <= 0.0))})")


def prepare(quotes: OptionQuotes, settings: CalibrationSettings) -> FitData:
    """Market prices and implied vols, the filters of ``settings`` and normalised weights.

    Notes
    -----
    Filters, in order (a quote gets the first reason that applies): implied volatility
    unavailable, values not representable (a price, vega or weight that is not finite, e.g.
    a futures price near the float64 limit), fewer than ``min_days_to_expiry`` days to expiry,
    strike/forward outside the moneyness band, market vega per unit forward
    ``D n(d1) sqrt(T)`` below ``min_vega``, (spread weighting) no positive bid-ask spread, and
    last the smile screen (:func:`screen`, when ``screen_vol_points > 0``). Weights: ``1``,
    ``vega / F`` or ``1 / spread^2`` with the spread in the error measure's units (price
    spread over the mean forward, or over vega for vol), normalised to sum to one.

    Huber thresholds: ``huber_threshold`` vol points, times ``nu_i`` in the price measure.
    """
    try:
        return _prepare(quotes, settings)
    except ArithmeticError as exc:  # a numerical failure in the pricer: the day's refusal
        raise CalibrationNumericalError(f"{type(exc).__name__}: {exc}") from exc


def _prepare(quotes: OptionQuotes, settings: CalibrationSettings) -> FitData:
    q = quotes
    r = q.rate
    with np.errstate(all="ignore"):
        if q.implied_vol is not None:
            vol = np.asarray(q.implied_vol, dtype=np.float64)
            premium = black76.price(q.forward, q.strike, q.t_expiry, r, vol, q.is_call)
            reasons = np.full(len(q), "", dtype=object)
        else:
            premium = np.asarray(q.premium, dtype=np.float64)
            vol, codes = black76.implied_vol_detail(
                premium, q.forward, q.strike, q.t_expiry, r, q.is_call
            )
            ok_vol = codes == black76.ImpliedVolCode.OK
            reasons = np.array(
                [
                    ""
                    if ok
                    else "no implied volatility: "
                    + IMPLIED_VOL_REASONS[black76.ImpliedVolCode(int(c)).name]
                    for ok, c in zip(ok_vol, codes, strict=True)
                ],
                dtype=object,
            )
        g = black76.greeks(q.forward, q.strike, q.t_expiry, r, np.nan_to_num(vol), q.is_call)
        vega = g["vega"]
        am = np.flatnonzero(q.is_american)
        seed = None
        if am.size:  # American quotes: their own premium, implied vol and vega
            premium, vol, vega, seed = _american_quotes(q, am, premium, vol, reasons, vega)
        vega_f = vega / q.forward
        m = q.strike / q.forward
    days = q.t_expiry * DAYS_PER_YEAR
    lo, hi = settings.moneyness_band
    representable = np.isfinite(premium) & np.isfinite(vega_f) & np.isfinite(vega) & np.isfinite(m)
    checks: list[tuple[BoolArray, str]] = [
        (~representable, "values not representable in float64 (price or vega overflows)"),
        (
            days < settings.min_days_to_expiry,
            f"under {settings.min_days_to_expiry:g} days to expiry",
        ),
        ((m < lo) | (m > hi), f"strike/forward outside [{lo:g}, {hi:g}]"),
        (vega_f < settings.min_vega, f"vega/forward below {settings.min_vega:g}"),
    ]
    spread = None
    if settings.weighting == "spread":
        if q.bid is None or q.ask is None:
            raise QuoteError("bid", "spread weighting needs bid and ask")
        spread = q.ask - q.bid
        checks.append((spread <= 0.0, "no positive bid-ask spread"))
    for bad, why in checks:
        reasons = np.where((reasons == "") & bad, why, reasons)
    if settings.screen_vol_points > 0.0:
        kept = np.flatnonzero(reasons == "")
        far = screen(vol[kept], q.strike[kept] / q.forward[kept], q.t_expiry[kept])
        limit = settings.screen_vol_points / 100.0
        for j in np.flatnonzero(far[0] > limit):
            i = kept[j]
            reasons[i] = (
                f"{SCREENED}: implied vol {100 * vol[i]:.4g} is {100 * far[0][j]:.3g} vol points "
                f"from the smile of its neighbours ({100 * far[1][j]:.4g}); limit "
                f"{settings.screen_vol_points:g}"
            )
    keep = reasons == ""
    idx = np.flatnonzero(keep).astype(np.int64)
    dropped = tuple(
        DroppedQuote(int(i), q.label(int(i)), str(reasons[i])) for i in np.flatnonzero(~keep)
    )
    scale = float(np.mean(q.forward[idx])) if idx.size else 1.0
    with np.errstate(all="ignore"):
        if settings.weighting == "equal":
            w = np.ones(idx.size)
        elif settings.weighting == "vega":
            w = vega_f[idx]
        else:
            assert spread is not None
            s = spread[idx] / (scale if settings.error_measure == "price" else vega[idx])
            w = 1.0 / (s * s)
        w = w / w.sum() if idx.size else w
        nu = np.asarray(vega[idx] / scale, dtype=np.float64)
    if not (np.all(np.isfinite(w)) and np.all(np.isfinite(nu)) and math.isfinite(scale)):
        raise CalibrationNumericalError(
            "weights or vegas of the usable quotes are not finite (prices far outside float64 "
            "range relative to each other)"
        )
    vol_measure = settings.error_measure == "vol"
    threshold = None
    if settings.loss == "huber":
        d = settings.huber_threshold / 100.0
        threshold = np.full(idx.size, d) if vol_measure else d * nu
        threshold = np.maximum(threshold, 1e-300)
    return FitData(
        index=idx,
        **q.contracts(idx),
        price=premium[idx],
        vol=vol[idx],
        weight=np.asarray(w, dtype=np.float64),
        scale=scale,
        dropped=dropped,
        vega=nu,
        threshold=threshold,
        american=None if seed is None else np.flatnonzero(q.is_american[idx]),
        american_prices=None if seed is None else _seeded(q, idx, *seed),
    )


def _seeded(
    q: OptionQuotes, idx: IntArray, key: FloatArray, price: FloatArray, vega: FloatArray
) -> AmericanPrices:
    """The fitted American quotes' pricer, remembering their premiums and vegas at the market
    (the fit's first linearisation point); ``key``, ``price``, ``vega`` are per quote of
    ``q`` (NaN for the European ones)."""
    kept = idx[q.is_american[idx]]
    prices = AmericanPrices(
        q.forward[kept], q.strike[kept], q.t_expiry[kept], q.rate[kept], q.is_call[kept]
    )
    prices.remember(key[kept], price[kept], vega[kept])
    return prices


def _american_quotes(
    q: OptionQuotes,
    am: IntArray,
    premium: FloatArray,
    vol: FloatArray,
    reasons: npt.NDArray[np.object_],
    vega: FloatArray,
) -> tuple[FloatArray, FloatArray, FloatArray, tuple[FloatArray, FloatArray, FloatArray]]:
    """Premium, implied vol and vega with the American quotes ``am`` replaced by their own
    (American pricer); ``reasons`` of those quotes is set to theirs. Last, the volatilities
    the fit will first price them at (:func:`equivalent_vol` of the market variance) with
    their premiums and vegas there, per quote (NaN for the European ones)."""
    premium, vol, vega = (np.array(x, dtype=np.float64) for x in (premium, vol, vega))
    F, K, T, r, call = q.forward[am], q.strike[am], q.t_expiry[am], q.rate[am], q.is_call[am]
    if q.implied_vol is not None:
        premium[am] = american.price(F, K, T, r, vol[am], call)
        reasons[am] = ""
    else:
        vol[am], codes = american.implied_vol_detail(premium[am], F, K, T, r, call)
        reasons[am] = [
            ""
            if c == black76.ImpliedVolCode.OK
            else "no implied volatility: "
            + AMERICAN_IMPLIED_VOL_REASONS[black76.ImpliedVolCode(int(c)).name]
            for c in codes
        ]
    key, at_key, vega_key = (np.full(len(q), np.nan) for _ in range(3))
    key[am] = equivalent_vol(np.nan_to_num(vol[am]) ** 2 * T, T)
    g = american.greeks(F, K, T, r, key[am], call, delta=False)
    at_key[am], vega_key[am] = g["price"], g["vega"]
    vega[am] = vega_key[am]  # the vega at the market vol, to rounding
    return premium, vol, vega, (key, at_key, vega_key)


SCREENED = "screened"
"""First word of the reason of a quote the smile screen set aside."""

SCREEN_NEIGHBOURS = 4
"""Quotes a screened quote is compared with (the nearest by the distance of :func:`screen`)."""
_OTHER_EXPIRY = 1.0  # distance added for a neighbour at another expiry (moneyness units)


def screen(
    vol: FloatArray, moneyness: FloatArray, t_expiry: FloatArray
) -> tuple[FloatArray, FloatArray]:
    """Distance of each implied vol from the day's own smile, and the smile's value there.

    Notes
    -----
    The smile at a quote is the median implied vol of its :data:`SCREEN_NEIGHBOURS` nearest
    other quotes, nearness measured in standardised log-moneyness ``ln(K/F) / sqrt(T)``, plus
    ``1 + |ln T_i - ln T_j|`` for a quote of another expiry (so neighbours come from the same
    expiry when it has enough, else from the nearest expiries). The median ignores one bad
    neighbour among four, so one bad quote cannot hide itself or condemn a good one. The
    distance is ``|vol_i - median|``, in volatility (decimal) units.
    """
    n = vol.size
    if n < 2:
        return np.zeros(n), np.asarray(vol, dtype=np.float64)
    k = np.log(moneyness) / np.sqrt(t_expiry)
    lt = np.log(t_expiry)
    same = np.abs(t_expiry[:, None] - t_expiry[None, :]) <= 1e-12
    dist = np.abs(k[:, None] - k[None, :]) + np.where(
        same, 0.0, _OTHER_EXPIRY + np.abs(lt[:, None] - lt[None, :])
    )
    np.fill_diagonal(dist, np.inf)
    m = min(SCREEN_NEIGHBOURS, n - 1)
    nearest = np.argpartition(dist, m - 1, axis=1)[:, :m]
    smile = np.median(vol[nearest], axis=1)
    return np.abs(vol - smile), smile
