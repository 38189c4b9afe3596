"""Splitting the answers by the grouping column, and the bad input a group
comparison can meet (issue 6, point 7).

The counts are checked against pandas recomputing the same split; the error
wording with ``pytest.raises(StudyError, match=...)``.  (More than ten groups
without ``allow_many: true`` is refused when the data are read; that check
is tested in ``test_itemdata.py``.)
"""

from __future__ import annotations

import textwrap

import numpy as np
import pandas as pd
import pytest

from scalewright.errors import StudyError
from scalewright.groups import split_groups
from scalewright.itemdata import read_items
from scalewright.studyfile import load_study

ITEMS = ["q1", "q2", "q3", "q4"]


def write_study(tmp_path, frame: pd.DataFrame, groups: str = "groups:\n  column: phase\n"):
    frame.to_csv(tmp_path / "answers.csv", index=False)
    (tmp_path / "study.yaml").write_text(textwrap.dedent("""\
        study: group test
        data:
          file: answers.csv
          missing: [-9]
        items:
          scale: [1, 5]
        models:
          m:
            constructs:
              f: [q1, q2, q3, q4]
        """) + groups, encoding="utf-8")
    study = load_study(tmp_path / "study.yaml")
    return study, read_items(study)


def frame_of(groups, seed=3) -> pd.DataFrame:
    """Five-point answers, one row per entry of ``groups``."""
    rng = np.random.default_rng(seed)
    frame = pd.DataFrame(rng.integers(1, 6, (len(groups), 4)).astype(float), columns=ITEMS)
    frame["phase"] = groups
    return frame


def test_rows_without_group_are_dropped_and_counted(tmp_path):
    groups = ["a"] * 30 + ["b"] * 30 + [None] * 4
    frame = frame_of(groups)
    frame.loc[[0, 31], "q2"] = np.nan          # incomplete rows, kept for full information
    study, data = write_study(tmp_path, frame)
    grouped = split_groups(study, data, ITEMS)
    # reference values: pandas counting the same rows
    assert grouped.n_group_missing == int(frame["phase"].isna().sum()) == 4
    assert grouped.ns == (30, 30)
    assert grouped.dropped(full_information=False)[
        "incomplete answers (among rows with a group)"] == 2
    moments = grouped.moments(full_information=False)
    assert moments.ns == (29, 29)
    expected = frame[frame.phase == "a"].dropna()[ITEMS].to_numpy()
    # algebra: the same mean and ÷n covariance as numpy on the same rows (tolerance 1e-12)
    np.testing.assert_allclose(moments.means[0], expected.mean(axis=0), rtol=1e-12)
    np.testing.assert_allclose(moments.covs[0], np.cov(expected.T, bias=True), rtol=1e-12)


def test_reference_group_comes_first_whether_named_or_sorted(tmp_path):
    frame = frame_of(["b"] * 20 + ["a"] * 20)
    study, data = write_study(tmp_path, frame)
    assert split_groups(study, data, ITEMS).labels == ("a", "b")
    study, data = write_study(tmp_path, frame, "groups:\n  column: phase\n  reference: b\n")
    assert split_groups(study, data, ITEMS).labels == ("b", "a")


def test_group_too_small_to_estimate_is_named_with_its_size(tmp_path):
    frame = frame_of(["a"] * 30 + ["b"] * 4)
    study, data = write_study(tmp_path, frame)
    with pytest.raises(StudyError, match=r"study\.yaml, line \d+: in the grouping column 'phase', "
                                         r"group 'b' has 4 people with at least one answer; each "
                                         r"group needs at least 5 \(one more than the model's 4 "
                                         r"items\), because with fewer people the group's "
                                         r"covariance matrix is singular"):
        split_groups(study, data, ITEMS)


def test_item_constant_within_one_group_is_named(tmp_path):
    frame = frame_of(["a"] * 30 + ["b"] * 30)
    frame.loc[frame.phase == "b", "q3"] = 4.0
    study, data = write_study(tmp_path, frame)
    with pytest.raises(StudyError, match=r"in group 'b' \(grouping column 'phase'\) everyone gave "
                                         r"the same answer \(4\) to the item 'q3'"):
        split_groups(study, data, ITEMS)


def test_a_single_group_leaves_nothing_to_compare(tmp_path):
    frame = frame_of(["a"] * 30 + [None] * 3)
    study, data = write_study(tmp_path, frame)
    with pytest.raises(StudyError, match=r"the grouping column 'phase' holds only the group 'a' "
                                         r".*nothing to compare"):
        split_groups(study, data, ITEMS)


def test_full_information_moments_use_every_answer(tmp_path):
    frame = frame_of(["a"] * 40 + ["b"] * 40)
    frame.loc[[3, 50], "q1"] = np.nan
    study, data = write_study(tmp_path, frame)
    moments = split_groups(study, data, ITEMS).moments(full_information=True)
    assert moments.ns == (40, 40)
    # theory: the EM mean of a fully observed item is its sample mean (tolerance: EM stopping)
    expected = frame[frame.phase == "a"]["q2"].mean()
    np.testing.assert_allclose(moments.means[0][1], expected, rtol=1e-6)
