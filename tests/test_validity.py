"""AVE, composite reliability, Fornell–Larcker and HTMT, checked against the
design references, semopy's standardized solution and direct recomputation."""

import itertools
import json

import numpy as np
import pytest
from numpy.testing import assert_allclose

import holzinger as hz
from scalewright.omega import contract_matrices
from scalewright.standardize import standardize
from scalewright.validity import construct_quality, fornell_larcker, htmt

NAMES = list(hz.CONSTRUCTS)


def hs_quality():
    fit = hz.fit(hz.THREE_FACTOR)
    std = standardize(contract_matrices(fit.loadings, fit.latent_cov, fit.residual_cov))
    primary = np.argmax(fit.loadings != 0, axis=1)
    cols = [fit.column(n) for n in NAMES]
    return fit, std, construct_quality(std, primary, cols, fit.factor_names, fit.item_names)


def test_standardized_loadings_match_semopy():
    fit, std, _ = hs_quality()
    table = fit.estimates[fit.estimates.op == "~"]
    expected = [table[(table.lval == item) & (table.rval == construct)]["Est. Std"].item()
                for construct, items in hz.CONSTRUCTS.items() for item in items]
    got = [std.loadings[fit.item_names.index(item), fit.column(construct)]
           for construct, items in hz.CONSTRUCTS.items() for item in items]
    # semopy standardizes by the same model-implied variances: rounding only
    assert_allclose(got, expected, rtol=1e-8)


def test_ave_matches_holzinger_reference():
    _, _, quality = hs_quality()
    # design/references.md [computed]: .3710 / .7197 / .4297, from the loadings
    # rounded to 3 decimals (.852 .855 .838 → .7197 vs .7195 unrounded): atol 3e-4
    assert_allclose([q.ave for q in quality], [0.3710, 0.7197, 0.4297], atol=3e-4)


def test_ave_is_mean_squared_semopy_standardized_loading():
    fit, _, quality = hs_quality()
    table = fit.estimates[fit.estimates.op == "~"]
    expected = [np.mean(table[table.rval == n]["Est. Std"].astype(float) ** 2) for n in NAMES]
    assert_allclose([q.ave for q in quality], expected, rtol=1e-8)


def test_ave_of_congeneric_items_matches_reference():
    # design/references.md [computed]: loadings .8/.7/.6/.5 → AVE = .435
    lam = np.array([[0.8], [0.7], [0.6], [0.5]])
    std = standardize(contract_matrices(lam, np.eye(1), np.diag(1 - lam[:, 0] ** 2)))
    [q] = construct_quality(std, [0, 0, 0, 0], [0], ["c"], list("abcd"))
    assert_allclose(q.ave, 0.435, atol=1e-12)


def test_composite_reliability_matches_semopy_standardized_solution():
    # Fornell & Larcker (1981): CR = (Σλ)² / ((Σλ)² + Σθ) on the standardized
    # solution; λ and θ taken from semopy's standardized estimates table
    fit, _, quality = hs_quality()
    table = fit.estimates
    expected = []
    for name, items in hz.CONSTRUCTS.items():
        lam = table[(table.op == "~") & (table.rval == name)]["Est. Std"].astype(float).sum()
        theta = table[(table.op == "~~") & table.lval.isin(items)
                      & (table.lval == table.rval)]["Est. Std"].astype(float).sum()
        expected.append(lam ** 2 / (lam ** 2 + theta))
    assert_allclose([q.composite_reliability for q in quality], expected, rtol=1e-8)


def test_ave_conventions_are_worded_as_conventions():
    _, _, quality = hs_quality()
    ave_flags = {q.construct: q.conventions[0] for q in quality}
    # Fornell & Larcker (1981): AVE ≥ .50 [published]
    assert [ave_flags[n].met for n in NAMES] == [False, True, False]
    assert ave_flags["visual"].wording == (
        "AVE 0.37 is below the conventional minimum of 0.50: the construct explains less "
        "than half of its items' variance.")
    assert "Fornell & Larcker (1981)" in ave_flags["visual"].source


def test_fornell_larcker_rows_on_holzinger():
    fit, std, quality = hs_quality()
    cols = [fit.column(n) for n in NAMES]
    rows = fornell_larcker([q.ave for q in quality], std.latent_correlations[np.ix_(cols, cols)], NAMES)
    assert [(r.construct_a, r.construct_b) for r in rows] == [
        ("visual", "textual"), ("visual", "speed"), ("textual", "speed")]
    # design/references.md [computed with semopy]: .459 .471 .283, 3 decimals
    assert_allclose([r.correlation for r in rows], [0.459, 0.471, 0.283], atol=5e-4)
    # √AVE: visual .609, textual .848, speed .656 all exceed these correlations
    assert all(r.convention.met for r in rows)


def test_fornell_larcker_fails_when_correlation_exceeds_root_ave():
    # √.435 = .660 (references.md congeneric AVE) is below a correlation of .70
    [row] = fornell_larcker([0.435, 0.6], np.array([[1.0, 0.7], [0.7, 1.0]]), ["a", "b"])
    assert not row.convention.met
    assert "may not be distinct" in row.convention.wording


def loop_htmt(corr, groups):
    """HTMT by explicit loops over item pairs (Henseler et al. 2015, eq. 6)."""
    def mean_within(g):
        return np.mean([corr[i, j] for i, j in itertools.combinations(g, 2)])
    out = {}
    for (a, ga), (b, gb) in itertools.combinations(groups.items(), 2):
        between = np.mean([corr[i, j] for i in ga for j in gb])
        out[a, b] = between / np.sqrt(mean_within(ga) * mean_within(gb))
    return out


def test_htmt_matches_holzinger_reference_and_loop_computation():
    corr = hz.data().corr().to_numpy()
    primary = np.repeat([0, 1, 2], 3)
    result = htmt(corr, primary, [0, 1, 2], NAMES)
    got = [r.htmt for r in result.rows]
    # design/references.md [computed]: .4243 .4235 .2896 (4 decimals)
    assert_allclose(got, [0.4243, 0.4235, 0.2896], atol=5e-5)
    groups = {n: [hz.ITEMS.index(i) for i in items] for n, items in hz.CONSTRUCTS.items()}
    assert_allclose(got, list(loop_htmt(corr, groups).values()), rtol=1e-12)
    assert_allclose(result.matrix, result.matrix.T, equal_nan=True)


def tau_equivalent_corr(phi):
    """Two constructs of three items each, loadings .7, factor correlation phi."""
    lam = np.zeros((6, 2))
    lam[:3, 0] = lam[3:, 1] = 0.7
    latent = np.array([[1.0, phi], [phi, 1.0]])
    return lam @ latent @ lam.T + np.diag(1 - 0.49 * np.ones(6))


def test_htmt_equals_factor_correlation_for_tau_equivalent_items():
    # Henseler et al. (2015): for tau-equivalent items HTMT is the disattenuated
    # (factor) correlation; exact in the population
    result = htmt(tau_equivalent_corr(0.88), [0, 0, 0, 1, 1, 1], [0, 1], ["a", "b"])
    [row] = result.rows
    assert_allclose(row.htmt, 0.88, rtol=1e-12)
    strict, lenient = row.conventions
    # Henseler et al. (2015): below .85 (distinct), below .90 (similar constructs)
    assert (strict.threshold, strict.met) == (0.85, False)
    assert (lenient.threshold, lenient.met) == (0.90, True)
    assert strict.wording == ("HTMT of 'a' and 'b' is 0.88, not below the conventional 0.85 "
                              "used for conceptually distinct constructs.")


def test_htmt_of_single_item_construct_is_undefined_with_note():
    result = htmt(tau_equivalent_corr(0.5), [0, 0, 0, 1, 2, 2], [0, 1, 2], ["a", "b", "c"])
    assert np.isnan(result.rows[0].htmt) and result.rows[0].conventions == ()
    [note] = result.notes
    assert note.code == "htmt_undefined" and note.subject == "b"
    assert "has 1 item" in note.message


def test_htmt_result_converts_to_json_with_none_for_undefined():
    result = htmt(tau_equivalent_corr(0.5), [0, 0, 0, 1, 1, 1], [0, 1], ["a", "b"])
    data = json.loads(json.dumps(result.to_dict()))
    assert data["matrix"][0][0] is None and data["matrix"][0][1] == pytest.approx(0.5)


def test_htmt_of_negatively_related_constructs_is_their_magnitude():
    # theory: reversing the sign of one construct's latent variable flips every
    # cross-construct correlation; distinctness must not depend on that direction
    # (Henseler et al. 2015 assume positively related constructs)
    from scalewright.validity import htmt
    corr = np.array([[1.0, 0.5, 0.3, 0.3], [0.5, 1.0, 0.3, 0.3],
                     [0.3, 0.3, 1.0, 0.5], [0.3, 0.3, 0.5, 1.0]])
    flipped = corr.copy()
    flipped[:2, 2:] *= -1
    flipped[2:, :2] *= -1
    a = htmt(corr, [0, 0, 1, 1], [0, 1], ("a", "b")).rows[0].htmt
    b = htmt(flipped, [0, 0, 1, 1], [0, 1], ("a", "b")).rows[0].htmt
    assert a == pytest.approx(0.6, abs=1e-12)     # .3 / √(.5 · .5)
    assert b == pytest.approx(a, abs=1e-12)
