"""Gradient and exact Hessian of the normal-theory ML objective for one
complete-data group without a mean structure, cell by cell.

With ``f = ½[log|Σ| + tr(SΣ⁻¹)]``, ``V = Σ⁻¹``, ``E = V(Σ − S)V`` and the
rank-two cell derivatives ``∂Σ/∂c = s_c(a_c b_cᵀ + b_c a_cᵀ)`` of
:func:`scalewright.layout.cell_derivatives`,

    ∂f/∂c       = ½ tr(E ∂_cΣ) = s_c a_cᵀ E b_c
    ∂²f/∂c∂d    = ½ tr(V ∂_cΣ V ∂_dΣ) − tr(V ∂_cΣ E ∂_dΣ) + ½ tr(E ∂²_cdΣ)

(differentiate ``∂f/∂c`` once more, using ``∂E/∂d = −V∂_dΣ V + V∂_dΣ VSV +
VSV∂_dΣ V``; Neudecker & Satorra 1991 give the general form).  The first
term is the expected information; the other two vanish when ``S = Σ`` and
are the part Fisher scoring leaves out, which is why it converges only
linearly when a model misfits.  The first two together are
``½ tr(K∂_cΣ K∂_dΣ) − ½ tr(E∂_cΣ E∂_dΣ)`` with ``K = VSV = V − E`` (expand
``V = K + E``), each a product form of
:mod:`~scalewright.estimate.cell_products`, and the last term is ``∂(s_c a_cᵀ E b_c)/∂d`` with ``E`` held fixed.  Only
loadings ``Λ``, paths ``B`` and disturbance covariances ``Ψ`` move the
columns (``a, b`` are columns of ``H = ΛA`` and ``G = ΛP``, ``A = (I − B)⁻¹``,
``P = AΨAᵀ``; residual cells have constant columns), through

    ∂H/∂Λ_kl = e_k A_l·          ∂G/∂Λ_kl = e_k P_l·
    ∂H/∂B_kl = H_·k A_l·         ∂G/∂B_kl = H_·k P_l· + G_·l (A_·k)ᵀ
    ∂H/∂Ψ_kl = 0                 ∂G/∂Ψ_kl = s(H_·k (A_·l)ᵀ + H_·l (A_·k)ᵀ)

which gives, for cells ``c = (i, j)`` and ``d = (k, l)``, the blocks

    Λ–Λ:  E_ik P_jl
    Λ–B:  (EH)_ik P_lj + (EG)_il A_jk
    Λ–Ψ:  s_d[(EH)_ik A_jl + (EH)_il A_jk]
    B–B:  A_li (HᵀEG)_kj + (HᵀEH)_ik P_lj + (HᵀEG)_il A_jk
    B–Ψ:  s_d[(HᵀEH)_ik A_jl + (HᵀEH)_il A_jk]

and zero for Ψ–Ψ and for every residual cell.

References
----------
Neudecker, H. & Satorra, A. (1991). Linear structural relations: gradient
and Hessian of the fitting function. Statistics & Probability Letters 11,
57–61.
"""

from __future__ import annotations

import numpy as np

from scalewright.estimate.cell_products import CellIndex, sandwich, trace_form
from scalewright.layout import Matrices, Pattern, cell_factors


class CompleteTerms:
    """Gradient and exact Hessian of ``f`` (per case, cell by cell) for one
    complete group without a mean structure (module docstring), at the
    model matrices ``mats`` with ``v = Σ⁻¹`` and sample covariance ``S``.

    With ``K = VSV = V − E`` the first two Hessian terms are ``J(K) − J(E)``,
    ``J(M) = ½ tr(M ∂_cΣ M ∂_dΣ)`` (expand ``V = K + E``), so two calls of
    :func:`~scalewright.estimate.cell_products.trace_form` give them."""

    def __init__(self, pattern: Pattern, mats: Matrices, v: np.ndarray, sample_cov: np.ndarray):
        self._pattern, self._mats = pattern, mats
        self._factors = cell_factors(pattern, mats)
        self._index = CellIndex.of(self._factors)
        self._k = v @ sample_cov @ v
        self._e = v - self._k
        self._wew = sandwich(self._factors, self._e)

    @property
    def gradient(self) -> np.ndarray:
        """``∂f/∂c = s_c a_cᵀ E b_c``."""
        index = self._index
        return self._wew[index.a, index.b] * index.s

    def hessian(self) -> np.ndarray:
        """``∂²f/∂c∂d``."""
        hess, _ = trace_form(self._index, sandwich(self._factors, self._k))
        hess -= trace_form(self._index, self._wew)[0]
        add_second_derivatives(hess, self._pattern, self._mats, self._e)
        return hess


def add_second_derivatives(hess: np.ndarray, pattern: Pattern, mats: Matrices,
                           e: np.ndarray) -> None:
    """Add ``½ tr(E ∂²Σ/∂c∂d)`` for a symmetric ``E``: the blocks of the module
    docstring, placed at the cells' positions (loadings, paths, disturbances
    come first, in that order, as in :func:`scalewright.layout.cell_factors`).
    The DWLS Hessian uses it too (:func:`scalewright.estimate.dwls.fit_dwls`)."""
    lam, pth, psi = pattern.loadings, pattern.paths, pattern.disturbances
    a_mat = mats.total_effects
    h = mats.loadings @ a_mat
    p_mat = a_mat @ mats.disturbances @ a_mat.T
    g = mats.loadings @ p_mat
    eh, eg = e @ h, e @ g
    heh, heg = h.T @ eh, h.T @ eg
    s_psi = np.where(psi.rows == psi.cols, 0.5, 1.0)
    n_lam, n_pth, n_psi = len(lam), len(pth), len(psi)
    lo_b, lo_p = n_lam, n_lam + n_pth
    hi_p = lo_p + n_psi

    li, lj = lam.rows, lam.cols
    pk, pl = psi.rows, psi.cols
    hess[:n_lam, :n_lam] += e[li][:, li] * p_mat[lj][:, lj]
    lam_psi = (eh[li][:, pk] * a_mat[lj][:, pl] + eh[li][:, pl] * a_mat[lj][:, pk]) * s_psi
    hess[:n_lam, lo_p:hi_p] += lam_psi
    hess[lo_p:hi_p, :n_lam] += lam_psi.T
    if n_pth == 0:
        return
    bi, bj = pth.rows, pth.cols
    lam_pth = eh[li][:, bi] * p_mat[lj][:, bj] + eg[li][:, bj] * a_mat[lj][:, bi]
    hess[:n_lam, lo_b:lo_p] += lam_pth
    hess[lo_b:lo_p, :n_lam] += lam_pth.T
    hess[lo_b:lo_p, lo_b:lo_p] += (a_mat[bj][:, bi].T * heg[bi][:, bj].T
                                   + heh[bi][:, bi] * p_mat[bj][:, bj]
                                   + heg[bi][:, bj] * a_mat[bj][:, bi])
    pth_psi = (heh[bi][:, pk] * a_mat[bj][:, pl] + heh[bi][:, pl] * a_mat[bj][:, pk]) * s_psi
    hess[lo_b:lo_p, lo_p:hi_p] += pth_psi
    hess[lo_p:hi_p, lo_b:lo_p] += pth_psi.T
