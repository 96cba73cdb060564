"""Simulated futures curves of known parameters: for checking an estimate and for timing it.

The market is invented: one delivery every two months on the 20th, each quoted from 1.5 years
before its delivery, trading Monday to Friday. The states are simulated exactly
(:func:`calib.model.simulate.simulate_states`, a path independent of the Kalman filter), the
prices are the two-factor futures closed form on them, and each contract slot of
:func:`calib.estimate.curves.curves_from_quotes` gets its own Gaussian noise in log price.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from calib.estimate.curves import DAYS_PER_YEAR, Curves, curves_from_quotes
from calib.model.simulate import futures_curves, simulate_states
from calib.model.twofactor import TwoFactorParams
from calib.types import FloatArray

QUOTED_YEARS = 1.5
"""A contract is quoted from this many years before its delivery."""

FIRST_SPOT = 60.0
"""Spot price on the first day (the convenience yield starts at ``alpha``)."""


def business_days(n_days: int, start: np.datetime64) -> np.ndarray[Any, Any]:
    """The first ``n_days`` weekdays from ``start`` on, as ``datetime64[D]``."""
    calendar = np.arange(start, start + 2 * n_days + 10, dtype="datetime64[D]")
    return calendar[np.is_busday(calendar)][:n_days]


def simulated_curves(
    days: np.ndarray[Any, Any],
    seed: int,
    *,
    params: TwoFactorParams,
    noise_sd: FloatArray,
    rate: float,
    missing: float = 0.0,
) -> Curves:
    """Curves on ``days`` (``datetime64[D]``) of a market whose true parameters are ``params``.

    Parameters
    ----------
    days : increasing trade dates.
    seed : seeds the states, then the noise, then the missing prices.
    params, rate : the two-factor parameters (real-world drifts for the states) and the rate.
    noise_sd : ``(n_contracts,)`` standard deviation of each slot's log-price noise.
    missing : probability that a price is missing (never on the first day, which starts the
        filter).
    """
    rng = np.random.default_rng(seed)
    years = (days - days[0]).astype(np.float64) / DAYS_PER_YEAR
    paths = simulate_states(params, years, np.log(FIRST_SPOT), params.alpha, 1, rng=rng)
    first = days[0].astype("datetime64[M]")
    months = np.arange(first, days[-1].astype("datetime64[M]") + 24, 2)
    deliveries = months.astype("datetime64[D]") + 19
    tau = (deliveries[None, :] - days[:, None]).astype(np.float64) / DAYS_PER_YEAR
    price = futures_curves(paths, np.maximum(tau, 0.0), params, rate)[0]
    keep = (tau > 0.0) & (tau < QUOTED_YEARS)
    td = np.broadcast_to(days[:, None], tau.shape)[keep]
    dl = np.broadcast_to(deliveries[None, :], tau.shape)[keep]
    clean = curves_from_quotes(td, dl, price[keep], n_contracts=noise_sd.size)
    y = clean.log_price + noise_sd * rng.standard_normal(clean.log_price.shape)
    if missing:
        drop = rng.random(y.shape) < missing
        drop[0] = False
        y[drop] = np.nan
    return Curves(clean.dates, clean.tau, y, delivery=clean.delivery)
