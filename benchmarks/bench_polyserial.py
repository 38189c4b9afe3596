"""Time scalewright's mixed correlation matrix against semopy's routines on the same data.

Run:  .venv/bin/python benchmarks/bench_polyserial.py [--items 50] [--rows 10000]
      [--repeat 3] [--polyserial-pairs 2] [--polychoric-pairs 8] [--semopy-budget 120]
      [--json FILE]

Data: ``common.population`` with five constructs (simple structure, loadings
0.5–0.8, construct correlations 0.3, one minor cross-loading each), normal
rows from ``common.normal_sample``; every other item is cut into five
categories at ``common.FIVE_POINT_CUTS``, so half the items are five-point
answers and half continuous, each construct holding both kinds.  No answer
is missing: semopy's routines take none.

scalewright: ``mixed_moments`` for all p(p-1)/2 pairs (polychoric,
polyserial, Pearson), including the thresholds, the continuous items' means
and SDs and the full sampling covariance of thresholds and correlations,
once with BLAS pinned to one thread (as ``evaluate_mixed`` runs it) and once
with the default thread count; median of ``--repeat`` runs.

semopy 2.3.11 (``semopy.polycorr``): its ``hetcor`` fills the matrix pair by
pair in Python loops (``polyserial_corr`` for a continuous and an ordinal
item, ``polychoric_corr`` for two ordinal items, pandas' ``corr`` for the
rest) and computes no sampling covariance.  A pair takes seconds, so a few
pairs of each kind are timed (no further pair starts after
``--semopy-budget`` seconds per kind, at least one always runs) and the
median per pair is multiplied by the number of pairs of that kind; pandas'
``corr`` of the whole frame is timed as it is.  ``hetcor`` standardizes the
continuous item by its variance; here it is given the item standardized by
its ÷ n SD (as ``tests/test_polyserial.py`` does), which makes it the same
estimator as ours at the same cost, so the timed pairs' estimates can be
compared.  semopy needs ``scipy.stats.mvn.mvnun``, which scipy 1.17
removed; ``common.semopy_polycorr`` says which stand-in ran, and the
printout repeats it.
"""

from __future__ import annotations

import argparse
import json

import numpy as np
import pandas as pd
from threadpoolctl import threadpool_limits

from common import (FIVE_POINT_CUTS, describe_machine, machine_state, normal_sample, population,
                    semopy_polycorr, timed)

from scalewright.estimate.mixed import mixed_moments

N_CONSTRUCTS = 5
SEED = 20241


def make_data(n_items: int, n_rows: int) -> tuple[np.ndarray, tuple[str, ...], np.ndarray]:
    """Answers, item names and the ordinal flags: every other item five-point."""
    pop = population(n_items, N_CONSTRUCTS, SEED)
    x = normal_sample(pop, n_rows, SEED + 1)
    ordinal = np.arange(n_items) % 2 == 0
    x[:, ordinal] = np.searchsorted(FIVE_POINT_CUTS, x[:, ordinal]) + 1.0
    return x, pop.items, ordinal


def time_scalewright(x, items, ordinal, threads, repeat):
    with threadpool_limits(limits=threads, user_api="blas"):
        return timed(lambda: mixed_moments(x, items, ordinal), repeat,
                     warmup=1 if repeat > 1 else 0)


def time_semopy(x, ordinal, args, reference):
    """Per-pair times of semopy's two routines on a few seeded pairs, pandas'
    ``corr`` of the frame, and the largest difference from ``reference``."""
    polycorr, how = semopy_polycorr()
    rng = np.random.default_rng(7)
    o_idx, c_idx = np.flatnonzero(ordinal), np.flatnonzero(~ordinal)
    serial = zip(rng.permutation(c_idx), rng.permutation(o_idx))
    shuffled = rng.permutation(o_idx)
    choric = (sorted(pair) for pair in zip(shuffled[0::2], shuffled[1::2]))
    found = {}

    def one_serial():
        c, o = next(serial)
        z = (x[:, c] - x[:, c].mean()) / x[:, c].std()
        found[c, o] = polycorr.polyserial_corr(x[:, c], x[:, o], x_z=z)

    def one_choric():
        j, l = next(choric)
        found[j, l] = polycorr.polychoric_corr(x[:, j], x[:, l])

    ps = timed(one_serial, args.polyserial_pairs, budget=args.semopy_budget)
    pc = timed(one_choric, args.polychoric_pairs, budget=args.semopy_budget)
    frame = pd.DataFrame(x)
    pearson = timed(frame.corr, 3)
    worst = max(abs(value - reference[pair]) for pair, value in found.items())
    return ps, pc, pearson, worst, how


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--items", type=int, default=50, help="a multiple of 10")
    parser.add_argument("--rows", type=int, default=10_000)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--polyserial-pairs", type=int, default=2)
    parser.add_argument("--polychoric-pairs", type=int, default=8)
    parser.add_argument("--semopy-budget", type=float, default=120.0)
    parser.add_argument("--json", metavar="FILE")
    args = parser.parse_args()

    before = machine_state()
    print(describe_machine(before))
    x, items, ordinal = make_data(args.items, args.rows)
    n_o = int(ordinal.sum())
    n_c = args.items - n_o
    kinds = {"polyserial": n_o * n_c, "polychoric": n_o * (n_o - 1) // 2,
             "Pearson": n_c * (n_c - 1) // 2}
    pinned = time_scalewright(x, items, ordinal, 1, args.repeat)
    default = time_scalewright(x, items, ordinal, None, args.repeat)
    ps, pc, pearson, worst, how = time_semopy(x, ordinal, args, pinned.value.raw_correlations)
    semopy_total = (ps.median * kinds["polyserial"] + pc.median * kinds["polychoric"]
                    + pearson.median)
    semopy_cpu = (ps.cpu_median * kinds["polyserial"] + pc.cpu_median * kinds["polychoric"]
                  + pearson.cpu_median)
    after = machine_state()

    print(f"{args.items} items ({n_c} continuous, {n_o} five-point), {args.rows} rows: "
          + ", ".join(f"{k} {v} pairs" for k, v in kinds.items()))
    lines = [
        ("scalewright mixed_moments, BLAS 1 thread",
         f"{pinned.median:8.2f} s wall, {pinned.cpu_median:.2f} s CPU (median of "
         f"{len(pinned.times)}; thresholds, means, SDs, correlations, sampling covariance)"),
        ("scalewright mixed_moments, BLAS default",
         f"{default.median:8.2f} s wall, {default.cpu_median:.2f} s CPU"),
        (f"semopy polyserial_corr, {len(ps.times)} pair(s) timed", f"{ps.median:8.2f} s per pair"),
        (f"semopy polychoric_corr, {len(pc.times)} pair(s) timed", f"{pc.median:8.3f} s per pair"),
        ("semopy (pandas) corr of the frame", f"{pearson.median:8.3f} s"),
        ("semopy, extrapolated to the whole matrix",
         f"{semopy_total:8.0f} s ({ps.median * kinds['polyserial']:.0f} s polyserial, "
         f"{pc.median * kinds['polychoric']:.0f} s polychoric); no sampling covariance"),
        ("ratio semopy / scalewright (1 thread)",
         f"{semopy_total / pinned.median:8.0f}x wall, {semopy_cpu / pinned.cpu_median:.0f}x CPU"),
        ("largest |semopy - scalewright|, timed pairs",
         f"{worst:8.1e} (semopy's bounded scalar search stops at xatol 1e-5)"),
    ]
    for label, value in lines:
        print(f"{label:<44}: {value}")
    print(how)
    print(describe_machine(after))
    if args.json:
        record = {"items": args.items, "rows": args.rows, "pairs": kinds,
                  "scalewright_pinned": pinned.to_dict(), "scalewright_default": default.to_dict(),
                  "semopy_polyserial_per_pair": ps.to_dict(),
                  "semopy_polychoric_per_pair": pc.to_dict(), "semopy_corr": pearson.to_dict(),
                  "semopy_extrapolated_s": semopy_total, "semopy_extrapolated_cpu_s": semopy_cpu,
                  "largest_difference": worst,
                  "semopy_stand_in": how, "machine_before": before, "machine_after": after}
        with open(args.json, "w", encoding="utf-8") as handle:
            json.dump(record, handle, indent=2)


if __name__ == "__main__":
    main()
