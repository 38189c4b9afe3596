"""The traces of the Yuan–Bentler corrections from casewise scores.

With missing answers the saturated parameters are ``β = (vech Σ, μ)``
(``p* = p(p + 3)/2`` of them), ``A`` their observed information per case and
``B = GᵀG/N`` the mean outer product of their casewise scores (the rows of
the ``N × p*`` matrix ``G``), both at the model-implied moments;
``Δ = ∂β/∂θ`` and ``F = ΔᵀAΔ``.  Yuan & Bentler (2000) take
``U = A − AΔF⁻¹ΔᵀA`` and ``Γ = A⁻¹BA⁻¹``, so

    UΓ = (1 − AΔF⁻¹Δᵀ) B A⁻¹.

Neither ``U`` nor ``Γ`` is needed (the algebra below is ours).  Since
``tr((UΓ)ʲ) = tr(Nʲ)`` with ``N = BA⁻¹(1 − AΔF⁻¹Δᵀ) = Gᵀ(GA⁻¹ − ZF⁻¹Δᵀ)/N``
and ``Z = GΔ`` (``N × q``, the casewise scores of θ),

    tr(UΓ)     = [tr K₁ − tr(F⁻¹ZᵀZ)] / N,
    tr((UΓ)²)  = [‖K₁‖²_F − 2 tr(F⁻¹ ZᵀK₁Z) + tr((F⁻¹ZᵀZ)²)] / N²,
    K₁ = G A⁻¹ Gᵀ     (N × N, symmetric).

Only ``K₁`` involves ``A``.  Two exact routes, the cheaper taken:

* **kernel** (``N ≤ 1.4 p*``): ``K₁ = YᵀY`` with ``Y = L⁻¹Gᵀ`` from one
  Cholesky factor ``A = LLᵀ``: about ``p*³/3 + p*²N + N²p*`` flops instead
  of the ``p*³`` solve with ``p*`` right-hand sides of ``A⁻¹B``;
* **Gram** (more rows): ``H = GᵀG`` accumulated over chunks of cases, then
  ``tr K₁ = tr(A⁻¹H)``, ``‖K₁‖²_F = tr((A⁻¹H)²)`` and
  ``ZᵀK₁Z = ΔᵀH(A⁻¹H)Δ``: ``p*²N + 2p*³`` flops.

The observed information ``A`` need not be positive definite (it is not at
the independence baseline of real data); then an LU factorisation takes
the Cholesky factor's place (``K₁ = G·A⁻¹Gᵀ``).

In a multi-group model the groups are independent: ``A = ⊕ w_g A_g`` and
``B = ⊕ w_g B_g`` (``w_g = N_g/N``), so ``K₁`` is block diagonal, and its
trace, norm and ``ZᵀK₁Z`` are sums over groups (:class:`ScoreTraces` adds).

References
----------
Yuan, K.-H. & Bentler, P. M. (2000). Three likelihood-based methods for mean
and covariance structure analysis with nonnormal missing data. Sociological
Methodology 30, 165–200.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass

import numpy as np
from scipy import linalg
from scipy.linalg import blas

#: the kernel route is taken while ``N ≤ KERNEL_ROWS · p*`` (its ``N²p*``
#: against the Gram route's ``2p*³``, both beside the shared ``p*²N``)
KERNEL_ROWS = 1.4


@dataclass(frozen=True)
class ScoreTraces:
    """The parts of the corrections that involve ``A`` and the scores, for one
    group or summed over groups (module docstring): ``norm = tr K₁``,
    ``square = ‖K₁‖²_F``, ``cross = ZᵀK₁Z`` and ``meat = ZᵀZ`` (``q × q``)."""

    norm: float
    square: float
    cross: np.ndarray
    meat: np.ndarray

    def __add__(self, other: ScoreTraces) -> ScoreTraces:
        return ScoreTraces(self.norm + other.norm, self.square + other.square,
                           self.cross + other.cross, self.meat + other.meat)


def score_traces(a_beta: np.ndarray, chunks: Iterable[np.ndarray], n: int,
                 delta: np.ndarray) -> ScoreTraces:
    """:class:`ScoreTraces` of one group from its information ``a_beta``
    (``p* × p*``, weighted by the group's share of the cases in a
    multi-group model), the casewise scores of ``β`` in ``chunks`` of rows
    (``n`` rows in all) and ``delta = ∂β/∂θ`` (``p* × q``)."""
    if n <= KERNEL_ROWS * len(a_beta):
        return _kernel_route(a_beta, np.vstack(list(chunks)), delta)
    return _gram_route(a_beta, chunks, delta)


def _cholesky(a: np.ndarray) -> np.ndarray | None:
    """The lower Cholesky factor of ``a``, ``None`` when it is not positive definite."""
    try:
        return linalg.cholesky(a, lower=True, check_finite=False)
    except linalg.LinAlgError:
        return None


def _kernel_route(a: np.ndarray, g: np.ndarray, delta: np.ndarray) -> ScoreTraces:
    """``K₁ = GA⁻¹Gᵀ`` (``N × N``) by one factorisation of ``A``."""
    low = _cholesky(a)
    if low is not None:
        y = linalg.solve_triangular(low, g.T, lower=True, check_finite=False)   # L⁻¹Gᵀ
        kernel = blas.dsyrk(1.0, y, trans=1, lower=1)                           # YᵀY, lower half
        kernel += np.tril(kernel, -1).T
    else:
        kernel = g @ linalg.lu_solve(linalg.lu_factor(a, check_finite=False), g.T,
                                     check_finite=False)
        kernel = 0.5 * (kernel + kernel.T)
    z = g @ delta
    return ScoreTraces(float(np.trace(kernel)), float(np.sum(kernel * kernel)),
                       z.T @ kernel @ z, z.T @ z)


def _gram_route(a: np.ndarray, chunks: Iterable[np.ndarray], delta: np.ndarray) -> ScoreTraces:
    """``H = GᵀG`` over chunks of cases, then ``A⁻¹H`` by one factorisation."""
    gram = np.zeros((len(a), len(a)), order="F")
    for g in chunks:
        gram = blas.dsyrk(1.0, g, trans=1, beta=1.0, c=gram, overwrite_c=1)    # upper half
    gram = np.triu(gram) + np.triu(gram, 1).T
    low = _cholesky(a)
    solved = linalg.cho_solve((low, True), gram, check_finite=False) if low is not None else \
        linalg.lu_solve(linalg.lu_factor(a, check_finite=False), gram, check_finite=False)
    hd = gram @ delta
    return ScoreTraces(float(np.trace(solved)), float(np.sum(solved * solved.T)),
                       hd.T @ (solved @ delta), delta.T @ hd)


def corrected_traces(traces: ScoreTraces, first_order: np.ndarray, n: int
                     ) -> tuple[float, float]:
    """``tr(UΓ)`` and ``tr((UΓ)²)`` from the (summed) :class:`ScoreTraces`,
    ``first_order = F = ΔᵀAΔ`` and the number of cases ``n``."""
    f_inv = linalg.inv(first_order)
    fm = f_inv @ traces.meat
    trace = (traces.norm - float(np.trace(fm))) / n
    square = (traces.square - 2.0 * float(np.sum(f_inv * traces.cross))
              + float(np.sum(fm * fm.T))) / n ** 2
    return trace, square
