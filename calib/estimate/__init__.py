"""Historical estimation: Kalman-filter maximum likelihood of the two-factor model.

Pure numerics (numpy, scipy, numba): curves in, a frozen :class:`Estimate` out.

* :class:`Curves`, :func:`curves_from_quotes`: the (n_days, n_contracts) panel of log futures
  prices and times to maturity, from arrays or from a long table of settlements.
* :func:`log_likelihood`, :func:`filter_states`: the exact Gaussian likelihood and the
  filtered / smoothed states at given parameters.
* :func:`fit`: the maximum-likelihood estimate with standard errors and a convergence flag.
* :mod:`calib.estimate.synthetic`: simulated curves of known parameters (checks, benchmarks).
"""

from calib.estimate.curves import Curves, curves_from_quotes
from calib.estimate.mle import (
    Estimate,
    States,
    default_starts,
    filter_states,
    fit,
    log_likelihood,
    noise_names,
)

__all__ = [
    "Curves",
    "Estimate",
    "States",
    "curves_from_quotes",
    "default_starts",
    "filter_states",
    "fit",
    "log_likelihood",
    "noise_names",
]
