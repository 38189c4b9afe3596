"""DWLS on polychoric correlations (scalewright.estimate.dwls).

Outside references:

* semopy 2.3's DWLS objective, fed the same polychoric matrix and the same
  diagonal weights (estimates, and its objective value = our unadjusted T);
* independent dense computations in the test: the Jacobian of the implied
  correlations by central differences of Λ Φ Λᵀ written out here, the
  sandwich with it, and U = W − WΔ(ΔᵀWΔ)⁻¹ΔᵀW formed densely with the
  eigenvalues of UΓ (Satorra & Bentler 1994);
* statistical theory, by seeded simulation from a known population model
  with five-category items (Muthén, du Toit & Spisic 1997; Asparouhov &
  Muthén 2010): the adjusted statistic behaves like χ²_df, the robust
  standard errors match the spread of the estimates.
"""

from __future__ import annotations

import types

import numpy as np
import pandas as pd
import pytest
from conftest import HS_CONSTRUCTS, HS_ITEMS, HS_SEMOPY, make_spec
from numpy.testing import assert_allclose

from scalewright.estimate.dwls import fit_dwls, residual_variances
from scalewright.estimate.polychoric import ordinal_moments
from scalewright.specify import build_layout


def _quantile_categories(x, k):
    """Cut each column at its sample quantiles into (at most) k ordered categories 1..k."""
    probs = np.arange(1, k) / k
    return np.column_stack([np.searchsorted(np.quantile(col, probs), col, side="right") + 1
                            for col in x.T]).astype(float)


@pytest.fixture(scope="module")
def hs_ordinal(hs_x):
    """Holzinger & Swineford (1939) tests cut at their quintiles: five ordered categories."""
    return ordinal_moments(_quantile_categories(hs_x, 5), HS_ITEMS)


def semopy_dwls_model(desc, moments):
    """semopy's model of ``desc``, made ready for a DWLS fit to our
    polychoric matrix with our weights; returns it and that matrix.

    ``Model.fit(cov=…, obj="DWLS")`` would compute weights from raw data
    (``prepare_wls``), which a correlation matrix does not have; the three
    attributes that ``prepare_wls`` sets are set here instead: the weight of
    each upper-triangle element (our ``dwls_weights`` off the diagonal; any
    positive weight on the diagonal, which the free residual variances fit
    exactly), its indices and the fitted elements.  Marking the model as
    already prepared makes ``fit`` skip ``prepare_wls``.
    """
    import semopy

    items = moments.items
    p = len(items)
    corr = pd.DataFrame(moments.raw_correlations, index=items, columns=items)
    model = semopy.Model(desc)
    model.load(cov=corr, n_samples=moments.n_rows)
    order = [items.index(v) for v in model.vars["observed"]]
    weights = np.ones((p, p))
    jj, ll = np.triu_indices(p, 1)
    weights[jj, ll] = weights[ll, jj] = moments.dwls_weights
    weights = weights[np.ix_(order, order)]
    upper = np.triu_indices(p)
    model.mx_w_inv = weights[upper]
    model.inds_triu_sigma = upper
    model.mx_vech_s = model.mx_cov[upper]
    model.last_result = types.SimpleNamespace(name_obj="DWLS")
    return model, corr


def _semopy_dwls(desc, moments):
    """semopy's DWLS fit of ``desc`` to our matrix and weights, ftol 1e-12."""
    model, corr = semopy_dwls_model(desc, moments)
    result = model.fit(cov=corr, obj="DWLS", n_samples=moments.n_rows,
                       options={"ftol": 1e-12, "maxiter": 10000})
    return model, result


@pytest.fixture(scope="module")
def hs_marker_fit(hs_ordinal):
    spec = make_spec(HS_CONSTRUCTS, identification="marker")
    return fit_dwls(build_layout(spec, hs_ordinal.correlations), hs_ordinal)


@pytest.fixture(scope="module")
def hs_semopy(hs_ordinal):
    return _semopy_dwls(HS_SEMOPY, hs_ordinal)


def assert_estimates_match_semopy(fit, table, constructs, items) -> int:
    """Every free parameter of our DWLS ``fit`` against semopy's estimate table
    (``Model.inspect()``); returns how many were compared."""
    ours = {(prm.kind, prm.a, prm.b): fit.theta[k] for k, prm in enumerate(fit.layout.params)}
    checked = 0
    for _, row in table.iterrows():
        if row["op"] == "~" and row["rval"] in constructs:
            key = ("loading", row["rval"], row["lval"])
        elif row["op"] == "~~":
            a, b = row["lval"], row["rval"]
            kind = "residual_covariance" if a in items else "factor_covariance"
            key = (kind, a, b) if (kind, a, b) in ours else (kind, b, a)
        else:
            continue
        if key not in ours:       # semopy's marker loadings (fixed at 1)
            assert row["Estimate"] == 1.0
            continue
        # Both minimise the same function; semopy's SLSQP with ftol 1e-12
        # stops within about 1e-6 of the optimum on these problems.
        assert_allclose(ours[key], row["Estimate"], rtol=1e-5, atol=1e-6, err_msg=str(key))
        checked += 1
    return checked


def test_estimates_match_semopy_dwls_on_the_same_correlations_and_weights(hs_marker_fit,
                                                                          hs_semopy):
    model, _ = hs_semopy
    checked = assert_estimates_match_semopy(hs_marker_fit, model.inspect(), HS_CONSTRUCTS,
                                            HS_ITEMS)
    assert checked == 21      # 6 free loadings, 3 + 3 factor (co)variances, 9 residual variances


def test_unadjusted_statistic_equals_semopy_objective_at_its_optimum(hs_marker_fit, hs_semopy):
    # semopy's DWLS objective with weights 1/Var(r) is (r − ρ)ᵀ W (r − ρ),
    # which is our T = N F; the optimum agrees to the optimiser's precision.
    _, result = hs_semopy
    assert_allclose(hs_marker_fit.test.chi_square, result.fun, rtol=1e-7)


def test_residual_variances_make_the_latent_responses_unit_variance(hs_marker_fit):
    sigma = hs_marker_fit.layout.patterns[0].matrices(hs_marker_fit.theta).implied_cov
    # the delta parametrisation: algebra, 1e-12
    assert_allclose(np.diag(sigma), 1.0, rtol=0, atol=1e-12)


def test_degrees_of_freedom_count_only_the_correlations(hs_marker_fit):
    # 36 correlations − (6 loadings + 6 factor (co)variances) = 24; the
    # thresholds are saturated and the residual variances not free.
    assert hs_marker_fit.test.df == 36 - 12
    assert int(hs_marker_fit.estimated.sum()) == 12


def test_identification_changes_neither_fit_nor_standardized_loadings(hs_ordinal, hs_marker_fit):
    unit = fit_dwls(build_layout(make_spec(HS_CONSTRUCTS), hs_ordinal.correlations), hs_ordinal)
    # the two scalings are reparametrisations of one model: same minimum
    assert_allclose(unit.test.chi_square, hs_marker_fit.test.chi_square, rtol=1e-8)

    def std_loadings(fit):
        mats = fit.layout.patterns[0].matrices(fit.theta)
        return mats.loadings * np.sqrt(np.diag(mats.latent_cov))

    assert_allclose(std_loadings(unit), std_loadings(hs_marker_fit), rtol=1e-6, atol=1e-8)


# --------------------------------------------------------------------------
# Sandwich and traces against dense computations written out in the test


def _implied_correlations(theta, constructs=HS_CONSTRUCTS):
    """ρ(θ) for the unit-variance three-factor model, written out by hand:
    θ = (9 loadings in item order, 3 correlations φ21, φ31, φ32)."""
    lam = np.zeros((9, 3))
    for j, its in enumerate(constructs.values()):
        for it in its:
            i = HS_ITEMS.index(it)
            lam[i, j] = theta[i]
    phi = np.eye(3)
    phi[1, 0] = phi[0, 1] = theta[9]
    phi[2, 0] = phi[0, 2] = theta[10]
    phi[2, 1] = phi[1, 2] = theta[11]
    sigma = lam @ phi @ lam.T
    return sigma[np.triu_indices(9, 1)]


@pytest.fixture(scope="module")
def hs_unit(hs_ordinal):
    layout = build_layout(make_spec(HS_CONSTRUCTS), hs_ordinal.correlations)
    fit = fit_dwls(layout, hs_ordinal)
    # our parameter order: 9 loadings (construct by construct = item order here),
    # 3 factor correlations (B-A, C-A, C-B), then 9 residual variances
    kinds = [p.kind for p in layout.params]
    assert kinds[:12] == ["loading"] * 9 + ["factor_covariance"] * 3
    theta = fit.theta[:12]
    step = 1e-6
    jac = np.column_stack([(_implied_correlations(theta + step * e)
                            - _implied_correlations(theta - step * e)) / (2 * step)
                           for e in np.eye(12)])
    gamma = hs_ordinal.acov_corr
    w = np.diag(1.0 / np.diag(gamma))
    h_inv = np.linalg.inv(jac.T @ w @ jac)
    u = w - w @ jac @ h_inv @ jac.T @ w
    return fit, theta, jac, gamma, w, h_inv, u


def test_gradient_vanishes_at_the_estimate_by_finite_differences(hs_unit, hs_ordinal):
    _, theta, jac, _, w, _, _ = hs_unit
    r = hs_ordinal.raw_correlations[np.triu_indices(9, 1)]
    e = r - _implied_correlations(theta)
    # scale: the gradient of T = eᵀWe is −2ΔᵀWe; at the minimum it is zero up
    # to the optimiser's tolerance (1e-9 per case, times N) and the
    # finite-difference error of Δ (~1e-9): 1e-5 on a T of order 10.
    assert np.max(np.abs(2 * jac.T @ w @ e)) < 1e-5


def test_sandwich_standard_errors_match_dense_finite_difference_sandwich(hs_unit):
    fit, _, jac, gamma, w, h_inv, _ = hs_unit
    dense = h_inv @ jac.T @ w @ gamma @ w @ jac @ h_inv
    # central differences are exact for this quadratic ρ up to rounding: 1e-6
    assert_allclose(np.sqrt(np.diag(fit.acov)[:12]), np.sqrt(np.diag(dense)), rtol=1e-6)


def test_residual_variance_standard_errors_follow_the_delta_method(hs_unit):
    fit, theta, _, _, _, _, _ = hs_unit
    acov = fit.acov[:12, :12]

    def residual_variances(t):
        lam = np.zeros(9)
        lam[:] = t[:9]
        return 1.0 - lam ** 2      # unit factor variances: communality λ²

    step = 1e-6
    jac = np.column_stack([(residual_variances(theta + step * e)
                            - residual_variances(theta - step * e)) / (2 * step)
                           for e in np.eye(12)])
    expected = np.sqrt(np.diag(jac @ acov @ jac.T))
    assert_allclose(fit.theta[12:], residual_variances(theta), rtol=0, atol=1e-12)
    assert_allclose(np.sqrt(np.diag(fit.acov)[12:]), expected, rtol=1e-6)


def test_residual_variances_match_the_dense_sandwich_of_the_residuals(hs_unit):
    fit, _, jac, gamma, w, h_inv, _ = hs_unit
    # Browne (1984): e = r − ρ(θ̂) ≈ (I − ΔH⁻¹ΔᵀW)(r − ρ), so
    # Var(e) = (I − ΔH⁻¹ΔᵀW) Γ (I − ΔH⁻¹ΔᵀW)ᵀ, written out densely here with
    # the finite-difference Δ (exact for this quadratic ρ up to rounding): 1e-7
    projector = np.eye(36) - jac @ h_inv @ jac.T @ w
    dense = np.diag(projector @ gamma @ projector.T)
    assert_allclose(residual_variances(fit.layout, fit.theta, gamma), dense, rtol=1e-7)
    # a residual can only be less variable than the correlation it belongs to
    assert np.all(dense < np.diag(gamma))


def test_traces_match_the_eigenvalues_of_dense_u_gamma(hs_unit):
    fit, _, _, gamma, _, _, u = hs_unit
    eig = np.linalg.eigvals(u @ gamma).real
    # low-rank algebra against the dense product: rounding only, 1e-8
    assert_allclose(fit.test.trace, eig.sum(), rtol=1e-8)
    assert_allclose(fit.test.trace_squared, np.sum(eig ** 2), rtol=1e-8)


def test_shifted_statistic_has_the_mean_and_variance_of_chi_square_df(hs_unit):
    # T ≈ Σ λ_k χ²₁ (Satorra & Bentler 1994): E T = Σλ, Var T = 2Σλ².  The
    # scaled-and-shifted a·T + b (Asparouhov & Muthén 2010) must have mean df
    # and variance 2 df.
    fit, _, _, gamma, _, _, u = hs_unit
    lam = np.linalg.eigvals(u @ gamma).real
    test = fit.test
    assert_allclose(test.shift_scale * lam.sum() + test.shift, test.df, rtol=1e-8)
    assert_allclose(test.shift_scale ** 2 * 2 * np.sum(lam ** 2), 2 * test.df, rtol=1e-8)
    # Satterthwaite form: T d*/t1 on d* = t1²/t2 has mean d*, variance 2 d*
    d_star = test.df_adjusted
    assert_allclose(lam.sum() * d_star / test.trace, d_star, rtol=1e-8)
    assert_allclose((d_star / test.trace) ** 2 * 2 * np.sum(lam ** 2), 2 * d_star, rtol=1e-8)


def test_baseline_statistic_sets_every_correlation_to_zero(hs_unit, hs_ordinal):
    fit, _, _, gamma, w, _, _ = hs_unit
    r = hs_ordinal.raw_correlations[np.triu_indices(9, 1)]
    base = fit.baseline
    assert base.df == 36
    assert_allclose(base.chi_square, r @ w @ r, rtol=1e-12)
    # with no parameters U = W, so tr(WΓ) = p* for W = diag(Γ)⁻¹
    assert_allclose(base.trace, 36.0, rtol=1e-12)
    assert_allclose(base.trace_squared, np.trace(w @ gamma @ w @ gamma), rtol=1e-10)


# --------------------------------------------------------------------------
# Simulation from a known population model


POP_LOADINGS = np.array([0.7, 0.6, 0.8, 0.5, 0.6, 0.7, 0.5, 0.8])
POP_PHI = 0.4
#: five categories, asymmetric thresholds (a skewed Likert item)
POP_CUTS = np.array([-1.5, -0.6, 0.3, 1.2])


@pytest.mark.parametrize("structure", ["correlated, cross-loading, residual covariance",
                                       "higher order", "bifactor", "marker"])
def test_exact_hessian_matches_finite_differences_of_the_gradient(hs_ordinal, structure):
    # theory: the Hessian is the gradient's derivative; the gradient −2ΔᵀWe is checked
    # (test_gradient_vanishes_…, and the estimates against semopy).  Central differences,
    # step 1e-6(1 + |φ|): error O(h²) + O(ε/h) ≈ 1e-10, far below the misfit term
    # 2Σ w e ∂²ρ the Gauss–Newton matrix leaves out, which the test also requires
    from scalewright.estimate.dwls import _DeltaModel
    spec = {"correlated, cross-loading, residual covariance": make_spec(
                HS_CONSTRUCTS, cross_loadings={"visual": ["x9"]},
                residual_covariances=[("x7", "x8")]),
            "higher order": make_spec(HS_CONSTRUCTS, higher_order={"g": list(HS_CONSTRUCTS)}),
            "bifactor": make_spec(HS_CONSTRUCTS, general="g"),
            "marker": make_spec(HS_CONSTRUCTS, identification="marker")}[structure]
    layout = build_layout(spec, hs_ordinal.correlations)
    model = _DeltaModel(layout)
    r = hs_ordinal.raw_correlations[model.rows, model.cols]
    w = 1.0 / np.diag(hs_ordinal.acov_corr) / hs_ordinal.n_rows

    def gradient(phi):
        theta = model.full(phi)
        delta, _ = model.jacobians(theta)
        return -2.0 * ((w[:, None] * delta).T @ (r - model.rho(phi)))

    phi = layout.start[model.free]          # the start: misfit large
    theta = model.full(phi)
    e = r - model.rho(phi)
    delta, _ = model.jacobians(theta)
    exact = model.hessian(theta, e, w, delta, w[:, None] * delta)
    columns = []
    for k in range(phi.size):
        h = 1e-6 * (1.0 + abs(phi[k]))
        up, down = phi.copy(), phi.copy()
        up[k] += h
        down[k] -= h
        columns.append((gradient(up) - gradient(down)) / (2 * h))
    numeric = np.column_stack(columns)
    scale = np.max(np.abs(exact))
    assert_allclose(exact, (numeric + numeric.T) / 2, rtol=0, atol=1e-8 * scale)
    assert np.max(np.abs(exact - 2.0 * delta.T @ (w[:, None] * delta))) > 1e-4 * scale


def test_newton_steps_reach_the_gauss_newton_solution_in_fewer_iterations(hs_ordinal):
    # theory: the DWLS estimate is the minimiser of F, whichever steps find it; with the
    # exact Hessian the last steps converge quadratically (a one-construct model of the
    # three-construct tests misfits, where Gauss–Newton converges only linearly)
    from scalewright.estimate import dwls
    spec = make_spec({"g": HS_ITEMS})
    layout = build_layout(spec, hs_ordinal.correlations)
    newton = fit_dwls(layout, hs_ordinal)
    original = dwls.fisher_scoring
    try:
        dwls.fisher_scoring = lambda *a, value_grad_hessian=None, **k: original(*a, **k)
        gauss_newton = fit_dwls(layout, hs_ordinal)
    finally:
        dwls.fisher_scoring = original
    assert newton.record.converged and gauss_newton.record.converged
    # tolerance: both stop at a gradient of 1e-8 (fisher_scoring's default), which leaves
    # estimates within ~1e-8/(smallest curvature) of the optimum, far below 1e-6
    assert_allclose(newton.theta, gauss_newton.theta, rtol=0, atol=1e-6)
    assert newton.record.iterations < gauss_newton.record.iterations


def _population_sample(rng, n):
    lam = np.zeros((8, 2))
    lam[:4, 0], lam[4:, 1] = POP_LOADINGS[:4], POP_LOADINGS[4:]
    phi = np.array([[1.0, POP_PHI], [POP_PHI, 1.0]])
    sigma = lam @ phi @ lam.T
    np.fill_diagonal(sigma, 1.0)
    latent = rng.standard_normal((n, 8)) @ np.linalg.cholesky(sigma).T
    return (latent[:, :, None] > POP_CUTS).sum(axis=2).astype(float) + 1.0


@pytest.fixture(scope="module")
def replications():
    """250 seeded samples of n = 400 from the two-construct population."""
    items = tuple(f"y{i}" for i in range(1, 9))
    spec = make_spec({"A": items[:4], "B": items[4:]})
    rng = np.random.default_rng(20240611)
    stats_, estimates, ses, z = [], [], [], []
    for _ in range(250):
        moments = ordinal_moments(_population_sample(rng, 400), items)
        fit = fit_dwls(build_layout(spec, moments.correlations), moments)
        assert fit.record.converged
        stats_.append((fit.test.chi_square_shifted, fit.test.p_value_shifted, fit.test.df))
        estimates.append(fit.theta[:9])
        ses.append(np.sqrt(np.diag(fit.acov))[:9])
        z.append(fit.residuals / np.sqrt(residual_variances(fit.layout, fit.theta,
                                                             moments.acov_corr)))
    return np.array(stats_), np.array(estimates), np.array(ses), np.array(z)


@pytest.mark.slow
def test_adjusted_statistic_averages_its_degrees_of_freedom(replications):
    chi2, _, df = replications[0].T
    # df = 28 − 9 = 19; the Monte Carlo SE of the mean of 300 χ²₁₉ draws is
    # √(38/250) ≈ 0.39: ±1.5 is almost four SEs (theory: Asparouhov & Muthén 2010).
    assert np.all(df == 19)
    assert abs(chi2.mean() - 19) < 1.5


@pytest.mark.slow
def test_adjusted_statistic_rejects_a_true_model_at_about_five_percent(replications):
    p_values = replications[0][:, 1]
    # the acceptance band for the .05 rejection rate: [.02, .09]
    assert 0.02 <= np.mean(p_values < 0.05) <= 0.09


@pytest.mark.slow
def test_robust_standard_errors_match_the_spread_of_the_estimates(replications):
    _, estimates, ses, _ = replications
    # loadings and the construct correlation are unbiased for the population
    # (two-step DWLS is consistent): bias within 0.02 (about 4 Monte Carlo SEs)
    truth = np.append(POP_LOADINGS, POP_PHI)
    assert np.max(np.abs(estimates.mean(axis=0) - truth)) < 0.02
    # mean SE over empirical SD within 15% for every parameter; the Monte
    # Carlo error of an SD from 250 draws is about 4.5%
    ratio = ses.mean(axis=0) / estimates.std(axis=0, ddof=1)
    assert np.all(np.abs(ratio - 1) < 0.15), ratio


@pytest.mark.slow
def test_standardized_residuals_are_standard_normal_under_a_true_model(replications):
    z = replications[3]
    # theory (Browne 1984): under the model each z is asymptotically N(0, 1).
    # 250 × 28 values, correlated within a sample: mean within 0.1 and mean
    # square within 0.12 of 1 leave room for several Monte Carlo SEs and for
    # small-sample bias at n = 400; a z from the correlation's own variance
    # (the "normalized" residual) has a mean square of 0.45 on these samples
    # (measured once; this seed gives 1.04 for z and 5.2% beyond ±1.96)
    assert abs(z.mean()) < 0.1
    assert abs(np.mean(z ** 2) - 1.0) < 0.12
    assert 0.03 <= np.mean(np.abs(z) > 1.96) <= 0.08
