"""The completely standardized solution and delta-method standard errors.

With ``Φ* = AΨAᵀ`` the covariance of all latent variables and ``Σ`` the
implied item covariance (Bollen 1989, pp. 123–125):

* standardized loading  ``λ*_ij = λ_ij √Φ*_jj / √Σ_ii``;
* latent correlation    ``Φ*_jk / √(Φ*_jj Φ*_kk)``;
* standardized path     ``β*_ij = β_ij √Φ*_jj / √Φ*_ii``;
* standardized residual variance ``θ_ii / Σ_ii`` and item ``R² = 1 − θ_ii/Σ_ii``;
* a residual covariance is reported as the residual *correlation*
  ``θ_ij / √(θ_ii θ_jj)``, the size a reader can judge.

Standard errors of any of these come from the delta method,
``Var g(θ̂) ≈ J acov Jᵀ`` with ``J`` the Jacobian of ``g`` by central
differences (Bollen 1989, p. 128; Sobel 1982).

References
----------
Bollen, K. A. (1989). Structural Equations with Latent Variables. Wiley.
Sobel, M. E. (1982). Asymptotic confidence intervals for indirect effects in
structural equation models. Sociological Methodology 13, 290–312.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np

from scalewright.layout import Matrices


@dataclass(frozen=True)
class Standardized:
    loadings: np.ndarray             # p × m
    latent_correlations: np.ndarray  # m × m
    paths: np.ndarray                # m × m
    residual_variances: np.ndarray   # p, θ_ii / Σ_ii
    residual_correlations: np.ndarray  # p × p, θ_ij / √(θ_ii θ_jj)
    r_squared: np.ndarray            # p


def standardize(mats: Matrices) -> Standardized:
    sigma = mats.implied_cov
    phi = mats.latent_cov
    sd_items = np.sqrt(np.diag(sigma))
    sd_latent = np.sqrt(np.clip(np.diag(phi), 0.0, None))
    with np.errstate(divide="ignore", invalid="ignore"):
        loadings = mats.loadings * sd_latent[None, :] / sd_items[:, None]
        latent_corr = phi / np.outer(sd_latent, sd_latent)
        paths = mats.paths * sd_latent[None, :] / sd_latent[:, None]
        theta_diag = np.diag(mats.residuals)
        root = np.sqrt(np.abs(theta_diag))
        resid_corr = mats.residuals / np.outer(root, root)
    residual_variances = theta_diag / np.diag(sigma)
    return Standardized(loadings, latent_corr, np.nan_to_num(paths), residual_variances,
                        resid_corr, 1.0 - residual_variances)


def delta_method_se(theta: np.ndarray, acov: np.ndarray | None,
                    function: Callable[[np.ndarray], np.ndarray],
                    depends_on: np.ndarray | None = None) -> np.ndarray:
    """Standard errors of ``function(θ̂)`` (a flat array) by the delta method.

    The Jacobian is taken by central differences, one evaluation pair per
    parameter; ``depends_on`` (parameter indices) names the only parameters
    the function can change: the Jacobian's other columns are zero, so they
    are neither evaluated nor summed."""
    value = np.asarray(function(theta), dtype=float)
    if acov is None:
        return np.full(value.shape, np.nan)
    columns = np.arange(theta.size) if depends_on is None else np.asarray(depends_on)
    steps = 1e-6 * (1.0 + np.abs(theta))
    jac = np.empty((value.size, columns.size))
    for j, k in enumerate(columns):
        h = steps[k]
        up, down = theta.copy(), theta.copy()
        up[k] += h
        down[k] -= h
        jac[:, j] = (np.asarray(function(up)) - np.asarray(function(down))).ravel() / (2 * h)
    var = np.einsum("ik,kl,il->i", jac, acov[np.ix_(columns, columns)], jac)
    return np.sqrt(np.clip(var, 0.0, None)).reshape(value.shape)
