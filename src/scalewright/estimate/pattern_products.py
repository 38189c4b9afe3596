"""Cell products of :mod:`~scalewright.estimate.cell_products` summed over
the missing-data patterns of a group.

Pattern ``k`` (weight ``w_k = n_k/N``) has its own symmetric matrices (the
embedded inverse ``V_k`` and others); every cell pair ``c, d`` needs
bilinear forms of two of them, ``X_k`` and ``Y_k``:

    F(X, Y)[c, d] = Σ_k w_k [ (AᵀX_kA)∘(BᵀY_kB) + (AᵀX_kB)∘(BᵀY_kA) ],

with ``A``, ``B`` the columns ``a_c``, ``s_c b_c`` of the rank-two cell
derivatives ``∂Σ/∂c = s_c(a_c b_cᵀ + b_c a_cᵀ)``.  ``F(V, V)`` is the
expected information ``Σ_k w_k ½ tr(V_k ∂_cΣ V_k ∂_dΣ)``.  Every column of
``A`` and ``B`` is a column of ``W = [I | G | H | 0]`` (``CellFactors``),
so ``WᵀX_kW`` (:func:`~scalewright.estimate.cell_products.sandwich`, built by blocks, a ``p × (m + p + 1)`` and an
``(m + p + 1)² × p`` product per pattern) holds all the products and the
rest is gathering, a few ``c × c`` arrays per pattern: cheaper than the
``p × c`` products ``X_kA``, ``AᵀX_kA`` per pattern.  The scales ``s_c s_d``
multiply both terms alike, so they are applied once to the sum.

Patterns are taken in chunks of a bounded number of gathered elements.
"""

from __future__ import annotations

import numpy as np

from scalewright.estimate.cell_products import CellIndex

#: gathered elements per chunk of patterns (2²¹ doubles, 16 MB per array)
CHUNK_ELEMENTS = 2 ** 21


def _chunks(k: int, width: int):
    """Chunks of patterns whose ``width`` gathered elements each hold about ``CHUNK_ELEMENTS``."""
    step = max(1, CHUNK_ELEMENTS // max(width, 1))
    return range(0, k, step), step


def _flat(rows: np.ndarray, cols: np.ndarray, n: int) -> np.ndarray:
    """Positions of ``M[rows][:, cols]`` in a row-major ``n × n`` matrix, flattened."""
    return (rows[:, None] * n + cols[None, :]).ravel()


def pair_form(index: CellIndex, wxw: np.ndarray, wyw: np.ndarray,
              weights: np.ndarray) -> np.ndarray:
    """``F(X, Y)`` (module docstring) from the stacks ``WᵀX_kW`` and ``WᵀY_kW``.

    Cells with ``s_c = 0`` (intercepts, latent means) have no ``∂Σ`` and are
    left out of the gathers; each gather is one ``take`` of flat positions
    per chunk of patterns (faster than gathering rows, then columns, when
    the stack has many patterns)."""
    live = np.nonzero(index.s)[0]
    a, b = index.a[live], index.b[live]
    k, n, _ = wxw.shape
    positions = [_flat(a, a, n), _flat(b, b, n), _flat(a, b, n), _flat(b, a, n)]
    x_flat, y_flat = wxw.reshape(k, n * n), wyw.reshape(k, n * n)
    live_form = np.zeros(len(live) ** 2)
    starts, step = _chunks(k, 2 * len(live_form))
    for lo in starts:
        x, y = x_flat[lo:lo + step], y_flat[lo:lo + step]
        form = np.take(x, positions[0], axis=1)
        form *= np.take(y, positions[1], axis=1)
        cross = np.take(x, positions[2], axis=1)
        cross *= np.take(y, positions[3], axis=1)
        form += cross
        live_form += weights[lo:lo + step] @ form
    s = index.s[live]
    live_form = live_form.reshape(len(live), len(live))
    live_form *= s
    live_form *= s[:, None]
    total = np.zeros((len(index.s),) * 2)
    total[np.ix_(live, live)] = live_form
    return total


def mean_pair_form(index: CellIndex, wvw: np.ndarray, zeta: np.ndarray,
                   weights: np.ndarray) -> np.ndarray:
    """``Σ_k w_k zᵀ(∂_cΣ)V_k(∂_dμ)`` for every cell pair, with ``ζ_k = Wᵀz_k``
    (``K × (columns of W)``) and ``WᵀV_kW``: expanding the rank-two
    ``∂_cΣ``, ``s_c ms_d [ζ_k[a_c] (WᵀV_kW)[b_c, μ_d] + ζ_k[b_c] (WᵀV_kW)[a_c, μ_d]]``
    with ``∂_dμ = ms_d W[:, μ_d]``.  Only cells with ``s_c ≠ 0`` (rows) and
    ``ms_d ≠ 0`` (columns) are gathered."""
    rows, cols = np.nonzero(index.s)[0], np.nonzero(index.mu_scale)[0]
    a, b, mu = index.a[rows], index.b[rows], index.mu[cols]
    k, n, _ = wvw.shape
    at_b, at_a = _flat(b, mu, n), _flat(a, mu, n)
    v_flat = wvw.reshape(k, n * n)
    live_form = np.zeros((len(rows), len(cols)))
    starts, step = _chunks(k, 2 * len(at_a))
    for lo in starts:
        v, z, w = v_flat[lo:lo + step], zeta[lo:lo + step], weights[lo:lo + step]
        first = np.take(v, at_b, axis=1).reshape(len(v), len(rows), len(cols))
        first *= z[:, a, None]
        second = np.take(v, at_a, axis=1).reshape(len(v), len(rows), len(cols))
        second *= z[:, b, None]
        first += second
        live_form += np.tensordot(w, first, axes=1)
    live_form *= index.s[rows][:, None]
    live_form *= index.mu_scale[cols]
    total = np.zeros((len(index.s),) * 2)
    total[np.ix_(rows, cols)] = live_form
    return total
