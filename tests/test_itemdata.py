"""Data intake: every file format, missing codes, reverse keying, and bad input.

References: the expected values are recomputed in each test from the data
frame that was written, with pandas (replace the missing codes, reverse-key
with low + high - x), and the file digest with hashlib; the files themselves
are written by pandas, openpyxl, pyarrow and pyreadstat.  Values are compared
exactly: the answers are small integers, exactly representable in float64.
"""

import dataclasses
import hashlib
import textwrap
import tracemalloc

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pacsv
import pyreadstat
import pytest

from scalewright.errors import StudyError
from scalewright.itemdata import ItemData, read_items
from scalewright.studyfile import load_study

ITEMS = ["q1", "q2", "q3", "q4"]

MODEL = """\
data:
  file: {file}
  missing: {missing}
{data_extra}items:
  scale: [1, 5]
  reverse: [q4]
models:
  m1:
    constructs:
      a: [q1, q2]
      b: [q3, q4]
{extra}"""


def answers(n: int = 40, seed: int = 7) -> pd.DataFrame:
    """Five-point answers with an id and a group column, -9 codes and blanks planted."""
    rng = np.random.default_rng(seed)
    frame = pd.DataFrame(rng.integers(1, 6, (n, 4)).astype(float), columns=ITEMS)
    frame.loc[[2, 11], "q2"] = -9.0
    frame.loc[5, "q3"] = np.nan
    frame.insert(0, "pid", np.arange(101, 101 + n))
    frame["phase"] = rng.integers(1, 3, n).astype(float)
    frame.loc[8, "phase"] = np.nan
    return frame


def expected(frame: pd.DataFrame, codes=(-9,)) -> np.ndarray:
    """The answers as scalewright should return them, recomputed with pandas."""
    values = frame[ITEMS].replace(list(codes), np.nan).astype(float)
    values["q4"] = 1 + 5 - values["q4"]  # reverse keying x -> low + high - x
    return values.to_numpy()


def study_for(tmp_path, file: str, missing="[-9]", data_extra="", extra=""):
    text = MODEL.format(file=file, missing=missing, data_extra=data_extra, extra=extra)
    path = tmp_path / "study.yaml"
    path.write_text(text, encoding="utf-8")
    return load_study(path)


def write_csv(tmp_path, frame: pd.DataFrame, name: str = "answers.csv", **kwargs) -> str:
    frame.to_csv(tmp_path / name, index=False, **kwargs)
    return name


# --------------------------------------------------------------------------- reading

@pytest.mark.parametrize("name, text", [
    ("bom.csv", "\ufeffpid,q1,q2,q3,q4\n1,1,2,3,4\n"),
    ("quoted.csv", 'pid,"q1",q2,"a, b",q3,q4\n1,1,2,x,3,4\n'),
    ("blank-first.csv", "\n\npid,q1,q2,q3,q4\n1,1,2,3,4\n"),
    ("unnamed.csv", "pid,,q1,q2,q3,q4,\n1,7,1,2,3,4,9\n"),
    ("spaces.csv", "pid, q1,q2 ,q3,q4\n1,1,2,3,4\n"),
    ("tabs.tsv", "pid\tq1\tq2\tq3\tq4\n1\t1\t2\t3\t4\n"),
    ("semicolons.txt", "pid;q1;q2;q3;q4\n1;1;2;3;4\n2;2;3;4;5\n"),
])
def test_text_header_names_the_columns_as_the_pandas_reader_does(tmp_path, name, text):
    # the header is read by the csv module (fast); outside reference: pandas' own
    # reader of the same file (names written twice are compared elsewhere: pandas
    # renames them, the repeated-name check reads them as written)
    from scalewright.itemdata import _Source
    (tmp_path / name).write_text(text, encoding="utf-8")
    sep = {"csv": ",", "tsv": "\t", "txt": ";"}[name.rsplit(".", 1)[1]]
    reference = [str(c) for c in pd.read_csv(tmp_path / name, sep=sep, nrows=0).columns]
    assert list(_Source(study_for(tmp_path, name)).columns()) == reference


def test_text_files_read_as_pandas_pyarrow_engine_reads_them(tmp_path):
    # scalewright calls pyarrow's CSV reader itself (itemdata._read_text); outside
    # reference: pandas' read_csv with its pyarrow engine on the same file, whose
    # not-available marks are pandas' na_values default
    from pandas._libs.parsers import STR_NA_VALUES
    from scalewright.itemdata import NOT_AVAILABLE, _read_text
    assert set(NOT_AVAILABLE) == set(STR_NA_VALUES)
    # (a byte-order mark, Windows line ends; the first column is one of those read)
    text = ("\ufeffa,id,b,c,d,e,f,g,h\r\n1,T1,2.5,x,,true,NA,,-9\r\n2,T2,,y,,false,n/a, ,None\r\n"
            "3,T3,4,,,True,null,,#N/A\r\n")
    (tmp_path / "mixed.csv").write_text(text, encoding="utf-8", newline="")
    columns = list("abcdefgh")
    reference = pd.read_csv(tmp_path / "mixed.csv", engine="pyarrow", usecols=columns)
    ours = _read_text(tmp_path / "mixed.csv", ",", [], columns)      # no items: as inferred
    pd.testing.assert_frame_equal(ours.frame, reference)
    ours = _read_text(tmp_path / "mixed.csv", ",", ["a", "b"], list("cdefgh"))
    assert ours.numbers is not None
    np.testing.assert_array_equal(ours.numbers, reference[["a", "b"]].to_numpy(np.float64))
    pd.testing.assert_frame_equal(ours.frame, reference[list("cdefgh")])
    # an item column with text ('c', 'e', 'g'): the whole file read as inferred
    for text_item in ("c", "e", "g"):
        ours = _read_text(tmp_path / "mixed.csv", ",", ["a", text_item], ["b"])
        assert ours.numbers is None
        pd.testing.assert_frame_equal(ours.frame, reference[["a", text_item, "b"]])


@pytest.mark.parametrize("marks, fast", [
    (("", "nan", "NaN", "-nan"), True),        # read as numbers (NaN) or empty by the first parse
    (("NA", "N/A", "null", "#N/A"), False),     # the number parse fails: read by the second
])
def test_item_columns_parsed_as_numbers_equal_the_inferred_read(tmp_path, marks, fast):
    # the fast path parses item columns straight to float64; outside reference: pandas'
    # read_csv (pyarrow engine) of the same file, converted to float64 afterwards
    from scalewright.itemdata import _read_text
    text = (f"q1,q2,q3,q4,q5,q6\n1,2.5,-3e2,{marks[0]},{marks[1]},1e-320\n"
            f"-0,{marks[2]},4,,{marks[3]},7\n3,0.1,5,,,12345678901234567890\n")
    (tmp_path / "numbers.csv").write_text(text, encoding="utf-8")
    columns = [f"q{k}" for k in range(1, 7)]
    reference = pd.read_csv(tmp_path / "numbers.csv", engine="pyarrow")[columns]
    ours = _read_text(tmp_path / "numbers.csv", ",", columns, [])
    assert (ours.numbers is not None) == fast and ours.n_rows == 3
    if fast:
        np.testing.assert_array_equal(ours.numbers, reference.to_numpy(np.float64))
    else:
        pd.testing.assert_frame_equal(ours.frame, reference)
    # an id column keeps every mark in the first parse (its own cells may be 'NA')
    with_id = _read_text(tmp_path / "numbers.csv", ",", columns[:3], ["q4"])
    np.testing.assert_array_equal(with_id.numbers, reference[columns[:3]].to_numpy(np.float64))


def test_a_header_with_a_nul_byte_gets_a_message_not_a_crash(tmp_path):
    (tmp_path / "answers.csv").write_bytes(b"pid,q1\x00,q2,q3,q4\n1,1,2,3,4\n")
    with pytest.raises(StudyError, match=r"the item 'q1' .* is not a column"):
        read_items(study_for(tmp_path, "answers.csv"))


def test_csv_values_have_missing_codes_and_reverse_keying_applied(tmp_path):
    frame = answers()
    data = read_items(study_for(tmp_path, write_csv(tmp_path, frame)))
    assert isinstance(data, ItemData)
    np.testing.assert_array_equal(data.values, expected(frame))
    assert data.values.dtype == np.float64 and data.values.shape == (40, 4)


def test_items_rows_and_columns_are_reported(tmp_path):
    frame = answers()
    data = read_items(study_for(tmp_path, write_csv(tmp_path, frame)))
    assert data.items == tuple(ITEMS)
    assert data.n_rows == 40
    assert data.columns == ("pid", "q1", "q2", "q3", "q4", "phase")


def test_values_cannot_be_changed_by_accident(tmp_path):
    data = read_items(study_for(tmp_path, write_csv(tmp_path, answers())))
    with pytest.raises(ValueError):
        data.values[0, 0] = 3.0


def test_sha256_is_the_digest_of_the_file_bytes(tmp_path):
    name = write_csv(tmp_path, answers())
    data = read_items(study_for(tmp_path, name))
    assert data.sha256 == hashlib.sha256((tmp_path / name).read_bytes()).hexdigest()


def test_reading_leaves_the_data_file_unchanged(tmp_path):
    name = write_csv(tmp_path, answers())
    before = (tmp_path / name).read_bytes(), (tmp_path / name).stat().st_mtime_ns
    read_items(study_for(tmp_path, name))
    assert ((tmp_path / name).read_bytes(), (tmp_path / name).stat().st_mtime_ns) == before


def test_complete_rows_marks_rows_with_every_item_answered(tmp_path):
    frame = answers()
    data = read_items(study_for(tmp_path, write_csv(tmp_path, frame)))
    reference = frame[ITEMS].replace(-9, np.nan).notna().all(axis=1).to_numpy()
    np.testing.assert_array_equal(data.complete_rows(), reference)
    assert data.complete_rows().sum() == 37  # rows 2, 5 and 11 have a hole


def test_id_column_values_are_kept_per_row(tmp_path):
    frame = answers()
    data = read_items(study_for(tmp_path, write_csv(tmp_path, frame), data_extra="  id: pid\n"))
    np.testing.assert_array_equal(data.row_ids, frame["pid"].to_numpy())


def write_format(tmp_path, frame: pd.DataFrame, suffix: str) -> str:
    name = f"answers{suffix}"
    path = tmp_path / name
    if suffix == ".tsv":
        frame.to_csv(path, sep="\t", index=False)
    elif suffix == ".txt":
        frame.to_csv(path, sep=";", index=False)  # the separator must be sniffed
    elif suffix == ".xlsx":
        frame.to_excel(path, index=False, engine="openpyxl")
    elif suffix == ".parquet":
        frame.to_parquet(path, index=False)
    elif suffix == ".sav":
        pyreadstat.write_sav(frame, str(path))
    elif suffix == ".dta":
        pyreadstat.write_dta(frame, str(path))
    return name


@pytest.mark.parametrize("suffix", [".tsv", ".txt", ".xlsx", ".parquet", ".sav", ".dta"])
def test_every_format_gives_the_same_answers(tmp_path, suffix):
    frame = answers()
    data = read_items(study_for(tmp_path, write_format(tmp_path, frame, suffix),
                                data_extra="  id: pid\n", extra="groups:\n  column: phase\n"))
    np.testing.assert_array_equal(data.values, expected(frame))
    np.testing.assert_array_equal(data.row_ids.astype(float), frame["pid"].to_numpy(float))
    assert data.n_group_missing == 1


def test_xlsx_sheet_is_chosen_by_name(tmp_path):
    frame = answers()
    with pd.ExcelWriter(tmp_path / "book.xlsx", engine="openpyxl") as book:
        pd.DataFrame({"note": ["not the data"]}).to_excel(book, sheet_name="Notes", index=False)
        frame.to_excel(book, sheet_name="Answers", index=False)
    data = read_items(study_for(tmp_path, "book.xlsx", data_extra="  sheet: Answers\n"))
    np.testing.assert_array_equal(data.values, expected(frame))


def test_items_absent_from_the_first_sheet_point_to_the_other_sheets(tmp_path):
    with pd.ExcelWriter(tmp_path / "book.xlsx", engine="openpyxl") as book:
        pd.DataFrame({"note": ["not the data"]}).to_excel(book, sheet_name="Notes", index=False)
        answers().to_excel(book, sheet_name="Answers", index=False)
    with pytest.raises(StudyError, match=r"The file's columns are: note\. Only the workbook's first "
                                         r"sheet, 'Notes', was read; to read another \('Answers'\), "
                                         r"name it with sheet: under data:\.$"):
        read_items(study_for(tmp_path, "book.xlsx"))


def test_a_title_above_the_header_row_is_named_with_the_row_to_delete(tmp_path):
    # spreadsheets often carry a title or a note above the column names
    frame = answers()
    (tmp_path / "titled.csv").write_text("Pilot survey, spring wave\n" + frame.to_csv(index=False))
    with pytest.raises(StudyError, match=r"are not columns of the data file 'titled\.csv'\. Their "
                                         r"names are in row 2 of the file, below other text: "
                                         r"delete the row above them, so that the file starts "
                                         r"with the column names\.$"):
        read_items(study_for(tmp_path, "titled.csv"))
    with pd.ExcelWriter(tmp_path / "titled.xlsx", engine="openpyxl") as book:
        pd.DataFrame([["Pilot survey"], ["exported 2026-05-01"]]).to_excel(
            book, index=False, header=False)
        frame.to_excel(book, index=False, startrow=2)
    with pytest.raises(StudyError, match=r"Their names are in row 3 of the file, below other text: "
                                         r"delete the rows above them"):
        read_items(study_for(tmp_path, "titled.xlsx"))


def test_sav_value_labels_are_not_applied(tmp_path):
    frame = answers()
    labels = {"q1": {1.0: "never", 2.0: "rarely", 3.0: "sometimes", 4.0: "often", 5.0: "always"}}
    pyreadstat.write_sav(frame, str(tmp_path / "answers.sav"), variable_value_labels=labels)
    data = read_items(study_for(tmp_path, "answers.sav"))
    np.testing.assert_array_equal(data.values, expected(frame))


def test_sav_user_defined_missing_values_are_missing(tmp_path):
    frame = answers()
    frame.loc[3, "q1"] = 99.0
    pyreadstat.write_sav(frame, str(tmp_path / "answers.sav"), missing_ranges={"q1": [99]})
    data = read_items(study_for(tmp_path, "answers.sav"))
    assert np.isnan(data.values[3, 0])
    np.testing.assert_array_equal(data.values, expected(frame, codes=(-9, 99)))


# --------------------------------------------------------------------------- missing codes

def test_numeric_code_matches_its_decimal_form(tmp_path):
    frame = answers()
    (tmp_path / "answers.csv").write_text(
        frame.to_csv(index=False).replace("-9.0", "-9.00"), encoding="utf-8")
    data = read_items(study_for(tmp_path, "answers.csv", missing="[-9]"))
    np.testing.assert_array_equal(data.values, expected(frame))


def test_text_code_matches_after_stripping_spaces(tmp_path):
    frame = answers().astype({"q2": object})
    frame.loc[[2, 11], "q2"] = [" refused", "refused "]
    data = read_items(study_for(tmp_path, write_csv(tmp_path, frame), missing="[refused]"))
    np.testing.assert_array_equal(data.values, expected(answers()))


def test_quoted_number_code_also_matches_numbers(tmp_path):
    frame = answers()
    data = read_items(study_for(tmp_path, write_csv(tmp_path, frame), missing="['-9']"))
    np.testing.assert_array_equal(data.values, expected(frame))


def test_without_codes_negative_answers_are_range_errors(tmp_path):
    with pytest.raises(StudyError, match=r"the item 'q2' has 2 answers outside the response range "
                                         r"1 to 5"):
        read_items(study_for(tmp_path, write_csv(tmp_path, answers()), missing="[]"))


# --------------------------------------------------------------------------- groups

def test_group_labels_are_applied_and_missing_groups_counted(tmp_path):
    frame = answers()
    data = read_items(study_for(tmp_path, write_csv(tmp_path, frame),
                                extra="groups:\n  column: phase\n  labels: {1: primary, 2: "
                                      "secondary}\n"))
    reference = frame["phase"].map({1.0: "primary", 2.0: "secondary"})
    assert data.group[8] is None
    assert list(data.group[reference.notna()]) == list(reference.dropna())
    assert data.n_group_missing == 1


def test_group_values_without_labels_are_shown_as_written(tmp_path):
    data = read_items(study_for(tmp_path, write_csv(tmp_path, answers()),
                                extra="groups:\n  column: phase\n"))
    assert set(data.group[~pd.isna(data.group)]) == {"1", "2"}


def test_missing_code_in_group_column_gives_no_group(tmp_path):
    frame = answers()
    frame.loc[0, "phase"] = -9.0
    data = read_items(study_for(tmp_path, write_csv(tmp_path, frame),
                                extra="groups:\n  column: phase\n"))
    assert data.group[0] is None and data.n_group_missing == 2


def test_group_value_without_a_label_is_an_error(tmp_path):
    frame = answers()
    frame.loc[[0, 1], "phase"] = 3.0
    text = "groups:\n  column: phase\n  labels: {1: primary, 2: secondary}\n"
    with pytest.raises(StudyError, match=r"study\.yaml, line 14: the grouping column 'phase' holds "
                                         r"the value '3' \(2 rows\), which has no label under "
                                         r"groups: labels\. Add a label for it"):
        read_items(study_for(tmp_path, write_csv(tmp_path, frame), extra=text))


def test_more_than_ten_groups_must_be_confirmed(tmp_path):
    frame = answers()
    frame["phase"] = np.arange(40) % 12
    with pytest.raises(StudyError, match=r"the grouping column 'phase' has 12 different values.*"
                                         r"allow_many: true"):
        read_items(study_for(tmp_path, write_csv(tmp_path, frame),
                             extra="groups:\n  column: phase\n"))
    data = read_items(study_for(tmp_path, "answers.csv",
                                extra="groups:\n  column: phase\n  allow_many: true\n"))
    assert len(set(data.group)) == 12


def test_reference_group_must_occur_in_the_data(tmp_path):
    with pytest.raises(StudyError, match=r"the reference group '3' does not occur in the grouping "
                                         r"column 'phase'\. The groups found are: 1, 2"):
        read_items(study_for(tmp_path, write_csv(tmp_path, answers()),
                             extra="groups:\n  column: phase\n  reference: 3\n"))


# --------------------------------------------------------------------------- bad input

def test_missing_data_file_is_named_as_written_with_its_line(tmp_path):
    with pytest.raises(StudyError, match=r"study\.yaml, line 2: the data file 'nothere\.csv' is "
                                         r"not found \(looked for .*nothere\.csv\)\. Check the "
                                         r"name under data: file:"):
        read_items(study_for(tmp_path, "nothere.csv"))


def test_data_file_that_is_a_folder(tmp_path):
    (tmp_path / "answers.csv").mkdir()
    with pytest.raises(StudyError, match=r"the data file 'answers\.csv' is a folder"):
        read_items(study_for(tmp_path, "answers.csv"))


def test_a_data_file_this_process_may_not_open_is_said_before_anything_is_read(
        tmp_path, monkeypatch):
    # (tests run as root here, whom file permissions do not stop: the refusal is simulated)
    import scalewright.itemdata as itemdata
    name = write_csv(tmp_path, answers())

    def refused(path, *args, **kwargs):
        raise PermissionError(13, "Permission denied", str(path))
    monkeypatch.setattr(itemdata, "open", refused, raising=False)
    with pytest.raises(StudyError, match=r"line 2: the data file 'answers\.csv' cannot be read "
                                         r"\(Permission denied\)\. Check the file's permissions"):
        read_items(study_for(tmp_path, name))


def test_unreadable_data_file_says_which_format_was_expected(tmp_path):
    (tmp_path / "answers.xlsx").write_text("this is not a workbook")
    with pytest.raises(StudyError, match=r"line 2: the data file 'answers\.xlsx' could not be read "
                                         r"as a \.xlsx file \(.*\)\. Check that it opens"):
        read_items(study_for(tmp_path, "answers.xlsx"))


def test_unreadable_data_file_names_the_reason_without_the_exception_class(tmp_path):
    (tmp_path / "answers.csv").write_text("q1,q2,q3,q4\n1,2,3,4\n1,2,3\n")
    with pytest.raises(StudyError) as info:
        read_items(study_for(tmp_path, "answers.csv"))
    # the reason is the CSV reader's (pyarrow) own words; the class name is left out
    assert "could not be read as a .csv file (CSV parse error: Expected 4 columns, got 3" \
        in str(info.value)
    assert "Error:" not in str(info.value)


def test_data_file_that_is_not_utf8_says_how_to_save_it(tmp_path):
    frame = answers().rename(columns={"phase": "gr\u00fcppe"})
    (tmp_path / "answers.csv").write_bytes(frame.to_csv(index=False).encode("latin-1"))
    with pytest.raises(StudyError, match=r"line 2: the data file 'answers\.csv' is not UTF-8 text "
                                         r"\(byte 0xfc is not UTF-8\)\. Save it as "
                                         r"UTF-8 text \(in a spreadsheet program: CSV UTF-8\)"):
        read_items(study_for(tmp_path, "answers.csv"))


@pytest.mark.parametrize("suffix", [".csv", ".xlsx"])
@pytest.mark.parametrize("unnamed", [False, True])
def test_a_column_name_repeated_in_the_header_is_an_error(tmp_path, suffix, unnamed):
    # the readers would silently rename the second 'q2' to 'q2.1' and use the first;
    # the columns are counted from the first, also past a column without a name
    frame = answers()
    frame.columns = [*frame.columns[:-1], "q2"]
    if unnamed:           # an unnamed column first: 'q2' is then in columns 4 and 7
        frame.insert(0, "", np.arange(len(frame)))
    name = "answers" + suffix
    if suffix == ".csv":
        frame.to_csv(tmp_path / name, index=False)
    else:
        frame.to_excel(tmp_path / name, index=False)
    with pytest.raises(StudyError, match=r"line 2: the column name 'q2' appears 2 times in the "
                                         rf"header of the data file 'answers\{suffix}' \(columns "
                                         rf"{3 + unnamed} and {6 + unnamed}\), so it is not clear "
                                         r"which column holds its "
                                         r"answers\. Rename or delete the extra columns"):
        read_items(study_for(tmp_path, name))


@pytest.mark.parametrize("scale", [True, False])
def test_an_infinite_answer_names_item_and_row(tmp_path, scale):
    frame = answers()
    frame.loc[6, "q3"] = np.inf
    text = (tmp_path / write_csv(tmp_path, frame)).read_text()
    assert "inf" in text  # written by pandas as 'inf', read back as infinity
    study = study_for(tmp_path, "answers.csv")
    if not scale:
        study = dataclasses.replace(study, scale=None)
    with pytest.raises(StudyError, match=r"line 2: in the data file 'answers\.csv', the item 'q3' "
                                         r"holds an infinite value in 1 cell \(data row 7: inf\)\. "
                                         r"Replace it with the answer given"):
        read_items(study)


def test_an_answer_whose_square_overflows_is_an_error(tmp_path):
    # sqrt(float64 max / 40 rows) is about 2.1e153: the sum of squares of 1e160 overflows
    frame = answers()
    frame.loc[3, "q1"] = 1e160
    study = dataclasses.replace(study_for(tmp_path, write_csv(tmp_path, frame)), scale=None)
    with pytest.raises(StudyError, match=r"the item 'q1' holds a value too large to compute with "
                                         r"in 1 cell \(data row 4: 1e\+160\)\. Correct the cell"):
        read_items(study)
    frame.loc[3, "q1"] = 1e150     # large, but every sum of squares stays finite
    study = dataclasses.replace(study_for(tmp_path, write_csv(tmp_path, frame)), scale=None)
    assert read_items(study).values[3, 0] == 1e150


def test_empty_data_file(tmp_path):
    (tmp_path / "answers.csv").write_text("")
    with pytest.raises(StudyError, match=r"the data file 'answers\.csv' is empty"):
        read_items(study_for(tmp_path, "answers.csv"))


def test_data_file_with_a_header_but_no_rows(tmp_path):
    (tmp_path / "answers.csv").write_text("q1,q2,q3,q4\n")
    with pytest.raises(StudyError, match="has column names but no rows of answers"):
        read_items(study_for(tmp_path, "answers.csv"))


def test_semicolons_in_a_csv_file_are_recognised(tmp_path):
    answers().to_csv(tmp_path / "answers.csv", sep=";", index=False)
    with pytest.raises(StudyError, match=r"has a single column .*separated by semicolons, not "
                                         r"commas\. Save it with commas, or rename it to \.txt"):
        read_items(study_for(tmp_path, "answers.csv"))


def test_missing_sheet_lists_the_sheets(tmp_path):
    answers().to_excel(tmp_path / "answers.xlsx", sheet_name="Answers", index=False)
    with pytest.raises(StudyError, match=r"line 4: the workbook 'answers\.xlsx' has no sheet called "
                                         r"'Answer'\. Did you mean 'Answers'\? Its sheets are: "
                                         r"Answers"):
        read_items(study_for(tmp_path, "answers.xlsx", data_extra="  sheet: Answer\n"))


def test_absent_item_suggests_a_column_differing_in_case(tmp_path):
    frame = answers().rename(columns={"q3": "Q3"})
    with pytest.raises(StudyError, match=r"line 2: the item 'q3' \(construct 'b' in model 'm1'; did "
                                         r"you mean 'Q3'\?\) is not a column of the data file "
                                         r"'answers\.csv'"):
        read_items(study_for(tmp_path, write_csv(tmp_path, frame)))


def test_absent_item_suggests_a_close_column(tmp_path):
    frame = answers().rename(columns={"q3": "q3_r"})
    with pytest.raises(StudyError, match=r"the item 'q3' \(construct 'b' in model 'm1'; did you "
                                         r"mean 'q3_r'\?\)"):
        read_items(study_for(tmp_path, write_csv(tmp_path, frame)))


def test_several_absent_items_are_listed_with_the_file_columns(tmp_path):
    frame = answers().rename(columns={"q3": "xx", "q4": "yy"})
    with pytest.raises(StudyError, match=r"2 items: 'q3' \(construct 'b' in model 'm1'\), 'q4' "
                                         r"\(construct 'b' in model 'm1'\) are not columns.*The "
                                         r"file's columns are: pid, q1, q2, xx, yy, phase\."):
        read_items(study_for(tmp_path, write_csv(tmp_path, frame)))


def test_text_in_an_item_column_gives_cells_rows_and_a_missing_code_hint(tmp_path):
    frame = answers().astype({"q1": object})
    frame.loc[[3, 9], "q1"] = "?"
    with pytest.raises(StudyError, match=r"line 2: in the data file 'answers\.csv', the item column "
                                         r"'q1' holds text in 2 cells \(data row 4 \(id 104\): '\?'; "
                                         r"data row 10 \(id 110\): '\?'\)\. If '\?' means 'no "
                                         r"answer', add it to missing: under data: \(e\.g\. "
                                         r"missing: \[-9, '\?'\]\)"):
        read_items(study_for(tmp_path, write_csv(tmp_path, frame), data_extra="  id: pid\n"))


def test_numbers_with_decimal_commas_are_named_as_such(tmp_path):
    # a ';'-separated .txt with decimal commas (pandas to_csv(decimal=",")), the usual
    # export where the comma is the decimal mark: every cell was "text" with the advice
    # "Recode the answers as numbers"
    frame = answers()
    frame["q1"] = frame["q1"] + 0.5
    frame.to_csv(tmp_path / "answers.txt", sep=";", decimal=",", index=False)
    with pytest.raises(StudyError, match=r"the item column 'q1' holds text in 40 cells \(data row "
                                         r"1: '\d,5';.*\)\. These are numbers written with a "
                                         r"decimal comma, which scalewright does not read: save the "
                                         r"data with decimal points \(e\.g\. 3\.5, not 3,5\)\.$"):
        read_items(study_for(tmp_path, "answers.txt"))


def test_answer_words_in_an_item_column_ask_for_numbers(tmp_path):
    frame = answers().astype({"q1": object})
    frame.loc[0:5, "q1"] = ["agree", "disagree", "neutral", "agree a lot", "agree", "no"]
    with pytest.raises(StudyError, match=r"holds text in 6 cells \(data row 1: 'agree'; data row 2: "
                                         r"'disagree';.*\)\. Recode the answers as numbers\.$"):
        read_items(study_for(tmp_path, write_csv(tmp_path, frame)))


def test_answers_outside_the_scale_name_item_count_examples_and_scale_line(tmp_path):
    frame = answers()
    frame.loc[[4, 6, 30], "q3"] = [7.0, 0.0, 55.0]
    frame.loc[1, "q1"] = 6.0
    with pytest.raises(StudyError, match=r"study\.yaml, line 5: in the data file 'answers\.csv', the "
                                         r"item 'q1' has 1 answer outside the response range 1 to 5 "
                                         r"given by scale: on line 5 \(data row 2: 6; other items "
                                         r"with such answers: 'q3' 3\)"):
        read_items(study_for(tmp_path, write_csv(tmp_path, frame)))


def test_answers_outside_the_scale_show_the_first_examples(tmp_path):
    frame = answers()
    frame.loc[[4, 6, 30], "q3"] = [7.0, 0.0, 55.0]
    with pytest.raises(StudyError, match=r"the item 'q3' has 3 answers outside the response range 1 "
                                         r"to 5 given by scale: on line 5 \(data row 5: 7; data row "
                                         r"7: 0; data row 31: 55\)"):
        read_items(study_for(tmp_path, write_csv(tmp_path, frame)))


def test_infinity_declared_as_a_missing_code_is_missing(tmp_path):
    frame = answers().astype({"q2": object})
    frame.loc[3, "q2"] = "inf"
    data = read_items(study_for(tmp_path, write_csv(tmp_path, frame), missing="[-9, 'inf']"))
    assert np.isnan(data.values[3, 1])
    assert np.isfinite(data.values[~np.isnan(data.values)]).all()


def test_constant_item_is_an_error(tmp_path):
    frame = answers()
    frame["q2"] = np.where(frame["q2"] == -9, -9, 3.0)
    with pytest.raises(StudyError, match=r"line 10: .*everyone who answered the item 'q2' gave the "
                                         r"same answer \(3; 38 answers\)\. An item without "
                                         r"variation"):
        read_items(study_for(tmp_path, write_csv(tmp_path, frame)))


def test_an_item_answered_once_is_constant_in_the_singular(tmp_path):
    frame = answers()
    frame["q2"] = np.where(frame.index == 0, 3.0, -9.0)
    with pytest.raises(StudyError, match=r"gave the same answer \(3; 1 answer\)\. An item"):
        read_items(study_for(tmp_path, write_csv(tmp_path, frame)))


def test_item_without_any_answer_is_an_error(tmp_path):
    frame = answers()
    frame["q3"] = -9.0
    with pytest.raises(StudyError, match=r"line 11: .*the item 'q3' has no answers: all 40 cells "
                                         r"are empty or missing-answer codes"):
        read_items(study_for(tmp_path, write_csv(tmp_path, frame)))


@pytest.mark.parametrize("section, key, role, line", [
    ("  id: person\n", "person", "id column", 4),
    ("", "stage", "grouping column", 13)])
def test_absent_id_or_group_column(tmp_path, section, key, role, line):
    extra = "" if section else "groups:\n  column: stage\n"
    with pytest.raises(StudyError, match=rf"line {line}: the {role} '{key}' is not a column of the "
                                         rf"data file 'answers\.csv'"):
        read_items(study_for(tmp_path, write_csv(tmp_path, answers()), data_extra=section,
                             extra=extra))


# --------------------------------------------------------------------------- size

def test_a_200k_by_50_csv_is_read_into_one_float_matrix(tmp_path):
    n, p = 200_000, 50
    rng = np.random.default_rng(3)
    table = pa.table({f"q{j + 1}": rng.integers(1, 6, n) for j in range(p)})
    pacsv.write_csv(table, tmp_path / "big.csv")
    constructs = "\n".join(f"      f{k}: [{', '.join(f'q{j + 1}' for j in range(10 * k, 10 * k + 10))}]"
                           for k in range(5))
    (tmp_path / "big.yaml").write_text(textwrap.dedent("""\
        data: {file: big.csv}
        items: {scale: [1, 5]}
        models:
          m:
            constructs:
        """) + constructs + "\n")
    study = load_study(tmp_path / "big.yaml")
    tracemalloc.start()
    data = read_items(study)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    assert data.values.shape == (n, p) and data.values.flags.c_contiguous
    np.testing.assert_array_equal(data.values[:, 7], table.column("q8").to_numpy())
    # numpy/pandas allocations (pyarrow's own pool is not traced): the 80 MB result plus the
    # parsed integer frame of the same size; per-cell Python objects would need > 10 times more
    assert peak < 3 * data.values.nbytes
