"""The reporting checklist: for each line a reviewer ticks in a published
confirmatory factor analysis, whether this report answers it and where, or
what the researcher must add to the model file.

The thirty lines are merged from published reporting guidelines (Jackson,
Gillaspy & Purc-Stephenson 2009; Schreiber, Nora, Stage, Barlow & King 2006;
Appelbaum et al. 2018; Hoyle & Isherwood 2013; AERA, APA & NCME 2014;
Mokkink et al. 2018), as listed in the project's design notes.  Lines only
the researcher can answer come from the model file (``about:``, and per
model ``rationale``, ``first``, ``changes``); when missing, the row says
which key to add rather than inventing an answer.
"""

from __future__ import annotations

from scalewright.report.tables import CORRELATION_TABLE_MAX_ITEMS

SHOWN, PARTLY, MISSING, NOT_COMPUTED, NOT_APPLICABLE = (
    "shown", "partly shown", "missing", "not computed", "not applicable")


def _row(number: int, line: str, status: str, where: str) -> dict:
    return {"number": number, "line": line, "status": status, "where": where}


def _about(report: dict, key: str) -> bool:
    value = (report["study"].get("about") or {}).get(key)
    return bool(value and str(value).strip())


def _user(number, line, present: bool, where: str, add: str) -> dict:
    return _row(number, line, SHOWN if present else MISSING,
                where if present else f"add {add} to the model file")


def _clustering_row(report: dict, design: str) -> dict:
    """Line 8, which names the repeated ids of the id column, if any."""
    row = _user(8, "Clustered or non-independent answers and how they were handled",
                _about(report, "clustering"), design, "‘about: clustering:’")
    repeats = report["data"].get("repeated_ids")
    if repeats:
        row["where"] += (f"; the id column ‘{repeats['column']}’ repeats "
                         f"{repeats['n_ids_repeated']} id{'s' if repeats['n_ids_repeated'] > 1 else ''}"
                         " (section ‘The data’)")
    return row


def _names(names) -> str:
    quoted = [f"‘{n}’" for n in names]
    return quoted[0] if len(quoted) == 1 else ", ".join(quoted[:-1]) + " and " + quoted[-1]


def _not_run(report: dict) -> str:
    """Where a line points when its statistics were not computed."""
    return ("left out of this fit-only check: check again without --fit-only"
            if report.get("fit_only") else "not computed in this run")


def _local_fit_row(models: list, per_model: str, not_run: str) -> dict:
    """Line 19: shown for the models whose residual correlations were computed
    (a model's entry says ``not_computed`` with the reason otherwise)."""
    line = "Local fit: residual correlations, the largest flagged"
    with_residuals = [m["name"] for m in models if "largest" in (m.get("residual_correlations")
                                                                 or {})]
    without = [m["name"] for m in models if m["name"] not in with_residuals]
    if not with_residuals:
        return _row(19, line, NOT_COMPUTED, not_run)
    if not without:
        return _row(19, line, SHOWN, per_model)
    return _row(19, line, PARTLY, f"sections of {_names(with_residuals)}; not computed for "
                                  f"{_names(without)} (the reason is given in its section)")


def checklist_rows(report: dict) -> list[dict]:
    """The thirty checklist lines with status and location, in order."""
    models = report.get("models", [])
    keys = {k for m in models for k in m}
    comparison = report.get("comparison") or {}
    rows_cmp = comparison.get("models", [])
    design = "section ‘Study design’"
    per_model = "each model's section"
    first_marked = any(r.get("first") for r in rows_cmp)
    rationale = _about(report, "rationale") or any(r.get("rationale") for r in rows_cmp)
    changes = any(r.get("changes") for r in rows_cmp)
    estimators = " ".join(str(m.get("estimator", "")) for m in models).lower()
    data = report["data"]
    missing = data.get("missing")
    polychoric = [m["name"] for m in models if m.get("polychoric")]
    mixed = [m["name"] for m in models if m.get("correlations_mixed")]
    by_kind = bool(keys & {"reliability_ordinal", "reliability_continuous"})
    reasons = (report.get("method") or {}).get("reasons")
    not_run = _not_run(report)
    out = [
        _user(1, "Rationale for the proposed structure", rationale, design,
              "‘about: rationale:’ (or ‘rationale:’ under a model)"),
        _row(2, "Items per construct, free and fixed parameters, residual covariances, a "
                "diagram, verifiable degrees of freedom", SHOWN,
             f"{per_model}: diagram, loadings and fit tables"),
        _row(3, "How each model is identified and scaled", SHOWN,
             f"{per_model}, first paragraph; methods paragraph"),
        (_user(4, "Rival models set out in advance; which one was specified first",
               first_marked, "section ‘Rival models compared’ (column ‘First’)",
               "‘first: true’ under the model specified first") if len(models) > 1 else
         _row(4, "Rival models set out in advance; which one was specified first", MISSING,
              "the model file holds one model: add the rival structures considered (e.g. one "
              "general construct) under ‘models:’")),
        _user(5, "Population, sampling and exclusions",
              all(_about(report, k) for k in ("population", "sampling", "exclusions")), design,
              "‘about: population:’, ‘sampling:’ and ‘exclusions:’"),
        _user(6, "Sample size and how it was decided", _about(report, "sample_size"),
              f"{design}; N in the header", "‘about: sample_size:’"),
        _row(7, "Response format; items treated as ordinal or continuous",
             SHOWN if _about(report, "response_format") else PARTLY,
             f"{design}; methods paragraph" if _about(report, "response_format")
             else "the estimator is named in the methods paragraph; add ‘about: "
                  "response_format:’ to the model file"),
        _clustering_row(report, design),
        _row(9, "Missing answers: amount, patterns, mechanism, handling",
             SHOWN if missing else PARTLY,
             "section ‘The data’: missing answers per item, the most frequent patterns, "
             "Little's test and the assumption the handling makes; say why answers are missing "
             "if you know" if missing else
             "section ‘The data’ (missing per item; handling in the methods paragraph); "
             "patterns per case are not computed"),
        _row(10, "Skewness and kurtosis per item; a multivariate normality test", SHOWN,
             "section ‘The data’"),
        _row(11, "Outliers: how detected and handled",
             SHOWN if data.get("outliers") else NOT_COMPUTED,
             "section ‘The data’ (Mahalanobis distance, p < .001; flagged rows kept); say "
             "whether you looked at them" if data.get("outliers") else
             "too few complete rows to screen for outliers; report your own check"),
        _row(12, "Item means, SDs and correlations, enough to reanalyse",
             SHOWN if data.get("correlations") else PARTLY,
             "section ‘The data’ (means, SDs"
             + (", item correlations" if data.get("correlations") and len(
                 data["correlations"]["items"]) <= CORRELATION_TABLE_MAX_ITEMS else "")
             + "); the correlation matrix is also in the JSON file (‘data’ → ‘correlations’)"
             + (f"; the polychoric correlations are in the JSON file (‘polychoric’ under "
                f"{_names(polychoric)})" if polychoric else "")
             + (f"; the polychoric, polyserial and Pearson correlations are in the JSON file "
                f"(‘correlations_mixed’ under {_names(mixed)})" if mixed else "")),
        _row(13, "Estimation method and why it suits the data", SHOWN,
             ("section ‘The data’ (the method chosen and why); " if reasons else "")
             + f"methods paragraph; {per_model}"),
        _row(14, "Software and version", SHOWN, "header and methods paragraph"),
        _row(15, "Convergence, non-default settings, improper solutions", SHOWN,
             f"{per_model} (estimation line and warnings)"),
        _row(16, "Chi-square with df and p" + (" (scaled)" if "robust" in estimators else ""),
             SHOWN, "section ‘Summary’ and ‘Rival models compared’"),
        _row(17, "Approximate fit indices from different families", SHOWN,
             "section ‘Summary’: CFI, TLI, RMSEA [90% CI], SRMR"),
        _row(18, "Cutoffs used, with their source, for every model", SHOWN,
             "note under the summary table"),
        _local_fit_row(models, per_model, not_run),
        _row(20, "Loadings unstandardized with SE and standardized", SHOWN, per_model),
        _row(21, "Residual variances and R² per item", SHOWN, per_model),
        _row(22, "Construct variances, covariances and correlations with SE", SHOWN,
             per_model),
        _row(23, "Every change from the first model, its cue and substantive reason",
             SHOWN if changes else (NOT_APPLICABLE if first_marked else MISSING),
             "section ‘Rival models compared’" if changes else
             ("no changes are listed under ‘changes:’ in the model file; if a model was "
              "changed after seeing the data, list each change there" if first_marked else
              "mark the first model with ‘first: true’ and list changes under ‘changes:’")),
        _row(24, "Fit of every model tried, with comparison tests",
             SHOWN if comparison else PARTLY,
             "section ‘Rival models compared’" if comparison else "section ‘Summary’ (fit); "
                                                                   "comparison not computed"),
        _row(25, "Cross-validation of a changed model, or a caution that it is untested",
             SHOWN if changes else NOT_APPLICABLE,
             "section ‘Cautions’" if changes else "no model is listed as changed"),
        _row(26, "Equivalent models acknowledged", SHOWN,
             "section ‘Cautions’" + ("; equivalent pairs in ‘Rival models compared’"
                                     if any(t.get("df") == 0 for t in
                                            comparison.get("nested_tests", ())) else "")),
        _row(27, "Reliability of every scored subscale: omega and alpha with an interval",
             SHOWN if "reliability" in keys else PARTLY if by_kind else NOT_COMPUTED,
             f"{per_model}: alpha and omega with 95% intervals, H, and the item analysis"
             if "reliability" in keys else
             f"{per_model}: ordinal alpha and categorical omega, or alpha and omega of the "
             "standardized items, by the kind of each construct's items; no intervals"
             if by_kind else not_run),
        _row(28, "Evidence that subscales are distinct",
             SHOWN if "validity" in keys else NOT_COMPUTED,
             f"{per_model}: AVE, Fornell–Larcker comparison and HTMT" if "validity" in keys
             else not_run),
        _row(29, "Measurement invariance across groups that will be compared",
             SHOWN if report.get("invariance") else NOT_COMPUTED,
             "section ‘Measurement invariance’" if report.get("invariance")
             else not_run if (report.get("study") or {}).get("group_column")
             else "not computed in this run"),
        _row(30, "A summary sentence fit for an abstract", SHOWN, "section ‘Summary’"),
    ]
    return out
