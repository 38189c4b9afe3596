"""Fit one rival model whose items are partly ordinal and partly continuous.

The counterpart of :func:`scalewright.evaluate_ordinal.evaluate_ordinal`
for mixed items: thresholds of the ordinal items and the mixed correlation
matrix — polychoric, polyserial (Olsson, Drasgow & Dorans 1982) and
Pearson correlations — with their joint sampling covariance
(:mod:`scalewright.estimate.mixed`); DWLS with robust standard errors and
the mean-and-variance adjusted test (:mod:`scalewright.estimate.dwls`);
the fit indices of the ordinal route
(:func:`scalewright.evaluate_ordinal.ordinal_fit_indices`).  A model whose
items are all ordinal is simply fitted on the ordinal route.

Metric.  The model is fitted to a correlation matrix, so every estimate is
in the standardized metric, the continuous items' included: their
loadings are standardized loadings and their residual variances are
``1 − communality``.  Their means and standard deviations are reported
under ``correlations_mixed`` (a raw-metric loading is the standardized
loading times the item's SD).

Reliability of each first-order construct:

* every item ordinal: ordinal alpha (Zumbo, Gadermann & Zeisser 2007) and
  categorical omega (Green & Yang 2009), as on the ordinal route
  (``reliability_ordinal``);
* every item continuous: alpha of the standardized items (from their
  Pearson correlations; Cronbach 1951) and McDonald's (1999) omega of the
  sum of standardized item scores from the standardized solution
  (``reliability_continuous``);
* items of both kinds: no coefficient, and a note says why
  (``reliability_notes``): the coefficients for ordinal sums and those for
  continuous sums each need every item of the sum to be of their kind.

References
----------
Olsson, U., Drasgow, F. & Dorans, N. J. (1982). The polyserial correlation
coefficient. Psychometrika 47, 337–347.
Zumbo, B. D., Gadermann, A. M. & Zeisser, C. (2007). Ordinal versions of
coefficients alpha and theta for Likert rating scales. Journal of Modern
Applied Statistical Methods 6, 21–29.
Green, S. B. & Yang, Y. (2009). Reliability of summed item scores using
structural equation modeling: an alternative to coefficient alpha.
Psychometrika 74, 155–167.
Cronbach, L. J. (1951). Coefficient alpha and the internal structure of
tests. Psychometrika 16, 297–334.
McDonald, R. P. (1999). Test theory: a unified treatment. Erlbaum.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from scalewright.blas import one_blas_thread
from scalewright.estimate.mixed import MixedMoments, mixed_moments
from scalewright.estimate.polychoric import OrdinalMoments
from scalewright.evaluate_ordinal import (
    dwls_model_result,
    evaluate_ordinal,
    refit_ordinal,
    rows_left_out,
    same_rows,
    sparse_category_notes,
)
from scalewright.layout import CONSTRUCT, Layout, Matrices
from scalewright.modelresult import ModelResult
from scalewright.omega import omega_total
from scalewright.ordinal_reliability import (
    categorical_omega,
    observed_sum_variance,
    ordinal_alpha,
)
from scalewright.reliability import cronbach_alpha
from scalewright.standardize import Standardized

MIXED_DWLS = ("diagonally weighted least squares (polychoric, polyserial and Pearson "
              "correlations; robust standard errors, mean-and-variance adjusted test)")


def evaluate_mixed(spec, data_values: np.ndarray, items: Sequence[str],
                   continuous_items: Sequence[str], scale: tuple | None = None,
                   collapse_sparse: bool = False, *, min_count: int = 5) -> ModelResult:
    """Fit model ``spec`` to ordinal and continuous answers by DWLS on their correlations.

    Parameters
    ----------
    spec : ModelSpec
        The rival model; its items are among ``items``.
    data_values : ndarray, n × len(items)
        Answers, NaN for a missing answer (``ItemData.values``).
    items : sequence of str
        Column names of ``data_values``.
    continuous_items : sequence of str
        The study's continuous items; every other item is ordinal.
    scale : (lowest, highest) or None
        Declared answer range of the ordinal items.
    collapse_sparse, min_count
        Merge sparse categories of the ordinal items (as on the ordinal route).

    Returns
    -------
    ModelResult
        ``fit`` is an :class:`~scalewright.evaluate_ordinal.OrdinalFitIndices`;
        ``extra`` holds ``thresholds`` (ordinal items only), ``missing_handling``
        ("pairwise"), ``ordinal_notes``, ``correlations_mixed`` (the matrix,
        its standard errors, pair counts, item types, the continuous items'
        means and SDs), ``reliability_ordinal``, ``reliability_continuous``
        and ``reliability_notes`` (see the module docstring).

    Raises
    ------
    StudyError
        From :func:`scalewright.estimate.mixed.mixed_moments`, naming the
        item or pair.
    """
    continuous = set(continuous_items)
    if not continuous & set(spec.items):
        return evaluate_ordinal(spec, data_values, items, scale, collapse_sparse,
                                min_count=min_count)
    names = tuple(items)
    x = np.asarray(data_values, dtype=float)[:, [names.index(it) for it in spec.items]]
    answered = ~np.isnan(x).all(axis=1)
    x = x[answered]
    ordinal = [it not in continuous for it in spec.items]
    with one_blas_thread():
        moments = mixed_moments(x, tuple(spec.items), ordinal,
                                scales=[tuple(scale) if scale else None] * len(ordinal),
                                collapse_sparse=collapse_sparse, min_count=min_count)
    sparse = [] if collapse_sparse else sparse_category_notes(
        moments.ordinal_items, moments.categories, moments.codes, min_count)
    extra = {
        "thresholds": {it: t.tolist() for it, t in zip(moments.ordinal_items, moments.thresholds)},
        "missing_handling": "pairwise",
        "ordinal_notes": _notes(moments, x, int((~answered).sum())) + sparse,
        "correlations_mixed": moments.to_dict(),
    }
    return dwls_model_result(spec, moments, "dwls-mixed", MIXED_DWLS, extra, mixed_reliability)

def refit_mixed(spec, moments: MixedMoments, data_values: np.ndarray, items: Sequence[str],
                continuous_items: Sequence[str], scale: tuple | None = None,
                collapse_sparse: bool = False) -> ModelResult:
    """The DWLS fit of ``spec``, a model on some of the items of ``moments``
    (the larger model's, from :func:`evaluate_mixed` on ``data_values``;
    ordinal moments when it had no continuous item) for the refits of the
    refinement path, as
    :func:`scalewright.evaluate_ordinal.refit_ordinal`: the moments read off
    the larger model's (:meth:`MixedMoments.subset`, exact on the same rows),
    no reliability or report keys.  Estimated afresh by :func:`evaluate_mixed`
    when some row answered none of ``spec``'s items, or when no continuous
    item is left (the model is then ordinal)."""
    if isinstance(moments, OrdinalMoments):          # the larger model was ordinal already
        return refit_ordinal(spec, moments, data_values, items, scale, collapse_sparse)
    if not same_rows(moments, data_values, items, spec.items) or \
            not set(continuous_items) & set(spec.items):
        return evaluate_mixed(spec, data_values, items, continuous_items, scale, collapse_sparse)
    with one_blas_thread():
        subset = moments.subset(spec.items)
    return dwls_model_result(spec, subset, "dwls-mixed", MIXED_DWLS, {}, lambda *fitted: {})


def _notes(moments: MixedMoments, x: np.ndarray, empty_rows: int) -> list[str]:
    """What the report must say about the mixed route, in sentences."""
    p = len(moments.items)
    pairs = moments.n_pairs[np.triu_indices(p, 1)]
    notes = [(
        f"The model mixes ordinal items ({_quoted(moments.ordinal_items)}) and continuous items "
        f"({_quoted(moments.continuous_items)}). The thresholds of the ordinal items and the "
        "correlations were estimated first: polychoric correlations between ordinal items "
        "(two-step, Olsson 1979), polyserial correlations between a continuous and an ordinal "
        "item (two-step, Olsson, Drasgow & Dorans 1982) and Pearson correlations between "
        "continuous items. The model was fitted to this correlation matrix by diagonally "
        "weighted least squares with robust standard errors and the mean-and-variance adjusted "
        "test (Muthén, du Toit & Spisic 1997; Asparouhov & Muthén 2010). Every item is "
        "analysed standardized, so all estimates, the continuous items' loadings and residual "
        "variances included, are in the standardized metric (residual variances are 1 minus "
        "the communalities); the continuous items' means and standard deviations are listed "
        "with the correlations.")]
    if np.isnan(x).any() or empty_rows:
        notes.append(
            f"Missing answers were handled pairwise: each correlation uses every respondent who "
            f"answered both items ({pairs.min()} to {pairs.max()} of {moments.n_rows} rows), and "
            "each threshold, mean and standard deviation every answer to its item. This assumes "
            "the answers are missing completely at random."
            + (f" {rows_left_out(empty_rows)}" if empty_rows else ""))
    else:
        notes.append("No answers were missing; every correlation uses all "
                     f"{moments.n_rows} rows (pairwise handling was not needed).")
    notes.extend(moments.collapse_notes)
    return notes


def mixed_reliability(layout: Layout, mats: Matrices, std: Standardized,
                      moments: MixedMoments) -> dict:
    """``reliability_ordinal``, ``reliability_continuous`` and ``reliability_notes``
    of every first-order construct (rules in the module docstring).

    For an all-ordinal construct the observed sum-score variance of
    categorical omega's ``omega_total_observed`` is that of the category
    ranks (0, 1, …, of the categories as analysed, after any collapsing)
    summed over its items, from the rows that answered all of them, as on
    the ordinal route.  Θ is already standardized because
    ``diag Σ = 1``.
    """
    row = {it: i for i, it in enumerate(layout.items)}
    is_ordinal = dict(zip(moments.items, moments.ordinal))
    thresholds = dict(zip(moments.ordinal_items, moments.thresholds))
    code_column = {it: k for k, it in enumerate(moments.ordinal_items)}
    all_thresholds = [thresholds.get(it, np.empty(0)).tolist() for it in layout.items]
    out = {"reliability_ordinal": [], "reliability_continuous": [], "reliability_notes": []}
    for f, (factor, kind) in enumerate(zip(layout.factors, layout.kinds)):
        if kind != CONSTRUCT:
            continue
        its = [it for it in layout.items if layout.primary.get(it) == factor]
        rows = [row[it] for it in its]
        corr = moments.raw_correlations[np.ix_(rows, rows)]
        kinds = {is_ordinal[it] for it in its}
        if kinds == {True}:
            codes = moments.codes[:, [code_column[it] for it in its]]
            omega = categorical_omega(
                std.loadings, std.latent_correlations, mats.residuals, all_thresholds, rows, f,
                item_names=its, construct=factor,
                observed_sum_variance=observed_sum_variance(codes))
            out["reliability_ordinal"].append(
                {"ordinal_alpha": ordinal_alpha(corr) if len(rows) > 1 else None,
                 **omega.to_dict()})
        elif kinds == {False}:
            omega = omega_total(std.loadings, std.latent_correlations, mats.residuals, rows, f,
                                item_names=its, construct=factor)
            out["reliability_continuous"].append(
                {"alpha_standardized": float(cronbach_alpha(corr)) if len(rows) > 1 else None,
                 **omega.to_dict()})
        else:
            ordinal_its = [it for it in its if is_ordinal[it]]
            continuous_its = [it for it in its if not is_ordinal[it]]
            out["reliability_notes"].append(
                f"Construct '{factor}' mixes ordinal items ({_quoted(ordinal_its)}) and "
                f"continuous items ({_quoted(continuous_its)}), so no reliability coefficient "
                "is given for its sum score: ordinal alpha and categorical omega need every item "
                "ordinal, and alpha and omega of standardized scores need every item "
                "continuous. The standardized loadings above show how well each item measures "
                "the construct.")
    return out


def _quoted(names) -> str:
    return ", ".join(f"'{n}'" for n in names)
