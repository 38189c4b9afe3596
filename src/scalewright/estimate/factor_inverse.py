"""Inverse and log-determinant of an implied covariance through its factor
structure, for many items and few factors.

With diagonal residual covariances ``Θ`` (all positive) and ``Ψ = RRᵀ`` the
Cholesky factor of the latent disturbances, the implied covariance is
``Σ = Θ + FFᵀ`` with ``F = ΛAR`` (``p × m``), and by the Woodbury identity
and the matrix determinant lemma (e.g. Harville 1997, Matrix Algebra From a
Statistician's Perspective, ch. 18)

    Σ⁻¹    = D − D F M⁻¹ Fᵀ D,     M = I + Fᵀ D F,     D = Θ⁻¹,
    log|Σ| = log|Θ| + log|M|,

written as ``Σ⁻¹ = D − YᵀY`` with ``Y = L⁻¹ Fᵀ D`` and ``M = LLᵀ``.  The
cost is ``O(p²m)`` instead of the ``O(p³)`` of a Cholesky factorisation and
inversion of ``Σ``: at 100 items and 10 constructs a third of the time, at
200 items an eighth (measured with one BLAS thread).  ``M ≥ I`` is always
well conditioned, and ``Σ`` is positive definite whenever ``Θ > 0``, so no
factorisation of ``Σ`` is needed to know it.

Each entry of ``Σ⁻¹`` is then a difference of terms as large as ``1/θ_i``,
whereas ``Σ⁻¹``'s own diagonal is at least ``1/Σ_ii``: the rounding error
grows as ``Σ_ii/θ_i``.  Items whose residual variance is below
:data:`MIN_UNIQUE_SHARE` of their implied variance (nearly a Heywood case)
send the matrix back to the Cholesky route, as do residual covariances,
a ``Ψ`` that is not positive definite, and small models, where the
Cholesky route is at least as fast.
"""

from __future__ import annotations

import numpy as np
from scipy.linalg import lapack

from scalewright.layout import Matrices

#: the Woodbury route needs every item's residual variance to be at least this share of
#: its implied variance, which bounds its rounding error near 1e3 machine epsilons
MIN_UNIQUE_SHARE = 1e-3
#: below this many items, or above one factor per this many items, a Cholesky
#: factorisation of ``Σ`` costs no more (measured on the benchmark sizes, benchmarks/)
MIN_ITEMS, ITEMS_PER_FACTOR = 40, 4


def applies(p: int, m: int, diagonal_residuals: bool) -> bool:
    """Whether :func:`inverse` can apply and should beat the Cholesky route."""
    return diagonal_residuals and p >= MIN_ITEMS and ITEMS_PER_FACTOR * m <= p


def inverse(mats: Matrices) -> tuple[np.ndarray, float] | None:
    """``(Σ⁻¹, log|Σ|)`` by the module docstring's formulas, for matrices whose
    residual covariance is diagonal; None where the route does not apply (a
    residual variance too small a share of its item's variance, or ``Ψ`` not
    positive definite), and the caller then factors ``Σ`` itself."""
    unique = np.diagonal(mats.residuals)
    root, info = lapack.dpotrf(mats.disturbances, lower=True, clean=True)
    if info != 0:
        return None
    f = mats.loadings @ (mats.total_effects @ root)
    if np.any(unique <= MIN_UNIQUE_SHARE * (unique + np.einsum("ij,ij->i", f, f))):
        return None
    d = 1.0 / unique
    root_d = np.sqrt(d)
    f *= root_d[:, None]                            # D^½ F
    inner = f.T @ f
    inner.flat[::len(inner) + 1] += 1.0             # M = I + FᵀDF
    chol, info = lapack.dpotrf(inner, lower=True, clean=True)
    y, info = lapack.dtrtrs(chol, f.T, lower=True)  # L⁻¹ FᵀD^½
    y *= root_d                                     # Y = L⁻¹ FᵀD
    inverse = -(y.T @ y)
    inverse.flat[::len(inverse) + 1] += d
    return inverse, float(np.sum(np.log(unique)) + 2.0 * np.sum(np.log(np.diagonal(chol))))
