"""The fitted model: parameter values, their covariance, how the optimiser ended."""

from __future__ import annotations

from dataclasses import dataclass, field
from functools import cached_property

import numpy as np

from scalewright.estimate.fisher import OptimizerRecord
from scalewright.estimate.spd_inverse import cholesky_inverse, condition_bound
from scalewright.layout import Layout, Matrices


@dataclass(frozen=True)
class DwlsData:
    """What a DWLS fit was fitted to: the ``p* = p(p−1)/2`` correlations
    ``r`` (``np.triu_indices(p, 1)`` order) and their sampling covariance
    ``Γ`` (of ``r`` itself, not of ``√N r``), from which the weights
    ``W = diag(Γ)⁻¹`` follow (see :mod:`scalewright.estimate.dwls`)."""

    r: np.ndarray
    gamma: np.ndarray = field(repr=False)

    @classmethod
    def of(cls, moments) -> "DwlsData":
        """From an :class:`~scalewright.estimate.polychoric.OrdinalMoments` or
        :class:`~scalewright.estimate.mixed.MixedMoments`: the pairwise
        estimates DWLS fits (``raw_correlations``) and ``acov_corr``."""
        rows, cols = np.triu_indices(len(moments.items), 1)
        return cls(moments.raw_correlations[rows, cols], moments.acov_corr)


@dataclass(frozen=True)
class Estimate:
    """Estimates of one layout on one data set.

    ``acov`` is the asymptotic covariance matrix of ``theta`` (``None`` when
    the information matrix is singular); ``unidentified`` lists the indices
    of parameters involved in the singularity; ``blocks`` are the data
    moments the model was fitted to (see :mod:`scalewright.estimate.normal`);
    ``dwls_data`` are the correlations a DWLS estimate was fitted to (``None``
    for the likelihood routes).  Score tests read whichever is present.
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
    dwls_data: DwlsData | None = None

    def matrices(self, group: int = 0) -> Matrices:
        return self.layout.patterns[group].matrices(self.theta)

    def start_for(self, target: Layout) -> np.ndarray:
        """Start values for a related layout (a refit without an item, say):
        this estimate of every parameter both layouts name alike, the
        target's own start values for the rest."""
        source = np.array([self._param_index.get(param, -1) for param in target.params],
                          dtype=np.intp)
        out = target.start.copy()
        shared = source >= 0
        out[shared] = self.theta[source[shared]]
        return out

    @cached_property
    def _param_index(self) -> dict:
        """Position of each parameter in ``theta``, built once: the omega-if-dropped
        refits ask for it once per item."""
        return {param: k for k, param in enumerate(self.layout.params)}

    @property
    def se(self) -> np.ndarray:
        """Standard errors (NaN when the information matrix is singular)."""
        if self.acov is None:
            return np.full(len(self.theta), np.nan)
        return np.sqrt(np.clip(np.diag(self.acov), 0.0, None))


#: smallest eigenvalue of the unit-diagonal information, relative to the largest,
#: below which the model counts as not identified (no standard errors) …
SINGULAR = 1e-10
#: … and below which it counts as nearly so (empirical under-identification)
NEARLY_SINGULAR = 1e-7


def invert_information(info: np.ndarray, n: int) -> tuple[np.ndarray | None, tuple[int, ...]]:
    """``(N I)⁻¹`` and the parameters spanning the (near) null space.

    Judged by the condition ratio, the smallest over the largest eigenvalue
    of ``I`` rescaled to unit diagonal.  A ratio below :data:`SINGULAR` means that some direction in the
    parameter space leaves the likelihood unchanged: the model is not
    (locally) identified (Rothenberg 1971) and no covariance is returned.
    Below :data:`NEARLY_SINGULAR` the model is identified only through values
    near a boundary of identification, e.g. a two-item construct whose
    correlations with the others are close to zero (Rindskopf 1984); the
    covariance is returned, and the involved parameters are named.

    References
    ----------
    Rothenberg, T. J. (1971). Identification in parametric models.
    Econometrica 39, 577–591.
    Rindskopf, D. (1984). Structural equation models: empirical identification,
    Heywood cases, and related problems. Sociological Methods & Research 13, 109–119.
    """
    d = np.sqrt(np.clip(np.diag(info), 1e-300, None))
    scaled = info / np.outer(d, d)
    factored = cholesky_inverse(scaled)
    if factored is not None:
        inverse = factored[1]
        if condition_bound(scaled, inverse) >= NEARLY_SINGULAR:   # no eigendecomposition needed
            return inverse / np.outer(d, d) / n, ()
    values, vectors = np.linalg.eigh(scaled)
    ratio = float(values[0] / max(values[-1], 1e-300))
    null = vectors[:, values < NEARLY_SINGULAR * values[-1]]
    involved = tuple(int(i) for i in np.nonzero(np.max(np.abs(null), axis=1, initial=0.0) > 0.1)[0])
    if ratio < SINGULAR:
        return None, involved
    inv_scaled = (vectors / values) @ vectors.T
    return inv_scaled / np.outer(d, d) / n, involved
