"""One fitted model's results as plain data: fit indices, estimates,
standardized solution, warnings.  ``to_dict()`` is the JSON contract
(see DEVELOPERS.md, "JSON contract"); later stages add keys to ``extra``.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy import special

from scalewright.estimate.result import Estimate
from scalewright.indices import FitIndices
from scalewright.layout import GENERAL, PATH, RESIDUAL_COV
from scalewright.standardize import Standardized, delta_method_se


#: where each estimation route's standard errors come from, in words
STANDARD_ERRORS = {
    "ml": "expected information",
    "fiml": "observed information (consistent when answers are missing at random)",
    "robust-ml": "sandwich (robust to non-normal answers)",
    "robust-fiml": "sandwich with missing answers (Yuan & Bentler 2000)",
    "dwls": "sandwich from the asymptotic covariance of the polychoric correlations",
    "dwls-mixed": "sandwich from the asymptotic covariance of the polychoric, polyserial and "
                  "Pearson correlations",
}


@dataclass(frozen=True)
class ModelResult:
    """Everything reported about one rival model."""

    name: str
    estimate: Estimate
    fit: FitIndices
    std: Standardized
    estimator: str
    warnings: tuple[str, ...]
    extra: dict = field(default_factory=dict)   # keys added by later stages (reliability, hints…)
    #: the estimator's own objects that a later stage needs and the JSON does not
    #: carry: the ordinal route's :class:`~scalewright.estimate.dwls.DwlsModel`
    #: for the DWLS difference test; ``None`` otherwise
    fitted: object = field(default=None, repr=False, compare=False)

    @property
    def converged(self) -> bool:
        return self.estimate.record.converged

    def comparison_keys(self) -> dict:
        """The first keys of :meth:`to_dict`, those the rival comparison reads
        (:func:`~scalewright.compare.compare_models`), without the tables of
        estimates, which take most of the dict's time."""
        return {"name": self.name, "converged": self.converged, "estimator": self.estimator,
                "fit": self.fit.to_dict(), "n_used": self.estimate.n,
                "items": list(self.estimate.layout.items)}

    def to_dict(self) -> dict:
        est = self.estimate
        layout = est.layout
        out = self.comparison_keys()
        out.update({
            "optimizer": est.record.to_dict(),
            "standard_errors": STANDARD_ERRORS.get(est.method, est.method),
            "identification": list(layout.notes),
            "constructs": [{"name": f, "kind": k} for f, k in zip(layout.factors, layout.kinds)],
            "loadings": loading_rows(est, self.std),
            "higher_order_paths": path_rows(est, self.std),
            "construct_correlations": correlation_rows(est),
            "residual_variances": residual_variance_rows(est, self.std),
            "residual_covariances": residual_covariance_rows(est, self.std),
            "r_squared": [{"item": it, "value": float(v)}
                          for it, v in zip(layout.items, self.std.r_squared)],
            "warnings": list(self.warnings),
        })
        out.update(self.extra)
        return out


def _z_and_p(estimate: float, se: float) -> tuple[float | None, float | None]:
    if not np.isfinite(se) or se <= 0:
        return None, None
    z = estimate / se
    # Φ(−|z|) straight from the normal CDF: stats.norm.sf computes the same ndtr
    # call behind ~100 µs of argument handling, spent on every row of every table
    return float(z), float(2 * special.ndtr(-abs(z)))


def _num(x) -> float | None:
    return float(x) if x is not None and np.isfinite(x) else None


def _free_lookup(est: Estimate, kind: str) -> dict:
    return {(p.a, p.b): k for k, p in enumerate(est.layout.params) if p.kind == kind}


def loading_rows(est: Estimate, std: Standardized) -> list[dict]:
    """Every non-zero loading, free or fixed (a marker loading has no SE), by
    construct, then item."""
    layout = est.layout
    lam = est.matrices().loadings
    cells = layout.patterns[0].loadings
    param = np.full(lam.shape, -1)
    param[cells.rows, cells.cols] = cells.params
    cols, rows = np.nonzero(((param >= 0) | (lam != 0.0)).T)    # construct-major order
    k = param[rows, cols]
    se = np.where(k >= 0, est.se[np.maximum(k, 0)], np.nan)
    out = []
    for i, j, kk, estimate, s, standardized in zip(rows.tolist(), cols.tolist(), k.tolist(),
                                                   lam[rows, cols].tolist(), se.tolist(),
                                                   std.loadings[rows, cols].tolist()):
        f, item = layout.factors[j], layout.items[i]
        z, p = _z_and_p(estimate, s) if kk >= 0 else (None, None)
        out.append({"construct": f, "item": item, "estimate": estimate,
                    "se": _num(s) if kk >= 0 else None, "z": z, "p_value": p,
                    "fixed": kk < 0, "std_estimate": standardized,
                    "primary": layout.primary.get(item) == f or layout.kinds[j] == GENERAL})
    return out


def path_rows(est: Estimate, std: Standardized) -> list[dict]:
    """Paths from a higher-order factor to the constructs it explains."""
    layout = est.layout
    beta = est.matrices().paths
    free = _free_lookup(est, PATH)
    se = est.se
    rows = []
    for c, h in zip(*np.nonzero(beta)):
        k = free.get((layout.factors[h], layout.factors[c]))
        s = float(se[k]) if k is not None else None
        z, p = _z_and_p(beta[c, h], s) if s is not None else (None, None)
        rows.append({"higher": layout.factors[h], "construct": layout.factors[c],
                     "estimate": float(beta[c, h]), "se": _num(s), "z": z, "p_value": p,
                     "fixed": k is None, "std_estimate": float(std.paths[c, h])})
    return rows


def correlation_rows(est: Estimate) -> list[dict]:
    """Model-implied correlations between latent variables that are not zero
    by design, with delta-method standard errors."""
    layout = est.layout
    phi = est.matrices().latent_cov
    m = len(layout.factors)
    pairs = [(j, k) for j in range(m) for k in range(j + 1, m)
             if abs(phi[j, k]) > 1e-12 or _structurally_free(layout, j, k)]
    if not pairs:
        return []
    rows_idx = np.array([p[0] for p in pairs])
    cols_idx = np.array([p[1] for p in pairs])

    def correlations(theta):
        cov = layout.patterns[0].matrices(theta).latent_cov
        d = np.sqrt(np.abs(np.diag(cov)))
        return cov[rows_idx, cols_idx] / (d[rows_idx] * d[cols_idx])

    values = correlations(est.theta)
    pattern = layout.patterns[0]        # the latent covariances depend on B and Ψ alone
    if len(pattern.paths) or pattern.fixed.paths.any():
        ses = delta_method_se(est.theta, est.acov, correlations,
                              np.union1d(pattern.paths.params, pattern.disturbances.params))
    else:
        ses = _correlation_se(est, phi, rows_idx, cols_idx)
    out = []
    for (j, k), r, s in zip(pairs, values, ses):
        z, p = _z_and_p(r, s)
        out.append({"a": layout.factors[j], "b": layout.factors[k], "estimate": float(r),
                    "se": _num(s), "z": z, "p_value": p,
                    "covariance": float(phi[j, k])})
    return out


def _correlation_se(est: Estimate, psi: np.ndarray, rows: np.ndarray,
                    cols: np.ndarray) -> np.ndarray:
    """Delta-method standard errors of the correlations ``r = ψ_jk / √(ψ_jj ψ_kk)``
    of latent variables without paths (``B = 0``, so their covariance is Ψ),
    from the exact Jacobian

        ∂r/∂ψ_jk = 1/√(ψ_jj ψ_kk),   ∂r/∂ψ_jj = −r/(2ψ_jj),   ∂r/∂ψ_kk = −r/(2ψ_kk),

    summed over the cells a parameter fills; a fixed cell contributes
    nothing (the delta method, Var r ≈ J acov Jᵀ; Oehlert 1992)."""
    if est.acov is None:
        return np.full(len(rows), np.nan)
    cells = est.layout.patterns[0].disturbances
    param_of = {}
    for r, c, k in zip(cells.rows, cells.cols, cells.params):
        param_of[(r, c)] = param_of[(c, r)] = k
    d = np.sqrt(np.abs(np.diag(psi)))
    r = psi[rows, cols] / (d[rows] * d[cols])
    jac = np.zeros((len(rows), len(est.theta)))
    for pair, (j, k) in enumerate(zip(rows, cols)):
        for cell, slope in (((j, k), 1.0 / (d[j] * d[k])), ((j, j), -r[pair] / (2 * psi[j, j])),
                            ((k, k), -r[pair] / (2 * psi[k, k]))):
            if cell in param_of:
                jac[pair, param_of[cell]] += slope
    used = np.flatnonzero(jac.any(axis=0))
    jac = jac[:, used]
    var = np.einsum("ik,kl,il->i", jac, est.acov[np.ix_(used, used)], jac)
    return np.sqrt(np.clip(var, 0.0, None))


def _structurally_free(layout, j, k) -> bool:
    a, b = layout.factors[j], layout.factors[k]
    return any(p.kind == "factor_covariance" and {p.a, p.b} == {a, b} for p in layout.params)


def residual_variance_rows(est: Estimate, std: Standardized) -> list[dict]:
    theta = est.matrices().residuals
    free = _free_lookup(est, RESIDUAL_COV)
    se = est.se
    rows = []
    for i, item in enumerate(est.layout.items):
        k = free[(item, item)]
        z, p = _z_and_p(theta[i, i], se[k])
        rows.append({"item": item, "estimate": float(theta[i, i]), "se": _num(se[k]),
                     "z": z, "p_value": p, "std_estimate": float(std.residual_variances[i])})
    return rows


def residual_covariance_rows(est: Estimate, std: Standardized) -> list[dict]:
    layout = est.layout
    theta = est.matrices().residuals
    se = est.se
    index = {item: i for i, item in enumerate(layout.items)}
    rows = []
    for k, prm in enumerate(layout.params):
        if prm.kind != RESIDUAL_COV or prm.a == prm.b:
            continue
        i, j = index[prm.a], index[prm.b]
        z, p = _z_and_p(theta[i, j], se[k])
        rows.append({"a": prm.a, "b": prm.b, "estimate": float(theta[i, j]), "se": _num(se[k]),
                     "z": z, "p_value": p, "std_estimate": float(std.residual_correlations[i, j])})
    return rows
