"""Black-76: European options on futures, vectorised over numpy arrays.

All functions broadcast their arguments; scalars in give 0-d results out (use ``float()``).
``kind`` is ``"call"``/``"put"`` or a boolean array (``True`` = call).

Notes
-----
With discount factor :math:`D = e^{-rT}`, total standard deviation :math:`s = \\sigma\\sqrt{T}`,
:math:`d_{1,2} = \\ln(F/K)/s \\pm s/2`:

.. math::
    C = D\\,[F N(d_1) - K N(d_2)], \\qquad P = D\\,[K N(-d_2) - F N(-d_1)].

Greeks are with respect to the futures price (delta, gamma), the volatility (vega) and calendar
time (theta :math:`= -\\partial V/\\partial T`).
"""

from __future__ import annotations

from typing import Literal

import numpy as np
from scipy.special import ndtr

from calib.errors import ParameterError
from calib.types import ArrayLike, BoolArray, FloatArray

Kind = Literal["call", "put"]

_INV_SQRT_2PI = 0.3989422804014327


def is_call(kind: Kind | ArrayLike) -> BoolArray:
    """Boolean array (``True`` = call) from ``"call"``/``"put"`` or a boolean array."""
    if isinstance(kind, str):
        if kind not in ("call", "put"):
            raise ParameterError("kind", kind, 'must be "call" or "put"')
        return np.asarray(kind == "call")
    arr = np.asarray(kind)
    if arr.dtype != np.bool_:
        if arr.dtype.kind in "US":
            bad = ~np.isin(arr, ["call", "put"])
            if bad.any():
                raise ParameterError("kind", arr[bad].flat[0], 'must be "call" or "put"')
            return np.asarray(arr == "call")
        raise ParameterError("kind", arr.dtype, "must be a boolean array or call/put strings")
    return arr


def _npdf(x: FloatArray) -> FloatArray:
    return np.asarray(_INV_SQRT_2PI * np.exp(-0.5 * x * x))


def _d1_d2(F: FloatArray, K: FloatArray, s: FloatArray) -> tuple[FloatArray, FloatArray]:
    with np.errstate(divide="ignore", invalid="ignore"):
        d1 = np.log(F / K) / s + 0.5 * s
    return d1, d1 - s


def undiscounted_price(F: ArrayLike, K: ArrayLike, std: ArrayLike, call: ArrayLike) -> FloatArray:
    """Undiscounted Black price from the total standard deviation ``std = vol * sqrt(T)``.

    The building block for callers that already hold the total variance (the calibration and
    the spread pricer). ``std = 0`` gives intrinsic value.
    """
    F_ = np.asarray(F, dtype=np.float64)
    K_ = np.asarray(K, dtype=np.float64)
    s = np.asarray(std, dtype=np.float64)
    c = np.asarray(call, dtype=np.bool_)
    d1, d2 = _d1_d2(F_, K_, s)
    sign = np.where(c, 1.0, -1.0)
    value = sign * (F_ * ndtr(sign * d1) - K_ * ndtr(sign * d2))
    intrinsic = np.maximum(sign * (F_ - K_), 0.0)
    return np.asarray(np.where(s > 0.0, value, intrinsic), dtype=np.float64)


def price(
    F: ArrayLike,
    K: ArrayLike,
    T: ArrayLike,
    r: ArrayLike,
    vol: ArrayLike,
    kind: Kind | ArrayLike,
) -> FloatArray:
    """Black-76 premium of a European call or put on a future.

    Parameters
    ----------
    F, K : futures price and strike (> 0).
    T : time to expiry in years (>= 0).
    r : continuously compounded rate to the premium's payment date.
    vol : Black volatility (>= 0).
    kind : "call", "put" or a boolean array (True = call).
    """
    T_ = np.asarray(T, dtype=np.float64)
    std = np.asarray(vol, dtype=np.float64) * np.sqrt(T_)
    disc = np.exp(-np.asarray(r, dtype=np.float64) * T_)
    return np.asarray(disc * undiscounted_price(F, K, std, is_call(kind)), dtype=np.float64)


def greeks(
    F: ArrayLike,
    K: ArrayLike,
    T: ArrayLike,
    r: ArrayLike,
    vol: ArrayLike,
    kind: Kind | ArrayLike,
) -> dict[str, FloatArray]:
    """Price, delta, gamma (both in the futures price), vega (per unit vol) and theta.

    Notes
    -----
    ``delta = D N(d1)`` for a call, ``D (N(d1) - 1)`` for a put; ``gamma = D n(d1) / (F s)``;
    ``vega = D F n(d1) sqrt(T)``; ``theta = -dV/dT = r V - D F n(d1) vol / (2 sqrt(T))``.
    """
    F_ = np.asarray(F, dtype=np.float64)
    K_ = np.asarray(K, dtype=np.float64)
    T_ = np.asarray(T, dtype=np.float64)
    r_ = np.asarray(r, dtype=np.float64)
    v_ = np.asarray(vol, dtype=np.float64)
    c = is_call(kind)
    sqrt_t = np.sqrt(T_)
    s = v_ * sqrt_t
    disc = np.exp(-r_ * T_)
    d1, _ = _d1_d2(F_, K_, s)
    pdf = _npdf(d1)
    value = disc * undiscounted_price(F_, K_, s, c)
    delta = disc * np.where(c, ndtr(d1), ndtr(d1) - 1.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        gamma = disc * pdf / (F_ * s)
        theta = r_ * value - disc * F_ * pdf * v_ / (2.0 * sqrt_t)
    vega = disc * F_ * pdf * sqrt_t
    return {
        "price": np.asarray(value, dtype=np.float64),
        "delta": np.asarray(delta, dtype=np.float64),
        "gamma": np.asarray(gamma, dtype=np.float64),
        "vega": np.asarray(vega, dtype=np.float64),
        "theta": np.asarray(theta, dtype=np.float64),
    }
