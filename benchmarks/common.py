"""Helpers shared by the benchmark scripts: seeded simulation from a known
factor model, model-file and CSV writing, repeated timing, and a record of
the machine's state (load, BLAS kernel and threads) to print beside the
numbers.

Timing on the shared 2-core machines is noisy, so every script repeats its
measurements and reports the median, and prints the load average before and
after so a reader can judge the numbers.
"""

from __future__ import annotations

import multiprocessing
import os
import queue
import statistics
import subprocess
import time
from dataclasses import dataclass
from pathlib import Path
from types import SimpleNamespace
from typing import Callable, Iterator

import numpy as np
from threadpoolctl import threadpool_info, threadpool_limits

LOADING_RANGE = (0.5, 0.8)     # standardized primary loadings, drawn uniformly
CONSTRUCT_CORRELATION = 0.3    # every pair of constructs
MINOR_LOADING = 0.15           # unmodelled cross-loading of each construct's first item
FIVE_POINT_CUTS = (-1.5, -0.5, 0.5, 1.5)   # normal → answers 1–5, roughly bell-shaped


# --------------------------------------------------------------------------- simulation

@dataclass(frozen=True)
class Population:
    """A factor model with standardized items: Σ = Λ Φ Λᵀ + diag(1 − diag(Λ Φ Λᵀ)).

    ``constructs`` maps each construct to its items (the model a researcher
    would fit); ``loadings`` also holds the minor cross-loadings that model
    leaves out, so the fitted model misfits a little, as real data do.
    """

    items: tuple[str, ...]
    constructs: dict[str, tuple[str, ...]]
    loadings: np.ndarray        # p × k
    correlations: np.ndarray    # k × k

    @property
    def covariance(self) -> np.ndarray:
        common = self.loadings @ self.correlations @ self.loadings.T
        return common + np.diag(1.0 - np.diag(common))


def population(n_items: int, n_constructs: int, seed: int, minor: float = MINOR_LOADING
               ) -> Population:
    """Simple structure, ``n_items / n_constructs`` items per construct.

    Primary loadings are uniform on ``LOADING_RANGE``; constructs correlate
    ``CONSTRUCT_CORRELATION``; the first item of construct j also loads
    ``minor`` on construct j + 1 (cyclically), which the fitted model omits.
    """
    if n_items % n_constructs:
        raise ValueError(f"{n_items} items do not split evenly over {n_constructs} constructs")
    rng = np.random.default_rng(seed)
    per = n_items // n_constructs
    lam = np.zeros((n_items, n_constructs))
    rows = np.arange(n_items)
    lam[rows, rows // per] = rng.uniform(*LOADING_RANGE, n_items)
    firsts = np.arange(n_constructs) * per
    lam[firsts, (np.arange(n_constructs) + 1) % n_constructs] = minor
    phi = np.full((n_constructs, n_constructs), CONSTRUCT_CORRELATION)
    np.fill_diagonal(phi, 1.0)
    width = len(str(n_items))
    items = tuple(f"i{j + 1:0{width}d}" for j in range(n_items))
    constructs = {f"c{k + 1}": items[k * per:(k + 1) * per] for k in range(n_constructs)}
    return Population(items, constructs, lam, phi)


def normal_sample(pop: Population, n_rows: int, seed: int) -> np.ndarray:
    """``n_rows`` multivariate normal rows with the population covariance."""
    rng = np.random.default_rng(seed)
    chol = np.linalg.cholesky(pop.covariance)
    return rng.standard_normal((n_rows, len(pop.items))) @ chol.T


def five_point_chunks(pop: Population, n_rows: int, seed: int, chunk: int = 100_000
                      ) -> Iterator[np.ndarray]:
    """Answers 1–5 in blocks of ``chunk`` rows (uint8), cut from normal rows.

    The cut points ``FIVE_POINT_CUTS`` (−1.5, −0.5, 0.5, 1.5) give a
    symmetric, roughly bell-shaped distribution over the five categories.
    """
    rng = np.random.default_rng(seed)
    chol = np.linalg.cholesky(pop.covariance).T.astype(np.float32)
    cuts = np.array(FIVE_POINT_CUTS, dtype=np.float32)
    for start in range(0, n_rows, chunk):
        rows = min(chunk, n_rows - start)
        latent = rng.standard_normal((rows, len(pop.items)), dtype=np.float32) @ chol
        yield (np.searchsorted(cuts, latent.ravel()).reshape(latent.shape) + 1).astype(np.uint8)


# --------------------------------------------------------------------------- files

def write_digit_csv(path: Path, header: tuple[str, ...], chunks: Iterator[np.ndarray]) -> int:
    """Write single-digit integer answers (0–9) as CSV; returns the number of rows.

    Each block is turned into its bytes directly — digit, comma, …, digit,
    newline — so a million rows of 50 items take about a second.
    """
    n_rows = 0
    with open(path, "wb") as handle:
        handle.write((",".join(header) + "\n").encode("ascii"))
        for block in chunks:
            rows, p = block.shape
            text = np.empty((rows, 2 * p), dtype=np.uint8)
            text[:, 0::2] = block + ord("0")
            text[:, 1::2] = ord(",")
            text[:, -1] = ord("\n")
            handle.write(text.tobytes())
            n_rows += rows
    return n_rows


def write_float_csv(path: Path, header: tuple[str, ...], x: np.ndarray) -> None:
    """Write a numeric matrix as CSV with 6 decimals (pyarrow's writer)."""
    import pyarrow as pa
    import pyarrow.compute as pc
    import pyarrow.csv as pacsv

    columns = [pc.round(pa.array(x[:, j]), 6) for j in range(x.shape[1])]
    pacsv.write_csv(pa.table(columns, names=list(header)), path)


def write_model_file(path: Path, title: str, data_file: str,
                     models: dict[str, dict[str, tuple[str, ...]]],
                     scale: tuple[int, int] | None = None) -> Path:
    """A model file with one or more rival models (construct → items each)."""
    lines = [f"study: {title}", "data:", f"  file: {data_file}"]
    if scale is not None:
        lines += ["items:", f"  scale: [{scale[0]}, {scale[1]}]"]
    lines.append("models:")
    for name, constructs in models.items():
        lines += [f"  {name}:", "    constructs:"]
        lines += [f"      {c}: [{', '.join(items)}]" for c, items in constructs.items()]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


# --------------------------------------------------------------------------- models

def model_spec(constructs: dict[str, tuple[str, ...]], name: str = "bench",
               identification: str = "unit-variance") -> SimpleNamespace:
    """A correlated-constructs model in the shape :func:`scalewright.specify.build_layout` reads."""
    items = tuple(i for its in constructs.values() for i in its)
    return SimpleNamespace(name=name, constructs=dict(constructs), cross_loadings={},
                           residual_covariances=(), higher_order={}, general=None,
                           identification=identification, place=f"{name}.yaml", items=items)


def semopy_description(constructs: dict[str, tuple[str, ...]]) -> str:
    """The same model in semopy's model syntax."""
    return "\n".join(f"{c} =~ {' + '.join(items)}" for c, items in constructs.items())


# --------------------------------------------------------------------------- timing

@dataclass(frozen=True)
class Timing:
    """Wall-clock and CPU seconds (``time.process_time``, all threads of the
    process) of repeated runs of one call, and its last value.  On a shared
    machine the CPU time is the steadier of the two: waiting for a core
    stretches the wall time only."""

    times: tuple[float, ...]
    cpu: tuple[float, ...]
    value: object

    @property
    def median(self) -> float:
        return statistics.median(self.times)

    @property
    def cpu_median(self) -> float:
        return statistics.median(self.cpu)

    def to_dict(self) -> dict:
        return {"median_s": self.median, "min_s": min(self.times), "max_s": max(self.times),
                "cpu_median_s": self.cpu_median, "repeats": len(self.times)}

    @classmethod
    def pooled(cls, parts: list["Timing"]) -> "Timing":
        """The runs of several timings (rounds) as one; the last round's value."""
        return cls(tuple(t for p in parts for t in p.times), tuple(c for p in parts for c in p.cpu),
                   parts[-1].value)


def timed(function: Callable[[], object], repeat: int, warmup: int = 0,
          budget: float = float("inf")) -> Timing:
    """Run ``function`` ``warmup`` times untimed, then up to ``repeat`` times timed.

    No further repetition starts once the timed runs have taken ``budget``
    seconds in all (at least one always runs), so slow competitors can be
    capped; ``Timing.times`` says how many ran.
    """
    for _ in range(warmup):
        function()
    times, cpu, value = [], [], None
    while len(times) < repeat and (not times or sum(times) < budget):
        start, start_cpu = time.perf_counter(), time.process_time()
        value = function()
        times.append(time.perf_counter() - start)
        cpu.append(time.process_time() - start_cpu)
    return Timing(tuple(times), tuple(cpu), value)


# --------------------------------------------------------------------------- semopy

@dataclass(frozen=True)
class SemopyRuns:
    """Wall-clock and CPU seconds of semopy fits run in a child process, the
    chi-square of the first (``semopy.stats.calc_chi2``), and whether the
    child was stopped at the time limit (then fewer runs, maybe none)."""

    times: tuple[float, ...]
    cpu: tuple[float, ...]
    chi_square: float | None
    stopped: bool
    limit: float

    @property
    def median(self) -> float | None:
        return statistics.median(self.times) if self.times else None

    @property
    def cpu_median(self) -> float | None:
        return statistics.median(self.cpu) if self.cpu else None

    def to_dict(self) -> dict:
        out = {"repeats": len(self.times), "stopped_at_limit": self.stopped,
               "limit_s": self.limit}
        if self.times:
            out.update(median_s=self.median, min_s=min(self.times), max_s=max(self.times),
                       cpu_median_s=self.cpu_median)
        return out

    def shown(self) -> str:
        """Median seconds, or "> limit" when no run finished."""
        return f"{self.median:.2f}" if self.times else f">{self.limit:.0f}"

    @classmethod
    def pooled(cls, parts: list["SemopyRuns"]) -> "SemopyRuns":
        """The runs of several children (rounds) as one."""
        return cls(tuple(t for p in parts for t in p.times), tuple(c for p in parts for c in p.cpu),
                   next((p.chi_square for p in parts if p.chi_square is not None), None),
                   any(p.stopped for p in parts), parts[0].limit)


def semopy_runs(description: str, frame, *, threads: int, repeat: int, budget: float,
                limit: float, options: dict | None = None) -> SemopyRuns:
    """Time ``semopy.Model(description).fit(frame[, options])`` in a fresh child
    process with BLAS limited to ``threads``.

    Up to ``repeat`` runs; none starts after the runs have taken ``budget``
    seconds; the child is stopped after ``limit`` seconds of wall time in all,
    so one very slow fit cannot stall the benchmark.  A small one-construct
    fit runs first, untimed, to pay semopy's one-off set-up costs.
    """
    context = multiprocessing.get_context("spawn")    # no BLAS thread state inherited
    results = context.Queue()
    child = context.Process(target=_semopy_child,
                            args=(description, frame, options, threads, repeat, budget, results))
    deadline = time.monotonic() + limit
    child.start()
    times, cpu, chi_square, stopped = [], [], None, False
    while True:
        try:
            item = results.get(timeout=max(deadline - time.monotonic(), 0.01))
        except queue.Empty:
            stopped = True
            break
        if item is None:
            break
        times.append(item[0])
        cpu.append(item[1])
        chi_square = item[2] if chi_square is None else chi_square
    if stopped:
        child.terminate()
    child.join()
    return SemopyRuns(tuple(times), tuple(cpu), chi_square, stopped, limit)


def _semopy_child(description, frame, options, threads, repeat, budget, results):
    import semopy
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=threads, user_api="blas"):
        first = list(frame.columns[:3])
        semopy.Model(f"warm =~ {' + '.join(first)}").fit(frame[first])
        spent = 0.0
        for k in range(repeat):
            if k and spent >= budget:
                break
            start, start_cpu = time.perf_counter(), time.process_time()
            model = semopy.Model(description)
            if options is None:
                model.fit(frame)
            else:
                model.fit(frame, options=options)
            seconds = time.perf_counter() - start
            spent += seconds
            results.put((seconds, time.process_time() - start_cpu,
                         float(semopy.stats.calc_chi2(model)[0])))
    results.put(None)


def ratio(theirs: float | None, ours: float) -> float | None:
    """semopy's time over ours (None when semopy did not finish)."""
    return None if theirs is None else theirs / ours


@dataclass(frozen=True)
class Rounds:
    """Runs of ours and of semopy's fit timed in alternating rounds
    (:func:`alternating_rounds`): per round, one :class:`Timing` for each of
    our calls and one :class:`SemopyRuns`."""

    ours: dict[str, list[Timing]]
    semopy: list[SemopyRuns]

    def pooled(self, name: str) -> Timing:
        return Timing.pooled(self.ours[name])

    def semopy_pooled(self) -> SemopyRuns:
        return SemopyRuns.pooled(self.semopy)

    def ratios(self, name: str) -> list[float]:
        """semopy's median over ours in each round where semopy finished."""
        return [ratio(theirs.median, mine.median)
                for theirs, mine in zip(self.semopy, self.ours[name]) if theirs.times]


def alternating_rounds(ours: dict[str, Callable[[], object]], description: str, frame, *,
                       threads: int, rounds: int, repeat: int, semopy_repeat: int,
                       semopy_budget: float, semopy_limit: float) -> Rounds:
    """Time each of ``ours`` (``repeat`` runs after one warm-up, BLAS limited
    to ``threads``) and then semopy's fit (:func:`semopy_runs`), ``rounds``
    times over, so that both meet the shared machine's slow and fast spells."""
    mine: dict[str, list[Timing]] = {name: [] for name in ours}
    theirs = []
    for _ in range(rounds):
        with threadpool_limits(limits=threads, user_api="blas"):
            for name, function in ours.items():
                mine[name].append(timed(function, repeat, warmup=1))
        theirs.append(semopy_runs(description, frame, threads=threads, repeat=semopy_repeat,
                                  budget=semopy_budget, limit=semopy_limit))
    return Rounds(mine, theirs)


def ratio_span(values: list[float], digits: int = 0) -> str:
    """Lowest–highest of the rounds' ratios, e.g. "126-130x"."""
    return f"{min(values):.{digits}f}-{max(values):.{digits}f}x" if values else "-"


def semopy_polycorr() -> tuple[object, str]:
    """semopy's ``polycorr`` module made to run on the installed scipy, and a
    sentence for the printout saying how.

    semopy 2.3.11 integrates normal densities with ``scipy.stats.mvn.mvnun``,
    which scipy 1.17 removed.  When it is missing, a stand-in is put in its
    place: a one-dimensional probability (the polyserial likelihood) as the
    difference of two ``scipy.stats.norm.cdf`` values, the stand-in of
    ``tests/test_polyserial.py``; a two-dimensional rectangle (the polychoric
    likelihood) by scipy's compiled bivariate routine ``scipy.stats._qmvnt._bvn``
    (Genz's algorithm, as the removed function used), so that semopy is not
    slowed by a pure-Python replacement.  Everything else is semopy's code.
    """
    import scipy
    from scipy import stats
    from semopy import polycorr

    if hasattr(getattr(stats, "mvn", None), "mvnun"):
        return polycorr, "semopy runs as shipped (scipy.stats.mvn.mvnun is present)."
    from scipy.stats._qmvnt import _bvn

    def mvnun(lower, upper, means, cov):
        if len(lower) == 1:
            sd = np.sqrt(np.ravel(cov)[0])
            return (stats.norm.cdf(upper[0], means[0], sd)
                    - stats.norm.cdf(lower[0], means[0], sd), 0)
        return _bvn(np.asarray(lower, float) - means, np.asarray(upper, float) - means,
                    np.asarray(cov)), 0

    polycorr.mvn = SimpleNamespace(mvnun=mvnun)
    return polycorr, (
        f"semopy calls scipy.stats.mvn.mvnun, which scipy {scipy.__version__} no longer has; it "
        "ran with a stand-in: one-dimensional probabilities (polyserial) from scipy.stats.norm.cdf, "
        "as in tests/test_polyserial.py, two-dimensional ones (polychoric) from scipy's compiled "
        "bivariate routine scipy.stats._qmvnt._bvn.")


# --------------------------------------------------------------------------- machine

def code_state() -> str:
    """The commit measured, and how many files under src/ differ from it."""
    root = Path(__file__).resolve().parent.parent
    try:
        head = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=root, text=True,
                              capture_output=True, check=True).stdout.strip()
        changed = subprocess.run(["git", "status", "--porcelain", "--", "src"], cwd=root,
                                 text=True, capture_output=True, check=True).stdout.splitlines()
    except (OSError, subprocess.CalledProcessError):
        return "not a git work tree"
    return f"commit {head}" + (f" with {len(changed)} changed files under src/" if changed else "")


def machine_state() -> dict:
    """Load average, cores, BLAS libraries (kernel, version, default threads),
    the OpenBLAS variables that change the kernel, and the code measured."""
    blas = [{"library": Path(lib["filepath"]).name, "kernel": lib.get("architecture"),
             "version": lib.get("version"), "threads": lib["num_threads"]}
            for lib in threadpool_info() if lib["user_api"] == "blas"]
    return {"load_1_5_15": [round(x, 2) for x in os.getloadavg()], "cores": os.cpu_count(),
            "blas": blas,
            "openblas_env": {k: os.environ.get(k) for k in ("OPENBLAS_CORETYPE",
                                                            "OPENBLAS_L2_SIZE")},
            "date": time.strftime("%Y-%m-%d %H:%M %Z"), "code": code_state()}


def describe_machine(state: dict) -> str:
    """One paragraph for the top of a benchmark's printout."""
    kernels = ", ".join(f"{b['library']} ({b['kernel']}, {b['version']}, {b['threads']} threads)"
                        for b in state["blas"])
    env = ", ".join(f"{k}={v}" for k, v in state["openblas_env"].items() if v is not None)
    load = ", ".join(f"{x:.2f}" for x in state["load_1_5_15"])
    return (f"{state['date']}; {state['code']}; {state['cores']} cores; load average {load}; "
            f"BLAS: {kernels}; {env or 'OPENBLAS_CORETYPE and OPENBLAS_L2_SIZE unset'}")
