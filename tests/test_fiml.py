"""Full-information ML for missing answers and its Yuan–Bentler corrections.

Outside references: semopy 2.3.11's FIML (``semopy.ModelMeans``, whose ML
objective with means is FIML; run with ftol 1e-12) on Holzinger–Swineford
with seeded MCAR holes; scipy's multivariate normal density, differentiated
numerically in the test, for the saturated likelihood, the observed
information and the sandwich; statistical theory (seeded simulation).
"""

from __future__ import annotations

import json
import types
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import optimize, stats

import holzinger
from scalewright.errors import StudyError
from scalewright.estimate.fiml import (fiml_information, fit_fiml, missing_patterns,
                                       observed_acov, pattern_moments, saturated_em,
                                       with_intercepts, yuan_bentler)
from scalewright.estimate.normal import complete_data_blocks, fit_normal
from scalewright.indices import saturated_loglik
from scalewright.layout import INTERCEPT, LOADING
from scalewright.specify import build_layout
from references.make_fiml_semopy import data_with_holes

REFERENCES = Path(__file__).parent / "references"


def spec_of(constructs, identification="marker"):
    items = tuple(i for its in constructs.values() for i in its)
    return types.SimpleNamespace(name="m", constructs={k: tuple(v) for k, v in constructs.items()},
                                 cross_loadings={}, residual_covariances=(), higher_order={},
                                 general=None, identification=identification, place="m.yaml",
                                 items=items)


def fiml(spec, x):
    patterns = missing_patterns(x, spec.items, "data.csv")
    moments = pattern_moments(x, patterns)
    sat = saturated_em(moments)
    fitted = fit_fiml(build_layout(spec, sat.cov), x, moments, sat)
    assert fitted.record.converged
    return fitted, patterns, moments


@pytest.fixture(scope="module")
def hs_holes():
    x = data_with_holes()                           # seeded MCAR holes, 10% of the answers
    spec = spec_of(holzinger.CONSTRUCTS)
    fitted, patterns, moments = fiml(spec, x)
    info = fiml_information(fitted.layout, fitted.theta, x, patterns, moments)
    return x, fitted, patterns, moments, info


def test_fiml_estimates_match_semopy_modelmeans_on_holzinger_with_mcar_holes(hs_holes):
    x, fitted, *_ = hs_holes
    # semopy ModelMeans (FIML) with ftol 1e-12 on the same holes, stored by the script
    # tests/references/make_fiml_semopy.py (one fit takes over a minute)
    reference = json.loads((REFERENCES / "fiml_semopy.json").read_text())
    table = pd.DataFrame(reference["rows"])
    ours, theirs = [], []
    for k, prm in enumerate(fitted.layout.params):
        if prm.kind == LOADING:
            hit = table[(table.lval == prm.b) & (table.op == "~") & (table.rval == prm.a)]
        elif prm.kind == INTERCEPT:
            hit = table[(table.lval == prm.a) & (table.op == "~") & (table.rval == "1")]
        else:
            hit = table[(table.op == "~~") & (((table.lval == prm.a) & (table.rval == prm.b)) |
                                              ((table.lval == prm.b) & (table.rval == prm.a)))]
        assert len(hit) == 1
        ours.append(fitted.theta[k])
        theirs.append(float(hit.iloc[0]["estimate"]))
    # two engines at their tight stopping rules: 1e-4 relative (DEVELOPERS.md)
    np.testing.assert_allclose(ours, theirs, rtol=1e-4)


def negative_loglik(mu, sigma, x):
    """−ℓ summed over rows, each row's answered items only (scipy densities)."""
    total = 0.0
    for row in x:
        o = ~np.isnan(row)
        total -= stats.multivariate_normal.logpdf(row[o], mu[o], sigma[np.ix_(o, o)])
    return total


def test_em_saturated_matches_direct_optimisation():
    rng = np.random.default_rng(7)
    cov = np.array([[1.0, 0.5, 0.3], [0.5, 1.0, 0.4], [0.3, 0.4, 1.0]])
    x = rng.multivariate_normal([1.0, 2.0, 3.0], cov, size=80)
    x[rng.random(x.shape) < 0.2] = np.nan
    x = x[~np.isnan(x).all(axis=1)]
    patterns = missing_patterns(x, ("a", "b", "c"), "data.csv")
    sat = saturated_em(pattern_moments(x, patterns))
    rows, cols = np.tril_indices(3)

    def unpack(v):
        low = np.zeros((3, 3))
        low[rows, cols] = v[3:]
        return v[:3], low @ low.T

    start = np.concatenate([np.nanmean(x, axis=0), np.eye(3)[rows, cols]])
    res = optimize.minimize(lambda v: negative_loglik(*unpack(v), x), start, method="BFGS",
                            options={"gtol": 1e-9})
    mu, sigma = unpack(res.x)
    # scipy's optimiser stops near 1e-6 in the parameters
    assert sat.converged
    assert sat.loglik == pytest.approx(-res.fun, abs=1e-6)
    np.testing.assert_allclose(sat.mean, mu, atol=1e-4)
    np.testing.assert_allclose(sat.cov, sigma, atol=1e-4)


def numeric_jacobian(fun, theta, h=1e-6):
    return np.array([(fun(theta + e) - fun(theta - e)) / (2 * h)
                     for e in np.eye(len(theta)) * h]).T


def casewise_loglik(layout, x):
    def fun(theta):
        mats = layout.patterns[0].matrices(theta)
        mu, sigma = mats.implied_mean, mats.implied_cov
        out = np.empty(len(x))
        for i, row in enumerate(x):
            o = ~np.isnan(row)
            out[i] = stats.multivariate_normal.logpdf(row[o], mu[o], sigma[np.ix_(o, o)])
        return out
    return fun


@pytest.fixture(scope="module")
def numeric_pieces(hs_holes):
    x, fitted, *_ = hs_holes
    scores = numeric_jacobian(casewise_loglik(fitted.layout, x), fitted.theta)
    hessian = numeric_jacobian(lambda t: fitted.objective.value_grad_info(t)[1], fitted.theta)
    return scores, 0.5 * (hessian + hessian.T)     # Hessian of f = −ℓ/N: observed info per case


def test_observed_information_matches_finite_difference_hessian(hs_holes, numeric_pieces):
    x, fitted, patterns, moments, info = hs_holes
    scores, observed = numeric_pieces
    # the analytic gradient differenced numerically: accurate to about 1e-8
    np.testing.assert_allclose(info.observed, observed, atol=1e-6)
    se = np.sqrt(np.diag(observed_acov(info, fitted.n)))
    np.testing.assert_allclose(se, np.sqrt(np.diag(np.linalg.inv(observed) / fitted.n)),
                               rtol=1e-5)


def test_yuan_bentler_se_match_finite_difference_sandwich(hs_holes, numeric_pieces):
    x, fitted, patterns, moments, info = hs_holes
    scores, observed = numeric_pieces
    n = fitted.n
    # scores of scipy's log densities sum to zero at the estimates (the fit converged)
    np.testing.assert_allclose(scores.sum(axis=0), 0.0, atol=1e-5)
    bread = np.linalg.inv(observed)
    reference = bread @ (scores.T @ scores / n) @ bread / n
    robust = yuan_bentler(info, n, fitted.chi_square, fitted.df)
    # independent route, central differences (h = 1e-6): agreement to 1e-5 relative
    np.testing.assert_allclose(robust.se, np.sqrt(np.diag(reference)), rtol=1e-5)


def test_fiml_without_holes_equals_complete_data_ml():
    x = holzinger.data().to_numpy(float)
    spec = spec_of(holzinger.CONSTRUCTS)
    fitted, *_ = fiml(spec, x)
    blocks = complete_data_blocks(x)
    layout = build_layout(spec, blocks[0].cov)
    theta, _, objective = fit_normal(layout, blocks)
    chi2 = 2 * (saturated_loglik([blocks[0].cov], [len(x)]) - objective.loglik(theta))
    # with no holes FIML is ML with saturated means (theory); optimiser tolerance 1e-7
    assert fitted.chi_square == pytest.approx(chi2, rel=1e-7)
    np.testing.assert_allclose(fitted.theta[:layout.n_params], theta, rtol=1e-6)
    np.testing.assert_allclose(fitted.theta[layout.n_params:], x.mean(axis=0), rtol=1e-6)


def test_with_intercepts_frees_one_intercept_per_item_at_the_given_means():
    x = holzinger.data().to_numpy(float)
    spec = spec_of(holzinger.CONSTRUCTS)
    layout = build_layout(spec, np.cov(x, rowvar=False))
    means = x.mean(axis=0)
    out = with_intercepts(layout, means)
    added = [p for p in out.params[layout.n_params:]]
    assert [p.kind for p in added] == [INTERCEPT] * 9
    assert [p.a for p in added] == list(layout.items)
    np.testing.assert_array_equal(out.start[layout.n_params:], means)
    assert out.df() == layout.df()       # p more moments, p more parameters
    np.testing.assert_array_equal(out.patterns[0].matrices(out.start).implied_mean, means)


def test_item_without_answers_raises():
    x = np.random.default_rng(1).normal(size=(50, 3))
    x[:, 1] = np.nan
    x[0, 1] = 2.0
    with pytest.raises(StudyError, match=r"data.csv: item 'b' has 1 answer\(s\) in 50 rows"):
        missing_patterns(x, ("a", "b", "c"), "data.csv")


def test_items_never_answered_together_raise():
    x = np.random.default_rng(2).normal(size=(60, 3))
    x[:30, 0] = np.nan           # planned missingness: half skip 'a', the other half 'c'
    x[30:, 2] = np.nan
    with pytest.raises(StudyError, match=r"items 'a' and 'c' were never answered by the same "
                                         r"person \(0 of 60 rows"):
        missing_patterns(x, ("a", "b", "c"), "data.csv")


def test_rows_without_any_answer_are_left_out():
    x = np.random.default_rng(3).normal(size=(40, 3))
    x[5] = np.nan
    x[6, 0] = np.nan
    patterns = missing_patterns(x, ("a", "b", "c"), "data.csv")
    assert patterns.n == 39 and patterns.n_empty == 1
    summary = patterns.to_dict()
    assert summary["n_no_answer"] == 1 and summary["n_complete"] == 38
    assert summary["items"][0]["rate_missing"] == pytest.approx(2 / 40)


@pytest.mark.slow
def test_fiml_recovers_population_loadings_under_mcar():
    rng = np.random.default_rng(1988)
    loadings = np.array([0.8, 0.7, 0.6, 0.7, 0.6, 0.5])
    sigma = np.outer(loadings, loadings) + np.diag(1 - loadings ** 2)
    spec = spec_of({"f": [f"y{i}" for i in range(6)]}, identification="unit-variance")
    reps, n = 200, 300
    est, scaled = [], []
    for _ in range(reps):
        x = rng.multivariate_normal(np.zeros(6), sigma, size=n)
        x[rng.random(x.shape) < 0.15] = np.nan           # 15% MCAR
        x = x[~np.isnan(x).all(axis=1)]
        fitted, patterns, moments = fiml(spec, x)
        est.append(fitted.theta[:6])
        info = fiml_information(fitted.layout, fitted.theta, x, patterns, moments)
        scaled.append(yuan_bentler(info, fitted.n, fitted.chi_square, fitted.df)
                      .test.chi_square_scaled)
    est = np.array(est)
    mc_error = est.std(axis=0, ddof=1) / np.sqrt(reps)
    # theory: FIML is consistent under MCAR; the mean over 200 replications lies within
    # 4 Monte Carlo errors (plus 0.01 for the O(1/n) ML bias) of the population loading
    assert np.all(np.abs(est.mean(axis=0) - loadings) < 4 * mc_error + 0.01)
    # the Yuan–Bentler scaled statistic is near df = 9 under normal MCAR data
    # (Monte Carlo error of the mean ≈ 0.3; allow 1)
    assert abs(np.mean(scaled) - 9) < 1.0


def test_warm_started_point_estimate_of_a_smaller_model_equals_its_full_fit(hs_holes):
    # omega if dropped refits the model without one item from the full model's solution
    # (evaluate_real.fiml_point_estimate); its estimates must be the FIML estimates of
    # the smaller model fitted from scratch (the full FIML fit is checked against semopy
    # above), to the point estimate's gradient tolerance: 1e-5 relative
    from scalewright.evaluate_real import fiml_point_estimate
    from scalewright.estimate.result import Estimate
    x, fitted, *_ = hs_holes
    constructs = {k: tuple(i for i in v if i != "x5") for k, v in holzinger.CONSTRUCTS.items()}
    smaller = spec_of(constructs)
    keep = [holzinger.ITEMS.index(i) for i in smaller.items]
    scratch, _, _ = fiml(smaller, x[:, keep])
    parent = Estimate(fitted.layout, fitted.theta, None, fitted.record, fitted.n, fitted.loglik,
                      "fiml")
    start_cov = np.cov(x[:, keep][~np.isnan(x[:, keep]).any(axis=1)], rowvar=False)
    warm = fiml_point_estimate(smaller, x[:, keep], "data.csv", parent, start_cov)
    assert warm.record.converged and warm.layout.params == scratch.layout.params
    np.testing.assert_allclose(warm.theta, scratch.theta, rtol=1e-5, atol=1e-7)


def test_objective_information_over_patterns_matches_per_pattern_traces(hs_holes):
    x, fitted, patterns, moments, _ = hs_holes
    layout = fitted.layout
    pattern = layout.patterns[0]
    theta = fitted.theta * 1.05                       # away from the optimum
    _, grad, info = fitted.objective.value_grad_info(theta)
    # independent computation: ∂Σ, ∂μ by central differences of the implied moments, then
    # per pattern ½ tr(V ∂Σ_oo V ∂Σ_oo) + ∂μ_oᵀ V ∂μ_o on the submatrices (normal-theory
    # expected information of a sum over patterns; Lawley & Maxwell 1971, ch. 4)
    q, h = len(theta), 1e-6
    d_sigma, d_mu = [], []
    for k in range(q):
        e = np.zeros(q)
        e[k] = h
        up, down = pattern.matrices(theta + e), pattern.matrices(theta - e)
        d_sigma.append((up.implied_cov - down.implied_cov) / (2 * h))
        d_mu.append((up.implied_mean - down.implied_mean) / (2 * h))
    sigma = pattern.matrices(theta).implied_cov
    expected = np.zeros((q, q))
    for mask, count in zip(moments.masks, moments.counts):
        o = np.nonzero(mask)[0]
        v = np.linalg.inv(sigma[np.ix_(o, o)])
        vd = [v @ d[np.ix_(o, o)] for d in d_sigma]
        vm = [v @ m[o] for m in d_mu]
        part = np.array([[0.5 * np.sum(vd[c] * vd[d].T) + d_mu[c][o] @ vm[d] for d in range(q)]
                         for c in range(q)])
        expected += count / moments.counts.sum() * part
    # the gradient against scipy's numerical derivative of the objective itself
    numeric = optimize.approx_fprime(theta, fitted.objective.value, 1e-7)
    # central differences of polynomials: rounding only, 1e-7 relative to the largest element
    np.testing.assert_allclose(info, expected, atol=1e-7 * np.abs(expected).max())
    # forward differences at step 1e-7: error of order 1e-7 times the curvature
    np.testing.assert_allclose(grad, numeric, atol=1e-5)
