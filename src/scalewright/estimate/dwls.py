"""Diagonally weighted least squares on polychoric correlations (the ordinal route).

Two-step estimation (Muthén 1984): the thresholds and polychoric
correlations ``r`` come first (:mod:`scalewright.estimate.polychoric`); the
thresholds are saturated (every item keeps its own, none is modelled), so
only the ``p* = p(p−1)/2`` correlations are fitted and

    df = p* − q,

with ``q`` the free parameters other than the residual variances.

Parametrisation.  The latent responses ``y*`` have unit variance (the
"delta" parametrisation): the residual variances are not free but fixed by
``Θ_ii = 1 − diag(ΛAΨAᵀΛᵀ)_ii`` so that ``diag Σ(θ) = 1``.  The model's
correlations ``ρ(θ)`` are the off-diagonal elements of ``Σ(θ)``, which do
not involve ``Θ_ii`` at all; the residual variances are computed after the
fit, with delta-method standard errors.  Residual *covariances* stay free.

Fit function (Muthén, du Toit & Spisic 1997)

    F(θ) = (r − ρ(θ))ᵀ W (r − ρ(θ)),   W = diag(Γ̂)⁻¹,

with ``Γ̂`` the asymptotic covariance of ``√N r``, so that
``Γ = Γ̂/N = OrdinalMoments.acov_corr`` is the sampling covariance of ``r``
itself and ``N W = diag(Γ)⁻¹`` (``OrdinalMoments.dwls_weights``).  The Jacobian
``Δ = ∂ρ/∂θ`` comes from the rank-two cell derivatives of
:func:`scalewright.layout.cell_derivatives`: the row of pair ``i < j`` is
``a_i b_j + b_i a_j``.  Minimisation is by Gauss–Newton (the scoring
matrix ``2ΔᵀWΔ``) with a backtracking line search, using
:func:`scalewright.estimate.fisher.fisher_scoring`, and Newton steps with
the exact Hessian ``2ΔᵀWΔ − 2Σ_k w_k e_k ∂²ρ_k`` once a full step has been
taken (:meth:`_DeltaModel.hessian`): Gauss–Newton alone converges only
linearly when the model misfits (6–9 iterations on the rival models of a
48-item study, 3–4 with Newton steps).

Robust standard errors (sandwich; Muthén 1984; Muthén, du Toit & Spisic
1997), with any constant multiple of ``W`` (it cancels):

    acov(θ̂) = H⁻¹ ΔᵀWΓWΔ H⁻¹,     H = ΔᵀWΔ.

Test statistics.  From here on ``W = diag(Γ)⁻¹`` (= N times the weight
above).  ``T = N F(θ̂) = eᵀ W e`` with ``e = r − ρ(θ̂)`` is
asymptotically ``Σ_k λ_k χ²₁`` with ``λ`` the non-zero eigenvalues of
``UΓ``, ``U = W − WΔH⁻¹ΔᵀW`` (Satorra & Bentler 1994; Muthén, du Toit &
Spisic 1997).  With ``t₁ = tr(UΓ)`` and ``t₂ = tr((UΓ)²)``:

* mean-scaled: ``T/c`` on df, ``c = t₁/df``;
* mean-and-variance adjusted (Satterthwaite form of Muthén, du Toit &
  Spisic 1997): ``T·d*/t₁`` on ``d* = t₁²/t₂`` degrees of freedom;
* scaled and shifted (Asparouhov & Muthén 2010, "simple second-order
  correction"): ``a·T + b`` on the model's df, ``a = √(df/t₂)``,
  ``b = df − a·t₁``.  It has the mean df and variance 2·df of a χ²_df
  and keeps the df an integer, so it is the statistic reported as
  ``chi_square`` and the one RMSEA, CFI and TLI are computed from.

Neither trace forms ``U`` (``p* × p*``).  With ``G = ΓWΔ`` (``p* × q``) and
``M = ΔᵀWG = ΔᵀWΓWΔ`` (the sandwich's middle):

    t₁ = Σ_k w_k Γ_kk − tr(H⁻¹M),
    t₂ = ‖W^½ΓW^½‖²_F − 2 tr(H⁻¹GᵀWG) + tr((H⁻¹M)²),

which cost ``O(p*² q)``.  ``Γ`` itself was formed once from the casewise
influence matrix by the polychoric module; going through the ``N × p*``
influence matrix instead would cost ``O(N p* q)``, more whenever ``N > p*``.  The baseline (independence)
model sets every correlation to zero: ``T_B = rᵀWr`` on ``p*`` df,
``t₁ = Σ w_k Γ_kk`` (= p*), ``t₂ = ‖W^½ΓW^½‖²_F``.

References
----------
Muthén, B. (1984). A general structural equation model with dichotomous,
ordered categorical, and continuous latent variable indicators.
Psychometrika 49, 115–132.
Muthén, B., du Toit, S. H. C. & Spisic, D. (1997). Robust inference using
weighted least squares and quadratic estimating equations in latent
variable modeling with categorical and continuous outcomes. Unpublished
technical report.
Satorra, A. & Bentler, P. M. (1994). Corrections to test statistics and
standard errors in covariance structure analysis. In von Eye & Clogg (eds.),
Latent Variables Analysis, 399–419. Sage.
Asparouhov, T. & Muthén, B. (2010). Simple second order chi-square
correction. Technical appendix.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np
from scipy import stats

from scalewright.estimate.exact_hessian import add_second_derivatives
from scalewright.estimate.fisher import OptimizerRecord, fisher_scoring
from scalewright.estimate.mixed import MixedMoments
from scalewright.estimate.polychoric import OrdinalMoments
from scalewright.estimate.result import invert_information
from scalewright.estimate.robust import RobustTest, incidence
from scalewright.layout import Layout, Pattern, cell_derivatives


@dataclass(frozen=True)
class DwlsTest(RobustTest):
    """The DWLS statistic ``T`` and its corrections (see the module docstring).

    Inherits the mean-scaled (``chi_square_scaled``, ``scaling_factor``) and
    Satterthwaite-adjusted (``chi_square_adjusted`` on ``df_adjusted``)
    versions and adds the scaled-and-shifted statistic of Asparouhov &
    Muthén (2010).
    """

    @property
    def shift_scale(self) -> float:
        """``a = √(df / t₂)``."""
        return float(np.sqrt(self.df / self.trace_squared)) if self.df > 0 else float("nan")

    @property
    def shift(self) -> float:
        """``b = df − a·t₁``."""
        return self.df - self.shift_scale * self.trace if self.df > 0 else float("nan")

    @property
    def chi_square_shifted(self) -> float:
        """``a·T + b`` on ``df`` degrees of freedom."""
        return self.shift_scale * self.chi_square + self.shift if self.df > 0 else float("nan")

    @property
    def p_value_shifted(self) -> float:
        if self.df <= 0:
            return float("nan")
        return float(stats.chi2.sf(self.chi_square_shifted, self.df))


@dataclass(frozen=True)
class DwlsFit:
    """A DWLS fit of one layout to polychoric correlations.

    Attributes
    ----------
    layout : Layout
    theta : ndarray
        All parameters of the layout; the residual variances are
        ``1 − communality`` (delta parametrisation).
    acov : ndarray or None
        Sandwich covariance of ``theta`` (residual variances by the delta
        method); ``None`` when ``ΔᵀWΔ`` is singular.
    record : OptimizerRecord
    n : int
        Rows the correlations came from.
    test, baseline : DwlsTest
        The model's and the independence model's statistics.
    residuals : ndarray, shape (p*,)
        ``r − ρ(θ̂)`` in ``np.triu_indices(p, 1)`` order.
    estimated : ndarray of bool
        Which parameters were estimated (False for the residual variances).
    unidentified : tuple of int
        Parameters spanning the null space of ``ΔᵀWΔ`` (empty if none).
    """

    layout: Layout
    theta: np.ndarray
    acov: np.ndarray | None
    record: OptimizerRecord
    n: int
    test: DwlsTest
    baseline: DwlsTest
    residuals: np.ndarray
    estimated: np.ndarray
    unidentified: tuple[int, ...]

    @property
    def srmr(self) -> float:
        """Root mean square of the correlation residuals over the ``p*``
        modelled correlations (the diagonal is 1 in both matrices and is
        left out)."""
        return float(np.sqrt(np.mean(self.residuals ** 2))) if self.residuals.size else 0.0


@dataclass(frozen=True)
class DwlsModel:
    """A DWLS fit with the moments it was fitted to (ordinal or mixed), kept
    for the difference test of nested fits
    (:func:`scalewright.dwls_difference.nested_dwls_test`).  The casewise
    influence matrix (N × r) is dropped: the test needs only the
    correlations and their sampling covariance."""

    fit: DwlsFit
    moments: OrdinalMoments | MixedMoments

    @classmethod
    def of(cls, fit: DwlsFit, moments: OrdinalMoments | MixedMoments) -> DwlsModel:
        return cls(fit, replace(moments, influence=moments.influence[:0]))


class _DeltaModel:
    """ρ(θ) and its Jacobian for the free parameters other than residual variances."""

    def __init__(self, layout: Layout):
        if len(layout.patterns) != 1 or layout.has_means:
            raise ValueError("DWLS on polychoric correlations takes a one-group layout "
                             "without a mean structure")
        pattern: Pattern = layout.patterns[0]
        res = pattern.residuals
        diagonal = res.rows == res.cols
        var_params = res.params[diagonal]
        var_items = res.rows[diagonal]
        if np.unique(var_items).size != layout.p or np.unique(var_params).size != layout.p or \
                np.isin(var_params, np.delete(pattern.cell_params,
                                              _positions_of_diagonal(pattern))).any():
            raise ValueError("the delta parametrisation needs one free residual variance per "
                             "item, used by no other cell")
        self.layout = layout
        self.pattern = pattern
        self.var_params = var_params
        self.var_items = var_items
        mask = np.ones(layout.n_params, dtype=bool)
        mask[var_params] = False
        self.estimated = mask
        self.free = np.flatnonzero(mask)
        self.inc = incidence(pattern, layout.n_params)
        self.rows, self.cols = np.triu_indices(layout.p, 1)

    def full(self, phi: np.ndarray) -> np.ndarray:
        """The whole parameter vector with ``Θ_ii = 1 − communality_i``."""
        theta = np.zeros(self.layout.n_params)
        theta[self.free] = phi
        common = np.diag(self.pattern.matrices(theta).implied_cov)
        theta[self.var_params] = 1.0 - common[self.var_items]
        return theta

    def rho(self, phi: np.ndarray) -> np.ndarray:
        theta = np.zeros(self.layout.n_params)
        theta[self.free] = phi
        return self.pattern.matrices(theta).implied_cov[self.rows, self.cols]

    def hessian(self, theta: np.ndarray, e: np.ndarray, w: np.ndarray, delta: np.ndarray,
                wd: np.ndarray) -> np.ndarray:
        """The exact Hessian of ``F = eᵀ diag(w) e``, ``e = r − ρ``, in the
        free parameters:

            ∂²F/∂φ∂φᵀ = 2ΔᵀWΔ − 2 Σ_k w_k e_k ∂²ρ_k/∂φ∂φᵀ,

        where the sum is ``½ tr(E ∂²Σ)`` with ``E_ij = E_ji = w_k e_k`` for the
        pair ``k = (i, j)`` (ρ is the off-diagonal of Σ; the diagonal of
        ``E`` is zero), the second-derivative term of
        :mod:`scalewright.estimate.exact_hessian`.  ``wd`` is ``WΔ``.
        Gauss–Newton keeps only the first term, so it converges linearly
        when the model misfits; the module docstring of
        :mod:`scalewright.estimate.fisher` says when Newton steps are taken."""
        weighted = np.zeros((self.layout.p, self.layout.p))
        weighted[self.rows, self.cols] = w * e
        weighted += weighted.T
        cells = len(self.pattern.cell_params)
        second = np.zeros((cells, cells))
        add_second_derivatives(second, self.pattern, self.pattern.matrices(theta), weighted)
        inc = self.inc[:, self.free]
        return 2.0 * (delta.T @ wd) - 2.0 * (inc.T @ second @ inc)

    def jacobians(self, theta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """``Δ = ∂ρ/∂φ`` (p* × q) and ``∂diag Σ/∂φ`` (p × q) at the full ``theta``."""
        a, b, _ = cell_derivatives(self.pattern, self.pattern.matrices(theta))
        inc = self.inc[:, self.free]
        r, c = self.rows, self.cols
        delta = (a[r] * b[c] + b[r] * a[c]) @ inc
        diag = (2.0 * a * b) @ inc
        return delta, diag


def _positions_of_diagonal(pattern: Pattern) -> np.ndarray:
    """Positions, in ``pattern.cell_params`` order, of the residual-variance cells."""
    offset = len(pattern.loadings) + len(pattern.paths) + len(pattern.disturbances)
    res = pattern.residuals
    return offset + np.flatnonzero(res.rows == res.cols)


def fit_dwls(layout: Layout, moments: OrdinalMoments, correlations: np.ndarray | None = None,
             *, max_iter: int = 500) -> DwlsFit:
    """Fit ``layout`` to polychoric correlations by DWLS.

    Parameters
    ----------
    layout : Layout
        One group, no mean structure, items in ``moments.items`` order,
        every item with a free residual variance (it is replaced by
        ``1 − communality``).
    moments : OrdinalMoments or MixedMoments
        Thresholds, correlations and their sampling covariance (only
        ``items``, ``raw_correlations``, ``acov_corr`` and ``n_rows`` are
        read, so the mixed matrix of :mod:`scalewright.estimate.mixed` fits
        the same way).
    correlations : ndarray, optional
        The ``p × p`` matrix to fit; ``moments.raw_correlations`` (the
        pairwise estimates, to which the sampling covariance belongs) by
        default.  DWLS never inverts it, so it need not be positive definite.
    max_iter : int
        Gauss–Newton iterations at most.

    Returns
    -------
    DwlsFit

    References
    ----------
    Muthén (1984); Muthén, du Toit & Spisic (1997); Asparouhov & Muthén
    (2010) — see the module docstring.
    """
    if tuple(layout.items) != tuple(moments.items):
        raise ValueError("the layout's items and the moments' items differ")
    model = _DeltaModel(layout)
    corr = moments.raw_correlations if correlations is None else correlations
    r = corr[model.rows, model.cols]
    gamma = moments.acov_corr
    w = 1.0 / np.diag(gamma)
    n = moments.n_rows
    w_opt = w / n      # F on the scale of one case, like the ML objective

    def value(phi):
        e = r - model.rho(phi)
        return float(e @ (w_opt * e))

    def at(phi):
        """θ, the residuals e, Δ and WΔ at φ."""
        theta = model.full(phi)
        delta, _ = model.jacobians(theta)
        return theta, r - model.rho(phi), delta, w_opt[:, None] * delta

    def value_grad_info(phi):
        _, e, delta, wd = at(phi)
        return float(e @ (w_opt * e)), -2.0 * (wd.T @ e), 2.0 * (delta.T @ wd)

    def value_grad_hessian(phi):
        theta, e, delta, wd = at(phi)
        return (float(e @ (w_opt * e)), -2.0 * (wd.T @ e),
                lambda: model.hessian(theta, e, w_opt, delta, wd))

    phi, record = fisher_scoring(layout.start[model.free], value, value_grad_info,
                                 max_iter=max_iter, value_grad_hessian=value_grad_hessian)
    theta = model.full(phi)
    delta, diag = model.jacobians(theta)
    e = r - model.rho(phi)
    h = delta.T @ (w[:, None] * delta)
    h_inv, unidentified = invert_information(h, 1)
    g = gamma @ (w[:, None] * delta)
    m = delta.T @ (w[:, None] * g)
    acov = None
    if h_inv is None:
        h_inv = np.linalg.pinv(h)
    else:
        acov_free = h_inv @ m @ h_inv
        k = np.zeros((layout.n_params, model.free.size))
        k[model.free, np.arange(model.free.size)] = 1.0
        k[model.var_params] = -diag[model.var_items]
        acov = k @ acov_free @ k.T
    scaled_gamma = np.sqrt(w)[:, None] * gamma * np.sqrt(w)[None, :]
    base_t1 = float(np.sum(w * np.diag(gamma)))
    base_t2 = float(np.sum(scaled_gamma * scaled_gamma))
    hm = h_inv @ m
    t1 = base_t1 - float(np.trace(hm))
    t2 = base_t2 - 2.0 * float(np.sum(h_inv * (g.T @ (w[:, None] * g)))) + float(np.sum(hm * hm.T))
    test = DwlsTest(float(e @ (w * e)), layout.df(), t1, t2)
    baseline = DwlsTest(float(r @ (w * r)), r.size, base_t1, base_t2)
    return DwlsFit(layout, theta, acov, record, n, test, baseline, e, model.estimated,
                   tuple(int(model.free[k]) for k in unidentified))


def correlation_jacobian(layout: Layout, theta: np.ndarray) -> np.ndarray:
    """``Δ = ∂ρ/∂φ`` (``p* × q``, ``np.triu_indices(p, 1)`` order) of
    ``layout`` at the full parameter vector ``theta``, for the parameters
    DWLS estimates (all but the residual variances)."""
    return _DeltaModel(layout).jacobians(theta)[0]


def residual_variances(layout: Layout, theta: np.ndarray, gamma: np.ndarray) -> np.ndarray:
    """Sampling variances of the correlation residuals ``e = r − ρ(θ̂)`` of a
    DWLS fit (``p*``, ``np.triu_indices(p, 1)`` order).

    Near the solution ``θ̂ − θ ≈ H⁻¹ΔᵀW(r − ρ)`` with ``H = ΔᵀWΔ``, so
    ``e ≈ (I − ΔH⁻¹ΔᵀW)(r − ρ)`` and (Browne 1984, the asymptotic
    covariance of the residuals of any minimum-discrepancy estimator;
    Muthén 1984 for DWLS on polychoric correlations)

        Var(e) = (I − ΔH⁻¹ΔᵀW) Γ (I − WΔH⁻¹Δᵀ),

    whose diagonal is, with ``G = ΓWΔ`` and ``M = ΔᵀWG``,

        Var(e_k) = Γ_kk − 2 (ΔH⁻¹)_k · G_k + (ΔH⁻¹MH⁻¹Δᵀ)_kk,

    at ``O(p*² q)`` (the product ``G``), without a ``p* × p*`` matrix
    beyond ``Γ`` itself.  Unlike the normal-theory residuals no efficiency
    argument shortens it: DWLS is not efficient.  A correlation the model
    reproduces by construction (a freed residual covariance) gets a
    variance of zero up to rounding.

    Parameters
    ----------
    layout : Layout
        The DWLS layout (delta parametrisation).
    theta : ndarray
        The full parameter vector at the solution.
    gamma : ndarray, p* × p*
        Sampling covariance of ``r`` (``DwlsData.gamma``).

    Raises
    ------
    numpy.linalg.LinAlgError
        When ``H`` is singular (the model is not identified).
    """
    delta = correlation_jacobian(layout, theta)
    w = 1.0 / np.diag(gamma)
    wd = w[:, None] * delta
    h_inv = np.linalg.inv(delta.T @ wd)
    g = gamma @ wd
    dh = delta @ h_inv
    spread = dh @ (wd.T @ g)
    spread *= dh
    return np.diag(gamma) - 2.0 * np.einsum("ij,ij->i", dh, g) + spread.sum(axis=1)
