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

from dataclasses import dataclass

import numpy as np
from scipy import linalg

from scalewright.estimate.fisher import OptimizerRecord, fisher_scoring
from scalewright.layout import Layout, Matrices, cell_derivatives

LOG_2PI = np.log(2.0 * np.pi)


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
class NormalFit:
    """The normal-theory ML objective of one layout on some blocks."""

    layout: Layout
    blocks: tuple[Block, ...]

    @property
    def n(self) -> int:
        return sum(b.n for b in self.blocks)

    def value(self, theta: np.ndarray) -> float:
        """``f(θ) = −ℓ(θ)/N`` (``inf`` where an implied covariance is not positive definite)."""
        total = 0.0
        for g, mats in enumerate(self._all_matrices(theta)):
            sigma, mu = mats.implied_cov, mats.implied_mean
            for block in self._blocks_of(g):
                part = _block_value(block, sigma, mu, self.layout.has_means)
                if part is None:
                    return np.inf
                total += block.n * part
        return total / self.n

    def loglik(self, theta: np.ndarray) -> float:
        """The log-likelihood ℓ(θ), including the constants."""
        n_log2pi = sum(b.n * len(b.observed) for b in self.blocks) * LOG_2PI
        return -0.5 * n_log2pi - self.n * self.value(theta)

    def value_grad_info(self, theta: np.ndarray):
        """Objective, its gradient and the expected information (per case)."""
        q = self.layout.n_params
        grad = np.zeros(q)
        info = np.zeros((q, q))
        total = 0.0
        means = self.layout.has_means
        for g, (pattern, mats) in enumerate(zip(self.layout.patterns, self._all_matrices(theta))):
            sigma, mu = mats.implied_cov, mats.implied_mean
            a_all, b_all, dmu_all = cell_derivatives(pattern, mats)
            params = pattern.cell_params
            for block in self._blocks_of(g):
                o = block.observed
                s = sigma[np.ix_(o, o)]
                try:
                    chol = linalg.cho_factor(s, lower=True, check_finite=False)
                except linalg.LinAlgError:
                    return np.inf, grad, info
                v = linalg.cho_solve(chol, np.eye(len(o)), check_finite=False)
                w = block.n / self.n
                part = _block_value(block, sigma, mu, means, chol=chol, v=v)
                total += w * part
                a, b = a_all[o], b_all[o]
                e = v @ (s - block.cov) @ v
                cell_grad = np.einsum("ic,ic->c", a, e @ b)
                va, vb = v @ a, v @ b
                pa, qb, r = a.T @ va, b.T @ vb, a.T @ vb
                cell_info = pa * qb + r * r.T
                if means:
                    dmu = dmu_all[o]
                    resid = block.mean - mu[o]
                    vd = v @ dmu
                    z = v @ resid   # the mean residual also moves with Σ: −(zᵀa)(zᵀb)
                    cell_grad -= vd.T @ resid + (z @ a) * (z @ b)
                    cell_info += dmu.T @ vd
                np.add.at(grad, params, w * cell_grad)
                _add_block(info, params, w * cell_info)
        return total, grad, info

    def _all_matrices(self, theta):
        return [pattern.matrices(theta) for pattern in self.layout.patterns]

    def _blocks_of(self, g):
        return [b for b in self.blocks if b.group == g]


def _block_value(block: Block, sigma, mu, means: bool, chol=None, v=None):
    """``½[log|Σ_b| + tr(Σ_b⁻¹ S_b) + r ᵀΣ_b⁻¹ r]`` for one block, or None if Σ_b is not PD."""
    o = block.observed
    s = sigma[np.ix_(o, o)]
    if chol is None:
        try:
            chol = linalg.cho_factor(s, lower=True, check_finite=False)
        except linalg.LinAlgError:
            return None
        v = linalg.cho_solve(chol, np.eye(len(o)), check_finite=False)
    logdet = 2.0 * np.sum(np.log(np.diag(chol[0])))
    value = logdet + np.sum(v * block.cov)
    if means:
        r = block.mean - mu[o]
        value += r @ v @ r
    return 0.5 * value


def _add_block(info: np.ndarray, params: np.ndarray, cell_info: np.ndarray) -> None:
    """Add a cell-by-cell information matrix into the parameter-by-parameter one."""
    if len(np.unique(params)) == len(params):
        info[np.ix_(params, params)] += cell_info
        return
    q = info.shape[0]
    incidence = np.zeros((len(params), q))
    incidence[np.arange(len(params)), params] = 1.0
    info += incidence.T @ cell_info @ incidence


def fit_normal(layout: Layout, blocks: tuple[Block, ...], start: np.ndarray | None = None
               ) -> tuple[np.ndarray, OptimizerRecord, NormalFit]:
    """Maximum-likelihood estimates of the layout's parameters."""
    objective = NormalFit(layout, blocks)
    theta0 = layout.start if start is None else start
    theta, record = fisher_scoring(theta0, objective.value, objective.value_grad_info)
    return theta, record, objective
