"""Rival models side by side (compare.py): nesting found from the
specifications, chi-square difference tests, scaled differences and BIC
weights, each against an outside reference.

Outside references used here:
* semopy 2.3.11 (fitted with ftol = 1e-12) for the chi-square statistics of
  nested pairs on the Holzinger & Swineford (1939) data;
* the published scaled-difference worked comparisons listed in
  shared/design/references.md (a 2014 Frontiers in Psychology paper on
  scaled difference testing, table 1);
* statistical theory: counted degrees of freedom, and a seeded simulation in
  which the difference statistic of a true restriction follows chi-square on
  its df;
* scipy for BIC weights (softmax of −BIC/2) and chi-square tail areas.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import semopy
from scipy import special, stats

from conftest import HS_CONSTRUCTS, HS_ITEMS, make_spec, simulate_cfa
from scalewright.compare import (DECLARED, DROPPED_PATHS, HIGHER_IN_BIFACTOR, HIGHER_ORDER,
                                 LIKELIHOOD_RATIO, MERGED_CONSTRUCTS, SCALED_DIFFERENCE,
                                 bic_weights, chi_square_difference, compare_models,
                                 detect_nesting, nested_pairs)
from scalewright.evaluate import evaluate_normal

ONE = {"g": HS_ITEMS}
VISUAL_TEXTUAL = {"vt": ("x1", "x2", "x3", "x4", "x5", "x6"), "speed": ("x7", "x8", "x9")}


def _fit(spec, x):
    return evaluate_normal(spec, x).to_dict()


def _semopy_chi_square(description: str, frame: pd.DataFrame) -> float:
    model = semopy.Model(description)
    model.fit(frame, options={"ftol": 1e-12})
    return float(semopy.calc_stats(model)["chi2"].iloc[0])


# --------------------------------------------------------------------------- detection

def test_merging_two_constructs_is_detected_as_nested_on_the_boundary():
    merged = make_spec(VISUAL_TEXTUAL, name="merged")
    three = make_spec(HS_CONSTRUCTS, name="three")
    found = detect_nesting(merged, three)
    assert found.kind == MERGED_CONSTRUCTS
    assert found.boundary
    assert "'vt' joins 'textual', 'visual'" in found.how_detected


def test_the_correlated_model_is_not_nested_in_the_merged_one():
    assert detect_nesting(make_spec(HS_CONSTRUCTS), make_spec(VISUAL_TEXTUAL)) is None


def test_a_higher_order_model_is_nested_in_its_correlated_first_order_model():
    higher = make_spec(HS_CONSTRUCTS, name="h", higher_order={"g": ("visual", "textual", "speed")})
    found = detect_nesting(higher, make_spec(HS_CONSTRUCTS, name="c"))
    assert found.kind == HIGHER_ORDER and not found.boundary


def test_a_higher_order_model_is_nested_in_the_bifactor_model_with_the_same_groups():
    higher = make_spec(HS_CONSTRUCTS, name="h", higher_order={"g": ("visual", "textual", "speed")})
    bifactor = make_spec(HS_CONSTRUCTS, name="b", general="g")
    assert detect_nesting(higher, bifactor).kind == HIGHER_IN_BIFACTOR


def test_the_correlated_model_is_not_taken_as_nested_in_the_bifactor_model():
    # Correlated factors are not a special case of a bifactor model (Reise 2012).
    assert detect_nesting(make_spec(HS_CONSTRUCTS), make_spec(HS_CONSTRUCTS, general="g")) is None


def test_a_one_factor_model_is_not_taken_as_nested_in_the_bifactor_model():
    # Fixing all specific loadings at zero leaves the specific variances
    # unidentified, so the difference test is not the usual one (module docstring).
    assert detect_nesting(make_spec(ONE), make_spec(HS_CONSTRUCTS, general="g")) is None


def test_dropping_a_cross_loading_and_a_residual_covariance_is_detected():
    full = make_spec(HS_CONSTRUCTS, name="full", cross_loadings={"visual": ("x9",)},
                     residual_covariances=[("x4", "x5")])
    found = detect_nesting(make_spec(HS_CONSTRUCTS, name="plain"), full)
    assert found.kind == DROPPED_PATHS
    assert "cross-loading of 'x9' on 'visual'" in found.how_detected
    assert "residual covariance of 'x4' and 'x5'" in found.how_detected


def test_models_on_different_items_are_never_nested():
    fewer = make_spec({"visual": ("x1", "x2", "x3"), "textual": ("x4", "x5", "x6")})
    assert detect_nesting(fewer, make_spec(HS_CONSTRUCTS)) is None


def test_renamed_constructs_are_the_same_model_not_a_nested_pair():
    renamed = make_spec({"a": HS_CONSTRUCTS["visual"], "b": HS_CONSTRUCTS["textual"],
                         "c": HS_CONSTRUCTS["speed"]})
    assert detect_nesting(renamed, make_spec(HS_CONSTRUCTS)) is None


def test_a_declared_pair_the_specifications_cannot_confirm_is_kept_and_says_so():
    a = make_spec(HS_CONSTRUCTS, name="a")
    b = make_spec(VISUAL_TEXTUAL, name="b")
    a.nested_in = ("b",)   # wrongly: b (merged) is nested in a, not a in b
    declared, detected = nested_pairs([a, b])
    assert (declared.restricted, declared.general, declared.kind) == ("a", "b", DECLARED)
    assert "could not confirm" in declared.how_detected
    assert (detected.restricted, detected.general) == ("b", "a")


def test_a_declared_pair_that_is_also_detected_is_listed_once():
    a = make_spec(VISUAL_TEXTUAL, name="a")
    a.nested_in = ("b",)
    pairs = nested_pairs([a, make_spec(HS_CONSTRUCTS, name="b")])
    assert len(pairs) == 1 and pairs[0].how_detected.startswith("declared in the model file")


@pytest.mark.parametrize("restricted, general, expected_df", [
    # counted free parameters (unit-variance scaling, 9 items, 9 residual variances):
    # three correlated: 9 loadings + 3 correlations; merged two: 9 + 1; one factor: 9
    (VISUAL_TEXTUAL, HS_CONSTRUCTS, 2),
    (ONE, HS_CONSTRUCTS, 3),
    (ONE, VISUAL_TEXTUAL, 1),
])
def test_the_difference_in_df_of_merged_models_is_the_number_of_correlations_fixed(
        hs_x, restricted, general, expected_df):
    tests = compare_models([make_spec(restricted, name="r"), make_spec(general, name="g")],
                           [_fit(make_spec(restricted, name="r"), hs_x),
                            _fit(make_spec(general, name="g"), hs_x)])["comparison"]["nested_tests"]
    assert [t["df"] for t in tests] == [expected_df]


# --------------------------------------------------------------------------- the tests themselves

def test_merged_constructs_difference_matches_semopy_chi_squares(hs_data, hs_x):
    # semopy's chi-square is N·F_ML, the convention of indices.py; our ML
    # matches semopy to 1e-6 (DEVELOPERS.md), hence rtol 1e-4.
    one_desc = "g =~ " + " + ".join(HS_ITEMS)
    three_desc = "\n".join(f"{c} =~ {' + '.join(i)}" for c, i in HS_CONSTRUCTS.items())
    frame = hs_data[list(HS_ITEMS)]
    expected = _semopy_chi_square(one_desc, frame) - _semopy_chi_square(three_desc, frame)
    specs = [make_spec(ONE, name="one"), make_spec(HS_CONSTRUCTS, name="three")]
    (test,) = compare_models(specs, [_fit(s, hs_x) for s in specs])["comparison"]["nested_tests"]
    assert test["chi_square"] == pytest.approx(expected, rel=1e-4)
    assert test["p_value"] == pytest.approx(stats.chi2.sf(expected, 3), rel=1e-3)
    assert "conservative" in test["note"]


def test_dropped_cross_loading_difference_matches_semopy_chi_squares(hs_data, hs_x):
    # The x9 cross-loading on the visual factor is the classic misfit of this
    # model; semopy fits both models (same tolerance reasoning as above).
    three_desc = "\n".join(f"{c} =~ {' + '.join(i)}" for c, i in HS_CONSTRUCTS.items())
    frame = hs_data[list(HS_ITEMS)]
    expected = (_semopy_chi_square(three_desc, frame)
                - _semopy_chi_square(three_desc.replace("x3", "x3 + x9", 1), frame))
    plain = make_spec(HS_CONSTRUCTS, name="plain")
    cross = make_spec(HS_CONSTRUCTS, name="cross", cross_loadings={"visual": ("x9",)})
    (test,) = compare_models([plain, cross], [_fit(plain, hs_x), _fit(cross, hs_x)])[
        "comparison"]["nested_tests"]
    assert test["df"] == 1 and test["test"] == LIKELIHOOD_RATIO
    assert test["chi_square"] == pytest.approx(expected, rel=1e-4)
    assert test["note"] is None


@pytest.mark.parametrize("restricted, general, c_d, t_d, df", [
    # (T_scaled, df, c) rows and (c_d, T_d, Δdf) results published in table 1 of
    # the 2014 Frontiers in Psychology paper cited in shared/design/references.md.
    ((90.371, 76, 1.115), (82.052, 69, 1.111), 1.154, 8.319, 7),     # weak vs configural
    ((127.238, 82, 1.108), (108.190, 81, 1.110), 0.946, 22.081, 1),  # strong vs partial-1
    ((108.190, 81, 1.110), (94.677, 80, 1.110), 1.110, 13.513, 1),   # partial-1 vs partial-2
])
def test_scaled_difference_reproduces_the_published_worked_comparisons(
        restricted, general, c_d, t_d, df):
    def fit(t_scaled, d, c):
        return {"chi_square": t_scaled * c, "df": d, "chi_square_scaled": t_scaled,
                "scaling_factor": c}
    out = chi_square_difference(fit(*restricted), fit(*general))
    # the inputs are published to 3 decimals; c_d carries their rounding
    # error magnified by df/Δdf, hence the absolute tolerances
    assert out["scaled"] and out["df"] == df and out["test"] == SCALED_DIFFERENCE
    assert out["scaling_factor"] == pytest.approx(c_d, abs=2e-3)
    assert out["chi_square"] == pytest.approx(t_d, abs=2e-2)


def test_scaled_difference_with_a_negative_scaling_is_not_reported():
    # c_d = (10·1.0 − 9·1.5)/1 < 0: Satorra & Bentler (2010) describe the case
    out = chi_square_difference({"chi_square": 20.0, "df": 10, "scaling_factor": 1.0},
                                {"chi_square": 15.0, "df": 9, "scaling_factor": 1.5})
    assert out["p_value"] is None and "2010" in out["note"]


def test_equivalent_models_get_no_p_value(hs_x):
    # A higher-order factor over three constructs is just identified: it has
    # the df of the correlated model (3 paths replace 3 correlations).
    # Marker scaling: on these data the unit-variance higher-order fit does
    # not converge within 500 iterations (reported to the lead).
    higher = make_spec(HS_CONSTRUCTS, name="h", higher_order={"g": ("visual", "textual", "speed")},
                       identification="marker")
    three = make_spec(HS_CONSTRUCTS, name="c", identification="marker")
    (test,) = compare_models([higher, three], [_fit(higher, hs_x), _fit(three, hs_x)])[
        "comparison"]["nested_tests"]
    assert test["df"] == 0 and test["p_value"] is None and "equivalent" in test["note"]
    # equivalent: the same chi-square, to the optimiser's precision
    assert abs(test["chi_square"]) < 1e-4


def test_an_unconverged_model_is_not_tested():
    fit = {"chi_square": 10.0, "df": 5, "bic": 100.0}
    models = [{"name": "r", "converged": False, "fit": fit, "items": list(HS_ITEMS), "n_used": 9},
              {"name": "g", "converged": True, "fit": {**fit, "df": 3}, "items": list(HS_ITEMS),
               "n_used": 9}]
    specs = [make_spec(VISUAL_TEXTUAL, name="r"), make_spec(HS_CONSTRUCTS, name="g")]
    (test,) = compare_models(specs, models)["comparison"]["nested_tests"]
    assert test["p_value"] is None and "'r' did not converge" in test["note"]


@pytest.mark.slow
def test_higher_order_in_bifactor_difference_follows_chi_square_on_its_df():
    # Theory: data drawn from a higher-order population; the restriction is
    # true, so T_R − T_G is asymptotically chi-square on Δdf = p − K = 12
    # (16 items, 4 constructs).  With 60 replications the Monte Carlo SE of
    # the mean is sqrt(2·12/60) = 0.63; we allow 4 SE.  Rejection rate at .05
    # over 60 draws: binomial SE .028, we allow up to .05 + 3·.028.
    rng = np.random.default_rng(20240611)
    constructs = {f"f{k}": tuple(f"i{k}{j}" for j in range(4)) for k in range(4)}
    lam = np.zeros((16, 4))
    for k in range(4):
        lam[4 * k:4 * k + 4, k] = [0.7, 0.6, 0.65, 0.55]
    gamma = np.array([0.8, 0.7, 0.6, 0.75])
    phi = np.outer(gamma, gamma) + np.diag(1 - gamma ** 2)
    higher = make_spec(constructs, name="h", higher_order={"g": tuple(constructs)})
    bifactor = make_spec(constructs, name="b", general="g")
    diffs, ps, dfs = [], [], set()
    for _ in range(60):
        x, _ = simulate_cfa(rng, lam, phi, 500)
        (test,) = compare_models([higher, bifactor], [_fit(higher, x), _fit(bifactor, x)])[
            "comparison"]["nested_tests"]
        diffs.append(test["chi_square"])
        ps.append(test["p_value"])
        dfs.add(test["df"])
    assert dfs == {12}
    assert abs(np.mean(diffs) - 12) < 4 * np.sqrt(24 / 60)
    assert np.mean(np.array(ps) < 0.05) < 0.05 + 3 * 0.028


# --------------------------------------------------------------------------- BIC weights

def test_bic_weights_are_the_softmax_of_minus_half_bic():
    # Wagenmakers & Farrell (2004), eq. for Akaike weights with BIC in place
    # of AIC (Raftery 1995); scipy's softmax is the independent computation.
    bic = np.array([10412.44, 10437.18, 10780.62, 10413.90])
    np.testing.assert_allclose(bic_weights(bic), special.softmax(-bic / 2), rtol=1e-12)


def test_bic_weights_leave_out_models_fitted_to_other_items(hs_x):
    three = make_spec(HS_CONSTRUCTS, name="three")
    one = make_spec(ONE, name="one")
    six = make_spec({"visual": ("x1", "x2", "x3"), "textual": ("x4", "x5", "x6")}, name="six")
    fits = [_fit(three, hs_x), _fit(one, hs_x), _fit(six, hs_x[:, :6])]
    comparison = compare_models([three, one, six], fits)["comparison"]
    assert set(comparison["bic_weights"]) == {"three", "one"}
    assert comparison["models"][2]["bic_weight"] is None
    expected = special.softmax(-np.array([fits[0]["fit"]["bic"], fits[1]["fit"]["bic"]]) / 2)
    assert comparison["bic_weights"]["three"] == pytest.approx(expected[0], rel=1e-12)


def test_rows_mark_the_first_specified_model(hs_x):
    three = make_spec(HS_CONSTRUCTS, name="three")
    three.first = True
    one = make_spec(ONE, name="one")
    rows = compare_models([one, three], [_fit(one, hs_x), _fit(three, hs_x)])["comparison"]["models"]
    assert [r["first"] for r in rows] == [False, True]
    # semopy chi-square for the three-factor model, shared/design/references.md
    assert rows[1]["chi_square"] == pytest.approx(85.3057, abs=1e-3)


def test_ordinal_fits_are_not_compared_by_their_statistics_alone():
    # a DWLS fit's statistics do not give its difference test (Satorra 2000:
    # M needs both fits' derivatives; tests/test_nested_dwls.py); the old
    # mean-scaled stand-in on the unadjusted statistics is gone
    weak = {"df": 76, "chi_square": 1.0, "chi_square_unadjusted": 100.8, "scaling_factor": 1.115}
    configural = {"df": 69, "chi_square": 2.0, "chi_square_unadjusted": 91.2,
                  "scaling_factor": 1.111}
    with pytest.raises(ValueError, match="dwls_difference_row"):
        chi_square_difference(weak, configural)


def test_the_comparison_keys_are_the_whole_dict_in_short(hs_x):
    # the check compares the rivals from ModelResult.comparison_keys(), the part of
    # to_dict() the comparison reads: the same comparison as from the whole dicts
    three, one = make_spec(HS_CONSTRUCTS, name="three"), make_spec(ONE, name="one")
    results = [evaluate_normal(three, hs_x), evaluate_normal(one, hs_x)]
    for result in results:
        whole = result.to_dict()
        assert result.comparison_keys() == {k: whole[k] for k in result.comparison_keys()}
    assert compare_models([three, one], [r.comparison_keys() for r in results]) == \
        compare_models([three, one], [r.to_dict() for r in results])
