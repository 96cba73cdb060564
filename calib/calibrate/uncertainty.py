"""What the quotes identify: standard errors of the fitted volatilities at the optimum.

Notes
-----
Per bucket the fitted parameters are ``theta_k = (s1_k, s2_k, rho_k)``; with ``x = (P, Q, C)``
(``P = s1^2``, ``Q = s2^2``, ``C = rho s1 s2``) the total variances are ``V = A x``. The
Gauss-Newton information at the optimum is

``H = J' W J + H_anchor + H_smooth``, ``J = diag(de/dV) A dx/dtheta``,

with ``W`` the fit weights (with the Huber loss: zero for quotes beyond their threshold, where
the loss is linear), ``H_anchor`` the anchor's ``w m / K`` on each ``s2_k`` and ``H_smooth``
the smoothness penalty's ``s T' D' D T`` (``T = dx/dtheta``). Binding constraints (and the held
correlation) remove their directions: with ``Z`` a basis of the null space of their gradients
``N``, the covariance is ``sigma^2 Z (Z' H Z)^{-1} Z'`` with the residual variance
``sigma^2 = sum_i w_i e_i^2 / (n - p)`` (``p`` the free directions, the weights scaled as
inverse error variances: weighted least squares, e.g. Seber & Wild (1989), *Nonlinear
Regression*, ch. 2). A parameter is *not identified* when it loads on a direction in which
``Z' H Z`` is singular or near-singular (eigenvalue of its diagonally scaled form below
:data:`RCOND_MIN` times the largest): it is named with the reason, and its standard error is
``inf``; the other standard errors come from the remaining directions.

In forward mode each bucket's ``sigma_yield`` is *set by the quotes* when its variance is below
half of what the anchor alone would leave (``sigma^2 K / (w m)``), else it *follows the anchor*.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from calib.types import FloatArray

RCOND_MIN = 1e-10
"""Reciprocal condition number below which the information matrix counts as singular."""
_NAMES = ("sigma_spot", "sigma_yield", "rho")
_LOADING = 0.3  # share of the weakest direction that names a parameter as not identified


@dataclass(frozen=True, slots=True)
class Uncertainty:
    """Standard errors per bucket and what the quotes leave open."""

    std_errors: tuple[tuple[float, float, float], ...]
    """``(sigma_spot, sigma_yield, rho)`` per bucket (0 for a parameter held by a constraint)."""
    not_identified: tuple[str, ...]
    """Parameters the quotes do not identify (``name`` or ``name@k`` in forward mode)."""
    reason: str
    """Why (empty when every parameter is identified)."""
    yield_set_by: tuple[str, ...]
    """Per bucket: ``"quotes"``, ``"anchor"`` or ``"none"`` (not identified, no anchor)."""
    residual_variance: float


def _well_conditioned_inverse(S: FloatArray) -> FloatArray | None:
    """``S^{-1}`` by Cholesky when ``S`` (unit diagonal) is surely well conditioned, else ``None``.

    With a unit diagonal ``lambda_max(S) <= p`` and ``lambda_min(S) >= 1 / trace(S^{-1})``, so
    ``1 / (p trace(S^{-1}))`` bounds the reciprocal condition number from below; at or above
    :data:`RCOND_MIN` no eigen-decomposition is needed (the common case; a symmetric
    eigen-decomposition with vectors costs hundreds of times more here).
    """
    try:
        np.linalg.cholesky(S)  # positive definite, or a refusal
        S_inv = np.asarray(np.linalg.inv(S), dtype=np.float64)
    except np.linalg.LinAlgError:
        return None
    trace = float(np.trace(S_inv))
    if not (math.isfinite(trace) and S.shape[0] * trace * RCOND_MIN <= 1.0):
        return None
    return S_inv


def theta_jacobian(theta: FloatArray) -> FloatArray:
    """``dx/dtheta``: ``x = (P_1..K, Q_1..K, C_1..K)``; ``theta`` is ``(s1, s2, rho)`` per row."""
    K = theta.shape[0]
    s1, s2, rho = theta[:, 0], theta[:, 1], theta[:, 2]
    T = np.zeros((3 * K, 3 * K))
    for k in range(K):
        T[k, 3 * k] = 2.0 * s1[k]
        T[K + k, 3 * k + 1] = 2.0 * s2[k]
        T[2 * K + k, 3 * k : 3 * k + 3] = (rho[k] * s2[k], rho[k] * s1[k], s1[k] * s2[k])
    return T


def profile_curvature(J: FloatArray, weight: FloatArray, direction: FloatArray) -> float:
    """Curvature of ``sum_i w_i (J_i theta)^2`` along ``direction`` once the other parameters
    have adjusted: ``1 / (u' H^+ u)`` with ``H = J' W J``."""
    H = J.T @ (weight[:, None] * J)
    spread = float(direction @ np.linalg.pinv(H, rcond=RCOND_MIN, hermitian=True) @ direction)
    return 1.0 / spread if spread > 0.0 else math.inf


def standard_errors(
    *,
    J_V: FloatArray,
    A: FloatArray,
    theta: FloatArray,
    e: FloatArray,
    weight: FloatArray,
    inlier: FloatArray,
    anchor_curvature: float,
    smoothness: float,
    fixed: FloatArray,
    per_bucket: bool,
) -> Uncertainty:
    """Standard errors at the optimum (see the module notes).

    Parameters
    ----------
    J_V : ``de_i/dV_i`` at the optimum, shape ``(n,)``.
    A : ``dV/dx``, shape ``(n, 3K)``.
    theta : ``(K, 3)``: ``s1, s2, rho`` per bucket.
    e, weight, inlier : errors, fit weights and the Huber inlier mask (all ones for squares).
    anchor_curvature : ``w m / K`` (0 without an anchor).
    smoothness : the smoothness weight (forward mode).
    fixed : ``(m, 3K)`` gradients of the binding constraints in ``theta`` (bucket-major:
        ``theta.reshape(-1)``).
    per_bucket : forward mode (names carry ``@k``).
    """
    K = theta.shape[0]
    T = theta_jacobian(theta)
    J = (J_V[:, None] * A) @ T
    w = weight * inlier
    H = J.T @ (w[:, None] * J)
    prior = np.zeros(3 * K)
    prior[1::3] = anchor_curvature
    H = H + np.diag(prior)
    if K > 1 and smoothness > 0.0:
        D = np.kron(np.eye(3), np.diff(np.eye(K), axis=0))
        H = H + smoothness * (D @ T).T @ (D @ T)
    if fixed.size:
        _, sv, vt = np.linalg.svd(fixed)
        rank = int(np.sum(sv > 1e-12 * max(float(sv[0]), 1.0)))
        Z = vt[rank:].T
    else:
        Z = np.eye(3 * K)
    p = Z.shape[1]
    n = int(np.sum(w > 0.0))
    dof = n - p
    sigma2 = float(np.sum(w * e * e)) / dof if dof > 0 else math.nan
    names = [f"{nm}@{k}" if per_bucket else nm for k in range(K) for nm in _NAMES]
    M = Z.T @ H @ Z
    cov = np.full((3 * K, 3 * K), math.inf)
    S_inv: FloatArray | None = None
    unidentified: list[str] = []
    reason = ""
    if p == 0:
        cov = np.zeros((3 * K, 3 * K))
    else:
        d = np.sqrt(np.maximum(np.diag(M), 0.0))
        d = np.where(d > 0.0, d, 1.0)
        S = M / np.outer(d, d)
        S_inv = _well_conditioned_inverse(S)
        if S_inv is not None:
            cov = sigma2 * (Z @ (S_inv / np.outer(d, d)) @ Z.T)
    if p > 0 and S_inv is None:
        evals, evecs = np.linalg.eigh(S)
        top = max(float(evals[-1]), 1e-300)
        weak = evals < RCOND_MIN * top
        strong = evecs[:, ~weak] / d[:, None]  # back to the unscaled coordinates of M
        cov = sigma2 * (Z @ strong @ np.diag(1.0 / evals[~weak]) @ strong.T @ Z.T)
        if weak.any():
            loading = np.sqrt(np.sum((Z @ (evecs[:, weak] / d[:, None])) ** 2, axis=1))
            loading = loading / max(float(loading.max()), 1e-300)
            unidentified = [names[j] for j in np.flatnonzero(loading >= _LOADING)]
            reason = (
                f"the information matrix is singular or nearly so (reciprocal condition "
                f"{max(float(evals[0]), 0.0) / top:.2g}); more expiries or futures are needed"
            )
    if dof <= 0 and not reason:
        reason = f"{n} quote(s) for {p} free parameter(s): no residual to scale the errors"
    with np.errstate(invalid="ignore"):
        se = np.sqrt(np.maximum(np.diag(cov), 0.0))
    for name in unidentified:
        se[names.index(name)] = math.inf
    se = se.reshape(K, 3)
    std_errors = tuple((float(a), float(b), float(c)) for a, b, c in se)
    set_by = []
    for k in range(K):
        var = se[k, 1] ** 2
        if f"{_NAMES[1]}@{k}" in unidentified or (not per_bucket and _NAMES[1] in unidentified):
            set_by.append("anchor" if anchor_curvature > 0.0 else "none")
        elif (
            anchor_curvature > 0.0
            and math.isfinite(sigma2)
            and var >= 0.5 * sigma2 / anchor_curvature
        ):
            set_by.append("anchor")
        else:
            set_by.append("quotes")
    return Uncertainty(std_errors, tuple(unidentified), reason, tuple(set_by), sigma2)
