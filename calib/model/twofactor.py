"""The two-factor spot/convenience-yield model (Schwartz 1997, model 2).

State: log spot ``X = ln S`` and convenience yield ``d``.

Real world:  ``dS = (mu - d) S dt + s1 S dW1``,  ``dd = kappa (alpha - d) dt + s2 dW2``,
``dW1 dW2 = rho dt``. Risk neutral: spot drift ``r - d``, yield drift
``kappa (alpha_hat - d)`` with ``alpha_hat = alpha - lam / kappa``.

Everything here is closed form and vectorised; the integrals of ``B`` and ``B^2`` are written
through the entire functions :func:`_phi2` and :func:`_psi`, which are evaluated by their Taylor
series near zero, so the formulas keep full precision as ``kappa * tau -> 0``.

Notes
-----
``B(tau) = (1 - e^{-kappa tau}) / kappa``. Over a calendar interval of length ``L`` whose
times to maturity run from ``tau0`` to ``tau0 + L``, with ``B0 = B(tau0)``,
``e0 = e^{-kappa tau0}`` and ``x = kappa L``:

* ``int B   = L B0 + e0 L^2 phi2(x)``,
* ``int B^2 = L B0^2 + 2 B0 e0 L^2 phi2(x) + e0^2 L^3 psi(x)``,

where ``phi2(x) = (x - 1 + e^{-x}) / x^2`` and
``psi(x) = (x - 2(1 - e^{-x}) + (1 - e^{-2x})/2) / x^3``. These follow from
``B(tau0 + w) = B0 + e0 B(w)``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from calib.errors import ParameterError
from calib.model.params import PARAM_NAMES as PARAM_NAMES  # the parameter set lives there
from calib.model.params import TwoFactorParams as TwoFactorParams
from calib.types import ArrayLike, FloatArray

# --- entire functions used by the integrals ----------------------------------------------------

_SERIES_CUT = 1.0
_N_TERMS = 26
_PHI2_COEF = np.array([(-1.0) ** n / math.factorial(n) for n in range(2, 2 + _N_TERMS)])
_PSI_COEF = np.array(
    [(-1.0) ** (n + 1) * (2.0 ** (n - 1) - 2.0) / math.factorial(n) for n in range(3, 3 + _N_TERMS)]
)


def _series(coef: FloatArray, x: FloatArray) -> FloatArray:
    out = np.zeros_like(x)
    for c in coef[::-1]:  # Horner; fixed small number of vectorised steps
        out = out * x + c
    return out


def _phi1(x: FloatArray) -> FloatArray:
    """``(1 - e^{-x}) / x``, with value 1 at 0."""
    with np.errstate(divide="ignore", invalid="ignore"):
        direct = -np.expm1(-x) / x
    return np.where(np.abs(x) < 1e-300, 1.0, direct)


def _phi2(x: FloatArray) -> FloatArray:
    """``(x - 1 + e^{-x}) / x^2``, with value 1/2 at 0."""
    small = np.abs(x) < _SERIES_CUT
    with np.errstate(divide="ignore", invalid="ignore"):
        direct = (x + np.expm1(-x)) / (x * x)
    return np.where(small, _series(_PHI2_COEF, np.where(small, x, 0.0)), direct)


def _psi(x: FloatArray) -> FloatArray:
    """``(x - 2(1 - e^{-x}) + (1 - e^{-2x})/2) / x^3``, with value 1/3 at 0."""
    small = np.abs(x) < _SERIES_CUT
    with np.errstate(divide="ignore", invalid="ignore"):
        direct = (x + 2.0 * np.expm1(-x) - 0.5 * np.expm1(-2.0 * x)) / (x * x * x)
    return np.where(small, _series(_PSI_COEF, np.where(small, x, 0.0)), direct)


def _f(x: ArrayLike) -> FloatArray:
    return np.asarray(x, dtype=np.float64)


# --- A, B and futures prices -------------------------------------------------------------------


def B(tau: ArrayLike, kappa: float) -> FloatArray:
    """``B(tau) = (1 - e^{-kappa tau}) / kappa``: loading of log futures on the yield."""
    t = _f(tau)
    return np.asarray(t * _phi1(kappa * t), dtype=np.float64)


def integral_B(tau: ArrayLike, kappa: float) -> FloatArray:
    """``int_0^tau B(s) ds = (tau - B(tau)) / kappa``."""
    t = _f(tau)
    return np.asarray(t * t * _phi2(kappa * t), dtype=np.float64)


def integral_B2(tau: ArrayLike, kappa: float) -> FloatArray:
    """``int_0^tau B(s)^2 ds``."""
    t = _f(tau)
    return np.asarray(t * t * t * _psi(kappa * t), dtype=np.float64)


def A(tau: ArrayLike, params: TwoFactorParams, r: ArrayLike) -> FloatArray:
    """Deterministic part of the log futures price, ``ln F = X - d B(tau) + A(tau)``.

    Notes
    -----
    ``A = (r - alpha_hat) tau + alpha_hat B + s2^2/2 int B^2 - rho s1 s2 int B``, which is
    Schwartz's (1997) closed form rearranged (both integrals over ``[0, tau]``).
    """
    t = _f(tau)
    p = params
    ah = p.alpha_hat
    s1, s2 = p.sigma_spot, p.sigma_yield
    return np.asarray(
        (_f(r) - ah) * t
        + ah * B(t, p.kappa)
        + 0.5 * s2 * s2 * integral_B2(t, p.kappa)
        - p.rho * s1 * s2 * integral_B(t, p.kappa),
        dtype=np.float64,
    )


def log_futures(
    log_spot: ArrayLike,
    conv_yield: ArrayLike,
    tau: ArrayLike,
    r: ArrayLike,
    params: TwoFactorParams,
) -> FloatArray:
    """``ln F(tau) = X - d B(tau) + A(tau)``."""
    t = _f(tau)
    return np.asarray(
        _f(log_spot) - _f(conv_yield) * B(t, params.kappa) + A(t, params, r), dtype=np.float64
    )


def futures_price(
    spot: ArrayLike,
    conv_yield: ArrayLike,
    tau: ArrayLike,
    r: ArrayLike,
    params: TwoFactorParams,
) -> FloatArray:
    """Futures price maturing ``tau`` years ahead, given spot, convenience yield and rate."""
    return np.asarray(
        np.exp(log_futures(np.log(_f(spot)), conv_yield, tau, r, params)), dtype=np.float64
    )


# --- volatilities --------------------------------------------------------------------------


def instantaneous_variance(tau: ArrayLike, params: TwoFactorParams) -> FloatArray:
    """Instantaneous variance of ``dF/F`` for a future ``tau`` years from maturity.

    ``v = s1^2 + s2^2 B^2 - 2 rho s1 s2 B``.
    """
    b = B(tau, params.kappa)
    s1, s2 = params.sigma_spot, params.sigma_yield
    return np.asarray(s1 * s1 + s2 * s2 * b * b - 2.0 * params.rho * s1 * s2 * b)


def futures_vol(tau: ArrayLike, params: TwoFactorParams) -> FloatArray:
    """Instantaneous volatility of a future by time to maturity (the Samuelson curve)."""
    return np.asarray(np.sqrt(np.maximum(instantaneous_variance(tau, params), 0.0)))


def decay_bound_slack(params: TwoFactorParams) -> float:
    """Slack of the decay bound ``s2 <= rho kappa s1`` (>= 0 where it holds).

    Notes
    -----
    ``dv/dB = 2 s2 (s2 B - rho s1)`` and ``B`` rises from 0 towards ``1/kappa``, so futures
    volatility falls with maturity at every maturity iff ``s2 <= rho kappa s1``.
    """
    return params.rho * params.kappa * params.sigma_spot - params.sigma_yield


def decay_bound_holds(params: TwoFactorParams, tol: float = 0.0) -> bool:
    """Whether futures volatility is non-increasing in maturity (up to ``tol`` in slack)."""
    return decay_bound_slack(params) >= -tol


# --- linear variance coefficients ----------------------------------------------------------


def interval_coefficients(
    tau0_a: ArrayLike, tau0_b: ArrayLike, length: ArrayLike, kappa: float
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Coefficients of the log-covariance of two futures over one calendar interval.

    Over an interval of ``length`` years at whose end the futures are ``tau0_a`` and
    ``tau0_b`` years from maturity, the covariance of their log prices is
    ``a P + b Q - 2 c C`` with ``P = s1^2``, ``Q = s2^2``, ``C = rho s1 s2``.

    Returns ``(a, b, c)``: ``a = L``, ``b = int B_a B_b``, ``c = (int B_a + int B_b) / 2``.
    """
    L = np.maximum(_f(length), 0.0)
    ta, tb = _f(tau0_a), _f(tau0_b)
    Ba, Bb = B(ta, kappa), B(tb, kappa)
    ea, eb = np.exp(-kappa * ta), np.exp(-kappa * tb)
    x = kappa * L
    L2p = L * L * _phi2(x)
    L3s = L * L * L * _psi(x)
    int_a = L * Ba + ea * L2p
    int_b = L * Bb + eb * L2p
    b = L * Ba * Bb + (Ba * eb + Bb * ea) * L2p + ea * eb * L3s
    a = np.broadcast_to(L, b.shape).astype(np.float64)
    return a, np.asarray(b), np.asarray(0.5 * (int_a + int_b))


def variance_coefficients(
    expiry: ArrayLike, maturity: ArrayLike, kappa: float
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """``(a, b, c)`` with total log-variance ``V = a P + b Q - 2 c C`` over ``[0, expiry]``.

    ``a, b, c`` are the integrals of ``1, B^2, B`` over the option's life of a future
    maturing at ``maturity >= expiry``.
    """
    t, T = _f(expiry), _f(maturity)
    return interval_coefficients(T - t, T - t, t, kappa)


def covariance_coefficients(
    t: ArrayLike, maturity_1: ArrayLike, maturity_2: ArrayLike, kappa: float
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """``(a, b, c)`` of the covariance of ``ln F(T1)`` and ``ln F(T2)`` over ``[0, t]``."""
    t_ = _f(t)
    return interval_coefficients(_f(maturity_1) - t_, _f(maturity_2) - t_, t_, kappa)


def _combine(
    coef: tuple[FloatArray, FloatArray, FloatArray], params: TwoFactorParams
) -> FloatArray:
    a, b, c = coef
    s1, s2 = params.sigma_spot, params.sigma_yield
    return np.asarray(a * s1 * s1 + b * s2 * s2 - 2.0 * c * params.rho * s1 * s2)


def total_variance(expiry: ArrayLike, maturity: ArrayLike, params: TwoFactorParams) -> FloatArray:
    """Total log-variance of a future over ``[0, expiry]`` (Black-76 ``vol^2 * expiry``)."""
    return _combine(variance_coefficients(expiry, maturity, params.kappa), params)


def implied_black_vol(
    expiry: ArrayLike, maturity: ArrayLike, params: TwoFactorParams
) -> FloatArray:
    """Model Black volatility of an option expiring at ``expiry`` on the future ``maturity``."""
    t = _f(expiry)
    return np.asarray(np.sqrt(total_variance(t, maturity, params) / t))


def covariance(
    t: ArrayLike, maturity_1: ArrayLike, maturity_2: ArrayLike, params: TwoFactorParams
) -> FloatArray:
    """Covariance of the log prices of two futures over ``[0, t]``."""
    return _combine(covariance_coefficients(t, maturity_1, maturity_2, params.kappa), params)


def check_bucket_edges(edges: ArrayLike) -> FloatArray:
    """Validate calendar bucket edges: start at 0, strictly increasing, finite."""
    e = _f(edges)
    if e.ndim != 1 or e.size < 2:
        raise ParameterError("edges", e.tolist(), "need at least two edges [0, t1, ...]")
    if not np.all(np.isfinite(e)):
        raise ParameterError("edges", e.tolist(), "must be finite")
    if e[0] != 0.0:
        raise ParameterError("edges", e.tolist(), "the first edge must be 0 (today)")
    if np.any(np.diff(e) <= 0.0):
        raise ParameterError("edges", e.tolist(), "must be strictly increasing")
    return e


def bucket_coefficients(
    expiry: ArrayLike, maturity: ArrayLike, edges: ArrayLike, kappa: float
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Variance coefficients split over piecewise-constant calendar buckets.

    Bucket ``k`` covers ``[edges[k], edges[k+1])``. Returns three arrays of shape
    ``(n_options, n_buckets)``; with per-bucket ``(P_k, Q_k, C_k)`` the total variance is
    ``sum_k a_k P_k + b_k Q_k - 2 c_k C_k``. The last edge must reach the latest expiry.
    """
    e = check_bucket_edges(edges)
    t = np.atleast_1d(_f(expiry))
    T = np.atleast_1d(_f(maturity))
    t, T = np.broadcast_arrays(t, T)
    if t.size and float(t.max()) > e[-1] * (1.0 + 1e-12):
        raise ParameterError(
            "edges", e.tolist(), f"the last edge must reach the latest expiry {t.max():.6g}"
        )
    lo = e[None, :-1]
    hi = np.minimum(e[None, 1:], t[:, None])
    length = np.maximum(hi - lo, 0.0)
    tau_end = np.maximum(T[:, None] - np.maximum(hi, lo), 0.0)
    return interval_coefficients(tau_end, tau_end, length, kappa)


# --- exact transition of the state (log spot, yield) ---------------------------------------


@dataclass(frozen=True, slots=True)
class Transition:
    """Exact Gaussian transition of ``z = (X, d)`` over steps ``dt``: ``z' = c + Phi z + eps``.

    Arrays carry the steps on the leading axis: ``Phi`` is ``(n, 2, 2)``, ``c`` is ``(n, 2)``,
    ``cov`` (the covariance of ``eps``) is ``(n, 2, 2)``.
    """

    Phi: FloatArray
    c: FloatArray
    cov: FloatArray


def transition(
    params: TwoFactorParams,
    dt: ArrayLike,
    measure: str = "real",
    r: float = 0.0,
) -> Transition:
    """Exact transition of (log spot, convenience yield) over each step in ``dt`` (years).

    ``measure="real"`` uses the drifts ``mu`` and ``alpha``; ``measure="risk_neutral"`` uses
    ``r`` and ``alpha_hat``.

    Notes
    -----
    With ``h`` the step, ``Bh = B(h)``, ``eh = e^{-kappa h}`` and ``m``, ``a`` the spot drift and
    long-run yield of the chosen measure:

    * ``d' = eh d + a (1 - eh) + s2 int e^{-kappa w} dW2``,
    * ``X' = X - Bh d + (m - s1^2/2 - a) h + a Bh + s1 dW1 - s2 int B(w) dW2``,

    so ``Var X' = s1^2 h + s2^2 int_0^h B^2 - 2 rho s1 s2 int_0^h B``,
    ``Var d' = s2^2 (1 - e^{-2 kappa h}) / (2 kappa)`` and
    ``Cov = rho s1 s2 Bh - s2^2 Bh^2 / 2`` (since ``int_0^h B e^{-kappa w} dw = Bh^2 / 2``).
    """
    if measure == "real":
        m, a = params.mu, params.alpha
    elif measure == "risk_neutral":
        m, a = float(r), params.alpha_hat
    else:
        raise ParameterError("measure", measure, 'must be "real" or "risk_neutral"')
    h = np.atleast_1d(_f(dt))
    if np.any(h < 0.0) or not np.all(np.isfinite(h)):
        raise ParameterError("dt", h.tolist(), "time steps must be finite and >= 0")
    k, s1, s2, rho = params.kappa, params.sigma_spot, params.sigma_yield, params.rho
    Bh = B(h, k)
    eh = np.exp(-k * h)
    n = h.shape[0]
    Phi = np.zeros((n, 2, 2))
    Phi[:, 0, 0] = 1.0
    Phi[:, 0, 1] = -Bh
    Phi[:, 1, 1] = eh
    c = np.empty((n, 2))
    c[:, 0] = (m - 0.5 * s1 * s1 - a) * h + a * Bh
    c[:, 1] = a * (h * k) * _phi1(k * h)  # a (1 - e^{-kappa h})
    cov = np.empty((n, 2, 2))
    cov[:, 0, 0] = (
        s1 * s1 * h + s2 * s2 * integral_B2(h, k) - 2.0 * rho * s1 * s2 * integral_B(h, k)
    )
    cov[:, 1, 1] = s2 * s2 * h * _phi1(2.0 * k * h)
    cov[:, 0, 1] = cov[:, 1, 0] = rho * s1 * s2 * Bh - 0.5 * s2 * s2 * Bh * Bh
    return Transition(Phi=Phi, c=c, cov=cov)
