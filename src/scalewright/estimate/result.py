"""The fitted model: parameter values, their covariance, how the optimiser ended."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from scalewright.estimate.fisher import OptimizerRecord
from scalewright.layout import Layout, Matrices


@dataclass(frozen=True)
class Estimate:
    """Estimates of one layout on one data set.

    ``acov`` is the asymptotic covariance matrix of ``theta`` (``None`` when
    the information matrix is singular); ``unidentified`` lists the indices
    of parameters involved in the singularity; ``blocks`` are the data
    moments the model was fitted to (see :mod:`scalewright.estimate.normal`).
    """

    layout: Layout
    theta: np.ndarray
    acov: np.ndarray | None
    record: OptimizerRecord
    n: int
    loglik: float
    method: str
    unidentified: tuple[int, ...] = ()
    blocks: tuple = ()

    def matrices(self, group: int = 0) -> Matrices:
        return self.layout.patterns[group].matrices(self.theta)

    @property
    def se(self) -> np.ndarray:
        """Standard errors (NaN when the information matrix is singular)."""
        if self.acov is None:
            return np.full(len(self.theta), np.nan)
        return np.sqrt(np.clip(np.diag(self.acov), 0.0, None))


def invert_information(info: np.ndarray, n: int) -> tuple[np.ndarray | None, tuple[int, ...]]:
    """``(N I)⁻¹``, or ``None`` and the parameters spanning the null space
    when ``I`` is singular.

    Singularity is judged on the information rescaled to unit diagonal: an
    eigenvalue below ``1e-10`` times the largest means that some direction
    in the parameter space leaves the likelihood unchanged, i.e. the model
    is not (locally) identified (Rothenberg 1971).

    References
    ----------
    Rothenberg, T. J. (1971). Identification in parametric models.
    Econometrica 39, 577–591.
    """
    d = np.sqrt(np.clip(np.diag(info), 1e-300, None))
    scaled = info / np.outer(d, d)
    values, vectors = np.linalg.eigh(scaled)
    if values[0] <= 1e-10 * max(values[-1], 1e-300):
        null = vectors[:, values <= 1e-10 * values[-1]]
        involved = np.nonzero(np.max(np.abs(null), axis=1) > 0.1)[0]
        return None, tuple(int(i) for i in involved)
    inv_scaled = (vectors / values) @ vectors.T
    return inv_scaled / np.outer(d, d) / n, ()
