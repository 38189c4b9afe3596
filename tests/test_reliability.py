"""Cronbach's alpha, its Feldt interval and the item analysis, checked against
a published worked example, pingouin, and recomputation from raw data."""

import json

import numpy as np
import pingouin
import pytest
from numpy.testing import assert_allclose

import holzinger as hz
from scalewright.errors import StudyError
from scalewright.reliability import (alpha_report, cronbach_alpha, feldt_interval,
                                     item_analysis, standardized_alpha)


def one_factor_cov(loadings):
    """Model-implied correlation matrix of standardized items on one factor."""
    lam = np.asarray(loadings, dtype=float)
    return np.outer(lam, lam) + np.diag(1.0 - lam ** 2)


def test_feldt_interval_matches_published_worked_example():
    # Feldt, Woodruff & Salih (1987), Appl. Psych. Meas. 11:93–103: α = .913,
    # n = 873, k = 20, 95% → [.9044024, .9211588] [published, 7 decimals]
    ci = feldt_interval(0.913, n_obs=873, n_items=20, level=0.95)
    # tolerance: half a unit in the 7th published decimal
    assert_allclose([ci.lower, ci.upper], [0.9044024, 0.9211588], atol=5e-8)


@pytest.mark.parametrize("level, expected", [(0.90, [0.7047, 0.8616]), (0.95, [0.6851, 0.8726])])
def test_feldt_interval_matches_reference_at_two_levels(level, expected):
    # design/references.md: α = .79, k = 26, N = 41 [inputs from memory, interval
    # computed to 4 decimals]; tolerance half a unit in the 4th decimal
    ci = feldt_interval(0.79, n_obs=41, n_items=26, level=level)
    assert_allclose([ci.lower, ci.upper], expected, atol=5e-5)


def test_feldt_interval_rejects_level_outside_unit_interval():
    with pytest.raises(ValueError, match=r"level \(1.5\) must be in the open interval"):
        feldt_interval(0.8, n_obs=100, n_items=5, level=1.5)


@pytest.mark.parametrize("construct", ["visual", "textual", "speed"])
def test_alpha_matches_pingouin_on_holzinger(construct):
    frame = hz.data()[hz.CONSTRUCTS[construct]]
    expected, expected_ci = pingouin.cronbach_alpha(frame)
    result = alpha_report(np.cov(frame.to_numpy().T), hz.CONSTRUCTS[construct], construct,
                          n_obs=len(frame), level=0.95)
    # same formula on the same covariance matrix: only rounding error
    assert_allclose(result.alpha, expected, rtol=1e-12)
    # pingouin rounds its interval to 3 decimals
    assert_allclose([result.interval.lower, result.interval.upper], expected_ci, atol=5e-4 + 1e-12)


def test_alpha_matches_holzinger_reference_values():
    # design/references.md [computed with pingouin]: 0.62612 / 0.88271 / 0.68846
    got = [cronbach_alpha(np.cov(hz.data()[items].to_numpy().T))
           for items in hz.CONSTRUCTS.values()]
    # tolerance: half a unit in the 5th decimal given
    assert_allclose(got, [0.62612, 0.88271, 0.68846], atol=5e-6)


def test_alpha_of_congeneric_items_matches_reference():
    # design/references.md [computed]: loadings .8/.7/.6/.5, θ = 1 − λ² → α = 0.742055
    assert_allclose(cronbach_alpha(one_factor_cov([0.8, 0.7, 0.6, 0.5])), 0.742055, atol=5e-7)


def test_alpha_of_parallel_items_matches_reference():
    # design/references.md [computed]: four items with λ = .7 → α = 0.793522
    assert_allclose(cronbach_alpha(one_factor_cov([0.7] * 4)), 0.793522, atol=5e-7)


def test_alpha_of_a_stack_equals_alpha_of_each_matrix():
    covs = np.stack([np.cov(hz.data()[items].to_numpy().T) for items in hz.CONSTRUCTS.values()])
    each = [pingouin.cronbach_alpha(hz.data()[items])[0] for items in hz.CONSTRUCTS.values()]
    assert_allclose(cronbach_alpha(covs), each, rtol=1e-12)


def test_standardized_alpha_equals_alpha_of_z_scores():
    frame = hz.data()[hz.CONSTRUCTS["visual"]]
    z_scores = (frame - frame.mean()) / frame.std()
    # alpha of z-scores (pingouin) is the alpha of the correlation matrix
    assert_allclose(standardized_alpha(np.cov(frame.to_numpy().T)),
                    pingouin.cronbach_alpha(z_scores)[0], rtol=1e-12)


@pytest.mark.parametrize("construct", ["visual", "textual", "speed"])
def test_item_analysis_matches_recomputation_from_raw_data(construct):
    frame = hz.data()[hz.CONSTRUCTS[construct]]
    rows = item_analysis(np.cov(frame.to_numpy().T), list(frame.columns), construct).rows
    for row in rows:
        rest = frame.drop(columns=row.item).sum(axis=1)
        # corrected item–total correlation: item against the sum of the others
        assert_allclose(row.corrected_item_total, np.corrcoef(frame[row.item], rest)[0, 1],
                        rtol=1e-10)
        assert_allclose(row.alpha_if_dropped,
                        pingouin.cronbach_alpha(frame.drop(columns=row.item))[0], rtol=1e-10)


def test_two_item_construct_has_no_alpha_if_dropped():
    frame = hz.data()[["x1", "x2"]]
    analysis = item_analysis(np.cov(frame.to_numpy().T), ["x1", "x2"], "visual")
    assert [row["alpha_if_dropped"] for row in analysis.to_dict()["rows"]] == [None, None]


def test_reverse_keyed_item_with_negative_average_covariance_is_named():
    frame = hz.data()[hz.CONSTRUCTS["visual"]].copy()
    frame["x2"] = -frame["x2"]        # what an unrecoded reverse-keyed item looks like
    result = alpha_report(np.cov(frame.to_numpy().T), list(frame.columns), "visual")
    assert result.alpha < 0
    [note] = result.notes
    assert note.code == "reverse_keying" and note.items == ("x2",)
    assert "cannot be read as a reliability" in note.message


def test_reverse_keyed_item_is_named_when_alpha_stays_positive():
    frame = hz.data()[["x4", "x5", "x6", "x7"]].copy()
    frame["x7"] = -frame["x7"]
    result = alpha_report(np.cov(frame.to_numpy().T), list(frame.columns), "textual")
    assert result.mean_inter_item_covariance > 0
    [note] = result.notes
    assert note.items == ("x7",)
    assert "'x7' (-0.15)" in note.message and "reverse-keyed" in note.message


def test_no_reverse_keying_note_when_items_agree():
    frame = hz.data()[hz.CONSTRUCTS["textual"]]
    assert alpha_report(np.cov(frame.to_numpy().T), list(frame.columns), "textual").notes == ()


def test_single_item_construct_raises_study_error():
    with pytest.raises(StudyError,
                       match=r"Construct 'speed' has 1 item \('x7'\).*at least two items"):
        alpha_report(np.array([[1.0]]), ["x7"], "speed")


def test_constant_item_raises_study_error():
    cov = np.array([[1.0, 0.0], [0.0, 0.0]])
    with pytest.raises(StudyError, match=r"construct 'visual' item 'x2' has variance 0"):
        item_analysis(cov, ["x1", "x2"], "visual")


def test_alpha_result_converts_to_json():
    frame = hz.data()[hz.CONSTRUCTS["speed"]]
    result = alpha_report(np.cov(frame.to_numpy().T), list(frame.columns), "speed", n_obs=301)
    data = json.loads(json.dumps(result.to_dict()))
    assert data["interval"]["level"] == 0.95 and data["items"] == ["x7", "x8", "x9"]
