"""Thresholds, polychoric correlations and their sampling covariance.

Outside references: scipy.stats.multivariate_normal (bivariate CDF and
density), scipy.integrate.quad, scipy.optimize.minimize_scalar, semopy's
``polycorr`` module, statsmodels' ``corr_clipped``, Sheppard's closed form
for the quadrant probability, the delta method, and seeded simulation from
known populations.
"""

import types
import warnings

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import integrate, optimize
from scipy.special import ndtr
from scipy.stats import multivariate_normal, norm

from scalewright.errors import ScalewrightWarning, StudyError
from scalewright.estimate.bivariate_normal import bvn_cdf, bvn_cdf_dh, bvn_pdf, bvn_pdf_drho
from scalewright.estimate.polychoric import (
    collapse_sparse_categories,
    ordinal_moments,
    thresholds,
)


def _cut(latent, cuts):
    """Answers 1..K from latent normal scores cut at per-column thresholds."""
    return np.column_stack(
        [np.digitize(latent[:, j], c) + 1 for j, c in enumerate(cuts)]
    ).astype(float)


def _sample(rng, corr, cuts, n, missing=0.0):
    latent = rng.multivariate_normal(np.zeros(len(cuts)), corr, size=n)
    answers = _cut(latent, cuts)
    answers[rng.random(answers.shape) < missing] = np.nan
    return answers


def _scipy_cdf(h, k, rho):
    return multivariate_normal.cdf([h, k], mean=[0, 0], cov=[[1, rho], [rho, 1]], allow_singular=True)


# --------------------------------------------------------------------------
# Bivariate normal


def test_bvn_cdf_matches_scipy_on_grid_with_infinite_limits_and_extreme_rho():
    limits = np.array([-np.inf, -8.0, -3.0, -1.5, -0.3, 0.0, 0.4, 1.2, 2.5, 5.0, np.inf])
    rhos = np.array([-1.0, -0.99999, -0.999, -0.95, -0.925, -0.9, -0.5, -0.1, 0.0,
                     0.2, 0.6, 0.924, 0.93, 0.99, 0.9999999, 1.0])
    h, k, r = np.meshgrid(limits, limits, rhos, indexing="ij")
    reference = np.vectorize(_scipy_cdf)(h, k, r)
    # scipy evaluates two-dimensional normal probabilities with Genz's (2004)
    # double-precision algorithm, whose error Genz reports near 1e-15; 1e-7 is
    # far below anything a polychoric estimate can notice and far above the
    # rounding either side can make, so a wrong branch (errors of 1e-3 and more)
    # fails while harmless rounding differences pass.
    assert_allclose(bvn_cdf(h, k, r), reference, rtol=0, atol=1e-7)


def test_bvn_cdf_matches_one_dimensional_quadrature():
    # Independent of Genz's method: Phi2(h, k; rho) =
    # int_{-inf}^{h} phi(x) Phi((k - rho x)/sqrt(1 - rho^2)) dx (conditioning
    # on X), integrated by scipy.integrate.quad to 1e-13.
    rng = np.random.default_rng(11)
    h, k = rng.uniform(-3, 3, size=(2, 25))
    rho = rng.uniform(-0.98, 0.98, size=25)
    reference = [
        integrate.quad(lambda x: norm.pdf(x) * ndtr((kk - rr * x) / np.sqrt(1 - rr**2)),
                       -np.inf, hh, epsabs=1e-13, epsrel=1e-13)[0]
        for hh, kk, rr in zip(h, k, rho)
    ]
    # quad's own error bound is 1e-13; 1e-10 leaves room for its estimate.
    assert_allclose(bvn_cdf(h, k, rho), reference, rtol=0, atol=1e-10)


def test_bvn_cdf_at_origin_matches_sheppard_formula():
    # Sheppard (1899): P(X < 0, Y < 0) = 1/4 + arcsin(rho) / (2 pi).
    rho = np.array([-0.999, -0.95, -0.6, -0.2, 0.0, 0.3, 0.8, 0.93, 0.9999])
    # Closed form against double-precision arithmetic: 1e-14.
    assert_allclose(bvn_cdf(0.0, 0.0, rho), 0.25 + np.arcsin(rho) / (2 * np.pi), rtol=0, atol=1e-14)


def test_bvn_pdf_matches_scipy_density():
    rng = np.random.default_rng(12)
    h, k = rng.uniform(-3, 3, size=(2, 20))
    rho = rng.uniform(-0.95, 0.95, size=20)
    reference = [multivariate_normal.pdf([a, b], cov=[[1, r], [r, 1]]) for a, b, r in zip(h, k, rho)]
    # Same formula in double precision: relative 1e-12.
    assert_allclose(bvn_pdf(h, k, rho), reference, rtol=1e-12)


def test_bvn_density_derivatives_match_finite_differences_of_scipy():
    # dPhi2/drho = phi2 (Plackett 1954), dPhi2/dh and dphi2/drho checked by
    # central differences of scipy's CDF and density with step 1e-5: the
    # difference error is O(step^2) ~ 1e-10 times the third derivative, plus
    # rounding ~ 1e-16/1e-5; 1e-7 absolute covers both.
    rng = np.random.default_rng(13)
    h, k = rng.uniform(-2.5, 2.5, size=(2, 12))
    rho = rng.uniform(-0.9, 0.9, size=12)
    step = 1e-5
    d_rho = [(_scipy_cdf(a, b, r + step) - _scipy_cdf(a, b, r - step)) / (2 * step) for a, b, r in zip(h, k, rho)]
    d_h = [(_scipy_cdf(a + step, b, r) - _scipy_cdf(a - step, b, r)) / (2 * step) for a, b, r in zip(h, k, rho)]
    pdf = lambda a, b, r: multivariate_normal.pdf([a, b], cov=[[1, r], [r, 1]])  # noqa: E731
    d_pdf = [(pdf(a, b, r + step) - pdf(a, b, r - step)) / (2 * step) for a, b, r in zip(h, k, rho)]
    assert_allclose(bvn_pdf(h, k, rho), d_rho, rtol=0, atol=1e-7)
    assert_allclose(bvn_cdf_dh(h, k, rho), d_h, rtol=0, atol=1e-7)
    assert_allclose(bvn_pdf_drho(h, k, rho), d_pdf, rtol=0, atol=1e-7)


# --------------------------------------------------------------------------
# Thresholds and correlations against semopy and scipy


@pytest.fixture
def semopy_polycorr(monkeypatch):
    """semopy's polycorr module, with the scipy function it calls restored.

    semopy 2.3.11 computes rectangle probabilities with
    ``scipy.stats.mvn.mvnun``, which scipy 1.17 removed; the stand-in gives the
    same probability through the public ``multivariate_normal.cdf`` with
    ``lower_limit``.  Everything else (intervals, counting, likelihood and
    optimiser) is semopy's own code.
    """
    from semopy import polycorr

    def mvnun(lower, upper, means, cov):
        return multivariate_normal.cdf(upper, mean=means, cov=cov, lower_limit=lower), 0

    monkeypatch.setattr(polycorr, "mvn", types.SimpleNamespace(mvnun=mvnun), raising=False)
    return polycorr


@pytest.fixture(scope="module")
def four_items():
    corr = np.array([[1.0, 0.5, 0.3, -0.2],
                     [0.5, 1.0, 0.6, 0.1],
                     [0.3, 0.6, 1.0, 0.4],
                     [-0.2, 0.1, 0.4, 1.0]])
    cuts = [[-1.0, 0.0, 1.0], [-0.5, 0.7], [-1.5, -0.5, 0.3, 1.2], [0.2]]
    return _sample(np.random.default_rng(2024), corr, cuts, 600)


def test_thresholds_match_semopy_intervals(four_items, semopy_polycorr):
    for j in range(four_items.shape[1]):
        categories, tau = thresholds(four_items[:, j])
        semopy_cuts = semopy_polycorr.estimate_intervals(four_items[:, j])[0]
        # Same formula, Phi^-1 of cumulative proportions: 1e-12 relative.
        # semopy writes +-10 for the infinite end points; those are dropped.
        assert_allclose(tau, np.asarray(semopy_cuts[1:-1], dtype=float), rtol=1e-12)
        assert categories.size == tau.size + 1


def test_polychoric_correlations_match_semopy(four_items, semopy_polycorr):
    moments = ordinal_moments(four_items, ("a", "b", "c", "d"))
    jj, ll = np.triu_indices(4, 1)
    reference = [semopy_polycorr.polychoric_corr(four_items[:, j], four_items[:, l]) for j, l in zip(jj, ll)]
    # semopy maximises with minimize_scalar(method="bounded") at scipy's
    # default xatol = 1e-5, so its estimate is within about 1e-5 of the
    # maximiser; 2e-5 allows that and nothing more.
    assert_allclose(moments.raw_correlations[jj, ll], reference, rtol=0, atol=2e-5)


def test_polychoric_matches_direct_likelihood_maximisation_with_missing_answers():
    rng = np.random.default_rng(31)
    corr = np.array([[1.0, 0.55], [0.55, 1.0]])
    data = _sample(rng, corr, [[-0.8, 0.1, 0.9], [-1.1, -0.2, 0.6, 1.4]], 500, missing=0.15)
    moments = ordinal_moments(data, ("x", "y"))

    # Independent computation: thresholds from each item's own observed answers,
    # the table from rows observed on both, the likelihood from scipy's CDF.
    def cuts(col):
        values = col[~np.isnan(col)]
        cum = np.array([np.mean(values <= v) for v in np.unique(values)[:-1]])
        return np.concatenate([[-np.inf], norm.ppf(cum), [np.inf]])

    tx, ty = cuts(data[:, 0]), cuts(data[:, 1])
    both = ~np.isnan(data).any(axis=1)
    table = np.zeros((tx.size - 1, ty.size - 1))
    np.add.at(table, (data[both, 0].astype(int) - 1, data[both, 1].astype(int) - 1), 1)

    def negative_loglik(r):
        total = 0.0
        for a in range(table.shape[0]):
            for b in range(table.shape[1]):
                prob = multivariate_normal.cdf([tx[a + 1], ty[b + 1]], mean=[0, 0], cov=[[1, r], [r, 1]],
                                               lower_limit=[tx[a], ty[b]])
                total -= table[a, b] * np.log(prob)
        return total

    best = optimize.minimize_scalar(negative_loglik, bounds=(-0.99, 0.99), method="bounded",
                                    options={"xatol": 1e-10})
    # Both maximise the same likelihood to ~1e-10; 1e-7 leaves room for the
    # flatness of the likelihood near its maximum.
    assert_allclose(moments.raw_correlations[0, 1], best.x, rtol=0, atol=1e-7)
    assert moments.n_pairs[0, 1] == both.sum()


def test_tetrachoric_of_median_split_matches_sheppard_closed_form():
    # With both items split at the median (thresholds exactly 0) the 2 x 2
    # likelihood is saturated, so P(both high) = 40/100 is reproduced and
    # Sheppard's formula gives rho = sin(2 pi (0.40 - 1/4)) = 0.809017.
    table = np.array([[40, 10], [10, 40]])
    cells = np.array([(a, b) for a in (1, 2) for b in (1, 2)], dtype=float)
    data = np.repeat(cells, table.ravel(), axis=0)
    moments = ordinal_moments(data, ("left", "right"))
    # The Newton search stops at steps below 1e-10.
    assert_allclose(moments.raw_correlations[0, 1], np.sin(2 * np.pi * 0.15), rtol=0, atol=1e-9)


def test_polychoric_recovers_population_correlation_in_large_sample():
    rng = np.random.default_rng(77)
    rho = 0.45
    data = _sample(rng, np.array([[1.0, rho], [rho, 1.0]]), [[-1.3, -0.4, 0.5, 1.5], [-0.2, 0.8, 1.6]], 20_000)
    moments = ordinal_moments(data, ("a", "b"))
    # A consistent estimator lies within 4 standard errors of the truth
    # (a normal deviate beyond 4 has probability 6e-5).
    assert abs(moments.raw_correlations[0, 1] - rho) < 4 * moments.correlation_se[0]
    tau_se = moments.threshold_se[0]
    assert np.all(np.abs(moments.thresholds[0] - [-1.3, -0.4, 0.5, 1.5]) < 4 * tau_se)


def test_threshold_covariance_matches_delta_method_for_complete_data(four_items):
    moments = ordinal_moments(four_items, ("a", "b", "c", "d"))
    n = four_items.shape[0]
    for j, s in enumerate(moments.threshold_slices):
        tau = moments.thresholds[j]
        cum = ndtr(tau)
        dens = norm.pdf(tau)
        # Delta method on the multinomial cumulative proportions:
        # Cov(tau_c, tau_d) = P_min(c,d) (1 - P_max(c,d)) / (n phi_c phi_d).
        lo = np.minimum.outer(cum, cum)
        hi = np.maximum.outer(cum, cum)
        expected = lo * (1 - hi) / (n * np.outer(dens, dens))
        # Algebraically identical to the influence form at the estimates: 1e-10.
        assert_allclose(moments.acov[s, s], expected, rtol=1e-10)


# --------------------------------------------------------------------------
# Sampling covariance against replications


@pytest.fixture(scope="module")
def replications():
    """500 seeded samples of three items, 400 rows, 25 % answers missing."""
    corr = np.array([[1.0, 0.8, 0.5], [0.8, 1.0, 0.6], [0.5, 0.6, 1.0]])
    cuts = [[-0.5, 1.0], [0.8, 1.5], [-1.0, 0.0, 0.9]]
    estimates, acovs = [], []
    for seed in range(500):
        data = _sample(np.random.default_rng(100 + seed), corr, cuts, 400, missing=0.25)
        moments = ordinal_moments(data, ("a", "b", "c"))
        estimates.append(np.concatenate([*moments.thresholds, moments.raw_correlations[np.triu_indices(3, 1)]]))
        acovs.append(moments.acov)
    return np.cov(np.array(estimates).T), np.mean(acovs, axis=0)


def test_asymptotic_variances_match_replication_variances(replications):
    empirical, model = replications
    # With R = 500 replications the empirical variance has a relative standard
    # error of sqrt(2 / (R - 1)) = 6.3 % (more for skewed estimates), and the
    # asymptotic formula is a few per cent off at n = 400; 20 % is about three
    # standard errors.  Forgetting the n / n_jl scaling for 25 % missing
    # answers would give ratios near 0.56 and fail.
    assert_allclose(np.diag(model) / np.diag(empirical), 1.0, atol=0.2)


def test_threshold_correlation_covariances_match_replications(replications):
    empirical, model = replications
    # The correlation of a pair depends on its thresholds' estimates; the
    # covariance terms of the threshold correction (Muthen 1984) predict
    # correlations of estimates such as -0.25 between rho_ab and tau_b1.
    # Correlations of 500 replicates have standard error ~ 0.045; 0.12 is
    # about 2.7 of them, and leaving the correction out (predicting ~ 0)
    # fails on the largest entries.
    def as_corr(m):
        d = np.sqrt(np.diag(m))
        return m / np.outer(d, d)

    n_tau = 7
    assert_allclose(as_corr(model)[n_tau:, :n_tau], as_corr(empirical)[n_tau:, :n_tau], rtol=0, atol=0.12)
    assert np.abs(as_corr(model)[n_tau:, :n_tau]).max() > 0.2


# --------------------------------------------------------------------------
# Bad input and sparse categories


def test_too_many_distinct_values_suggests_continuous_treatment():
    x = np.tile(np.arange(1.0, 13.0), 10)
    expected = r"Item 'age' has 12 different answer values \(1 to 12\).*at most 10.*continuous"
    with pytest.raises(StudyError, match=expected):
        thresholds(x, item="age")


def test_fractional_answers_are_rejected_as_ordinal():
    expected = r"Item 'score' has answers that are not whole numbers \(for example 2.5\)"
    with pytest.raises(StudyError, match=expected):
        thresholds(np.array([1.0, 2.0, 2.5, 3.0]), item="score")


def test_unused_category_in_declared_scale_offers_collapsing():
    x = np.repeat([1.0, 2.0, 3.0, 5.0], [12, 40, 33, 15])
    with pytest.raises(StudyError, match=r"Item 'q3' is declared on a 1-5 scale but nobody answered 4 "
                                         r"\(answers per category: 1: 12, 2: 40, 3: 33, 4: 0, 5: 15\)"
                                         r".*collapse_sparse: true under items:"):
        thresholds(x, item="q3", scale=(1, 5))


def test_answer_outside_declared_scale_is_named():
    with pytest.raises(StudyError, match=r"Item 'q3' is declared on a 1-5 scale but has the answer 9"):
        thresholds(np.array([1.0, 2.0, 9.0, 3.0]), item="q3", scale=(1, 5))


def test_declared_scale_is_written_as_in_the_model_file():
    # the model file's scale: [1, 5] reaches the checks as floats (studyfile.Study.scale),
    # and the messages said "a 1.0-5.0 scale"
    x = np.repeat([1.0, 2.0, 3.0, 5.0], [12, 40, 33, 15])
    with pytest.raises(StudyError, match=r"Item 'q3' is declared on a 1-5 scale but nobody answered 4 "):
        thresholds(x, item="q3", scale=(1.0, 5.0))
    with pytest.raises(StudyError, match=r"Item 'q3' is declared on a 1-5 scale but has the answer 9"):
        thresholds(np.array([1.0, 2.0, 9.0, 3.0]), item="q3", scale=(1.0, 5.0))


def test_item_with_all_rows_missing_is_named():
    data = np.column_stack([np.tile([1.0, 2.0, 3.0], 10), np.full(30, np.nan)])
    with pytest.raises(StudyError, match=r"Item 'q5' has no answers: all 30 rows are missing"):
        ordinal_moments(data, ("q4", "q5"))


def test_item_with_one_answer_value_is_named():
    data = np.column_stack([np.tile([1.0, 2.0, 3.0], 10), np.full(30, 4.0)])
    with pytest.raises(StudyError, match=r"Item 'q5' has the same answer \(4\) in all 30 observed rows"):
        ordinal_moments(data, ("q4", "q5"))


def test_pair_with_too_few_common_rows_names_both_items():
    rng = np.random.default_rng(5)
    data = rng.integers(1, 4, size=(40, 2)).astype(float)
    data[:20, 0] = np.nan
    data[27:, 1] = np.nan  # rows 20..26 observed on both: 7 rows
    with pytest.raises(StudyError, match=r"'q1' and 'q2' \(7 rows\).*at least 10 rows observed on both"):
        ordinal_moments(data, ("q1", "q2"))


def test_perfectly_ordered_pair_reports_correlation_of_one():
    # An empty off-diagonal cell in a 2 x 2 table puts the likelihood's
    # maximum at rho = 1 (Olsson 1979, section 2).
    cells = np.array([[1, 1], [2, 1], [2, 2]], dtype=float)
    data = np.repeat(cells, [49, 201, 150], axis=0)
    with pytest.raises(StudyError, match=r"items 'a' and 'b' reaches \+1: their answers are perfectly ordered"):
        ordinal_moments(data, ("a", "b"))


def test_sparse_end_category_merges_into_its_neighbour():
    x = np.repeat([1.0, 2.0, 3.0, 4.0, 5.0], [2, 30, 40, 30, 20])
    recoded, note = collapse_sparse_categories(x, min_count=5, item="q1")
    assert_allclose(np.unique(recoded, return_counts=True)[1], [32, 40, 30, 20])
    assert note == ("Item 'q1': categories with fewer than 5 answers were merged into a "
                    "neighbouring category: 1 (2 answers) into 2.")


def test_sparse_middle_category_merges_into_smaller_neighbour():
    x = np.concatenate([np.repeat([1.0, 2.0, 3.0, 4.0, 5.0], [20, 30, 3, 10, 20]), [np.nan]])
    recoded, note = collapse_sparse_categories(x, item="q2")
    assert np.isnan(recoded[-1])
    values, counts = np.unique(recoded[:-1], return_counts=True)
    assert_allclose(values, [1, 2, 4, 5])
    assert_allclose(counts, [20, 30, 13, 20])
    assert note.endswith("3 (3 answers) into 4.")


def test_unused_declared_category_is_merged_when_collapsing():
    x = np.repeat([1.0, 2.0, 3.0, 4.0], [12, 40, 33, 15])
    recoded, note = collapse_sparse_categories(x, item="q3", scale=(1, 5))
    assert_allclose(recoded, x)
    assert note.endswith("5 (0 answers) into 4.")


def test_collapse_sparse_option_replaces_the_unused_category_error():
    rng = np.random.default_rng(8)
    corr = np.array([[1.0, 0.4], [0.4, 1.0]])
    data = _sample(rng, corr, [[-0.8, 0.2, 1.0], [-0.9, 0.0, 0.8]], 300)  # answers 1..4
    scales = [(1, 5), (1, 4)]
    with pytest.raises(StudyError, match="nobody answered 5"):
        ordinal_moments(data, ("a", "b"), scales=scales)
    moments = ordinal_moments(data, ("a", "b"), scales=scales, collapse_sparse=True)
    assert moments.collapse_notes == (
        "Item 'a': categories with fewer than 5 answers were merged into a "
        "neighbouring category: 5 (0 answers) into 4.",
    )
    assert_allclose(moments.categories[0], [1, 2, 3, 4])


@pytest.fixture(scope="module")
def indefinite():
    """Pairwise deletion over disjoint row blocks gives an indefinite matrix:
    a-b and b-c strongly positive, a-c strongly negative."""
    rng = np.random.default_rng(21)
    cuts = [[-0.6, 0.0, 0.6]] * 2
    blocks = []
    for pair, rho in [((0, 1), 0.9), ((1, 2), 0.9), ((0, 2), -0.9)]:
        block = np.full((300, 3), np.nan)
        block[:, list(pair)] = _sample(rng, np.array([[1, rho], [rho, 1]]), cuts, 300)
        blocks.append(block)
    data = np.vstack(blocks)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        moments = ordinal_moments(data, ("a", "b", "c"))
    return moments, caught


def test_indefinite_matrix_is_smoothed_like_statsmodels_corr_clipped(indefinite):
    from statsmodels.stats.correlation_tools import corr_clipped

    moments, _ = indefinite
    assert moments.smoothed
    assert np.linalg.eigvalsh(moments.raw_correlations)[0] < 0
    # statsmodels' corr_clipped raises eigenvalues below the threshold to it
    # and rescales to unit diagonal, the same method; same arithmetic: 1e-10.
    assert_allclose(moments.correlations, corr_clipped(moments.raw_correlations, threshold=1e-6),
                    rtol=0, atol=1e-10)
    assert np.linalg.eigvalsh(moments.correlations)[0] > 0


def test_smoothing_note_names_the_items_changed_most(indefinite):
    moments, caught = indefinite
    note = moments.smoothing_note
    assert note.startswith("The polychoric correlation matrix was not positive definite (smallest eigenvalue -")
    change = np.abs(moments.correlations - moments.raw_correlations).max(axis=1)
    order = [("a", "b", "c")[j] for j in np.argsort(-change)]
    assert f"involve '{order[0]}' (up to {change.max():.3f})" in note
    assert [str(w.message) for w in caught if issubclass(w.category, ScalewrightWarning)] == [note]


def test_positive_definite_matrix_is_left_alone(four_items):
    moments = ordinal_moments(four_items, ("a", "b", "c", "d"))
    assert not moments.smoothed
    assert moments.smoothing_note == ""
    assert_allclose(moments.correlations, moments.raw_correlations, rtol=0, atol=0)


def test_summary_dict_survives_a_json_round_trip(four_items):
    import json

    moments = ordinal_moments(four_items, ("a", "b", "c", "d"))
    summary = json.loads(json.dumps(moments.to_dict()))
    assert summary["items"] == ["a", "b", "c", "d"]
    assert_allclose(summary["correlations"], moments.correlations, rtol=0, atol=0)
    assert len(summary["correlation_se"]) == 6


def test_subset_of_the_moments_equals_a_fresh_estimation_with_merged_categories():
    # two-step estimation: thresholds from margins, each correlation and its influence
    # from its own pair, so a subset equals ordinal_moments on those columns (rounding
    # only); the merge notes of dropped items go, those of kept items stay, and the
    # subset is in the order asked for
    rng = np.random.default_rng(12)
    corr = np.full((5, 5), 0.45) + 0.55 * np.eye(5)
    cuts = [np.array([-2.9, -0.5, 0.6])] * 2 + [np.array([-1.0, 0.2, 2.9])] * 3
    x = _sample(rng, corr, cuts, 700, missing=0.04)
    items = ("q1", "q2", "q3", "q4", "q5")
    full = ordinal_moments(x, items, collapse_sparse=True)
    keep = ("q5", "q2", "q4")
    fresh = ordinal_moments(x[:, [4, 1, 3]], keep, collapse_sparse=True)
    part = full.subset(keep)
    assert part.items == keep and part.n_rows == fresh.n_rows
    assert_allclose(part.acov, fresh.acov, rtol=1e-12, atol=1e-16)
    assert_allclose(part.raw_correlations, fresh.raw_correlations, rtol=1e-12)
    assert_allclose(part.correlations, fresh.correlations, rtol=1e-12)
    assert all(np.array_equal(a, b) for a, b in zip(part.thresholds, fresh.thresholds))
    assert np.array_equal(part.codes, fresh.codes) and np.array_equal(part.n_pairs, fresh.n_pairs)
    assert part.collapse_notes == fresh.collapse_notes
    # cut at ±2.9, each item's extreme category expects about 1.3 of 700 answers, so
    # nearly every item is merged; the draw itself depends on numpy's multivariate
    # normal sampler, so the test asks only that a dropped and a kept item were merged
    named = [n.split("'")[1] for n in full.collapse_notes]
    assert {"q1", "q3"} & set(named) and set(keep) & set(named)
    assert [n.split("'")[1] for n in part.collapse_notes] == [i for i in keep if i in named]
