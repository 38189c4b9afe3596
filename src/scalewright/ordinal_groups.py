"""Ordinal answers split by group: each group's thresholds, polychoric
correlations and their sampling covariance, with the checks a comparison of
thresholds needs.

One job: from the answers of the people who have a group
(:class:`~scalewright.groups.GroupedData`) to one
:class:`~scalewright.estimate.polychoric.OrdinalMoments` per group
(two-step estimates, Olsson 1979; sampling covariance, Muthén 1984), which
the multi-group DWLS fit of :mod:`scalewright.multigroup_ordinal` stacks.

Checks (each a :class:`~scalewright.errors.StudyError` naming the group):

* every group must use every answer category of every item: a threshold
  between two categories is defined in a group only when both sides of it
  have answers there, so thresholds can be compared across groups only on
  the categories every group uses.  With ``collapse_sparse: true`` (the
  model file's existing option) categories are merged *the same way in every
  group* (:func:`collapse_across_groups`) until each has at least
  ``min_count`` answers in every group;
* every pair of items needs :data:`~scalewright.estimate.polychoric.MIN_PAIR_ROWS`
  rows answering both *within each group* (the polychoric module's own floor,
  applied per group);
* anything else the polychoric step refuses (a pair whose correlation
  reaches ±1 in one group, …) is repeated with the group's name in front.

References
----------
Olsson, U. (1979). Maximum likelihood estimation of the polychoric
correlation coefficient. Psychometrika 44, 443–460.
Muthén, B. (1984). A general structural equation model with dichotomous,
ordered categorical, and continuous latent variable indicators.
Psychometrika 49, 115–132.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from scalewright.errors import StudyError
from scalewright.estimate.polychoric import MIN_PAIR_ROWS, OrdinalMoments, ordinal_moments
from scalewright.estimate.polychoric import _merge_neighbour as merge_neighbour
from scalewright.studyfile import format_code

#: fewest answers a category keeps in every group when sparse categories are merged
#: (the single-group route's value: common practice, no source)
MIN_COUNT = 5


@dataclass(frozen=True)
class OrdinalGroupMoments:
    """Per group (reference first): sizes and ordinal moments of the same
    items with the same answer categories."""

    labels: tuple[str, ...]
    ns: tuple[int, ...]
    moments: tuple[OrdinalMoments, ...]
    notes: tuple[str, ...]          # merges, sparse categories left as they are, smoothing

    @property
    def items(self) -> tuple[str, ...]:
        return self.moments[0].items

    @property
    def n(self) -> int:
        return int(sum(self.ns))

    @property
    def n_categories(self) -> tuple[int, ...]:
        return tuple(c.size for c in self.moments[0].categories)

    def statistics(self, g: int) -> np.ndarray:
        """Group ``g``'s estimate vector: thresholds item by item, then the
        pairwise polychoric correlations in ``np.triu_indices(p, 1)`` order
        (the order of ``OrdinalMoments.acov``)."""
        m = self.moments[g]
        rows, cols = np.triu_indices(len(m.items), 1)
        return np.concatenate([*m.thresholds, m.raw_correlations[rows, cols]])

    def pooled_correlations(self) -> np.ndarray:
        """The (smoothed) polychoric matrices averaged with weights ``n_g``, for start values."""
        return sum(n * m.correlations for n, m in zip(self.ns, self.moments)) / self.n


def ordinal_group_moments(labels, values: np.ndarray, index: np.ndarray, items,
                          *, scale=None, collapse_sparse: bool = False, column: str = "",
                          place="", min_count: int = MIN_COUNT) -> OrdinalGroupMoments:
    """Thresholds, polychoric correlations and their sampling covariance per group.

    Parameters
    ----------
    labels : sequence of str
        Group labels, reference first.
    values : ndarray, n × p
        Whole-number answers (NaN = no answer) of the rows used.
    index : ndarray of int
        Each row's group as a position in ``labels``.
    items : sequence of str
        Column names of ``values``.
    scale : (lowest, highest) or None
        The declared answer range of every item (``items: scale``).
    collapse_sparse : bool
        The model file's ``collapse_sparse``: merge sparse categories the same
        way in every group instead of refusing a category a group never used.
    column, place
        The grouping column and the model file place, for messages.
    min_count : int
        See :func:`collapse_across_groups`.

    Raises
    ------
    StudyError
        A group that never uses a category of an item (without
        ``collapse_sparse``), a group with too few rows for a polychoric
        correlation, or anything :func:`ordinal_moments` refuses in a group.
    """
    labels, items = tuple(labels), tuple(items)
    x = np.array(values, dtype=float)
    _require_pair_rows(x, index, labels, items, column, place)
    if collapse_sparse:
        x, notes = collapse_across_groups(x, index, labels, items, scale, min_count)
    else:
        _require_every_category(x, index, labels, items, scale, column, place)
        notes = _sparse_notes(x, index, labels, items, min_count)
    # after merging, the declared range no longer lists the categories
    scales = None if scale is None or collapse_sparse else [tuple(scale)] * len(items)
    moments = []
    for g, label in enumerate(labels):
        try:
            moments.append(ordinal_moments(x[index == g], items, scales=scales))
        except StudyError as err:
            raise StudyError(f"{place}: in group '{label}' (grouping column '{column}'): "
                             f"{err}") from None
    notes += [f"In group '{label}': {m.smoothing_note} The model was fitted to the pairwise "
              "estimates as they are; the smoothed matrix gave only start values."
              for label, m in zip(labels, moments) if m.smoothed]
    ns = tuple(int(n) for n in np.bincount(index, minlength=len(labels)))
    return OrdinalGroupMoments(labels, ns, tuple(moments), tuple(notes))


def category_counts(x: np.ndarray, index: np.ndarray, n_groups: int, categories: np.ndarray
                    ) -> np.ndarray:
    """Answers per group and category of one item, ``n_groups × K`` (NaN not counted)."""
    seen = ~np.isnan(x)
    code = np.searchsorted(categories, x[seen])
    return np.bincount(index[seen] * categories.size + code,
                       minlength=n_groups * categories.size).reshape(n_groups, categories.size)


def _categories(x: np.ndarray, scale) -> np.ndarray:
    """The answer categories of one item: the declared range, or the values anyone used."""
    if scale is not None:
        return np.arange(scale[0], scale[1] + 1, dtype=float)
    return np.unique(x[~np.isnan(x)])


def collapse_across_groups(x: np.ndarray, index: np.ndarray, labels, items, scale,
                           min_count: int = MIN_COUNT) -> tuple[np.ndarray, list[str]]:
    """Merge sparse categories the same way in every group.

    For each item, the category whose *smallest* count over the groups is
    lowest is merged into the neighbour with fewer answers in that sense (on
    a tie, the one nearer the middle of the scale), as the single-group
    ``collapse_sparse`` does with the whole sample
    (:func:`scalewright.estimate.polychoric.collapse_sparse_categories`);
    this repeats until every category has ``min_count`` answers in every
    group or two categories are left.  Merged answers take the neighbour's
    value.  Returns the recoded answers and one note per item changed.
    """
    x = x.copy()
    notes = []
    for j, item in enumerate(items):
        col = x[:, j]
        categories = _categories(col, scale)
        counts = category_counts(col, index, len(labels), categories)
        live = list(range(categories.size))
        target = categories.copy()
        merges = []
        while len(live) > 2:
            smallest = counts[:, live].min(axis=0)
            if smallest.min() >= min_count:
                break
            i = int(np.argmin(smallest))
            k = merge_neighbour(i, smallest.tolist())
            g = int(np.argmin(counts[:, live[i]]))
            merges.append(f"{format_code(categories[live[i]])} (fewest in '{labels[g]}': "
                          f"{counts[g, live[i]]}) into {format_code(categories[live[k]])}")
            target[target == categories[live[i]]] = categories[live[k]]
            counts[:, live[k]] += counts[:, live[i]]
            live.pop(i)
        if merges:
            seen = ~np.isnan(col)
            col[seen] = target[np.searchsorted(categories, col[seen])]
            notes.append(f"Item '{item}': categories with fewer than {min_count} answers in some "
                         f"group were merged into a neighbouring category in every group, so "
                         f"that all groups keep the same categories: {'; '.join(merges)}.")
    return x, notes


def _require_every_category(x, index, labels, items, scale, column, place) -> None:
    for j, item in enumerate(items):
        categories = _categories(x[:, j], scale)
        counts = category_counts(x[:, j], index, len(labels), categories)
        unused = np.argwhere(counts == 0)
        if not unused.size:
            continue
        g, k = unused[0]
        tally = ", ".join(f"{format_code(c)}: {n}" for c, n in zip(categories, counts[g]))
        others = [f"'{labels[h]}' {counts[h, k]}" for h in range(len(labels)) if h != g]
        raise StudyError(
            f"{place}: in group '{labels[g]}' (grouping column '{column}') nobody answered "
            f"{format_code(categories[k])} to item '{item}' (answers per category in "
            f"'{labels[g]}': {tally}; answers of {format_code(categories[k])} in the other "
            f"groups: {', '.join(others)}). Thresholds can be compared across groups only when "
            f"every group uses every category, because a threshold is not defined in a group "
            f"where one side of it is empty. Set collapse_sparse: true under items: in "
            f"the model file to merge sparse categories into a neighbour the same way in every "
            f"group, or leave '{item}' out of the model.")


def _sparse_notes(x, index, labels, items, min_count) -> list[str]:
    """One sentence per item with a category used fewer than ``min_count``
    times in some group, offering to merge it."""
    out = []
    for j, item in enumerate(items):
        categories = _categories(x[:, j], None)
        counts = category_counts(x[:, j], index, len(labels), categories)
        sparse = np.argwhere(counts < min_count)
        if sparse.size:
            listed = ", ".join(f"{format_code(categories[k])} in '{labels[g]}' ({counts[g, k]})"
                               for g, k in sparse)
            out.append(f"Item '{item}' has sparse categories within groups: {listed}. Their "
                       f"thresholds rest on fewer than {min_count} answers in that group; to "
                       "merge them into a neighbouring category in every group, set "
                       "collapse_sparse: true under items: in the model file.")
    return out


def _require_pair_rows(x, index, labels, items, column, place) -> None:
    """Every pair of items answered together by ``MIN_PAIR_ROWS`` rows in every group."""
    answered = (~np.isnan(x)).astype(float)
    rows, cols = np.triu_indices(len(items), 1)
    for g, label in enumerate(labels):
        a = answered[index == g]
        both = (a.T @ a)[rows, cols]
        short = np.flatnonzero(both < MIN_PAIR_ROWS)
        if short.size:
            s = short[0]
            raise StudyError(
                f"{place}: group '{label}' (grouping column '{column}') is too small for "
                f"polychoric correlations: it has {int(a.any(axis=1).sum())} people with "
                f"answers, and only {int(both[s])} of them answered both '{items[rows[s]]}' and "
                f"'{items[cols[s]]}'"
                + (f" ({short.size} pairs are short)" if short.size > 1 else "")
                + f"; each group needs at least {MIN_PAIR_ROWS} people answering both items of "
                "every pair. Merge the group with a similar one (give them one label under "
                "groups: labels), or leave it out of the comparison.")
