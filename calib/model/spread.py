"""Calendar-spread options on two futures of one curve: joint law, prices, hedges.

Conventions
-----------
*Near* is the future maturing first (``T1``, today's price ``F1``), *far* the later one
(``T2 >= T1``, price ``F2``). The spread is **far minus near**, ``S = F2(t) - F1(t)``, observed at
the option's expiry ``t <= T1``. A call pays ``max(S - K, 0)``, a put ``max(K - S, 0)``; the
strike ``K`` may have either sign. An option on the opposite spread ``F1 - F2`` is the other kind
with the strike negated: ``max(F1 - F2 - K, 0) = max(-K - S, 0)``, a put struck at ``-K``.

Everything is vectorised over many options (1-D arrays, broadcast together); prices are
premiums, i.e. discounted by the option's discount factor.

Notes
-----
Under the risk-neutral measure every future is a martingale, and in the two-factor model
(DESIGN §3) ``x_i = ln F_i(t)`` are jointly Gaussian with variances ``v_i`` and covariance ``c``
(closed forms in :mod:`calib.model.twofactor`) and means ``m_i = ln F_i - v_i / 2`` (so that
``E[F_i(t)] = F_i``).

**Exact price.** Condition on one leg, the *outer* one ``o``, written
``x_o = m_o + s_o z`` with ``z ~ N(0, 1)`` and ``s_o = sqrt(v_o)``. The other (*inner*) leg is
then lognormal with forward ``Fc(z) = F_i exp(beta z - beta^2/2)``, ``beta = c / s_o``, and
standard deviation ``sc = sqrt(v_i - beta^2)``, so the inner expectation is a Black-76 price:

* ``K >= 0``: outer = near; ``(F2 - F1 - K)^+ = (F2 - k)^+`` with ``k(z) = F1(z) + K``: a call on
  the far leg struck at ``k`` (a put for the spread put);
* ``K < 0``: outer = far; ``(F2 - F1 - K)^+ = (k - F1)^+`` with ``k(z) = F2(z) + |K|``: a put on
  the near leg struck at ``k`` (a call for the spread put).

This choice keeps the inner strike ``k = F_o(z) + |K|`` positive at every node, so no intrinsic
branch is needed, and keeps ``d ln k / dz`` below ``s_o``, which smooths the integrand. The
outer expectation is Gauss-Hermite quadrature (probabilists' weight) with ``DEFAULT_NODES``
nodes; with ``g`` the conditional Black price, ``N`` the normal distribution function and ``n``
its density, ``sg = +1`` for an inner call and ``-1`` for an inner put:

* ``V = D sum_j w_j g(z_j)``,
* ``dV/dF_i = D sum_j w_j sg N(sg d1_j) Fc_j / F_i``,
* ``dV/dF_o = -D sum_j w_j sg N(sg d2_j) (k_j - |K|) / F_o``,
* ``dV/ds_o = -D sum_j w_j sg N(sg d2_j) (k_j - |K|) (z_j - s_o)``,
* ``dV/dbeta = D sum_j w_j sg N(sg d1_j) Fc_j (z_j - beta)``,
* ``dV/dsc = D sum_j w_j Fc_j n(d1_j)``,

the exact derivatives of the quadrature sum (differentiation under the integral). The chain
rule through ``s_o = sqrt(v_o)``, ``beta = c / s_o``, ``sc^2 = v_i - c^2 / v_o`` gives the
sensitivities to ``(v1, v2, c)``, and the linear coefficients of the two-factor variances
(``V = a P + b Q - 2 c C``) those to ``sigma_spot``, ``sigma_yield`` and ``rho``.

Accuracy: the integrand is entire in ``z`` but turns sharp as the conditional deviation ``sc``
shrinks relative to the drift of the conditional moneyness (correlation near one with unequal
volatilities, or ``|K|`` large against the spread's deviation). With 64 nodes the price agrees
with 2,000 nodes and with adaptive quadrature to 1e-10 relative over calendar spreads of the
two-factor model (tests/model/test_spread.py); degenerate inputs need a larger ``nodes``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from functools import cache
from typing import Any

import numpy as np
from scipy import integrate
from scipy.special import ndtr, roots_hermitenorm

from calib.errors import ParameterError
from calib.model.black76 import Kind, is_call
from calib.model.twofactor import (
    TwoFactorParams,
    check_bucket_edges,
    covariance_coefficients,
    interval_coefficients,
    variance_coefficients,
)
from calib.types import ArrayLike, BoolArray, FloatArray, readonly

DEFAULT_NODES = 64
"""Gauss-Hermite nodes of :func:`price_exact` (1e-10 relative on model calendar spreads)."""

_INV_SQRT_2PI = 0.3989422804014327


def _f(x: ArrayLike) -> FloatArray:
    return np.asarray(x, dtype=np.float64)


# --- inputs -------------------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class SpreadOption:
    """A batch of European options on the calendar spread ``F2(t) - F1(t)`` (far minus near).

    Every field is broadcast to one common 1-D shape and stored read-only.

    Attributes
    ----------
    t_near, t_far : deliveries of the near and far futures, years from today
        (``t_near <= t_far``).
    t_expiry : option expiry, years from today (``0 < t_expiry <= t_near``).
    strike : strike of the spread (any sign).
    is_call : ``True`` for a call; ``"call"``/``"put"`` strings are accepted on input.
    near_price, far_price : today's futures prices ``F1``, ``F2`` (> 0).
    discount : discount factor from the premium's payment date to today (> 0).
    """

    t_near: FloatArray
    t_far: FloatArray
    t_expiry: FloatArray
    strike: FloatArray
    is_call: BoolArray
    near_price: FloatArray
    far_price: FloatArray
    discount: FloatArray

    def __post_init__(self) -> None:
        call = is_call(self.is_call)
        values = np.broadcast_arrays(
            np.atleast_1d(_f(self.t_near)),
            np.atleast_1d(_f(self.t_far)),
            np.atleast_1d(_f(self.t_expiry)),
            np.atleast_1d(_f(self.strike)),
            np.atleast_1d(call),
            np.atleast_1d(_f(self.near_price)),
            np.atleast_1d(_f(self.far_price)),
            np.atleast_1d(_f(self.discount)),
        )
        if values[0].ndim != 1:
            raise ParameterError("option", values[0].shape, "inputs must broadcast to 1-D")
        names = (
            "t_near",
            "t_far",
            "t_expiry",
            "strike",
            "is_call",
            "near_price",
            "far_price",
            "discount",
        )
        for name, value in zip(names, values, strict=True):
            if name != "is_call" and not np.all(np.isfinite(value)):
                raise ParameterError(name, value[~np.isfinite(value)][0], "must be finite")
            object.__setattr__(self, name, readonly(value))
        checks = (
            ("t_expiry", self.t_expiry > 0.0, "must be > 0"),
            (
                "t_near",
                self.t_near >= self.t_expiry,
                "the near future must not mature before expiry",
            ),
            ("t_far", self.t_far >= self.t_near, "the far future must not mature before the near"),
            ("near_price", self.near_price > 0.0, "a futures price must be > 0"),
            ("far_price", self.far_price > 0.0, "a futures price must be > 0"),
            ("discount", self.discount > 0.0, "a discount factor must be > 0"),
        )
        for name, ok, reason in checks:
            if not np.all(ok):
                raise ParameterError(name, getattr(self, name)[~ok][0], reason)

    def __len__(self) -> int:
        return int(self.strike.shape[0])


@dataclass(frozen=True, slots=True)
class ForwardVols:
    """Piecewise-constant (forward) volatilities: bucket ``k`` covers ``[edges[k], edges[k+1])``.

    Attributes
    ----------
    kappa : mean reversion of the convenience yield (> 0), common to every bucket.
    edges : calendar bucket edges in years, starting at 0, strictly increasing.
    sigma_spot, sigma_yield, rho : one value per bucket.
    """

    kappa: float
    edges: FloatArray
    sigma_spot: FloatArray
    sigma_yield: FloatArray
    rho: FloatArray

    def __post_init__(self) -> None:
        if not (math.isfinite(self.kappa) and self.kappa > 0.0):
            raise ParameterError("kappa", self.kappa, "mean reversion must be > 0")
        object.__setattr__(self, "kappa", float(self.kappa))
        edges = check_bucket_edges(self.edges)
        object.__setattr__(self, "edges", readonly(edges))
        n = edges.size - 1
        for name in ("sigma_spot", "sigma_yield", "rho"):
            value = np.atleast_1d(_f(getattr(self, name)))
            if value.shape != (n,) or not np.all(np.isfinite(value)):
                raise ParameterError(name, value.tolist(), f"need {n} finite values (one a bucket)")
            object.__setattr__(self, name, readonly(value))
        if np.any(self.sigma_spot < 0.0) or np.any(self.sigma_yield < 0.0):
            raise ParameterError("sigma", self.sigma_spot.tolist(), "a volatility must be >= 0")
        if np.any(np.abs(self.rho) > 1.0):
            raise ParameterError("rho", self.rho.tolist(), "a correlation must lie in [-1, 1]")

    @classmethod
    def constant(cls, params: TwoFactorParams, edges: ArrayLike) -> ForwardVols:
        """Every bucket at the parameter set's volatilities."""
        n = np.asarray(edges).size - 1
        return cls(
            kappa=params.kappa,
            edges=_f(edges),
            sigma_spot=np.full(n, params.sigma_spot),
            sigma_yield=np.full(n, params.sigma_yield),
            rho=np.full(n, params.rho),
        )


# --- the joint law ----------------------------------------------------------------------------


@dataclass(frozen=True, slots=True)
class SpreadLaw:
    """Joint Gaussian law of ``(ln F1(t), ln F2(t))`` at expiry, one entry per option.

    Attributes
    ----------
    mean_near, mean_far : means ``m_i = ln F_i - v_i / 2`` (martingale correction included).
    var_near, var_far : variances ``v_1, v_2``.
    cov : covariance ``c``.
    """

    mean_near: FloatArray
    mean_far: FloatArray
    var_near: FloatArray
    var_far: FloatArray
    cov: FloatArray

    def __post_init__(self) -> None:
        names = ("mean_near", "mean_far", "var_near", "var_far", "cov")
        values = np.broadcast_arrays(*(np.atleast_1d(_f(getattr(self, n))) for n in names))
        for name, value in zip(names, values, strict=True):
            object.__setattr__(self, name, readonly(value))
        if np.any(self.var_near <= 0.0):
            raise ParameterError("var_near", self.var_near.min(), "must be > 0")
        if np.any(self.var_far < 0.0):
            raise ParameterError("var_far", self.var_far.min(), "must be >= 0")
        if np.any(self.cov**2 > self.var_near * self.var_far * (1.0 + 1e-12)):
            raise ParameterError("cov", self.cov.tolist(), "exceeds the Cauchy-Schwarz bound")

    @property
    def near_price(self) -> FloatArray:
        """``F1 = E[F1(t)] = exp(m_1 + v_1 / 2)``."""
        return np.asarray(np.exp(self.mean_near + 0.5 * self.var_near))

    @property
    def far_price(self) -> FloatArray:
        """``F2 = E[F2(t)] = exp(m_2 + v_2 / 2)``."""
        return np.asarray(np.exp(self.mean_far + 0.5 * self.var_far))

    @property
    def corr(self) -> FloatArray:
        """Correlation of the two log futures."""
        return np.asarray(self.cov / np.sqrt(self.var_near * self.var_far))

    @classmethod
    def black(
        cls,
        near_price: ArrayLike,
        far_price: ArrayLike,
        vol_near: ArrayLike,
        vol_far: ArrayLike,
        rho: ArrayLike,
        expiry: ArrayLike,
    ) -> SpreadLaw:
        """The law of two Black-76 futures with constant volatilities and correlation."""
        t = _f(expiry)
        v1 = _f(vol_near) ** 2 * t
        v2 = _f(vol_far) ** 2 * t
        return cls(
            mean_near=np.log(_f(near_price)) - 0.5 * v1,
            mean_far=np.log(_f(far_price)) - 0.5 * v2,
            var_near=v1,
            var_far=v2,
            cov=_f(rho) * _f(vol_near) * _f(vol_far) * t,
        )


Coefficients = tuple[FloatArray, FloatArray, FloatArray]


def _bucket_cross_coefficients(
    expiry: FloatArray,
    maturity_a: FloatArray,
    maturity_b: FloatArray,
    edges: FloatArray,
    kappa: float,
) -> Coefficients:
    """Per-bucket ``(a, b, c)`` of the covariance of two futures, shape ``(n, n_buckets)``."""
    if float(expiry.max()) > edges[-1] * (1.0 + 1e-12):
        raise ParameterError(
            "edges",
            edges.tolist(),
            f"the last edge must reach the latest expiry {expiry.max():.6g}",
        )
    lo = edges[None, :-1]
    hi = np.minimum(edges[None, 1:], expiry[:, None])
    length = np.maximum(hi - lo, 0.0)
    end = np.maximum(hi, lo)
    tau_a = np.maximum(maturity_a[:, None] - end, 0.0)
    tau_b = np.maximum(maturity_b[:, None] - end, 0.0)
    return interval_coefficients(tau_a, tau_b, length, kappa)


def law_coefficients(
    option: SpreadOption, vols: TwoFactorParams | ForwardVols
) -> tuple[Coefficients, Coefficients, Coefficients]:
    """Linear coefficients of ``(v_1, v_2, c)`` in ``(P, Q, C) = (s1^2, s2^2, rho s1 s2)``.

    Each quantity is ``a P + b Q - 2 c C``. For :class:`TwoFactorParams` the arrays have shape
    ``(n,)``; for :class:`ForwardVols` shape ``(n, n_buckets)``, one column a bucket.
    """
    t, T1, T2 = option.t_expiry, option.t_near, option.t_far
    if isinstance(vols, TwoFactorParams):
        k = vols.kappa
        return (
            variance_coefficients(t, T1, k),
            variance_coefficients(t, T2, k),
            covariance_coefficients(t, T1, T2, k),
        )
    e, k = vols.edges, vols.kappa
    return (
        _bucket_cross_coefficients(t, T1, T1, e, k),
        _bucket_cross_coefficients(t, T2, T2, e, k),
        _bucket_cross_coefficients(t, T1, T2, e, k),
    )


def _pqc(vols: TwoFactorParams | ForwardVols) -> tuple[FloatArray, FloatArray, FloatArray]:
    s1, s2, rho = _f(vols.sigma_spot), _f(vols.sigma_yield), _f(vols.rho)
    return s1 * s1, s2 * s2, rho * s1 * s2


def _combine(coef: Coefficients, pqc: tuple[FloatArray, FloatArray, FloatArray]) -> FloatArray:
    (a, b, c), (P, Q, C) = coef, pqc
    total = a * P + b * Q - 2.0 * c * C
    return np.asarray(total if total.ndim == 1 else total.sum(axis=1))


def spread_law(option: SpreadOption, vols: TwoFactorParams | ForwardVols) -> SpreadLaw:
    """Joint law of the two log futures at expiry under the two-factor model.

    Parameters
    ----------
    option : the options (maturities, expiry and today's futures are used).
    vols : a parameter set (constant volatilities) or per-bucket forward volatilities.

    Notes
    -----
    ``Cov(x_1, x_2) = int_0^t [s1^2 - rho s1 s2 (B(T1-u) + B(T2-u)) + s2^2 B(T1-u) B(T2-u)] du``
    (DESIGN §3), piecewise over the buckets in forward mode; ``m_i = ln F_i - v_i / 2``.
    """
    c_near, c_far, c_cross = law_coefficients(option, vols)
    pqc = _pqc(vols)
    v1, v2 = _combine(c_near, pqc), _combine(c_far, pqc)
    return SpreadLaw(
        mean_near=np.log(option.near_price) - 0.5 * v1,
        mean_far=np.log(option.far_price) - 0.5 * v2,
        var_near=v1,
        var_far=v2,
        cov=_combine(c_cross, pqc),
    )


# --- exact price by quadrature ----------------------------------------------------------------


@cache
def hermite_nodes(n: int) -> tuple[FloatArray, FloatArray]:
    """Gauss-Hermite nodes and weights for ``E[f(Z)]``, ``Z ~ N(0, 1)`` (weights sum to 1)."""
    if n < 2:
        raise ParameterError("nodes", n, "need at least 2 quadrature nodes")
    z, w = roots_hermitenorm(n)
    w = w / w.sum()
    return readonly(z), readonly(w)


@dataclass(frozen=True, slots=True)
class SpreadGreeks:
    """Exact premium and its derivatives, one entry per option.

    Attributes
    ----------
    price : premium.
    delta_near, delta_far : ``dV/dF1`` and ``dV/dF2`` (hedge ratios in the futures).
    d_var_near, d_var_far, d_cov : ``dV/dv_1``, ``dV/dv_2``, ``dV/dc`` (futures prices fixed);
        ``None`` unless asked for.
    """

    price: FloatArray
    delta_near: FloatArray
    delta_far: FloatArray
    d_var_near: FloatArray | None = None
    d_var_far: FloatArray | None = None
    d_cov: FloatArray | None = None


def _conditional(
    v_o: FloatArray, v_i: FloatArray, c: FloatArray
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """``(s_o, beta, sc)``: outer deviation, loading of the inner leg on ``z``, its residual."""
    s_o = np.sqrt(v_o)
    with np.errstate(divide="ignore", invalid="ignore"):
        beta = np.where(s_o > 0.0, c / s_o, 0.0)
    return s_o, beta, np.sqrt(np.maximum(v_i - beta * beta, 0.0))


def _legs(
    law: SpreadLaw, strike: ArrayLike, kind: Kind | ArrayLike, discount: ArrayLike
) -> tuple[Any, ...]:
    K = _f(strike)
    call = is_call(kind)
    m1, m2, v1, v2, c, K, call, D = np.broadcast_arrays(
        law.mean_near, law.mean_far, law.var_near, law.var_far, law.cov, K, call, _f(discount)
    )
    near_out = K >= 0.0  # outer leg: near for K >= 0, far for K < 0
    v_o = np.where(near_out, v1, v2)
    v_i = np.where(near_out, v2, v1)
    F_o = np.exp(np.where(near_out, m1, m2) + 0.5 * v_o)
    F_i = np.exp(np.where(near_out, m2, m1) + 0.5 * v_i)
    s_o, beta, sc = _conditional(v_o, v_i, c)
    sg = np.where(call == near_out, 1.0, -1.0)  # inner call iff (spread call) == (K >= 0)
    return near_out, F_o, F_i, s_o, beta, sc, np.abs(K), sg, D


def spread_greeks(
    law: SpreadLaw,
    strike: ArrayLike,
    kind: Kind | ArrayLike,
    discount: ArrayLike = 1.0,
    *,
    nodes: int = DEFAULT_NODES,
    vol_derivatives: bool = False,
) -> SpreadGreeks:
    """Exact premium and hedge ratios (and optionally variance sensitivities) by quadrature.

    See the module Notes for the conditioning and the derivative formulas.
    """
    near_out, F_o, F_i, s_o, beta, sc, aK, sg, D = _legs(law, strike, kind, discount)
    z, w = hermite_nodes(nodes)
    zz = z[None, :]
    e_o = np.exp(np.log(F_o)[:, None] + s_o[:, None] * (zz - 0.5 * s_o[:, None]))
    k = e_o + aK[:, None]
    log_fc = np.log(F_i)[:, None] + beta[:, None] * (zz - 0.5 * beta[:, None])
    Fc = np.exp(log_fc)
    scn = sc[:, None]
    sgn = sg[:, None]
    with np.errstate(divide="ignore", invalid="ignore"):
        d1 = (log_fc - np.log(k)) / scn
    d1 += 0.5 * scn
    if np.any(sc == 0.0):  # perfectly correlated legs: the conditional law is a point
        d1 = np.where(scn > 0.0, d1, np.where(Fc > k, np.inf, -np.inf))
    N1 = ndtr(sgn * d1)
    N2 = ndtr(sgn * (d1 - scn))
    g1 = Fc * N1
    g2 = e_o * N2
    price = sg * ((g1 - k * N2) @ w)
    d_inner = sg * (g1 @ w) / F_i
    d_outer = -sg * (g2 @ w) / F_o
    delta_near = D * np.where(near_out, d_outer, d_inner)
    delta_far = D * np.where(near_out, d_inner, d_outer)
    out = SpreadGreeks(price=D * price, delta_near=delta_near, delta_far=delta_far)
    if not vol_derivatives:
        return out
    d_so = -sg * ((g2 * (zz - s_o[:, None])) @ w)
    d_beta = sg * ((g1 * (zz - beta[:, None])) @ w)
    d_sc = (Fc * _INV_SQRT_2PI * np.exp(-0.5 * d1 * d1)) @ w
    v_o = s_o * s_o
    with np.errstate(divide="ignore", invalid="ignore"):
        d_vi = d_sc / (2.0 * sc)
        d_vo = d_so / (2.0 * s_o) - d_beta * beta / (2.0 * v_o) + d_vi * beta * beta / v_o
        d_c = d_beta / s_o - 2.0 * d_vi * beta / s_o
    return SpreadGreeks(
        price=out.price,
        delta_near=delta_near,
        delta_far=delta_far,
        d_var_near=D * np.where(near_out, d_vo, d_vi),
        d_var_far=D * np.where(near_out, d_vi, d_vo),
        d_cov=D * d_c,
    )


def price_exact(
    law: SpreadLaw,
    strike: ArrayLike,
    kind: Kind | ArrayLike,
    discount: ArrayLike = 1.0,
    *,
    nodes: int = DEFAULT_NODES,
) -> FloatArray:
    """Exact premium of the spread options by Gauss-Hermite quadrature (module Notes)."""
    return spread_greeks(law, strike, kind, discount, nodes=nodes).price


# --- sensitivities to the calibrated volatilities ---------------------------------------------


@dataclass(frozen=True, slots=True)
class VolSensitivities:
    """Derivatives of the premium in the volatility parameters (futures prices fixed).

    Shape ``(n,)`` for constant volatilities, ``(n, n_buckets)`` in forward mode.
    """

    sigma_spot: FloatArray
    sigma_yield: FloatArray
    rho: FloatArray


def vol_sensitivities(
    option: SpreadOption,
    vols: TwoFactorParams | ForwardVols,
    *,
    nodes: int = DEFAULT_NODES,
) -> VolSensitivities:
    """Sensitivities of the exact premium to ``sigma_spot``, ``sigma_yield`` and ``rho``.

    Notes
    -----
    With ``(v_1, v_2, c)`` each ``a P + b Q - 2 c C`` (per bucket in forward mode),
    ``dV/dP = sum_q dV/dq a_q``, ``dV/dQ = sum_q dV/dq b_q``, ``dV/dC = -2 sum_q dV/dq c_q``, and
    ``dP/ds1 = 2 s1``, ``dQ/ds2 = 2 s2``, ``dC/ds1 = rho s2``, ``dC/ds2 = rho s1``,
    ``dC/drho = s1 s2``.
    """
    law = spread_law(option, vols)
    g = spread_greeks(
        law, option.strike, option.is_call, option.discount, nodes=nodes, vol_derivatives=True
    )
    assert g.d_var_near is not None and g.d_var_far is not None and g.d_cov is not None
    coefs = law_coefficients(option, vols)
    dq = (g.d_var_near, g.d_var_far, g.d_cov)
    shape = coefs[0][0].shape
    dP, dQ, dC = (np.zeros(shape) for _ in range(3))
    for (a, b, c), d in zip(coefs, dq, strict=True):
        dn = d if len(shape) == 1 else d[:, None]
        dP += dn * a
        dQ += dn * b
        dC -= 2.0 * dn * c
    s1, s2, rho = _f(vols.sigma_spot), _f(vols.sigma_yield), _f(vols.rho)
    return VolSensitivities(
        sigma_spot=2.0 * s1 * dP + rho * s2 * dC,
        sigma_yield=2.0 * s2 * dQ + rho * s1 * dC,
        rho=s1 * s2 * dC,
    )


# --- Kirk's approximation ----------------------------------------------------------------------


def price_kirk(
    law: SpreadLaw, strike: ArrayLike, kind: Kind | ArrayLike, discount: ArrayLike = 1.0
) -> FloatArray:
    """Kirk's (1995) approximation: ``F1(t) + K`` treated as lognormal.

    Notes
    -----
    With ``u = F1 / (F1 + K)``, the spread call is Black-76 on the forward ``F2`` with strike
    ``F1 + K`` and total variance ``V = v_2 - 2 u c + u^2 v_1``. Defined for ``F1 + K > 0``.
    """
    F1, F2 = law.near_price, law.far_price
    F1, F2, K, call, D = np.broadcast_arrays(F1, F2, _f(strike), is_call(kind), _f(discount))
    k = F1 + K
    if np.any(k <= 0.0):
        raise ParameterError(
            "strike", K[k <= 0.0][0], "Kirk's approximation needs near price + strike > 0"
        )
    u = F1 / k
    var = np.maximum(law.var_far - 2.0 * u * law.cov + u * u * law.var_near, 0.0)
    s = np.sqrt(var)
    sg = np.where(call, 1.0, -1.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        d1 = np.log(F2 / k) / s + 0.5 * s
    value = sg * (F2 * ndtr(sg * d1) - k * ndtr(sg * (d1 - s)))
    value = np.where(s > 0.0, value, np.maximum(sg * (F2 - k), 0.0))
    return np.asarray(D * value)


# --- Monte Carlo -------------------------------------------------------------------------------


def price_mc(
    law: SpreadLaw,
    strike: ArrayLike,
    kind: Kind | ArrayLike,
    discount: ArrayLike = 1.0,
    *,
    n_paths: int = 200_000,
    seed: int,
) -> tuple[FloatArray, FloatArray]:
    """Monte Carlo premium and its standard error, from seeded antithetic draws of the law.

    Notes
    -----
    ``x_1 = m_1 + s_1 Z_1``, ``x_2 = m_2 + beta Z_1 + sc Z_2`` (Cholesky), antithetic pairs
    ``(Z, -Z)``, and the control variate ``S - E[S]`` with ``S = F2(t) - F1(t)`` (mean
    ``F2 - F1``), coefficient from the same sample. The standard error is that of the mean of
    the controlled pair averages. All options share the draws (common random numbers).
    """
    if n_paths < 4:
        raise ParameterError("n_paths", n_paths, "need at least 4 paths")
    K = _f(strike)
    m1, m2, v1, v2, c, K, call, D = np.broadcast_arrays(
        law.mean_near,
        law.mean_far,
        law.var_near,
        law.var_far,
        law.cov,
        K,
        is_call(kind),
        _f(discount),
    )
    s1, beta, sc = _conditional(v1, v2, c)
    sg = np.where(call, 1.0, -1.0)
    mean_s = np.exp(m2 + 0.5 * v2) - np.exp(m1 + 0.5 * v1)
    rng = np.random.default_rng(seed)
    n_pairs = n_paths // 2
    n = K.shape[0]
    sums = np.zeros((5, n))  # sum Y, Y^2, X, X^2, XY over pairs
    chunk = max(1, min(n_pairs, 2_000_000 // max(n, 1)))
    done = 0
    while done < n_pairs:
        m = min(chunk, n_pairs - done)
        z1, z2 = rng.standard_normal((2, m, 1))
        ys, xs = [], []
        for a in (1.0, -1.0):
            f1 = np.exp(m1 + s1 * (a * z1))
            f2 = np.exp(m2 + beta * (a * z1) + sc * (a * z2))
            ys.append(np.maximum(sg * (f2 - f1 - K), 0.0))
            xs.append(f2 - f1 - mean_s)
        y = 0.5 * (ys[0] + ys[1])
        x = 0.5 * (xs[0] + xs[1])
        sums += np.stack([y.sum(0), (y * y).sum(0), x.sum(0), (x * x).sum(0), (x * y).sum(0)])
        done += m
    ey, eyy, ex, exx, exy = sums / n_pairs
    var_x = exx - ex * ex
    cov_xy = exy - ex * ey
    with np.errstate(divide="ignore", invalid="ignore"):
        b = np.where(var_x > 0.0, cov_xy / var_x, 0.0)
    est = ey - b * ex
    resid_var = np.maximum(eyy - ey * ey - 2.0 * b * cov_xy + b * b * var_x, 0.0)
    stderr = np.sqrt(resid_var / (n_pairs - 1))
    return np.asarray(D * est), np.asarray(D * stderr)


# --- reference price by adaptive quadrature ----------------------------------------------------


def price_quad(
    law: SpreadLaw, strike: ArrayLike, kind: Kind | ArrayLike, discount: ArrayLike = 1.0
) -> FloatArray:
    """Reference premium by scipy's adaptive quadrature, one option at a time (slow).

    A cross-check of :func:`price_exact` by another route: always conditioned on the near leg,
    with the intrinsic conditional value ``max(sg (Fc - k), 0)`` where ``k = F1(z) + K <= 0``,
    integrated over ``z`` in ``[-12, 12]`` to ``1e-13`` relative.
    """
    F1, F2 = law.near_price, law.far_price
    v1, v2, c, F1, F2, K, call, D = np.broadcast_arrays(
        law.var_near, law.var_far, law.cov, F1, F2, _f(strike), is_call(kind), _f(discount)
    )
    s1, beta, sc = _conditional(v1, v2, c)
    out = np.empty(K.shape)
    for i in range(K.shape[0]):  # a reference, not a hot path
        sg = 1.0 if call[i] else -1.0
        args = (F1[i], F2[i], K[i], s1[i], beta[i], sc[i], sg)
        value, _ = integrate.quad(
            _integrand, -12.0, 12.0, args=args, epsabs=0.0, epsrel=1e-13, limit=400
        )
        out[i] = D[i] * value
    return out


def _integrand(
    z: float, F1: float, F2: float, K: float, s1: float, beta: float, sc: float, sg: float
) -> float:
    k = F1 * math.exp(s1 * z - 0.5 * s1 * s1) + K
    Fc = F2 * math.exp(beta * z - 0.5 * beta * beta)
    if k <= 0.0 or sc == 0.0:
        inner = max(sg * (Fc - k), 0.0)
    else:
        d1 = math.log(Fc / k) / sc + 0.5 * sc
        inner = sg * (Fc * float(ndtr(sg * d1)) - k * float(ndtr(sg * (d1 - sc))))
    return inner * _INV_SQRT_2PI * math.exp(-0.5 * z * z)
