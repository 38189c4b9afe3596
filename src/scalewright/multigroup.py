"""One model fitted in several groups at once, with a mean structure.

Each group ``g`` has its own matrices

    Σ_g = Λ_g A_g Ψ_g A_gᵀ Λ_gᵀ + Θ_g,      μ_g = ν_g + Λ_g A_g α_g,

and all groups share one parameter vector (:class:`~scalewright.layout.Layout`
with one :class:`~scalewright.layout.Pattern` per group), so an equality
constraint across groups is a parameter index used by every group.  Which
parameters are shared follows the invariance *step*:

============  ==========================================================
step          equal across groups
============  ==========================================================
configural    nothing (same pattern of free and fixed cells)
metric        loadings (and higher-order paths)
scalar        loadings and item intercepts
strict        loadings, intercepts and residual variances
============  ==========================================================

A *released* parameter (partial invariance; Byrne, Shavelson & Muthén 1989)
is one that the step would share but that stays group-specific.

Identification (the reference group is group 0):

* ``unit-variance``: every latent variance fixed at 1 in the single-group
  model stays fixed at 1 in the reference group; in the other groups it is
  estimated once loadings are equal (metric and later steps).
* ``marker``: each construct's first item has loading 1 in every group, so the
  marker item's loading is taken as equal across groups.
* latent means ``α`` are 0 in the reference group, and in the other groups
  they are estimated once intercepts are equal (scalar and later), for every
  latent variable that no other latent variable explains (the first-order
  constructs under a higher-order factor differ in mean only through it).

Counting moments: ``p(p+1)/2 + p`` per group (covariances and means), so
``df = G(p(p+1)/2 + p) − q`` (:meth:`Layout.df`); the configural model's df is
``G`` times the single-group model's, because its ``p`` intercepts per group
reproduce the means exactly.

Fit indices of a multi-group model (conventions):

* chi-square ``2(ℓ_sat − ℓ)``, with the saturated model free in means and
  covariances within every group;
* baseline: independence *within each group*, with means and variances free
  in every group, on ``G p(p−1)/2`` df: the same baseline for every step, so
  differences in CFI and TLI between steps come from the models' chi-squares
  alone (Widaman & Thompson 2003 discuss the choice);
* RMSEA multiplied by √G (Steiger 1998);
* SRMR over the covariance *and* mean residuals of each group (standardized
  by the sample standard deviations), pooled over groups weighted by size:
  ``SRMR = √(Σ_g n_g m_g / N)`` with ``m_g`` the mean squared standardized
  residual of group ``g`` over its ``p(p+1)/2 + p`` moments, so that unequal
  intercepts show in SRMR too.

Standard errors (normal theory) come from the expected information for
complete data and from the observed information with missing answers, as
in one group (:func:`missing_data_information`).

References
----------
Byrne, B. M., Shavelson, R. J. & Muthén, B. (1989). Testing for the
equivalence of factor covariance and mean structures: the issue of partial
measurement invariance. Psychological Bulletin 105, 456–466.
Jöreskog, K. G. (1971). Simultaneous factor analysis in several populations.
Psychometrika 36, 409–426.
Sörbom, D. (1974). A general method for studying differences in factor means
and factor structure between groups. British Journal of Mathematical and
Statistical Psychology 27, 229–239.
Steiger, J. H. (1998). A note on multiple sample extensions of the RMSEA fit
index. Structural Equation Modeling 5, 411–419.
Widaman, K. F. & Thompson, J. S. (2003). On specifying the null model for
incremental fit indices in structural equation modeling. Psychological
Methods 8, 16–37.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass, replace
from functools import cached_property

import numpy as np
from threadpoolctl import threadpool_limits

from scalewright.estimate.fiml import (FimlInformation, PatternMoments, baseline_yuan_bentler,
                                       missing_patterns, observed_information, pattern_jacobian,
                                       pattern_moments, saturated_em, saturated_information,
                                       saturated_score_chunks, yuan_bentler)
from scalewright.estimate.normal import Block, NormalFit, complete_data_blocks, fit_normal
from scalewright.estimate.robust import RobustML, RobustTest, baseline_test, robust_fit_indices
from scalewright.estimate.result import Estimate, invert_information
from scalewright.estimate.spd_inverse import spd_inverse
from scalewright.estimate.yuan_bentler import score_traces
from scalewright.indices import (FitIndices, fit_indices, independence_chi_square,
                                 saturated_loglik)
from scalewright.layout import (FACTOR_COV, INTERCEPT, LATENT_MEAN, LOADING, PATH,
                                RESIDUAL_COV, Cells, Layout, Param, Pattern)
from scalewright.specify import MARKER, build_layout

CONFIGURAL, METRIC, SCALAR, STRICT = "configural", "metric", "scalar", "strict"
STEPS = (CONFIGURAL, METRIC, SCALAR, STRICT)

#: parameter classes made equal at each step
LOADINGS, INTERCEPTS, RESIDUALS = "loadings", "intercepts", "residual variances"
SHARED = {CONFIGURAL: (), METRIC: (LOADINGS,), SCALAR: (LOADINGS, INTERCEPTS),
          STRICT: (LOADINGS, INTERCEPTS, RESIDUALS)}
#: the class a step adds to the previous one
ADDED = {METRIC: LOADINGS, SCALAR: INTERCEPTS, STRICT: RESIDUALS}


def parameter_class(param: Param) -> str | None:
    """The invariance class of a (shared-form) parameter, or None for
    parameters that are always group-specific (latent variances and
    covariances, residual covariances, latent means)."""
    if param.kind in (LOADING, PATH):
        return LOADINGS
    if param.kind == INTERCEPT:
        return INTERCEPTS
    if param.kind == RESIDUAL_COV and param.is_variance:
        return RESIDUALS
    return None


@dataclass(frozen=True)
class GroupMoments:
    """What a multi-group model is fitted to, reference group first.

    ``means`` and ``covs`` are each group's saturated ML moments (the sample
    moments with divisor ``n_g`` for complete data; the EM estimates when
    answers are missing), used for start values and SRMR; ``blocks`` are the
    data blocks of the likelihood (one per group, or one per group and
    missing-data pattern); ``saturated_loglik`` is ℓ of the saturated model
    (free means and covariances in every group) and ``baseline`` the
    chi-square and df of the independence model within each group.
    """

    labels: tuple[str, ...]
    ns: tuple[int, ...]
    means: tuple[np.ndarray, ...]
    covs: tuple[np.ndarray, ...]
    blocks: tuple[Block, ...]
    saturated_loglik: float
    baseline: tuple[float, int]
    full_information: bool = False
    values: tuple[np.ndarray, ...] = ()   # each group's rows (NaN = no answer), for robust tests
    items: tuple[str, ...] = ()           # the columns of ``values``

    @cached_property
    def group_patterns(self) -> tuple:
        """Per group: missing-data patterns and their moments, which the
        observed information is built from."""
        parts = []
        for x in self.values:
            patterns = missing_patterns(x, self.items, "the data file")
            parts.append((patterns, pattern_moments(x, patterns)))
        return tuple(parts)

    @cached_property
    def pattern_parts(self) -> tuple:
        """Per group: missing-data patterns, their moments and the saturated
        (EM) fit, which the robust corrections are built from."""
        return tuple((patterns, pm, saturated_em(pm)) for patterns, pm in self.group_patterns)

    @cached_property
    def baseline_robust(self) -> RobustTest:
        """The scaled test of the baseline model (:func:`baseline_robust_test`)."""
        return baseline_robust_test(self)

    @property
    def n(self) -> int:
        return int(sum(self.ns))

    def pooled_cov(self) -> np.ndarray:
        """The pooled within-group covariance ``Σ_g n_g S_g / N``."""
        return sum(n * s for n, s in zip(self.ns, self.covs)) / self.n


def complete_moments(labels, values: np.ndarray, index: np.ndarray,
                     items: tuple[str, ...] = ()) -> GroupMoments:
    """Moments of complete data (no NaN, columns ``items``) split by ``index``
    (positions in ``labels``)."""
    blocks = complete_data_blocks(values, index, len(labels))
    covs = [b.cov for b in blocks]
    ns = [b.n for b in blocks]
    return GroupMoments(tuple(labels), tuple(ns), tuple(b.mean for b in blocks), tuple(covs),
                        blocks, saturated_loglik(covs, ns), independence_chi_square(covs, ns),
                        values=tuple(values[index == g] for g in range(len(labels))),
                        items=tuple(items) or tuple(f"column {j + 1}" for j in
                                                    range(values.shape[1])))


def build_multigroup_layout(spec, moments: GroupMoments, step: str,
                            released: frozenset = frozenset()) -> Layout:
    """The layout of ``spec`` in all groups for one invariance step.

    Parameters
    ----------
    spec : ModelSpec
        The model as the user wrote it.
    moments : GroupMoments
        Group sizes and moments, reference group first (start values come
        from each group's covariance and means).
    step : str
        One of :data:`STEPS`.
    released : frozenset of Param
        Parameters (in their shared form, ``group=None``) that the step
        would make equal but that stay group-specific.

    Returns
    -------
    Layout
        One pattern per group; ``groups`` holds the labels.
    """
    labels = moments.labels
    n_groups = len(labels)
    base = build_layout(spec, moments.pooled_cov())
    starts = np.array([build_layout(spec, cov).start for cov in moments.covs])   # G × q_base
    shared_classes = SHARED[step]
    p, m = base.p, len(base.factors)

    params: list[Param] = []
    start: list[float] = []
    weights = np.asarray(moments.ns, dtype=float) / moments.n

    def add(param: Param, value: float) -> int:
        params.append(param)
        start.append(float(value))
        return len(params) - 1

    def share(param: Param) -> bool:
        return parameter_class(param) in shared_classes and param not in released

    # base parameters: one index for all groups, or one per group
    index = np.empty((n_groups, base.n_params), dtype=np.intp)
    for k, param in enumerate(base.params):
        if share(param):
            index[:, k] = add(param, weights @ starts[:, k])
        else:
            index[:, k] = [add(replace(param, group=label), starts[g, k])
                           for g, label in enumerate(labels)]
    # intercepts ν
    nu_index = np.empty((n_groups, p), dtype=np.intp)
    pooled_mean = weights @ np.array(moments.means)
    for i, item in enumerate(base.items):
        param = Param(INTERCEPT, item, item)
        if share(param):
            nu_index[:, i] = add(param, pooled_mean[i])
        else:
            nu_index[:, i] = [add(replace(param, group=label), moments.means[g][i])
                              for g, label in enumerate(labels)]
    # latent variances fixed at 1 for scaling: free outside the reference group
    # once loadings are equal
    pattern0 = base.patterns[0]
    free_var = np.zeros(m, dtype=bool)
    free_var[pattern0.disturbances.rows[pattern0.disturbances.rows ==
                                        pattern0.disturbances.cols]] = True
    scaled_by_variance = np.flatnonzero((np.diag(pattern0.fixed.disturbances) == 1.0) & ~free_var)
    freed_variances = LOADINGS in shared_classes
    # latent means: free outside the reference group once intercepts are equal
    explained = np.any(pattern0.fixed.paths != 0, axis=1)
    explained[pattern0.paths.rows] = True
    mean_factors = np.flatnonzero(~explained) if INTERCEPTS in shared_classes else np.array([], int)

    patterns = []
    for g, label in enumerate(labels):
        psi_extra = []
        if g > 0 and freed_variances:
            psi_extra = [(j, j, add(Param(FACTOR_COV, base.factors[j], base.factors[j], label),
                                    1.0)) for j in scaled_by_variance]
        alpha = [] if g == 0 else [(j, 0, add(Param(LATENT_MEAN, base.factors[j],
                                                    base.factors[j], label), 0.0))
                                   for j in mean_factors]
        patterns.append(_group_pattern(pattern0, index[g], nu_index[g], psi_extra, alpha))

    notes = base.notes + _notes(spec, step, labels, released)
    return Layout(name=spec.name, items=base.items, factors=base.factors, kinds=base.kinds,
                  primary=base.primary, patterns=tuple(patterns), params=tuple(params),
                  start=np.array(start), groups=tuple(labels), notes=notes)


def _group_pattern(base: Pattern, index: np.ndarray, nu_index: np.ndarray,
                   psi_extra: list, alpha: list) -> Pattern:
    """One group's pattern: the single-group cells renumbered, plus intercepts,
    freed latent variances and latent means."""
    def renumber(cells: Cells) -> Cells:
        return Cells(cells.rows, cells.cols, index[cells.params])

    psi = renumber(base.disturbances)
    if psi_extra:
        extra = Cells.from_triples(psi_extra)
        psi = Cells(np.concatenate([psi.rows, extra.rows]), np.concatenate([psi.cols, extra.cols]),
                    np.concatenate([psi.params, extra.params]))
    p = base.p
    intercepts = Cells(np.arange(p), np.zeros(p, dtype=np.intp), nu_index.copy())
    return Pattern(base.fixed, renumber(base.loadings), renumber(base.paths), psi,
                   renumber(base.residuals), intercepts, Cells.from_triples(alpha))


def _notes(spec, step: str, labels, released) -> tuple[str, ...]:
    reference = labels[0]
    notes = [f"Fitted in {len(labels)} groups at once ({', '.join(labels)}); "
             f"'{reference}' is the reference group."]
    shared = SHARED[step]
    if shared:
        notes.append(f"Equal across groups: {', '.join(shared)}"
                     + (f", except {len(released)} released parameter{'s' * (len(released) != 1)}" if released else "")
                     + ".")
    else:
        notes.append("No parameter is equal across groups (configural model): every group "
                     "has its own loadings, intercepts and residual variances.")
    if LOADINGS in shared and spec.identification != MARKER:
        notes.append(f"Latent variances are 1 in '{reference}' and estimated in the other "
                     "groups.")
    if INTERCEPTS in shared:
        notes.append(f"Latent means are 0 in '{reference}' and estimated in the other groups.")
    else:
        notes.append("Latent means are 0 in every group; the intercepts carry the item means.")
    return tuple(notes)


@dataclass(frozen=True)
class GroupFit:
    """A multi-group model fitted by normal-theory ML: estimates and fit."""

    layout: Layout
    estimate: Estimate
    fit: FitIndices
    objective: NormalFit
    ns: tuple[int, ...]          # group sizes, reference first
    robust: RobustML | None = None
    robust_indices: dict | None = None

    @property
    def cfi(self) -> float:
        """CFI used for decisions: the robust one when the fit is robust (and
        the robust one is defined)."""
        robust = None if self.robust is None else self.robust_indices["cfi_robust"]
        return self.fit.cfi if robust is None else robust

    @property
    def rmsea(self) -> float:
        """RMSEA used for decisions: the robust one when the fit is robust (and
        the robust one is defined)."""
        robust = None if self.robust is None else self.robust_indices["rmsea_robust"]
        return self.fit.rmsea if robust is None else robust

    def to_dict(self) -> dict:
        out = self.fit.to_dict()
        if self.robust is not None:
            out |= self.robust.test.to_dict() | self.robust_indices
        return out


def fit_multigroup(layout: Layout, moments: GroupMoments,
                   start: np.ndarray | None = None, robust: bool = False) -> GroupFit:
    """Fit a multi-group layout by normal-theory ML (BLAS pinned to one thread)
    and compute its fit indices under the conventions of this module.  The
    standard errors come from the expected information for complete data and
    from the observed one with missing answers
    (:func:`missing_data_information`); with ``robust``, the scaled
    statistics, robust fit indices and sandwich standard errors
    (:func:`robust_test`) are added and replace them."""
    blocks = moments.blocks
    observed = moments.full_information and not robust
    with threadpool_limits(limits=1, user_api="blas"):
        theta, record, objective = fit_normal(layout, blocks, start)
        info = (missing_data_information(layout, theta, moments) if observed
                else objective.value_grad_info(theta)[2])
        acov, unidentified = invert_information(info, objective.n)
    loglik = objective.loglik(theta)
    estimate = Estimate(layout, theta, acov, record, objective.n, loglik,
                        "fiml" if observed else "ml", unidentified, blocks)
    mats = [estimate.matrices(g) for g in range(len(layout.patterns))]
    covs, ns = list(moments.covs), list(moments.ns)
    fit = fit_indices(loglik=loglik, saturated=moments.saturated_loglik, df=layout.df(),
                      n=objective.n, n_params=layout.n_params,
                      baseline=moments.baseline, sample_covs=covs,
                      implied_covs=[x.implied_cov for x in mats], weights=ns,
                      groups=len(layout.patterns))
    fit = replace(fit, srmr=srmr_with_means(moments, [x.implied_cov for x in mats],
                                            [x.implied_mean for x in mats]))
    if not robust:
        return GroupFit(layout, estimate, fit, objective, moments.ns)
    with threadpool_limits(limits=1, user_api="blas"):
        corrected = robust_test(layout, theta, moments, fit.chi_square, fit.df)
    indices = robust_fit_indices(corrected.test, moments.baseline_robust, moments.n,
                                 groups=len(layout.patterns))
    estimate = replace(estimate, acov=corrected.acov, method="robust ml")
    return GroupFit(layout, estimate, fit, objective, moments.ns, corrected, indices)


def missing_data_information(layout: Layout, theta: np.ndarray,
                             moments: GroupMoments) -> np.ndarray:
    """The information per case of ``θ`` that normal-theory standard errors
    use with missing answers (``moments`` by full-information ML).

    The expected information is not consistent under MAR (Kenward &
    Molenberghs 1998), so the observed one is used, as for one group: the
    groups are independent, so the Hessian of ``f = −ℓ/N`` is
    ``Σ_g w_g Ã_g`` with ``w_g = n_g/N`` and
    ``Ã_g = Δ_gᵀA_gΔ_g + Σ_k (∂f_g/∂β_gk) ∂²β_gk/∂θ∂θᵀ`` the observed
    information of group ``g``'s answers
    (:func:`scalewright.estimate.fiml.observed_information`).  A group
    without a missing answer contributes its expected information
    ``w_g Δ_gᵀA_gΔ_g`` (``A_g`` at the implied moments), the convention for
    complete data.

    References
    ----------
    Kenward, M. G. & Molenberghs, G. (1998). Likelihood based frequentist
    inference when data are missing at random. Statistical Science 13, 236–247.
    """
    weights = np.asarray(moments.ns, dtype=float) / moments.n
    total = np.zeros((layout.n_params, layout.n_params))
    for w, pattern, (patterns, pm) in zip(weights, layout.patterns, moments.group_patterns):
        if pm.masks.all():
            mats = pattern.matrices(theta)
            mu, sigma = mats.implied_mean, mats.implied_cov
            a_g, _, _ = saturated_information(_implied(pm, mu, sigma), mu, sigma)
            delta = pattern_jacobian(pattern, theta, layout.n_params)
            total += w * (delta.T @ a_g @ delta)
        else:
            total += w * observed_information(pattern, layout.n_params, theta, pm).observed
    return 0.5 * (total + total.T)


def robust_test(layout: Layout, theta: np.ndarray, moments: GroupMoments, chi_square: float,
                df: int) -> RobustML:
    """Scaled statistics and sandwich covariance of a multi-group model.

    Within group ``g`` (weight ``w_g = n_g/N``), ``A_g`` is the information
    per case and ``B_g`` the mean outer product of the casewise scores of the
    saturated parameters ``β_g = (vech Σ_g, μ_g)`` at the model-implied
    moments (with missing answers, over each person's answered items;
    :mod:`scalewright.estimate.fiml`).  For complete data ``B_g`` is instead
    the covariance of the scores at ``Σ̂_g`` with the rows centred at ``x̄_g``,
    ``W Γ̂ W`` with Γ̂ the sample covariance of ``(x_i − x̄, vech((x_i − x̄)
    (x_i − x̄)ᵀ))`` (Satorra & Bentler 1994), as in one group
    (:func:`scalewright.estimate.robust.robust_ml`): the mean outer product at
    the implied moments adds the misfit ``r̄ r̄ᵀ`` of the mean score, about
    ``T/N`` to ``tr(UΓ)``.  ``A_g`` is the expected information
    for complete data (positive definite even where the model misfits; the
    observed one need not be) and the observed information with missing
    answers, where the expected one is not consistent under MAR (Kenward &
    Molenberghs 1998).  Groups are independent, so for
    the whole sample ``A_β = ⊕ w_g A_g`` and ``B_β = ⊕ w_g B_g`` (block
    diagonal; never formed: the groups' score traces add,
    :class:`scalewright.estimate.yuan_bentler.ScoreTraces`), and with ``Δ``
    the stacked ``∂β_g/∂θ`` the Yuan–Bentler correction (:func:`scalewright.estimate.fiml.yuan_bentler`) gives
    ``tr(UΓ) = tr(A_β⁻¹B_β) − tr((ΔᵀA_βΔ)⁻¹ΔᵀB_βΔ)``, the scaling factor
    ``c = tr(UΓ)/df`` and the sandwich covariance
    ``(ΔᵀA_βΔ)⁻¹ ΔᵀB_βΔ (ΔᵀA_βΔ)⁻¹ / N`` (the first-order information, which
    equals the expected information at a model that fits).  With complete
    data this is the Satorra–Bentler (1994) scaled statistic with the scores
    taken at the implied moments; with missing answers the Yuan & Bentler
    (2000) statistic.

    References
    ----------
    Kenward, M. G. & Molenberghs, G. (1998). Likelihood based frequentist
    inference when data are missing at random. Statistical Science 13, 236–247.
    Satorra, A. & Bentler, P. M. (1994). Corrections to test statistics and
    standard errors in covariance structure analysis. In von Eye & Clogg
    (eds.), Latent Variables Analysis, 399–419. Sage.
    Yuan, K.-H. & Bentler, P. M. (2000). Three likelihood-based methods for
    mean and covariance structure analysis with nonnormal missing data.
    Sociological Methodology 30, 165–200.
    """
    weights = np.asarray(moments.ns, dtype=float) / moments.n
    first, traces = 0.0, None
    for g, (pattern, (patterns, pm, _)) in enumerate(zip(layout.patterns, moments.pattern_parts)):
        mats = pattern.matrices(theta)
        mu, sigma = mats.implied_mean, mats.implied_cov
        at = pm if moments.full_information else _implied(pm, mu, sigma)
        a_g = weights[g] * saturated_information(at, mu, sigma)[0]
        delta = pattern_jacobian(pattern, theta, layout.n_params)
        first = first + delta.T @ a_g @ delta
        # B_β = ⊕ w_g B_g = GᵀG/N, since B_g averages over the group's n_g = w_g N rows
        scores = (saturated_score_chunks(moments.values[g], patterns, mu, sigma)
                  if moments.full_information else
                  _centred_score_chunks(moments.values[g], patterns, sigma))
        group = score_traces(a_g, scores, patterns.n, delta)
        traces = group if traces is None else traces + group
    info = FimlInformation(first, first, traces.meat / moments.n, traces)
    return yuan_bentler(info, moments.n, chi_square, df)


def _centred_score_chunks(x: np.ndarray, patterns, sigma: np.ndarray) -> Iterator[np.ndarray]:
    """The casewise scores of ``β = (vech Σ, μ)`` at ``Σ̂`` for complete rows
    centred at their mean, less the scores' mean ``(½·vech(VSV − V), 0)``
    (halves on the diagonal, as the scores), ``V = Σ̂⁻¹``, ``S`` the ÷N
    covariance: their Gram over ``N`` is the scores' covariance."""
    mean = x.mean(axis=0)
    v = spd_inverse(sigma)
    rows, cols = np.tril_indices(len(mean))
    half = np.where(rows != cols, 1.0, 0.5)
    score_mean = np.concatenate([(v @ np.cov(x, rowvar=False, bias=True) @ v - v)[rows, cols]
                                 * half, np.zeros(len(mean))])
    for chunk in saturated_score_chunks(x, patterns, mean, sigma):
        yield chunk - score_mean


def _implied(pm: PatternMoments, mu: np.ndarray, sigma: np.ndarray) -> PatternMoments:
    """Pattern moments replaced by the implied ones, so that the observed
    information computed from them is the expected information."""
    both = pm.masks[:, :, None] & pm.masks[:, None, :]
    return PatternMoments(pm.masks, pm.counts, mu * pm.masks, sigma[None] * both)


def baseline_robust_test(moments: GroupMoments) -> RobustTest:
    """Scaled test of the multi-group baseline (independence within each
    group): the groups share no parameter, so ``T`` and ``tr(UΓ)`` are sums
    of the groups' own: with missing answers
    :func:`scalewright.estimate.fiml.baseline_yuan_bentler`, for complete data
    the Satorra–Bentler test of one group
    (:func:`scalewright.estimate.robust.baseline_test`; the saturated means add
    nothing to its trace).  The robust fit indices need only the scaling
    factor, so neither computes ``tr((UΓ)²)`` and ``trace_squared`` is NaN."""
    if not moments.full_information:
        tests = [baseline_test(x, moments.items) for x in moments.values]
    else:
        tests = [baseline_yuan_bentler(x, patterns, pm, saturated)
                 for x, (patterns, pm, saturated) in zip(moments.values, moments.pattern_parts)]
    return RobustTest(sum(t.chi_square for t in tests), sum(t.df for t in tests),
                      sum(t.trace for t in tests), float("nan"))


def srmr_with_means(moments: GroupMoments, implied_covs, implied_means) -> float:
    """SRMR over covariance and mean residuals, pooled over groups by size.

    In group ``g`` with sample SDs ``d``, the standardized residuals are
    ``(s_ij − σ̂_ij)/(d_i d_j)`` for ``i ≤ j`` and ``(x̄_i − μ̂_i)/d_i``; ``m_g``
    is the mean of their squares and ``SRMR = √(Σ_g n_g m_g / N)`` (Bentler
    1995 for the covariance part; the mean residuals join it when the model
    has a mean structure).

    References
    ----------
    Bentler, P. M. (1995). EQS Structural Equations Program Manual.
    Multivariate Software.
    """
    total = 0.0
    for n, s, xbar, sigma, mu in zip(moments.ns, moments.covs, moments.means,
                                     implied_covs, implied_means):
        d = np.sqrt(np.diag(s))
        resid = (s - sigma) / np.outer(d, d)
        squares = np.concatenate([resid[np.tril_indices_from(resid)] ** 2,
                                  ((xbar - mu) / d) ** 2])
        total += n * squares.mean()
    return float(np.sqrt(total / moments.n))


def carry_start(source: GroupFit, target: Layout) -> np.ndarray:
    """Start values for ``target`` from the estimates of a related layout.

    A parameter found in ``source`` under the same name keeps its value; a
    group-specific parameter whose shared form is in ``source`` takes the
    shared value; a shared parameter whose group-specific forms are in
    ``source`` takes their mean weighted by group size; anything else keeps
    the target's own start value.
    """
    theta = source.estimate.theta
    where = {param: k for k, param in enumerate(source.layout.params)}
    labels = source.layout.groups
    ns = np.array(source.ns, dtype=float)
    out = target.start.copy()
    for k, param in enumerate(target.params):
        if param in where:
            out[k] = theta[where[param]]
        elif param.group is not None and replace(param, group=None) in where:
            out[k] = theta[where[replace(param, group=None)]]
        elif param.group is None:
            forms = [where.get(replace(param, group=label)) for label in labels]
            if all(f is not None for f in forms):
                out[k] = ns @ theta[forms] / ns.sum()
    return out
