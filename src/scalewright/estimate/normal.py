"""Normal-theory maximum likelihood for factor models.

The data enter as *blocks*: one per group for complete data, one per
missing-data pattern within a group for full-information ML.  A block holds
``n_b`` cases observed on the items ``o_b`` with sample mean ``x̄_b`` and
sample covariance ``S_b`` (divisor ``n_b``).  The log-likelihood is

    ℓ(θ) = −½ Σ_b n_b [p_b log 2π + log|Σ_b| + tr(Σ_b⁻¹ S_b) + (x̄_b − μ_b)ᵀ Σ_b⁻¹ (x̄_b − μ_b)],

with ``Σ_b, μ_b`` the rows and columns of ``Σ(θ), μ(θ)`` for ``o_b``; a model
without a mean structure has ``μ_b = x̄_b``.  The engine minimises
``f(θ) = −ℓ(θ)/N``.

With ``V = Σ_b⁻¹``, ``r = x̄_b − μ_b``, ``z = V r``, ``E = V(Σ_b − S_b)V`` and the
rank-two cell derivatives ``∂Σ/∂c = a bᵀ + b aᵀ`` of
:func:`scalewright.layout.cell_derivatives`:

    ∂f_b/∂c   = a_cᵀ E b_c − (zᵀa_c)(zᵀb_c) − (∂μ/∂c)ᵀ z
    I_b[c, d] = ½ tr(V ∂Σ/∂c V ∂Σ/∂d) + (∂μ/∂c)ᵀ V (∂μ/∂d)
              = (AᵀVA)∘(BᵀVB) + (AᵀVB)∘(AᵀVB)ᵀ + D_μᵀ V D_μ   (elementwise products)

so the information needs only ``p × c`` products.  Cells that share a
parameter are summed.  The asymptotic covariance of θ̂ is ``(N I)⁻¹``
(expected information; Lawley & Maxwell 1971, ch. 4).

References
----------
Jöreskog, K. G. (1969). A general approach to confirmatory maximum
likelihood factor analysis. Psychometrika 34, 183–202.
Lawley, D. N. & Maxwell, A. E. (1971). Factor Analysis as a Statistical
Method (2nd ed.). Butterworths.
Arbuckle, J. L. (1996) and Finkbeiner, C. (1979): full-information ML with
missing data as a sum over patterns.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property

import numpy as np
from scipy.linalg import lapack

from scalewright.blas import one_blas_thread
from scalewright.estimate import factor_inverse
from scalewright.estimate.cell_products import CellIndex, sandwich, trace_form
from scalewright.estimate.exact_hessian import CompleteTerms
from scalewright.estimate.fisher import OptimizerRecord, fisher_scoring
from scalewright.estimate.pattern_products import pair_form
from scalewright.estimate.spd_inverse import cholesky_inverse
from scalewright.layout import Layout, Matrices, Pattern, cell_factors

LOG_2PI = np.log(2.0 * np.pi)

#: patterns missing at most this share of the items take their inverses by
#: the Schur complement of ``Σ⁻¹`` (:func:`embedded_inverse`)
SCHUR_MAX_MISSING = 0.5
#: the Schur route is taken only when LAPACK's estimate of ``Σ``'s reciprocal
#: condition number is at least this (its rounding error grows with ``Σ``'s condition)
SCHUR_MIN_RCOND = 1e-5


@dataclass(frozen=True)
class Block:
    """Sample moments of the cases that share a group and a set of observed items."""

    group: int                     # index of the layout pattern
    observed: np.ndarray           # indices of the observed items
    n: int
    cov: np.ndarray                # divisor n
    mean: np.ndarray


def complete_data_blocks(values: np.ndarray, group_index: np.ndarray | None = None,
                         n_groups: int = 1) -> tuple[Block, ...]:
    """One block per group from a complete (no NaN) data matrix."""
    blocks = []
    for g in range(n_groups):
        x = values if group_index is None else values[group_index == g]
        mean = x.mean(axis=0)
        centred = x - mean
        cov = centred.T @ centred / len(x)
        blocks.append(Block(g, np.arange(values.shape[1]), len(x), cov, mean))
    return tuple(blocks)


@dataclass(frozen=True)
class CompleteRows:
    """The rows answering every item (``index``) and their moments (``moments``:
    mean and covariance with divisor n), computed once per check for the
    outlier screen, the item correlations, and the singular-covariance check
    and complete-data fit of a model on every item (``scalewright.api``)."""

    index: np.ndarray
    moments: Block


def complete_rows(values: np.ndarray) -> CompleteRows:
    """:class:`CompleteRows` of an n × p answer matrix (NaN = missing); NaN
    moments when fewer than two rows are complete."""
    index = np.flatnonzero(~np.isnan(values).any(axis=1))
    p = values.shape[1]
    if len(index) < 2:                     # no covariance to speak of (and no warnings)
        return CompleteRows(index, Block(0, np.arange(p), len(index), np.full((p, p), np.nan),
                                         np.full(p, np.nan)))
    x = values[index] if len(index) < len(values) else values
    return CompleteRows(index, complete_data_blocks(x)[0])


@dataclass(frozen=True)
class _GroupStack:
    """The blocks of one group as padded arrays, so that every pattern is
    handled at once: block ``k`` observes the items where ``observed[k]``."""

    observed: np.ndarray      # K × p bool
    weights: np.ndarray       # K, n_k / N
    covs: np.ndarray          # K × p × p, zero outside the observed items
    means: np.ndarray         # K × p, zero outside the observed items
    counts: np.ndarray        # K, n_k

    @cached_property
    def complete(self) -> bool:
        """One block that observes every item (complete data): the 2-D path applies."""
        return len(self.weights) == 1 and bool(self.observed.all())


def _stack(blocks, p: int, n_total: int) -> _GroupStack:
    k = len(blocks)
    observed = np.zeros((k, p), dtype=bool)
    covs = np.zeros((k, p, p))
    means = np.zeros((k, p))
    for i, block in enumerate(blocks):
        o = block.observed
        observed[i, o] = True
        covs[i][np.ix_(o, o)] = block.cov
        means[i, o] = block.mean
    counts = np.array([b.n for b in blocks], dtype=float)
    return _GroupStack(observed, counts / n_total, covs, means, counts)


@dataclass(frozen=True)
class NormalFit:
    """The normal-theory ML objective of one layout on some blocks.

    All blocks of a group are evaluated together: block ``k``'s implied
    covariance is embedded as ``M_k = D_k Σ D_k + (I − D_k)`` (``D_k`` the
    diagonal indicator of its observed items), whose inverse is
    ``Σ_oo⁻¹`` on the observed items and the identity elsewhere, and whose
    determinant is ``|Σ_oo|``.  One batched Cholesky factorisation then
    serves every missing-data pattern, or, for patterns missing few items,
    the Schur complement of ``Σ⁻¹`` (:func:`embedded_inverse`).

    The inverses of the last ``θ`` whose value was asked for are kept (the
    line search asks for the value at the point the next iteration then
    needs the gradient and information of), and so are the last gradient and
    information.  Callers must not modify the arrays they are given.
    """

    layout: Layout
    blocks: tuple[Block, ...]
    _last: dict = field(default_factory=dict, init=False, repr=False, compare=False)

    @property
    def n(self) -> int:
        return sum(b.n for b in self.blocks)

    @cached_property
    def _stacks(self) -> tuple[_GroupStack, ...]:
        n = self.n
        return tuple(_stack([b for b in self.blocks if b.group == g], self.layout.p, n)
                     for g in range(len(self.layout.patterns)))

    def value(self, theta: np.ndarray) -> float:
        """``f(θ) = −ℓ(θ)/N`` (``inf`` where an implied covariance is not positive definite)."""
        total = 0.0
        for stack, mats, parts in zip(self._stacks, self._all_matrices(theta),
                                      self._inverses(theta)):
            if parts is None:
                return np.inf
            v, logdet = parts
            total += _stack_value(stack, v, logdet, mats.implied_mean, self.layout.has_means)
        return total

    def _inverses(self, theta: np.ndarray) -> list:
        """Per group, ``(V, log|Σ|)`` of :func:`embedded_inverse` (None where
        not positive definite), computed once per ``θ`` (see the class docstring)."""
        key = theta.tobytes()
        if self._last.get("key") != key:
            parts = [_complete_inverse(pattern, mats) if stack.complete
                     else embedded_inverse(mats.implied_cov, stack.observed)
                     for stack, pattern, mats in zip(self._stacks, self.layout.patterns,
                                                     self._all_matrices(theta))]
            self._last.update(key=key, parts=parts)
        return self._last["parts"]

    def loglik(self, theta: np.ndarray) -> float:
        """The log-likelihood ℓ(θ), including the constants."""
        n_log2pi = sum(b.n * len(b.observed) for b in self.blocks) * LOG_2PI
        return -0.5 * n_log2pi - self.n * self.value(theta)

    def value_grad_info(self, theta: np.ndarray):
        """Objective, its gradient and the expected information (per case);
        the last result is kept, since the optimiser's last evaluation is at
        the point where the standard errors then need the information."""
        key = theta.tobytes()
        if self._last.get("vgi_key") != key:
            total, grad, info = self._value_grad_info(theta)
            grad.flags.writeable = info.flags.writeable = False    # shared with later callers
            self._last.update(vgi_key=key, vgi=(total, grad, info))
        return self._last["vgi"]

    def value_grad_hessian(self, theta: np.ndarray):
        """Objective, gradient and a function returning the exact Hessian (per
        case; :mod:`~scalewright.estimate.exact_hessian`), where every group
        has complete data and the model has no mean structure; None elsewhere.
        The Hessian costs about twice the gradient, so it is only computed
        when asked for (not at the point where the optimiser stops)."""
        if self.layout.has_means or not all(stack.complete for stack in self._stacks):
            return None
        q = self.layout.n_params
        grad = np.zeros(q)
        total = 0.0
        groups = []
        for stack, pattern, mats, parts in zip(self._stacks, self.layout.patterns,
                                               self._all_matrices(theta), self._inverses(theta)):
            if parts is None:
                return np.inf, grad, lambda: np.zeros((q, q))
            v, logdet = parts
            total += _stack_value(stack, v, logdet, mats.implied_mean, False)
            terms = CompleteTerms(pattern, mats, v[0], stack.covs[0])
            _add_cell_vector(grad, pattern, stack.weights[0] * terms.gradient)
            groups.append((stack.weights[0], pattern, terms))

        def hessian() -> np.ndarray:
            cells = []
            for weight, pattern, terms in groups:
                cell = terms.hessian()
                cell *= weight
                cells.append((pattern, cell))
            return _parameter_matrix(q, cells)

        return total, grad, hessian

    def _value_grad_info(self, theta: np.ndarray):
        q = self.layout.n_params
        grad = np.zeros(q)
        cells = []
        total = 0.0
        means = self.layout.has_means
        for stack, pattern, mats, parts in zip(self._stacks, self.layout.patterns,
                                               self._all_matrices(theta), self._inverses(theta)):
            if parts is None:
                return np.inf, grad, np.zeros((q, q))
            v, logdet = parts
            total += _stack_value(stack, v, logdet, mats.implied_mean, means)
            if stack.complete:
                cell_grad, cell_info = _complete_terms(stack, v[0], pattern, mats, means)
            else:
                cell_grad, cell_info = _pattern_terms(stack, v, pattern, mats, means)
            _add_cell_vector(grad, pattern, cell_grad)
            cells.append((pattern, cell_info))
        return total, grad, _parameter_matrix(q, cells)

    def _all_matrices(self, theta):
        """Every group's model matrices at ``θ``, kept for the last ``θ``."""
        key = theta.tobytes()
        if self._last.get("matrices_key") != key:
            self._last.update(matrices_key=key,
                              matrices=[pattern.matrices(theta) for pattern in self.layout.patterns])
        return self._last["matrices"]


def embedded_inverse(sigma: np.ndarray, observed: np.ndarray):
    """``V_k`` (``Σ_oo⁻¹`` embedded with zeros) and ``log|Σ_oo|`` for every
    missing-data pattern ``k`` (``observed``: K × p bool), or None when some
    ``Σ_oo`` is not positive definite.

    When ``Σ`` is positive definite, so is every principal submatrix, and a
    pattern missing the ``m`` items ``M`` (``O`` the others) takes its
    inverse from ``V = Σ⁻¹`` (one Cholesky factorisation) by the Schur
    complement (the inverse and the determinant of a partitioned matrix;
    e.g. Harville 1997, Matrix Algebra From a Statistician's Perspective):

        Σ_OO⁻¹ = V_OO − V_OM V_MM⁻¹ V_MO,    log|Σ_OO| = log|Σ| + log|V_MM|,

    ``O(p² m)`` per pattern instead of ``O(p³)``.  Its rounding error grows
    with the condition number of the whole ``Σ``, not of ``Σ_OO`` (nearly
    collinear missing items would spoil it), so patterns missing more than
    ``SCHUR_MAX_MISSING`` of the items, and every pattern when ``Σ`` is not
    positive definite or LAPACK's estimate of its reciprocal condition
    number (``dpocon``) is below ``SCHUR_MIN_RCOND``, take the batched
    ``p × p`` route of :func:`_embedded_cholesky_inverse`.
    """
    full = cholesky_inverse(sigma)
    if full is None:
        return _embedded_cholesky_inverse(sigma, observed)
    chol, v_full, logdet_full = full
    rcond, _ = lapack.dpocon(chol, np.linalg.norm(sigma, 1), uplo="L")
    if rcond < SCHUR_MIN_RCOND:
        return _embedded_cholesky_inverse(sigma, observed)
    k, p = observed.shape
    n_missing = p - observed.sum(axis=1)
    by_schur = n_missing <= SCHUR_MAX_MISSING * p
    v = np.empty((k, p, p))
    logdet = np.empty(k)
    for m in np.unique(n_missing[by_schur]):
        rows = np.flatnonzero(by_schur & (n_missing == m))
        v[rows], logdet[rows] = _schur_inverse(v_full, logdet_full, observed[rows])
    rest = np.flatnonzero(~by_schur)
    if rest.size:     # no principal submatrix of a well-conditioned positive definite Σ fails
        v[rest], logdet[rest] = _embedded_cholesky_inverse(sigma, observed[rest])
    return v, logdet


def _schur_inverse(v_full: np.ndarray, logdet_full: float, observed: np.ndarray):
    """:func:`embedded_inverse` of patterns that all miss the same number
    ``m`` of items, from ``V = Σ⁻¹`` and ``log|Σ|``: one batched ``m × m``
    Cholesky factorisation ``V_MM = LLᵀ``, and ``V − WᵀW`` with
    ``W = L⁻¹ V_M·`` restricted to the observed items."""
    k, p = observed.shape
    missing = np.nonzero(~observed)[1].reshape(k, -1)          # K × m, ascending per row
    v_mp = v_full[missing]                                     # K × m × p: rows V_M·
    chol = np.linalg.cholesky(np.take_along_axis(v_mp, missing[:, None, :], axis=2))
    w = np.linalg.solve(chol, v_mp)
    v = v_full - w.transpose(0, 2, 1) @ w
    v *= observed[:, :, None] & observed[:, None, :]
    logdet = logdet_full + 2.0 * np.sum(np.log(np.diagonal(chol, axis1=1, axis2=2)), axis=1)
    return v, logdet


def _embedded_cholesky_inverse(sigma: np.ndarray, observed: np.ndarray):
    """:func:`embedded_inverse` by one batched Cholesky factorisation of the
    embedded ``M_k = D_k Σ D_k + (I − D_k)`` (see :class:`NormalFit`), whose
    inverse is ``Σ_oo⁻¹`` on the observed items and whose determinant is
    ``|Σ_oo|``; ``O(p³)`` per pattern; None when some ``Σ_oo`` is not
    positive definite."""
    d = observed
    mask = d[:, :, None] & d[:, None, :]
    embedded = np.where(mask, sigma, 0.0)
    idx = np.arange(sigma.shape[0])
    embedded[:, idx, idx] += ~d
    try:
        chol = np.linalg.cholesky(embedded)
    except np.linalg.LinAlgError:
        return None
    logdet = 2.0 * np.sum(np.log(np.diagonal(chol, axis1=1, axis2=2)), axis=1)
    eye = np.broadcast_to(np.eye(sigma.shape[0]), embedded.shape)
    inv_chol = np.linalg.solve(chol, eye)
    v = inv_chol.transpose(0, 2, 1) @ inv_chol
    return v * mask, logdet


def _complete_inverse(pattern: Pattern, mats: Matrices):
    """``Σ⁻¹`` and ``log|Σ|`` shaped as :func:`embedded_inverse` returns them for
    one pattern that observes every item, without the batch machinery: through
    the factor structure where that is cheaper
    (:mod:`~scalewright.estimate.factor_inverse`), else by ``cholesky_inverse``;
    None when ``Σ`` is not positive definite."""
    if factor_inverse.applies(pattern.p, pattern.m, pattern.diagonal_residuals):
        parts = factor_inverse.inverse(mats)
        if parts is not None:
            inv, logdet = parts
            return inv[None], np.array([logdet])
    full = cholesky_inverse(mats.implied_cov)
    if full is None:
        return None
    _, inv, logdet = full
    return inv[None], np.array([logdet])


def _complete_terms(stack: _GroupStack, v: np.ndarray, pattern: Pattern, mats: Matrices,
                    means: bool) -> tuple[np.ndarray, np.ndarray]:
    """Cell gradient and information of one complete-data block, weighted by
    its share of the cases: the module docstring's formulas with ``K = 1``,
    from the products of :mod:`~scalewright.estimate.cell_products`."""
    f = cell_factors(pattern, mats)
    index = CellIndex.of(f)
    e = v - v @ stack.covs[0] @ v
    wvw = sandwich(f, v)
    cell_info, _ = trace_form(index, wvw)
    cell_grad = np.zeros(len(index.a))
    if means:
        z = v @ (stack.means[0] - mats.implied_mean)
        e -= np.outer(z, z)
        im, sm = index.mu, index.mu_scale
        cell_grad -= (f.w.T @ z)[im] * sm
        mu_info = wvw[im][:, im]
        mu_info *= sm
        mu_info *= sm[:, None]
        cell_info += mu_info
    wew = sandwich(f, e)
    cell_grad += wew[index.a, index.b] * index.s
    weight = stack.weights[0]
    cell_info *= weight
    return weight * cell_grad, cell_info


def _pattern_terms(stack: _GroupStack, v: np.ndarray, pattern: Pattern, mats: Matrices,
                   means: bool) -> tuple[np.ndarray, np.ndarray]:
    """Cell gradient and information of a group's missing-data patterns (the
    module docstring's sums over blocks).  The gradient is linear in ``E``,
    so the patterns' ``E_k`` are summed first; the information
    ``Σ_k w_k ½ tr(V_k ∂_cΣ V_k ∂_dΣ)`` is gathered from ``WᵀV_kW`` per
    pattern (:func:`~scalewright.estimate.pattern_products.pair_form`)."""
    f = cell_factors(pattern, mats)
    index = CellIndex.of(f)
    w = stack.weights
    e_total = np.tensordot(w, v - v @ stack.covs @ v, axes=1)
    wvw = sandwich(f, v)
    cell_info = pair_form(index, wvw, wvw, w)
    cell_grad = np.zeros(len(index.a))
    if means:
        resid = (stack.means - mats.implied_mean) * stack.observed
        z = np.einsum("kij,kj->ki", v, resid)
        e_total -= np.einsum("k,ki,kj->ij", w, z, z)
        im, sm = index.mu, index.mu_scale
        cell_grad -= (f.w.T @ (w @ z))[im] * sm
        mu_info = np.tensordot(w, wvw, axes=1)[im][:, im]
        mu_info *= sm
        mu_info *= sm[:, None]
        cell_info += mu_info
    cell_grad += sandwich(f, e_total)[index.a, index.b] * index.s
    return cell_grad, cell_info


def _parameter_matrix(q: int, cells: list) -> np.ndarray:
    """The parameter-by-parameter sum of the groups' cell-by-cell matrices
    (``cells``: pairs of a pattern and its matrix, which may be modified).
    One group whose cells are the parameters gives its own matrix, uncopied."""
    if len(cells) == 1 and _cells_are_all_parameters(*cells[0], q):
        return cells[0][1]
    total = np.zeros((q, q))
    for pattern, cell in cells:
        _add_cell_matrix(total, pattern, cell)
    return total


def _cells_are_all_parameters(pattern: Pattern, cell: np.ndarray, q: int) -> bool:
    """Whether the pattern's cells are the ``q`` parameters, one each, in order."""
    return pattern.cells_are_parameters and len(cell) == q


def _add_cell_vector(total: np.ndarray, pattern: Pattern, cell: np.ndarray) -> None:
    if _cells_are_all_parameters(pattern, cell, len(total)):
        total += cell
    else:
        np.add.at(total, pattern.cell_params, cell)


def _add_cell_matrix(total: np.ndarray, pattern: Pattern, cell: np.ndarray) -> None:
    if _cells_are_all_parameters(pattern, cell, len(total)):
        total += cell
    else:
        _add_block(total, pattern.cell_params, cell)


def _stack_value(stack: _GroupStack, v, logdet, mu, means: bool) -> float:
    """``Σ_k (n_k/N) · ½[log|Σ_k| + tr(Σ_k⁻¹ S_k) + r_kᵀ Σ_k⁻¹ r_k]``."""
    value = logdet + np.einsum("kij,kij->k", v, stack.covs)
    if means:
        resid = (stack.means - mu) * stack.observed
        value = value + np.einsum("ki,kij,kj->k", resid, v, resid)
    return 0.5 * float(stack.weights @ value)


def _add_block(info: np.ndarray, params: np.ndarray, cell_info: np.ndarray) -> None:
    """Add a cell-by-cell information matrix into the parameter-by-parameter one."""
    if len(np.unique(params)) == len(params):
        info[np.ix_(params, params)] += cell_info
        return
    q = info.shape[0]
    incidence = np.zeros((len(params), q))
    incidence[np.arange(len(params)), params] = 1.0
    info += incidence.T @ cell_info @ incidence


def fit_normal(layout: Layout, blocks: tuple[Block, ...], start: np.ndarray | None = None,
               grad_tol: float = 1e-8) -> tuple[np.ndarray, OptimizerRecord, NormalFit]:
    """Maximum-likelihood estimates of the layout's parameters (converged when
    the largest gradient element of ``f = −ℓ/N`` is below ``grad_tol``).

    At ``grad_tol = 1e-8`` a parameter with per-case information ``i`` is
    within about ``1e-8 / i`` of the optimum, which is ``1e-8 √(N/i)`` of its
    standard error ``1/√(N i)``: below 1e-5 of a standard error up to a
    million cases, and the log-likelihood, quadratic near the optimum, is
    exact to rounding.

    BLAS is pinned to one thread for the fit, whatever the caller's setting:
    its products are small, and two BLAS threads made the 100-item fit take
    32 ms instead of 8.5 on a 2-core machine (benchmarks/bench_engine.py,
    unpinned; :mod:`scalewright.blas`)."""
    objective = NormalFit(layout, blocks)
    theta0 = layout.start if start is None else start
    with one_blas_thread():
        theta, record = fisher_scoring(theta0, objective.value, objective.value_grad_info,
                                       grad_tol=grad_tol,
                                       value_grad_hessian=objective.value_grad_hessian,
                                       warm=start is not None)
    return theta, record, objective
