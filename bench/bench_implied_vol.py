"""Implied volatility of 100,000 mixed options: calib against QuantLib and scipy brentq.

Options: strikes 0.5F-1.5F, 0.05-3 years, vols 0.1-0.8, calls and puts, seeded. calib inverts
all of them in one call; the peers are called once per option on a subsample and scaled.
Well-posed means vega > 1e-8 F (the accuracy domain of the issue); a failure there is a NaN
or an error above 1e-12 beyond the premium's own conditioning.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable

import numpy as np
import QuantLib as ql  # noqa: N813 (the library's own convention)
from scipy.optimize import brentq
from scipy.special import ndtr

from calib.model import black76
from calib.types import FloatArray

N_OPTIONS = 100_000
N_QUANTLIB = 5_000
N_BRENTQ = 2_000
ACCURACY = 1e-12
SEED = 20261201


def _options(n: int) -> dict[str, FloatArray]:
    g = np.random.default_rng(SEED)
    F = g.uniform(20.0, 150.0, n)
    return {
        "F": F,
        "K": F * g.uniform(0.5, 1.5, n),
        "T": g.uniform(0.05, 3.0, n),
        "r": np.full(n, 0.03),
        "vol": g.uniform(0.1, 0.8, n),
        "call": np.asarray(g.random(n) < 0.5, dtype=np.float64),
    }


def _best_of(repeats: int, run: Callable[[], object]) -> float:
    best = math.inf
    for _ in range(repeats):
        start = time.perf_counter()
        run()
        best = min(best, time.perf_counter() - start)
    return best


def _quantlib(premium: FloatArray, o: dict[str, FloatArray], n: int) -> FloatArray:
    out = np.empty(n)
    for i in range(n):
        kind = ql.Option.Call if o["call"][i] else ql.Option.Put
        disc = math.exp(-o["r"][i] * o["T"][i])
        std = ql.blackFormulaImpliedStdDev(
            kind, o["K"][i], o["F"][i], premium[i], disc, 0.0, ql.nullDouble(), ACCURACY, 100
        )
        out[i] = std / math.sqrt(o["T"][i])
    return out


def _brentq(premium: FloatArray, o: dict[str, FloatArray], n: int) -> FloatArray:
    out = np.empty(n)
    for i in range(n):
        F, K, T, r, call = o["F"][i], o["K"][i], o["T"][i], o["r"][i], bool(o["call"][i])

        def gap(
            v: float,
            p: float = premium[i],
            F: float = F,
            K: float = K,
            T: float = T,
            disc: float = math.exp(-r * T),
            sign: float = 1.0 if call else -1.0,
        ) -> float:
            s = v * math.sqrt(T)
            d1 = math.log(F / K) / s + 0.5 * s
            return float(disc * sign * (F * ndtr(sign * d1) - K * ndtr(sign * (d1 - s))) - p)

        out[i] = brentq(gap, 1e-4, 5.0, xtol=ACCURACY, rtol=4 * np.finfo(float).eps)
    return out


def main() -> None:
    o = _options(N_OPTIONS)
    call = o["call"].astype(bool)
    premium = black76.price(o["F"], o["K"], o["T"], o["r"], o["vol"], call)

    def ours() -> FloatArray:
        return black76.implied_vol(premium, o["F"], o["K"], o["T"], o["r"], call)

    ours()  # compile once (numba caches it on disk afterwards)
    t_ours = _best_of(5, ours) / N_OPTIONS
    iv = ours()
    t_ql = _best_of(2, lambda: _quantlib(premium, o, N_QUANTLIB)) / N_QUANTLIB
    t_bq = _best_of(1, lambda: _brentq(premium, o, N_BRENTQ)) / N_BRENTQ
    iv_ql = _quantlib(premium, o, N_QUANTLIB)

    vega = black76.greeks(o["F"], o["K"], o["T"], o["r"], o["vol"], call)["vega"]
    well = vega > 1e-8 * o["F"]
    err = np.abs(iv - o["vol"])
    s = o["vol"] * np.sqrt(o["T"])
    d1 = np.log(o["F"] / o["K"]) / s + 0.5 * s
    sign = np.where(call, 1.0, -1.0)
    scale = np.exp(-o["r"] * o["T"]) * (o["F"] * ndtr(sign * d1) + o["K"] * ndtr(sign * (d1 - s)))
    bound = 1e-12 + 8.0 * np.finfo(float).eps * scale / vega
    nan_fail = int(np.isnan(iv[well]).sum())
    bound_fail = int((err[well] > bound[well]).sum())
    over_1e12 = err > 1e-12
    otm = np.where(call, o["K"] >= o["F"], o["K"] <= o["F"])

    print(f"options: {N_OPTIONS:,} ({int(well.sum()):,} well-posed: vega > 1e-8 F)")
    print(f"calib implied_vol      : {t_ours * 1e6:8.3f} us/option (all {N_OPTIONS:,} at once)")
    print(
        f"QuantLib implied stddev: {t_ql * 1e6:8.3f} us/option "
        f"({N_QUANTLIB:,} calls, accuracy {ACCURACY:g})  ratio {t_ql / t_ours:6.1f}x"
    )
    print(
        f"scipy brentq           : {t_bq * 1e6:8.3f} us/option "
        f"({N_BRENTQ:,} calls, xtol {ACCURACY:g})  ratio {t_bq / t_ours:6.1f}x"
    )
    print(f"failures on well-posed inputs: {nan_fail} NaN, {bound_fail} beyond 1e-12 + cond.")
    print(
        f"  |error| > 1e-12 on well-posed: {int((over_1e12 & well).sum())} "
        f"({int((over_1e12 & well & otm).sum())} out of the money; in the money the float "
        f"premium fixes the vol only to ~eps*premium/vega); max |error| where cond < 1e-13: "
        f"{err[well & (bound < 1.1e-12)].max():.2e}"
    )
    print(
        f"  max |calib - QuantLib| (well-posed, subsample): "
        f"{np.nanmax(np.abs(iv[:N_QUANTLIB] - iv_ql)[well[:N_QUANTLIB]]):.2e}"
    )
