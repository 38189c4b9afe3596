"""Little's (1988) test that answers are missing completely at random (MCAR).

Under MCAR the rows of every missing-data pattern are a random sample of all
rows, so each pattern's mean of its answered items should match the overall
mean.  With the ML estimates ``μ̂, Σ̂`` of the saturated normal model (EM,
:func:`scalewright.estimate.fiml.saturated_em`), ``n_k`` rows and answered
items ``o_k`` in pattern ``k``,

    d² = Σ_k n_k (x̄_k − μ̂_{o_k})ᵀ Σ̂_{o_k o_k}⁻¹ (x̄_k − μ̂_{o_k}),

which is asymptotically χ² on ``Σ_k p_k − p`` degrees of freedom under MCAR
(``p_k`` the number of answered items in pattern ``k``).  A small p-value is
evidence against MCAR; a large one does not show MCAR, and full-information
ML needs only the weaker MAR assumption.  Rows with no answer are left out.

References
----------
Little, R. J. A. (1988). A test of missing completely at random for
multivariate data with missing values. Journal of the American Statistical
Association 83, 1198–1202.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from scalewright.estimate.fiml import PatternMoments, Saturated, saturated_em


@dataclass(frozen=True)
class LittleTest:
    """Little's MCAR statistic, its df and p-value, and how many patterns entered it."""

    chi_square: float
    df: int
    p_value: float
    n_patterns: int

    def to_dict(self) -> dict:
        return {"chi_square": self.chi_square, "df": self.df,
                "p_value": self.p_value if np.isfinite(self.p_value) else None,
                "n_patterns": self.n_patterns}


def little_mcar(moments: PatternMoments, saturated: Saturated | None = None) -> LittleTest:
    """Little's (1988) MCAR test from the pattern moments (see the module docstring).

    ``saturated`` are the EM estimates on the same rows; they are computed
    when not given.  With a single pattern (no missing answers, or the same
    items missing for everyone) the test has 0 df and its p-value is NaN.
    """
    saturated = saturated_em(moments) if saturated is None else saturated
    masks = moments.masks
    m = masks.astype(float)
    both = m[:, :, None] * m[:, None, :]
    p = masks.shape[1]
    filled = saturated.cov[None] * both + np.eye(p)[None] * (1.0 - m)[:, None, :]
    r = (moments.means - saturated.mean) * m
    quad = np.einsum("ki,ki->k", r, np.linalg.solve(filled, r[:, :, None])[:, :, 0])
    d2 = float(np.sum(moments.counts * quad))
    df = int(masks.sum() - p)
    p_value = float(stats.chi2.sf(d2, df)) if df > 0 else float("nan")
    return LittleTest(d2, df, p_value, int(len(masks)))
