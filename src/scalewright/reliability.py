"""Classical reliability of a unit-weighted sum score: Cronbach's alpha, its
Feldt interval, and the item analysis a questionnaire author reads beside it.

All functions work on a covariance matrix of the construct's items, so they
accept a listwise, pairwise or model-based (e.g. FIML) covariance alike; none
of them needs the raw data.  Model-based coefficients (omega, H) are in
:mod:`scalewright.omega`, the general-factor coefficients in
:mod:`scalewright.bifactor`, and the ordinal versions in
:mod:`scalewright.ordinal_reliability`.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np
from scipy import special

from scalewright.coefficient_types import Interval, Note, Record
from scalewright.errors import StudyError


def cronbach_alpha(cov: np.ndarray) -> float | np.ndarray:
    """Cronbach's alpha of the unit-weighted sum of ``k`` items.

    .. math:: \\alpha = \\frac{k}{k-1}\\Bigl(1 - \\frac{\\operatorname{tr} S}{\\mathbf 1^\\top S \\mathbf 1}\\Bigr)

    The denominator is the variance of the sum score computed from the
    covariance matrix given (``1ᵀS1``): alpha is a property of the observed
    sum, estimated without a measurement model.

    Parameters
    ----------
    cov : array_like, shape (..., k, k)
        Item covariance matrix (or a stack of them); ``k >= 2``.

    Returns
    -------
    float or ndarray
        Alpha for each matrix in the stack.

    References
    ----------
    Cronbach, L. J. (1951). Coefficient alpha and the internal structure of
    tests. *Psychometrika*, 16, 297–334.
    """
    cov = np.asarray(cov, dtype=float)
    k = cov.shape[-1]
    if k < 2 or cov.shape[-2] != k:
        raise ValueError(f"alpha needs a square matrix of at least 2 items, got shape {cov.shape}")
    total = cov.sum(axis=(-2, -1))
    trace = np.trace(cov, axis1=-2, axis2=-1)
    return k / (k - 1) * (1.0 - trace / total)


def standardized_alpha(cov: np.ndarray) -> float:
    """Alpha of the sum of standardized items (alpha of the correlation matrix).

    .. math:: \\alpha_{std} = \\frac{k\\,\\bar r}{1 + (k-1)\\,\\bar r}

    with ``r̄`` the mean inter-item correlation; the denominator is the
    variance of the sum of z-scores, ``1ᵀR1``.

    References
    ----------
    Cronbach, L. J. (1951). *Psychometrika*, 16, 297–334 (the standardized
    form is the Spearman–Brown formula applied to the mean correlation).
    """
    cov = np.asarray(cov, dtype=float)
    sd = np.sqrt(np.diagonal(cov, axis1=-2, axis2=-1))
    corr = cov / (sd[..., :, None] * sd[..., None, :])
    return cronbach_alpha(corr)


def feldt_interval(alpha: float, n_obs: int, n_items: int, level: float = 0.95) -> Interval:
    """Confidence interval for alpha from the F distribution.

    With ``c = 1 − level``, ``d₁ = n − 1`` and ``d₂ = (n − 1)(k − 1)``:

    .. math::
        L = 1 - (1-\\hat\\alpha)\\,F_{1-c/2}(d_1, d_2), \\qquad
        U = 1 - (1-\\hat\\alpha)\\,F_{c/2}(d_1, d_2)

    It assumes the items are essentially tau-equivalent with normal errors;
    it is the interval usually printed beside alpha.

    Parameters
    ----------
    alpha : float
        Sample alpha.
    n_obs : int
        Number of cases the covariance matrix was computed from.
    n_items : int
        Number of items ``k``.
    level : float
        Confidence level in (0, 1).

    References
    ----------
    Feldt, L. S. (1965). The approximate sampling distribution of
    Kuder-Richardson reliability coefficient twenty. *Psychometrika*, 30,
    357–370.
    Feldt, L. S., Woodruff, D. J., & Salih, F. A. (1987). Statistical
    inference for coefficient alpha. *Applied Psychological Measurement*, 11,
    93–103.
    """
    if not 0.0 < level < 1.0:
        raise ValueError(f"level ({level}) must be in the open interval (0, 1)")
    if n_obs < 2 or n_items < 2:
        raise ValueError(f"the Feldt interval needs n_obs >= 2 and n_items >= 2, got {n_obs}, {n_items}")
    c = 1.0 - level
    d1 = n_obs - 1
    d2 = (n_obs - 1) * (n_items - 1)
    # the F quantiles by scipy.special.fdtri, which stats.f.ppf calls behind ~0.5 ms of
    # argument handling per interval
    upper_quantile, lower_quantile = special.fdtri(d1, d2, np.array([1.0 - c / 2.0, c / 2.0]))
    return Interval(lower=float(1.0 - (1.0 - alpha) * upper_quantile),
                    upper=float(1.0 - (1.0 - alpha) * lower_quantile),
                    level=float(level), method="Feldt (1965) F distribution")


@dataclass(frozen=True)
class AlphaResult(Record):
    """Alpha of one construct's sum score, with its interval and notes."""

    construct: str
    items: tuple[str, ...]
    alpha: float
    standardized_alpha: float
    mean_inter_item_covariance: float
    n_obs: int | None
    interval: Interval | None
    notes: tuple[Note, ...]


@dataclass(frozen=True)
class ItemRow(Record):
    """One item of an item analysis.

    ``alpha_if_dropped`` is NaN (``None`` in ``to_dict``) for a two-item
    construct, where dropping an item leaves a single item.
    """

    item: str
    corrected_item_total: float
    alpha_if_dropped: float


@dataclass(frozen=True)
class ItemAnalysis(Record):
    """Item analysis of one construct: one row per item, in the given order."""

    construct: str
    rows: tuple[ItemRow, ...]


def alpha_report(cov: np.ndarray, item_names: Sequence[str], construct: str,
                 n_obs: int | None = None, level: float = 0.95) -> AlphaResult:
    """Alpha, standardized alpha and (when ``n_obs`` is given) the Feldt
    interval of one construct, with a note when reverse keying is likely.

    Parameters
    ----------
    cov : array_like, shape (k, k)
        Covariance matrix of the construct's items.
    item_names : sequence of str
        The ``k`` item names, in the order of ``cov``.
    construct : str
        Construct name, used in notes and errors.
    n_obs : int, optional
        Number of cases behind ``cov``; without it no interval is given.
        With pairwise or FIML covariances pass the number of cases with any
        answer and read the interval as approximate.
    level : float
        Confidence level of the interval.

    Notes
    -----
    A note with code ``"reverse_keying"`` is attached when the mean
    inter-item covariance is not positive (alpha is then zero or negative
    and cannot be read as a reliability) or when an item correlates
    negatively with the sum of the others; it names those items.

    See :func:`cronbach_alpha`, :func:`standardized_alpha` and
    :func:`feldt_interval` for formulas and sources.
    """
    cov = _checked_cov(cov, item_names, construct)
    k = cov.shape[0]
    alpha = float(cronbach_alpha(cov))
    interval = None if n_obs is None else feldt_interval(alpha, n_obs, k, level)
    note = _reverse_keying_note(cov, item_names, construct, alpha)
    return AlphaResult(construct=construct, items=tuple(item_names), alpha=alpha,
                       standardized_alpha=float(standardized_alpha(cov)),
                       mean_inter_item_covariance=_mean_inter_item_cov(cov),
                       n_obs=n_obs, interval=interval,
                       notes=() if note is None else (note,))


def item_analysis(cov: np.ndarray, item_names: Sequence[str], construct: str) -> ItemAnalysis:
    """Corrected item–total correlation and alpha-if-dropped for each item.

    With ``s_i = Σ_j s_ij`` (row sum), ``V = 1ᵀS1`` and the rest score
    ``R_i = T − x_i`` (sum of the other items):

    .. math::
        r_{i,R} = \\frac{s_i - s_{ii}}{\\sqrt{s_{ii}\\,(V - 2 s_i + s_{ii})}},\\qquad
        \\alpha_{-i} = \\frac{k-1}{k-2}\\Bigl(1 - \\frac{\\operatorname{tr} S - s_{ii}}{V - 2 s_i + s_{ii}}\\Bigr)

    The item is correlated with the rest score, not the total, so that its
    own error variance does not inflate the correlation.

    References
    ----------
    Nunnally, J. C., & Bernstein, I. H. (1994). *Psychometric theory* (3rd
    ed.). McGraw-Hill (corrected item–total correlation).
    Cronbach, L. J. (1951). *Psychometrika*, 16, 297–334.
    """
    cov = _checked_cov(cov, item_names, construct)
    rest_corr, alpha_dropped = _item_statistics(cov)
    rows = tuple(ItemRow(item=name, corrected_item_total=float(r), alpha_if_dropped=float(a))
                 for name, r, a in zip(item_names, rest_corr, alpha_dropped))
    return ItemAnalysis(construct=construct, rows=rows)


def _item_statistics(cov: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Rest-score correlations and alpha-if-dropped, vectorised over items."""
    k = cov.shape[0]
    variances = np.diag(cov)
    row_sums = cov.sum(axis=1)
    total = cov.sum()
    rest_variance = total - 2.0 * row_sums + variances
    rest_corr = (row_sums - variances) / np.sqrt(variances * rest_variance)
    if k == 2:
        return rest_corr, np.full(k, np.nan)
    trace_rest = np.trace(cov) - variances
    alpha_dropped = (k - 1) / (k - 2) * (1.0 - trace_rest / rest_variance)
    return rest_corr, alpha_dropped


def _mean_inter_item_cov(cov: np.ndarray) -> float:
    k = cov.shape[0]
    return float((cov.sum() - np.trace(cov)) / (k * (k - 1)))


def _reverse_keying_note(cov: np.ndarray, item_names: Sequence[str], construct: str,
                         alpha: float) -> Note | None:
    """Note naming the items that correlate negatively with the rest score."""
    mean_cov = _mean_inter_item_cov(cov)
    rest_corr, _ = _item_statistics(cov)
    negative = rest_corr < 0
    if mean_cov > 0 and not negative.any():
        return None
    named = tuple(np.asarray(item_names)[negative].tolist())
    listing = ", ".join(f"'{n}' ({r:.2f})" for n, r in zip(named, rest_corr[negative]))
    if mean_cov <= 0:
        opening = (f"In construct '{construct}' the average covariance between items is "
                   f"{mean_cov:.3g}, so alpha ({alpha:.2f}) cannot be read as a reliability.")
    else:
        opening = f"In construct '{construct}' not every item runs in the same direction."
    if named:
        subject, verb, pronoun, owner = (("This item", "correlates", "it", "its") if len(named) == 1
                                         else ("These items", "correlate", "them", "their"))
        detail = (f" {subject} {verb} negatively with the sum of the other items: {listing}."
                  f" If worded in the opposite direction, declare {pronoun} reverse-keyed in the"
                  f" model file and run again; otherwise check {owner} coding.")
    else:
        detail = (" No single item correlates negatively with the rest; check the coding of"
                  " all items and whether they measure one construct.")
    return Note(code="reverse_keying", subject=construct, message=opening + detail, items=named)


def _checked_cov(cov, item_names: Sequence[str], construct: str) -> np.ndarray:
    """The covariance matrix as a float array, after the checks a user can act on."""
    cov = np.asarray(cov, dtype=float)
    if cov.ndim != 2 or cov.shape[0] != cov.shape[1] or cov.shape[0] != len(item_names):
        raise ValueError(f"covariance of shape {cov.shape} does not match "
                         f"{len(item_names)} item names")
    if len(item_names) < 2:
        raise StudyError(
            f"Construct '{construct}' has {len(item_names)} item"
            f"{'' if len(item_names) == 1 else 's'} ({', '.join(map(repr, item_names))}), so its "
            "reliability cannot be estimated: alpha and item analysis need at least two items. "
            "Give the construct more items in the model file, or leave it out of the "
            "reliability table.")
    flat = np.diag(cov) <= 0
    if flat.any():
        names = ", ".join(f"'{n}'" for n in np.asarray(item_names)[flat])
        raise StudyError(
            f"In construct '{construct}' item {names} has variance "
            f"{np.diag(cov)[flat].min():.3g}: every case gave the same answer, so it carries no "
            "information for reliability. Remove the item from the construct in the model file "
            "or check the data file for a coding error.")
    return cov
