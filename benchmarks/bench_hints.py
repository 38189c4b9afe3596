"""Time the modification hints for 100 items on 10 constructs (about 6,000
candidates) and compare with the two other ways of getting the same numbers:

* the dense way: free every candidate at once and compute the expected
  information of that expanded model (about 6,000 × 6,000) with the engine's
  own rank-two information, then take each candidate's Schur complement;
* refitting: free one candidate at a time and refit (the likelihood-ratio
  route), timed on a few candidates and extrapolated to all of them.

Run from the project root:  .venv/bin/python benchmarks/bench_hints.py
BLAS is pinned to one thread, as in the engine (DEVELOPERS.md, "Speed").
"""

from __future__ import annotations

import dataclasses
import time
from types import SimpleNamespace

import numpy as np
from scipy import linalg
from threadpoolctl import threadpool_limits

from scalewright.estimate.normal import NormalFit
from scalewright.evaluate import evaluate_normal
from scalewright.hints import open_cells, score_tests
from scalewright.layout import LOADING, RESIDUAL_COV, Cells, Param

N_FACTORS, PER_FACTOR, N_CASES, SEED = 10, 10, 1000, 20240613


def simulated_study():
    rng = np.random.default_rng(SEED)
    p = N_FACTORS * PER_FACTOR
    lam = np.zeros((p, N_FACTORS))
    for j in range(N_FACTORS):
        lam[j * PER_FACTOR:(j + 1) * PER_FACTOR, j] = rng.uniform(0.5, 0.8, PER_FACTOR)
    phi = np.full((N_FACTORS, N_FACTORS), 0.3) + 0.7 * np.eye(N_FACTORS)
    sigma = lam @ phi @ lam.T
    sigma += np.diag(1.0 - np.diag(sigma))
    x = rng.standard_normal((N_CASES, p)) @ np.linalg.cholesky(sigma).T
    items = [f"i{k}" for k in range(p)]
    constructs = {f"f{j}": tuple(items[j * PER_FACTOR:(j + 1) * PER_FACTOR])
                  for j in range(N_FACTORS)}
    spec = SimpleNamespace(name="bench", constructs=constructs, cross_loadings={},
                           residual_covariances=(), higher_order={}, general=None,
                           identification="unit-variance", place="bench", items=tuple(items))
    return spec, x


def best_of(function, repeat):
    times = []
    for _ in range(repeat):
        start = time.perf_counter()
        value = function()
        times.append(time.perf_counter() - start)
    return min(times), value


def dense_indices(estimate):
    """MI of every candidate from the full information of the model with all of them free."""
    layout = estimate.layout
    pattern = layout.patterns[0]
    cand = open_cells(pattern)
    q = layout.n_params
    lam_new = np.column_stack([cand.lam_rows, cand.lam_cols, q + np.arange(len(cand.lam_rows))])
    res_new = np.column_stack([cand.res_rows, cand.res_cols,
                               q + len(cand.lam_rows) + np.arange(len(cand.res_rows))])
    old_lam = np.column_stack([pattern.loadings.rows, pattern.loadings.cols, pattern.loadings.params])
    old_res = np.column_stack([pattern.residuals.rows, pattern.residuals.cols, pattern.residuals.params])
    wide = dataclasses.replace(pattern, loadings=Cells.from_triples(np.vstack([old_lam, lam_new])),
                               residuals=Cells.from_triples(np.vstack([old_res, res_new])))
    params = layout.params + tuple(Param(LOADING, layout.factors[j], layout.items[i])
                                   for i, j in zip(cand.lam_rows, cand.lam_cols)) \
        + tuple(Param(RESIDUAL_COV, layout.items[k], layout.items[i])
                for i, k in zip(cand.res_rows, cand.res_cols))
    theta = np.concatenate([estimate.theta, np.zeros(len(cand))])
    expanded = dataclasses.replace(layout, patterns=(wide,), params=params, start=theta)
    _, grad, info = NormalFit(expanded, estimate.blocks).value_grad_info(theta)
    solved = linalg.cho_solve(linalg.cho_factor(info[:q, :q]), info[:q, q:])
    net = np.diag(info)[q:] - np.einsum("qc,qc->c", info[:q, q:], solved)
    return estimate.n * grad[q:] ** 2 / net


def refit_seconds(spec, x, estimate, n_sample=5):
    """Seconds to refit with one candidate loading freed, averaged over a few."""
    layout = estimate.layout
    cand = open_cells(layout.patterns[0])
    start = time.perf_counter()
    for i, j in list(zip(cand.lam_rows, cand.lam_cols))[:n_sample]:
        freed = SimpleNamespace(**vars(spec))
        freed.cross_loadings = {layout.factors[j]: (layout.items[i],)}
        evaluate_normal(freed, x)
    return (time.perf_counter() - start) / n_sample, len(cand)


def main():
    spec, x = simulated_study()
    result = evaluate_normal(spec, x)
    estimate = result.estimate
    with threadpool_limits(limits=1, user_api="blas"):
        ours, tests = best_of(lambda: score_tests(estimate), repeat=5)
        dense, dense_mi = best_of(lambda: dense_indices(estimate), repeat=1)
    # same candidate order in both (loadings, then residual covariances); none undefined here
    agree = np.max(np.abs(dense_mi - tests.mi))
    per_refit, n_candidates = refit_seconds(spec, x, estimate)
    print(f"{len(spec.items)} items, {N_FACTORS} constructs, N = {N_CASES}: "
          f"{n_candidates} candidates ({tests.n_undefined} undefined)")
    print(f"  rank-two score tests (scalewright):     {ours:8.3f} s")
    print(f"  dense expanded information:             {dense:8.3f} s   ratio {dense / ours:6.1f}x"
          f"   (largest |ΔMI| {agree:.1e})")
    print(f"  refitting every candidate (extrapolated from 5 refits of "
          f"{per_refit:.2f} s): {per_refit * n_candidates:8.0f} s   ratio "
          f"{per_refit * n_candidates / ours:6.0f}x")


if __name__ == "__main__":
    main()
