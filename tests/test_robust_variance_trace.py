"""tr((UΓ)²) of robust ML by the pairwise kernel and by the Gram of pair
products (scalewright.estimate.variance_trace).

Outside reference: the dense textbook form of Satorra & Bentler (1994) —
p* × p* Γ̂, W = ½Dᵀ(V⊗V)D, U built explicitly — computed in the test with
numpy (``test_robust.dense_traces``), on Holzinger–Swineford and on a
simulated non-normal sample; the two routes are algebraically equal, so
they must agree to rounding.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import linalg

import holzinger
from scalewright.estimate import variance_trace as vt
from scalewright.estimate.robust import expected_information, incidence, robust_ml
from scalewright.layout import cell_derivatives
from test_robust import dense_traces, ml_fit, spec_of


def routes(layout, theta, x):
    """tr((UΓ)²) by each exact route."""
    pattern = layout.patterns[0]
    mats = pattern.matrices(theta)
    v = linalg.inv(mats.implied_cov)
    a, b, _ = cell_derivatives(pattern, mats)
    inc = incidence(pattern, layout.n_params)
    info = inc.T @ expected_information(a, b, v) @ inc
    mean, cov = x.mean(axis=0), np.cov(x, rowvar=False, bias=True)
    return {route: vt.variance_trace(x, mean, cov, v, a, b, inc, info, route=route)
            for route in (vt.KERNEL, vt.GRAM)}


def skewed_two_construct_sample():
    """Two constructs of six items, one cross-loading; factors and errors are
    standardized χ²(2) draws (skewness 2, excess kurtosis 6)."""
    rng = np.random.default_rng(20240702)
    n = 1500
    lam = np.zeros((12, 2))
    lam[:6, 0] = [0.8, 0.7, 0.6, 0.7, 0.5, 0.6]
    lam[6:, 1] = [0.7, 0.6, 0.6, 0.5, 0.7, 0.8]
    lam[6, 0] = 0.3
    eta = (rng.chisquare(2, (n, 2)) - 2) / 2 @ np.linalg.cholesky([[1, 0.4], [0.4, 1]]).T
    eps = (rng.chisquare(2, (n, 12)) - 2) / 2 * 0.6
    x = eta @ lam.T + eps
    spec = spec_of({"a": [f"y{i}" for i in range(6)], "b": [f"y{i}" for i in range(6, 12)]})
    spec.cross_loadings = {"a": ("y6",)}
    spec.residual_covariances = (("y0", "y1"),)
    return x, spec


@pytest.fixture(scope="module", params=["holzinger", "skewed"])
def sample(request):
    if request.param == "holzinger":
        x, spec = holzinger.data().to_numpy(float), spec_of(holzinger.CONSTRUCTS)
    else:
        x, spec = skewed_two_construct_sample()
    layout, theta, chi2 = ml_fit(spec, x)
    return x, layout, theta, chi2


def test_both_routes_match_the_dense_textbook_trace(sample):
    x, layout, theta, chi2 = sample
    _, dense = dense_traces(layout, theta, x)
    found = routes(layout, theta, x)
    # algebraic identities (module docstring); the reference's Jacobian is exact: rounding only
    assert found[vt.KERNEL].value == pytest.approx(dense, rel=1e-10)
    assert found[vt.GRAM].value == pytest.approx(dense, rel=1e-10)
    assert found[vt.KERNEL].value == pytest.approx(found[vt.GRAM].value, rel=1e-12)
    assert all(t.rows == len(x) and not t.subsample for t in found.values())


def test_robust_ml_uses_every_row_below_the_budget(sample):
    x, layout, theta, chi2 = sample
    robust = robust_ml(layout, theta, x, chi2)
    _, dense = dense_traces(layout, theta, x)
    assert robust.test.variance_rows is None and robust.notes == ()
    assert robust.test.trace_squared == pytest.approx(dense, rel=1e-10)


def test_the_cheaper_route_is_taken():
    # cost model: the kernel grows with N², the Gram with p*²; at N = 300 and
    # 50 items the kernel is far cheaper, at N = 10⁶ and 9 items the Gram
    wide = vt.route_costs(300, 50, 110)
    long = vt.route_costs(1_000_000, 9, 21)
    assert wide[vt.KERNEL] < wide[vt.GRAM] and long[vt.GRAM] < long[vt.KERNEL]


def test_budget_sets_the_largest_affordable_subsample(monkeypatch):
    monkeypatch.setattr(vt, "FLOP_BUDGET", 1e11)
    m = vt._rows_within_budget(1_000_000, 50, 110)
    assert min(vt.route_costs(m, 50, 110).values()) <= 1e11
    assert min(vt.route_costs(m + 1, 50, 110).values()) > 1e11
    # 200 items × 1,000,000 rows: the Gram (20,100² doubles) is over the memory
    # budget and the kernel over the flop budget, so only a subsample is affordable
    assert vt.GRAM not in vt.route_costs(1_000_000, 200, 400)
    monkeypatch.undo()
    assert vt._rows_within_budget(1_000_000, 200, 400) < 1_000_000
    # the default budget keeps a 1,000,000 x 50 whole check within its minute: the
    # trace is exact up to 250,000 rows at 50 items and subsampled beyond
    assert vt._rows_within_budget(250_000, 50, 110) == 250_000
    assert 250_000 <= vt._rows_within_budget(1_000_000, 50, 110) < 1_000_000
