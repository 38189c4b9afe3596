"""Item screening: per-item distribution statistics and Mardia's multivariate tests.

Conventions (the report states them):

* SD uses the n - 1 divisor.
* Skewness and excess kurtosis are the moment estimators
  g1 = m3 / m2^(3/2) and g2 = m4 / m2^2 - 3, with m_k = (1/n) sum (x - mean)^k,
  i.e. ``scipy.stats.skew(x)`` and ``scipy.stats.kurtosis(x)`` with
  ``bias=True``; they are the univariate case of Mardia's b1,p and b2,p
  (b1,1 = g1^2, b2,1 = g2 + 3), so the item and the multivariate figures agree.
* Mardia's statistics use the complete rows only and the covariance matrix
  with the n divisor.

References
----------
Joanes, D. N., & Gill, C. A. (1998). Comparing measures of sample skewness and
kurtosis. Journal of the Royal Statistical Society D, 47, 183-189.

Mardia, K. V. (1970). Measures of multivariate skewness and kurtosis with
applications. Biometrika, 57, 519-530.
"""

from __future__ import annotations

import math
from concurrent.futures import Executor, Future
from dataclasses import asdict, dataclass, field, replace
from threading import Event

import numpy as np
from scipy import linalg, stats

from scalewright.blas import one_blas_thread
from scalewright.estimate.normal import Block, CompleteRows, complete_rows
from scalewright.itemdata import ItemData
from scalewright.outliers import squared_distances
from scalewright.studyfile import format_code

_MAX_FREQUENCIES = 15  # answer counts are kept for items with at most this many distinct values
_CHUNK_CELLS = 2_000_000  # floats in one block of whitened rows (16 MB)
_PAIR_ROWS = 128  # rows per block on the n x n route: narrow blocks skip more of its lower half
_SINGULAR = 1e-10  # smallest eigenvalue of the item correlation matrix treated as zero


@dataclass(frozen=True)
class ItemScreen:
    """Distribution of one item's answers (after missing codes and reverse keying).

    ``skewness`` and ``excess_kurtosis`` are the moment estimators g1 and g2
    (see the module docstring); they and ``sd`` are NaN when fewer than two
    answers or no variation make them undefined.  ``pct_missing`` is a
    percentage (0-100) of all rows.  ``frequencies`` maps each answer value to
    its count when the item's answers are whole numbers (category codes) with
    at most 15 distinct values, else it is empty.
    """

    item: str
    n: int
    mean: float
    sd: float
    min: float
    max: float
    skewness: float
    excess_kurtosis: float
    pct_missing: float
    n_distinct: int
    frequencies: dict[float, int]


@dataclass(frozen=True)
class Mardia:
    """Mardia's (1970) multivariate skewness b1,p and kurtosis b2,p with their tests.

    ``skewness_chi2`` = n b1,p / 6 on p(p+1)(p+2)/6 df; ``kurtosis_z`` =
    (b2,p - E b2,p) / sqrt(Var b2,p) with the exact normal-sample moments of
    Mardia (1974), with a two-sided normal p-value (:func:`mardia_statistics`).

    The skewness rests on ``cube_sum`` = sum_ij (z_i' z_j)^3, which takes
    most of the screen's time; :func:`screen` given an executor leaves it
    computing there (a Future) while the check goes on, and the skewness
    waits for it when first read.  The kurtosis, which the method choice
    reads, is there at once.
    """

    n: int
    p: int
    kurtosis: float
    kurtosis_z: float
    kurtosis_p: float
    cube_sum: float | Future = field(repr=False)

    @property
    def skewness(self) -> float:
        """b1,p = (1/n^2) sum_ij (z_i' z_j)^3 (Mardia 1970)."""
        cubes = self.cube_sum.result() if isinstance(self.cube_sum, Future) else self.cube_sum
        return cubes / self.n ** 2

    @property
    def skewness_df(self) -> float:
        return self.p * (self.p + 1) * (self.p + 2) / 6

    @property
    def skewness_chi2(self) -> float:
        return self.n * self.skewness / 6

    @property
    def skewness_p(self) -> float:
        return float(stats.chi2.sf(self.skewness_chi2, self.skewness_df))

    def resolved(self) -> Mardia:
        """This result with the skewness sum as a number (waited for if still
        computing): plain data again, which can be copied and pickled."""
        if not isinstance(self.cube_sum, Future):
            return self
        return replace(self, cube_sum=float(self.cube_sum.result()))

    def to_dict(self) -> dict:
        return {"n": self.n, "p": self.p, "skewness": self.skewness,
                "skewness_chi2": self.skewness_chi2, "skewness_df": self.skewness_df,
                "skewness_p": self.skewness_p, "kurtosis": self.kurtosis,
                "kurtosis_z": self.kurtosis_z, "kurtosis_p": self.kurtosis_p}


@dataclass(frozen=True)
class Screening:
    """Screening of every item, and Mardia's tests on the complete rows.

    ``mardia`` is None when there are fewer complete rows than p + 2, or when
    the items' covariance matrix on those rows is singular (an item is an
    exact linear combination of others, e.g. a duplicated column).
    """

    items: tuple[ItemScreen, ...]
    mardia: Mardia | None
    n_complete: int
    #: squared Mahalanobis distances of the complete rows (ML covariance), a
    #: by-product of Mardia's kurtosis that the outlier screen reuses; None with ``mardia``
    distances: np.ndarray | None = field(default=None, repr=False, compare=False)

    def resolved(self) -> Screening:
        """This screening with Mardia's skewness sum as a number (:meth:`Mardia.resolved`)."""
        return self if self.mardia is None else replace(self, mardia=self.mardia.resolved())

    def to_dict(self) -> dict:
        """JSON-able form: undefined values become None, answer values become text keys."""
        items = []
        for screen_ in self.items:
            entry = {k: _plain(v) for k, v in asdict(screen_).items() if k != "frequencies"}
            entry["frequencies"] = {format_code(value): int(count)
                                    for value, count in screen_.frequencies.items()}
            items.append(entry)
        mardia = None if self.mardia is None else \
            {k: _plain(v) for k, v in self.mardia.to_dict().items()}
        return {"items": items, "mardia": mardia, "n_complete": int(self.n_complete)}


def _plain(value):
    if isinstance(value, (str, int)) and not isinstance(value, bool):
        return value
    value = float(value)
    return value if math.isfinite(value) else None


def screen(data: ItemData, complete: CompleteRows | None = None,
           pool: Executor | None = None, stop: Event | None = None) -> Screening:
    """Screen each item and test multivariate normality on the complete rows.

    Parameters
    ----------
    data : ItemData
    complete : CompleteRows, optional
        :func:`~scalewright.estimate.normal.complete_rows` of ``data.values``,
        when the caller has it (their moments are then not computed again).
    pool : Executor, optional
        Where Mardia's skewness sum is computed while the caller goes on
        (:class:`Mardia`); without one it is computed here.
    stop : threading.Event, optional
        Set by a caller that gives up (an error in a later stage): the sum on
        the pool then ends at its next block of rows, with NaN, instead of
        holding the error's message back until it is done.

    Returns
    -------
    Screening
    """
    values = data.values
    complete = complete or complete_rows(values)
    # Mardia's statistics first: with a pool, the skewness sum then runs beside the items'
    mardia, distances = _mardia(values, complete.index, complete.moments, pool, stop)
    width = _columns_at_once(data.n_rows)
    items = tuple(item for lo in range(0, len(data.items), width)
                  for item in _items(data.items[lo:lo + width], values[:, lo:lo + width],
                                     data.n_rows))
    return Screening(items=items, mardia=mardia, n_complete=len(complete.index),
                     distances=distances)


def _columns_at_once(n_rows: int) -> int:
    """Columns screened together: their copy stays within ``_CHUNK_CELLS`` floats."""
    return max(1, _CHUNK_CELLS // max(n_rows, 1))


def _items(names, columns: np.ndarray, n_rows: int) -> list[ItemScreen]:
    """Moment statistics of each column, NaN cells left out.

    The columns are copied as rows (so that every sum runs over contiguous
    answers, by numpy's pairwise summation) and sorted once; a missing cell
    adds zero to the sums, and the distinct answers are where the sorted
    answers change."""
    x = np.array(columns.T, order="C")          # one row per item
    answered = ~np.isnan(x)
    n = answered.sum(axis=1)
    every = bool(answered.all())                 # no cell to leave out: no masking
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = (x if every else np.where(answered, x, 0.0)).sum(axis=1) / n
        d = x - mean[:, None]
        if not every:
            d[~answered] = 0.0
        d2 = d * d
        m2 = d2.sum(axis=1) / n
        d *= d2                                  # in place: d³, then d⁴ in d2
        m3 = d.sum(axis=1) / n
        d2 *= d2
        m4 = d2.sum(axis=1) / n
    x.sort(axis=1)                               # NaN last in each row
    starts = np.ones(x.shape, dtype=bool)
    starts[:, 1:] = x[:, 1:] != x[:, :-1]
    starts &= ~np.isnan(x)
    n_distinct = starts.sum(axis=1)
    out = []
    for j, name in enumerate(names):
        k = int(n[j])
        pct_missing = 100.0 * (n_rows - k) / n_rows if n_rows else math.nan
        if k == 0:
            out.append(ItemScreen(item=name, n=0, mean=math.nan, sd=math.nan, min=math.nan,
                                  max=math.nan, skewness=math.nan, excess_kurtosis=math.nan,
                                  pct_missing=pct_missing, n_distinct=0, frequencies={}))
            continue
        defined = k > 1 and m2[j] > 0          # g1 and g2 below: Joanes & Gill (1998)
        frequencies = {}
        if n_distinct[j] <= _MAX_FREQUENCIES and np.all(x[j, :k] == np.round(x[j, :k])):
            first = np.flatnonzero(starts[j])
            counts = np.diff(np.append(first, k))
            frequencies = {float(v): int(c) for v, c in zip(x[j, first], counts)}
        out.append(ItemScreen(
            item=name, n=k, mean=float(mean[j]),
            sd=math.sqrt(m2[j] * k / (k - 1)) if k > 1 else math.nan,
            min=float(x[j, 0]), max=float(x[j, k - 1]),
            skewness=float(m3[j] / m2[j] ** 1.5) if defined else math.nan,
            excess_kurtosis=float(m4[j] / m2[j] ** 2 - 3.0) if defined else math.nan,
            pct_missing=pct_missing, n_distinct=int(n_distinct[j]), frequencies=frequencies))
    return out


def mardia_statistics(x: np.ndarray, rows: np.ndarray | None = None) -> Mardia | None:
    """Mardia's multivariate skewness and kurtosis of the rows of `x`.

    With d_i the centred rows and S = (1/n) sum d_i d_i' (ML covariance),

    b1,p = (1/n^2) sum_i sum_j (d_i' S^-1 d_j)^3,   chi2 = n b1,p / 6 on p(p+1)(p+2)/6 df;
    b2,p = (1/n) sum_i (d_i' S^-1 d_i)^2,           z = (b2,p - E b2,p) / sqrt(Var b2,p),

    with the exact moments of b2,p in normal samples (Mardia 1974)

    E b2,p = p(p+2)(n-1)/(n+1),
    Var b2,p = 8p(p+2)(n-3)(n-p-1)(n-p+1) / ((n+1)^2 (n+3)(n+5)).

    The large-sample centring p(p+2) and variance 8p(p+2)/n (Mardia 1970)
    make z drift below zero as p grows against n (at 100 items and n = 2000
    about 35% of normal samples were declared non-normal), so the exact
    moments are used; they agree with the large-sample ones as n grows.

    b1,p is computed without the n x n matrix: with z_i = L^-1 d_i (S = L L')
    the double sum equals the squared Frobenius norm of the third-moment
    tensor T_abc = sum_i z_ia z_ib z_ic, which is accumulated over blocks of
    rows, so memory beyond one centred copy of the data does not grow with n.

    Parameters
    ----------
    x : ndarray, shape (n, p)
        Rows without NaN (after `rows` is applied).
    rows : ndarray of bool, shape (n,), optional
        Use only these rows (saves the caller a copy of `x`).

    Returns
    -------
    Mardia or None
        None when there are fewer than p + 2 rows or S is singular.

    References
    ----------
    Mardia, K. V. (1970). Measures of multivariate skewness and kurtosis with
    applications. Biometrika, 57, 519-530.
    Mardia, K. V. (1974). Applications of some measures of multivariate
    skewness and kurtosis in testing normality and robustness studies.
    Sankhya B, 36, 115-128.
    """
    return _mardia(x, None if rows is None else np.flatnonzero(rows))[0]


def _mardia(x: np.ndarray, rows: np.ndarray | None, moments: Block | None = None,
            pool: Executor | None = None,
            stop: Event | None = None) -> tuple[Mardia | None, np.ndarray | None]:
    """:func:`mardia_statistics` of the ``rows`` (indices) of ``x``, and the
    squared Mahalanobis distances ``d_i' S^-1 d_i`` of those rows (None with
    the statistics); ``moments``: their mean and ML covariance, when known;
    ``pool`` and ``stop``: where the skewness sum is computed (:class:`Mardia`)
    and what ends it early (:func:`screen`)."""
    dt = np.array(x.T, order="C") if rows is None or len(rows) == len(x) else x.T[:, rows]
    p, n = dt.shape
    if n < max(p + 2, 4):            # the exact variance below needs n > 3
        return None, None
    # one BLAS thread: these small and thin products ran 10-100x slower threaded on a
    # busy 2-core machine (see DEVELOPERS.md, "Speed")
    with one_blas_thread():
        if moments is None:
            dt -= dt.mean(axis=1, keepdims=True)
            s = dt @ dt.T / n
        else:
            dt -= moments.mean[:, None]
            s = moments.cov
        scale = np.sqrt(np.diag(s))
        if np.any(scale == 0) or np.linalg.eigvalsh(s / np.outer(scale, scale))[0] < _SINGULAR:
            return None, None
        whiten = linalg.solve_triangular(np.linalg.cholesky(s), np.eye(p), lower=True)
        # the n x n route costs ~n²p/2, the tensor route ~np³/3: take the cheaper
        if 3 * n < 2 * p * p:
            z = whiten @ dt
            distances = np.einsum("ij,ij->j", z, z)
            cube_sum = _pinned(_pair_cube_sum, z, stop)
        else:
            distances = squared_distances(dt.T, whiten)
            cube_sum = _pinned(_tensor_cube_sum, dt, whiten, stop)
    b2 = float(distances @ distances) / n  # Mardia (1970)
    kurtosis_z = (b2 - _kurtosis_mean(n, p)) / math.sqrt(_kurtosis_variance(n, p))
    return Mardia(n=n, p=p, kurtosis=b2, kurtosis_z=kurtosis_z,
                  kurtosis_p=float(2 * stats.norm.sf(abs(kurtosis_z))),
                  cube_sum=cube_sum() if pool is None else pool.submit(cube_sum)), distances


def _pinned(function, *args):
    """``function(*args)`` to be called later, with one BLAS thread (the
    executor's thread is not inside the caller's limit)."""
    def call():
        with one_blas_thread():
            return function(*args)
    return call


def _kurtosis_mean(n: int, p: int) -> float:
    """E b2,p = p(p+2)(n-1)/(n+1) for normal samples (Mardia 1974)."""
    return p * (p + 2) * (n - 1) / (n + 1)


def _kurtosis_variance(n: int, p: int) -> float:
    """Var b2,p = 8p(p+2)(n-3)(n-p-1)(n-p+1) / ((n+1)^2 (n+3)(n+5)) for normal
    samples (Mardia 1974)."""
    return 8 * p * (p + 2) * (n - 3) * (n - p - 1) * (n - p + 1) / ((n + 1) ** 2 * (n + 3) * (n + 5))


def _pair_cube_sum(z: np.ndarray, stop: Event | None = None) -> float:
    """sum_i sum_j (z_i' z_j)^3 (the whitened rows z_i as the columns of ``z``,
    p x n) straight from the definition: the cubes of the n x n matrix of
    ``z_i' z_j``, built one block of rows at a time so that memory stays at
    one block of rows by n.  The matrix is symmetric, so each block of rows
    takes only its own and the later columns (about n²p/2 multiply-adds in
    all, with blocks of at most ``_PAIR_ROWS`` rows): its square diagonal
    part counts once, the part to its right twice, for the part below the
    diagonal.  NaN once ``stop`` is set (:func:`screen`)."""
    n = z.shape[1]
    width = max(1, min(_PAIR_ROWS, _CHUNK_CELLS // n))
    cubes = 0.0
    for start in range(0, n, width):
        if stop is not None and stop.is_set():
            return math.nan
        end = min(start + width, n)
        products = z[:, start:end].T @ z[:, start:]
        square = products[:, :end - start]
        cubes += 2.0 * _cube_sum(products) - _cube_sum(square)
    return cubes


def _cube_sum(x: np.ndarray) -> float:
    """sum x^3 over every element, in one pass (no squared temporary)."""
    return float(np.einsum("ij,ij,ij->", x, x, x))


def _tensor_cube_sum(dt: np.ndarray, whiten: np.ndarray, stop: Event | None = None) -> float:
    """sum_i sum_j (z_i' z_j)^3, with z_i = whiten @ d_i, without the n x n matrix.

    `dt` holds the centred rows d_i as columns (p x n).  The double sum equals
    sum_abc T_abc^2 with T_abc = sum_i z_ia z_ib z_ic.  T is symmetric in its
    three indices, so only the slab of each smallest index k is accumulated,
    S_k[b, c] = T_{k, k+b, k+c} (b, c >= 0), and its squares are weighted by
    how many ordered triples each entry stands for: three distinct indices
    have 6 orderings and sit twice in their slab (weight 3); (k, b, b) has 3
    and sits once (weight 3); (k, k, c) has 3 and sits twice, in the first row
    and column (weight 1.5); (k, k, k) sits once (weight 1).  NaN once
    ``stop`` is set (:func:`screen`).
    """
    p, n = dt.shape
    slabs = [np.zeros((p - k, p - k)) for k in range(p)]
    width = max(1, _CHUNK_CELLS // p)
    for start in range(0, n, width):
        if stop is not None and stop.is_set():
            return math.nan
        block = whiten @ dt[:, start:start + width]
        for k in range(p):
            tail = block[k:]
            slabs[k] += (tail * block[k]) @ tail.T
    cubes = 0.0
    for slab in slabs:
        weight = np.full(slab.shape, 3.0)
        weight[0, :] = weight[:, 0] = 1.5
        weight[0, 0] = 1.0
        cubes += float(np.sum(weight * slab * slab))
    return cubes
