"""`scalewright init`: a draft model file from a data file's columns."""

from __future__ import annotations

import shutil
from pathlib import Path

import pandas as pd
import pytest

from scalewright.cli import main
from scalewright.draft import draft_model_file
from scalewright.errors import StudyError
from scalewright.studyfile import load_study

DEMO_CSV = Path(__file__).parents[1] / "models" / "teacher-climate.csv"


@pytest.fixture()
def demo_csv(tmp_path):
    target = tmp_path / "climate.csv"
    shutil.copy(DEMO_CSV, target)
    return target


def test_draft_groups_numbered_items_into_constructs_and_loads(demo_csv):
    path = draft_model_file(demo_csv)
    study = load_study(path)           # the draft is a valid model file
    drafted = study.model("drafted")
    # the demo's item names carry their construct stem (src/scalewright/demo/population.py)
    assert drafted.constructs == {"wl": tuple(f"wl{i}" for i in range(1, 7)),
                                  "cs": tuple(f"cs{i}" for i in range(1, 7)),
                                  "ca": tuple(f"ca{i}" for i in range(1, 7))}
    assert drafted.first
    assert study.scale == (1, 5)
    assert study.data.missing == (-9,)   # -9 lies outside the run of answers 1–5
    assert "teacher_id" not in study.items and "phase" not in study.items


def test_draft_refuses_to_overwrite(demo_csv):
    existing = demo_csv.with_suffix(".yaml")
    existing.write_text("mine\n")
    with pytest.raises(StudyError, match="already exists and will not be overwritten"):
        draft_model_file(demo_csv)
    assert existing.read_text() == "mine\n"
    assert main(["init", str(demo_csv)]) == 2


def test_draft_needs_item_like_columns(tmp_path):
    data = tmp_path / "names.csv"
    pd.DataFrame({"name": ["a", "b", "c"], "age": [31.5, 40.2, 28.9]}).to_csv(data, index=False)
    with pytest.raises(StudyError, match="found 0 columns that look like questionnaire items"):
        draft_model_file(data)


def test_draft_of_a_folder_says_it_is_a_folder(tmp_path):
    # "init ." answered "no such data file" for a folder that exists
    with pytest.raises(StudyError, match=r": this is a folder, not a data file\. Give the path"):
        draft_model_file(tmp_path)


def test_draft_writes_where_asked(demo_csv, tmp_path):
    target = tmp_path / "elsewhere" / "model.yaml"
    target.parent.mkdir()
    path = draft_model_file(demo_csv, target)
    assert path == target and load_study(target).data.file == demo_csv.resolve()


@pytest.mark.parametrize("name, content, message", [
    ("answers.xlsx", b"not a workbook", r"answers\.xlsx: the file could not be read \(File is not "
                                        r"a zip file\)\. Check that it opens"),
    ("answers.sav", b"\x00garbage", r"answers\.sav: the file could not be read \(.+\)\. Check that "
                                    r"it opens"),
    ("answers.csv", b"", r"answers\.csv: the file is empty\. Name a file with a header row"),
    ("answers.csv", "q1,gr\u00fcppe\n1,2\n".encode("latin-1"),
     r"answers\.csv: the file is not UTF-8 text \(byte 0xfc is not UTF-8\)\. Save it as UTF-8"),
])
def test_draft_of_an_unreadable_data_file_says_why(tmp_path, name, content, message):
    (tmp_path / name).write_bytes(content)
    with pytest.raises(StudyError, match=message):
        draft_model_file(tmp_path / name)


def test_draft_of_a_folder_or_into_a_missing_folder(demo_csv, tmp_path):
    with pytest.raises(StudyError, match=r"this is a folder, not a data file"):
        draft_model_file(tmp_path)
    with pytest.raises(StudyError, match=r"model\.yaml: the draft could not be written \(No such "
                                         r"file or directory\)\. Check that the folder exists"):
        draft_model_file(demo_csv, tmp_path / "nowhere" / "model.yaml")
