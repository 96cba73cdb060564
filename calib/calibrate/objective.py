"""The fit error of model total variances, its derivative, and the fit term (its loss)."""

from __future__ import annotations

import numpy as np

from calib.calibrate.penalties import loss_value
from calib.calibrate.quotes import TINY_VARIANCE, FitData, equivalent_vol
from calib.model import black76
from calib.types import FloatArray

_INV_SQRT_2PI = 0.3989422804014327


def errors(
    data: FitData, V: FloatArray, measure: str, *, slope: bool = True
) -> tuple[FloatArray, FloatArray]:
    """Model-minus-market errors ``e`` and their derivatives ``de/dV`` at total variances ``V``.

    ``V`` has the quotes on its last axis (leading axes broadcast, e.g. a scan).

    Notes
    -----
    Price: ``e = (D B(F, K, sqrt V) - premium) / F_bar`` with ``F_bar`` the mean forward and
    ``de/dV = D F n(d1) / (2 sqrt V F_bar)`` (since ``dB/d sqrt(V) = F n(d1)``).
    Vol: ``e = sqrt(V / T) - vol`` and ``de/dV = 1 / (2 sqrt(V T))``.

    American quotes (``data.american``): in price the model premium is the American one at the
    constant volatility ``sqrt(V / T)`` and ``de/dV = vega / (2 sqrt(V T) F_bar)`` with the
    American vega a central difference in volatility (:func:`calib.model.american.greeks`;
    ``slope=False`` skips it where only ``e`` is wanted: the slope returned is then NaN for
    them). In vol the market vol is already the American implied vol, so the form is the
    European one.
    """
    V = np.maximum(V, TINY_VARIANCE)
    std = np.sqrt(V)
    if measure == "vol":
        root_t = np.sqrt(data.t_expiry)
        return std / root_t - data.vol, 0.5 / (std * root_t)
    F, K, D = data.forward, data.strike, data.discount
    model = D * black76.undiscounted_price(F, K, std, data.is_call)
    d1 = np.log(F / K) / std + 0.5 * std
    de = D * F * _INV_SQRT_2PI * np.exp(-0.5 * d1 * d1) / (2.0 * std)
    am, prices = data.american, data.american_prices
    if am is not None and prices is not None:
        model, de = np.array(model, dtype=np.float64), np.array(de, dtype=np.float64)
        T = data.t_expiry[am]
        vol = equivalent_vol(V[..., am], T)
        if slope:
            model[..., am], vega = prices.price_vega(vol)
            de[..., am] = vega / (2.0 * vol * T)
        else:
            model[..., am] = prices.price(vol)
            de[..., am] = np.nan
    return (model - data.price) / data.scale, de / data.scale


def fit_term(data: FitData, V: FloatArray, measure: str) -> FloatArray:
    """``sum_i w_i L(e_i)`` (weights sum to one): the weighted mean square error, or Huber."""
    e, _ = errors(data, V, measure, slope=False)
    return loss_value(e, data.weight, data.threshold)
