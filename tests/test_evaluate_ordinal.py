"""The ordinal route end to end (scalewright.evaluate_ordinal).

Outside references: scipy (normal quantiles for the thresholds, the χ²
distribution, bivariate normal probabilities for categorical omega), the
published formulas of the fit indices and coefficients (cited beside each
check), and the JSON standard (no NaN).  Estimation itself is checked
against semopy and simulation in ``tests/test_dwls.py``.
"""

from __future__ import annotations

import json
import warnings

import numpy as np
import pytest
from conftest import make_spec
from numpy.testing import assert_allclose
from scipy import stats

from scalewright.errors import ScalewrightWarning, StudyError
from scalewright.evaluate_ordinal import ORDINAL_DWLS, evaluate_ordinal
from scalewright.output import to_json

ITEMS = tuple(f"q{i}" for i in range(1, 9))
CUTS = np.array([-1.4, -0.5, 0.4, 1.3])


def _answers(rng, n, missing=0.05):
    lam = np.zeros((8, 2))
    lam[:4, 0] = [0.75, 0.65, 0.8, 0.55]
    lam[4:, 1] = [0.6, 0.7, 0.55, 0.8]
    sigma = lam @ np.array([[1.0, 0.35], [0.35, 1.0]]) @ lam.T
    np.fill_diagonal(sigma, 1.0)
    latent = rng.standard_normal((n, 8)) @ np.linalg.cholesky(sigma).T
    x = (latent[:, :, None] > CUTS).sum(axis=2).astype(float) + 1.0
    x[rng.random(x.shape) < missing] = np.nan
    return x


@pytest.fixture(scope="module")
def answers():
    x = _answers(np.random.default_rng(808), 600)
    x[:3] = np.nan                       # three rows that answered nothing
    return x


@pytest.fixture(scope="module")
def result(answers):
    spec = make_spec({"A": ITEMS[:4], "B": ITEMS[4:]})
    # an extra column the model does not use, to check column selection
    data = np.column_stack([answers, np.ones(len(answers))])
    return evaluate_ordinal(spec, data, ITEMS + ("unused",), scales=(1, 5))


@pytest.fixture(scope="module")
def report(result):
    return json.loads(to_json(result.to_dict()))


def test_result_is_valid_json_with_the_ordinal_keys(report):
    # to_json refuses NaN (allow_nan=False), so undefined values must be null
    assert report["estimator"] == ORDINAL_DWLS
    for key in ("chi_square", "chi_square_unadjusted", "chi_square_scaled", "scaling_factor",
                "df", "p_value", "cfi", "tli", "rmsea", "rmsea_ci90", "srmr"):
        assert report["fit"][key] is not None, key
    assert report["fit"]["aic"] is None and report["fit"]["loglik"] is None
    assert report["missing_handling"] == "pairwise"
    assert set(report["thresholds"]) == set(ITEMS)
    assert [r["construct"] for r in report["reliability_ordinal"]] == ["A", "B"]


def test_thresholds_are_normal_quantiles_of_cumulative_proportions(report, answers):
    # Olsson (1979, eq. 8): τ_c = Φ⁻¹(proportion answering ≤ c), among the
    # rows that answered the item; scipy's normal quantile, 1e-12.
    for j, item in enumerate(ITEMS):
        seen = answers[~np.isnan(answers[:, j]), j]
        cumulative = np.array([np.mean(seen <= c) for c in (1, 2, 3, 4)])
        assert_allclose(report["thresholds"][item], stats.norm.ppf(cumulative), rtol=1e-12)


def test_chi_square_p_value_is_from_chi_square_on_model_df(report):
    fit = report["fit"]
    # 28 correlations − (8 loadings + 1 correlation)
    assert fit["df"] == 19
    assert_allclose(fit["p_value"], stats.chi2.sf(fit["chi_square"], 19), rtol=1e-10)
    # the scaled-and-shifted statistic a·T + b (Asparouhov & Muthén 2010)
    assert_allclose(fit["chi_square"], fit["shift_scale"] * fit["chi_square_unadjusted"]
                    + fit["shift"], rtol=1e-12)
    assert_allclose(fit["chi_square_scaled"],
                    fit["chi_square_unadjusted"] / fit["scaling_factor"], rtol=1e-12)


def test_cfi_tli_rmsea_follow_their_formulas_from_the_adjusted_statistic(report, result):
    fit = report["fit"]
    t, df, tb, dfb = fit["chi_square"], fit["df"], fit["baseline_chi_square"], fit["baseline_df"]
    n = result.estimate.n
    assert dfb == 28
    # Bentler (1990); Tucker & Lewis (1973); Steiger & Lind (1980) with N − 1
    cfi = 1 - max(t - df, 0) / max(tb - dfb, t - df, 0)
    tli = (tb / dfb - t / df) / (tb / dfb - 1)
    rmsea = np.sqrt(max(t - df, 0) / (df * (n - 1)))
    assert_allclose([fit["cfi"], fit["tli"], fit["rmsea"]], [cfi, tli, rmsea], rtol=1e-12)
    assert n == 597                        # the three empty rows are left out


def test_srmr_is_the_root_mean_square_of_correlation_residuals(report):
    r = np.array(report["polychoric"]["correlations"])
    lam = np.zeros((8, 2))
    for row in report["loadings"]:
        lam[ITEMS.index(row["item"]), "AB".index(row["construct"])] = row["estimate"]
    phi = report["construct_correlations"][0]["estimate"]
    implied = lam @ np.array([[1, phi], [phi, 1]]) @ lam.T
    jj, ll = np.triu_indices(8, 1)
    # Bentler (1995), over the 28 modelled correlations
    assert_allclose(report["fit"]["srmr"], np.sqrt(np.mean((r - implied)[jj, ll] ** 2)),
                    rtol=1e-10)


def test_residual_variances_are_one_minus_squared_loadings(report):
    loading = {row["item"]: row["estimate"] for row in report["loadings"]}
    for row in report["residual_variances"]:
        assert_allclose(row["estimate"], 1 - loading[row["item"]] ** 2, rtol=0, atol=1e-12)
        assert row["se"] > 0


def test_ordinal_alpha_is_alpha_of_the_polychoric_matrix(report):
    r = np.array(report["polychoric"]["correlations"])[:4, :4]
    # Zumbo, Gadermann & Zeisser (2007): α = k/(k−1) (1 − k / 1ᵀR1)
    expected = 4 / 3 * (1 - 4 / r.sum())
    assert_allclose(report["reliability_ordinal"][0]["ordinal_alpha"], expected, rtol=1e-12)


def _phi2(h, k, rho):
    if rho >= 1 - 1e-12:
        return stats.norm.cdf(min(h, k))
    return stats.multivariate_normal.cdf([h, k], mean=[0, 0], cov=[[1, rho], [rho, 1]])


def test_categorical_omega_matches_green_yang_with_scipy_probabilities(report):
    lam = np.array([row["estimate"] for row in report["loadings"] if row["construct"] == "A"])
    tau = [np.array(report["thresholds"][it]) for it in ITEMS[:4]]

    def score_cov_sum(rho):
        # Green & Yang (2009): Σ_ij Σ_cc' [Φ2(τ_ic, τ_jc'; ρ_ij) − Φ(τ_ic)Φ(τ_jc')]
        return sum(_phi2(a, b, rho[i, j]) - stats.norm.cdf(a) * stats.norm.cdf(b)
                   for i in range(4) for j in range(4) for a in tau[i] for b in tau[j])

    common = np.outer(lam, lam)
    full = common.copy()
    np.fill_diagonal(full, 1.0)
    expected = score_cov_sum(common) / score_cov_sum(full)
    # scipy's bivariate normal cdf is accurate to about 1e-7 per probability
    assert_allclose(report["reliability_ordinal"][0]["omega_total"], expected, rtol=1e-5)


def test_missing_answers_are_reported_as_handled_pairwise(report, answers):
    observed = ~np.isnan(answers[3:])
    both = observed.T.astype(int) @ observed.astype(int)
    counts = both[np.triu_indices(8, 1)]
    note = report["ordinal_notes"][1]
    assert note.startswith("Missing answers were handled pairwise")
    assert f"({counts.min()} to {counts.max()} of 597 rows)" in note
    assert "3 rows without any answer to these items were left out." in note


# --------------------------------------------------------------------------
# Bad input surfaces with the item and what to do


def test_declared_category_nobody_used_names_the_item_and_the_option():
    x = _answers(np.random.default_rng(3), 300, missing=0.0)
    x[x[:, 2] == 5, 2] = 4
    spec = make_spec({"A": ITEMS[:4], "B": ITEMS[4:]})
    with pytest.raises(StudyError, match=r"Item 'q3' is declared on a 1-5 scale but nobody "
                                         r"answered 5.*collapse_sparse: true under items:"):
        evaluate_ordinal(spec, x, ITEMS, scales={it: (1, 5) for it in ITEMS})


def test_collapsing_sparse_categories_fits_and_says_what_was_merged():
    x = _answers(np.random.default_rng(3), 300, missing=0.0)
    x[x[:, 2] == 5, 2] = 4
    spec = make_spec({"A": ITEMS[:4], "B": ITEMS[4:]})
    res = evaluate_ordinal(spec, x, ITEMS, scales=(1, 5), collapse_sparse=True)
    notes = res.to_dict()["ordinal_notes"]
    assert any(n.startswith("Item 'q3': categories with fewer than 5 answers were merged")
               for n in notes)
    assert len(res.to_dict()["thresholds"]["q3"]) == 3
    assert res.converged


#: (item column, sparse category, where its other answers are moved, the category it is
#: then merged into): the highest category merged down into its neighbour, and a middle
#: one merged down because its lower neighbour (~8 % of answers) has fewer than its upper
DOWNWARD_MERGES = [(2, 5.0, 4.0, 4.0), (1, 2.0, 3.0, 1.0)]


@pytest.mark.parametrize("column, sparse, moved, into", DOWNWARD_MERGES)
def test_collapsed_category_is_analysed_as_the_same_answers_recoded_by_hand(column, sparse, moved,
                                                                             into):
    x = _answers(np.random.default_rng(11), 400, missing=0.03)
    hits = np.flatnonzero(x[:, column] == sparse)
    kept = 3
    x[hits[kept:], column] = moved
    spec = make_spec({"A": ITEMS[:4], "B": ITEMS[4:]})
    merged = evaluate_ordinal(spec, x, ITEMS, scales=(1, 5), collapse_sparse=True).to_dict()
    assert (f"Item '{ITEMS[column]}': categories with fewer than 5 answers were merged into a "
            f"neighbouring category: {sparse:g} ({kept} answers) into {into:g}."
            in merged["ordinal_notes"])
    # the same merge written here with numpy, fitted without collapsing
    by_hand = x.copy()
    by_hand[by_hand[:, column] == sparse, column] = into
    plain = evaluate_ordinal(spec, by_hand, ITEMS).to_dict()
    for item in ITEMS:
        # Olsson (1979, eq. 8): τ_c = Φ⁻¹(proportion answering ≤ c) of the recoded answers
        seen = by_hand[~np.isnan(by_hand[:, ITEMS.index(item)]), ITEMS.index(item)]
        cumulative = [np.mean(seen <= c) for c in np.unique(seen)[:-1]]
        assert_allclose(merged["thresholds"][item], stats.norm.ppf(cumulative), rtol=1e-12)
    assert_allclose(merged["polychoric"]["correlations"], plain["polychoric"]["correlations"],
                    rtol=0, atol=1e-12)
    for ours, theirs in zip(merged["reliability_ordinal"], plain["reliability_ordinal"]):
        for key in ("ordinal_alpha", "omega_total", "omega_construct", "omega_total_observed"):
            assert_allclose(ours[key], theirs[key], rtol=1e-9, err_msg=key)
    # omega_total_observed: the true-score variance over the sample variance of the sum of
    # category ranks 0, 1, … (Green & Yang 2009), the ranks of the recoded answers
    # computed here with numpy, over the rows that answered the construct's four items
    a = by_hand[:, :4]
    a = a[~np.isnan(a).any(axis=1)]
    ranks = np.column_stack([np.unique(a[:, j], return_inverse=True)[1] for j in range(4)])
    first = merged["reliability_ordinal"][0]
    assert_allclose(first["omega_total_observed"],
                    first["omega_total"] * first["implied_total_variance"]
                    / np.var(ranks.sum(axis=1), ddof=1), rtol=1e-12)


COLLAPSING_STUDY = """\
study: collapsed categories
data:
  file: answers.csv
items:
  scale: [1, 5]
  collapse_sparse: true
estimation:
  method: ordinal
models:
  two:
    constructs:
      A: [q1, q2, q3, q4]
      B: [q5, q6, q7, q8]
"""


def test_refinement_path_of_a_collapsing_study_sees_the_merged_categories(tmp_path):
    import pandas as pd

    import scalewright

    x = _answers(np.random.default_rng(11), 400, missing=0.03)
    twos = np.flatnonzero(x[:, 1] == 2)
    x[twos[3:], 1] = 3                     # q2's category 2 keeps three answers: merged into 1
    pd.DataFrame(x, columns=ITEMS).to_csv(tmp_path / "answers.csv", index=False)
    (tmp_path / "study.yaml").write_text(COLLAPSING_STUDY)
    model = scalewright.check(tmp_path / "study.yaml").to_dict()["models"][0]
    assert any(n.endswith("2 (3 answers) into 1.") for n in model["ordinal_notes"])
    # Cronbach's (1951) alpha, k/(k−1) (1 − Σ var_i / var(Σ x_i)), of the recoded answers
    # (numpy here) in the rows that answered every item of the model
    by_hand = x.copy()
    by_hand[by_hand[:, 1] == 2, 1] = 1
    a = by_hand[~np.isnan(by_hand).any(axis=1), :4]
    alpha = 4 / 3 * (1 - a.var(axis=0, ddof=1).sum() / a.sum(axis=1).var(ddof=1))
    assert_allclose(model["refinement"]["steps"][0]["reliability"]["A"], alpha, rtol=1e-12)


def test_item_with_too_many_values_names_the_item():
    x = _answers(np.random.default_rng(4), 300, missing=0.0)
    x[:, 5] = np.tile(np.arange(1.0, 13.0), 25)
    spec = make_spec({"A": ITEMS[:4], "B": ITEMS[4:]})
    with pytest.raises(StudyError, match=r"Item 'q6' has 12 different answer values"):
        evaluate_ordinal(spec, x, ITEMS)


def test_item_nobody_answered_names_the_item():
    x = _answers(np.random.default_rng(5), 300, missing=0.0)
    x[:, 7] = np.nan
    spec = make_spec({"A": ITEMS[:4], "B": ITEMS[4:]})
    with pytest.raises(StudyError, match=r"Item 'q8' has no answers"):
        evaluate_ordinal(spec, x, ITEMS)


def test_pair_answered_together_too_rarely_names_both_items():
    x = _answers(np.random.default_rng(6), 300, missing=0.0)
    x[:150, 0] = np.nan          # q1 answered by the second half only,
    x[150:, 1] = np.nan          # q2 by the first half only
    spec = make_spec({"A": ITEMS[:4], "B": ITEMS[4:]})
    with pytest.raises(StudyError, match=r"'q1' and 'q2' \(0 rows\)"):
        evaluate_ordinal(spec, x, ITEMS)


def test_indefinite_polychoric_matrix_is_named_and_the_raw_estimates_fitted():
    # pairwise deletion over disjoint row blocks: a-b and b-c strongly
    # positive, a-c strongly negative, which no correlation matrix allows
    rng = np.random.default_rng(21)
    blocks = []
    for pair, rho in [((0, 1), 0.8), ((1, 2), 0.8), ((0, 2), -0.8)]:
        latent = rng.multivariate_normal([0, 0], [[1, rho], [rho, 1]], size=300)
        block = np.full((300, 3), np.nan)
        block[:, list(pair)] = np.digitize(latent, [-0.6, 0.0, 0.6]) + 1.0
        blocks.append(block)
    spec = make_spec({"A": ("a", "b", "c")})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ScalewrightWarning)
        res = evaluate_ordinal(spec, np.vstack(blocks), ("a", "b", "c"))
    out = json.loads(to_json(res.to_dict()))
    smoothing = [w for w in out["warnings"] if "not positive definite" in w]
    assert len(smoothing) == 1
    assert "fitted to the pairwise estimates as they are" in smoothing[0]
    assert "'a'" in smoothing[0] or "'b'" in smoothing[0] or "'c'" in smoothing[0]
    # three items, one construct: df 0, so every test statistic is undefined
    assert out["fit"]["df"] == 0 and out["fit"]["chi_square_scaled"] is None


def test_sparse_category_is_reported_with_its_count_and_the_option_to_merge():
    x = _answers(np.random.default_rng(3), 300, missing=0.0)
    fives = np.flatnonzero(x[:, 2] == 5)
    x[fives[3:], 2] = 4                  # three answers of 5 remain for q3
    spec = make_spec({"A": ITEMS[:4], "B": ITEMS[4:]})
    notes = evaluate_ordinal(spec, x, ITEMS).to_dict()["ordinal_notes"]
    sparse = [n for n in notes if "sparse categories" in n]
    assert len(sparse) == 1
    assert sparse[0].startswith("Item 'q3' has sparse categories: 5 (3 answers).")
    assert "collapse_sparse: true under items:" in sparse[0]


def test_a_model_file_study_runs_through_the_ordinal_route():
    # The call the check makes for an ordinal study: ModelSpec, ItemData
    # values and names, the study's scale and collapse option.  df is
    # counted from the model: p(p−1)/2 correlations minus loadings and
    # construct correlations (algebra).
    from pathlib import Path

    from scalewright.itemdata import read_items
    from scalewright.studyfile import load_study

    study = load_study(Path(__file__).resolve().parents[1] / "models" / "teacher-climate.yaml")
    data = read_items(study)
    spec = next(s for s in study.models if not s.higher_order and not s.general
                and len(s.constructs) > 1)
    res = evaluate_ordinal(spec, data.values, data.items, scales=study.scale,
                           collapse_sparse=study.collapse_sparse)
    p, k = len(spec.items), len(spec.constructs)
    loadings = sum(len(v) for v in spec.constructs.values()) + \
        sum(len(v) for v in spec.cross_loadings.values())
    expected_df = p * (p - 1) // 2 - loadings - k * (k - 1) // 2 - len(spec.residual_covariances)
    out = json.loads(to_json(res.to_dict()))
    assert out["fit"]["df"] == expected_df
    assert out["converged"]


def test_refinement_path_refits_an_ordinal_model_by_dwls(tmp_path):
    # every step of the refinement path must be fitted by the model's own estimator, or
    # its CFI would be compared with step 0's across estimators; the reference is the
    # DWLS fit (evaluate_ordinal, checked against semopy's DWLS in this file) of the
    # model without the removed item, on the same answers
    import pandas as pd

    import scalewright
    from scalewright.itemreview import without_item

    rng = np.random.default_rng(12)
    x = _answers(rng, 500, missing=0.02)
    x[:, 3] = rng.integers(1, 6, len(x)).astype(float)     # q4 answers at random: flagged
    pd.DataFrame(x, columns=ITEMS).to_csv(tmp_path / "answers.csv", index=False)
    (tmp_path / "study.yaml").write_text(COLLAPSING_STUDY.replace("  collapse_sparse: true\n",
                                                                  ""))
    result = scalewright.check(tmp_path / "study.yaml")
    steps = result.to_dict()["models"][0]["refinement"]["steps"]
    assert len(steps) >= 2 and steps[1]["removed"] == "q4"
    spec = result.study.model("two")
    reduced = without_item(spec, "q4")
    direct = evaluate_ordinal(reduced, x[:, [ITEMS.index(i) for i in reduced.items]],
                              reduced.items, (1, 5), False)
    assert_allclose([steps[1]["fit"]["chi_square"], steps[1]["fit"]["cfi"]],
                    [direct.fit.chi_square, direct.fit.cfi], rtol=1e-8)


def _fit_numbers(result):
    f = result.fit
    return np.array([f.chi_square, f.cfi, f.tli, f.rmsea, f.srmr, *result.estimate.theta,
                     *result.estimate.se])


def test_refits_read_off_the_larger_models_moments_match_a_fresh_estimation(answers):
    # theory (two-step estimation: each threshold from its item's margin, each
    # polychoric correlation from its own pair's table and its influence from its own
    # items) makes the subset of the moments equal to a fresh estimation on the same
    # rows; compared with that fresh estimation, rounding only.  Missing answers
    # included; the three empty rows are dropped by both.
    from scalewright.evaluate_ordinal import refit_ordinal
    from scalewright.itemreview import without_item
    spec = make_spec({"A": ITEMS[:4], "B": ITEMS[4:]})
    full = evaluate_ordinal(spec, answers, ITEMS, scales=(1, 5))
    for item in ("q1", "q7"):
        reduced = without_item(spec, item)
        columns = [ITEMS.index(i) for i in reduced.items]
        fresh = evaluate_ordinal(reduced, answers[:, columns], reduced.items, scales=(1, 5))
        read_off = refit_ordinal(reduced, full.fitted.moments, answers[:, columns],
                                 reduced.items, (1, 5))
        assert_allclose(_fit_numbers(read_off), _fit_numbers(fresh), rtol=1e-9, atol=1e-12)
        moments, again = read_off.fitted.moments, fresh.fitted.moments
        assert moments.items == again.items and moments.n_rows == again.n_rows
        assert_allclose(moments.acov, again.acov, rtol=1e-12, atol=1e-15)
        assert_allclose(moments.raw_correlations, again.raw_correlations, rtol=1e-12)
        assert all(np.array_equal(a, b) for a, b in zip(moments.thresholds, again.thresholds))
        assert np.array_equal(moments.codes, again.codes)
        assert np.array_equal(moments.n_pairs, again.n_pairs)


def test_a_row_that_answered_only_the_dropped_item_sends_the_refit_to_a_fresh_estimation():
    # the subset is exact only on the same rows: a row whose one answer is to the
    # dropped item leaves the reduced model's rows, so the moments are re-estimated
    from scalewright.evaluate_ordinal import refit_ordinal
    from scalewright.itemreview import without_item
    x = _answers(np.random.default_rng(31), 500, missing=0.0)
    x[0, 1:] = np.nan                                   # row 1 answers q1 only
    spec = make_spec({"A": ITEMS[:4], "B": ITEMS[4:]})
    full = evaluate_ordinal(spec, x, ITEMS, scales=(1, 5))
    reduced = without_item(spec, "q1")
    fresh = evaluate_ordinal(reduced, x[:, 1:], reduced.items, scales=(1, 5))
    refit = refit_ordinal(reduced, full.fitted.moments, x[:, 1:], reduced.items, (1, 5))
    assert full.fitted.moments.n_rows == 500 and refit.fitted.moments.n_rows == 499
    assert_allclose(_fit_numbers(refit), _fit_numbers(fresh), rtol=1e-12)
