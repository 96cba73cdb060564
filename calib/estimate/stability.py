"""How stable are rolling estimates: drift against a reference, the decay bound, and the
longest interval between re-estimations over which nothing moved (numpy only, no I/O).

Notes
-----
An estimate is a statistic: ``theta_hat ~ N(theta, Sigma)`` asymptotically, ``Sigma`` the
inverse observed information (:mod:`calib.estimate.mle`). Two estimates ``a`` and ``b`` of one
parameter differ *significantly* when

    ``|theta_a - theta_b| > k sqrt(se_a^2 + se_b^2)``

(the standard error of a difference of independent estimates). Windows that share days are
positively correlated, so the true standard error of their difference is smaller and this
test is conservative for them (it flags less than a test with the exact covariance would).

The *decay bound* ``sigma_yield <= rho kappa sigma_spot`` (futures volatility falling with
maturity, see DESIGN section 3) fails for a window when ``rho kappa sigma_spot - sigma_yield
< 0``: the morning fit, which imposes it, would then be held far from that window's history.

The *longest quiet interval* is the largest ``L`` such that no window differs significantly
from any of the ``L`` windows after it: re-estimating at least every ``L`` steps would never
have left a set in use that a newer window contradicts.
"""

from __future__ import annotations

import numpy as np

from calib.types import ArrayLike, FloatArray


def drift_z(values: ArrayLike, se: ArrayLike, ref: ArrayLike, ref_se: ArrayLike) -> FloatArray:
    """``(values - ref) / sqrt(se^2 + ref_se^2)``, NaN where a standard error is unknown.

    Parameters
    ----------
    values, se : (n, p) estimates and standard errors by window and parameter.
    ref, ref_se : (p,) the reference estimate (the one in use) and its standard errors.
    """
    v = np.asarray(values, dtype=np.float64)
    s = np.asarray(se, dtype=np.float64)
    r = np.asarray(ref, dtype=np.float64)
    rs = np.asarray(ref_se, dtype=np.float64)
    scale = np.sqrt(s**2 + rs**2)
    with np.errstate(invalid="ignore", divide="ignore"):
        z = (v - r) / scale
    return np.where(np.isfinite(z), z, np.nan)


def decay_slack(
    kappa: ArrayLike, rho: ArrayLike, sigma_spot: ArrayLike, sigma_yield: ArrayLike
) -> FloatArray:
    """``rho kappa sigma_spot - sigma_yield``: the decay bound holds where it is ``>= 0``."""
    k, r, s1, s2 = (np.asarray(x, dtype=np.float64) for x in (kappa, rho, sigma_spot, sigma_yield))
    return np.asarray(r * k * s1 - s2, dtype=np.float64)


def pair_flags(values: ArrayLike, se: ArrayLike, k: float) -> np.ndarray:
    """(n, n) boolean: window ``i`` and window ``j`` differ by more than ``k`` standard errors
    of the difference in at least one parameter (unknown standard errors never flag)."""
    v = np.asarray(values, dtype=np.float64)
    s = np.asarray(se, dtype=np.float64)
    diff = np.abs(v[:, None, :] - v[None, :, :])
    scale = np.sqrt(s[:, None, :] ** 2 + s[None, :, :] ** 2)
    with np.errstate(invalid="ignore"):
        flagged = diff > k * scale
    return np.asarray(np.any(flagged & np.isfinite(scale), axis=2))


def longest_quiet_interval(values: ArrayLike, se: ArrayLike, k: float) -> int:
    """The largest ``L`` (in steps) such that no window differs significantly (``k`` s.e.)
    from any of the next ``L`` windows; ``n - 1`` if no pair differs, 0 if neighbours do."""
    flags = pair_flags(values, se, k)
    n = int(flags.shape[0])
    i, j = np.nonzero(np.triu(flags, 1))
    if i.size == 0:
        return max(n - 1, 0)
    return int(np.min(j - i)) - 1
