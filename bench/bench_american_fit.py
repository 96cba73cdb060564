"""The morning fit of a 180-quote all-American chain against the same chain European.

One invented day (``bench_calibrate``'s): 12 expiries x 15 strikes of a fictional commodity,
volatilities from a known parameter set plus seeded noise, rate 3 %. The European chain has
Black-76 premiums at those volatilities, the American chain American premiums at the same
volatilities (:mod:`calib.model.american`). Each is fitted by one
:class:`~calib.calibrate.Calibrator` (problem built once), constant and forward modes, price
and vol error measures; the figure is the median wall time of a fit over several perturbed
days, and the ratio American / European (target <= 3). The American fit's time is split into
preparing the quotes (American implied vols and vegas) and the rest.
"""

from __future__ import annotations

import time
from dataclasses import replace

import numpy as np

from bench.bench_calibrate import HIST
from bench.bench_calibrate import _day as european_day
from calib.calibrate import CalibrationSettings, Calibrator, OptionQuotes, bucket_edges
from calib.calibrate.quotes import prepare
from calib.model import american, black76

N_DAYS = 5


def _day(rng: np.random.Generator, style: str) -> OptionQuotes:
    """``bench_calibrate``'s day (12 expiries x 15 strikes, rate 3 %); American: premiums by
    the American pricer at the day's Black-76 implied vols."""
    q = european_day(rng)
    if style == "european":
        return q
    r = q.rate
    assert q.premium is not None
    vol = black76.implied_vol(q.premium, q.forward, q.strike, q.t_expiry, r, q.is_call)
    premium = american.price(q.forward, q.strike, q.t_expiry, r, vol, q.is_call)
    return replace(q, premium=premium, american=np.ones(len(q), dtype=bool))


def _median_fit(cal: Calibrator, days: list[OptionQuotes]) -> float:
    cal.fit(days[0], HIST)  # compile and warm up
    times = []
    for q in days:
        t0 = time.perf_counter()
        cal.fit(q, HIST)
        times.append(time.perf_counter() - t0)
    return float(np.median(times))


def main() -> None:
    base = CalibrationSettings(refit_costs=False)
    print(
        f"   {'mode':<9}{'measure':<8}{'European':>11}{'American':>11}{'prepare':>10}{'ratio':>8}"
    )
    for mode in ("constant", "forward"):
        for measure in ("price", "vol"):
            s = replace(base, mode=mode, error_measure=measure)
            out = {}
            for style in ("european", "american"):
                rng = np.random.default_rng(7)
                days = [_day(rng, style) for _ in range(N_DAYS)]
                n_buckets = bucket_edges(prepare(days[0], s).t_expiry).size - 1
                out[style] = _median_fit(Calibrator(s, n_buckets), days)
                if style == "american":
                    t0 = time.perf_counter()
                    for q in days:
                        prepare(q, s)
                    prep = (time.perf_counter() - t0) / len(days)
            ratio = out["american"] / out["european"]
            print(
                f"   {mode:<9}{measure:<8}{out['european'] * 1e3:9.1f}ms"
                f"{out['american'] * 1e3:9.1f}ms{prep * 1e3:8.1f}ms{ratio:7.2f}x"
            )
    print(f"   ({len(days[0])} quotes; median of {N_DAYS} days; target: ratio <= 3)")


if __name__ == "__main__":
    main()
