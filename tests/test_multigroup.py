"""Multi-group models with a mean structure (issue 6, points 1 and 6).

Outside references:

* semopy 2.3.11's multigroup routine (``semopy.multigroup.multigroup``) fits
  the model separately in each group, which is the configural model: its
  per-group estimates and the sum of its per-group chi-squares are the
  reference for our configural fit.
* semopy has no cross-group equality constraints, so the metric model is
  rebuilt for it as one "stacked" model: the items of each group become
  separate variables (``x1_0``, ``x1_1``, ...), every person answers only
  the variables of their own group, the two groups' factors are uncorrelated
  and the loadings carry shared labels.  Fitted by semopy's full-information
  ML with means (``ModelMeans``), whose likelihood for a person is the
  normal density of the answers they have, this is exactly the multi-group
  likelihood with free intercepts.
* degrees of freedom counted by hand from the moments and parameters.

semopy runs with ``ftol = 1e-12`` (design/references.md).  Tolerance for
estimates against semopy: 1e-4 relative (DEVELOPERS.md: ML estimates relative
to another engine); algebra (df, identities) exact or 1e-10.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import semopy
from scipy import stats

from conftest import HS_CONSTRUCTS, HS_ITEMS, make_spec
from scalewright.indices import srmr
from scalewright.layout import FACTOR_COV, INTERCEPT, LOADING, RESIDUAL_COV, Param
from scalewright.multigroup import (CONFIGURAL, METRIC, SCALAR, STEPS, STRICT,
                                    build_multigroup_layout, carry_start, complete_moments,
                                    fit_multigroup)

SCHOOLS = ("Pasteur", "Grant-White")
SEMOPY_TOL = 1e-4


@pytest.fixture(scope="module")
def hs_moments(hs_data):
    index = np.where(hs_data["school"] == SCHOOLS[0], 0, 1)
    return complete_moments(SCHOOLS, hs_data[list(HS_ITEMS)].to_numpy(float), index)


def fit_step(moments, step, identification="marker", start_from=None):
    spec = make_spec(HS_CONSTRUCTS, identification=identification)
    layout = build_multigroup_layout(spec, moments, step)
    return fit_multigroup(layout, moments,
                          None if start_from is None else carry_start(start_from, layout))


def value(result, kind, a, b, group=None):
    where = {p: k for k, p in enumerate(result.layout.params)}
    return result.estimate.theta[where[Param(kind, a, b, group)]]


# --------------------------------------------------------------------------- configural

@pytest.fixture(scope="module")
def semopy_per_group(hs_data):
    data = hs_data[list(HS_ITEMS) + ["school"]]
    return semopy.multigroup.multigroup(
        "\n".join(f"{c} =~ {' + '.join(its)}" for c, its in HS_CONSTRUCTS.items()),
        data, "school", options={"ftol": 1e-12})


def test_configural_estimates_match_semopy_per_group_fits(hs_moments, semopy_per_group):
    result = fit_step(hs_moments, CONFIGURAL)
    assert result.estimate.record.converged
    for school in SCHOOLS:
        est = semopy_per_group.estimates[school]
        loadings = est[(est.op == "~") & est.rval.isin(HS_CONSTRUCTS)]
        for _, row in loadings.iterrows():
            if row["Estimate"] == 1.0:      # the marker item, fixed in both programs
                continue
            ours = value(result, LOADING, row.rval, row.lval, school)
            np.testing.assert_allclose(ours, row["Estimate"], rtol=SEMOPY_TOL)
        residuals = est[(est.op == "~~") & (est.lval == est.rval) & est.lval.isin(HS_ITEMS)]
        for _, row in residuals.iterrows():
            ours = value(result, RESIDUAL_COV, row.lval, row.lval, school)
            np.testing.assert_allclose(ours, row["Estimate"], rtol=SEMOPY_TOL)


def test_configural_chi_square_is_the_sum_of_semopy_group_chi_squares(hs_moments,
                                                                      semopy_per_group):
    result = fit_step(hs_moments, CONFIGURAL)
    # semopy reports N·F_ML with the ÷N covariance per group (DEVELOPERS.md, conventions)
    total = sum(float(semopy_per_group.stats[s].loc["Value", "chi2"]) for s in SCHOOLS)
    np.testing.assert_allclose(result.fit.chi_square, total, rtol=SEMOPY_TOL)


def test_configural_intercepts_reproduce_the_group_means(hs_moments, hs_data):
    result = fit_step(hs_moments, CONFIGURAL)
    for school in SCHOOLS:
        means = hs_data[hs_data.school == school][list(HS_ITEMS)].mean()
        ours = [value(result, INTERCEPT, item, item, school) for item in HS_ITEMS]
        # theory: with free intercepts and zero latent means, μ̂ = x̄ at the ML estimates;
        # tolerance from the optimiser's gradient criterion
        np.testing.assert_allclose(ours, means.to_numpy(), rtol=1e-7)


# --------------------------------------------------------------------------- metric

def stacked_description(constructs, n_groups=2):
    """The metric model for semopy as one model over group-suffixed variables."""
    lines = []
    for k in range(n_groups):
        for c, its in constructs.items():
            lines.append(f"{c}_{k} =~ 1*{its[0]}_{k} + "
                         + " + ".join(f"l_{i}*{i}_{k}" for i in its[1:]))
    lines += [f"{a}_0 ~~ 0*{b}_1" for a in constructs for b in constructs]
    return "\n".join(lines)


def stacked_data(data, items, groups):
    frames = []
    for k, g in enumerate(groups):
        sub = data[data.school == g][items].to_numpy(float)
        wide = np.full((len(sub), len(items) * len(groups)), np.nan)
        wide[:, k * len(items):(k + 1) * len(items)] = sub
        frames.append(wide)
    columns = [f"{i}_{k}" for k in range(len(groups)) for i in items]
    return pd.DataFrame(np.vstack(frames), columns=columns)


@pytest.fixture(scope="module")
def semopy_metric(hs_data):
    model = semopy.ModelMeans(stacked_description(HS_CONSTRUCTS))
    model.fit(stacked_data(hs_data, list(HS_ITEMS), SCHOOLS), options={"ftol": 1e-12})
    return model.inspect()


@pytest.mark.slow
def test_metric_estimates_match_semopy_stacked_model(hs_moments, semopy_metric):
    result = fit_step(hs_moments, METRIC)
    assert result.estimate.record.converged
    est = semopy_metric
    checked = 0
    for _, row in est.iterrows():
        lval, rval = str(row.lval), str(row.rval)
        if row.op == "~" and rval != "1" and row["Estimate"] != 1.0:
            item, construct = lval.rsplit("_", 1)[0], rval.rsplit("_", 1)[0]
            ours = value(result, LOADING, construct, item)       # shared by both groups
        elif row.op == "~~" and lval.rsplit("_", 1)[1] == rval.rsplit("_", 1)[1]:
            (a, k), b = lval.rsplit("_", 1), rval.rsplit("_", 1)[0]
            kind = RESIDUAL_COV if a in HS_ITEMS else FACTOR_COV
            names = list(HS_ITEMS) if kind == RESIDUAL_COV else list(HS_CONSTRUCTS)
            first, second = sorted((a, b), key=names.index)
            ours = value(result, kind, first, second, SCHOOLS[int(k)])
        else:
            continue
        np.testing.assert_allclose(ours, row["Estimate"], rtol=SEMOPY_TOL)
        checked += 1
    assert checked == 2 * (6 + 6 + 9)   # per group: the 6 shared loadings, Φ (6) and Θ (9)


# --------------------------------------------------------------------------- df and fit conventions

def test_degrees_of_freedom_by_counting(hs_moments):
    p, q_single, g = 9, 21, 2
    moments_per_group = p * (p + 1) // 2 + p                  # 45 covariances + 9 means
    # configural, marker: per group 6 loadings + 6 Φ + 9 Θ = 21, plus 9 intercepts
    configural = g * moments_per_group - g * (q_single + p)
    metric = configural + 6              # 6 free loadings shared instead of twice
    scalar = metric + 9 - 3              # 9 intercepts shared, 3 latent means freed
    strict = scalar + 9                  # 9 residual variances shared
    expected = {CONFIGURAL: configural, METRIC: metric, SCALAR: scalar, STRICT: strict}
    assert expected == {CONFIGURAL: 48, METRIC: 54, SCALAR: 60, STRICT: 69}
    for identification in ("marker", "unit-variance"):
        spec = make_spec(HS_CONSTRUCTS, identification=identification)
        for step in STEPS:
            assert build_multigroup_layout(spec, hs_moments, step).df() == expected[step]


def test_identification_choice_does_not_change_fit(hs_moments):
    # theory: marker and unit-variance scaling are reparametrisations of one model
    # (tolerance 1e-6 relative: two optimiser runs to a 1e-9 gradient)
    for step in STEPS:
        a = fit_step(hs_moments, step, "marker").fit.chi_square
        b = fit_step(hs_moments, step, "unit-variance").fit.chi_square
        np.testing.assert_allclose(a, b, rtol=1e-6)


def test_baseline_is_independence_within_each_group(hs_moments, hs_data):
    result = fit_step(hs_moments, CONFIGURAL)
    # scipy: 2 Σ_g [ℓ(x̄, S) − ℓ(x̄, diag S)] with the ÷n covariance
    chi2 = 0.0
    for school in SCHOOLS:
        x = hs_data[hs_data.school == school][list(HS_ITEMS)].to_numpy(float)
        mean, cov = x.mean(axis=0), np.cov(x.T, bias=True)
        chi2 += 2 * (stats.multivariate_normal(mean, cov).logpdf(x).sum()
                     - stats.multivariate_normal(mean, np.diag(np.diag(cov))).logpdf(x).sum())
    np.testing.assert_allclose(result.fit.baseline_chi_square, chi2, rtol=1e-10)
    assert result.fit.baseline_df == 2 * 36


def test_chi_square_is_twice_the_loglik_gap_to_the_saturated_model(hs_moments, hs_data):
    result = fit_step(hs_moments, SCALAR)
    loglik = 0.0
    for g, school in enumerate(SCHOOLS):
        x = hs_data[hs_data.school == school][list(HS_ITEMS)].to_numpy(float)
        mats = result.estimate.matrices(g)
        # scipy: the normal log-density at the implied moments of the group
        loglik += stats.multivariate_normal(mats.implied_mean, mats.implied_cov).logpdf(x).sum()
    np.testing.assert_allclose(result.estimate.loglik, loglik, rtol=1e-10)


def test_rmsea_uses_the_square_root_of_the_number_of_groups(hs_moments):
    fit = fit_step(hs_moments, METRIC).fit
    # Steiger (1998): RMSEA_G = √G · √(max(T − df, 0)/(df (N − 1)))
    expected = np.sqrt(2) * np.sqrt((fit.chi_square - fit.df) / (fit.df * (301 - 1)))
    np.testing.assert_allclose(fit.rmsea, expected, rtol=1e-12)


def test_srmr_with_means_reduces_to_covariance_srmr_when_means_are_saturated(hs_moments):
    result = fit_step(hs_moments, CONFIGURAL)
    mats = [result.estimate.matrices(g) for g in range(2)]
    # theory: the configural model reproduces the means, so the mean residuals are 0 and
    # SRMR over (p(p+1)/2 + p) moments is the covariance SRMR scaled by √(45/54)
    cov_only = srmr(hs_moments.covs, [m.implied_cov for m in mats], hs_moments.ns)
    np.testing.assert_allclose(result.fit.srmr, cov_only * np.sqrt(45 / 54), rtol=1e-6)


def test_unit_variance_frees_latent_variances_outside_the_reference_group(hs_moments):
    metric = fit_step(hs_moments, METRIC, "unit-variance")
    marker = fit_step(hs_moments, METRIC, "marker")
    for construct, items in HS_CONSTRUCTS.items():
        # theory: the variance ratio of the two groups is scale-free, so both scalings agree
        ratio_marker = (value(marker, FACTOR_COV, construct, construct, SCHOOLS[1])
                        / value(marker, FACTOR_COV, construct, construct, SCHOOLS[0]))
        ratio_unit = value(metric, FACTOR_COV, construct, construct, SCHOOLS[1])
        np.testing.assert_allclose(ratio_unit, ratio_marker, rtol=1e-5)


def test_start_values_carried_from_the_previous_step_reach_the_same_solution(hs_moments):
    configural = fit_step(hs_moments, CONFIGURAL)
    cold = fit_step(hs_moments, METRIC)
    warm = fit_step(hs_moments, METRIC, start_from=configural)
    assert warm.estimate.record.iterations <= cold.estimate.record.iterations
    np.testing.assert_allclose(warm.estimate.theta, cold.estimate.theta, rtol=1e-6, atol=1e-8)


# --------------------------------------------------------------------------- robust corrections

def test_robust_configural_trace_is_the_sum_of_the_groups_traces(hs_data, hs_moments):
    # algebra: in the configural model the groups share no parameter, so UΓ is block
    # diagonal and tr(UΓ) is the sum of the single-group traces (tolerance 1e-8)
    spec = make_spec(HS_CONSTRUCTS)
    total = fit_multigroup(build_multigroup_layout(spec, hs_moments, CONFIGURAL), hs_moments,
                           robust=True).robust.test.trace
    parts = 0.0
    for school in SCHOOLS:
        x = hs_data[hs_data.school == school][list(HS_ITEMS)].to_numpy(float)
        one = complete_moments((school,), x, np.zeros(len(x), dtype=int), HS_ITEMS)
        parts += fit_multigroup(build_multigroup_layout(spec, one, CONFIGURAL), one,
                                robust=True).robust.test.trace
    np.testing.assert_allclose(total, parts, rtol=1e-8)


def test_robust_scaling_factor_is_near_one_for_normal_data():
    rng = np.random.default_rng(11)
    spec = make_spec({"f1": ("y1", "y2", "y3", "y4"), "f2": ("y5", "y6", "y7", "y8")})
    lam = np.zeros((8, 2))
    lam[:4, 0] = lam[4:, 1] = 0.7
    sigma = lam @ np.array([[1.0, 0.3], [0.3, 1.0]]) @ lam.T + 0.51 * np.eye(8)
    x = rng.multivariate_normal(np.zeros(8), sigma, 6000)
    moments = complete_moments(("a", "b"), x, np.repeat([0, 1], 3000), spec.items)
    result = fit_multigroup(build_multigroup_layout(spec, moments, METRIC), moments, robust=True)
    # theory (Satorra & Bentler 1994): under normality Γ = A⁻¹ and c = 1; with 3,000 per group
    # the estimate's sampling SD is about .02, so tolerance .06
    assert abs(result.robust.test.scaling_factor - 1.0) < 0.06
