"""The Yuan–Bentler traces and sandwich under missing answers, from casewise
scores (``estimate/yuan_bentler.py``), against the dense published formulas.

Outside reference: an independent dense computation written here.  The
observed information ``A`` of the saturated parameters ``β = (vech Σ, μ)``
and the casewise scores (rows of ``G``, ``B = GᵀG/N``) are built row by row
from the second and first derivatives of each person's normal
log-likelihood over the answered items (standard matrix calculus, derived in
:func:`dense_pieces`, not the package's pattern-grouped formulas); ``Δ`` by
Richardson-extrapolated central differences of the implied moments (exact
up to rounding: they are polynomials of degree ≤ 3 in θ).  Then, as
published by Yuan & Bentler (2000, Sociological Methodology 30, 165–200):
``U = A − AΔ(ΔᵀAΔ)⁻¹ΔᵀA``, ``Γ = A⁻¹BA⁻¹``, ``c = tr(UΓ)/df``, adjusted df
``tr(UΓ)²/tr((UΓ)²)``, and the sandwich ``Ã⁻¹ΔᵀBΔÃ⁻¹/N``.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import linalg

from conftest import HS_CONSTRUCTS, HS_ITEMS, make_spec
from references.make_fiml_semopy import data_with_holes
from scalewright.estimate import yuan_bentler as traces_module
from scalewright.estimate.fiml import (baseline_yuan_bentler, fiml_information, fit_fiml,
                                       independence_fiml, missing_patterns, pattern_moments,
                                       saturated_em, with_intercepts, yuan_bentler)
from scalewright.estimate.robust import independence_layout
from scalewright.groups import GroupedData
from scalewright.multigroup import CONFIGURAL, build_multigroup_layout, fit_multigroup
from scalewright.specify import build_layout

#: algebra against algebra: both sides exact up to rounding (DEVELOPERS.md: 1e-10 for
#: algebra; 1e-9 here because A is inverted on both sides)
RTOL = 1e-9
#: force the kernel route (every row count) or the Gram route (none)
ROUTES = {"kernel": 1e9, "gram": 0.0}


# --------------------------------------------------------------------------- dense reference

def basis(p: int) -> np.ndarray:
    """Direction ``∂Σ/∂σ_ab`` of each vech element (a ≥ b): ``e_a e_bᵀ + e_b e_aᵀ``,
    ``e_a e_aᵀ`` on the diagonal."""
    rows, cols = np.tril_indices(p)
    e = np.zeros((len(rows), p, p))
    e[np.arange(len(rows)), rows, cols] = 1.0
    e[np.arange(len(rows)), cols, rows] = 1.0
    return e


def dense_pieces(x: np.ndarray, mu: np.ndarray, sigma: np.ndarray):
    """``A`` (per case) and the casewise scores ``G`` of ``β = (vech Σ, μ)`` at
    ``(μ, Σ)``, row by row.  For one person with answered items ``o``,
    ``Ṽ`` = ``Σ_oo⁻¹`` embedded with zeros, ``r = x − μ`` (answered items),
    ``z = Ṽr`` and ``ℓ = −½ log|Σ_oo| − ½ rᵀṼr``:

        ∂ℓ/∂Σ[X] = ½ tr((zzᵀ − Ṽ)X),                ∂ℓ/∂μ = z,
        −∂²ℓ/∂Σ[X]∂Σ[Y] = zᵀYṼXz − ½ tr(ṼYṼX),
        −∂²ℓ/∂Σ[X]∂μ = ṼXz,                          −∂²ℓ/∂μ∂μ = Ṽ."""
    n, p = x.shape
    e = basis(p)
    s = len(e)
    a = np.zeros((s + p, s + p))
    g = np.zeros((n, s + p))
    for i, row in enumerate(x):
        o = ~np.isnan(row)
        v = np.zeros((p, p))
        v[np.ix_(o, o)] = np.linalg.inv(sigma[np.ix_(o, o)])
        z = v @ np.where(o, row - mu, 0.0)
        ve = v @ e                                           # Ṽ X for every direction X
        g[i, :s] = 0.5 * np.einsum("xab,ab->x", e, np.outer(z, z) - v)
        g[i, s:] = z
        vez = ve @ z                                         # Ṽ X z
        a[:s, :s] += np.einsum("xa,ya->xy", vez, e @ z) - 0.5 * np.einsum("yab,xba->xy", ve, ve)
        a[:s, s:] += vez
        a[s:, s:] += v
    a[s:, :s] = a[:s, s:].T
    return a / n, g


def moments_of(pattern, theta):
    mats = pattern.matrices(theta)
    rows, cols = np.tril_indices(len(mats.implied_mean))
    return np.concatenate([mats.implied_cov[rows, cols], mats.implied_mean])


def dense_delta(pattern, theta, h=1e-3):
    """``∂β/∂θ`` by central differences, Richardson-extrapolated (exact for cubics)."""
    def central(step):
        return np.array([(moments_of(pattern, theta + d) - moments_of(pattern, theta - d))
                         / (2 * step) for d in np.eye(len(theta)) * step]).T
    return (4.0 * central(h / 2) - central(h)) / 3.0


def dense_traces(a, b, delta):
    """``tr(UΓ)`` and ``tr((UΓ)²)`` straight from Yuan & Bentler (2000)."""
    u = a - a @ delta @ np.linalg.inv(delta.T @ a @ delta) @ delta.T @ a
    a_inv = np.linalg.inv(a)
    ug = u @ a_inv @ b @ a_inv
    return np.trace(ug), np.trace(ug @ ug)


# --------------------------------------------------------------------------- fixtures

@pytest.fixture(scope="module")
def one_group():
    x = data_with_holes()                 # seeded MCAR holes, 10% of the answers
    spec = make_spec(HS_CONSTRUCTS, identification="marker")
    patterns = missing_patterns(x, HS_ITEMS, "data.csv")
    moments = pattern_moments(x, patterns)
    saturated = saturated_em(moments)
    fitted = fit_fiml(build_layout(spec, saturated.cov), x, moments, saturated)
    assert fitted.record.converged
    return x, fitted, patterns, moments, saturated


@pytest.fixture(params=sorted(ROUTES))
def route(request, monkeypatch):
    monkeypatch.setattr(traces_module, "KERNEL_ROWS", ROUTES[request.param])
    return request.param


# --------------------------------------------------------------------------- tests

def test_model_traces_and_sandwich_match_the_dense_formulas(one_group, route):
    x, fitted, patterns, moments, _ = one_group
    pattern, theta, n = fitted.layout.patterns[0], fitted.theta, fitted.n
    mats = pattern.matrices(theta)
    a, g = dense_pieces(x, mats.implied_mean, mats.implied_cov)
    b, delta = g.T @ g / n, dense_delta(pattern, theta)
    trace, square = dense_traces(a, b, delta)
    info = fiml_information(fitted.layout, theta, x, patterns, moments)
    robust = yuan_bentler(info, n, fitted.chi_square, fitted.df)
    # Yuan & Bentler (2000): tr(UΓ), tr((UΓ)²) and the sandwich, dense, built above
    assert robust.test.trace == pytest.approx(trace, rel=RTOL)
    assert robust.test.trace_squared == pytest.approx(square, rel=RTOL)
    bread = np.linalg.inv(info.observed)
    np.testing.assert_allclose(robust.acov, bread @ (delta.T @ b @ delta) @ bread / n,
                               rtol=RTOL, atol=1e-14)


def test_baseline_trace_matches_the_dense_formula_where_a_is_indefinite(one_group, route):
    x, _, patterns, moments, saturated = one_group
    _, mean, var = independence_fiml(x)
    layout = with_intercepts(independence_layout(HS_ITEMS, var), mean)
    theta = np.concatenate([var, mean])
    a, g = dense_pieces(x, mean, np.diag(var))
    # the observed information at the independence model is not positive definite
    # here, so the Bunch–Kaufman factorisation stands in for the Cholesky factor
    assert np.linalg.eigvalsh(a).min() < 0
    trace, _ = dense_traces(a, g.T @ g / len(x), dense_delta(layout.patterns[0], theta))
    test = baseline_yuan_bentler(x, patterns, moments, saturated)
    # Yuan & Bentler (2000), dense, built above; the robust fit indices need only the
    # baseline's scaling factor, so its tr((UΓ)²) is not computed
    assert test.trace == pytest.approx(trace, rel=RTOL)
    assert np.isnan(test.trace_squared)


def test_indefinite_model_information_takes_the_bunch_kaufman_route(one_group, route,
                                                                   monkeypatch):
    # the model's own A_β is positive definite; its traces with the Cholesky
    # factor refused must come out the same through the Bunch–Kaufman factor
    x, fitted, patterns, moments, _ = one_group
    info = fiml_information(fitted.layout, fitted.theta, x, patterns, moments)
    expected = yuan_bentler(info, fitted.n, fitted.chi_square, fitted.df).test

    def refuse(*args, **kwargs):
        raise linalg.LinAlgError("refused by the test")
    monkeypatch.setattr(traces_module.linalg, "cholesky", refuse)
    info = fiml_information(fitted.layout, fitted.theta, x, patterns, moments)
    test = yuan_bentler(info, fitted.n, fitted.chi_square, fitted.df).test
    # the same algebra through another factorisation: equal up to rounding
    assert test.trace == pytest.approx(expected.trace, rel=RTOL)
    assert test.trace_squared == pytest.approx(expected.trace_squared, rel=RTOL)


def test_multigroup_traces_add_over_groups_as_the_block_diagonal_formulas(hs_data, route):
    x = data_with_holes()                 # seeded MCAR holes, 10% of the answers
    index = np.where(hs_data["school"].to_numpy() == "Pasteur", 0, 1)
    grouped = GroupedData(("Pasteur", "Grant-White"), HS_ITEMS, x, index, 0, "data.csv")
    moments = grouped.moments(full_information=True)
    spec = make_spec(HS_CONSTRUCTS, identification="marker")
    layout = build_multigroup_layout(spec, moments, CONFIGURAL)
    fit = fit_multigroup(layout, moments, robust=True)
    a_blocks, g_blocks, deltas = [], [], []
    for gr, pattern in enumerate(layout.patterns):
        mats = pattern.matrices(fit.estimate.theta)
        a_g, g_g = dense_pieces(x[index == gr], mats.implied_mean, mats.implied_cov)
        a_blocks.append(moments.ns[gr] / moments.n * a_g)
        g_blocks.append(g_g)
        deltas.append(dense_delta(pattern, fit.estimate.theta))
    a = linalg.block_diag(*a_blocks)
    b = linalg.block_diag(*[g_g.T @ g_g for g_g in g_blocks]) / moments.n
    delta = np.vstack(deltas)
    trace, square = dense_traces(a, b, delta)
    # Yuan & Bentler (2000) with A = ⊕ w_g A_g, B = ⊕ w_g B_g, dense, built above
    assert fit.robust.test.trace == pytest.approx(trace, rel=RTOL)
    assert fit.robust.test.trace_squared == pytest.approx(square, rel=RTOL)
    first = delta.T @ a @ delta
    bread = np.linalg.inv(first)
    np.testing.assert_allclose(fit.robust.acov,
                               bread @ (delta.T @ b @ delta) @ bread / moments.n,
                               rtol=1e-8, atol=1e-14)
