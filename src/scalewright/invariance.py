"""Measurement invariance: the step sequence, the partial-invariance search
and the latent comparisons.

The sequence (Meredith 1993; Vandenberg & Lance 2000) fits one model in all
groups with more and more parameters equal: configural → metric (loadings)
→ scalar (intercepts) → strict (residual variances); see
:mod:`scalewright.multigroup`.  Each step is compared with the step before it
(as finally accepted, releases included):

* the chi-square difference test ``T_k − T_{k−1}`` on ``df_k − df_{k−1}``;
* the changes ``ΔCFI``, ``ΔRMSEA``, ``ΔSRMR`` judged against two published
  *conventions*, which are rules of thumb from simulation studies, not tests:

  - Cheung & Rensvold (2002): a drop in CFI of .010 or more signals
    non-invariance;
  - Chen (2007): for loadings, a drop in CFI of .010 or more *together with* a
    rise in RMSEA of .015 or more or in SRMR of .030 or more; for intercepts
    and residual variances the same with SRMR .010.  For a total sample of
    300 or fewer Chen recommends stricter values: CFI .005, RMSEA .010,
    SRMR .025 (loadings) and .005 (intercepts, residuals).

A step *holds* when neither convention signals non-invariance.

Partial invariance.  A step is searched when a convention signals
non-invariance or the difference test rejects at ``α``.  For every equality
constraint the step added, the score (Lagrange multiplier) test of releasing
it is computed at the constrained estimates: with the released parameter's
group-specific deviations ``d`` as the candidate parameters, ``g_d`` their
gradient and ``I`` the expected information (per case, also with missing
answers, where the standard errors use the observed one) of the model with
both ``θ`` (the constrained parameters) and ``d``,

    LM = N g_dᵀ (I_dd − I_dθ I_θθ⁻¹ I_θd)⁻¹ g_d   on G − 1 df

(Sörbom 1989; Buse 1982).  The constraint with the smallest p-value is
released if that p-value, Bonferroni-adjusted for the number of constraints
tested, is below ``α``; the model is refitted and the search repeats until
the step holds and the difference test does not reject, no constraint
stands out, or the limit is reached.  Releases never make a construct keep
fewer than two equal loadings (or intercepts): partial invariance is
defensible only with at least two invariant items per construct (Steenkamp &
Baumgartner 1998).  The limit is a fifth of the step's constraints, rounded
up (Dimitrov 2010 regards partial invariance with up to about 20% of the
parameters released as acceptable, from memory).

Latent comparisons use the final scalar model (or the metric model for
variances and correlations when scalar invariance does not hold): the
latent mean difference to the reference group with its standard error, and
the standardized difference ``δ = (α_g − α_ref)/√φ_pooled`` with
``φ_pooled = (n_ref φ_ref + n_g φ_g)/(n_ref + n_g)`` the size-weighted latent
variance (Hancock 2001), standard errors by the delta method.

References
----------
Buse, A. (1982). The likelihood ratio, Wald, and Lagrange multiplier tests:
an expository note. The American Statistician 36, 153–157.
Chen, F. F. (2007). Sensitivity of goodness of fit indexes to lack of
measurement invariance. Structural Equation Modeling 14, 464–504.
Cheung, G. W. & Rensvold, R. B. (2002). Evaluating goodness-of-fit indexes
for testing measurement invariance. Structural Equation Modeling 9, 233–255.
Dimitrov, D. M. (2010). Testing for factorial invariance in the context of
construct validation. Measurement and Evaluation in Counseling and
Development 43, 121–149.
Hancock, G. R. (2001). Effect size, power, and sample size determination for
structured means modeling and MIMIC approaches to between-groups hypothesis
testing of means on a single latent construct. Psychometrika 66, 373–388.
Meredith, W. (1993). Measurement invariance, factor analysis and factorial
invariance. Psychometrika 58, 525–543.
Sörbom, D. (1989). Model modification. Psychometrika 54, 371–384.
Steenkamp, J.-B. E. M. & Baumgartner, H. (1998). Assessing measurement
invariance in cross-national consumer research. Journal of Consumer
Research 25, 78–90.
Vandenberg, R. J. & Lance, C. E. (2000). A review and synthesis of the
measurement invariance literature. Organizational Research Methods 3, 4–70.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

import numpy as np
from scipy import stats
from threadpoolctl import threadpool_limits

from scalewright.estimate.normal import Block, NormalFit, fit_normal
from scalewright.estimate.result import invert_information
from scalewright.groups import INCOMPLETE, split_groups
from scalewright.methods import LISTWISE, ORDINAL, ROBUST, choose_method
from scalewright.modelresult import STANDARD_ERRORS
from scalewright.layout import CONSTRUCT, INTERCEPT, LOADING, PATH, Layout, Param
from scalewright.multigroup import (ADDED, INTERCEPTS, LOADINGS, METRIC, RESIDUALS,
                                    SCALAR, SHARED, STEPS, GroupFit, GroupMoments,
                                    build_multigroup_layout, carry_start, fit_multigroup,
                                    parameter_class, robust_test)
from scalewright.scaled_difference import SB2010, ScaledDifference, scaled_difference
from scalewright.standardize import delta_method_se

ALPHA = 0.05
MIN_EQUAL = 2          # equal items a construct keeps (Steenkamp & Baumgartner 1998)
RELEASE_SHARE = 0.2    # at most a fifth of a step's constraints (Dimitrov 2010, from memory)
SMALL_N = 300          # Chen (2007): stricter values for a total N of 300 or fewer

_CHEN = {  # (ΔCFI drop, ΔRMSEA rise, ΔSRMR rise) signalling non-invariance, Chen (2007)
    (False, LOADINGS): (0.010, 0.015, 0.030), (False, INTERCEPTS): (0.010, 0.015, 0.010),
    (False, RESIDUALS): (0.010, 0.015, 0.010), (True, LOADINGS): (0.005, 0.010, 0.025),
    (True, INTERCEPTS): (0.005, 0.010, 0.005), (True, RESIDUALS): (0.005, 0.010, 0.005)}
_KIND_WORDS = {LOADING: "loading", PATH: "higher-order loading", INTERCEPT: "intercept"}


# --------------------------------------------------------------------------- decisions

@dataclass(frozen=True)
class Convention:
    source: str
    rule: str
    met: bool

    def to_dict(self) -> dict:
        return {"source": self.source, "rule": self.rule, "met": self.met}


def p_in_words(p: float) -> str:
    """A p-value as the report's tables show it (APA style: three decimals without
    the leading zero, "< .001" below that)."""
    return "< .001" if p < 0.001 else "= " + f"{p:.3f}".lstrip("0")


def convention_verdict(conventions) -> tuple[str, str]:
    """The verdict of the conventions in words ("hold by every convention",
    …) and each rule with whether it was met, for a step's text."""
    met = [c.source for c in conventions if c.met]
    unmet = [c.source for c in conventions if not c.met]
    verdict = ("hold by every convention" if not unmet else
               "do not hold by any convention" if not met else
               f"hold by {' and '.join(met)} but not by {' and '.join(unmet)}")
    rules = "; ".join(f"{c.source}: {c.rule} — {'met' if c.met else 'not met'}"
                      for c in conventions)
    return verdict, rules


@dataclass(frozen=True)
class Comparison:
    """A step's model against the previous step's final model."""

    delta: dict                 # cfi, rmsea, srmr (this step minus the previous)
    chi_square: float           # the difference statistic: scaled when the fits are robust
    df: int
    p_value: float
    conventions: tuple[Convention, ...]
    scaled: ScaledDifference | None = None
    chi_square_ml: float | None = None    # the unscaled ML difference, when scaled

    @property
    def holds(self) -> bool:
        return all(c.met for c in self.conventions)

    @property
    def rejects(self) -> bool:
        return self.p_value < ALPHA

    def text(self, step: str) -> str:
        what = {METRIC: "Equal loadings", SCALAR: "Equal intercepts",
                "strict": "Equal residual variances"}[step]
        verdict, rules = convention_verdict(self.conventions)
        verb = "rejects" if self.rejects else "does not reject"
        kind = "scaled chi-square difference test" if self.scaled else \
            "chi-square difference test"
        test = (f"The {kind} {verb} equality "
                f"(Δχ² = {self.chi_square:.2f} on {self.df} df, p {p_in_words(self.p_value)}).")
        return (f"{what} {verdict} ({rules}); these published conventions are rules of "
                f"thumb, not tests. {test}")

    def to_dict(self, step: str) -> dict:
        return {"delta": dict(self.delta),
                "difference_test": {"chi_square": self.chi_square, "df": self.df,
                                    "p_value": self.p_value, "scaled": self.scaled is not None}
                | ({} if self.scaled is None else
                   {"scaling_factor": self.scaled.scaling_factor, "method": self.scaled.method,
                    "chi_square_ml": self.chi_square_ml}),
                "decision": {"holds": self.holds, "difference_test_rejects": self.rejects,
                             "conventions": [c.to_dict() for c in self.conventions],
                             "text": self.text(step)}}


def conventions(added: str, delta: dict, n: int) -> tuple[Convention, ...]:
    """The conventions of Cheung & Rensvold (2002) and Chen (2007) for the
    changes ``delta`` (cfi, rmsea, srmr: constrained minus less constrained)
    when the parameter class ``added`` is made equal, total sample size ``n``."""
    small = n <= SMALL_N
    cfi_drop, rmsea_rise, srmr_rise = _CHEN[(small, added)]
    return (
        Convention("Cheung & Rensvold (2002)", "ΔCFI > −.010", bool(delta["cfi"] > -0.010)),
        Convention(f"Chen (2007), total N {'≤' if small else '>'} {SMALL_N}",
                   f"not (ΔCFI ≤ −{cfi_drop:.3f} with ΔRMSEA ≥ {rmsea_rise:.3f} or "
                   f"ΔSRMR ≥ {srmr_rise:.3f})",
                   not (delta["cfi"] <= -cfi_drop and (delta["rmsea"] >= rmsea_rise or
                                                      delta["srmr"] >= srmr_rise))))


def compare(step: str, fit: GroupFit, previous: GroupFit, moments: GroupMoments) -> Comparison:
    """Difference test and conventions for ``fit`` (step ``step``) against
    ``previous``.  When both are robust fits, the difference test is the
    Satorra & Bentler (2001) scaled difference, or their 2010 version when
    the 2001 scaling factor is not positive (:mod:`scalewright.scaled_difference`),
    and the changes in CFI and RMSEA are those of the robust indices."""
    delta = {"cfi": fit.cfi - previous.cfi, "rmsea": fit.rmsea - previous.rmsea,
             "srmr": fit.fit.srmr - previous.fit.srmr}
    chi2_ml = max(fit.fit.chi_square - previous.fit.chi_square, 0.0)
    df = fit.fit.df - previous.fit.df
    rules = conventions(ADDED[step], delta, fit.estimate.n)
    if fit.robust is None or previous.robust is None:
        p = float(stats.chi2.sf(chi2_ml, df)) if df > 0 else float("nan")
        return Comparison(delta, float(chi2_ml), int(df), p, rules)
    scaled = scaled_difference(fit.fit.chi_square, fit.fit.df, fit.robust.test.scaling_factor,
                               previous.fit.chi_square, previous.fit.df,
                               previous.robust.test.scaling_factor)
    if not scaled.scaling_factor > 0:
        scaled = scaled_difference(fit.fit.chi_square, fit.fit.df,
                                   fit.robust.test.scaling_factor, previous.fit.chi_square,
                                   previous.fit.df, _scaling_at(fit, previous, moments), SB2010)
    return Comparison(delta, max(scaled.chi_square, 0.0), scaled.df, scaled.p_value, rules,
                      scaled, float(chi2_ml))


def _scaling_at(fit: GroupFit, previous: GroupFit, moments: GroupMoments) -> float:
    """``c₁₀`` of Satorra & Bentler (2010): the less constrained model's
    scaling factor at the constrained model's estimates, found by fitting it
    to the constrained model's implied moments (which it reproduces, the
    models being nested)."""
    implied = tuple(Block(g, np.arange(fit.layout.p), n, m.implied_cov, m.implied_mean)
                    for g, (n, m) in enumerate(zip(moments.ns, (fit.estimate.matrices(g) for g
                                                               in range(len(moments.ns))))))
    with threadpool_limits(limits=1, user_api="blas"):
        theta10, _, _ = fit_normal(previous.layout, implied, carry_start(fit, previous.layout))
        test = robust_test(previous.layout, theta10, moments, previous.fit.chi_square,
                           previous.fit.df).test
    return test.scaling_factor


# --------------------------------------------------------------------------- score tests

@dataclass(frozen=True)
class ScoreTest:
    """The score test of releasing one equality constraint."""

    param: Param       # shared form
    chi_square: float
    df: int
    p_value: float
    p_adjusted: float  # Bonferroni over the constraints tested together


def score_tests(spec, moments: GroupMoments, constrained: GroupFit, step: str,
                released: frozenset, candidates) -> list[ScoreTest]:
    """Score tests of releasing each of ``candidates`` (shared-form parameters
    of ``constrained``), one at a time, at the constrained estimates.

    The model with every candidate released is built once; its gradient and
    expected information at the constrained estimates (mapped by
    ``θ_full = T θ``) give every test through the conditional information
    ``I_dd − I_dθ I_θθ⁻¹ I_θd`` (see the module docstring), with
    ``I_θθ = Tᵀ I T`` the constrained model's expected information.  It is
    not read from the fit's covariance, which is the inverse of the observed
    information with missing answers and the sandwich for a robust fit.  No
    test when ``I_θθ`` is singular.
    """
    candidates = list(candidates)
    if not candidates:
        return []
    full = build_multigroup_layout(spec, moments, step, released | frozenset(candidates))
    base = {param: k for k, param in enumerate(constrained.layout.params)}
    column = np.array([base[param] if param in base else base[replace(param, group=None)]
                       for param in full.params], dtype=np.intp)
    position = {param: k for k, param in enumerate(full.params)}
    others = moments.labels[1:]
    rows = np.array([[position[replace(c, group=label)] for label in others] for c in candidates],
                    dtype=np.intp)                         # K × (G − 1)
    with threadpool_limits(limits=1, user_api="blas"):
        theta_full = constrained.estimate.theta[column]
        _, grad, info = NormalFit(full, moments.blocks).value_grad_info(theta_full)
        # A = I_full T: sum the information's columns that map to one constrained parameter,
        # and Tᵀ A its rows
        a = np.zeros((len(full.params), len(base)))
        np.add.at(a.T, column, info.T)
        constrained_info = np.zeros((len(base), len(base)))
        np.add.at(constrained_info, column, a)
        inverse, _ = invert_information(constrained_info, 1)
        if inverse is None:
            return []
        flat = rows.ravel()
        a_d = a[flat]
        cond = info[np.ix_(flat, flat)] - a_d @ inverse @ a_d.T
    k, g1 = rows.shape
    blocks = cond.reshape(k, g1, k, g1)[np.arange(k), :, np.arange(k), :]   # K × g1 × g1
    g = grad[rows]                                                          # K × g1
    scale = np.diagonal(info[np.ix_(flat, flat)]).reshape(k, g1)
    ok = np.all(np.diagonal(blocks, axis1=1, axis2=2) > 1e-8 * scale, axis=1)
    stat = np.full(k, np.nan)
    solved = np.linalg.solve(blocks[ok], g[ok][..., None])[..., 0]
    stat[ok] = constrained.estimate.n * np.einsum("ki,ki->k", g[ok], solved)
    p = stats.chi2.sf(stat, g1)
    tested = int(ok.sum())
    return [ScoreTest(c, float(s), g1, float(pv), float(min(1.0, pv * tested)))
            for c, s, pv, good in zip(candidates, stat, p, ok) if good]


def releasable(layout: Layout, step: str, released: frozenset) -> list[Param]:
    """Shared parameters of the class ``step`` adds whose release keeps at
    least :data:`MIN_EQUAL` equal items per construct."""
    cls = ADDED[step]
    shared = [param for param in layout.params
              if param.group is None and parameter_class(param) == cls and param not in released]
    if cls not in (LOADINGS, INTERCEPTS):
        return shared
    group_of = (lambda q: q.a) if cls == LOADINGS else (lambda q: layout.primary[q.a])
    count: dict = {}
    for param in shared:
        count[group_of(param)] = count.get(group_of(param), 0) + 1
    if cls == LOADINGS:   # marker loadings (fixed at 1 in every group) are equal too
        fixed = layout.patterns[0].fixed
        for j in np.flatnonzero(np.any(fixed.loadings != 0, axis=0)):
            count[layout.factors[j]] = count.get(layout.factors[j], 0) + 1
        for j in np.flatnonzero(np.any(fixed.paths != 0, axis=0)):
            count[layout.factors[j]] = count.get(layout.factors[j], 0) + 1
    return [param for param in shared if count[group_of(param)] > MIN_EQUAL]


# --------------------------------------------------------------------------- the sequence

@dataclass(frozen=True)
class Release:
    step: str
    test: ScoreTest
    fit_after: GroupFit         # or, in the ordinal sequence, an OrdinalGroupFit


@dataclass(frozen=True)
class StepResult:
    """One step of the sequence: the model as first constrained, the
    releases, and the final (possibly partial) model."""

    step: str
    first: GroupFit
    final: GroupFit
    first_comparison: Comparison | None
    comparison: Comparison | None
    releases: tuple[Release, ...]
    stopped: str | None        # why the search ended; None when no search was needed

    @property
    def holds(self) -> bool | None:
        return None if self.comparison is None else self.comparison.holds


def _needs_search(comparison: Comparison) -> bool:
    return not comparison.holds or comparison.rejects


def _search(spec, moments, step, previous: GroupFit, first: GroupFit, released: frozenset,
            robust: bool):
    """Release constraints one at a time (see the module docstring)."""
    n_constraints = sum(1 for q in first.layout.params
                        if q.group is None and parameter_class(q) == ADDED[step])

    def refit(current, released):
        layout = build_multigroup_layout(spec, moments, step, released)
        fit = fit_multigroup(layout, moments, carry_start(current, layout), robust)
        return fit, compare(step, fit, previous, moments)

    return release_search(
        step, first, compare(step, first, previous, moments), released,
        max(1, math.ceil(RELEASE_SHARE * n_constraints)), _needs_search,
        lambda current, released: score_tests(spec, moments, current, step, released,
                                              releasable(current.layout, step, released)),
        f"a construct with fewer than {MIN_EQUAL} equal items", refit)


def release_search(step, first, comparison, released: frozenset, limit: int, needs_search,
                   tests_at, too_few: str, refit):
    """The partial-invariance search of one step, continuous or ordinal (see
    the module docstring): while ``needs_search(comparison)``, release the
    constraint whose score test (``tests_at(fit, released)``) has the
    smallest p-value, if its Bonferroni-adjusted p-value is below ``α``, and
    refit (``refit(fit, released) → (fit, comparison)``), at most ``limit``
    times.  ``too_few`` completes the reason given when no constraint is
    releasable ("… without leaving " + ``too_few``).

    Returns the final fit, the releases, the released constraints and why
    the search stopped."""
    current, releases = first, []
    while True:
        if not needs_search(comparison):
            return current, releases, released, ("the step holds and the difference test "
                                                 "does not reject")
        if len(releases) >= limit:
            return current, releases, released, (f"the limit of {limit} released constraints "
                                                 "(a fifth of the step's constraints, rounded "
                                                 "up) was reached")
        if current.estimate.acov is None:
            return current, releases, released, ("the information matrix of the constrained "
                                                 "model is singular, so no score test can be "
                                                 "computed")
        tests = tests_at(current, released)
        if not tests:
            return current, releases, released, ("no constraint can be released without "
                                                 "leaving " + too_few)
        best = min(tests, key=lambda t: (t.p_value, -t.chi_square))
        if best.p_adjusted >= ALPHA:
            return current, releases, released, (
                "no single constraint stands out (largest score test "
                f"χ² = {best.chi_square:.2f}, Bonferroni-adjusted p {p_in_words(best.p_adjusted)})")
        released = released | {best.param}
        current, comparison = refit(current, released)
        releases.append(Release(step, best, current))


def run_sequence(spec, moments: GroupMoments, steps=STEPS,
                 robust: bool = False) -> tuple[StepResult, ...]:
    """Fit the invariance steps in order, searching for partial invariance
    where a step fails; released constraints stay released in later steps.
    With ``robust``, every fit carries the scaled statistics and the
    difference tests are scaled (the score tests of the search stay
    normal-theory)."""
    results = []
    released: frozenset = frozenset()
    previous: GroupFit | None = None
    for step in steps:
        layout = build_multigroup_layout(spec, moments, step, released)
        first = fit_multigroup(layout, moments,
                               None if previous is None else carry_start(previous, layout),
                               robust)
        if previous is None:
            results.append(StepResult(step, first, first, None, None, (), None))
            previous = first
            continue
        first_comparison = compare(step, first, previous, moments)
        final, releases, released, stopped = first, [], released, None
        if _needs_search(first_comparison):
            final, releases, released, stopped = _search(spec, moments, step, previous, first,
                                                         released, robust)
        results.append(StepResult(step, first, final, first_comparison,
                                  compare(step, final, previous, moments), tuple(releases),
                                  stopped))
        previous = final
    return tuple(results)


# --------------------------------------------------------------------------- latent comparisons

@dataclass(frozen=True)
class LatentComparison:
    """Latent means, variances and correlations per group from one model."""

    source_step: str
    means: tuple[dict, ...]
    variances: tuple[dict, ...]
    correlations: tuple[dict, ...]


def latent_comparison(result: GroupFit, step: str) -> LatentComparison:
    """Latent means (differences to the reference group, which has mean 0),
    standardized differences (Hancock 2001), latent variances and latent
    correlations per group, with delta-method standard errors."""
    layout, est = result.layout, result.estimate
    labels = layout.groups
    ns = np.array(result.ns, dtype=float)
    n_groups, m = len(labels), len(layout.factors)
    mean_cells = [(g, int(j)) for g in range(1, n_groups)
                  for j in layout.patterns[g].latent_means.rows]
    upper = np.triu_indices(m, 1)
    phi0 = est.matrices(0).latent_cov
    pairs = [(int(i), int(j)) for i, j in zip(*upper)
             if phi0[i, j] != 0 and layout.kinds[i] == layout.kinds[j] == CONSTRUCT]

    def values(theta):
        mats = [pattern.matrices(theta) for pattern in layout.patterns]
        phis = np.array([x.latent_cov for x in mats])                  # G × m × m
        kappas = np.array([x.total_effects @ x.latent_means for x in mats])
        var = np.diagonal(phis, axis1=1, axis2=2)                       # G × m
        sd = np.sqrt(np.clip(var, 1e-300, None))
        corr = phis / (sd[:, :, None] * sd[:, None, :])
        out = [np.array([kappas[g, j] - kappas[0, j] for g, j in mean_cells]),
               np.array([(kappas[g, j] - kappas[0, j]) /
                         np.sqrt((ns[0] * var[0, j] + ns[g] * var[g, j]) / (ns[0] + ns[g]))
                         for g, j in mean_cells]),
               var.ravel(), (var[1:] - var[0]).ravel(),
               np.array([corr[:, i, j] for i, j in pairs]).T.ravel() if pairs else np.array([])]
        return np.concatenate(out)

    with threadpool_limits(limits=1, user_api="blas"):
        value = values(est.theta)
        se = delta_method_se(est.theta, est.acov, values)
    k = len(mean_cells)
    parts = np.split(np.arange(len(value)),
                     np.cumsum([k, k, n_groups * m, (n_groups - 1) * m]))
    diff, effect, var, var_diff, corr = (parts[0], parts[1], parts[2], parts[3], parts[4])
    means = tuple(_estimate_row({"construct": layout.factors[j], "group": labels[g],
                                 "reference": labels[0]}, value[d], se[d])
                  | {"std_difference": float(value[e]), "std_difference_se": float(se[e])}
                  for (g, j), d, e in zip(mean_cells, diff, effect))
    variances = tuple(
        _estimate_row({"construct": layout.factors[j], "group": labels[g]},
                      value[var[g * m + j]], se[var[g * m + j]])
        | ({} if g == 0 else {"difference": float(value[var_diff[(g - 1) * m + j]]),
                              "difference_se": float(se[var_diff[(g - 1) * m + j]])})
        for g in range(n_groups) for j in range(m))
    correlations = tuple(
        _estimate_row({"a": layout.factors[i], "b": layout.factors[j], "group": labels[g]},
                      value[corr[g * len(pairs) + k2]], se[corr[g * len(pairs) + k2]])
        for g in range(n_groups) for k2, (i, j) in enumerate(pairs))
    return LatentComparison(step, means, variances, correlations)


def _estimate_row(keys: dict, estimate: float, se: float) -> dict:
    z = estimate / se if se > 0 else float("nan")
    return keys | {"estimate": float(estimate), "se": float(se), "z": float(z),
                   "p_value": float(2 * stats.norm.sf(abs(z))) if np.isfinite(z) else float("nan")}


# --------------------------------------------------------------------------- the whole result

@dataclass(frozen=True)
class InvarianceResult:
    """The invariance sequence of one model across the groups."""

    model: str
    labels: tuple[str, ...]
    ns: tuple[int, ...]
    identification: str
    steps: tuple[StepResult, ...]
    latent: LatentComparison | None
    latent_note: str
    dropped: dict
    wording: dict            # item -> wording shown to the reader (None when not given)
    full_information: bool
    robust: bool = False
    method_note: str = ""

    @property
    def released(self) -> tuple[Release, ...]:
        return tuple(r for s in self.steps for r in s.releases)

    def to_dict(self) -> dict:
        """The JSON keys ``invariance`` (list of steps), ``released``,
        ``latent_means`` (plus ``latent_variances``, ``latent_correlations``
        and ``invariance_setup``)."""
        return {
            "invariance_setup": {
                "model": self.model, "groups": list(self.labels), "reference": self.labels[0],
                "n": dict(zip(self.labels, self.ns)), "dropped": dict(self.dropped),
                "estimator": ("robust maximum likelihood (scaled statistics, sandwich "
                              "standard errors)" if self.robust else
                              "maximum likelihood (normal theory)"),
                "method_note": self.method_note,
                "missing_handling": ("full-information ML (every answer given counts)"
                                     if self.full_information else "listwise deletion"
                                     if self.dropped.get(INCOMPLETE) else
                                     "none needed (no answer is missing)"),
                "standard_errors": ("sandwich" if self.robust else
                                    STANDARD_ERRORS["fiml" if self.full_information else "ml"]),
                "difference_test": ("scaled, Satorra & Bentler (2001; 2010 when the 2001 "
                                    "scaling factor is not positive)" if self.robust else
                                    "likelihood ratio"),
                "identification": self.identification,
                "baseline_model": "independence within each group, item means and variances "
                                  "free in every group (the same for every step)",
                "srmr": "covariance and mean residuals, pooled over groups by size",
                "rmsea": "multiplied by the square root of the number of groups (Steiger 1998)",
                "search": (f"score tests on each equality constraint, Bonferroni-adjusted, "
                           f"alpha {ALPHA}; at least {MIN_EQUAL} equal items per construct; "
                           f"at most a fifth of a step's constraints (rounded up) released"),
                "notes": list(self.steps[-1].final.layout.notes),
            },
        } | sequence_keys(self, self._step_dict, self._release_dict)

    def _step_dict(self, s: StepResult) -> dict:
        return step_entry(s, SHARED[s.step], self._release_dict)

    def _release_dict(self, r: Release) -> dict:
        param = r.test.param
        kind = _KIND_WORDS.get(param.kind, "residual variance")
        final = next(s.final for s in self.steps if s.step == r.step)
        layout, theta = final.layout, final.estimate.theta
        where = {q: k for k, q in enumerate(layout.params)}
        estimates = {label: float(theta[where[replace(param, group=label)]])
                     for label in self.labels}
        return release_entry(r, kind, f"The {kind} of item '{released_item(param)}'", final,
                             self.wording, estimates,
                             ("chi_square", "df", "cfi", "rmsea", "srmr",
                              "chi_square_scaled", "cfi_robust", "rmsea_robust"))


# --------------------------------------------------------------------------- shared JSON pieces
# (also built for the ordinal sequence, :mod:`scalewright.invariance_ordinal`)

def sequence_keys(result, step_dict, release_dict) -> dict:
    """The keys after ``invariance_setup`` of an invariance result (continuous
    or ordinal): the steps, the releases and the latent comparisons;
    ``step_dict`` and ``release_dict`` turn one step and one release into
    their JSON entries."""
    latent = result.latent
    return {
        "invariance": [step_dict(s) for s in result.steps],
        "released": [release_dict(r) for r in result.released],
        "latent_means": [] if latent is None else list(latent.means),
        "latent_variances": [] if latent is None else list(latent.variances),
        "latent_correlations": [] if latent is None else list(latent.correlations),
        "latent_comparison_note": result.latent_note,
    }


def step_entry(s, equal, release_dict) -> dict:
    """One step's JSON entry: its fit, the comparison with the step before,
    the fit before any release and the search.  ``s`` is a step result of
    either sequence, ``equal`` the parameter classes equal at that step."""
    out = {"step": s.step, "equal": list(equal), "partial": bool(s.releases),
           "converged": bool(s.final.estimate.record.converged),
           "fit": s.final.to_dict(), "delta": None, "difference_test": None,
           "decision": {"holds": None, "text": "The configural model is the reference "
                        "point of the sequence: judge its fit like a single-group model."}}
    if s.comparison is not None:
        out |= s.comparison.to_dict(s.step)
    if s.releases:
        out["before_release"] = {"fit": s.first.to_dict()} | \
            s.first_comparison.to_dict(s.step)
    out["search"] = None if s.stopped is None else {
        "released": [release_dict(r) for r in s.releases], "stopped": s.stopped}
    return out


def released_item(param: Param) -> str:
    """The item a released parameter belongs to (a loading's second name,
    otherwise its first)."""
    return param.b if param.kind in (LOADING, PATH) else param.a


def release_entry(r, kind: str, what: str, final, wording: dict, estimates: dict,
                  fit_keys: tuple) -> dict:
    """One release's JSON entry: ``what`` names the parameter in words
    (``"The loading of item 'x'"``), ``estimates`` its value in each group,
    ``fit_keys`` the fit keys kept from the model after the release."""
    param = r.test.param
    item = released_item(param)
    words = wording.get(item)
    return {"step": r.step, "kind": kind, "item": item, "wording": words,
            "construct": param.a if param.kind in (LOADING, PATH) else
            final.layout.primary.get(item),
            "text": what + (f" (“{words}”)" if words else "")
            + " differs between groups and is estimated separately in each.",
            "estimates": estimates,
            "score_test": {"chi_square": r.test.chi_square, "df": r.test.df,
                           "p_value": r.test.p_value, "p_adjusted": r.test.p_adjusted},
            "fit_after": {k: v for k, v in r.fit_after.to_dict().items() if k in fit_keys}}


def measurement_invariance(spec, moments: GroupMoments, *, dropped: dict | None = None,
                           wording: dict | None = None, steps=STEPS, robust: bool = False,
                           method_note: str = "") -> InvarianceResult:
    """Run the whole sequence for one model and compare the latent variables.

    Parameters
    ----------
    spec : ModelSpec
    moments : GroupMoments
        Group sizes and moments, reference group first
        (:meth:`scalewright.groups.GroupedData.moments`).
    dropped : dict, optional
        Rows left out, by reason, for the report.
    wording : dict, optional
        Item name → wording, used when naming non-invariant items.
    steps : sequence of str
        The steps to fit, in order (default: all four).
    robust : bool
        Scaled statistics, robust fit indices, sandwich standard errors and
        scaled difference tests (:func:`scalewright.multigroup.robust_test`).
    method_note : str
        A sentence on the method, for the report (e.g. why it differs from
        the single-group models').
    """
    results = run_sequence(spec, moments, steps, robust)
    by_step = {s.step: s for s in results}
    latent, note = None, ""
    if SCALAR in by_step and by_step[SCALAR].holds:
        latent = latent_comparison(by_step[SCALAR].final, SCALAR)
        note = ("Latent means compared under "
                f"{'partial ' if by_step[SCALAR].releases else ''}scalar invariance.")
    elif METRIC in by_step and by_step[METRIC].holds:
        latent = replace(latent_comparison(by_step[METRIC].final, METRIC), means=())
        note = ("Scalar invariance does not hold, even after the search, so latent means are "
                "not compared; latent variances and correlations come from the metric model.")
    else:
        note = ("Metric invariance does not hold, so latent variances, correlations and means "
                "are not compared across groups.")
    return InvarianceResult(spec.name, moments.labels, moments.ns, spec.identification,
                            results, latent, note, dropped or {}, wording or {},
                            moments.full_information, robust, method_note)


def invariance_keys(study, data, spec, method=None) -> dict:
    """The JSON keys of the invariance check of model ``spec`` across the
    study's groups (see :meth:`InvarianceResult.to_dict`).

    ``method`` is the study's :class:`~scalewright.methods.MethodChoice`
    (chosen here when not given).  Robust ML gives scaled statistics and
    scaled difference tests; missing answers are handled by full-information
    ML unless the method says listwise.  The ordinal method goes to the
    thresholds-based sequence of :mod:`scalewright.invariance_ordinal`.
    """
    method = choose_method(study, data) if method is None else method
    if method.estimator == ORDINAL:
        # imported here: the ordinal sequence builds on this module's decisions
        from scalewright.invariance_ordinal import ordinal_invariance_keys
        return ordinal_invariance_keys(study, data, spec, method)
    grouped = split_groups(study, data, spec.items)
    full_information = grouped.has_missing and method.missing_handling != LISTWISE
    wording = {name: item.wording for name, item in study.items.items()}
    return measurement_invariance(spec, grouped.moments(full_information),
                                  dropped=grouped.dropped(full_information),
                                  wording=wording, robust=method.estimator == ROBUST).to_dict()
