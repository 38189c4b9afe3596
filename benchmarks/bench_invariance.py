"""Time the invariance sequence with the partial-invariance search against
semopy's multigroup fit.

Data: 30 items on 5 constructs (6 each, standardized loadings .55–.80,
construct correlations .3), two groups of 1,000 drawn with a fixed seed;
group b has two intercepts and one loading that differ, so the search has
something to find.  Timed:

* ours: the whole sequence (configural, metric, scalar, strict) with the
  score-test search, latent comparisons included
  (:func:`scalewright.invariance.measurement_invariance`), and our
  configural fit alone;
* semopy 2.3.11: ``semopy.multigroup.multigroup``, which fits the model
  separately in each group (the configural model; semopy has no
  cross-group equality constraints), with its default settings and with
  ``ftol = 1e-12``.

Issue 6 target: the whole sequence in under 10 s.  Run:
``.venv/bin/python benchmarks/bench_invariance.py`` (BLAS pinned to one
thread inside scalewright, as in normal use).

Measured 2026-12-01 on the 2-core machine shared with other jobs (two runs,
so the spread is the machine's load): the search released exactly the three
planted differences (loading of i09, intercepts of i21 and i04);

=====================================================  ===============
ours, whole sequence with search and latent comparison   0.38 – 1.57 s
ours, configural fit                                    0.036 – 0.16 s
semopy multigroup (configural), default settings         5.3 – 16.9 s
semopy multigroup (configural), ftol 1e-12              11.2 – 20.1 s
ratio semopy configural / ours configural                  33 – 470
ratio semopy configural (default) / our whole sequence    3.4 – 45
=====================================================  ===============
"""

from __future__ import annotations

import time
from types import SimpleNamespace

import numpy as np
import pandas as pd
import semopy

from scalewright.invariance import measurement_invariance
from scalewright.multigroup import (CONFIGURAL, build_multigroup_layout, complete_moments,
                                    fit_multigroup)

N_PER_GROUP, N_CONSTRUCTS, PER_CONSTRUCT, SEED = 1000, 5, 6, 20240601


def population():
    p = N_CONSTRUCTS * PER_CONSTRUCT
    lam = np.zeros((p, N_CONSTRUCTS))
    for c in range(N_CONSTRUCTS):
        lam[c * PER_CONSTRUCT:(c + 1) * PER_CONSTRUCT, c] = np.linspace(0.55, 0.80, PER_CONSTRUCT)
    phi = np.full((N_CONSTRUCTS, N_CONSTRUCTS), 0.3) + 0.7 * np.eye(N_CONSTRUCTS)
    return lam, phi


def draw(rng):
    lam, phi = population()
    p = lam.shape[0]
    xs = []
    for g in range(2):
        lam_g, nu = lam.copy(), np.zeros(p)
        alpha = np.zeros(N_CONSTRUCTS) if g == 0 else np.linspace(-0.2, 0.2, N_CONSTRUCTS)
        if g == 1:
            nu[[3, 20]] = 0.35
            lam_g[8, 1] = 0.35
        eta = rng.multivariate_normal(alpha, phi, N_PER_GROUP)
        resid = np.sqrt(1.0 - np.diag(lam @ phi @ lam.T))
        xs.append(nu + eta @ lam_g.T + rng.standard_normal((N_PER_GROUP, p)) * resid)
    return np.vstack(xs), np.repeat([0, 1], N_PER_GROUP)


def spec():
    items = tuple(f"i{j + 1:02d}" for j in range(N_CONSTRUCTS * PER_CONSTRUCT))
    constructs = {f"c{c + 1}": items[c * PER_CONSTRUCT:(c + 1) * PER_CONSTRUCT]
                  for c in range(N_CONSTRUCTS)}
    return SimpleNamespace(name="bench", constructs=constructs, cross_loadings={},
                           residual_covariances=(), higher_order={}, general=None,
                           identification="unit-variance", place="bench", items=items)


def best_of(repeats, function):
    times, out = [], None
    for _ in range(repeats):
        start = time.perf_counter()
        out = function()
        times.append(time.perf_counter() - start)
    return min(times), out


def main():
    x, index = draw(np.random.default_rng(SEED))
    model = spec()
    moments = complete_moments(("a", "b"), x, index)
    sequence_time, result = best_of(3, lambda: measurement_invariance(model, moments))
    configural_time, _ = best_of(3, lambda: fit_multigroup(
        build_multigroup_layout(model, moments, CONFIGURAL), moments))

    frame = pd.DataFrame(x, columns=model.items)
    frame["group"] = np.where(index == 0, "a", "b")
    description = "\n".join(f"{c} =~ {' + '.join(its)}" for c, its in model.constructs.items())
    semopy_default, _ = best_of(1, lambda: semopy.multigroup.multigroup(description, frame,
                                                                        "group"))
    semopy_tight, _ = best_of(1, lambda: semopy.multigroup.multigroup(
        description, frame, "group", options={"ftol": 1e-12}))

    print(f"data: {N_CONSTRUCTS * PER_CONSTRUCT} items, {N_CONSTRUCTS} constructs, "
          f"2 groups of {N_PER_GROUP}")
    for step in result.steps:
        names = [(r.test.param.kind, r.test.param.b if r.test.param.kind == "loading"
                  else r.test.param.a) for r in step.releases]
        print(f"  {step.step:<10} chi2 {step.final.fit.chi_square:9.2f} df {step.final.fit.df:4d}"
              f"  released {names}")
    print(f"ours, whole sequence with search (best of 3): {sequence_time:7.3f} s  "
          f"(target < 10 s)")
    print(f"ours, configural fit (best of 3):             {configural_time:7.3f} s")
    print(f"semopy multigroup (configural), default:      {semopy_default:7.3f} s  "
          f"ratio semopy/ours-configural {semopy_default / configural_time:6.1f}")
    print(f"semopy multigroup (configural), ftol 1e-12:   {semopy_tight:7.3f} s  "
          f"ratio semopy/ours-configural {semopy_tight / configural_time:6.1f}")
    print(f"ratio semopy configural (default) / our whole sequence: "
          f"{semopy_default / sequence_time:6.2f}")


if __name__ == "__main__":
    main()
