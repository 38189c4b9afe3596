"""Modification hints of a model fitted by DWLS to polychoric (or mixed
polychoric, polyserial and Pearson) correlations: the score test, expected
parameter change and standardized EPC of every loading and residual
covariance the model fixes at zero — the candidates of
:mod:`scalewright.hints` — in the plain and the scaled form.

The fit (:mod:`scalewright.estimate.dwls`) minimises
``T(φ) = (r − ρ(φ))ᵀ W (r − ρ(φ))`` over the ``p*`` correlations with
``W = diag(Γ)⁻¹``, ``Γ`` the sampling covariance of ``r``, so ``T = N·F_DWLS``
is the unadjusted statistic.  The thresholds (and, for continuous items,
means and SDs) are saturated and no candidate moves them, so only the
correlations enter.  For one candidate ``c`` with column ``d_c = ∂ρ/∂c``,
at the fitted solution (``e = r − ρ̂``, ``Δ`` the Jacobian of the free
parameters, ``H = ΔᵀWΔ``),
:mod:`scalewright.estimate.generalized_score` gives

    h_c     = d_cᵀWe                                  (−½ ∂T/∂c)
    N_c     = d_cᵀWd_c − d_cᵀWΔ H⁻¹ ΔᵀWd_c
    MI_c    = h_c² / N_c                              (plain: ≈ the drop in T when c is freed)
    EPC_c   = h_c / N_c                               (one Gauss–Newton step)
    MI_G,c  = h_c² / (k_cᵀ Γ k_c),  k_c = W(d_c − Δ H⁻¹ ΔᵀWd_c)

In terms of the per-case function ``F = T/N`` with gradient
``g_c = −2 d_cᵀ(W/N)e`` this is ``MI_c = N g_c² / (4·N_c/N)``.  The plain
index is not χ²₁ under DWLS (``W ≠ Γ⁻¹``; it is a weighted sum of χ²₁
variables), so the index reported as ``mi`` — compared with χ²₁ and the
hint threshold — is the generalized score statistic ``MI_G`` of Satorra
(1989), χ²₁ under the model for any weight; it approximates the scaled
difference test of freeing the parameter.  The plain index comes alongside
as ``mi_unscaled``.  The standardized EPC is in the latent-response metric:
the latent responses have unit variance, so a loading's EPC times the
construct's SD is its standardized loading, and a residual covariance's EPC
over ``√(θ_ii θ_kk)`` is the residual correlation (Kaplan 1989;
:func:`scalewright.hints.standardizer`).

Speed.  A candidate's column is sparse: the loading ``Λ[i, j]`` moves only
the correlations of item ``i``, ``∂ρ_il = G_lj`` (``G = ΛAΨAᵀ``), and the
residual covariance ``Θ[i, k]`` only ``ρ_ik``.  Laid out as ``p × p``
(× ``q``) symmetric arrays with a zero diagonal, every piece of every
loading candidate is one product with ``G``: ``h = (Ẽ G)_ij`` with
``Ẽ = [w_il e_il]``, ``d_cᵀWd_c = (W̃ (G∘G))_ij``, ``ΔᵀWd_c`` and
``ΔᵀWΓWd_c`` from the ``p × p × q`` arrangements of ``WΔ`` and ``WΓWΔ``,
and ``d_cᵀWΓWd_c = G_jᵀ Γ̃_i G_j`` with ``Γ̃_i`` the block of ``WΓW`` among
the correlations of item ``i``.  The cost is ``O(p³m + p²mq)``; the
``p* × (number of candidates)`` Jacobian is never formed.

References
----------
Satorra, A. (1989). Alternative test criteria in covariance structure
analysis: a unified approach. Psychometrika 54, 131–151.
Sörbom, D. (1989). Model modification. Psychometrika 54, 371–384.
Saris, W. E., Satorra, A. & Sörbom, D. (1987). The detection and correction
of specification errors in structural equation models. Sociological
Methodology 17, 105–129.
Kaplan, D. (1989). Model modification in covariance structure analysis:
application of the expected parameter change statistic. Multivariate
Behavioral Research 24, 285–305.
"""

from __future__ import annotations

import numpy as np

from scalewright.blas import one_blas_thread
from scalewright.estimate.dwls import correlation_jacobian
from scalewright.estimate.generalized_score import score_statistics
from scalewright.estimate.result import Estimate, invert_information
from scalewright.hints import ScoreTests, open_cells, score_tests, standardizer
from scalewright.layout import LOADING, RESIDUAL_COV

METHOD_DWLS = "score tests under DWLS, scaled (generalized score test, Satorra 1989)"

STATISTIC_NOTE = (
    "The model was fitted by diagonally weighted least squares, under which the plain "
    "modification index is not chi-square distributed. The index shown (MI) is the "
    "generalized score statistic of Satorra (1989), chi-square with 1 df when the model holds; "
    "it approximates the scaled difference test of freeing the parameter. The plain index, "
    "which approximates the drop in the unadjusted DWLS statistic, is in the JSON file as "
    "mi_unscaled.")


def score_tests_for(estimate: Estimate) -> ScoreTests:
    """The score tests of the route ``estimate`` came from: under DWLS when it
    carries the correlations it was fitted to (:func:`dwls_score_tests`),
    under normal-theory ML otherwise (:func:`scalewright.hints.score_tests`)."""
    if estimate.dwls_data is not None:
        return dwls_score_tests(estimate)
    return score_tests(estimate)


def dwls_score_tests(estimate: Estimate) -> ScoreTests:
    """Scaled and plain modification indices, EPC and standardized EPC of every
    loading and residual covariance fixed at zero in a one-group DWLS fit.

    Parameters
    ----------
    estimate : Estimate
        From the ordinal or mixed route, with its ``dwls_data``; the
        residual variances are ``1 − communality``.

    Returns
    -------
    ScoreTests
        ``mi`` is the generalized score statistic, ``mi_unscaled`` the plain
        index (module docstring).

    Raises
    ------
    ValueError
        When the estimate carries no correlations or the weighted
        information ``ΔᵀWΔ`` is singular (the model is not identified).
    """
    data = estimate.dwls_data
    if data is None:
        raise ValueError("score tests under DWLS need the correlations the estimate was "
                         "fitted to")
    if estimate.acov is None:
        raise ValueError("the weighted information matrix is singular: the model is not "
                         "identified")
    with one_blas_thread():
        return _dwls_score_tests(estimate, data.r, data.gamma)


def _dwls_score_tests(estimate: Estimate, r: np.ndarray, gamma: np.ndarray) -> ScoreTests:
    layout = estimate.layout
    pattern = layout.patterns[0]
    mats = estimate.matrices()
    p = layout.p
    rows, cols = np.triu_indices(p, 1)
    w = 1.0 / np.diag(gamma)
    e = r - mats.implied_cov[rows, cols]
    delta = correlation_jacobian(layout, estimate.theta)
    w_delta = w[:, None] * delta
    h_inv, _ = invert_information(delta.T @ w_delta, 1)
    if h_inv is None:
        raise ValueError("the weighted information matrix is singular: the model is not "
                         "identified")
    gamma_w_delta = gamma @ w_delta
    middle = w_delta.T @ gamma_w_delta                       # ΔᵀWΓWΔ
    w_gamma_w_delta = w[:, None] * gamma_w_delta             # WΓWΔ

    def square(values):
        """``p × p (× …)`` symmetric arrangement of per-correlation values, zero diagonal."""
        out = np.zeros((p, p) + values.shape[1:])
        out[rows, cols] = values
        out[cols, rows] = values
        return out

    cand = open_cells(pattern)
    i_lam, j_lam, i_res, k_res = cand.lam_rows, cand.lam_cols, cand.res_rows, cand.res_cols
    big_g = mats.loadings @ mats.latent_cov                  # G = ΛAΨAᵀ, p × m
    pair = square(np.arange(rows.size)).astype(np.intp)      # index of ρ_il (diagonal: 0, masked)
    off = ~np.eye(p, dtype=bool)
    # Γ̃_i: the block of WΓW among item i's correlations, p × p × p (zero where l or l' is i)
    w_pair = np.where(off, w[pair], 0.0)
    blocks = gamma[pair[:, :, None], pair[:, None, :]] * w_pair[:, :, None] * w_pair[:, None, :]
    quad = np.einsum("ilj,lj->ij", blocks @ big_g, big_g)     # G_jᵀ Γ̃_i G_j

    res_pairs = pair[i_res, k_res]
    h = np.concatenate([(square(w * e) @ big_g)[i_lam, j_lam], w[res_pairs] * e[res_pairs]])
    info = np.concatenate([(square(w) @ big_g ** 2)[i_lam, j_lam], w[res_pairs]])
    cross = np.vstack([np.einsum("ilq,lj->ijq", square(w_delta), big_g)[i_lam, j_lam],
                       w_delta[res_pairs]])
    gamma_cross = np.vstack([np.einsum("ilq,lj->ijq", square(w_gamma_w_delta), big_g)[i_lam, j_lam],
                             w_gamma_w_delta[res_pairs]])
    gamma_info = np.concatenate([quad[i_lam, j_lam],
                                 w[res_pairs] ** 2 * gamma[res_pairs, res_pairs]])
    k = len(cand)
    tests = score_statistics(h[:, None], info[:, None, None], cross[:, None, :], h_inv,
                             gamma_info[:, None, None], gamma_cross[:, None, :], middle)
    ok = tests.defined
    epc = tests.change[ok, 0]
    kind = np.repeat([LOADING, RESIDUAL_COV], [len(i_lam), len(i_res)])
    row = cand.rows
    col = np.concatenate([j_lam, k_res])
    return ScoreTests(kind[ok], np.zeros(k, dtype=int)[ok], row[ok], col[ok],
                      tests.statistic[ok], epc, epc * standardizer(cand, mats)[ok],
                      int(np.count_nonzero(~ok)), mi_unscaled=tests.unscaled[ok],
                      method=METHOD_DWLS, note=STATISTIC_NOTE)
