"""The measurement model as matrices, and which of their cells are free.

A model with ``p`` items and ``m`` latent variables is written in the usual
all-latent form

    η = B η + ζ,   x = ν + Λ η + ε,   Cov(ζ) = Ψ,   Cov(ε) = Θ,   E(ζ) = α,

so that with ``A = (I − B)⁻¹``

    Σ(θ) = Λ A Ψ Aᵀ Λᵀ + Θ,        μ(θ) = ν + Λ A α.

Correlated constructs use ``B = 0``; a higher-order factor is a latent
variable with a zero row in ``Λ`` and entries in ``B``; a bifactor general
factor is one more column of ``Λ`` with zero covariances to the specific
factors.  Several groups are several :class:`Pattern` objects that share one
parameter vector, so equality constraints across groups are just shared
indices.

Every free cell of every matrix is *one* derivative of Σ of rank two,
``∂Σ/∂cell = a bᵀ + b aᵀ`` (see :func:`cell_derivatives`).  The estimators use
this to build gradients and information matrices from a few ``p × c``
products, never from ``p × p × c`` arrays (Neudecker & Satorra 1991 give the
general derivative of the covariance structure that this specialises).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property

import numpy as np

#: kinds of latent variables
CONSTRUCT, HIGHER, GENERAL = "construct", "higher", "general"

#: kinds of free parameters, used in labels and reports
LOADING, PATH, FACTOR_COV, RESIDUAL_COV, INTERCEPT, LATENT_MEAN = (
    "loading", "higher_loading", "factor_covariance", "residual_covariance",
    "intercept", "latent_mean")


@dataclass(frozen=True)
class Cells:
    """Free cells of one matrix: row, column and the index of the parameter
    that fills it.  Several cells may share one parameter (equality)."""

    rows: np.ndarray
    cols: np.ndarray
    params: np.ndarray

    @classmethod
    def from_triples(cls, triples):
        t = np.asarray(triples, dtype=np.intp).reshape(-1, 3)
        return cls(t[:, 0].copy(), t[:, 1].copy(), t[:, 2].copy())

    def __len__(self):
        return len(self.params)


def _read_only(array: np.ndarray) -> np.ndarray:
    array.flags.writeable = False      # cached: shared by every caller
    return array


@dataclass(frozen=True)
class Matrices:
    """The model matrices at one parameter value (one group); the derived
    matrices are computed once and shared, read-only."""

    loadings: np.ndarray      # Λ, p × m
    paths: np.ndarray         # B, m × m; B[i, j] is the effect of latent j on latent i
    disturbances: np.ndarray  # Ψ, m × m
    residuals: np.ndarray     # Θ, p × p
    intercepts: np.ndarray    # ν, p
    latent_means: np.ndarray  # α, m

    @cached_property
    def total_effects(self) -> np.ndarray:
        """``A = (I − B)⁻¹`` (``I`` when there are no paths)."""
        m = self.paths.shape[0]
        a = np.linalg.inv(np.eye(m) - self.paths) if self.paths.any() else np.eye(m)
        return _read_only(a)

    @cached_property
    def latent_cov(self) -> np.ndarray:
        """Covariance of all latent variables, ``A Ψ Aᵀ``."""
        a = self.total_effects
        return _read_only(a @ self.disturbances @ a.T)

    @cached_property
    def implied_cov(self) -> np.ndarray:
        """``Σ = Λ A Ψ Aᵀ Λᵀ + Θ``."""
        lam = self.loadings
        return _read_only(lam @ self.latent_cov @ lam.T + self.residuals)

    @property
    def implied_mean(self) -> np.ndarray:
        """``μ = ν + Λ A α``."""
        return self.intercepts + self.loadings @ (self.total_effects @ self.latent_means)


@dataclass(frozen=True)
class Pattern:
    """Which cells of one group's matrices are fixed (and at what) and which
    are free (and which parameter fills them)."""

    fixed: Matrices
    loadings: Cells
    paths: Cells
    disturbances: Cells   # lower triangle, row >= col
    residuals: Cells      # lower triangle, row >= col
    intercepts: Cells     # cols unused (0)
    latent_means: Cells   # cols unused (0)

    @property
    def p(self) -> int:
        return self.fixed.loadings.shape[0]

    @property
    def m(self) -> int:
        return self.fixed.loadings.shape[1]

    @property
    def has_means(self) -> bool:
        return len(self.intercepts) > 0 or len(self.latent_means) > 0

    @cached_property
    def cell_columns(self) -> "CellColumns":
        """The free cells' columns in :class:`CellFactors` (they depend on the pattern alone)."""
        return _cell_columns(self)

    @cached_property
    def diagonal_residuals(self) -> bool:
        """Whether ``Θ`` is diagonal at every parameter value (no residual covariances)."""
        fixed = self.fixed.residuals
        return (bool(np.all(self.residuals.rows == self.residuals.cols))
                and np.count_nonzero(fixed) == np.count_nonzero(np.diagonal(fixed)))

    def matrices(self, theta: np.ndarray) -> Matrices:
        """Fill the free cells with ``theta``."""
        f = self.fixed
        lam = f.loadings.copy()
        lam[self.loadings.rows, self.loadings.cols] = theta[self.loadings.params]
        beta = f.paths.copy()
        beta[self.paths.rows, self.paths.cols] = theta[self.paths.params]
        psi = _symmetric_fill(f.disturbances, self.disturbances, theta)
        res = _symmetric_fill(f.residuals, self.residuals, theta)
        nu = f.intercepts.copy()
        nu[self.intercepts.rows] = theta[self.intercepts.params]
        alpha = f.latent_means.copy()
        alpha[self.latent_means.rows] = theta[self.latent_means.params]
        return Matrices(lam, beta, psi, res, nu, alpha)

    @cached_property
    def cell_params(self) -> np.ndarray:
        """Parameter index of every free cell, in the order used by
        :func:`cell_derivatives`."""
        params = np.concatenate([self.loadings.params, self.paths.params,
                                 self.disturbances.params, self.residuals.params,
                                 self.intercepts.params, self.latent_means.params])
        params.flags.writeable = False     # cached: shared by every caller
        return params

    @cached_property
    def cells_are_parameters(self) -> bool:
        """True when free cell ``k`` is parameter ``k`` (no parameter shared by
        two cells, none from another group), so cell-wise sums need no mapping."""
        params = self.cell_params
        return bool(np.array_equal(params, np.arange(len(params))))


def _symmetric_fill(fixed: np.ndarray, cells: Cells, theta: np.ndarray) -> np.ndarray:
    out = fixed.copy()
    values = theta[cells.params]
    out[cells.rows, cells.cols] = values
    out[cells.cols, cells.rows] = values
    return out


@dataclass(frozen=True)
class Param:
    """What one free parameter is, in the user's names."""

    kind: str        # one of LOADING, PATH, FACTOR_COV, RESIDUAL_COV, INTERCEPT, LATENT_MEAN
    a: str           # construct (loading), factor, item
    b: str           # item (loading), factor, item; equal to ``a`` for a variance
    group: str | None = None   # None when shared by all groups

    @property
    def is_variance(self) -> bool:
        return self.kind in (FACTOR_COV, RESIDUAL_COV) and self.a == self.b


@dataclass(frozen=True)
class Layout:
    """A whole model: one :class:`Pattern` per group, the parameter list and
    start values.  ``items`` and ``factors`` name the rows and columns."""

    name: str
    items: tuple[str, ...]
    factors: tuple[str, ...]
    kinds: tuple[str, ...]             # kind of each factor
    primary: dict                      # item -> construct it was listed under
    patterns: tuple[Pattern, ...]
    params: tuple[Param, ...]
    start: np.ndarray
    groups: tuple[str, ...] = ("all",)
    notes: tuple[str, ...] = field(default=())   # how the model is identified, in words

    @property
    def n_params(self) -> int:
        return len(self.params)

    @property
    def p(self) -> int:
        return len(self.items)

    @property
    def has_means(self) -> bool:
        return self.patterns[0].has_means

    def n_moments(self) -> int:
        """Sample moments the model is fitted to: ``p(p+1)/2`` per group, plus
        ``p`` means per group when the model has a mean structure."""
        per_group = self.p * (self.p + 1) // 2 + (self.p if self.has_means else 0)
        return per_group * len(self.patterns)

    def df(self) -> int:
        return self.n_moments() - self.n_params


def cell_derivatives(pattern: Pattern, mats: Matrices):
    """Rank-two factors of the derivative of Σ and μ with respect to each
    free cell.

    For every free cell ``c`` returns vectors ``a_c, b_c`` (columns of ``A``
    and ``B``, each ``p × c``) with ``∂Σ/∂c = a_c b_cᵀ + b_c a_cᵀ``, and the
    column ``∂μ/∂c`` of ``D_mu``.  With ``H = ΛA``, ``M = AΨAᵀ``,
    ``G = ΛM`` and ``κ = Aα`` (``e_i`` the i-th unit vector):

    ======================  ===========  ============  ==============
    cell                    a            b             ∂μ
    ======================  ===========  ============  ==============
    Λ[i, j]                 e_i          G[:, j]       e_i κ_j
    B[i, j]                 H[:, i]      G[:, j]       H[:, i] κ_j
    Ψ[i, j], i ≠ j          H[:, i]      H[:, j]       0
    Ψ[i, i]                 H[:, i]      H[:, i] / 2   0
    Θ[i, j], i ≠ j          e_i          e_j           0
    Θ[i, i]                 e_i          e_i / 2       0
    ν[i]                    0            0             e_i
    α[j]                    0            0             H[:, j]
    ======================  ===========  ============  ==============

    The B row follows from ``∂A/∂B[i, j] = A E_ij A``.

    References
    ----------
    Neudecker, H. & Satorra, A. (1991). Linear structural relations: gradient
    and Hessian of the fitting function. Statistics & Probability Letters 11,
    57–61.
    """
    f = cell_factors(pattern, mats)
    a = f.u[:, f.a_index]
    b = f.w[:, f.b_index] * f.b_scale
    if f.mu_index is None:
        return a, b, None
    return a, b, f.u[:, f.mu_index] * f.mu_scale


@dataclass(frozen=True)
class CellFactors:
    """:func:`cell_derivatives` as columns picked from two small matrices:
    ``a_c = U[:, a_index[c]]``, ``b_c = b_scale[c] · W[:, b_index[c]]`` and
    ``∂μ/∂c = mu_scale[c] · U[:, mu_index[c]]``, with ``U = [I | H | 0]`` and
    ``W = [I | G | H | 0]`` (``p × (p + m + 1)`` and ``p × (p + 2m + 1)``).

    Products such as ``AᵀVB`` are then ``(UᵀVW)[a_index][:, b_index]`` scaled:
    the costly matrix products shrink from one column per free cell to one
    per item or factor, and the rest is indexing."""

    u: np.ndarray
    w: np.ndarray
    a_index: np.ndarray
    b_index: np.ndarray
    b_scale: np.ndarray
    mu_index: np.ndarray | None   # None without a mean structure
    mu_scale: np.ndarray | None


def cell_factors(pattern: Pattern, mats: Matrices) -> CellFactors:
    """The factors of :func:`cell_derivatives` (see its table) in index form;
    the indices depend on the pattern alone (:attr:`Pattern.cell_columns`)."""
    p = pattern.p
    a_mat = mats.total_effects
    h = mats.loadings @ a_mat
    g = mats.loadings @ (a_mat @ mats.disturbances @ a_mat.T)
    eye = np.eye(p)
    u = np.hstack([eye, h, np.zeros((p, 1))])
    w = np.hstack([eye, g, h, np.zeros((p, 1))])
    cols = pattern.cell_columns
    if cols.mu_index is None:
        return CellFactors(u, w, cols.a_index, cols.b_index, cols.b_scale, None, None)
    kappa = a_mat @ mats.latent_means
    lam, pth = pattern.loadings, pattern.paths
    n_cov = len(pattern.disturbances) + len(pattern.residuals)
    n_means = len(pattern.intercepts) + len(pattern.latent_means)
    mu_scale = np.concatenate([kappa[lam.cols], kappa[pth.cols], np.zeros(n_cov), np.ones(n_means)])
    return CellFactors(u, w, cols.a_index, cols.b_index, cols.b_scale, cols.mu_index, mu_scale)


@dataclass(frozen=True)
class CellColumns:
    """Which columns of ``U`` and ``W`` each free cell takes (and ``b``'s scale),
    in :class:`CellFactors`' terms; ``mu_index`` is None without a mean structure."""

    a_index: np.ndarray
    b_index: np.ndarray
    b_scale: np.ndarray
    mu_index: np.ndarray | None


def _cell_columns(pattern: Pattern) -> CellColumns:
    """:class:`CellColumns` of a pattern, from :func:`cell_derivatives`' table."""
    p, m = pattern.p, pattern.m
    u_zero, w_zero = p + m, p + 2 * m
    lam, pth, psi, res = pattern.loadings, pattern.paths, pattern.disturbances, pattern.residuals
    n_means = len(pattern.intercepts) + len(pattern.latent_means)
    a_index = np.concatenate([lam.rows, p + pth.rows, p + psi.rows, res.rows,
                              np.full(n_means, u_zero)])
    b_index = np.concatenate([p + lam.cols, p + pth.cols, p + m + psi.cols, res.cols,
                              np.full(n_means, w_zero)])
    b_scale = np.concatenate([np.ones(len(lam) + len(pth)),
                              np.where(psi.rows == psi.cols, 0.5, 1.0),
                              np.where(res.rows == res.cols, 0.5, 1.0), np.zeros(n_means)])
    mu_index = None
    if pattern.has_means:
        mu_index = np.concatenate([lam.rows, p + pth.rows, np.full(len(psi) + len(res), u_zero),
                                   pattern.intercepts.rows, p + pattern.latent_means.rows])
    return CellColumns(*(None if a is None else _read_only(a)
                         for a in (a_index, b_index, b_scale, mu_index)))
