"""Bifactor and higher-order coefficients, checked against the exact values
in the design references, the published formulas, and a semopy fit of the
higher-order model for Holzinger & Swineford."""

import json

import numpy as np
import pytest
from numpy.testing import assert_allclose

import holzinger as hz
from scalewright.bifactor import bifactor_coefficients, higher_order_coefficients, schmid_leiman
from scalewright.reliability import cronbach_alpha

ITEMS = [f"i{k}" for k in range(1, 7)]


def reference_bifactor():
    """design/references.md: general .6 on six items, group A .4 (items 1–3),
    group B .3 (items 4–6), orthogonal unit-variance factors, θ = 1 − h²."""
    lam = np.zeros((6, 3))
    lam[:, 0] = 0.6
    lam[:3, 1] = 0.4
    lam[3:, 2] = 0.3
    return lam, np.eye(3), np.diag(1.0 - (lam ** 2).sum(axis=1))


def reference_result():
    lam, phi, theta = reference_bifactor()
    return bifactor_coefficients(lam, phi, theta, 0, [1, 2], factor_names=["g", "A", "B"],
                                 item_names=ITEMS)


def test_bifactor_coefficients_match_reference():
    result = reference_result()
    # design/references.md [computed] (Zinbarg et al. 2005; Reise 2012; Rodriguez
    # et al. 2016): ωH = 12.96/18.30, ωT, ECV; 6 decimals given → atol 5e-7
    assert_allclose([result.omega_hierarchical, result.omega_total, result.ecv],
                    [0.708197, 0.831148, 0.742268], atol=5e-7)
    assert_allclose(result.relative_omega, 0.708197 / 0.831148, atol=1e-6)
    assert result.notes == ()


def test_alpha_of_reference_bifactor_matches_reference():
    lam, phi, theta = reference_bifactor()
    # design/references.md [computed]: α = 0.806557 from the implied covariance
    assert_allclose(cronbach_alpha(lam @ phi @ lam.T + theta), 0.806557, atol=5e-7)


def test_puc_counts_correlations_between_different_groups():
    # Reise (2012): PUC = share of item pairs not in the same group; two groups
    # of three among six items: 1 − (3 + 3)/15 = .6
    assert_allclose(reference_result().puc, 0.6, rtol=1e-12)


def test_subscale_coefficients_match_published_formulas():
    # Rodriguez, Reise & Haviland (2016), eqs. for ωS and ωHS with orthogonal
    # factors: ωS = ((Σλg)² + (Σλs)²) / D, ωHS = (Σλs)² / D,
    # D = (Σλg)² + (Σλs)² + Σθ over the subscale's items
    lam, _, theta = reference_bifactor()
    got = reference_result().subscales
    for row, rows, col in [(got[0], slice(0, 3), 1), (got[1], slice(3, 6), 2)]:
        g2, s2 = lam[rows, 0].sum() ** 2, lam[rows, col].sum() ** 2
        denom = g2 + s2 + np.trace(theta[rows, rows])
        assert_allclose([row.omega_subscale, row.omega_hierarchical_subscale, row.general_share],
                        [(g2 + s2) / denom, s2 / denom, g2 / denom], rtol=1e-12)
    assert [row.items for row in got] == [tuple(ITEMS[:3]), tuple(ITEMS[3:])]


def test_general_factor_h_uses_general_loadings():
    # Hancock & Mueller (2001): H = 1/(1 + 1/Σ λ²/(1−λ²)); six loadings of .6
    assert_allclose(reference_result().h, 1 / (1 + 1 / (6 * 0.36 / 0.64)), rtol=1e-12)


def test_correlated_general_and_group_factor_gets_note():
    lam, phi, theta = reference_bifactor()
    phi[0, 1] = phi[1, 0] = 0.2
    result = bifactor_coefficients(lam, phi, theta, 0, [1, 2], factor_names=["g", "A", "B"],
                                   item_names=ITEMS)
    [note] = result.notes
    assert note.code == "correlated_factors"
    assert "'g'–'A' (0.20)" in note.message


def reference_higher_order():
    """A higher-order model whose Schmid–Leiman form is the reference bifactor:
    λ_A = √.52, λ_B = √.45, γ_c = .6/λ_c, unit variances (columns A, B, G)."""
    lam_a, lam_b = np.sqrt(0.52), np.sqrt(0.45)
    lam = np.zeros((6, 3))
    lam[:3, 0] = lam_a
    lam[3:, 1] = lam_b
    gamma = np.array([0.6 / lam_a, 0.6 / lam_b])
    phi = np.eye(3)
    phi[:2, 2] = phi[2, :2] = gamma
    phi[0, 1] = phi[1, 0] = gamma[0] * gamma[1]
    theta = np.diag(1.0 - (lam @ phi @ lam.T).diagonal())
    return lam, phi, theta


def test_higher_order_equivalent_of_reference_bifactor_gives_reference_values():
    # Yung, Thissen & McLeod (1999): a higher-order model is a bifactor model with
    # proportionality constraints, so its ωH, ωT, ECV are the reference values
    lam, phi, theta = reference_higher_order()
    result = higher_order_coefficients(lam, phi, theta, 2, [0, 1], factor_names=["A", "B", "G"],
                                       item_names=ITEMS)
    c = result.coefficients
    assert_allclose([c.omega_hierarchical, c.omega_total, c.ecv],
                    [0.708197, 0.831148, 0.742268], atol=5e-7)
    # R² of a construct: γ²/(γ² + ψ) = .36/.52 and .36/.45
    assert_allclose([r.variance_explained for r in result.constructs], [0.36 / 0.52, 0.8],
                    rtol=1e-12)
    # Schmid & Leiman (1957): general λγ = .6, groups λ√ψ = .4 and .3
    expected = np.zeros((6, 3))
    expected[:, 0], expected[:3, 1], expected[3:, 2] = 0.6, 0.4, 0.3
    assert_allclose(result.schmid_leiman_loadings, expected, atol=1e-12)


def test_schmid_leiman_preserves_common_covariance():
    # the transformation is a change of latent basis: ΛΦΛᵀ is unchanged
    lam, phi, _ = reference_higher_order()
    sl_lam, sl_phi = schmid_leiman(lam, phi, 2, [0, 1])
    assert_allclose(sl_lam @ sl_phi @ sl_lam.T, lam @ phi @ lam.T, atol=1e-14)
    assert_allclose(sl_phi[2, :2], 0.0, atol=1e-14)


def test_schmid_leiman_rejects_a_column_with_item_loadings():
    lam, phi, _ = reference_higher_order()
    with pytest.raises(ValueError, match="column 0 is not a higher-order factor"):
        schmid_leiman(lam, phi, 0, [1, 2])


def hs_higher_order():
    fit = hz.fit(hz.HIGHER_ORDER)
    cols = [fit.column(n) for n in hz.CONSTRUCTS]
    result = higher_order_coefficients(fit.loadings, fit.latent_cov, fit.residual_cov,
                                       fit.column("g"), cols, factor_names=fit.factor_names,
                                       item_names=fit.item_names)
    return fit, result


def test_higher_order_variance_explained_matches_semopy():
    fit, result = hs_higher_order()
    table = fit.estimates
    std = table[(table.op == "~") & (table.rval == "g")].set_index("lval")["Est. Std"]
    psi = table[(table.op == "~~") & (table.lval == table.rval)].set_index("lval")["Est. Std"]
    names = list(hz.CONSTRUCTS)
    got = [r.variance_explained for r in result.constructs]
    # semopy's standardized higher-order loading squared, and 1 − standardized
    # disturbance variance; same fit, so rounding only
    assert_allclose(got, [std[n] ** 2 for n in names], rtol=1e-8)
    assert_allclose(got, [1 - psi[n] for n in names], rtol=1e-8)


def test_higher_order_omega_hierarchical_matches_semopy_structural_estimates():
    fit, result = hs_higher_order()
    table = fit.estimates
    est = table.set_index(["lval", "op", "rval"]).Estimate.astype(float)
    # Schmid–Leiman general loading of item i on g: λ_i,c · γ_c (semopy estimates)
    general = [est[item, "~", construct] * est[construct, "~", "g"]
               for construct, items in hz.CONSTRUCTS.items() for item in items]
    rows = [fit.item_names.index(i) for items in hz.CONSTRUCTS.values() for i in items]
    total = fit.implied_cov[np.ix_(rows, rows)].sum()
    # ωH of a higher-order model (Zinbarg, Revelle & Yovel 2007)
    expected = np.sum(general) ** 2 * est["g", "~~", "g"] / total
    assert_allclose(result.coefficients.omega_hierarchical, expected, rtol=1e-8)
    # ωT: all common variance of the nine-item sum over 1ᵀΣ̂1 (semopy's Σ̂)
    common = total - fit.residual_cov[np.ix_(rows, rows)].sum()
    assert_allclose(result.coefficients.omega_total, common / total, rtol=1e-10)
    assert result.coefficients.omega_hierarchical < result.coefficients.omega_total
    assert result.coefficients.notes == ()      # disturbances uncorrelated: orthogonal groups


def test_higher_order_result_converts_to_json():
    _, result = hs_higher_order()
    data = json.loads(json.dumps(result.to_dict()))
    assert data["higher"] == "g"
    assert len(data["schmid_leiman_loadings"]) == 9 and len(data["schmid_leiman_loadings"][0]) == 4
