"""Compiled Kalman filter, log-likelihood and smoother of the two-factor state-space form.

The state is ``z_t = (X_t, d_t)`` (log spot, convenience yield) on observation day ``t``.
Between consecutive days, ``h_t`` years apart, the transition is the exact one of
:func:`calib.model.twofactor.transition` under the real-world measure:
``z_{t+1} = c(h_t) + Phi(h_t) z_t + eta_t``, ``eta_t ~ N(0, Q(h_t))``. On day ``t`` the log
price of the contract in slot ``j``, ``tau_tj`` years from maturity, is measured as
``y_tj = A(tau_tj) + X_t - B(tau_tj) d_t + e_tj`` with ``e_tj ~ N(0, xi_j^2)`` independent
(``A`` under the risk-neutral measure, constant rate ``r``).

Why a compiled univariate filter
--------------------------------
The measurement noise is diagonal, so the observations of one day can be processed one at a
time (the univariate treatment of Durbin & Koopman, *Time Series Analysis by State Space
Methods*, 2nd ed., section 6.4): each observation is a scalar update of a 2x2 covariance,
with no matrix inversion, and a missing price is simply skipped. The whole pass is a few
dozen flops per observation, so a numba loop (``cache=True``, compiled once per machine)
runs 3,000 days x 5 contracts in a fraction of a millisecond. The exact banded-precision
alternative would factor a ``2n x 2n`` banded matrix per evaluation (and rebuild it on every
parameter change) for the same answer; the filter also gives the filtered states the
estimate reports, and the smoother reuses its stored moments.

The system matrices are computed inside the loop from the parameters by the closed forms of
:mod:`calib.model.twofactor` (re-expressed on scalars: one ``expm1`` per observation, the
transition once per distinct gap). The test suite checks them, and the likelihood, against
statsmodels' Kalman filter fed by the vectorised numpy closed forms.

Initialisation
--------------
The filter is conditioned on the first day's curve: with a flat prior on ``z_0`` the posterior
after day 0 is the generalised least-squares fit ``P_0 = (Z' H^{-1} Z)^{-1}``,
``a_0 = P_0 Z' H^{-1} (y_0 - A_0)``, and the log-likelihood is ``log p(y_1, ..., y_{n-1} | y_0)``.
This is exact (no large-but-finite prior variance whose size would leak into the likelihood)
and needs two prices of distinct maturity on day 0.

Parameter vector
----------------
Kernels take ``theta = (mu, kappa, alpha, lam, sigma_spot, sigma_yield, rho, xi_1..xi_m)``
(natural parameters) or its unconstrained image ``u`` (see :func:`to_natural`).
"""

from __future__ import annotations

import math

import numpy as np
from numba import njit

from calib.types import FloatArray, IntArray

Panel = tuple[float, IntArray, FloatArray, FloatArray, IntArray, FloatArray]
"""What the filter reads, ``(r, gap_index, gaps, tau, tau_index, y)``: the rate, each day's
step into ``gaps`` (the distinct day gaps in years), the distinct maturities ``tau`` and each
price's position in it (``(n, m)``), and the ``(n, m)`` log prices (NaN where missing)."""

N_MODEL = 7
"""Number of model parameters ahead of the noise standard deviations in ``theta``."""

_LOG_2PI = math.log(2.0 * math.pi)
_SERIES_CUT = 0.1
_N_TERMS = 12  # x^12 / 14! < 1e-23 at the cut: full double precision
_PHI2_COEF = np.array([(-1.0) ** n / math.factorial(n) for n in range(2, 2 + _N_TERMS)])
_PSI_COEF = np.array(
    [(-1.0) ** (n + 1) * (2.0 ** (n - 1) - 2.0) / math.factorial(n) for n in range(3, 3 + _N_TERMS)]
)


# --- scalar closed forms ------------------------------------------------------------------


@njit(cache=True, inline="always")
def _horner(coef: FloatArray, x: float) -> float:
    out = 0.0
    for i in range(coef.shape[0] - 1, -1, -1):
        out = out * x + coef[i]
    return out


@njit(cache=True, error_model="numpy", inline="always")
def _basis(kappa: float, tau: float) -> tuple[float, float, float]:
    """``(B, int_0^tau B, int_0^tau B^2)`` at one maturity (see twofactor's Notes)."""
    x = kappa * tau
    em1 = math.expm1(-x)  # e^{-x} - 1
    if x == 0.0:
        return tau, 0.5 * tau * tau, tau * tau * tau / 3.0
    b = -em1 / kappa
    if abs(x) < _SERIES_CUT:
        phi2 = _horner(_PHI2_COEF, x)
        psi = _horner(_PSI_COEF, x)
    else:
        em2 = em1 * (2.0 + em1)  # e^{-2x} - 1
        phi2 = (x + em1) / (x * x)
        psi = (x + 2.0 * em1 - 0.5 * em2) / (x * x * x)
    return b, tau * tau * phi2, tau * tau * tau * psi


@njit(cache=True, error_model="numpy")
def _transitions(
    theta: FloatArray, gaps: FloatArray
) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray, FloatArray, FloatArray, FloatArray]:
    """Exact real-world transition per distinct gap: ``Phi01, Phi11, c0, c1, Q00, Q01, Q11``."""
    mu, kappa, alpha = theta[0], theta[1], theta[2]
    s1, s2, rho = theta[4], theta[5], theta[6]
    g = gaps.shape[0]
    f01 = np.empty(g)
    f11 = np.empty(g)
    c0 = np.empty(g)
    c1 = np.empty(g)
    q00 = np.empty(g)
    q01 = np.empty(g)
    q11 = np.empty(g)
    for i in range(g):
        h = gaps[i]
        bh, ib, ib2 = _basis(kappa, h)
        eh = 1.0 - kappa * bh
        f01[i] = -bh
        f11[i] = eh
        c0[i] = (mu - 0.5 * s1 * s1 - alpha) * h + alpha * bh
        c1[i] = alpha * kappa * bh
        q00[i] = s1 * s1 * h + s2 * s2 * ib2 - 2.0 * rho * s1 * s2 * ib
        q01[i] = rho * s1 * s2 * bh - 0.5 * s2 * s2 * bh * bh
        # s2^2 (1 - e^{-2 kappa h}) / (2 kappa) = s2^2 Bh (1 + eh) / 2
        q11[i] = 0.5 * s2 * s2 * bh * (1.0 + eh)
    return f01, f11, c0, c1, q00, q01, q11


@njit(cache=True, error_model="numpy")
def basis(kappa: float, tau: FloatArray) -> FloatArray:
    """``(3, k)``: ``B``, ``int B`` and ``int B^2`` at each of ``k`` distinct maturities.

    These carry the whole dependence of the measurement on ``kappa``; the other parameters
    enter ``A`` linearly through them. Maturities are whole days for calendar dates, so a
    panel of 15,000 prices has a few hundred distinct ones; a gradient pass computes the
    basis for three ``kappa`` values only.
    """
    k = tau.shape[0]
    out = np.empty((3, k))
    for i in range(k):
        b, ib, ib2 = _basis(kappa, tau[i])
        out[0, i] = b
        out[1, i] = ib
        out[2, i] = ib2
    return out


# --- the filter ------------------------------------------------------------------------------


@njit(cache=True, error_model="numpy")
def _run(
    theta: FloatArray,
    panel: Panel,
    bases: FloatArray,
    store: bool,
    a_filt: FloatArray,
    p_filt: FloatArray,
    a_pred: FloatArray,
    p_pred: FloatArray,
) -> float:
    """Log-likelihood ``log p(y_1..y_{n-1} | y_0)``; with ``store`` also the moments.

    ``panel`` is :data:`Panel`; ``bases`` is :func:`basis` of its ``tau`` at ``theta``'s
    ``kappa``. ``a_filt, p_filt`` (``(n, 2)``, ``(n, 3)`` as ``P00, P01, P11``) receive the
    filtered moments, ``a_pred, p_pred`` the one-step predictions (row 0: the day-0
    posterior). Returns ``-inf`` where the parameters make a variance non-positive.
    """
    r, gap_index, gaps, tau, tau_index, y = panel
    n, m = y.shape
    kappa, alpha, lam = theta[1], theta[2], theta[3]
    s1, s2, rho = theta[4], theta[5], theta[6]
    ah = alpha - lam / kappa
    # A(tau) = (r - ah) tau + ah B + s2^2/2 int B^2 - rho s1 s2 int B
    bb = bases[0]
    aa = (r - ah) * tau + ah * bb - rho * s1 * s2 * bases[1] + 0.5 * s2 * s2 * bases[2]
    f01, f11, c0, c1, q00, q01, q11 = _transitions(theta, gaps)
    # day 0: generalised least squares of the first curve on (1, -B)
    i00 = 0.0
    i01 = 0.0
    i11 = 0.0
    g0 = 0.0
    g1 = 0.0
    for j in range(m):
        yj = y[0, j]
        if not math.isnan(yj):
            w = 1.0 / (theta[N_MODEL + j] * theta[N_MODEL + j])
            bj = bb[tau_index[0, j]]
            e = yj - aa[tau_index[0, j]]
            i00 += w
            i01 -= w * bj
            i11 += w * bj * bj
            g0 += w * e
            g1 -= w * bj * e
    det = i00 * i11 - i01 * i01
    if not det > 1e-300:
        return -np.inf
    p00 = i11 / det
    p01 = -i01 / det
    p11 = i00 / det
    x0 = p00 * g0 + p01 * g1
    x1 = p01 * g0 + p11 * g1
    if store:
        a_pred[0, 0] = a_filt[0, 0] = x0
        a_pred[0, 1] = a_filt[0, 1] = x1
        p_pred[0, 0] = p_filt[0, 0] = p00
        p_pred[0, 1] = p_filt[0, 1] = p01
        p_pred[0, 2] = p_filt[0, 2] = p11
    n_used = 0
    quad = 0.0  # sum of v^2 / F
    logdet = 0.0  # sum of log F, one log per day of the day's product of F
    for t in range(1, n):
        k = gap_index[t - 1]
        # predict: a = c + Phi a, P = Phi P Phi' + Q with Phi = [[1, f01], [0, f11]]
        u0 = x0 + f01[k] * x1 + c0[k]
        u1 = f11[k] * x1 + c1[k]
        r00 = p00 + 2.0 * f01[k] * p01 + f01[k] * f01[k] * p11 + q00[k]
        r01 = f11[k] * (p01 + f01[k] * p11) + q01[k]
        r11 = f11[k] * f11[k] * p11 + q11[k]
        x0, x1, p00, p01, p11 = u0, u1, r00, r01, r11
        if store:
            a_pred[t, 0] = x0
            a_pred[t, 1] = x1
            p_pred[t, 0] = p00
            p_pred[t, 1] = p01
            p_pred[t, 2] = p11
        fprod = 1.0
        for j in range(m):
            yj = y[t, j]
            if math.isnan(yj):
                continue
            q = tau_index[t, j]
            bj = bb[q]
            xi = theta[N_MODEL + j]
            # z = (1, -b): v = y - A - z a, F = z P z' + xi^2, K = P z' / F
            v = yj - aa[q] - x0 + bj * x1
            pz0 = p00 - bj * p01
            pz1 = p01 - bj * p11
            f = pz0 - bj * pz1 + xi * xi
            if not f > 0.0:
                return -np.inf
            finv = 1.0 / f
            k0 = pz0 * finv
            k1 = pz1 * finv
            x0 += k0 * v
            x1 += k1 * v
            p00 -= k0 * pz0
            p01 -= k0 * pz1
            p11 -= k1 * pz1
            quad += v * v * finv
            fprod *= f
            n_used += 1
        logdet += math.log(fprod)
        if store:
            a_filt[t, 0] = x0
            a_filt[t, 1] = x1
            p_filt[t, 0] = p00
            p_filt[t, 1] = p01
            p_filt[t, 2] = p11
    return -0.5 * (n_used * _LOG_2PI + logdet + quad)


@njit(cache=True, error_model="numpy")
def _loglik_b(theta: FloatArray, panel: Panel, bases: FloatArray) -> float:
    e = np.empty((0, 3))
    return _run(theta, panel, bases, False, e, e, e, e)


@njit(cache=True, error_model="numpy")
def loglik(theta: FloatArray, panel: Panel) -> float:
    """Log-likelihood at natural parameters ``theta`` (``-inf`` outside the domain)."""
    return _loglik_b(theta, panel, basis(theta[1], panel[3]))


_LOG_SCALED = np.array([1, 4, 5])
"""``kappa, sigma_spot, sigma_yield``: positive, so their coordinates are logs (as every ``xi``)."""

_RHO = 6
"""``rho``: in ``(-1, 1)``, so its coordinate is ``atanh(rho)``; ``mu, alpha, lam`` are free."""


@njit(cache=True, inline="always")
def _positive(n: int) -> IntArray:
    """Positions of the positive parameters in a vector of ``n``: the model's and every ``xi``."""
    return np.concatenate((_LOG_SCALED, np.arange(N_MODEL, n)))


@njit(cache=True)
def to_natural(u: FloatArray) -> FloatArray:
    """Natural parameters from unconstrained ones.

    ``kappa, sigma_spot, sigma_yield, xi_j = exp(u)``, ``rho = tanh(u)``; ``mu, alpha, lam``
    unchanged.
    """
    theta = u.copy()
    pos = _positive(u.shape[0])
    theta[pos] = np.exp(u[pos])
    theta[_RHO] = math.tanh(u[_RHO])
    return theta


@njit(cache=True)
def to_unconstrained(theta: FloatArray) -> FloatArray:
    """Inverse of :func:`to_natural`."""
    u = theta.copy()
    pos = _positive(theta.shape[0])
    u[pos] = np.log(theta[pos])
    u[_RHO] = math.atanh(theta[_RHO])
    return u


@njit(cache=True)
def jacobian_diag(u: FloatArray) -> FloatArray:
    """``d theta_i / d u_i`` (the transform is elementwise)."""
    d = np.ones(u.shape[0])
    pos = _positive(u.shape[0])
    d[pos] = np.exp(u[pos])
    d[_RHO] = 1.0 - math.tanh(u[_RHO]) ** 2
    return d


@njit(cache=True)
def _steps(u: FloatArray, step: float) -> FloatArray:
    h = np.empty(u.shape[0])
    for i in range(u.shape[0]):
        h[i] = step * max(1.0, abs(u[i]))
    return h


@njit(cache=True, error_model="numpy")
def _loglik_u(w: FloatArray, k_index: int, bases: FloatArray, panel: Panel) -> float:
    """Log-likelihood at ``u = w`` whose ``log kappa`` is step ``k_index`` of ``bases``."""
    return _loglik_b(to_natural(w), panel, bases[k_index])


@njit(cache=True, error_model="numpy")
def _kappa_bases(u: FloatArray, h: FloatArray, tau: FloatArray) -> FloatArray:
    """Bases at ``log kappa = u_1``, ``u_1 + h_1``, ``u_1 - h_1``."""
    out = np.empty((3, 3, tau.shape[0]))
    out[0] = basis(math.exp(u[1]), tau)
    out[1] = basis(math.exp(u[1] + h[1]), tau)
    out[2] = basis(math.exp(u[1] - h[1]), tau)
    return out


@njit(cache=True, error_model="numpy")
def _axis_steps(
    u: FloatArray, h: FloatArray, bases: FloatArray, panel: Panel
) -> tuple[float, FloatArray, FloatArray]:
    """``f(u)`` and ``f(u +- h_i e_i)`` for every axis ``i``."""
    p = u.shape[0]
    f0 = _loglik_u(u, 0, bases, panel)
    fp = np.empty(p)
    fm = np.empty(p)
    w = u.copy()
    for i in range(p):
        w[i] = u[i] + h[i]
        fp[i] = _loglik_u(w, 1 if i == 1 else 0, bases, panel)
        w[i] = u[i] - h[i]
        fm[i] = _loglik_u(w, 2 if i == 1 else 0, bases, panel)
        w[i] = u[i]
    return f0, fp, fm


@njit(cache=True, error_model="numpy")
def loglik_grad_u(u: FloatArray, panel: Panel, step: float) -> tuple[float, FloatArray]:
    """Log-likelihood and its gradient in the unconstrained parameters ``u``.

    Central differences with step ``step * max(1, |u_i|)`` (``step ~ eps^(1/3)`` balances
    truncation ``O(h^2)`` against rounding ``O(eps / h)``), all in one compiled pass; the
    ``kappa``-dependent measurement basis is computed for the three ``kappa`` values only.
    """
    h = _steps(u, step)
    bases = _kappa_bases(u, h, panel[3])
    f0, fp, fm = _axis_steps(u, h, bases, panel)
    return f0, (fp - fm) / (2.0 * h)


@njit(cache=True, error_model="numpy")
def loglik_hess_u(u: FloatArray, panel: Panel, step: float) -> tuple[float, FloatArray, FloatArray]:
    """Log-likelihood, gradient and Hessian in ``u`` by central (second) differences.

    ``H_ii = (f(+h_i) - 2 f + f(-h_i)) / h_i^2`` and
    ``H_ij = (f(++) - f(+-) - f(-+) + f(--)) / (4 h_i h_j)``, steps ``step * max(1, |u_i|)``.
    """
    p = u.shape[0]
    h = _steps(u, step)
    bases = _kappa_bases(u, h, panel[3])
    f0, fp, fm = _axis_steps(u, h, bases, panel)
    w = u.copy()
    grad = (fp - fm) / (2.0 * h)
    hess = np.empty((p, p))
    for i in range(p):
        hess[i, i] = (fp[i] - 2.0 * f0 + fm[i]) / (h[i] * h[i])
        for j in range(i):
            s = 0.0
            for si in (1.0, -1.0):
                for sj in (1.0, -1.0):
                    w[i] = u[i] + si * h[i]
                    w[j] = u[j] + sj * h[j]
                    kk = 0
                    if i == 1:
                        kk = 1 if si > 0 else 2
                    elif j == 1:
                        kk = 1 if sj > 0 else 2
                    s += si * sj * _loglik_u(w, kk, bases, panel)
            w[i] = u[i]
            w[j] = u[j]
            hess[i, j] = hess[j, i] = s / (4.0 * h[i] * h[j])
    return f0, grad, hess


@njit(cache=True)
def filter_moments(
    theta: FloatArray, panel: Panel
) -> tuple[float, FloatArray, FloatArray, FloatArray, FloatArray]:
    """Log-likelihood, filtered means/covariances and one-step predictions (see :func:`_run`)."""
    n = panel[5].shape[0]
    a_f = np.empty((n, 2))
    p_f = np.empty((n, 3))
    a_p = np.empty((n, 2))
    p_p = np.empty((n, 3))
    ll = _run(theta, panel, basis(theta[1], panel[3]), True, a_f, p_f, a_p, p_p)
    return ll, a_f, p_f, a_p, p_p


@njit(cache=True)
def smooth_moments(
    theta: FloatArray,
    gap_index: IntArray,
    gaps: FloatArray,
    a_f: FloatArray,
    p_f: FloatArray,
    a_p: FloatArray,
    p_p: FloatArray,
) -> tuple[FloatArray, FloatArray]:
    """Rauch-Tung-Striebel smoother from the stored filter moments.

    ``a_{t|n} = a_{t|t} + J_t (a_{t+1|n} - a_{t+1|t})``,
    ``P_{t|n} = P_{t|t} + J_t (P_{t+1|n} - P_{t+1|t}) J_t'``,
    ``J_t = P_{t|t} Phi_t' P_{t+1|t}^{-1}``.
    """
    n = a_f.shape[0]
    f01, f11, _, _, _, _, _ = _transitions(theta, gaps)
    a_s = a_f.copy()
    p_s = p_f.copy()
    for t in range(n - 2, -1, -1):
        k = gap_index[t]
        # M = P_{t|t} Phi'
        m00 = p_f[t, 0] + p_f[t, 1] * f01[k]
        m01 = p_f[t, 1] * f11[k]
        m10 = p_f[t, 1] + p_f[t, 2] * f01[k]
        m11 = p_f[t, 2] * f11[k]
        det = p_p[t + 1, 0] * p_p[t + 1, 2] - p_p[t + 1, 1] * p_p[t + 1, 1]
        i00 = p_p[t + 1, 2] / det
        i01 = -p_p[t + 1, 1] / det
        i11 = p_p[t + 1, 0] / det
        j00 = m00 * i00 + m01 * i01
        j01 = m00 * i01 + m01 * i11
        j10 = m10 * i00 + m11 * i01
        j11 = m10 * i01 + m11 * i11
        d0 = a_s[t + 1, 0] - a_p[t + 1, 0]
        d1 = a_s[t + 1, 1] - a_p[t + 1, 1]
        a_s[t, 0] = a_f[t, 0] + j00 * d0 + j01 * d1
        a_s[t, 1] = a_f[t, 1] + j10 * d0 + j11 * d1
        e00 = p_s[t + 1, 0] - p_p[t + 1, 0]
        e01 = p_s[t + 1, 1] - p_p[t + 1, 1]
        e11 = p_s[t + 1, 2] - p_p[t + 1, 2]
        # J E J'
        g00 = j00 * e00 + j01 * e01
        g01 = j00 * e01 + j01 * e11
        g10 = j10 * e00 + j11 * e01
        g11 = j10 * e01 + j11 * e11
        p_s[t, 0] = p_f[t, 0] + g00 * j00 + g01 * j01
        p_s[t, 1] = p_f[t, 1] + g00 * j10 + g01 * j11
        p_s[t, 2] = p_f[t, 2] + g10 * j10 + g11 * j11
    return a_s, p_s
