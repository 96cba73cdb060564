"""The fit error of model total variances, its derivative, and the fit term (its loss)."""

from __future__ import annotations

import numpy as np

from calib.calibrate.penalties import loss_value
from calib.calibrate.quotes import FitData
from calib.model import black76
from calib.types import FloatArray

_INV_SQRT_2PI = 0.3989422804014327
_TINY_VARIANCE = 1e-300  # keeps the derivative finite at V = 0 (a degenerate, zero-vol model)


def errors(data: FitData, V: FloatArray, measure: str) -> tuple[FloatArray, FloatArray]:
    """Model-minus-market errors ``e`` and their derivatives ``de/dV`` at total variances ``V``.

    ``V`` has the quotes on its last axis (leading axes broadcast, e.g. a scan).

    Notes
    -----
    Price: ``e = (D B(F, K, sqrt V) - premium) / F_bar`` with ``F_bar`` the mean forward and
    ``de/dV = D F n(d1) / (2 sqrt V F_bar)`` (since ``dB/d sqrt(V) = F n(d1)``).
    Vol: ``e = sqrt(V / T) - vol`` and ``de/dV = 1 / (2 sqrt(V T))``.
    """
    V = np.maximum(V, _TINY_VARIANCE)
    std = np.sqrt(V)
    if measure == "vol":
        root_t = np.sqrt(data.expiry)
        return std / root_t - data.vol, 0.5 / (std * root_t)
    F, K, D = data.forward, data.strike, data.discount
    model = D * black76.undiscounted_price(F, K, std, data.is_call)
    d1 = np.log(F / K) / std + 0.5 * std
    slope = D * F * _INV_SQRT_2PI * np.exp(-0.5 * d1 * d1) / (2.0 * std)
    return (model - data.price) / data.scale, slope / data.scale


def fit_term(data: FitData, V: FloatArray, measure: str) -> FloatArray:
    """``sum_i w_i L(e_i)`` (weights sum to one): the weighted mean square error, or Huber."""
    e, _ = errors(data, V, measure)
    return loss_value(e, data.weight, data.threshold)
