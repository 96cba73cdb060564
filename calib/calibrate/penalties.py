"""The anchor penalty and the loss of the fit term, each written once for numpy and cvxpy.

The same function builds the cvxpy expression of the convex sub-problem and evaluates the true
objective in numpy (it is handed ``sqrt``/``sum`` of the one or the other), so the two cannot
drift apart.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from calib.types import FloatArray


@dataclass(frozen=True, slots=True)
class Anchor:
    """``weight mean_k (s2_k - s2_hist)^2`` over ``K`` buckets, in ``Q_k = s2_k^2``.

    ``= lin sum(Q) - root sum(sqrt(Q)) + const`` with ``lin = weight / K``,
    ``root = 2 weight s2_hist / K`` and ``const = weight s2_hist^2``: convex in ``Q`` (as
    ``-sqrt`` is) with non-negative coefficients, so the conic sub-problem takes it with
    ``lin`` and ``root`` as parameters (the constant is dropped there).

    ``weight`` is the effective weight (``anchor_weight`` times the error measure's scale,
    see :func:`calib.calibrate.quotes.anchor_scale`).
    """

    weight: float
    s2_hist: float
    n_buckets: int

    @property
    def lin(self) -> float:
        return self.weight / self.n_buckets

    @property
    def root(self) -> float:
        return 2.0 * self.weight * self.s2_hist / self.n_buckets

    @property
    def const(self) -> float:
        return self.weight * self.s2_hist * self.s2_hist

    @staticmethod
    def form(
        Q: Any, lin: Any, root: Any, sqrt: Callable[..., Any], total: Callable[..., Any]
    ) -> Any:
        """``lin sum(Q) - root sum(sqrt(Q))`` in the array library of ``sqrt`` and ``total``."""
        return lin * total(Q) - root * total(sqrt(Q))

    def value(self, Q: FloatArray) -> float:
        """The penalty at variances ``Q`` (last axis: the buckets)."""
        Q = np.maximum(Q, 0.0)
        terms = self.form(Q, self.lin, self.root, np.sqrt, lambda z: np.sum(z, axis=-1))
        # the expansion cancels to round-off near s2 = s2_hist; never below zero
        return np.maximum(terms + self.const, 0.0)  # type: ignore[no-any-return]


def huber(r: Any) -> Any:
    """Huber's function with threshold 1, ``r^2`` for ``|r| <= 1`` and ``2|r| - 1`` beyond."""
    a = np.abs(r)
    return np.where(a <= 1.0, a * a, 2.0 * a - 1.0)


def loss_value(e: FloatArray, weight: FloatArray, threshold: FloatArray | None) -> FloatArray:
    """``sum_i w_i L(e_i)`` over the last axis: squares, or Huber with per-quote thresholds.

    Huber with threshold ``d``: ``d^2 huber(e / d)`` (equal to ``e^2`` for ``|e| <= d``).
    """
    if threshold is None:
        return np.asarray(np.sum(weight * e * e, axis=-1))
    return np.asarray(np.sum(weight * threshold**2 * huber(e / threshold), axis=-1))


def loss_weights(e: FloatArray, threshold: FloatArray | None) -> FloatArray:
    """IRLS factors ``min(1, d / |e|)``: ``w L(e)`` is majorised by ``w c e^2`` plus a constant.

    ``2 c e`` equals the Huber derivative, so a fixed point of weighted least squares with
    these factors is a stationary point of the Huber loss (the held scan's 1-D steps).
    """
    if threshold is None:
        return np.ones_like(e)
    a = np.abs(e)
    with np.errstate(divide="ignore"):
        return np.asarray(np.where(a <= threshold, 1.0, threshold / np.maximum(a, 1e-300)))
