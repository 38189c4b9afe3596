"""Difference test for two nested rival models fitted by DWLS (one group) to
the same polychoric (or mixed polychoric/polyserial/Pearson) correlations
(Asparouhov & Muthén 2006; Satorra 2000).

The difference of two mean-and-variance adjusted statistics is not χ²
distributed, and neither is the difference of the raw ones.  With model 0
the more constrained (``d₀`` df) and model 1 the more general (``d₁`` df),
both fitted with the same weight ``W = diag(Γ)⁻¹`` (``Γ`` the sampling
covariance of the correlations ``r``), the statistic is

    T_d = N(F₀ − F₁) = T₀ − T₁,

the difference of the unadjusted statistics ``T = eᵀWe``.  Under model 0,
``r − ρ₀ = δ`` with ``δ ≈ N(0, Γ)`` and the residuals of model ``k`` are
``(1 − Δ_k V_k Δ_kᵀW) δ``, ``V_k = (Δ_kᵀWΔ_k)⁻¹``, so

    T_d ≈ δᵀ M δ,      M = WΔ₁V₁Δ₁ᵀW − WΔ₀V₀Δ₀ᵀW,

which is distributed as ``Σ_j λ_j χ²₁`` with ``λ`` the non-zero eigenvalues
of ``MΓ``.  As for a single model (:mod:`scalewright.estimate.dwls`), with
``t₁ = tr(MΓ)`` and ``t₂ = tr((MΓ)²)`` the reported statistic is the
scaled-and-shifted one of Asparouhov & Muthén (2010) on the difference in
degrees of freedom ``d = d₀ − d₁``:

    a = √(d/t₂),   b = d − a·t₁,   T_adj = a·T_d + b   on d df,

which has the mean ``d`` and variance ``2d`` of χ²_d; the mean-scaled
(``T_d·d/t₁``) and Satterthwaite (``T_d·d*/t₁`` on ``d* = t₁²/t₂``) versions
come alongside, exactly as for one model.

Where ``M`` is evaluated.  ``Δ₀`` is taken at model 0's estimates and ``Δ₁``
at the *same* point of the correlation space: model 1 is fitted to model 0's
implied correlations, which it reproduces exactly because the models are
nested (the device of Satorra & Bentler 2010 for the ML scaled difference).
Then ``W^½Δ₀`` spans a subspace of what ``W^½Δ₁`` spans, ``W^½MW^½`` is the
orthogonal projector onto the difference of the two spans, and ``MΓ`` has
exactly ``d`` non-negative eigenvalues: the statistic's scaling can never
turn negative.  Evaluating ``Δ₁`` at model 1's own estimates instead is
asymptotically equivalent under model 0 but gives no such guarantee.  This
choice of point, and the use of the projector form (which also covers a
rank-deficient ``Δ``) rather than the inverses ``V_k``, are derived here, not
copied from the paper; they agree with the formula above whenever it is
defined.  A model 1 that cannot reproduce model 0's correlations (largest
difference above :data:`REPRODUCTION_TOLERANCE`) is reported: the pair is
then not nested and the test does not apply.

Computation: with ``Γ̃ = W^½ΓW^½`` and orthonormal bases ``Q_k`` of the
columns of ``W^½Δ_k``, the non-zero eigenvalues of ``MΓ`` are those of the
small matrix ``J BᵀΓ̃B`` with ``B = [Q₁ Q₀]``, ``J = diag(I, −I)``; so

    t₁ = tr(Q₁ᵀΓ̃Q₁) − tr(Q₀ᵀΓ̃Q₀),
    t₂ = ‖Q₁ᵀΓ̃Q₁‖² − 2‖Q₁ᵀΓ̃Q₀‖² + ‖Q₀ᵀΓ̃Q₀‖²,

at ``O(p*² q)``; ``M`` (``p* × p*``) is never formed.

Sources.  The mixture result for the difference of two fit functions with
the same weight is Satorra's (2000) for restricted tests; Asparouhov &
Muthén (2006) build on it the mean-and-variance adjusted difference test for
DWLS.  The formulas above are written from that result (recalled, not
checked against the 2006 text, whose exact choice of evaluation point is not
verified here) and checked in the tests against a dense computation of
``MΓ`` and by simulation.  :mod:`scalewright.dwls_difference` computes the
same statistic and moments for the multi-group fits of the ordinal
invariance steps (with ``H⁻¹`` instead of projectors, at the same point);
the two should stay consistent.

References
----------
Asparouhov, T. & Muthén, B. (2006). Robust chi square difference testing
with mean and variance adjusted test statistics. Technical note 10.
Asparouhov, T. & Muthén, B. (2010). Simple second order chi-square
correction. Technical appendix.
Satorra, A. (2000). Scaled and adjusted restricted tests in multi-sample
analysis of moment structures. In Heijmans, Pollock & Satorra (eds.),
Innovations in Multivariate Statistical Analysis, 233–247. Kluwer.
Satorra, A. & Bentler, P. M. (2010). Ensuring positiveness of the scaled
difference chi-square test statistic. Psychometrika 75, 243–248.
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from scalewright.estimate.dwls import DwlsFit, DwlsTest, correlation_jacobian, fit_dwls
from scalewright.estimate.mixed import MixedMoments
from scalewright.estimate.polychoric import OrdinalMoments

DWLS_DIFFERENCE = ("DWLS difference, scaled and shifted (Satorra 2000; Asparouhov & Muthén "
                   "2006; Asparouhov & Muthén 2010)")

#: largest difference between model 0's implied correlations and model 1's
#: reproduction of them that still counts as exact (optimiser tolerance)
REPRODUCTION_TOLERANCE = 1e-6

#: Gauss–Newton steps that polish model 1's reproduction of model 0's correlations
POLISH_STEPS = 3

#: singular values of W^½Δ below this fraction of the largest count as zero
RANK_TOLERANCE = 1e-10


@dataclass(frozen=True)
class DwlsModel:
    """A DWLS fit with the moments it was fitted to (ordinal or mixed), kept
    for the difference test.  The casewise influence matrix (N × r) is
    dropped: the test needs only the correlations and their sampling
    covariance."""

    fit: DwlsFit
    moments: OrdinalMoments | MixedMoments

    @classmethod
    def of(cls, fit: DwlsFit, moments: OrdinalMoments | MixedMoments) -> "DwlsModel":
        return cls(fit, replace(moments, influence=moments.influence[:0]))


@dataclass(frozen=True)
class NestedDwlsTest:
    """The difference test of a constrained DWLS model against a more general one.

    ``test`` holds ``T_d`` (``chi_square``), ``d`` (``df``), ``t₁`` and ``t₂``
    and gives the scaled-and-shifted statistic and the other versions;
    ``eigenvalues`` are the ``d`` largest eigenvalues of ``MΓ``;
    ``reproduction_gap`` is the largest difference between model 0's
    implied correlations and model 1 fitted to them.
    """

    test: DwlsTest
    eigenvalues: np.ndarray
    reproduction_gap: float

    @property
    def nested(self) -> bool:
        return self.reproduction_gap <= REPRODUCTION_TOLERANCE

    def to_dict(self) -> dict:
        """The comparison row's statistics (``compare.compare_models``)."""
        t = self.test
        return {"chi_square": float(t.chi_square_shifted), "df": int(t.df),
                "p_value": float(t.p_value_shifted), "scaled": True,
                "scaling_factor": float(t.scaling_factor), "test": DWLS_DIFFERENCE,
                "chi_square_unadjusted": float(t.chi_square),
                "shift_scale": float(t.shift_scale), "shift": float(t.shift)}


def nested_dwls_test(first: DwlsModel, second: DwlsModel) -> NestedDwlsTest:
    """The DWLS difference test (Asparouhov & Muthén 2006) of two nested fits.

    The argument order does not matter: the model with more degrees of
    freedom is the constrained one.  Both must be fitted to the same
    correlations (same items in the same order, same rows).

    Raises
    ------
    ValueError
        When the two models have the same degrees of freedom or were fitted
        to different correlations.
    """
    restricted, general = sorted((first, second), key=lambda m: -m.fit.test.df)
    if restricted.fit.test.df == general.fit.test.df:
        raise ValueError("the two models have the same degrees of freedom; nothing to test")
    moments = restricted.moments
    if (moments.items != general.moments.items or moments.n_rows != general.moments.n_rows
            or not np.array_equal(moments.raw_correlations, general.moments.raw_correlations)):
        raise ValueError("the two models were fitted to different polychoric correlations")
    layout0, theta0 = restricted.fit.layout, restricted.fit.theta
    implied0 = layout0.patterns[0].matrices(theta0).implied_cov
    layout1 = general.fit.layout
    theta1, gap = _reproduce(layout1, general.fit.theta, implied0, moments)
    delta0 = correlation_jacobian(layout0, theta0)
    delta1 = correlation_jacobian(layout1, theta1)
    t1, t2, eigenvalues = mixture_traces(moments.acov_corr, delta0, delta1)
    d = restricted.fit.test.df - general.fit.test.df
    t_d = restricted.fit.test.chi_square - general.fit.test.chi_square
    order = np.argsort(-np.abs(eigenvalues))[:d]
    return NestedDwlsTest(DwlsTest(float(t_d), int(d), t1, t2), np.sort(eigenvalues[order])[::-1],
                          gap)


def _reproduce(layout, start: np.ndarray, target: np.ndarray, moments
               ) -> tuple[np.ndarray, float]:
    """Model 1's parameters that reproduce the correlations ``target``
    (``p × p``), and the largest difference left.

    DWLS from ``start``, then :data:`POLISH_STEPS` Gauss–Newton steps on the
    estimated parameters: the problem has a zero residual when the models
    are nested, so each step squares the error and the optimiser's stopping
    tolerance does not limit the precision of ``Δ₁``.
    """
    fit = fit_dwls(replace(layout, start=start), moments, target)
    theta, free = fit.theta.copy(), fit.estimated
    rows, cols = np.triu_indices(layout.p, 1)
    root_w = 1.0 / np.sqrt(np.diag(moments.acov_corr))

    def residual(t):
        return target[rows, cols] - layout.patterns[0].matrices(t).implied_cov[rows, cols]

    e = residual(theta)
    for _ in range(POLISH_STEPS):
        jac = correlation_jacobian(layout, theta)
        step = np.linalg.lstsq(root_w[:, None] * jac, root_w * e, rcond=None)[0]
        trial = theta.copy()
        trial[free] += step
        e_trial = residual(trial)
        if np.max(np.abs(e_trial)) >= np.max(np.abs(e)):
            break
        theta, e = trial, e_trial
    return theta, float(np.max(np.abs(e))) if e.size else 0.0


def mixture_traces(gamma: np.ndarray, delta0: np.ndarray, delta1: np.ndarray
                   ) -> tuple[float, float, np.ndarray]:
    """``tr(MΓ)``, ``tr((MΓ)²)`` and the non-zero eigenvalues of ``MΓ`` with
    ``W = diag(Γ)⁻¹`` (module docstring), from orthonormal bases only."""
    root = 1.0 / np.sqrt(np.diag(gamma))
    scaled = root[:, None] * gamma * root[None, :]                 # Γ̃ = W^½ΓW^½
    q1, q0 = _basis(root[:, None] * delta1), _basis(root[:, None] * delta0)
    g11, g10, g00 = q1.T @ scaled @ q1, q1.T @ scaled @ q0, q0.T @ scaled @ q0
    t1 = float(np.trace(g11) - np.trace(g00))
    t2 = float(np.sum(g11 * g11) - 2.0 * np.sum(g10 * g10) + np.sum(g00 * g00))
    small = np.block([[g11, g10], [-g10.T, -g00]])                  # J BᵀΓ̃B
    return t1, t2, np.linalg.eigvals(small).real


def _basis(m: np.ndarray) -> np.ndarray:
    """Orthonormal basis of the column space of ``m`` (singular vectors above
    :data:`RANK_TOLERANCE` of the largest singular value)."""
    u, s, _ = np.linalg.svd(m, full_matrices=False)
    return u[:, s > RANK_TOLERANCE * s[0]] if s.size else u
