"""Difference test of two nested multi-group DWLS fits (the ordinal
invariance steps), mean-and-variance adjusted.

With the same weight ``W`` in both fits, the difference of the DWLS
statistics ``T_d = T₀ − T₁`` (model 0 the more constrained) is asymptotically
``εᵀ(U₀ − U₁)ε`` with ``ε`` the sampling error of the stacked estimates
(covariance ``Γ``) and ``U_i = W − P_i``, ``P_i = WΔ_iH_i⁻¹Δ_iᵀW``,
``H_i = Δ_iᵀWΔ_i``; so ``T_d`` is a mixture of χ²₁ with the eigenvalues of
``U_dΓ``, ``U_d = P₁ − P₀``, as weights (Satorra 2000).  Its first two
moments give the same three corrections as for one model
(:mod:`scalewright.estimate.dwls`):

    t₁ = tr(U_dΓ) = tr(H₁⁻¹M₁) − tr(H₀⁻¹M₀),
    t₂ = tr((U_dΓ)²) = tr((H₁⁻¹M₁)²) − 2 tr(H₁⁻¹ C H₀⁻¹ Cᵀ) + tr((H₀⁻¹M₀)²),

with ``M_i = Δ_iᵀWΓWΔ_i`` and ``C = Δ₁ᵀWΓWΔ₀``; the mean-scaled ``T_d/c_d``
(``c_d = t₁/Δdf``, which equals the Satorra–Bentler (2001) ``c_d`` built from
the two models' scaling factors), the Satterthwaite ``T_d·d*/t₁`` on
``d* = t₁²/t₂`` df, and the scaled-and-shifted ``a·T_d + b`` on ``Δdf``
(Asparouhov & Muthén 2010), which is the one reported as the difference
test.

Both Jacobians are taken at the same point, the constrained model's
estimates: ``Δ₀`` at ``θ̂₀`` and ``Δ₁`` at the less constrained model's
parameters that reproduce the constrained model's implied moments, found by
fitting model 1 to them (they are reproduced exactly, the models being
nested) — the device Satorra & Bentler (2010) use to keep ``c_d`` positive.

This is not the difference test of Asparouhov & Muthén (2006); where that
test becomes available it replaces :func:`adjusted_difference`, the one
function the ordinal invariance sequence calls.

References
----------
Satorra, A. (2000). Scaled and adjusted restricted tests in multi-sample
analysis of moment structures. In Heijmans, Pollock & Satorra (eds.),
Innovations in Multivariate Statistical Analysis, 233–247. Kluwer.
Satorra, A. & Bentler, P. M. (2001). A scaled difference chi-square test
statistic for moment structure analysis. Psychometrika 66, 507–514.
Satorra, A. & Bentler, P. M. (2010). Ensuring positiveness of the scaled
difference chi-square test statistic. Psychometrika 75, 243–248.
Asparouhov, T. & Muthén, B. (2010). Simple second order chi-square
correction. Technical appendix.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from scalewright.blas import one_blas_thread
from scalewright.estimate.dwls import DwlsTest
from scalewright.multigroup import carry_start
from scalewright.multigroup_ordinal import (OrdinalGroupFit, minimise, sample_statistics,
                                            stacked_jacobian)
from scalewright.ordinal_groups import OrdinalGroupMoments

METHOD = ("mean-and-variance adjusted difference of the DWLS statistics (Satorra 2000; "
          "scaled and shifted, Asparouhov & Muthén 2010), traces at the more constrained "
          "model's estimates")

LIMITATION = ("The difference tests are the mean-and-variance adjusted differences of the "
              "two DWLS statistics (Satorra 2000), with both models' derivatives taken at the "
              "more constrained model's estimates; the DWLS difference test of Asparouhov & "
              "Muthén (2006) is not available in this version.")


@dataclass(frozen=True)
class DwlsDifference:
    """``T_d`` and its corrections (a :class:`DwlsTest` on ``Δdf``), and how
    closely model 1 reproduced model 0's moments (``misfit``: the largest
    absolute difference, which should be at rounding level)."""

    test: DwlsTest
    misfit: float

    @property
    def chi_square(self) -> float:
        return max(self.test.chi_square_shifted, 0.0) if self.test.df > 0 else 0.0

    @property
    def df(self) -> int:
        return self.test.df

    @property
    def p_value(self) -> float:
        return self.test.p_value_shifted

    def to_dict(self) -> dict:
        extra = self.test.to_dict() if self.test.df > 0 else {}
        return {"chi_square": self.chi_square, "df": self.df, "p_value": self.p_value,
                "chi_square_unadjusted": self.test.chi_square,
                "scaling_factor": extra.get("scaling_factor"),
                "chi_square_scaled": extra.get("chi_square_scaled"),
                "chi_square_adjusted": extra.get("chi_square_adjusted"),
                "df_adjusted": extra.get("df_adjusted"),
                "p_value_adjusted": extra.get("p_value_adjusted"),
                "method": METHOD}


def adjusted_difference(restricted: OrdinalGroupFit, general: OrdinalGroupFit,
                        data: OrdinalGroupMoments) -> DwlsDifference:
    """The adjusted difference test of ``restricted`` (model 0) against
    ``general`` (model 1), both fitted to ``data`` (module docstring)."""
    df = restricted.test.df - general.test.df
    t_d = max(restricted.test.chi_square - general.test.chi_square, 0.0)
    if df <= 0:
        return DwlsDifference(DwlsTest(t_d, df, float("nan"), float("nan")), 0.0)
    s, w, gammas = sample_statistics(data)
    target = s - restricted.residuals          # model 0's implied moments
    with one_blas_thread():
        theta1, _ = minimise(general.layout, target, w, data.n,
                             carry_start(restricted, general.layout))
        m1, jac1 = stacked_jacobian(general.layout, theta1)
        jac0 = restricted.jacobian
        h1 = jac1.T @ (w[:, None] * jac1)
        h1_inv = np.linalg.pinv(h1)
        h0_inv = restricted.h_inv
        q0, q1 = jac0.shape[1], jac1.shape[1]
        m0_mid, m1_mid, cross = np.zeros((q0, q0)), np.zeros((q1, q1)), np.zeros((q1, q0))
        start = 0
        for gamma in gammas:
            block = slice(start, start + gamma.shape[0])
            start += gamma.shape[0]
            wb = w[block]
            g0 = gamma @ (wb[:, None] * jac0[block])
            g1 = gamma @ (wb[:, None] * jac1[block])
            m0_mid += jac0[block].T @ (wb[:, None] * g0)
            m1_mid += jac1[block].T @ (wb[:, None] * g1)
            cross += jac1[block].T @ (wb[:, None] * g0)
        a1, a0 = h1_inv @ m1_mid, h0_inv @ m0_mid
        t1 = float(np.trace(a1) - np.trace(a0))
        t2 = float(np.sum(a1 * a1.T) - 2.0 * np.sum((h1_inv @ cross) * (h0_inv @ cross.T).T)
                   + np.sum(a0 * a0.T))
    return DwlsDifference(DwlsTest(t_d, df, t1, t2), float(np.max(np.abs(m1 - target))))

