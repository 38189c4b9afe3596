"""Ordinal items: thresholds, polychoric correlations and their sampling covariance.

The two-step estimator of Olsson (1979): each item's thresholds come from its
own margin, then the correlation of every item pair maximises the bivariate
multinomial likelihood with those thresholds held fixed.  All pairs are solved
together, in lock-step, by a safeguarded Newton iteration on arrays.

The sampling covariance of the stacked vector (thresholds, correlations) is
built from casewise influence contributions of the estimating equations, which
is the sandwich form behind robust standard errors and the mean-and-variance
adjusted test of diagonally weighted least squares (Muthen 1984; Muthen, du
Toit & Spisic 1997).

References
----------
Olsson, U. (1979). Maximum likelihood estimation of the polychoric correlation
coefficient. *Psychometrika*, 44, 443-460.

Muthen, B. (1984). A general structural equation model with dichotomous,
ordered categorical, and continuous latent variable indicators.
*Psychometrika*, 49, 115-132.

Muthen, B., du Toit, S. H. C., & Spisic, D. (1997). Robust inference using
weighted least squares and quadratic estimating equations in latent variable
modeling with categorical and continuous outcomes. Unpublished technical
report.
"""

import warnings
from dataclasses import dataclass, field

import numpy as np
from scipy.special import ndtr, ndtri

from scalewright.errors import ConvergenceWarning, ScalewrightWarning, StudyError
from scalewright.estimate.bivariate_normal import bvn_cdf, bvn_cdf_dh, bvn_pdf, bvn_pdf_drho

#: More distinct answers than this and an item is better treated as continuous
#: (Rhemtulla, Brosseau-Liard & Savalei 2012 found five or more categories
#: already behave nearly continuously; ten is a generous ceiling: common
#: practice, no source).
MAX_CATEGORIES = 10

#: Fewest rows observed on both items of a pair for a polychoric correlation
#: (common practice, no source: below this a K x K table is mostly empty).
MIN_PAIR_ROWS = 10

#: Eigenvalue floor used when smoothing a matrix that is not positive definite.
#: It keeps the condition number of the smoothed matrix below about p * 1e6, so
#: an inverse in the estimation engine keeps nine or more significant digits
#: (common practice, no source).
MIN_EIGENVALUE = 1e-6

# The correlation search stays inside (-1, 1) by this margin; an estimate that
# ends on the margin is a correlation of +-1 for every practical purpose.
_RHO_BOUND = 1.0 - 1e-6
# Newton steps below this size end the search: far below any reported digit.
_RHO_TOL = 1e-10
# Bisection alone halves the bracket each step, so 100 steps always suffice.
_MAX_ITER = 100


class ThresholdCorrelationBlocks:
    """The blocks of ``acov`` (thresholds first, then the p* correlations)
    and what follows from them, and the shared part of a subset, for the
    moments of :class:`OrdinalMoments` and
    :class:`scalewright.estimate.mixed.MixedMoments`."""

    @property
    def n_thresholds(self) -> int:
        """Number of thresholds, the length of the first block of ``acov``."""
        return sum(t.size for t in self.thresholds)

    @property
    def threshold_slices(self) -> tuple[slice, ...]:
        """Position of each item's thresholds in the estimate vector."""
        ends = np.cumsum([t.size for t in self.thresholds])
        return tuple(slice(int(e - t.size), int(e)) for e, t in zip(ends, self.thresholds))

    @property
    def acov_thresholds(self) -> np.ndarray:
        """Sampling covariance of the thresholds (block of ``acov``)."""
        t = self.n_thresholds
        return self.acov[:t, :t]

    @property
    def acov_corr(self) -> np.ndarray:
        """Sampling covariance of the p* correlations, ``np.triu_indices`` order.

        It includes the uncertainty of the thresholds on which each
        correlation was conditioned (Muthen 1984; Olsson 1979, section 4).
        """
        t = self.n_thresholds
        return self.acov[t:, t:]

    @property
    def correlation_se(self) -> np.ndarray:
        """Standard errors of the p* correlations, ``np.triu_indices`` order."""
        return np.sqrt(np.diag(self.acov_corr))

    @property
    def threshold_se(self) -> tuple[np.ndarray, ...]:
        """Standard errors of the thresholds, item by item."""
        se = np.sqrt(np.diag(self.acov_thresholds))
        return tuple(se[s] for s in self.threshold_slices)

    def subset_parts(self, keep: tuple[str, ...], threshold_index, kind: str = "polychoric"
                     ) -> dict:
        """What a subset of these moments to the items ``keep`` (in that order)
        shares between the ordinal and mixed moments (their ``subset``):
        ``where`` (the kept items' positions), ``acov`` and ``influence``
        restricted to the kept estimates, the kept ``raw_correlations``, the
        smoothing redone (``correlations``, ``smoothed``, ``smoothing_note``)
        and the kept items' ``collapse_notes``, in ``keep`` order.

        ``threshold_index[j]`` is item ``j``'s entry in ``thresholds`` (None
        for an item without thresholds).  The estimate vector of a fresh
        estimation on the kept items holds their thresholds, then the
        correlations of their pairs in ``np.triu_indices`` order."""
        where = np.array([self.items.index(it) for it in keep], dtype=np.intp)
        p_old = len(self.items)
        pair_position = np.zeros((p_old, p_old), dtype=np.intp)
        jj_old, ll_old = np.triu_indices(p_old, 1)
        pair_position[jj_old, ll_old] = self.n_thresholds + np.arange(jj_old.size)
        jj, ll = np.triu_indices(len(where), 1)
        pairs = pair_position[np.minimum(where[jj], where[ll]), np.maximum(where[jj], where[ll])]
        slices = self.threshold_slices
        owned = [slices[threshold_index[j]] for j in where if threshold_index[j] is not None]
        position = np.concatenate([np.arange(s.start, s.stop, dtype=np.intp) for s in owned]
                                  + [pairs])
        raw = self.raw_correlations[np.ix_(where, where)]
        smoothed, note = smooth_correlations(raw, keep, kind=kind)
        if note:
            warnings.warn(note, ScalewrightWarning, stacklevel=3)
        return {
            "where": where, "acov": self.acov[np.ix_(position, position)],
            "influence": self.influence[:, position], "raw_correlations": raw,
            "correlations": smoothed, "smoothed": bool(note), "smoothing_note": note,
            "n_pairs": self.n_pairs[np.ix_(where, where)],
            # one note per merged item, each opening with "Item '<name>':"
            # (collapse_sparse_categories)
            "collapse_notes": tuple(n for it in keep for n in self.collapse_notes
                                    if n.startswith(f"Item '{it}':")),
        }

    @property
    def dwls_weights(self) -> np.ndarray:
        """Diagonal DWLS weights of the p* correlations: 1 / Var(rho_hat).

        Muthen, du Toit & Spisic (1997) weight the residuals by the inverse
        diagonal of Gamma; these weights are that diagonal divided by n
        (the inverse variances of the estimates), which changes the fit
        function by the constant factor n and the estimates not at all.
        """
        return 1.0 / np.diag(self.acov_corr)


@dataclass(frozen=True)
class OrdinalMoments(ThresholdCorrelationBlocks):
    """Thresholds and polychoric correlations of p ordinal items.

    Attributes
    ----------
    items : tuple of str
        Item names, in column order.
    categories : tuple of numpy.ndarray
        The answer values of each item, ascending (after any collapsing).
    codes : numpy.ndarray of int, shape (n, p)
        The category of every answer as analysed: its position 0 .. K_j - 1
        in ``categories[j]`` after any collapsing, -1 for a missing answer.
        Whatever later reads an item's categories (sum-score ranks, category
        counts) reads these, not the raw answers, in which a merged
        category still has its own value.
    thresholds : tuple of numpy.ndarray
        tau_j,c = Phi^-1(proportion of answers at or below category c) for
        c = 1 .. K_j - 1 (K_j categories give K_j - 1 thresholds).
    correlations : numpy.ndarray, shape (p, p)
        Polychoric correlation matrix with unit diagonal; the smoothed matrix
        when ``smoothed`` is true.
    raw_correlations : numpy.ndarray, shape (p, p)
        The pairwise estimates before any smoothing.
    n_rows : int
        Rows of the data, n.
    n_pairs : numpy.ndarray of int, shape (p, p)
        Rows observed on both items (on the item itself on the diagonal).
    acov : numpy.ndarray, shape (r, r)
        Estimated sampling covariance matrix of the estimate vector
        (all thresholds, item by item in ascending order, then the
        p* = p(p-1)/2 correlations in the order of ``np.triu_indices(p, 1)``),
        r = (number of thresholds) + p*.  It is the covariance of the
        estimates themselves, ``influence.T @ influence / n**2``: no factor n
        needs to be applied.  The asymptotic covariance matrix of
        sqrt(n) times the estimates (Gamma in Muthen 1984) is ``n_rows * acov``.
    influence : numpy.ndarray, shape (n, r)
        Casewise influence contributions: the estimates minus their
        population values are approximately ``influence.mean(axis=0)``.
        Rows with missing answers contribute zero to the parameters of the
        missing items.
    smoothed : bool
        Whether ``correlations`` had to be smoothed to be positive definite.
    smoothing_note : str
        What the smoothing did and which items it changed most; empty if
        nothing was smoothed.
    collapse_notes : tuple of str
        One note per item whose sparse categories were merged.
    """

    items: tuple[str, ...]
    categories: tuple[np.ndarray, ...]
    codes: np.ndarray = field(repr=False)
    thresholds: tuple[np.ndarray, ...]
    correlations: np.ndarray
    raw_correlations: np.ndarray
    n_rows: int
    n_pairs: np.ndarray
    acov: np.ndarray = field(repr=False)
    influence: np.ndarray = field(repr=False)
    smoothed: bool
    smoothing_note: str
    collapse_notes: tuple[str, ...]

    def subset(self, keep) -> "OrdinalMoments":
        """These moments restricted to the items ``keep`` (in that order).

        Thresholds come from each item's margin and each polychoric
        correlation from its own pair's table (two-step estimation), and each
        estimate's casewise influence involves only its own items, so the
        subset is what :func:`ordinal_moments` gives for those items on the
        same rows: the same estimates and the corresponding block of
        ``acov``.  Only the smoothing, which reads the whole matrix, is redone.
        The rows are these moments' ``n_rows``; :func:`ordinal_moments` on the
        subset's columns agrees when every row answers at least one item of
        ``keep`` (a row answering none is dropped before estimation), which
        the caller checks."""
        keep = tuple(keep)
        parts = self.subset_parts(keep, range(len(self.items)))
        where = parts.pop("where")
        return OrdinalMoments(
            items=keep, categories=tuple(self.categories[j] for j in where),
            codes=self.codes[:, where], thresholds=tuple(self.thresholds[j] for j in where),
            n_rows=self.n_rows, **parts)

    def to_dict(self) -> dict:
        """JSON-able summary (no influence or covariance matrices)."""
        return {
            "items": list(self.items),
            "categories": [c.tolist() for c in self.categories],
            "thresholds": [t.tolist() for t in self.thresholds],
            "threshold_se": [s.tolist() for s in self.threshold_se],
            "correlations": self.correlations.tolist(),
            "raw_correlations": self.raw_correlations.tolist(),
            "correlation_se": self.correlation_se.tolist(),
            "n_rows": self.n_rows,
            "n_pairs": self.n_pairs.tolist(),
            "smoothed": self.smoothed,
            "smoothing_note": self.smoothing_note,
            "collapse_notes": list(self.collapse_notes),
        }


def thresholds(x: np.ndarray, *, item: str = "item", scale=None) -> tuple[np.ndarray, np.ndarray]:
    """Answer categories and thresholds of one ordinal item.

    tau_c = Phi^-1(P_c), with P_c the proportion of observed answers in
    categories 1 .. c (Olsson 1979, eq. 8).  Missing answers (NaN) are left
    out of the proportions.

    Parameters
    ----------
    x : numpy.ndarray, shape (n,)
        Whole-number answer codes, NaN for missing.
    item : str
        Item name used in error messages.
    scale : tuple of int, optional
        Declared response range (lowest, highest); every value in it must
        have been used.

    Returns
    -------
    categories : numpy.ndarray
        Observed answer values, ascending (K of them).
    tau : numpy.ndarray
        The K - 1 thresholds, ascending.

    Raises
    ------
    StudyError
        All answers missing, answers that are not whole numbers, more than
        ``MAX_CATEGORIES`` distinct answers, a single answer value, or (with
        ``scale``) an answer outside the range or a category nobody used.

    References
    ----------
    Olsson, U. (1979). Maximum likelihood estimation of the polychoric
    correlation coefficient. *Psychometrika*, 44, 443-460.
    """
    categories, counts = _observed_categories(np.asarray(x, dtype=float), item, scale)
    if scale is not None:
        _require_all_used(categories, counts, item, scale)
    _require_two_categories(categories, counts, item)
    return categories, ndtri(np.cumsum(counts)[:-1] / counts.sum())


def collapse_sparse_categories(
    x: np.ndarray, min_count: int = 5, *, item: str = "item", scale=None
) -> tuple[np.ndarray, str]:
    """Merge answer categories used fewer than ``min_count`` times into a neighbour.

    The sparsest category is merged into whichever adjacent category has fewer
    answers (on a tie, the one nearer the middle of the scale), and this repeats
    until every category has ``min_count`` answers or only two are left.
    Merged answers take the neighbour's value, so the codes stay on the
    declared scale.  With ``scale``, declared values nobody used are merged
    too (they have zero answers).

    Parameters
    ----------
    x : numpy.ndarray, shape (n,)
        Whole-number answer codes, NaN for missing.
    min_count : int
        Fewest answers a category must have to stand on its own (five is a
        common choice: common practice, no source).
    item : str
        Item name for the note and for error messages.
    scale : tuple of int, optional
        Declared response range (lowest, highest).

    Returns
    -------
    x : numpy.ndarray
        The recoded answers (a new array).
    note : str
        What was merged into what, or an empty string if nothing was.
    """
    x = np.asarray(x, dtype=float)
    categories, counts = _observed_categories(x, item, scale)
    if scale is not None:
        declared = np.arange(scale[0], scale[1] + 1, dtype=float)
        counts = _counts_on(declared, categories, counts)
        categories = declared
    target = categories.copy()
    merges = []
    live = list(range(categories.size))
    live_counts = counts.astype(int).tolist()
    while len(live) > 2 and min(live_counts) < min_count:
        i = int(np.argmin(live_counts))
        j = _merge_neighbour(i, live_counts)
        merges.append(
            f"{_fmt(categories[live[i]])} ({live_counts[i]} answer"
            f"{'' if live_counts[i] == 1 else 's'}) into {_fmt(categories[live[j]])}"
        )
        target[target == categories[live[i]]] = categories[live[j]]
        live_counts[j] += live_counts.pop(i)
        live.pop(i)
    if not merges:
        return x.copy(), ""
    recoded = x.copy()
    observed = ~np.isnan(x)
    recoded[observed] = target[np.searchsorted(categories, x[observed])]
    note = (
        f"Item '{item}': categories with fewer than {min_count} answers were merged "
        f"into a neighbouring category: {'; '.join(merges)}."
    )
    return recoded, note


def collapse_sparse_columns(
    data: np.ndarray, items, *, scales=None, min_count: int = 5
) -> tuple[np.ndarray, tuple[str, ...]]:
    """Every column of ``data`` through :func:`collapse_sparse_categories`.

    The one place where the model file's ``collapse_sparse: true`` recodes
    answers, so that the moments and everything fitted or computed from the
    same answers afterwards see the same categories.

    Parameters
    ----------
    data : numpy.ndarray, shape (n, p)
        Whole-number answer codes of ordinal items, NaN for missing.
    items : sequence of str
        The p item names.
    scales : sequence of (int, int) or None, optional
        Declared response range of each item (None for an item without one).
    min_count : int
        See ``collapse_sparse_categories``.

    Returns
    -------
    recoded : numpy.ndarray, shape (n, p)
        A new array: merged answers take their neighbour's value.
    notes : tuple of str
        One sentence per item whose categories were merged.
    """
    data = np.asarray(data, dtype=float)
    scales = [None] * data.shape[1] if scales is None else list(scales)
    merged = [collapse_sparse_categories(data[:, j], min_count, item=name, scale=scales[j])
              for j, name in enumerate(items)]
    recoded = np.column_stack([x for x, _ in merged]) if merged else data.copy()
    return recoded, tuple(note for _, note in merged if note)


def ordinal_moments(
    data: np.ndarray,
    items: tuple[str, ...],
    *,
    scales=None,
    collapse_sparse: bool = False,
    min_count: int = 5,
) -> OrdinalMoments:
    """Thresholds, polychoric correlations and their sampling covariance.

    Two-step estimation (Olsson 1979): thresholds tau_j from each item's
    margin, then for every pair (j, l) the correlation rho maximising

        l(rho) = sum_ab n_ab log pi_ab(rho),
        pi_ab = Phi2(tau_j,a, tau_l,b) - Phi2(tau_j,a-1, tau_l,b)
                - Phi2(tau_j,a, tau_l,b-1) + Phi2(tau_j,a-1, tau_l,b-1),

    over the rows observed on both items (pairwise deletion).  All pairs are
    solved together by Newton's method with the analytic derivatives
    dpi/drho from phi2 = dPhi2/drho (Olsson 1979, eq. 11), kept inside a
    bracket by bisection.

    Sampling covariance (Muthen 1984; Muthen, du Toit & Spisic 1997): with n
    rows, n_j rows observed on item j and n_jl on both j and l, the
    casewise influence of row i is

        threshold  u_i,jc = (n / n_j) [1(x_ij <= c) - Phi(tau_jc)] / phi(tau_jc)
        correlation v_i,jl = [(n / n_jl) s_i,jl - sum_t I_rho,t u_i,t] / I_rho,rho

    where s_i,jl = dlog pi_ab / drho for the cell (a, b) of row i, the sum runs
    over the thresholds of j and l, I_rho,rho = sum_ab pi'_ab^2 / pi_ab and
    I_rho,t = sum_ab pi'_ab (dpi_ab / dtau_t) / pi_ab (expected
    information per row), and dPhi2/dh = phi(h) Phi((k - rho h)/sqrt(1-rho^2)).
    Rows missing an item contribute zero to its terms.  Then
    acov = U^T U / n^2 for U = [u, v].

    If the correlation matrix is not positive definite it is smoothed:
    eigenvalues below ``MIN_EIGENVALUE`` are raised to it and the matrix is
    rescaled to unit diagonal; ``smoothing_note`` names the items whose
    correlations changed most and a ``ScalewrightWarning`` repeats it.

    Parameters
    ----------
    data : numpy.ndarray, shape (n, p)
        Whole-number answer codes, NaN for missing.
    items : tuple of str
        The p item names.
    scales : sequence of (int, int) or None, optional
        Declared response range of each item (None for an item without one).
    collapse_sparse : bool
        Merge categories with fewer than ``min_count`` answers into a
        neighbour first (see ``collapse_sparse_categories``).
    min_count : int
        See ``collapse_sparse_categories``.

    Returns
    -------
    OrdinalMoments

    Raises
    ------
    StudyError
        For any item ``thresholds`` rejects; for a pair with fewer than
        ``MIN_PAIR_ROWS`` rows observed on both items; for a pair whose
        correlation reaches +-1.

    References
    ----------
    Olsson, U. (1979). Maximum likelihood estimation of the polychoric
    correlation coefficient. *Psychometrika*, 44, 443-460.

    Muthen, B. (1984). A general structural equation model with dichotomous,
    ordered categorical, and continuous latent variable indicators.
    *Psychometrika*, 49, 115-132.

    Muthen, B., du Toit, S. H. C., & Spisic, D. (1997). Robust inference using
    weighted least squares and quadratic estimating equations in latent
    variable modeling with categorical and continuous outcomes. Technical
    report.
    """
    data = np.asarray(data, dtype=float)
    items = tuple(items)
    if data.ndim != 2 or data.shape[1] != len(items):
        raise ValueError(f"data has shape {data.shape} but {len(items)} item names were given")
    n, p = data.shape
    scales = [None] * p if scales is None else list(scales)

    notes = ()
    if collapse_sparse:
        data, notes = collapse_sparse_columns(data, items, scales=scales, min_count=min_count)
    cats, taus = zip(
        *(
            thresholds(data[:, j], item=name, scale=None if collapse_sparse else scales[j])
            for j, name in enumerate(items)
        )
    )

    k_max = max(c.size for c in cats)
    codes = np.stack([_codes(data[:, j], c, k_max) for j, c in enumerate(cats)], axis=1)
    tables, n_pairs = _pair_tables(codes, k_max)
    jj, ll = np.triu_indices(p, 1)
    _require_pair_rows(n_pairs[jj, ll], jj, ll, items)

    bounds = np.full((p, k_max + 1), np.inf)
    bounds[:, 0] = -np.inf
    for j, tau in enumerate(taus):
        bounds[j, 1 : tau.size + 1] = tau
    rho = _solve_pairs(tables, bounds[jj], bounds[ll], items, jj, ll)
    _require_inside(rho, tables, bounds[jj], bounds[ll], jj, ll, items)

    raw = np.eye(p)
    raw[jj, ll] = raw[ll, jj] = rho
    influence = _influence(codes, bounds, rho, jj, ll, n_pairs, k_max)
    acov = influence.T @ influence / n**2
    smoothed_corr, note = smooth_correlations(raw, items)
    if note:
        warnings.warn(note, ScalewrightWarning, stacklevel=2)
    return OrdinalMoments(
        items=items,
        categories=tuple(cats),
        codes=np.where(codes == k_max, -1, codes),
        thresholds=tuple(taus),
        correlations=smoothed_corr,
        raw_correlations=raw,
        n_rows=n,
        n_pairs=n_pairs,
        acov=acov,
        influence=influence,
        smoothed=bool(note),
        smoothing_note=note,
        collapse_notes=notes,
    )


# --------------------------------------------------------------------------
# Checks on one item


def _observed_categories(x, item, scale):
    """Observed answer values and counts, after the checks every item needs."""
    observed = x[~np.isnan(x)]
    if observed.size == 0:
        raise StudyError(
            f"Item '{item}' has no answers: all {x.size} rows are missing. Check the "
            f"item's column name and its missing-value codes in the model file, or "
            f"leave the item out of the model."
        )
    fractional = observed[observed != np.round(observed)]
    if fractional.size:
        raise StudyError(
            f"Item '{item}' has answers that are not whole numbers (for example "
            f"{fractional[0]:g}), so it cannot be treated as ordinal. Treat '{item}' as "
            f"a continuous item in the model file, or recode it to whole-number "
            f"categories."
        )
    categories, counts = np.unique(observed, return_counts=True)
    if categories.size > MAX_CATEGORIES:
        raise StudyError(
            f"Item '{item}' has {categories.size} different answer values "
            f"({_fmt(categories[0])} to {_fmt(categories[-1])}); ordinal treatment "
            f"allows at most {MAX_CATEGORIES} categories. Treat '{item}' as a "
            f"continuous item in the model file, or recode it into fewer categories."
        )
    if scale is not None:
        outside = categories[(categories < scale[0]) | (categories > scale[1])]
        if outside.size:
            raise StudyError(
                f"Item '{item}' is declared on a {_fmt(scale[0])}-{_fmt(scale[1])} scale but has "
                f"the answer {_fmt(outside[0])}. Correct the declared range, or "
                f"declare {_fmt(outside[0])} as a missing-value code in the model file."
            )
    return categories, counts


def _require_all_used(categories, counts, item, scale):
    declared = np.arange(scale[0], scale[1] + 1, dtype=float)
    unused = declared[~np.isin(declared, categories)]
    if unused.size:
        tally = ", ".join(
            f"{_fmt(v)}: {c}" for v, c in zip(declared, _counts_on(declared, categories, counts))
        )
        raise StudyError(
            f"Item '{item}' is declared on a {_fmt(scale[0])}-{_fmt(scale[1])} scale but nobody "
            f"answered {' or '.join(_fmt(v) for v in unused)} (answers per category: "
            f"{tally}). Every category needs answers for its thresholds: merge "
            f"sparse categories into their neighbours by setting "
            f"collapse_sparse: true under items: in the model file, or correct "
            f"the declared range."
        )


def _require_two_categories(categories, counts, item):
    if categories.size < 2:
        raise StudyError(
            f"Item '{item}' has the same answer ({_fmt(categories[0])}) in all "
            f"{counts[0]} observed rows, so it carries no information about "
            f"correlations. Leave '{item}' out of the model."
        )


def _counts_on(declared, categories, counts):
    """Counts of ``categories`` spread onto the ``declared`` values (0 if unused)."""
    out = np.zeros(declared.size, dtype=int)
    out[np.searchsorted(declared, categories)] = counts
    return out


def _merge_neighbour(i, counts):
    """Index of the neighbour that category ``i`` is merged into."""
    if i == 0:
        return 1
    if i == len(counts) - 1:
        return i - 1
    left, right = counts[i - 1], counts[i + 1]
    if left != right:
        return i - 1 if left < right else i + 1
    middle = (len(counts) - 1) / 2
    return i - 1 if abs(i - 1 - middle) <= abs(i + 1 - middle) else i + 1


def _fmt(value):
    return f"{value:g}"


# --------------------------------------------------------------------------
# Pair tables and checks on pairs


def _codes(x, categories, k_max):
    """Category index 0 .. K-1 of every answer; ``k_max`` marks a missing one."""
    codes = np.full(x.size, k_max, dtype=np.intp)
    observed = ~np.isnan(x)
    codes[observed] = np.searchsorted(categories, x[observed])
    return codes


def _pair_tables(codes, k_max):
    """Contingency tables of all item pairs, (p*, K, K), and rows observed on both.

    With Y the (n, p K) one-hot coding of the answers (all zero for a missing
    answer), Y^T Y holds every pairwise table at once, with pairwise deletion
    built in.
    """
    n, p = codes.shape
    onehot = (codes[:, :, None] == np.arange(k_max)).reshape(n, p * k_max).astype(float)
    cross = (onehot.T @ onehot).reshape(p, k_max, p, k_max).transpose(0, 2, 1, 3)
    n_pairs = np.rint(cross.sum(axis=(2, 3))).astype(int)
    jj, ll = np.triu_indices(p, 1)
    return cross[jj, ll], n_pairs


def _require_pair_rows(counts, jj, ll, items):
    short = np.flatnonzero(counts < MIN_PAIR_ROWS)
    if short.size:
        listed = "; ".join(
            f"'{items[jj[s]]}' and '{items[ll[s]]}' ({counts[s]} rows)" for s in short[:5]
        )
        more = f" and {short.size - 5} more pairs" if short.size > 5 else ""
        raise StudyError(
            f"Too few respondents answered both items of a pair: {listed}{more}. A "
            f"polychoric correlation needs at least {MIN_PAIR_ROWS} rows observed on "
            f"both items. Check the missing-value codes of these items, or leave one "
            f"item of each pair out of the model."
        )


def _require_inside(rho, tables, lower, upper, jj, ll, items):
    """Raise if a pair's likelihood is as high at rho = +-1 as at its estimate.

    That happens when the table is perfectly ordered (for a 2 x 2 table: an
    empty off-diagonal cell); the likelihood then keeps rising towards +-1,
    so slowly near the end that its derivative underflows, and the search
    stops short of the bound.
    """
    here = _log_likelihood(rho, tables, lower, upper)
    edge_value = np.where(rho >= 0, _RHO_BOUND, -_RHO_BOUND)
    at_edge = _log_likelihood(edge_value, tables, lower, upper)
    edge = np.flatnonzero(at_edge >= here - 1e-9 * np.abs(here))
    if edge.size:
        s = edge[0]
        raise StudyError(
            f"The polychoric correlation of items '{items[jj[s]]}' and "
            f"'{items[ll[s]]}' reaches {'+' if rho[s] > 0 else '-'}1: their answers are "
            f"perfectly ordered with each other, which usually means the two items "
            f"are duplicates or a category is almost empty. Leave one of the two "
            f"items out of the model, or merge sparse categories by setting "
            f"collapse_sparse: true under items: in the model file."
        )


# --------------------------------------------------------------------------
# The likelihood of all pairs


def _rectangles(grid):
    """Cell values from a (.., K+1, K+1) grid of corner values (inclusion-exclusion)."""
    return grid[..., 1:, 1:] - grid[..., :-1, 1:] - grid[..., 1:, :-1] + grid[..., :-1, :-1]


def _cell_terms(rho, lower, upper):
    """Cell probabilities pi and dpi/drho, d2pi/drho2 for the pairs, (P, K, K) each."""
    h = lower[:, :, None]
    k = upper[:, None, :]
    r = rho[:, None, None]
    return (
        _rectangles(bvn_cdf(h, k, r)),
        _rectangles(bvn_pdf(h, k, r)),
        _rectangles(bvn_pdf_drho(h, k, r)),
    )


def _log_likelihood(rho, tables, lower, upper):
    """sum_ab n_ab log pi_ab(rho) for every pair; -inf if an occupied cell is impossible."""
    pi = _rectangles(bvn_cdf(lower[:, :, None], upper[:, None, :], rho[:, None, None]))
    used = tables > 0
    with np.errstate(divide="ignore", invalid="ignore"):
        terms = np.where(used, tables * np.log(np.where(used, pi, 1.0)), 0.0)
    return np.where(np.any(used & (pi <= 0), axis=(1, 2)), -np.inf, terms.sum(axis=(1, 2)))


def _solve_pairs(tables, lower, upper, items, jj, ll):
    """Maximise every pair's likelihood in rho, all pairs in lock-step, by
    :func:`rho_search` on l' = sum n pi'/pi and
    l'' = sum n (pi''/pi - (pi'/pi)^2)."""

    def derivatives(active, r):
        pi, d1, d2 = _cell_terms(r, lower[active], upper[active])
        counts = tables[active]
        used = counts > 0
        with np.errstate(divide="ignore", invalid="ignore"):
            ratio = np.where(used, d1 / pi, 0.0)
            grad = np.sum(counts * ratio, axis=(1, 2))
            hess = np.sum(counts * np.where(used, d2 / pi, 0.0) - counts * ratio**2, axis=(1, 2))
        # An occupied cell with no probability left: the likelihood is -inf here,
        # and it rises towards rho = 0.
        return grad, hess, np.any(used & (pi <= 0), axis=(1, 2))

    return rho_search(tables.shape[0], derivatives, "polychoric",
                      lambda s: f"'{items[jj[s]]}'-'{items[ll[s]]}'")


def rho_search(n_pairs: int, derivatives, kind: str, pair_name):
    """Maximise ``n_pairs`` likelihoods in rho in lock-step (the polychoric
    and the polyserial searches).

    ``derivatives(active, r)`` gives, for the pairs ``active`` at ``r``, the
    first and second derivatives l', l'' of the log-likelihood and whether
    it is -inf there (a used cell or row with no probability left; it rises
    towards rho = 0).  Newton steps rho - l'/l''; the sign of l' shrinks a
    bracket [lo, hi] around the root; a Newton step is replaced by bisection
    when it leaves the bracket, when l'' >= 0, or when it is more than half
    the step before last, so the bracket always shrinks (the safeguard of
    ``rtsafe``, Press et al. 2007, section 9.4).  Pairs that do not settle
    within ``_MAX_ITER`` steps are named (``pair_name(index)``) in a
    ConvergenceWarning about the ``kind`` correlation search.

    References
    ----------
    Press, W. H., Teukolsky, S. A., Vetterling, W. T., & Flannery, B. P. (2007).
    *Numerical Recipes* (3rd ed.). Cambridge University Press.
    """
    lo = np.full(n_pairs, -_RHO_BOUND)
    hi = np.full(n_pairs, _RHO_BOUND)
    rho = np.zeros(n_pairs)
    step = np.full(n_pairs, 2.0 * _RHO_BOUND)
    step_before = step.copy()
    active = np.arange(n_pairs)
    for _ in range(_MAX_ITER):
        r = rho[active]
        grad, hess, impossible = derivatives(active, r)
        impossible = impossible | ~np.isfinite(grad)
        grad = np.where(impossible, -np.sign(r), grad)
        lo[active] = np.where(grad > 0, r, lo[active])
        hi[active] = np.where(grad > 0, hi[active], r)
        with np.errstate(divide="ignore", invalid="ignore"):
            newton = -grad / hess
        ok = (
            ~impossible
            & (hess < 0)
            & (r + newton >= lo[active])
            & (r + newton <= hi[active])
            & (2.0 * np.abs(newton) <= np.abs(step_before[active]))
        )
        step_before[active] = step[active]
        step[active] = np.where(ok, newton, (lo[active] + hi[active]) / 2.0 - r)
        rho[active] = r + step[active]
        active = active[np.abs(step[active]) >= _RHO_TOL]
        if active.size == 0:
            return rho
    pairs = ", ".join(pair_name(s) for s in active[:5])
    warnings.warn(
        f"The {kind} correlation search did not settle within {_MAX_ITER} steps "
        f"for {active.size} item pair(s) ({pairs}); their estimates may be inexact.",
        ConvergenceWarning,
        stacklevel=4,
    )
    return rho


# --------------------------------------------------------------------------
# Sampling covariance


def _influence(codes, bounds, rho, jj, ll, n_pairs, k_max):
    """Casewise influence contributions (n, r); see ``ordinal_moments``."""
    n, p = codes.shape
    n_items = np.diag(n_pairs).astype(float)

    # Threshold influence by category: table[j, a, c] for answer code a
    # (row k_max = missing, all zero) and threshold c (zero past K_j - 1).
    tau_pad = bounds[:, 1:k_max]  # (p, K-1), +inf past each item's last threshold
    valid_tau = np.isfinite(tau_pad)
    safe_tau = np.where(valid_tau, tau_pad, 0.0)
    density = np.exp(-safe_tau**2 / 2.0) / np.sqrt(2.0 * np.pi)
    below = np.arange(k_max + 1)[None, :, None] < np.arange(1, k_max)[None, None, :]
    u_table = (below - ndtr(safe_tau)[:, None, :]) / density[:, None, :]
    u_table = np.where(valid_tau[:, None, :], u_table, 0.0) * (n / n_items)[:, None, None]
    u_table[:, k_max, :] = 0.0
    u_rows = u_table[np.arange(p), codes]  # (n, p, K-1)
    u = u_rows[:, valid_tau]  # (n, T), item by item, thresholds ascending

    # Correlation influence by cell, for every pair at once.
    lower, upper = bounds[jj], bounds[ll]
    pi, d1, _ = _cell_terms(rho, lower, upper)
    with np.errstate(divide="ignore", invalid="ignore"):
        q = np.where(pi > 0, d1 / pi, 0.0)  # dlog pi / drho per cell
    info_rr = np.sum(q * d1, axis=(1, 2))
    r = rho[:, None, None]
    # dPhi2(t_a, t_b)/dt_a on the corner grid, then its column differences:
    # dpi_ab/dtau_j,c = (g[c, b+1] - g[c, b]) (1[c = a+1] - 1[c = a]).
    g_j = bvn_cdf_dh(lower[:, :, None], upper[:, None, :], r)
    g_l = bvn_cdf_dh(upper[:, None, :], lower[:, :, None], r)
    dg_j = g_j[:, 1:k_max, 1:] - g_j[:, 1:k_max, :-1]  # (P, K-1, K)
    dg_l = g_l[:, 1:, 1:k_max] - g_l[:, :-1, 1:k_max]  # (P, K, K-1)
    info_rj = np.sum(dg_j * (q[:, :-1, :] - q[:, 1:, :]), axis=2)  # (P, K-1)
    info_rl = np.sum(dg_l * (q[:, :, :-1] - q[:, :, 1:]), axis=1)  # (P, K-1)
    # Threshold correction by answer code: sum_c I_rho,c u_c, per pair.
    corr_j = np.einsum("pac,pc->pa", u_table[jj], info_rj)  # (P, K+1)
    corr_l = np.einsum("pbc,pc->pb", u_table[ll], info_rl)
    n_both = n_pairs[jj, ll].astype(float)
    cell = np.zeros((rho.size, k_max + 1, k_max + 1))
    cell[:, :k_max, :k_max] = (n / n_both)[:, None, None] * q
    cell = (cell - corr_j[:, :, None] - corr_l[:, None, :]) / info_rr[:, None, None]
    flat = cell.reshape(rho.size, (k_max + 1) ** 2).T
    v = np.take_along_axis(flat, codes[:, jj] * (k_max + 1) + codes[:, ll], axis=0)
    return np.hstack([u, v])


# --------------------------------------------------------------------------
# Smoothing


def smooth_correlations(raw, items, kind="polychoric"):
    """Eigenvalue-clipped, unit-diagonal version of ``raw`` and a note, if needed.

    ``kind`` names the correlations in the note ("polychoric", or the mixed
    kinds of :mod:`scalewright.estimate.mixed`).
    """
    values, vectors = np.linalg.eigh(raw)
    if values[0] >= MIN_EIGENVALUE:
        return raw, ""
    clipped = (vectors * np.maximum(values, MIN_EIGENVALUE)) @ vectors.T
    scale = np.sqrt(np.diag(clipped))
    smooth = clipped / np.outer(scale, scale)
    np.fill_diagonal(smooth, 1.0)
    change = np.abs(smooth - raw).max(axis=1)
    worst = np.argsort(-change, kind="stable")[:3]
    named = ", ".join(f"'{items[j]}' (up to {change[j]:.3f})" for j in worst)
    note = (
        f"The {kind} correlation matrix was not positive definite (smallest "
        f"eigenvalue {values[0]:.4g}). It was smoothed: eigenvalues below "
        f"{MIN_EIGENVALUE:g} were raised to {MIN_EIGENVALUE:g} and the matrix was "
        f"rescaled to unit diagonal. The correlations that changed most involve "
        f"{named}. This usually comes from many missing answers, sparse categories "
        f"or a small sample; look at these items first."
    )
    return smooth, note
