"""Value and hedge ratios of one option along many futures paths at one date.

The pricing set's law over the remaining life is the same on every path (it depends on the
dates only), so one date's work is a function of the paths' futures prices alone: Black-76 for a
vanilla, and for a calendar spread the exact Gauss-Hermite price of :mod:`calib.model.spread`
written as one fused numba loop over paths and nodes.

Notes
-----
Spread (module Notes of :mod:`calib.model.spread`): condition on the outer leg ``o`` (near for
``K >= 0``, far otherwise); with ``s_o = sqrt(v_o)``, ``beta = c / s_o``,
``sc = sqrt(v_i - beta^2)``, the per-node factors ``a_j = exp(s_o z_j - s_o^2/2)`` and
``b_j = exp(beta z_j - beta^2/2)`` are common to every path, so a path needs one logarithm and
two normal distribution values per node:
``k = F_o a_j + |K|``, ``Fc = F_i b_j``, ``d1 = ln(Fc / k) / sc + sc / 2``,
``V = D sg sum_j w_j (Fc N(sg d1) - k N(sg (d1 - sc)))``,
``dV/dF_i = D sg sum_j w_j b_j N(sg d1)``, ``dV/dF_o = -D sg sum_j w_j a_j N(sg (d1 - sc))``.
Nodes whose weight times ``exp(max(s_o, |beta|) |z_j|)`` is below ``PRUNE`` are dropped: each
bounds its node's share of the price and of ``F dV/dF`` relative to the futures price, so the
result moves by less than about ``1e-16`` of the futures price (64 nodes keep about 42).

**Adaptive node count.** A smooth integrand (most calendar spreads) is exact to rounding with
far fewer nodes than a sharp one needs. In adaptive mode every path is priced by two small
rules (``PAIR``); where they agree within ``NODE_TOL`` the larger one stands (the difference of
two rules estimates the smaller one's error, and Gauss-Hermite errors fall geometrically for an
entire integrand), and the paths where they disagree are priced again with the full count.
"""

from __future__ import annotations

import math
import types
from collections.abc import Callable
from dataclasses import dataclass

import numba
import numpy as np
from scipy.special import ndtr

from calib.hedge.instruments import CalendarSpread, HedgedOption
from calib.model.black76 import undiscounted_price
from calib.model.spread import DEFAULT_NODES, hermite_nodes
from calib.types import FloatArray, IntArray

PRUNE = 1e-18
"""Quadrature nodes contributing less than this (relative to the futures price) are dropped."""

PAIR: tuple[int, int] = (12, 16)
"""Adaptive mode: the two small rules whose agreement on a path accepts the larger one."""

NODE_TOL = 1e-11
"""Adaptive mode: largest disagreement of the two small rules on a path (value relative to the
path's futures level; hedge ratios, futures per option, absolute) for the larger to stand."""

_SQRT_HALF = math.sqrt(0.5)


def _spread_body(
    f_outer: FloatArray,
    f_inner: FloatArray,
    a: FloatArray,
    b: FloatArray,
    w: FloatArray,
    abs_strike: float,
    sc: float,
    sg: float,
    disc: float,
    value: FloatArray,
    d_outer: FloatArray,
    d_inner: FloatArray,
) -> None:  # pragma: no cover - compiled; checked against calib.model.spread in the tests
    for p in numba.prange(f_outer.shape[0]):
        fo = f_outer[p]
        fi = f_inner[p]
        s_price = 0.0
        s_inner = 0.0
        s_outer = 0.0
        for j in range(a.shape[0]):
            k = fo * a[j] + abs_strike
            fc = fi * b[j]
            if sc > 0.0:
                d1 = math.log(fc / k) / sc + 0.5 * sc
                n1 = 0.5 * math.erfc(-sg * d1 * _SQRT_HALF)
                n2 = 0.5 * math.erfc(-sg * (d1 - sc) * _SQRT_HALF)
            else:  # the inner leg is a point given the outer one
                n1 = 1.0 if sg * (fc - k) > 0.0 else 0.0
                n2 = n1
            s_price += w[j] * (fc * n1 - k * n2)
            s_inner += w[j] * b[j] * n1
            s_outer += w[j] * a[j] * n2
        value[p] = disc * sg * s_price
        d_inner[p] = disc * sg * s_inner
        d_outer[p] = -disc * sg * s_outer


def _named(fn: Callable[..., None], name: str) -> Callable[..., None]:
    """``fn`` as another function object named ``name``: numba's on-disk cache keys a compiled
    function by its qualified name and argument types, not by ``parallel``, so two kernels
    compiled from one function object would load each other's machine code."""
    copy = types.FunctionType(
        fn.__code__.replace(co_name=name, co_qualname=name), fn.__globals__, name
    )
    copy.__qualname__ = name
    return copy


_spread_kernel = numba.njit(cache=True, parallel=True)(_spread_body)
"""The kernel over many paths, spread over the cores."""

_spread_kernel_serial = numba.njit(cache=True)(_named(_spread_body, "_spread_body_serial"))
"""The same loop in the calling thread, for a few paths (a replay values one history): the
parallel kernel's start-up per call would cost more than the work."""

SERIAL_BELOW = 256
"""Paths below which the serial kernel runs."""


@dataclass(frozen=True, slots=True)
class _SpreadStep:
    """One date's spread integrand: conditioning on the outer leg (module Notes)."""

    s_o: float
    beta: float
    sc: float
    sg: float
    abs_strike: float
    discount: float
    f_outer: FloatArray
    f_inner: FloatArray

    def run(self, nodes: int, rows: IntArray | None = None) -> tuple[FloatArray, ...]:
        """``(value, dV/dF_outer, dV/dF_inner)`` with ``nodes`` nodes, on ``rows`` or all."""
        z, w = hermite_nodes(nodes)
        keep = w * np.exp(max(self.s_o, abs(self.beta)) * np.abs(z)) > PRUNE
        z, w = z[keep], w[keep]
        a = np.exp(self.s_o * z - 0.5 * self.s_o * self.s_o)
        b = np.exp(self.beta * z - 0.5 * self.beta * self.beta)
        fo = self.f_outer if rows is None else self.f_outer[rows]
        fi = self.f_inner if rows is None else self.f_inner[rows]
        out = (np.empty(fo.size), np.empty(fo.size), np.empty(fo.size))
        kernel = _spread_kernel_serial if fo.size < SERIAL_BELOW else _spread_kernel
        kernel(fo, fi, a, b, w, self.abs_strike, self.sc, self.sg, self.discount, *out)
        return out


def _embedded(step: _SpreadStep, nodes: int) -> tuple[FloatArray, ...]:
    """Each path from the larger of ``PAIR``'s two rules where the two agree within
    ``NODE_TOL`` (value relative to the path's futures level, ratios absolute), and from
    ``nodes`` nodes on the paths where they do not."""
    small, large = (min(n, nodes) for n in PAIR)
    coarse = step.run(small)
    fine = step.run(large)
    level = np.maximum(step.f_outer, step.f_inner)
    gap = np.maximum(
        np.abs(fine[0] - coarse[0]) / level,
        np.maximum(np.abs(fine[1] - coarse[1]), np.abs(fine[2] - coarse[2])),
    )
    redo = np.flatnonzero(~(gap <= NODE_TOL))
    if large < nodes and redo.size:
        full = step.run(nodes, redo)
        for mine, exact in zip(fine, full, strict=True):
            mine[redo] = exact
    return fine


def _spread(
    option: CalendarSpread,
    var_near: float,
    var_far: float,
    cov: float,
    futures: FloatArray,
    discount: float,
    nodes: int,
    adaptive: bool,
) -> tuple[FloatArray, FloatArray]:
    near_out = option.strike >= 0.0
    v_o, v_i = (var_near, var_far) if near_out else (var_far, var_near)
    s_o = math.sqrt(v_o)
    beta = cov / s_o if s_o > 0.0 else 0.0
    o, i = (0, 1) if near_out else (1, 0)
    step = _SpreadStep(
        s_o=s_o,
        beta=beta,
        sc=math.sqrt(max(v_i - beta * beta, 0.0)),
        sg=1.0 if option.is_call == near_out else -1.0,
        abs_strike=abs(option.strike),
        discount=discount,
        f_outer=np.ascontiguousarray(futures[:, o]),
        f_inner=np.ascontiguousarray(futures[:, i]),
    )
    value, d_outer, d_inner = _embedded(step, nodes) if adaptive else step.run(nodes)
    ratios = np.empty((value.size, 2))
    ratios[:, o] = d_outer
    ratios[:, i] = d_inner
    return value, ratios


def value_and_ratios(
    option: HedgedOption,
    var_near: float,
    var_far: float,
    cov: float,
    futures: FloatArray,
    discount: float,
    *,
    nodes: int = DEFAULT_NODES,
    adaptive: bool = False,
) -> tuple[FloatArray, FloatArray]:
    """The option's value and hedge ratios ``dV/dF_i`` on every path at one date.

    Parameters
    ----------
    option : the option.
    var_near, var_far, cov : the pricing set's law of the legs' log prices over the remaining
        life (a vanilla uses ``var_near``).
    futures : ``(n_paths, n_legs)`` the legs' prices at the date.
    discount : discount factor from expiry to the date.
    nodes : Gauss-Hermite nodes of the spread price (before pruning).
    adaptive : use the fewest of ``FEWER_NODES`` that agree with ``nodes`` on probe paths
        within ``NODE_TOL`` (module Notes); ``False`` uses ``nodes`` everywhere.

    Returns
    -------
    ``(value, ratios)`` of shapes ``(n_paths,)`` and ``(n_paths, n_legs)``; the ratios are
    futures to hold per option (discount included).
    """
    if isinstance(option, CalendarSpread):
        return _spread(option, var_near, var_far, cov, futures, discount, nodes, adaptive)
    F = futures[:, 0]
    std = math.sqrt(max(var_near, 0.0))
    value = discount * undiscounted_price(F, option.strike, std, option.is_call)
    if std > 0.0:
        d1 = np.log(F / option.strike) / std + 0.5 * std
        n1 = ndtr(d1)
    else:
        n1 = (option.strike < F).astype(np.float64)
    delta = discount * (n1 if option.is_call else n1 - 1.0)
    return np.asarray(value), np.asarray(delta)[:, None]
