"""Holzinger & Swineford (1939) data (301 cases, nine tests) and semopy fits
of the three-factor and higher-order models, as outside references for the
reliability and validity tests.

semopy 2.3.11 is run with ``ftol = 1e-12`` because its default stopping rule
leaves estimates off in the third decimal (design/references.md).
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np
import pandas as pd
import semopy

ITEMS = [f"x{i}" for i in range(1, 10)]
CONSTRUCTS = {"visual": ["x1", "x2", "x3"], "textual": ["x4", "x5", "x6"],
              "speed": ["x7", "x8", "x9"]}
THREE_FACTOR = "\n".join(f"{name} =~ {' + '.join(items)}" for name, items in CONSTRUCTS.items())
HIGHER_ORDER = THREE_FACTOR + "\ng =~ visual + textual + speed"


@dataclass(frozen=True)
class Fit:
    """One semopy fit in the engine's contract: Λ, Φ* = AΨAᵀ, Θ, Σ̂."""

    model: semopy.Model
    item_names: list[str]
    factor_names: list[str]
    loadings: np.ndarray
    latent_cov: np.ndarray
    residual_cov: np.ndarray
    implied_cov: np.ndarray
    estimates: pd.DataFrame

    def column(self, name: str) -> int:
        return self.factor_names.index(name)

    def rows(self, names) -> list[int]:
        return [self.item_names.index(n) for n in names]


def data() -> pd.DataFrame:
    return semopy.examples.holzinger39.get_data()[ITEMS]


@lru_cache(maxsize=None)
def fit(description: str) -> Fit:
    model = semopy.Model(description)
    model.fit(data(), options={"ftol": 1e-12})
    items, factors = model.names_lambda
    assert list(items) == ITEMS
    total_effects = np.linalg.inv(np.eye(model.mx_beta.shape[0]) - model.mx_beta)
    return Fit(model=model, item_names=list(items), factor_names=list(factors),
               loadings=model.mx_lambda.copy(),
               latent_cov=total_effects @ model.mx_psi @ total_effects.T,
               residual_cov=model.mx_theta.copy(), implied_cov=model.calc_sigma()[0],
               estimates=model.inspect(std_est=True))
