"""Multivariate outliers by Mahalanobis distance, and the item correlation
matrix a reader needs to reanalyse the data.

Outliers: for each row that answers every item, ``D²_i = (x_i − x̄)ᵀ S⁻¹ (x_i − x̄)``
with ``S`` the ML covariance of those rows.  Under multivariate normality
``D²`` is approximately χ² on ``p`` df; rows beyond the .999 quantile
(p < .001) are flagged, the criterion Tabachnick & Fidell recommend (from
memory).  Flagged rows are *kept*: with Likert items a distant row is usually
an unusual but genuine pattern of answers, and dropping rows because of the
fit they spoil capitalises on chance; the report lists them so the researcher
can look at them.  ``D²`` is the item screen's by-product of Mardia's
kurtosis when the check has it, else computed in row chunks through the
Cholesky factor, without an ``n × n`` matrix.

References
----------
Mahalanobis, P. C. (1936). On the generalized distance in statistics.
Proceedings of the National Institute of Sciences of India 2, 49–55.
Tabachnick, B. G. & Fidell, L. S. (2013). Using Multivariate Statistics
(6th ed.). Pearson, ch. 4.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import linalg, special

from scalewright.estimate.normal import CompleteRows, complete_rows

#: the flagging level: D² beyond the χ²_p quantile at 1 − LEVEL
LEVEL = 0.001
#: at most this many flagged rows are listed by name
LISTED = 10
_CHUNK_CELLS = 2_000_000   # cells of one block of rows (16 MB)


@dataclass(frozen=True)
class Outliers:
    n_checked: int
    threshold: float            # χ²_p quantile at .999
    n_flagged: int
    largest: tuple              # (row label, D², p) of the most distant flagged rows
    p: int

    def to_dict(self) -> dict:
        return {"method": "Mahalanobis distance on rows answering every item, flagged at "
                          f"p < {LEVEL:g} (chi-square on {self.p} df); flagged rows were kept",
                "n_checked": self.n_checked, "threshold": self.threshold,
                "n_flagged": self.n_flagged, "level": LEVEL,
                "largest": [{"row": row, "d2": d2, "p_value": p} for row, d2, p in self.largest]}


def mahalanobis_outliers(values: np.ndarray, row_labels=None,
                         complete: CompleteRows | None = None,
                         distances: np.ndarray | None = None) -> Outliers | None:
    """Flag rows whose Mahalanobis distance is improbable under normality.

    ``values`` is the n × p answer matrix (NaN = missing); rows with a
    missing answer are skipped.  ``row_labels`` names the rows (the id
    column); 1-based data row numbers are used otherwise; ``complete`` is
    :func:`complete_rows` of ``values`` when the caller has it, and
    ``distances`` the squared distances of those rows when the caller has
    them (the item screen computes them for Mardia's kurtosis).
    None when fewer complete rows than p + 2 or a singular covariance.
    """
    complete = complete or complete_rows(values)
    index = complete.index
    n, p = len(index), values.shape[1]
    if n < p + 2:
        return None
    d2 = distances if distances is not None else _squared_distances(values, complete)
    if d2 is None:
        return None
    # the chi-square quantile and tail by scipy.special (what scipy.stats.chi2's isf
    # and sf call, without their argument handling)
    threshold = float(special.chdtri(p, LEVEL))
    flagged = np.nonzero(d2 > threshold)[0]
    order = flagged[np.argsort(-d2[flagged])][:LISTED]
    labels = (np.asarray(row_labels) if row_labels is not None else np.arange(1, len(values) + 1))
    tails = special.chdtrc(p, d2[order])
    largest = tuple((_plain(labels[index[i]]), float(d2[i]), float(tail))
                    for i, tail in zip(order, tails))
    return Outliers(n, threshold, int(len(flagged)), largest, p)


def _squared_distances(values: np.ndarray, complete: CompleteRows) -> np.ndarray | None:
    """``D²_i`` of the complete rows, through the Cholesky factor of their
    covariance; None when it is singular."""
    index, mean, cov = complete.index, complete.moments.mean, complete.moments.cov
    try:
        chol = linalg.cholesky(cov, lower=True, check_finite=False)
    except linalg.LinAlgError:
        return None
    whiten = linalg.solve_triangular(chol, np.eye(len(cov)), lower=True, check_finite=False)
    return squared_distances(values[index] if len(index) < len(values) else values, whiten,
                             mean)


def squared_distances(rows: np.ndarray, whiten: np.ndarray,
                      mean: np.ndarray | None = None) -> np.ndarray:
    """``‖W (x_i − x̄)‖²`` for the rows ``x_i`` of ``rows`` (n × p), with
    ``W = L⁻¹`` for ``S = LLᵀ``: the squared Mahalanobis distances ``(x_i −
    x̄)ᵀ S⁻¹ (x_i − x̄)``.  Rows already centred are given without ``mean``.
    Computed by blocks of rows, so that memory beyond the result stays at one
    block (the item screen's Mardia kurtosis uses it too)."""
    n, p = rows.shape
    out = np.empty(n)
    width = max(1, _CHUNK_CELLS // max(p, 1))
    for start in range(0, n, width):
        block = rows[start:start + width]
        z = whiten @ (block if mean is None else block - mean).T
        out[start:start + width] = np.einsum("ij,ij->j", z, z)
    return out


def item_correlations(values: np.ndarray, items, saturated_cov: np.ndarray | None = None,
                      complete: CompleteRows | None = None) -> dict:
    """The item correlation matrix: from ``saturated_cov`` (the EM estimate
    under missing answers) when given, else from the complete rows
    (``complete``: their :func:`complete_rows`, when the caller has it)."""
    if saturated_cov is not None:
        cov, basis = saturated_cov, "maximum-likelihood (EM) estimate using every answer"
    else:
        cov = (complete or complete_rows(values)).moments.cov
        basis = "rows answering every item"
    sd = np.sqrt(np.diag(cov))
    corr = cov / np.outer(sd, sd)
    return {"items": list(items), "basis": basis,
            "matrix": np.round(corr, 4).tolist()}


def _plain(value):
    return value.item() if isinstance(value, np.generic) else value
