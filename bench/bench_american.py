"""American premiums and implied vols of 100,000 mixed options: calib against QuantLib.

Options: strikes 0.5F-1.5F, expiries 2 weeks to 3 years (whole days), vols 0.1-0.8, rate 5 %,
calls and puts, seeded. calib prices and inverts all of them in one call each; QuantLib's
QdFpAmericanEngine (its default scheme) and BaroneAdesiWhaleyApproximationEngine price one
option per call (each with its own process: every option has its own volatility) on a
subsample, scaled per option. Accuracy is against QdFpAmericanEngine's high-precision scheme on
a further subsample: the largest relative error, or absolute in units of F for premiums below
1e-2 F (the issue's measure: 1e-6 relative or 1e-8 F). Times are the process's CPU time
(everything here runs on one thread), so that engineers sharing the machine do not inflate
them; on a quiet machine they equal the wall-clock times.
"""

from __future__ import annotations

import time

import numpy as np
import QuantLib as ql  # noqa: N813 (the library's own convention)
from scipy.optimize import brentq

from calib.model import american
from calib.types import FloatArray, IntArray

N_OPTIONS = 100_000
N_QDFP = 300
N_BAW = 1_000
N_REFERENCE = 150
N_QL_IMPLIED = 40
SEED = 20261214
RATE = 0.05

_TODAY = ql.Date(15, 6, 2026)
_DAY_COUNT = ql.Actual365Fixed()


def _options(n: int) -> dict[str, FloatArray]:
    g = np.random.default_rng(SEED)
    F = g.uniform(20.0, 150.0, n)
    days = g.integers(14, 3 * 365, n, endpoint=True)
    return {
        "F": F,
        "K": F * g.uniform(0.5, 1.5, n),
        "days": days.astype(np.float64),
        "T": days / 365.0,
        "r": np.full(n, RATE),
        "vol": g.uniform(0.1, 0.8, n),
        "call": np.asarray(g.random(n) < 0.5, dtype=np.float64),
    }


def _quantlib_option(
    o: dict[str, FloatArray], i: int, engine: str, vol: ql.SimpleQuote | None = None
) -> ql.VanillaOption:
    """The option as QuantLib sees it: the future is a stock with dividend yield = r.

    ``vol``: a quote to move the volatility through (else the option's own, fixed).
    """
    ql.Settings.instance().evaluationDate = _TODAY
    curve = ql.YieldTermStructureHandle(ql.FlatForward(_TODAY, float(o["r"][i]), _DAY_COUNT))
    quote = vol if vol is not None else ql.SimpleQuote(float(o["vol"][i]))
    process = ql.BlackScholesMertonProcess(
        ql.QuoteHandle(ql.SimpleQuote(float(o["F"][i]))),
        curve,
        curve,
        ql.BlackVolTermStructureHandle(
            ql.BlackConstantVol(_TODAY, ql.NullCalendar(), ql.QuoteHandle(quote), _DAY_COUNT)
        ),
    )
    if engine == "qdfp":
        pricer = ql.QdFpAmericanEngine(process)
    elif engine == "qdfp-high":
        pricer = ql.QdFpAmericanEngine(process, ql.QdFpAmericanEngine.highPrecisionScheme())
    else:
        pricer = ql.BaroneAdesiWhaleyApproximationEngine(process)
    kind = ql.Option.Call if o["call"][i] else ql.Option.Put
    option = ql.VanillaOption(
        ql.PlainVanillaPayoff(kind, float(o["K"][i])),
        ql.AmericanExercise(_TODAY, _TODAY + int(o["days"][i])),
    )
    option.setPricingEngine(pricer)
    return option


def _quantlib_prices(o: dict[str, FloatArray], index: range, engine: str) -> FloatArray:
    return np.array([_quantlib_option(o, i, engine).NPV() for i in index])


def _quantlib_implied(o: dict[str, FloatArray], premium: FloatArray, index: IntArray) -> FloatArray:
    """scipy's brentq on QdFpAmericanEngine's (default scheme) premium, per option.

    (QuantLib's own ``impliedVolatility`` prices American options with a coarse
    finite-difference engine, not with the engine set on the option.)
    """
    out = np.empty(index.size)
    for j, i in enumerate(index):
        quote = ql.SimpleQuote(0.2)
        option = _quantlib_option(o, int(i), "qdfp", vol=quote)

        def gap(
            v: float,
            option: ql.VanillaOption = option,
            quote: ql.SimpleQuote = quote,
            p: float = float(premium[i]),
        ) -> float:
            quote.setValue(v)
            return float(option.NPV()) - p

        out[j] = brentq(gap, 1e-3, 5.0, xtol=1e-10, rtol=4 * np.finfo(float).eps)
    return out


def _worst_error(values: FloatArray, ref: FloatArray, F: FloatArray) -> tuple[float, float]:
    """(largest relative error where ref >= 1e-2 F, largest error / F where ref < 1e-2 F)."""
    big = ref >= 1e-2 * F
    rel = np.abs(values - ref) / np.abs(ref)
    small = np.abs(values - ref) / F
    return float(rel[big].max(initial=0.0)), float(small[~big].max(initial=0.0))


def main() -> None:
    o = _options(N_OPTIONS)
    call = o["call"].astype(bool)
    args = (o["F"], o["K"], o["T"], o["r"], o["vol"], call)

    american.price(*(a[:10] for a in args))  # compile once (numba caches it on disk)
    start = time.process_time()
    premium = american.price(*args)
    t_price = (time.process_time() - start) / N_OPTIONS

    american.implied_vol(
        premium[:10], o["F"][:10], o["K"][:10], o["T"][:10], o["r"][:10], call[:10]
    )
    start = time.process_time()
    iv = american.implied_vol(premium, o["F"], o["K"], o["T"], o["r"], call)
    t_iv = (time.process_time() - start) / N_OPTIONS

    start = time.process_time()
    _quantlib_prices(o, range(N_QDFP), "qdfp")
    t_qdfp = (time.process_time() - start) / N_QDFP
    start = time.process_time()
    _quantlib_prices(o, range(N_BAW), "baw")
    t_baw = (time.process_time() - start) / N_BAW

    ref_index = range(N_REFERENCE)
    ref = _quantlib_prices(o, ref_index, "qdfp-high")
    F_ref = o["F"][:N_REFERENCE]
    ours = _worst_error(premium[:N_REFERENCE], ref, F_ref)
    qdfp = _worst_error(_quantlib_prices(o, ref_index, "qdfp"), ref, F_ref)
    baw = _worst_error(_quantlib_prices(o, ref_index, "baw"), ref, F_ref)

    vega = american.greeks(*args)["vega"]
    intrinsic = np.maximum(np.where(call, o["F"] - o["K"], o["K"] - o["F"]), 0.0)
    well = (vega > 1e-8 * o["F"]) & (premium > intrinsic)  # else no unique volatility
    iv_err = np.abs(iv - o["vol"])[well]
    ql_index = np.flatnonzero(well)[:N_QL_IMPLIED]  # QuantLib's solver needs a time value
    start = time.process_time()
    iv_ql = _quantlib_implied(o, premium, ql_index)
    t_iv_ql = (time.process_time() - start) / N_QL_IMPLIED

    print(f"options: {N_OPTIONS:,} ({int(well.sum()):,} with vega > 1e-8 F and a time value)")
    print(f"calib price            : {t_price * 1e6:9.2f} us/option (all at once; target 5)")
    print(
        f"QuantLib QdFp (default): {t_qdfp * 1e6:9.2f} us/option ({N_QDFP} calls)  "
        f"ratio {t_qdfp / t_price:6.1f}x"
    )
    print(
        f"QuantLib BAW           : {t_baw * 1e6:9.2f} us/option ({N_BAW} calls)  "
        f"ratio {t_baw / t_price:6.1f}x"
    )
    print(f"calib implied vol      : {t_iv * 1e6:9.2f} us/option (all at once; target 20)")
    print(
        f"QdFp (default) + brentq: {t_iv_ql * 1e6:9.2f} us/option ({N_QL_IMPLIED} calls, "
        f"xtol 1e-10)  ratio {t_iv_ql / t_iv:6.1f}x"
    )
    print(
        f"accuracy against QdFp high precision ({N_REFERENCE} options): "
        "largest relative error (premium >= 1e-2 F) / largest error in F (below)"
    )
    for name, (rel, absolute) in (("calib", ours), ("QdFp default", qdfp), ("BAW", baw)):
        print(f"  {name:14s}: {rel:9.2e} / {absolute:9.2e}")
    print(
        f"implied-vol round trip (those): max |error| {iv_err.max():.2e}, "
        f"{int(np.isnan(iv[well]).sum())} NaN; |calib - QuantLib| on {N_QL_IMPLIED}: "
        f"{np.nanmax(np.abs(iv[ql_index] - iv_ql)):.2e}"
    )
