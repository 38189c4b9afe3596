"""Every table of the report, built once from the result dict and written
three ways: HTML (by the template), CSV and Markdown (``--tables DIR``).

A :class:`Table` holds cells that are already formatted to reporting
precision (:mod:`scalewright.report.formatting`), so the three forms show the
same numbers.  Marks against conventions (✓/✗) are kept apart from the
number: they are shown in HTML and Markdown and left out of the CSV, whose
cells a spreadsheet can read as numbers.
"""

from __future__ import annotations

import csv
import io
import re
from dataclasses import dataclass, replace
from pathlib import Path

from scalewright.errors import StudyError
from scalewright.output import check_folder, written_by_scalewright
from scalewright.report.charts import frequency_chart, frequency_text
from scalewright.report.conventions import (FIT_CUTOFFS, MEETS, MISSES, RELIABILITY_MINIMUM,
                                            RELIABILITY_SOURCE, ROBUST, SALIENCE, cutoff_note,
                                            fit_marks, shown_fit)
from scalewright.report.formatting import (DASH, coef, count, dec, dof, interval, percent,
                                           plain, pval)


@dataclass(frozen=True)
class Cell:
    """One formatted cell.

    ``header`` marks a row header (``<th scope="row">``); ``mark`` is a
    symbol shown after the text (✓/✗); ``css`` names classes for the HTML;
    ``shade`` (0–9) darkens the background by size (loading matrix);
    ``chart`` is inline SVG shown in the HTML in place of ``text`` (which
    carries the same numbers for CSV and Markdown).
    """

    text: str
    header: bool = False
    mark: str = ""
    css: str = ""
    shade: int | None = None
    chart: str = ""


@dataclass(frozen=True)
class Table:
    """A captioned table: ``columns`` are header labels, ``rows`` lists of cells.

    ``left`` is the number of leading text columns (left-aligned); the rest
    are numbers (right-aligned).  ``number`` is set when the document is
    assembled (Table 1, 2, …).
    """

    key: str
    title: str
    columns: tuple[str, ...]
    rows: tuple[tuple[Cell, ...], ...]
    notes: tuple[str, ...] = ()
    left: int = 1
    number: int = 0
    css: str = ""

    @property
    def text_columns(self) -> frozenset:
        """Columns whose header is left-aligned: the leading ones and any of text cells."""
        return frozenset(k for k in range(len(self.columns))
                         if k < self.left or any("text" in row[k].css.split() for row in self.rows
                                                 if k < len(row)))

    def numbered(self, number: int) -> "Table":
        return replace(self, number=number)

    def to_csv(self) -> str:
        """The table as CSV (ASCII minus, no marks, header row first)."""
        buffer = io.StringIO()
        writer = csv.writer(buffer, lineterminator="\n")
        writer.writerow(self.columns)
        for row in self.rows:
            writer.writerow([plain(c.text) for c in row])
        return buffer.getvalue()

    def to_markdown(self) -> str:
        """The table as a Markdown pipe table with its caption and notes."""
        def esc(text: str) -> str:
            return text.replace("\\", "\\\\").replace("|", "\\|").replace("\n", " ")

        def cell(c: Cell) -> str:
            return esc(f"{c.text} {c.mark}".strip())

        align = ["---"] * self.left + ["---:"] * (len(self.columns) - self.left)
        lines = [f"**Table {self.number}.** {esc(self.title)}", "",
                 "| " + " | ".join(esc(c) for c in self.columns) + " |",
                 "| " + " | ".join(align) + " |"]
        lines += ["| " + " | ".join(cell(c) for c in row) + " |" for row in self.rows]
        if self.notes:
            lines += [""] + [f"*Note.* {esc(n)}" if i == 0 else esc(n)
                             for i, n in enumerate(self.notes)]
        return "\n".join(lines) + "\n"


#: rows of the largest residual correlations and of the strongest hints shown (all are in the JSON)
MAX_RESIDUAL_ROWS = 15
MAX_HINT_ROWS = 15
#: marks an item whose removal would raise its construct's alpha or omega
RISES = "▲"


def weight(x) -> str:
    """A model weight: three decimals, '< .001' below that."""
    return pval(x) if x is not None else DASH


def _h(text) -> Cell:
    return Cell(str(text), header=True)


def _c(text: str, **kw) -> Cell:
    return Cell(text, **kw)


def _marked(value, met: bool | None, text: str) -> Cell:
    if met is None:
        return Cell(text)
    return Cell(text, mark=MEETS if met else MISSES, css="meets" if met else "misses")


def slug(name: str) -> str:
    """A file-name-safe form of a model name: lower case, letters, digits, '-'."""
    s = re.sub(r"[^a-z0-9]+", "-", name.lower()).strip("-")
    return s or "model"


# --------------------------------------------------------------------------- fit and comparison

def _fit_cells(fit: dict) -> list[Cell]:
    fit = shown_fit(fit)
    marks = fit_marks(fit)
    cells = []
    for c in FIT_CUTOFFS:
        text = coef(fit.get(c.index))
        if c.index == "rmsea":
            text = f"{text} {interval(fit.get('rmsea_ci90'))}"
        cells.append(_marked(fit.get(c.index), marks[c.index]["met"], text))
    return cells


def summary_fit_table(report: dict) -> Table:
    """One row per rival model: χ², df, p and the four indices marked against
    cutoffs, and the BIC weight when the models were compared."""
    comparison = report.get("comparison")
    weights = (comparison or {}).get("bic_weights", {})
    scaled = any("chi_square_scaled" in m["fit"] for m in report["models"])
    rows = []
    for m in report["models"]:
        f = m["fit"]
        name = m["name"] + ("" if m.get("converged", True) else " (did not converge)")
        cells = [_h(name), _c(dec(f.get("chi_square"), 2))]
        if scaled:
            cells.append(_c(dec(f.get("chi_square_scaled"), 2)))
        cells += [_c(str(f.get("df"))), _c(pval(f.get("p_value"))), *_fit_cells(f)]
        if comparison:
            cells.append(_c(weight(weights.get(m["name"]))))
        rows.append(tuple(cells))
    columns = ("Model", "χ²") + (("χ² scaled",) if scaled else ()) + (
        "df", "p", "CFI", "TLI", "RMSEA [90% CI]", "SRMR") + (
        ("BIC weight",) if comparison else ())
    notes = [cutoff_note()]
    if any(f.get(r) is not None for m in report["models"] for f in [m["fit"]]
           for r in ROBUST.values()):
        notes.append("Where a model has robust versions of CFI, TLI and RMSEA (Brosseau-Liard "
                     "& Savalei 2014), those are shown and marked. χ² scaled: the mean-scaled "
                     "statistic (Satorra & Bentler 1994).")
    return Table("summary-fit", "Fit of the rival models at a glance", columns, tuple(rows),
                 tuple(notes))


def comparison_table(report: dict) -> Table:
    """Rival models side by side with information criteria and BIC weights."""
    comparison = report["comparison"]
    robust = any("chi_square_scaled" in r for r in comparison["models"])
    columns = ["Model", "First", "χ²"] + (["χ² scaled"] if robust else []) + [
        "df", "p", "CFI", "TLI", "RMSEA [90% CI]", "SRMR", "AIC", "BIC", "ΔBIC", "BIC weight"]
    rows = []
    for r in comparison["models"]:
        cells = [_h(r["name"] + ("" if r.get("converged", True) else " (did not converge)")),
                 Cell("yes" if r.get("first") else "", css="text"),
                 _c(dec(r.get("chi_square"), 2))]
        if robust:
            cells.append(_c(dec(r.get("chi_square_scaled"), 2)))
        cells += [_c(str(r.get("df"))), _c(pval(r.get("p_value"))), _c(coef(r.get("cfi"))),
                  _c(coef(r.get("tli"))),
                  _c(f"{coef(r.get('rmsea'))} {interval(r.get('rmsea_ci90'))}"),
                  _c(coef(r.get("srmr"))), _c(dec(r.get("aic"), 1)), _c(dec(r.get("bic"), 1)),
                  _c(dec(r.get("delta_bic"), 1)), _c(weight(r.get("bic_weight")))]
        rows.append(tuple(cells))
    notes = ["AIC = −2 log-likelihood + 2k (Akaike 1974); BIC = −2 log-likelihood + k ln N "
             "(Schwarz 1978), k counting the item means. The BIC weight is exp(−ΔBIC/2) "
             "normalised over the models, an approximate probability of each model among these "
             "rivals under equal prior odds (Raftery 1995; Wagenmakers & Farrell 2004); it says "
             "nothing about models not in the list. First: the model specified first, as marked "
             "in the model file."]
    if any(r.get("bic_weight") is None and r.get("converged", True) for r in comparison["models"]):
        notes.append("Models without a weight use other items or rows than the first model, so "
                     "their likelihoods cannot be compared with it.")
    if robust:
        notes.append("χ² scaled: the mean-scaled statistic (Satorra & Bentler 1994).")
    return Table("comparison", "Rival models side by side", tuple(columns), tuple(rows),
                 tuple(notes), left=2, css="wide")


def nested_table(report: dict) -> Table:
    """Chi-square difference tests between nested models, each naming its test."""
    rows = []
    tests = report["comparison"]["nested_tests"]
    for t in tests:
        rows.append((_h(t["restricted"]), Cell(t["general"], css="text"),
                     Cell(t.get("test") or DASH, css="text"),
                     _c(dec(t.get("chi_square"), 2)), _c(str(t.get("df"))),
                     _c(pval(t.get("p_value"))),
                     Cell(f"{t['how_detected']}." + (f" Note: {t['note']}." if t.get("note") else ""),
                          css="text prose")))
    used = " ".join(str(t.get("test")) for t in tests)
    notes = []
    if "Steiger" in used:
        notes.append("Likelihood-ratio difference: Δχ² is the restricted model's chi-square minus "
                     "the general model's, on the difference in degrees of freedom (Steiger, "
                     "Shapiro & Browne 1985).")
    if "Satorra & Bentler" in used:
        notes.append("Scaled difference: the difference of the unscaled chi-squares divided by "
                     "the scaling factor of the difference (Satorra & Bentler 2001).")
    if "DWLS" in used:
        notes.append("DWLS difference: the adjusted difference test of Satorra 2000 applied to "
                     "DWLS, as Asparouhov & Muthén 2006 describe it for robust WLS estimators: "
                     "the difference of the two unadjusted DWLS statistics, whose distribution "
                     "(a weighted sum of one-df chi-squares) is matched in mean and variance to "
                     "chi-square on Δdf by a scale and a shift (Asparouhov & Muthén 2010).")
    notes.append("A small p says the restrictions cost more fit than chance would explain. A "
                 "large p does not show that the restricted model is right.")
    return Table("nested-tests", "Chi-square difference tests between nested models",
                 ("Restricted model", "General model", "Test", "Δχ²", "Δdf", "p",
                  "How the nesting is known"),
                 tuple(rows), tuple(notes), left=3)


# --------------------------------------------------------------------------- one model

def loadings_table(m: dict, prefix: str, standard_errors: str = "") -> Table:
    """Loadings with SE, z, p and the standardized value; ``standard_errors``
    is the sentence saying where the standard errors come from."""
    rows = []
    for row in m["loadings"]:
        std = row.get("std_estimate")
        weak = std is not None and row.get("primary") and abs(std) < SALIENCE
        rows.append((_h(row["item"]), Cell(row["construct"], css="text"),
                     _c(dec(row["estimate"])),
                     _c("fixed" if row.get("fixed") else dec(row.get("se"))),
                     _c(dec(row.get("z"), 2)), _c(pval(row.get("p_value"))),
                     Cell(coef(std), mark="▽" if weak else "", css="weak" if weak else "")))
    return Table(f"{prefix}-loadings", f"Loadings of ‘{m['name']}’",
                 ("Item", "Construct", "Estimate", "SE", "z", "p", "Standardized"), tuple(rows),
                 (f"▽ standardized loading below |{coef(SALIENCE, 2)}| on the item's own "
                  "construct (a common rule of thumb for a salient loading). 'fixed' marks a "
                  "loading fixed for scaling." + (f" {standard_errors}" if standard_errors else ""),),
                 left=2)


def loading_matrix(m: dict, prefix: str) -> Table:
    """Items × latent variables, standardized loadings, cells shaded by size."""
    factors = [c["name"] for c in m["constructs"]
               if any(r["construct"] == c["name"] for r in m["loadings"])]
    value = {(r["item"], r["construct"]): r.get("std_estimate") for r in m["loadings"]}
    rows = []
    for item in m["items"]:
        cells = [_h(item)]
        for f in factors:
            v = value.get((item, f))
            if v is None:
                cells.append(Cell(""))
            else:
                cells.append(Cell(coef(v, 2), shade=min(9, int(abs(v) * 10)),
                                  css="salient" if abs(v) >= SALIENCE else ""))
        rows.append(tuple(cells))
    return Table(f"{prefix}-matrix", f"Standardized loading matrix of ‘{m['name']}’",
                 ("Item", *factors), tuple(rows),
                 (f"Darker cells carry larger loadings; loadings of |{coef(SALIENCE, 2)}| or more "
                  "are in bold. Empty cells are fixed at zero by the model.",),
                 css="matrix")


def paths_table(m: dict, prefix: str) -> Table:
    rows = [(_h(r["construct"]), Cell(r["higher"], css="text"), _c(dec(r["estimate"])),
             _c("fixed" if r.get("fixed") else dec(r.get("se"))), _c(pval(r.get("p_value"))),
             _c(coef(r.get("std_estimate"))), _c(coef((r.get("std_estimate") or 0) ** 2)
                                                  if r.get("std_estimate") is not None else DASH))
            for r in m["higher_order_paths"]]
    return Table(f"{prefix}-paths", f"Higher-order paths of ‘{m['name']}’",
                 ("Construct", "Explained by", "Estimate", "SE", "p", "Standardized",
                  "Share explained"), tuple(rows),
                 ("Share explained: the squared standardized path, the part of the construct's "
                  "variance the higher-order factor accounts for.",), left=2)


def correlations_table(m: dict, prefix: str) -> Table:
    rows = [(_h(r["a"]), Cell(r["b"], css="text"), _c(coef(r["estimate"])),
             _c(dec(r.get("se"))), _c(pval(r.get("p_value"))))
            for r in m["construct_correlations"]]
    return Table(f"{prefix}-correlations", f"Construct correlations in ‘{m['name']}’",
                 ("Construct", "With", "Correlation", "SE", "p"), tuple(rows),
                 ("Model-implied correlations; standard errors by the delta method.",), left=2)


def residuals_table(m: dict, prefix: str) -> Table:
    """Per item: the intercept with its SE when the model has a mean structure
    (full-information ML), the residual variance with SE, standardized, and R²."""
    r2 = {r["item"]: r["value"] for r in m.get("r_squared", ())}
    intercepts = {r["item"]: r for r in m.get("intercepts") or ()}
    rows = []
    for r in m["residual_variances"]:
        cells = [_h(r["item"])]
        if intercepts:
            nu = intercepts.get(r["item"], {})
            cells += [_c(dec(nu.get("estimate"))), _c(dec(nu.get("se")))]
        cells += [_c(dec(r["estimate"])), _c(dec(r.get("se"))), _c(coef(r.get("std_estimate"))),
                  _c(coef(r2.get(r["item"])))]
        rows.append(tuple(cells))
    notes = ["A negative residual variance (a Heywood case) is reported as estimated and "
             "flagged among the warnings."]
    if intercepts:
        notes.insert(0, "Intercept: the expected answer to the item (after reverse keying) of a "
                        "respondent at the mean of every construct, estimated with the other "
                        "parameters from every answer given.")
    return Table(f"{prefix}-residuals",
                 (f"Intercepts, residual variances and R² of ‘{m['name']}’" if intercepts
                  else f"Residual variances and R² of ‘{m['name']}’"),
                 ("Item",) + (("Intercept", "SE") if intercepts else ()) +
                 ("Residual variance", "SE", "Standardized", "R²"), tuple(rows), tuple(notes))


def residual_covariances_table(m: dict, prefix: str) -> Table:
    rows = [(_h(r["a"]), Cell(r["b"], css="text"), _c(dec(r["estimate"])),
             _c(dec(r.get("se"))), _c(pval(r.get("p_value"))), _c(coef(r.get("std_estimate"))))
            for r in m["residual_covariances"]]
    return Table(f"{prefix}-residual-covariances",
                 f"Residual covariances declared in ‘{m['name']}’",
                 ("Item", "With", "Covariance", "SE", "p", "Residual correlation"), tuple(rows),
                 left=2)


def _messages(notes) -> list[str]:
    """The sentences of a list of notes (``{"message": …}`` or plain strings), each once."""
    return list(dict.fromkeys(n.get("message", "") if isinstance(n, dict) else str(n)
                              for n in notes or ()))


def _alone_differs(rows, total: str) -> bool:
    """Whether any construct's omega due to the construct alone differs, as
    shown, from its omega ``total`` (a general factor or cross-loadings take a share)."""
    return any(coef(r.get("omega_construct"), 2) != coef(r.get(total), 2) for r in rows)


def _reliability_minimum_note(coefficient: str) -> str:
    return (f"{MEETS}/{MISSES}: {coefficient} at least / below {coef(RELIABILITY_MINIMUM, 2)}, a "
            f"common minimum for research use ({RELIABILITY_SOURCE}); decisions about "
            "individuals need more.")


def _with_interval(value, pair) -> str:
    """``.86 [.63, .96]``; one dash when there is no value (not a dash for each part)."""
    return DASH if value is None else f"{coef(value, 2)} {interval(pair, 2)}"


def reliability_table(m: dict, prefix: str) -> Table:
    """Per construct: alpha and omega, each with its 95% interval, and H; the
    part of omega due to the construct alone where a general factor makes it
    differ from omega; the notes the reliability keys carry are the table's notes."""
    rows = []
    alone = _alone_differs(m["reliability"], "omega")
    for r in m["reliability"]:
        omega = r.get("omega")
        rows.append((_h(r["construct"]), _c(count(r.get("n_items"))),
                     _c(_with_interval(r.get("alpha"), r.get("alpha_ci95"))),
                     _marked(omega, None if omega is None else omega >= RELIABILITY_MINIMUM,
                             _with_interval(omega, r.get("omega_ci95"))))
                    + ((_c(coef(r.get("omega_construct"), 2)),) if alone else ())
                    + (_c(coef(r.get("coefficient_h"), 2)),))
    notes = ["Alpha (Cronbach 1951) with the Feldt interval (Feldt, Woodruff & Salih 1987); "
             "omega total from the fitted model (McDonald 1999) with a delta-method interval on "
             "the logit scale; "
             "coefficient H (Hancock & Mueller 2001). " + _reliability_minimum_note("omega")]
    if alone:
        notes.append("Omega, construct alone: the part of omega due to the construct itself, "
                     "without the general factor its items also load on.")
    notes += _messages(n for r in m["reliability"] for n in r.get("notes") or ())
    return Table(f"{prefix}-reliability", f"Reliability of the constructs of ‘{m['name']}’",
                 ("Construct", "Items", "Alpha [95% CI]", "Omega [95% CI]")
                 + (("Omega, construct alone",) if alone else ()) + ("H",), tuple(rows),
                 tuple(notes))


def ordinal_reliability_table(m: dict, prefix: str) -> Table:
    """Per construct whose items are all ordinal (``reliability_ordinal``):
    ordinal alpha; categorical omega, marked at the conventional minimum; the
    part due to the construct alone where it differs; categorical omega over
    the observed sum-score variance.  The notes the rows carry are the
    table's notes."""
    return _kind_reliability_table(
        m, prefix, kind="ordinal", alpha_key="ordinal_alpha",
        columns=("Ordinal alpha", "Categorical omega"),
        alone_column="Categorical omega, construct alone",
        after=(("omega_total_observed", "Categorical omega, observed variance"),),
        note="Ordinal alpha: alpha of the polychoric correlations (Zumbo, Gadermann & Zeisser "
             "2007), the reliability of the sum of the items' latent responses, not of the "
             "observed sum score. Categorical omega: the reliability of the observed sum of "
             "category scores (0, 1, … per item, merged categories counted as the category "
             "they were merged into) from the fitted model (Green & Yang 2009); with the "
             "observed variance, the same true-score variance over the sample variance of the "
             "sum score of the rows that answered every item of the construct. "
             + _reliability_minimum_note("categorical omega"),
        alone_note="Categorical omega, construct alone: the part due to the construct "
                   "itself, without the other factors its items load on.")


def continuous_reliability_table(m: dict, prefix: str) -> Table:
    """Per construct whose items are all continuous in a model fitted to
    correlations (``reliability_continuous``): alpha of the standardized
    items and omega, marked at the conventional minimum, with the part due to
    the construct alone where it differs; the rows' notes are the table's."""
    return _kind_reliability_table(
        m, prefix, kind="continuous", alpha_key="alpha_standardized",
        columns=("Alpha, standardized items", "Omega"),
        alone_column="Omega, construct alone", after=(),
        note="The model was fitted to correlations, so these coefficients are those of the sum "
             "of standardized item scores: alpha of the items' Pearson correlations (Cronbach "
             "1951) and omega total from the standardized solution (McDonald 1999). "
             + _reliability_minimum_note("omega"),
        alone_note="Omega, construct alone: the part of omega due to the construct itself, "
                   "without the other factors its items load on.")


def _kind_reliability_table(m: dict, prefix: str, *, kind: str, alpha_key: str,
                            columns: tuple[str, str], alone_column: str,
                            after: tuple[tuple[str, str], ...], note: str,
                            alone_note: str) -> Table:
    """The reliability table of the constructs whose items are all of one
    ``kind`` (``reliability_<kind>``): construct, items, the alpha and omega
    ``columns``, the construct-alone omega where it differs, then the
    ``after`` (key, column) pairs; the rows' notes follow the table's."""
    entries = m[f"reliability_{kind}"]
    alone = _alone_differs(entries, "omega_total")
    rows = _reliability_by_kind_rows(entries, alpha_key, alone,
                                     after=tuple(key for key, _ in after))
    notes = [note] + ([alone_note] if alone else [])
    notes += _messages(n for r in entries for n in r.get("notes") or ())
    return Table(f"{prefix}-reliability-{kind}",
                 f"Reliability of the constructs measured by {kind} items in ‘{m['name']}’",
                 ("Construct", "Items") + columns + ((alone_column,) if alone else ())
                 + tuple(column for _, column in after), tuple(rows), tuple(notes))


def _reliability_by_kind_rows(entries, alpha_key: str, alone: bool, after=()) -> list:
    """Rows of the per-kind reliability tables: construct, items, the alpha
    under ``alpha_key``, omega total marked at the conventional minimum, the
    construct-alone omega when ``alone``, then the coefficients ``after``."""
    rows = []
    for r in entries:
        omega = r.get("omega_total")
        rows.append((_h(r["construct"]), _c(count(len(r.get("items") or ()))),
                     _c(coef(r.get(alpha_key), 2)),
                     _marked(omega, None if omega is None else omega >= RELIABILITY_MINIMUM,
                             coef(omega, 2)))
                    + ((_c(coef(r.get("omega_construct"), 2)),) if alone else ())
                    + tuple(_c(coef(r.get(key), 2)) for key in after))
    return rows


def item_analysis_table(m: dict, prefix: str) -> Table:
    """Per item of each construct: corrected item–total correlation, and alpha
    and omega of the construct without the item, marked where they exceed
    the construct's value with it."""
    rows = []
    for r in m["reliability"]:
        for it in r.get("items") or ():
            cells = [_h(it["item"]), Cell(r["construct"], css="text"),
                     _c(coef(it.get("item_total_r"), 2))]
            for key in ("alpha", "omega"):
                value, whole = it.get(f"{key}_if_dropped"), r.get(key)
                higher = value is not None and whole is not None and value > whole
                cells.append(Cell(coef(value, 2), mark=RISES if higher else "",
                                  css="flag" if higher else ""))
            rows.append(tuple(cells))
    return Table(f"{prefix}-item-analysis", f"Item analysis of ‘{m['name']}’",
                 ("Item", "Construct", "Item–total r", "Alpha without the item",
                  "Omega without the item"), tuple(rows),
                 ("Item–total r: the item's correlation with the sum of the other items of its "
                  "construct. Omega without the item comes from the model refitted without it. "
                  f"{RISES} higher than the construct's coefficient with all its items (previous "
                  "table): by this coefficient alone the scale would gain from dropping the "
                  "item, which says nothing about what the item adds to the content.",),
                 left=2)


def _met(conventions, name: str | None = None) -> bool | None:
    """Whether a value meets its convention, as the result dict says: the
    convention called ``name``, else the strictest (lowest threshold) given."""
    if isinstance(conventions, dict):
        conventions = [conventions]
    chosen = [c for c in conventions or () if name is None or c.get("name") == name]
    if not chosen:
        return None
    return min(chosen, key=lambda c: c.get("threshold", 0.0)).get("met")


def validity_table(m: dict, prefix: str) -> Table:
    """AVE (marked by its convention) and composite reliability per construct."""
    v = m["validity"]
    ave, cr = v.get("ave", {}), v.get("composite_reliability", {})
    conventions = v.get("conventions") or {}
    rows = [(_h(c), _marked(ave.get(c), _met(conventions.get(c), "AVE"), coef(ave.get(c), 2)),
             _c(coef(cr.get(c), 2))) for c in dict.fromkeys([*ave, *cr])]
    return Table(f"{prefix}-validity", f"Average variance extracted of ‘{m['name']}’",
                 ("Construct", "AVE", "Composite reliability"), tuple(rows),
                 (f"{MEETS}/{MISSES}: AVE at least / below .50, the convention of Fornell & "
                  "Larcker (1981): the construct explains at least half of its items' variance.",))


def fornell_larcker_table(m: dict, prefix: str) -> Table:
    """Each pair of constructs: their correlation beside the two √AVE, marked by
    the Fornell–Larcker convention as the result dict states it."""
    rows = [(_h(r["a"]), Cell(r["b"], css="text"),
             _marked(r.get("correlation"), _met(r.get("convention")), coef(r.get("correlation"), 2)),
             _c(coef(r.get("sqrt_ave_a"), 2)), _c(coef(r.get("sqrt_ave_b"), 2)))
            for r in m["validity"]["fornell_larcker"]]
    return Table(f"{prefix}-fornell-larcker", f"Correlations against √AVE in ‘{m['name']}’",
                 ("Construct", "With", "Correlation", "√AVE (construct)", "√AVE (with)"),
                 tuple(rows),
                 (f"{MEETS}/{MISSES}: the correlation is / is not smaller in size than both √AVE, "
                  "the convention of Fornell & Larcker (1981) for distinct constructs.",),
                 left=2)


def htmt_table(m: dict, prefix: str) -> Table:
    rows = []
    for r in m["validity"]["htmt"]:
        value = r.get("value")
        rows.append((_h(r["a"]), Cell(r["b"], css="text"),
                     _marked(value, _met(r.get("conventions")), coef(value, 2))))
    return Table(f"{prefix}-htmt", f"Heterotrait–monotrait ratios in ‘{m['name']}’",
                 ("Construct", "With", "HTMT"), tuple(rows),
                 (f"{MEETS}/{MISSES}: below / not below the stricter of the conventions of "
                  "Henseler, Ringle & Sarstedt (2015), .85 for distinct constructs (.90 for "
                  "conceptually similar ones).",), left=2)


def with_notes(table: Table, notes) -> Table:
    """``table`` with the sentences of ``notes`` added to its notes."""
    return replace(table, notes=table.notes + tuple(_messages(notes)))


def bifactor_table(coefficients: dict, key: str, title: str) -> Table:
    rows = [(_h(f"total score ({coefficients.get('general', 'general')})"),
             _c(coef(coefficients.get("omega_total"), 2)),
             _c(coef(coefficients.get("omega_hierarchical"), 2)), _c(DASH),
             _c(coef(coefficients.get("h"), 2)))]
    for s in coefficients.get("subscales", ()):
        rows.append((_h(s["factor"]), _c(coef(s.get("omega_subscale"), 2)),
                     _c(coef(s.get("general_share"), 2)),
                     _c(coef(s.get("omega_hierarchical_subscale"), 2)), _c(coef(s.get("h"), 2))))
    return Table(key, title, ("Score", "Omega", "Share of the general factor",
                              "Share of the specific factor", "H"), tuple(rows),
                 (f"Explained common variance (ECV) {coef(coefficients.get('ecv'), 2)}; percent "
                  f"of uncorrelated item pairs (PUC) {coef(coefficients.get('puc'), 2)}; relative "
                  f"omega {coef(coefficients.get('relative_omega'), 2)}. Omega hierarchical is "
                  "the share of the general factor in the total score (Rodriguez, Reise & "
                  "Haviland 2016).",))


def hints_table(m: dict, prefix: str) -> Table:
    hints = m["modification_hints"]
    rows = []
    for h in hints[:MAX_HINT_ROWS]:
        what = (f"{h.get('item')} on {h.get('construct')}" if h.get("kind") == "loading"
                else f"{h.get('item_a')} with {h.get('item_b')}")
        kind = "loading" if h.get("kind") == "loading" else "residual covariance"
        rows.append((_h(what), Cell(kind, css="text"), _c(dec(h.get("mi"), 1)),
                     _c(dec(h.get("epc"))), _c(coef(h.get("std_epc"), 2)),
                     Cell(h.get("reading", ""), css="text prose")))
    notes = m.get("modification_hint_notes") or {}
    more = (f"The {len(hints) - MAX_HINT_ROWS} weaker hints listed in the JSON file are left out "
            "here." if len(hints) > MAX_HINT_ROWS else None)
    return Table(f"{prefix}-hints", f"Modification hints for ‘{m['name']}’, strongest first",
                 ("Parameter", "Kind", "MI", "EPC", "Std. EPC", "Reading"), tuple(rows),
                 tuple(n for n in (notes.get("not_converged"), notes.get("statistic"),
                                   notes.get("caution"), notes.get("judging"), more) if n),
                 left=2)


def residual_correlations_table(m: dict, prefix: str) -> Table:
    res = m["residual_correlations"]
    largest = res.get("largest", ())
    shown = largest[:MAX_RESIDUAL_ROWS]
    with_z = any(r.get("standardized") is not None for r in shown)
    rows = []
    for r in shown:
        flagged = r.get("flagged")
        rows.append((_h(r["a"]), Cell(r["b"], css="text"),
                     Cell(coef(r["value"], 2), mark="◆" if flagged else "",
                          css="flag" if flagged else ""))
                    + ((_c(dec(r.get("standardized"), 2)),) if with_z else ()))
    return Table(f"{prefix}-residual-correlations",
                 f"Largest residual correlations of ‘{m['name']}’",
                 ("Item", "With", "Residual correlation") + (("z",) if with_z else ()),
                 tuple(rows),
                 ("Observed minus model-implied correlation"
                  + (f" (observed: the {res['observed']})" if res.get("observed") else "")
                  + "; ◆ at or beyond "
                  f"|{coef(res.get('threshold'), 2)}| (a common rule of thumb)."
                  + (" z: the standardized residual." if with_z else
                     " Standardized residuals were not computed for this model"
                     + (f": {res['standardized_not_computed']}."
                        if res.get("standardized_not_computed") else "."))
                  + (f" The {len(largest) - MAX_RESIDUAL_ROWS} smaller ones listed in the JSON "
                     "file are left out here." if len(largest) > MAX_RESIDUAL_ROWS else ""),),
                 left=2)


def item_review_table(m: dict, prefix: str) -> Table:
    """One row per reason an item is flagged; rows after an item's first show
    its name muted (it stays in every row for the CSV)."""
    rows = []
    for r in m["item_review"]:
        details = r.get("details") or [{"text": f} for f in r.get("flags", ())]
        for k, d in enumerate(details):
            rows.append((Cell(r["item"], header=True, css="cont" if k else ""),
                         Cell(d.get("text", ""), css="text prose")))
    return Table(f"{prefix}-item-review", f"Items to look at in ‘{m['name']}’",
                 ("Item", "Why"), tuple(rows), left=2)


def refinement_table(m: dict, prefix: str) -> Table:
    ref = m["refinement"]
    constructs = list(dict.fromkeys(c for s in ref.get("steps", ())
                                    for c in (s.get("reliability") or {})))
    rows = []
    for k, s in enumerate(ref.get("steps", ())):
        fit = s.get("fit") or {}
        rel = s.get("reliability") or {}
        rows.append((_h(str(k)), Cell(s.get("removed") or "none (as specified)", css="text"),
                     _c(coef(fit.get("cfi"))), _c(coef(fit.get("rmsea"))),
                     _c(coef(fit.get("srmr"))), *[_c(coef(rel.get(c), 2)) for c in constructs]))
    notes = tuple(n for n in (ref.get("note"), ref.get("structure_note"), ref.get("stopped"))
                  if n)
    return Table(f"{prefix}-refinement", f"A refinement path for ‘{m['name']}’ (a suggestion)",
                 ("Step", "Item removed", "CFI", "RMSEA", "SRMR",
                  *[f"Alpha {c}" for c in constructs]), tuple(rows), notes, left=2)


def thresholds_table(m: dict, prefix: str) -> Table:
    data = m["thresholds"]
    entries = data if isinstance(data, list) else [{"item": k, "values": v} for k, v in data.items()]
    width = max((len(e.get("values") or e.get("thresholds") or ()) for e in entries), default=0)
    rows = []
    for e in entries:
        values = list(e.get("values") or e.get("thresholds") or ())
        rows.append((_h(e["item"]), *[_c(dec(v, 2)) for v in values],
                     *[_c("") for _ in range(width - len(values))]))
    return Table(f"{prefix}-thresholds", f"Item thresholds in ‘{m['name']}’",
                 ("Item", *[f"τ{k + 1}" for k in range(width)]), tuple(rows))


def model_tables(m: dict, index: int, standard_errors: str = "") -> dict[str, Table]:
    """Every table of one model whose key is present, in document order.

    ``standard_errors`` is the sentence under the loadings saying where the
    standard errors come from.  The notes the validity key carries go under
    the last of its tables."""
    prefix = f"m{index}-{slug(m['name'])}"
    out = {"loadings": loadings_table(m, prefix, standard_errors),
           "matrix": loading_matrix(m, prefix)}
    if m.get("higher_order_paths"):
        out["paths"] = paths_table(m, prefix)
    if m.get("construct_correlations"):
        out["correlations"] = correlations_table(m, prefix)
    out["residuals"] = residuals_table(m, prefix)
    if m.get("residual_covariances"):
        out["residual_covariances"] = residual_covariances_table(m, prefix)
    if m.get("thresholds"):
        out["thresholds"] = thresholds_table(m, prefix)
    if m.get("reliability"):
        out["reliability"] = reliability_table(m, prefix)
        if any(r.get("items") for r in m["reliability"]):
            out["item_analysis"] = item_analysis_table(m, prefix)
    if m.get("reliability_ordinal"):
        out["reliability_ordinal"] = ordinal_reliability_table(m, prefix)
    if m.get("reliability_continuous"):
        out["reliability_continuous"] = continuous_reliability_table(m, prefix)
    if m.get("validity"):
        validity = m["validity"]
        last = None
        if validity.get("ave") or validity.get("composite_reliability"):
            out["validity"] = validity_table(m, prefix)   # not a header without rows
            last = "validity"
        if validity.get("fornell_larcker"):
            last = "fornell_larcker"
            out["fornell_larcker"] = fornell_larcker_table(m, prefix)
        if validity.get("htmt"):
            last = "htmt"
            out["htmt"] = htmt_table(m, prefix)
        if last is not None:
            out[last] = with_notes(out[last], validity.get("notes"))
    if isinstance(m.get("bifactor"), dict):
        out["bifactor"] = with_notes(
            bifactor_table(m["bifactor"], f"{prefix}-bifactor",
                           f"General and specific factors in ‘{m['name']}’"),
            m["bifactor"].get("notes"))
    if isinstance(m.get("higher_order"), dict) and m["higher_order"].get("coefficients"):
        coefficients = m["higher_order"]["coefficients"]
        out["higher_order"] = with_notes(
            bifactor_table(coefficients, f"{prefix}-higher-order",
                           f"The higher-order factor of ‘{m['name']}’ in its Schmid–Leiman form"),
            coefficients.get("notes"))
    if m.get("modification_hints"):
        out["hints"] = hints_table(m, prefix)
    if (m.get("residual_correlations") or {}).get("largest"):
        out["residual_correlations"] = residual_correlations_table(m, prefix)
    if m.get("item_review"):
        out["item_review"] = item_review_table(m, prefix)
    if (m.get("refinement") or {}).get("steps"):
        out["refinement"] = refinement_table(m, prefix)
    return out


# --------------------------------------------------------------------------- data

def screening_table(report: dict) -> Table:
    wording = {i["name"]: i.get("wording") for i in report["study"].get("items", ())}
    reverse = {i["name"] for i in report["study"].get("items", ()) if i.get("reverse")}
    rows = []
    for it in report["data"]["screening"]["items"]:
        name = it["item"] + (" (R)" if it["item"] in reverse else "")
        rows.append((_h(name), Cell(wording.get(it["item"]) or "", css="text prose"),
                     _c(count(it.get("n"))), _c(percent(it.get("pct_missing"))),
                     _c(dec(it.get("mean"), 2)), _c(dec(it.get("sd"), 2)),
                     _c(dec(it.get("skewness"), 2)), _c(dec(it.get("excess_kurtosis"), 2)),
                     Cell(frequency_text(it.get("frequencies") or {}), css="chart",
                          chart=frequency_chart(it.get("frequencies") or {}))))
    return Table("items", "The items: wording, answers and distribution",
                 ("Item", "Wording", "n", "Missing", "Mean", "SD", "Skewness", "Excess kurtosis",
                  "Answers per category"),
                 tuple(rows),
                 (("(R) reverse-keyed: answers were turned round before analysis. " if reverse
                   else "") + "n counts the answers given; statistics "
                  + ("after reverse keying and " if reverse else "")
                  + "before any row was left out.",),
                 left=2)


def mardia_table(report: dict) -> Table:
    m = report["data"]["screening"]["mardia"]
    rows = ((_h("Skewness"), _c(dec(m.get("skewness"), 2)),
             _c(f"χ²({dof(m.get('skewness_df'))}) = {dec(m.get('skewness_chi2'), 1)}"),
             _c(pval(m.get("skewness_p")))),
            (_h("Kurtosis"), _c(dec(m.get("kurtosis"), 2)), _c(f"z = {dec(m.get('kurtosis_z'), 2)}"),
             _c(pval(m.get("kurtosis_p")))))
    p, n = m.get("p"), m.get("n")
    expected = p * (p + 2) * (n - 1) / (n + 1) if p and n else None
    note = (f"Mardia (1970), on the {count(n)} rows that answer every item. Under "
            f"multivariate normality the kurtosis averages p(p + 2)(n − 1)/(n + 1) = "
            f"{dec(expected, 2) if expected else DASH}; its z uses this exact mean and the "
            "exact variance (Mardia, 1974).")
    return Table("mardia", "Multivariate normality (Mardia's coefficients)",
                 ("Coefficient", "Value", "Test", "p"), tuple(rows), (note,))


def _decision(decision) -> Cell:
    """An invariance step's decision in brief, marked; the full wording is
    listed under the table (see :func:`scalewright.report.document`)."""
    holds = decision.get("holds") if isinstance(decision, dict) else None
    if holds is None:
        return Cell("reference" if isinstance(decision, dict) else DASH, css="text")
    return Cell("holds" if holds else "does not hold", mark=MEETS if holds else MISSES,
                css="text " + ("meets" if holds else "misses"))


def invariance_table(report: dict) -> Table:
    """One row per step: fit, its change from the step before, the difference
    test and the decision in brief."""
    rows = []
    for s in report["invariance"]:
        fit = s.get("fit") or {}
        delta = s.get("delta") or {}
        test = s.get("difference_test") or {}
        binary = s.get("two_category_items") or {}
        step = (str(s.get("label") or s.get("step", "")) + (" (partial)" if s.get("partial")
                                                            else "")
                + (f"; for two-category items: {binary['adds']}" if binary.get("adds") else ""))
        rows.append((_h(step), _c(dec(fit.get("chi_square"), 2)),
                     _c(str(fit.get("df", DASH))), _c(coef(fit.get("cfi"))),
                     _c(coef(fit.get("rmsea"))), _c(coef(fit.get("srmr"))),
                     _c(coef(delta.get("cfi"))), _c(coef(delta.get("rmsea"))),
                     _c(coef(delta.get("srmr"))), _c(dec(test.get("chi_square"), 2)),
                     _c(str(test.get("df", DASH))), _c(pval(test.get("p_value"))),
                     _decision(s.get("decision"))))
    setup = report.get("invariance_setup") or {}
    skipped = [f"The step ‘{x['label']}’ was not fitted: {x['reason']}."
               for x in setup.get("skipped_steps") or ()]
    return Table("invariance", "Measurement invariance, step by step",
                 ("Step", "χ²", "df", "CFI", "RMSEA", "SRMR", "ΔCFI", "ΔRMSEA", "ΔSRMR",
                  "Δχ²", "Δdf", "p", "Decision"), tuple(rows),
                 ("Decisions follow the change criteria of Cheung & Rensvold (2002) and Chen "
                  "(2007), which are conventions; each decision is given in full below the "
                  "table. (partial): some equality constraints of the step were released.",
                  *skipped),
                 css="wide")


def latent_means_table(report: dict) -> Table:
    """Latent mean differences between groups under the invariance reached."""
    rows = [(_h(r["construct"]), Cell(str(r.get("group")), css="text"),
             Cell(str(r.get("reference")), css="text"), _c(dec(r.get("estimate"))),
             _c(dec(r.get("se"))), _c(dec(r.get("z"), 2)), _c(pval(r.get("p_value"))),
             _c(dec(r.get("std_difference"), 2)))
            for r in report["latent_means"]]
    notes = [n for n in (report.get("latent_comparison_note"),) if n]
    notes.append("Difference: the group's latent mean minus the reference group's, which is "
                 "fixed at 0. Standardized: the difference divided by the latent standard "
                 "deviation pooled over the two groups, weighted by their size (Hancock 2001)."
                 + (" The latent variances and correlations of each group are in the JSON file."
                    if report.get("latent_variances") or report.get("latent_correlations")
                    else ""))
    return Table("latent-means", "Latent means compared between groups",
                 ("Construct", "Group", "Reference", "Difference", "SE", "z", "p",
                  "Standardized"), tuple(rows), tuple(notes), left=3)


def missing_patterns_table(report: dict) -> Table:
    """The most frequent patterns of unanswered items, as the result dict lists them."""
    missing = report["data"]["missing"]
    patterns = missing.get("patterns") or []
    rows = [(_h(", ".join(p["missing"]) if p["missing"] else "none (every item answered)"),
             _c(count(len(p["missing"]))), _c(count(p.get("n")))) for p in patterns]
    covered = sum(p.get("n", 0) for p in patterns)
    note = (f"The {count(len(patterns))} most frequent of the {count(missing.get('n_patterns'))} "
            f"patterns of unanswered items; together they hold {count(covered)} of the "
            f"{count(missing.get('n_rows'))} rows.")
    return Table("missing-patterns", "Most frequent patterns of missing answers",
                 ("Items not answered", "Number of items", "Rows"), tuple(rows), (note,))


def outliers_table(report: dict) -> Table:
    """The most distant rows flagged by Mahalanobis distance, as the result dict lists them."""
    found = report["data"]["outliers"]
    rows = [(_h(str(r["row"])), _c(dec(r["d2"], 1)), _c(pval(r["p_value"])))
            for r in found["largest"]]
    note = (f"Rows answering every item ({count(found['n_checked'])}); flagged when D² exceeds "
            f"{dec(found['threshold'], 1)}, the chi-square quantile at p < .001 (Tabachnick & "
            "Fidell 2013). Flagged rows were kept in the analysis.")
    return Table("outliers", "Rows far from the others (Mahalanobis distance)",
                 ("Row", "D²", "p"), tuple(rows), (note,))


#: the correlation matrix is printed for at most this many items (else: in the JSON file)
CORRELATION_TABLE_MAX_ITEMS = 30


def correlation_table(report: dict) -> Table:
    """The item correlation matrix (lower triangle), for reanalysis."""
    corr = report["data"]["correlations"]
    items, matrix = corr["items"], corr["matrix"]
    rows = [tuple([_h(items[i])] + [_c(coef(matrix[i][j], 2)) if j < i else _c("1" if j == i else "")
                                    for j in range(len(items))]) for i in range(len(items))]
    note = (f"Pearson correlations after reverse keying; {corr['basis']}. With the means and "
            "standard deviations of the item table they allow the models to be refitted.")
    return Table("correlations", "Item correlations", ("Item", *items), tuple(rows), (note,))


def checklist_table(rows: list[dict]) -> Table:
    cells = [(_h(str(r["number"])), Cell(r["line"], css="text prose"),
              Cell(r["status"], css=f"text status-{r['status'].split()[0]}"),
              Cell(r["where"], css="text prose")) for r in rows]
    return Table("checklist", "Reporting checklist: where each line is answered",
                 ("#", "What a reviewer looks for", "Status", "Where / what to add"), tuple(cells),
                 ("Lines merged from published reporting guidelines for confirmatory factor "
                  "analysis (Jackson, Gillaspy & Purc-Stephenson 2009; Schreiber et al. 2006; "
                  "Appelbaum et al. 2018; Hoyle & Isherwood 2013; AERA, APA & NCME 2014; "
                  "COSMIN).",), left=4)


# --------------------------------------------------------------------------- export

#: a file in a tables folder listing what scalewright wrote there
MANIFEST = ".scalewright-tables"


def check_tables_folder(folder: Path) -> None:
    """Refuse a tables folder that is a file or holds files scalewright did not
    write (its own reports count as its own: --out and --tables may name the
    same folder); called before the check runs and again before writing."""
    check_folder(folder, "--tables", "tables folder", "tables")
    if folder.is_dir() and not (folder / MANIFEST).exists() and not all(
            written_by_scalewright(path) for path in folder.iterdir()):
        raise StudyError(f"{folder}: this folder already holds files that scalewright did not "
                         "write, so the tables will not be written there. Give --tables a new "
                         "or empty folder.")


def write_tables(tables, folder: Path) -> list[Path]:
    """Write each table as ``NN-key.csv`` and ``NN-key.md`` into ``folder``.

    The folder must be new, empty, hold only scalewright's reports, or be one
    scalewright wrote tables into before (it holds the manifest file
    :data:`MANIFEST`); the tables of the earlier run are replaced.  Any other
    folder is refused with a StudyError (:func:`check_tables_folder`), so that
    no file scalewright did not write is overwritten.
    Returns the paths written, in table order.
    """
    folder = Path(folder)
    manifest = folder / MANIFEST
    check_tables_folder(folder)
    folder.mkdir(parents=True, exist_ok=True)
    if manifest.exists():
        for name in manifest.read_text(encoding="utf-8").split():
            old = folder / Path(name).name
            if old.is_file():
                old.unlink()
    written = []
    for t in tables:
        stem = f"{t.number:02d}-{t.key}"
        for suffix, text in (("csv", t.to_csv()), ("md", t.to_markdown())):
            path = folder / f"{stem}.{suffix}"
            path.write_text(text, encoding="utf-8")
            written.append(path)
    manifest.write_text("".join(f"{p.name}\n" for p in written), encoding="utf-8")
    return written
