"""Shared fixtures: the Holzinger–Swineford (1939) data as semopy ships it,
and small model specifications written the way the model file reader
produces them."""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest

HS_ITEMS = tuple(f"x{i}" for i in range(1, 10))
HS_CONSTRUCTS = {"visual": ("x1", "x2", "x3"), "textual": ("x4", "x5", "x6"),
                 "speed": ("x7", "x8", "x9")}
#: the same three-factor model in semopy's own description language
HS_SEMOPY = "visual =~ x1 + x2 + x3\ntextual =~ x4 + x5 + x6\nspeed =~ x7 + x8 + x9"


def make_spec(constructs, *, name="m", cross_loadings=None, residual_covariances=(),
              higher_order=None, general=None, identification="unit-variance"):
    """A model specification with the fields of ``studyfile.ModelSpec``."""
    cross_loadings = cross_loadings or {}
    items = []
    for its in constructs.values():
        items += [i for i in its if i not in items]
    return SimpleNamespace(
        name=name, constructs=dict(constructs), cross_loadings=dict(cross_loadings),
        residual_covariances=tuple(tuple(p) for p in residual_covariances),
        higher_order=dict(higher_order or {}), general=general,
        identification=identification, place="test.yaml", items=tuple(items))


@pytest.fixture(scope="session")
def hs_data():
    """Holzinger & Swineford (1939), 301 cases, as shipped by semopy."""
    from semopy.examples import holzinger39
    return holzinger39.get_data()


@pytest.fixture(scope="session")
def hs_x(hs_data):
    return hs_data[list(HS_ITEMS)].to_numpy(float)


def simulate_cfa(rng, loadings, phi, n, residual=None):
    """Draw ``n`` cases from Σ = ΛΦΛᵀ + Θ with Θ = diag(1 − diag(ΛΦΛᵀ)) by default."""
    common = loadings @ phi @ loadings.T
    theta = np.diag(1.0 - np.diag(common)) if residual is None else residual
    sigma = common + theta
    chol = np.linalg.cholesky(sigma)
    return rng.standard_normal((n, len(sigma))) @ chol.T, sigma
