"""The report as an ordered document: sections of blocks (paragraphs,
tables, figures, lists), assembled from the result dict.

The template only lays these blocks out; every number is formatted and
every sentence written here or in the modules this one calls.  Tables and
figures are numbered in reading order, so that the HTML and the exported
tables (``--tables``) carry the same numbers.

Sections appear only when their key is in the result dict: a key another
part of scalewright has not produced simply leaves its block out.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from pathlib import Path

from markupsafe import Markup

from scalewright.report import charts, checklist, narrative, tables
from scalewright.report.diagram import arcs_omitted, path_diagram
from scalewright.report.formatting import count, dec
from scalewright.report.references import references_used

ABOUT_LABELS = (
    ("rationale", "Why this structure"),
    ("population", "Population"),
    ("sampling", "Sampling"),
    ("exclusions", "Exclusions"),
    ("sample_size", "Sample size"),
    ("response_format", "Response format"),
    ("clustering", "Clustering"),
)


#: rows beyond which a printed table may continue on the next page (its header repeats)
LONG_TABLE = 12

#: subsection heading of each per-model table, in order
_GROUP = {
    "loadings": "Loadings and correlations", "matrix": "Loadings and correlations",
    "paths": "Loadings and correlations", "correlations": "Loadings and correlations",
    "residuals": "Item parameters", "residual_covariances": "Item parameters",
    "thresholds": "Item parameters",
    "reliability": "Reliability and distinctness", "item_analysis": "Reliability and distinctness",
    "reliability_ordinal": "Reliability and distinctness",
    "reliability_continuous": "Reliability and distinctness",
    "validity": "Reliability and distinctness", "fornell_larcker": "Reliability and distinctness",
    "htmt": "Reliability and distinctness", "bifactor": "Reliability and distinctness",
    "higher_order": "Reliability and distinctness",
    "hints": "Where the model is strained", "residual_correlations": "Where the model is strained",
    "item_review": "Item review", "refinement": "Item review",
}


@dataclass
class Section:
    """One ``<section>``: an id for links, a heading, blocks in order."""

    id: str
    title: str
    blocks: list = field(default_factory=list)
    css: str = ""

    def p(self, text: str, css: str = "") -> None:
        self.blocks.append({"type": "p", "text": text, "css": css})

    def h3(self, text: str) -> None:
        self.blocks.append({"type": "h3", "text": text})

    def items(self, entries, css: str = "") -> None:
        self.blocks.append({"type": "list", "items": list(entries), "css": css})


@dataclass
class Document:
    """Everything the template shows."""

    report: dict
    sections: list[Section] = field(default_factory=list)
    tables: list = field(default_factory=list)
    figures: int = 0

    def table(self, section: Section, table) -> None:
        """Number ``table`` and add it to ``section``; a table of more than
        :data:`LONG_TABLE` rows may break across printed pages."""
        numbered = table.numbered(len(self.tables) + 1)
        if len(table.rows) > LONG_TABLE:
            numbered = replace(numbered, css=f"{numbered.css} long".strip())
        self.tables.append(numbered)
        section.blocks.append({"type": "table", "table": numbered})

    def figure(self, section: Section, svg: str, caption: str, css: str = "") -> None:
        self.figures += 1
        section.blocks.append({"type": "figure", "svg": Markup(svg), "caption": caption,
                               "number": self.figures, "css": css})


def header_facts(report: dict) -> list[tuple[str, str]]:
    data = report["data"]
    estimators = list(dict.fromkeys(str(m.get("estimator")) for m in report["models"]))
    return [
        ("Data file", data["file"]),
        ("SHA-256", data["sha256"]),
        ("Rows read / used", f"{count(data['n_rows'])} / {count(data['n_used'])}"),
        ("Missing answers", narrative.missing_handling(report)),
        ("Estimation", "; ".join(estimators)),
        ("Model file", report["study"].get("model_file", "–")),
        ("Software", f"scalewright {report['tool']['version']}"),
        ("Created", report["created"]),
    ]


def _summary(doc: Document) -> None:
    r = doc.report
    s = Section("summary", "Summary")
    for text in narrative.summary_paragraphs(r):
        s.p(text)
    sentence = narrative.abstract_sentence(r)
    if sentence:
        s.blocks.append({"type": "abstract", "text": sentence})
    doc.table(s, tables.summary_fit_table(r))
    doc.sections.append(s)


def _design(doc: Document) -> None:
    r = doc.report
    s = Section("design", "Study design")
    about = r["study"].get("about") or {}
    entries = []
    for key, label in ABOUT_LABELS:
        value = about.get(key)
        if value:
            entries.append({"term": label, "text": str(value), "missing": False})
        else:
            entries.append({"term": label, "missing": True,
                            "text": f"Not stated in the model file. Add ‘{key}:’ under ‘about:’."})
    s.blocks.append({"type": "dl", "items": entries})
    rows = (r.get("comparison") or {}).get("models", [])
    stated = [row for row in rows if row.get("rationale")]
    if stated:
        s.h3("Rationale given for each model")
        s.blocks.append({"type": "dl", "items": [
            {"term": row["name"], "text": row["rationale"], "missing": False} for row in stated]})
    doc.sections.append(s)


def _comparison(doc: Document) -> None:
    r = doc.report
    comparison = r.get("comparison")
    if not comparison:
        return
    s = Section("comparison", "Rival models compared")
    if len(comparison["models"]) == 1:
        s.p("The model file names one model, so there is no rival to compare it with; the "
            "table gives its information criteria for comparison with models fitted elsewhere "
            "to the same answers.")
        doc.table(s, tables.comparison_table(r))
        doc.sections.append(s)
        return
    first = [row["name"] for row in comparison["models"] if row.get("first")]
    s.p(f"The model specified first is ‘{first[0]}’." if first else
        "The model file does not mark which model was specified first; add ‘first: true’ "
        "under that model.", "" if first else "missing")
    doc.table(s, tables.comparison_table(r))
    bars = charts.weight_bars(comparison["models"])
    if bars:
        doc.figure(s, bars, "BIC weights of the rival models (the same numbers as the last "
                            "column of the table above).", "weights")
    if comparison.get("nested_tests"):
        doc.table(s, tables.nested_table(r))
    else:
        s.p("No pair of these models is nested (as declared in the model file or found by "
            "comparing their specifications), so no chi-square difference test applies.")
    changed = [(row["name"], c) for row in comparison["models"] for c in row.get("changes") or ()]
    if changed:
        s.h3("Changes from the model specified first")
        s.items(f"‘{name}’: {c['change']}. Cue: {c.get('cue') or 'not stated'}. Reason: "
                f"{c.get('reason') or 'not stated in the model file'}." for name, c in changed)
    doc.sections.append(s)


def _model(doc: Document, m: dict, index: int) -> None:
    s = Section(f"model-{index}", f"Model ‘{m['name']}’", css="model")
    opt = m.get("optimizer") or {}
    state = ("converged" if m.get("converged", True) else "did NOT converge")
    s.p(f"{m.get('estimator', '')}; {state}"
        + (f" after {opt['iterations']} iterations" if opt.get("iterations") is not None else "")
        + f"; N = {count(m.get('n_used'))}; {m['fit'].get('df')} degrees of freedom. "
        + " ".join(m.get("identification", ())))
    for note in m.get("ordinal_notes") or ():
        s.p(note)
    if m.get("warnings"):
        s.blocks.append({"type": "warnings", "items": list(m["warnings"])})
    doc.figure(s, path_diagram(m, f"fig-m{index}"),
               "Standardized estimates. Straight arrows: loadings (and higher-order paths); "
               "curved double-headed arrows: correlations between constructs (left) and between "
               "item residuals (right). Dashed lines are negative; thicker lines are larger."
               + (" Construct correlations are in the table, not drawn."
                  if arcs_omitted(m) else ""), "diagram")
    current = None
    for key, table in tables.model_tables(m, index, narrative.standard_errors(doc.report)).items():
        group = _GROUP[key]
        if group != current:
            s.h3(group)
            current = group
        doc.table(s, table)
        if key == "residual_correlations" and m["residual_correlations"].get("matrix"):
            doc.figure(s, charts.heat_map(m["residual_correlations"], f"fig-m{index}-heat")
                       + charts.heat_legend(),
                       "Residual correlations (observed minus implied), lower triangle. Darker "
                       "is larger; hatched cells are negative; outlined cells reach the flag "
                       "threshold.", "heat")
    unavailable = (m.get("residual_correlations") or {}).get("not_computed")
    if unavailable:
        s.p(f"Residual correlations were not computed for this model: {unavailable}.")
    for note in m.get("reliability_notes") or ():
        s.p(note)
    notes = m.get("modification_hint_notes") or {}
    if "modification_hints" in m and not m["modification_hints"]:
        s.p(notes.get("not_computed") or
            f"No modification index reaches {dec(notes.get('threshold'), 1)}.")
    if "refinement" in m and not (m["refinement"] or {}).get("steps"):
        s.p((m["refinement"] or {}).get("stopped") or "No refinement path was computed.")
    doc.sections.append(s)


#: how the invariance sequence was run, in the order shown (keys of ``invariance_setup``)
SETUP_LABELS = (
    ("estimator", "Estimation"), ("ordinal_identification", "Identification"),
    ("missing_handling", "Missing answers"),
    ("standard_errors", "Standard errors"), ("difference_test", "Difference test"),
    ("baseline_model", "Baseline model"), ("srmr", "SRMR"), ("rmsea", "RMSEA"),
    ("search", "Search for partial invariance"),
)


def _setup(s: Section, setup: dict) -> None:
    """The model, the groups and how the invariance sequence was run."""
    sizes = setup.get("n") or {}
    s.p(f"Invariance was checked for model ‘{setup.get('model')}’ ("
        + "; ".join(f"n = {count(n)} in ‘{g}’" for g, n in sizes.items()) + "). "
        + " ".join(n for n in setup.get("notes") or () if n))
    entries = [{"term": label, "text": str(setup[key]), "missing": False}
               for key, label in SETUP_LABELS if setup.get(key)]
    if setup.get("method_note"):
        entries.append({"term": "Note", "text": setup["method_note"], "missing": False})
    s.blocks.append({"type": "dl", "items": entries})


def _invariance(doc: Document) -> None:
    r = doc.report
    if not r.get("invariance"):
        return
    s = Section("invariance", "Measurement invariance")
    if r.get("invariance_setup"):
        _setup(s, r["invariance_setup"])
    doc.table(s, tables.invariance_table(r))
    decisions = [(step, (step.get("decision") or {}).get("text")) for step in r["invariance"]
                 if isinstance(step.get("decision"), dict)]
    if decisions:
        s.h3("The decision at each step")
        s.blocks.append({"type": "dl", "items": [
            {"term": str(step.get("label") or step.get("step", "")), "text": text,
             "missing": False}
            for step, text in decisions if text]})
    released = r.get("released") or []
    if released:
        s.h3("Constraints released")
        s.items(x.get("text") or f"{x.get('kind')} of {x.get('item')}" if isinstance(x, dict)
                else str(x) for x in released)
    if r.get("latent_means"):
        s.h3("Latent means")
        doc.table(s, tables.latent_means_table(r))
    elif r.get("latent_comparison_note"):
        s.p(r["latent_comparison_note"])
    doc.sections.append(s)


def _data(doc: Document) -> None:
    r = doc.report
    data = r["data"]
    s = Section("data", "The data")
    dropped = data.get("dropped") or {}
    reasons = "; ".join(f"{count(v)} for {k}" for k, v in dropped.items() if v)
    s.p(f"{count(data['n_rows'])} rows were read from {data['file']}; {count(data['n_used'])} "
        f"were used" + (f" ({reasons})" if reasons else "") + ". Missing answers: "
        f"{narrative.missing_handling(r)}.")
    method = r.get("method") or {}
    if method.get("reasons"):
        s.h3("The method chosen for these data")
        s.items(method["reasons"])
    s.h3("The items")
    doc.table(s, tables.screening_table(r))
    items_table = len(doc.tables)
    if (data.get("screening") or {}).get("mardia"):
        doc.table(s, tables.mardia_table(r))
    missing = data.get("missing") or {}
    if missing.get("patterns") and missing.get("n_patterns", 0) > 1:
        s.h3("Missing answers")
        s.p(f"{count(missing.get('n_complete'))} of the {count(missing.get('n_rows'))} rows "
            f"answer every item; the others fall into {count(missing['n_patterns'] - 1)} "
            "patterns of unanswered items"
            + (f", and {count(missing['n_no_answer'])} rows answer none"
               if missing.get("n_no_answer") else "")
            + f". The share of missing answers of each item is in the column ‘Missing’ of "
              f"Table {items_table}.")
        doc.table(s, tables.missing_patterns_table(r))
        sentence = narrative.little_sentence(r)
        if sentence:
            s.p(sentence)
    repeats = data.get("repeated_ids")
    if repeats:
        s.h3("Repeated ids")
        s.p(repeats["note"])
    outliers = data.get("outliers")
    if outliers:
        s.h3("Rows far from the others")
        flagged = outliers["n_flagged"]
        rows = "no row" if flagged == 0 else f"{count(flagged)} row{'' if flagged == 1 else 's'}"
        s.p(f"Mahalanobis distances of the {count(outliers['n_checked'])} rows that answer every "
            f"item flag {rows} at p < .001"
            + ("; they were kept in the analysis, and the most distant are listed below so "
               "that their answers can be looked at." if flagged else "."))
        if outliers["largest"]:
            doc.table(s, tables.outliers_table(r))
    correlations = data.get("correlations")
    if correlations and len(correlations["items"]) <= tables.CORRELATION_TABLE_MAX_ITEMS:
        s.h3("Item correlations")
        doc.table(s, tables.correlation_table(r))
    doc.sections.append(s)


def _methods(doc: Document) -> None:
    r = doc.report
    s = Section("methods", "Methods paragraph and references")
    s.p("Generated from what this check ran; adapt it to your own words and add what only "
        "you know (sample, design, reasons).", "lead")
    for text in narrative.methods_paragraphs(r):
        s.p(text, "methods")
    s.h3("References")
    s.items(references_used(r), "references")
    doc.sections.append(s)


def _cautions(doc: Document) -> None:
    s = Section("cautions", "Cautions")
    s.blocks.append({"type": "dl", "items": [
        {"term": title, "text": text, "missing": False}
        for title, text in narrative.cautions(doc.report)]})
    doc.sections.append(s)


def _checklist(doc: Document) -> None:
    s = Section("checklist", "Reporting checklist")
    doc.table(s, tables.checklist_table(checklist.checklist_rows(doc.report)))
    doc.sections.append(s)


def build_document(report: dict) -> Document:
    """The whole report, in reading order."""
    doc = Document(report)
    _summary(doc)
    _design(doc)
    _comparison(doc)
    for index, m in enumerate(report["models"], start=1):
        _model(doc, m, index)
    _invariance(doc)
    _data(doc)
    _methods(doc)
    _cautions(doc)
    _checklist(doc)
    return doc


def export_tables(report: dict, folder) -> list:
    """Write every table of the report as CSV and Markdown into ``folder``
    (see :func:`scalewright.report.tables.write_tables`); same numbering as
    the HTML."""
    return tables.write_tables(build_document(report).tables, Path(folder))
