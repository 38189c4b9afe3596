"""Ordinal and continuous items together: one correlation matrix and its sampling covariance.

The moments of a model whose items are partly ordinal and partly
continuous.  Every pair gets the correlation that suits its two items:

* two ordinal items: the polychoric correlation (two-step, Olsson 1979;
  :mod:`scalewright.estimate.polychoric`);
* a continuous and an ordinal item: the polyserial correlation (two-step,
  Olsson, Drasgow & Dorans 1982; :mod:`scalewright.estimate.polyserial`);
* two continuous items: the Pearson correlation.

Metric.  The model is fitted to this correlation matrix, so every item is
analysed standardized: the ordinal items' latent responses and the
continuous items alike have unit variance.  The continuous items' means
and standard deviations, like the thresholds, are saturated (estimated
first, not modelled), and every estimate involving a continuous item is
in its standardized metric.  A factor model with free loadings and
residual variances is invariant to rescaling the items, so this loses
nothing about the structure; only the continuous items' raw-metric
loadings (standardized loading × SD) are not reported.

Missing answers are handled pairwise, as on the ordinal route: the
thresholds, means and standard deviations come from every answer to the
item, each polychoric or polyserial correlation from the rows answering
both items, and each Pearson correlation from the rows answering both
(with their own means and standard deviations).

Sampling covariance.  The estimate vector is (all thresholds of the
ordinal items, item by item; then the ``p(p−1)/2`` correlations in
``np.triu_indices(p, 1)`` order of all items).  Each element has a
casewise influence ``u_i`` (estimate − truth ≈ mean of ``u_i`` over the n
rows; zero for rows missing its items): the polychoric ones and the
thresholds as in the polychoric module, the polyserial ones with their
first-step correction as in the polyserial module, and for a Pearson
correlation of the rows answering both items (n_jl of them)

    u_i = (n/n_jl) [z_ij z_il − r (z_ij² + z_il²)/2],

z standardized within those rows (the influence function of the
correlation coefficient, Devlin, Gnanadesikan & Kettenring 1975).  It
needs no first-step correction: the pair's own means and standard
deviations are part of the estimator.  Then ``acov = UᵀU/n²`` holds every
variance and covariance, across kinds of correlation too, and is what
DWLS (:mod:`scalewright.estimate.dwls`) weights by and builds its sandwich
and adjusted statistic from.

References
----------
Olsson, U. (1979). Maximum likelihood estimation of the polychoric
correlation coefficient. Psychometrika 44, 443–460.
Olsson, U., Drasgow, F. & Dorans, N. J. (1982). The polyserial correlation
coefficient. Psychometrika 47, 337–347.
Devlin, S. J., Gnanadesikan, R. & Kettenring, J. R. (1975). Robust
estimation and outlier detection with correlation coefficients.
Biometrika 62, 531–545.
Muthén, B. (1984). A general structural equation model with dichotomous,
ordered categorical, and continuous latent variable indicators.
Psychometrika 49, 115–132.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field

import numpy as np

from scalewright.errors import ScalewrightWarning, StudyError
from scalewright.estimate.polychoric import (
    MIN_PAIR_ROWS,
    ThresholdCorrelationBlocks,
    collapse_sparse_columns,
    ordinal_moments,
    smooth_correlations,
)
from scalewright.estimate.polyserial import continuous_margins, polyserial_pairs

#: what the smoothing note calls the matrix
MIXED_KIND = "mixed (polychoric, polyserial and Pearson)"

# |r| at or above this is a perfect correlation for every practical purpose.
_PERFECT = 1.0 - 1e-10


@dataclass(frozen=True)
class MixedMoments(ThresholdCorrelationBlocks):
    """Thresholds, means and SDs, the mixed correlation matrix and its sampling covariance.

    Attributes
    ----------
    items : tuple of str
        All p items, in column order.
    ordinal : tuple of bool
        Whether each item is ordinal (else continuous).
    categories, thresholds : tuples of ndarray
        Answer values and thresholds of the ordinal items, in item order.
    codes : ndarray of int (n, number of ordinal items)
        The category of every ordinal answer as analysed, after any
        collapsing (as ``OrdinalMoments.codes``: position in its
        ``categories``, -1 for a missing answer).
    means, sds : ndarray
        Mean and ÷ n standard deviation of the continuous items, in item order.
    correlations : ndarray (p, p)
        The correlation matrix, smoothed when ``smoothed``.
    raw_correlations : ndarray (p, p)
        The pairwise estimates before any smoothing.
    n_rows : int
        Rows of the data, n.
    n_pairs : ndarray of int (p, p)
        Rows answering both items (the item itself on the diagonal).
    acov : ndarray (r, r)
        Sampling covariance of (thresholds, correlations), see the module
        docstring; the covariance of the estimates themselves.
    influence : ndarray (n, r)
        Casewise influence contributions.
    smoothed : bool
    smoothing_note : str
    collapse_notes : tuple of str
    """

    items: tuple[str, ...]
    ordinal: tuple[bool, ...]
    categories: tuple[np.ndarray, ...]
    codes: np.ndarray = field(repr=False)
    thresholds: tuple[np.ndarray, ...]
    means: np.ndarray
    sds: np.ndarray
    correlations: np.ndarray
    raw_correlations: np.ndarray
    n_rows: int
    n_pairs: np.ndarray
    acov: np.ndarray = field(repr=False)
    influence: np.ndarray = field(repr=False)
    smoothed: bool
    smoothing_note: str
    collapse_notes: tuple[str, ...]

    @property
    def ordinal_items(self) -> tuple[str, ...]:
        return tuple(it for it, o in zip(self.items, self.ordinal) if o)

    @property
    def continuous_items(self) -> tuple[str, ...]:
        return tuple(it for it, o in zip(self.items, self.ordinal) if not o)

    def subset(self, keep) -> "MixedMoments":
        """These moments restricted to the items ``keep`` (in that order), as
        :meth:`scalewright.estimate.polychoric.OrdinalMoments.subset`: every
        threshold, mean and SD comes from its own item and every correlation
        and its influence from its own pair (module docstring), so on the same
        rows the subset is what :func:`mixed_moments` gives for those items;
        only the smoothing is redone.  The caller checks that the rows are the
        same (every row answers an item of ``keep``)."""
        keep = tuple(keep)
        ordinal = np.array(self.ordinal)
        rank = np.cumsum(ordinal) - 1                       # position among the ordinal items
        c_rank = np.cumsum(~ordinal) - 1                    # … and among the continuous ones
        parts = self.subset_parts(keep, [int(r) if o else None for r, o in zip(rank, ordinal)],
                                  MIXED_KIND)
        where = parts.pop("where")
        kept_ordinal = [int(rank[j]) for j in where if ordinal[j]]
        kept_continuous = [int(c_rank[j]) for j in where if not ordinal[j]]
        return MixedMoments(
            items=keep, ordinal=tuple(bool(ordinal[j]) for j in where),
            categories=tuple(self.categories[k] for k in kept_ordinal),
            codes=self.codes[:, kept_ordinal],
            thresholds=tuple(self.thresholds[k] for k in kept_ordinal),
            means=self.means[kept_continuous], sds=self.sds[kept_continuous],
            n_rows=self.n_rows, **parts)

    def to_dict(self) -> dict:
        """JSON-able summary (no influence or covariance matrices)."""
        p = len(self.items)
        se = np.zeros((p, p))
        jj, ll = np.triu_indices(p, 1)
        se[jj, ll] = se[ll, jj] = self.correlation_se
        return {
            "items": list(self.items),
            "item_types": ["ordinal" if o else "continuous" for o in self.ordinal],
            "correlations": self.raw_correlations.tolist(),
            "correlation_se": se.tolist(),
            "n_pairs": self.n_pairs.tolist(),
            "smoothed": self.smoothed,
            "continuous": {it: {"mean": float(m), "sd": float(s)}
                           for it, m, s in zip(self.continuous_items, self.means, self.sds)},
        }


def mixed_moments(data: np.ndarray, items, ordinal, *, scales=None, collapse_sparse: bool = False,
                  min_count: int = 5) -> MixedMoments:
    """Thresholds, the mixed correlation matrix and its sampling covariance.

    Parameters
    ----------
    data : ndarray (n, p)
        Answers, NaN for missing; whole-number codes in the ordinal columns.
    items : sequence of str
        The p item names.
    ordinal : sequence of bool
        Which items are ordinal.
    scales : sequence of (int, int) or None
        Declared answer range of each item (used for the ordinal ones).
    collapse_sparse, min_count
        Merge sparse categories of the ordinal items first (see
        :func:`scalewright.estimate.polychoric.collapse_sparse_categories`).

    Raises
    ------
    StudyError
        From the polychoric step for an ordinal item or pair; for a
        continuous item with fewer than two answers or one value; for a
        Pearson or polyserial pair with fewer than ``MIN_PAIR_ROWS`` rows
        answering both, whose items do not vary in those rows, or whose
        correlation is ±1.
    """
    data = np.asarray(data, dtype=float)
    items = tuple(items)
    ordinal = np.asarray(ordinal, dtype=bool)
    n, p = data.shape
    if ordinal.size != p or len(items) != p:
        raise ValueError(f"data has {p} columns, {len(items)} names and {ordinal.size} flags")
    scales = [None] * p if scales is None else list(scales)
    o_idx, c_idx = np.flatnonzero(ordinal), np.flatnonzero(~ordinal)
    names_o, names_c = [items[j] for j in o_idx], [items[j] for j in c_idx]

    answers, notes = data[:, o_idx], ()
    if collapse_sparse:
        answers, notes = collapse_sparse_columns(answers, names_o,
                                                 scales=[scales[j] for j in o_idx],
                                                 min_count=min_count)
    part = _ordinal_part(answers, names_o, None if collapse_sparse else [scales[j] for j in o_idx])
    n_thresholds = sum(tau.size for tau in part.thresholds)
    margins = continuous_margins(data[:, c_idx], names_c)

    jj, ll = np.triu_indices(p, 1)
    rank = np.zeros(p, dtype=int)
    rank[o_idx], rank[c_idx] = np.arange(o_idx.size), np.arange(c_idx.size)
    rho = np.zeros(jj.size)
    corr_influence = np.zeros((n, jj.size))

    both_ord = ordinal[jj] & ordinal[ll]
    if both_ord.any():
        pos = _triu_position(o_idx.size)[rank[jj[both_ord]], rank[ll[both_ord]]]
        corr_influence[:, both_ord] = part.influence[:, n_thresholds + pos]
        rho[both_ord] = part.raw[rank[jj[both_ord]], rank[ll[both_ord]]]
    both_cont = ~ordinal[jj] & ~ordinal[ll]
    if both_cont.any():
        r_cc, u_cc = _pearson(data[:, c_idx], names_c)
        pos = _triu_position(c_idx.size)[rank[jj[both_cont]], rank[ll[both_cont]]]
        corr_influence[:, both_cont] = u_cc[:, pos]
        rho[both_cont] = r_cc[pos]
    mixed = ordinal[jj] != ordinal[ll]
    if mixed.any():
        cont = np.repeat(np.arange(c_idx.size), o_idx.size)
        ordi = np.tile(np.arange(o_idx.size), c_idx.size)
        k_max = part.bounds.shape[1] - 1
        pairs = polyserial_pairs(margins.z, np.where(part.codes < 0, k_max, part.codes),
                                 part.bounds, margins.n_obs, cont, ordi, names_c, names_o)
        c_item = np.where(ordinal[jj], ll, jj)[mixed]
        o_item = np.where(ordinal[jj], jj, ll)[mixed]
        pos = rank[c_item] * o_idx.size + rank[o_item]
        corr_influence[:, mixed] = pairs.influence[:, pos]
        rho[mixed] = pairs.rho[pos]

    influence = np.hstack([part.influence[:, :n_thresholds], corr_influence])
    raw = np.eye(p)
    raw[jj, ll] = raw[ll, jj] = rho
    seen = (~np.isnan(data)).astype(float)
    n_pairs = np.rint(seen.T @ seen).astype(int)
    smoothed, note = smooth_correlations(raw, items, kind=MIXED_KIND)
    if note:
        warnings.warn(note, ScalewrightWarning, stacklevel=2)
    return MixedMoments(
        items=items, ordinal=tuple(bool(o) for o in ordinal), categories=part.categories,
        codes=part.codes, thresholds=part.thresholds, means=margins.mean, sds=margins.sd,
        correlations=smoothed, raw_correlations=raw, n_rows=n, n_pairs=n_pairs,
        acov=influence.T @ influence / n ** 2, influence=influence, smoothed=bool(note),
        smoothing_note=note, collapse_notes=notes)


@dataclass(frozen=True)
class _OrdinalPart:
    """The ordinal items' share of the moments, with what the polyserial pairs need
    (``codes`` as ``OrdinalMoments.codes``, -1 for a missing answer)."""

    categories: tuple
    thresholds: tuple
    codes: np.ndarray
    bounds: np.ndarray
    influence: np.ndarray
    raw: np.ndarray


def _ordinal_part(x: np.ndarray, names, scales) -> _OrdinalPart:
    """Thresholds, polychoric correlations and influence of the ordinal columns,
    with their category codes and padded bounds.

    The polychoric module's own smoothing note is dropped here: it is about
    the ordinal block only, and the whole mixed matrix is smoothed (and
    named) afterwards.  Its other warnings pass through.
    """
    n = x.shape[0]
    if not names:
        return _OrdinalPart((), (), np.zeros((n, 0), dtype=np.intp), np.zeros((0, 2)),
                            np.zeros((n, 0)), np.zeros((0, 0)))
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        moments = ordinal_moments(x, tuple(names), scales=scales)
    for w in caught:
        if str(w.message) != moments.smoothing_note:
            warnings.warn(w.message, stacklevel=3)
    k_max = max(c.size for c in moments.categories)
    bounds = np.full((len(names), k_max + 1), np.inf)
    bounds[:, 0] = -np.inf
    for j, tau in enumerate(moments.thresholds):
        bounds[j, 1:tau.size + 1] = tau
    return _OrdinalPart(moments.categories, moments.thresholds, moments.codes, bounds,
                        moments.influence, moments.raw_correlations)


def _triu_position(m: int) -> np.ndarray:
    """``pos[a, b]``: the index of pair (a, b), a < b, in ``np.triu_indices(m, 1)`` order."""
    pos = np.zeros((m, m), dtype=int)
    pos[np.triu_indices(m, 1)] = np.arange(m * (m - 1) // 2)
    return pos


def _pearson(x: np.ndarray, names) -> tuple[np.ndarray, np.ndarray]:
    """Pairwise Pearson correlations of the columns of ``x`` and their influence (n, pairs).

    Each pair uses the rows answering both items, with those rows' means
    and ÷ n standard deviations (see the module docstring).
    """
    n, c = x.shape
    jj, ll = np.triu_indices(c, 1)
    both = ~np.isnan(x[:, jj]) & ~np.isnan(x[:, ll])
    n_both = both.sum(axis=0)
    short = np.flatnonzero(n_both < MIN_PAIR_ROWS)
    if short.size:
        listed = "; ".join(f"'{names[jj[s]]}' and '{names[ll[s]]}' ({n_both[s]} rows)"
                           for s in short[:5])
        raise StudyError(
            f"Too few respondents answered both items of a pair of continuous items: {listed}. "
            f"A correlation needs at least {MIN_PAIR_ROWS} rows observed on both items. Check the "
            "missing-value codes of these items, or leave one item of each pair out of the model.")
    a = np.where(both, x[:, jj], 0.0)
    b = np.where(both, x[:, ll], 0.0)
    a = np.where(both, a - a.sum(axis=0) / n_both, 0.0)
    b = np.where(both, b - b.sum(axis=0) / n_both, 0.0)
    sd_a, sd_b = np.sqrt((a * a).sum(axis=0) / n_both), np.sqrt((b * b).sum(axis=0) / n_both)
    for sd, other, which in ((sd_a, ll, jj), (sd_b, jj, ll)):
        flat = np.flatnonzero(sd == 0)
        if flat.size:
            s = flat[0]
            raise StudyError(
                f"Item '{names[which[s]]}' (continuous) has the same answer in all {n_both[s]} "
                f"rows that also answered '{names[other[s]]}', so the correlation of the two is "
                "undefined. Check the missing-value codes of both items, or leave one of them "
                "out of the model.")
    za, zb = a / sd_a, b / sd_b
    r = (za * zb).sum(axis=0) / n_both
    perfect = np.flatnonzero(np.abs(r) >= _PERFECT)
    if perfect.size:
        s = perfect[0]
        raise StudyError(
            f"Items '{names[jj[s]]}' and '{names[ll[s]]}' (continuous) are perfectly correlated "
            f"(r = {r[s]:+.0f}) in the {n_both[s]} rows that answered both: one is a copy or a "
            "rescaling of the other. Leave one of the two items out of the model.")
    influence = (n / n_both) * (za * zb - r * (za ** 2 + zb ** 2) / 2.0)
    return r, np.where(both, influence, 0.0)
