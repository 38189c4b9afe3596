"""Score (Lagrange-multiplier) tests of fixed parameters of a model fitted
by weighted least squares, in the plain form and in the generalized form of
Satorra (1989) that stays chi-square distributed whatever the weight.

Setting.  A model ``σ(θ)`` is fitted to sample statistics ``s`` (thresholds,
correlations) with sampling covariance ``Γ`` by minimising

    T(θ) = (s − σ(θ))ᵀ W (s − σ(θ))

with a diagonal ``W`` (DWLS: ``W = diag(Γ)⁻¹``, so that ``T = N·F_DWLS`` is
on the chi-square scale).  A test concerns ``d`` parameters ``φ`` fixed in
the fitted model (a cross-loading, an equality constraint's copies in the
other groups).  At the restricted estimate, with ``e = s − σ̂``, ``Δ`` the
Jacobian of the free parameters, ``D`` that of the tested ones,
``H = ΔᵀWΔ``:

    h = DᵀWe                               (−½ ∂T/∂φ; ∂T/∂θ = 0 at the estimate)
    N = DᵀWD − DᵀWΔ H⁻¹ ΔᵀWD               (½ the Gauss–Newton information of φ net of θ)

Plain statistic.  Minimising the quadratic (Gauss–Newton) approximation of
``T`` over ``(θ, φ)`` lowers it by

    LM = hᵀ N⁻¹ h,    with the one-step change  φ̂ ≈ N⁻¹ h

(the expected parameter change; Saris, Satorra & Sörbom 1987).  With
``W = Γ⁻¹`` this is the usual score statistic, χ²_d under the model; with a
diagonal ``W`` it estimates the drop in the *unscaled* ``T`` but is
distributed as a weighted sum of χ²₁ variables, not as χ²_d (Satorra 1989).

Generalized statistic (Satorra 1989).  To first order ``h = Kε`` with ``ε``
the sampling error of ``s`` (covariance ``Γ``) and
``K = DᵀW(I − ΔH⁻¹ΔᵀW)``, so

    LM_G = hᵀ (KΓKᵀ)⁻¹ h  ~  χ²_d  under the model, for any ``W``.

``KΓKᵀ`` is assembled from small pieces, never from ``K`` itself: with
``U = H⁻¹ΔᵀWD``, ``B = DᵀWΓWΔ`` and ``M = ΔᵀWΓWΔ`` (the sandwich's middle),

    KΓKᵀ = DᵀWΓWD − BU − UᵀBᵀ + UᵀMU.

With ``W = Γ⁻¹`` both forms coincide (``KΓKᵀ = N``); their ratio is the
scaling factor of the plain statistic.  :func:`score_statistics` takes the
pieces, so a caller can compute them in whatever way the structure of its
``D`` makes cheap (:mod:`scalewright.hints_dwls` for the candidates of one
model, whose columns are sparse); :func:`dense_score_statistics` builds them
from dense Jacobians (the ordinal invariance search).

References
----------
Satorra, A. (1989). Alternative test criteria in covariance structure
analysis: a unified approach. Psychometrika 54, 131–151.
Saris, W. E., Satorra, A. & Sörbom, D. (1987). The detection and correction
of specification errors in structural equation models. Sociological
Methodology 17, 105–129.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

#: a test whose information net of the free parameters is below this share of
#: its own information is not identified next to them (its statistic is undefined)
NOT_IDENTIFIED = 1e-8

#: a test whose variance ``KΓKᵀ`` is below this share of the largest is undefined
NO_VARIANCE = 1e-12


@dataclass(frozen=True)
class ScoreStatistics:
    """Score tests of ``K`` sets of ``d`` fixed parameters each.

    ``statistic`` is the generalized statistic (χ²_d under the model),
    ``unscaled`` the plain one, ``change`` the one-step change of the tested
    parameters (``K × d``); all are NaN where ``defined`` is False.
    """

    statistic: np.ndarray
    unscaled: np.ndarray
    change: np.ndarray
    defined: np.ndarray


def score_statistics(h: np.ndarray, info: np.ndarray, cross: np.ndarray, h_inv: np.ndarray,
                     gamma_info: np.ndarray, gamma_cross: np.ndarray,
                     middle: np.ndarray) -> ScoreStatistics:
    """Plain and generalized score statistics from their pieces (module docstring).

    Parameters
    ----------
    h : ndarray, K × d
        ``DᵀWe`` of each test.
    info : ndarray, K × d × d
        ``DᵀWD``.
    cross : ndarray, K × d × q
        ``DᵀWΔ``.
    h_inv : ndarray, q × q
        ``(ΔᵀWΔ)⁻¹`` of the fitted model.
    gamma_info : ndarray, K × d × d
        ``DᵀWΓWD``.
    gamma_cross : ndarray, K × d × q
        ``DᵀWΓWΔ``.
    middle : ndarray, q × q
        ``ΔᵀWΓWΔ``.
    """
    u_t = cross @ h_inv                                             # Uᵀ, K × d × q
    net = info - u_t @ cross.transpose(0, 2, 1)
    ub = u_t @ gamma_cross.transpose(0, 2, 1)
    cov = gamma_info - ub - ub.transpose(0, 2, 1) + u_t @ middle @ u_t.transpose(0, 2, 1)
    net_diag = np.einsum("kii->ki", net)
    cov_diag = np.einsum("kii->ki", cov)
    largest = max(float(cov_diag.max()), 1e-300) if cov_diag.size else 1.0
    defined = (np.all(net_diag > NOT_IDENTIFIED * np.abs(np.einsum("kii->ki", info)), axis=1)
               & np.all(cov_diag > NO_VARIANCE * largest, axis=1))
    k, d = h.shape
    statistic, unscaled = np.full(k, np.nan), np.full(k, np.nan)
    change = np.full((k, d), np.nan)
    if defined.any():
        hk = h[defined][..., None]
        step = np.linalg.solve(net[defined], hk)[..., 0]
        change[defined] = step
        unscaled[defined] = np.einsum("ki,ki->k", h[defined], step)
        statistic[defined] = np.einsum("ki,ki->k", h[defined],
                                       np.linalg.solve(cov[defined], hk)[..., 0])
    return ScoreStatistics(statistic, unscaled, change, defined)


def dense_score_statistics(w: np.ndarray, e: np.ndarray, jac: np.ndarray, h_inv: np.ndarray,
                           tested: np.ndarray, gammas, d: int) -> ScoreStatistics:
    """:func:`score_statistics` from dense Jacobians.

    Parameters
    ----------
    w : ndarray, r
        The diagonal of ``W``.
    e : ndarray, r
        Residuals ``s − σ̂`` of the fitted model.
    jac : ndarray, r × q
        ``Δ``, the fitted model's Jacobian of its free parameters.
    h_inv : ndarray, q × q
        ``(ΔᵀWΔ)⁻¹``.
    tested : ndarray, r × (K·d)
        ``D``: the columns of test ``k`` are ``k·d … k·d + d − 1``.
    gammas : sequence of ndarray
        ``Γ`` as diagonal blocks (one per group), in the order of ``s``.
    d : int
        Parameters per test.
    """
    r, k = tested.shape[0], tested.shape[1] // d
    wd = w[:, None] * tested
    wj = w[:, None] * jac
    gwd, gwj = _block_product(gammas, wd), _block_product(gammas, wj)
    wd3, gwd3 = wd.reshape(r, k, d), gwd.reshape(r, k, d)
    q = jac.shape[1]
    return score_statistics(
        (wd.T @ e).reshape(k, d),
        np.einsum("rki,rkj->kij", wd3, tested.reshape(r, k, d)),
        (wd.T @ jac).reshape(k, d, q),
        h_inv,
        np.einsum("rki,rkj->kij", wd3, gwd3),
        (gwd.T @ wj).reshape(k, d, q),
        wj.T @ gwj)


def _block_product(gammas, x: np.ndarray) -> np.ndarray:
    """``Γx`` with ``Γ`` the block-diagonal matrix of ``gammas``."""
    out = np.empty_like(x)
    start = 0
    for gamma in gammas:
        stop = start + gamma.shape[0]
        out[start:stop] = gamma @ x[start:stop]
        start = stop
    return out
