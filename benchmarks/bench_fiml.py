"""Time full-information ML for 30 items × 5,000 rows with 10% of the answers
missing completely at random (three constructs of ten items), against
semopy's FIML (``semopy.ModelMeans``) on the same data.

Ours covers the whole route: missing-data patterns, EM for the saturated
model, the FIML fit, the observed information and the Yuan–Bentler
corrections (model and baseline).  semopy fits the estimates only; it runs
in a child process with a time limit (``--semopy-limit`` seconds, default
900) because a single fit takes many minutes here, and a run that hits the
limit is reported as "more than" that time.

Run from the project root:  .venv/bin/python benchmarks/bench_fiml.py
BLAS is pinned to one thread, as in the engine (DEVELOPERS.md, "Speed").
"""

from __future__ import annotations

import argparse
import multiprocessing as mp
import time
from types import SimpleNamespace

import numpy as np
from threadpoolctl import threadpool_limits

from scalewright.estimate.fiml import (baseline_yuan_bentler, fiml_information, fit_fiml,
                                       missing_patterns, pattern_moments, saturated_em,
                                       yuan_bentler)
from scalewright.specify import build_layout

N_ROWS, PER_FACTOR, N_FACTORS, RATE, SEED = 5000, 10, 3, 0.10, 20240614


def simulated():
    rng = np.random.default_rng(SEED)
    p = PER_FACTOR * N_FACTORS
    lam = np.zeros((p, N_FACTORS))
    for j in range(N_FACTORS):
        lam[j * PER_FACTOR:(j + 1) * PER_FACTOR, j] = rng.uniform(0.5, 0.8, PER_FACTOR)
    phi = np.full((N_FACTORS, N_FACTORS), 0.3) + 0.7 * np.eye(N_FACTORS)
    sigma = lam @ phi @ lam.T
    sigma += np.diag(1.0 - np.diag(sigma))
    x = rng.multivariate_normal(np.zeros(p), sigma, size=N_ROWS)
    x[rng.random(x.shape) < RATE] = np.nan
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
        patterns = missing_patterns(x, tuple(items), "bench")
        moments = pattern_moments(x, patterns)
        saturated = saturated_em(moments)
        t_em = time.perf_counter() - start
        fitted = fit_fiml(build_layout(spec, saturated.cov), x, moments, saturated)
        t_fit = time.perf_counter() - start
        info = fiml_information(fitted.layout, fitted.theta, x, patterns, moments)
        robust = yuan_bentler(info, fitted.n, fitted.chi_square, fitted.df)
        baseline_yuan_bentler(x, patterns, moments, saturated)
        total = time.perf_counter() - start
    return fitted, robust, len(patterns.counts), t_em, t_fit, total


def _semopy_fit(x, items, constructs, queue):
    import pandas as pd
    import semopy
    desc = "\n".join(f"{f} =~ {' + '.join(its)}" for f, its in constructs.items())
    model = semopy.ModelMeans(desc)
    start = time.perf_counter()
    model.fit(pd.DataFrame(x, columns=items))
    queue.put(time.perf_counter() - start)


def semopy_time(x, items, constructs, limit):
    queue = mp.Queue()
    child = mp.Process(target=_semopy_fit, args=(x, items, constructs, queue))
    child.start()
    child.join(limit)
    if child.is_alive():
        child.terminate()
        child.join()
        return None
    return queue.get()


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--semopy-limit", type=float, default=900.0)
    args = parser.parse_args()
    x, items, constructs = simulated()
    fitted, robust, n_patterns, t_em, t_fit, total = ours(x, items, constructs)
    print(f"FIML, {x.shape[1]} items x {x.shape[0]} rows, {RATE:.0%} missing, "
          f"{n_patterns} patterns")
    print(f"  scalewright: EM {t_em:.2f} s, + fit {t_fit - t_em:.2f} s "
          f"({fitted.record.iterations} iterations), + information and Yuan-Bentler "
          f"{total - t_fit:.2f} s; total {total:.2f} s (chi2 {fitted.chi_square:.2f}, "
          f"scaled {robust.test.chi_square_scaled:.2f}, df {fitted.df})")
    seconds = semopy_time(x, items, constructs, args.semopy_limit)
    if seconds is None:
        print(f"  semopy ModelMeans (estimates only, default settings): more than "
              f"{args.semopy_limit:.0f} s; ratio more than {args.semopy_limit / t_fit:.0f}x "
              f"for the estimates, {args.semopy_limit / total:.0f}x for the whole route")
    else:
        print(f"  semopy ModelMeans (estimates only, default settings): {seconds:.1f} s; "
              f"ratio {seconds / t_fit:.0f}x for the estimates, {seconds / total:.0f}x for "
              f"the whole route")


if __name__ == "__main__":
    main()
