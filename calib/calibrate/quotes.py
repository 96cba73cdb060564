"""One day's option quotes, and the filters and weights that turn them into fit data."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt

from calib.calibrate.settings import CalibrationSettings
from calib.errors import IMPLIED_VOL_REASONS, QuoteError
from calib.model import black76
from calib.types import ArrayLike, BoolArray, FloatArray, IntArray, readonly

DAYS_PER_YEAR = 365.0  # ACT/365, as the inputs (DESIGN §7)


@dataclass(frozen=True, slots=True, eq=False)
class OptionQuotes:
    """A day's European options on futures (frozen; arrays are read-only copies).

    Attributes
    ----------
    expiry : option expiry, years from today (> 0).
    maturity : maturity of the underlying future, years from today (>= expiry).
    is_call : ``True`` for a call.
    strike, forward : strike and futures price (> 0).
    discount : discount factor to the premium payment date, in (0, 1.5].
    premium : settled premium, or ``None`` when ``implied_vol`` is given.
    implied_vol : Black volatility, or ``None`` when ``premium`` is given.
    bid, ask : optional premiums (both or neither), used by spread weighting.
    labels : optional quote ids, carried into the result.

    Use :meth:`from_arrays` to build from a rate instead of a discount factor.
    """

    expiry: FloatArray
    maturity: FloatArray
    is_call: BoolArray
    strike: FloatArray
    forward: FloatArray
    discount: FloatArray
    premium: FloatArray | None = None
    implied_vol: FloatArray | None = None
    bid: FloatArray | None = None
    ask: FloatArray | None = None
    labels: tuple[str, ...] | None = None

    def __post_init__(self) -> None:
        t = np.atleast_1d(np.asarray(self.expiry, dtype=np.float64))
        n = t.shape[0]
        if t.ndim != 1 or n == 0:
            raise QuoteError("expiry", "must be a non-empty 1-D array")

        def arr(name: str, value: ArrayLike, dtype: type = np.float64) -> npt.NDArray[Any]:
            a: npt.NDArray[Any] = np.atleast_1d(np.asarray(value, dtype=dtype))
            if a.shape != (n,):
                raise QuoteError(name, f"has shape {a.shape}, expected ({n},)")
            if dtype is np.float64 and not np.all(np.isfinite(a)):
                raise QuoteError(name, f"is not finite at index {int(np.argmin(np.isfinite(a)))}")
            return readonly(a)

        set_ = object.__setattr__
        set_(self, "expiry", arr("expiry", t))
        for name in ("maturity", "strike", "forward", "discount"):
            set_(self, name, arr(name, getattr(self, name)))
        call = np.atleast_1d(np.asarray(self.is_call))
        if call.dtype != np.bool_:
            raise QuoteError("is_call", "must be booleans (True = call)")
        set_(self, "is_call", arr("is_call", call, np.bool_))
        _positive("expiry", self.expiry)
        _positive("strike", self.strike)
        _positive("forward", self.forward)
        _positive("discount", self.discount)
        if np.any(self.discount > 1.5):
            raise QuoteError("discount", "is a discount factor and must be <= 1.5")
        if np.any(self.maturity < self.expiry):
            i = int(np.argmax(self.maturity < self.expiry))
            raise QuoteError("maturity", f"precedes the option expiry at index {i}")
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

    @classmethod
    def from_arrays(
        cls,
        *,
        expiry: ArrayLike,
        maturity: ArrayLike,
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
    ) -> OptionQuotes:
        """Build from array-likes; give ``discount`` or a continuously compounded ``rate``.

        ``is_call`` may also be ``"call"``/``"put"`` strings.
        """
        if (discount is None) == (rate is None):
            raise QuoteError("discount", "give exactly one of discount and rate")
        t = np.asarray(expiry, dtype=np.float64)
        disc = np.exp(-np.asarray(rate, dtype=np.float64) * t) if discount is None else discount

        def opt(x: ArrayLike | None) -> FloatArray | None:
            return None if x is None else np.asarray(x, dtype=np.float64)

        return cls(
            expiry=t,
            maturity=np.asarray(maturity, dtype=np.float64),
            is_call=black76.is_call(is_call),
            strike=np.asarray(strike, dtype=np.float64),
            forward=np.asarray(forward, dtype=np.float64),
            discount=np.asarray(disc, dtype=np.float64),
            premium=opt(premium),
            implied_vol=opt(implied_vol),
            bid=opt(bid),
            ask=opt(ask),
            labels=None if labels is None else tuple(labels),
        )

    def __len__(self) -> int:
        return int(self.expiry.shape[0])

    @property
    def rate(self) -> FloatArray:
        """Continuously compounded rate implied by the discount factor, ``-ln D / T``."""
        return np.asarray(-np.log(self.discount) / self.expiry)

    def label(self, i: int) -> str:
        """The quote's label, or its index as text."""
        return self.labels[i] if self.labels is not None else str(i)


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
    expiry: FloatArray
    maturity: FloatArray
    call: BoolArray
    strike: FloatArray
    forward: FloatArray
    discount: FloatArray
    price: FloatArray
    vol: FloatArray
    weight: FloatArray
    scale: float
    dropped: tuple[DroppedQuote, ...]

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
    unavailable, fewer than ``min_days_to_expiry`` days to expiry, strike/forward outside the
    moneyness band, market vega per unit forward ``D n(d1) sqrt(T)`` below ``min_vega``, and
    (spread weighting) no positive bid-ask spread. Weights: ``1``, ``vega / F`` or
    ``1 / spread^2`` with the spread in the error measure's units (price spread over the mean
    forward, or over vega for vol), normalised to sum to one.
    """
    q = quotes
    r = q.rate
    if q.implied_vol is not None:
        vol = np.asarray(q.implied_vol, dtype=np.float64)
        premium = black76.price(q.forward, q.strike, q.expiry, r, vol, q.is_call)
        reasons = np.full(len(q), "", dtype=object)
    else:
        premium = np.asarray(q.premium, dtype=np.float64)
        vol, codes = black76.implied_vol_detail(
            premium, q.forward, q.strike, q.expiry, r, q.is_call
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
    g = black76.greeks(q.forward, q.strike, q.expiry, r, np.nan_to_num(vol), q.is_call)
    vega_f = g["vega"] / q.forward
    days = q.expiry * DAYS_PER_YEAR
    m = q.strike / q.forward
    lo, hi = settings.moneyness_band
    checks: list[tuple[BoolArray, str]] = [
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
    keep = reasons == ""
    idx = np.flatnonzero(keep).astype(np.int64)
    dropped = tuple(
        DroppedQuote(int(i), q.label(int(i)), str(reasons[i])) for i in np.flatnonzero(~keep)
    )
    scale = float(np.mean(q.forward[idx])) if idx.size else 1.0
    if settings.weighting == "equal":
        w = np.ones(idx.size)
    elif settings.weighting == "vega":
        w = vega_f[idx]
    else:
        assert spread is not None
        s = spread[idx] / (scale if settings.error_measure == "price" else g["vega"][idx])
        w = 1.0 / (s * s)
    w = w / w.sum() if idx.size else w
    return FitData(
        index=idx,
        expiry=q.expiry[idx],
        maturity=q.maturity[idx],
        call=q.is_call[idx],
        strike=q.strike[idx],
        forward=q.forward[idx],
        discount=q.discount[idx],
        price=premium[idx],
        vol=vol[idx],
        weight=np.asarray(w, dtype=np.float64),
        scale=scale,
        dropped=dropped,
    )
