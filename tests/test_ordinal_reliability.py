"""Ordinal alpha and categorical omega (Green & Yang 2009), checked against
Gauss–Hermite quadrature of the true-score variance (law of total variance)
and seeded simulation from the model.  The bivariate normal CDF they use is
the shared one, tested against scipy in tests/test_polychoric.py."""

import numpy as np
import pandas as pd
import pingouin
import pytest
from numpy.testing import assert_allclose
from scipy.special import ndtr

from scalewright.ordinal_reliability import (categorical_omega, ordinal_alpha,
                                             ordinal_score_covariance)

#: one-factor ordinal model: five items, unequal numbers of categories, one
#: threshold exactly at 0
LAMBDA = np.array([0.8, 0.7, 0.6, 0.5, 0.4])
THRESHOLDS = [[-1.5, -0.5, 0.4, 1.2], [-1.0, 0.0, 1.0], [-0.3], [-2.0, -1.2, -0.2, 0.6],
              [0.2, 1.1]]


def test_ordinal_alpha_is_alpha_of_standardized_latent_responses_in_simulation():
    # Zumbo, Gadermann & Zeisser (2007): ordinal alpha is the alpha of the
    # latent responses; simulate them and compute alpha with pingouin
    corr = np.outer(LAMBDA, LAMBDA) + np.diag(1 - LAMBDA ** 2)
    rng = np.random.default_rng(7)
    n = 100_000
    latent = rng.standard_normal((n, 5)) @ np.linalg.cholesky(corr).T
    sample = pingouin.cronbach_alpha(pd.DataFrame(latent / latent.std(axis=0)))[0]
    value = ordinal_alpha(corr)
    # asymptotic SE of alpha for normal items, √(2k/(k−1))·(1−α)/√n
    # (van Zyl, Neudecker & Nel 2000, from memory); 5 SEs
    se = np.sqrt(2 * 5 / 4) * (1 - value) / np.sqrt(n)
    assert abs(sample - value) < 5 * se


def test_ordinal_alpha_rejects_a_covariance_matrix():
    with pytest.raises(ValueError, match="ones on its diagonal"):
        ordinal_alpha(np.array([[2.0, 0.5], [0.5, 1.0]]))


def simulate_ordinal(rng, lam, phi, theta, thresholds, n):
    """Latent factors, latent responses and ordinal scores from the model."""
    factors = rng.standard_normal((n, phi.shape[0])) @ np.linalg.cholesky(phi).T
    latent = factors @ lam.T + rng.standard_normal((n, len(theta))) @ np.linalg.cholesky(theta).T
    scores = np.column_stack([(latent[:, [i]] > np.asarray(t)[None, :]).sum(axis=1)
                              for i, t in enumerate(thresholds)])
    return factors, scores


def test_ordinal_score_covariance_matches_simulated_item_scores():
    # x_i = number of thresholds exceeded; with a residual correlation between
    # items 1 and 2 the implied covariance must reproduce the simulated one
    lam = LAMBDA[:, None]
    theta = np.diag(1 - LAMBDA ** 2)
    theta[1, 2] = theta[2, 1] = 0.2
    rng = np.random.default_rng(11)
    n = 200_000
    _, scores = simulate_ordinal(rng, lam, np.eye(1), theta, THRESHOLDS, n)
    width = max(map(len, THRESHOLDS))
    tau = np.array([t + [np.nan] * (width - len(t)) for t in THRESHOLDS])
    implied = ordinal_score_covariance(tau, lam @ lam.T + theta)
    sample = np.cov(scores.T)
    # normal-theory SE of a covariance, √((σ_ii σ_jj + σ_ij²)/n); 5 SEs per entry
    se = np.sqrt((np.outer(np.diag(implied), np.diag(implied)) + implied ** 2) / n)
    assert np.all(np.abs(sample - implied) < 5 * se)


def gauss_hermite(n=80):
    nodes, weights = np.polynomial.hermite_e.hermegauss(n)
    return nodes, weights / np.sqrt(2 * np.pi)


def conditional_moments(loading_on_score, residual_sd, thresholds, score):
    """E(x | s) and Var(x | s) of one ordinal item given a normal score s."""
    exceed = ndtr((loading_on_score[..., None] * score[..., None] - np.asarray(thresholds))
                  / residual_sd)                                   # P(x ≥ c | s)
    c = np.arange(1, len(thresholds) + 1)
    mean = exceed.sum(axis=-1)
    return mean, (exceed * (2 * c - 1)).sum(axis=-1) - mean ** 2


def test_categorical_omega_matches_quadrature_of_true_score_variance():
    # Green & Yang (2009): ω = Var(E[X|η]) / Var(X); by the law of total variance
    # Var(X) = Var(E[X|η]) + E[Σ Var(x_i|η)], integrated over η by Gauss–Hermite
    nodes, weights = gauss_hermite()
    true, error = np.zeros_like(nodes), np.zeros_like(nodes)
    for lam, tau in zip(LAMBDA, THRESHOLDS):
        mean, var = conditional_moments(np.full_like(nodes, lam), np.sqrt(1 - lam ** 2), tau, nodes)
        true, error = true + mean, error + var
    true_var = weights @ true ** 2 - (weights @ true) ** 2
    expected = true_var / (true_var + weights @ error)
    result = categorical_omega(LAMBDA[:, None], np.eye(1), np.diag(1 - LAMBDA ** 2), THRESHOLDS,
                               range(5), 0, item_names=list("abcde"), construct="c")
    # quadrature with 80 nodes agrees with 160 nodes to 1e-14; 1e-10 for safety
    assert_allclose([result.omega_total, result.omega_construct], expected, atol=1e-10)


def two_construct_model():
    """Constructs A (items 0–3) and B (items 4–6), correlated .5; item 3 also
    loads .3 on B; latent responses standardized."""
    lam = np.zeros((7, 2))
    lam[:4, 0] = [0.8, 0.7, 0.6, 0.4]
    lam[4:, 1] = [0.7, 0.6, 0.6]
    lam[3, 1] = 0.3
    phi = np.array([[1.0, 0.5], [0.5, 1.0]])
    theta = np.diag(1 - np.einsum("ij,jk,ik->i", lam, phi, lam))
    thresholds = THRESHOLDS[:4] + [[-0.5, 0.5], [0.0], [-1.0, 1.0]]
    return lam, phi, theta, thresholds


def test_categorical_omega_with_cross_loading_matches_two_dimensional_quadrature():
    lam, phi, theta, thresholds = two_construct_model()
    result = categorical_omega(lam, phi, theta, thresholds, [0, 1, 2, 3], 0,
                               item_names=list("abcd"), construct="A")
    nodes, weights = gauss_hermite(60)
    z1, z2 = np.meshgrid(nodes, nodes, indexing="ij")
    w2 = np.outer(weights, weights)
    chol = np.linalg.cholesky(phi)
    eta1, eta2 = chol[0, 0] * z1, chol[1, 0] * z1 + chol[1, 1] * z2
    true, error, own = 0.0, 0.0, 0.0
    for i in range(4):
        sd = np.sqrt(theta[i, i])
        mean, var = conditional_moments(np.ones_like(eta1), sd, thresholds[i],
                                        lam[i, 0] * eta1 + lam[i, 1] * eta2)
        true, error = true + mean, error + var
        # given F_A alone: y*_i = a_i F_A + N(0, 1 − a_i²), a_i = Cov(y*_i, F_A)
        a = lam[i] @ phi[:, 0]
        own = own + conditional_moments(np.full_like(nodes, a), np.sqrt(1 - a ** 2),
                                        thresholds[i], nodes)[0]
    true_var = np.sum(w2 * true ** 2) - np.sum(w2 * true) ** 2
    total_var = true_var + np.sum(w2 * error)
    own_var = weights @ own ** 2 - (weights @ own) ** 2
    # Green & Yang (2009) numerators by quadrature; law of total variance
    assert_allclose(result.implied_total_variance, total_var, rtol=1e-10)
    assert_allclose(result.omega_total, true_var / total_var, atol=1e-10)
    assert_allclose(result.omega_construct, own_var / total_var, atol=1e-10)
    assert result.omega_construct < result.omega_total


def test_categorical_omega_with_observed_variance_matches_simulation():
    # Green & Yang (2009) define ω as ρ²(X, E[X|η]); simulate ordinal data, use
    # the observed sum variance as denominator, and correlate X with the exact
    # true score of every simulated case
    rng = np.random.default_rng(3)
    n = 100_000
    lam = LAMBDA[:, None]
    factors, scores = simulate_ordinal(rng, lam, np.eye(1), np.diag(1 - LAMBDA ** 2),
                                       THRESHOLDS, n)
    total = scores.sum(axis=1)
    true = sum(conditional_moments(np.full(n, l), np.sqrt(1 - l ** 2), t, factors[:, 0])[0]
               for l, t in zip(LAMBDA, THRESHOLDS))
    r = np.corrcoef(total, true)[0, 1]
    result = categorical_omega(lam, np.eye(1), np.diag(1 - LAMBDA ** 2), THRESHOLDS, range(5), 0,
                               item_names=list("abcde"), construct="c",
                               observed_sum_variance=total.var(ddof=1))
    # delta-method SE of r² plus the sampling error of the observed variance
    # (relative SE √(2/n)); 5 SEs
    se = 2 * r * (1 - r ** 2) / np.sqrt(n) + r ** 2 * np.sqrt(2 / n)
    assert abs(result.omega_total_observed - r ** 2) < 5 * se


def test_categorical_omega_of_two_items_gets_fragility_note():
    result = categorical_omega(LAMBDA[:, None], np.eye(1), np.diag(1 - LAMBDA ** 2), THRESHOLDS,
                               [0, 1], 0, item_names=["a", "b"], construct="c")
    assert [n.code for n in result.notes] == ["two_items"]
