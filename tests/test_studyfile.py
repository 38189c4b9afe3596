"""Model file reader: the typed Study it builds and every error a user can meet.

The reference for these tests is the model-file specification in the project
brief (the format is scalewright's own); error wording is matched with
pytest.raises(..., match=...) so a message that stops naming the file, line,
key or value fails.
"""

import os
import re
import textwrap
from pathlib import Path

import pytest

from scalewright.errors import StudyError
from scalewright.studyfile import (
    Change, DataSpec, EstimationSpec, ItemSpec, ModelSpec, Place, Study, load_study,
)

EXAMPLE = """\
study: Teacher workplace climate pilot
about:
  rationale: Workload and support are the two sides of the job-demands model
  sample_size: 300
  sampling:
data:
  file: climate.csv
  missing: [-9, "n/a"]
  id: teacher_id
items:
  scale: [1, 5]
  reverse: [wl4]
  wording:
    wl1: I finish schoolwork at home most evenings
    spare1: An item written but not used by any model
  treat_as: {cs1: ordinal}
estimation:
  identification: unit-variance
  hint_threshold: 8
  salience: 0.3
groups:
  column: phase
  labels: {1: primary, 2: secondary}
  reference: secondary
models:
  three-constructs:
    first: true
    rationale: The structure the survey was written for
    changes:
      - change: freed cs2~~cs3
        cue: modification index 24
        reason: both items ask about shared lesson planning
    identification: marker
    nested_in: [two-constructs]
    constructs:
      workload: [wl1, wl2, wl3, wl4]
      support: [cs1, cs2, cs3, cs4]
    residual_covariances:
      - [cs2, cs3]
    cross_loadings:
      support: [wl3]
  two-constructs:
    constructs:
      workload: [wl1, wl2, wl3, wl4]
      support: [cs1, cs2, cs3, cs4]
  higher:
    constructs:
      workload: [wl1, wl2]
      support: [cs1, cs2]
      autonomy: [wl3, cs3]
    higher_order:
      climate: [workload, support, autonomy]
  bifactor:
    constructs:
      workload: [wl1, wl2, wl3]
      support: [cs1, cs2, cs3]
    general: climate
"""

MINIMAL = """\
data:
  file: answers.csv
models:
  m1:
    constructs:
      a: [q1, q2, q3]
      b: [q4, q5, q6]
"""


def write(tmp_path: Path, text: str, name: str = "study.yaml") -> Path:
    path = tmp_path / name
    path.write_text(textwrap.dedent(text), encoding="utf-8")
    return path


def line_of(text: str, fragment: str, occurrence: int = 1) -> int:
    """1-based line of the n-th line containing `fragment` (to state expected lines)."""
    hits = [i + 1 for i, line in enumerate(textwrap.dedent(text).splitlines()) if fragment in line]
    return hits[occurrence - 1]


def error_of(tmp_path: Path, text: str) -> str:
    with pytest.raises(StudyError) as info:
        load_study(write(tmp_path, text))
    return str(info.value)


def add_to_minimal(extra: str) -> str:
    """MINIMAL with lines appended as written (model-level keys keep their 4-space indent)."""
    return MINIMAL + extra


# --------------------------------------------------------------------------- the typed result

@pytest.fixture
def example(tmp_path) -> Study:
    return load_study(write(tmp_path, EXAMPLE, "climate.yaml"))


def test_example_file_gives_a_study_of_typed_parts(example):
    assert isinstance(example.data, DataSpec) and isinstance(example.estimation, EstimationSpec)
    assert all(isinstance(m, ModelSpec) for m in example.models)
    assert all(isinstance(i, ItemSpec) for i in example.items.values())
    assert example.title == "Teacher workplace climate pilot"
    assert [m.name for m in example.models] == ["three-constructs", "two-constructs", "higher",
                                                "bifactor"]


def test_paths_are_absolute_and_data_file_is_relative_to_the_model_file(example, tmp_path):
    assert example.path == (tmp_path / "climate.yaml").resolve()
    assert example.data.file == (tmp_path / "climate.csv").resolve()
    assert example.data.file.is_absolute()


def test_about_keeps_only_the_entries_given_and_blank_entries_are_left_out(example):
    assert example.about == {
        "rationale": "Workload and support are the two sides of the job-demands model",
        "sample_size": "300"}


def test_data_section_values(example):
    assert example.data.missing == (-9, "n/a")
    assert example.data.id_column == "teacher_id"
    assert example.data.sheet is None


def test_model_parts_are_tuples_in_written_order(example):
    m = example.model("three-constructs")
    assert m.constructs == {"workload": ("wl1", "wl2", "wl3", "wl4"),
                            "support": ("cs1", "cs2", "cs3", "cs4")}
    assert m.cross_loadings == {"support": ("wl3",)}
    assert m.residual_covariances == (("cs2", "cs3"),)
    assert m.nested_in == ("two-constructs",)
    assert m.changes == (Change("freed cs2~~cs3", "modification index 24",
                                "both items ask about shared lesson planning"),)
    assert m.first is True and m.rationale == "The structure the survey was written for"


def test_model_items_are_in_first_appearance_order(example):
    assert example.model("higher").items == ("wl1", "wl2", "cs1", "cs2", "wl3", "cs3")


def test_higher_order_and_general_factor_are_read(example):
    assert example.model("higher").higher_order == {"climate": ("workload", "support", "autonomy")}
    assert example.model("bifactor").general == "climate"
    assert example.model("bifactor").higher_order == {}


def test_identification_is_the_model_override_or_the_estimation_default(example):
    assert example.model("three-constructs").identification == "marker"
    assert example.model("two-constructs").identification == "unit-variance"


def test_study_items_follow_the_models_then_items_named_only_under_wording(example):
    assert list(example.items) == ["wl1", "wl2", "wl3", "wl4", "cs1", "cs2", "cs3", "cs4",
                                   "spare1"]


def test_item_specs_carry_wording_reverse_keying_and_treatment(example):
    assert example.items["wl1"] == ItemSpec("wl1", "I finish schoolwork at home most evenings",
                                            False, "auto")
    assert example.items["wl4"].reverse is True
    assert example.items["cs1"].treat_as == "ordinal"
    assert example.scale == (1.0, 5.0)


def test_estimation_and_group_settings(example):
    assert example.estimation == EstimationSpec(method="auto", missing="auto",
                                                identification="unit-variance",
                                                hint_threshold=8.0, salience=0.3)
    assert example.groups.column == "phase"
    assert example.groups.labels == {1: "primary", 2: "secondary"}
    assert example.groups.reference == "secondary"
    assert example.groups.allow_many is False


def test_defaults_when_optional_sections_are_left_out(tmp_path):
    study = load_study(write(tmp_path, MINIMAL, "pilot.yaml"))
    assert study.title == "pilot"  # the file name without extension
    assert study.estimation == EstimationSpec()
    assert study.groups is None and study.scale is None and study.about == {}
    assert study.data.missing == () and study.collapse_sparse is False
    assert all(i.treat_as == "auto" and not i.reverse for i in study.items.values())


def test_treat_as_a_single_word_applies_to_every_item(tmp_path):
    study = load_study(write(tmp_path, add_to_minimal("items:\n  treat_as: ordinal\n")))
    assert {i.treat_as for i in study.items.values()} == {"ordinal"}


def test_place_of_gives_the_line_of_a_key_path(example):
    assert example.place_of("models", "three-constructs", "constructs", "support").line == \
        line_of(EXAMPLE, "support: [cs1, cs2, cs3, cs4]")
    assert example.model("higher").place.line == line_of(EXAMPLE, "  higher:")


def test_place_of_falls_back_to_the_nearest_written_key(example):
    # 'general' is not written in model 'higher': the model's own line is given
    assert example.place_of("models", "higher", "general").line == line_of(EXAMPLE, "  higher:")
    assert example.place_of("nothing", "here").line is None


def test_place_prints_file_name_and_line():
    assert str(Place(Path("/a/b/climate.yaml"), 12)) == "climate.yaml, line 12"
    assert str(Place(Path("/a/b/climate.yaml"), None)) == "climate.yaml"


def test_study_model_with_an_unknown_name_suggests_a_close_one(example):
    with pytest.raises(StudyError, match=r"no model called 'bifactr'.*Did you mean 'bifactor'\?"):
        example.model("bifactr")


def test_yaml_anchors_and_aliases_can_repeat_an_item_list(tmp_path):
    study = load_study(write(tmp_path, """\
        data: {file: a.csv}
        models:
          m1:
            constructs: {a: &alist [q1, q2, q3]}
          m2:
            constructs: {a: *alist}
        """))
    assert study.model("m2").constructs == {"a": ("q1", "q2", "q3")}


# --------------------------------------------------------------------------- the file itself

def test_yaml_syntax_error_names_line_and_column(tmp_path):
    text = MINIMAL.replace("      b: [q4, q5, q6]", "      b: [q4, q5, q6\n")
    message = error_of(tmp_path, text)
    assert re.match(r"study\.yaml, line \d+: the file is not valid YAML at column \d+ \(", message)
    assert "Check the indentation" in message


def test_yaml_syntax_error_points_at_the_bad_line(tmp_path):
    text = "data:\n  file: a.csv\n   missing: [-9]\nmodels: {}\n"
    with pytest.raises(StudyError, match=r"study\.yaml, line 3: the file is not valid YAML at "
                                         r"column 11"):
        load_study(write(tmp_path, text))


def test_missing_model_file_is_named(tmp_path):
    with pytest.raises(StudyError, match=r"nothere\.yaml: the model file was not found at .*"
                                         r"nothere\.yaml\. Check the file name"):
        load_study(tmp_path / "nothere.yaml")


def test_a_folder_is_not_a_model_file(tmp_path):
    with pytest.raises(StudyError, match="is a folder, not a model file"):
        load_study(tmp_path)


def test_non_utf8_model_file_is_refused(tmp_path):
    path = tmp_path / "study.yaml"
    path.write_bytes("study: Lärarklimat\n".encode("utf-16"))
    with pytest.raises(StudyError, match="not UTF-8 text.*Save it as UTF-8"):
        load_study(path)


@pytest.mark.parametrize("text, found", [("", "empty"), ("- a\n- b\n", "a list")])
def test_the_top_must_be_key_value_lines(tmp_path, text, found):
    with pytest.raises(StudyError, match=f"should start with 'key: value' lines.*content is {found}"):
        load_study(write(tmp_path, text))


@pytest.mark.parametrize("section", ["data", "models"])
def test_required_sections_must_be_present(tmp_path, section):
    text = MINIMAL if section == "models" else MINIMAL.replace("data:\n  file: answers.csv\n", "")
    text = text.split("models:")[0] if section == "models" else text
    with pytest.raises(StudyError, match=f"study.yaml: the model file has no '{section}:' section"):
        load_study(write(tmp_path, text))


def test_data_section_must_name_the_file(tmp_path):
    text = MINIMAL.replace("  file: answers.csv", "  missing: [-9]")
    with pytest.raises(StudyError, match=r"line 1: the 'data:' section does not name the data file"):
        load_study(write(tmp_path, text))


def test_every_message_has_the_uniform_shape(tmp_path):
    bad = [MINIMAL.replace("a: [q1, q2, q3]", "a: [q1]"),
           add_to_minimal("estimation: {salience: 2}\n"),
           add_to_minimal("colour: blue\n"),
           MINIMAL.replace("answers.csv", "answers.sas7bdat")]
    for text in bad:
        message = error_of(tmp_path, text)
        assert re.fullmatch(r"study\.yaml, line \d+: [^\n]+\. [A-Z][^\n]*[.?]", message), message


# --------------------------------------------------------------------------- unknown keys

@pytest.mark.parametrize("extra, key, where, suggestion", [
    ("studdy: x\n", "studdy", "at the top of the file", "study"),
    ("about: {rationle: x}\n", "rationle", "under 'about'", "rationale"),
    ("estimation: {methd: auto}\n", "methd", "under 'estimation'", "method"),
    ("items: {scales: [1, 5]}\n", "scales", "under 'items'", "scale"),
    ("groups: {colum: phase}\n", "colum", "under 'groups'", "column"),
])
def test_unknown_key_suggests_the_close_key(tmp_path, extra, key, where, suggestion):
    text = add_to_minimal(extra)
    with pytest.raises(StudyError, match=rf"line {line_of(text, key)}: unknown key '{key}' "
                                         rf"{where}\. Did you mean '{suggestion}'\?"):
        load_study(write(tmp_path, text))


def test_unknown_key_in_data_suggests_the_close_key(tmp_path):
    text = MINIMAL.replace("  file: answers.csv", "  file: answers.csv\n  mising: [-9]")
    with pytest.raises(StudyError, match=r"line 3: unknown key 'mising' under 'data'\. "
                                         r"Did you mean 'missing'\?"):
        load_study(write(tmp_path, text))


def test_unknown_key_in_a_model_suggests_constructs(tmp_path):
    text = MINIMAL.replace("    constructs:", "    construct:")
    with pytest.raises(StudyError, match=r"line 5: unknown key 'construct' in model 'm1'\. "
                                         r"Did you mean 'constructs'\?"):
        load_study(write(tmp_path, text))


def test_unknown_key_with_nothing_close_lists_the_allowed_keys(tmp_path):
    text = add_to_minimal("colour: blue\n")
    with pytest.raises(StudyError, match=r"unknown key 'colour' at the top of the file\. The keys "
                                         r"allowed here are: study, about, data, items, "
                                         r"estimation, groups, models\."):
        load_study(write(tmp_path, text))


def test_unknown_key_in_a_change_entry(tmp_path):
    text = MINIMAL.replace("  m1:\n", "  m1:\n    changes:\n      - {change: x, resaon: y}\n")
    with pytest.raises(StudyError, match=r"unknown key 'resaon' under 'changes' in model 'm1'\. "
                                         r"Did you mean 'reason'\?"):
        load_study(write(tmp_path, text))


# --------------------------------------------------------------------------- wrong types

def test_constructs_must_be_a_mapping(tmp_path):
    text = MINIMAL.replace("    constructs:\n      a: [q1, q2, q3]\n      b: [q4, q5, q6]\n",
                           "    constructs: [q1, q2, q3]\n")
    with pytest.raises(StudyError, match=r"line 5: 'constructs' in model 'm1' should hold "
                                         r"'name: \[list\]' lines, but it is a list"):
        load_study(write(tmp_path, text))


def test_item_list_must_be_a_list(tmp_path):
    text = MINIMAL.replace("a: [q1, q2, q3]", "a: q1 q2 q3")
    with pytest.raises(StudyError, match=r"line 6: 'a' under 'constructs' in model 'm1' should "
                                         r"be a list of item names, but it is the text 'q1 q2 q3'"):
        load_study(write(tmp_path, text))


def test_item_names_must_be_text(tmp_path):
    text = MINIMAL.replace("a: [q1, q2, q3]", "a: [q1, 7, q3]")
    with pytest.raises(StudyError, match=r"entry 2 of 'a' under 'constructs' in model 'm1' is "
                                         r"the number 7, not an item name.*in quotes, e\.g\. "
                                         r"'7'\."):
        load_study(write(tmp_path, text))


@pytest.mark.parametrize("entry, found", [("null", "nothing"), ("''", "the text ''")])
def test_an_empty_item_entry_asks_for_the_name(tmp_path, entry, found):
    text = MINIMAL.replace("a: [q1, q2, q3]", f"a: [q1, {entry}, q3]")
    with pytest.raises(StudyError, match=rf"entry 2 of 'a' under 'constructs' in model 'm1' is "
                                         rf"{found}, not an item name\. Write the item name there, "
                                         rf"or remove the empty entry\.$"):
        load_study(write(tmp_path, text))


@pytest.mark.parametrize("old, new, message", [
    ("      a: [q1", "      '': [q1", r"line 6: the name the text '' under 'constructs' in model "
                                      r"'m1' is not a name"),
    ("  m1:", "  ' ':", r"line 4: the model name the text ' ' is not a name"),
])
def test_blank_construct_and_model_names_are_refused(tmp_path, old, new, message):
    with pytest.raises(StudyError, match=message):
        load_study(write(tmp_path, MINIMAL.replace(old, new)))


@pytest.mark.parametrize("scale, found", [("[1, 5, 7]", r"a list \(\[1, 5, 7\]\)"),
                                          ("[1, five]", r"a list \(\[1, five\]\)"),
                                          ("5", "the number 5"),
                                          ("[1, .inf]", r"a list \(\[1, \.inf\]\)"),
                                          ("[.nan, 5]", r"a list \(\[\.nan, 5\]\)")])
def test_scale_must_be_two_numbers(tmp_path, scale, found):
    text = add_to_minimal(f"items:\n  scale: {scale}\n")
    with pytest.raises(StudyError, match=rf"line {line_of(text, 'scale:')}: 'scale' should be the "
                                         rf"lowest and highest answer, two numbers, but it is "
                                         rf"{found}\. Write it like this: scale: \[1, 5\]"):
        load_study(write(tmp_path, text))


def test_scale_low_must_be_below_high(tmp_path):
    text = add_to_minimal("items:\n  scale: [5, 1]\n")
    with pytest.raises(StudyError, match=r"'scale' is \[5, 1\]: the lowest answer must come first"
                                         r".*scale: \[1, 5\]"):
        load_study(write(tmp_path, text))


def test_scale_with_equal_ends_asks_for_two_different_numbers(tmp_path):
    text = add_to_minimal("items:\n  scale: [5, 5]\n")
    with pytest.raises(StudyError, match=r"'scale' is \[5, 5\]: the lowest answer must come first "
                                         r"and be below the highest\. Write the lowest and the "
                                         r"highest possible answer, two different numbers"):
        load_study(write(tmp_path, text))


def test_values_are_shown_as_written_in_yaml_not_as_python_values(tmp_path):
    text = MINIMAL.replace("  m1:\n    constructs:", "  m1:\n    - constructs:")
    message = error_of(tmp_path, text)
    assert "model 'm1' should hold 'key: value' lines, but it is a list ([{constructs: null, " \
           "a: [q1, q2, q3], b: [q4, q5, q6]}])" in message
    assert not re.search(r"[{\[]'|None|<class", message)


def test_binary_value_is_described_in_words(tmp_path):
    text = "study: !!binary aGVsbG8=\n" + MINIMAL
    with pytest.raises(StudyError, match=r"line 1: 'study' should be text, but it is binary data "
                                         r"\(a '!!binary' value\)"):
        load_study(write(tmp_path, text))


def test_a_date_where_text_is_expected_is_read_as_text(tmp_path):
    text = "study: 2024-05-01\nabout:\n  sampling: 2024-05-02\n" + MINIMAL
    study = load_study(write(tmp_path, text))
    assert study.title == "2024-05-01" and study.about == {"sampling": "2024-05-02"}


def test_hint_threshold_must_be_a_number(tmp_path):
    text = add_to_minimal("estimation:\n  hint_threshold: ten\n")
    with pytest.raises(StudyError, match=rf"line {line_of(text, 'ten')}: 'hint_threshold' under "
                                         r"'estimation' should be a number, but it is the text "
                                         r"'ten'\. Write it like this: hint_threshold: 10\."):
        load_study(write(tmp_path, text))


def test_an_infinite_number_is_refused(tmp_path):
    text = add_to_minimal("estimation:\n  salience: .inf\n")
    with pytest.raises(StudyError, match=r"'salience' under 'estimation' should be a finite number, "
                                         r"but it is the number \.inf\. Write it like this: "
                                         r"salience: 0\.4\."):
        load_study(write(tmp_path, text))


def test_hint_threshold_cannot_be_negative(tmp_path):
    text = add_to_minimal("estimation:\n  hint_threshold: -1\n")
    with pytest.raises(StudyError, match="'hint_threshold' is -1; a modification index cannot be "
                                         "negative"):
        load_study(write(tmp_path, text))


@pytest.mark.parametrize("value", ["0", "1", "1.5", "-0.2"])
def test_salience_must_lie_between_0_and_1(tmp_path, value):
    text = add_to_minimal(f"estimation:\n  salience: {value}\n")
    with pytest.raises(StudyError, match=rf"'salience' is {value.rstrip('0') if '.' in value else value}.*"
                                         r"between 0 and 1 \(exclusive\)"):
        load_study(write(tmp_path, text))


def test_method_must_be_one_of_the_allowed_values(tmp_path):
    text = add_to_minimal("estimation:\n  method: robst\n")
    with pytest.raises(StudyError, match=r"'method' under 'estimation' is the text 'robst', which "
                                         r"is not one of the allowed values\. Did you mean "
                                         r"'robust'\? Use one of: auto, normal, robust, ordinal\."):
        load_study(write(tmp_path, text))


@pytest.mark.parametrize("key, value, allowed", [
    ("missing", "pairwise", "auto, full-information, listwise"),
    ("identification", "fixed", "unit-variance, marker")])
def test_estimation_choices_name_the_allowed_values(tmp_path, key, value, allowed):
    text = add_to_minimal(f"estimation:\n  {key}: {value}\n")
    with pytest.raises(StudyError, match=f"'{key}' under 'estimation' is the text '{value}'.*"
                                         f"Use one of: {allowed}"):
        load_study(write(tmp_path, text))


def test_treat_as_must_be_an_allowed_kind(tmp_path):
    text = add_to_minimal("items:\n  treat_as: {q1: binary}\n")
    with pytest.raises(StudyError, match="'q1' under 'treat_as' is the text 'binary'.*Use one of: "
                                         "auto, continuous, ordinal"):
        load_study(write(tmp_path, text))


def test_first_must_be_true_or_false(tmp_path):
    text = MINIMAL.replace("  m1:\n", "  m1:\n    first: maybe\n")
    with pytest.raises(StudyError, match="'first' in model 'm1' should be true or false, but it is "
                                         "the text 'maybe'"):
        load_study(write(tmp_path, text))


def test_missing_codes_cannot_be_yes_no_values(tmp_path):
    text = MINIMAL.replace("  file: answers.csv", "  file: answers.csv\n  missing: [-9, no]")
    with pytest.raises(StudyError, match=r"line 3: the missing-answer code false \(a yes/no value\) "
                                         r"cannot be used.*put yes/no codes in quotes"):
        load_study(write(tmp_path, text))


def test_a_single_missing_code_may_be_written_without_brackets(tmp_path):
    text = MINIMAL.replace("  file: answers.csv", "  file: answers.csv\n  missing: -9")
    assert load_study(write(tmp_path, text)).data.missing == (-9,)


# --------------------------------------------------------------------------- duplicates and clashes

def test_duplicate_model_names_are_an_error(tmp_path):
    text = MINIMAL + "  m1:\n    constructs:\n      c: [q1, q2]\n"
    first, second = line_of(text, "m1:"), line_of(text, "m1:", 2)
    with pytest.raises(StudyError, match=rf"line {second}: the model name 'm1' is used twice "
                                         rf"\(lines {first} and {second}\)\. Give each model its "
                                         rf"own name\."):
        load_study(write(tmp_path, text))


def test_duplicate_construct_names_in_a_model_are_an_error(tmp_path):
    text = MINIMAL.replace("      b: [q4, q5, q6]", "      a: [q4, q5, q6]")
    first, second = line_of(text, "a: [q1"), line_of(text, "a: [q4")
    with pytest.raises(StudyError, match=rf"line {second}: the construct 'a' is written twice in "
                                         rf"model 'm1' \(lines {first} and {second}\)"):
        load_study(write(tmp_path, text))


def test_any_duplicate_key_is_an_error(tmp_path):
    text = MINIMAL.replace("  file: answers.csv", "  file: answers.csv\n  file: other.csv")
    with pytest.raises(StudyError, match=r"line 3: the key 'file' is written twice under 'data' "
                                         r"\(lines 2 and 3\)\. Keep only one"):
        load_study(write(tmp_path, text))


def test_construct_may_not_share_a_name_with_an_item(tmp_path):
    text = MINIMAL.replace("      b: [q4, q5, q6]", "      q4: [q4, q5, q6]")
    with pytest.raises(StudyError, match=rf"line {line_of(text, 'q4: [')}: the construct 'q4' in "
                                         r"model 'm1' has the same name as the item 'q4'\. "
                                         r"Rename the construct so that it and the item can be "
                                         r"told apart"):
        load_study(write(tmp_path, text))


def test_higher_order_may_only_name_constructs_of_the_model(tmp_path):
    text = add_to_minimal("    higher_order:\n      g: [a, bb]\n")
    with pytest.raises(StudyError, match=rf"line {line_of(text, 'g: [a, bb]')}: the higher-order "
                                         r"factor 'g' names 'bb', which model 'm1' does not "
                                         r"define\. Did you mean 'b'\?"):
        load_study(write(tmp_path, text))


def test_higher_order_needs_two_constructs(tmp_path):
    text = add_to_minimal("    higher_order:\n      g: [a]\n")
    with pytest.raises(StudyError, match="the higher-order factor 'g' explains only 1 construct"):
        load_study(write(tmp_path, text))


def test_general_factor_may_not_share_a_name_with_a_construct(tmp_path):
    text = add_to_minimal("    general: a\n")
    with pytest.raises(StudyError, match=rf"line {line_of(text, 'general')}: the general factor "
                                         r"'a' has the same name as a construct of model 'm1'"):
        load_study(write(tmp_path, text))


def test_general_factor_and_higher_order_do_not_mix(tmp_path):
    text = add_to_minimal("    higher_order:\n      h: [a, b]\n    general: g\n")
    with pytest.raises(StudyError, match="has both a general factor and 'higher_order'"):
        load_study(write(tmp_path, text))


def test_item_under_two_constructs_names_both_with_lines(tmp_path):
    text = """\
        data: {file: a.csv}
        models:
          m1:
            constructs:
              workload: [wl1, wl2, wl3]
              support: [cs1, wl3, cs2]
        """
    with pytest.raises(StudyError, match=r"study\.yaml, line 6: item 'wl3' is listed under both "
                                         r"'workload' \(line 5\) and 'support' \(line 6\) in model "
                                         r"'m1'\. List it under one construct and declare the "
                                         r"other under cross_loadings\."):
        load_study(write(tmp_path, text))


def test_item_listed_twice_in_one_construct(tmp_path):
    text = MINIMAL.replace("a: [q1, q2, q3]", "a: [q1, q2, q1]")
    with pytest.raises(StudyError, match="the item 'q1' is listed twice in 'a' under 'constructs'"):
        load_study(write(tmp_path, text))


def test_one_item_construct_is_an_error(tmp_path):
    text = MINIMAL.replace("b: [q4, q5, q6]", "b: [q4]")
    with pytest.raises(StudyError, match=rf"line {line_of(text, 'b: [q4]')}: the construct 'b' in "
                                         r"model 'm1' has only 'q4'\. "
                                         r"A construct needs at least two items: add items to it "
                                         r"or merge it with another construct\."):
        load_study(write(tmp_path, text))


# --------------------------------------------------------------------------- cross-loadings, pairs

def test_cross_loading_on_an_unknown_construct(tmp_path):
    text = add_to_minimal("    cross_loadings:\n      c: [q1]\n")
    with pytest.raises(StudyError, match=rf"line {line_of(text, 'c: [q1]')}: 'cross_loadings' in "
                                         r"model 'm1' names the construct 'c', which the model "
                                         r"does not define"):
        load_study(write(tmp_path, text))


def test_cross_loading_item_must_be_in_the_model(tmp_path):
    text = add_to_minimal("    cross_loadings:\n      b: [q7]\n")
    with pytest.raises(StudyError, match=r"the cross-loading item 'q7' on 'b' is not listed under "
                                         r"any construct of model 'm1'"):
        load_study(write(tmp_path, text))


def test_cross_loading_on_the_items_own_construct(tmp_path):
    text = add_to_minimal("    cross_loadings:\n      a: [q1]\n")
    with pytest.raises(StudyError, match=r"the item 'q1' is declared as a cross-loading on 'a', "
                                         r"which is already its own construct"):
        load_study(write(tmp_path, text))


@pytest.mark.parametrize("pair, message", [
    ("[q1]", r"entry 1 of 'residual_covariances' in model 'm1' is a list \(\[q1\]\), not a pair "
             r"of item names"),
    ("[q1, q1]", r"the residual covariance pair \[q1, q1\] names the same item twice"),
    ("[q1, q9]", r"the residual covariance pair \[q1, q9\] names 'q9', which model 'm1' does not "
                 r"use"),
])
def test_residual_covariance_must_pair_two_items_of_the_model(tmp_path, pair, message):
    text = add_to_minimal(f"    residual_covariances:\n      - {pair}\n")
    with pytest.raises(StudyError, match=rf"line {line_of(text, pair)}: {message}"):
        load_study(write(tmp_path, text))


def test_residual_covariance_pair_listed_twice_in_either_order(tmp_path):
    text = add_to_minimal("    residual_covariances:\n      - [q1, q2]\n      - [q2, q1]\n")
    with pytest.raises(StudyError, match=rf"line {line_of(text, '[q2, q1]')}: the residual "
                                         r"covariance pair \[q2, q1\] is "
                                         r"listed twice \(entries 1 and 2\)"):
        load_study(write(tmp_path, text))


# --------------------------------------------------------------------------- reverse keying

def test_reverse_keying_needs_a_scale(tmp_path):
    text = add_to_minimal("items:\n  reverse: [q2]\n")
    with pytest.raises(StudyError, match=rf"line {line_of(text, 'reverse')}: items are marked for "
                                         r"reverse keying \(q2\) but "
                                         r"no response range is given\. Add scale:"):
        load_study(write(tmp_path, text))


def test_reverse_item_not_named_anywhere_suggests_close_items(tmp_path):
    text = add_to_minimal("items:\n  scale: [1, 5]\n  reverse: [q22]\n")
    with pytest.raises(StudyError, match=rf"line {line_of(text, 'q22')}: the item 'q22' is named "
                                         r"under 'reverse' but no "
                                         r"model uses it and it has no wording\. Did you mean "
                                         r"'q2'\?"):
        load_study(write(tmp_path, text))


def test_reverse_item_with_wording_but_no_model_is_allowed(tmp_path):
    text = add_to_minimal("items:\n  scale: [1, 5]\n  reverse: [q9]\n  wording: {q9: Some text}\n")
    study = load_study(write(tmp_path, text))
    assert study.items["q9"].reverse and list(study.items)[-1] == "q9"


def test_treat_as_item_must_be_named_somewhere(tmp_path):
    text = add_to_minimal("items:\n  treat_as: {Q1: ordinal}\n")
    with pytest.raises(StudyError, match=r"the item 'Q1' is named under 'treat_as'.*Did you mean "
                                         r"'q1'\?"):
        load_study(write(tmp_path, text))


# --------------------------------------------------------------------------- models together

def test_only_one_model_may_be_first(tmp_path):
    text = MINIMAL.replace("  m1:\n", "  m1:\n    first: true\n") + \
        "  m2:\n    first: true\n    constructs:\n      c: [q1, q2]\n"
    with pytest.raises(StudyError, match=r"line 10: models 'm1' and 'm2' are both marked 'first: "
                                         r"true'"):
        load_study(write(tmp_path, text))


def test_nested_in_must_name_another_model(tmp_path):
    text = MINIMAL.replace("  m1:\n", "  m1:\n    nested_in: [m2]\n")
    with pytest.raises(StudyError, match=rf"line {line_of(text, 'nested_in')}: model 'm1' is said "
                                         r"to be nested in 'm2', but "
                                         r"there is no model of that name"):
        load_study(write(tmp_path, text))


def test_nested_in_may_not_name_the_model_itself(tmp_path):
    text = MINIMAL.replace("  m1:\n", "  m1:\n    nested_in: [m1]\n")
    with pytest.raises(StudyError, match="model 'm1' lists itself under 'nested_in'"):
        load_study(write(tmp_path, text))


def test_models_section_must_hold_a_model(tmp_path):
    text = "data: {file: a.csv}\nmodels: {}\n"
    with pytest.raises(StudyError, match=r"line 2: 'models' should hold at least one named model"):
        load_study(write(tmp_path, text))


def test_a_model_needs_constructs(tmp_path):
    text = "data: {file: a.csv}\nmodels:\n  m1:\n    first: true\n"
    with pytest.raises(StudyError, match=r"line 3: model 'm1' has no 'constructs:'"):
        load_study(write(tmp_path, text))


def test_a_change_must_say_what_changed(tmp_path):
    text = MINIMAL.replace("  m1:\n", "  m1:\n    changes:\n      - {cue: MI 24}\n")
    with pytest.raises(StudyError, match=rf"line {line_of(text, 'cue: MI')}: entry 1 of 'changes' "
                                         r"does not say what was "
                                         r"changed"):
        load_study(write(tmp_path, text))


# --------------------------------------------------------------------------- data and groups

def test_unsupported_data_extension_lists_the_supported_ones(tmp_path):
    text = MINIMAL.replace("answers.csv", "answers.sas7bdat")
    with pytest.raises(StudyError, match=r"line 2: the data file 'answers\.sas7bdat' has the "
                                         r"extension '\.sas7bdat', which scalewright cannot read\. "
                                         r"Save the data as one of \.csv, \.tsv, \.txt, \.xlsx, "
                                         r"\.parquet, \.sav, \.dta"):
        load_study(write(tmp_path, text))


def test_sheet_is_only_for_xlsx(tmp_path):
    text = MINIMAL.replace("  file: answers.csv", "  file: answers.csv\n  sheet: Sheet1")
    with pytest.raises(StudyError, match=r"line 3: 'sheet: Sheet1' is given, but the data file "
                                         r"'answers\.csv' is not an \.xlsx workbook"):
        load_study(write(tmp_path, text))


def test_group_reference_must_be_one_of_the_labels(tmp_path):
    text = add_to_minimal("groups:\n  column: phase\n  labels: {1: primary, 2: secondary}\n"
                          "  reference: primery\n")
    with pytest.raises(StudyError, match=rf"line {line_of(text, 'primery')}: the reference group "
                                         r"'primery' is not one of "
                                         r"the labels\. Did you mean 'primary'\?"):
        load_study(write(tmp_path, text))


def test_groups_need_a_column(tmp_path):
    text = add_to_minimal("groups:\n  allow_many: true\n")
    with pytest.raises(StudyError, match="the 'groups:' section does not name the grouping column"):
        load_study(write(tmp_path, text))


def test_group_column_may_not_be_an_item(tmp_path):
    text = add_to_minimal("groups:\n  column: q1\n")
    with pytest.raises(StudyError, match="the grouping column 'q1' is also used as an item"):
        load_study(write(tmp_path, text))


def test_merge_keys_are_refused(tmp_path):
    text = "base: &b {file: a.csv}\ndata:\n  <<: *b\nmodels: {m: {constructs: {a: [q1, q2]}}}\n"
    with pytest.raises(StudyError, match=r"line 3: the merge key '<<' is used here"):
        load_study(write(tmp_path, text))


def test_loading_does_not_touch_the_data_file(tmp_path):
    # the data file need not exist to load the model file; reading it is itemdata's job
    study = load_study(write(tmp_path, MINIMAL))
    assert not os.path.exists(study.data.file)
