"""The mixed route: models whose items are partly ordinal and partly continuous.

Outside references:

* semopy 2.3's DWLS objective, fed the same mixed correlation matrix and
  the same diagonal weights (as ``tests/test_dwls.py`` does for polychoric
  matrices);
* the published formulas of the reliability coefficients, recomputed here
  (Cronbach 1951 on the correlation matrix; McDonald 1999 omega of the
  standardized solution);
* statistical theory, by seeded simulation from a known population with
  five-category and continuous items: two-step DWLS on the mixed matrix is
  consistent for the standardized loadings and its sandwich standard errors
  match the spread of the estimates (Muthén 1984; Olsson, Drasgow & Dorans
  1982 for the polyserial step);
* the JSON standard (no NaN) for the end-to-end check.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from conftest import make_spec
from numpy.testing import assert_allclose
from scipy import stats
from test_dwls import _semopy_dwls, assert_estimates_match_semopy

import scalewright
from scalewright.estimate.dwls import fit_dwls
from scalewright.estimate.mixed import mixed_moments
from scalewright.evaluate_mixed import MIXED_DWLS, evaluate_mixed
from scalewright.evaluate_ordinal import ORDINAL_DWLS
from scalewright.output import to_json
from scalewright.report.narrative import methods_paragraphs
from scalewright.report.references import references_used
from scalewright.specify import build_layout

#: population: two constructs, each with two five-category and two continuous items
POP_LOADINGS = np.array([0.7, 0.6, 0.8, 0.5, 0.6, 0.7, 0.5, 0.8])
POP_PHI = 0.4
POP_CUTS = np.array([-1.5, -0.6, 0.3, 1.2])          # five categories, skewed
ITEMS = ("o1", "o2", "c1", "c2", "o3", "o4", "c3", "c4")
ORDINAL = (True, True, False, False, True, True, False, False)


def _population_sample(rng, n, missing=0.0):
    lam = np.zeros((8, 2))
    lam[:4, 0], lam[4:, 1] = POP_LOADINGS[:4], POP_LOADINGS[4:]
    sigma = lam @ np.array([[1.0, POP_PHI], [POP_PHI, 1.0]]) @ lam.T
    np.fill_diagonal(sigma, 1.0)
    latent = rng.standard_normal((n, 8)) @ np.linalg.cholesky(sigma).T
    x = 10.0 + 3.0 * latent                                 # continuous items in a raw metric
    ordinal = np.array(ORDINAL)
    x[:, ordinal] = (latent[:, ordinal, None] > POP_CUTS).sum(axis=2) + 1.0
    x[rng.random(x.shape) < missing] = np.nan
    return x


SPEC = make_spec({"A": ITEMS[:4], "B": ITEMS[4:]})


# --------------------------------------------------------------------------
# DWLS on the mixed matrix


@pytest.fixture(scope="module")
def sample_moments():
    return mixed_moments(_population_sample(np.random.default_rng(41), 500, missing=0.05),
                         ITEMS, ORDINAL)


def test_estimates_match_semopy_dwls_on_the_same_mixed_matrix_and_weights(sample_moments):
    spec = make_spec({"A": ITEMS[:4], "B": ITEMS[4:]}, identification="marker")
    fit = fit_dwls(build_layout(spec, sample_moments.correlations), sample_moments)
    model, result = _semopy_dwls("A =~ o1 + o2 + c1 + c2\nB =~ o3 + o4 + c3 + c4",
                                 sample_moments)
    checked = assert_estimates_match_semopy(fit, model.inspect(), ("A", "B"), ITEMS)
    assert checked == 17      # 6 free loadings, 3 factor (co)variances, 8 residual variances
    # semopy's objective at its optimum is our unadjusted statistic T = eᵀWe
    assert_allclose(fit.test.chi_square, result.fun, rtol=1e-7)


def test_sparse_category_of_an_ordinal_item_is_reported_and_merged_on_request():
    x = _population_sample(np.random.default_rng(3), 300)
    fives = np.flatnonzero(x[:, 1] == 5)
    x[fives[3:], 1] = 4                  # three answers of 5 remain for o2
    notes = evaluate_mixed(SPEC, x, ITEMS, ("c1", "c2", "c3", "c4")).to_dict()["ordinal_notes"]
    assert [n for n in notes if "sparse" in n][0].startswith(
        "Item 'o2' has sparse categories: 5 (3 answers).")
    merged = evaluate_mixed(SPEC, x, ITEMS, ("c1", "c2", "c3", "c4"), collapse_sparse=True)
    out = merged.to_dict()
    assert "Item 'o2': categories with fewer than 5 answers were merged into a neighbouring " \
           "category: 5 (3 answers) into 4." in out["ordinal_notes"]
    assert len(out["thresholds"]["o2"]) == 3 and len(out["thresholds"]["o1"]) == 4


def test_collapsed_category_is_analysed_as_the_same_answers_recoded_by_hand():
    # o2's middle category 2 keeps three answers; its lower neighbour (≈ 7 % of the
    # answers) has fewer than its upper one, so it is merged down into 1
    x = _population_sample(np.random.default_rng(19), 400, missing=0.03)
    twos = np.flatnonzero(x[:, 1] == 2)
    x[twos[3:], 1] = 3
    spec = make_spec({"A": ("o1", "o2", "o3", "o4"), "B": ("c1", "c2", "c3", "c4")})
    continuous = ("c1", "c2", "c3", "c4")
    merged = evaluate_mixed(spec, x, ITEMS, continuous, scale=(1, 5), collapse_sparse=True)
    out = merged.to_dict()
    assert merged.converged
    assert ("Item 'o2': categories with fewer than 5 answers were merged into a neighbouring "
            "category: 2 (3 answers) into 1." in out["ordinal_notes"])
    # the same merge written here with numpy, fitted without collapsing
    by_hand = x.copy()
    by_hand[by_hand[:, 1] == 2, 1] = 1
    plain = evaluate_mixed(spec, by_hand, ITEMS, continuous).to_dict()
    for item in ("o1", "o2", "o3", "o4"):
        # Olsson (1979, eq. 8): τ_c = Φ⁻¹(proportion answering ≤ c) of the recoded answers
        seen = by_hand[~np.isnan(by_hand[:, ITEMS.index(item)]), ITEMS.index(item)]
        cumulative = [np.mean(seen <= c) for c in np.unique(seen)[:-1]]
        assert_allclose(out["thresholds"][item], stats.norm.ppf(cumulative), rtol=1e-12)
    assert_allclose(out["correlations_mixed"]["correlations"],
                    plain["correlations_mixed"]["correlations"], rtol=0, atol=1e-12)
    [ours], [theirs] = out["reliability_ordinal"], plain["reliability_ordinal"]
    for key in ("ordinal_alpha", "omega_total", "omega_construct", "omega_total_observed"):
        assert_allclose(ours[key], theirs[key], rtol=1e-9, err_msg=key)
    # omega_total_observed: the true-score variance over the sample variance of the sum of
    # category ranks 0, 1, … (Green & Yang 2009), the ranks of the recoded answers
    # computed here with numpy, over the rows that answered all four ordinal items
    a = by_hand[:, [0, 1, 4, 5]]
    a = a[~np.isnan(a).any(axis=1)]
    ranks = np.column_stack([np.unique(a[:, j], return_inverse=True)[1] for j in range(4)])
    assert_allclose(ours["omega_total_observed"],
                    ours["omega_total"] * ours["implied_total_variance"]
                    / np.var(ranks.sum(axis=1), ddof=1), rtol=1e-12)


# --------------------------------------------------------------------------
# Simulation from a known population


@pytest.fixture(scope="module")
def replications():
    """250 seeded samples of n = 400 from the two-construct population, 10 % answers missing."""
    rng = np.random.default_rng(20240612)
    estimates, ses, stats_, rho, rho_var = [], [], [], [], []
    for _ in range(250):
        moments = mixed_moments(_population_sample(rng, 400, missing=0.10), ITEMS, ORDINAL)
        fit = fit_dwls(build_layout(SPEC, moments.correlations), moments)
        assert fit.record.converged
        estimates.append(fit.theta[:9])
        ses.append(np.sqrt(np.diag(fit.acov))[:9])
        stats_.append((fit.test.chi_square_shifted, fit.test.p_value_shifted))
        rho.append(moments.raw_correlations[np.triu_indices(8, 1)])
        rho_var.append(np.diag(moments.acov_corr))
    return (np.array(estimates), np.array(ses), np.array(stats_), np.array(rho),
            np.array(rho_var))


@pytest.mark.slow
def test_dwls_on_the_mixed_matrix_recovers_the_standardized_loadings(replications):
    estimates = replications[0]
    # unit-variance identification on a correlation matrix: the loadings are the population
    # standardized loadings; two-step DWLS is consistent, so the mean bias over 250
    # replications is within 0.02 (the Monte Carlo SE of a mean is about 0.003)
    truth = np.append(POP_LOADINGS, POP_PHI)
    assert np.max(np.abs(estimates.mean(axis=0) - truth)) < 0.02


@pytest.mark.slow
def test_robust_standard_errors_match_the_spread_of_the_estimates(replications):
    estimates, ses = replications[:2]
    # mean SE over empirical SD within 15% for every loading and the construct
    # correlation; the Monte Carlo error of an SD from 250 draws is about 4.5%
    ratio = ses.mean(axis=0) / estimates.std(axis=0, ddof=1)
    assert np.all(np.abs(ratio - 1) < 0.15), ratio


@pytest.mark.slow
def test_sampling_variances_of_all_correlations_match_their_spread(replications):
    rho, rho_var = replications[3:]
    ratio = rho_var.mean(axis=0) / rho.var(axis=0, ddof=1)
    jj, ll = np.triu_indices(8, 1)
    ordinal = np.array(ORDINAL)
    kinds = {"polychoric": ordinal[jj] & ordinal[ll], "Pearson": ~ordinal[jj] & ~ordinal[ll],
             "polyserial": ordinal[jj] != ordinal[ll]}
    # The asymptotic variances (pairwise missing answers, first-step corrections) against
    # the variance over 250 replications.  One ratio has a relative Monte Carlo error of
    # about sqrt(2/249) = 9 %: every ratio within 35 % (about four errors), and the mean
    # ratio of each kind (6, 16 and 6 pairs) within 12 %.  Leaving out the n/n_jl scaling
    # for 10 % missing answers would give ratios near 0.66 and fail.
    assert np.all(np.abs(ratio - 1) < 0.35), ratio
    for kind, which in kinds.items():
        assert abs(ratio[which].mean() - 1) < 0.12, (kind, ratio[which])


@pytest.mark.slow
def test_adjusted_statistic_averages_its_degrees_of_freedom(replications):
    chi2 = replications[2][:, 0]
    # df = 28 − 9 = 19; the Monte Carlo SE of the mean of 250 χ²₁₉ draws is
    # √(38/250) ≈ 0.39: ±1.5 is almost four SEs (theory: Asparouhov & Muthén 2010)
    assert abs(chi2.mean() - 19) < 1.5


# --------------------------------------------------------------------------
# A model file mixing item types, end to end


MODEL_FILE = """\
study: mixed item types
data:
  file: answers.csv
estimation:
  method: ordinal
groups:
  column: site
models:
  three:
    first: true
    constructs:
      A: [a1, a2, a3, a4]
      B: [b1, b2, b3]
      C: [m1, m2, m3]
  ordinal only:
    constructs:
      A: [a1, a2, a3, a4]
"""


#: three constructs: a-items five-point, b-items continuous, m1 m2 five-point with m3 continuous
KIND_ITEMS = ("a1", "a2", "a3", "a4", "b1", "b2", "b3", "m1", "m2", "m3")


def kinds_answers(rng, n: int) -> np.ndarray:
    """Answers to :data:`KIND_ITEMS` from a three-construct population (loadings
    .6–.8, correlations .3–.4): continuous scores 50 + 10 z, five-point answers
    cut at :data:`POP_CUTS` for the a-items, m1 and m2; nothing missing."""
    lam = np.zeros((10, 3))
    lam[:4, 0], lam[4:7, 1], lam[7:, 2] = [.7, .6, .75, .65], [.7, .8, .6], [.65, .7, .75]
    phi = np.array([[1, .3, .4], [.3, 1, .35], [.4, .35, 1]])
    sigma = lam @ phi @ lam.T
    np.fill_diagonal(sigma, 1.0)
    latent = rng.standard_normal((n, 10)) @ np.linalg.cholesky(sigma).T
    x = 50 + 10 * latent
    ordinal = [0, 1, 2, 3, 7, 8]
    x[:, ordinal] = (latent[:, ordinal, None] > POP_CUTS).sum(axis=2) + 1.0
    return x


@pytest.fixture(scope="module")
def checked(tmp_path_factory):
    """A study whose a- and m1/m2-items are five-point answers and whose b-items and m3
    are continuous scores (not whole numbers: continuous under treat_as: auto)."""
    folder = tmp_path_factory.mktemp("mixed")
    rng = np.random.default_rng(2718)
    n = 500
    x = kinds_answers(rng, n)
    x[rng.random(x.shape) < 0.04] = np.nan
    frame = pd.DataFrame(x, columns=KIND_ITEMS)
    frame["site"] = np.where(rng.random(n) < 0.5, "north", "south")
    frame.to_csv(folder / "answers.csv", index=False)
    (folder / "study.yaml").write_text(MODEL_FILE)
    result = scalewright.check(folder / "study.yaml", out=folder / "out")
    written = json.loads((folder / "out" / "study.json").read_text())
    return result.to_dict(), written


def test_the_check_chooses_the_mixed_route_and_says_why(checked):
    report, _ = checked
    method = report["method"]
    assert method["estimator"] == "mixed" and method["missing_handling"] == "pairwise"
    assert method["continuous_items"] == ["b1", "b2", "b3", "m3"]
    assert method["ordinal_items"] == ["a1", "a2", "a3", "a4", "m1", "m2"]


def test_json_has_the_estimator_and_thresholds_for_ordinal_items_only(checked):
    report, written = checked
    model = written["models"][0]
    assert model["estimator"] == MIXED_DWLS and "polyserial" in model["estimator"]
    assert sorted(model["thresholds"]) == ["a1", "a2", "a3", "a4", "m1", "m2"]
    assert all(len(t) == 4 for t in model["thresholds"].values())       # five categories
    mixed = model["correlations_mixed"]
    assert mixed["item_types"] == ["ordinal"] * 4 + ["continuous"] * 3 + ["ordinal"] * 2 + \
        ["continuous"]
    assert sorted(mixed["continuous"]) == ["b1", "b2", "b3", "m3"]
    for key in ("chi_square", "df", "cfi", "tli", "rmsea", "srmr", "chi_square_scaled",
                "scaling_factor"):
        assert key in model["fit"]
    # the written file is the result dict (JSON has no NaN: the standard)
    assert json.loads(to_json(report)) == written


def test_residual_correlations_are_taken_against_the_mixed_matrix(checked):
    report, _ = checked
    model = report["models"][0]
    residuals = model["residual_correlations"]
    assert residuals["observed"] == "polychoric, polyserial and Pearson correlations"
    # the residuals are the fitted matrix minus the implied one: SRMR is their
    # root mean square over the p(p−1)/2 pairs (definition in evaluate_ordinal)
    matrix = np.array(residuals["matrix"])
    rows, cols = np.triu_indices(len(matrix), 1)
    assert_allclose(np.sqrt(np.mean(matrix[rows, cols] ** 2)), model["fit"]["srmr"], atol=1e-4)
    assert all(np.isfinite(r["standardized"]) for r in residuals["largest"])


def test_continuous_items_are_reported_in_the_standardized_metric(checked):
    report, _ = checked
    model = report["models"][0]
    # unit construct variances on a correlation matrix: every loading is its own
    # standardized loading, and residual variances are 1 − λ² (algebra, 1e-10)
    for row in model["loadings"]:
        assert_allclose(row["estimate"], row["std_estimate"], rtol=0, atol=1e-10)
    loading = {r["item"]: r["estimate"] for r in model["loadings"]}
    for row in model["residual_variances"]:
        assert_allclose(row["estimate"], 1 - loading[row["item"]] ** 2, rtol=0, atol=1e-10)


def _alpha(corr):
    """Cronbach (1951) alpha of a correlation matrix: k/(k−1) (1 − k / 1ᵀR1)."""
    k = len(corr)
    return k / (k - 1) * (1 - k / np.sum(corr))


def test_reliability_by_the_kinds_of_a_constructs_items(checked):
    report, _ = checked
    model = report["models"][0]
    corr = np.array(model["correlations_mixed"]["correlations"])
    ordinal = model["reliability_ordinal"]
    continuous = model["reliability_continuous"]
    assert [r["construct"] for r in ordinal] == ["A"]
    assert [r["construct"] for r in continuous] == ["B"]
    # ordinal alpha (Zumbo, Gadermann & Zeisser 2007) is alpha of the polychoric matrix
    assert_allclose(ordinal[0]["ordinal_alpha"], _alpha(corr[:4, :4]), rtol=1e-12)
    assert 0 < ordinal[0]["omega_total"] < 1
    # standardized alpha of the Pearson correlations, and McDonald's (1999) omega of the
    # standardized solution (Σλ)² / ((Σλ)² + Σθ) recomputed from the JSON rows
    assert_allclose(continuous[0]["alpha_standardized"], _alpha(corr[4:7, 4:7]), rtol=1e-12)
    lam = np.array([r["estimate"] for r in model["loadings"] if r["construct"] == "B"])
    theta = np.array([r["estimate"] for r in model["residual_variances"]][4:7])
    assert_allclose(continuous[0]["omega_total"], lam.sum() ** 2 / (lam.sum() ** 2 + theta.sum()),
                    rtol=1e-10)
    [note] = model["reliability_notes"]
    assert note.startswith("Construct 'C' mixes ordinal items ('m1', 'm2') and continuous items "
                           "('m3'), so no reliability coefficient is given")


def test_a_model_of_ordinal_items_only_takes_the_ordinal_route(checked):
    report, _ = checked
    model = report["models"][1]
    assert model["estimator"] == ORDINAL_DWLS
    assert "polychoric" in model and "correlations_mixed" not in model


def test_methods_paragraph_names_polyserial_correlations_and_cites_them(checked):
    report, _ = checked
    text = " ".join(methods_paragraphs(report))
    assert ("Correlations involving a continuous and an ordinal item were polyserial "
            "correlations (two-step maximum likelihood; Olsson, Drasgow & Dorans, 1982)") in text
    assert "Each polychoric, polyserial or Pearson correlation used every respondent" in text
    assert any(ref.startswith("Olsson, U., Drasgow, F., & Dorans, N. J. (1982). The polyserial "
                              "correlation coefficient.") for ref in references_used(report))


def test_invariance_of_a_mixed_study_says_how_the_items_were_treated(checked):
    report, _ = checked
    assert report["invariance_setup"]["method_note"].startswith(
        "The items are treated as continuous here (robust ML): invariance for models that mix "
        "ordinal and continuous items is not available yet.")
    assert report["invariance"]


def test_report_says_in_the_models_section_why_a_mixed_construct_has_no_reliability(checked):
    from scalewright.report.document import build_document
    report, _ = checked
    section = next(s for s in build_document(report).sections if s.id == "model-1")
    texts = [b["text"] for b in section.blocks if b["type"] == "p"]
    assert report["models"][0]["reliability_notes"][0] in texts


# --------------------------------------------------------------------------
# Refits of the refinement path


def _fit_numbers(result):
    f = result.fit
    return np.array([f.chi_square, f.cfi, f.tli, f.rmsea, f.srmr, *result.estimate.theta,
                     *result.estimate.se])


def test_mixed_refits_read_off_the_larger_models_moments_match_a_fresh_estimation():
    # theory: every threshold, mean and SD comes from its own item and every
    # polychoric, polyserial and Pearson correlation (and its influence) from its own
    # pair, so on the same rows the subset equals a fresh estimation (rounding only).
    # Dropping an ordinal item and a continuous one.
    from scalewright.evaluate_mixed import refit_mixed
    from scalewright.itemreview import without_item
    x = _population_sample(np.random.default_rng(43), 600, missing=0.04)
    continuous = ("c1", "c2", "c3", "c4")
    full = evaluate_mixed(SPEC, x, ITEMS, continuous, (1, 5))
    for item in ("o2", "c1"):
        reduced = without_item(SPEC, item)
        columns = [ITEMS.index(i) for i in reduced.items]
        fresh = evaluate_mixed(reduced, x[:, columns], reduced.items, continuous, (1, 5))
        read_off = refit_mixed(reduced, full.fitted.moments, x[:, columns], reduced.items,
                               continuous, (1, 5))
        assert_allclose(_fit_numbers(read_off), _fit_numbers(fresh), rtol=1e-9, atol=1e-12)
        a, b = read_off.fitted.moments, fresh.fitted.moments
        assert a.items == b.items and a.ordinal == b.ordinal and a.n_rows == b.n_rows
        assert_allclose(a.acov, b.acov, rtol=1e-12, atol=1e-15)
        assert_allclose(a.raw_correlations, b.raw_correlations, rtol=1e-12)
        assert_allclose(np.r_[a.means, a.sds], np.r_[b.means, b.sds], rtol=1e-12)
        assert np.array_equal(a.codes, b.codes)
        assert all(np.array_equal(u, v) for u, v in zip(a.thresholds, b.thresholds))
    # the last continuous item dropped: the reduced model is ordinal, estimated afresh;
    # a model of ordinal items only has ordinal moments, whose refits read them off
    for spec, item in ((make_spec({"A": ("o1", "o2"), "B": ("o3", "o4", "c1")}), "c1"),
                       (make_spec({"A": ("o1", "o2", "o3", "o4")}), "o1")):
        larger = evaluate_mixed(spec, x, ITEMS, continuous, (1, 5))
        reduced = without_item(spec, item)
        columns = [ITEMS.index(i) for i in reduced.items]
        read_off = refit_mixed(reduced, larger.fitted.moments, x[:, columns], reduced.items,
                               continuous, (1, 5))
        fresh = evaluate_mixed(reduced, x[:, columns], reduced.items, continuous, (1, 5))
        assert read_off.estimator == fresh.estimator == ORDINAL_DWLS
        assert_allclose(_fit_numbers(read_off), _fit_numbers(fresh), rtol=1e-9, atol=1e-12)
