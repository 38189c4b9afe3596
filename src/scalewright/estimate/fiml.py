"""Full-information maximum likelihood (FIML) for items with missing answers.

Every person contributes the likelihood of the answers they gave: the rows
are grouped into *missing-data patterns* (the set ``o`` of answered items)
and each pattern becomes one :class:`~scalewright.estimate.normal.Block` of
the normal-theory engine, which sums

    ℓ(θ) = −½ Σ_b n_b [p_b log 2π + log|Σ_oo| + tr(Σ_oo⁻¹ S_b) + (x̄_b − μ_o)ᵀ Σ_oo⁻¹ (x̄_b − μ_o)]

(Finkbeiner 1979; Arbuckle 1996).  The model needs a mean structure: the
item intercepts ν become free parameters (:func:`with_intercepts`).  The
estimates are consistent when answers are missing at random (MAR: whether
an answer is missing may depend on the answers given, not on the missing
one; Rubin 1976).

Pattern quantities are computed for all patterns at once on ``p × p``
arrays: with ``m`` the 0/1 mask of answered items, the inverse of
``Σ̃ = mΣm + diag(1 − m)`` holds ``Σ_oo⁻¹`` in the answered rows and columns;
zeroing the rest gives the embedded inverse ``Ṽ``.  Then ``ΣṼ`` is the
regression of every item on the answered ones and ``Σ − ΣṼΣ`` the
residual covariance of the unanswered items, which is all the EM algorithm
for the saturated model needs (Dempster, Laird & Rubin 1977; Little & Rubin
2002, ch. 11).

Fit: ``T = 2(ℓ_sat − ℓ)`` with ``ℓ_sat`` from EM; the baseline (independent
items with free means and variances) has a closed-form likelihood because it
factors over items.

Robust version (Yuan & Bentler 2000).  With the saturated parameters
``β = (vech Σ, μ)``, their casewise scores ``s_i``, ``B_β = (1/N) Σ s_i s_iᵀ``,
the observed information per case ``A_β`` (both at the model-implied
moments), ``Δ = ∂β/∂θ``, ``A_θ = ΔᵀA_βΔ`` and ``B_θ = ΔᵀB_βΔ``:

* standard errors: ``Ã_θ⁻¹ B_θ Ã_θ⁻¹ / N``, ``Ã_θ`` the full observed
  information ``A_θ + Σ_k (∂f/∂β_k) ∂²β_k/∂θ∂θᵀ``;
* ``U = A_β − A_βΔA_θ⁻¹ΔᵀA_β`` and ``Γ = A_β⁻¹B_βA_β⁻¹``, so that
  ``tr(UΓ) = tr(A_β⁻¹B_β) − tr(A_θ⁻¹B_θ)`` and ``UΓ = (1 − A_βΔA_θ⁻¹Δᵀ) B_β A_β⁻¹``;
  the scaled and adjusted statistics follow as in
  :mod:`scalewright.estimate.robust`.  Both traces come from the casewise
  scores and one factorisation of ``A_β``, without ``B_β``, ``Γ`` or ``U``
  (:mod:`scalewright.estimate.yuan_bentler`).

The casewise score of ``β`` for a person with answered items ``o`` and
``z = Ṽ(x − μ)`` is ``∂ℓ_i/∂Σ_jk = (zzᵀ − Ṽ)_jk`` (half that on the
diagonal) and ``∂ℓ_i/∂μ = z``.  For one pattern with ``S̃ = S_b + r rᵀ``,
``r = x̄_b − μ``, ``M = ṼS̃Ṽ``, the second derivative of ``f_b = −ℓ_b/n_b`` in
directions ``(X, x), (Y, y)`` is

    −½ tr(ṼYṼX) + ½[tr(YṼXM) + tr(XṼYM)] + zᵀXṼy + zᵀYṼx + yᵀṼx.

The observed information is used because the expected one is not consistent
under MAR (Kenward & Molenberghs 1998).

References
----------
Arbuckle, J. L. (1996). Full information estimation in the presence of
incomplete data. In Marcoulides & Schumacker (eds.), Advanced Structural
Equation Modeling, 243–277. Erlbaum.
Finkbeiner, C. (1979). Estimation for the multiple factor model when data are
missing. Psychometrika 44, 409–420.
Dempster, A. P., Laird, N. M. & Rubin, D. B. (1977). Maximum likelihood from
incomplete data via the EM algorithm. JRSS B 39, 1–38.
Little, R. J. A. & Rubin, D. B. (2002). Statistical Analysis with Missing
Data (2nd ed.). Wiley.
Rubin, D. B. (1976). Inference and missing data. Biometrika 63, 581–592.
Kenward, M. G. & Molenberghs, G. (1998). Likelihood based frequentist
inference when data are missing at random. Statistical Science 13, 236–247.
Yuan, K.-H. & Bentler, P. M. (2000). Three likelihood-based methods for mean
and covariance structure analysis with nonnormal missing data. Sociological
Methodology 30, 165–200.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np

from scalewright.errors import StudyError
from scalewright.estimate.cell_products import CellIndex, sandwich
from scalewright.estimate.fisher import OptimizerRecord
from scalewright.estimate.normal import LOG_2PI, Block, NormalFit, embedded_inverse, fit_normal
from scalewright.estimate.pattern_products import mean_pair_form, pair_form
from scalewright.estimate.robust import RobustML, RobustTest, incidence, independence_layout
from scalewright.estimate.spd_inverse import spd_inverse
from scalewright.estimate.yuan_bentler import ScoreTraces, corrected_traces, score_traces
from scalewright.layout import (INTERCEPT, Cells, Layout, Param, Pattern, cell_derivatives,
                                cell_factors)

#: rows per chunk when casewise quantities are accumulated
CHUNK = 4096
#: EM stops when no mean or covariance element moves more than this (relative to its scale)
EM_TOLERANCE = 1e-10
EM_MAX_ITERATIONS = 5000


# --------------------------------------------------------------------------- patterns

@dataclass(frozen=True)
class Patterns:
    """Missing-data patterns of a data matrix.

    ``masks[k]`` marks the items answered in pattern ``k``; ``index[i]`` is
    the pattern of row ``i`` (−1 for a row with no answer at all, which
    carries no information and is left out); ``counts[k]`` its number of rows.
    """

    items: tuple[str, ...]
    masks: np.ndarray
    index: np.ndarray
    counts: np.ndarray

    @property
    def n(self) -> int:
        return int(self.counts.sum())

    @property
    def n_empty(self) -> int:
        """Rows without any answer."""
        return int(np.sum(self.index < 0))

    def to_dict(self, limit: int = 20) -> dict:
        """Item missing rates and the most frequent patterns (``limit`` of them)."""
        n_rows = len(self.index)
        answered = (self.masks * self.counts[:, None]).sum(axis=0)
        order = np.argsort(-self.counts, kind="stable")[:limit]
        return {
            "n_rows": n_rows, "n_patterns": int(len(self.counts)),
            "n_complete": int(self.counts[self.masks.all(axis=1)].sum()),
            "n_no_answer": self.n_empty,
            "items": [{"item": it, "n_answered": int(answered[j]),
                       "rate_missing": float((n_rows - answered[j]) / n_rows)}
                      for j, it in enumerate(self.items)],
            "patterns": [{"missing": [it for it, m in zip(self.items, self.masks[k]) if not m],
                          "n": int(self.counts[k])} for k in order],
        }


def missing_patterns(values: np.ndarray, items: tuple[str, ...], where: str) -> Patterns:
    """Group the rows of ``values`` (NaN = missing) by the set of answered items.

    Raises
    ------
    StudyError
        When an item has fewer than two answers, or two items were never
        answered by the same person (their covariance cannot be estimated
        from the data).  ``where`` names the data file in the message.
    """
    n, p = values.shape
    answered = ~np.isnan(values)
    if answered.all():          # complete data: one pattern, nothing to sort
        return Patterns(tuple(items), np.ones((1, p), dtype=bool), np.zeros(n, dtype=np.intp),
                        np.array([n]))
    per_item = answered.sum(axis=0)
    thin = np.nonzero(per_item < 2)[0]
    if len(thin):
        j = thin[0]
        raise StudyError(
            f"{where}: item '{items[j]}' has {per_item[j]} answer(s) in {n} rows, too few to "
            "estimate its variance, so the models cannot be fitted with it. Check the column "
            "and the missing-value codes under data: missing:, or remove the item from the "
            "models.")
    together = answered.T.astype(np.float64) @ answered
    j, k = np.nonzero(np.tril(together == 0))
    if len(j):
        raise StudyError(
            f"{where}: items '{items[k[0]]}' and '{items[j[0]]}' were never answered by the same "
            f"person (0 of {n} rows have both), so the data say nothing about how they go "
            "together and full-information estimation cannot estimate their covariance. "
            "Remove one of the two items from the models, or add data from people who "
            "answered both.")
    codes = np.packbits(answered, axis=1)
    unique, inverse, counts = np.unique(codes, axis=0, return_inverse=True, return_counts=True)
    masks = np.unpackbits(unique, axis=1, count=p).astype(bool)
    inverse = inverse.reshape(-1)
    empty = ~masks.any(axis=1)
    if empty.any():
        keep = np.nonzero(~empty)[0]
        renumber = np.full(len(masks), -1)
        renumber[keep] = np.arange(len(keep))
        masks, counts, inverse = masks[keep], counts[keep], renumber[inverse]
    return Patterns(tuple(items), masks, inverse, counts)


@dataclass(frozen=True)
class PatternMoments:
    """Per-pattern case counts, means and covariances (divisor n_k), embedded in
    ``p``-vectors and ``p × p`` matrices with zeros for unanswered items."""

    masks: np.ndarray
    counts: np.ndarray
    means: np.ndarray
    covs: np.ndarray


def pattern_moments(values: np.ndarray, patterns: Patterns) -> PatternMoments:
    """Means and covariances of each pattern's rows.

    The rows are sorted by pattern, so that each pattern's rows are one
    slice: its mean is the slice's column sums over ``n_k`` and its
    covariance one product ``CᵀC / n_k`` of the slice centred at its own
    mean (``p × p`` per pattern, no ``n × p²`` temporaries).  A pattern of
    one row has covariance zero and needs no product."""
    n, p = values.shape
    k = len(patterns.counts)
    rows = np.nonzero(patterns.index >= 0)[0]
    order = rows[np.argsort(patterns.index[rows], kind="stable")]
    x = np.nan_to_num(values[order])            # unanswered items: 0 in every row of a pattern
    counts = patterns.counts
    starts = np.concatenate([[0], np.cumsum(counts)[:-1]])
    means = np.add.reduceat(x, starts, axis=0) / counts[:, None]
    x -= np.repeat(means, counts, axis=0)
    covs = np.zeros((k, p, p))
    for j in np.nonzero(counts > 1)[0]:
        centred = x[starts[j]:starts[j] + counts[j]]
        np.matmul(centred.T, centred, out=covs[j])
        covs[j] /= counts[j]
    return PatternMoments(patterns.masks, patterns.counts, means, covs)


def pattern_blocks(moments: PatternMoments, group: int = 0) -> tuple[Block, ...]:
    """One :class:`Block` per pattern, for :class:`~scalewright.estimate.normal.NormalFit`."""
    blocks = []
    for mask, n, mean, cov in zip(moments.masks, moments.counts, moments.means, moments.covs):
        o = np.nonzero(mask)[0]
        blocks.append(Block(group, o, int(n), cov[np.ix_(o, o)], mean[o]))
    return tuple(blocks)


# --------------------------------------------------------------------------- embedded inverses

@dataclass(frozen=True)
class _Embedded:
    v: np.ndarray        # K × p × p, Σ_oo⁻¹ embedded
    logdet: np.ndarray   # K, log|Σ_oo|


def _embedded_inverses(sigma: np.ndarray, masks: np.ndarray) -> _Embedded:
    parts = embedded_inverse(sigma, masks)
    if parts is None:
        raise np.linalg.LinAlgError("an implied covariance of a missing-data pattern is not "
                                    "positive definite")
    return _Embedded(*parts)


def pattern_loglik(moments: PatternMoments, mu: np.ndarray, sigma: np.ndarray,
                   emb: _Embedded | None = None) -> float:
    """ℓ(μ, Σ) summed over patterns (see the module docstring)."""
    emb = _embedded_inverses(sigma, moments.masks) if emb is None else emb
    r = (moments.means - mu) * moments.masks
    quad = np.einsum("ki,kij,kj->k", r, emb.v, r) + np.einsum("kij,kji->k", emb.v, moments.covs)
    p_k = moments.masks.sum(axis=1)
    return float(-0.5 * np.sum(moments.counts * (p_k * LOG_2PI + emb.logdet + quad)))


# --------------------------------------------------------------------------- saturated and baseline

@dataclass(frozen=True)
class Saturated:
    """ML estimates of the unrestricted mean and covariance by EM."""

    mean: np.ndarray
    cov: np.ndarray
    loglik: float
    iterations: int
    converged: bool


def saturated_em(moments: PatternMoments, *, tol: float = EM_TOLERANCE,
                 max_iter: int = EM_MAX_ITERATIONS) -> Saturated:
    """EM for the saturated normal model (Dempster, Laird & Rubin 1977).

    E step, per pattern with embedded inverse ``Ṽ`` and block moments
    ``x̄_k, S_k``: ``J = ΣṼ``, ``x̂_k = μ + J(x̄_k − μ)``, and the expected
    sum of cross-products ``n_k [x̂_k x̂_kᵀ + J S_k Jᵀ + Σ − ΣṼΣ]``.
    M step: ``μ = T₁/N``, ``Σ = T₂/N − μμᵀ``.
    Start: the available-case means and variances, zero covariances.
    """
    masks, counts = moments.masks, moments.counts.astype(float)
    n = counts.sum()
    answered = (masks * counts[:, None]).sum(axis=0)
    mu = (moments.means * counts[:, None]).sum(axis=0) / answered
    second = ((moments.covs + moments.means[:, :, None] * moments.means[:, None, :])
              * counts[:, None, None]).sum(axis=0)
    sigma = np.diag(np.diag(second) / answered - mu * mu)
    converged = False
    iteration = 0
    for iteration in range(1, max_iter + 1):
        emb = _embedded_inverses(sigma, masks)
        j = sigma[None] @ emb.v
        dev = (moments.means - mu) * masks
        xhat = mu + np.einsum("kij,kj->ki", j, dev)
        t1 = counts @ xhat
        spread = j @ moments.covs @ j.transpose(0, 2, 1) + sigma[None] - j @ sigma[None]
        t2 = np.einsum("k,kij->ij", counts, spread + xhat[:, :, None] * xhat[:, None, :])
        mu_new = t1 / n
        sigma_new = t2 / n - np.outer(mu_new, mu_new)
        sigma_new = 0.5 * (sigma_new + sigma_new.T)
        scale = np.sqrt(np.diag(sigma_new))
        change = max(np.max(np.abs(mu_new - mu) / scale),
                     np.max(np.abs(sigma_new - sigma) / np.outer(scale, scale)))
        mu, sigma = mu_new, sigma_new
        if change < tol:
            converged = True
            break
    return Saturated(mu, sigma, pattern_loglik(moments, mu, sigma), iteration, converged)


def independence_fiml(values: np.ndarray) -> tuple[float, np.ndarray, np.ndarray]:
    """Log-likelihood, means and variances (divisor n_j) of the independence
    model with missing answers: it factors over items, so each item's ML
    estimates are its available-case mean and variance."""
    n_j = np.sum(~np.isnan(values), axis=0)
    mean = np.nanmean(values, axis=0)
    var = np.nanvar(values, axis=0)
    loglik = float(-0.5 * np.sum(n_j * (LOG_2PI + np.log(var) + 1.0)))
    return loglik, mean, var


# --------------------------------------------------------------------------- the model

def with_intercepts(layout: Layout, means: np.ndarray) -> Layout:
    """The same layout with a free intercept ν_j for every item (every group),
    started at ``means`` (``p`` or ``G × p``).  The model then reproduces the
    item means exactly, as a saturated mean structure, and keeps its df."""
    means = np.atleast_2d(np.asarray(means, dtype=float))
    p = layout.p
    params = list(layout.params)
    start = [layout.start]
    patterns = []
    for g, pattern in enumerate(layout.patterns):
        first = len(params)
        group = None if len(layout.patterns) == 1 else layout.groups[g]
        params.extend(Param(INTERCEPT, it, it, group) for it in layout.items)
        start.append(means[min(g, len(means) - 1)])
        cells = Cells(np.arange(p), np.zeros(p, dtype=np.intp), first + np.arange(p))
        patterns.append(dataclasses.replace(pattern, intercepts=cells))
    return dataclasses.replace(layout, patterns=tuple(patterns), params=tuple(params),
                               start=np.concatenate(start))


@dataclass(frozen=True)
class FimlFit:
    """A model fitted by FIML, with what its fit indices need."""

    layout: Layout                 # with intercepts
    theta: np.ndarray
    record: OptimizerRecord
    objective: NormalFit
    loglik: float
    saturated: Saturated
    baseline_loglik: float

    @property
    def n(self) -> int:
        return self.objective.n

    @property
    def chi_square(self) -> float:
        return max(2.0 * (self.saturated.loglik - self.loglik), 0.0)

    @property
    def df(self) -> int:
        return self.layout.df()

    @property
    def baseline(self) -> tuple[float, int]:
        p = self.layout.p
        return 2.0 * (self.saturated.loglik - self.baseline_loglik), p * (p - 1) // 2


def fit_fiml(layout: Layout, values: np.ndarray, moments: PatternMoments,
             saturated: Saturated, start_from=None) -> FimlFit:
    """FIML estimates of ``layout`` (built without a mean structure) on
    ``values`` (NaN = missing, columns in ``layout.items`` order).
    ``start_from``, the estimate of a related model, gives the start values
    of the parameters both name alike; a warm start that does not converge
    is retried from the usual start values."""
    model = with_intercepts(layout, saturated.mean)
    blocks = pattern_blocks(moments)
    start = None if start_from is None else start_from.start_for(model)
    theta, record, objective = fit_normal(model, blocks, start)
    if not record.converged and start is not None:
        theta, record, objective = fit_normal(model, blocks)
    baseline_loglik, _, _ = independence_fiml(values)
    return FimlFit(model, theta, record, objective, objective.loglik(theta), saturated,
                   baseline_loglik)


# --------------------------------------------------------------------------- information and scores

def _vech_index(p: int):
    rows, cols = np.tril_indices(p)
    return rows, cols, rows != cols


def _reduce_pairs(h: np.ndarray, p: int, axis: int) -> np.ndarray:
    """Sum a ``p²`` axis over the two cells (j, k) and (k, j) of each vech element."""
    rows, cols, off = _vech_index(p)
    first, second = rows * p + cols, cols * p + rows
    h1, h2 = np.take(h, first, axis=axis), np.take(h, second, axis=axis)
    shape = [1] * h.ndim
    shape[axis] = len(rows)
    return h1 + h2 * off.reshape(shape)


def pattern_jacobian(pattern: Pattern, theta: np.ndarray, n_params: int) -> np.ndarray:
    """``Δ = ∂(vech Σ, μ)/∂θ`` (``p* + p`` by ``q``) of one group's pattern from
    the rank-two cell derivatives (``q = n_params``, the whole layout's)."""
    a, b, d_mu = cell_derivatives(pattern, pattern.matrices(theta))
    rows, cols, _ = _vech_index(pattern.p)
    d_sigma = a[rows] * b[cols] + b[rows] * a[cols]
    return np.vstack([d_sigma, d_mu]) @ incidence(pattern, n_params)


def saturated_information(moments: PatternMoments, mu: np.ndarray, sigma: np.ndarray,
                          emb: _Embedded | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Observed information per case of ``β = (vech Σ, μ)`` at ``(μ, Σ)``,
    and the derivatives ``G = ∂f/∂Σ`` (full symmetric) and ``g = ∂f/∂μ`` of
    ``f = −ℓ/N`` (see the module docstring for the formula).

    With ``D_k = M_k − ½Ṽ_k``, the docstring's ``Σ``-block
    ``−½ tr(ṼYṼX) + ½[tr(YṼXM) + tr(XṼYM)]`` is ``½[tr(YṼXD) + tr(XṼYD)]``,
    which in single-entry directions is ``Σ_k w_k Ṽ_k ⊗ D_k`` summed over
    both orders of each vech pair.  It is built one row item ``x`` at a time:
    ``Σ_k w_k Ṽ_k[x, y] D_k[u, v]`` is one ``p × p²`` product, permuted to
    rows ``u`` and summed over the column pairs ``(y, v)`` while it is in
    cache; the row pairs ``(x, u)`` are summed at the end (the ``p² × p²``
    array permuted whole cost three times as much at 100 items)."""
    p = len(mu)
    emb = _embedded_inverses(sigma, moments.masks) if emb is None else emb
    w = moments.counts / moments.counts.sum()
    v = emb.v
    k = len(w)
    r = (moments.means - mu) * moments.masks
    z = np.einsum("kij,kj->ki", v, r)
    m = v @ (moments.covs + r[:, :, None] * r[:, None, :]) @ v
    d = (m - 0.5 * v).reshape(k, p * p)
    weighted = v * w[:, None, None]
    rows, cols, off = _vech_index(p)
    first, second = rows * p + cols, cols * p + rows
    column_sums = np.empty((p, p, len(rows)))                   # [x, u, (y, v) pair]
    for x in range(p):
        block = (weighted[:, x, :].T @ d).reshape(p, p, p).transpose(1, 0, 2).reshape(p, p * p)
        np.take(block, first, axis=1, out=column_sums[x])
        column_sums[x] += np.take(block, second, axis=1) * off
    a_ss = _reduce_pairs(column_sums.reshape(p * p, len(rows)), p, 0)
    h3 = np.einsum("k,ki,kjm->ijm", w, z, v).reshape(p * p, p)
    a_sm = _reduce_pairs(h3, p, 0)
    a_mm = np.einsum("k,kij->ij", w, v)
    info = np.block([[a_ss, a_sm], [a_sm.T, a_mm]])
    grad_sigma = 0.5 * np.einsum("k,kij->ij", w, v - m)
    grad_mu = -(w @ z)
    return info, grad_sigma, grad_mu


def saturated_score_chunks(values: np.ndarray, patterns: Patterns, mu: np.ndarray,
                           sigma: np.ndarray, emb: _Embedded | None = None
                           ) -> Iterator[np.ndarray]:
    """The casewise scores ``s_i`` of ``β = (vech Σ, μ)`` at ``(μ, Σ)`` (module
    docstring), ``CHUNK`` rows at a time (rows with an answer, in data order)."""
    p = len(mu)
    emb = _embedded_inverses(sigma, patterns.masks) if emb is None else emb
    rows, cols, off = _vech_index(p)
    half = np.where(off, 1.0, 0.5)
    rows_used = np.nonzero(patterns.index >= 0)[0]
    for start in range(0, len(rows_used), CHUNK):
        r_idx = rows_used[start:start + CHUNK]
        v = emb.v[patterns.index[r_idx]]
        z = np.einsum("nij,nj->ni", v, np.nan_to_num(values[r_idx] - mu))
        s_sigma = (z[:, rows] * z[:, cols] - v[:, rows, cols]) * half
        yield np.hstack([s_sigma, z])


def _second_order_term(pattern: Pattern, n_params: int, theta: np.ndarray,
                       grad_sigma: np.ndarray, grad_mu: np.ndarray) -> np.ndarray:
    """Hessian of ``φ(θ) = Σ_jk G_jk Σ_jk(θ) + gᵀμ(θ)`` (G, g fixed; Σ, μ of
    ``pattern``) by central differences of its analytic gradient
    ``2aᵀGb + gᵀ∂μ`` per cell.  Σ(θ) and μ(θ) are low-degree polynomials, so
    the differences are accurate to rounding; the term vanishes at a model
    that fits exactly."""
    inc = incidence(pattern, n_params)

    def grad(t):
        a, b, d_mu = cell_derivatives(pattern, pattern.matrices(t))
        return (2.0 * np.einsum("ic,ic->c", a, grad_sigma @ b) + grad_mu @ d_mu) @ inc

    q = n_params
    steps = 1e-5 * np.maximum(1.0, np.abs(theta))
    cols = [(grad(theta + e) - grad(theta - e)) / (2 * h)
            for e, h in zip(np.diag(steps), steps)]
    hess = np.array(cols).reshape(q, q)
    return 0.5 * (hess + hess.T)


@dataclass(frozen=True)
class FimlInformation:
    """What the FIML standard errors and corrections are built from (per case)."""

    observed: np.ndarray        # Ã_θ, full observed information
    first_order: np.ndarray     # A_θ = ΔᵀA_βΔ
    meat: np.ndarray            # B_θ = ΔᵀB_βΔ
    traces: ScoreTraces         # what tr(UΓ), tr((UΓ)²) need of A_β and the scores


@dataclass(frozen=True)
class ObservedInformation:
    """The observed information per case of ``θ`` from one group's answers."""

    observed: np.ndarray        # Ã_θ = A_θ + Σ_k (∂f/∂β_k) ∂²β_k/∂θ∂θᵀ
    first_order: np.ndarray     # A_θ = ΔᵀA_βΔ


def observed_information(pattern: Pattern, n_params: int, theta: np.ndarray,
                         moments: PatternMoments) -> ObservedInformation:
    """The exact Hessian per case of ``f = −ℓ/n`` in ``θ`` for the answers of
    one group (``pattern``, with intercepts; ``moments`` its missing-data
    patterns): ``Ã_θ = ΔᵀA_βΔ + Σ_k (∂f/∂β_k) ∂²β_k/∂θ∂θᵀ`` with ``A_β``
    the observed information of ``β = (vech Σ, μ)`` at the implied moments
    (module docstring).  ``θ`` may be a multi-group layout's parameter
    vector: the derivatives are taken with respect to all ``n_params`` of it.

    ``ΔᵀA_βΔ`` is formed cell by cell without ``A_β`` (whose ``p*²``
    elements and products with ``Δ`` dominated at many items): with
    ``P_k = WᵀṼ_kW``, ``D_k = Wᵀ(M_k − ½Ṽ_k)W``, ``ζ_k = Wᵀz_k`` and the
    bilinear form ``F`` of :mod:`~scalewright.estimate.pattern_products`,
    the docstring's second derivative in the cell directions ``c, d`` sums to

        F(P, D) + F(D, P) + C + Cᵀ + (∂μ)ᵀ(Σ_k w_k Ṽ_k)(∂μ),
        C[c, d] = Σ_k w_k z_kᵀ(∂_cΣ)Ṽ_k(∂_dμ)

    (``−½ tr(ṼYṼX) + ½[tr(YṼXM) + tr(XṼYM)]`` expands to ``F(P, D) + F(D, P)``;
    with ``M = Ṽ`` it is the expected information ``F(P, P)``)."""
    mats = pattern.matrices(theta)
    mu, sigma = mats.implied_mean, mats.implied_cov
    emb = _embedded_inverses(sigma, moments.masks)
    w = moments.counts / moments.counts.sum()
    v = emb.v
    r = (moments.means - mu) * moments.masks
    z = np.einsum("kij,kj->ki", v, r)
    m = v @ (moments.covs + r[:, :, None] * r[:, None, :]) @ v
    factors = cell_factors(pattern, mats)
    index = CellIndex.of(factors)
    wvw = sandwich(factors, v)
    wdw = sandwich(factors, m - 0.5 * v)
    cells = pair_form(index, wvw, wdw, w) + pair_form(index, wdw, wvw, w)
    if index.mu is not None:
        cross = mean_pair_form(index, wvw, z @ factors.w, w)
        cells += cross + cross.T
        mean_part = np.tensordot(w, wvw, axes=1)[index.mu][:, index.mu]
        cells += mean_part * index.mu_scale * index.mu_scale[:, None]
    inc = incidence(pattern, n_params)
    first = inc.T @ cells @ inc
    grad_sigma = 0.5 * np.einsum("k,kij->ij", w, v - m)
    grad_mu = -(w @ z)
    observed = first + _second_order_term(pattern, n_params, theta, grad_sigma, grad_mu)
    return ObservedInformation(observed, first)


def fiml_information(layout: Layout, theta: np.ndarray, values: np.ndarray,
                     patterns: Patterns, moments: PatternMoments, *,
                     variance: bool = True) -> FimlInformation:
    """Observed information and casewise-score products of a FIML fit
    (``layout`` with intercepts, one group): what the Yuan–Bentler
    corrections need (:func:`yuan_bentler`).  ``A_β`` is built and factored
    once; ``B_β`` is never formed (:mod:`~scalewright.estimate.yuan_bentler`).
    Without ``variance``, what ``tr((UΓ)²)`` alone needs is skipped (the
    adjusted statistic is then NaN).  The standard errors alone need only
    :func:`observed_information`."""
    pattern = layout.patterns[0]
    info = observed_information(pattern, layout.n_params, theta, moments)
    mats = pattern.matrices(theta)
    mu, sigma = mats.implied_mean, mats.implied_cov
    emb = _embedded_inverses(sigma, moments.masks)
    a_beta, _, _ = saturated_information(moments, mu, sigma, emb)
    delta = pattern_jacobian(pattern, theta, layout.n_params)
    traces = score_traces(a_beta, saturated_score_chunks(values, patterns, mu, sigma, emb),
                          patterns.n, delta, variance=variance)
    return FimlInformation(info.observed, info.first_order, traces.meat / patterns.n, traces)


def observed_acov(info: FimlInformation, n: int) -> np.ndarray:
    """Normal-theory covariance of θ̂ from the observed information, ``(N Ã_θ)⁻¹``."""
    return spd_inverse(info.observed) / n


def yuan_bentler(info: FimlInformation, n: int, chi_square: float, df: int) -> RobustML:
    """Sandwich covariance of θ̂ and the scaled/adjusted statistics under
    missing data (Yuan & Bentler 2000; formulas in the module docstring, the
    traces by :func:`~scalewright.estimate.yuan_bentler.corrected_traces`)."""
    obs_inv = spd_inverse(info.observed)
    acov = obs_inv @ info.meat @ obs_inv / n
    trace, square = corrected_traces(info.traces, info.first_order, n)
    return RobustML(acov, RobustTest(float(chi_square), int(df), trace, square))


def baseline_yuan_bentler(values: np.ndarray, patterns: Patterns, moments: PatternMoments,
                          saturated: Saturated) -> RobustTest:
    """Scaled test of the independence model under missing data (for robust
    CFI/TLI, which need only its scaling factor: as for complete data,
    :func:`scalewright.estimate.robust.baseline_test`, ``tr((UΓ)²)`` is not
    computed and ``trace_squared`` is NaN)."""
    loglik, mean, var = independence_fiml(values)
    layout = with_intercepts(independence_layout(patterns.items, var), mean)
    theta = np.concatenate([var, mean])
    info = fiml_information(layout, theta, values, patterns, moments, variance=False)
    chi2 = 2.0 * (saturated.loglik - loglik)
    return yuan_bentler(info, patterns.n, chi2, layout.df()).test


def saturated_model(values: np.ndarray, items: tuple[str, ...],
                    where: str) -> tuple[PatternMoments, Saturated]:
    """The pattern moments of the answers (NaN = missing) and the saturated
    model fitted to them by EM: the 'observed' moments that residuals under
    FIML are judged against."""
    moments = pattern_moments(values, missing_patterns(values, tuple(items), where))
    return moments, saturated_em(moments)


def saturated_covariance(values: np.ndarray, items: tuple[str, ...], where: str) -> np.ndarray:
    """The ML covariance matrix of the items with missing answers (EM on the
    saturated model, :func:`saturated_model`)."""
    return saturated_model(values, items, where)[1].cov
