"""Fit one rival model to ordinal items: thresholds and polychoric
correlations (pairwise), DWLS with robust standard errors and the
mean-and-variance adjusted test, fit indices from that test, the
standardized solution, ordinal alpha and categorical omega per construct.
The counterpart of :func:`scalewright.evaluate.evaluate_normal` for the
ordinal route; BLAS is pinned to one thread around the engine as there.

Fit indices (all from the scaled-and-shifted statistic ``T_adj`` of
Asparouhov & Muthén 2010, see :mod:`scalewright.estimate.dwls`):

* ``chi_square`` = ``T_adj`` on the model's df, ``p_value`` from χ²_df;
* CFI (Bentler 1990) and TLI (Tucker & Lewis 1973) against the
  independence model fitted by the same estimator (every polychoric
  correlation zero, thresholds saturated, ``p(p−1)/2`` df), whose statistic
  is corrected in the same way;
* RMSEA = √(max(T_adj − df, 0)/(df (N − 1))) with its interval and
  close-fit test from the noncentral χ² (Browne & Cudeck 1993) applied to
  ``T_adj``;
* SRMR = root mean square of ``r_ij − ρ̂_ij`` over the ``p(p−1)/2``
  correlations (the unit diagonal is left out: it is fitted exactly).

DWLS has no likelihood: ``loglik``, ``aic``, ``bic`` and ``sabic`` are
``None``.  ``n_params`` counts the estimated model parameters (the
thresholds are saturated and not counted; the residual variances follow
from the unit variances of the latent responses).

References
----------
Asparouhov, T. & Muthén, B. (2010). Simple second order chi-square
correction. Technical appendix.
Bentler, P. M. (1990). Comparative fit indexes in structural models.
Psychological Bulletin 107, 238–246.
Browne, M. W. & Cudeck, R. (1993). Alternative ways of assessing model fit.
In Bollen & Long (eds.), Testing Structural Equation Models, 136–162. Sage.
Tucker, L. R. & Lewis, C. (1973). A reliability coefficient for maximum
likelihood factor analysis. Psychometrika 38, 1–10.
Zumbo, B. D., Gadermann, A. M. & Zeisser, C. (2007). Ordinal versions of
coefficients alpha and theta for Likert rating scales. Journal of Modern
Applied Statistical Methods 6, 21–29.
Green, S. B. & Yang, Y. (2009). Reliability of summed item scores using
structural equation modeling: an alternative to coefficient alpha.
Psychometrika 74, 155–167.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass

import numpy as np

from scalewright.blas import one_blas_thread
from scalewright.diagnostics import model_warnings
from scalewright.estimate.dwls import DwlsFit, DwlsModel, fit_dwls
from scalewright.estimate.polychoric import OrdinalMoments, ordinal_moments
from scalewright.estimate.result import DwlsData, Estimate
from scalewright.indices import (
    FitIndices,
    ScaledFitIndices,
    comparative_fit,
    rmsea,
    rmsea_close_fit_p,
    rmsea_interval,
)
from scalewright.layout import CONSTRUCT, Layout, Matrices
from scalewright.modelresult import ModelResult
from scalewright.ordinal_reliability import (
    categorical_omega,
    observed_sum_variance,
    ordinal_alpha,
)
from scalewright.specify import build_layout
from scalewright.standardize import Standardized, standardize

ORDINAL_DWLS = ("diagonally weighted least squares (polychoric correlations; robust standard "
                "errors, mean-and-variance adjusted test)")

TEST_NAME = ("scaled and shifted (Asparouhov & Muthén 2010); mean-scaled and Satterthwaite "
             "versions alongside (Muthén, du Toit & Spisic 1997)")


@dataclass(frozen=True)
class OrdinalFitIndices(ScaledFitIndices):
    """:class:`~scalewright.indices.ScaledFitIndices` of a DWLS fit plus the
    unadjusted statistics and the scale and shift of its reported test.

    ``chi_square`` is the scaled-and-shifted statistic; ``chi_square_unadjusted``
    is ``T = N F_DWLS``; ``chi_square_scaled = T/c`` with ``scaling_factor = c``;
    ``chi_square_adjusted`` on ``df_adjusted`` is the Satterthwaite version;
    ``shift_scale`` and ``shift`` are ``a`` and ``b`` of ``a·T + b``.
    Undefined values are ``None`` in :meth:`to_dict`.
    """

    chi_square_unadjusted: float
    baseline_chi_square_unadjusted: float
    shift_scale: float | None
    shift: float | None
    test: str

    def to_dict(self) -> dict:
        return {key: _json_number(value) for key, value in super().to_dict().items()}


def _json_number(value):
    if isinstance(value, list):
        return [_json_number(v) for v in value]
    if isinstance(value, float) and not np.isfinite(value):
        return None
    return value


def ordinal_fit_indices(fit: DwlsFit) -> OrdinalFitIndices:
    """Fit indices of a DWLS fit (formulas in the module docstring)."""
    return dwls_fit_indices(fit.test, fit.baseline, fit.n, fit.srmr, int(fit.estimated.sum()))


def dwls_fit_indices(test, base, n: int, srmr: float, n_params: int,
                     groups: int = 1) -> OrdinalFitIndices:
    """Fit indices from the DWLS statistics ``test`` of the model and
    ``base`` of the baseline (formulas in the module docstring), one group
    or ``groups`` (RMSEA multiplied by √groups, Steiger 1998; the ordinal
    multi-group fit of :mod:`scalewright.multigroup_ordinal`)."""
    chi2, df = test.chi_square_shifted, test.df
    base_chi2 = base.chi_square_shifted
    cfi, tli = comparative_fit(chi2, df, base_chi2, base.df)
    extra = test.to_dict()
    plain = FitIndices(
        chi_square=float(chi2), df=int(df), p_value=test.p_value_shifted,
        baseline_chi_square=float(base_chi2), baseline_df=int(base.df), cfi=cfi, tli=tli,
        rmsea=rmsea(chi2, df, n, groups), rmsea_ci90=rmsea_interval(chi2, df, n, 0.90, groups),
        rmsea_p_close=rmsea_close_fit_p(chi2, df, n, 0.05, groups), srmr=srmr,
        loglik=None, n_params=int(n_params), aic=None, bic=None, sabic=None)
    return OrdinalFitIndices(
        **asdict(plain), chi_square_unadjusted=test.chi_square,
        baseline_chi_square_unadjusted=base.chi_square,
        chi_square_scaled=extra["chi_square_scaled"], scaling_factor=extra["scaling_factor"],
        p_value_scaled=extra["p_value_scaled"], chi_square_adjusted=extra["chi_square_adjusted"],
        df_adjusted=extra["df_adjusted"], p_value_adjusted=extra["p_value_adjusted"],
        shift_scale=test.shift_scale, shift=test.shift, test=TEST_NAME)


def evaluate_ordinal(spec, data_values: np.ndarray, items: Sequence[str],
                     scales: Mapping[str, tuple] | tuple | None = None,
                     collapse_sparse: bool = False, *, min_count: int = 5) -> ModelResult:
    """Fit model ``spec`` to ordinal answers by DWLS on polychoric correlations.

    Parameters
    ----------
    spec : ModelSpec
        The rival model; its items are among ``items``.
    data_values : ndarray, n × len(items)
        Whole-number answers, NaN for a missing answer (``ItemData.values``).
    items : sequence of str
        Column names of ``data_values``.
    scales : mapping item → (lowest, highest), or one (lowest, highest) pair for
        every item, or None
        Declared answer ranges; every declared category must have answers
        (or be merged with ``collapse_sparse``).
    collapse_sparse : bool
        Merge categories with fewer than ``min_count`` answers into a
        neighbour (the model file's ``collapse_sparse: true``).
    min_count : int
        See :func:`scalewright.estimate.polychoric.collapse_sparse_categories`.

    Returns
    -------
    ModelResult
        ``fit`` is an :class:`OrdinalFitIndices`; ``extra`` holds
        ``thresholds`` ({item: [τ…]}), ``missing_handling`` ("pairwise"),
        ``ordinal_notes`` (sentences for the report), ``polychoric`` (the
        correlation matrix, pair counts and standard errors) and
        ``reliability_ordinal`` (per construct: ordinal alpha and
        categorical omega).

    Raises
    ------
    StudyError
        From the polychoric step, naming the item or pair: an item with too
        many distinct answers, answers that are not whole numbers, a declared
        category nobody used, one answer value only, no answers at all, a pair
        with too few rows answering both, a pair whose correlation reaches ±1.
    """
    names = tuple(items)
    columns = [names.index(it) for it in spec.items]
    x = np.asarray(data_values, dtype=float)[:, columns]
    answered = ~np.isnan(x).all(axis=1)
    x = x[answered]
    with one_blas_thread():
        moments = ordinal_moments(x, tuple(spec.items), scales=_scales_for(spec.items, scales),
                                  collapse_sparse=collapse_sparse, min_count=min_count)
    extra = {
        "thresholds": {it: t.tolist() for it, t in zip(moments.items, moments.thresholds)},
        "missing_handling": "pairwise",
        "ordinal_notes": _notes(moments, x, int((~answered).sum()))
        + ([] if collapse_sparse else sparse_category_notes(moments.items, moments.categories,
                                                            moments.codes, min_count)),
        "polychoric": {"items": list(moments.items),
                       "correlations": moments.raw_correlations.tolist(),
                       "correlation_se": moments.correlation_se.tolist(),
                       "n_pairs": moments.n_pairs.tolist(),
                       "smoothed": moments.smoothed},
    }
    return dwls_model_result(
        spec, moments, "dwls", ORDINAL_DWLS, extra,
        lambda *fitted: {"reliability_ordinal": ordinal_reliability(*fitted)})


def refit_ordinal(spec, moments: OrdinalMoments, data_values: np.ndarray, items: Sequence[str],
                  scales: Mapping[str, tuple] | tuple | None = None,
                  collapse_sparse: bool = False) -> ModelResult:
    """The DWLS fit of ``spec``, a model on some of the items of ``moments``
    (the larger model's, from :func:`evaluate_ordinal` on ``data_values``),
    for the refits of the refinement path: its fit, estimates and warnings,
    without the reliability and report keys of :func:`evaluate_ordinal`.

    The moments are read off the larger model's
    (:meth:`~scalewright.estimate.polychoric.OrdinalMoments.subset`), which is
    exact on the same rows; when some row answered none of ``spec``'s items,
    the rows differ and the moments are estimated afresh."""
    if not same_rows(moments, data_values, items, spec.items):
        return evaluate_ordinal(spec, data_values, items, scales, collapse_sparse)
    with one_blas_thread():
        subset = moments.subset(spec.items)
    return dwls_model_result(spec, subset, "dwls", ORDINAL_DWLS, {}, lambda *fitted: {})


def same_rows(moments, data_values: np.ndarray, items: Sequence[str], kept: Sequence[str]
              ) -> bool:
    """Whether the rows answering some item of ``kept`` (columns of
    ``data_values`` named by ``items``) are as many as the rows behind
    ``moments``, i.e. whether a subset of the moments is exact (no row
    answered only items that were dropped)."""
    columns = [tuple(items).index(it) for it in kept]
    answered = ~np.isnan(np.asarray(data_values, dtype=float)[:, columns])
    return int(answered.any(axis=1).sum()) == moments.n_rows


def dwls_model_result(spec, moments, estimator: str, method: str, extra: dict,
                      reliability) -> ModelResult:
    """Fit ``spec`` by DWLS to ``moments`` (ordinal or mixed: thresholds,
    correlations and their sampling covariance) and gather the
    :class:`ModelResult` of the ordinal and mixed routes: the fit indices
    of :func:`ordinal_fit_indices`, the standardized solution, the warnings
    (with a sentence when the correlation matrix was smoothed for the start
    values), ``extra`` followed by the reliability keys
    ``reliability(layout, matrices, standardized, moments)`` returns.
    ``estimator`` names the estimate's kind, ``method`` the method in words."""
    with one_blas_thread():
        layout = build_layout(spec, moments.correlations)
        fit = fit_dwls(layout, moments)
        estimate = Estimate(layout, fit.theta, fit.acov, fit.record, fit.n, float("nan"),
                            estimator, fit.unidentified, dwls_data=DwlsData.of(moments))
        mats = estimate.matrices()
        std = standardize(mats)
        indices = ordinal_fit_indices(fit)
        reliability_keys = reliability(layout, mats, std, moments)
    warnings = model_warnings(estimate, std)
    if moments.smoothed:
        warnings.append(moments.smoothing_note + " The model itself was fitted to the pairwise "
                        "estimates as they are (DWLS never inverts the matrix); the smoothed "
                        "matrix gave only the start values.")
    return ModelResult(spec.name, estimate, indices, std, method, tuple(warnings),
                       extra | reliability_keys,
                       fitted=DwlsModel.of(fit, moments))   # for the DWLS difference test


def _scales_for(items, scales):
    if scales is None:
        return None
    if isinstance(scales, Mapping):
        return [scales.get(it) for it in items]
    return [tuple(scales)] * len(items)


def _notes(moments: OrdinalMoments, x: np.ndarray, empty_rows: int) -> list[str]:
    """What the report must say about the ordinal route, in sentences."""
    p = len(moments.items)
    pairs = moments.n_pairs[np.triu_indices(p, 1)]
    notes = [(
        "The items were treated as ordinal: thresholds and polychoric correlations were "
        "estimated first (two-step, Olsson 1979), and the model was fitted to the correlations "
        "by diagonally weighted least squares with robust standard errors and the "
        "mean-and-variance adjusted test (Muthén, du Toit & Spisic 1997; Asparouhov & Muthén "
        "2010). The latent responses have unit variance, so the residual variances are "
        "1 minus the communalities.")]
    if np.isnan(x).any() or empty_rows:
        notes.append(
            f"Missing answers were handled pairwise: each polychoric correlation uses every "
            f"respondent who answered both items ({pairs.min()} to {pairs.max()} of "
            f"{moments.n_rows} rows). This assumes the answers are missing completely at "
            "random." + (f" {rows_left_out(empty_rows)}" if empty_rows else ""))
    else:
        notes.append("No answers were missing; every polychoric correlation uses all "
                     f"{moments.n_rows} rows (pairwise handling was not needed).")
    notes.extend(moments.collapse_notes)
    return notes


def rows_left_out(n: int) -> str:
    """The sentence on rows without any answer to the model's items."""
    return (f"{n} row without any answer to these items was left out." if n == 1 else
            f"{n} rows without any answer to these items were left out.")


def sparse_category_notes(items: Sequence[str], categories: Sequence[np.ndarray],
                          codes: np.ndarray, min_count: int) -> list[str]:
    """One sentence per item with a category used fewer than ``min_count``
    times (five: common practice, no source), offering to merge it.
    ``categories`` and ``codes`` are those of the moments (the categories
    as analysed, :attr:`OrdinalMoments.codes`)."""
    out = []
    for j, (item, cats) in enumerate(zip(items, categories)):
        counts = np.bincount(codes[codes[:, j] >= 0, j], minlength=cats.size)
        sparse = np.flatnonzero(counts < min_count)
        if sparse.size:
            listed = ", ".join(f"{cats[k]:g} ({counts[k]} answer{'' if counts[k] == 1 else 's'})"
                               for k in sparse)
            out.append(f"Item '{item}' has sparse categories: {listed}. Their thresholds rest "
                       f"on fewer than {min_count} answers each and make the polychoric "
                       "correlations of this item unstable; to merge them into a neighbouring "
                       "category, set collapse_sparse: true under items: in the model file.")
    return out


def ordinal_reliability(layout: Layout, mats: Matrices, std: Standardized,
                        moments: OrdinalMoments) -> list[dict]:
    """Ordinal alpha (Zumbo, Gadermann & Zeisser 2007) and categorical omega
    (Green & Yang 2009) of every first-order construct.

    Ordinal alpha uses the polychoric correlations of the construct's items;
    categorical omega the standardized solution (loadings, latent
    correlations, residual covariances ``Θ``, which are already standardized
    because ``diag Σ = 1``) and the thresholds.  The observed sum-score
    variance for ``omega_total_observed`` is that of the category ranks
    (0, 1, …, of the categories as analysed, after any collapsing) summed
    over the construct's items, from the rows that answered all of them
    (:func:`~scalewright.ordinal_reliability.observed_sum_variance`).
    """
    row = {it: i for i, it in enumerate(layout.items)}
    out = []
    for f, (factor, kind) in enumerate(zip(layout.factors, layout.kinds)):
        if kind != CONSTRUCT:
            continue
        its = [it for it in layout.items if layout.primary.get(it) == factor]
        rows = [row[it] for it in its]
        alpha = ordinal_alpha(moments.raw_correlations[np.ix_(rows, rows)]) \
            if len(rows) > 1 else None
        omega = categorical_omega(
            std.loadings, std.latent_correlations, mats.residuals,
            [t.tolist() for t in moments.thresholds], rows, f, item_names=its,
            construct=factor, observed_sum_variance=observed_sum_variance(moments.codes[:, rows]))
        out.append({"ordinal_alpha": alpha, **omega.to_dict()})
    return out
