"""Polyserial correlations of continuous with ordinal items, and their casewise influence.

Model (Olsson, Drasgow & Dorans 1982).  A continuous item ``X`` and the
latent response ``Y*`` of an ordinal item are bivariate normal with
correlation ``ρ``; the answer is category ``k`` (0-based) when
``τ_k < Y* ≤ τ_{k+1}``, with ``τ_0 = −∞`` and ``τ_K = +∞``.  Given
``z = (x − μ)/σ``, ``Y*`` is normal with mean ``ρz`` and variance
``1 − ρ²``, so the joint density of an answer pair is

    f(x, k) = φ(z)/σ · P_k(z),    P_k(z) = Φ(a_{k+1}) − Φ(a_k),
    a_c = (τ_c − ρz)/s,           s = √(1 − ρ²).

Two-step estimator (Olsson, Drasgow & Dorans 1982, the "two-step" maximum
likelihood estimator): ``μ`` and ``σ`` are the mean and the maximum
likelihood (÷ n) standard deviation of the continuous item and
``τ_c = Φ⁻¹(proportion of answers at or below category c − 1)`` come from the
ordinal item, each from every row that answered that item (its own
margin, as for the polychoric thresholds); then ``ρ`` maximises

    l(ρ) = Σ_i log P_{k_i}(z_i)

over the rows that answered both items (pairwise); ``φ(z)/σ`` does not
involve ``ρ``.  With ``b_c = ∂a_c/∂ρ = (ρτ_c − z)/s³`` and
``∂²a_c/∂ρ² = τ_c/s³ + 3ρ(ρτ_c − z)/s⁵``,

    ∂P/∂ρ   = φ(a_{k+1}) b_{k+1} − φ(a_k) b_k,
    ∂²P/∂ρ² = [φ(a)(∂²a/∂ρ² − a b²)]_{k+1} − [ … ]_k.

Every pair is solved at once by a safeguarded Newton iteration on arrays
(the safeguard of :mod:`scalewright.estimate.polychoric`).

Casewise influence (the sandwich form of the two-step estimator; Muthén
1984 for the same construction with polychoric correlations).  Linearising
the estimating equation ``(1/n_jl) Σ_i ∂log P_i/∂ρ = 0`` in ``ρ`` and in
the first-step estimates ``t = (τ, μ, σ)`` gives the influence of row ``i``
on ``ρ̂`` (n rows, n_jl answering both items, n_j and n_l each item):

    v_i = [(n/n_jl) g_i − Σ_c J_c u_ic − J_m u_im − J_q u_iq] / J_ρρ,

with ``g_i = ∂log P_i/∂ρ`` (zero for rows missing either item),
``J_ρρ = −mean ∂²log P/∂ρ²`` and ``J_t = −mean ∂²log P/∂ρ∂t`` (observed
information, averaged over the rows answering both), and the first-step
influences

    thresholds  u_ic = (n/n_l) [1(k_i ≤ c − 1) − Φ(τ_c)] / φ(τ_c),
    mean        u_im = (n/n_j) z_i                     (δμ in units of σ),
    SD          u_iq = (n/n_j) (z_i² − 1)/2            (δσ in units of σ).

The mixed partial derivatives use ``∂a_c/∂τ_c = 1/s``,
``∂²a_c/∂ρ∂τ_c = ρ/s³``, ``∂a/∂z = −ρ/s`` and ``∂²a/∂ρ∂z = −1/s³``;
a shift ``δμ`` moves ``z`` by ``−δμ/σ`` and ``δσ`` by ``−z δσ/σ``, so
``J_m = mean ∂²log P/∂ρ∂z`` and ``J_q = mean z ∂²log P/∂ρ∂z``.

References
----------
Olsson, U., Drasgow, F. & Dorans, N. J. (1982). The polyserial correlation
coefficient. Psychometrika 47, 337–347.
Muthén, B. (1984). A general structural equation model with dichotomous,
ordered categorical, and continuous latent variable indicators.
Psychometrika 49, 115–132.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.special import ndtr

from scalewright.errors import StudyError
from scalewright.estimate.polychoric import MIN_PAIR_ROWS, rho_search

# The correlation search stays inside (-1, 1) by this margin (as the polychoric one).
_RHO_BOUND = 1.0 - 1e-6
_SQRT_2PI = np.sqrt(2.0 * np.pi)
# Pairs are solved in blocks of about this many (pair, row) cells, which bounds
# the working memory to some tens of MB per array (common practice, no source).
_BLOCK_CELLS = 1 << 20


@dataclass(frozen=True)
class ContinuousMargins:
    """Mean, maximum likelihood SD and z-scores of continuous items.

    ``z`` is ``(x − mean)/sd`` (NaN where the answer is missing); ``n_obs``
    counts each item's answers.
    """

    mean: np.ndarray
    sd: np.ndarray
    z: np.ndarray
    n_obs: np.ndarray


def continuous_margins(x: np.ndarray, items) -> ContinuousMargins:
    """Means and ÷ n standard deviations of the columns of ``x`` from their own answers.

    Raises
    ------
    StudyError
        An item with fewer than two answers or with one value only.
    """
    x = np.asarray(x, dtype=float)
    seen = ~np.isnan(x)
    n_obs = seen.sum(axis=0)
    few = np.flatnonzero(n_obs < 2)
    if few.size:
        j = few[0]
        raise StudyError(
            f"Item '{items[j]}' (continuous) has {n_obs[j]} answer{'' if n_obs[j] == 1 else 's'}, "
            "too few for a mean and a standard deviation. Check the item's column name and its "
            "missing-value codes in the model file, or leave the item out of the model.")
    zeroed = np.where(seen, x, 0.0)
    mean = zeroed.sum(axis=0) / n_obs
    sd = np.sqrt(np.where(seen, (x - mean) ** 2, 0.0).sum(axis=0) / n_obs)
    constant = np.flatnonzero(sd == 0)
    if constant.size:
        j = constant[0]
        raise StudyError(
            f"Item '{items[j]}' (continuous) has the same answer in all {n_obs[j]} rows that "
            "answered it, so it carries no information about correlations. Leave it out of "
            "the model.")
    return ContinuousMargins(mean, sd, (x - mean) / sd, n_obs)


@dataclass(frozen=True)
class PolyserialPairs:
    """Polyserial correlations of every (continuous, ordinal) item pair.

    ``continuous`` and ``ordinal`` index the columns of the ``z`` and
    ``codes`` arrays the pairs were estimated from; ``influence`` (n × pairs) holds the casewise
    influence of the module docstring, so that
    ``influence.T @ influence / n²`` is the sampling covariance of the
    estimates including the first-step uncertainty.
    """

    continuous: np.ndarray
    ordinal: np.ndarray
    rho: np.ndarray
    influence: np.ndarray


def polyserial_pairs(z: np.ndarray, codes: np.ndarray, bounds: np.ndarray, n_obs_cont: np.ndarray,
                     continuous: np.ndarray, ordinal: np.ndarray, names_cont, names_ord
                     ) -> PolyserialPairs:
    """Two-step polyserial correlations of the pairs (``continuous[s]``, ``ordinal[s]``).

    Parameters
    ----------
    z : ndarray (n, c)
        Continuous items standardized by :func:`continuous_margins`, NaN for
        a missing answer.
    codes : ndarray of int (n, o)
        Category index 0 … K_l − 1 of every ordinal answer, ``k_max`` for a
        missing one.
    bounds : ndarray (o, k_max + 1)
        ``−∞, τ_1 … τ_{K−1}, +∞`` of every ordinal item, padded with ``+∞``.
    n_obs_cont : ndarray (c,)
        Answers to each continuous item (the first step's n_j).
    continuous, ordinal : ndarray of int (P,)
        Columns of ``z`` and ``codes`` forming each pair.
    names_cont, names_ord : sequences of str
        Item names, for messages.

    Raises
    ------
    StudyError
        A pair answered together by fewer than ``MIN_PAIR_ROWS`` rows; a pair
        in whose common rows the continuous item is constant or the ordinal
        item uses one category only; a pair whose correlation reaches ±1.
    """
    n = z.shape[0]
    k_max = bounds.shape[1] - 1
    names = [(names_cont[c], names_ord[o]) for c, o in zip(continuous, ordinal)]
    answered_both = (~np.isnan(z)).T.astype(float) @ (codes < k_max).astype(float)
    n_both = np.rint(answered_both[continuous, ordinal]).astype(int)
    _require_rows(n_both, names)
    # pairs in blocks, so that the (pairs × n) working arrays stay near _BLOCK_CELLS
    size = max(1, _BLOCK_CELLS // max(n, 1))
    blocks = [slice(start, start + size) for start in range(0, continuous.size, size)]
    solved = [_solve_block(z, codes, bounds, n_obs_cont, continuous[b], ordinal[b], names[b])
              for b in blocks]
    return PolyserialPairs(continuous, ordinal, np.concatenate([r for r, _ in solved]),
                           np.hstack([u for _, u in solved]))


def _solve_block(z, codes, bounds, n_obs_cont, continuous, ordinal, names):
    """Estimates and influence (n, P) of one block of pairs."""
    n = z.shape[0]
    k_max = bounds.shape[1] - 1
    zc = z[:, continuous].T
    kc = codes[:, ordinal].T
    used = ~np.isnan(zc) & (kc < k_max)
    _require_variation(zc, kc, used, used.sum(axis=1), names)
    zs = np.where(used, zc, 0.0)
    safe_codes = np.where(used, kc, 0)
    lower = np.take_along_axis(bounds[ordinal], safe_codes, axis=1)
    upper = np.take_along_axis(bounds[ordinal], safe_codes + 1, axis=1)
    rho = _solve_pairs(zs, lower, upper, used, names)
    _require_inside(rho, zs, lower, upper, used, names)
    influence = _influence(rho, zs, lower, upper, used, safe_codes, kc, bounds, ordinal, zc,
                           n_obs_cont[continuous], n)
    return rho, influence


# --------------------------------------------------------------------------
# Checks on pairs


def _require_rows(n_both, names):
    short = np.flatnonzero(n_both < MIN_PAIR_ROWS)
    if short.size:
        listed = "; ".join(f"'{names[s][0]}' and '{names[s][1]}' ({n_both[s]} rows)"
                           for s in short[:5])
        more = f" and {short.size - 5} more pairs" if short.size > 5 else ""
        raise StudyError(
            f"Too few respondents answered both items of a continuous-ordinal pair: {listed}"
            f"{more}. A polyserial correlation needs at least {MIN_PAIR_ROWS} rows observed on "
            "both items. Check the missing-value codes of these items, or leave one item of "
            "each pair out of the model.")


def _require_variation(zc, kc, used, n_both, names):
    """Both items of a pair must vary within the rows that answered both."""
    big = np.finfo(float).max
    z_hi = np.where(used, zc, -big).max(axis=1)
    z_lo = np.where(used, zc, big).min(axis=1)
    k_hi = np.where(used, kc, -1).max(axis=1)
    k_lo = np.where(used, kc, np.iinfo(kc.dtype).max).min(axis=1)
    flat = np.flatnonzero(z_hi == z_lo)
    if flat.size:
        s = flat[0]
        raise StudyError(
            f"Item '{names[s][0]}' (continuous) has the same answer in all {n_both[s]} rows "
            f"that also answered '{names[s][1]}', so the polyserial correlation of the two is "
            "undefined. Check the missing-value codes of both items, or leave one of them out "
            "of the model.")
    single = np.flatnonzero(k_hi == k_lo)
    if single.size:
        s = single[0]
        raise StudyError(
            f"Item '{names[s][1]}' (ordinal) has a single answer category in all {n_both[s]} "
            f"rows that also answered '{names[s][0]}', so the polyserial correlation of the two "
            "is undefined. Check the missing-value codes of both items, or leave one of them "
            "out of the model.")


def _require_inside(rho, z, lower, upper, used, names):
    """Raise if a pair's likelihood is as high at ρ = ±1 as at its estimate
    (the continuous item separates the categories perfectly)."""
    here = _log_likelihood(rho, z, lower, upper, used)
    at_edge = _log_likelihood(np.where(rho >= 0, _RHO_BOUND, -_RHO_BOUND), z, lower, upper, used)
    edge = np.flatnonzero(at_edge >= here - 1e-9 * np.abs(here))
    if edge.size:
        s = edge[0]
        raise StudyError(
            f"The polyserial correlation of items '{names[s][0]}' (continuous) and "
            f"'{names[s][1]}' (ordinal) reaches {'+' if rho[s] > 0 else '-'}1: the continuous "
            "answers separate the ordinal categories perfectly, which usually means one item "
            "was computed from the other. Leave one of the two items out of the model.")


# --------------------------------------------------------------------------
# The likelihood of all pairs


def _bound(tau, r, s, z):
    """At one category bound, all (P, n): a (±∞ kept), a with 0 for ±∞, φ(a), ∂a/∂ρ, ∂²a/∂ρ².

    Where the bound is infinite the density and both derivatives are zero.
    """
    finite = np.isfinite(tau)
    t = np.where(finite, tau, 0.0)
    a_finite = (t - r * z) / s
    a_finite *= finite
    density = np.exp(-0.5 * a_finite * a_finite) * (finite / _SQRT_2PI)
    lean = r * t - z
    slope = lean * (finite / s ** 3)
    curve = (t + (3.0 * r / (s * s)) * lean) * (finite / s ** 3)
    return np.where(finite, a_finite, tau), a_finite, density, slope, curve


def _probability(a_lo, a_up):
    """Φ(a_up) − Φ(a_lo), from the upper tail when both bounds are above 0 (no cancellation):
    with ``g = −1`` there and ``+1`` elsewhere it is ``g (Φ(g a_up) − Φ(g a_lo))``."""
    sign = np.where(a_lo > 0, -1.0, 1.0)
    return sign * (ndtr(sign * a_up) - ndtr(sign * a_lo))


def _rho_terms(rho, z, lower, upper):
    """P, ∂P/∂ρ and ∂²P/∂ρ² of every row's observed category, (P, n) each."""
    r = rho[:, None]
    s = np.sqrt(1.0 - r * r)
    a_lo, af_lo, d_lo, b_lo, c_lo = _bound(lower, r, s, z)
    a_up, af_up, d_up, b_up, c_up = _bound(upper, r, s, z)
    prob = _probability(a_lo, a_up)
    d1 = d_up * b_up - d_lo * b_lo
    d2 = d_up * (c_up - af_up * b_up ** 2) - d_lo * (c_lo - af_lo * b_lo ** 2)
    return prob, d1, d2


def _log_likelihood(rho, z, lower, upper, used):
    """Σ log P over the rows answering both items; −∞ if such a row is impossible."""
    r = rho[:, None]
    s = np.sqrt(1.0 - r * r)
    prob = _probability(_bound(lower, r, s, z)[0], _bound(upper, r, s, z)[0])
    with np.errstate(divide="ignore"):
        terms = np.where(used, np.log(np.where(used, prob, 1.0)), 0.0)
    return terms.sum(axis=1)


def _solve_pairs(z, lower, upper, used, names):
    """Maximise every pair's l(ρ), all pairs in lock-step, by the safeguarded
    Newton search of the polychoric correlations
    (:func:`scalewright.estimate.polychoric.rho_search`) on
    ``l' = Σ P'/P`` and ``l'' = Σ (P''/P − (P'/P)²)``.
    """

    def derivatives(active, r):
        prob, d1, d2 = _rho_terms(r, z[active], lower[active], upper[active])
        use = used[active]
        with np.errstate(divide="ignore", invalid="ignore"):
            ratio = np.where(use, d1 / prob, 0.0)
            grad = ratio.sum(axis=1)
            hess = np.where(use, d2 / prob, 0.0).sum(axis=1) - (ratio ** 2).sum(axis=1)
        # a row with no probability left: the likelihood is −∞ here and rises towards 0
        return grad, hess, np.any(use & (prob <= 0), axis=1)

    return rho_search(z.shape[0], derivatives, "polyserial",
                      lambda s: f"'{names[s][0]}'-'{names[s][1]}'")


# --------------------------------------------------------------------------
# Casewise influence


def _influence(rho, z, lower, upper, used, safe_codes, codes, bounds, ordinal, z_all, n_cont,
               n):
    """Casewise influence (n, P) of the module docstring."""
    r = rho[:, None]
    s = np.sqrt(1.0 - r * r)
    a_lo, af_lo, d_lo, b_lo, c_lo = _bound(lower, r, s, z)
    a_up, af_up, d_up, b_up, c_up = _bound(upper, r, s, z)
    prob = np.where(used, _probability(a_lo, a_up), 1.0)
    p_r = d_up * b_up - d_lo * b_lo
    p_rr = d_up * (c_up - af_up * b_up ** 2) - d_lo * (c_lo - af_lo * b_lo ** 2)
    # derivatives in the upper threshold, the lower threshold and z
    p_up, p_lo = d_up / s, -d_lo / s
    p_r_up = d_up * (r / s ** 3 - af_up * b_up / s)
    p_r_lo = -d_lo * (r / s ** 3 - af_lo * b_lo / s)
    p_z = -(r / s) * (d_up - d_lo)
    p_rz = d_up * (r * af_up * b_up / s - 1.0 / s ** 3) - d_lo * (r * af_lo * b_lo / s
                                                                  - 1.0 / s ** 3)
    score = np.where(used, p_r / prob, 0.0)

    def second(p_rt, p_t):  # ∂²log P/∂ρ∂t on the rows answering both
        return np.where(used, p_rt / prob - score * p_t / prob, 0.0)

    n_both = used.sum(axis=1)
    j_rr = -np.where(used, p_rr / prob, 0.0).sum(axis=1) / n_both + (score ** 2).sum(axis=1) / n_both
    l_rz = second(p_rz, p_z)
    j_m = l_rz.sum(axis=1) / n_both
    j_q = (l_rz * z).sum(axis=1) / n_both

    # Threshold part: J_c collects −∂²log P/∂ρ∂τ_c from the rows whose upper
    # bound is τ_c (category c − 1, 0-based) and whose lower bound is τ_c
    # (category c); bounds[:, c] is τ_c.
    n_pairs, k_max = rho.size, bounds.shape[1] - 1
    flat = np.arange(n_pairs)[:, None] * (k_max + 1) + safe_codes
    size = n_pairs * (k_max + 1)
    via_upper = np.bincount(flat.ravel(), second(p_r_up, p_up).ravel(), size)
    via_lower = np.bincount(flat.ravel(), second(p_r_lo, p_lo).ravel(), size)
    via_upper = via_upper.reshape(n_pairs, k_max + 1)
    via_lower = via_lower.reshape(n_pairs, k_max + 1)
    j_tau = -(via_upper[:, :k_max - 1] + via_lower[:, 1:k_max]) / n_both[:, None]  # τ_1 … τ_{k_max−1}
    u_table = _threshold_influence_table(bounds, codes, ordinal, n)        # (P, k_max+1, k_max−1)
    by_code = np.einsum("pac,pc->pa", u_table, j_tau)                        # (P, k_max+1)
    tau_part = np.take_along_axis(by_code, codes, axis=1)

    seen = ~np.isnan(z_all)
    z0 = np.where(seen, z_all, 0.0)
    scale_c = (n / n_cont)[:, None]
    u_m = scale_c * z0
    u_q = scale_c * np.where(seen, (z0 ** 2 - 1.0) / 2.0, 0.0)
    v = ((n / n_both)[:, None] * score - tau_part - j_m[:, None] * u_m - j_q[:, None] * u_q)
    return (v / j_rr[:, None]).T


def _threshold_influence_table(bounds, codes, ordinal, n):
    """u[pair, a, c]: influence of answer code ``a`` on threshold τ_{c+1} of the
    pair's ordinal item (row ``k_max``, a missing answer, is zero)."""
    k_max = bounds.shape[1] - 1
    tau = bounds[ordinal, 1:k_max]                                   # (P, k_max−1)
    valid = np.isfinite(tau)
    t = np.where(valid, tau, 0.0)
    density = np.exp(-t ** 2 / 2.0) / _SQRT_2PI
    n_item = (codes < k_max).sum(axis=1)
    below = np.arange(k_max + 1)[None, :, None] < np.arange(1, k_max)[None, None, :]
    table = (below - ndtr(t)[:, None, :]) / density[:, None, :]
    table = np.where(valid[:, None, :], table, 0.0) * (n / n_item)[:, None, None]
    table[:, k_max, :] = 0.0
    return table
