"""Split the answers into the groups named by the grouping column.

One job: from :class:`~scalewright.itemdata.ItemData` (whose ``group`` holds
each row's group label, None where the grouping column is empty or a
missing-answer code) to the per-group moments a multi-group model is fitted
to, with the checks a group comparison needs:

* rows without a group are dropped and counted (``n_group_missing``);
* with full-information ML every row with at least one answer counts; with
  listwise deletion only the rows that answer every item of the model (both
  are counted in :meth:`GroupedData.dropped`);
* at least two groups must remain;
* every group needs more people than the model has items: with ``n_g ≤ p``
  the group's covariance matrix is singular, so its normal likelihood is
  undefined and nothing can be estimated in that group;
* an item must vary within every group: an item that is constant in one
  group has zero variance there, which also makes that group's covariance
  matrix singular.

More than 10 groups without ``allow_many: true`` is refused earlier, when the
data are read (:func:`scalewright.itemdata.read_items`).

The reference group is ``groups: reference`` from the model file, or else the
first label in sorted order; it comes first in every result.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from scalewright.errors import StudyError
from scalewright.estimate.fiml import (independence_fiml, missing_patterns, pattern_blocks,
                                       pattern_moments, saturated_em)
from scalewright.multigroup import GroupMoments, complete_moments
from scalewright.studyfile import format_code

#: why listwise deletion left a row with a group out (a key of ``GroupedData.dropped``)
INCOMPLETE = "incomplete answers (among rows with a group)"


@dataclass(frozen=True)
class GroupedData:
    """The answers of the people who have a group, split by group.

    ``values`` holds their rows (columns in ``items`` order, NaN = no answer)
    and ``index`` the group of each row as a position in ``labels``
    (reference first).
    """

    labels: tuple[str, ...]
    items: tuple[str, ...]
    values: np.ndarray
    index: np.ndarray
    n_group_missing: int      # rows of the file without a group
    where: str                # the data file, for messages

    @property
    def reference(self) -> str:
        return self.labels[0]

    @property
    def ns(self) -> tuple[int, ...]:
        """Rows with a group, per group."""
        return tuple(int(n) for n in np.bincount(self.index, minlength=len(self.labels)))

    @property
    def complete(self) -> np.ndarray:
        """Rows that answer every item."""
        return ~np.isnan(self.values).any(axis=1)

    @property
    def has_missing(self) -> bool:
        return not bool(self.complete.all())

    def moments(self, full_information: bool) -> GroupMoments:
        """What the multi-group model is fitted to: with ``full_information``
        every row with at least one answer (FIML: one block per group and
        missing-data pattern, saturated moments by EM); otherwise the rows
        that answer every item (listwise)."""
        if not full_information:
            keep = self.complete
            return complete_moments(self.labels, self.values[keep], self.index[keep], self.items)
        blocks, means, covs, ns = [], [], [], []
        saturated, independent = 0.0, 0.0
        for g in range(len(self.labels)):
            x = self.values[self.index == g]
            patterns = missing_patterns(x, self.items, self.where)
            pm = pattern_moments(x, patterns)
            em = saturated_em(pm)
            blocks.extend(pattern_blocks(pm, group=g))
            means.append(em.mean)
            covs.append(em.cov)
            ns.append(patterns.n)
            saturated += em.loglik
            independent += independence_fiml(x)[0]
        p = len(self.items)
        baseline = (2.0 * (saturated - independent), len(self.labels) * p * (p - 1) // 2)
        return GroupMoments(self.labels, tuple(ns), tuple(means), tuple(covs), tuple(blocks),
                            saturated, baseline, full_information=True,
                            values=tuple(self.values[self.index == g]
                                         for g in range(len(self.labels))), items=self.items)

    def dropped(self, full_information: bool) -> dict:
        """Rows left out, by reason (for the report)."""
        answered = ~np.isnan(self.values)
        lost = (~answered.any(axis=1)) if full_information else ~self.complete
        reason = "no answer to any item" if full_information else INCOMPLETE
        return {"no group": self.n_group_missing, reason: int(lost.sum())}


def split_groups(study, data, items, full_information: bool = True) -> GroupedData:
    """The complete answers to ``items``, split by the study's grouping column.

    Parameters
    ----------
    study : Study
        Its ``groups`` (:class:`~scalewright.studyfile.GroupSpec`) names the
        column and the reference group.
    data : ItemData
        The answers; ``data.group`` holds the group label of every row.
    items : sequence of str
        The items of the model to be compared across groups.
    full_information : bool
        Whether the model will be fitted by FIML (every row with an answer
        counts) or to complete rows only; the size checks count accordingly.

    Raises
    ------
    StudyError
        When the study has no grouping column, fewer than two groups have
        complete answers, a group has no more people than the model has
        items, or an item is constant within a group.
    """
    spec = study.groups
    if spec is None or data.group is None:
        raise StudyError(
            f"{study.path.name}: a group comparison needs a grouping column, and the model "
            "file has no 'groups:' section. Add one, e.g. groups: {column: phase}.")
    place = study.place_of("groups", "column")
    items = tuple(items)
    column = {item: j for j, item in enumerate(data.items)}
    x = data.values[:, [column[i] for i in items]]
    has_group = ~pd.isna(data.group)
    present = sorted({str(g) for g in np.unique(data.group[has_group].astype(str))})
    reference = spec.reference if spec.reference is not None else (present[0] if present else None)
    labels = tuple([reference] + [g for g in present if g != reference]) if present else ()
    found, inverse = np.unique(data.group[has_group].astype(str), return_inverse=True)
    index = np.array([labels.index(label) for label in found], dtype=np.intp)[inverse]
    values = x[has_group]
    missing = np.isnan(values)
    use = ~missing.all(axis=1) if full_information else ~missing.any(axis=1)
    if len(labels) < 2:
        raise StudyError(
            f"{place}: the grouping column '{spec.column}' holds "
            f"{'only the group ' + repr(labels[0]) if labels else 'no group at all'} among the "
            "rows with answers, so there is nothing to compare. Check the column, or remove "
            "the 'groups:' section.")
    _check_sizes(spec, place, labels, np.bincount(index[use], minlength=len(labels)),
                 len(items), full_information)
    _check_variation(spec, place, labels, items, values[use], index[use])
    return GroupedData(labels, items, values, index, int(data.n_group_missing),
                       str(study.data.place))


def _check_sizes(spec, place, labels, ns, p, full_information) -> None:
    small = np.flatnonzero(ns <= p)
    if small.size:
        listed = ", ".join(f"'{labels[g]}' has {ns[g]}" for g in small)
        raise StudyError(
            f"{place}: in the grouping column '{spec.column}', group {listed} "
            f"{'person' if ns[small[0]] == 1 else 'people'} "
            f"{'with at least one answer' if full_information else 'with complete answers'}; "
            "each group "
            f"needs at least {p + 1} (one more than the model's {p} items), because with fewer "
            "people the group's covariance matrix is singular and the model cannot be "
            "estimated in that group. Merge the group with a similar one (give them one "
            "label under groups: labels), or leave it out of the comparison.")


def _check_variation(spec, place, labels, items, values, index) -> None:
    lows = np.array([np.nanmin(values[index == g], axis=0) for g in range(len(labels))])
    highs = np.array([np.nanmax(values[index == g], axis=0) for g in range(len(labels))])
    constant = np.argwhere(lows == highs)   # (group, item) pairs
    if constant.size:
        g, j = constant[0]
        raise StudyError(
            f"{place}: in group '{labels[g]}' (grouping column '{spec.column}') everyone gave "
            f"the same answer ({format_code(float(lows[g, j]))}) to the item '{items[j]}', so "
            "the item has no variance in that group and the group's model cannot be "
            "estimated. Leave the item out of the group comparison, or merge the group "
            "with a similar one.")
