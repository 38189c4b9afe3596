"""McDonald's omega and coefficient H, checked against exact values from the
design references, semopy fits of Holzinger & Swineford, and simulation."""

import numpy as np
import pytest
from numpy.testing import assert_allclose

import holzinger as hz
from scalewright.omega import coefficient_h, explained_variance, omega_total


def one_factor(loadings):
    """Λ, Φ, Θ of standardized items on one factor with unit variance."""
    lam = np.asarray(loadings, dtype=float)[:, None]
    return lam, np.eye(1), np.diag(1.0 - lam[:, 0] ** 2)


def omega_of(loadings, latent_cov, residual_cov, **kwargs):
    p = loadings.shape[0]
    return omega_total(loadings, latent_cov, residual_cov, range(p), 0,
                       item_names=[f"i{k}" for k in range(p)], construct="c", **kwargs)


def test_omega_of_congeneric_items_matches_reference():
    # design/references.md [computed]: .8/.7/.6/.5 → ω = 6.76/9.02 = 0.749446
    result = omega_of(*one_factor([0.8, 0.7, 0.6, 0.5]))
    assert_allclose([result.omega_total, result.omega_construct], 0.749446, atol=5e-7)


def test_omega_of_parallel_items_matches_reference():
    # design/references.md [computed]: four items λ = .7 → α = ω = 0.793522
    assert_allclose(omega_of(*one_factor([0.7] * 4)).omega_total, 0.793522, atol=5e-7)


@pytest.mark.parametrize("construct, expected", [("visual", 0.6254), ("textual", 0.8852),
                                                 ("speed", 0.6877)])
def test_omega_matches_holzinger_reference(construct, expected):
    fit = hz.fit(hz.THREE_FACTOR)
    result = omega_total(fit.loadings, fit.latent_cov, fit.residual_cov,
                         fit.rows(hz.CONSTRUCTS[construct]), fit.column(construct),
                         item_names=hz.CONSTRUCTS[construct], construct=construct)
    # design/references.md [computed with semopy + numpy, 4 decimals]; that fit and
    # ours (ftol 1e-12) differ in the 4th decimal (.62532 here), hence 2e-4
    assert_allclose(result.omega_total, expected, atol=2e-4)


@pytest.mark.parametrize("construct", ["visual", "textual", "speed"])
def test_omega_matches_semopy_estimates_table(construct):
    fit = hz.fit(hz.THREE_FACTOR)
    table = fit.estimates
    items = hz.CONSTRUCTS[construct]
    loadings = table[(table.op == "~") & (table.rval == construct)].set_index("lval").Estimate
    variance = table[(table.op == "~~") & (table.lval == construct)
                     & (table.rval == construct)].Estimate.item()
    rows = fit.rows(items)
    # McDonald (1999): (Σλ)²φ / 1ᵀΣ̂1, with Σ̂ as semopy computes it
    expected = loadings[items].astype(float).sum() ** 2 * variance \
        / fit.implied_cov[np.ix_(rows, rows)].sum()
    result = omega_total(fit.loadings, fit.latent_cov, fit.residual_cov, rows,
                         fit.column(construct), item_names=items, construct=construct)
    assert_allclose(result.omega_total, expected, rtol=1e-10)   # same numbers, rounding only


def test_observed_denominator_is_variance_of_observed_sum():
    fit = hz.fit(hz.THREE_FACTOR)
    data = hz.data()
    items = hz.CONSTRUCTS["visual"]
    result = omega_total(fit.loadings, fit.latent_cov, fit.residual_cov, fit.rows(items),
                         fit.column("visual"), item_names=items, construct="visual",
                         sample_cov=np.cov(data.to_numpy().T, ddof=0))
    # ÷N variance of the summed raw scores (pandas), the ML sample covariance's scale
    assert_allclose(result.observed_total_variance, data[items].sum(axis=1).var(ddof=0),
                    rtol=1e-12)
    assert_allclose(result.omega_total_observed,
                    result.common_variance / data[items].sum(axis=1).var(ddof=0), rtol=1e-12)


def cross_loading_model():
    """Two correlated constructs; item 3 of A also loads on B; items 1 and 2 of A
    share a residual covariance."""
    lam = np.zeros((8, 2))
    lam[:4, 0] = [0.8, 0.7, 0.6, 0.5]
    lam[4:, 1] = [0.7, 0.7, 0.6, 0.6]
    lam[3, 1] = 0.3
    phi = np.array([[1.0, 0.4], [0.4, 1.0]])
    theta = np.diag(1.0 - np.einsum("ij,jk,ik->i", lam, phi, lam))
    theta[1, 2] = theta[2, 1] = 0.15
    return lam, phi, theta


def test_omega_equals_squared_correlation_of_sum_with_common_score_in_simulation():
    # theory: ω_total = ρ²(sum, common part of the sum) and ω_construct =
    # ρ²(sum, F_A) (McDonald 1999); checked by a seeded simulation from the model
    lam, phi, theta = cross_loading_model()
    result = omega_total(lam, phi, theta, [0, 1, 2, 3], 0, item_names=list("abcd"), construct="A")
    rng = np.random.default_rng(20240601)
    n = 200_000
    factors = rng.standard_normal((n, 2)) @ np.linalg.cholesky(phi).T
    errors = rng.standard_normal((n, 8)) @ np.linalg.cholesky(theta).T
    common = (factors @ lam.T)[:, :4].sum(axis=1)
    total = common + errors[:, :4].sum(axis=1)
    for omega, score in [(result.omega_total, common), (result.omega_construct, factors[:, 0])]:
        r = np.corrcoef(total, score)[0, 1]
        se = 2 * abs(r) * (1 - r ** 2) / np.sqrt(n)        # delta-method SE of r²
        assert abs(r ** 2 - omega) < 5 * se                  # 5 Monte Carlo SEs
    # the cross-loading adds common variance that is not construct A's
    assert result.omega_construct < result.omega_total


def test_residual_covariance_counts_as_error_variance():
    # Raykov (2001), Appl. Psych. Meas. 25:69–76: ω = (Σλ)² / ((Σλ)² + Σθ + 2Σθ_ij)
    lam, phi, theta = cross_loading_model()
    lam[3, 1] = 0.0
    result = omega_total(lam, phi, theta, [0, 1, 2, 3], 0, item_names=list("abcd"), construct="A")
    sum_lam = lam[:4, 0].sum()
    assert_allclose(result.omega_total,
                    sum_lam ** 2 / (sum_lam ** 2 + np.trace(theta[:4, :4]) + 2 * 0.15), rtol=1e-12)


def test_two_item_construct_gets_fragility_note():
    result = omega_of(*one_factor([0.7, 0.6]))
    [note] = result.notes
    assert note.code == "two_items" and note.items == ("i0", "i1")
    assert "only two items" in note.message


def test_three_item_construct_has_no_note():
    assert omega_of(*one_factor([0.7, 0.6, 0.5])).notes == ()


def test_explained_variance_equals_squared_covariance_over_variance():
    # V_C(w) for a single factor is Cov(wᵀx, F)² / Var(F) (definition of R²)
    lam, phi, theta = cross_loading_model()
    phi = 2.0 * phi                                       # a non-unit factor variance
    w = np.r_[np.ones(4), np.zeros(4)]
    cov_with_b = w @ lam @ phi[:, 1]
    assert_allclose(explained_variance(w, lam, phi, [1]), cov_with_b ** 2 / phi[1, 1], rtol=1e-12)


def test_coefficient_h_equals_maximal_reliability_of_weighted_composite():
    # Hancock & Mueller (2001): H = ρ²(F, best linear composite) = λᵀΣ⁻¹λ for a
    # unit-variance factor; computed here directly with a linear solve
    lam = np.array([0.8, 0.7, 0.6, 0.5, 0.3])
    sigma = np.outer(lam, lam) + np.diag(1 - lam ** 2)
    assert_allclose(coefficient_h(lam), lam @ np.linalg.solve(sigma, lam), rtol=1e-12)


def test_coefficient_h_is_undefined_for_an_improper_loading():
    assert np.isnan(coefficient_h([0.8, 1.02, 0.5]))
