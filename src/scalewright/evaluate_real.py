"""Fit one rival model by the method :mod:`scalewright.methods` chose:
normal-theory or robust ML, on complete rows or by full-information ML over
the missing-data patterns; then fit indices (with the robust versions),
standardized solution and warnings, as :func:`scalewright.evaluate.evaluate_normal`
does for complete data.

* complete data, robust: sandwich standard errors, Satorra–Bentler scaled
  and adjusted statistics, robust CFI/TLI/RMSEA (:mod:`scalewright.estimate.robust`);
* missing answers: FIML with standard errors from the observed information,
  and with ``robust`` the Yuan–Bentler (2000) sandwich and scaled statistics
  (:mod:`scalewright.estimate.fiml`).

The BLAS is pinned to one thread around the engine, as in ``evaluate.py``.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, replace

import numpy as np

from scalewright.blas import one_blas_thread
from scalewright.diagnostics import model_warnings
from scalewright.estimate.fiml import (baseline_yuan_bentler, fiml_information, fit_fiml,
                                       missing_patterns, observed_information, pattern_blocks,
                                       pattern_moments, saturated_em, with_intercepts,
                                       yuan_bentler)
from scalewright.estimate.mcar import little_mcar
from scalewright.estimate.result import Estimate, invert_information
from scalewright.estimate.robust import RobustTest, baseline_test, robust_fit_indices, robust_ml
from scalewright.estimate.normal import Block, complete_data_blocks
from scalewright.evaluate import NORMAL_ML, POINT_GRAD_TOL, evaluate_moments, fit_from
from scalewright.indices import FitIndices, ScaledFitIndices, fit_indices
from scalewright.itemdata import ItemData
from scalewright.layout import INTERCEPT
from scalewright.methods import FULL_INFORMATION, MIXED, ORDINAL, ROBUST, MethodChoice
from scalewright.modelresult import ModelResult
from scalewright.specify import build_layout
from scalewright.standardize import standardize

LABELS = {
    ("normal", False): NORMAL_ML,
    ("robust", False): "maximum likelihood with robust (sandwich) standard errors and the "
                       "Satorra–Bentler scaled test",
    ("normal", True): "full-information maximum likelihood (normal theory)",
    ("robust", True): "full-information maximum likelihood with Yuan–Bentler robust standard "
                      "errors and scaled test",
}


@dataclass(frozen=True)
class RobustFitIndices(ScaledFitIndices):
    """:class:`~scalewright.indices.ScaledFitIndices` plus the robust indices
    (JSON keys ``cfi_robust``, ``tli_robust``, ``rmsea_robust``,
    ``rmsea_robust_ci90``, ``adjusted_subsample_rows``)."""

    cfi_robust: float | None
    tli_robust: float | None
    rmsea_robust: float | None
    rmsea_robust_ci90: tuple
    adjusted_subsample_rows: int | None

    @classmethod
    def extend(cls, fit: FitIndices, model: RobustTest, baseline: RobustTest, n: int):
        extra = {**model.to_dict(), **robust_fit_indices(model, baseline, n)}
        extra["rmsea_robust_ci90"] = tuple(extra["rmsea_robust_ci90"])
        return cls(**asdict(fit), **extra)

    def to_dict(self) -> dict:
        d = super().to_dict()
        d["rmsea_robust_ci90"] = list(self.rmsea_robust_ci90)
        return d


def evaluate_with(spec, data: ItemData, choice: MethodChoice) -> ModelResult:
    """Fit model ``spec`` to the study's answers by the chosen method.

    Parameters
    ----------
    spec : ModelSpec
        The rival model; its items are columns of ``data``.
    data : ItemData
        The answers (NaN = missing).
    choice : MethodChoice
        From :func:`scalewright.methods.choose_method`; the ordinal and
        mixed routes are not handled here.

    Returns
    -------
    ModelResult
        With :class:`RobustFitIndices` as ``fit`` when the estimator is
        robust, and the item intercepts under ``extra["intercepts"]`` for FIML.
    """
    x = np.asarray(data.values[:, [data.items.index(it) for it in spec.items]])
    return evaluate_answers(spec, x, choice, data.file.name)


def evaluate_answers(spec, x: np.ndarray, choice: MethodChoice, where: str,
                     start_from: Estimate | None = None, *,
                     trial: bool = False, moments: Block | None = None) -> ModelResult:
    """:func:`evaluate_with` on the answer matrix of the model's items
    (columns in ``spec.items`` order, NaN = missing); ``where`` names the
    data file in messages; ``start_from``, the estimate of a related model,
    gives the start values of the parameters both name alike (refits).
    ``moments``, when the caller has them, are the mean and covariance
    (divisor n) of the rows of ``x`` without a missing answer, which the
    complete-data route then does not compute again.
    A ``trial`` fit (the trial removals of the refinement path, which are
    compared by their fit only) skips the standard errors, the robust
    corrections and the RMSEA interval and close-fit p: ``acov`` is None,
    the fit indices are the normal-theory ones, the interval NaN."""
    if choice.estimator in (ORDINAL, MIXED):
        raise ValueError("the ordinal and mixed routes have their own evaluation; "
                         "evaluate_answers fits normal-theory and robust ML only")
    robust = choice.estimator == ROBUST
    with one_blas_thread():
        incomplete = np.isnan(x).any(axis=1)
        if choice.missing_handling == FULL_INFORMATION and incomplete.any():
            return _full_information(spec, x, robust, where, start_from, trial)
        return _complete(spec, x[~incomplete] if incomplete.any() else x, robust, start_from,
                         trial, moments)


def _complete(spec, x: np.ndarray, robust: bool, start_from: Estimate | None,
              trial: bool = False, moments: Block | None = None) -> ModelResult:
    """Complete rows: normal-theory ML (on ``moments`` when given, the moments
    of ``x``), then the robust corrections if asked."""
    block = complete_data_blocks(x)[0] if moments is None else moments
    result = evaluate_moments(spec, block, start_from, trial=trial)
    est = result.estimate
    if not robust or est.acov is None:
        return result
    corrected = robust_ml(est.layout, est.theta, x, result.fit.chi_square)
    fit = RobustFitIndices.extend(result.fit, corrected.test, baseline_test(x, est.layout.items),
                                  est.n)
    estimate = replace(est, acov=corrected.acov, method="robust-ml")
    return replace(result, estimate=estimate, fit=fit, estimator=LABELS[("robust", False)],
                   warnings=result.warnings + corrected.notes)


def _full_information(spec, x: np.ndarray, robust: bool, where: str,
                      start_from: Estimate | None, trial: bool = False) -> ModelResult:
    patterns = missing_patterns(x, tuple(spec.items), where)
    moments = pattern_moments(x, patterns)
    saturated = saturated_em(moments)
    fitted = fit_fiml(build_layout(spec, saturated.cov), x, moments, saturated, start_from)
    layout, theta, n = fitted.layout, fitted.theta, fitted.n
    robust = robust and not trial
    acov, unidentified = None, ()
    if not trial:
        # the Yuan–Bentler corrections need A_β and the casewise scores; the standard
        # errors alone need only the observed information, formed cell by cell
        info = fiml_information(layout, theta, x, patterns, moments) if robust else \
            observed_information(layout.patterns[0], layout.n_params, theta, moments)
        acov, unidentified = invert_information(info.observed, n)
    mats = layout.patterns[0].matrices(theta)
    fit = fit_indices(loglik=fitted.loglik, saturated=saturated.loglik, df=fitted.df, n=n,
                      n_params=layout.n_params, baseline=fitted.baseline,
                      sample_covs=[saturated.cov], implied_covs=[mats.implied_cov], weights=[n],
                      interval=not trial)
    if robust and acov is not None:
        corrected = yuan_bentler(info, n, fit.chi_square, fitted.df)
        acov = corrected.acov
        baseline = baseline_yuan_bentler(x, patterns, moments, saturated)
        fit = RobustFitIndices.extend(fit, corrected.test, baseline, n)
    estimate = Estimate(layout, theta, acov, fitted.record, n, fitted.loglik,
                        "robust-fiml" if robust else "fiml", unidentified,
                        fitted.objective.blocks)
    std = standardize(mats)
    se = estimate.se
    intercepts = [{"item": prm.a, "estimate": float(theta[k]),
                   "se": float(se[k]) if np.isfinite(se[k]) else None}
                  for k, prm in enumerate(layout.params) if prm.kind == INTERCEPT]
    return ModelResult(spec.name, estimate, fit, std,
                       LABELS[("robust" if robust else "normal", True)],
                       tuple(model_warnings(estimate, std)), {"intercepts": intercepts})


def fiml_point_estimate(spec, x: np.ndarray, where: str, start_from: Estimate,
                        start_cov: np.ndarray) -> Estimate:
    """FIML point estimates of ``spec`` on ``x`` (NaN = missing), and nothing
    else: no information matrix, saturated or baseline model, or fit
    indices.  As :func:`scalewright.evaluate.point_estimate` for missing
    answers: ``start_from``, the estimate of a larger model fitted to the same
    rows, gives the start values of the shared parameters (intercepts
    included), ``start_cov`` (items in ``spec.items`` order) those of the rest;
    a warm start that fails is retried from the usual start values."""
    with one_blas_thread():
        blocks = pattern_blocks(pattern_moments(x, missing_patterns(x, tuple(spec.items), where)))
        means = np.nanmean(x, axis=0)
        layout, theta, record, objective = fit_from(
            spec, start_cov, blocks, start_from, grad_tol=POINT_GRAD_TOL,
            prepare=lambda layout: with_intercepts(layout, means))
        return Estimate(layout, theta, None, record, objective.n, objective.loglik(theta),
                        "fiml", (), blocks)


def missing_data_summary(data: ItemData, items: tuple[str, ...] | None = None) -> dict:
    """The ``data`` key additions: missing-data patterns, per-item missing
    rates, and Little's (1988) MCAR test (``None`` without missing answers).

    ``items`` defaults to all of the study's items.
    """
    items = tuple(data.items) if items is None else tuple(items)
    x = np.asarray(data.values)
    if items != tuple(data.items):
        x = x[:, [data.items.index(it) for it in items]]
    with one_blas_thread():
        patterns = missing_patterns(x, items, data.file.name)
        out = patterns.to_dict()
        test = None
        if len(patterns.counts) > 1:
            test = little_mcar(pattern_moments(x, patterns)).to_dict()
    out["little_mcar"] = test
    return out
