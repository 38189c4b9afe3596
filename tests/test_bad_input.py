"""Problems found once the data meet the model (the model-file and data-file
checks live in test_studyfile.py and test_itemdata.py): each a StudyError
that names the model, construct or items and says what to do."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import scalewright
from scalewright.errors import StudyError


def write_study(folder, models_yaml, data: pd.DataFrame, extra=""):
    data.to_csv(folder / "answers.csv", index=False)
    path = folder / "study.yaml"
    path.write_text(f"study: Bad input\ndata:\n  file: answers.csv\n{extra}models:\n{models_yaml}")
    return path


def likert(rng, n, p, loading=0.7):
    factor = rng.standard_normal((n, 1))
    latent = loading * factor + np.sqrt(1 - loading ** 2) * rng.standard_normal((n, p))
    return np.digitize(latent, [-1.2, -0.4, 0.4, 1.2]) + 1


@pytest.fixture()
def rng():
    return np.random.default_rng(2026)


def test_more_free_parameters_than_moments_names_both_counts(tmp_path, rng):
    # three items: 6 moments; 3 loadings + 3 residual variances + 3 residual
    # covariances = 9 free parameters
    data = pd.DataFrame(likert(rng, 200, 3), columns=["a1", "a2", "a3"])
    models = ("  m:\n    constructs:\n      a: [a1, a2, a3]\n"
              "    residual_covariances:\n      - [a1, a2]\n      - [a1, a3]\n      - [a2, a3]\n")
    with pytest.raises(StudyError, match=r"model 'm' has 9 free parameters .* only 6 variances"):
        scalewright.check(write_study(tmp_path, models, data))


def test_singular_sample_covariance_names_the_dependent_items(tmp_path, rng):
    answers = likert(rng, 300, 3)
    data = pd.DataFrame({"a1": answers[:, 0], "a2": answers[:, 1], "a3": answers[:, 2],
                         "total": answers.sum(axis=1)})
    models = "  m:\n    constructs:\n      a: [a1, a2, a3, total]\n"
    with pytest.raises(StudyError, match=r"linearly dependent .*'a1', 'a2', 'a3', 'total'"):
        scalewright.check(write_study(tmp_path, models, data))


def test_fewer_usable_rows_than_items_plus_one(tmp_path, rng):
    data = pd.DataFrame(likert(rng, 4, 4).astype(float), columns=["a1", "a2", "a3", "a4"])
    models = "  m:\n    constructs:\n      a: [a1, a2, a3, a4]\n"
    with pytest.raises(StudyError, match=r"only 4 of 4 rows can be used .* fewer than the 5 needed"):
        scalewright.check(write_study(tmp_path, models, data))


def test_higher_order_factor_over_two_constructs_says_what_to_add(tmp_path, rng):
    data = pd.DataFrame(likert(rng, 300, 6), columns=[f"i{k}" for k in range(1, 7)])
    models = ("  m:\n    constructs:\n      a: [i1, i2, i3]\n      b: [i4, i5, i6]\n"
              "    higher_order:\n      g: [a, b]\n")
    with pytest.raises(StudyError, match=r"higher-order factor 'g' .* explains 2 construct.*at least three"):
        scalewright.check(write_study(tmp_path, models, data))


def test_bifactor_with_one_specific_factor_is_refused(tmp_path, rng):
    data = pd.DataFrame(likert(rng, 300, 4), columns=[f"i{k}" for k in range(1, 5)])
    models = "  m:\n    general: g\n    constructs:\n      a: [i1, i2, i3, i4]\n"
    with pytest.raises(StudyError, match=r"bifactor model 'm' has one specific factor"):
        scalewright.check(write_study(tmp_path, models, data))


def test_items_never_answered_together_are_named_not_a_crash(tmp_path, rng):
    # with fewer complete rows than items the singularity check used the raw
    # answers and numpy failed on NaN; now the pair is named
    answers = likert(rng, 300, 6).astype(float)
    answers[::2, 0] = np.nan
    answers[1::2, 3] = np.nan
    data = pd.DataFrame(answers, columns=[f"i{k}" for k in range(1, 7)])
    models = "  m:\n    constructs:\n      a: [i1, i2, i3]\n      b: [i4, i5, i6]\n"
    with pytest.raises(StudyError, match=r"answers\.csv: items 'i1' and 'i4' were never answered "
                                         r"by the same person \(0 of 300 rows have both\)"):
        scalewright.check(write_study(tmp_path, models, data))


def test_a_problem_the_estimation_core_finds_is_placed_at_the_model(tmp_path, rng):
    # the ordinal route's category check knows no file; the message gets the
    # model's line, and the scale is written as in the file (1-5, not 1.0-5.0)
    answers = likert(rng, 300, 6)
    answers[answers[:, 0] == 3, 0] = 2
    data = pd.DataFrame(answers, columns=[f"i{k}" for k in range(1, 7)])
    models = "  m:\n    constructs:\n      a: [i1, i2, i3]\n      b: [i4, i5, i6]\n"
    extra = "items:\n  scale: [1, 5]\n  treat_as: ordinal\n"
    with pytest.raises(StudyError, match=r"^study\.yaml, line 8: in model 'm': Item 'i1' is "
                                         r"declared on a 1-5 scale but nobody answered 3 .* by "
                                         r"setting collapse_sparse: true under items: in the "
                                         r"model file"):
        scalewright.check(write_study(tmp_path, models, data, extra))


def test_a_model_that_does_not_converge_exits_2_at_its_line_after_writing_the_report(
        tmp_path, hs_data):
    # Holzinger & Swineford's nine tests do not support a bifactor structure: the
    # engine does not converge there (test_engine.py).  The check still writes the
    # report (the correlated model is fine), then the command line says where the
    # model is and what to try, with exit code 2.
    from conftest import HS_ITEMS

    from scalewright.cli import main

    hs_data[list(HS_ITEMS)].to_csv(tmp_path / "hs.csv", index=False)
    model_file = tmp_path / "hs.yaml"
    model_file.write_text(
        "study: Nine ability tests\ndata:\n  file: hs.csv\nmodels:\n"
        "  three:\n    constructs:\n      visual: [x1, x2, x3]\n      textual: [x4, x5, x6]\n"
        "      speed: [x7, x8, x9]\n"
        "  with-general:\n    general: g\n    constructs:\n      visual: [x1, x2, x3]\n"
        "      textual: [x4, x5, x6]\n      speed: [x7, x8, x9]\n")
    out = tmp_path / "out"
    assert main(["check", str(model_file), "--out", str(out)]) == 2
    assert (out / "hs.html").exists() and (out / "hs.json").exists()


def test_non_convergence_message_names_the_model_line_and_the_fix(tmp_path, hs_data, capsys):
    from conftest import HS_ITEMS

    from scalewright.cli import main

    hs_data[list(HS_ITEMS)].to_csv(tmp_path / "hs.csv", index=False)
    model_file = tmp_path / "hs.yaml"
    model_file.write_text(
        "study: Nine ability tests\ndata:\n  file: hs.csv\nmodels:\n"
        "  with-general:\n    general: g\n    constructs:\n      visual: [x1, x2, x3]\n"
        "      textual: [x4, x5, x6]\n      speed: [x7, x8, x9]\n")
    assert main(["check", str(model_file), "--out", str(tmp_path / "out")]) == 2
    err = capsys.readouterr().err
    assert "hs.yaml, line 5: the estimation of model 'with-general' did not converge" in \
        " ".join(err.split())
    assert "did not converge" in err and "identification: marker" in err
    assert "Traceback" not in err


def test_an_error_after_the_screen_stops_the_skewness_sum_instead_of_waiting_for_it(
        tmp_path, rng, monkeypatch):
    # Mardia's skewness sum runs on a second thread while the models are fitted
    # (api._checked); a model the check refuses at its fit must end that sum through
    # its stop flag, not wait for it (on a million rows the sum takes seconds).  The
    # stand-in sum waits for the flag for at most a minute and records how it ended
    from scalewright import screening
    ended = []

    def slow_sum(*args):
        stop = args[-1]
        ended.append("stopped" if stop.wait(timeout=60) else "timed out")
        return float("nan")
    monkeypatch.setattr(screening, "_pair_cube_sum", slow_sum)
    monkeypatch.setattr(screening, "_tensor_cube_sum", slow_sum)
    data = pd.DataFrame(likert(rng, 200, 3), columns=["a1", "a2", "a3"])
    models = ("  m:\n    constructs:\n      a: [a1, a2, a3]\n"
              "    residual_covariances:\n      - [a1, a2]\n      - [a1, a3]\n      - [a2, a3]\n")
    with pytest.raises(StudyError, match=r"model 'm' has 9 free parameters"):
        scalewright.check(write_study(tmp_path, models, data))
    assert ended == ["stopped"]
