"""Time scalewright's DWLS fit on polychoric correlations against semopy's DWLS.

Run:  .venv/bin/python benchmarks/bench_dwls.py [--items 50] [--rows 10000] [--constructs 5]

Data: p five-category items, ``constructs`` correlated constructs with
``p / constructs`` items each (loadings 0.45–0.85, construct correlations
0.3), cut at fixed thresholds, seeded, 5 % of answers missing at random.
Both programs fit the same correlated-constructs model to the same
polychoric matrix with the same diagonal weights, which scalewright's
``ordinal_moments`` computes once (its time is printed too, for context).

scalewright: ``fit_dwls`` = Gauss–Newton fit, sandwich standard errors,
the model's and the baseline's trace statistics; BLAS pinned to one
thread, as in ``evaluate_ordinal``.

semopy: ``Model.fit(obj="DWLS")`` with SLSQP (its default), started from its
own start values; its weights are set to ours the way
``tests/test_dwls.py`` does (``prepare_wls`` would compute weights from raw
data, which a correlation matrix does not have).  Only the estimation is
timed: semopy has no robust standard errors or adjusted test for it.
Both runs' objective values are printed so the fits can be seen to agree.
"""

import argparse
import sys
import time
import types
from pathlib import Path

import numpy as np
from threadpoolctl import threadpool_limits

from scalewright.estimate.dwls import fit_dwls
from scalewright.estimate.polychoric import ordinal_moments
from scalewright.specify import build_layout

# semopy made ready for DWLS on our matrix and weights, as the tests check it
sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
from test_dwls import semopy_dwls_model  # noqa: E402


def make_data(n_items: int, n_rows: int, n_constructs: int, seed: int = 50110) -> np.ndarray:
    """Five-category answers from a correlated-constructs model, 5 % missing."""
    rng = np.random.default_rng(seed)
    per = n_items // n_constructs
    loadings = np.zeros((n_items, n_constructs))
    for c in range(n_constructs):
        loadings[c * per:(c + 1) * per, c] = rng.uniform(0.45, 0.85, per)
    phi = np.full((n_constructs, n_constructs), 0.3)
    np.fill_diagonal(phi, 1.0)
    sigma = loadings @ phi @ loadings.T
    np.fill_diagonal(sigma, 1.0)
    latent = rng.standard_normal((n_rows, n_items)) @ np.linalg.cholesky(sigma).T
    answers = np.digitize(latent, [-1.3, -0.5, 0.3, 1.1]).astype(float) + 1.0
    answers[rng.random(answers.shape) < 0.05] = np.nan
    return answers


def make_spec(items, n_constructs):
    per = len(items) // n_constructs
    constructs = {f"c{c}": tuple(items[c * per:(c + 1) * per]) for c in range(n_constructs)}
    return types.SimpleNamespace(
        name="bench", constructs=constructs, cross_loadings={}, residual_covariances=(),
        higher_order={}, general=None, identification="marker", place="bench", items=tuple(items))


def time_scalewright(spec, moments, repeats: int = 3):
    with threadpool_limits(limits=1, user_api="blas"):
        best, fit = float("inf"), None
        for _ in range(repeats):
            start = time.perf_counter()
            layout = build_layout(spec, moments.correlations)
            fit = fit_dwls(layout, moments)
            best = min(best, time.perf_counter() - start)
    return best, fit


def time_semopy(spec, moments):
    desc = "\n".join(f"{c} =~ " + " + ".join(its) for c, its in spec.constructs.items())
    model, corr = semopy_dwls_model(desc, moments)
    start = time.perf_counter()
    result = model.fit(cov=corr, obj="DWLS", n_samples=moments.n_rows)
    return time.perf_counter() - start, result


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--items", type=int, default=50)
    parser.add_argument("--rows", type=int, default=10_000)
    parser.add_argument("--constructs", type=int, default=5)
    parser.add_argument("--skip-semopy", action="store_true")
    args = parser.parse_args()

    data = make_data(args.items, args.rows, args.constructs)
    items = tuple(f"i{j}" for j in range(args.items))
    spec = make_spec(items, args.constructs)
    with threadpool_limits(limits=1, user_api="blas"):
        start = time.perf_counter()
        moments = ordinal_moments(data, items)
        t_poly = time.perf_counter() - start
    t_ours, fit = time_scalewright(spec, moments)
    print(f"data: {args.rows} rows x {args.items} items, {args.constructs} constructs, "
          f"{fit.layout.n_params - args.items} estimated parameters, df {fit.test.df}")
    print(f"polychoric matrix + sampling covariance (context): {t_poly:8.3f} s")
    print(f"scalewright DWLS fit + robust SEs + tests:         {t_ours:8.3f} s  "
          f"({fit.record.iterations} iterations, T = {fit.test.chi_square:.4f})")
    if args.skip_semopy:
        return
    t_semopy, result = time_semopy(spec, moments)
    print(f"semopy DWLS fit (same correlations and weights):   {t_semopy:8.3f} s  "
          f"(objective {result.fun:.4f}, {result.n_it} iterations, "
          f"{'converged' if result.success else 'stopped: ' + str(result.message)})")
    print(f"ratio semopy / scalewright: {t_semopy / t_ours:.1f}x")


if __name__ == "__main__":
    main()
