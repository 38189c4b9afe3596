"""Measurement invariance of ordinal items: the step sequence of Wu &
Estabrook (2016), the partial-invariance search and the latent comparisons.

The sequence fits one model to every group's thresholds and polychoric
correlations (:mod:`scalewright.multigroup_ordinal`) with more and more
parameters equal: configural → thresholds → loadings → latent-response
intercepts → unique variances, each step keeping the equalities of the one
before.  Each step is compared with the step before it (as finally
accepted, releases included), as the continuous route does
(:mod:`scalewright.invariance`):

* the difference test: Satorra's (2000) adjusted difference test applied
  to the DWLS statistics, scaled and shifted on the difference in df
  (:func:`scalewright.dwls_difference.adjusted_difference`, the same
  statistic the rival-model comparison uses);
* the changes in CFI, RMSEA (from the scaled-and-shifted statistics) and
  SRMR against the same published conventions (Cheung & Rensvold 2002;
  Chen 2007, :func:`scalewright.invariance.conventions`).  Chen's values
  were derived for continuous items; those for intercepts are applied to
  thresholds and latent-response intercepts, those for residual variances
  to unique variances.

Items with two answer categories (yes/no) join the steps as
:mod:`scalewright.multigroup_ordinal` sets out: their threshold is made
equal together with their loading, the intercepts step sets their
intercept to 0, and their unique variances are 1 throughout; a model of
such items only runs configural → thresholds and loadings → intercepts
(:func:`~scalewright.multigroup_ordinal.steps_for`), the skipped steps
being listed with the reason.

Partial invariance.  A step is searched when a convention signals
non-invariance or the difference test rejects at ``α``.  For every equality
constraint the step added, the generalized score test of releasing it
(Satorra 1989) is computed at the constrained estimates: with ``Δ_c`` the
constrained model's Jacobian, ``H = Δ_cᵀWΔ_c``, ``e`` its residuals and
``Δ_d`` the derivatives of the moments with respect to the released
parameter's copies outside the reference group,

    h = Δ_dᵀ W e,    K = Δ_dᵀ W (I − Δ_c H⁻¹ Δ_cᵀ W),    LM = hᵀ (K Γ K ᵀ)⁻¹ h

on ``G − 1`` df: ``h = Kε`` to first order with ``ε`` the sampling error of
the estimates (covariance ``Γ``), so LM is asymptotically χ² whatever the
weight ``W`` — the robust form a diagonal weight needs
(:mod:`scalewright.estimate.generalized_score`, shared with the modification
hints of single-group DWLS fits).  The constraint with
the smallest p-value is released if that p-value, Bonferroni-adjusted for
the number of constraints tested, is below ``α``; the model is refitted and
the search repeats until the step holds and the difference test does not
reject, no constraint stands out, or a fifth of the step's constraints
(rounded up) has been released — the limits of the continuous route.  Each
item keeps at least two equal thresholds (its intercept and unique variance
outside the reference group are identified by them; Wu & Estabrook 2016),
and each construct at least two equal loadings and intercepts (Steenkamp &
Baumgartner 1998).  A two-category item's threshold is not a candidate (on
its own it is not identified once its intercept is free), nor its unique
variance (fixed in every group).

Latent comparisons.  Latent means are identified once thresholds, loadings
and latent-response intercepts are equal (Wu & Estabrook 2016): they come
from the final intercepts model (partial invariance included), with the
standardized difference of Hancock (2001); latent variances and
correlations from the same model, or from the loadings model when equal
intercepts do not hold (:func:`scalewright.invariance.latent_comparison`).

References
----------
Wu, H. & Estabrook, R. (2016). Identification of confirmatory factor analysis
models of different levels of invariance for ordered categorical outcomes.
Psychometrika 81, 1014–1045.
Satorra, A. (1989). Alternative test criteria in covariance structure
analysis: a unified approach. Psychometrika 54, 131–151.
Satorra, A. (2000). Scaled and adjusted restricted tests in multi-sample
analysis of moment structures. In Heijmans, Pollock & Satorra (eds.),
Innovations in Multivariate Statistical Analysis, 233–247. Kluwer.
Chen, F. F. (2007). Sensitivity of goodness of fit indexes to lack of
measurement invariance. Structural Equation Modeling 14, 464–504.
Cheung, G. W. & Rensvold, R. B. (2002). Evaluating goodness-of-fit indexes
for testing measurement invariance. Structural Equation Modeling 9, 233–255.
Hancock, G. R. (2001). Effect size, power, and sample size determination for
structured means modeling and MIMIC approaches to between-groups hypothesis
testing of means on a single latent construct. Psychometrika 66, 373–388.
Steenkamp, J.-B. E. M. & Baumgartner, H. (1998). Assessing measurement
invariance in cross-national consumer research. Journal of Consumer
Research 25, 78–90.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np
from scipy import stats

from scalewright import multigroup
from scalewright.blas import one_blas_thread
from scalewright.dwls_difference import METHOD, DwlsDifference, adjusted_difference
from scalewright.estimate.generalized_score import dense_score_statistics
from scalewright.groups import split_groups
from scalewright.invariance import (ALPHA, MIN_EQUAL, RELEASE_SHARE, Convention, LatentComparison,
                                    Release, ScoreTest, convention_verdict, conventions,
                                    latent_comparison, p_in_words, releasable, release_entry,
                                    release_search, released_item, sequence_keys, step_entry)
from scalewright.layout import INTERCEPT, LOADING, PATH, RESIDUAL_COV, Param
from scalewright.methods import LISTWISE, NONE
from scalewright.multigroup import carry_start
from scalewright.multigroup_ordinal import (BINARY_ADDS, BINARY_IDENTIFICATION, IDENTIFICATION,
                                            INTERCEPTS, LABELS, LOADINGS, SHARED, STEPS,
                                            THRESHOLD, THRESHOLDS, UNIQUE, OrdinalGroupFit,
                                            binary_items, build_ordinal_layout,
                                            fit_ordinal_groups, parameter_class,
                                            sample_statistics, stacked_jacobian, steps_for)
from scalewright.ordinal_groups import OrdinalGroupMoments, ordinal_group_moments

#: each item keeps this many equal thresholds (Wu & Estabrook 2016: its intercept and
#: unique variance outside the reference group rest on them)
MIN_EQUAL_THRESHOLDS = 2

#: the Chen (2007) values applied to each ordinal step (see the module docstring)
CHEN_CLASS = {THRESHOLDS: multigroup.INTERCEPTS, LOADINGS: multigroup.LOADINGS,
              INTERCEPTS: multigroup.INTERCEPTS, UNIQUE: multigroup.RESIDUALS}

_KIND_WORDS = {THRESHOLD: "threshold", LOADING: "loading", PATH: "higher-order loading",
               INTERCEPT: "latent-response intercept", RESIDUAL_COV: "unique variance"}


# --------------------------------------------------------------------------- decisions

@dataclass(frozen=True)
class OrdinalComparison:
    """A step's model against the previous step's final model."""

    delta: dict                 # cfi, rmsea, srmr (this step minus the previous)
    test: DwlsDifference
    conventions: tuple[Convention, ...]

    @property
    def testable(self) -> bool:
        return self.test.df > 0

    @property
    def holds(self) -> bool:
        return all(c.met for c in self.conventions)

    @property
    def rejects(self) -> bool:
        return self.testable and self.test.p_value < ALPHA

    def text(self, step: str) -> str:
        what = LABELS[step].capitalize()
        if not self.testable:
            return (f"{what}: the step adds no degrees of freedom, so it cannot be tested; the "
                    "model is equivalent to the one before it (equal thresholds are not "
                    "testable for items with three answer categories, nor on their own for "
                    "items with two: Wu & Estabrook 2016).")
        verdict, rules = convention_verdict(self.conventions)
        verb = "rejects" if self.rejects else "does not reject"
        return (f"{what} {verdict} ({rules}); these published conventions are rules of thumb, "
                f"not tests. The mean-and-variance adjusted difference test {verb} equality "
                f"(Δχ² = {self.test.chi_square:.2f} on {self.test.df} df, "
                f"p {p_in_words(self.test.p_value)}).")

    def to_dict(self, step: str) -> dict:
        return {"delta": dict(self.delta),
                "difference_test": self.test.to_dict() | {"method": METHOD},
                "decision": {"holds": self.holds, "difference_test_rejects": self.rejects,
                             "testable": self.testable,
                             "conventions": [c.to_dict() for c in self.conventions],
                             "text": self.text(step)}}


def compare(step: str, fit: OrdinalGroupFit, previous: OrdinalGroupFit,
            data: OrdinalGroupMoments) -> OrdinalComparison:
    """Difference test and conventions for ``fit`` (step ``step``) against ``previous``."""
    delta = {"cfi": fit.cfi - previous.cfi, "rmsea": fit.rmsea - previous.rmsea,
             "srmr": fit.fit.srmr - previous.fit.srmr}
    rules = conventions(CHEN_CLASS[step], delta, data.n)
    return OrdinalComparison(delta, adjusted_difference(fit, previous, data), rules)


# --------------------------------------------------------------------------- score tests

def constraints(layout, step: str, released: frozenset) -> list[Param]:
    """The equality constraints the step adds that are still in force, in
    shared form (for intercepts and unique variances, one per item).  A
    two-category item's threshold, made equal with its loading, is not
    listed (released alone it would not be identified), nor its unique
    variance, which no step frees (:mod:`scalewright.multigroup_ordinal`)."""
    if step in (THRESHOLDS, LOADINGS):
        return [q for q in layout.params if q.group is None and parameter_class(q) == step
                and q not in released and not (q.kind == THRESHOLD
                                               and q.a in layout.binary_items)]
    kind = INTERCEPT if step == INTERCEPTS else RESIDUAL_COV
    items = [item for item in layout.items
             if not (step == UNIQUE and item in layout.binary_items)]
    return [q for q in (Param(kind, item, item) for item in items) if q not in released]


def releasable_constraints(layout, step: str, released: frozenset) -> list[Param]:
    """Constraints whose release keeps :data:`MIN_EQUAL_THRESHOLDS` equal
    thresholds per item and :data:`~scalewright.invariance.MIN_EQUAL` equal
    loadings or intercepts per construct."""
    if step == LOADINGS:
        return releasable(layout, multigroup.METRIC, released)
    candidates = constraints(layout, step, released)
    if step == UNIQUE:
        return candidates
    owner = (lambda q: q.a) if step == THRESHOLDS else (lambda q: layout.primary[q.a])
    floor = MIN_EQUAL_THRESHOLDS if step == THRESHOLDS else MIN_EQUAL
    count: dict = {}
    for q in candidates:
        count[owner(q)] = count.get(owner(q), 0) + 1
    return [q for q in candidates if count[owner(q)] > floor]


def score_tests(spec, data: OrdinalGroupMoments, constrained: OrdinalGroupFit, step: str,
                released: frozenset, candidates) -> list[ScoreTest]:
    """Generalized score tests (Satorra 1989) of releasing each of
    ``candidates``, one at a time, at the constrained estimates (module
    docstring).  The model with every candidate released is built once and
    evaluated at the constrained solution; each candidate's copies outside
    the reference group are its ``Δ_d``."""
    candidates = list(candidates)
    if not candidates or constrained.estimate.acov is None:
        return []
    full = build_ordinal_layout(spec, data, step, released | frozenset(candidates))
    position = {param: k for k, param in enumerate(full.params)}
    rows = np.array([[position[replace(c, group=label)] for label in data.labels[1:]]
                     for c in candidates], dtype=np.intp)          # K × (G − 1)
    _, w, gammas = sample_statistics(data)
    g1 = rows.shape[1]
    with one_blas_thread():
        _, jac = stacked_jacobian(full, carry_start(constrained, full))
        tests = dense_score_statistics(w, constrained.residuals, constrained.jacobian,
                                       constrained.h_inv, jac[:, rows.ravel()], gammas, g1)
    stat, ok = tests.statistic, tests.defined
    p = stats.chi2.sf(stat, g1)
    tested = int(ok.sum())
    return [ScoreTest(c, float(s), g1, float(pv), float(min(1.0, pv * tested)))
            for c, s, pv, good in zip(candidates, stat, p, ok) if good]


# --------------------------------------------------------------------------- the sequence

@dataclass(frozen=True)
class OrdinalStep:
    """One step: the model as first constrained, the releases, the final model."""

    step: str
    first: OrdinalGroupFit
    final: OrdinalGroupFit
    first_comparison: OrdinalComparison | None
    comparison: OrdinalComparison | None
    releases: tuple[Release, ...]
    stopped: str | None

    @property
    def holds(self) -> bool | None:
        return None if self.comparison is None else self.comparison.holds


def _needs_search(comparison: OrdinalComparison) -> bool:
    return comparison.testable and (not comparison.holds or comparison.rejects)


def _search(spec, data, step, previous: OrdinalGroupFit, first: OrdinalGroupFit,
            comparison: OrdinalComparison, released: frozenset):
    """Release constraints one at a time (see the module docstring)."""
    def refit(current, released):
        layout = build_ordinal_layout(spec, data, step, released)
        fit = fit_ordinal_groups(layout, data, carry_start(current, layout))
        return fit, compare(step, fit, previous, data)

    return release_search(
        step, first, comparison, released,
        max(1, math.ceil(RELEASE_SHARE * len(constraints(first.layout, step, released)))),
        _needs_search,
        lambda current, released: score_tests(spec, data, current, step, released,
                                              releasable_constraints(current.layout, step,
                                                                     released)),
        f"an item with fewer than {MIN_EQUAL_THRESHOLDS} equal thresholds or a construct with "
        f"fewer than {MIN_EQUAL} equal items", refit)


def run_sequence(spec, data: OrdinalGroupMoments, steps=STEPS) -> tuple[OrdinalStep, ...]:
    """Fit the steps in order, searching for partial invariance where a step
    fails; released constraints stay released in later steps."""
    results = []
    released: frozenset = frozenset()
    previous: OrdinalGroupFit | None = None
    for step in steps:
        layout = build_ordinal_layout(spec, data, step, released)
        first = fit_ordinal_groups(layout, data,
                                   None if previous is None else carry_start(previous, layout))
        if previous is None:
            results.append(OrdinalStep(step, first, first, None, None, (), None))
            previous = first
            continue
        first_comparison = compare(step, first, previous, data)
        final, releases, stopped = first, [], None
        if _needs_search(first_comparison):
            final, releases, released, stopped = _search(spec, data, step, previous, first,
                                                         first_comparison, released)
        comparison = first_comparison if not releases else compare(step, final, previous, data)
        results.append(OrdinalStep(step, first, final, first_comparison, comparison,
                                   tuple(releases), stopped))
        previous = final
    return tuple(results)


# --------------------------------------------------------------------------- the whole result

@dataclass(frozen=True)
class OrdinalInvarianceResult:
    """The ordinal invariance sequence of one model across the groups."""

    model: str
    data: OrdinalGroupMoments
    identification: str
    steps: tuple[OrdinalStep, ...]
    latent: LatentComparison | None
    latent_note: str
    dropped: dict
    wording: dict
    missing_handling: str

    @property
    def released(self) -> tuple[Release, ...]:
        return tuple(r for s in self.steps for r in s.releases)

    def to_dict(self) -> dict:
        """The keys of :meth:`scalewright.invariance.InvarianceResult.to_dict`,
        with ordinal steps, plus ``label`` per step and the identification."""
        labels = self.data.labels
        binary = binary_items(self.data)
        fitted = {s.step for s in self.steps}
        return {
            "invariance_setup": {
                "model": self.model, "groups": list(labels), "reference": labels[0],
                "n": dict(zip(labels, self.data.ns)), "dropped": dict(self.dropped),
                "estimator": ("diagonally weighted least squares on each group's thresholds "
                              "and polychoric correlations (robust standard errors, "
                              "mean-and-variance adjusted tests)"),
                "method_note": f"Each difference test is {METHOD}. Chen's (2007) values for "
                "intercepts are applied to thresholds and latent-response intercepts, those "
                "for residual variances to unique variances.",
                "missing_handling": ("none needed (no answer is missing)"
                                     if self.missing_handling == NONE else
                                     "pairwise (each polychoric correlation uses everyone in "
                                     "the group who answered both items)"
                                     if self.missing_handling != LISTWISE else
                                     "listwise deletion"),
                "standard_errors": "sandwich",
                "difference_test": METHOD,
                "identification": self.identification,
                "ordinal_identification": IDENTIFICATION
                + ("; " + BINARY_IDENTIFICATION[0].lower() + BINARY_IDENTIFICATION[1:]
                   if binary else ""),
                "two_category_items": list(binary),
                "skipped_steps": [{"step": step, "label": LABELS[step],
                                   "reason": "every item has two answer categories, and "
                                             "for them this step adds " + BINARY_ADDS[step]}
                                  for step in STEPS if step not in fitted
                                  and step not in steps_for(self.data)],
                "parameterization": "theta",
                "baseline_model": "independence within each group: polychoric correlations 0, "
                                  "thresholds free in every group (the same for every step)",
                "srmr": "threshold and correlation residuals, pooled over groups by size",
                "rmsea": "from the scaled-and-shifted statistic, multiplied by the square root "
                         "of the number of groups (Steiger 1998)",
                "search": (f"generalized score tests (Satorra 1989) on each equality "
                           f"constraint, Bonferroni-adjusted, alpha {ALPHA}; at least "
                           f"{MIN_EQUAL_THRESHOLDS} equal thresholds per item and {MIN_EQUAL} "
                           f"equal loadings and intercepts per construct; at most a fifth of "
                           f"a step's constraints (rounded up) released"),
                "category_notes": list(self.data.notes),
                "notes": list(self.steps[-1].final.layout.notes) + list(self.data.notes),
            },
        } | sequence_keys(self, self._step_dict, self._release_dict)

    def _step_dict(self, s: OrdinalStep) -> dict:
        binary = list(s.final.layout.binary_items)
        return {"step": s.step, "label": LABELS[s.step]} \
            | step_entry(s, SHARED[s.step], self._release_dict) \
            | {"two_category_items": {"items": binary,
                                      "adds": BINARY_ADDS[s.step] if binary else None}}

    def _release_dict(self, r: Release) -> dict:
        param = r.test.param
        item = released_item(param)
        kind = _KIND_WORDS[param.kind]
        final = next(s.final for s in self.steps if s.step == r.step)
        what = f"The {kind} of item '{item}'"
        extra = {}
        if param.kind == THRESHOLD:
            cats = self.data.moments[0].categories[self.data.items.index(item)]
            c = int(param.b)
            low, high = (f"{v:g}" for v in cats[c - 1:c + 1])
            what = f"The threshold between answers {low} and {high} of item '{item}'"
            extra = {"threshold": c, "between": [low, high]}
        return release_entry(r, kind, what, final, self.wording, _group_values(final, param),
                             ("chi_square", "df", "cfi", "rmsea", "srmr",
                              "chi_square_unadjusted")) | extra


def _group_values(fit: OrdinalGroupFit, param: Param) -> dict:
    """The released parameter's value in each group (an intercept or unique
    variance from the matrices, where the reference group's is fixed)."""
    layout, est = fit.layout, fit.estimate
    out = {}
    for g, label in enumerate(layout.groups):
        if param.kind in (INTERCEPT, RESIDUAL_COV):
            mats = est.matrices(g)
            i = layout.items.index(param.a)
            out[label] = float(mats.intercepts[i] if param.kind == INTERCEPT
                               else mats.residuals[i, i])
        else:
            out[label] = float(est.theta[layout.params.index(replace(param, group=label))])
    return out


def ordinal_invariance(spec, data: OrdinalGroupMoments, *, dropped: dict | None = None,
                       wording: dict | None = None, steps=None,
                       missing_handling: str = "pairwise") -> OrdinalInvarianceResult:
    """Run the whole ordinal sequence for one model and compare the latent variables.

    Parameters
    ----------
    spec : ModelSpec
    data : OrdinalGroupMoments
        Each group's thresholds and polychoric correlations, reference first.
    dropped : dict, optional
        Rows left out, by reason, for the report.
    wording : dict, optional
        Item name → wording, used when naming non-invariant items.
    steps : sequence of str, optional
        The steps to fit, in order (default: those that add a constraint for
        these items, :func:`scalewright.multigroup_ordinal.steps_for` — all
        five unless every item has two categories).
    missing_handling : str
        How missing answers were handled, for the report.
    """
    results = run_sequence(spec, data, steps_for(data) if steps is None else steps)
    by_step = {s.step: s for s in results}
    latent, note = None, ""
    if INTERCEPTS in by_step and by_step[INTERCEPTS].holds:
        latent = latent_comparison(by_step[INTERCEPTS].final, INTERCEPTS)
        note = ("Latent means compared under "
                f"{'partial ' if by_step[INTERCEPTS].releases else ''}invariance of thresholds, "
                "loadings and latent-response intercepts, which identifies them (Wu & "
                "Estabrook 2016).")
    elif LOADINGS in by_step and by_step[LOADINGS].holds:
        latent = replace(latent_comparison(by_step[LOADINGS].final, LOADINGS), means=())
        note = ("Equal latent-response intercepts do not hold, even after the search, so latent "
                "means are not compared; latent variances and correlations come from the model "
                "with equal thresholds and loadings.")
    else:
        note = ("Equal thresholds and loadings do not hold, so latent variances, correlations "
                "and means are not compared across groups.")
    return OrdinalInvarianceResult(spec.name, data, spec.identification, results, latent, note,
                                   dropped or {}, wording or {}, missing_handling)


def ordinal_invariance_keys(study, data, spec, method) -> dict:
    """The JSON keys of the ordinal invariance check of model ``spec`` across
    the study's groups (see :meth:`OrdinalInvarianceResult.to_dict`): the
    answers split by group, each group's thresholds and polychoric
    correlations (pairwise, or listwise when the method says so), then the
    sequence."""
    listwise = method.missing_handling == LISTWISE
    grouped = split_groups(study, data, spec.items, full_information=not listwise)
    keep = grouped.complete if listwise else ~np.isnan(grouped.values).all(axis=1)
    moments = ordinal_group_moments(
        grouped.labels, grouped.values[keep], grouped.index[keep], grouped.items,
        scale=study.scale, collapse_sparse=study.collapse_sparse,
        column=study.groups.column, place=study.place_of("groups", "column"))
    wording = {name: item.wording for name, item in study.items.items()}
    return ordinal_invariance(spec, moments, dropped=grouped.dropped(not listwise),
                              wording=wording, missing_handling=method.missing_handling).to_dict()
