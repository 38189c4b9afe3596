"""Are the constructs measured well and distinct from one another?

Average variance extracted (AVE), composite reliability, the Fornell–Larcker
comparison and the heterotrait–monotrait ratio (HTMT).  Every value is
compared with its published convention and the comparison is returned as
data (:class:`~scalewright.coefficient_types.Convention`), worded as a
convention, never as a verdict.

Items are tied to constructs by ``primary``: an integer array with, for each
item (row of Λ), the column of its primary construct (``-1`` for an item
without one, e.g. an item that loads on a general factor only).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np

from scalewright.coefficient_types import Convention, Note, Record, as_index
from scalewright.standardize import Standardized

#: Fornell & Larcker (1981): AVE of at least .50 [published]
AVE_MINIMUM = 0.50
#: Nunnally & Bernstein (1994): reliability .70 as a minimum for research use [memory]
RELIABILITY_MINIMUM = 0.70
#: Henseler, Ringle & Sarstedt (2015): HTMT below .85 for distinct constructs [published]
HTMT_STRICT = 0.85
#: Henseler, Ringle & Sarstedt (2015): HTMT below .90 for conceptually similar constructs [published]
HTMT_LENIENT = 0.90

_FORNELL_LARCKER = "Fornell & Larcker (1981), J. Marketing Res. 18:39–50"
_HENSELER = "Henseler, Ringle & Sarstedt (2015), J. Acad. Marketing Sci. 43:115–135"
_NUNNALLY = "Nunnally & Bernstein (1994), Psychometric theory, 3rd ed."


@dataclass(frozen=True)
class ConstructQuality(Record):
    """AVE and composite reliability of one construct, with conventions."""

    construct: str
    items: tuple[str, ...]
    ave: float
    sqrt_ave: float
    composite_reliability: float
    conventions: tuple[Convention, ...]


def construct_quality(standardized: Standardized, primary: Sequence[int],
                      constructs: Sequence[int], factor_names: Sequence[str],
                      item_names: Sequence[str]) -> tuple[ConstructQuality, ...]:
    """AVE and composite reliability of each construct in ``constructs``.

    For construct ``c`` with items ``I_c`` (those whose primary construct is
    ``c``), standardized loadings ``λ_i`` on ``c`` and standardized residual
    variances ``θ_i``:

    .. math::
        AVE_c = \\frac{1}{|I_c|}\\sum_{i\\in I_c}\\lambda_i^2,\\qquad
        CR_c = \\frac{(\\sum\\lambda_i)^2}{(\\sum\\lambda_i)^2 + \\sum\\theta_i}

    Both use only the loadings on ``c``; cross-loadings and residual
    covariances are left out, as in the published formulas.  The denominator
    of CR is the model-implied variance of the sum of *standardized* items,
    so CR is the omega of that sum; for the raw sum score, and for models
    with cross-loadings or residual covariances, use
    :func:`scalewright.omega.omega_total`.

    Conventions returned: AVE ≥ .50 (Fornell & Larcker 1981);
    CR ≥ .70 (Nunnally & Bernstein 1994, recalled).

    Parameters
    ----------
    standardized : Standardized
        The completely standardized solution,
        :func:`scalewright.standardize.standardize` of the fitted matrices
        (``ModelResult.std``), or of
        :func:`scalewright.omega.contract_matrices` for a given Λ, Φ*, Θ;
        its ``loadings`` and ``residual_variances`` are used.
    primary : sequence of int, length p
        Column of each item's primary construct, -1 for none.
    constructs : sequence of int
        Construct columns to evaluate.
    factor_names, item_names : sequence of str
        Names of all latent columns and of all items.

    References
    ----------
    Fornell, C., & Larcker, D. F. (1981). Evaluating structural equation
    models with unobservable variables and measurement error. *Journal of
    Marketing Research*, 18, 39–50.
    """
    lam_all = np.asarray(standardized.loadings)
    primary = np.asarray(primary, dtype=np.intp)
    cols = as_index(constructs, lam_all.shape[1], "constructs")
    member = primary[:, None] == cols[None, :]                       # (p, K)
    lam = np.where(member, lam_all[:, cols], 0.0)
    theta = np.asarray(standardized.residual_variances)
    counts = member.sum(axis=0)
    sum_lam = lam.sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        ave = (lam ** 2).sum(axis=0) / counts
        cr = sum_lam ** 2 / (sum_lam ** 2 + theta @ member)
    names = np.asarray(item_names)
    return tuple(
        ConstructQuality(
            construct=factor_names[c], items=tuple(names[member[:, j]].tolist()),
            ave=float(ave[j]), sqrt_ave=float(np.sqrt(ave[j])), composite_reliability=float(cr[j]),
            conventions=(
                Convention(name="AVE", threshold=AVE_MINIMUM, met=bool(ave[j] >= AVE_MINIMUM),
                           wording=_above_below(f"AVE {ave[j]:.2f}", ave[j], AVE_MINIMUM,
                                                "the construct explains less than half of its "
                                                "items' variance"),
                           source=_FORNELL_LARCKER),
                Convention(name="composite reliability", threshold=RELIABILITY_MINIMUM,
                           met=bool(cr[j] >= RELIABILITY_MINIMUM),
                           wording=_above_below(f"Composite reliability {cr[j]:.2f}", cr[j],
                                                RELIABILITY_MINIMUM,
                                                "below the usual minimum for research use"),
                           source=_NUNNALLY)))
        for j, c in enumerate(cols))


def _above_below(label: str, value: float, threshold: float, consequence: str) -> str:
    if value >= threshold:
        return f"{label} meets the conventional minimum of {threshold:.2f}."
    return f"{label} is below the conventional minimum of {threshold:.2f}: {consequence}."


@dataclass(frozen=True)
class FornellLarckerRow(Record):
    """One pair of constructs in the Fornell–Larcker comparison.

    ``convention.met`` is True when ``|correlation|`` is below both
    constructs' √AVE.
    """

    construct_a: str
    construct_b: str
    correlation: float
    sqrt_ave_a: float
    sqrt_ave_b: float
    convention: Convention


def fornell_larcker(ave: Sequence[float], latent_corr: np.ndarray,
                    construct_names: Sequence[str]) -> tuple[FornellLarckerRow, ...]:
    """Compare each construct's √AVE with its correlations with the others.

    For constructs ``a`` and ``b`` the convention holds when

    .. math:: |r_{ab}| < \\min(\\sqrt{AVE_a}, \\sqrt{AVE_b})

    i.e. each construct shares more variance with its own items than with
    the other construct.

    Parameters
    ----------
    ave : sequence of float, length K
        AVE of each construct (see :func:`construct_quality`).
    latent_corr : ndarray, shape (K, K)
        Model-implied correlations among the same constructs, same order.
    construct_names : sequence of str, length K

    References
    ----------
    Fornell, C., & Larcker, D. F. (1981). *Journal of Marketing Research*,
    18, 39–50.
    """
    root = np.sqrt(np.asarray(ave, dtype=float))
    corr = np.asarray(latent_corr, dtype=float)
    a, b = np.triu_indices(root.size, k=1)
    r = corr[a, b]
    bound = np.minimum(root[a], root[b])
    met = np.abs(r) < bound
    return tuple(
        FornellLarckerRow(
            construct_a=construct_names[i], construct_b=construct_names[j], correlation=float(rij),
            sqrt_ave_a=float(root[i]), sqrt_ave_b=float(root[j]),
            convention=Convention(
                name="Fornell–Larcker", threshold=float(lim), met=bool(ok),
                source=_FORNELL_LARCKER,
                wording=(f"The correlation of '{construct_names[i]}' and '{construct_names[j]}' "
                         f"({rij:.2f}) is {'below' if ok else 'not below'} the smaller √AVE "
                         f"({lim:.2f}); by this convention the constructs "
                         f"{'are' if ok else 'may not be'} distinct.")))
        for i, j, rij, lim, ok in zip(a, b, r, bound, met))


@dataclass(frozen=True)
class HtmtRow(Record):
    """HTMT of one pair of constructs and its two conventions (.85, .90)."""

    construct_a: str
    construct_b: str
    htmt: float
    conventions: tuple[Convention, ...]


@dataclass(frozen=True)
class HtmtResult(Record):
    """HTMT for every pair of constructs.

    ``matrix`` is K × K with NaN on the diagonal; ``rows`` lists the pairs
    ``a < b`` in construct order.
    """

    constructs: tuple[str, ...]
    matrix: np.ndarray
    rows: tuple[HtmtRow, ...]
    notes: tuple[Note, ...]


def htmt(item_corr: np.ndarray, primary: Sequence[int], constructs: Sequence[int],
         factor_names: Sequence[str]) -> HtmtResult:
    """Heterotrait–monotrait ratio of correlations for every pair of constructs.

    .. math::
        HTMT_{ab} = \\frac{\\bar r_{ab}}{\\sqrt{\\bar r_{aa}\\,\\bar r_{bb}}}

    where ``r̄_ab`` is the mean correlation between items of ``a`` and items
    of ``b`` (heterotrait–heteromethod) and ``r̄_aa`` the mean correlation
    among different items of ``a`` (monotrait–heteromethod).  It uses the
    item correlation matrix only, no model.  Correlations enter with their
    sign, so reverse-keyed items must already be recoded; the heterotrait
    mean then enters as its absolute value, because two constructs that
    correlate strongly *negatively* (e.g. workload and support) are no more
    distinct than two that correlate strongly positively.

    A construct with one item, or with a mean within-construct correlation
    that is not positive, has no HTMT (NaN) and gets a note.

    Conventions returned per pair: below .85 (distinct constructs) and
    below .90 (conceptually similar constructs), Henseler et al. (2015).

    Parameters
    ----------
    item_corr : ndarray, shape (p, p)
        Item correlation matrix (Pearson, or polychoric for ordinal items).
    primary : sequence of int, length p
        Column of each item's primary construct, -1 for none.
    constructs : sequence of int
        Construct columns to compare.
    factor_names : sequence of str
        Names of all latent columns.

    References
    ----------
    Henseler, J., Ringle, C. M., & Sarstedt, M. (2015). A new criterion for
    assessing discriminant validity in variance-based structural equation
    modeling. *Journal of the Academy of Marketing Science*, 43, 115–135.
    """
    corr = np.asarray(item_corr, dtype=float)
    primary = np.asarray(primary, dtype=np.intp)
    cols = as_index(constructs, len(factor_names), "constructs")
    member = (primary[:, None] == cols[None, :]).astype(float)      # (p, K)
    sums = member.T @ corr @ member                                   # Σ of r over item blocks
    counts = member.sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        within = (np.diag(sums) - counts) / (counts * (counts - 1.0))
        between = sums / np.outer(counts, counts)
        usable = within > 0
        ratio = np.abs(between) / np.sqrt(np.outer(np.where(usable, within, np.nan),
                                           np.where(usable, within, np.nan)))
    np.fill_diagonal(ratio, np.nan)
    names = tuple(factor_names[c] for c in cols)
    a, b = np.triu_indices(cols.size, k=1)
    rows = tuple(HtmtRow(construct_a=names[i], construct_b=names[j], htmt=float(ratio[i, j]),
                         conventions=_htmt_conventions(names[i], names[j], ratio[i, j]))
                 for i, j in zip(a, b))
    notes = tuple(_htmt_note(name, n, w) for name, n, w, ok in zip(names, counts, within, usable)
                  if not ok)
    return HtmtResult(constructs=names, matrix=ratio, rows=rows, notes=notes)


def _htmt_conventions(name_a: str, name_b: str, value: float) -> tuple[Convention, ...]:
    if np.isnan(value):
        return ()
    return tuple(
        Convention(name=f"HTMT below {limit:.2f}", threshold=limit, met=bool(value < limit),
                   source=_HENSELER,
                   wording=(f"HTMT of '{name_a}' and '{name_b}' is {value:.2f}, "
                            f"{'below' if value < limit else 'not below'} the conventional "
                            f"{limit:.2f} used for {kind} constructs."))
        for limit, kind in ((HTMT_STRICT, "conceptually distinct"),
                            (HTMT_LENIENT, "conceptually similar")))


def _htmt_note(construct: str, count: float, within: float) -> Note:
    if count < 2:
        why = (f"Construct '{construct}' has {int(count)} item, so it has no correlations among "
               "its own items and no HTMT. Compare it with the others through the latent "
               "correlations instead.")
    else:
        why = (f"The mean correlation among the items of construct '{construct}' is "
               f"{within:.2f}, not positive, so its HTMT is not defined. Check whether some "
               "items are reverse-keyed and need recoding.")
    return Note(code="htmt_undefined", subject=construct, message=why)
