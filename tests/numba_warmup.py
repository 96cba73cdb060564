"""Compile calib's numba kernels into their on-disk cache before a parallel test run.

The kernels are compiled with ``cache=True``: the first process that calls one compiles it and
writes the machine code beside the module, every later process loads it. On a fresh checkout
each test process (and each command or worker process a test starts) that reaches a kernel
before it is cached compiles it again: about 50 s of CPU for the whole set. ``tests/conftest.py``
runs this module's groups in two processes at once before the test processes start, so the
set is compiled once.

The kernels are reached through the public functions, with the argument kinds the code passes
(read-only arrays where the callers' arrays are read-only), so the cached signatures are the
ones the tests use; a signature this misses is compiled by the test that needs it, as before.

``python -m tests.numba_warmup GROUP``: GROUP is one of :data:`GROUPS`.
"""

from __future__ import annotations

import sys
import warnings
from collections.abc import Callable

import numpy as np


def _read_only(*arrays: np.ndarray) -> list[np.ndarray]:
    out = []
    for a in arrays:
        a = np.array(a, dtype=a.dtype)
        a.flags.writeable = False
        out.append(a)
    return out


def estimate() -> None:
    """The Kalman filter, smoother, likelihood and its derivatives (one short fit)."""
    from calib.errors import EstimationWarning
    from calib.estimate import default_starts, filter_states, fit, log_likelihood
    from tests.estimate.conftest import NOISE_SD, RATE, TRUTH, business_days, simulate_panel

    panel = simulate_panel(business_days(60), seed=1)
    log_likelihood(TRUTH, NOISE_SD, panel, RATE)
    filter_states(TRUTH, NOISE_SD, panel, RATE)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", EstimationWarning)
        fit(
            panel,
            RATE,
            starts=default_starts(panel, RATE)[:1],
            min_days=10,
            global_iterations=1,
            max_iterations=1,
        )


def options() -> None:
    """Black-76 and American implied volatilities and American premiums and deltas."""
    from calib.model import american, black76

    F = np.array([50.0, 60.0, 40.0])
    K = np.array([55.0, 50.0, 45.0])
    T = np.array([0.5, 1.0, 0.25])
    r = np.array([0.03, 0.05, 0.0])
    vol = np.array([0.3, 0.4, 0.25])
    call = np.array([True, False, True])
    premium = black76.price(F, K, T, r, vol, call)
    F_ro, K_ro, T_ro, p_ro, call_ro = _read_only(F, K, T, premium, call)
    black76.implied_vol(premium, F, K, T, r, call)
    black76.implied_vol(p_ro, F_ro, K_ro, T_ro, r, call_ro)
    black76.implied_vol(p_ro, F, K_ro, T, r, call_ro)
    american.price(F, K, T, r, vol, call)
    american.price(F, K_ro, T, r, vol, call_ro)
    american.price(F, K, T, r, vol[0], call)
    american.price(F, K, T, r, *_read_only(vol), call)
    american.greeks(F, K, T, r, vol, call)
    american.implied_vol(american.price(F, K, T, r, vol, call), F, K, T, r, call)


def hedge() -> None:
    """The calendar-spread valuation kernel, serial (few paths) and parallel (many)."""
    from calib.hedge.instruments import CalendarSpread
    from calib.hedge.valuation import SERIAL_BELOW, value_and_ratios

    option = CalendarSpread(t_near=0.5, t_far=0.75, t_expiry=0.4, strike=1.0, is_call=True)
    for paths in (1, SERIAL_BELOW):
        futures = np.full((paths, 2), [50.0, 51.0])
        value_and_ratios(option, 0.02, 0.025, 0.018, futures, 0.99)


GROUPS: dict[str, Callable[[], None]] = {"estimate": estimate, "options": options, "hedge": hedge}


def main(names: list[str]) -> None:
    for name in names:
        GROUPS[name]()


if __name__ == "__main__":
    main(sys.argv[1:])
