"""The reference list of a report: every method the check actually used,
chosen from the keys present in the result dict, and every work cited in
the sentences the report shows from the dict (the reasons for the method),
in alphabetical order.
"""

from __future__ import annotations

import re

from scalewright.residuals import Z_DISTRIBUTION_FREE, Z_DWLS, Z_FIML, Z_ROBUST_FIML

CITATIONS = {
    "akaike": "Akaike, H. (1974). A new look at the statistical model identification. IEEE "
              "Transactions on Automatic Control, 19, 716–723.",
    "standards": "American Educational Research Association, American Psychological "
                 "Association, & National Council on Measurement in Education. (2014). "
                 "Standards for educational and psychological testing. AERA.",
    "arbuckle": "Arbuckle, J. L. (1996). Full information estimation in the presence of "
                "incomplete data. In G. A. Marcoulides & R. E. Schumacker (Eds.), Advanced "
                "structural equation modeling (pp. 243–277). Erlbaum.",
    "asparouhov_muthen2006": "Asparouhov, T., & Muthén, B. (2006). Robust chi square "
                             "difference testing with mean and variance adjusted test "
                             "statistics (Technical note No. 10).",
    "asparouhov_muthen2010": "Asparouhov, T., & Muthén, B. (2010). Simple second order "
                             "chi-square correction (Technical appendix).",
    "bentler1990": "Bentler, P. M. (1990). Comparative fit indexes in structural models. "
                   "Psychological Bulletin, 107, 238–246.",
    "brosseau": "Brosseau-Liard, P. E., & Savalei, V. (2014). Adjusting incremental fit "
                "indices for nonnormality. Multivariate Behavioral Research, 49, 460–470.",
    "browne1984": "Browne, M. W. (1984). Asymptotically distribution-free methods for the "
                  "analysis of covariance structures. British Journal of Mathematical and "
                  "Statistical Psychology, 37, 62–83.",
    "browne_cudeck": "Browne, M. W., & Cudeck, R. (1993). Alternative ways of assessing model "
                     "fit. In K. A. Bollen & J. S. Long (Eds.), Testing structural equation "
                     "models (pp. 136–162). Sage.",
    "chen": "Chen, F. F. (2007). Sensitivity of goodness of fit indexes to lack of measurement "
            "invariance. Structural Equation Modeling, 14, 464–504.",
    "cheung_rensvold": "Cheung, G. W., & Rensvold, R. B. (2002). Evaluating goodness-of-fit "
                       "indexes for testing measurement invariance. Structural Equation "
                       "Modeling, 9, 233–255.",
    "curran": "Curran, P. J., West, S. G., & Finch, J. F. (1996). The robustness of test "
              "statistics to nonnormality and specification error in confirmatory factor "
              "analysis. Psychological Methods, 1, 16–29.",
    "cronbach": "Cronbach, L. J. (1951). Coefficient alpha and the internal structure of "
                "tests. Psychometrika, 16, 297–334.",
    "feldt": "Feldt, L. S., Woodruff, D. J., & Salih, F. A. (1987). Statistical inference for "
             "coefficient alpha. Applied Psychological Measurement, 11, 93–103.",
    "fornell_larcker": "Fornell, C., & Larcker, D. F. (1981). Evaluating structural equation "
                       "models with unobservable variables and measurement error. Journal of "
                       "Marketing Research, 18, 39–50.",
    "green_yang": "Green, S. B., & Yang, Y. (2009). Reliability of summed item scores using "
                  "structural equation modeling: An alternative to coefficient alpha. "
                  "Psychometrika, 74, 155–167.",
    "hancock2001": "Hancock, G. R. (2001). Effect size, power, and sample size determination "
                   "for structured means modeling and MIMIC approaches to between-groups "
                   "hypothesis testing of means on a single latent construct. Psychometrika, 66, "
                   "373–388.",
    "hancock_mueller": "Hancock, G. R., & Mueller, R. O. (2001). Rethinking construct "
                       "reliability within latent variable systems. In R. Cudeck, S. du Toit, "
                       "& D. Sörbom (Eds.), Structural equation modeling: Present and future "
                       "(pp. 195–216). Scientific Software International.",
    "henseler": "Henseler, J., Ringle, C. M., & Sarstedt, M. (2015). A new criterion for "
                "assessing discriminant validity in variance-based structural equation "
                "modeling. Journal of the Academy of Marketing Science, 43, 115–135.",
    "hu_bentler": "Hu, L., & Bentler, P. M. (1999). Cutoff criteria for fit indexes in "
                  "covariance structure analysis: Conventional criteria versus new "
                  "alternatives. Structural Equation Modeling, 6, 1–55.",
    "hausman": "Hausman, J. A. (1978). Specification tests in econometrics. Econometrica, 46, "
               "1251–1271.",
    "joreskog": "Jöreskog, K. G. (1969). A general approach to confirmatory maximum "
                "likelihood factor analysis. Psychometrika, 34, 183–202.",
    "mahalanobis": "Mahalanobis, P. C. (1936). On the generalized distance in statistics. "
                   "Proceedings of the National Institute of Sciences of India, 2, 49–55.",
    "tabachnick": "Tabachnick, B. G., & Fidell, L. S. (2013). Using multivariate statistics "
                  "(6th ed.). Pearson.",
    "little": "Little, R. J. A. (1988). A test of missing completely at random for "
              "multivariate data with missing values. Journal of the American Statistical "
              "Association, 83, 1198–1202.",
    "maccallum": "MacCallum, R. C., Roznowski, M., & Necowitz, L. B. (1992). Model "
                 "modifications in covariance structure analysis: The problem of capitalization "
                 "on chance. Psychological Bulletin, 111, 490–504.",
    "mardia": "Mardia, K. V. (1970). Measures of multivariate skewness and kurtosis with "
              "applications. Biometrika, 57, 519–530.",
    "mardia1974": "Mardia, K. V. (1974). Applications of some measures of multivariate "
                  "skewness and kurtosis in testing normality and robustness studies. "
                  "Sankhyā B, 36, 115–128.",
    "mcdonald": "McDonald, R. P. (1999). Test theory: A unified treatment. Erlbaum.",
    "mcneish_wolf": "McNeish, D., & Wolf, M. G. (2023). Dynamic fit index cutoffs for "
                    "confirmatory factor analysis models. Psychological Methods, 28, 61–88.",
    "muthen": "Muthén, B. (1984). A general structural equation model with dichotomous, "
              "ordered categorical, and continuous latent variable indicators. Psychometrika, "
              "49, 115–132.",
    "muthen_du_toit_spisic": "Muthén, B., du Toit, S. H. C., & Spisic, D. (1997). Robust "
                             "inference using weighted least squares and quadratic estimating "
                             "equations in latent variable modeling with categorical and "
                             "continuous outcomes. Unpublished technical report.",
    "nunnally": "Nunnally, J. C., & Bernstein, I. H. (1994). Psychometric theory (3rd ed.). "
                "McGraw-Hill.",
    "olsson": "Olsson, U. (1979). Maximum likelihood estimation of the polychoric correlation "
              "coefficient. Psychometrika, 44, 443–460.",
    "olsson_drasgow_dorans": "Olsson, U., Drasgow, F., & Dorans, N. J. (1982). The polyserial "
                             "correlation coefficient. Psychometrika, 47, 337–347.",
    "raftery": "Raftery, A. E. (1995). Bayesian model selection in social research. "
               "Sociological Methodology, 25, 111–163.",
    "rhemtulla": "Rhemtulla, M., Brosseau-Liard, P. É., & Savalei, V. (2012). When can "
                 "categorical variables be treated as continuous? A comparison of robust "
                 "continuous and categorical SEM estimation methods under suboptimal conditions. "
                 "Psychological Methods, 17, 354–373.",
    "rodriguez": "Rodriguez, A., Reise, S. P., & Haviland, M. G. (2016). Evaluating bifactor "
                 "models: Calculating and interpreting statistical indices. Psychological "
                 "Methods, 21, 137–150.",
    "rubin": "Rubin, D. B. (1976). Inference and missing data. Biometrika, 63, 581–592.",
    "saris": "Saris, W. E., Satorra, A., & van der Veen, W. M. (2009). Testing structural "
             "equation models or detection of misspecifications? Structural Equation "
             "Modeling, 16, 561–582.",
    "satorra1989": "Satorra, A. (1989). Alternative test criteria in covariance structure "
                   "analysis: A unified approach. Psychometrika, 54, 131–151.",
    "satorra2000": "Satorra, A. (2000). Scaled and adjusted restricted tests in multi-sample "
                   "analysis of moment structures. In R. D. H. Heijmans, D. S. G. Pollock, & "
                   "A. Satorra (Eds.), Innovations in multivariate statistical analysis "
                   "(pp. 233–247). Kluwer.",
    "satorra_bentler1994": "Satorra, A., & Bentler, P. M. (1994). Corrections to test "
                           "statistics and standard errors in covariance structure analysis. "
                           "In A. von Eye & C. C. Clogg (Eds.), Latent variables analysis "
                           "(pp. 399–419). Sage.",
    "satorra_bentler2001": "Satorra, A., & Bentler, P. M. (2001). A scaled difference "
                           "chi-square test statistic for moment structure analysis. "
                           "Psychometrika, 66, 507–514.",
    "schmid_leiman": "Schmid, J., & Leiman, J. M. (1957). The development of hierarchical "
                     "factor solutions. Psychometrika, 22, 53–61.",
    "schwarz": "Schwarz, G. (1978). Estimating the dimension of a model. Annals of Statistics, "
               "6, 461–464.",
    "self_liang": "Self, S. G., & Liang, K.-Y. (1987). Asymptotic properties of maximum "
                  "likelihood estimators and likelihood ratio tests under nonstandard "
                  "conditions. Journal of the American Statistical Association, 82, 605–610.",
    "sorbom": "Sörbom, D. (1989). Model modification. Psychometrika, 54, 371–384.",
    "steiger_lind": "Steiger, J. H., & Lind, J. C. (1980, May). Statistically based tests for "
                    "the number of common factors [Paper presentation]. Annual meeting of the "
                    "Psychometric Society, Iowa City, IA.",
    "steiger_shapiro_browne": "Steiger, J. H., Shapiro, A., & Browne, M. W. (1985). On the "
                              "multivariate asymptotic distribution of sequential chi-square "
                              "statistics. Psychometrika, 50, 253–264.",
    "tucker_lewis": "Tucker, L. R., & Lewis, C. (1973). A reliability coefficient for maximum "
                    "likelihood factor analysis. Psychometrika, 38, 1–10.",
    "wagenmakers": "Wagenmakers, E.-J., & Farrell, S. (2004). AIC model selection using Akaike "
                   "weights. Psychonomic Bulletin & Review, 11, 192–196.",
    "wu_estabrook": "Wu, H., & Estabrook, R. (2016). Identification of confirmatory factor "
                    "analysis models of different levels of invariance for ordered categorical "
                    "outcomes. Psychometrika, 81, 1014–1045.",
    "yuan_bentler": "Yuan, K.-H., & Bentler, P. M. (2000). Three likelihood-based methods for "
                    "mean and covariance structure analysis with nonnormal missing data. "
                    "Sociological Methodology, 30, 165–200.",
    "yung": "Yung, Y.-F., Thissen, D., & McLeod, L. D. (1999). On the relationship between the "
            "higher-order factor model and the hierarchical factor model. Psychometrika, 64, "
            "113–128.",
    "zumbo": "Zumbo, B. D., Gadermann, A. M., & Zeisser, C. (2007). Ordinal versions of "
             "coefficients alpha and theta for Likert rating scales. Journal of Modern Applied "
             "Statistical Methods, 6, 21–29.",
}

#: author and year by which a citation is recognised in a sentence the report shows from the dict
CUES = {
    "arbuckle": ("Arbuckle", 1996), "curran": ("Curran", 1996), "little": ("Little", 1988),
    "olsson_drasgow_dorans": ("Drasgow", 1982), "olsson": ("Olsson", 1979),
    "muthen_du_toit_spisic": ("Spisic", 1997), "asparouhov_muthen2010": ("Asparouhov", 2010),
    "mardia": ("Mardia", 1970), "mardia1974": ("Mardia", 1974), "rhemtulla": ("Rhemtulla", 2012), "rubin": ("Rubin", 1976),
    "satorra_bentler1994": ("Satorra", 1994), "yuan_bentler": ("Yuan", 2000),
}

#: always used: ML, the fit indices, the cutoffs and the cautions shown in every report
_ALWAYS = ("joreskog", "bentler1990", "tucker_lewis", "steiger_lind", "browne_cudeck",
           "hu_bentler", "mcneish_wolf", "akaike", "schwarz", "mardia", "mardia1974", "standards")


def _model_keys(report: dict) -> set:
    return {k for m in report.get("models", ()) for k in m}


def _estimators(report: dict) -> str:
    return " ".join(str(m.get("estimator", "")) for m in report.get("models", ())).lower()


def cited_in(texts) -> set[str]:
    """Keys of :data:`CUES` whose author is followed, within a few words, by the year."""
    joined = " ".join(texts)
    return {key for key, (name, year) in CUES.items()
            if re.search(rf"\b{name}\b.{{0,60}}?\b{year}\b", joined)}


def residual_z_routes(report: dict) -> set[str]:
    """How the z values of the residuals shown were computed (the models'
    ``standardized_basis``, :data:`scalewright.residuals.Z_BASES`)."""
    return {basis for m in report.get("models", ())
            if (basis := (m.get("residual_correlations") or {}).get("standardized_basis"))
            and any(r.get("standardized") is not None
                    for r in m["residual_correlations"].get("largest", ()))}


def references_used(report: dict) -> list[str]:
    """Full citations of every method the result dict shows, sorted by author."""
    keys = set(_ALWAYS)
    present = _model_keys(report)
    comparison = report.get("comparison")
    if comparison:
        keys |= {"raftery", "wagenmakers"}
        tests = comparison.get("nested_tests", ())
        if tests:
            keys.add("steiger_shapiro_browne")
        used = " ".join(str(t.get("test")) for t in tests)
        if "Satorra & Bentler" in used:
            keys.add("satorra_bentler2001")
        if "DWLS" in used:
            keys |= {"satorra2000", "asparouhov_muthen2006", "asparouhov_muthen2010"}
        if any(t.get("boundary") for t in tests):
            keys.add("self_liang")
        if any(t.get("kind") == "higher-order in bifactor" for t in tests):
            keys.add("yung")
    if "reliability" in present:
        keys |= {"cronbach", "feldt", "mcdonald", "hancock_mueller", "nunnally"}
    if "validity" in present:
        keys |= {"fornell_larcker", "henseler"}
    z_routes = residual_z_routes(report)
    if z_routes & {Z_DISTRIBUTION_FREE, Z_DWLS}:
        keys.add("browne1984")
    if Z_DWLS in z_routes:
        keys.add("muthen")
    if Z_FIML in z_routes:
        keys.add("hausman")
    if Z_ROBUST_FIML in z_routes:
        keys.add("yuan_bentler")
    if "modification_hints" in present:
        keys |= {"sorbom", "maccallum", "saris"}
        if any("Satorra 1989" in str((m.get("modification_hint_notes") or {}).get("method"))
               for m in report.get("models", ())):
            keys.add("satorra1989")
    if "bifactor" in present or "higher_order" in present:
        keys |= {"rodriguez", "schmid_leiman"}
    if "thresholds" in present:
        keys |= {"olsson", "muthen", "zumbo", "green_yang"}
    if "correlations_mixed" in present:
        keys.add("olsson_drasgow_dorans")
    if "reliability_ordinal" in present:
        keys |= {"zumbo", "green_yang", "nunnally"}
    if "reliability_continuous" in present:
        keys |= {"cronbach", "mcdonald", "nunnally"}
    if any("chi_square_scaled" in m.get("fit", {}) for m in report.get("models", ())):
        keys |= {"satorra_bentler1994", "brosseau"}
    estimators = _estimators(report)
    if "full-information" in estimators or "full information" in estimators:
        keys |= {"arbuckle"}
    if "robust" in estimators and "missing" in estimators:
        keys.add("yuan_bentler")
    data = report.get("data", {})
    if (data.get("missing") or {}).get("little_mcar"):
        keys.add("little")
    if data.get("outliers"):
        keys |= {"mahalanobis", "tabachnick"}
    if data.get("missing_handling") in ("full-information", "listwise", "pairwise"):
        keys.add("rubin")
    keys |= cited_in((report.get("method") or {}).get("reasons", ()))
    keys |= cited_in(n for m in report.get("models", ()) for n in m.get("ordinal_notes") or ())
    if report.get("invariance"):
        keys |= {"cheung_rensvold", "chen"}
    if (report.get("invariance_setup") or {}).get("ordinal_identification"):
        keys |= {"wu_estabrook", "satorra2000", "asparouhov_muthen2006", "asparouhov_muthen2010",
                 "satorra1989"}
    if report.get("latent_means"):
        keys.add("hancock2001")
    return sorted((CITATIONS[k] for k in keys), key=str.casefold)
