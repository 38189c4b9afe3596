"""Reliability for ordinal (Likert-type) items: ordinal alpha and
categorical omega.

For ordinal items the engine passes the polychoric correlation matrix and the
standardized solution of the latent responses ``y*`` (unit variances):
standardized loadings Λ, latent correlations Φ, standardized residual
covariances Θ, and the thresholds ``τ`` of each item.  An item's observed
score is the number of its thresholds that ``y*`` exceeds (0, 1, …, C−1).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np
from scipy import special

from scalewright.coefficient_types import Note, Record, as_index
from scalewright.estimate.bivariate_normal import bvn_cdf
from scalewright.omega import two_item_notes
from scalewright.reliability import cronbach_alpha


def ordinal_alpha(polychoric: np.ndarray) -> float:
    """Ordinal alpha: Cronbach's alpha computed on the polychoric correlation
    matrix of the items.

    .. math:: \\alpha_{ord} = \\frac{k}{k-1}\\Bigl(1 - \\frac{k}{\\mathbf 1^\\top R_{pc}\\mathbf 1}\\Bigr)

    The denominator is the variance of the sum of the (standardized)
    *latent* responses, so ordinal alpha is the reliability of that
    hypothetical sum, not of the observed sum score; for the observed sum
    use :func:`categorical_omega`.

    References
    ----------
    Zumbo, B. D., Gadermann, A. M., & Zeisser, C. (2007). Ordinal versions
    of coefficients alpha and theta for Likert rating scales. *Journal of
    Modern Applied Statistical Methods*, 6, 21–29.
    Chalmers, R. P. (2018). On misconceptions and the limited usefulness of
    ordinal alpha. *Educational and Psychological Measurement*, 78,
    1056–1071.
    """
    polychoric = np.asarray(polychoric, dtype=float)
    if not np.allclose(np.diag(polychoric), 1.0):
        raise ValueError("a polychoric correlation matrix has ones on its diagonal")
    return float(cronbach_alpha(polychoric))


def ordinal_score_covariance(thresholds: np.ndarray, latent_corr: np.ndarray) -> np.ndarray:
    """Covariance matrix of ordinal item scores implied by normal latent
    responses.

    For items ``i, j`` with thresholds ``τ_i·``, ``τ_j·`` and latent
    responses correlated ``ρ_ij``:

    .. math::
        \\operatorname{Cov}(x_i, x_j) = \\sum_{c}\\sum_{c'}\\bigl[\\Phi_2(\\tau_{ic}, \\tau_{jc'};\\rho_{ij})
        - \\Phi(\\tau_{ic})\\Phi(\\tau_{jc'})\\bigr]

    because ``x_i = Σ_c 1(y*_i > τ_ic)``.  ``Φ₂`` is the project's vectorised
    bivariate normal CDF (:func:`scalewright.estimate.bivariate_normal.bvn_cdf`,
    Genz 2004), evaluated on the threshold grid of every item pair at once.

    Parameters
    ----------
    thresholds : ndarray, shape (q, K)
        Thresholds of each item, increasing, padded with NaN for items with
        fewer categories.
    latent_corr : ndarray, shape (q, q)
        Correlations ``ρ_ij`` of the latent responses (the diagonal may be
        below one, e.g. for the common part only).

    References
    ----------
    Green, S. B., & Yang, Y. (2009). Reliability of summed item scores using
    structural equation modeling: An alternative to coefficient alpha.
    *Psychometrika*, 74, 155–167.
    Genz, A. (2004). Numerical computation of rectangular bivariate and
    trivariate normal and t probabilities. *Statistics and Computing*, 14,
    251–260.
    """
    tau = np.asarray(thresholds, dtype=float)
    rho = np.asarray(latent_corr, dtype=float)
    a = tau[:, None, :, None]
    b = tau[None, :, None, :]
    present = ~(np.isnan(a) | np.isnan(b))
    joint = bvn_cdf(np.where(present, a, 0.0), np.where(present, b, 0.0), rho[:, :, None, None])
    product = special.ndtr(np.where(present, a, 0.0)) * special.ndtr(np.where(present, b, 0.0))
    return np.sum(np.where(present, joint - product, 0.0), axis=(2, 3))


def observed_sum_variance(codes: np.ndarray) -> float | None:
    """Sample variance (÷ n − 1) of the observed ordinal sum score.

    Each item scores the rank 0, 1, …, K − 1 of its category *as analysed*
    (``codes`` of :class:`~scalewright.estimate.polychoric.OrdinalMoments`),
    which is the number of thresholds its latent response exceeds, the item
    score of categorical omega (Green & Yang 2009); a category merged into
    a neighbour scores as that neighbour.  The sum is taken over the rows
    that answered every item (code −1 marks a missing answer).

    Returns None with fewer than two such rows.
    """
    codes = np.asarray(codes)
    sums = codes[(codes >= 0).all(axis=1)].sum(axis=1)
    return float(np.var(sums, ddof=1)) if sums.size > 1 else None


@dataclass(frozen=True)
class CategoricalOmegaResult(Record):
    """Categorical omega of one construct's observed ordinal sum score.

    Attributes
    ----------
    omega_total : float
        Variance of the sum's true score given all common factors over the
        model-implied variance of the observed sum.
    omega_construct : float
        The same with the true score given the target construct only.
    omega_total_observed : float
        ``omega_total``'s numerator over the observed sum-score variance;
        NaN when that was not given.
    """

    construct: str
    items: tuple[str, ...]
    omega_total: float
    omega_construct: float
    omega_total_observed: float
    implied_total_variance: float
    notes: tuple[Note, ...]


def categorical_omega(loadings: np.ndarray, latent_corr: np.ndarray, residual_cov: np.ndarray,
                      thresholds: Sequence[Sequence[float]], items: Sequence[int], factor: int, *,
                      item_names: Sequence[str], construct: str,
                      observed_sum_variance: float | None = None) -> CategoricalOmegaResult:
    """Reliability of the observed ordinal sum score (Green & Yang 2009).

    The true score of the sum ``X = Σ x_i`` is ``E(X | η)``; its variance
    is the covariance of item scores implied by the *common* part of the
    latent-response correlations, ``ρ*_ij``, with ``ρ*_ii`` the communality:

    .. math::
        \\omega_{cat} = \\frac{\\sum_i\\sum_j\\sum_c\\sum_{c'}
        \\bigl[\\Phi_2(\\tau_{ic},\\tau_{jc'};\\rho^*_{ij}) - \\Phi(\\tau_{ic})\\Phi(\\tau_{jc'})\\bigr]}
        {\\operatorname{Var}(X)}

    * ``omega_total``: ``ρ* = ΛΦΛᵀ`` (all common factors);
    * ``omega_construct``: ``ρ*_ij = a_i a_j / φ_cc`` with ``a = ΛΦ_{·c}``,
      the part of ``y*`` predictable from the target construct alone.

    The denominator is the model-implied variance of the observed sum,
    computed with the same formula from the full latent correlations
    ``ΛΦΛᵀ + Θ`` (unit diagonal), so that the coefficient is a ratio of two
    variances from one model.  With ``observed_sum_variance`` (the sample
    variance of the sum score) ``omega_total_observed`` uses the observed
    denominator instead; the two differ by the model's misfit in the sum.

    Parameters
    ----------
    loadings, latent_corr, residual_cov : ndarray
        Standardized Λ (p, m), latent correlations Φ (m, m), standardized Θ
        (p, p) of the latent responses.
    thresholds : sequence of sequences of float
        Thresholds of every item (all p), increasing; lengths may differ.
    items : sequence of int
        Rows of the construct's items.
    factor : int
        Column of the target construct.
    item_names, construct : names for the result and notes.
    observed_sum_variance : float, optional
        Sample variance of the observed sum of these items.

    References
    ----------
    Green, S. B., & Yang, Y. (2009). Reliability of summed item scores using
    structural equation modeling: An alternative to coefficient alpha.
    *Psychometrika*, 74, 155–167.
    """
    loadings, latent_corr, residual_cov = (np.asarray(a, dtype=float)
                                           for a in (loadings, latent_corr, residual_cov))
    rows = as_index(items, loadings.shape[0], "items")
    if len(thresholds) != loadings.shape[0]:
        raise ValueError(f"{len(thresholds)} threshold sets for {loadings.shape[0]} items")
    tau = _padded([thresholds[i] for i in rows])
    lam = loadings[rows]
    common = lam @ latent_corr @ lam.T
    full = common + residual_cov[np.ix_(rows, rows)]
    if not np.allclose(np.diag(full), 1.0, atol=1e-6):
        raise ValueError("the latent responses of a standardized solution have unit variance")
    to_target = lam @ latent_corr[:, factor]
    own = np.outer(to_target, to_target) / latent_corr[factor, factor]
    total = ordinal_score_covariance(tau, full).sum()
    true_all = ordinal_score_covariance(tau, common).sum()
    true_own = ordinal_score_covariance(tau, own).sum()
    observed = np.nan if observed_sum_variance is None else float(observed_sum_variance)
    return CategoricalOmegaResult(
        construct=construct, items=tuple(item_names), omega_total=float(true_all / total),
        omega_construct=float(true_own / total), omega_total_observed=float(true_all / observed),
        implied_total_variance=float(total),
        notes=two_item_notes(construct, item_names))


def _padded(ragged: Sequence[Sequence[float]]) -> np.ndarray:
    """Stack threshold vectors of unequal length into a NaN-padded array."""
    lengths = np.array([len(t) for t in ragged])
    tau = np.full((lengths.size, lengths.max()), np.nan)
    tau[np.arange(lengths.max())[None, :] < lengths[:, None]] = np.concatenate(
        [np.asarray(t, dtype=float) for t in ragged])
    return tau
