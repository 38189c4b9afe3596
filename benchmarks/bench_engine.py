"""Time scalewright's ML engine against semopy's fit on the same simulated data.

Sizes (items / constructs): 12/3, 30/5, 60/6, 100/10, 200/10, N = 2000 rows
each, drawn (seeded) from a correlated-constructs population with loadings
.5–.8, construct correlations .3 and one small unmodelled cross-loading per
construct, so the fitted model misfits a little as real models do
(``benchmarks/common.py``).

Timed, each under both BLAS settings (threadpoolctl: pinned to one thread,
and unpinned = as many threads as cores), in the same run:

* ``fit``: the engine alone — sample moments, ``specify.build_layout`` and
  ``estimate.normal.fit_normal``;
* ``evaluate``: ``evaluate.evaluate_normal`` — the fit plus standard errors,
  fit indices, standardized solution and warnings (it pins BLAS to one
  thread itself, so the outer setting only matters outside it);
* semopy 2.3.11: ``semopy.Model(desc).fit(df)`` with its default settings,
  in a fresh child process with the same BLAS setting (after one small
  untimed fit that pays its set-up costs).

Each size and setting is timed in ``--rounds`` rounds, each timing ours and
then semopy's, so that both meet the shared machine's slow and fast spells
(on one day the same code's medians moved by half between runs minutes
apart); the "rounds" column gives the lowest and highest of the rounds'
ratios.  Each time is the median of the rounds' wall-clock runs pooled; the ratio is also given
in CPU time (``time.process_time``), which waiting for a busy core does not
stretch.  semopy's runs stop once they have
taken ``--semopy-budget`` seconds for a size and setting (at least one run),
and its child process is stopped after ``--semopy-limit`` seconds (the
table then shows "> limit" if no run finished).  Agreement: the relative
difference between our chi-square and semopy's (``semopy.stats.calc_chi2``)
with its default settings, and with ``options={"ftol": 1e-12}`` (one run,
pinned).

Target (issue 2, point 11): the engine's fit at least 100× faster than
semopy's fit at 100/10.

Run from the project root (unset the OpenBLAS variables for this command
alone, see benchmarks/README.md):

    env -u OPENBLAS_CORETYPE -u OPENBLAS_L2_SIZE .venv/bin/python benchmarks/bench_engine.py
"""

from __future__ import annotations

import argparse
import json
import os
from pathlib import Path

import pandas as pd

from common import (alternating_rounds, describe_machine, machine_state, model_spec,
                    normal_sample, population, ratio, ratio_span, semopy_description,
                    semopy_runs)

from scalewright.estimate.normal import complete_data_blocks, fit_normal
from scalewright.evaluate import evaluate_normal
from scalewright.specify import build_layout

SIZES = ((12, 3), (30, 5), (60, 6), (100, 10), (200, 10))
N_ROWS, SEED = 2000, 20241201
SETTINGS = (("pinned", 1), ("unpinned", os.cpu_count()))


def simulated(n_items: int, n_constructs: int, rows: int):
    """The population and the sample of one size (seeded by the size)."""
    pop = population(n_items, n_constructs, SEED + n_items)
    return pop, normal_sample(pop, rows, SEED + n_items + 1)


def engine_fit(spec, x):
    """Sample moments, layout and ML estimates: what a fit costs in the engine."""
    blocks = complete_data_blocks(x)
    return fit_normal(build_layout(spec, blocks[0].cov), blocks)


def relative(a: float, b: float | None) -> float | None:
    return None if b is None else abs(a - b) / abs(b)


def bench_size(n_items, n_constructs, args) -> dict:
    pop, x = simulated(n_items, n_constructs, args.rows)
    spec = model_spec(pop.constructs)
    frame = pd.DataFrame(x, columns=list(pop.items))
    description = semopy_description(pop.constructs)
    result = evaluate_normal(spec, x)
    out = {"items": n_items, "constructs": n_constructs, "rows": args.rows,
           "df": int(result.fit.df), "chi_square": float(result.fit.chi_square),
           "iterations": int(result.estimate.record.iterations), "settings": {}}
    for name, threads in SETTINGS:
        rounds = alternating_rounds(
            {"fit": lambda: engine_fit(spec, x), "evaluate": lambda: evaluate_normal(spec, x)},
            description, frame, threads=threads, rounds=args.rounds, repeat=args.repeat,
            semopy_repeat=args.semopy_repeat, semopy_budget=args.semopy_budget,
            semopy_limit=args.semopy_limit)
        fit, evaluate = rounds.pooled("fit"), rounds.pooled("evaluate")
        theirs = rounds.semopy_pooled()
        out["settings"][name] = {
            "threads": threads, "fit": fit.to_dict(), "evaluate": evaluate.to_dict(),
            "semopy": theirs.to_dict(), "semopy_shown": theirs.shown(),
            "ratio_fit_rounds": rounds.ratios("fit"),
            "ratio_fit": ratio(theirs.median, fit.median),
            "ratio_fit_cpu": ratio(theirs.cpu_median, fit.cpu_median),
            "ratio_evaluate": ratio(theirs.median, evaluate.median),
            "semopy_chi_square": theirs.chi_square,
            "chi2_rel_diff_default": relative(out["chi_square"], theirs.chi_square)}
    if not args.no_tight:
        tight = semopy_runs(description, frame, threads=1, repeat=1, budget=0.0,
                            limit=args.semopy_limit, options={"ftol": 1e-12})
        out["semopy_tight"] = tight.to_dict()
        out["semopy_tight_shown"] = tight.shown()
        out["semopy_tight_chi_square"] = tight.chi_square
        out["chi2_rel_diff_tight"] = relative(out["chi_square"], tight.chi_square)
    return out


def _x(value: float | None, width: int) -> str:
    return f"{'-':>{width}}" if value is None else f"{value:{width - 1}.0f}x"


def _e(value: float | None, width: int) -> str:
    return f"{'not run':>{width}}" if value is None else f"{value:{width}.1e}"


def table(rows: list[dict]) -> str:
    head = (f"{'items/constr':>12} {'BLAS':>8} {'fit ms':>8} {'eval ms':>8} {'semopy s':>9} "
            f"{'runs':>4} {'semopy/fit':>10} {'rounds':>11} {'(CPU time)':>10} "
            f"{'semopy/eval':>11} {'chi2 rel diff':>13}")
    lines = [head, "-" * len(head)]
    for r in rows:
        for name, s in r["settings"].items():
            lines.append(
                f"{r['items']:>7}/{r['constructs']:<4} {name:>8} "
                f"{1e3 * s['fit']['median_s']:8.1f} {1e3 * s['evaluate']['median_s']:8.1f} "
                f"{s['semopy_shown']:>9} {s['semopy']['repeats']:>4} "
                f"{_x(s['ratio_fit'], 10)} {ratio_span(s['ratio_fit_rounds']):>11} "
                f"{_x(s['ratio_fit_cpu'], 10)} "
                f"{_x(s['ratio_evaluate'], 11)} "
                f"{_e(s['chi2_rel_diff_default'], 13)}")
    lines += ["", f"{'items/constr':>12} {'df':>6} {'iter':>4} {'chi2 ours':>12} "
                  f"{'semopy ftol 1e-12: s':>21} {'chi2 rel diff':>13}"]
    for r in rows:
        lines.append(
            f"{r['items']:>7}/{r['constructs']:<4} {r['df']:>6} {r['iterations']:>4} "
            f"{r['chi_square']:12.4f} {r.get('semopy_tight_shown', 'not run'):>21} "
            f"{_e(r.get('chi2_rel_diff_tight'), 13)}")
    return "\n".join(lines)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", default=",".join(f"{p}/{k}" for p, k in SIZES),
                        help="items/constructs pairs, comma-separated (default: all five)")
    parser.add_argument("--rows", type=int, default=N_ROWS)
    parser.add_argument("--repeat", type=int, default=7, help="timed runs of ours per round")
    parser.add_argument("--semopy-repeat", type=int, default=3,
                        help="most timed semopy runs per round")
    parser.add_argument("--rounds", type=int, default=3,
                        help="rounds per size and setting, each timing ours and then semopy, so "
                             "that both meet the machine's slow and fast spells (default 3)")
    parser.add_argument("--semopy-budget", type=float, default=60.0,
                        help="no further semopy run starts after this many seconds per size "
                             "and setting")
    parser.add_argument("--semopy-limit", type=float, default=600.0,
                        help="stop semopy's child process after this many seconds per size and "
                             "setting (its runs so far are kept)")
    parser.add_argument("--no-tight", action="store_true",
                        help="skip the ftol = 1e-12 semopy fit (agreement only)")
    parser.add_argument("--json", type=Path, help="also write the results here")
    args = parser.parse_args()
    sizes = [tuple(int(v) for v in s.split("/")) for s in args.sizes.split(",")]

    before = machine_state()
    print(f"before: {describe_machine(before)}", flush=True)
    rows = []
    for n_items, n_constructs in sizes:
        rows.append(bench_size(n_items, n_constructs, args))
        print(f"  done {n_items}/{n_constructs} (load {os.getloadavg()[0]:.2f})", flush=True)
    after = machine_state()
    print(table(rows))
    print(f"after: {describe_machine(after)}")
    if args.json:
        args.json.write_text(json.dumps({"before": before, "after": after, "sizes": rows},
                                        indent=1), encoding="utf-8")


if __name__ == "__main__":
    main()
