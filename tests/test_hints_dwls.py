"""Modification hints of DWLS fits (scalewright.hints_dwls), checked against
outside references:

(a) an independent score test written out in this file: the model with the
    candidate freed, its correlations ``ρ(θ)`` from plain matrices
    (``ΛΦΛᵀ + Θ``), the Jacobian by central differences at the restricted
    estimate, and the dense formulas ``h = DᵀWe``,
    ``N = DᵀWD − DᵀWΔH⁻¹ΔᵀWD``, ``MI = h²/N``, ``EPC = h/N`` and
    ``MI_G = h²/(KΓKᵀ)``, ``K = DᵀW(I − ΔH⁻¹ΔᵀW)`` (Satorra 1989, the
    generalized score test; Saris, Satorra & Sörbom 1987, the EPC).  The
    implied correlations are polynomials of degree three in the parameters,
    so central differences are exact up to O(h²)·(third derivative) ≈ 1e-12
    and rounding ≈ 1e-10: tolerance 1e-6 relative;
(b) the drop in the unadjusted DWLS statistic ``T = N·F`` when the
    candidate is freed and the model refitted, and the refit's estimate
    (score and difference statistics are asymptotically equivalent, not
    equal: Buse 1982, Am. Statistician 36:153–157);
(c) seeded simulations: the planted cross-loading is found, and under a
    correct model the scaled statistic of a fixed candidate is χ²₁ (Satorra
    1989) while the plain one is ``c·χ²₁`` with ``c = KΓKᵀ/N``;
(d) the report of a whole check from a model file, read back from the HTML.
"""

from __future__ import annotations

import html as htmllib
import re

import numpy as np
import pandas as pd
import pytest
from conftest import make_spec
from numpy.testing import assert_allclose
from scipy import stats

from scalewright import api
from scalewright.evaluate_mixed import evaluate_mixed
from scalewright.evaluate_ordinal import evaluate_ordinal
from scalewright.hints_dwls import METHOD_DWLS, dwls_score_tests, score_tests_for
from scalewright.layout import LOADING, RESIDUAL_COV
from scalewright.report.document import build_document
from scalewright.report.references import references_used
from scalewright.report.render import render_html
from scalewright.specify import build_layout

ITEMS = tuple(f"i{k}" for k in range(1, 16))
CONSTRUCTS = {f"f{j + 1}": ITEMS[5 * j:5 * j + 5] for j in range(3)}
CUTS = np.array([-1.5, -0.6, 0.3, 1.2])            # five categories
HOSTILE = "<script>alert(1)</script>"


def draw(rng, n, cross=0.0, continuous=()):
    """Five-point answers of three constructs of five items (standardized
    loadings .6–.75, construct correlations .2–.3); item i3 also loads
    ``cross`` on f2.  Items in ``continuous`` keep their latent scores
    (times 10, plus 50)."""
    lam = np.zeros((15, 3))
    for j in range(3):
        lam[5 * j:5 * j + 5, j] = [0.7, 0.65, 0.6, 0.75, 0.7]
    lam[2, 1] = cross
    phi = np.array([[1.0, 0.3, 0.2], [0.3, 1.0, 0.25], [0.2, 0.25, 1.0]])
    sigma = lam @ phi @ lam.T
    np.fill_diagonal(sigma, 1.0)
    z = rng.standard_normal((n, 15)) @ np.linalg.cholesky(sigma).T
    x = (z[:, :, None] > CUTS).sum(axis=2).astype(float) + 1.0
    cols = list(continuous)
    x[:, cols] = 50.0 + 10.0 * z[:, cols]
    return x


def fit(spec, x):
    return evaluate_ordinal(spec, x, ITEMS, scales=(1, 5))


def freed_spec(kind, a, b, **shape):
    """The model (with ``shape``: a higher-order or general factor) with one
    candidate freed: a loading of item ``a`` on ``b``, or the residual
    covariance of items ``a`` and ``b``."""
    if kind == LOADING:
        return make_spec(CONSTRUCTS, cross_loadings={b: (a,)}, **shape)
    return make_spec(CONSTRUCTS, residual_covariances=[(a, b)], **shape)


def named(tests, layout, k):
    other = layout.factors[tests.col[k]] if tests.kind[k] == LOADING \
        else layout.items[tests.col[k]]
    return str(tests.kind[k]), layout.items[tests.row[k]], other


@pytest.fixture(scope="module")
def planted():
    """N = 1500 (seeded), the cross-loading of i3 on f2 planted at .15."""
    x = draw(np.random.default_rng(20240617), 1500, cross=0.15)
    return x, fit(make_spec(CONSTRUCTS), x)


# --------------------------------------------------------------------------- (a) the algebra

def dense_reference(result, kind, a, b, correlations, gamma, shape):
    """Plain MI, EPC and generalized MI of one candidate, from the freed model's
    correlations and their central-difference Jacobian (module docstring, (a))."""
    layout = result.estimate.layout
    big = build_layout(freed_spec(kind, a, b, **shape), correlations)
    theta = result.estimate.start_for(big)
    shared = set(layout.params)
    new = [k for k, prm in enumerate(big.params) if prm not in shared]
    assert len(new) == 1
    theta[new[0]] = 0.0
    free = [k for k, prm in enumerate(big.params)
            if not (prm.kind == RESIDUAL_COV and prm.a == prm.b)]
    rows, cols = np.triu_indices(big.p, 1)

    def rho(t):
        lam = big.patterns[0].matrices(t)
        return lam.implied_cov[rows, cols]

    step = 1e-5
    jac = np.empty((rows.size, len(free)))
    for c, k in enumerate(free):
        up, down = theta.copy(), theta.copy()
        up[k] += step
        down[k] -= step
        jac[:, c] = (rho(up) - rho(down)) / (2 * step)
    col = free.index(new[0])
    d, delta = jac[:, col], np.delete(jac, col, axis=1)
    r = correlations[rows, cols]
    w = np.diag(1.0 / np.diag(gamma))
    e = r - rho(theta)
    h_inv = np.linalg.inv(delta.T @ w @ delta)
    h = d @ w @ e
    net = d @ w @ d - d @ w @ delta @ h_inv @ delta.T @ w @ d
    k_row = d @ w @ (np.eye(rows.size) - delta @ h_inv @ delta.T @ w)
    return h * h / net, h / net, h * h / (k_row @ gamma @ k_row)


SHAPES = {"first-order": {}, "higher-order": {"higher_order": {"g": ("f1", "f2", "f3")}},
          "bifactor": {"general": "g"}}


@pytest.mark.parametrize("route, shape", [("ordinal", "first-order"),
                                          ("ordinal", "higher-order"),
                                          ("ordinal", "bifactor"), ("mixed", "first-order")])
def test_indices_match_a_dense_score_test_with_a_numerical_jacobian(planted, route, shape):
    x, result = planted
    spec = make_spec(CONSTRUCTS, **SHAPES[shape])
    if route == "mixed":
        # items i5 and i6 continuous, the rest five-point (N = 800, seeded)
        x = draw(np.random.default_rng(3), 800, cross=0.15, continuous=(4, 5))
        result = evaluate_mixed(spec, x, ITEMS, ("i5", "i6"), (1, 5))
    elif shape != "first-order":
        result = fit(spec, x)
    data = result.estimate.dwls_data
    p = len(ITEMS)
    correlations = np.eye(p)
    rows, cols = np.triu_indices(p, 1)
    correlations[rows, cols] = correlations[cols, rows] = data.r
    tests = dwls_score_tests(result.estimate)
    layout = result.estimate.layout
    # every item on every factor it does not load on, every pair of items: 15·2 + 15·14/2,
    # and 15 more loadings on the higher-order factor (the candidates of hints.py)
    assert tests.n_undefined == 0
    assert len(tests) == 30 + 105 + (15 if shape == "higher-order" else 0)
    chosen = list(np.argsort(-tests.mi)[:3]) + [int(np.argmin(tests.mi))] + [
        int(np.flatnonzero(tests.kind == kind)[-1]) for kind in (LOADING, RESIDUAL_COV)]
    for k in chosen:
        mi, epc, mi_g = dense_reference(result, *named(tests, layout, k), correlations,
                                        data.gamma, SHAPES[shape])
        assert_allclose([tests.mi_unscaled[k], tests.epc[k], tests.mi[k]], [mi, epc, mi_g],
                        rtol=1e-6, atol=1e-9)


# --------------------------------------------------------------------------- (b), (c) refits

def test_planted_cross_loading_has_the_largest_index(planted):
    _, result = planted
    tests = dwls_score_tests(result.estimate)
    layout = result.estimate.layout
    # theory: the only misspecification planted in the population (seeded, N = 1500)
    assert named(tests, layout, int(np.argmax(tests.mi))) == (LOADING, "i3", "f2")
    assert named(tests, layout, int(np.argmax(tests.mi_unscaled))) == (LOADING, "i3", "f2")


def test_plain_index_approximates_the_drop_in_the_dwls_statistic_when_freed(planted):
    x, result = planted
    tests = dwls_score_tests(result.estimate)
    layout = result.estimate.layout
    restricted = result.fit.chi_square_unadjusted           # T = N·F_DWLS
    for k in np.argsort(-tests.mi)[:4]:
        kind, a, b = named(tests, layout, k)
        refit = fit(freed_spec(kind, a, b), x)
        drop = restricted - refit.fit.chi_square_unadjusted
        # score and difference statistics agree to first order (Buse 1982); with
        # misspecifications of this size (index 15–30) the remaining terms are a few
        # per cent: 5% still fails for an index on another scale (per case, halved)
        assert_allclose(tests.mi_unscaled[k], drop, rtol=0.05)
        mats = refit.estimate.matrices()
        row, col = tests.row[k], tests.col[k]
        freed = mats.loadings[row, col] if kind == LOADING else mats.residuals[row, col]
        # one Gauss–Newton step from the restricted solution (Saris, Satorra & Sörbom
        # 1987) reaches the freed estimate to the curvature the step ignores; a small
        # planted loading (.15) moves the other parameters little: 5%
        assert np.sign(tests.epc[k]) == np.sign(freed)
        assert_allclose(tests.epc[k], freed, rtol=0.05)


def test_standardized_epc_is_in_the_latent_response_metric(planted):
    _, result = planted
    tests = dwls_score_tests(result.estimate)
    mats = result.estimate.matrices()
    # the latent responses have unit variance (diag Σ = 1), so a standardized loading
    # is the loading times the construct's SD (Kaplan 1989), and a residual covariance
    # becomes a residual correlation over √(θ_ii θ_kk) (1e-12: algebra)
    assert_allclose(np.diag(mats.implied_cov), 1.0, atol=1e-10)
    sd = np.sqrt(np.diag(mats.latent_cov))
    theta = np.diag(mats.residuals)
    lam = tests.kind == LOADING
    assert_allclose(tests.std_epc[lam], tests.epc[lam] * sd[tests.col[lam]], rtol=1e-12)
    assert_allclose(tests.std_epc[~lam], tests.epc[~lam] / np.sqrt(
        theta[tests.row[~lam]] * theta[tests.col[~lam]]), rtol=1e-12)


def test_no_hints_for_a_dwls_fit_that_is_not_identified():
    x = draw(np.random.default_rng(4), 400)
    # a construct with one item and its loading free next to a unit variance: the
    # loading and the residual variance cannot both be found (not identified)
    spec = make_spec({"f1": ITEMS[:5], "f2": ITEMS[5:10], "f3": ITEMS[10:14], "lone": ("i15",)})
    result = fit(spec, x)
    assert result.estimate.acov is None
    with pytest.raises(ValueError, match="not identified"):
        dwls_score_tests(result.estimate)


@pytest.mark.slow
def test_scaled_statistic_of_a_fixed_candidate_is_chi_square_one_under_the_model():
    rng = np.random.default_rng(20240618)
    reps, crit = 500, stats.chi2.ppf(0.95, 1)
    scaled, plain = np.empty((reps, 2)), np.empty((reps, 2))
    spec = make_spec(CONSTRUCTS)
    for r in range(reps):
        result = fit(spec, draw(rng, 500))
        tests = dwls_score_tests(result.estimate)
        for c, (kind, row, col) in enumerate(((LOADING, 2, 1), (RESIDUAL_COV, 7, 2))):
            (k,) = np.flatnonzero((tests.kind == kind) & (tests.row == row) & (tests.col == col))
            scaled[r, c], plain[r, c] = tests.mi[k], tests.mi_unscaled[k]
    # theory (Satorra 1989): the generalized score statistic is χ²₁ under the model; at
    # 500 replications the rejection rate's Monte Carlo SE is about .01, and the issue's
    # band .02–.09 leaves room for the finite-sample bias of two-step DWLS at N = 500
    rates = (scaled > crit).mean(axis=0)
    assert np.all((rates > 0.02) & (rates < 0.09)), rates
    # the plain index is c·χ²₁ with c = KΓKᵀ/N (its one-df weighted sum of χ²₁, Satorra
    # 1989), so it rejects with probability P(χ²₁ > 3.84/c): the expected rate from each
    # replication's c, against the observed one within 4 Monte Carlo SEs
    c = plain / scaled
    expected = stats.chi2.sf(crit / c, 1).mean(axis=0)
    observed = (plain > crit).mean(axis=0)
    assert np.all(np.abs(observed - expected) < 4 * np.sqrt(expected * (1 - expected) / reps))
    # and for the cross-loading c is far from 1: the plain index is not χ²₁ here
    assert observed[0] > 0.09


# --------------------------------------------------------------------------- (d) the report

STUDY = """\
study: Five-point pilot
data:
  file: answers.csv
items:
  scale: [1, 5]
  wording:
    i3: "{hostile} I plan my lessons ahead"
    i6: The staff work together.
estimation:
  method: ordinal
models:
  three:
    constructs:
      f1: [i1, i2, i3, i4, i5]
      f2: [i6, i7, i8, i9, i10]
      f3: [i11, i12, i13, i14, i15]
"""


@pytest.fixture(scope="module")
def checked(tmp_path_factory, planted):
    folder = tmp_path_factory.mktemp("ordinal_hints")
    pd.DataFrame(planted[0], columns=ITEMS).to_csv(folder / "answers.csv", index=False)
    (folder / "study.yaml").write_text(STUDY.format(hostile=HOSTILE))
    return api.check(folder / "study.yaml").to_dict()


def test_an_ordinal_study_reports_hints_in_the_items_wording(checked, planted):
    (model,) = checked["models"]
    hints, notes = model["modification_hints"], model["modification_hint_notes"]
    # the same tests as the route's own function on the same fit (the check's JSON)
    tests = score_tests_for(planted[1].estimate)
    assert notes["method"] == METHOD_DWLS and "Satorra (1989)" in notes["statistic"]
    assert notes["candidates"] == len(tests) and "not_computed" not in notes
    top = hints[0]
    assert (top["kind"], top["item"], top["construct"]) == ("loading", "i3", "f2")
    assert_allclose([top["mi"], top["mi_unscaled"]],
                    [tests.mi.max(), tests.mi_unscaled[np.argmax(tests.mi)]], rtol=1e-10)
    # every index at or above the model file's default hint threshold (10) is listed
    assert len(hints) == int(np.sum(tests.mi >= 10.0)) and hints[-1]["mi"] >= 10.0
    assert top["reading"].startswith(f"'{HOSTILE} I plan my lessons ahead' may also reflect f2")


def test_the_report_shows_the_dwls_hints_escaped_with_their_method(checked):
    html = render_html(checked)
    doc = build_document(checked)
    (table,) = [t for t in doc.tables if t.title.startswith("Modification hints for ‘three’")]
    hints = checked["models"][0]["modification_hints"]
    assert [row[-1].text for row in table.rows] == [h["reading"] for h in hints[:len(table.rows)]]
    assert checked["models"][0]["modification_hint_notes"]["statistic"] in table.notes
    # the user's wording is shown, escaped: no tag from it reaches the page
    assert "<script" not in html.lower()
    assert htmllib.escape(HOSTILE, quote=False) in html
    text = htmllib.unescape(re.sub(r"<[^>]+>", "", html))
    assert hints[0]["reading"] in text
    assert "generalized score statistics (Satorra, 1989)" in text
    assert any(ref.startswith("Satorra, A. (1989).") for ref in references_used(checked))

