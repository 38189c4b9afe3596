"""The exact Hessian of the ML objective (estimate/exact_hessian.py) against
central differences of the analytic gradient (theory: the Hessian is the
gradient's derivative; the gradient is checked by test_engine, whose
estimates match semopy's) on the Holzinger & Swineford (1939) data as
shipped by semopy, for every parameter kind the formula distinguishes:
loadings (unit variance and marker scaling), cross-loadings, residual
covariances, construct covariances, higher-order paths and a bifactor
structure; at the start values (misfit large, so the terms Fisher scoring
leaves out are large) and at the optimum."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose

from conftest import HS_CONSTRUCTS, make_spec, simulate_cfa
from scalewright.estimate.fiml import missing_patterns, pattern_blocks, pattern_moments, with_intercepts
from scalewright.estimate.normal import NormalFit, complete_data_blocks, fit_normal
from scalewright.specify import build_layout

SPECS = {
    "correlated, cross-loading, residual covariance": make_spec(
        HS_CONSTRUCTS, cross_loadings={"visual": ["x9"]}, residual_covariances=[("x7", "x8")]),
    "marker scaling": make_spec(HS_CONSTRUCTS, identification="marker"),
    "higher order": make_spec(HS_CONSTRUCTS, higher_order={"g": ["visual", "textual", "speed"]}),
    "higher order, marker": make_spec(HS_CONSTRUCTS, higher_order={"g": ["visual", "textual", "speed"]},
                                      identification="marker"),
    "bifactor": make_spec(HS_CONSTRUCTS, general="g"),
}


def objective(spec, x):
    blocks = complete_data_blocks(x)
    layout = build_layout(spec, blocks[0].cov)
    return layout, blocks, NormalFit(layout, blocks)


def numerical_hessian(fit, theta):
    """Central differences of the gradient, step ``h = 1e-6 (1 + |θ_k|)``:
    truncation error O(h²) ≈ 1e-12, rounding O(ε/h) ≈ 1e-10 (theory)."""
    columns = []
    for k in range(len(theta)):
        h = 1e-6 * (1.0 + abs(theta[k]))
        up, down = theta.copy(), theta.copy()
        up[k] += h
        down[k] -= h
        columns.append((fit.value_grad_info(up)[1] - fit.value_grad_info(down)[1]) / (2 * h))
    numeric = np.column_stack(columns)
    return (numeric + numeric.T) / 2


@pytest.mark.parametrize("name", list(SPECS))
def test_exact_hessian_matches_finite_differences_of_the_objective(name, hs_x):
    layout, blocks, fit = objective(SPECS[name], hs_x)
    points = {"start": layout.start}
    if name != "bifactor":     # the bifactor model does not converge on these data
        points["optimum"] = fit_normal(layout, blocks)[0]
    for where, theta in points.items():
        value, grad, hessian = fit.value_grad_hessian(theta)
        exact = hessian()
        assert value == fit.value(theta)
        assert_allclose(grad, fit.value_grad_info(theta)[1], rtol=1e-12, atol=1e-14)
        numeric = numerical_hessian(fit, theta)
        # tolerance: 1e-8 of the largest element, well above the differences'
        # error bound (numerical_hessian) and far below any formula slip
        scale = np.max(np.abs(exact))
        assert_allclose(exact, numeric, rtol=0, atol=1e-8 * scale, err_msg=f"{name} at {where}")
        # the exact Hessian differs from the expected information by a misfit term
        info = fit.value_grad_info(theta)[2]
        assert np.max(np.abs(exact - info)) > 1e-4 * scale


def test_no_exact_hessian_with_a_mean_structure_or_missing_answers(hs_x):
    # the optimiser then stays with Fisher scoring
    holes = hs_x.copy()
    holes[::7, 0] = np.nan
    spec = make_spec(HS_CONSTRUCTS)
    patterns = missing_patterns(holes, spec.items, "test")
    moments = pattern_moments(holes, patterns)
    layout = with_intercepts(build_layout(spec, np.cov(hs_x.T)), np.nanmean(holes, axis=0))
    assert NormalFit(layout, pattern_blocks(moments)).value_grad_hessian(layout.start) is None
    complete = complete_data_blocks(hs_x)
    assert NormalFit(layout, complete).value_grad_hessian(layout.start) is None


def test_warm_started_refit_reaches_the_cold_fit_solution(hs_x):
    # theory: the ML solution does not depend on where the optimiser starts; a refit
    # without one item, started from the larger model's estimates (Newton from the
    # first step), must land where a fit from the usual start values lands
    from scalewright.evaluate import moments_subset, point_estimate
    from scalewright.scalequality import without_item
    # the warm refit builds its layout with plain start values, which the larger
    # model's estimates replace: the layouts must agree in everything but the start,
    # under each scaling and structure (marker: x1 and x4 are markers, so removing
    # them moves the fixed loading to the next item).  Not a bifactor model: without
    # one item, a specific factor has two, and its loadings are then not identified
    # (equal likelihood, different estimates from different starts)
    full_block = complete_data_blocks(hs_x)[0]
    for spec in (make_spec(HS_CONSTRUCTS), make_spec(HS_CONSTRUCTS, identification="marker"),
                 make_spec(HS_CONSTRUCTS, higher_order={"g": list(HS_CONSTRUCTS)})):
        full = point_estimate(spec, full_block)
        for item in ("x1", "x2", "x5"):
            reduced = without_item(spec, item)
            block = moments_subset(full_block, spec.items, reduced.items)
            warm = point_estimate(reduced, block, start_from=full)
            cold = point_estimate(reduced, block)
            assert warm.record.converged and cold.record.converged
            assert warm.layout.params == cold.layout.params
            # tolerance: both stop at a gradient of 1e-7 (POINT_GRAD_TOL), ~1e-6 from the optimum
            assert_allclose(warm.theta, cold.theta, rtol=0, atol=1e-5)


def test_warm_refits_reuse_the_hessian_and_land_on_the_cold_solution(monkeypatch):
    # theory: chord steps (Newton's direction from a Hessian factored earlier; Kelley
    # 1995, ch. 5) converge to the same root of the gradient, only linearly; the
    # optimiser keeps the factor while each step shrinks the gradient four-fold, so on
    # drop-one refits of a fitting model it computes fewer Hessians than it takes steps
    from scalewright.evaluate import moments_subset, point_estimate
    from scalewright.scalequality import without_item
    constructs = {f"f{k}": tuple(f"i{k}{j}" for j in range(6)) for k in range(5)}
    loadings = np.kron(np.eye(5), np.linspace(.5, .8, 6)[:, None])
    phi = np.full((5, 5), .3) + .7 * np.eye(5)
    x, _ = simulate_cfa(np.random.default_rng(11), loadings, phi, 1500)
    spec = make_spec(constructs)
    full_block = complete_data_blocks(x)[0]
    full = point_estimate(spec, full_block)
    hessians = _count_hessians(monkeypatch)
    steps, warm_hessians = 0, 0
    for item in ("i00", "i13", "i25", "i31", "i44"):
        reduced = without_item(spec, item)
        block = moments_subset(full_block, spec.items, reduced.items)
        before = len(hessians)
        warm = point_estimate(reduced, block, start_from=full)
        warm_hessians += len(hessians) - before
        cold = point_estimate(reduced, block)
        assert warm.record.converged and warm.record.gradient_norm < 1e-7
        # tolerance: both stop at a gradient of 1e-7 (POINT_GRAD_TOL), ~1e-6 from the optimum
        assert_allclose(warm.theta, cold.theta, rtol=0, atol=1e-5)
        steps += warm.record.iterations
    assert warm_hessians < steps


def _count_hessians(monkeypatch) -> list:
    """Make every Hessian that ``NormalFit`` computes append to the returned list."""
    hessians = []
    original = NormalFit.value_grad_hessian

    def counted(self, theta):
        value, grad, hessian = original(self, theta)

        def counting():
            hessians.append(1)
            return hessian()
        return value, grad, counting
    monkeypatch.setattr(NormalFit, "value_grad_hessian", counted)
    return hessians


def test_newton_phase_lands_where_fisher_scoring_lands_on_misspecified_models():
    # theory: the ML solution is a property of the data and the model, not of the
    # optimiser; on seeded samples from populations with unmodelled cross-loadings
    # (so the models misfit and the Newton phase differs from Fisher scoring), both
    # optimisers must stop at the same estimates
    from scalewright.estimate import fisher
    rng = np.random.default_rng(2026)
    names = [f"i{k}" for k in range(1, 13)]
    constructs = {c: tuple(names[4 * j:4 * j + 4]) for j, c in enumerate("abc")}
    specs = [make_spec(constructs),
             make_spec(constructs, identification="marker"),
             make_spec(constructs, higher_order={"g": ["a", "b", "c"]}),
             make_spec(constructs, general="g")]
    for replication in range(5):
        lam = np.zeros((12, 3))
        for j in range(3):
            lam[4 * j:4 * j + 4, j] = rng.uniform(0.5, 0.8, 4)
        lam[rng.integers(12), rng.integers(3)] += 0.3        # one unmodelled cross-loading
        lam = np.clip(lam, -0.9, 0.9)
        phi = np.full((3, 3), 0.4) + 0.6 * np.eye(3)
        x, _ = simulate_cfa(rng, lam, phi, 600)
        blocks = complete_data_blocks(x)
        for spec in specs:
            layout = build_layout(spec, blocks[0].cov)
            newton, record, _ = fit_normal(layout, blocks)
            fit = NormalFit(layout, blocks)
            plain, plain_record = fisher.fisher_scoring(layout.start, fit.value, fit.value_grad_info)
            if not (record.converged and plain_record.converged):
                assert record.converged == plain_record.converged
                continue
            # tolerance: both stop at a gradient of 1e-8, i.e. ~1e-7 from the optimum
            assert_allclose(newton, plain, rtol=0, atol=1e-6)
            assert record.iterations <= plain_record.iterations


def _misfitting_sample(n_items, n_constructs, seed):
    """A sample from a correlated-constructs population with one unmodelled
    cross-loading per construct, so a model without them misfits."""
    per = n_items // n_constructs
    names = [f"i{k}" for k in range(n_items)]
    constructs = {f"f{j}": tuple(names[per * j:per * (j + 1)]) for j in range(n_constructs)}
    rng = np.random.default_rng(seed)
    lam = np.kron(np.eye(n_constructs), np.ones((per, 1))) * rng.uniform(0.5, 0.8, (n_items, 1))
    for j in range(n_constructs):
        lam[per * j, (j + 1) % n_constructs] = 0.2
    phi = np.full((n_constructs, n_constructs), 0.3) + 0.7 * np.eye(n_constructs)
    x, _ = simulate_cfa(rng, lam, phi, 2000, residual=np.diag(1.0 - np.diag(lam @ phi @ lam.T)))
    return make_spec(constructs), x


@pytest.mark.parametrize("n_items, n_constructs", [(30, 5), (60, 6)])
def test_chord_steps_contract_about_twice_as_little_as_the_newton_step_before_them(
        n_items, n_constructs):
    # theory (Kelley 1995, Iterative Methods for Linear and Nonlinear Equations, ch. 5):
    # a Newton step from error e0 leaves e1 ~ (gamma/2)|H^-1| e0^2, and chord steps
    # with that step's Hessian contract by gamma|H^-1| e0 = 2 e1/e0; fisher._keep_factor
    # predicts the chord steps from the Newton step's shrink r as 2r.  Tolerance: a
    # factor 2 either way, since the largest gradient element only tracks the error
    spec, x = _misfitting_sample(n_items, n_constructs, seed=n_items)
    blocks = complete_data_blocks(x)
    layout = build_layout(spec, blocks[0].cov)
    fit = NormalFit(layout, blocks)
    _, g0, info = fit.value_grad_info(layout.start)
    theta1 = layout.start - np.linalg.solve(info, g0)          # the Fisher step
    _, g1, hessian = fit.value_grad_hessian(theta1)
    h1 = hessian()
    theta2 = theta1 - np.linalg.solve(h1, g1)                  # a Newton step
    g2 = fit.value_grad_hessian(theta2)[1]
    theta3 = theta2 - np.linalg.solve(h1, g2)                  # a chord step
    g3 = fit.value_grad_hessian(theta3)[1]
    largest = lambda g: np.abs(g).max()                        # noqa: E731
    newton_shrink, chord_shrink = largest(g2) / largest(g1), largest(g3) / largest(g2)
    # the prediction holds in the quadratic regime near the optimum; a Newton step that
    # shrinks the gradient at least twentyfold shows the fit is there (a judgement call,
    # common practice, no source)
    assert newton_shrink < 0.05
    assert 0.5 <= chord_shrink / (2.0 * newton_shrink) <= 2.0


def test_cold_fits_end_with_chord_steps_that_save_hessians_and_keep_the_solution(monkeypatch):
    # theory: chord and Newton steps find the same root of the gradient (Kelley 1995,
    # ch. 5), so the estimates must not move; a chord step is taken only where two are
    # predicted to finish, i.e. in place of a Newton step, so a fit never computes more
    # Hessians than with Newton steps alone, and here (the last Newton step of both
    # fits shrinks the gradient about a thousand-fold) it computes fewer
    from scalewright.estimate import fisher
    original_keep = fisher._keep_factor
    hessians = _count_hessians(monkeypatch)
    for n_items, n_constructs in ((100, 10), (12, 3)):
        spec, x = _misfitting_sample(n_items, n_constructs, seed=n_items)
        blocks = complete_data_blocks(x)
        layout = build_layout(spec, blocks[0].cov)
        before = len(hessians)
        with_chords, record, _ = fit_normal(layout, blocks)
        chord_hessians = len(hessians) - before
        monkeypatch.setattr(fisher, "_keep_factor", lambda *args: False)
        before = len(hessians)
        newton_only, newton_record, _ = fit_normal(layout, blocks)
        newton_hessians = len(hessians) - before
        monkeypatch.setattr(fisher, "_keep_factor", original_keep)
        assert record.converged and newton_record.converged
        # tolerance: both stop at a gradient of 1e-8, i.e. ~1e-7 from the optimum
        assert_allclose(with_chords, newton_only, rtol=0, atol=1e-6)
        assert chord_hessians < newton_hessians
