"""The DWLS difference test of nested ordinal models (scalewright.dwls_difference,
Satorra 2000) and its place in the rival-model comparison.

Outside references:

* an independent dense computation in the test: the implied correlations
  written out by hand (Λ Φ Λᵀ plus residual covariances), model 1 fitted
  to model 0's implied correlations by scipy's least squares, Jacobians by
  central differences, and M = WΔ₁V₁Δ₁ᵀW − WΔ₀V₀Δ₀ᵀW formed densely with
  the eigenvalues of MΓ (Satorra 2000);
* statistical theory, by seeded simulation from a known population model
  with five-category items where the constrained model is true: the
  scaled-and-shifted difference behaves like χ² on the difference in df.
"""

from __future__ import annotations

import numpy as np
import pytest
from conftest import HS_CONSTRUCTS, HS_ITEMS, make_spec
from scipy import optimize

from scalewright.compare import compare_models, dwls_difference_row
from scalewright.dwls_difference import DWLS_DIFFERENCE, nested_dwls_test
from scalewright.estimate.dwls import DwlsModel, fit_dwls
from scalewright.estimate.polychoric import ordinal_moments
from scalewright.evaluate_mixed import evaluate_mixed
from scalewright.evaluate_ordinal import evaluate_ordinal
from scalewright.report.references import references_used
from scalewright.report.tables import nested_table
from scalewright.specify import build_layout
from test_dwls import _population_sample, _quantile_categories

PLAIN = make_spec(HS_CONSTRUCTS, name="plain")
#: the classic misfit of this model: x9 also loads on the visual construct (1 df)
CROSS = make_spec(HS_CONSTRUCTS, name="cross", cross_loadings={"visual": ("x9",)})
#: and a residual covariance on top (2 df)
CROSS_RESIDUAL = make_spec(HS_CONSTRUCTS, name="cross_residual",
                           cross_loadings={"visual": ("x9",)},
                           residual_covariances=(("x2", "x3"),))


@pytest.fixture(scope="module")
def hs_moments(hs_x):
    """Holzinger & Swineford (1939) tests cut at their quintiles: five ordered categories."""
    return ordinal_moments(_quantile_categories(hs_x, 5), HS_ITEMS)


def dwls_model(spec, moments):
    fit = fit_dwls(build_layout(spec, moments.correlations), moments)
    assert fit.record.converged
    return DwlsModel.of(fit, moments)


# --------------------------------------------------------------------------
# Independent dense computation


def hand_correlations(spec):
    """ρ(θ) of a unit-variance model written out by hand: θ = the primary
    loadings construct by construct, the cross-loadings, the construct
    correlations (lower triangle, row by row), the residual covariances."""
    names = list(spec.constructs)
    slots = [(HS_ITEMS.index(it), names.index(c)) for c in names for it in spec.constructs[c]]
    slots += [(HS_ITEMS.index(it), names.index(c)) for c, its in spec.cross_loadings.items()
              for it in its]
    pairs = [(i, j) for i in range(len(names)) for j in range(i)]
    residual = [(HS_ITEMS.index(a), HS_ITEMS.index(b)) for a, b in spec.residual_covariances]
    upper = np.triu_indices(9, 1)

    def rho(theta):
        lam = np.zeros((9, len(names)))
        for k, (i, j) in enumerate(slots):
            lam[i, j] = theta[k]
        phi = np.eye(len(names))
        for k, (i, j) in enumerate(pairs):
            phi[i, j] = phi[j, i] = theta[len(slots) + k]
        sigma = lam @ phi @ lam.T
        for k, (a, b) in enumerate(residual):
            sigma[a, b] += theta[len(slots) + len(pairs) + k]
            sigma[b, a] = sigma[a, b]
        return sigma[upper]

    return rho, len(slots) + len(pairs) + len(residual)


def ours_in_hand_order(spec, fit):
    """Our estimates rearranged into :func:`hand_correlations`' order, by the
    parameters' labels (kind, construct or item, item)."""
    label = {(p.kind, p.a, p.b): k for k, p in enumerate(fit.layout.params)}
    names = list(spec.constructs)
    keys = [("loading", c, it) for c in names for it in spec.constructs[c]]
    keys += [("loading", c, it) for c, its in spec.cross_loadings.items() for it in its]
    keys += [("factor_covariance", names[j], names[i]) for i in range(len(names))
             for j in range(i)]
    keys += [("residual_covariance", a, b) for a, b in spec.residual_covariances]
    return fit.theta[[label[k] for k in keys]]


def central_jacobian(fun, theta, h=1e-4):
    # ρ is linear along each single coordinate (off-diagonal elements only),
    # so central differences are exact up to rounding (~1e-12 here)
    return np.column_stack([(fun(theta + h * e) - fun(theta - h * e)) / (2 * h)
                            for e in np.eye(len(theta))])


def dense_difference(restricted_spec, general_spec, restricted, general, moments):
    """T_d, the eigenvalues of MΓ, tr(MΓ), tr((MΓ)²) from dense matrices."""
    rho0, _ = hand_correlations(restricted_spec)
    rho1, _ = hand_correlations(general_spec)
    theta0 = ours_in_hand_order(restricted_spec, restricted.fit)
    theta1 = ours_in_hand_order(general_spec, general.fit)
    gamma = moments.acov_corr
    w = np.diag(1.0 / np.diag(gamma))
    r = moments.raw_correlations[np.triu_indices(9, 1)]
    t_d = (r - rho0(theta0)) @ w @ (r - rho0(theta0)) - (r - rho1(theta1)) @ w @ (r - rho1(theta1))
    # model 1 at model 0's implied correlations, by scipy (not our optimiser)
    target = rho0(theta0)
    mapped = optimize.least_squares(lambda t: rho1(t) - target, theta1, xtol=1e-15,
                                    ftol=1e-15, gtol=1e-15).x
    assert np.max(np.abs(rho1(mapped) - target)) < 1e-10
    d0, d1 = central_jacobian(rho0, theta0), central_jacobian(rho1, mapped)
    m = (w @ d1 @ np.linalg.inv(d1.T @ w @ d1) @ d1.T @ w
         - w @ d0 @ np.linalg.inv(d0.T @ w @ d0) @ d0.T @ w)
    mg = m @ gamma
    eig = np.sort(np.linalg.eigvals(mg).real)[::-1]
    return t_d, eig, np.trace(mg), np.trace(mg @ mg)


@pytest.fixture(scope="module", params=[CROSS, CROSS_RESIDUAL], ids=["1df", "2df"])
def hs_pair(request, hs_moments):
    general_spec = request.param
    restricted = dwls_model(PLAIN, hs_moments)
    general = dwls_model(general_spec, hs_moments)
    return general_spec, restricted, general, nested_dwls_test(restricted, general)


def test_difference_matches_dense_m_gamma(hs_pair, hs_moments):
    general_spec, restricted, general, found = hs_pair
    t_d, eig, t1, t2 = dense_difference(PLAIN, general_spec, restricted, general, hs_moments)
    d = found.test.df
    assert d == len(general_spec.cross_loadings.get("visual", ())) + \
        len(general_spec.residual_covariances)
    # T_d = N(F₀ − F₁): the same algebra, rounding only
    assert found.test.chi_square == pytest.approx(t_d, rel=1e-10)
    # Satorra (2000): MΓ has d non-zero eigenvalues, the rest vanish;
    # the low-rank projector form against the dense inverses, both at model 1
    # fitted to model 0's correlations (scipy's fit and ours agree to ~1e-11): 1e-9
    assert np.max(np.abs(eig[d:])) < 1e-10 * eig[0]
    np.testing.assert_allclose(found.eigenvalues, eig[:d], rtol=1e-9)
    assert found.test.trace == pytest.approx(t1, rel=1e-9)
    assert found.test.trace_squared == pytest.approx(t2, rel=1e-9)


def test_scaled_and_shifted_difference_has_the_moments_of_chi_square_on_delta_df(hs_pair):
    _, _, _, found = hs_pair
    test, lam, d = found.test, found.eigenvalues, found.test.df
    # T_d ≈ Σλχ²₁: mean Σλ, variance 2Σλ²; a·T_d + b must have mean d and
    # variance 2d (Asparouhov & Muthén 2010), algebra: 1e-10
    assert test.shift_scale * lam.sum() + test.shift == pytest.approx(d, rel=1e-10)
    assert test.shift_scale ** 2 * 2 * np.sum(lam ** 2) == pytest.approx(2 * d, rel=1e-10)
    row = found.to_dict()
    assert row["chi_square"] == pytest.approx(test.shift_scale * test.chi_square + test.shift,
                                              rel=1e-12)
    assert row["test"] == DWLS_DIFFERENCE


def test_difference_is_positive_and_does_not_depend_on_the_order(hs_pair):
    _, restricted, general, found = hs_pair
    # nested spans: W^½MW^½ is a projector, so every eigenvalue of MΓ is ≥ 0
    assert found.nested and np.all(found.eigenvalues > 0) and found.test.trace > 0
    assert found.test.chi_square > 0
    swapped = nested_dwls_test(general, restricted)
    assert swapped.to_dict() == found.to_dict()


def test_comparison_rows_use_the_dwls_difference_whatever_the_model_order(hs_x):
    x = _quantile_categories(hs_x, 5)
    results = {s.name: evaluate_ordinal(s, x, HS_ITEMS) for s in (PLAIN, CROSS)}
    fitted = {name: r.fitted for name, r in results.items()}
    rows = []
    for order in ((PLAIN, CROSS), (CROSS, PLAIN)):
        (row,) = compare_models(order, [results[s.name].to_dict() for s in order],
                                fitted)["comparison"]["nested_tests"]
        rows.append(row)
    assert rows[0] == rows[1]
    expected = nested_dwls_test(fitted["plain"], fitted["cross"]).to_dict()
    assert (rows[0]["restricted"], rows[0]["general"]) == ("plain", "cross")
    assert rows[0]["test"] == DWLS_DIFFERENCE and rows[0]["note"] is None
    assert rows[0]["chi_square"] == expected["chi_square"]
    assert rows[0]["chi_square_unadjusted"] == pytest.approx(
        results["plain"].fit.chi_square_unadjusted - results["cross"].fit.chi_square_unadjusted,
        rel=1e-12)
    # without the fitted models a DWLS pair is not tested (no mean-scaled stand-in)
    (bare,) = compare_models((PLAIN, CROSS), [results[s.name].to_dict() for s in (PLAIN, CROSS)])[
        "comparison"]["nested_tests"]
    assert bare["chi_square"] is None and bare["note"].startswith("not tested: the DWLS")
    # the report's table names the test
    table = nested_table({"comparison": {"nested_tests": rows[:1]}})
    assert table.columns[2] == "Test" and table.rows[0][2].text == DWLS_DIFFERENCE
    assert any("Asparouhov & Muthén 2006" in note for note in table.notes)
    # named as Satorra's (2000) test, not as the Satorra–Bentler (2001) scaled difference
    assert not any(note.startswith("Scaled difference") for note in table.notes)
    cited = references_used({"comparison": {"nested_tests": rows[:1]}})
    assert any(ref.startswith("Satorra, A. (2000).") for ref in cited)
    assert not any(ref.startswith("Satorra, A., & Bentler, P. M. (2001).") for ref in cited)


def test_mixed_route_pairs_get_the_same_test(hs_x):
    # three continuous tests kept as they are, six cut into five categories:
    # DWLS on the mixed correlation matrix, whose joint sampling covariance is Γ
    x = hs_x.copy()
    x[:, 3:] = _quantile_categories(hs_x[:, 3:], 5)
    results = {s.name: evaluate_mixed(s, x, HS_ITEMS, ("x1", "x2", "x3")) for s in (PLAIN, CROSS)}
    restricted, general = results["plain"].fitted, results["cross"].fitted
    (row,) = compare_models((PLAIN, CROSS), [r.to_dict() for r in results.values()],
                            {name: r.fitted for name, r in results.items()})[
        "comparison"]["nested_tests"]
    assert row["test"] == DWLS_DIFFERENCE and row["note"] is None
    t_d, eig, t1, t2 = dense_difference(PLAIN, CROSS, restricted, general, restricted.moments)
    # the same algebra as on the ordinal route (test_difference_matches_dense_m_gamma)
    assert row["chi_square_unadjusted"] == pytest.approx(t_d, rel=1e-10)
    assert row["scaling_factor"] == pytest.approx(t1, rel=1e-9)      # d = 1: t₁/d
    assert eig[0] > 0 and np.max(np.abs(eig[1:])) < 1e-10 * eig[0]


def test_a_pair_that_is_not_nested_is_reported_not_tested(hs_moments):
    # a residual covariance (23 df) is not nested in two cross-loadings (22 df)
    residual = make_spec(HS_CONSTRUCTS, name="residual", residual_covariances=(("x1", "x2"),))
    crosses = make_spec(HS_CONSTRUCTS, name="crosses",
                        cross_loadings={"visual": ("x9",), "speed": ("x1",)})
    row = dwls_difference_row(dwls_model(residual, hs_moments), dwls_model(crosses, hs_moments),
                              "residual", "crosses")
    assert row["df"] == 1 and row["chi_square"] is None and row["p_value"] is None
    assert "'crosses' does not reproduce the correlations implied by 'residual'" in row["note"]


# --------------------------------------------------------------------------
# Simulation: the constrained model is true


ITEMS = tuple(f"y{i}" for i in range(1, 9))
SIM_RESTRICTED = make_spec({"A": ITEMS[:4], "B": ITEMS[4:]}, name="two")
#: frees a cross-loading and a residual covariance that are zero in the population
SIM_GENERAL = make_spec({"A": ITEMS[:4], "B": ITEMS[4:]}, name="two_plus",
                        cross_loadings={"A": ("y5",)}, residual_covariances=(("y1", "y2"),))


@pytest.fixture(scope="module")
def difference_replications():
    """250 seeded samples of n = 500 from the two-construct population of
    test_dwls (five categories, asymmetric thresholds)."""
    rng = np.random.default_rng(20240705)
    out = []
    for _ in range(250):
        moments = ordinal_moments(_population_sample(rng, 500), ITEMS)
        found = nested_dwls_test(dwls_model(SIM_RESTRICTED, moments),
                                dwls_model(SIM_GENERAL, moments))
        assert found.nested and np.all(found.eigenvalues > 0)
        row = found.to_dict()
        out.append((row["chi_square"], row["p_value"], row["df"]))
    return np.array(out)


@pytest.mark.slow
def test_difference_test_rejects_a_true_constraint_at_about_five_percent(
        difference_replications):
    chi2, p, df = difference_replications.T
    assert np.all(df == 2)
    # the acceptance band for the .05 rejection rate: [.02, .09]
    # (binomial SE at .05 with 250 replications: 0.014)
    assert 0.02 <= np.mean(p < 0.05) <= 0.09
    # mean near Δdf = 2: the Monte Carlo SE of a mean of 250 χ²₂ draws is
    # √(4/250) ≈ 0.13; ±0.4 is three SEs (theory: Asparouhov & Muthén 2010)
    assert abs(chi2.mean() - 2) < 0.4
