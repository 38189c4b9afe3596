"""Time and size of the HTML report for a large study (issue 4: a 100-item,
10-construct study with 4 rival models renders in < 2 s and < 5 MB).

The study is simulated (seeded) from a known 10-construct model, written as
a model file and CSV into a temporary folder, checked end to end with
``scalewright.api.check``, compared with ``compare_models`` and, when the
scale-quality keys are available, given those too (they carry the largest
parts of the report: hints and 100 × 100 residual matrices).  Only the
rendering is timed; fitting is reported for information.

Run:  .venv/bin/python benchmarks/bench_report.py
"""

from __future__ import annotations

import statistics
import tempfile
import time
from pathlib import Path

import numpy as np

from scalewright import api
from scalewright.compare import compare_models
from scalewright.report.document import build_document
from scalewright.report.render import render_document, render_html

P, K, N = 100, 10, 1000


def write_study(folder: Path) -> Path:
    rng = np.random.default_rng(20240611)
    per = P // K
    lam = np.zeros((P, K))
    for k in range(K):
        lam[k * per:(k + 1) * per, k] = rng.uniform(0.55, 0.8, per)
    phi = np.full((K, K), 0.35) + 0.65 * np.eye(K)
    sigma = lam @ phi @ lam.T
    sigma[np.diag_indices(P)] = 1.0
    x = rng.multivariate_normal(np.zeros(P), sigma, size=N)
    items = [f"q{j:03d}" for j in range(P)]
    header = ",".join(items)
    np.savetxt(folder / "large.csv", x, delimiter=",", header=header, comments="", fmt="%.4f")
    groups = {f"c{k}": items[k * per:(k + 1) * per] for k in range(K)}
    constructs = "\n".join(f"      c{k}: [{', '.join(v)}]" for k, v in enumerate(groups.values()))
    text = f"""study: Simulated 100-item study
data:
  file: large.csv
models:
  one-general:
    constructs:
      general: [{', '.join(items)}]
  ten-constructs:
    first: true
    constructs:
{constructs}
  higher-order:
    constructs:
{constructs}
    higher_order:
      overall: [{', '.join(groups)}]
  bifactor:
    general: overall
    constructs:
{constructs}
"""
    path = folder / "large.yaml"
    path.write_text(text, encoding="utf-8")
    return path


def quality_keys(result, report: dict) -> bool:
    """Add the issue-3 keys when that module is present; True if added."""
    try:
        from scalewright.itemreview import quality_keys as keys
    except ImportError:
        return False
    data = result.data
    complete = data.complete_rows()
    column = {item: j for j, item in enumerate(data.items)}
    for model, entry in zip(result.models, report["models"]):
        spec = result.study.model(model.name)
        x = data.values[complete][:, [column[i] for i in spec.items]]
        entry.update(keys(model, result.study, x, max_steps=0))
    return True


def main() -> None:
    with tempfile.TemporaryDirectory() as tmp:
        path = write_study(Path(tmp))
        start = time.perf_counter()
        result = api.check(path)
        fitted = time.perf_counter() - start
        report = result.to_dict()
        report.update(compare_models(result.study.models, report["models"]))
        start = time.perf_counter()
        with_quality = quality_keys(result, report)
        quality = time.perf_counter() - start
    times = []
    for _ in range(5):
        start = time.perf_counter()
        html = render_html(report)
        times.append(time.perf_counter() - start)
    start = time.perf_counter()
    doc = build_document(report)
    built = time.perf_counter() - start
    start = time.perf_counter()
    render_document(report, doc)
    templated = time.perf_counter() - start
    size = len(html.encode("utf-8"))
    print(f"study: {P} items, {K} constructs, {len(report['models'])} rival models, N = {N}")
    print(f"fit (api.check): {fitted:.1f} s; scale-quality keys: "
          f"{f'{quality:.1f} s' if with_quality else 'module not available'}")
    print(f"render: median {statistics.median(times):.3f} s over 5 runs "
          f"(document {built:.3f} s, template {templated:.3f} s); target < 2 s")
    print(f"size: {size / 1e6:.2f} MB; target < 5 MB")


if __name__ == "__main__":
    main()
