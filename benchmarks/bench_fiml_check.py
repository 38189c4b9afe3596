"""Time the whole check of the 100-item / 10-construct study (N = 2000) with
sparse missing answers: 3 % of the answers missing in four columns, so the
method choice picks full-information ML and every omega-if-dropped refit is
a FIML fit (about a dozen missing-data patterns).  Also the stages of the
model's FIML route one by one: pattern moments, EM for the saturated model,
the fit, the observed information.

``--robust`` cuts the answers into five points first (at
``common.FIVE_POINT_CUTS``), so that the method choice picks FIML with the
Yuan–Bentler corrections, and also times those corrections (the model's and
the independence baseline's) as a stage.

Run from the project root:  .venv/bin/python benchmarks/bench_fiml_check.py [--robust]
BLAS is pinned to one thread around the stages, as scalewright does itself.
"""

from __future__ import annotations

import argparse
import json
import tempfile
from pathlib import Path

import numpy as np
from threadpoolctl import threadpool_limits

from bench_check import N_CONSTRUCTS, N_ITEMS
from bench_engine import N_ROWS, simulated
from common import (FIVE_POINT_CUTS, describe_machine, machine_state, model_spec, timed,
                    write_float_csv, write_model_file)

import scalewright
from scalewright.estimate.fiml import (baseline_yuan_bentler, fiml_information, fit_fiml,
                                       missing_patterns, observed_information, pattern_moments,
                                       saturated_em, yuan_bentler)
from scalewright.specify import build_layout

#: the columns with missing answers, their missing rate, and the seed of the holes
HOLE_COLUMNS, HOLE_RATE, HOLE_SEED = (3, 27, 55, 81), 0.03, 3


def sparse_holes(x: np.ndarray) -> np.ndarray:
    """``x`` with ``HOLE_RATE`` of the answers of ``HOLE_COLUMNS`` missing at random."""
    rng = np.random.default_rng(HOLE_SEED)
    x = x.copy()
    for j in HOLE_COLUMNS:
        x[rng.random(len(x)) < HOLE_RATE, j] = np.nan
    return x


def five_point(x: np.ndarray) -> np.ndarray:
    """The simulated answers cut into five points at ``FIVE_POINT_CUTS``."""
    return np.searchsorted(FIVE_POINT_CUTS, x) + 1.0


def stages(pop, x, repeat: int, robust: bool) -> dict:
    spec = model_spec(pop.constructs)
    with threadpool_limits(limits=1, user_api="blas"):
        patterns = missing_patterns(x, pop.items, "bench")
        moments = timed(lambda: pattern_moments(x, patterns), repeat)
        saturated = timed(lambda: saturated_em(moments.value), repeat)
        fitted = timed(lambda: fit_fiml(build_layout(spec, saturated.value.cov), x,
                                        moments.value, saturated.value), repeat)
        layout, theta = fitted.value.layout, fitted.value.theta
        info = timed(lambda: observed_information(layout.patterns[0], layout.n_params, theta,
                                                  moments.value), repeat)
        parts = {"patterns": len(patterns.counts),
                 "pattern_moments": moments.to_dict(), "saturated_em": saturated.to_dict(),
                 "fit": fitted.to_dict(), "observed_information": info.to_dict()}
        if robust:
            fit = fitted.value

            def corrections():
                info = fiml_information(layout, theta, x, patterns, moments.value)
                return (yuan_bentler(info, fit.n, fit.chi_square, fit.df),
                        baseline_yuan_bentler(x, patterns, moments.value, saturated.value))
            parts["yuan_bentler"] = timed(corrections, repeat).to_dict()
    return parts


def main():
    parser = argparse.ArgumentParser()
    parser.add_argument("--repeat", type=int, default=3, help="runs of the whole check")
    parser.add_argument("--json", type=Path, help="write every number to this file")
    parser.add_argument("--robust", action="store_true",
                        help="five-point answers, so that the robust FIML route is chosen")
    args = parser.parse_args()
    before = machine_state()
    pop, x = simulated(N_ITEMS, N_CONSTRUCTS, N_ROWS)
    x = sparse_holes(five_point(x) if args.robust else x)
    with tempfile.TemporaryDirectory() as tmp:
        write_float_csv(Path(tmp) / "answers.csv", pop.items, x)
        model = write_model_file(Path(tmp) / "one-model.yaml", "Simulated 100-item study",
                                 "answers.csv", {"ten-constructs": pop.constructs})
        check = timed(lambda: scalewright.check(model), args.repeat)
    parts = stages(pop, x, args.repeat, args.robust)
    after = machine_state()
    estimator = check.value.to_dict()["models"][0]["estimator"]
    print(describe_machine(before))
    print(f"\n{N_ITEMS} items / {N_CONSTRUCTS} constructs, N = {N_ROWS}, {HOLE_RATE:.0%} missing "
          f"in {len(HOLE_COLUMNS)} columns ({parts['patterns']} patterns); '{estimator}'")
    print(f"  whole check: median {check.median:.2f} s (CPU {check.cpu_median:.2f} s, "
          f"{len(check.times)} runs)")
    for name in ("pattern_moments", "saturated_em", "fit", "observed_information",
                 "yuan_bentler")[:5 if args.robust else 4]:
        print(f"  {name}: median {parts[name]['median_s'] * 1000:.1f} ms")
    print(describe_machine(after))
    if args.json:
        args.json.write_text(json.dumps({"before": before, "after": after,
                                         "check": check.to_dict(), **parts}, indent=1))


if __name__ == "__main__":
    main()
