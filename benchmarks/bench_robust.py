"""Time robust ML for 1,000,000 rows × 50 items (five constructs of ten
skewed items) and compare with semopy's robust (sandwich) standard errors.

Ours: the ML fit, the sandwich standard errors, the mean-scaled statistic,
the mean-and-variance adjusted statistic (whose tr((UΓ)²), exact on all
rows, comes from the chunked Gram of the whitened pair products, the
dominant cost; see scalewright.estimate.variance_trace) and the
baseline's scaling factor for the robust CFI/TLI.  Peak memory is reported
from the process's maximum resident size.

semopy computes its casewise scores in a Python loop over rows, so it is
timed on ``--semopy-rows`` rows (default 20,000) and its sandwich time is
extrapolated linearly to 1,000,000 rows (the fit itself works on the
covariance matrix and is timed as it is); the printout says so.

Run from the project root:  .venv/bin/python benchmarks/bench_robust.py
BLAS is pinned to one thread, as in the engine (DEVELOPERS.md, "Speed").
"""

from __future__ import annotations

import argparse
import resource
import time
from types import SimpleNamespace

import numpy as np
from threadpoolctl import threadpool_limits

from scalewright.estimate.normal import complete_data_blocks, fit_normal
from scalewright.estimate.robust import baseline_test, robust_fit_indices, robust_ml
from scalewright.indices import saturated_loglik
from scalewright.specify import build_layout

N_ROWS, PER_FACTOR, N_FACTORS, SEED = 1_000_000, 10, 5, 20240615


def simulated(n):
    rng = np.random.default_rng(SEED)
    p = PER_FACTOR * N_FACTORS
    lam = np.zeros((p, N_FACTORS))
    for j in range(N_FACTORS):
        lam[j * PER_FACTOR:(j + 1) * PER_FACTOR, j] = rng.uniform(0.5, 0.8, PER_FACTOR)
    chol = np.linalg.cholesky(np.full((N_FACTORS, N_FACTORS), 0.3) + 0.7 * np.eye(N_FACTORS))
    eta = rng.standard_normal((n, N_FACTORS)) @ chol.T
    errors = (rng.chisquare(2, (n, p)) - 2) / 2          # skewed errors, unit variance
    x = eta @ lam.T + errors * np.sqrt(1 - np.sum(lam ** 2, axis=1))
    items = [f"y{i}" for i in range(p)]
    constructs = {f"f{j}": tuple(items[j * PER_FACTOR:(j + 1) * PER_FACTOR])
                  for j in range(N_FACTORS)}
    return x, items, constructs


def ours(x, items, constructs):
    spec = SimpleNamespace(name="bench", constructs=constructs, cross_loadings={},
                           residual_covariances=(), higher_order={}, general=None,
                           identification="marker", place="bench.yaml", items=tuple(items))
    with threadpool_limits(limits=1, user_api="blas"):
        start = time.perf_counter()
        blocks = complete_data_blocks(x)
        layout = build_layout(spec, blocks[0].cov)
        theta, record, objective = fit_normal(layout, blocks)
        chi2 = 2 * (saturated_loglik([blocks[0].cov], [len(x)]) - objective.loglik(theta))
        t_fit = time.perf_counter() - start
        robust = robust_ml(layout, theta, x, chi2, adjusted=False)
        t_scaled = time.perf_counter() - start
        robust = robust_ml(layout, theta, x, chi2)
        t_adjusted = t_fit + (time.perf_counter() - start - t_scaled)
        indices = robust_fit_indices(robust.test, baseline_test(x, layout.items), len(x))
        total = time.perf_counter() - start
    return robust, indices, t_fit, t_scaled, t_adjusted, total


def semopy_times(x, items, constructs):
    import pandas as pd
    import semopy
    desc = "\n".join(f"{f} =~ {' + '.join(its)}" for f, its in constructs.items())
    frame = pd.DataFrame(x, columns=items)
    model = semopy.Model(desc)
    start = time.perf_counter()
    model.fit(frame)
    t_fit = time.perf_counter() - start
    start = time.perf_counter()
    model.inspect(se_robust=True)
    return t_fit, time.perf_counter() - start


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--semopy-rows", type=int, default=20_000)
    args = parser.parse_args()
    x, items, constructs = simulated(N_ROWS)
    robust, indices, t_fit, t_scaled, t_adjusted, total = ours(x, items, constructs)
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2 ** 20
    print(f"robust ML, {x.shape[1]} items x {x.shape[0]:,} rows (data {x.nbytes / 2**30:.2f} GiB)")
    print(f"  scalewright: fit {t_fit:.1f} s; fit + sandwich SEs + scaled statistic "
          f"{t_scaled:.1f} s; fit + sandwich + scaled + adjusted {t_adjusted:.1f} s; "
          f"everything incl. baseline and robust indices {total:.1f} s; peak memory "
          f"{peak:.2f} GiB")
    rows = robust.test.variance_rows
    print(f"  scaling factor {robust.test.scaling_factor:.4f}, adjusted df "
          f"{robust.test.df_adjusted:.2f} (tr((UΓ)²) from "
          f"{'all rows' if rows is None else f'a subsample of {rows:,} rows'}), "
          f"robust CFI {indices['cfi_robust']:.4f}")
    n_sub = args.semopy_rows
    fit_s, sandwich_s = semopy_times(x[:n_sub], items, constructs)
    extrapolated = fit_s + sandwich_s * N_ROWS / n_sub
    print(f"  semopy on {n_sub:,} rows: fit {fit_s:.1f} s, robust SEs {sandwich_s:.1f} s; "
          f"extrapolated to {N_ROWS:,} rows: {extrapolated:.0f} s (SEs only, no scaled test)")
    print(f"  ratio (semopy SEs extrapolated / ours with SEs and scaled statistic): "
          f"{extrapolated / t_scaled:.0f}x; against ours with everything: "
          f"{extrapolated / total:.0f}x")


if __name__ == "__main__":
    main()
