"""Residual correlations and standardized residuals.

References: semopy's implied covariance matrix on Holzinger–Swineford (fitted
with ``ftol = 1e-12``) and pandas' sample correlations for the residual
correlation matrix; statistical theory (a seeded simulation from a model that
holds) for the standardized residuals, which must then be standard normal.
"""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest
import semopy
from numpy.testing import assert_allclose

from conftest import HS_CONSTRUCTS, HS_ITEMS, HS_SEMOPY, make_spec, simulate_cfa
from scalewright.estimate.normal import Block
from scalewright.evaluate import evaluate_normal
from scalewright.residuals import FLAG_AT, residual_correlations


@pytest.fixture(scope="module")
def semopy_residuals(hs_data):
    data = hs_data[list(HS_ITEMS)]
    model = semopy.Model(HS_SEMOPY)
    model.fit(data, options={"ftol": 1e-12})
    sigma = model.calc_sigma()[0]
    sd = np.sqrt(np.diag(sigma))
    return data.corr().to_numpy() - sigma / np.outer(sd, sd)


@pytest.fixture(scope="module")
def hs_residuals(hs_x):
    return residual_correlations(evaluate_normal(make_spec(HS_CONSTRUCTS), hs_x).estimate)


def test_residual_correlations_match_semopy_implied_matrix(hs_residuals, semopy_residuals):
    # the two engines' estimates agree to ~1e-6 (test_engine.py); residual
    # correlations inherit that accuracy, so 1e-5 absolute
    assert_allclose(hs_residuals.matrix, semopy_residuals, atol=1e-5)


def test_flagged_pairs_are_those_at_or_beyond_the_threshold(hs_residuals, semopy_residuals):
    rows, cols = np.triu_indices(9, k=1)
    expected = {(HS_ITEMS[i], HS_ITEMS[j]) for i, j in zip(rows, cols)
                if abs(semopy_residuals[i, j]) >= FLAG_AT}
    listed = hs_residuals.largest()
    assert {(e["a"], e["b"]) for e in listed if e["flagged"]} == expected
    assert len(expected) == 5        # semopy's matrix: x2–x7, x3–x5, x1–x9, x3–x9, x1–x7


def test_largest_lists_ten_pairs_sorted_by_size_when_fewer_are_flagged(hs_residuals):
    values = [abs(e["value"]) for e in hs_residuals.largest()]
    assert len(values) == 10 and values == sorted(values, reverse=True)


def test_threshold_is_configurable(hs_x):
    estimate = evaluate_normal(make_spec(HS_CONSTRUCTS), hs_x).estimate
    result = residual_correlations(estimate, threshold=0.05)
    flagged = [e for e in result.largest() if e["flagged"]]
    assert result.to_dict()["threshold"] == 0.05
    assert all(abs(e["value"]) >= 0.05 for e in flagged) and len(flagged) > 5


def test_freed_residual_covariance_has_no_standardized_residual(hs_x):
    # the model reproduces the freed covariance of x7 and x8 exactly, so its
    # residual has no sampling variance and no z is defined
    spec = make_spec(HS_CONSTRUCTS, residual_covariances=[("x7", "x8")])
    result = residual_correlations(evaluate_normal(spec, hs_x).estimate)
    assert np.isnan(result.standardized[6, 7])
    assert_allclose(result.matrix[6, 7], 0.0, atol=1e-8)


def test_to_dict_holds_the_matrix_for_a_heat_map(hs_residuals):
    out = hs_residuals.to_dict()
    assert out["items"] == list(HS_ITEMS)
    assert np.array(out["matrix"]).shape == (9, 9)
    assert out["n_flagged"] == 5           # semopy's matrix, as in the flag test above
    assert out["standardized_basis"] == "normal" and out["standardized_not_computed"] is None


def test_standardized_residuals_are_standard_normal_when_the_model_holds():
    # theory: under a correct model and normal data the z values are asymptotically
    # N(0, 1). One factor, six items, N = 300, 200 seeded replications. The Monte
    # Carlo standard error of a variance from 200 draws is √(2/200) = .10 per pair;
    # pooled over the 15 pairs (correlated: 9 df) about .035, so ±.15 is four of
    # them. Dividing by √Var(s_ij) alone (normalized residuals) gives a pooled
    # variance near .2 here, which this check rejects.
    rng = np.random.default_rng(20240612)
    loadings = np.array([[0.8], [0.7], [0.6], [0.5], [0.7], [0.6]])
    spec = make_spec({"f": tuple(f"y{i}" for i in range(1, 7))})
    rows, cols = np.triu_indices(6, k=1)
    z = []
    for _ in range(200):
        x, _ = simulate_cfa(rng, loadings, np.eye(1), 300)
        z.append(residual_correlations(evaluate_normal(spec, x).estimate).standardized[rows, cols])
    z = np.array(z)
    assert abs(z.var(axis=0).mean() - 1.0) < 0.15
    # means: each pair's mean has Monte Carlo SE 1/√200 = .07; four SE
    assert np.all(np.abs(z.mean(axis=0)) < 0.28)


def _split(estimate):
    split = tuple(Block(0, b.observed, b.n // 2, b.cov, b.mean) for b in estimate.blocks * 2)
    return dataclasses.replace(estimate, blocks=split)


def test_missing_data_blocks_without_an_observed_covariance_are_refused(hs_x):
    estimate = evaluate_normal(make_spec(HS_CONSTRUCTS), hs_x).estimate
    with pytest.raises(ValueError, match="with missing-data blocks pass the saturated model"):
        residual_correlations(_split(estimate))


def test_saturated_moments_given_for_an_ml_estimate_give_correlations_only(
        hs_x, semopy_residuals):
    # complete data as one "pattern": the saturated model is the sample moments, so
    # the correlations are the complete-data ones (semopy's implied matrix, 1e-5 as
    # above); an ML estimate gets no z against the saturated model, and says why
    from scalewright.estimate.fiml import saturated_model

    estimate = evaluate_normal(make_spec(HS_CONSTRUCTS), hs_x).estimate
    result = residual_correlations(_split(estimate),
                                   saturated=saturated_model(hs_x, HS_ITEMS, "hs.csv"))
    assert_allclose(result.matrix, semopy_residuals, atol=1e-5)
    assert result.standardized is None
    assert result.z_note == "against the saturated model they are computed for FIML estimates only"


def test_ordinal_model_residuals_are_polychoric_minus_implied_with_dwls_z(hs_x):
    # the ordinal route: HS tests cut at their quintiles, DWLS on the polychoric
    # matrix.  Reference: semopy's DWLS fit to the same matrix and weights
    # (test_dwls.py; estimates agree to ~1e-6, so residuals to 1e-5), and
    # residual_variances, itself checked against the dense sandwich in test_dwls
    from test_dwls import _quantile_categories, _semopy_dwls

    from scalewright.estimate.dwls import residual_variances
    from scalewright.estimate.polychoric import ordinal_moments
    from scalewright.evaluate_ordinal import evaluate_ordinal

    answers = _quantile_categories(hs_x, 5)
    estimate = evaluate_ordinal(make_spec(HS_CONSTRUCTS), answers, HS_ITEMS).estimate
    result = residual_correlations(estimate)
    moments = ordinal_moments(answers, HS_ITEMS)
    model, _ = _semopy_dwls(HS_SEMOPY, moments)
    order = [model.vars["observed"].index(i) for i in HS_ITEMS]
    sigma = model.calc_sigma()[0][np.ix_(order, order)]
    sd = np.sqrt(np.diag(sigma))
    expected = moments.raw_correlations - sigma / np.outer(sd, sd)
    np.fill_diagonal(expected, 0.0)
    assert_allclose(result.matrix, expected, atol=1e-5)
    rows, cols = np.triu_indices(9, 1)
    z = result.matrix[rows, cols] / np.sqrt(
        residual_variances(estimate.layout, estimate.theta, moments.acov_corr))
    assert_allclose(result.standardized[rows, cols], z, rtol=1e-10)
    assert result.to_dict()["observed"] == "polychoric correlations"
    assert result.to_dict()["standardized_basis"] == "dwls"


# --------------------------------------------------------------------------
# Robust ML: z values from the distribution-free variance of the residuals


def _robust(spec, x):
    from scalewright.evaluate_real import evaluate_answers
    from scalewright.methods import MethodChoice

    return evaluate_answers(spec, x, MethodChoice("robust", "none", ()), "t.csv").estimate


def test_robust_z_values_match_the_dense_distribution_free_formula(hs_x):
    # Browne (1984): s − σ̂ ≈ P (s − σ), P = I − Δ(ΔᵀWΔ)⁻¹ΔᵀW with the normal-theory
    # weight W = ½ Dᵀ(V⊗V)D, so Var(s − σ̂) = P Γ Pᵀ / N with the distribution-free
    # Γ = (1/N) Σ e_i e_iᵀ, e_i = vech((x_i − x̄)(x_i − x̄)ᵀ − S).  Written out densely
    # here: Δ by central differences of the implied matrix (error ~1e-10), the
    # duplication matrix D by its definition.  Agreement to 1e-7 relative.
    estimate = _robust(make_spec(HS_CONSTRUCTS), hs_x)
    assert estimate.method == "robust-ml"
    result = residual_correlations(estimate, answers=hs_x)
    n, p = hs_x.shape
    rows, cols = np.tril_indices(p)
    dup = np.zeros((p * p, len(rows)))
    dup[rows * p + cols, np.arange(len(rows))] = 1.0
    dup[cols * p + rows, np.arange(len(rows))] = 1.0
    pattern = estimate.layout.patterns[0]
    sigma = pattern.matrices(estimate.theta).implied_cov
    v = np.linalg.inv(sigma)
    weight = 0.5 * dup.T @ np.kron(v, v) @ dup
    step = 1e-6

    def vech_sigma(theta):
        return pattern.matrices(theta).implied_cov[rows, cols]

    delta = np.column_stack([(vech_sigma(estimate.theta + step * e)
                              - vech_sigma(estimate.theta - step * e)) / (2 * step)
                             for e in np.eye(len(estimate.theta))])
    c = hs_x - hs_x.mean(axis=0)
    s = c.T @ c / n
    e = c[:, rows] * c[:, cols] - s[rows, cols]
    gamma = e.T @ e / n
    proj = np.eye(len(rows)) - delta @ np.linalg.solve(delta.T @ weight @ delta,
                                                        delta.T @ weight)
    var = np.diag(proj @ gamma @ proj.T) / n
    dense = np.full((p, p), np.nan)
    dense[rows, cols] = dense[cols, rows] = (s - sigma)[rows, cols] / np.sqrt(var)
    listed = [(HS_ITEMS.index(r["a"]), HS_ITEMS.index(r["b"])) for r in result.largest()]
    assert len(listed) == 10
    for i, j in listed:
        assert_allclose(result.standardized[i, j], dense[i, j], rtol=1e-7)
    assert result.to_dict()["standardized_basis"] == "distribution-free"
    # pairs not listed get no z (they are not shown)
    assert np.isnan(result.standardized).sum() == 9 + 2 * (36 - 10)


def test_robust_estimate_without_answers_gets_no_z_values(hs_x):
    result = residual_correlations(_robust(make_spec(HS_CONSTRUCTS), hs_x))
    assert result.standardized is None
    assert all(r["standardized"] is None for r in result.largest())


@pytest.mark.slow
def test_robust_z_values_are_standard_normal_under_a_true_model_with_heavy_tails():
    # theory: under the model the z values are asymptotically N(0, 1) whatever the
    # distribution (Browne 1984).  One factor, six items, factor and errors from
    # Student's t with 5 df scaled to unit variance (excess kurtosis 6), N = 500,
    # 200 seeded replications (measured once: pooled variance 0.999).  The
    # normal-theory variance (σ_iiσ_jj + σ_ij²)/N minus the sandwich variance of
    # σ̂, used before, was negative for 71% of the pairs on this design.
    rng = np.random.default_rng(20261202)
    loadings = np.array([0.8, 0.7, 0.6, 0.5, 0.7, 0.6])
    spec = make_spec({"f": tuple(f"y{i}" for i in range(1, 7))})
    scale = np.sqrt(3.0 / 5.0)                         # Var t(5) = 5/3
    z = []
    for _ in range(200):
        eta = rng.standard_t(5, size=(500, 1)) * scale
        errors = rng.standard_t(5, size=(500, 6)) * scale * np.sqrt(1 - loadings ** 2)
        x = eta * loadings + errors
        result = residual_correlations(_robust(spec, x), answers=x, threshold=0.0)
        rows, cols = np.triu_indices(6, k=1)
        z.append(result.standardized[rows, cols])      # threshold 0: every pair listed
    z = np.array(z)
    assert not np.isnan(z).any()
    # Monte Carlo SE of a variance from 200 draws ≈ .10 per pair (more with heavy
    # tails), pooled over 15 correlated pairs ≈ .05: ±.2 is four of them
    assert abs(z.var(axis=0).mean() - 1.0) < 0.2
    # Monte Carlo SE of each pair's mean z ≈ 1/√200 = .07: ±.3 is four of them
    assert np.all(np.abs(z.mean(axis=0)) < 0.3)


# --------------------------------------------------------------------------
# FIML: z values against the saturated (EM) matrix


def _fiml(spec, x):
    from scalewright.estimate.fiml import saturated_model
    from scalewright.evaluate_real import evaluate_answers
    from scalewright.methods import MethodChoice

    estimate = evaluate_answers(spec, x, MethodChoice("normal", "full-information", ()),
                                "t.csv").estimate
    assert estimate.method == "fiml"
    return estimate, saturated_model(x, spec.items, "t.csv")


def _loglik_by_pattern(x, mu, sigma):
    """ℓ of the answered items, row by row (scipy's normal density), grouped by pattern."""
    from scipy import stats

    masks, index = np.unique(~np.isnan(x), axis=0, return_inverse=True)
    total = 0.0
    for k, o in enumerate(masks):
        rows = x[index.ravel() == k][:, o]
        total += stats.multivariate_normal.logpdf(rows, mu[o], sigma[np.ix_(o, o)]).sum()
    return total


def test_fiml_z_values_match_a_finite_difference_hessian_of_the_saturated_likelihood():
    # Var(ŝ − σ̂) = Var(ŝ) − Var(σ̂) for nested ML estimates under the model
    # (Hausman 1978).  Written out here: Var(ŝ) from the inverse Hessian of the
    # saturated log-likelihood (scipy densities of the answered items, central
    # second differences, h = 1e-4: error ~1e-7 relative), Var(σ̂) = Δ acov Δᵀ with Δ
    # by central differences of the implied matrix.  Agreement to 1e-5 relative.
    rng = np.random.default_rng(20261203)
    loadings = np.array([[0.8], [0.7], [0.6], [0.5], [0.7]])
    x, _ = simulate_cfa(rng, loadings, np.eye(1), 250)
    x[rng.random(x.shape) < 0.15] = np.nan
    x = x[~np.isnan(x).all(axis=1)]
    spec = make_spec({"f": tuple(f"y{i}" for i in range(1, 6))})
    estimate, (moments, saturated) = _fiml(spec, x)
    result = residual_correlations(estimate, saturated=(moments, saturated), threshold=0.0)
    p = 5
    rows, cols = np.tril_indices(p)

    def loglik(beta):
        sigma = np.zeros((p, p))
        sigma[rows, cols] = beta[:len(rows)]
        sigma[cols, rows] = beta[:len(rows)]
        return _loglik_by_pattern(x, beta[len(rows):], sigma)

    beta = np.concatenate([saturated.cov[rows, cols], saturated.mean])
    h = 1e-4
    eye = np.eye(len(beta)) * h
    hess = np.zeros((len(beta), len(beta)))
    for i, j in zip(*np.triu_indices(len(beta))):
        a, b = eye[i], eye[j]
        hess[i, j] = hess[j, i] = (loglik(beta + a + b) - loglik(beta + a - b)
                                   - loglik(beta - a + b) + loglik(beta - a - b)) / (4 * h * h)
    var_saturated = np.diag(np.linalg.inv(-hess))
    pattern = estimate.layout.patterns[0]

    def vech_sigma(theta):
        return pattern.matrices(theta).implied_cov[rows, cols]

    step = 1e-6
    delta = np.column_stack([(vech_sigma(estimate.theta + step * e)
                              - vech_sigma(estimate.theta - step * e)) / (2 * step)
                             for e in np.eye(len(estimate.theta))])
    var = var_saturated[:len(rows)] - np.einsum("ka,ab,kb->k", delta, estimate.acov, delta)
    sigma = pattern.matrices(estimate.theta).implied_cov
    off = rows != cols
    z = (saturated.cov - sigma)[rows, cols][off] / np.sqrt(var[off])
    assert_allclose(result.standardized[rows[off], cols[off]], z, rtol=1e-5)
    assert result.to_dict()["standardized_not_computed"] is None
    assert result.to_dict()["standardized_basis"] == "fiml"


def test_robust_fiml_z_values_need_the_answers(hs_x):
    x = hs_x.copy()
    x[np.random.default_rng(3).random(x.shape) < 0.05] = np.nan
    estimate, saturated = _fiml(make_spec(HS_CONSTRUCTS), x)
    robust = dataclasses.replace(estimate, method="robust-fiml")
    out = residual_correlations(robust, saturated=saturated).to_dict()
    assert out["standardized_not_computed"] == ("the answers behind the robust estimate were "
                                                "not given")
    assert out["standardized_basis"] is None
    assert all(r["standardized"] is None for r in out["largest"])
    assert out["observed"].startswith("correlations of the saturated model")


@pytest.mark.slow
def test_robust_fiml_z_values_are_standard_normal_for_heavy_tailed_answers_with_holes():
    # theory (Yuan & Bentler 2000, the estimators' casewise expansions): under the
    # model the z values are asymptotically N(0, 1) whatever the distribution.  One
    # factor, six items, multivariate t with 5 df scaled to unit variances (an
    # elliptical distribution, where normal-theory variances are too small), N = 400,
    # 200 seeded replications, answers missing at random as in the test above.
    # Measured once: pooled variance 1.01 and 4.9% beyond ±1.96; the normal-theory
    # FIML z values of the same samples had a pooled variance of 2.25.
    from scalewright.estimate.fiml import saturated_model
    from scalewright.evaluate_real import evaluate_answers
    from scalewright.methods import MethodChoice

    rng = np.random.default_rng(20261205)
    loadings = np.array([0.8, 0.7, 0.6, 0.5, 0.7, 0.6])
    items = tuple(f"y{i}" for i in range(1, 7))
    spec = make_spec({"f": items})
    rows, cols = np.triu_indices(6, k=1)
    z, z_normal = [], []
    for _ in range(200):
        normal = (rng.standard_normal((400, 1)) * loadings
                  + rng.standard_normal((400, 6)) * np.sqrt(1 - loadings ** 2))
        x = normal * np.sqrt(3.0 / rng.chisquare(5, size=(400, 1)))
        x[(x[:, 0] > np.median(x[:, 0])) & (rng.random(400) < 0.5), 5] = np.nan
        x[rng.random(400) < 0.1, 2] = np.nan
        saturated = saturated_model(x, items, "t.csv")
        robust = evaluate_answers(spec, x, MethodChoice("robust", "full-information", ()),
                                  "t.csv").estimate
        assert robust.method == "robust-fiml"
        z.append(residual_correlations(robust, saturated=saturated, answers=x,
                                       threshold=0.0).standardized[rows, cols])
        estimate, _ = _fiml(spec, x)
        z_normal.append(residual_correlations(estimate, saturated=saturated,
                                              threshold=0.0).standardized[rows, cols])
    z, z_normal = np.array(z), np.array(z_normal)
    assert not np.isnan(z).any()
    # Monte Carlo SE of the pooled variance ≈ .05 (more with heavy tails): ±.2
    assert abs(z.var(axis=0).mean() - 1.0) < 0.2
    # Monte Carlo SE of each pair's mean z ≈ 1/√200 = .07: ±.3 is four of them
    assert np.all(np.abs(z.mean(axis=0)) < 0.3)
    # theory: under a multivariate t with 5 df the fourth moments of the answers are
    # (ν − 2)/(ν − 4) = 3 times the normal ones (elliptical class; Browne 1984), so
    # normal-theory z values are too wide (measured 2.25); > 1.6 asks only for that
    # inflation, many Monte Carlo SEs (≈ .1) away from 1
    assert np.nanmean(z_normal.var(axis=0)) > 1.6


@pytest.mark.slow
def test_fiml_z_values_are_standard_normal_under_a_true_model_with_mar_answers():
    # theory: under the model the z values are asymptotically N(0, 1).  One factor,
    # six items, N = 400, 200 seeded replications; y6 is missing with probability
    # .5 when y1 is above its median (missing at random: it depends on an answer
    # given) and y3 at random for 10% of the rows.  Monte Carlo SE of the pooled
    # variance over 15 correlated pairs ≈ .05: ±.2 is four of them (measured once:
    # pooled variance 1.02, 5.5% beyond ±1.96).
    rng = np.random.default_rng(20261204)
    loadings = np.array([[0.8], [0.7], [0.6], [0.5], [0.7], [0.6]])
    spec = make_spec({"f": tuple(f"y{i}" for i in range(1, 7))})
    rows, cols = np.triu_indices(6, k=1)
    z = []
    for _ in range(200):
        x, _ = simulate_cfa(rng, loadings, np.eye(1), 400)
        x[(x[:, 0] > np.median(x[:, 0])) & (rng.random(400) < 0.5), 5] = np.nan
        x[rng.random(400) < 0.1, 2] = np.nan
        estimate, saturated = _fiml(spec, x)
        z.append(residual_correlations(estimate, saturated=saturated,
                                       threshold=0.0).standardized[rows, cols])
    z = np.array(z)
    assert not np.isnan(z).any()
    assert abs(z.var(axis=0).mean() - 1.0) < 0.2
    # Monte Carlo SE of each pair's mean z ≈ 1/√200 = .07: ±.3 is four of them
    assert np.all(np.abs(z.mean(axis=0)) < 0.3)


def test_singular_saturated_information_leaves_the_correlations_without_z(hs_x, monkeypatch):
    # a saturated information that cannot be inverted (numpy raises) costs the z
    # values only, with the reason, not the residual correlations
    import scalewright.residuals as residuals

    x = hs_x.copy()
    x[np.random.default_rng(3).random(x.shape) < 0.05] = np.nan
    estimate, saturated = _fiml(make_spec(HS_CONSTRUCTS), x)

    def singular(moments, mu, sigma):
        size = len(mu) * (len(mu) + 3) // 2
        return np.zeros((size, size)), None, None

    monkeypatch.setattr(residuals, "saturated_information", singular)
    out = residuals.residual_correlations(estimate, saturated=saturated).to_dict()
    assert out["standardized_not_computed"] == "the saturated model's information matrix is singular"
    assert len(out["largest"]) == 10


def test_robust_fiml_z_values_match_casewise_expansions_written_out_on_complete_data(hs_x):
    # With no holes the saturated estimate is the sample moments, whose casewise
    # influence is e_i = (vech((x_i − x̄)(x_i − x̄)ᵀ − S), x_i − x̄) exactly; the model's
    # is Ã_θ⁻¹ g_i with g_i = ∂ℓ_i/∂θ and Ã_θ = −(1/N) ∂²ℓ/∂θ∂θᵀ.  Written out here
    # from scipy's normal densities: g_i by central differences (h = 1e-5), Ã_θ by
    # central differences of Σ g_i, Δ_k by central differences of the implied matrix;
    # then Var(ŝ_jl − σ̂_jl) = (1/N²) Σ_i (u_ik − ū_k)², u_i = e_ik − Δ_k Ã_θ⁻¹ g_i.
    # Agreement to 1e-4 relative (finite differences).
    from scipy import stats

    from scalewright.estimate.fiml import (fit_fiml, missing_patterns, pattern_moments,
                                           saturated_em)
    from scalewright.estimate.result import Estimate
    from scalewright.specify import build_layout

    spec = make_spec(HS_CONSTRUCTS)
    n, p = hs_x.shape
    moments = pattern_moments(hs_x, missing_patterns(hs_x, HS_ITEMS, "hs.csv"))
    saturated = saturated_em(moments)
    fitted = fit_fiml(build_layout(spec, saturated.cov), hs_x, moments, saturated)
    estimate = Estimate(fitted.layout, fitted.theta, np.eye(len(fitted.theta)), fitted.record,
                        n, fitted.loglik, "robust-fiml", (), fitted.objective.blocks)
    result = residual_correlations(estimate, saturated=(moments, saturated), answers=hs_x)
    pattern = fitted.layout.patterns[0]

    def casewise(theta):
        mats = pattern.matrices(theta)
        return stats.multivariate_normal.logpdf(hs_x, mats.implied_mean, mats.implied_cov)

    h, step = 1e-5, 1e-4
    eye = np.eye(len(fitted.theta))

    def score_matrix(theta):                          # N × q, ∂ℓ_i/∂θ
        return np.column_stack([(casewise(theta + h * e) - casewise(theta - h * e)) / (2 * h)
                                for e in eye])

    scores = score_matrix(fitted.theta)
    hessian = np.column_stack([(score_matrix(fitted.theta + step * e).sum(axis=0)
                                - score_matrix(fitted.theta - step * e).sum(axis=0)) / (2 * step)
                               for e in eye])
    observed = -0.5 * (hessian + hessian.T) / n
    rows, cols = np.triu_indices(p, 1)

    def sigma_pairs(theta):
        return pattern.matrices(theta).implied_cov[rows, cols]

    delta = np.column_stack([(sigma_pairs(fitted.theta + h * e)
                              - sigma_pairs(fitted.theta - h * e)) / (2 * h) for e in eye])
    c = hs_x - hs_x.mean(axis=0)
    s = c.T @ c / n
    u = c[:, rows] * c[:, cols] - s[rows, cols] - scores @ np.linalg.solve(observed, delta.T)
    var = u.var(axis=0) / n
    sigma = pattern.matrices(fitted.theta).implied_cov
    z = (saturated.cov - sigma)[rows, cols] / np.sqrt(var)
    listed = [(HS_ITEMS.index(r["a"]), HS_ITEMS.index(r["b"])) for r in result.largest()]
    dense = dict(zip(zip(rows, cols), z))
    for i, j in listed:
        assert_allclose(result.standardized[i, j], dense[(min(i, j), max(i, j))], rtol=1e-4)
    assert result.to_dict()["standardized_basis"] == "robust-fiml"
