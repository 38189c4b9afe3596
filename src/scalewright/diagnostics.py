"""Plain-language warnings about a fitted model: convergence, improper
solutions, identification.

Decision on improper solutions: scalewright estimates without bounds and
*reports* a negative residual variance (a Heywood case) instead of forcing
it to zero.  A bounded estimate hides the problem and changes the test
statistic's distribution; the unbounded one tells the reader that the model
is misspecified or the sample too small for it (Kolenikov & Bollen 2012;
Savalei & Kolenikov 2008).

References
----------
Kolenikov, S. & Bollen, K. A. (2012). Testing negative error variances: is a
Heywood case a symptom of misspecification? Sociological Methods & Research
41, 124–167.
Savalei, V. & Kolenikov, S. (2008). Constrained versus unconstrained
estimation in structural equation modeling. Psychological Methods 13, 150–170.
"""

from __future__ import annotations

import numpy as np

from scalewright.errors import ConvergenceWarning, IdentificationWarning, ImproperSolutionWarning
from scalewright.estimate.result import Estimate
from scalewright.layout import CONSTRUCT, FACTOR_COV, LOADING, PATH
from scalewright.standardize import Standardized


#: what to try when an estimation does not converge (the warning and the command line's message)
NON_CONVERGENCE_ADVICE = (
    "Check that every construct has items that correlate with each other, remove "
    "cross-loadings or residual covariances that are not needed, or try the other "
    "identification (estimation: identification: marker).")


def model_warnings(estimate: Estimate, std: Standardized) -> list[str]:
    """Every warning about one fitted model, in words a researcher can act on."""
    return [text for _, text in classified_warnings(estimate, std)]


def classified_warnings(estimate: Estimate, std: Standardized) -> list[tuple[type, str]]:
    """The warnings of :func:`model_warnings` with their class from
    :mod:`scalewright.errors`, for emitting them as Python warnings."""
    out = _Collector()
    layout = estimate.layout
    if not estimate.record.converged:
        out.add(ConvergenceWarning,
            f"The estimation did not converge ({estimate.record.message}; largest gradient "
            f"element {estimate.record.gradient_norm:.2g}). Do not interpret these numbers. "
            + NON_CONVERGENCE_ADVICE)
    if estimate.unidentified:
        out.add(IdentificationWarning, unidentified_message(estimate))
    thetas = np.diag(estimate.matrices().residuals)
    for i in np.nonzero(thetas < 0)[0]:
        out.add(ImproperSolutionWarning,
            f"Improper solution: item '{layout.items[i]}' has a negative residual variance "
            f"({thetas[i]:.3f}), a Heywood case. The model is probably misspecified for this "
            "item or the sample is too small; look at its loadings and residual covariances "
            "before interpreting the model.")
    big = np.argwhere(np.abs(std.loadings) > 1.0)
    for i, j in big:
        out.add(ImproperSolutionWarning,
            f"Improper solution: the standardized loading of '{layout.items[i]}' on "
            f"'{layout.factors[j]}' is {std.loadings[i, j]:.3f}, beyond ±1.")
    phi = std.latent_correlations
    if phi.shape[0] > 1 and np.all(np.isfinite(phi)):
        values = np.linalg.eigvalsh(phi)
        if values[0] < -1e-8:
            off = np.abs(phi - np.eye(len(phi)))
            j, k = np.unravel_index(np.argmax(off), off.shape)
            out.add(ImproperSolutionWarning,
                "Improper solution: the latent correlation matrix is not positive definite "
                f"(smallest eigenvalue {values[0]:.3f}); the largest correlation is between "
                f"'{layout.factors[j]}' and '{layout.factors[k]}' ({phi[j, k]:.3f}). These "
                "constructs may not be distinct; compare with a model that merges them.")
        else:
            for j, k in zip(*np.triu_indices(len(phi), 1)):
                if abs(phi[j, k]) > 1.0:
                    out.add(ImproperSolutionWarning,
                            f"Improper solution: the correlation of '{layout.factors[j]}' "
                            f"and '{layout.factors[k]}' is {phi[j, k]:.3f}, beyond ±1.")
    return out.items


class _Collector:
    def __init__(self):
        self.items: list[tuple[type, str]] = []

    def add(self, category: type, text: str) -> None:
        self.items.append((category, text))


def unidentified_message(estimate: Estimate) -> str:
    """Say which construct most likely makes the information matrix singular."""
    layout = estimate.layout
    involved = [layout.params[k] for k in estimate.unidentified]
    constructs = []
    for prm in involved:
        name = prm.a if prm.kind in (LOADING, PATH, FACTOR_COV) else layout.primary.get(prm.a)
        if name and name not in constructs:
            constructs.append(name)
    counts = {f: sum(1 for it, c in layout.primary.items() if c == f)
              for f, k in zip(layout.factors, layout.kinds) if k == CONSTRUCT}
    small = [c for c in constructs if counts.get(c, 3) <= 2]
    which = small or constructs
    names = ", ".join(f"'{c}'" for c in which) or "(none could be singled out)"
    detail = ""
    if small:
        detail = (" A construct with two items is identified only through its correlations "
                  "with other constructs; if those are near zero, give it a third item or fix "
                  "its two loadings equal.")
    kinds = sorted({p.kind.replace("_", " ") for p in involved})
    if estimate.acov is None:
        opening = ("The information matrix is singular: the model is not identified, so "
                   "standard errors cannot be computed.")
    else:
        opening = ("The information matrix is nearly singular (the model is identified only "
                   "empirically, barely): standard errors are unstable.")
    return (f"{opening} The parameters involved are {', '.join(kinds)} "
            f"parameters of {names}.{detail} Check the construct's items and any "
            "cross-loadings or residual covariances declared for them.")

