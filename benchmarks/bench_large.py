"""Time ``scalewright check`` (the command, as a user runs it) on a
1,000,000-row × 50-item CSV, and measure its peak memory.

The data: five constructs of ten items each (benchmarks/common.py's
population: loadings .5–.8, construct correlations .3, one small unmodelled
cross-loading per construct), answers 1–5 cut from normal scores, generated
in blocks and written straight to bytes (a few seconds).  The model file
declares ``scale: [1, 5]`` and the five-construct model.

The command runs as a child process with ``--out`` in the temporary folder,
so it reads, screens, fits, and writes the JSON and the HTML report.  Wall
time is measured around the child; its CPU time and peak resident memory
come from ``os.wait4``.  CPU time (user + system) is the better guide on a
shared machine: contention stretches the wall time, not the CPU time.  A
run is killed after ``--limit`` seconds (default 900) and then reported as
"more than".

Targets (issue 2, point 11): under 60 s and under 4 GiB.

``--stages`` also times the core stages (read, screen, method choice, fit
by the chosen method and by normal-theory ML) one by one in this process.
``--profile FILE`` also runs the command once under pyinstrument (if it is
installed in the venv; it is not a project dependency) and writes its text
report to FILE.

Run from the project root:

    env -u OPENBLAS_CORETYPE -u OPENBLAS_L2_SIZE .venv/bin/python benchmarks/bench_large.py
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

from common import (describe_machine, five_point_chunks, machine_state, population,
                    write_digit_csv, write_model_file)

N_ROWS, N_ITEMS, N_CONSTRUCTS, SEED = 1_000_000, 50, 5, 20241202


def write_study(folder: Path, rows: int) -> Path:
    pop = population(N_ITEMS, N_CONSTRUCTS, SEED)
    write_digit_csv(folder / "answers.csv", pop.items, five_point_chunks(pop, rows, SEED + 1))
    return write_model_file(folder / "large.yaml", "Simulated 50-item study, a million rows",
                            "answers.csv", {"five-constructs": pop.constructs}, scale=(1, 5))


def command() -> list[str]:
    """The installed ``scalewright`` command of this venv."""
    found = shutil.which("scalewright", path=str(Path(sys.executable).parent))
    if found is None:
        raise SystemExit("the scalewright command is not installed in this venv; run "
                         "pip install -e . first")
    return [found]


def run_check(model_file: Path, out: Path, limit: float) -> dict:
    """Run ``scalewright check`` once, killed after ``limit`` seconds; its wall
    time, CPU time (user + system) and peak resident memory (``os.wait4``)."""
    stopped = threading.Event()

    def stop() -> None:
        stopped.set()
        child.kill()

    with tempfile.TemporaryFile("w+") as log:
        start = time.perf_counter()
        child = subprocess.Popen([*command(), "check", str(model_file), "--out", str(out)],
                                 stdout=log, stderr=subprocess.STDOUT, text=True)
        timer = threading.Timer(limit, stop)
        timer.start()
        _, status, usage = os.wait4(child.pid, 0)
        wall = time.perf_counter() - start
        timer.cancel()
        child.returncode = os.waitstatus_to_exitcode(status)
        log.seek(0)
        output = log.read().strip()
    if child.returncode != 0 and not stopped.is_set():
        raise SystemExit(f"scalewright check failed (exit {child.returncode}):\n{output}")
    return {"wall_s": wall, "stopped_at_limit": stopped.is_set(),
            "cpu_s": usage.ru_utime + usage.ru_stime,
            "peak_gib": usage.ru_maxrss / 2 ** 20,   # Linux reports KiB
            "stdout": "" if stopped.is_set() else output}


def profile(model_file: Path, out: Path, report: Path) -> None:
    """The same command under pyinstrument, its text report written to ``report``."""
    subprocess.run([sys.executable, "-m", "pyinstrument", "--renderer", "text",
                    "--outfile", str(report), "-m", "scalewright.cli", "check",
                    str(model_file), "--out", str(out)], check=True, capture_output=True)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, default=N_ROWS)
    parser.add_argument("--repeat", type=int, default=2, help="runs of the command")
    parser.add_argument("--limit", type=float, default=900.0,
                        help="stop a run of the command after this many seconds")
    parser.add_argument("--stages", action="store_true",
                        help="also time the core stages (read, screen, method choice, fit) "
                             "one by one in this process, as bench_check.py does")
    parser.add_argument("--profile", type=Path, metavar="FILE",
                        help="also run once under pyinstrument, text report to FILE")
    parser.add_argument("--json", type=Path, help="also write the results here")
    args = parser.parse_args()

    before = machine_state()
    print(f"before: {describe_machine(before)}", flush=True)
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        start = time.perf_counter()
        model_file = write_study(folder, args.rows)
        generated = time.perf_counter() - start
        size = (folder / "answers.csv").stat().st_size
        print(f"generated {args.rows:,} rows x {N_ITEMS} items ({size / 2 ** 20:.0f} MiB) in "
              f"{generated:.1f} s", flush=True)
        runs = []
        for k in range(args.repeat):
            runs.append(run_check(model_file, folder / "report", args.limit))
            stopped = " (stopped at the limit)" if runs[-1]["stopped_at_limit"] else ""
            print(f"  run {k + 1}: wall {runs[-1]['wall_s']:.1f} s{stopped}, CPU "
                  f"{runs[-1]['cpu_s']:.1f} s, peak memory {runs[-1]['peak_gib']:.2f} GiB "
                  f"(load {os.getloadavg()[0]:.2f})", flush=True)
            if runs[-1]["stopped_at_limit"]:
                break
        written = sorted(p.name for p in (folder / "report").iterdir()) \
            if (folder / "report").is_dir() else []
        stages = None
        if args.stages:
            from bench_check import core_stages
            stages, estimator = core_stages(model_file)
            print(f"  core stages, in process ({estimator} chosen): " + ", ".join(
                f"{k} {v:.2f} s" for k, v in stages.items()), flush=True)
        if args.profile:
            profile(model_file, folder / "profiled", args.profile)
    after = machine_state()
    best = min(runs, key=lambda r: r["wall_s"])
    print(runs[-1]["stdout"])
    print(f"wrote: {', '.join(written) or 'nothing'}")
    more = "more than " if best["stopped_at_limit"] else ""
    print(f"scalewright check, {args.rows:,} x {N_ITEMS}: fastest wall {more}{best['wall_s']:.1f} s"
          f" (target < 60 s), CPU {more}{best['cpu_s']:.1f} s; peak memory "
          f"{max(r['peak_gib'] for r in runs):.2f} GiB (target < 4 GiB)")
    print(f"after: {describe_machine(after)}")
    if args.json:
        for run in runs:
            run.pop("stdout")
        args.json.write_text(json.dumps({"before": before, "after": after, "rows": args.rows,
                                         "csv_mib": size / 2 ** 20, "generate_s": generated,
                                         "runs": runs, "stages": stages}, indent=1),
                             encoding="utf-8")


if __name__ == "__main__":
    main()
