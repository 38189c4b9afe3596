"""Scaled chi-square difference tests (Satorra & Bentler 2001, 2010).

Outside references: the worked comparisons published in a 2014 Frontiers in
Psychology paper on scaled difference testing (table 1, PMC 4168678), as
quoted in design/references.md; for the 2010 version the dense textbook
Satorra–Bentler trace computed in the test at parameters found by scipy's
optimiser.
"""

from __future__ import annotations

import types

import numpy as np
import pytest
from scipy import optimize

import holzinger
from scalewright.estimate.normal import complete_data_blocks, fit_normal
from scalewright.estimate.robust import robust_ml
from scalewright.indices import saturated_loglik
from scalewright.scaled_difference import (SB2001, SB2010, nested_difference, scaled_difference,
                                           strictly_positive_difference)
from scalewright.specify import build_layout

# [published] (T_scaled, df, c) per model, table 1 of the 2014 paper
ROWS = {"configural": (82.052, 69, 1.111), "weak": (90.371, 76, 1.115),
        "partial-1": (108.190, 81, 1.110), "partial-2": (94.677, 80, 1.110),
        "strong": (127.238, 82, 1.108)}


def published(constrained, general):
    (t0, d0, c0), (t1, d1, c1) = ROWS[constrained], ROWS[general]
    # the ML statistic is the scaled one times its scaling factor
    return scaled_difference(t0 * c0, d0, c0, t1 * c1, d1, c1)


@pytest.mark.parametrize("constrained, general, c_d, t_d, df", [
    ("weak", "configural", 1.154, 8.319, 7),
    ("strong", "partial-1", 0.946, 22.081, 1),
    ("partial-1", "partial-2", 1.110, 13.513, 1),
])
def test_scaled_difference_reproduces_published_comparisons(constrained, general, c_d, t_d, df):
    out = published(constrained, general)
    # the published inputs carry three decimals; the rounding moves c_d by up to ~5e-4
    # and T_d by up to ~1e-3 relative
    assert out.df == df
    assert out.scaling_factor == pytest.approx(c_d, abs=1e-3)
    assert out.chi_square == pytest.approx(t_d, rel=2e-3)
    assert out.method == SB2001


def test_scaled_difference_p_value_matches_published_value():
    # [published] weak vs configural: p = .305
    assert published("weak", "configural").p_value == pytest.approx(0.305, abs=1e-3)


def test_negative_2001_scaling_gives_no_p_value():
    # c_d = (25·1.0 − 24·1.1)/1 = −1.4 < 0: the 2001 statistic is meaningless
    out = scaled_difference(30.0, 25, 1.0, 27.0, 24, 1.1)
    assert out.scaling_factor == pytest.approx(-1.4)
    assert np.isnan(out.p_value)


def hs_model(residual_covariances=()):
    spec = types.SimpleNamespace(
        name="m", constructs={k: tuple(v) for k, v in holzinger.CONSTRUCTS.items()},
        cross_loadings={}, residual_covariances=residual_covariances, higher_order={},
        general=None, identification="unit-variance", place="m.yaml",
        items=tuple(holzinger.ITEMS))
    x = holzinger.data().to_numpy(float)
    blocks = complete_data_blocks(x)
    layout = build_layout(spec, blocks[0].cov)
    theta, _, objective = fit_normal(layout, blocks)
    chi2 = 2 * (saturated_loglik([blocks[0].cov], [len(x)]) - objective.loglik(theta))
    return x, layout, theta, robust_ml(layout, theta, x, chi2, adjusted=False).test


def dense_scaling(layout, theta, x):
    """tr(UΓ)/df from the textbook matrices (Satorra & Bentler 1994)."""
    n, p = x.shape
    rows, cols = np.tril_indices(p)
    c = x - x.mean(axis=0)
    gamma = np.cov((c[:, :, None] * c[:, None, :])[:, rows, cols], rowvar=False, bias=True)
    sigma = layout.patterns[0].matrices(theta).implied_cov
    v = np.linalg.inv(sigma)
    dup = np.zeros((p * p, len(rows)))
    for t, (i, j) in enumerate(zip(rows, cols)):
        dup[i * p + j, t] = dup[j * p + i, t] = 1.0
    w = 0.5 * dup.T @ np.kron(v, v) @ dup
    h = 1e-6
    delta = np.array([(layout.patterns[0].matrices(theta + e).implied_cov[rows, cols] -
                       layout.patterns[0].matrices(theta - e).implied_cov[rows, cols]) / (2 * h)
                      for e in np.eye(len(theta)) * h]).T
    u = w - w @ delta @ np.linalg.inv(delta.T @ w @ delta) @ delta.T @ w
    return np.trace(u @ gamma) / layout.df()


def test_2010_version_uses_the_general_model_at_the_constrained_estimates():
    x, layout0, theta0, test0 = hs_model()
    _, layout1, _, test1 = hs_model((("x7", "x8"),))
    out = strictly_positive_difference(layout0, theta0, test0, layout1, test1, x)
    assert out.method == SB2010 and out.df == 1
    # reference: model 1's parameters reproducing model 0's Σ̂, found by scipy's optimiser
    target = layout0.patterns[0].matrices(theta0).implied_cov

    def misfit(t):
        return np.sum((layout1.patterns[0].matrices(t).implied_cov - target) ** 2)

    theta10 = optimize.minimize(misfit, layout1.start, method="BFGS",
                                options={"gtol": 1e-12}).x
    assert misfit(theta10) < 1e-12          # nested: reproduced exactly
    c10 = dense_scaling(layout1, theta10, x)
    c_d = (test0.df * test0.scaling_factor - test1.df * c10) / 1
    # the optimiser reaches Σ̂ to about 1e-7, so c10 agrees to about 1e-5
    assert out.scaling_factor == pytest.approx(c_d, rel=1e-4)
    assert out.scaling_factor > 0
    assert out.chi_square == pytest.approx((test0.chi_square - test1.chi_square) / c_d, rel=1e-4)


def test_nested_difference_keeps_the_2001_version_when_its_scaling_is_positive():
    x, layout0, theta0, test0 = hs_model()
    _, layout1, _, test1 = hs_model((("x7", "x8"),))
    out = nested_difference(layout0, theta0, test0, layout1, test1, x)
    expect = scaled_difference(test0.chi_square, test0.df, test0.scaling_factor,
                               test1.chi_square, test1.df, test1.scaling_factor)
    assert expect.scaling_factor > 0
    assert out == expect
