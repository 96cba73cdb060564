"""Statistics of a P&L sample with their standard errors.

The mean's standard error is ``sd / sqrt(n)``; those of the standard deviation, the quantiles
and the expected shortfall come from a seeded bootstrap (resampling the paths with
replacement), which needs no density estimate.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from calib.errors import ParameterError
from calib.types import FloatArray

QUANTILES: tuple[str, ...] = ("1", "5", "50", "95", "99")
"""Quantile levels reported, in percent (the stable keys of ``quantiles_pct``)."""

ES_LEVEL = 0.05
"""Expected shortfall: the mean of the worst 5 % of outcomes (the 95 % expected shortfall)."""

BOOTSTRAP = 200
"""Bootstrap resamples of the standard errors."""


@dataclass(frozen=True, slots=True)
class Estimate:
    """A statistic and its standard error."""

    value: float
    se: float


@dataclass(frozen=True, slots=True)
class PnlStats:
    """Mean, standard deviation, quantiles and 95 % expected shortfall of a sample.

    ``es95`` is the mean of the worst ``ceil(5 % n)`` outcomes (a P&L, so a loss is negative).
    """

    n: int
    mean: Estimate
    sd: Estimate
    quantiles: dict[str, Estimate]
    es95: Estimate


def _sd_quantiles_es(sorted_sample: FloatArray) -> FloatArray:
    """``(..., 2 + len(QUANTILES))``: sd, quantiles, es95 of samples sorted on the last axis."""
    n = sorted_sample.shape[-1]
    tail = max(1, math.ceil(ES_LEVEL * n))
    levels = [float(q) / 100.0 for q in QUANTILES]
    q = np.quantile(sorted_sample, levels, axis=-1)
    return np.concatenate(
        [
            sorted_sample.std(axis=-1, ddof=1)[..., None],
            np.moveaxis(np.atleast_1d(q), 0, -1),
            sorted_sample[..., :tail].mean(axis=-1)[..., None],
        ],
        axis=-1,
    )


def pnl_stats(sample: FloatArray, *, seed: int, resamples: int = BOOTSTRAP) -> PnlStats:
    """Statistics of ``sample`` (>= 2 finite values) with standard errors (module docstring)."""
    x = np.asarray(sample, dtype=np.float64)
    if x.ndim != 1 or x.size < 2 or not np.all(np.isfinite(x)):
        raise ParameterError("sample", x.shape, "need at least two finite values")
    n = x.size
    point = _sd_quantiles_es(np.sort(x))
    rng = np.random.default_rng(seed)
    spread = np.empty((resamples, point.size))
    for i in range(resamples):  # one resample at a time keeps memory at one sample
        spread[i] = _sd_quantiles_es(np.sort(x[rng.integers(0, n, n)]))
    se = spread.std(axis=0, ddof=1)
    sd = float(point[0])
    return PnlStats(
        n=n,
        mean=Estimate(float(x.mean()), sd / math.sqrt(n)),
        sd=Estimate(sd, float(se[0])),
        quantiles={
            q: Estimate(float(point[1 + i]), float(se[1 + i])) for i, q in enumerate(QUANTILES)
        },
        es95=Estimate(float(point[-1]), float(se[-1])),
    )
