"""Standard errors of multi-group models fitted by full-information ML.

With missing answers the multi-group standard errors come from the observed
information, the exact Hessian of −ℓ at θ̂
(``multigroup.missing_data_information``), as for one group; complete-data
groups keep the expected information.

Outside references:

* the single-group observed information (``estimate.fiml.fiml_information``),
  which tests/test_fiml.py checks against a finite-difference Hessian of the
  likelihood: one group through the multi-group machinery must give the
  same standard errors;
* the multi-group log-likelihood written out in this file with numpy (the
  model's Σ_g = ΛΦΛᵀ + Θ and μ_g = ν + Λα built by hand from the parameter
  names, every person's normal density over the answers they gave) and its
  Hessian by central differences, inverted;
* for complete data, the expected information written out in this file,
  ``Δ_gᵀ W_g Δ_g`` with the normal-theory weight ``W_g`` of (vech Σ, μ)
  (Browne 1974) and Δ_g by central differences of the same hand-built
  moments.

Data: Holzinger–Swineford as semopy ships it, split by school, with the
seeded MCAR holes of tests/references/make_fiml_semopy.py (``data_with_holes``).
"""

from __future__ import annotations

import numpy as np
import pytest

from conftest import HS_CONSTRUCTS, HS_ITEMS, make_spec
from references.make_fiml_semopy import data_with_holes
from scalewright.estimate.fiml import (fiml_information, fit_fiml, observed_acov,
                                       pattern_moments, missing_patterns, saturated_em)
from scalewright.groups import GroupedData
from scalewright.invariance import measurement_invariance, releasable, score_tests
from scalewright.layout import (FACTOR_COV, INTERCEPT, LATENT_MEAN, LOADING, RESIDUAL_COV,
                                Param)
from scalewright.modelresult import STANDARD_ERRORS
from scalewright.multigroup import (CONFIGURAL, METRIC, SCALAR, build_multigroup_layout,
                                    carry_start, complete_moments, fit_multigroup)
from scalewright.specify import build_layout

SCHOOLS = ("Pasteur", "Grant-White")
FACTORS = tuple(HS_CONSTRUCTS)
LOG_2PI = np.log(2 * np.pi)
STEP = 3e-4          # relative step of the finite-difference Hessian


def spec():
    return make_spec(HS_CONSTRUCTS, identification="marker")


def fiml_moments(x, index, labels):
    grouped = GroupedData(tuple(labels), HS_ITEMS, x, index, 0, "data.csv")
    return grouped.moments(full_information=True)


@pytest.fixture(scope="module")
def holes():
    return data_with_holes()          # seeded MCAR holes, 10% of the answers


@pytest.fixture(scope="module")
def school_index(hs_data):
    return np.where(hs_data["school"] == SCHOOLS[0], 0, 1)


@pytest.fixture(scope="module")
def by_school_with_holes(holes, school_index):
    return fiml_moments(holes, school_index, SCHOOLS)


# --------------------------------------------------------------------------- hand-built likelihood

def hand_model(layout, g):
    """θ ↦ (Σ_g, μ_g) of the marker-identified three-factor model, from the
    parameters' names: a group-specific parameter if the layout has one,
    else the shared one; marker loadings 1; latent means 0 unless free.
    Also returns the indices of the parameters the group uses."""
    label = layout.groups[g]
    where = {prm: k for k, prm in enumerate(layout.params)}

    def look(kind, a, b):
        for key in (Param(kind, a, b, label), Param(kind, a, b)):
            if key in where:
                return where[key]
        return -1

    p, m = len(HS_ITEMS), len(FACTORS)
    lam, phi, alpha = np.full((p, m), -1), np.full((m, m), -1), np.full(m, -1)
    for j, f in enumerate(FACTORS):
        for k, item in enumerate(HS_CONSTRUCTS[f]):
            free = look(LOADING, f, item)
            assert (free == -1) == (k == 0)                    # only the marker is fixed
            lam[HS_ITEMS.index(item), j] = -2 if k == 0 else free
        alpha[j] = look(LATENT_MEAN, f, f)
        for k, other in enumerate(FACTORS):
            phi[j, k] = max(look(FACTOR_COV, f, other), look(FACTOR_COV, other, f))
    assert np.all(phi >= 0)                                            # Φ free throughout
    resid = np.array([look(RESIDUAL_COV, i, i) for i in HS_ITEMS])
    nu = np.array([look(INTERCEPT, i, i) for i in HS_ITEMS])
    assert np.all(resid >= 0) and np.all(nu >= 0)
    used = set(np.concatenate([lam.ravel(), phi.ravel(), alpha, resid, nu]).tolist()) - {-1, -2}

    def moments(theta):
        padded = np.concatenate([theta, [1.0, 0.0]])      # index −2: 1 (marker), −1: 0
        lam_t, alpha_t = padded[lam], padded[alpha]
        sigma = lam_t @ padded[phi] @ lam_t.T + np.diag(padded[resid])
        return sigma, padded[nu] + lam_t @ alpha_t
    return moments, used


def negative_loglik(layout, groups):
    """θ ↦ −ℓ(θ): every person's normal log-density over the items they
    answered (numpy, batched over people; unanswered items get a unit
    diagonal and a zero residual, which adds nothing)."""
    models = [hand_model(layout, g)[0] for g in range(len(groups))]
    seen = [~np.isnan(x) for x in groups]

    def fun(theta):
        total = 0.0
        for model, x, ok in zip(models, groups, seen):
            sigma, mu = model(theta)
            both = ok[:, :, None] & ok[:, None, :]
            cov = np.where(both, sigma, 0.0) + np.eye(x.shape[1]) * ~ok[:, None, :]
            resid = np.where(ok, x - mu, 0.0)
            chol = np.linalg.cholesky(cov)
            z = np.linalg.solve(chol, resid[:, :, None])[:, :, 0]
            logdet = 2 * np.log(np.diagonal(chol, axis1=1, axis2=2)).sum(axis=1)
            total += 0.5 * np.sum(ok.sum(axis=1) * LOG_2PI + logdet + (z * z).sum(axis=1))
        return total
    return fun


def finite_difference_hessian(fun, theta):
    """Central second differences with steps ``h = 3e-4·max(1, |θ|)``:
    ``H_ii = [f(+i) − 2f + f(−i)]/h_i²`` and
    ``H_ij = [f(+i+j) + f(−i−j) − f(+i) − f(−i) − f(+j) − f(−j) + 2f]/(2h_ih_j)``,
    both with error O(h²) (Taylor expansion to fourth order)."""
    q = len(theta)
    steps = np.diag(STEP * np.maximum(1.0, np.abs(theta)))
    h = np.diag(steps)
    f0 = fun(theta)
    plus = np.array([fun(theta + e) for e in steps])
    minus = np.array([fun(theta - e) for e in steps])
    hess = np.diag((plus - 2 * f0 + minus) / h ** 2)
    for i in range(q):
        for j in range(i):
            both = fun(theta + steps[i] + steps[j]) + fun(theta - steps[i] - steps[j])
            hess[i, j] = hess[j, i] = (both - plus[i] - minus[i] - plus[j] - minus[j]
                                       + 2 * f0) / (2 * h[i] * h[j])
    return hess


def finite_difference_diagonal(fun, theta):
    """The diagonal of :func:`finite_difference_hessian` alone."""
    steps = np.diag(STEP * np.maximum(1.0, np.abs(theta)))
    f0 = fun(theta)
    return np.array([(fun(theta + e) - 2 * f0 + fun(theta - e)) / e.max() ** 2 for e in steps])


def groups_of(x, index):
    return [x[index == g] for g in range(len(SCHOOLS))]


# --------------------------------------------------------------------------- (1) one group

def test_one_group_through_the_multigroup_fit_gives_the_single_group_fiml_se(holes):
    moments = fiml_moments(holes, np.zeros(len(holes), dtype=int), ("all",))
    fit = fit_multigroup(build_multigroup_layout(spec(), moments, CONFIGURAL), moments)
    est = fit.estimate
    assert est.record.converged and est.method == "fiml"
    # the single-group FIML information at the same estimates, parameters matched by name
    patterns = missing_patterns(holes, HS_ITEMS, "data.csv")
    pm = pattern_moments(holes, patterns)
    single = fit_fiml(build_layout(spec(), saturated_em(pm).cov), holes, pm, saturated_em(pm))
    where = {(prm.kind, prm.a, prm.b): k for k, prm in enumerate(est.layout.params)}
    order = [where[(prm.kind, prm.a, prm.b)] for prm in single.layout.params]
    assert sorted(order) == list(range(est.layout.n_params))
    theta = est.theta[order]
    # both fits reach the same FIML solution (optimiser tolerance)
    np.testing.assert_allclose(theta, single.theta, rtol=1e-6)
    info = fiml_information(single.layout, theta, holes, patterns, pm)
    reference = np.sqrt(np.diag(observed_acov(info, single.n)))
    # single-group observed information (checked against a finite-difference Hessian in
    # tests/test_fiml.py), same point, same algebra: 1e-8 relative
    np.testing.assert_allclose(est.se[order], reference, rtol=1e-8)


# --------------------------------------------------------------------------- (2) two schools, holes

@pytest.fixture(scope="module")
def fitted_with_holes(by_school_with_holes):
    # the scalar step has every kind of parameter: shared loadings and intercepts,
    # group-specific variances and covariances, a latent mean in the second group
    layout = build_multigroup_layout(spec(), by_school_with_holes, SCALAR)
    return fit_multigroup(layout, by_school_with_holes)


def test_fiml_multigroup_se_are_the_inverse_finite_difference_hessian(fitted_with_holes, holes,
                                                                      school_index):
    est = fitted_with_holes.estimate
    assert est.record.converged and est.method == "fiml"
    groups = groups_of(holes, school_index)
    used = set().union(*(hand_model(est.layout, g)[1] for g in range(len(SCHOOLS))))
    assert used == set(range(est.layout.n_params))          # the hand model has every parameter
    # the hand-built likelihood is the one maximised: same value as the fit's
    np.testing.assert_allclose(-negative_loglik(est.layout, groups)(est.theta), est.loglik,
                               rtol=1e-12)
    hessian = finite_difference_hessian(negative_loglik(est.layout, groups), est.theta)
    reference = np.sqrt(np.diag(np.linalg.inv(hessian)))
    # inverse of a central finite-difference Hessian of the hand-written −ℓ (numpy):
    # 1e-4 relative (the differencing error shrinks as h²: about 1e-6 at h = 3e-4)
    np.testing.assert_allclose(est.se, reference, rtol=1e-4)
    # the expected information (what these SEs came from before) differs visibly here,
    # so the check can fail
    _, _, expected = fitted_with_holes.objective.value_grad_info(est.theta)
    expected_se = np.sqrt(np.diag(np.linalg.inv(expected) / est.n))
    assert np.max(np.abs(expected_se / reference - 1)) > 1e-3


# --------------------------------------------------------------------------- (3) complete data

def expected_information_se(layout, theta, groups):
    """``(Σ_g n_g Δ_gᵀ W_g Δ_g)⁻¹`` with the normal-theory weight of
    β = (vech Σ, μ): ``W = [½ Dᵀ(Σ⁻¹⊗Σ⁻¹)D, 0; 0, Σ⁻¹]`` (Browne 1974), Δ_g
    by central differences (step 1e-6) of the hand-built moments."""
    p = len(HS_ITEMS)
    rows, cols = np.tril_indices(p)
    dup = np.zeros((p * p, len(rows)))               # duplication matrix D: vec = D vech
    dup[rows * p + cols, np.arange(len(rows))] = 1
    dup[cols * p + rows, np.arange(len(rows))] = 1
    info = 0.0
    for g, x in enumerate(groups):
        model = hand_model(layout, g)[0]

        def beta(t):
            sigma, mu = model(t)
            return np.concatenate([sigma[rows, cols], mu])
        steps = 1e-6 * np.eye(len(theta))
        delta = np.array([(beta(theta + e) - beta(theta - e)) / 2e-6 for e in steps]).T
        sigma, _ = model(theta)
        inv = np.linalg.inv(sigma)
        w = np.zeros((len(rows) + p, len(rows) + p))
        w[:len(rows), :len(rows)] = 0.5 * dup.T @ np.kron(inv, inv) @ dup
        w[len(rows):, len(rows):] = inv
        info = info + len(x) * delta.T @ w @ delta
    return np.sqrt(np.diag(np.linalg.inv(info)))


@pytest.mark.parametrize("step", [METRIC, SCALAR])
def test_complete_data_multigroup_se_stay_on_the_expected_information(hs_x, school_index, step):
    moments = complete_moments(SCHOOLS, hs_x, school_index, HS_ITEMS)
    fit = fit_multigroup(build_multigroup_layout(spec(), moments, step), moments)
    est = fit.estimate
    assert est.method == "ml"
    groups = groups_of(hs_x, school_index)
    # expected information written out (Browne 1974), Δ by differences: 1e-6 relative
    np.testing.assert_allclose(est.se, expected_information_se(est.layout, est.theta, groups),
                               rtol=1e-6)
    # ... which is not the observed information on these data (the Hessian of −ℓ differs
    # from N·I on its diagonal), so the check can fail
    _, _, expected = fit.objective.value_grad_info(est.theta)
    observed = finite_difference_diagonal(negative_loglik(est.layout, groups), est.theta)
    assert np.max(np.abs(observed / (est.n * np.diag(expected)) - 1)) > 1e-3


# --------------------------------------------------------------------------- what reads the SEs

def test_invariance_latent_means_use_and_name_the_observed_information(by_school_with_holes):
    result = measurement_invariance(spec(), by_school_with_holes)
    out = result.to_dict()
    # the label the single-group FIML models carry (modelresult.STANDARD_ERRORS)
    assert out["invariance_setup"]["standard_errors"] == STANDARD_ERRORS["fiml"]
    scalar = next(s for s in result.steps if s.step == SCALAR).final
    assert scalar.estimate.method == "fiml"
    where = {prm: k for k, prm in enumerate(scalar.layout.params)}
    assert out["latent_means"]
    for row in out["latent_means"]:
        k = where[Param(LATENT_MEAN, row["construct"], row["construct"], row["group"])]
        # theory: with the reference mean fixed at 0 the difference is the parameter itself,
        # so its delta-method SE is the parameter's SE from the observed information
        np.testing.assert_allclose(row["se"], scalar.estimate.se[k], rtol=1e-6)


def test_fiml_score_tests_agree_with_likelihood_ratios_of_the_releases(by_school_with_holes,
                                                                       fitted_with_holes):
    # the search's score tests use the expected information (invariance.py), not the
    # observed one the standard errors now come from
    released = frozenset()
    tests = score_tests(spec(), by_school_with_holes, fitted_with_holes, SCALAR, released,
                        releasable(fitted_with_holes.layout, SCALAR, released))
    assert len(tests) == 9
    for test in sorted(tests, key=lambda t: -t.chi_square)[:3]:
        layout = build_multigroup_layout(spec(), by_school_with_holes, SCALAR,
                                         frozenset({test.param}))
        refit = fit_multigroup(layout, by_school_with_holes,
                               carry_start(fitted_with_holes, layout))
        lr = fitted_with_holes.fit.chi_square - refit.fit.chi_square
        # theory: score and likelihood-ratio statistics are asymptotically equal (Buse 1982);
        # in a sample of 301 they differ by a few per cent, so 15% relative (as for complete
        # data in tests/test_invariance.py)
        np.testing.assert_allclose(test.chi_square, lr, rtol=0.15)
