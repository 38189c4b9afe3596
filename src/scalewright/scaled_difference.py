"""Scaled chi-square difference test for two nested models fitted by robust ML.

The difference of two Satorra–Bentler scaled statistics is not χ²
distributed.  Satorra & Bentler (2001) scale the difference of the ML
statistics instead: with model 0 the more constrained one (``T₀`` on ``d₀``
df, scaling factor ``c₀``) and model 1 the less constrained,

    c_d = (d₀ c₀ − d₁ c₁) / (d₀ − d₁),     T_d = (T₀ − T₁) / c_d   on d₀ − d₁ df.

In small samples or when the models differ little, ``c_d`` can come out
negative (or tiny) and the test is then meaningless.  Satorra & Bentler
(2010) replace ``c₁`` by ``c₁₀``, the scaling factor of model 1 evaluated
at the estimates of model 0 (written in model 1's parameters), which makes
``c_d`` strictly positive; :func:`nested_difference` falls back to it when
the 2001 ``c_d`` is not positive.

References
----------
Satorra, A. & Bentler, P. M. (2001). A scaled difference chi-square test
statistic for moment structure analysis. Psychometrika 66, 507–514.
Satorra, A. & Bentler, P. M. (2010). Ensuring positiveness of the scaled
difference chi-square test statistic. Psychometrika 75, 243–248.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from scalewright.estimate.normal import Block, fit_normal
from scalewright.estimate.robust import RobustTest, robust_ml

SB2001 = "Satorra & Bentler (2001)"
SB2010 = "Satorra & Bentler (2010)"


@dataclass(frozen=True)
class ScaledDifference:
    """The scaled difference test of a constrained model against a more general one."""

    chi_square: float      # T_d
    df: int
    p_value: float
    scaling_factor: float  # c_d
    method: str            # which of the two versions

    def to_dict(self) -> dict:
        return {"chi_square": float(self.chi_square), "df": int(self.df),
                "p_value": float(self.p_value), "scaling_factor": float(self.scaling_factor),
                "method": self.method}


def scaled_difference(t0: float, df0: int, c0: float, t1: float, df1: int, c1: float,
                      method: str = SB2001) -> ScaledDifference:
    """Satorra–Bentler scaled difference from the ML statistics ``t0, t1``,
    their df and scaling factors (model 0 the more constrained).

    Passing ``c1 = c₁₀`` (model 1's scaling factor at model 0's estimates)
    and ``method=SB2010`` gives the strictly positive 2010 version.
    """
    if df0 <= df1:
        raise ValueError(f"model 0 must be the more constrained one (df {df0} vs {df1})")
    d = df0 - df1
    c_d = (df0 * c0 - df1 * c1) / d
    t_d = (t0 - t1) / c_d
    p = float(stats.chi2.sf(t_d, d)) if c_d > 0 else float("nan")
    return ScaledDifference(float(t_d), int(d), p, float(c_d), method)


def nested_difference(constrained_layout, constrained_theta, constrained_test: RobustTest,
                      general_layout, general_test: RobustTest,
                      x: np.ndarray) -> ScaledDifference:
    """Scaled difference test of two nested models fitted by robust ML on
    complete data ``x`` (columns in the layouts' item order): the 2001
    statistic, or the 2010 one (:func:`strictly_positive_difference`) when
    the 2001 ``c_d`` is not positive."""
    first = scaled_difference(constrained_test.chi_square, constrained_test.df,
                              constrained_test.scaling_factor, general_test.chi_square,
                              general_test.df, general_test.scaling_factor)
    if first.scaling_factor > 0:
        return first
    return strictly_positive_difference(constrained_layout, constrained_theta, constrained_test,
                                        general_layout, general_test, x)


def strictly_positive_difference(constrained_layout, constrained_theta,
                                 constrained_test: RobustTest, general_layout,
                                 general_test: RobustTest, x: np.ndarray) -> ScaledDifference:
    """The Satorra & Bentler (2010) version: model 1 is fitted by ML to model
    0's implied covariance matrix, which it reproduces exactly because the
    models are nested; its scaling factor there, ``c₁₀``, replaces ``c₁``."""
    implied = constrained_layout.patterns[0].matrices(constrained_theta).implied_cov
    block = Block(0, np.arange(implied.shape[0]), len(x), implied, x.mean(axis=0))
    theta10, _, _ = fit_normal(general_layout, (block,))
    c10 = robust_ml(general_layout, theta10, x, general_test.chi_square,
                    adjusted=False).test.scaling_factor
    return scaled_difference(constrained_test.chi_square, constrained_test.df,
                             constrained_test.scaling_factor, general_test.chi_square,
                             general_test.df, c10, SB2010)
