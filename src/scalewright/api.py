"""The public Python API: run a whole check from a model file.

>>> import scalewright
>>> result = scalewright.check("models/teacher-climate.yaml")       # doctest: +SKIP
>>> result.to_dict()["models"][0]["fit"]["cfi"]                      # doctest: +SKIP

Nothing is written unless ``out`` is given; ``result.to_dict()`` is exactly
the JSON file.
"""

from __future__ import annotations

import datetime as _dt
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from scalewright import __version__
from scalewright.errors import StudyError
from scalewright.evaluate import evaluate_normal
from scalewright.itemdata import ItemData, read_items
from scalewright.modelresult import ModelResult
from scalewright.screening import Screening, screen
from scalewright.studyfile import Study, load_study


@dataclass(frozen=True)
class CheckResult:
    """The outcome of a whole check: the study, its data, every rival model."""

    study: Study
    data: ItemData
    screening: Screening
    models: tuple[ModelResult, ...]
    n_used: int
    dropped: dict                     # reason -> number of rows
    created: str                      # ISO timestamp (the one line that differs between runs)
    extra: dict = field(default_factory=dict)

    def model(self, name: str) -> ModelResult:
        for m in self.models:
            if m.name == name:
                return m
        raise KeyError(name)

    def to_dict(self) -> dict:
        study = self.study
        out = {
            "tool": {"name": "scalewright", "version": __version__},
            "created": self.created,
            "study": {
                "title": study.title,
                "model_file": study.path.name,
                "about": dict(study.about),
                "items": [{"name": s.name, "wording": s.wording, "reverse": s.reverse,
                           "treat_as": s.treat_as} for s in study.items.values()],
                "scale": list(study.scale) if study.scale else None,
                "missing_codes": [_plain(c) for c in study.data.missing],
            },
            "data": {
                "file": study.data.file.name,
                "sha256": self.data.sha256,
                "n_rows": self.data.n_rows,
                "n_used": self.n_used,
                "dropped": dict(self.dropped),
                "missing_handling": "listwise deletion",
                "screening": self.screening.to_dict(),
            },
            "models": [m.to_dict() for m in self.models],
        }
        out.update(self.extra)
        return out


def _plain(value):
    if isinstance(value, (np.integer, np.floating)):
        return value.item()
    return value


def check(path: str | Path, out: str | Path | None = None) -> CheckResult:
    """Run the whole check of the study in the model file at ``path``.

    Reads and validates the model file and the data, screens the items,
    fits every rival model and computes its fit indices.  When ``out`` is
    given, writes ``<out>/<model-file stem>.json`` and ``.html`` (see
    :func:`scalewright.output.write_outputs`).
    """
    study = load_study(path)
    data = read_items(study)
    screening = screen(data)
    complete = data.complete_rows()
    n_used = int(complete.sum())
    dropped = {"incomplete answers": int(data.n_rows - n_used)}
    p_max = max(len(m.items) for m in study.models)
    if n_used < p_max + 1:
        raise StudyError(
            f"{study.data.place}: only {n_used} of {data.n_rows} rows answer every item, fewer "
            f"than the {p_max + 1} needed for {p_max} items. Check the missing-value codes under "
            "data: missing:, or drop items that many people left unanswered.")
    column = {item: j for j, item in enumerate(data.items)}
    x_all = data.values[complete]
    models = []
    for spec in study.models:
        x = x_all[:, [column[i] for i in spec.items]]
        _check_sample_covariance(study, spec, x)
        models.append(evaluate_normal(spec, x))
    result = CheckResult(study, data, screening, tuple(models), n_used, dropped,
                         _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC"))
    if out is not None:
        from scalewright.output import write_outputs
        write_outputs(result, Path(out))
    return result


def _check_sample_covariance(study: Study, spec, x: np.ndarray) -> None:
    """A singular sample covariance matrix: name the linearly dependent items."""
    cov = np.cov(x, rowvar=False)
    values, vectors = np.linalg.eigh(cov / np.outer(np.sqrt(np.diag(cov)), np.sqrt(np.diag(cov))))
    if values[0] > 1e-10 * values[-1]:
        return
    weights = vectors[:, 0]
    involved = [spec.items[i] for i in np.nonzero(np.abs(weights) > 0.05)[0]]
    raise StudyError(
        f"{spec.place}: the items of model '{spec.name}' are linearly dependent in the data "
        f"(their covariance matrix is singular): {', '.join(repr(i) for i in involved)} add up "
        "to a constant combination, e.g. one is a total or a copy of the others. Remove one "
        "of them from the model.")
