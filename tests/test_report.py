"""The HTML report (report/): sections present only when their keys are,
escaping, no external resources, headings and header cells, marks against
published cutoffs, generated wording, tables export, determinism and size.

The report is rendered from the real demo output (``api.check`` on the demo
model file, plus the comparison of compare.py) and from that output with
the per-model keys of issues 3, 5 and 6 added in the shapes those issues
define; the added numbers only test layout, they are not references.
"""

from __future__ import annotations

import copy
import csv
import io
import re
import shutil
from functools import lru_cache
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest

from scalewright import api
from scalewright.compare import compare_models
from scalewright.errors import StudyError
from scalewright.report.checklist import checklist_rows
from scalewright.report.document import build_document, export_tables
from scalewright.report.narrative import favoured, methods_paragraphs, summary_paragraphs
from scalewright.report.references import references_used
from scalewright.report.render import css_string, render_html

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "models" / "teacher-climate.yaml"
HOSTILE = "<script>alert(1)</script>"


@lru_cache(maxsize=None)
def _demo_result(path: str):
    result = api.check(path)
    report = result.to_dict()
    report.update(compare_models(result.study.models, report["models"]))
    return report


def demo_report(path: Path = DEMO) -> dict:
    """The demo study's result dict with the rival-model comparison."""
    return copy.deepcopy(_demo_result(str(path)))


def hostile_model_file(folder: Path) -> Path:
    """The demo model file and data copied to ``folder`` with a script as the
    study title and as the wording of item wl1."""
    shutil.copy(DEMO.with_suffix(".csv"), folder / "teacher-climate.csv")
    text = DEMO.read_text(encoding="utf-8")
    text = text.replace("study: Teacher workplace climate pilot", f'study: "{HOSTILE} pilot"')
    text = text.replace("wl1: I have more work than I can do well.", f'wl1: "{HOSTILE}"')
    target = folder / "teacher-climate.yaml"
    target.write_text(text, encoding="utf-8")
    return target


def with_quality_keys(report: dict) -> dict:
    """Add the keys of issues 3, 5 and 6, in their documented shapes, to the
    second model ('three-constructs') and the study."""
    out = copy.deepcopy(report)
    m = out["models"][1]
    m["reliability"] = [
        {"construct": c, "n_items": 6, "alpha": a, "alpha_ci95": [a - .05, a + .04],
         "omega": o, "coefficient_h": o + .03}
        for c, a, o in (("workload", .758, .77), ("support", .810, .82), ("autonomy", .674, .66))]
    m["validity"] = {"ave": {"workload": .41, "support": .45, "autonomy": .36},
                     "composite_reliability": {"workload": .80, "support": .83, "autonomy": .75},
                     "htmt": [{"a": "workload", "b": "support", "value": .31},
                              {"a": "support", "b": "autonomy", "value": .88}]}
    m["modification_hints"] = [
        {"kind": "residual_covariance", "item_a": "cs2", "item_b": "cs5", "group": None,
         "mi": 29.6, "epc": .253, "std_epc": .632, "reading": "cs2 and cs5 share wording."},
        {"kind": "loading", "construct": "autonomy", "item": "wl6", "group": None, "mi": 11.0,
         "epc": .297, "std_epc": .271, "reading": "wl6 may also reflect autonomy."}]
    m["modification_hint_notes"] = {"threshold": 10.0, "caution": "Capitalises on chance.",
                                    "judging": "Judge by the EPC."}
    items = m["items"]
    m["residual_correlations"] = {
        "threshold": .10, "n_flagged": 1,
        "largest": [{"a": "wl6", "b": "cs1", "value": .2196, "standardized": 3.34,
                     "flagged": True}],
        "items": items,
        "matrix": [[0.0 if i == j else (.2196 if {i, j} == {5, 6} else -.02)
                    for j in range(len(items))] for i in range(len(items))]}
    m["item_review"] = [{"item": "ca6", "flags": ["weak_loading"],
                         "details": [{"flag": "weak_loading", "with": "autonomy", "value": .106,
                                      "text": "standardized loading 0.11 on autonomy"}]}]
    m["refinement"] = {"steps": [
        {"removed": None, "reason": "as specified", "fit": {"cfi": .930, "rmsea": .048,
                                                            "srmr": .066},
         "reliability": {"workload": .758}, "flagged": ["ca6"], "tried": []},
        {"removed": "ca6", "reason": "weak", "fit": {"cfi": .95, "rmsea": .04, "srmr": .05},
         "reliability": {"workload": .758}, "flagged": [], "tried": []}],
        "stopped": "No item is flagged.", "note": "A suggestion, not a change."}
    m["thresholds"] = [{"item": "wl1", "values": [-2.1, -1.4, -0.5, 0.7]}]
    out["models"][3]["bifactor"] = {
        "general": "climate", "items": items, "omega_total": .88, "omega_hierarchical": .61,
        "relative_omega": .69, "ecv": .48, "puc": .71, "h": .84,
        "subscales": [{"factor": "workload", "items": items[:6], "omega_subscale": .78,
                       "omega_hierarchical_subscale": .41, "general_share": .37, "h": .72}],
        "notes": []}
    out["invariance"] = [
        {"step": "configural", "fit": {"chi_square": 300.0, "df": 264, "cfi": .95,
                                       "rmsea": .04, "srmr": .06},
         "delta": {}, "difference_test": {}, "decision": "baseline"},
        {"step": "metric", "fit": {"chi_square": 320.0, "df": 279, "cfi": .948, "rmsea": .04,
                                   "srmr": .065},
         "delta": {"cfi": -.002, "rmsea": 0.0, "srmr": .005},
         "difference_test": {"chi_square": 20.0, "df": 15, "p_value": .17},
         "decision": {"holds": True, "text": "Equal loadings hold by the conventions."}}]
    out["released"] = [{"step": "scalar", "kind": "intercept", "item": "wl6", "construct": None,
                        "text": "The intercept of item 'wl6' differs between groups."}]
    return out


class _Outline(HTMLParser):
    """Headings in order, header cells, and tags that would load or run something."""

    def __init__(self):
        super().__init__()
        self.headings: list[int] = []
        self.th_without_scope = 0
        self.th = 0
        self.forbidden: list[str] = []
        self.section_ids: list[str] = []

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if re.fullmatch(r"h[1-6]", tag):
            self.headings.append(int(tag[1]))
        if tag == "th":
            self.th += 1
            self.th_without_scope += "scope" not in attrs
        if tag in ("script", "link", "img", "iframe", "object", "embed", "image", "use"):
            self.forbidden.append(tag)
        for name, value in attrs.items():
            if name.startswith("on") or (name in ("src", "href") and value
                                         and not value.startswith("#")):
                self.forbidden.append(f"{tag} {name}={value}")
        if tag == "section":
            self.section_ids.append(attrs.get("id"))


def _outline(html: str) -> _Outline:
    parser = _Outline()
    parser.feed(html)
    return parser


# --------------------------------------------------------------------------- structure

def test_every_section_and_every_rival_model_is_present():
    report = demo_report()
    outline = _outline(render_html(report))
    models = [f"model-{k}" for k in range(1, len(report["models"]) + 1)]
    assert outline.section_ids == ["summary", "design", "comparison", *models, "data", "methods",
                                   "cautions", "checklist"]


def test_headings_start_at_one_level_and_never_skip_a_level():
    outline = _outline(render_html(with_quality_keys(demo_report())))
    assert outline.headings[0] == 1 and outline.headings.count(1) == 1
    assert all(b - a <= 1 for a, b in zip(outline.headings, outline.headings[1:]))


def test_every_header_cell_has_a_scope():
    outline = _outline(render_html(with_quality_keys(demo_report())))
    assert outline.th > 100 and outline.th_without_scope == 0


def test_nothing_is_loaded_or_run_from_outside_the_file():
    html = render_html(with_quality_keys(demo_report()))
    assert _outline(html).forbidden == []
    # the only URL is the SVG namespace name, which is never fetched
    assert set(re.findall(r"https?://[^\s\"')]+", html)) == {"http://www.w3.org/2000/svg"}
    assert "@import" not in html and "url(http" not in html


def test_sections_of_absent_keys_are_left_out():
    html = render_html(demo_report())
    for absent in ("Reliability of the constructs", "Modification hints",
                   'id="invariance"', "Item thresholds"):
        assert absent not in html


@pytest.mark.parametrize("text", [
    "Reliability of the constructs of ‘three-constructs’",
    "Average variance extracted of ‘three-constructs’",
    "Heterotrait–monotrait ratios in ‘three-constructs’",
    "Modification hints for ‘three-constructs’",
    "Largest residual correlations of ‘three-constructs’",
    "Items to look at in ‘three-constructs’",
    "A refinement path for ‘three-constructs’",
    "Item thresholds in ‘three-constructs’",
    "General and specific factors in ‘bifactor’",
    "Measurement invariance, step by step",
])
def test_sections_of_present_keys_are_shown(text):
    assert text in render_html(with_quality_keys(demo_report()))


# --------------------------------------------------------------------------- safety

def test_hostile_title_and_wording_are_escaped(tmp_path):
    result = api.check(hostile_model_file(tmp_path))
    html = render_html(result.to_dict())
    assert "<script" not in html.lower()
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    assert _outline(html).forbidden == []


def test_the_running_page_header_cannot_end_its_css_string():
    escaped = css_string('a"; } </style><script>')
    assert re.fullmatch(r"[A-Za-z0-9 \\]*", escaped)
    assert escaped.startswith("a\\000022")


# --------------------------------------------------------------------------- numbers and words

def test_fit_marks_follow_the_hu_bentler_cutoffs():
    # Hu & Bentler (1999): CFI ≥ .95, RMSEA ≤ .06, SRMR ≤ .08; the demo's
    # bifactor model has CFI .974 (meets) and the three-construct model .930 (misses)
    doc = build_document(demo_report())
    summary = doc.tables[0]
    rows = {row[0].text: row for row in summary.rows}
    assert rows["bifactor"][4].mark == "✓" and rows["three-constructs"][4].mark == "✗"
    assert rows["three-constructs"][6].mark == "✓"   # RMSEA .048 ≤ .06
    assert "Hu & Bentler (1999)" in summary.notes[0] and "conventions" in summary.notes[0]


def test_invariance_steps_show_their_decision_text_and_released_constraints():
    html = render_html(with_quality_keys(demo_report()))
    assert "✓ Equal loadings hold by the conventions." in html
    assert "The intercept of item &#39;wl6&#39; differs between groups." in html


def test_robust_indices_replace_the_normal_theory_ones_when_present():
    # issue 5: fit gains chi_square_scaled and cfi_robust …; the summary then
    # marks the robust CFI (here .960 ≥ .95, Hu & Bentler 1999) instead of .930
    report = demo_report()
    report["models"][1]["fit"].update(chi_square_scaled=180.0, scaling_factor=1.09,
                                      cfi_robust=0.960)
    summary = build_document(report).tables[0]
    assert summary.columns[2] == "χ² scaled"
    row = next(r for r in summary.rows if r[0].text == "three-constructs")
    assert (row[2].text, row[5].text, row[5].mark) == ("180.00", ".960", "✓")


def test_summary_names_equivalent_models_and_says_when_criteria_disagree():
    # compare.py finds 'higher-order' and 'three-constructs' equivalent (0 df);
    # BIC favours them while AIC and the difference test favour 'bifactor'
    text = " ".join(summary_paragraphs(demo_report()))
    assert "equivalent here" in text
    assert "The criteria disagree" in text
    assert "AIC, which penalises extra parameters less, favours ‘bifactor’" in text


def test_summary_never_claims_more_than_the_numbers():
    text = " ".join(summary_paragraphs(with_quality_keys(demo_report()))).lower()
    for claim in ("proves", "proven", "confirms", "the true", "is valid", "validated"):
        assert claim not in text


def test_summary_describes_the_first_specified_model_among_equivalent_favourites():
    assert favoured(demo_report())["focus"] == "three-constructs"


def test_reliability_sentence_separates_scales_at_the_conventional_minimum():
    text = " ".join(summary_paragraphs(with_quality_keys(demo_report())))
    assert "at least .70 for workload (.77) and support (.82)" in text
    assert "below it for autonomy (.66)" in text


def test_every_author_cited_in_the_methods_paragraph_is_in_the_reference_list():
    report = with_quality_keys(demo_report())
    cited = re.findall(r"([A-ZÖ][a-zö]+)(?: and [A-Z][a-z]+)?(?:,? et al\.)?,? \(?(\d{4})\)?",
                       " ".join(methods_paragraphs(report)))
    references = " ".join(references_used(report))
    for author, year in cited:
        assert author in references and f"({year}" in references, (author, year)


def test_methods_paragraph_states_what_was_run():
    report = demo_report()
    text = " ".join(methods_paragraphs(report))
    assert f"scalewright {report['tool']['version']}" in text
    assert "maximum likelihood (normal theory)" in text
    assert "208 of 420 respondents" in text
    assert "listwise deletion" in text


def test_missing_user_statements_are_shown_as_missing_not_invented():
    report = demo_report()
    report["study"]["about"] = {}
    for row in report["comparison"]["models"]:
        row["first"] = False
        row["rationale"] = None
    rows = {r["number"]: r for r in checklist_rows(report)}
    assert rows[1]["status"] == "missing" and "rationale" in rows[1]["where"]
    assert rows[4]["status"] == "missing" and "first: true" in rows[4]["where"]
    assert rows[5]["status"] == "missing"
    html = render_html(report)
    assert "Not stated in the model file. Add ‘population:’ under ‘about:’." in html


def test_checklist_has_the_thirty_lines_of_the_design_notes():
    assert [r["number"] for r in checklist_rows(demo_report())] == list(range(1, 31))


# --------------------------------------------------------------------------- tables export

def test_exported_csv_holds_the_same_numbers_as_the_html(tmp_path):
    report = with_quality_keys(demo_report())
    written = export_tables(report, tmp_path / "tables")
    doc = build_document(report)
    assert len(written) == 2 * len(doc.tables)
    fit_csv = (tmp_path / "tables" / "01-summary-fit.csv").read_text(encoding="utf-8")
    rows = list(csv.reader(io.StringIO(fit_csv)))
    assert rows[0][:5] == ["Model", "χ²", "df", "p", "CFI"]
    html = render_html(report)
    for row in rows[1:]:
        assert row[1] in html and row[4] in html
    (loadings_file,) = (tmp_path / "tables").glob("*-m1-one-general-loadings.csv")
    loadings = loadings_file.read_text(encoding="utf-8")
    assert "\u2212" not in loadings and "-0.412" in loadings   # ASCII minus for spreadsheets


def test_markdown_tables_carry_caption_marks_and_notes(tmp_path):
    export_tables(demo_report(), tmp_path)
    text = (tmp_path / "01-summary-fit.md").read_text(encoding="utf-8")
    assert text.startswith("**Table 1.** Fit of the rival models at a glance")
    assert "| bifactor | 140.19 | 117 | .071 | .974 ✓ |" in text
    assert "*Note.*" in text


def test_tables_are_not_written_into_a_folder_of_other_files(tmp_path):
    (tmp_path / "thesis.docx").write_text("mine")
    with pytest.raises(StudyError, match="holds files that scalewright did not write"):
        export_tables(demo_report(), tmp_path)


def test_tables_of_an_earlier_run_are_replaced(tmp_path):
    export_tables(with_quality_keys(demo_report()), tmp_path)
    export_tables(demo_report(), tmp_path)
    assert not any("reliability" in p.name for p in tmp_path.iterdir())


# --------------------------------------------------------------------------- determinism and size

def test_two_runs_differ_only_in_the_timestamp_line(tmp_path):
    first = api.check(DEMO).to_dict()
    second = api.check(DEMO).to_dict()
    second["created"] = "another time"
    a, b = render_html(first).splitlines(), render_html(second).splitlines()
    assert len(a) == len(b)
    differing = [(x, y) for x, y in zip(a, b) if x != y]
    assert len(differing) == 1 and "another time" in differing[0][1]


def large_report(p: int = 100, k: int = 10) -> dict:
    """A result dict of the size of a 100-item, 10-construct study with four
    rival models and every per-model key, seeded numbers (sizes matter here,
    not values)."""
    rng = np.random.default_rng(4)
    report = with_quality_keys(demo_report())
    items = [f"item{j:03d}" for j in range(p)]
    names = [f"construct{c}" for c in range(k)]
    own = {it: names[j * k // p] for j, it in enumerate(items)}
    report["study"]["items"] = [{"name": it, "wording": f"Statement number {j}", "reverse": False,
                                 "treat_as": "auto"} for j, it in enumerate(items)]
    report["data"]["screening"]["items"] = [
        {"item": it, "n": 900, "mean": 3.1, "sd": 1.0, "skewness": -.3, "excess_kurtosis": .2,
         "pct_missing": 1.0, "frequencies": {str(c): int(rng.integers(20, 300)) for c in range(1, 6)}}
        for it in items]
    template = report["models"][1]
    models = []
    for name, constructs in (("one", ["general"]), ("correlated", names),
                             ("higher", names + ["g"]), ("bifactor", names + ["g"])):
        m = copy.deepcopy(template)
        m["name"] = name
        m["items"] = items
        kind = {"g": "higher" if name == "higher" else "general"}
        m["constructs"] = [{"name": c, "kind": kind.get(c, "construct")} for c in constructs]
        loads = []
        for it in items:
            c = "general" if name == "one" else own[it]
            loads.append({"construct": c, "item": it, "estimate": .7, "se": .05, "z": 14.0,
                          "p_value": 1e-9, "fixed": False, "std_estimate": float(rng.uniform(.3, .9)),
                          "primary": True})
            if name == "bifactor":
                loads.append({**loads[-1], "construct": "g", "std_estimate": .4})
        m["loadings"] = loads
        m["construct_correlations"] = ([{"a": a, "b": b, "estimate": .3, "se": .05, "z": 6.0,
                                         "p_value": 1e-6, "covariance": .3}
                                        for i, a in enumerate(names) for b in names[i + 1:]]
                                       if name in ("correlated", "higher") else [])
        m["higher_order_paths"] = ([{"higher": "g", "construct": c, "estimate": .6, "se": .05,
                                     "z": 12.0, "p_value": 1e-9, "fixed": False,
                                     "std_estimate": .6} for c in names]
                                   if name == "higher" else [])
        m["residual_variances"] = [{"item": it, "estimate": .5, "se": .03, "z": 16.0,
                                    "p_value": 1e-9, "std_estimate": .5} for it in items]
        m["r_squared"] = [{"item": it, "value": .5} for it in items]
        matrix = rng.normal(0, .06, (p, p))
        m["residual_correlations"] = {"threshold": .1, "n_flagged": 40, "items": items,
                                      "matrix": np.round((matrix + matrix.T) / 2, 4).tolist(),
                                      "largest": [{"a": items[j], "b": items[j + 1], "value": .15,
                                                   "standardized": 3.0, "flagged": True}
                                                  for j in range(40)]}
        m["modification_hints"] = [{**template["modification_hints"][0], "mi": 50.0 - j}
                                   for j in range(40)]
        models.append(m)
    report["models"] = models
    report["comparison"] = {"models": [{**report["comparison"]["models"][1], "name": m["name"]}
                                       for m in models],
                            "nested_tests": [], "bic_weights": {}}
    return report


def test_a_large_study_report_stays_under_five_megabytes():
    # issue 4: a 100-item, 10-construct study with 4 rival models stays < 5 MB
    html = render_html(large_report())
    assert len(html.encode("utf-8")) < 5 * 1024 * 1024
