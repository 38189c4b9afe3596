"""Inverse of a symmetric positive definite matrix by LAPACK's Cholesky
factorisation ``A = LLᵀ`` and inversion (``potrf``, ``potri``), shared by the
likelihood (the implied covariance) and the standard errors (the
information matrix)."""

from __future__ import annotations

import numpy as np
from scipy.linalg import lapack


def cholesky_inverse(matrix: np.ndarray):
    """``(L, A⁻¹, log|A|)``, or None when ``A`` is not positive definite.
    ``potri`` fills the lower triangle only and leaves the upper as it found
    it, zero (``clean=True`` zeroes the factor's upper triangle), so adding
    the transpose mirrors it, and counts the diagonal twice."""
    chol, info = lapack.dpotrf(matrix, lower=True, clean=True)
    if info != 0:
        return None
    inv, info = lapack.dpotri(chol, lower=True)
    if info != 0:
        return None
    inv += inv.T
    inv.flat[::len(inv) + 1] *= 0.5
    return chol, inv, 2.0 * np.sum(np.log(np.diagonal(chol)))


def spd_inverse(matrix: np.ndarray) -> np.ndarray:
    """``A⁻¹`` of a symmetric matrix that should be positive definite (an
    implied covariance, an information matrix): by :func:`cholesky_inverse`,
    which also stays silent when ``A`` is badly scaled (items in units far
    apart), and by LU when ``A`` turns out not to be positive definite."""
    out = cholesky_inverse(matrix)
    return np.linalg.inv(matrix) if out is None else out[1]


def condition_bound(matrix: np.ndarray, inverse: np.ndarray) -> float:
    """A lower bound on ``λ_min/λ_max`` of a symmetric positive definite ``A``
    from ``A`` and ``A⁻¹``: a matrix norm bounds the spectral radius, so
    ``λ_max ≤ ‖A‖₁`` and ``1/λ_min ≤ ‖A⁻¹‖₁``, and the ratio is at least
    ``1/(‖A‖₁‖A⁻¹‖₁)`` (Horn & Johnson 2013, Matrix Analysis, 2nd ed., ch. 5).
    A bound above a threshold spares an eigendecomposition."""
    return 1.0 / (np.abs(matrix).sum(axis=0).max() * np.abs(inverse).sum(axis=0).max())
