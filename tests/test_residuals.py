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
    assert out["n_flagged"] == 5


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
    with pytest.raises(ValueError, match="saturated covariance as observed_cov"):
        residual_correlations(_split(estimate))


def test_observed_covariance_given_for_missing_data_gives_correlations_only(
        hs_x, semopy_residuals):
    estimate = evaluate_normal(make_spec(HS_CONSTRUCTS), hs_x).estimate
    result = residual_correlations(_split(estimate), observed_cov=np.cov(hs_x, rowvar=False))
    # the same matrices as the complete-data case (semopy's implied matrix, 1e-5 as above)
    assert_allclose(result.matrix, semopy_residuals, atol=1e-5)
    assert result.standardized is None


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
