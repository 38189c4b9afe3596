"""Words generated from the numbers: the plain-language summary, a sentence
fit for an abstract, the methods paragraph and the cautions.

Every sentence here is built from values in the result dict and says no
more than they do: the models are compared ("the indices favour"), never
proclaimed true; cutoffs are called conventions; where criteria disagree
the text says so and leaves the choice to the researcher.
"""

from __future__ import annotations

from scalewright.report.conventions import (FIT_CUTOFFS, HU_BENTLER, RELIABILITY_MINIMUM,
                                            RELIABILITY_SOURCE, SALIENCE, shown_fit)
from scalewright.report.formatting import coef, count, dec, dof, interval, p_equals
from scalewright.report.references import residual_z_routes
from scalewright.residuals import (Z_DISTRIBUTION_FREE, Z_DWLS, Z_FIML, Z_NORMAL,
                                   Z_ROBUST_FIML)

#: how missing answers were handled, in words, by the codes of scalewright.methods
MISSING_HANDLING = {
    "full-information": "full-information maximum likelihood (every answer given counts)",
    "listwise": "listwise deletion (only respondents who answered every item)",
    "pairwise": "pairwise use (each correlation from everyone who answered both items)",
    "none": "none needed (no answer is missing)",
}

#: the DWLS difference test (scalewright.dwls_difference), named alike for rival models and
#: for ordinal invariance steps
DWLS_DIFFERENCE_WORDS = ("the adjusted difference test applied to the DWLS statistics "
                         "(Satorra, 2000), as Asparouhov and Muthén (2006) describe it for "
                         "robust WLS estimators, scaled and shifted to the mean and variance of "
                         "chi-square on the difference in degrees of freedom as in Asparouhov "
                         "and Muthén (2010)")

#: how the z values of each basis divide the residual (scalewright.residuals.Z_BASES), in words
_Z_ROUTES = (
    (Z_NORMAL, "under normal-theory ML the variance of the sample covariance less that of the "
               "implied one"),
    (Z_DISTRIBUTION_FREE, "under robust ML the distribution-free variance of the residual "
                          "(Browne, 1984), which does not assume normal answers"),
    (Z_DWLS, "under DWLS the variance of the residual from the sampling covariance of the "
             "polychoric correlations (Muthén, 1984; Browne, 1984)"),
    (Z_FIML, "with missing answers the variance of the saturated model's covariance less that "
             "of the implied one, both estimated by maximum likelihood (Hausman, 1978)"),
    (Z_ROBUST_FIML, "under robust full-information ML the variance of the difference from the "
                    "casewise scores of both estimates (Yuan & Bentler, 2000), which does not "
                    "assume normal answers"),
)

_NUMBERS = ("no", "one", "two", "three", "four", "five", "six", "seven", "eight", "nine", "ten")


def _number(n: int) -> str:
    return _NUMBERS[n] if 0 <= n < len(_NUMBERS) else count(n)


def _names(names) -> str:
    quoted = [f"‘{n}’" for n in names]
    if len(quoted) <= 2:
        return " and ".join(quoted)
    return ", ".join(quoted[:-1]) + " and " + quoted[-1]


def _plain_list(words) -> str:
    words = list(words)
    return words[0] if len(words) == 1 else ", ".join(words[:-1]) + " and " + words[-1]


def missing_handling(report: dict) -> str:
    """How missing answers were handled, in words (the code itself if it is not known)."""
    code = report["data"].get("missing_handling")
    return MISSING_HANDLING.get(code, str(code) if code else "not stated")


def standard_errors(report: dict) -> str:
    """Where the standard errors come from, by the method the check chose
    (``report["method"]``): robust routes use the sandwich, full-information
    ML the observed information, complete-data normal ML the expected
    information.  Empty when the result dict does not name the method."""
    method = report.get("method") or {}
    if method.get("estimator") in ("robust", "ordinal", "mixed"):
        return "Standard errors are robust (sandwich) standard errors."
    if method.get("missing_handling") == "full-information":
        return ("Standard errors from the observed information, which stays consistent when "
                "answers are missing at random.")
    if method.get("estimator") == "normal":
        return "Standard errors from the expected information."
    return ""


def little_sentence(report: dict) -> str | None:
    """Little's (1988) MCAR test in words, with what it can and cannot show;
    ``None`` when the test was not run (no answer missing)."""
    test = (report["data"].get("missing") or {}).get("little_mcar")
    if not test:
        return None
    p = test.get("p_value")
    verdict = ("rejects" if p is not None and p < 0.05 else "does not reject")
    return (f"Little's (1988) test {verdict} that the answers are missing completely at random "
            f"(χ²({dof(test.get('df'))}) = {dec(test.get('chi_square'), 2)}, {p_equals(p)}, "
            f"{count(test.get('n_patterns'))} patterns). The test concerns MCAR only: not "
            "rejecting it does not show that answers are missing completely at random, and no "
            "test on these data can show that they are missing at random (MAR), the weaker "
            "assumption full-information maximum likelihood needs; that rests on knowing why "
            "answers are missing.")


def _models(report: dict) -> dict:
    return {m["name"]: m for m in report.get("models", ())}


def _rows(report: dict) -> list[dict]:
    return (report.get("comparison") or {}).get("models", [])


def _first_name(report: dict) -> str | None:
    for row in _rows(report):
        if row.get("first"):
            return row["name"]
    return None


def equivalent_groups(report: dict) -> list[set]:
    """Sets of models that nested tests found equivalent (0 df difference)."""
    groups: list[set] = []
    for t in (report.get("comparison") or {}).get("nested_tests", ()):
        if t.get("df") == 0:
            pair = {t["restricted"], t["general"]}
            joined = [g for g in groups if g & pair]
            for g in joined:
                groups.remove(g)
                pair |= g
            groups.append(pair)
    return groups


def favoured(report: dict) -> dict:
    """Which model(s) the information criteria favour.

    Returns ``{"bic": [names], "bic_weight": w, "aic": name | None, "focus": name}``:
    the lowest-BIC model together with any model equivalent to it, their
    summed BIC weight, the lowest-AIC model, and the model the summary
    describes in detail (the BIC favourite; among equivalent models the one
    specified first, else the first in the file).  Without a comparison the
    focus is the model specified first, else the first model.
    """
    models = report.get("models", [])
    rows = [r for r in _rows(report) if r.get("bic_weight") is not None]
    first = _first_name(report)
    if not rows:
        focus = first or (models[0]["name"] if models else None)
        return {"bic": [], "bic_weight": None, "aic": None, "focus": focus}
    best = min(rows, key=lambda r: r["bic"])
    group = next((g for g in equivalent_groups(report) if best["name"] in g), {best["name"]})
    names = [r["name"] for r in rows if r["name"] in group]
    weight = sum(r["bic_weight"] for r in rows if r["name"] in group)
    aic = min(rows, key=lambda r: r["aic"])["name"]
    focus = first if first in names else names[0]
    return {"bic": names, "bic_weight": weight, "aic": aic, "focus": focus}


def _fit_phrase(fit: dict) -> str:
    return (f"CFI = {coef(fit.get('cfi'))}, TLI = {coef(fit.get('tli'))}, RMSEA = "
            f"{coef(fit.get('rmsea'))} {interval(fit.get('rmsea_ci90'))} and SRMR = "
            f"{coef(fit.get('srmr'))}")


def _chi_phrase(fit: dict) -> str:
    return f"χ² = {dec(fit.get('chi_square'), 2)}, df = {fit.get('df')}, {p_equals(fit.get('p_value'))}"


def _against_cutoffs(fit: dict) -> str:
    inside = [c.label for c in FIT_CUTOFFS if c.met(fit.get(c.index))]
    outside = [c.label for c in FIT_CUTOFFS if c.met(fit.get(c.index)) is False]
    if not outside:
        return f"all within the conventional cutoffs of {HU_BENTLER}"
    if not inside:
        return f"all outside the conventional cutoffs of {HU_BENTLER}"
    return (f"within the conventional cutoffs of {HU_BENTLER} for {_plain_list(inside)}, "
            f"outside them for {_plain_list(outside)}")


def weak_items(model: dict, salience: float = SALIENCE) -> list[str]:
    """Items whose standardized loading on their own first-order construct is
    below ``salience`` in absolute value."""
    first_order = {c["name"] for c in model.get("constructs", ()) if c.get("kind") == "construct"}
    return [row["item"] for row in model.get("loadings", ())
            if row.get("primary") and row["construct"] in first_order
            and row.get("std_estimate") is not None and abs(row["std_estimate"]) < salience]


def _comparison_paragraph(report: dict, fav: dict) -> str | None:
    comparison = report.get("comparison")
    if not comparison or not fav["bic"]:
        return None
    n = len(comparison["models"])
    if n < 2:                     # nothing to compare: a weight of 1 says nothing
        return None
    if len(fav["bic"]) > 1:
        text = (f"Of the {_number(n)} rival models, BIC favours {_names(fav['bic'])}, which are "
                f"equivalent here (they fit identically and cannot be told apart by the data); "
                f"together they carry a BIC weight of {coef(fav['bic_weight'], 2)}.")
    else:
        text = (f"Of the {_number(n)} rival models, BIC favours {_names(fav['bic'])} (BIC weight "
                f"{coef(fav['bic_weight'], 2)}).")
    close = [row["name"] for row in comparison["models"]
             if row["name"] not in fav["bic"] and row.get("delta_bic") is not None
             and row["delta_bic"] < 2.0]
    if close:
        text += (f" But {_names(close)} {'is' if len(close) == 1 else 'are'} within 2 BIC points "
                 "of it, which counts as weak evidence at most (Raftery 1995): BIC does not "
                 "really separate these models.")
    disagree = []
    if fav["aic"] not in fav["bic"]:
        disagree.append(f"AIC, which penalises extra parameters less, favours {_names([fav['aic']])}")
    for t in comparison.get("nested_tests", ()):
        if (t["restricted"] in fav["bic"] and t.get("p_value") is not None
                and t["p_value"] < 0.05):
            disagree.append(f"the chi-square difference test prefers {_names([t['general']])} to "
                            f"{_names([t['restricted']])} (Δχ² = {dec(t['chi_square'], 2)}, "
                            f"df = {t['df']}, {p_equals(t['p_value'])})")
    if disagree:
        text += (f" However, {'; '.join(disagree)}. The criteria disagree, so the choice "
                 "should rest on what the constructs are meant to be, not on these numbers alone.")
    return text


def _focus_paragraph(report: dict, fav: dict) -> str | None:
    name = fav["focus"]
    model = _models(report).get(name)
    if model is None:
        return None
    first = _first_name(report)
    role = (" (the model specified first)" if name == first
            else "" if first is None else f" (the model specified first was {_names([first])})")
    if not model.get("converged", True):
        return (f"‘{name}’{role} did not converge: its numbers should not be interpreted "
                "(see its section).")
    fit = shown_fit(model["fit"])
    p = fit.get("p_value")
    verdict = ("rejects exact fit" if p is not None and p < 0.05
               else "does not reject exact fit")
    return (f"‘{name}’{role} has {_fit_phrase(fit)}: {_against_cutoffs(fit)}. The chi-square "
            f"test {verdict} ({_chi_phrase(fit)}).")


def _reliability_paragraph(model: dict) -> str | None:
    """One sentence per kind of coefficient the model reports (omega or alpha
    for continuous items; categorical omega for constructs of ordinal items
    and omega of standardized scores for constructs of continuous items on
    the ordinal and mixed routes), each splitting the constructs at the
    conventional minimum."""
    name = model["name"]
    sentences = [_coefficient_sentence(what, name, named)
                 for what, named in _summary_coefficients(model) if named]
    if not sentences:
        return None
    return (f"{'; '.join(sentences)}; {coef(RELIABILITY_MINIMUM, 2)} "
            f"is a common minimum for research use, and decisions about individuals need more "
            f"({RELIABILITY_SOURCE}).")


def _summary_coefficients(model: dict) -> list[tuple[str, list]]:
    """(name of the coefficient, [(construct, value, interval or None)]) per kind."""
    rows = model.get("reliability")
    if rows:
        key = "omega" if any(row.get("omega") is not None for row in rows) else "alpha"
        return [(key.capitalize(), [(row["construct"], row[key], row.get(f"{key}_ci95"))
                                    for row in rows if row.get(key) is not None])]
    by_kind = (("reliability_ordinal", "Categorical omega"),
               ("reliability_continuous", "Omega of the standardized items"))
    return [(what, [(row["construct"], row["omega_total"], None)
                    for row in model.get(key) or () if row.get("omega_total") is not None])
            for key, what in by_kind]


def _coefficient_sentence(what: str, name: str, named: list) -> str:
    def shown(c, v, ci):
        return f"{c} ({coef(v, 2)}" + (f", 95% CI {interval(ci, 2)}" if ci else "") + ")"

    high = [shown(*x) for x in named if x[1] >= RELIABILITY_MINIMUM]
    low = [shown(*x) for x in named if x[1] < RELIABILITY_MINIMUM]
    parts = []
    if high:
        parts.append(f"at least {coef(RELIABILITY_MINIMUM, 2)} for {_plain_list(high)}")
    if low:
        parts.append(f"below it for {_plain_list(low)}" if high else
                     f"below {coef(RELIABILITY_MINIMUM, 2)} for {_plain_list(low)}")
    return f"{what} in ‘{name}’ is {' and '.join(parts)}"


def _strain_paragraph(model: dict) -> str | None:
    if not model.get("converged", True):     # the summary already says not to interpret it
        return None
    parts = []
    weak = weak_items(model)
    if weak:
        parts.append(f"{_plain_list(weak)} load{'s' if len(weak) == 1 else ''} below "
                     f"{coef(SALIENCE, 2)} on {'its' if len(weak) == 1 else 'their'} construct")
    hints = model.get("modification_hints") or []
    if hints:
        h = hints[0]
        what = (f"a loading of {h['item']} on {h['construct']}" if h.get("kind") == "loading"
                else f"the residual covariance of {h.get('item_a')} and {h.get('item_b')}")
        parts.append(f"the largest modification index ({dec(h['mi'], 1)}) concerns {what}")
    residuals = model.get("residual_correlations") or {}
    largest = residuals.get("largest") or []
    if largest:
        top = largest[0]
        flagged = residuals.get("n_flagged", 0)
        parts.append(f"{_number(flagged)} residual correlation{'s' * (flagged != 1)} reach "
                     f"|{coef(residuals.get('threshold'), 2)}|, the largest "
                     f"{coef(top['value'], 2)} ({top['a']} with {top['b']})")
    warnings = model.get("warnings") or []
    if warnings:
        parts.append(f"the estimation gave {_number(len(warnings))} warning"
                     f"{'s' * (len(warnings) != 1)}")
    if not parts:
        return None
    return f"Where ‘{model['name']}’ is strained: {'; '.join(parts)}."


def _sample_sentence(report: dict) -> str:
    """Who was analysed, and how missing answers entered."""
    data = report["data"]
    n_rows, n_used = data["n_rows"], data["n_used"]
    complete = (data.get("missing") or {}).get("n_complete")
    who = (f"The answers of all {count(n_rows)} respondents were analysed" if n_used == n_rows
           else f"The answers of {count(n_used)} of the {count(n_rows)} respondents were "
                f"analysed; {count(n_rows - n_used)} were left out")
    if data.get("missing_handling") == "none":
        return f"{who}; no answer was missing."
    return (f"{who}" + (f"; {count(complete)} answered every item" if complete is not None
                        else "") + f". Missing answers: {missing_handling(report)}.")


#: what a fit-only check (``check(..., fit_only=True)``, ``--fit-only``) leaves out
FIT_ONLY_NOTE = (
    "This is a fit-only check: every model was fitted and compared, but local fit (residual "
    "correlations, modification hints), the item review, reliability, the distinctness of "
    "the constructs and measurement invariance were not examined. Check the model file again "
    "without --fit-only before drawing conclusions about the scales.")


def summary_paragraphs(report: dict) -> list[str]:
    """The plain-language summary, one paragraph per string."""
    out = [_sample_sentence(report)]
    if report.get("fit_only"):
        out.append(FIT_ONLY_NOTE)
    fav = favoured(report)
    model = _models(report).get(fav["focus"], {})
    for paragraph in (_comparison_paragraph(report, fav), _focus_paragraph(report, fav),
                      _reliability_paragraph(model) if model else None,
                      _strain_paragraph(model) if model else None):
        if paragraph:
            out.append(paragraph)
    out.append("These figures describe how well each model reproduces the answers of this "
               "sample. Good fit does not show that the scales measure what they are meant to; "
               "see the cautions at the end.")
    return out


def abstract_sentence(report: dict) -> str:
    """One sentence for an abstract: two global fit statistics, local fit,
    and, when the file has rival models, whether the model described is the one
    specified first."""
    fav = favoured(report)
    model = _models(report).get(fav["focus"])
    if model is None:
        return ""
    fit = shown_fit(model["fit"])
    first = _first_name(report)
    origin = ("" if len(report.get("models", ())) == 1
              else " (the model specified first)" if fav["focus"] == first
              else " (not the model specified first)" if first else
              " (the model file does not say which model was specified first)")
    residuals = model.get("residual_correlations") or {}
    largest = residuals.get("largest") or []
    local = (f"the largest residual correlation was {coef(largest[0]['value'], 2)}"
             if largest else "local fit was not examined")
    return (f"In {count(report['data']['n_used'])} respondents, the model ‘{model['name']}’"
            f"{origin} gave χ²({fit.get('df')}) = {dec(fit.get('chi_square'), 2)}, "
            f"{p_equals(fit.get('p_value'))}, CFI = {coef(fit.get('cfi'))}, RMSEA = "
            f"{coef(fit.get('rmsea'))}, 90% CI {interval(fit.get('rmsea_ci90'))}, SRMR = "
            f"{coef(fit.get('srmr'))}; {local}.")


def _missing_methods(report: dict) -> str:
    """The methods sentence on missing answers, with Little's test when it was run."""
    code = report["data"].get("missing_handling")
    text = {
        "full-information": "Every answer given entered the likelihood (full-information "
                            "maximum likelihood; Arbuckle, 1996), which assumes that answers "
                            "are missing at random (Rubin, 1976).",
        "listwise": "Respondents with any missing answer were left out (listwise deletion), "
                    "which assumes that answers are missing completely at random (Rubin, 1976).",
        "pairwise": f"Each {_correlation_kinds(report, ' or ')} correlation used every "
                    "respondent who answered both items (pairwise), which assumes that answers "
                    "are missing completely at random (Rubin, 1976).",
        "none": "No answer was missing.",
    }.get(code, f"Missing answers were handled by {missing_handling(report)}.")
    test = (report["data"].get("missing") or {}).get("little_mcar")
    if test:
        text += (f" Little's (1988) test of missingness completely at random gave "
                 f"χ²({dof(test.get('df'))}) = {dec(test.get('chi_square'), 2)}, "
                 f"{p_equals(test.get('p_value'))}.")
    return text


def _correlation_kinds(report: dict, joint: str) -> str:
    """"polychoric", or the three kinds of a study mixing ordinal and continuous items."""
    if (report.get("method") or {}).get("estimator") == "mixed":
        return f"polychoric, polyserial{joint}Pearson"
    return "polychoric"


def _mixed_methods(report: dict) -> str | None:
    """The methods sentence on the correlations of a study mixing item types."""
    if not any("correlations_mixed" in m for m in report.get("models", ())):
        return None
    return ("Correlations involving a continuous and an ordinal item were polyserial "
            "correlations (two-step maximum likelihood; Olsson, Drasgow & Dorans, 1982), those "
            "between ordinal items polychoric correlations (Olsson, 1979) and those between "
            "continuous items Pearson correlations; the continuous items were analysed "
            "standardized, so their loadings and residual variances are standardized.")


def methods_paragraphs(report: dict) -> list[str]:
    """A methods paragraph built from what was run, for the researcher to adapt."""
    models = report.get("models", [])
    data = report["data"]
    names = [m["name"] for m in models]
    estimators = list(dict.fromkeys(str(m.get("estimator")) for m in models))
    notes = list(dict.fromkeys(n for m in models for n in m.get("identification", ())))
    tool = report["tool"]
    deps = tool.get("dependencies")
    software = f"scalewright {tool['version']}" + (
        " (" + ", ".join(f"{k} {v}" for k, v in deps.items()) + ")" if deps else "")
    out = [" ".join([
        f"We fitted {_number(len(models))} {'rival ' * (len(models) > 1)}confirmatory factor model"
        f"{'s' * (len(models) != 1)} ({_names(names)}) to the answers of "
        + (f"all {count(data['n_rows'])}" if data["n_used"] == data["n_rows"]
           else f"{count(data['n_used'])} of {count(data['n_rows'])}")
        + f" respondents with {software}.",
        f"Estimation was by {_plain_list(estimators)}, after Jöreskog (1969).",
        *filter(None, [_mixed_methods(report)]),
        _missing_methods(report), *notes,
        "Section ‘The data’ of the report gives the reasons for these choices."])]
    fit = ("Global fit was judged with the chi-square test and with CFI (Bentler, 1990), TLI "
           "(Tucker & Lewis, 1973), RMSEA with its 90% confidence interval (Steiger & Lind, "
           "1980; Browne & Cudeck, 1993) and SRMR, read against the conventional cutoffs of Hu "
           "and Bentler (1999) as guides rather than rules.")
    if report.get("comparison"):
        fit += (" Rival models were compared by AIC (Akaike, 1974), BIC (Schwarz, 1978) and "
                "BIC-based model weights (Raftery, 1995; Wagenmakers & Farrell, 2004)")
        if report["comparison"].get("nested_tests"):
            fit += ", and nested models by chi-square difference tests"
            used = " ".join(str(t.get("test")) for t in report["comparison"]["nested_tests"])
            if "Satorra & Bentler" in used:
                fit += " scaled as proposed by Satorra and Bentler (2001)"
            if "DWLS" in used:
                fit += f" (for the DWLS fits, {DWLS_DIFFERENCE_WORDS})"
        fit += "."
    out.append(fit)
    extra = ["Item distributions were described by skewness and excess kurtosis, and "
             "multivariate normality by Mardia's (1970) coefficients, the kurtosis tested with its "
             "exact normal-sample mean and variance (Mardia, 1974)."]
    present = {k for m in models for k in m}
    if "reliability" in present:
        extra.append("Reliability of each construct's sum score was estimated by Cronbach's "
                     "(1951) alpha with the interval of Feldt, Woodruff and Salih (1987), by "
                     "McDonald's (1999) omega from the fitted model and by coefficient H "
                     "(Hancock & Mueller, 2001).")
    if "validity" in present:
        extra.append("Distinctness of constructs was examined with the average variance "
                     "extracted and the Fornell–Larcker (1981) comparison, and with the HTMT "
                     "ratio (Henseler, Ringle & Sarstedt, 2015).")
    if "bifactor" in present or "higher_order" in present:
        extra.append("For general-factor models, omega hierarchical, explained common variance "
                     "and related indices were computed as described by Rodriguez, Reise and "
                     "Haviland (2016).")
    if "modification_hints" in present:
        extra.append("Local misfit was examined through residual correlations and modification "
                     "indices (Sörbom, 1989) with expected parameter changes; no model was "
                     "changed because of them.")
        z_routes = residual_z_routes(report)
        if z_routes:
            ways = [text for route, text in _Z_ROUTES if route in z_routes]
            extra.append("The standardized residuals (z) divide each residual by its own "
                         "sampling standard deviation: " + "; ".join(ways) + ".")
        if any("DWLS" in str((m.get("modification_hint_notes") or {}).get("method"))
               for m in report.get("models", ())):
            extra.append("For the models fitted by DWLS, the modification indices are "
                         "generalized score statistics (Satorra, 1989), which are chi-square "
                         "with one degree of freedom under the model whatever the weight "
                         "matrix; the plain indices are not.")
    out.append(" ".join(extra))
    invariance = _invariance_methods(report)
    if invariance:
        out.append(invariance)
    return out


def _invariance_methods(report: dict) -> str | None:
    """The methods sentences on measurement invariance, when it was checked."""
    steps = report.get("invariance")
    if not steps:
        return None
    setup = report.get("invariance_setup") or {}
    groups = list((setup.get("n") or {}).items())
    text = (f"Measurement invariance of ‘{setup.get('model', '')}’ across "
            + (_plain_list([f"‘{g}’ (n = {count(n)})" for g, n in groups]) if groups
               else "the groups")
            + f" was examined in the steps {_plain_list([str(s.get('step')) for s in steps])}, "
            "each judged by the change in CFI, RMSEA and SRMR against the criteria of Cheung "
            "and Rensvold (2002) and Chen (2007) and by the chi-square difference test.")
    ordinal = bool(setup.get("ordinal_identification"))
    if ordinal:
        text += (" The items were treated as ordinal: each group's thresholds and polychoric "
                 "correlations were fitted together, identified as Wu and Estabrook (2016) "
                 "propose (theta parameterization); each difference test was "
                 f"{DWLS_DIFFERENCE_WORDS}.")
    released = len(report.get("released") or ())
    if released:
        text += (f" {_number(released).capitalize()} equality constraint"
                 f"{' was' if released == 1 else 's were'} released where score tests"
                 + (" (Satorra, 1989)" if ordinal else "") + " pointed to a difference "
                 "(partial invariance).")
    if report.get("latent_means"):
        text += (" Latent means were then compared between groups, with standardized "
                 "differences after Hancock (2001).")
    return text


def cautions(report: dict) -> list[tuple[str, str]]:
    """The standing cautions, as (short title, text)."""
    out = [
        ("Fit is not validity",
         "A model that reproduces the answers well can still measure something other than what "
         "its constructs are called. Fit indices say how closely the model reproduces the item "
         "covariances; evidence that the scores mean what they are meant to mean comes from "
         "content, response processes and relations with other variables."),
        ("Cutoffs are conventions",
         f"The cutoffs marked in this report come from the simulations of particular models "
         f"by {HU_BENTLER}; with other numbers of items, loadings or sample sizes they can be "
         "too strict or too lenient (McNeish & Wolf, 2023). Every index is reported so that a "
         "reader can apply other criteria."),
        ("Equivalent models",
         "Other models, with different meanings, can fit these data exactly as well as any model "
         "shown here; a good fit does not rule them out."),
        ("Individual decisions",
         "Scores used to make decisions about individual people need more evidence of "
         "reliability and validity than scores used for research on groups (Standards for "
         "Educational and Psychological Testing; AERA, APA & NCME, 2014)."),
    ]
    if any("modification_hints" in m for m in report.get("models", ())):
        out.insert(2, ("Modification indices capitalise on chance",
                       "Freeing a parameter because its modification index is large tailors the "
                       "model to this sample; such changes often fail to replicate (MacCallum, "
                       "Roznowski & Necowitz, 1992). Change a model only for a reason you would "
                       "defend without the index, and test the changed model on new data."))
    if any(row.get("changes") for row in _rows(report)):
        out.insert(3, ("Changed models are untested",
                       "A model changed after seeing these data has not been tested by them: "
                       "confirm it on a new sample before relying on it."))
    return out
