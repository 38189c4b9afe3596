"""The choice of estimation method and of the handling of missing answers.

Each check follows a published rule: Rhemtulla, Brosseau-Liard & Savalei
(2012) for few answer categories, Curran, West & Finch (1996) and Mardia
(1970) for non-normality, FIML under MAR (Rubin 1976; Arbuckle 1996).  The
data are seeded draws built to sit clearly on one side of each rule.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from scalewright.errors import StudyError
from scalewright.evaluate_real import RobustFitIndices, evaluate_with, missing_data_summary
from scalewright.itemdata import read_items
from scalewright.methods import MethodChoice, choose_method
from scalewright.studyfile import load_study

ITEMS = [f"q{i}" for i in range(1, 7)]


def write_study(tmp_path, x, estimation=""):
    pd.DataFrame(x, columns=ITEMS).to_csv(tmp_path / "answers.csv", index=False)
    text = ("study: method choice\n"
            "data:\n  file: answers.csv\n"
            f"{estimation}"
            "models:\n  one:\n    constructs:\n      trait: [" + ", ".join(ITEMS) + "]\n")
    (tmp_path / "study.yaml").write_text(text)
    study = load_study(tmp_path / "study.yaml")
    return study, read_items(study)


def normal_answers(rng, n=400):
    loadings = np.full(6, 0.7)
    eta = rng.normal(size=n)
    return eta[:, None] * loadings + rng.normal(size=(n, 6)) * np.sqrt(1 - 0.49)


def test_normal_complete_answers_get_normal_theory_ml(tmp_path):
    study, data = write_study(tmp_path, normal_answers(np.random.default_rng(1)))
    choice = choose_method(study, data)
    assert (choice.estimator, choice.missing_handling) == ("normal", "none")
    assert any("Curran, West & Finch 1996" in r for r in choice.reasons)


def test_heavily_skewed_item_gets_robust_ml(tmp_path):
    rng = np.random.default_rng(2)
    x = normal_answers(rng)
    x[:, 2] = np.exp(2 * x[:, 2])          # lognormal: skewness far above 2
    study, data = write_study(tmp_path, x)
    choice = choose_method(study, data)
    assert choice.estimator == "robust"
    assert any("'q3'" in r and "(Curran, West & Finch 1996)" in r for r in choice.reasons)


def test_missing_answers_get_full_information_ml_with_mar_stated(tmp_path):
    rng = np.random.default_rng(3)
    x = normal_answers(rng)
    x[rng.random(x.shape) < 0.05] = np.nan
    study, data = write_study(tmp_path, x)
    choice = choose_method(study, data)
    assert choice.missing_handling == "full-information"
    assert any("missing at random" in r and "Rubin 1976" in r for r in choice.reasons)


def test_model_file_settings_override_the_data(tmp_path):
    rng = np.random.default_rng(4)
    x = normal_answers(rng)
    x[:, 2] = np.exp(2 * x[:, 2])
    x[rng.random(x.shape) < 0.05] = np.nan
    study, data = write_study(tmp_path, x, "estimation:\n  method: normal\n  missing: listwise\n")
    choice = choose_method(study, data)
    assert (choice.estimator, choice.missing_handling) == ("normal", "listwise")
    assert any("study.yaml, line" in r and "'normal'" in r for r in choice.reasons)


def test_items_with_three_categories_go_the_ordinal_route(tmp_path):
    rng = np.random.default_rng(5)
    x = np.digitize(normal_answers(rng), [-0.5, 0.5]) + 1.0      # answers 1, 2, 3
    x[rng.random(x.shape) < 0.05] = np.nan
    study, data = write_study(tmp_path, x)
    choice = choose_method(study, data)
    assert (choice.estimator, choice.missing_handling) == ("ordinal", "pairwise")
    assert choice.ordinal_items == tuple(ITEMS)
    assert any("Rhemtulla, Brosseau-Liard & Savalei 2012" in r for r in choice.reasons)


def test_items_with_more_categories_that_join_the_ordinal_route_are_named(tmp_path):
    # q1-q3 have three categories (ordinal by the Rhemtulla et al. 2012 rule); q4-q6 have
    # six whole-number categories and are analysed by polychoric correlations with them
    # (module docstring). The reasons and ordinal_items named only q1-q3, so a reader
    # could not tell how q4-q6 were analysed.
    rng = np.random.default_rng(5)
    x = normal_answers(rng)
    x[:, :3] = np.digitize(x[:, :3], [-0.5, 0.5]) + 1.0
    x[:, 3:] = np.digitize(x[:, 3:], [-1.2, -0.6, 0.0, 0.6, 1.2]) + 1.0
    study, data = write_study(tmp_path, x)
    choice = choose_method(study, data)
    assert choice.estimator == "ordinal"
    assert choice.ordinal_items == tuple(ITEMS)
    assert choice.reasons[0].startswith("'q1', 'q2' and 'q3' are treated as ordinal")
    assert choice.reasons[1] == ("'q4', 'q5' and 'q6' have more than 4 answer categories, all "
                                 "whole numbers, so they are analysed as ordinal too: every "
                                 "correlation in the model is polychoric.")


@pytest.mark.parametrize("answers, found", [
    (lambda x: x, lambda q: r"answers that are not whole numbers \(for example -?\d+\.\d+\)"),
    # the count of different answers from numpy.unique
    (lambda x: np.round(4 * x), lambda q: rf"{np.unique(q).size} different answers \(at most 10 "
                                          r"can be ordinal categories\)"),
])
def test_an_item_declared_ordinal_that_cannot_be_names_the_line_and_the_fix(tmp_path, answers,
                                                                             found):
    # q1 keeps continuous answers (normal draws: fractions, or some 20 rounded values);
    # the polychoric checks refused it with a message naming no file or line
    x = normal_answers(np.random.default_rng(5))
    x[:, 0] = answers(x[:, 0])
    x[:, 1:] = np.digitize(x[:, 1:], [-0.5, 0.5]) + 1.0
    study, data = write_study(tmp_path, x, "items:\n  treat_as: {q1: ordinal}\n")
    with pytest.raises(StudyError, match=r"^study\.yaml, line 5: the item 'q1' is declared "
                                         rf"ordinal, but it has {found(x[:, 0])}\. Declare it continuous "
                                         r"\(treat_as: \{q1: continuous\}\), or recode its "
                                         r"answers into whole-number categories\.$"):
        choose_method(study, data)


def test_full_information_with_ordinal_method_raises(tmp_path):
    rng = np.random.default_rng(6)
    x = np.digitize(normal_answers(rng), [-0.5, 0.5]) + 1.0
    x[rng.random(x.shape) < 0.05] = np.nan
    study, data = write_study(tmp_path, x, "estimation:\n  missing: full-information\n")
    with pytest.raises(StudyError, match=r"study.yaml, line \d+: 'missing: full-information' "
                                         r"cannot be combined with the ordinal method"):
        choose_method(study, data)


def test_evaluate_with_robust_fiml_adds_the_robust_fit_keys(tmp_path):
    rng = np.random.default_rng(7)
    x = normal_answers(rng)
    x[rng.random(x.shape) < 0.05] = np.nan
    study, data = write_study(tmp_path, x)
    result = evaluate_with(study.models[0], data,
                           MethodChoice("robust", "full-information", ()))
    assert isinstance(result.fit, RobustFitIndices)
    out = result.to_dict()
    for key in ("chi_square_scaled", "scaling_factor", "cfi_robust", "tli_robust",
                "rmsea_robust", "rmsea_robust_ci90"):
        assert key in out["fit"]
    assert out["n_used"] == 400 and len(out["intercepts"]) == 6
    # the model holds in the population (seeded draw), so the scaled test does not reject
    assert out["fit"]["p_value_scaled"] > 0.01
    assert "Yuan–Bentler" in out["estimator"]


def test_missing_data_summary_reports_rates_patterns_and_little(tmp_path):
    rng = np.random.default_rng(8)
    x = normal_answers(rng)
    x[:40, 0] = np.nan
    study, data = write_study(tmp_path, x)
    summary = missing_data_summary(data)
    assert summary["items"][0] == {"item": "q1", "n_answered": 360, "rate_missing": 0.1}
    assert summary["n_patterns"] == 2 and summary["patterns"][0]["n"] == 360
    assert summary["little_mcar"]["df"] == 5      # Σ p_k − p = 6 + 5 − 6


def test_declared_continuous_items_in_an_ordinal_study_get_the_mixed_route(tmp_path):
    # three items have three answer categories (ordinal under the Rhemtulla et al.
    # 2012 rule), three are declared continuous: the analysis honours both, with
    # polyserial correlations between the kinds (Olsson, Drasgow & Dorans 1982)
    rng = np.random.default_rng(9)
    x = normal_answers(rng)
    x[:, :3] = np.digitize(x[:, :3], [-0.5, 0.5])
    estimation = ("items:\n  treat_as:\n    q4: continuous\n    q5: continuous\n"
                  "    q6: continuous\n")
    study, data = write_study(tmp_path, x, estimation)
    choice = choose_method(study, data)
    assert (choice.estimator, choice.missing_handling) == ("mixed", "none")
    assert choice.ordinal_items == ("q1", "q2", "q3")
    assert choice.continuous_items == ("q4", "q5", "q6")
    assert any(r.startswith("'q4', 'q5' and 'q6' are continuous") and
               "polyserial correlations with the ordinal items (Olsson, Drasgow & Dorans 1982)" in r
               for r in choice.reasons)


def test_auto_item_that_cannot_be_ordinal_makes_an_ordinal_study_mixed(tmp_path):
    # q1-q5 have three categories; q6 keeps its unrounded answers (not whole numbers,
    # hundreds of values), so under treat_as: auto it is continuous
    rng = np.random.default_rng(10)
    x = normal_answers(rng)
    x[:, :5] = np.digitize(x[:, :5], [-0.5, 0.5]) + 1.0
    x[rng.random(x.shape) < 0.05] = np.nan
    study, data = write_study(tmp_path, x)
    choice = choose_method(study, data)
    assert (choice.estimator, choice.missing_handling) == ("mixed", "pairwise")
    assert choice.continuous_items == ("q6",)
    assert any("each polychoric, polyserial or Pearson correlation uses everyone who answered "
               "both items (pairwise)" in r for r in choice.reasons)
    assert choice.to_dict()["continuous_items"] == ["q6"]


def test_ordinal_method_with_every_item_continuous_is_refused(tmp_path):
    study, data = write_study(tmp_path, normal_answers(np.random.default_rng(11)),
                              "estimation:\n  method: ordinal\n")
    with pytest.raises(StudyError, match=r"study.yaml, line \d+: 'method: ordinal' asks for "
                                         r"ordinal analysis, but every item is continuous"):
        choose_method(study, data)


def test_full_information_with_the_mixed_route_raises(tmp_path):
    rng = np.random.default_rng(12)
    x = normal_answers(rng)
    x[:, :5] = np.digitize(x[:, :5], [-0.5, 0.5]) + 1.0
    x[rng.random(x.shape) < 0.05] = np.nan
    study, data = write_study(tmp_path, x, "estimation:\n  missing: full-information\n")
    with pytest.raises(StudyError, match=r"cannot be combined with the ordinal method, which "
                                         r"estimates the polychoric, polyserial and Pearson "
                                         r"correlations pair by pair"):
        choose_method(study, data)
