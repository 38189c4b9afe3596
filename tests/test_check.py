"""The whole check, end to end: the command line, the JSON contract, bad
input with exit code 2 and no traceback, and the demo study's planted
structure found (the population model in src/scalewright/demo/population.py
is the outside reference: the data were generated from it)."""

from __future__ import annotations

import json
import re
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

import scalewright
from scalewright import output
from scalewright.cli import main
from scalewright.errors import StudyError
from scalewright.output import check_targets
from scalewright.demo import population

MODELS = Path(__file__).parents[1] / "models"


@pytest.fixture(scope="module")
def demo_result():
    return scalewright.check(MODELS / "teacher-climate.yaml")


@pytest.fixture()
def demo_copy(tmp_path):
    for name in ("teacher-climate.yaml", "teacher-climate.csv"):
        shutil.copy(MODELS / name, tmp_path / name)
    return tmp_path / "teacher-climate.yaml"


def run_cli(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "scalewright.cli", *args], cwd=cwd,
                          capture_output=True, text=True, timeout=600)


# --------------------------------------------------------------------------- JSON contract

def test_json_contract_keys_are_present(demo_result):
    # issue 2, "JSON contract": scripts depend on these keys
    d = demo_result.to_dict()
    assert d["tool"] == {"name": "scalewright", "version": scalewright.__version__}
    assert {"file", "sha256", "n_rows", "n_used"} <= set(d["data"])
    assert len(d["models"]) == 4
    for m in d["models"]:
        assert {"name", "converged", "estimator", "fit", "loadings", "construct_correlations",
                "residual_variances", "residual_covariances", "warnings"} <= set(m)
        assert {"chi_square", "df", "p_value", "cfi", "tli", "rmsea", "rmsea_ci90",
                "rmsea_p_close", "srmr", "loglik", "aic", "bic"} <= set(m["fit"])
        for row in m["loadings"]:
            assert {"construct", "item", "estimate", "se", "z", "p_value",
                    "std_estimate"} <= set(row)
    json.dumps(d, allow_nan=False)      # plain JSON: no NaN, no numpy types


def test_check_writes_nothing_unless_asked(demo_copy):
    before = sorted(p.name for p in demo_copy.parent.iterdir())
    scalewright.check(demo_copy)
    assert sorted(p.name for p in demo_copy.parent.iterdir()) == before


def test_cli_writes_json_equal_to_to_dict_and_the_html(demo_copy, tmp_path):
    out = tmp_path / "out"
    done = run_cli("check", str(demo_copy), "--out", str(out))
    assert done.returncode == 0, done.stderr
    assert "three-constructs" in done.stdout
    written = json.loads((out / "teacher-climate.json").read_text())
    again = scalewright.check(demo_copy).to_dict()
    written.pop("created"), again.pop("created")          # the one line that differs
    assert written == again
    assert (out / "teacher-climate.html").read_text().startswith("<!DOCTYPE html>")


# --------------------------------------------------------------------------- the planted structure

def test_hypothesised_structure_fits_better_than_one_general_factor(demo_result):
    # the data come from three correlated constructs (demo/population.py), so the
    # one-factor model must fit clearly worse; .93 is a floor for a model missing only
    # the planted cross-loading and residual pair (common practice, no source)
    fit = {m.name: m.fit for m in demo_result.models}
    assert fit["three-constructs"].cfi > 0.93 > fit["one-general"].cfi
    assert fit["three-constructs"].rmsea < fit["one-general"].rmsea


def test_planted_residual_pair_and_cross_loading_are_the_strongest_hints(demo_result):
    hints = demo_result.model("three-constructs").extra["modification_hints"]
    top = hints[0]
    assert {top["item_a"], top["item_b"]} == set(population.CORRELATED_PAIR)
    item, construct = population.CROSS_LOADING
    assert any(h["kind"] == "loading" and h["item"] == item and h["construct"] == construct
               for h in hints[:3])


def test_nowhere_item_is_flagged_weak(demo_result):
    review = demo_result.model("three-constructs").extra["item_review"]
    flagged = {row["item"] for row in review if row["flags"]}
    assert population.NOWHERE_ITEM in flagged


def test_reverse_keyed_items_load_positively_after_keying(demo_result):
    loadings = demo_result.model("three-constructs").to_dict()["loadings"]
    # population.KEYED_LOADINGS: after reverse keying both items load positively
    for item in population.REVERSED:
        truth = population.KEYED_LOADINGS[population.ITEMS.index(item)].max()
        estimate = next(r for r in loadings if r["item"] == item)["std_estimate"]
        assert estimate > 0 and abs(estimate - truth) < 0.15   # ~3 SE at N = 420


def test_recovered_construct_correlations_are_near_the_population(demo_result):
    # N = 420: a correlation's SE is about (1 − ρ²)/√N ≈ .045; allow 3 SE
    rows = demo_result.model("three-constructs").to_dict()["construct_correlations"]
    names = list(population.CONSTRUCTS)
    for row in rows:
        truth = population.FACTOR_CORRELATIONS[names.index(row["a"]), names.index(row["b"])]
        assert abs(row["estimate"] - truth) < 0.14


def test_planted_non_invariant_item_is_released(demo_result):
    released = demo_result.extra["released"]
    assert any(r["item"] == population.NONINVARIANT_ITEM for r in released)


def test_missing_answers_are_used_by_full_information_ml(demo_result):
    d = demo_result.to_dict()
    assert d["data"]["missing_handling"] == "full-information"
    assert demo_result.n_used == demo_result.data.n_rows
    assert all(m["standard_errors"].startswith("observed information") for m in d["models"])


# --------------------------------------------------------------------------- command line

@pytest.mark.parametrize("edit, message", [
    (lambda t: t.replace("models:", "modles:"), r"[Dd]id you mean 'models'"),
    (lambda t: t.replace("[wl1, wl2, wl3, wl4, wl5, wl6]", "[wl1, wl2, wl3, wl4, wl5, wl7]", 1),
     r"'wl7'"),
    (lambda t: t.replace("study:", "study: [unclosed", 1), r"line \d+"),
])
def test_cli_bad_model_file_exits_2_without_traceback(demo_copy, edit, message):
    demo_copy.write_text(edit(demo_copy.read_text()))
    done = run_cli("check", str(demo_copy), "--out", str(demo_copy.parent / "r"))
    assert done.returncode == 2
    assert "Traceback" not in done.stderr
    assert "teacher-climate.yaml" in done.stderr
    assert re.search(message, done.stderr.replace("\n", " "))


def test_cli_text_in_an_item_column_names_column_and_rows(demo_copy):
    csv = demo_copy.with_suffix(".csv")
    lines = csv.read_text().splitlines()
    header = lines[0].split(",")
    col = header.index("cs3")
    row = lines[5].split(",")
    row[col] = "n/a-ish"
    lines[5] = ",".join(row)
    csv.write_text("\n".join(lines) + "\n")
    done = run_cli("check", str(demo_copy), "--out", str(demo_copy.parent / "r"))
    assert done.returncode == 2 and "Traceback" not in done.stderr
    assert "cs3" in done.stderr and "n/a-ish" in done.stderr


# --------------------------------------------------------------------------- fit only

#: keys of a model that the later issues' stages add (local fit, item review, scale quality)
LATER_MODEL_KEYS = {"modification_hints", "residual_correlations", "item_review", "refinement",
                    "reliability", "validity"}


def test_fit_only_check_gives_the_same_fit_and_estimates_without_the_later_stages(demo_result):
    # the fit-only check runs the same stages up to the fit, so every number it gives
    # is the whole check's, to the last digit (those numbers are checked against outside
    # references in test_engine, test_fiml and test_indices)
    whole, quick = demo_result.to_dict(), scalewright.check(MODELS / "teacher-climate.yaml",
                                                           fit_only=True).to_dict()
    assert quick["fit_only"] is True and whole["fit_only"] is False
    assert quick["data"] == whole["data"] and quick["comparison"] == whole["comparison"]
    for fast, full in zip(quick["models"], whole["models"]):
        assert LATER_MODEL_KEYS <= set(full)
        assert not LATER_MODEL_KEYS & set(fast)
        assert {k: v for k, v in full.items() if k in fast} == fast
    assert "invariance" in whole and "invariance" not in quick


def test_a_result_is_plain_data_that_can_be_pickled(demo_result):
    # the check sums Mardia's skewness on a second thread; the result it returns holds
    # the number, not the pending computation, so it can be copied, pickled and reloaded
    import pickle
    from concurrent.futures import Future
    assert not isinstance(demo_result.screening.mardia.cube_sum, Future)
    again = pickle.loads(pickle.dumps(demo_result))
    assert again.to_dict() == demo_result.to_dict()


def test_cli_fit_only_says_what_was_left_out_in_the_summary_and_the_checklist(demo_copy,
                                                                               tmp_path):
    out = tmp_path / "out"
    done = run_cli("check", str(demo_copy), "--out", str(out), "--fit-only")
    assert done.returncode == 0, done.stderr
    assert "Fit only:" in done.stdout
    assert json.loads((out / "teacher-climate.json").read_text())["fit_only"] is True
    page = (out / "teacher-climate.html").read_text()
    assert "This is a fit-only check" in page
    assert page.count("left out of this fit-only check") == 4     # checklist lines 19, 27-29


def test_cli_fit_only_still_refuses_bad_data_with_exit_2(demo_copy):
    csv = demo_copy.with_suffix(".csv")
    csv.write_text(csv.read_text().replace(",primary,1,", ",primary,one,", 1))   # wl1
    done = run_cli("check", str(demo_copy), "--out", str(demo_copy.parent / "r"), "--fit-only")
    assert done.returncode == 2 and "Traceback" not in done.stderr
    assert "wl1" in done.stderr and "'one'" in done.stderr


def test_output_never_overwrites_a_file_the_user_owns(demo_copy, tmp_path):
    out = tmp_path / "r"
    out.mkdir()
    mine = out / "teacher-climate.html"
    mine.write_text("my own notes")
    assert main(["check", str(demo_copy), "--out", str(out)]) == 2
    assert mine.read_text() == "my own notes"


def test_output_folder_that_is_a_file_is_refused_before_fitting(demo_copy, tmp_path, capsys):
    mine = tmp_path / "notes"
    mine.write_text("my own notes")
    assert main(["check", str(demo_copy), "--out", str(mine)]) == 2
    assert re.search(r"notes: the output folder given with --out is a file, so the report "
                     r"cannot be written into it\. Give the path of a folder",
                     " ".join(capsys.readouterr().err.split()))
    assert mine.read_text() == "my own notes"


def test_output_folder_below_a_file_is_refused(tmp_path):
    (tmp_path / "notes").write_text("my own notes")
    with pytest.raises(StudyError, match=r"the output folder cannot be created because .*notes "
                                         r"is a file"):
        check_targets(tmp_path / "notes" / "reports", "study")


def test_tables_folder_that_is_a_file_or_below_one_is_refused(tmp_path):
    from scalewright.report.tables import check_tables_folder

    mine = tmp_path / "notes"
    mine.write_text("my own notes")
    with pytest.raises(StudyError, match=r"notes: the tables folder given with --tables is a "
                                         r"file, so the tables cannot be written into it"):
        check_tables_folder(mine)
    with pytest.raises(StudyError, match=r"the tables folder cannot be created because .*notes "
                                         r"is a file\. Give --tables a path"):
        check_tables_folder(mine / "tables")
    assert mine.read_text() == "my own notes"


def test_output_folder_without_write_permission_is_refused(tmp_path, monkeypatch):
    # the permission bits are not enforced for root, so the access check is simulated
    monkeypatch.setattr(output.os, "access", lambda path, mode: False)
    with pytest.raises(StudyError, match=r"the report cannot be written there, because .* is "
                                         r"not writable for you\. Choose another output folder"):
        check_targets(tmp_path / "reports", "study")


def test_a_foreign_tables_folder_is_refused_before_fitting(demo_copy, tmp_path):
    tables = tmp_path / "t"
    tables.mkdir()
    (tables / "thesis.docx").write_text("mine")
    assert main(["check", str(demo_copy), "--out", str(tmp_path / "r"), "--tables",
                 str(tables)]) == 2
    assert not (tmp_path / "r").exists()        # nothing was fitted or written
    assert [p.name for p in tables.iterdir()] == ["thesis.docx"]


def test_output_replaces_its_own_earlier_report(demo_copy, tmp_path):
    out = tmp_path / "r"
    out.mkdir()
    (out / "teacher-climate.json").write_text('{\n  "tool": {\n    "name": "scalewright"}}')
    assert main(["check", str(demo_copy), "--out", str(out)]) == 0
    assert json.loads((out / "teacher-climate.json").read_text())["models"]


def test_demo_command_writes_the_study_and_checks_it(tmp_path):
    folder = tmp_path / "demo"
    assert main(["demo", str(folder)]) == 0
    assert (folder / "teacher-climate.yaml").is_file()
    assert (folder / "report" / "teacher-climate.html").is_file()
    # a second run refuses to overwrite the study files it wrote into the folder
    assert main(["demo", str(folder)]) == 2


def test_summary_says_when_bic_does_not_separate_the_favourite(demo_result):
    # Raftery (1995): BIC differences below 2 are weak evidence; on the demo the
    # bifactor and the correlated three-construct models are within 2 points
    from scalewright.report.narrative import summary_paragraphs
    d = demo_result.to_dict()
    rows = {r["name"]: r for r in d["comparison"]["models"]}
    close = [n for n, r in rows.items() if r["delta_bic"] is not None and 0 < r["delta_bic"] < 2]
    text = " ".join(summary_paragraphs(d))
    assert ("within 2 BIC points" in text) == bool(close)


def test_python_dash_m_scalewright_runs_the_command_line():
    done = subprocess.run([sys.executable, "-m", "scalewright", "check", "--help"],
                          capture_output=True, text=True, timeout=120)
    assert done.returncode == 0
    assert "MODEL_FILE" in done.stdout
