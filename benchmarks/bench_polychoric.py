"""Time scalewright's polychoric estimation against semopy's on the same data.

Run:  .venv/bin/python benchmarks/bench_polychoric.py [--items 50] [--rows 10000] [--semopy-pairs 8]

Data: p five-category items from a two-factor normal model cut at fixed
thresholds (seeded), 5 % of answers missing at random for scalewright.
semopy's ``polycorr.polychoric_corr`` accepts no missing answers, so it gets
the same answers with the missing ones replaced by the item's middle category.

scalewright: ``ordinal_moments`` for all p(p-1)/2 pairs, including the
thresholds and the full sampling covariance matrix, once with BLAS pinned to
one thread and once with the default thread count.

semopy: its routine works pair by pair in Python loops, so only a few pairs
are timed and the per-pair time is multiplied by the number of pairs.  It
calls ``scipy.stats.mvn.mvnun``, which the installed scipy no longer has; the
stand-in used here computes the same rectangle probability with scipy's
compiled bivariate routine (``scipy.stats._qmvnt._bvn``, Genz's algorithm, as
the removed function used), so the comparison is not slowed by a pure-Python
replacement.
"""

import argparse
import time

import numpy as np
from threadpoolctl import threadpool_limits

from common import semopy_polycorr

from scalewright.estimate.polychoric import ordinal_moments


def make_data(n_items: int, n_rows: int, seed: int = 20241) -> np.ndarray:
    """Five-category answers from a two-factor model, 5 % missing."""
    rng = np.random.default_rng(seed)
    loadings = rng.uniform(0.4, 0.8, n_items)
    second = np.where(np.arange(n_items) < n_items // 2, 0.3, -0.3)
    factors = rng.normal(size=(n_rows, 2))
    common = np.outer(factors[:, 0], loadings) + np.outer(factors[:, 1], second)
    unique = np.sqrt(np.maximum(1.0 - loadings**2 - second**2, 0.05))
    latent = common + rng.normal(size=(n_rows, n_items)) * unique
    answers = np.digitize(latent, [-1.2, -0.4, 0.3, 1.1]).astype(float) + 1.0
    answers[rng.random(answers.shape) < 0.05] = np.nan
    return answers


def time_scalewright(data: np.ndarray, threads) -> float:
    items = tuple(f"i{j}" for j in range(data.shape[1]))
    with threadpool_limits(limits=threads, user_api="blas"):
        ordinal_moments(data[:200], items)  # warm-up
        start = time.perf_counter()
        ordinal_moments(data, items)
        return time.perf_counter() - start


def time_semopy_per_pair(data: np.ndarray, n_pairs: int) -> float:
    polycorr, _ = semopy_polycorr()
    complete = np.where(np.isnan(data), 3.0, data)
    rng = np.random.default_rng(7)
    p = data.shape[1]
    pairs = [tuple(rng.choice(p, 2, replace=False)) for _ in range(n_pairs)]
    start = time.perf_counter()
    for j, l in pairs:
        polycorr.polychoric_corr(complete[:, j], complete[:, l])
    return (time.perf_counter() - start) / n_pairs


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--items", type=int, default=50)
    parser.add_argument("--rows", type=int, default=10_000)
    parser.add_argument("--semopy-pairs", type=int, default=8)
    args = parser.parse_args()

    data = make_data(args.items, args.rows)
    n_pairs = args.items * (args.items - 1) // 2
    ours_1 = time_scalewright(data, 1)
    ours_default = time_scalewright(data, None)
    per_pair = time_semopy_per_pair(data, args.semopy_pairs)
    semopy_total = per_pair * n_pairs

    print(f"{args.items} items, {args.rows} rows, {n_pairs} pairs")
    print(f"scalewright ordinal_moments, BLAS 1 thread : {ours_1:8.2f} s (thresholds, correlations, covariance)")
    print(f"scalewright ordinal_moments, BLAS default  : {ours_default:8.2f} s")
    print(f"semopy polychoric_corr, {args.semopy_pairs} pairs timed  : {per_pair:8.3f} s per pair")
    print(f"semopy, extrapolated to all pairs          : {semopy_total:8.1f} s")
    print(f"ratio semopy / scalewright (1 thread)      : {semopy_total / ours_1:8.0f}x")


if __name__ == "__main__":
    main()
