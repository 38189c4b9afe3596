"""The difference test of two nested DWLS fits, for one group (rival models,
:mod:`scalewright.compare`) and for several groups at once (the ordinal
invariance steps, :mod:`scalewright.invariance_ordinal`): Satorra's (2000)
adjusted difference test applied to the DWLS statistics.

The difference of two mean-and-variance adjusted statistics is not χ²
distributed, and neither is the difference of the raw ones.  With model 0
the more constrained (``d₀`` df) and model 1 the more general (``d₁`` df),
both fitted with the same weight ``W = diag(Γ)⁻¹`` (``Γ`` the sampling
covariance of the estimates ``s`` the models are fitted to: the polychoric,
or mixed, correlations of one group; for several groups the stacked
thresholds and correlations of every group, ``Γ = ⊕ Γ_g`` and ``W = ⊕ W_g``
block-diagonal, the groups being independent), the statistic is

    T_d = N(F₀ − F₁) = T₀ − T₁,

the difference of the unadjusted statistics ``T = eᵀWe``.  Under model 0,
``s − m₀ = δ`` with ``δ ≈ N(0, Γ)`` and the residuals of model ``k`` are
``(1 − Δ_k V_k Δ_kᵀW) δ``, ``V_k = (Δ_kᵀWΔ_k)⁻¹``, so

    T_d ≈ δᵀ M δ,      M = WΔ₁V₁Δ₁ᵀW − WΔ₀V₀Δ₀ᵀW,

which is distributed as ``Σ_j λ_j χ²₁`` with ``λ`` the non-zero eigenvalues
of ``MΓ`` (Satorra 2000).  As for a single model
(:mod:`scalewright.estimate.dwls`), with ``t₁ = tr(MΓ)`` and
``t₂ = tr((MΓ)²)`` the reported statistic is the scaled-and-shifted one of
Asparouhov & Muthén (2010) on the difference in degrees of freedom
``d = d₀ − d₁``:

    a = √(d/t₂),   b = d − a·t₁,   T_adj = a·T_d + b   on d df,

which has the mean ``d`` and variance ``2d`` of χ²_d; the mean-scaled
(``T_d·d/t₁``; ``t₁/d`` is the Satorra–Bentler (2001) ``c_d``) and
Satterthwaite (``T_d·d*/t₁`` on ``d* = t₁²/t₂``) versions come alongside,
exactly as for one model.  ``T₀ − T₁`` below zero can only come from an
optimiser's stopping tolerance (``F₁ ≤ F₀`` at the minima of nested
models) and is taken as 0.

Where ``M`` is evaluated.  ``Δ₀`` is taken at model 0's estimates and ``Δ₁``
at the *same* point of the moment space: model 1 is fitted to model 0's
implied moments, which it reproduces exactly because the models are nested
(the device of Satorra & Bentler 2010 for the ML scaled difference), and
the fit is polished by Gauss–Newton steps (zero residual: each step squares
the error, so the optimiser's stopping tolerance does not limit ``Δ₁``).
Then ``W^½Δ₀`` spans a subspace of what ``W^½Δ₁`` spans, ``W^½MW^½`` is the
orthogonal projector onto the difference of the two spans, and ``MΓ`` has
exactly ``d`` non-negative eigenvalues: the statistic's scaling can never
turn negative.  Evaluating ``Δ₁`` at model 1's own estimates instead is
asymptotically equivalent under model 0 but gives no such guarantee.  This
choice of point, and the use of the projector form (which also covers a
rank-deficient ``Δ``) rather than the inverses ``V_k``, are derived here;
they agree with the formula above whenever it is defined.  A model 1 that
cannot reproduce model 0's moments (largest difference above
:data:`REPRODUCTION_TOLERANCE`) is reported: the pair is then not nested
and the test does not apply.

Computation: with ``Γ̃ = W^½ΓW^½`` and orthonormal bases ``Q_k`` of the
columns of ``W^½Δ_k``, the non-zero eigenvalues of ``MΓ`` are those of the
small matrix ``J BᵀΓ̃B`` with ``B = [Q₁ Q₀]``, ``J = diag(I, −I)``; so

    t₁ = tr(Q₁ᵀΓ̃Q₁) − tr(Q₀ᵀΓ̃Q₀),
    t₂ = ‖Q₁ᵀΓ̃Q₁‖² − 2‖Q₁ᵀΓ̃Q₀‖² + ‖Q₀ᵀΓ̃Q₀‖²,

with ``BᵀΓ̃B = Σ_g B_gᵀΓ̃_gB_g`` over the groups' row blocks; ``M`` and the
block-diagonal ``Γ`` are never formed.

Sources.  The mixture result for the difference of two fit functions with
the same weight, and its mean-and-variance adjustment, are Satorra's (2000)
restricted tests; this module applies them to DWLS.  Asparouhov & Muthén
(2006) describe this difference test for the robust WLS estimators — from
memory: their technical note was not checked here, in particular not the
point at which they evaluate the derivatives, so Satorra (2000) is the
source the formulas are written from.  They are checked in the tests
against dense computations of ``MΓ`` and by simulation.

References
----------
Asparouhov, T. & Muthén, B. (2006). Robust chi square difference testing
with mean and variance adjusted test statistics. Technical note 10.
Asparouhov, T. & Muthén, B. (2010). Simple second order chi-square
correction. Technical appendix.
Satorra, A. (2000). Scaled and adjusted restricted tests in multi-sample
analysis of moment structures. In Heijmans, Pollock & Satorra (eds.),
Innovations in Multivariate Statistical Analysis, 233–247. Kluwer.
Satorra, A. & Bentler, P. M. (2001). A scaled difference chi-square test
statistic for moment structure analysis. Psychometrika 66, 507–514.
Satorra, A. & Bentler, P. M. (2010). Ensuring positiveness of the scaled
difference chi-square test statistic. Psychometrika 75, 243–248.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace
from functools import cached_property

import numpy as np

from scalewright.blas import one_blas_thread
from scalewright.estimate.dwls import DwlsModel, DwlsTest, correlation_jacobian, fit_dwls
from scalewright.multigroup import carry_start
from scalewright.multigroup_ordinal import (OrdinalGroupFit, implied_statistics, minimise,
                                            sample_statistics, stacked_jacobian)
from scalewright.ordinal_groups import OrdinalGroupMoments

#: the test's name in comparison rows and invariance steps (JSON ``test``)
DWLS_DIFFERENCE = ("DWLS difference (Satorra 2000), scaled and shifted (Asparouhov & Muthén "
                   "2010)")

#: what the test is, in words (the invariance set-up's ``difference_test`` and method note)
METHOD = ("Satorra's (2000) adjusted difference test applied to the two DWLS statistics, as "
          "Asparouhov & Muthén (2006) describe it for robust WLS estimators: the difference of "
          "the unadjusted statistics, scaled and shifted to the mean and variance of chi-square "
          "on the difference in degrees of freedom (Asparouhov & Muthén 2010), with both "
          "models' derivatives taken at the more constrained model's estimates")

#: largest difference between model 0's implied moments and model 1's
#: reproduction of them that still counts as exact (optimiser tolerance)
REPRODUCTION_TOLERANCE = 1e-6

#: Gauss–Newton steps that polish model 1's reproduction of model 0's moments
POLISH_STEPS = 3

#: singular values of W^½Δ below this fraction of the largest count as zero
RANK_TOLERANCE = 1e-10


@dataclass(frozen=True)
class DwlsDifference:
    """The difference test of a constrained DWLS fit against a more general one.

    ``test`` holds ``T_d`` (``chi_square``), ``d`` (``df``), ``t₁`` and ``t₂``
    and gives the scaled-and-shifted statistic and the other versions;
    ``mixture`` is the small matrix ``J BᵀΓ̃B`` whose non-zero eigenvalues
    are those of ``MΓ`` (module docstring); ``reproduction_gap`` is the
    largest difference between model 0's implied moments and model 1
    fitted to them.  With ``d ≤ 0`` there is nothing to test: the traces are
    NaN and ``chi_square`` is 0.
    """

    test: DwlsTest
    mixture: np.ndarray
    reproduction_gap: float

    @cached_property
    def eigenvalues(self) -> np.ndarray:
        """The ``d`` largest eigenvalues of ``MΓ``, the weights of the χ²₁
        mixture, in decreasing order (computed on demand: the test itself
        needs only the traces)."""
        lam = np.linalg.eigvals(self.mixture).real
        return np.sort(lam[np.argsort(-np.abs(lam))[:max(self.df, 0)]])[::-1]

    @property
    def nested(self) -> bool:
        return self.reproduction_gap <= REPRODUCTION_TOLERANCE

    @property
    def chi_square(self) -> float:
        """The scaled-and-shifted ``a·T_d + b`` (0 when there is nothing to test)."""
        return max(self.test.chi_square_shifted, 0.0) if self.test.df > 0 else 0.0

    @property
    def df(self) -> int:
        return self.test.df

    @property
    def p_value(self) -> float:
        return self.test.p_value_shifted

    def to_dict(self) -> dict:
        """The statistics of a comparison row or an invariance step."""
        t, testable = self.test, self.test.df > 0
        extra = t.to_dict() if testable else {}
        return {"chi_square": self.chi_square, "df": int(self.df), "p_value": self.p_value,
                "scaled": True, "test": DWLS_DIFFERENCE,
                "chi_square_unadjusted": float(t.chi_square),
                "scaling_factor": extra.get("scaling_factor"),
                "chi_square_scaled": extra.get("chi_square_scaled"),
                "chi_square_adjusted": extra.get("chi_square_adjusted"),
                "df_adjusted": extra.get("df_adjusted"),
                "p_value_adjusted": extra.get("p_value_adjusted"),
                "shift_scale": float(t.shift_scale) if testable else None,
                "shift": float(t.shift) if testable else None}


# --------------------------------------------------------------------------- the two callers

def nested_dwls_test(first: DwlsModel, second: DwlsModel) -> DwlsDifference:
    """The difference test of two nested one-group DWLS fits (rival models).

    The argument order does not matter: the model with more degrees of
    freedom is the constrained one.  Both must be fitted to the same
    correlations (same items in the same order, same rows).

    Raises
    ------
    ValueError
        When the two models were fitted to different correlations.
    """
    restricted, general = sorted((first, second), key=lambda m: -m.fit.test.df)
    moments = restricted.moments
    if (moments.items != general.moments.items or moments.n_rows != general.moments.n_rows
            or not np.array_equal(moments.raw_correlations, general.moments.raw_correlations)):
        raise ValueError("the two models were fitted to different polychoric correlations")
    if restricted.fit.test.df == general.fit.test.df:
        return _untestable(restricted.fit.test, general.fit.test)
    layout0, theta0 = restricted.fit.layout, restricted.fit.theta
    layout1 = general.fit.layout
    rows, cols = np.triu_indices(layout1.p, 1)
    target = layout0.patterns[0].matrices(theta0).implied_cov
    gamma = moments.acov_corr
    with one_blas_thread():
        fit = fit_dwls(replace(layout1, start=general.fit.theta), moments, target)
        theta1, gap = reproduce(fit.theta, fit.estimated,
                                lambda t: layout1.patterns[0].matrices(t).implied_cov[rows, cols],
                                lambda t: correlation_jacobian(layout1, t), target[rows, cols],
                                1.0 / np.diag(gamma))
        return difference(restricted.fit.test, general.fit.test, (gamma,),
                          correlation_jacobian(layout0, theta0),
                          correlation_jacobian(layout1, theta1), gap)


def adjusted_difference(restricted: OrdinalGroupFit, general: OrdinalGroupFit,
                        data: OrdinalGroupMoments) -> DwlsDifference:
    """The difference test of ``restricted`` (model 0) against ``general``
    (model 1), multi-group fits to the same groups' thresholds and
    polychoric correlations ``data`` (an ordinal invariance step against
    the step before it)."""
    if restricted.test.df <= general.test.df:
        return _untestable(restricted.test, general.test)
    s, w, gammas = sample_statistics(data)
    target = s - restricted.residuals                  # model 0's implied moments
    layout = general.layout
    with one_blas_thread():
        theta, _ = minimise(layout, target, w, data.n, carry_start(restricted, layout))
        theta, gap = reproduce(theta, np.ones(theta.size, dtype=bool),
                               lambda t: implied_statistics(layout, t),
                               lambda t: stacked_jacobian(layout, t)[1], target, w)
        return difference(restricted.test, general.test, gammas, restricted.jacobian,
                          stacked_jacobian(layout, theta)[1], gap)


# --------------------------------------------------------------------------- the statistic

def difference(restricted: DwlsTest, general: DwlsTest, gammas: Sequence[np.ndarray],
               delta0: np.ndarray, delta1: np.ndarray, gap: float) -> DwlsDifference:
    """``T_d`` on ``d = d₀ − d₁`` df with the traces and eigenvalues of ``MΓ``
    (module docstring), from both models' statistics, the groups' sampling
    covariances ``Γ_g`` (in the row order of the Jacobians) and the
    Jacobians ``Δ₀``, ``Δ₁`` at the same point; ``gap`` is how closely
    model 1 reproduced model 0's moments there."""
    t_d = max(restricted.chi_square - general.chi_square, 0.0)
    t1, t2, mixture = mixture_traces(gammas, delta0, delta1)
    return DwlsDifference(DwlsTest(float(t_d), int(restricted.df - general.df), t1, t2), mixture,
                          gap)


def _untestable(restricted: DwlsTest, general: DwlsTest) -> DwlsDifference:
    """Two models with no difference in degrees of freedom to test."""
    t_d = max(restricted.chi_square - general.chi_square, 0.0)
    return DwlsDifference(DwlsTest(float(t_d), int(restricted.df - general.df), float("nan"),
                                   float("nan")), np.zeros((0, 0)), 0.0)


def reproduce(theta: np.ndarray, free: np.ndarray,
              moments_of: Callable[[np.ndarray], np.ndarray | None],
              jacobian_of: Callable[[np.ndarray], np.ndarray], target: np.ndarray,
              w: np.ndarray) -> tuple[np.ndarray, float]:
    """Model 1's parameters reproducing model 0's moments ``target``, and the
    largest difference left.

    From the optimiser's ``theta``, :data:`POLISH_STEPS` Gauss–Newton steps
    on the parameters ``free`` (``jacobian_of`` gives ``∂m/∂θ_free``, weight
    ``w``), each kept only while it shrinks the largest difference; the
    problem has a zero residual when the models are nested, so each step
    squares the error.  ``moments_of`` returns None where the model is
    undefined.
    """
    root_w = np.sqrt(w)
    e = target - moments_of(theta)
    for _ in range(POLISH_STEPS):
        step = np.linalg.lstsq(root_w[:, None] * jacobian_of(theta), root_w * e, rcond=None)[0]
        trial = theta.copy()
        trial[free] += step
        m_trial = moments_of(trial)
        if m_trial is None or np.max(np.abs(target - m_trial)) >= np.max(np.abs(e)):
            break
        theta, e = trial, target - m_trial
    return theta, float(np.max(np.abs(e))) if e.size else 0.0


def mixture_traces(gammas: Sequence[np.ndarray], delta0: np.ndarray, delta1: np.ndarray
                   ) -> tuple[float, float, np.ndarray]:
    """``tr(MΓ)``, ``tr((MΓ)²)`` and the small matrix ``J BᵀΓ̃B`` whose
    non-zero eigenvalues are those of ``MΓ``, with ``Γ = ⊕ Γ_g`` and
    ``W = diag(Γ)⁻¹`` (module docstring), from orthonormal bases and the
    groups' blocks only."""
    root = np.concatenate([1.0 / np.sqrt(np.diag(gamma)) for gamma in gammas])
    q1, q0 = _basis(root[:, None] * delta1), _basis(root[:, None] * delta0)
    k1 = q1.shape[1]
    rb = root[:, None] * np.hstack([q1, q0])                       # W^½B
    ends = np.cumsum([gamma.shape[0] for gamma in gammas])[:-1]
    inner = sum(part.T @ gamma @ part for gamma, part in zip(gammas, np.split(rb, ends)))
    g11, g10, g00 = inner[:k1, :k1], inner[:k1, k1:], inner[k1:, k1:]   # blocks of BᵀΓ̃B
    t1 = float(np.trace(g11) - np.trace(g00))
    t2 = float(np.sum(g11 * g11) - 2.0 * np.sum(g10 * g10) + np.sum(g00 * g00))
    return t1, t2, np.block([[g11, g10], [-g10.T, -g00]])          # J BᵀΓ̃B


def _basis(m: np.ndarray) -> np.ndarray:
    """Orthonormal basis of the column space of ``m`` (singular vectors above
    :data:`RANK_TOLERANCE` of the largest singular value)."""
    u, s, _ = np.linalg.svd(m, full_matrices=False)
    return u[:, s > RANK_TOLERANCE * s[0]] if s.size else u
