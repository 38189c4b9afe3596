"""The HTML report (report/): sections present exactly when their keys are,
escaping, no external resources, headings and header cells, marks against
published conventions, generated wording, tables export, determinism and size.

Every expected value is derived here from the result dict the report is
rendered from: the demo study's ``api.check(...).to_dict()`` (run once for
the whole session), or a small dict built in a test with values chosen to
exercise one rule.  The numbers in such a dict test wording and layout only;
they are not references.  Conventions are written out with their sources
(Hu & Bentler 1999; Fornell & Larcker 1981; Henseler, Ringle & Sarstedt 2015;
Raftery 1995; Nunnally & Bernstein 1994), and numbers are formatted by the
APA rules in :func:`apa` so that the report's formatter is not its own
reference.
"""

from __future__ import annotations

import copy
import csv
import html as htmllib
import io
import math
import re
from functools import lru_cache
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest

from scalewright import api
from scalewright.errors import StudyError
from scalewright.output import to_json
from scalewright.report.checklist import checklist_rows
from scalewright.report.document import build_document, export_tables
from scalewright.report.narrative import (abstract_sentence, favoured, methods_paragraphs,
                                          summary_paragraphs)
from scalewright.report.references import references_used
from scalewright.report.render import css_string, render_html

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "models" / "teacher-climate.yaml"
HOSTILE = "<script>alert(1)</script>"
MINUS = "\u2212"

#: Hu & Bentler (1999), Structural Equation Modeling 6:1–55: CFI, TLI ≥ .95; RMSEA ≤ .06; SRMR ≤ .08
HU_BENTLER = {"cfi": (0.95, True), "tli": (0.95, True), "rmsea": (0.06, False),
              "srmr": (0.08, False)}
#: Nunnally & Bernstein (1994): a reliability of .70 is a common minimum for research use
RELIABILITY_MINIMUM = 0.70


@lru_cache(maxsize=None)
def _demo_result(path: str) -> dict:
    return api.check(path).to_dict()


def demo_report(path: Path = DEMO) -> dict:
    """A fresh copy of the demo study's result dict (the check runs once per session)."""
    return copy.deepcopy(_demo_result(str(path)))


def hostile_report() -> dict:
    """The demo's result dict with a script in the study title and in place of
    item wl1's wording wherever that wording appears (items, hints, released
    constraints), as a model file with that wording would give."""
    report = demo_report()
    wording = next(i["wording"] for i in report["study"]["items"] if i["name"] == "wl1")

    def swap(x):
        if isinstance(x, dict):
            return {k: swap(v) for k, v in x.items()}
        if isinstance(x, list):
            return [swap(v) for v in x]
        return x.replace(wording, HOSTILE) if isinstance(x, str) else x

    report = swap(report)
    report["study"]["title"] = f"{HOSTILE} pilot"
    return report


def apa(x, places: int = 3, bounded: bool = True) -> str:
    """APA Publication Manual, 7th ed., sec. 6.36: ``places`` decimals, no
    leading zero for statistics bounded by 1; the report's minus sign."""
    text = f"{abs(x):.{places}f}"
    if bounded and text.startswith("0."):
        text = text[1:]
    return (MINUS if x < 0 and float(text) != 0 else "") + text


def p_text(p) -> str:
    """APA 7th ed., sec. 6.42: exact p to three decimals, '< .001' below that."""
    return "< .001" if p < 0.001 else apa(p)


def meets_hu_bentler(index: str, value: float) -> bool:
    cut, above = HU_BENTLER[index]
    return value >= cut if above else value <= cut


def _section(html: str, section_id: str) -> str:
    start = html.index(f'<section id="{section_id}"')
    return html[start:html.index("</section>", start)]


def _table(doc, caption_start: str):
    (table,) = [t for t in doc.tables if t.title.startswith(caption_start)]
    return table


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

def _expected_sections(report: dict) -> list[str]:
    return (["summary", "design"] + (["comparison"] if report.get("comparison") else [])
            + [f"model-{k}" for k in range(1, len(report["models"]) + 1)]
            + (["invariance"] if report.get("invariance") else [])
            + ["data", "methods", "cautions", "checklist"])


def test_every_section_and_every_rival_model_is_present_in_reading_order():
    report = demo_report()
    assert report.get("comparison") and report.get("invariance")   # the demo exercises both
    assert _outline(render_html(report)).section_ids == _expected_sections(report)


def test_sections_of_absent_top_level_keys_are_left_out():
    report = demo_report()
    for key in ("comparison", "invariance"):
        del report[key]
    ids = _outline(render_html(report)).section_ids
    assert ids == _expected_sections(report)
    assert "comparison" not in ids and "invariance" not in ids


#: key path in a model's dict -> caption of the table that shows it (written here, not imported)
MODEL_TABLES = {
    "construct_correlations": "Construct correlations in ‘{}’",
    "higher_order_paths": "Higher-order paths of ‘{}’",
    "intercepts": "Intercepts, residual variances and R² of ‘{}’",
    "reliability": "Reliability of the constructs of ‘{}’",
    "reliability.items": "Item analysis of ‘{}’",
    "validity": "Average variance extracted of ‘{}’",
    "validity.fornell_larcker": "Correlations against √AVE in ‘{}’",
    "validity.htmt": "Heterotrait–monotrait ratios in ‘{}’",
    "bifactor": "General and specific factors in ‘{}’",
    "higher_order": "The higher-order factor of ‘{}’",
    "modification_hints": "Modification hints for ‘{}’",
    "residual_correlations.largest": "Largest residual correlations of ‘{}’",
    "item_review": "Items to look at in ‘{}’",
    "refinement.steps": "A refinement path for ‘{}’",
}


def _present(model: dict, path: str) -> bool:
    head, _, leaf = path.partition(".")
    value = model.get(head)
    if leaf and isinstance(value, list):          # reliability rows: any row with the leaf
        return any(row.get(leaf) for row in value)
    if leaf:
        return bool((value or {}).get(leaf))
    return bool(value)


def _strip(model: dict, path: str) -> None:
    head, _, leaf = path.partition(".")
    if not leaf:
        model.pop(head, None)
    elif isinstance(model.get(head), list):
        for row in model[head]:
            row.pop(leaf, None)
    elif isinstance(model.get(head), dict):
        model[head].pop(leaf, None)


@pytest.mark.parametrize("path, caption", MODEL_TABLES.items())
def test_a_model_table_is_shown_exactly_when_its_key_is_present(path, caption):
    report = demo_report()
    html = render_html(report)
    assert any(_present(m, path) for m in report["models"]), f"the demo has no '{path}'"
    for m in report["models"]:
        assert (caption.format(m["name"]) in html) == _present(m, path), (m["name"], path)
    for m in report["models"]:
        _strip(m, path)
    html = render_html(report)
    assert not any(caption.format(m["name"]) in html for m in report["models"])


def test_thresholds_of_an_ordinal_model_are_tabled_item_by_item():
    # the ordinal route's shape: item -> thresholds in category order (values chosen to test layout)
    report = demo_report()
    thresholds = {"wl1": [-2.1, -1.4, -0.5, 0.7], "wl2": [-1.9, -1.0, 0.3]}
    report["models"][1]["thresholds"] = thresholds
    table = _table(build_document(report), f"Item thresholds in ‘{report['models'][1]['name']}’")
    assert table.columns == ("Item", "τ1", "τ2", "τ3", "τ4")
    for row in table.rows:
        values = thresholds[row[0].text]
        assert [c.text for c in row[1:len(values) + 1]] == [apa(v, 2, bounded=False)
                                                            for v in values]
        assert all(c.text == "" for c in row[len(values) + 1:])


def test_headings_start_at_one_level_and_never_skip_a_level():
    outline = _outline(render_html(demo_report()))
    assert outline.headings[0] == 1 and outline.headings.count(1) == 1
    assert all(b - a <= 1 for a, b in zip(outline.headings, outline.headings[1:]))


def test_every_header_cell_has_a_scope():
    report = demo_report()
    outline = _outline(render_html(report))
    # every table has at least a header row, so there are at least as many th as tables
    assert outline.th >= len(build_document(report).tables) and outline.th_without_scope == 0


def test_nothing_is_loaded_or_run_from_outside_the_file():
    html = render_html(demo_report())
    assert _outline(html).forbidden == []
    # the only URL is the SVG namespace name, which is never fetched
    assert set(re.findall(r"https?://[^\s\"')]+", html)) == {"http://www.w3.org/2000/svg"}
    assert "@import" not in html and "url(http" not in html


# --------------------------------------------------------------------------- safety

def test_hostile_title_and_wording_are_escaped():
    html = render_html(hostile_report())
    assert "<script" not in html.lower()
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html
    assert _outline(html).forbidden == []


def test_the_running_page_header_cannot_end_its_css_string():
    escaped = css_string('a"; } </style><script>')
    assert re.fullmatch(r"[A-Za-z0-9 \\]*", escaped)
    assert escaped.startswith("a\\000022")


# --------------------------------------------------------------------------- fit marks

#: fit values just inside and just outside each cutoff, chosen to exercise the marks
NEAR_CUTOFFS = {"cfi": (0.951, 0.949), "tli": (0.951, 0.949), "rmsea": (0.059, 0.061),
                "srmr": (0.079, 0.081)}


@pytest.mark.parametrize("side", [0, 1])
def test_fit_marks_follow_the_hu_bentler_cutoffs(side):
    report = demo_report()
    report["models"][0]["fit"].update({k: v[side] for k, v in NEAR_CUTOFFS.items()})
    summary = build_document(report).tables[0]
    assert summary.columns[4:8] == ("CFI", "TLI", "RMSEA [90% CI]", "SRMR")
    rows = {row[0].text: row for row in summary.rows}
    marks = []
    for m in report["models"]:
        row = rows[m["name"]]
        for k, index in enumerate(("cfi", "tli", "rmsea", "srmr"), start=4):
            expected = "✓" if meets_hu_bentler(index, m["fit"][index]) else "✗"
            assert row[k].mark == expected, (m["name"], index)
            marks.append(expected)
    assert {"✓", "✗"} <= set(marks)   # the demo exercises both sides of the cutoffs
    assert "Hu & Bentler (1999)" in summary.notes[0] and "conventions" in summary.notes[0]


def test_robust_indices_replace_the_normal_theory_ones_when_present():
    # robust fit keys (chi_square_scaled, cfi_robust); the robust CFI is put on the
    # other side of the .95 cutoff (Hu & Bentler 1999) from the normal-theory one
    report = demo_report()
    model = report["models"][1]
    robust = 0.94 if meets_hu_bentler("cfi", model["fit"]["cfi"]) else 0.96
    model["fit"].update(chi_square_scaled=180.0, scaling_factor=1.09, cfi_robust=robust)
    summary = build_document(report).tables[0]
    assert summary.columns[2] == "χ² scaled"
    row = next(r for r in summary.rows if r[0].text == model["name"])
    assert (row[2].text, row[5].text) == ("180.00", apa(robust))
    assert row[5].mark == ("✓" if meets_hu_bentler("cfi", robust) else "✗")


# --------------------------------------------------------------------------- the summary

def _rivals(first: str | None) -> dict:
    """Three rival models chosen to exercise the comparison sentences: 'A' and
    'B' are equivalent (a nested test on 0 df) and share the lowest BIC; 'C'
    has the lowest AIC and the difference test prefers it to 'A'."""
    bic = {"A": 1000.0, "B": 1000.0, "C": 1004.4}
    aic = {"A": 950.0, "B": 950.0, "C": 940.0}
    # BIC weights exp(−ΔBIC/2), normalised (Raftery 1995; Wagenmakers & Farrell 2004)
    raw = {n: math.exp(-(b - min(bic.values())) / 2) for n, b in bic.items()}
    weights = {n: w / sum(raw.values()) for n, w in raw.items()}
    fit = {"chi_square": 120.0, "df": 50, "p_value": 0.01, "cfi": 0.96, "tli": 0.95,
           "rmsea": 0.05, "rmsea_ci90": [0.04, 0.06], "srmr": 0.05}
    return {
        "data": {"n_rows": 300, "n_used": 300, "missing_handling": "none"},
        "models": [{"name": n, "converged": True, "fit": dict(fit), "loadings": [],
                    "constructs": []} for n in bic],
        "comparison": {
            "models": [{"name": n, "first": n == first, "bic": bic[n], "aic": aic[n],
                        "delta_bic": bic[n] - min(bic.values()), "bic_weight": weights[n]}
                       for n in bic],
            "nested_tests": [
                {"restricted": "A", "general": "B", "df": 0, "chi_square": 0.0, "p_value": None},
                {"restricted": "A", "general": "C", "df": 5, "chi_square": 20.0,
                 "p_value": 0.0012}]},
    }


def test_summary_names_equivalent_models_and_says_when_criteria_disagree():
    report = _rivals(first="A")
    text = " ".join(summary_paragraphs(report))
    weights = {r["name"]: r["bic_weight"] for r in report["comparison"]["models"]}
    assert "BIC favours ‘A’ and ‘B’, which are equivalent here" in text
    assert f"BIC weight of {apa(weights['A'] + weights['B'], 2)}" in text
    assert "AIC, which penalises extra parameters less, favours ‘C’" in text
    assert "the chi-square difference test prefers ‘C’ to ‘A’ (Δχ² = 20.00, df = 5, p = .001)" in text
    assert "The criteria disagree" in text
    # the same models without the disagreement: C loses on AIC as well, and the test is not significant
    agreeing = _rivals(first="A")
    agreeing["comparison"]["models"][2]["aic"] = 960.0
    agreeing["comparison"]["nested_tests"][1]["p_value"] = 0.2
    assert "The criteria disagree" not in " ".join(summary_paragraphs(agreeing))


@pytest.mark.parametrize("first, focus", [
    ("B", "B"),      # among equivalent favourites, the one specified first
    (None, "A"),     # nobody marked first: the first favourite in the file
    ("C", "A"),      # the model specified first is not among the favourites
])
def test_summary_describes_the_first_specified_model_among_equivalent_favourites(first, focus):
    assert favoured(_rivals(first))["focus"] == focus


def test_summary_says_which_rivals_are_within_two_bic_points():
    # Raftery (1995), table 6: a BIC difference of 0–2 is weak evidence at most
    report = demo_report()
    rows = report["comparison"]["models"]
    best = min(rows, key=lambda r: r["bic"])["name"]
    close = [r["name"] for r in rows if r["name"] != best and r["delta_bic"] < 2]
    text = " ".join(summary_paragraphs(report))
    assert close, "the demo has rivals within 2 BIC points"
    sentence = next(s for s in text.split(". ") if "within 2 BIC points" in s)
    assert all(f"‘{name}’" in sentence for name in close)
    assert f"‘{best}’" not in sentence and "Raftery 1995" in text
    far = _rivals(first="A")   # C is 4.4 BIC points from the favourites
    assert "within 2 BIC points" not in " ".join(summary_paragraphs(far))


def _one_model_report() -> dict:
    """The demo's result dict cut to its first model, as a model file with one model gives."""
    report = demo_report()
    keep = report["models"][0]["name"]
    report["models"] = report["models"][:1]
    comparison = report["comparison"]
    comparison["models"] = [r for r in comparison["models"] if r["name"] == keep]
    comparison["nested_tests"] = []
    return report


def test_a_single_model_is_not_called_a_rival_or_compared():
    # a one-model file (Holzinger–Swineford, political democracy) gave "Of the one rival
    # models, BIC favours 'pd' (BIC weight 1.00)" and a BIC-weight chart of one bar
    report = _one_model_report()
    name = report["models"][0]["name"]
    summary = " ".join(summary_paragraphs(report))
    assert "rival" not in summary and "BIC weight" not in summary
    assert "specified first" not in summary
    assert f"the model ‘{name}’ gave χ²(" in abstract_sentence(report)
    # with no construct at the .70 minimum (Nunnally & Bernstein 1994), "below it" had
    # nothing to refer to: "Omega in 'one-general' is below it for climate (.55 ...)"
    (row,) = report["models"][0]["reliability"]
    assert row["omega"] < RELIABILITY_MINIMUM
    assert f"Omega in ‘{name}’ is below .70 for {row['construct']} ({apa(row['omega'], 2)}" in summary
    assert methods_paragraphs(report)[0].startswith(
        f"We fitted one confirmatory factor model (‘{name}’) to the answers of")
    section = _section(render_html(report), "comparison")
    assert "The model file names one model, so there is no rival to compare it with" in section
    assert "BIC weights of the rival models" not in section
    assert "No pair of these models is nested" not in section


def test_summary_never_claims_more_than_the_numbers():
    text = " ".join(summary_paragraphs(demo_report())).lower()
    for claim in ("proves", "proven", "confirms", "the true", "is valid", "validated"):
        assert claim not in text


def test_summary_says_how_many_answered_every_item_and_how_missing_answers_were_handled():
    report = demo_report()
    data = report["data"]
    first = summary_paragraphs(report)[0]
    assert (f"all {data['n_rows']} respondents" if data["n_used"] == data["n_rows"]
            else f"{data['n_used']} of the {data['n_rows']}") in first
    assert f"{data['missing']['n_complete']} answered every item" in first
    assert "full-information maximum likelihood" in first   # data.missing_handling


def _reliability_phrases(model: dict) -> tuple[list[str], list[str]]:
    """(at or above .70, below .70) as 'construct (omega, 95% CI [lo, hi])'."""
    def phrase(r):
        lo, hi = r["omega_ci95"]
        return f"{r['construct']} ({apa(r['omega'], 2)}, 95% CI [{apa(lo, 2)}, {apa(hi, 2)}])"
    rows = model["reliability"]
    return ([phrase(r) for r in rows if r["omega"] >= RELIABILITY_MINIMUM],
            [phrase(r) for r in rows if r["omega"] < RELIABILITY_MINIMUM])


def test_reliability_sentence_separates_scales_at_the_conventional_minimum():
    report = demo_report()
    focus = next(m for m in report["models"] if m["name"] == favoured(report)["focus"])
    # one construct's omega is put below .70 so that both halves of the sentence are exercised
    low = focus["reliability"][-1]
    low["omega"], low["omega_ci95"] = 0.66, [0.61, 0.71]
    high, below = _reliability_phrases(focus)
    assert high and below
    sentence = next(p for p in summary_paragraphs(report) if p.startswith("Omega in"))
    assert "at least .70 for " + ", ".join(high[:-1]) + (" and " if len(high) > 1 else "") + high[-1] in sentence
    assert "below it for " + " and ".join(below) in sentence
    assert "(Nunnally & Bernstein 1994)" in sentence


# --------------------------------------------------------------------------- methods and references

def test_methods_paragraph_states_what_was_run():
    report = demo_report()
    data = report["data"]
    text = " ".join(methods_paragraphs(report))
    assert f"scalewright {report['tool']['version']}" in text
    for estimator in {m["estimator"] for m in report["models"]}:
        assert f"Estimation was by {estimator}" in text
    assert (f"all {data['n_rows']} respondents" if data["n_used"] == data["n_rows"]
            else f"{data['n_used']} of {data['n_rows']} respondents") in text
    test = data["missing"]["little_mcar"]
    assert (f"χ²({test['df']}) = {test['chi_square']:.2f}, p = {p_text(test['p_value'])}"
            .replace("p = <", "p <")) in text
    assert "Arbuckle, 1996" in text and "missing at random (Rubin, 1976)" in text


def test_methods_paragraph_names_the_invariance_steps_and_the_released_constraints():
    report = demo_report()
    text = methods_paragraphs(report)[-1]
    setup = report["invariance_setup"]
    assert text.startswith(f"Measurement invariance of ‘{setup['model']}’")
    assert all(f"‘{g}’ (n = {n})" in text for g, n in setup["n"].items())
    assert all(str(s["step"]) in text for s in report["invariance"])
    assert ("partial invariance" in text) == bool(report["released"])


_CITED = re.compile(r"([A-ZÖ][a-zéö]+)(?:'s)?(?: and [A-Z][a-z]+)?(?:,? et al\.)?,? \(?(\d{4})\)?")


def _listed(author: str, year: str, references: list[str]) -> bool:
    return any(author in entry and f"({year}" in entry for entry in references)


def test_every_author_cited_in_the_methods_paragraph_is_in_the_reference_list():
    report = demo_report()
    cited = _CITED.findall(" ".join(methods_paragraphs(report)))
    references = references_used(report)
    assert len(cited) > 10
    for author, year in cited:
        assert _listed(author, year, references), (author, year)


def test_methods_paragraph_says_how_the_z_values_of_each_route_were_computed():
    report = demo_report()                       # FIML: z against the EM matrix
    text = " ".join(methods_paragraphs(report))
    assert "with missing answers the variance of the saturated model's covariance" in text
    assert "distribution-free" not in text
    assert {m["residual_correlations"]["standardized_basis"] for m in report["models"]} == {"fiml"}
    first = report["models"][0]
    for basis, words in (
            ("distribution-free",
             "under robust ML the distribution-free variance of the residual (Browne, 1984)"),
            ("robust-fiml", "from the casewise scores of both estimates (Yuan & Bentler, 2000)")):
        first["residual_correlations"]["standardized_basis"] = basis
        text = " ".join(methods_paragraphs(report))
        assert words in text
        references = references_used(report)
        for author, year in _CITED.findall(text):
            assert _listed(author, year, references), (author, year)
    for m in report["models"]:                   # no z shown: no sentence
        for r in m["residual_correlations"]["largest"]:
            r["standardized"] = None
    assert "standardized residuals (z)" not in " ".join(methods_paragraphs(report))


def test_every_author_cited_in_the_method_reasons_is_in_the_reference_list():
    report = demo_report()
    cited = _CITED.findall(" ".join(report["method"]["reasons"]))
    references = references_used(report)
    assert cited
    for author, year in cited:
        assert _listed(author, year, references), (author, year)


def test_the_standard_errors_are_named_by_the_method_used():
    # where standard errors come from (DEVELOPERS.md, conventions): sandwich on the robust
    # and ordinal routes, observed information under FIML, expected information otherwise
    report = demo_report()
    cases = [({"estimator": "normal", "missing_handling": "full-information"}, "observed information"),
             ({"estimator": "normal", "missing_handling": "none"}, "expected information"),
             ({"estimator": "robust", "missing_handling": "full-information"}, "sandwich"),
             ({"estimator": "ordinal", "missing_handling": "pairwise"}, "sandwich")]
    for method, words in cases:
        report["method"].update(method)
        caption = f"Loadings of ‘{report['models'][0]['name']}’"
        notes = " ".join(_table(build_document(report), caption).notes)
        assert words in notes, method


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


def test_checklist_asks_a_one_model_file_for_rivals_not_for_first_true():
    report = demo_report()
    report["models"] = report["models"][:1]
    row = {r["number"]: r for r in checklist_rows(report)}[4]
    assert row["status"] == "missing"
    assert "holds one model: add the rival structures" in row["where"]
    assert "first: true" not in row["where"]


def test_checklist_has_the_thirty_lines_of_the_design_notes():
    assert [r["number"] for r in checklist_rows(demo_report())] == list(range(1, 31))


def test_checklist_lines_on_missing_answers_outliers_and_correlations_follow_the_dict():
    report = demo_report()
    rows = {r["number"]: r for r in checklist_rows(report)}
    assert rows[9]["status"] == "shown" and "patterns" in rows[9]["where"]
    assert rows[11]["status"] == "shown" and "Mahalanobis" in rows[11]["where"]
    assert rows[12]["status"] == "shown" and "‘correlations’" in rows[12]["where"]
    del report["data"]["missing"]
    assert checklist_rows(report)[8]["status"] == "partly shown"
    report["models"][0]["polychoric"] = {"items": [], "correlations": []}   # the ordinal route's key
    where = checklist_rows(report)[11]["where"]
    assert f"‘polychoric’ under ‘{report['models'][0]['name']}’" in where
    report["data"]["outliers"] = None                       # too few complete rows to screen
    del report["data"]["correlations"]
    rows = {r["number"]: r for r in checklist_rows(report)}
    assert rows[11]["status"] == "not computed" and rows[12]["status"] == "partly shown"


def test_local_fit_line_says_for_which_models_residuals_were_not_computed():
    report = demo_report()
    assert {r["number"]: r for r in checklist_rows(report)}[19]["status"] == "shown"
    first = report["models"][0]
    first["residual_correlations"] = {"not_computed": "the reason in words"}
    row = {r["number"]: r for r in checklist_rows(report)}[19]
    assert row["status"] == "partly shown"
    assert f"not computed for ‘{first['name']}’" in row["where"]
    html = render_html(report)
    assert "Residual correlations were not computed for this model: the reason in words." in html
    for m in report["models"]:
        m["residual_correlations"] = {"not_computed": "the reason in words"}
    assert {r["number"]: r for r in checklist_rows(report)}[19]["status"] == "not computed"


def test_outlier_and_correlation_tables_follow_the_dict():
    report = demo_report()
    data = report["data"]
    html = render_html(report)
    items = data["correlations"]["items"]
    assert "Item correlations" in html
    # the lower triangle of the matrix, two decimals without the leading zero (APA)
    r = data["correlations"]["matrix"][1][0]
    assert f"{r:.2f}".replace("0.", ".").replace("-", "−") in html
    assert len(items) == len(data["correlations"]["matrix"])
    data["outliers"]["largest"] = [{"row": "T999", "d2": 61.25, "p_value": 0.0000012}]
    data["outliers"]["n_flagged"] = 1
    html = render_html(report)
    assert "T999" in html and "61.2" in html and "kept in the analysis" in html
    assert "every item flag 1 row at p &lt; .001" in html
    # political democracy (semopy's data): no row flagged, no item reverse-keyed; the report
    # said "flag 0 rows" and explained an (R) mark that no item carried
    data["outliers"]["largest"], data["outliers"]["n_flagged"] = [], 0
    for item in report["study"]["items"]:
        item["reverse"] = False
    html = render_html(report)
    assert "every item flag no row at p &lt; .001." in html
    assert "(R)" not in _table(build_document(report), "The items").notes[0]


# --------------------------------------------------------------------------- the data section

def test_the_method_and_its_reasons_are_shown_in_the_data_section():
    report = demo_report()
    data = htmllib.unescape(_section(render_html(report), "data"))
    assert report["method"]["reasons"]
    for reason in report["method"]["reasons"]:
        assert f"<li>{reason}</li>" in data


def test_the_most_frequent_missing_patterns_are_tabled_as_the_dict_lists_them():
    report = demo_report()
    missing = report["data"]["missing"]
    table = _table(build_document(report), "Most frequent patterns of missing answers")
    assert len(table.rows) == len(missing["patterns"])
    for row, pattern in zip(table.rows, missing["patterns"]):
        assert row[0].text == (", ".join(pattern["missing"]) or "none (every item answered)")
        assert (row[1].text, row[2].text) == (str(len(pattern["missing"])), str(pattern["n"]))
    assert f"of the {missing['n_patterns']} patterns" in table.notes[0]


def test_each_items_missing_share_is_in_the_items_table():
    report = demo_report()
    table = _table(build_document(report), "The items: wording")
    column = table.columns.index("Missing")
    shown = {row[0].text.split(" ")[0]: row[column].text for row in table.rows}
    for item in report["data"]["missing"]["items"]:
        assert shown[item["item"]] == f"{100 * item['rate_missing']:.1f}%"


def test_littles_test_is_reported_with_its_mcar_caution():
    report = demo_report()
    test = report["data"]["missing"]["little_mcar"]
    data = htmllib.unescape(_section(render_html(report), "data"))
    verdict = "rejects" if test["p_value"] < 0.05 else "does not reject"
    assert (f"Little's (1988) test {verdict} that the answers are missing completely at random "
            f"(χ²({test['df']}) = {test['chi_square']:.2f}, p = {p_text(test['p_value'])}"
            .replace("p = <", "p <")) in data
    assert "concerns MCAR only" in data and "missing at random (MAR)" in data
    # the other verdict, with a p-value chosen below .05
    report["data"]["missing"]["little_mcar"]["p_value"] = 0.01
    assert "Little's (1988) test rejects" in htmllib.unescape(render_html(report))


# --------------------------------------------------------------------------- reliability and validity

def test_omega_is_shown_with_its_interval_and_marked_at_the_conventional_minimum():
    report = demo_report()
    doc = build_document(report)
    for m in report["models"]:
        table = _table(doc, f"Reliability of the constructs of ‘{m['name']}’")
        cells = {row[0].text: row[3] for row in table.rows}
        for r in m["reliability"]:
            lo, hi = r["omega_ci95"]
            assert cells[r["construct"]].text == f"{apa(r['omega'], 2)} [{apa(lo, 2)}, {apa(hi, 2)}]"
            assert cells[r["construct"]].mark == ("✓" if r["omega"] >= RELIABILITY_MINIMUM else "✗")
    # a model that did not converge has no omega (Holzinger–Swineford, 12 cases): one dash,
    # where the table showed "– –"
    m = report["models"][0]
    m["reliability"][0].update(omega=None, omega_ci95=None)
    table = _table(build_document(report), f"Reliability of the constructs of ‘{m['name']}’")
    assert table.rows[0][3].text == "–"


def test_the_part_of_omega_due_to_the_construct_alone_is_shown_where_it_differs_from_omega():
    report = demo_report()
    doc = build_document(report)
    shown = 0
    for m in report["models"]:
        table = _table(doc, f"Reliability of the constructs of ‘{m['name']}’")
        differs = any(apa(r["omega_construct"], 2) != apa(r["omega"], 2) for r in m["reliability"])
        assert ("Omega, construct alone" in table.columns) == differs
        if differs:
            k = table.columns.index("Omega, construct alone")
            assert [row[k].text for row in table.rows] == [apa(r["omega_construct"], 2)
                                                           for r in m["reliability"]]
            shown += 1
    assert shown   # the demo's bifactor model, whose general factor takes a share


def test_item_analysis_rows_follow_the_dict_and_mark_items_whose_removal_raises_reliability():
    report = demo_report()
    doc = build_document(report)
    raised = 0
    for m in report["models"]:
        rows = iter(_table(doc, f"Item analysis of ‘{m['name']}’").rows)
        for r in m["reliability"]:
            for it in r["items"]:
                row = next(rows)
                assert (row[0].text, row[1].text) == (it["item"], r["construct"])
                assert row[2].text == apa(it["item_total_r"], 2)
                for cell, key in zip(row[3:], ("alpha", "omega")):
                    assert cell.text == apa(it[f"{key}_if_dropped"], 2)
                    rises = it[f"{key}_if_dropped"] > r[key]
                    assert (cell.mark != "") == rises
                    raised += rises
    assert raised   # the demo has items whose removal raises a coefficient


def test_reliability_and_validity_notes_go_under_their_tables():
    report = demo_report()
    doc = build_document(report)
    validity_notes = 0
    for m in report["models"]:
        notes = _table(doc, f"Reliability of the constructs of ‘{m['name']}’").notes
        for r in m["reliability"]:
            for n in r.get("notes") or ():
                assert n["message"] in notes
        # the validity notes go under the last validity table present: HTMT, else
        # Fornell–Larcker, else AVE
        last = next(caption for key, caption in (
            ("htmt", "Heterotrait–monotrait ratios in"),
            ("fornell_larcker", "Correlations against √AVE in"),
            (None, "Average variance extracted of")) if key is None or m["validity"].get(key))
        notes = _table(doc, f"{last} ‘{m['name']}’").notes
        for n in m["validity"].get("notes") or ():
            assert n["message"] in notes
            validity_notes += 1
    assert validity_notes


KINDS_STUDY = """\
study: items of two kinds
data:
  file: answers.csv
items:
  collapse_sparse: true
estimation:
  method: ordinal
models:
  kinds:
    first: true
    constructs:
      ordinal: [a1, a2, a3, a4]
      continuous: [b1, b2, b3]
      both: [m1, m2, m3]
  ordinal only:
    constructs:
      ordinal: [a1, a2, a3, a4]
"""


@pytest.fixture(scope="module")
def kinds_report(tmp_path_factory) -> dict:
    """The result dict of a study whose a- and m1/m2-items are five-point answers and
    whose b-items and m3 are continuous scores: the mixed route for 'kinds' (a construct
    of each kind and one mixing them), the ordinal route for 'ordinal only'; a1 has a
    sparse category, merged on request."""
    import pandas as pd

    from test_evaluate_mixed import KIND_ITEMS, kinds_answers

    folder = tmp_path_factory.mktemp("kinds")
    rng = np.random.default_rng(606)
    x = kinds_answers(rng, 400)
    fives = np.flatnonzero(x[:, 0] == 5)
    x[fives[2:], 0] = 4                      # a1's category 5 keeps two answers
    x[rng.random(x.shape) < 0.03] = np.nan
    pd.DataFrame(x, columns=KIND_ITEMS).to_csv(folder / "answers.csv", index=False)
    (folder / "study.yaml").write_text(KINDS_STUDY)
    return api.check(folder / "study.yaml").to_dict()


def _figure(html: str, caption: str) -> str:
    """The HTML of the numbered table whose caption starts with ``caption``."""
    end = html.index(caption)
    start = html.rindex("<figure", 0, end)
    return html[start:html.index("</figure>", end)]


def test_ordinal_notes_are_prose_in_the_models_section(kinds_report):
    html = render_html(kinds_report)
    models = kinds_report["models"]
    assert [m["estimator"].split(" (")[1].split(";")[0] for m in models] == [
        "polychoric, polyserial and Pearson correlations", "polychoric correlations"]
    for index, m in enumerate(models, start=1):
        section = _section(html, f"model-{index}")
        paragraphs = [htmllib.unescape(p) for p in re.findall(r"<p>(.*?)</p>", section, re.S)]
        assert m["ordinal_notes"] and all(note in paragraphs for note in m["ordinal_notes"])
        assert any(note.startswith("Item 'a1': categories with fewer than 5 answers were merged")
                   for note in m["ordinal_notes"])


def test_reliability_by_item_kind_is_tabled_in_the_models_section(kinds_report):
    html = render_html(kinds_report)
    doc = build_document(kinds_report)
    seen = set()
    for index, m in enumerate(kinds_report["models"], start=1):
        section = _section(html, f"model-{index}")
        for key, caption, columns in (
                ("reliability_ordinal", "Reliability of the constructs measured by ordinal items",
                 ("ordinal_alpha", "omega_total", "omega_total_observed")),
                ("reliability_continuous",
                 "Reliability of the constructs measured by continuous items",
                 ("alpha_standardized", "omega_total"))):
            caption = f"{caption} in ‘{m['name']}’"
            if not m.get(key):
                assert caption not in html
                continue
            seen.add(key)
            figure = _figure(section, htmllib.escape(caption, quote=False))
            table = _table(doc, caption)
            for row, r in zip(table.rows, m[key], strict=True):
                # the coefficients of the JSON, in APA style, in this table of the HTML
                shown = [apa(r[c], 2) for c in columns]
                assert row[0].text == r["construct"] and all(v in figure for v in shown)
                assert [c.text for c in row if c.text in shown] == shown
                omega = next(c for c in row if c.text == apa(r["omega_total"], 2))
                # Nunnally & Bernstein (1994): .70 as the minimum for research use
                assert omega.mark == ("✓" if r["omega_total"] >= RELIABILITY_MINIMUM else "✗")
            for note in (n["message"] for r in m[key] for n in r["notes"]):
                assert note in table.notes
    assert seen == {"reliability_ordinal", "reliability_continuous"}
    rows = {r["number"]: r for r in checklist_rows(kinds_report)}
    assert rows[27]["status"] == "partly shown" and "categorical omega" in rows[27]["where"]


def test_every_author_cited_in_the_ordinal_notes_is_in_the_reference_list(kinds_report):
    cited = _CITED.findall(" ".join(n for m in kinds_report["models"]
                                    for n in m["ordinal_notes"]))
    references = references_used(kinds_report)
    assert ("Spisic", "1997") in cited and ("Muthén", "2010") in cited
    for author, year in cited:
        assert _listed(author, year, references), (author, year)
    for author, year in (("Zumbo", "2007"), ("Green", "2009"), ("McDonald", "1999"),
                         ("Cronbach", "1951"), ("Nunnally", "1994")):    # the tables' notes
        assert _listed(author, year, references), (author, year)


def test_ordinal_notes_and_reliability_rows_are_escaped(kinds_report):
    report = copy.deepcopy(kinds_report)
    m = report["models"][0]
    m["ordinal_notes"].append(f"Item '{HOSTILE}' note")
    m["reliability_ordinal"][0]["construct"] = HOSTILE
    m["reliability_continuous"][0]["notes"].append({"message": HOSTILE})
    html = render_html(report)
    assert "<script" not in html.lower() and _outline(html).forbidden == []
    assert html.count("&lt;script&gt;alert(1)&lt;/script&gt;") >= 3


def test_fornell_larcker_rows_are_marked_by_the_convention():
    # Fornell & Larcker (1981): constructs are distinct when their correlation is smaller in
    # size than the square root of each one's AVE
    report = demo_report()
    doc = build_document(report)
    checked = 0
    for m in report["models"]:
        rows = m["validity"]["fornell_larcker"]
        if not rows:
            continue
        table = _table(doc, f"Correlations against √AVE in ‘{m['name']}’")
        for row, r in zip(table.rows, rows):
            assert [c.text for c in row] == [r["a"], r["b"], apa(r["correlation"], 2),
                                             apa(r["sqrt_ave_a"], 2), apa(r["sqrt_ave_b"], 2)]
            distinct = abs(r["correlation"]) < min(r["sqrt_ave_a"], r["sqrt_ave_b"])
            assert r["convention"]["met"] == distinct
            assert row[2].mark == ("✓" if distinct else "✗")
            checked += 1
    assert checked


def test_a_pair_failing_the_fornell_larcker_convention_is_marked():
    # one pair's correlation set above both √AVE, with the convention as the rule gives it
    report = demo_report()
    m = next(m for m in report["models"] if m["validity"]["fornell_larcker"])
    row = m["validity"]["fornell_larcker"][0]
    row["correlation"] = -(max(row["sqrt_ave_a"], row["sqrt_ave_b"]) + 0.05)
    row["convention"]["met"] = False
    table = _table(build_document(report), f"Correlations against √AVE in ‘{m['name']}’")
    assert table.rows[0][2].mark == "✗" and table.rows[1][2].mark == "✓"


def test_ave_and_htmt_marks_follow_their_conventions():
    # AVE ≥ .50 (Fornell & Larcker 1981); HTMT < .85, the stricter convention of
    # Henseler, Ringle & Sarstedt (2015)
    report = demo_report()
    doc = build_document(report)
    for m in report["models"]:
        v = m["validity"]
        ave = {row[0].text: row[1] for row in
               _table(doc, f"Average variance extracted of ‘{m['name']}’").rows}
        for construct, value in v["ave"].items():
            assert ave[construct].text == apa(value, 2)
            assert ave[construct].mark == ("✓" if value >= 0.5 else "✗")
        if v["htmt"]:
            rows = _table(doc, f"Heterotrait–monotrait ratios in ‘{m['name']}’").rows
            for row, r in zip(rows, v["htmt"]):
                assert row[2].text == apa(r["value"], 2)
                assert row[2].mark == ("✓" if abs(r["value"]) < 0.85 else "✗")


def test_fiml_intercepts_are_tabled_with_their_standard_errors():
    report = demo_report()
    doc = build_document(report)
    for m in report["models"]:
        table = _table(doc, f"Intercepts, residual variances and R² of ‘{m['name']}’")
        assert table.columns[1:3] == ("Intercept", "SE")
        shown = {row[0].text: (row[1].text, row[2].text) for row in table.rows}
        for r in m["intercepts"]:
            assert shown[r["item"]] == (apa(r["estimate"], bounded=False),
                                        apa(r["se"], bounded=False))


# --------------------------------------------------------------------------- local fit and items

def test_the_z_column_of_residual_correlations_appears_only_when_z_was_computed():
    report = demo_report()
    m = report["models"][1]
    largest = m["residual_correlations"]["largest"]
    caption = f"Largest residual correlations of ‘{m['name']}’"
    has_z = any(r.get("standardized") is not None for r in largest)
    assert ("z" in _table(build_document(report), caption).columns) == has_z
    for k, r in enumerate(largest):        # values chosen to exercise the other case
        r["standardized"] = None if has_z else 2.0 + k
    assert ("z" in _table(build_document(report), caption).columns) != has_z


def test_item_review_has_one_row_per_reason():
    report = demo_report()
    doc = build_document(report)
    for m in report["models"]:
        if not m["item_review"]:
            continue
        rows = _table(doc, f"Items to look at in ‘{m['name']}’").rows
        expected = [(r["item"], d["text"]) for r in m["item_review"] for d in r["details"]]
        assert [(row[0].text, row[1].text) for row in rows] == expected


# --------------------------------------------------------------------------- invariance

def test_invariance_steps_show_their_decisions_and_released_constraints():
    report = demo_report()
    html = htmllib.unescape(render_html(report))
    table = _table(build_document(report), "Measurement invariance, step by step")
    for row, step in zip(table.rows, report["invariance"]):
        assert row[0].text == step["step"] + (" (partial)" if step["partial"] else "")
        holds = step["decision"]["holds"]
        assert row[-1].mark == {True: "✓", False: "✗", None: ""}[holds]
        assert step["decision"]["text"] in html
    assert report["released"]
    for released in report["released"]:
        assert released["text"] in html


def test_latent_means_are_tabled_as_the_dict_gives_them():
    report = demo_report()
    table = _table(build_document(report), "Latent means compared between groups")
    assert len(table.rows) == len(report["latent_means"])
    for row, r in zip(table.rows, report["latent_means"]):
        assert [c.text for c in row[:5]] == [r["construct"], r["group"], r["reference"],
                                            apa(r["estimate"], bounded=False),
                                            apa(r["se"], bounded=False)]
        assert row[6].text == p_text(r["p_value"])
    assert report["latent_comparison_note"] in table.notes


# --------------------------------------------------------------------------- tables export

def test_exported_csv_holds_the_same_numbers_as_the_html(tmp_path):
    report = demo_report()
    written = export_tables(report, tmp_path / "tables")
    doc = build_document(report)
    assert len(written) == 2 * len(doc.tables)
    rows = list(csv.reader(io.StringIO(
        (tmp_path / "tables" / "01-summary-fit.csv").read_text(encoding="utf-8"))))
    assert rows[0][:5] == ["Model", "χ²", "df", "p", "CFI"]
    html = render_html(report)
    fits = {m["name"]: m["fit"] for m in report["models"]}
    for row in rows[1:]:
        fit = fits[row[0]]
        assert row[1] == f"{fit['chi_square']:.2f}" and row[4] == apa(fit["cfi"])
        assert row[1] in html and row[4] in html
    first = report["models"][0]
    negative = [r["estimate"] for r in first["loadings"] if r["estimate"] < 0]
    assert negative                                   # the demo's first model has some
    (loadings_file,) = (tmp_path / "tables").glob("*-m1-*-loadings.csv")
    loadings = loadings_file.read_text(encoding="utf-8")
    assert MINUS not in loadings and f"{negative[0]:.3f}" in loadings   # ASCII minus


def test_markdown_tables_carry_caption_marks_and_notes(tmp_path):
    report = demo_report()
    export_tables(report, tmp_path)
    text = (tmp_path / "01-summary-fit.md").read_text(encoding="utf-8")
    assert text.startswith("**Table 1.** Fit of the rival models at a glance")
    for m in report["models"]:
        fit = m["fit"]
        mark = "✓" if meets_hu_bentler("cfi", fit["cfi"]) else "✗"
        assert (f"| {m['name']} | {fit['chi_square']:.2f} | {fit['df']} | "
                f"{p_text(fit['p_value'])} | {apa(fit['cfi'])} {mark} |") in text
    assert "*Note.*" in text


def test_tables_are_not_written_into_a_folder_of_other_files(tmp_path):
    (tmp_path / "thesis.docx").write_text("mine")
    with pytest.raises(StudyError, match="holds files that scalewright did not write"):
        export_tables(demo_report(), tmp_path)


def test_tables_may_share_the_folder_of_the_report(tmp_path):
    # --out and --tables naming one folder: the report written there first is scalewright's
    report = demo_report()
    (tmp_path / "study.json").write_text(to_json(report), encoding="utf-8")
    (tmp_path / "study.html").write_text(render_html(report), encoding="utf-8")
    export_tables(report, tmp_path)
    assert (tmp_path / "01-summary-fit.csv").is_file()


def test_tables_of_an_earlier_run_are_replaced(tmp_path):
    report = demo_report()
    export_tables(report, tmp_path)
    assert any("reliability" in p.name for p in tmp_path.iterdir())
    for m in report["models"]:
        del m["reliability"]
    export_tables(report, tmp_path)
    assert not any("reliability" in p.name for p in tmp_path.iterdir())


# --------------------------------------------------------------------------- determinism and size

@pytest.mark.slow
def test_two_runs_differ_only_in_the_timestamp_line():
    first = demo_report()
    second = api.check(DEMO).to_dict()       # a second, independent run of the check
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
    report = demo_report()
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
        m["intercepts"] = [{"item": it, "estimate": 3.1, "se": .04} for it in items]
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
    # design brief: a 100-item, 10-construct study with 4 rival models stays < 5 MB
    html = render_html(large_report())
    assert len(html.encode("utf-8")) < 5 * 1024 * 1024


def test_summary_reports_the_reliability_of_ordinal_and_mixed_models(kinds_report):
    # the summary of a model fitted on the ordinal or mixed route names its categorical
    # omega (ordinal constructs) and omega of standardized items (continuous ones), split
    # at .70 (Nunnally & Bernstein 1994, RELIABILITY_MINIMUM above), as it does omega on
    # the ML routes; before, such models had no reliability sentence at all
    from scalewright.report.narrative import _reliability_paragraph
    for model in kinds_report["models"]:
        sentence = _reliability_paragraph(model)
        assert sentence is not None and "(Nunnally & Bernstein 1994)" in sentence
        for key, what in (("reliability_ordinal", "Categorical omega"),
                          ("reliability_continuous", "Omega of the standardized items")):
            rows = model.get(key) or []
            assert (f"{what} in ‘{model['name']}’ is" in sentence) == bool(rows)
            for row in rows:
                side = "at least .70 for" if row["omega_total"] >= RELIABILITY_MINIMUM \
                    else "below it for"
                phrase = f"{row['construct']} ({apa(row['omega_total'], 2)})"
                assert phrase in sentence
                assert sentence.index(side) < sentence.index(phrase)
