"""Value and hedge ratios of one option along many futures paths at every rebalancing date.

The pricing set's law over the remaining life is the same on every path at a date (it depends on
the dates only), so a date's work is a function of the paths' futures prices alone: Black-76 for
a vanilla, and for a calendar spread the exact Gauss-Hermite price of :mod:`calib.model.spread`
written as one fused numba loop over paths, dates and nodes. Everything common to the paths at a
date (the node factors, the conditional deviation, the discount) is tabulated once before the
loop, so the loop reads each path's futures once and writes its values and ratios in place.

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
far fewer nodes than a sharp one needs. In adaptive mode every path at every date is priced by
two small rules (``PAIR``); where they agree within ``NODE_TOL`` the larger one stands (the
difference of two rules estimates the smaller one's error, and Gauss-Hermite errors fall
geometrically for an entire integrand), and where they disagree the path is priced again at
that date with the full count.
"""

from __future__ import annotations

import math
import types
from collections.abc import Callable
from typing import TypedDict, Unpack

import numba
import numpy as np
from scipy.special import ndtr

from calib.hedge.instruments import CalendarSpread, HedgedOption, RemainingLaw, VanillaOption
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

_BLOCK = 128
"""Paths the kernel takes date by date together: a date's node tables are read from cache by
all of them (one path through every date would sweep all the dates' tables each time)."""


@numba.njit(cache=True)
def _rule(
    fo: float,
    fi: float,
    a: FloatArray,
    b: FloatArray,
    w: FloatArray,
    m: IntArray,
    r: int,
    k: int,
    abs_strike: float,
    sc: float,
    sg: float,
    disc: float,
) -> tuple[float, float, float]:  # pragma: no cover - compiled; checked in the tests
    """``(V, dV/dF_o, dV/dF_i)`` of one path at date ``k`` by rule ``r`` of the tables."""
    s_price = 0.0
    s_inner = 0.0
    s_outer = 0.0
    inv_sc = 1.0 / sc if sc > 0.0 else 0.0  # a product in the loop, not a division
    scale = -sg * _SQRT_HALF  # N(sg x) = erfc(scale x) / 2
    for j in range(m[r, k]):
        k_j = fo * a[r, k, j] + abs_strike
        fc = fi * b[r, k, j]
        if sc > 0.0:
            d1 = math.log(fc / k_j) * inv_sc + 0.5 * sc
            n1 = 0.5 * math.erfc(scale * d1)
            n2 = 0.5 * math.erfc(scale * (d1 - sc))
        else:  # the inner leg is a point given the outer one
            n1 = 1.0 if sg * (fc - k_j) > 0.0 else 0.0
            n2 = n1
        s_price += w[r, k, j] * (fc * n1 - k_j * n2)
        s_inner += w[r, k, j] * b[r, k, j] * n1
        s_outer += w[r, k, j] * a[r, k, j] * n2
    return disc * sg * s_price, -disc * sg * s_outer, disc * sg * s_inner


def _spread_body(
    futures: FloatArray,
    outer: int,
    inner: int,
    a: FloatArray,
    b: FloatArray,
    w: FloatArray,
    m: IntArray,
    sc: FloatArray,
    disc: FloatArray,
    abs_strike: float,
    sg: float,
    tol: float,
    value: FloatArray,
    ratios: FloatArray,
) -> None:  # pragma: no cover - compiled; checked against calib.model.spread in the tests
    """Fill ``value[p, k]`` and ``ratios[p, k]`` from ``futures[p, k]`` with the rules of the
    tables ``a, b, w`` (``(rules, dates, nodes)``, the first ``m[r, k]`` nodes in use): rule 0
    alone, or (adaptive) rule 0 where it agrees with rule 1 within ``tol`` and rule 2 (if any)
    where it does not."""
    rules = a.shape[0]
    n_paths = futures.shape[0]
    for block in numba.prange((n_paths + _BLOCK - 1) // _BLOCK):
        for k in range(value.shape[1]):  # one date's tables stay in cache for the block
            sc_k = sc[k]
            disc_k = disc[k]
            for p in range(block * _BLOCK, min((block + 1) * _BLOCK, n_paths)):
                fo = futures[p, k, outer]
                fi = futures[p, k, inner]
                v, d_o, d_i = _rule(fo, fi, a, b, w, m, 0, k, abs_strike, sc_k, sg, disc_k)
                if rules > 1:
                    cv, cd_o, cd_i = _rule(fo, fi, a, b, w, m, 1, k, abs_strike, sc_k, sg, disc_k)
                    agree = (
                        abs(v - cv) / max(fo, fi) <= tol
                        and abs(d_o - cd_o) <= tol
                        and abs(d_i - cd_i) <= tol
                    )
                    if rules > 2 and not agree:  # NaN disagrees too
                        v, d_o, d_i = _rule(fo, fi, a, b, w, m, 2, k, abs_strike, sc_k, sg, disc_k)
                value[p, k] = v
                ratios[p, k, outer] = d_o
                ratios[p, k, inner] = d_i


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
"""(path, date) pairs below which the serial kernel runs."""


def _rules(nodes: int, adaptive: bool) -> tuple[int, ...]:
    """Node counts of the kernel's rules 0, 1, 2 (see ``_spread_body``)."""
    if not adaptive:
        return (nodes,)
    small, large = (min(n, nodes) for n in PAIR)
    return (large,) + ((small,) if small < large else ()) + ((nodes,) if large < nodes else ())


def _node_tables(
    s_o: FloatArray, beta: FloatArray, counts: tuple[int, ...]
) -> tuple[FloatArray, FloatArray, FloatArray, IntArray]:
    """``a, b, w`` of shape ``(rules, dates, nodes)`` and the nodes kept ``m`` (module Notes):
    each date's kept nodes first, in the rule's order."""
    shape = (len(counts), s_o.size, max(counts))
    a, b, w = np.zeros(shape), np.zeros(shape), np.zeros(shape)
    m = np.zeros(shape[:2], dtype=np.int64)
    reach = np.maximum(s_o, np.abs(beta))[:, None]
    for r, n in enumerate(counts):
        z, weights = hermite_nodes(n)
        keep = weights * np.exp(reach * np.abs(z)) > PRUNE
        order = np.argsort(~keep, axis=1, kind="stable")
        zk = z[order]
        m[r] = keep.sum(axis=1)
        a[r, :, :n] = np.exp(s_o[:, None] * zk - (0.5 * s_o * s_o)[:, None])
        b[r, :, :n] = np.exp(beta[:, None] * zk - (0.5 * beta * beta)[:, None])
        w[r, :, :n] = weights[order]
    return a, b, w, m


def _spread(
    option: CalendarSpread,
    law: RemainingLaw,
    futures: FloatArray,
    discount: FloatArray,
    nodes: int,
    adaptive: bool,
) -> tuple[FloatArray, FloatArray]:
    near_out = option.strike >= 0.0
    v_o, v_i = (law.var_near, law.var_far) if near_out else (law.var_far, law.var_near)
    s_o = np.sqrt(v_o)
    beta = np.divide(law.cov, s_o, out=np.zeros_like(s_o), where=s_o > 0.0)
    sc = np.sqrt(np.maximum(v_i - beta * beta, 0.0))
    a, b, w, m = _node_tables(s_o, beta, _rules(nodes, adaptive))
    n_paths, n_dates = futures.shape[:2]
    value = np.empty((n_paths, n_dates))
    ratios = np.empty((n_paths, n_dates, 2))
    serial = n_paths * n_dates < SERIAL_BELOW
    kernel = _spread_kernel_serial if serial else _spread_kernel
    outer, inner = (0, 1) if near_out else (1, 0)
    sg = 1.0 if option.is_call == near_out else -1.0
    kernel(
        futures,
        outer,
        inner,
        a,
        b,
        w,
        m,
        sc,
        discount,
        abs(option.strike),
        sg,
        NODE_TOL,
        value,
        ratios,
    )
    return value, ratios


def _vanilla(
    option: VanillaOption, var: FloatArray, futures: FloatArray, discount: FloatArray
) -> tuple[FloatArray, FloatArray]:
    F = futures[:, :, 0]
    std = np.sqrt(np.maximum(var, 0.0))
    live = std > 0.0
    value = discount * undiscounted_price(F, option.strike, std, option.is_call)
    with np.errstate(divide="ignore", invalid="ignore"):  # dates at expiry: not used
        d1 = np.log(F / option.strike) / std + 0.5 * std
    n1 = np.where(live, ndtr(d1), (option.strike < F).astype(np.float64))
    delta = discount * (n1 if option.is_call else n1 - 1.0)
    return np.asarray(value), np.asarray(delta)[:, :, None]


class Rules(TypedDict, total=False):
    """Keyword options of :func:`values_on_grid` (quadrature of a spread)."""

    nodes: int
    adaptive: bool


def values_on_grid(
    option: HedgedOption,
    law: RemainingLaw,
    futures: FloatArray,
    discount: FloatArray,
    *,
    nodes: int = DEFAULT_NODES,
    adaptive: bool = False,
) -> tuple[FloatArray, FloatArray]:
    """The option's value and hedge ratios ``dV/dF_i`` on every path at every date.

    Parameters
    ----------
    option : the option.
    law : ``(n_dates,)`` the pricing set's law of the legs' log prices over the remaining life
        from each date (a vanilla uses ``var_near``).
    futures : ``(n_paths, n_dates, n_legs)`` the legs' prices at the dates.
    discount : ``(n_dates,)`` discount factors from expiry to each date.
    nodes : Gauss-Hermite nodes of the spread price (before pruning).
    adaptive : price each path at each date with the larger of ``PAIR``'s rules where the two
        agree within ``NODE_TOL`` and with ``nodes`` where they do not (module Notes);
        ``False`` uses ``nodes`` everywhere.

    Returns
    -------
    ``(values, ratios)`` of shapes ``(n_paths, n_dates)`` and ``(n_paths, n_dates, n_legs)``;
    the ratios are futures to hold per option (discount included).
    """
    D = np.asarray(discount, dtype=np.float64)
    if isinstance(option, CalendarSpread):
        return _spread(option, law, futures, D, nodes, adaptive)
    return _vanilla(option, law.var_near, futures, D)


def value_and_ratios(
    option: HedgedOption,
    var_near: float,
    var_far: float,
    cov: float,
    futures: FloatArray,
    discount: float,
    **rules: Unpack[Rules],
) -> tuple[FloatArray, FloatArray]:
    """:func:`values_on_grid` at one date: the law ``var_near, var_far, cov`` and ``discount``
    as numbers, ``futures`` of shape ``(n_paths, n_legs)``. Returns the value ``(n_paths,)``
    and the ratios ``(n_paths, n_legs)``."""
    law = RemainingLaw(*(np.array([x], dtype=np.float64) for x in (var_near, var_far, cov)))
    F = np.asarray(futures, dtype=np.float64)[:, None, :]
    value, ratios = values_on_grid(option, law, F, np.array([discount]), **rules)
    return value[:, 0], ratios[:, 0]
