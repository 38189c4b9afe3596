"""``tr((UΓ)²)`` of complete-data robust ML, exactly, from casewise quantities.

The mean-and-variance adjusted statistic (Satorra & Bentler 1994; see
:mod:`scalewright.estimate.robust`) needs ``tr((UΓ)²)``, the one quantity of
the robust corrections that is a genuine fourth moment.  It is computed here
without the dense ``p* × p*`` fourth-moment matrix whenever that is cheaper,
and exactly (every row) up to a stated budget.

Whitened case contributions.  With the model-implied ``V = Σ̂⁻¹ = L Lᵀ``, the
whitened centred cases ``y_i = Lᵀ(x_i − x̄)``, ``Ŝ = LᵀSL`` and

    e_i = vechʷ(y_i y_iᵀ − Ŝ) / √2

(``vechʷ``: the lower triangle with off-diagonal elements times √2), so that
``e_iᵀ e_j = ½ tr((y_iy_iᵀ − Ŝ)(y_jy_jᵀ − Ŝ))``, the matrix
``G = (1/N) Σ_i e_i e_iᵀ`` is ``Γ̂`` in the metric of the normal-theory weight
``W = ½ Dᵀ(V⊗V)D`` (``G = K W^½ Γ̂ W^½ Kᵀ`` for an orthogonal ``K``).  The
whitened derivatives ``Δ̃`` (``p* × q``, column ``c`` is ``vechʷ(Lᵀ ∂Σ/∂θ_c L)/√2``)
satisfy ``Δ̃ᵀΔ̃ = I``, the expected information per case; with ``R Rᵀ = I⁻¹``
the columns of ``A = Δ̃R`` are orthonormal and ``P = AAᵀ`` projects on the
model's tangent directions.  ``UΓ`` has the non-zero eigenvalues of
``(1 − P) G (1 − P)``, hence

    tr((UΓ)²) = tr(((1 − P)G)²) = tr(G²) − 2 ‖GA‖²_F + ‖AᵀGA‖²_F.

Casewise form.  The casewise scores ``s_i = Δ̃ᵀ e_i`` are those of the
sandwich, ``s_ic = (y_iᵀã_c)(y_iᵀb̃_c) − ã_cᵀŜb̃_c`` with ``ã = Lᵀa``,
``b̃ = Lᵀb`` the rank-two cell derivatives; with ``s̃_i = Rᵀ s_i``,

    AᵀGA = (1/N) Σ_i s̃_i s̃_iᵀ                  (the whitened meat, q × q),
    ‖GA‖²_F = (1/N²) Σ_ij k_ij s̃_iᵀ s̃_j,     tr(G²) = (1/N²) Σ_ij k_ij²,
    k_ij = e_iᵀe_j = ½ [(y_iᵀy_j)² − β_i − β_j],   β_i = y_iᵀŜy_i − ½ tr(Ŝ²).

Only the last two sums involve pairs of cases.  Two exact routes:

* **kernel**: the ``N × N`` matrices ``(y_iᵀy_j)`` and ``(s̃_iᵀs̃_j)`` in
  blocks of :data:`KERNEL_BLOCK` rows, the upper block triangle only, never
  held whole: about ``N²(p + q)`` flops and ``O(N(p + q))`` memory;
* **Gram**: ``G`` accumulated over chunks of cases by a symmetric rank-k
  update of the centred pair products, about ``N p*²`` flops and ``p*²``
  memory; then ``GA`` and ``AᵀGA`` are thin products.

The cheaper route by the estimated cost (:func:`route_costs`, in units of
the Gram's update rate) is taken.  When even that exceeds
:data:`FLOP_BUDGET` (about 15 s at the 30–40 GFLOPS the update reaches on
one core of the development machine, so that a whole check of 1,000,000
rows × 50 items stays within the minute issue 2 allows; exact up to about
265,000 rows at 50 items, 26,000 at 100) the trace is computed on a seeded
random subsample of as many rows as the budget allows, and the result says
so (:attr:`VarianceTrace.subsample`).  With the budget at 3e12 (exact at
1,000,000 × 50) the whole check took 72 s of CPU instead of 44.  ``tr((UΓ)²)`` only sets
the adjusted degrees of freedom; estimated from ``m`` rows its relative
sampling error is of order ``1/√m``.

References
----------
Satorra, A. & Bentler, P. M. (1994). Corrections to test statistics and
standard errors in covariance structure analysis. In von Eye & Clogg (eds.),
Latent Variables Analysis, 399–419. Sage.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.linalg import blas

from scalewright.estimate.spd_inverse import spd_inverse

KERNEL, GRAM = "kernel", "gram"

#: largest estimated cost (flops at the Gram update's rate) of an exact computation
FLOP_BUDGET = 5e11
#: largest p* × p* Gram matrix held, in bytes
GRAM_MEMORY_BUDGET = 2 * 2 ** 30
#: rows per block of the pairwise kernel
KERNEL_BLOCK = 1024
#: elements (float64) in one chunk of pair products: 64 MiB
CHUNK_ELEMENTS = 2 ** 23
#: cost of one elementwise pass over one element, in flops at the update's rate
#: (measured: ~1 ns per element against 40–60 GFLOPS for the rank-k update)
ELEMENTWISE = 40.0
#: the kernel's products have a thin inner dimension (p or q) and run at about
#: half the rank-k update's rate (measured at p = 12 to 100)
KERNEL_GEMM_PENALTY = 2.0


@dataclass(frozen=True)
class VarianceTrace:
    """``tr((UΓ)²)`` and how it was computed.

    ``rows`` is the number of cases it was computed from, ``n`` the sample
    size; ``exact_cost`` the estimated cost of the cheaper exact route on all
    ``n`` rows (flops at the Gram update's rate).
    """

    value: float
    route: str
    rows: int
    n: int
    exact_cost: float

    @property
    def subsample(self) -> bool:
        return self.rows < self.n

    def note(self, p: int) -> str | None:
        """The sentence for the report when a subsample was used, else ``None``."""
        if not self.subsample:
            return None
        return (f"The mean-and-variance adjusted statistic and its degrees of freedom rest on "
                f"tr((UΓ)²), computed on a seeded random subsample of {self.rows:,} of the "
                f"{self.n:,} rows: the exact computation for {p} items would cost about "
                f"{self.exact_cost:.1e} floating-point operations, over the budget of "
                f"{FLOP_BUDGET:.0e}. The standard errors, the scaled statistic and the robust "
                "fit indices use every row.")


def route_costs(m: int, p: int, q: int) -> dict[str, float]:
    """Estimated cost of each exact route on ``m`` rows (flops at the rank-k
    update's rate); the Gram route is absent when its matrix would exceed
    :data:`GRAM_MEMORY_BUDGET`."""
    p_star = p * (p + 1) // 2
    kernel = 0.5 * m * m * (KERNEL_GEMM_PENALTY * 2.0 * (p + q) + 5.0 * ELEMENTWISE) \
        + m * (p + q) * (2.0 * p + ELEMENTWISE)
    costs = {KERNEL: kernel}
    if 8.0 * p_star * p_star <= GRAM_MEMORY_BUDGET:
        costs[GRAM] = m * p_star * (p_star + 5.0 * ELEMENTWISE) + 4.0 * p_star * p_star * q
    return costs


def _rows_within_budget(n: int, p: int, q: int) -> int:
    """The largest row count whose cheaper exact route fits :data:`FLOP_BUDGET`."""
    lo, hi = 1, n
    while lo < hi:
        mid = (lo + hi + 1) // 2
        if min(route_costs(mid, p, q).values()) <= FLOP_BUDGET:
            lo = mid
        else:
            hi = mid - 1
    return lo


def variance_trace(x: np.ndarray, mean: np.ndarray, cov: np.ndarray, v: np.ndarray,
                   a: np.ndarray, b: np.ndarray, inc: np.ndarray, info: np.ndarray,
                   *, route: str | None = None) -> VarianceTrace:
    """``tr((UΓ)²)`` of an ML fit (formulas in the module docstring).

    Parameters
    ----------
    x : ndarray, N × p
        The complete data.
    mean, cov : ndarray
        Sample mean and covariance (divisor N) of all of ``x``.
    v : ndarray
        ``Σ̂⁻¹`` at the estimates.
    a, b : ndarray, p × cells
        Rank-two cell derivatives (:func:`scalewright.layout.cell_derivatives`).
    inc : ndarray, cells × q
        Cell-to-parameter incidence.
    info : ndarray, q × q
        Expected information per case, ``incᵀ(cell information)inc``.
    route : {"kernel", "gram"} or None
        Force one exact route (tests); ``None`` takes the cheaper one, and a
        seeded subsample beyond :data:`FLOP_BUDGET`.
    """
    n, p = x.shape
    q = inc.shape[1]
    costs = route_costs(n, p, q)
    exact_cost = min(costs.values())
    rows = n
    if route is None:
        if exact_cost > FLOP_BUDGET:
            rows = _rows_within_budget(n, p, q)
            costs = route_costs(rows, p, q)
        route = min(costs, key=costs.get)
    if rows < n:
        pick = np.sort(np.random.default_rng(n).choice(n, rows, replace=False))
        x = x[pick]
    low = np.linalg.cholesky(v)                    # V = L Lᵀ; y = Lᵀ(x − x̄)
    white_cov = low.T @ cov @ low                  # Ŝ
    at, bt = low.T @ a, low.T @ b
    r = np.linalg.cholesky(spd_inverse(info))       # R Rᵀ = I⁻¹
    if route == KERNEL:
        value = _kernel_route(x, mean, low, white_cov, at, bt, inc @ r)
    elif route == GRAM:
        value = _gram_route(x, mean, low, white_cov, at, bt, inc @ r)
    else:
        raise ValueError(f"unknown route {route!r}")
    return VarianceTrace(float(value), route, int(len(x)), int(n), float(exact_cost))


def _chunk_rows(width: int) -> int:
    return max(256, CHUNK_ELEMENTS // max(width, 1))


def _kernel_route(x, mean, low, white_cov, at, bt, inc_r) -> float:
    """Blocked sums over pairs of cases of ``k_ij²`` and ``k_ij s̃_iᵀs̃_j``."""
    m = len(x)
    y = (x - mean) @ low
    shift = np.einsum("ic,ic->c", at, white_cov @ bt)
    s = ((y @ at) * (y @ bt) - shift) @ inc_r                      # s̃_i, m × q
    beta = np.einsum("ij,ij->i", y @ white_cov, y) - 0.5 * float(np.sum(white_cov * white_cov))
    sum_kk = sum_ks = 0.0
    for i0 in range(0, m, KERNEL_BLOCK):
        yi, si, bi = y[i0:i0 + KERNEL_BLOCK], s[i0:i0 + KERNEL_BLOCK], beta[i0:i0 + KERNEL_BLOCK]
        for j0 in range(i0, m, KERNEL_BLOCK):
            twice_k = yi @ y[j0:j0 + KERNEL_BLOCK].T                  # 2 k_ij, built in place
            twice_k *= twice_k
            twice_k -= bi[:, None]
            twice_k -= beta[j0:j0 + KERNEL_BLOCK][None, :]
            ss = si @ s[j0:j0 + KERNEL_BLOCK].T
            weight = 1.0 if j0 == i0 else 2.0                       # the lower block mirrors
            flat = twice_k.ravel()
            sum_kk += weight * float(flat @ flat)
            sum_ks += weight * float(flat @ ss.ravel())
    meat = s.T @ s / m                                              # AᵀGA
    return 0.25 * sum_kk / m ** 2 - sum_ks / m ** 2 + float(np.sum(meat * meat))


def _gram_route(x, mean, low, white_cov, at, bt, inc_r) -> float:
    """``G`` from a chunked symmetric rank-k update of the centred pair
    products; only its upper triangle is held (one ``p* × p*`` array)."""
    m, p = x.shape
    rows, cols = np.tril_indices(p)
    weight = np.where(rows == cols, np.sqrt(0.5), 1.0)
    tangent = ((at[rows] * bt[cols] + bt[rows] * at[cols]) * weight[:, None]) @ inc_r   # A
    centre = white_cov[rows, cols] * weight
    upper = np.zeros((len(rows), len(rows)), order="F")
    step = _chunk_rows(len(rows))
    for start in range(0, m, step):
        y = (x[start:start + step] - mean) @ low
        e = np.take(y, rows, axis=1)                                # a gather, not fancy indexing
        e *= np.take(y, cols, axis=1)
        e *= weight
        e -= centre
        upper = blas.dsyrk(1.0 / m, e.T, beta=1.0, c=upper, overwrite_c=1)   # += eᵀe/m
    flat = upper.ravel(order="K")
    diagonal = np.diagonal(upper)
    trace_g2 = 2.0 * float(flat @ flat) - float(diagonal @ diagonal)      # ‖G‖²_F
    ga = blas.dsymm(1.0, upper, tangent, side=0, lower=0)
    aga = tangent.T @ ga
    return trace_g2 - 2.0 * float(np.sum(ga * ga)) + float(np.sum(aga * aga))
