"""Robust ML on complete data: sandwich standard errors, Satorra–Bentler
scaled and adjusted statistics, robust fit indices.

Outside references: semopy 2.3.11's robust (sandwich) standard errors,
recomputed here on Holzinger–Swineford; an independent finite-difference
sandwich and the dense textbook form of the Satorra–Bentler traces computed
in the test with numpy; statistical theory (seeded simulation).
"""

from __future__ import annotations

import types

import numpy as np
import pytest
import semopy
from scipy import stats

import holzinger
from scalewright.estimate.normal import complete_data_blocks, fit_normal
from scalewright.estimate.robust import (RobustTest, baseline_test, robust_fit_indices,
                                         robust_ml)
from scalewright.indices import (comparative_fit, independence_chi_square, rmsea,
                                 saturated_loglik)
from scalewright.layout import LOADING
from scalewright.specify import build_layout


def spec_of(constructs, identification="marker"):
    items = tuple(i for its in constructs.values() for i in its)
    return types.SimpleNamespace(name="m", constructs={k: tuple(v) for k, v in constructs.items()},
                                 cross_loadings={}, residual_covariances=(), higher_order={},
                                 general=None, identification=identification, place="m.yaml",
                                 items=items)


def ml_fit(spec, x):
    blocks = complete_data_blocks(x)
    layout = build_layout(spec, blocks[0].cov)
    theta, record, objective = fit_normal(layout, blocks)
    assert record.converged
    chi2 = 2 * (saturated_loglik([blocks[0].cov], [len(x)]) - objective.loglik(theta))
    return layout, theta, chi2


@pytest.fixture(scope="module")
def hs():
    x = holzinger.data().to_numpy(float)
    layout, theta, chi2 = ml_fit(spec_of(holzinger.CONSTRUCTS), x)
    return x, layout, theta, chi2, robust_ml(layout, theta, x, chi2)


def semopy_row(table, prm):
    if prm.kind == LOADING:
        hit = table[(table.lval == prm.b) & (table.op == "~") & (table.rval == prm.a)]
    else:
        hit = table[(table.op == "~~") & (((table.lval == prm.a) & (table.rval == prm.b)) |
                                          ((table.lval == prm.b) & (table.rval == prm.a)))]
    assert len(hit) == 1
    return hit.iloc[0]


def test_sandwich_se_match_semopy_robust_se_on_holzinger(hs):
    x, layout, theta, chi2, robust = hs
    model = semopy.Model(holzinger.THREE_FACTOR)
    model.fit(holzinger.data(), options={"ftol": 1e-12})
    table = model.inspect(se_robust=True)
    theirs = np.array([float(semopy_row(table, prm)["Std. Err"]) for prm in layout.params])
    est = np.array([float(semopy_row(table, prm)["Estimate"]) for prm in layout.params])
    np.testing.assert_allclose(theta, est, rtol=1e-4)       # same estimates first
    # semopy's sandwich: expected-information bread, casewise-score meat; engines agree to 1e-4
    np.testing.assert_allclose(robust.se, theirs, rtol=1e-4)


def implied_cov(layout, theta):
    return layout.patterns[0].matrices(theta).implied_cov


def numeric_jacobian(fun, theta, h=1e-6):
    cols = [(fun(theta + e) - fun(theta - e)) / (2 * h) for e in np.eye(len(theta)) * h]
    return np.array(cols).T


def test_sandwich_se_match_finite_difference_sandwich(hs):
    x, layout, theta, chi2, robust = hs
    n, p = x.shape
    mean = x.mean(axis=0)

    def case_loglik(t):
        return stats.multivariate_normal.logpdf(x, mean, implied_cov(layout, t))

    scores = numeric_jacobian(case_loglik, theta)                       # n × q
    jac = numeric_jacobian(lambda t: implied_cov(layout, t).ravel(), theta)
    v = np.linalg.inv(implied_cov(layout, theta))
    info = 0.5 * jac.T @ np.kron(v, v) @ jac                          # expected, per case
    bread = np.linalg.inv(info)
    acov = bread @ (scores.T @ scores / n) @ bread / n
    # central differences with h = 1e-6 are accurate to about 1e-8; 1e-5 leaves room
    np.testing.assert_allclose(robust.se, np.sqrt(np.diag(acov)), rtol=1e-5)


def duplication(p):
    rows, cols = np.tril_indices(p)
    d = np.zeros((p * p, len(rows)))
    for t, (i, j) in enumerate(zip(rows, cols)):
        d[i * p + j, t] = d[j * p + i, t] = 1.0
    return d


def exact_jacobian(fun, theta, h=1e-2):
    """Central differences with one Richardson step: exact up to rounding
    (~1e-14 here) for functions that are polynomials of degree ≤ 4 along each
    coordinate, as Σ(θ) = ΛΨΛᵀ + Θ is (degree ≤ 2 along one coordinate)."""
    def central(step):
        return numeric_jacobian(fun, theta, step)
    return (4 * central(h / 2) - central(h)) / 3


def dense_traces(layout, theta, x):
    """tr(UΓ) and tr((UΓ)²) from the textbook matrices (Satorra & Bentler
    1994): the dense p* × p* Γ̂ of vech(c_i c_iᵀ), W = ½Dᵀ(V⊗V)D and
    U = W − WΔ(ΔᵀWΔ)⁻¹ΔᵀW."""
    n, p = x.shape
    rows, cols = np.tril_indices(p)
    c = x - x.mean(axis=0)
    d_i = (c[:, :, None] * c[:, None, :])[:, rows, cols]
    gamma = np.cov(d_i, rowvar=False, bias=True)
    v = np.linalg.inv(implied_cov(layout, theta))
    dup = duplication(p)
    w = 0.5 * dup.T @ np.kron(v, v) @ dup
    delta = exact_jacobian(lambda t: implied_cov(layout, t)[rows, cols], theta)
    u = w - w @ delta @ np.linalg.inv(delta.T @ w @ delta) @ delta.T @ w
    ug = u @ gamma
    return np.trace(ug), np.trace(ug @ ug)


def test_scaling_traces_match_dense_textbook_formula(hs):
    x, layout, theta, chi2, robust = hs
    trace, trace2 = dense_traces(layout, theta, x)
    # algebraic identity (exact Jacobian in the reference): rounding only
    assert robust.test.trace == pytest.approx(trace, rel=1e-10)
    assert robust.test.trace_squared == pytest.approx(trace2, rel=1e-10)


def test_without_adjustment_the_variance_trace_is_not_computed(hs):
    x, layout, theta, chi2, robust = hs
    cheap = robust_ml(layout, theta, x, chi2, adjusted=False).test
    assert cheap.trace == robust.test.trace       # the same casewise computation
    assert np.isnan(cheap.trace_squared) and np.isnan(cheap.df_adjusted)


def test_scaled_statistic_on_holzinger_matches_recalled_value(hs):
    x, layout, theta, chi2, robust = hs
    # from memory: the widely reproduced robust fit of this model reports the scaled
    # statistic 80.872 with scaling factor 1.055 (unverified; loose tolerance 1e-3)
    assert robust.test.chi_square_scaled == pytest.approx(80.872, rel=1e-3)
    assert robust.test.scaling_factor == pytest.approx(1.055, rel=1e-3)


def test_adjusted_statistic_follows_its_definition(hs):
    x, layout, theta, chi2, robust = hs
    t = robust.test
    # Satorra & Bentler (1994): d* = tr(UΓ)²/tr((UΓ)²), T_adj = T d*/tr(UΓ)
    assert t.df_adjusted == pytest.approx(t.trace ** 2 / t.trace_squared, rel=1e-12)
    assert t.chi_square_adjusted == pytest.approx(chi2 * t.df_adjusted / t.trace, rel=1e-12)


def test_robust_indices_reduce_to_normal_ones_when_scaling_is_one():
    model = RobustTest(85.3, 24, 24.0, 30.0)      # c = 1
    base = RobustTest(918.9, 36, 36.0, 40.0)      # c_B = 1
    out = robust_fit_indices(model, base, 301)
    cfi, tli = comparative_fit(85.3, 24, 918.9, 36)
    # with c = c_B = 1 the Brosseau-Liard & Savalei formulas are the usual ones (algebra)
    assert out["cfi_robust"] == pytest.approx(cfi, rel=1e-12)
    assert out["tli_robust"] == pytest.approx(tli, rel=1e-12)
    assert out["rmsea_robust"] == pytest.approx(rmsea(85.3, 24, 301), rel=1e-12)


def test_robust_rmsea_follows_population_corrected_formula(hs):
    x, layout, theta, chi2, robust = hs
    base = baseline_test(x, layout.items)
    out = robust_fit_indices(robust.test, base, len(x))
    c = robust.test.scaling_factor
    # Brosseau-Liard, Savalei & Li (2012): √(max(T − c·df, 0)/(df (N − 1)))
    assert out["rmsea_robust"] == pytest.approx(np.sqrt((chi2 - c * 24) / (24 * 300)), rel=1e-10)
    cb = base.scaling_factor
    # Brosseau-Liard & Savalei (2014): CFI with T − c·df for model and baseline
    expect = 1 - (chi2 - c * 24) / (base.chi_square - cb * 36)
    assert out["cfi_robust"] == pytest.approx(expect, rel=1e-10)
    lo, hi = out["rmsea_robust_ci90"]
    assert lo < out["rmsea_robust"] < hi


def test_baseline_statistic_is_the_independence_chi_square(hs):
    x, layout, theta, chi2, robust = hs
    s = np.cov(x, rowvar=False, bias=True)
    base = baseline_test(x, layout.items)
    # the engine's closed form (indices.py), which is tested against semopy's baseline
    assert base.chi_square == pytest.approx(independence_chi_square([s], [len(x)])[0], rel=1e-12)


def skewed_sample(rng, n, loadings):
    """One factor; factor and errors are standardized χ²(1) draws (skewness √8,
    excess kurtosis 12), so the item distribution is far from normal."""
    p = len(loadings)
    eta = (rng.chisquare(1, n) - 1) / np.sqrt(2)
    eps = (rng.chisquare(1, (n, p)) - 1) / np.sqrt(2)
    return eta[:, None] * loadings + eps * np.sqrt(1 - loadings ** 2)


@pytest.mark.slow
def test_robust_se_match_empirical_sd_with_skewed_items():
    rng = np.random.default_rng(20240611)
    loadings = np.array([0.8, 0.7, 0.6, 0.7, 0.6, 0.5])
    spec = spec_of({"f": [f"y{i}" for i in range(6)]}, identification="unit-variance")
    reps, n = 300, 400
    est, se_robust, se_normal, scaled = [], [], [], []
    for _ in range(reps):
        x = skewed_sample(rng, n, loadings)
        layout, theta, chi2 = ml_fit(spec, x)
        r = robust_ml(layout, theta, x, chi2, adjusted=False)
        blocks = complete_data_blocks(x)
        _, _, info = fit_normal(layout, blocks, start=theta)[2].value_grad_info(theta)
        est.append(theta[:6])
        se_robust.append(r.se[:6])
        se_normal.append(np.sqrt(np.diag(np.linalg.inv(info) / n))[:6])
        scaled.append(r.test.chi_square_scaled)
    sd = np.std(est, axis=0, ddof=1)
    ratio = np.mean(se_robust, axis=0) / sd
    # issue 5 point 6: robust SEs within 15% of the empirical SD (an SD from 300
    # replications has a Monte Carlo error of about 4%)
    assert np.all(np.abs(ratio - 1) < 0.15), ratio
    # and the check can fail: normal-theory SEs miss by more than 15% here (theory: kurtosis 12)
    assert np.any(np.abs(np.mean(se_normal, axis=0) / sd - 1) > 0.15)
    # the scaled statistic's mean is near df = 9 (Monte Carlo error ≈ 0.25 here; allow 1)
    assert abs(np.mean(scaled) - 9) < 1.0


def test_variance_trace_from_a_subsample_is_close_to_the_full_sample_one(monkeypatch):
    # beyond the stated budget tr((UΓ)²) comes from a seeded subsample and the
    # result says so; theory: a sample moment of the subsample, relative error ~1/√m
    from types import SimpleNamespace
    import scalewright.estimate.variance_trace as variance_trace
    from scalewright.evaluate import evaluate_normal
    rng = np.random.default_rng(8)
    n = 40_000
    common = rng.standard_normal((n, 2))
    load = np.zeros((6, 2))
    load[:3, 0], load[3:, 1] = 0.7, 0.6
    x = common @ load.T + rng.standard_t(6, size=(n, 6)) * 0.6
    spec = SimpleNamespace(name="m", constructs={"a": ("i1", "i2", "i3"), "b": ("i4", "i5", "i6")},
                           cross_loadings={}, residual_covariances=(), higher_order={},
                           general=None, identification="unit-variance", place="t.yaml",
                           items=tuple(f"i{k}" for k in range(1, 7)))
    fit = evaluate_normal(spec, x)
    est = fit.estimate
    full = robust_ml(est.layout, est.theta, x, fit.fit.chi_square)
    assert full.test.variance_rows is None and full.notes == ()
    assert full.test.to_dict()["adjusted_subsample_rows"] is None
    # a budget that admits about 20,000 rows (the Gram route is linear in the rows)
    monkeypatch.setattr(variance_trace, "FLOP_BUDGET",
                        variance_trace.route_costs(20_000, 6, est.layout.n_params)["gram"])
    sub = robust_ml(est.layout, est.theta, x, fit.fit.chi_square)
    assert sub.test.variance_rows == 20_000
    assert sub.test.to_dict()["adjusted_subsample_rows"] == 20_000
    (note,) = sub.notes
    assert "seeded random subsample of 20,000 of the 40,000 rows" in note
    assert sub.test.trace == pytest.approx(full.test.trace, rel=1e-10)   # always every row
    assert sub.test.trace_squared == pytest.approx(full.test.trace_squared, rel=0.1)
    again = robust_ml(est.layout, est.theta, x, fit.fit.chi_square)
    assert again.test.trace_squared == sub.test.trace_squared           # seeded
    # the model's JSON and its warnings (shown in the report) say so
    from scalewright.evaluate_real import evaluate_answers
    from scalewright.methods import MethodChoice
    result = evaluate_answers(spec, x, MethodChoice("robust", "none", ()), "t.csv").to_dict()
    assert result["fit"]["adjusted_subsample_rows"] == 20_000
    assert note in result["warnings"]
