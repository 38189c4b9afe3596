"""Which estimation method and which handling of missing answers a study gets.

The model file may fix both (``estimation: method:`` auto | normal | robust |
ordinal and ``estimation: missing:`` auto | full-information | listwise); on
``auto`` the data decide, by rules stated in the report:

* **ordinal** when an item is declared ordinal, or (``treat_as: auto``) has
  four or fewer answer categories, all whole numbers: with so few
  categories, treating answers as continuous biases loadings and fit, while
  with five or more robust ML performs about as well as categorical methods
  (Rhemtulla, Brosseau-Liard & Savalei 2012).
* **mixed** when the study would be ordinal but some items are continuous:
  declared so, or (``treat_as: auto``) with answers that are not whole
  numbers or more than ``polychoric.MAX_CATEGORIES`` different values, which
  cannot be ordinal.  The other items are analysed as ordinal (as on the
  ordinal route, an ``auto`` item with five to ten whole-number answers joins
  them) and the continuous items enter through Pearson correlations with
  each other and polyserial correlations with the ordinal items (Olsson,
  Drasgow & Dorans 1982), standardized (see :mod:`scalewright.evaluate_mixed`).
* otherwise **robust** ML when the answers are clearly non-normal: an item
  with |skewness| above 2 or excess kurtosis above 7 (Curran, West & Finch
  1996), or Mardia's (1970) multivariate kurtosis test significant at .05;
* otherwise **normal-theory** ML.

Missing answers: full-information ML whenever any answer is missing, which
assumes the answers are missing at random (Rubin 1976; Enders & Bandalos
2001 show it beats listwise deletion then); the ordinal route uses all
complete pairs (pairwise), because its polychoric correlations are estimated
pair by pair; so does the mixed route.

References
----------
Olsson, U., Drasgow, F. & Dorans, N. J. (1982). The polyserial correlation
coefficient. Psychometrika 47, 337–347.
Rhemtulla, M., Brosseau-Liard, P. E. & Savalei, V. (2012). When can
categorical variables be treated as continuous? Psychological Methods 17,
354–373.
Curran, P. J., West, S. G. & Finch, J. F. (1996). The robustness of test
statistics to nonnormality and specification error in confirmatory factor
analysis. Psychological Methods 1, 16–29.
Mardia, K. V. (1970). Measures of multivariate skewness and kurtosis with
applications. Biometrika 57, 519–530.
Rubin, D. B. (1976). Inference and missing data. Biometrika 63, 581–592.
Enders, C. K. & Bandalos, D. L. (2001). The relative performance of full
information maximum likelihood estimation for missing data in structural
equation models. Structural Equation Modeling 8, 430–457.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from scalewright.errors import StudyError
from scalewright.estimate.polychoric import MAX_CATEGORIES
from scalewright.itemdata import ItemData
from scalewright.screening import Screening, screen
from scalewright.studyfile import Study

NORMAL, ROBUST, ORDINAL, MIXED = "normal", "robust", "ordinal", "mixed"
FULL_INFORMATION, LISTWISE, PAIRWISE, NONE = "full-information", "listwise", "pairwise", "none"

#: at most this many answer categories makes an item ordinal under treat_as: auto
ORDINAL_MAX_CATEGORIES = 4
#: Curran, West & Finch (1996): beyond these, ML statistics break down
SKEW_LIMIT, KURTOSIS_LIMIT = 2.0, 7.0
#: level of Mardia's kurtosis test
MARDIA_ALPHA = 0.05


@dataclass(frozen=True)
class MethodChoice:
    """The method, the handling of missing answers, and why, in sentences for the report."""

    estimator: str                  # normal | robust | ordinal | mixed
    missing_handling: str           # full-information | listwise | pairwise | none
    reasons: tuple[str, ...]
    ordinal_items: tuple[str, ...] = ()
    continuous_items: tuple[str, ...] = ()   # the mixed route's continuous items

    def to_dict(self) -> dict:
        return {"estimator": self.estimator, "missing_handling": self.missing_handling,
                "reasons": list(self.reasons), "ordinal_items": list(self.ordinal_items),
                "continuous_items": list(self.continuous_items)}


def choose_method(study: Study, data: ItemData, screening: Screening | None = None
                  ) -> MethodChoice:
    """Decide the estimator and the missing-answer handling (rules in the module docstring).

    ``screening`` is the study's item screening when already computed (it is
    computed here otherwise).

    Raises
    ------
    StudyError
        When the model file asks for full-information ML together with the
        ordinal (or mixed) method, which estimates its correlations pair by
        pair; when it asks for the ordinal method but no item can be ordinal.
    """
    screening = screen(data) if screening is None else screening
    stats = {s.item: s for s in screening.items}
    used = [it for it in data.items if it in study.items]
    ordinal = tuple(it for it in used if study.items[it].treat_as == ORDINAL or (
        study.items[it].treat_as == "auto" and stats[it].n_distinct <= ORDINAL_MAX_CATEGORIES
        and _can_be_ordinal(data, it, stats[it])))
    reasons: list[str] = []
    estimator = _estimator(study, screening, stats, used, ordinal, reasons)
    continuous = ()
    if estimator == ORDINAL:
        continuous = tuple(it for it in used if study.items[it].treat_as == "continuous" or (
            study.items[it].treat_as == "auto" and not _can_be_ordinal(data, it, stats[it])))
    if estimator == ORDINAL:
        _require_declared_ordinal(study, data, stats, used)
    if continuous:
        estimator = MIXED
        ordinal = tuple(it for it in used if it not in continuous)
        if not ordinal:
            raise StudyError(
                f"{study.place_of('estimation', 'method')}: 'method: ordinal' asks for ordinal "
                f"analysis, but every item is continuous ({_list(continuous)}: declared so, or "
                f"with answers that are not whole numbers or more than {MAX_CATEGORIES} different "
                "values). Write method: auto or method: robust, or declare the ordinal items "
                "under items: treat_as:.")
        reasons.append(_mixed_reason(ordinal, continuous))
    elif estimator == ORDINAL:
        joining = tuple(it for it in used if it not in ordinal)
        if joining and ordinal:
            reasons.append(_joining_reason(joining))
        ordinal = tuple(used)
    missing = _missing(study, data, estimator, reasons)
    return MethodChoice(estimator, missing, tuple(reasons),
                        ordinal if estimator in (ORDINAL, MIXED) else (), continuous)


def _require_declared_ordinal(study: Study, data: ItemData, stats, used) -> None:
    """An item declared ordinal must have whole-number answers in at most
    ``MAX_CATEGORIES`` categories."""
    for item in used:
        if study.items[item].treat_as != ORDINAL or _can_be_ordinal(data, item, stats[item]):
            continue
        x = data.values[:, data.items.index(item)]
        x = x[~np.isnan(x)]
        fractional = x[x != np.round(x)]
        found = (f"answers that are not whole numbers (for example {fractional[0]:g})"
                 if fractional.size else
                 f"{stats[item].n_distinct} different answers (at most {MAX_CATEGORIES} can be "
                 "ordinal categories)")
        raise StudyError(
            f"{study.place_of('items', 'treat_as', item)}: the item '{item}' is declared "
            f"ordinal, but it has {found}. Declare it continuous (treat_as: {{{item}: "
            "continuous}), or recode its answers into whole-number categories.")


def _can_be_ordinal(data: ItemData, item: str, stats) -> bool:
    """Whole-number answers with at most ``MAX_CATEGORIES`` different values."""
    if stats.n_distinct > MAX_CATEGORIES:
        return False
    x = data.values[:, data.items.index(item)]
    x = x[~np.isnan(x)]
    return bool(np.all(x == np.round(x)))


def _joining_reason(joining) -> str:
    one = len(joining) == 1
    return (f"{_list(joining)} {'has' if one else 'have'} more than {ORDINAL_MAX_CATEGORIES} "
            f"answer categories, all whole numbers, so {'it is' if one else 'they are'} analysed "
            "as ordinal too: every correlation in the model is polychoric.")


def _mixed_reason(ordinal, continuous) -> str:
    one = len(continuous) == 1
    return (f"{_list(continuous)} {'is' if one else 'are'} continuous (declared so, or with "
            f"answers that are not whole numbers or more than {MAX_CATEGORIES} different values) "
            f"and {_list(ordinal)} {'is' if len(ordinal) == 1 else 'are'} analysed as ordinal, "
            "so the analysis mixes the two: ordinal items enter through their polychoric "
            "correlations, continuous items through Pearson correlations with each other and "
            "polyserial correlations with the ordinal items (Olsson, Drasgow & Dorans 1982). "
            "Continuous items are analysed standardized, so their estimates are standardized.")


def _estimator(study, screening, stats, used, ordinal, reasons) -> str:
    asked = study.estimation.method
    if asked != "auto":
        reasons.append(f"The model file sets the estimation method to '{asked}' "
                       f"({study.place_of('estimation', 'method')}).")
        if asked != ORDINAL and ordinal:
            reasons.append(f"{_list(ordinal)} {'has' if len(ordinal) == 1 else 'have'} four or "
                           f"fewer answer categories or {'is' if len(ordinal) == 1 else 'are'} "
                           f"declared ordinal, but {'it is' if len(ordinal) == 1 else 'they are'} "
                           "treated as continuous as the model file asks.")
        return asked
    if ordinal:
        reasons.append(
            f"{_list(ordinal)} {'is' if len(ordinal) == 1 else 'are'} treated as ordinal (declared "
            f"so, or with {ORDINAL_MAX_CATEGORIES} or fewer answer categories): with so few "
            "categories, treating answers as continuous biases the results, while with five or "
            "more robust maximum likelihood does about as well (Rhemtulla, Brosseau-Liard & "
            "Savalei 2012). These items are analysed by their polychoric correlations.")
        return ORDINAL
    skewed = [it for it in used if abs(_finite(stats[it].skewness)) > SKEW_LIMIT
              or _finite(stats[it].excess_kurtosis) > KURTOSIS_LIMIT]
    mardia = screening.mardia
    mardia_rejects = mardia is not None and mardia.kurtosis_p < MARDIA_ALPHA
    if skewed or mardia_rejects:
        evidence = []
        if skewed:
            evidence.append(f"{_list(skewed)} {'has' if len(skewed) == 1 else 'have'} "
                            f"|skewness| above {SKEW_LIMIT:g} or excess kurtosis above "
                            f"{KURTOSIS_LIMIT:g}, where normal-theory statistics break down "
                            "(Curran, West & Finch 1996)")
        if mardia_rejects:
            evidence.append(f"Mardia's (1970) multivariate kurtosis test rejects normality "
                            f"(z = {mardia.kurtosis_z:.2f}, p = {_p(mardia.kurtosis_p)})")
        reasons.append("The answers are not normally distributed: " + "; ".join(evidence) +
                       ". The estimates are maximum likelihood, with robust (sandwich) standard "
                       "errors and a chi-square corrected for non-normality (Satorra & Bentler "
                       "1994; Yuan & Bentler 2000 with missing answers).")
        return ROBUST
    reasons.append(f"No item has |skewness| above {SKEW_LIMIT:g} or excess kurtosis above "
                   f"{KURTOSIS_LIMIT:g} (Curran, West & Finch 1996)"
                   + (" and Mardia's (1970) multivariate kurtosis test does not reject "
                      "normality" if mardia is not None else "")
                   + ", so normal-theory maximum likelihood is used.")
    return NORMAL


def _missing(study, data, estimator, reasons) -> str:
    asked = study.estimation.missing
    n_missing = int(np.isnan(data.values).sum())
    if n_missing == 0:
        reasons.append("No answers are missing, so every respondent is used.")
        return NONE
    rate = n_missing / data.values.size
    share = f"{rate:.1%} of the answers are missing"
    if estimator in (ORDINAL, MIXED):
        kinds = "polychoric" if estimator == ORDINAL else "polychoric, polyserial and Pearson"
        if asked == FULL_INFORMATION:
            raise StudyError(
                f"{study.place_of('estimation', 'missing')}: 'missing: full-information' cannot "
                f"be combined with the ordinal method, which estimates the {kinds} "
                "correlations pair by pair from everyone who answered both items. Write "
                "missing: auto (pairwise) or missing: listwise, or choose method: robust.")
        if asked == LISTWISE:
            reasons.append(f"{share}; as the model file asks, only respondents who answered "
                           "every item are used (listwise deletion).")
            return LISTWISE
        reasons.append(f"{share}; each {kinds.replace(' and ', ' or ')} correlation uses "
                       "everyone who answered both items (pairwise), which assumes the answers "
                       "are missing completely at random.")
        return PAIRWISE
    if asked == LISTWISE:
        reasons.append(f"{share}; as the model file asks, only respondents who answered every "
                       "item are used (listwise deletion), which assumes the answers are "
                       "missing completely at random and discards information.")
        return LISTWISE
    reasons.append(f"{share}; every answer given is used by full-information maximum likelihood "
                   "(Arbuckle 1996), which assumes the answers are missing at random: whether "
                   "an answer is missing may depend on the answers a person gave, but not on the "
                   "answer they withheld (Rubin 1976). Little's (1988) test below checks the "
                   "stronger assumption that they are missing completely at random.")
    return FULL_INFORMATION


def _finite(x: float) -> float:
    return x if np.isfinite(x) else 0.0


def _p(p: float) -> str:
    return "< .001" if p < 0.001 else f"{p:.3f}".lstrip("0")


def _list(names) -> str:
    quoted = [f"'{n}'" for n in names]
    return quoted[0] if len(quoted) == 1 else ", ".join(quoted[:-1]) + " and " + quoted[-1]
