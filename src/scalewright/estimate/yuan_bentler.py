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

Only ``K₁`` involves ``A``, through one symmetric factorisation
``A = L S Lᵀ``: Cholesky (``S = 1``) where ``A`` is positive definite, else
Bunch–Kaufman (``S`` block diagonal with 1 × 1 and 2 × 2 blocks, ``L``
unit lower triangular after a symmetric permutation; Bunch & Kaufman 1977):
the observed information need not be positive definite, and is not at the
independence baseline of real data.  Two exact routes, the cheaper taken:

* **kernel** (``N ≤ 1.4 p*``): ``K₁ = YᵀS⁻¹Y`` with ``Y = L⁻¹Gᵀ``: about
  ``p*³/3 + p*²N + N²p*`` flops instead of the ``p*³`` solve of ``A⁻¹B``
  with ``p*`` right-hand sides;
* **Gram** (more rows): ``H = GᵀG`` accumulated over chunks of cases; with
  ``Ĥ = L⁻¹HL⁻ᵀ``, ``tr K₁ = tr(S⁻¹Ĥ)``, ``‖K₁‖²_F = tr((S⁻¹Ĥ)²)`` and
  ``ZᵀK₁Z = (L⁻¹HΔ)ᵀS⁻¹(L⁻¹HΔ)``: ``p*²N + 2p*³`` flops.

Where only the scaling factor is wanted (the baseline of the robust fit
indices), ``‖K₁‖²_F`` and ``ZᵀK₁Z`` are skipped: ``tr K₁ = Σ_i y_iᵀS⁻¹y_i``
needs no ``N × N`` product.

In a multi-group model the groups are independent: ``A = ⊕ w_g A_g`` and
``B = ⊕ w_g B_g`` (``w_g = N_g/N``), so ``K₁`` is block diagonal, and its
trace, norm and ``ZᵀK₁Z`` are sums over groups (:class:`ScoreTraces` adds).

References
----------
Yuan, K.-H. & Bentler, P. M. (2000). Three likelihood-based methods for mean
and covariance structure analysis with nonnormal missing data. Sociological
Methodology 30, 165–200.
Bunch, J. R. & Kaufman, L. (1977). Some stable methods for calculating
inertia and solving symmetric linear systems. Mathematics of Computation 31,
163–179.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass

import numpy as np
from scipy import linalg
from scipy.linalg import blas

from scalewright.estimate.spd_inverse import spd_inverse

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
                 delta: np.ndarray, *, variance: bool = True) -> ScoreTraces:
    """:class:`ScoreTraces` of one group from its information ``a_beta``
    (``p* × p*``, weighted by the group's share of the cases in a
    multi-group model), the casewise scores of ``β`` in ``chunks`` of rows
    (``n`` rows in all) and ``delta = ∂β/∂θ`` (``p* × q``).  Without
    ``variance`` only ``norm`` and ``meat`` are computed (``square`` is NaN,
    ``cross`` zero): all that ``tr(UΓ)`` needs."""
    factor = _Factor.of(a_beta)
    if n <= KERNEL_ROWS * len(a_beta):
        return _kernel_route(factor, np.vstack(list(chunks)), delta, variance)
    return _gram_route(factor, chunks, delta, variance)


@dataclass(frozen=True)
class _Factor:
    """``A = L S Lᵀ`` (module docstring): ``half(R) = L⁻¹R`` and ``middle(Y) = S⁻¹Y``."""

    low: np.ndarray                 # L, rows permuted to lower triangular
    perm: np.ndarray | None         # the row permutation (None: Cholesky)
    bands: np.ndarray | None        # S in banded storage (None: S = 1)

    @classmethod
    def of(cls, a: np.ndarray) -> _Factor:
        try:
            return cls(linalg.cholesky(a, lower=True, check_finite=False), None, None)
        except linalg.LinAlgError:
            pass
        low, s, perm = linalg.ldl(a, lower=True, check_finite=False)
        bands = np.zeros((3, len(a)))
        bands[0, 1:] = np.diagonal(s, 1)
        bands[1] = np.diagonal(s)
        bands[2, :-1] = np.diagonal(s, -1)
        return cls(low[perm], perm, bands)

    def half(self, r: np.ndarray) -> np.ndarray:
        rows = r if self.perm is None else r[self.perm]
        return linalg.solve_triangular(self.low, rows, lower=True,
                                       unit_diagonal=self.perm is not None, check_finite=False)

    def middle(self, y: np.ndarray) -> np.ndarray:
        if self.bands is None:
            return y
        return linalg.solve_banded((1, 1), self.bands, y, check_finite=False)


def _kernel_route(factor: _Factor, g: np.ndarray, delta: np.ndarray,
                  variance: bool) -> ScoreTraces:
    """``K₁ = YᵀS⁻¹Y`` (``N × N``) with ``Y = L⁻¹Gᵀ``."""
    y = factor.half(g.T)
    sy = factor.middle(y)
    z = g @ delta
    if not variance:
        return ScoreTraces(float(np.sum(y * sy)), float("nan"), np.zeros((len(z.T),) * 2),
                           z.T @ z)
    if factor.bands is None:
        kernel = blas.dsyrk(1.0, y, trans=1, lower=1)                          # YᵀY, lower half
        kernel += np.tril(kernel, -1).T
    else:
        kernel = y.T @ sy
        kernel = 0.5 * (kernel + kernel.T)
    return ScoreTraces(float(np.trace(kernel)), float(np.sum(kernel * kernel)),
                       z.T @ kernel @ z, z.T @ z)


def _gram_route(factor: _Factor, chunks: Iterable[np.ndarray], delta: np.ndarray,
                variance: bool) -> ScoreTraces:
    """``H = GᵀG`` over chunks of cases, then ``Ĥ = L⁻¹HL⁻ᵀ``."""
    size = len(delta)
    gram = np.zeros((size, size), order="F")
    for g in chunks:
        gram = blas.dsyrk(1.0, g, trans=1, beta=1.0, c=gram, overwrite_c=1)   # upper half
    gram = np.triu(gram) + np.triu(gram, 1).T
    half = factor.half(gram)                                                  # L⁻¹H
    solved = factor.middle(factor.half(half.T))                               # S⁻¹Ĥ
    meat = delta.T @ gram @ delta
    if not variance:
        return ScoreTraces(float(np.trace(solved)), float("nan"), np.zeros_like(meat), meat)
    hd = half @ delta                                                         # L⁻¹HΔ
    return ScoreTraces(float(np.trace(solved)), float(np.sum(solved * solved.T)),
                       hd.T @ factor.middle(hd), meat)


def corrected_traces(traces: ScoreTraces, first_order: np.ndarray, n: int
                     ) -> tuple[float, float]:
    """``tr(UΓ)`` and ``tr((UΓ)²)`` from the (summed) :class:`ScoreTraces`,
    ``first_order = F = ΔᵀAΔ`` and the number of cases ``n``."""
    f_inv = spd_inverse(first_order)
    fm = f_inv @ traces.meat
    trace = (traces.norm - float(np.trace(fm))) / n
    square = (traces.square - 2.0 * float(np.sum(f_inv * traces.cross))
              + float(np.sum(fm * fm.T))) / n ** 2
    return trace, square
