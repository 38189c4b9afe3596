"""One model fitted to ordinal items in several groups at once: multi-group
DWLS on each group's thresholds and polychoric correlations.

The model.  Behind every ordinal item ``j`` is a normal latent response
``y*_j``; the answer is category ``c`` when ``τ_j,c−1 < y*_j ≤ τ_j,c``.  In
group ``g`` the latent responses follow the factor model of
:mod:`scalewright.layout`,

    Σ*_g = Λ_g A_g Ψ_g A_gᵀ Λ_gᵀ + Θ_g,      μ*_g = ν_g + Λ_g A_g α_g,

and with ``σ_j = √Σ*_jj`` the moments a group's answers identify — the
thresholds and polychoric correlations of :mod:`scalewright.estimate.polychoric`,
both on the scale of a standard normal latent response — are

    τ̃_j,c = (τ_j,c − μ*_j) / σ_j,        ρ_jk = Σ*_jk / (σ_j σ_k).

Theta parameterization: the unique variances ``Θ_jj`` are parameters (fixed
at 1 where the identification fixes them) and ``σ_j`` follows from them; the
single-group route's "delta" form (``σ_j = 1``) cannot state equal unique
variances as a linear constraint, which the last step needs.

Identification (Wu & Estabrook 2016, theta parameterization; items with three
or more categories), reference group first:

==================  =====================================================================
step                equal across groups, and what that frees outside the reference group
==================  =====================================================================
configural          nothing; in *every* group ν = 0, Θ_jj = 1, α = 0 and the
                    single-group scaling (latent variances 1, or marker loadings 1):
                    the model is each group fitted on its own
thresholds          thresholds; ν_j and Θ_jj estimated outside the reference group
loadings            thresholds, loadings; latent variances estimated outside the
                    reference group (unit-variance scaling)
intercepts          thresholds, loadings, latent-response intercepts (ν = 0 in every
                    group); latent means estimated outside the reference group
unique variances    all of the above and Θ_jj = 1 in every group
==================  =====================================================================

Wu & Estabrook (2016) show that the configural model identified this way is
equivalent to fitting each group by itself, and that equal thresholds are
testable only beyond the second threshold of an item: the step adds
``(K_j − 3)(G − 1)`` df per item with ``K_j`` categories (none with three).
A threshold, loading, intercept or unique variance *released* for partial
invariance stays group-specific (an intercept or unique variance: free
outside the reference group).  A shift of all thresholds of an item together
is carried by its intercept, so it shows at the intercepts step.

Items with two categories (yes/no).  The rule behind the table is that each
threshold made equal frees one identification constraint of its item
outside the reference group: the first its intercept ``ν_j``, the second its
unique variance ``Θ_jj`` (Wu & Estabrook 2016).  A two-category item has one
threshold, so its unique variance is 1 in every group at every step, and
its threshold alone is not testable.  The count behind this, per item and
non-reference group, given the group's latent mean and variance (identified
by the other items): the group's answers identify two numbers of the item,
its standardized threshold ``τ̃`` and its standardized loading ``λ√ψ/σ``
(through the correlations) — the two parameters of a normal-ogive item,
``λ/√Θ`` and ``(τ − ν)/√Θ``.  Equal ``τ`` with ``ν`` free is no
restriction (``τ − ν`` stays free); freeing ``Θ`` as well would leave three
parameters for two numbers.  Equal ``λ`` with ``Θ = 1`` is one restriction,
and ``ν = 0`` then a second.  So a two-category item joins the sequence as

==================  =====================================================================
step                what the step adds for a two-category item
==================  =====================================================================
configural          as every item: threshold and loading per group, ν = 0, Θ_jj = 1
thresholds          nothing (not testable alone; the item stays as configured)
loadings            its threshold *and* loading equal; ν_j estimated outside the
                    reference group (1 df per item and non-reference group, before
                    the latent variances freed)
intercepts          ν_j = 0 in every group (1 df per item and non-reference group)
unique variances    nothing: Θ_jj = 1 in every group from the configural step on, so
                    equal unique variances are assumed, not tested
==================  =====================================================================

and a model of two-category items only skips the thresholds and unique
variances steps, which add nothing (configural → thresholds and loadings →
intercepts).  Over the sequence such an item adds ``2(G − 1)`` df, the
count of a normal-ogive item's two parameters in ``G − 1`` groups.  That Wu
& Estabrook (2016) treat binary items so — thresholds and loadings made
equal together, no separate test of threshold, intercept or unique
variance equality — is from memory; the counting above is what the code
rests on.  Equal unique variances of two-category items are an assumption
of every step (the same one the configural model makes).  A released
loading of a two-category item keeps its threshold equal and ``ν_j`` free;
its threshold is never released on its own (it would not be identified).

Fit function (stacked DWLS; Muthén, du Toit & Spisic 1997).  With ``s_g`` the
estimate vector of group ``g`` (thresholds, then correlations), ``Γ_g`` its
sampling covariance and ``m_g(θ)`` the model moments above, groups being
independent,

    F(θ) = Σ_g (s_g − m_g(θ))ᵀ W_g (s_g − m_g(θ)),   W_g = diag(Γ_g)⁻¹,

i.e. one DWLS fit to the stacked vector with the block-diagonal
``Γ = ⊕ Γ_g`` and diagonal weight ``W = ⊕ W_g``.  Its Jacobian ``Δ`` comes
from the rank-two cell derivatives (:func:`scalewright.layout.cell_derivatives`)
with ``∂σ_j/σ_j = a_j b_j/σ_j²``:

    ∂ρ_jk = (a_j b_k + b_j a_k)/(σ_j σ_k) − ρ_jk (∂σ_j/σ_j + ∂σ_k/σ_k),
    ∂τ̃_j,c = −∂μ*_j/σ_j − τ̃_j,c ∂σ_j/σ_j,       ∂τ̃_j,c/∂τ_j,c = 1/σ_j.

Robust standard errors ``H⁻¹ΔᵀWΓWΔH⁻¹`` with ``H = ΔᵀWΔ``, and the test
statistic ``T = eᵀWe`` with its mean-scaled, Satterthwaite and
scaled-and-shifted versions from ``t₁ = tr(UΓ)`` and ``t₂ = tr((UΓ)²)``,
exactly as the single-group route (:mod:`scalewright.estimate.dwls`, whose
trace formulas are used blockwise here); df = ``Σ_g (T_g + p(p−1)/2) − q``.

Fit indices (the single-group ordinal route's, extended to groups as the
continuous multi-group route does, :mod:`scalewright.multigroup`):

* ``chi_square`` is the scaled-and-shifted statistic (Asparouhov & Muthén
  2010); CFI and TLI against the baseline below, corrected the same way;
* baseline: independence within each group (every polychoric correlation 0,
  thresholds free in every group), ``G p(p−1)/2`` df, the same for every
  step; its ``T``, ``t₁`` and ``t₂`` are the sums of the groups';
* RMSEA from the scaled-and-shifted statistic with ``N − 1`` and multiplied
  by √G (Steiger 1998);
* SRMR over the threshold and correlation residuals of each group, pooled
  over groups by size, ``√(Σ_g n_g m_g / N)`` (``m_g`` the mean squared
  residual), so that unequal thresholds show in it as unequal intercepts do
  in the continuous route.

References
----------
Wu, H. & Estabrook, R. (2016). Identification of confirmatory factor analysis
models of different levels of invariance for ordered categorical outcomes.
Psychometrika 81, 1014–1045.
Muthén, B., du Toit, S. H. C. & Spisic, D. (1997). Robust inference using
weighted least squares and quadratic estimating equations in latent variable
modeling with categorical and continuous outcomes. Unpublished technical report.
Asparouhov, T. & Muthén, B. (2010). Simple second order chi-square
correction. Technical appendix.
Steiger, J. H. (1998). A note on multiple sample extensions of the RMSEA fit
index. Structural Equation Modeling 5, 411–419.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np

from scalewright.blas import one_blas_thread
from scalewright.estimate.dwls import DwlsTest
from scalewright.estimate.fisher import OptimizerRecord, fisher_scoring
from scalewright.estimate.result import Estimate, invert_information
from scalewright.estimate.robust import incidence
from scalewright.evaluate_ordinal import OrdinalFitIndices, dwls_fit_indices
from scalewright.layout import (FACTOR_COV, INTERCEPT, LATENT_MEAN, LOADING, PATH,
                                RESIDUAL_COV, Cells, Layout, Param, Pattern, cell_derivatives)
from scalewright.ordinal_groups import OrdinalGroupMoments
from scalewright.specify import MARKER, build_layout

#: kind of a threshold parameter (``Param(THRESHOLD, item, "c")`` for the c-th threshold)
THRESHOLD = "threshold"

#: steps, each named by the parameters it makes equal in addition to the step before
CONFIGURAL, THRESHOLDS, LOADINGS, INTERCEPTS, UNIQUE = (
    "configural", "thresholds", "loadings", "intercepts", "unique variances")
STEPS = (CONFIGURAL, THRESHOLDS, LOADINGS, INTERCEPTS, UNIQUE)
SHARED = {CONFIGURAL: (), THRESHOLDS: (THRESHOLDS,), LOADINGS: (THRESHOLDS, LOADINGS),
          INTERCEPTS: (THRESHOLDS, LOADINGS, INTERCEPTS),
          UNIQUE: (THRESHOLDS, LOADINGS, INTERCEPTS, UNIQUE)}
#: what each step's row says was made equal
LABELS = {CONFIGURAL: "configural (same structure)", THRESHOLDS: "equal thresholds",
          LOADINGS: "equal thresholds and loadings",
          INTERCEPTS: "equal thresholds, loadings and intercepts",
          UNIQUE: "equal thresholds, loadings, intercepts and unique variances"}

IDENTIFICATION = (
    "Wu & Estabrook (2016), theta parameterization: configural model with latent-response "
    "intercepts 0 and unique variances 1 in every group (each group fitted as on its own); "
    "once thresholds are equal, the intercepts and unique variances are estimated outside "
    "the reference group; equal loadings free the latent variances, equal intercepts the "
    "latent means, outside the reference group")

#: the step at which the one threshold of a two-category item is made equal (with its loading)
BINARY_THRESHOLD_STEP = LOADINGS

#: what each step adds for items with two answer categories (module docstring)
BINARY_ADDS = {
    CONFIGURAL: "no constraint (threshold and loading per group, intercept 0, unique variance "
                "1, as for every item)",
    THRESHOLDS: "no constraint (one threshold cannot be tested on its own, so it stays "
                "group-specific)",
    LOADINGS: "equal thresholds and equal loadings together (the latent-response intercept is "
              "then estimated outside the reference group)",
    INTERCEPTS: "latent-response intercepts of 0 in every group",
    UNIQUE: "no constraint (unique variances are 1 in every group from the configural step "
            "on: assumed equal, not testable with one threshold)"}

BINARY_IDENTIFICATION = (
    "Items with two answer categories have one threshold: their unique variance is 1 in every "
    "group, their threshold is made equal together with their loading (its intercept then "
    "estimated outside the reference group), and the intercepts step sets that intercept to "
    "0; equal thresholds alone and equal unique variances are not testable for them")


def binary_items(data: OrdinalGroupMoments) -> tuple[str, ...]:
    """The items with two answer categories (as analysed, after any merging)."""
    return tuple(item for item, k in zip(data.items, data.n_categories) if k == 2)


def steps_for(data: OrdinalGroupMoments) -> tuple[str, ...]:
    """The steps of the sequence that add a constraint for these items: with
    two-category items only, the thresholds and unique variances steps add
    nothing (module docstring) and are skipped."""
    if len(binary_items(data)) < len(data.items):
        return STEPS
    return tuple(step for step in STEPS if step not in (THRESHOLDS, UNIQUE))


def parameter_class(param: Param) -> str | None:
    """The invariance class of a (shared-form) parameter or constraint, or
    None for parameters that are always group-specific."""
    if param.kind == THRESHOLD:
        return THRESHOLDS
    if param.kind in (LOADING, PATH):
        return LOADINGS
    if param.kind == INTERCEPT:
        return INTERCEPTS
    if param.kind == RESIDUAL_COV and param.is_variance:
        return UNIQUE
    return None


@dataclass(frozen=True)
class OrdinalLayout(Layout):
    """A multi-group layout with thresholds: ``thresholds[g]`` holds the
    parameter index of each threshold in group ``g`` (item by item, ascending),
    ``threshold_items`` the item of each."""

    thresholds: tuple = ()
    threshold_items: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.intp))
    binary_items: tuple = ()

    def n_moments(self) -> int:
        """Thresholds and polychoric correlations in every group."""
        return len(self.patterns) * (self.threshold_items.size + self.p * (self.p - 1) // 2)


def build_ordinal_layout(spec, data: OrdinalGroupMoments, step: str,
                         released: frozenset = frozenset()) -> OrdinalLayout:
    """The layout of ``spec`` in all groups for one step (see the module docstring).

    ``released`` holds shared-form parameters (``group=None``) that the step
    would make equal but that stay group-specific; for intercepts and unique
    variances, ``Param(INTERCEPT, item, item)`` and
    ``Param(RESIDUAL_COV, item, item)`` stand for "fixed as in the reference
    group".  Start values: the single-group start of each group's polychoric
    matrix, rescaled to unique variances of 1, thresholds rescaled alike;
    shared parameters take the groups' average weighted by size; parameters
    that a step frees start at the value they were fixed at.
    """
    labels = data.labels
    n_groups = len(labels)
    shared = SHARED[step]
    binary = frozenset(binary_items(data))
    base = build_layout(spec, data.pooled_correlations())
    pattern0 = base.patterns[0]
    p, m = base.p, len(base.factors)
    weights = np.asarray(data.ns, dtype=float) / data.n
    starts, thr_starts = zip(*(_group_start(spec, base, mo) for mo in data.moments))
    starts, thr_starts = np.array(starts), np.array(thr_starts)

    params: list[Param] = []
    start: list[float] = []

    def add(param: Param, value: float) -> int:
        params.append(param)
        start.append(float(value))
        return len(params) - 1

    def step_of(param: Param) -> str | None:
        if param.kind == THRESHOLD and param.a in binary:
            return BINARY_THRESHOLD_STEP
        return parameter_class(param)

    def share(param: Param) -> bool:
        return step_of(param) in shared and param not in released

    def indices(param: Param, values: np.ndarray) -> list[int]:
        if share(param):
            return [add(param, weights @ values)] * n_groups
        return [add(replace(param, group=label), values[g]) for g, label in enumerate(labels)]

    res = pattern0.residuals
    unique_params = set(res.params[res.rows == res.cols].tolist())
    index = np.full((n_groups, base.n_params), -1, dtype=np.intp)
    for k, param in enumerate(base.params):
        if k not in unique_params:
            index[:, k] = indices(param, starts[:, k])
    categories = data.n_categories
    threshold_items = np.repeat(np.arange(p), np.asarray(categories) - 1)
    threshold_params = [Param(THRESHOLD, base.items[j], str(c + 1))
                        for j in range(p) for c in range(categories[j] - 1)]
    thr_index = np.array([indices(param, thr_starts[:, t])
                          for t, param in enumerate(threshold_params)], dtype=np.intp).T

    def free_outside_reference(kind: str, item: str, cls: str) -> bool:
        if item in binary and kind == RESIDUAL_COV:
            return False
        equal_thresholds = (BINARY_THRESHOLD_STEP if item in binary else THRESHOLDS) in shared
        return equal_thresholds and (cls not in shared or Param(kind, item, item) in released)

    free_var = np.zeros(m, dtype=bool)
    psi = pattern0.disturbances
    free_var[psi.rows[psi.rows == psi.cols]] = True
    scaled_by_variance = np.flatnonzero((np.diag(pattern0.fixed.disturbances) == 1.0) & ~free_var)
    explained = np.any(pattern0.fixed.paths != 0, axis=1)
    explained[pattern0.paths.rows] = True
    binary_in_order = tuple(item for item in base.items if item in binary)
    patterns = []
    for g, label in enumerate(labels):
        psi_extra, alpha, nu, unique = [], [], [], []
        if g > 0:
            if LOADINGS in shared:
                psi_extra = [(j, j, add(Param(FACTOR_COV, base.factors[j], base.factors[j],
                                              label), 1.0)) for j in scaled_by_variance]
            if INTERCEPTS in shared:
                alpha = [(j, 0, add(Param(LATENT_MEAN, base.factors[j], base.factors[j], label),
                                    0.0)) for j in np.flatnonzero(~explained)]
            nu = [(i, 0, add(Param(INTERCEPT, item, item, label), 0.0))
                  for i, item in enumerate(base.items)
                  if free_outside_reference(INTERCEPT, item, INTERCEPTS)]
            unique = [(i, i, add(Param(RESIDUAL_COV, item, item, label), 1.0))
                      for i, item in enumerate(base.items)
                      if free_outside_reference(RESIDUAL_COV, item, UNIQUE)]
        patterns.append(_group_pattern(pattern0, index[g], psi_extra, unique, nu, alpha))
    return OrdinalLayout(
        name=spec.name, items=base.items, factors=base.factors, kinds=base.kinds,
        primary=base.primary, patterns=tuple(patterns), params=tuple(params),
        start=np.array(start), groups=tuple(labels),
        notes=base.notes + _notes(spec, step, labels, released, binary_in_order),
        thresholds=tuple(thr_index), threshold_items=threshold_items,
        binary_items=binary_in_order)


def _group_start(spec, base: Layout, moments) -> tuple[np.ndarray, np.ndarray]:
    """One group's start values in the theta parameterization: the
    single-group start from its polychoric matrix, with each item's row
    divided by the square root of its start residual variance (so that the
    unique variance is 1), and its thresholds multiplied by the same factor."""
    layout = build_layout(spec, moments.correlations)
    where = {q: k for k, q in enumerate(layout.params)}
    row = {item: i for i, item in enumerate(layout.items)}
    residual = np.array([layout.start[where[Param(RESIDUAL_COV, it, it)]] for it in layout.items])
    scale = 1.0 / np.sqrt(np.clip(residual, 1e-3, None))
    factor = np.ones(layout.n_params)
    for k, q in enumerate(layout.params):
        if q.kind == LOADING:
            factor[k] = scale[row[q.b]]
        elif q.kind == RESIDUAL_COV and not q.is_variance:
            factor[k] = scale[row[q.a]] * scale[row[q.b]]
    thresholds = np.concatenate([t * s for t, s in zip(moments.thresholds, scale)])
    return layout.start * factor, thresholds


def _group_pattern(base: Pattern, index: np.ndarray, psi_extra: list, unique: list,
                   nu: list, alpha: list) -> Pattern:
    """One group's pattern: the single-group cells renumbered, the unique
    variances fixed at 1 unless ``unique`` frees them, plus freed latent
    variances, intercepts and latent means."""
    def renumber(cells: Cells, keep=slice(None)) -> Cells:
        return Cells(cells.rows[keep], cells.cols[keep], index[cells.params[keep]])

    def join(cells: Cells, triples: list) -> Cells:
        extra = Cells.from_triples(triples)
        return Cells(np.concatenate([cells.rows, extra.rows]),
                     np.concatenate([cells.cols, extra.cols]),
                     np.concatenate([cells.params, extra.params]))

    res = base.residuals
    off_diagonal = res.rows != res.cols
    fixed = replace(base.fixed, residuals=np.eye(base.p))
    return Pattern(fixed, renumber(base.loadings), renumber(base.paths),
                   join(renumber(base.disturbances), psi_extra),
                   join(renumber(res, off_diagonal), unique), Cells.from_triples(nu),
                   Cells.from_triples(alpha))


def _notes(spec, step: str, labels, released, binary) -> tuple[str, ...]:
    reference = labels[0]
    shared = SHARED[step]
    notes = [f"Fitted in {len(labels)} groups at once ({', '.join(labels)}) by diagonally "
             f"weighted least squares on each group's thresholds and polychoric correlations; "
             f"'{reference}' is the reference group. Identification after Wu & Estabrook "
             "(2016), theta parameterization."]
    if not shared:
        notes.append("No parameter is equal across groups (configural model): in every group "
                     "the latent responses have intercept 0 and unique variance 1 and the "
                     "constructs mean 0, so each group is fitted as it would be on its own.")
        return tuple(notes)
    notes.append(f"Equal across groups: {', '.join(shared)}"
                 + (f", except {len(released)} released parameter{'s' * (len(released) != 1)}" if released else "") + ".")
    if INTERCEPTS not in shared:
        notes.append(f"Latent-response intercepts are 0 in '{reference}' and estimated in the "
                     "other groups" + (" (those of items with two answer categories once "
                                       "their thresholds are equal)" if binary else "")
                     + "; latent means are 0 in every group.")
    else:
        notes.append(f"Latent-response intercepts are 0 in every group; latent means are 0 in "
                     f"'{reference}' and estimated in the other groups.")
    if UNIQUE not in shared:
        notes.append(f"Unique variances are 1 in '{reference}' and estimated in the other groups"
                     + (" (those of items with two answer categories are 1 in every group)"
                        if binary else "") + ".")
    else:
        notes.append("Unique variances are 1 in every group.")
    if LOADINGS in shared and spec.identification != MARKER:
        notes.append(f"Latent variances are 1 in '{reference}' and estimated in the other "
                     "groups.")
    if binary:
        notes.append(f"For the items with two answer categories ({', '.join(binary)}) this "
                     f"step adds {BINARY_ADDS[step]}.")
    return tuple(notes)


# --------------------------------------------------------------------------- the model moments

def sample_statistics(data: OrdinalGroupMoments) -> tuple[np.ndarray, np.ndarray, tuple]:
    """The stacked estimate vector ``s``, its DWLS weights ``1/diag(Γ)`` and
    the groups' sampling covariances ``Γ_g``."""
    s = np.concatenate([data.statistics(g) for g in range(len(data.labels))])
    gammas = tuple(m.acov for m in data.moments)
    w = np.concatenate([1.0 / np.diag(gamma) for gamma in gammas])
    return s, w, gammas


def _group_moments(layout: OrdinalLayout, g: int, theta: np.ndarray, jacobian: bool):
    """``m_g(θ)`` (thresholds, then correlations) and, with ``jacobian``,
    ``∂m_g/∂θ``; None where an implied latent-response variance is not positive."""
    pattern = layout.patterns[g]
    mats = pattern.matrices(theta)
    sigma = mats.implied_cov
    var = np.diag(sigma)
    if np.any(var <= 0) or not np.all(np.isfinite(var)):
        return None
    sd = np.sqrt(var)
    it = layout.threshold_items
    rows, cols = np.triu_indices(layout.p, 1)
    tau = (theta[layout.thresholds[g]] - mats.implied_mean[it]) / sd[it]
    rho = sigma[rows, cols] / (sd[rows] * sd[cols])
    moments = np.concatenate([tau, rho])
    if not jacobian:
        return moments, None
    a, b, d_mu = cell_derivatives(pattern, mats)
    if d_mu is None:
        d_mu = np.zeros_like(a)
    rel = a * b / var[:, None]                       # ∂σ_j / σ_j per cell
    d_rho = (a[rows] * b[cols] + b[rows] * a[cols]) / (sd[rows] * sd[cols])[:, None] \
        - rho[:, None] * (rel[rows] + rel[cols])
    d_tau = -d_mu[it] / sd[it][:, None] - tau[:, None] * rel[it]
    jac = np.vstack([d_tau, d_rho]) @ incidence(pattern, layout.n_params)
    jac[np.arange(it.size), layout.thresholds[g]] += 1.0 / sd[it]
    return moments, jac


def implied_statistics(layout: OrdinalLayout, theta: np.ndarray) -> np.ndarray | None:
    """The stacked model moments ``m(θ)``, or None where the model is undefined."""
    parts = [_group_moments(layout, g, theta, False) for g in range(len(layout.patterns))]
    return None if any(x is None for x in parts) else np.concatenate([x[0] for x in parts])


def stacked_jacobian(layout: OrdinalLayout, theta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``m(θ)`` and ``Δ = ∂m/∂θ`` stacked over the groups."""
    parts = [_group_moments(layout, g, theta, True) for g in range(len(layout.patterns))]
    return np.concatenate([x[0] for x in parts]), np.vstack([x[1] for x in parts])


def minimise(layout: OrdinalLayout, s: np.ndarray, w: np.ndarray, n: int,
             start: np.ndarray, max_iter: int = 500) -> tuple[np.ndarray, OptimizerRecord]:
    """Minimise the stacked DWLS function to the vector ``s`` with weights
    ``w`` by Gauss–Newton (scoring matrix ``2ΔᵀWΔ``) with the line search of
    :func:`scalewright.estimate.fisher.fisher_scoring`; the function is
    divided by ``n`` (the scale of one case, like the ML objective)."""
    w_opt = w / n

    def value(theta):
        m = implied_statistics(layout, theta)
        if m is None:
            return float("inf")
        e = s - m
        return float(e @ (w_opt * e))

    def value_grad_info(theta):
        if implied_statistics(layout, theta) is None:
            return float("inf"), np.zeros_like(theta), np.eye(theta.size)
        m, jac = stacked_jacobian(layout, theta)
        e = s - m
        wj = w_opt[:, None] * jac
        return float(e @ (w_opt * e)), -2.0 * (wj.T @ e), 2.0 * (jac.T @ wj)

    return fisher_scoring(start, value, value_grad_info, max_iter=max_iter)


# --------------------------------------------------------------------------- the fit

@dataclass(frozen=True)
class OrdinalGroupFit:
    """A multi-group DWLS fit: estimates (sandwich covariance), the test and
    its baseline, fit indices, and what the difference and score tests reuse
    (residuals ``s − m(θ̂)``, the Jacobian ``Δ`` and ``H⁻¹ = (ΔᵀWΔ)⁻¹``)."""

    layout: OrdinalLayout
    estimate: Estimate
    fit: OrdinalFitIndices
    test: DwlsTest
    baseline: DwlsTest
    ns: tuple[int, ...]
    residuals: np.ndarray
    jacobian: np.ndarray
    h_inv: np.ndarray

    @property
    def cfi(self) -> float:
        return self.fit.cfi

    @property
    def rmsea(self) -> float:
        return self.fit.rmsea

    def to_dict(self) -> dict:
        return self.fit.to_dict()


def fit_ordinal_groups(layout: OrdinalLayout, data: OrdinalGroupMoments,
                       start: np.ndarray | None = None) -> OrdinalGroupFit:
    """Fit a multi-group ordinal layout by stacked DWLS (BLAS pinned to one
    thread), with sandwich standard errors, the corrected tests and the fit
    indices of the module docstring."""
    s, w, gammas = sample_statistics(data)
    with one_blas_thread():
        theta, record = minimise(layout, s, w, data.n, layout.start if start is None else start)
        m, jac = stacked_jacobian(layout, theta)
        e = s - m
        h = jac.T @ (w[:, None] * jac)
        h_inv, unidentified = invert_information(h, 1)
        middle, t1, t2 = sandwich_traces(jac, w, gammas, np.linalg.pinv(h) if h_inv is None
                                         else h_inv)
        acov = None if h_inv is None else h_inv @ middle @ h_inv
    test = DwlsTest(float(e @ (w * e)), layout.df(), t1, t2)
    baseline = baseline_test(data, w, gammas)
    estimate = Estimate(layout, theta, acov, record, data.n, float("nan"), "dwls", unidentified)
    indices = _fit_indices(test, baseline, data, e, layout.n_params)
    return OrdinalGroupFit(layout, estimate, indices, test, baseline, data.ns, e, jac,
                           np.linalg.pinv(h) if h_inv is None else h_inv)


def _blocks(gammas) -> list[slice]:
    ends = np.cumsum([g.shape[0] for g in gammas])
    return [slice(int(end - g.shape[0]), int(end)) for end, g in zip(ends, gammas)]


def sandwich_traces(jac: np.ndarray, w: np.ndarray, gammas, h_inv: np.ndarray
                    ) -> tuple[np.ndarray, float, float]:
    """The sandwich's middle ``M = ΔᵀWΓWΔ`` and ``t₁ = tr(UΓ)``, ``t₂ = tr((UΓ)²)``
    with ``Γ = ⊕ Γ_g`` block by block (formulas of :mod:`scalewright.estimate.dwls`:
    ``t₁ = Σ w_k Γ_kk − tr(H⁻¹M)``,
    ``t₂ = ‖W^½ΓW^½‖²_F − 2 tr(H⁻¹GᵀWG) + tr((H⁻¹M)²)`` with ``G = ΓWΔ``)."""
    q = jac.shape[1]
    middle, gwg = np.zeros((q, q)), np.zeros((q, q))
    base_t1 = base_t2 = 0.0
    for block, gamma in zip(_blocks(gammas), gammas):
        wb, jb = w[block], jac[block]
        g = gamma @ (wb[:, None] * jb)
        middle += jb.T @ (wb[:, None] * g)
        gwg += g.T @ (wb[:, None] * g)
        root = np.sqrt(wb)
        scaled = root[:, None] * gamma * root[None, :]
        base_t1 += float(np.sum(wb * np.diag(gamma)))
        base_t2 += float(np.sum(scaled * scaled))
    hm = h_inv @ middle
    t1 = base_t1 - float(np.trace(hm))
    t2 = base_t2 - 2.0 * float(np.sum(h_inv * gwg)) + float(np.sum(hm * hm.T))
    return middle, t1, t2


def baseline_test(data: OrdinalGroupMoments, w: np.ndarray, gammas) -> DwlsTest:
    """Independence within each group (correlations 0, thresholds free): the
    thresholds fit exactly, so ``T``, ``t₁`` and ``t₂`` are those of the
    correlation blocks, summed over groups."""
    n_thr = data.moments[0].n_thresholds
    chi2 = t1 = t2 = 0.0
    for g, (block, gamma) in enumerate(zip(_blocks(gammas), gammas)):
        r = data.statistics(g)[n_thr:]
        wr = w[block][n_thr:]
        gr = gamma[n_thr:, n_thr:]
        root = np.sqrt(wr)
        scaled = root[:, None] * gr * root[None, :]
        chi2 += float(r @ (wr * r))
        t1 += float(np.sum(wr * np.diag(gr)))
        t2 += float(np.sum(scaled * scaled))
    p = len(data.items)
    return DwlsTest(chi2, len(data.labels) * p * (p - 1) // 2, t1, t2)


def _fit_indices(test: DwlsTest, base: DwlsTest, data: OrdinalGroupMoments, e: np.ndarray,
                 n_params: int) -> OrdinalFitIndices:
    groups, n = len(data.labels), data.n
    per_group = np.split(e, groups)
    srmr = float(np.sqrt(sum(ng * np.mean(eg ** 2) for ng, eg in zip(data.ns, per_group)) / n))
    return dwls_fit_indices(test, base, n, srmr, n_params, groups)
