"""Fit one rival model to the data and evaluate it: the estimation core
called with the BLAS pinned to one thread (why: :mod:`scalewright.blas`),
then fit indices, standardized solution and warnings.
"""

from __future__ import annotations

from typing import Callable

import numpy as np

from scalewright.blas import one_blas_thread
from scalewright.diagnostics import model_warnings
from scalewright.estimate.fisher import OptimizerRecord
from scalewright.estimate.normal import Block, NormalFit, complete_data_blocks, fit_normal
from scalewright.estimate.result import Estimate, invert_information
from scalewright.indices import fit_indices, independence_chi_square, saturated_loglik
from scalewright.layout import Layout
from scalewright.modelresult import ModelResult
from scalewright.specify import build_layout
from scalewright.standardize import standardize

NORMAL_ML = "maximum likelihood (normal theory)"

#: convergence threshold of :func:`point_estimate` (largest gradient element of −ℓ/N)
POINT_GRAD_TOL = 1e-7


def evaluate_normal(spec, x: np.ndarray) -> ModelResult:
    """Normal-theory ML for one model on complete data ``x`` (n × p, columns
    in ``spec.items`` order)."""
    with one_blas_thread():
        return evaluate_moments(spec, complete_data_blocks(x)[0])


def fit_from(spec, cov: np.ndarray, blocks: tuple, start_from: Estimate | None, *,
             grad_tol: float = 1e-8, prepare: Callable[[Layout], Layout] = lambda layout: layout
             ) -> tuple[Layout, np.ndarray, OptimizerRecord, NormalFit]:
    """Normal-theory ML estimates of ``spec`` on ``blocks``: ``layout, theta,
    record, objective``.

    With ``start_from``, the estimate of a related model (the model with one
    more item, say), the fit starts from its values of the parameters both
    name alike (:meth:`Estimate.start_for`) and from plain start values for
    the rest (``build_layout(..., plain_start=True)``); a warm start that
    does not converge is retried from the usual start values, computed from
    ``cov``, as is every fit without ``start_from``.  ``prepare`` adds to a
    layout what the blocks need (the intercepts of FIML)."""
    if start_from is not None:
        layout = prepare(build_layout(spec, cov, plain_start=True))
        theta, record, objective = fit_normal(layout, blocks, start_from.start_for(layout),
                                              grad_tol=grad_tol)
        if record.converged:
            return layout, theta, record, objective
    layout = prepare(build_layout(spec, cov))
    return (layout, *fit_normal(layout, blocks, grad_tol=grad_tol))


def evaluate_moments(spec, block: Block, start_from: Estimate | None = None, *,
                     trial: bool = False) -> ModelResult:
    """Normal-theory ML for one model from the sample moments of complete
    data (the sufficient statistics): ``block.cov`` (÷n), ``block.mean``,
    ``block.n``, items in ``spec.items`` order.  ``start_from``, the estimate
    of a related model, gives the start values of the parameters both name
    alike (:func:`fit_from`).  A ``trial`` fit, one of the trial removals of
    the refinement path, which are compared by their fit only, stops at the
    gradient tolerance of :func:`point_estimate` (its chi-square is then
    within about ``N·g²/i`` ≈ 1e-10 of the optimum's) and skips the standard
    errors (``acov`` is None) and the RMSEA interval and close-fit p (NaN;
    :func:`~scalewright.indices.fit_indices`)."""
    with one_blas_thread():
        blocks = (block,)
        layout, theta, record, objective = fit_from(
            spec, block.cov, blocks, start_from, grad_tol=POINT_GRAD_TOL if trial else 1e-8)
        acov, unidentified = None, ()
        if not trial:
            _, _, info = objective.value_grad_info(theta)
            acov, unidentified = invert_information(info, objective.n)
        loglik = objective.loglik(theta)
        estimate = Estimate(layout, theta, acov, record, objective.n, loglik, "ml", unidentified,
                            blocks)
        covs, ns = [block.cov], [block.n]
        mats = estimate.matrices()
        fit = fit_indices(
            loglik=loglik, saturated=saturated_loglik(covs, ns), df=layout.df(),
            n=objective.n, n_params=layout.n_params + layout.p,
            baseline=independence_chi_square(covs, ns), sample_covs=covs,
            implied_covs=[mats.implied_cov], weights=ns, interval=not trial)
        std = standardize(mats)
        warnings = model_warnings(estimate, std)
    return ModelResult(spec.name, estimate, fit, std, NORMAL_ML, tuple(warnings))


def refit_columns(spec, x: np.ndarray, columns, start_from: Estimate | None = None
                  ) -> ModelResult:
    """The refit contract of the scale-quality stages: fit ``spec`` to the
    ``columns`` of ``x`` (its items, in ``spec.items`` order) by complete-data
    ML, from ``start_from``'s estimates where given (:func:`fit_from`).
    Stages receive the refit as a function of the whole answer matrix and
    the column indices, so that a refit that starts from moments need not copy
    a large data matrix column by column."""
    return evaluate_moments(spec, complete_data_blocks(x[:, columns])[0], start_from)


def point_estimate(spec, block: Block, start_from: Estimate | None = None) -> Estimate:
    """Normal-theory ML estimates of ``spec`` from complete-data moments, and
    nothing else: no standard errors (``acov`` is None), fit indices or
    warnings.  For the refits that need only the solution (omega if an item
    is dropped); ``start_from``, the estimate of a larger model, supplies the
    start values of the parameters the two share, so the refit begins near
    its solution.  A warm start that fails to converge is retried from the
    usual start values.  The refit stops at a largest gradient element of
    :data:`POINT_GRAD_TOL` (the full fits: 1e-8), which leaves the estimates
    some 1e-7 from the optimum, far below the three decimals a coefficient
    derived from them is shown with, and saves an iteration."""
    with one_blas_thread():
        blocks = (block,)
        layout, theta, record, objective = fit_from(spec, block.cov, blocks, start_from,
                                                    grad_tol=POINT_GRAD_TOL)
        return Estimate(layout, theta, None, record, objective.n, objective.loglik(theta), "ml",
                        (), blocks)


def estimate_columns(spec, x: np.ndarray, columns) -> Estimate:
    """The point-estimate refit contract of the scale-quality stages, as
    :func:`refit_columns` (complete data, ``columns`` of ``x``) but returning
    only the :class:`~scalewright.estimate.result.Estimate` of
    :func:`point_estimate`."""
    return point_estimate(spec, complete_data_blocks(x[:, columns])[0])


def moments_subset(block: Block, items: tuple[str, ...], subset: tuple[str, ...]) -> Block:
    """The moments of ``subset`` of the ``items`` a block was computed for."""
    position = {item: k for k, item in enumerate(items)}
    index = np.array([position[i] for i in subset])
    return Block(block.group, np.arange(len(index)), block.n,
                 block.cov[np.ix_(index, index)], block.mean[index])
