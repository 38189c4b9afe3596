"""The implied covariance's inverse and log-determinant through its factor
structure (estimate/factor_inverse.py), against numpy's general inverse and
``slogdet`` of the same matrix (outside reference: LAPACK's LU through
numpy), on layouts of every structure the route serves (correlated
constructs, higher-order, bifactor, marker scaling), and its refusals."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose

from conftest import make_spec, simulate_cfa
from scalewright.estimate import factor_inverse
from scalewright.estimate.normal import NormalFit, complete_data_blocks, fit_normal
from scalewright.specify import build_layout

ITEMS = [f"q{k}" for k in range(48)]
CONSTRUCTS = {f"c{j}": tuple(ITEMS[12 * j:12 * j + 12]) for j in range(4)}
SPECS = {
    "correlated": make_spec(CONSTRUCTS),
    "marker": make_spec(CONSTRUCTS, identification="marker"),
    "higher order": make_spec(CONSTRUCTS, higher_order={"g": list(CONSTRUCTS)}),
    "bifactor": make_spec(CONSTRUCTS, general="g"),
}


@pytest.fixture(scope="module")
def sample():
    rng = np.random.default_rng(48)
    lam = np.zeros((48, 4))
    for j in range(4):
        lam[12 * j:12 * j + 12, j] = rng.uniform(0.45, 0.8, 12)
    phi = np.full((4, 4), 0.35) + 0.65 * np.eye(4)
    x, _ = simulate_cfa(rng, lam, phi, 800)
    return x * rng.uniform(0.5, 4.0, 48)          # items in different units


def fitted_matrices(spec, x):
    blocks = complete_data_blocks(x)
    layout = build_layout(spec, blocks[0].cov)
    theta, _, _ = fit_normal(layout, blocks)
    pattern = layout.patterns[0]
    return pattern, layout, blocks, pattern.matrices(theta), pattern.matrices(layout.start)


@pytest.mark.parametrize("name", SPECS)
def test_inverse_and_log_determinant_match_numpy(name, sample):
    pattern, _, _, at_optimum, at_start = fitted_matrices(SPECS[name], sample)
    assert factor_inverse.applies(pattern.p, pattern.m, pattern.diagonal_residuals)
    for mats in (at_start, at_optimum):
        inverse, logdet = factor_inverse.inverse(mats)
        sigma = mats.implied_cov
        # tolerance: both are backward stable, so they agree to about cond(Σ)·eps
        assert np.linalg.cond(sigma) < 1e3
        assert_allclose(inverse, np.linalg.inv(sigma), rtol=1e-11, atol=1e-13 * np.abs(inverse).max())
        sign, reference = np.linalg.slogdet(sigma)
        assert sign == 1.0
        assert logdet == pytest.approx(reference, rel=1e-13, abs=1e-12)
        assert np.array_equal(inverse, inverse.T)    # symmetric to the last bit


def test_both_routes_give_the_same_objective_gradient_and_information(sample, monkeypatch):
    # the factor route is a rewriting, not an approximation: the fit's value, gradient
    # and information agree with the Cholesky route's to rounding
    from scalewright.estimate import normal
    _, layout, blocks, _, _ = fitted_matrices(SPECS["correlated"], sample)
    theta = layout.start
    by_factors = NormalFit(layout, blocks).value_grad_info(theta)
    monkeypatch.setattr(normal.factor_inverse, "applies", lambda p, m, diagonal: False)
    by_cholesky = NormalFit(layout, blocks).value_grad_info(theta)
    assert by_factors[0] == pytest.approx(by_cholesky[0], rel=1e-13)
    assert_allclose(by_factors[1], by_cholesky[1], rtol=0, atol=1e-13)
    assert_allclose(by_factors[2], by_cholesky[2], rtol=1e-11, atol=1e-14)


def test_a_residual_variance_near_zero_sends_the_matrix_to_the_cholesky_route(sample):
    _, _, _, mats, _ = fitted_matrices(SPECS["correlated"], sample)
    residuals = mats.residuals.copy()
    share = factor_inverse.MIN_UNIQUE_SHARE
    common_variance = mats.implied_cov[3, 3] - residuals[3, 3]
    residuals[3, 3] = 0.5 * share * common_variance          # below the share of Σ_33
    assert factor_inverse.inverse(type(mats)(mats.loadings, mats.paths, mats.disturbances,
                                             residuals, mats.intercepts,
                                             mats.latent_means)) is None
    residuals[3, 3] = -0.1                                    # a Heywood case
    assert factor_inverse.inverse(type(mats)(mats.loadings, mats.paths, mats.disturbances,
                                             residuals, mats.intercepts,
                                             mats.latent_means)) is None


def test_latent_covariances_that_are_not_positive_definite_are_refused(sample):
    _, _, _, mats, _ = fitted_matrices(SPECS["correlated"], sample)
    psi = mats.disturbances.copy()
    psi[0, 1] = psi[1, 0] = 1.2                               # a correlation beyond 1
    assert factor_inverse.inverse(type(mats)(mats.loadings, mats.paths, psi, mats.residuals,
                                             mats.intercepts, mats.latent_means)) is None


def test_the_route_is_not_taken_with_residual_covariances_or_for_small_models():
    with_pair = make_spec(CONSTRUCTS, residual_covariances=[("q0", "q1")])
    x = np.random.default_rng(1).standard_normal((300, 48))
    pattern = build_layout(with_pair, np.cov(x.T)).patterns[0]
    assert not pattern.diagonal_residuals
    assert not factor_inverse.applies(pattern.p, pattern.m, pattern.diagonal_residuals)
    assert not factor_inverse.applies(12, 3, True)            # below MIN_ITEMS
    assert not factor_inverse.applies(48, 13, True)           # more than one factor per 4 items


def test_two_groups_with_a_mean_structure_fit_the_same_by_either_route(sample, monkeypatch):
    # each group's pattern takes the route on its own; the scalar-invariance fit (equal
    # loadings and intercepts, free latent means) must land on the same estimates, fit
    # and standard errors as with the Cholesky route alone (theory: the routes compute
    # the same matrices; tolerances: both fits stop at a gradient of 1e-8)
    from scalewright.estimate import normal
    from scalewright.multigroup import SCALAR, build_multigroup_layout, complete_moments, fit_multigroup
    groups = np.arange(len(sample)) % 2
    shifted = sample + 0.3 * groups[:, None]
    moments = complete_moments(("a", "b"), shifted, groups, tuple(ITEMS))
    layout = build_multigroup_layout(SPECS["correlated"], moments, SCALAR)
    assert all(factor_inverse.applies(p.p, p.m, p.diagonal_residuals) for p in layout.patterns)
    by_factors = fit_multigroup(layout, moments)
    monkeypatch.setattr(normal.factor_inverse, "applies", lambda p, m, diagonal: False)
    by_cholesky = fit_multigroup(layout, moments)
    assert by_factors.estimate.record.converged and by_cholesky.estimate.record.converged
    assert_allclose(by_factors.estimate.theta, by_cholesky.estimate.theta, rtol=0, atol=1e-7)
    assert_allclose(np.sqrt(np.diag(by_factors.estimate.acov)),
                    np.sqrt(np.diag(by_cholesky.estimate.acov)), rtol=1e-7)
    # χ² is flat at the optimum: estimates 1e-7 apart move it by ~1e-14 (second order)
    assert by_factors.fit.chi_square == pytest.approx(by_cholesky.fit.chi_square, rel=1e-10)
