"""The public Python API: run a whole check from a model file.

>>> import scalewright
>>> result = scalewright.check("models/teacher-climate.yaml")       # doctest: +SKIP
>>> result.to_dict()["models"][0]["fit"]["cfi"]                      # doctest: +SKIP

Nothing is written unless ``out`` is given; ``result.to_dict()`` is exactly
the JSON file.
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import functools
import threading
import warnings
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from scalewright import __version__
from scalewright.blas import one_blas_thread
from scalewright.errors import StudyError
from scalewright.compare import compare_models
from scalewright.diagnostics import classified_warnings
from scalewright.estimate.dwls import DwlsModel
from scalewright.estimate.fiml import saturated_covariance, saturated_model
from scalewright.estimate.normal import CompleteRows, complete_rows
from scalewright.estimate.spd_inverse import cholesky_inverse, condition_bound
from scalewright.estimate.polychoric import collapse_sparse_columns
from scalewright.evaluate import evaluate_moments, moments_subset, point_estimate
from scalewright.evaluate_mixed import evaluate_mixed, refit_mixed
from scalewright.evaluate_ordinal import evaluate_ordinal, refit_ordinal
from scalewright.evaluate_real import evaluate_answers, fiml_point_estimate, missing_data_summary
from scalewright.invariance import invariance_keys
from scalewright.itemreview import quality_keys
from scalewright.methods import LISTWISE, MIXED, ORDINAL, ROBUST, choose_method
from scalewright.scalequality import scale_quality_keys
from scalewright.itemdata import ItemData, read_items
from scalewright.modelresult import ModelResult
from scalewright.outliers import item_correlations, mahalanobis_outliers
from scalewright.output import check_targets, write_outputs
from scalewright.progress import say
from scalewright.repeats import repeated_ids
from scalewright.screening import Screening, screen
from scalewright.studyfile import Study, load_study

#: smallest eigenvalue of a model's item correlation matrix, relative to the largest,
#: below which its sample covariance counts as singular (rounding level; common
#: practice, no source)
_SINGULAR = 1e-10


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
    missing: dict = field(default_factory=dict)   # patterns, per-item rates, Little's test
    method: object = None                          # the MethodChoice
    data_checks: dict = field(default_factory=dict)  # outliers, item correlations
    fit_only: bool = False            # check(..., fit_only=True): no local fit or scale quality

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
                "group_column": study.groups.column if study.groups else None,
            },
            "data": {
                "file": study.data.file.name,
                "sha256": self.data.sha256,
                "n_rows": self.data.n_rows,
                "n_used": self.n_used,
                "dropped": dict(self.dropped),
                "missing_handling": self.method.missing_handling if self.method else None,
                "missing": self.missing,
                "screening": self.screening.to_dict(),
            },
            "models": [m.to_dict() for m in self.models],
            "fit_only": self.fit_only,
        }
        out["data"].update(self.data_checks)
        out.update(self.extra)
        return _plain(out)


def _plain(value):
    """JSON-able copy: numpy scalars to Python numbers, tuples to lists, and
    NaN or infinite numbers (an undefined statistic) to None."""
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, np.ndarray):
        return _plain(value.tolist())
    if isinstance(value, (np.integer, np.bool_)):
        return value.item()
    if isinstance(value, (float, np.floating)):
        return float(value) if np.isfinite(value) else None
    return value


def check(path: str | Path, out: str | Path | None = None, *,
          fit_only: bool = False) -> CheckResult:
    """Run the whole check of the study in the model file at ``path``.

    Reads and validates the model file and the data, screens the items,
    chooses the estimation method (:func:`scalewright.methods.choose_method`),
    fits every rival model with its fit indices, local fit and scale
    quality, compares the rivals, and checks measurement invariance across
    groups when the study has a grouping column.  When ``out`` is given,
    writes ``<out>/<model-file stem>.json`` and ``.html`` (see
    :func:`scalewright.output.write_outputs`).

    ``fit_only=True`` stops after the fit: every model is fitted with its fit
    indices, estimates and warnings and the rivals are compared, but local
    fit (modification hints, residual correlations), the item review and its
    refinement path, scale quality (reliability, validity) and invariance
    are left out, and the JSON says ``"fit_only": true``.  A first look
    while the model file is being written: the refits behind the item review
    and "omega if dropped" are most of a complete check's time.
    """
    study = load_study(path)
    if out is not None:
        check_targets(Path(out), study.path.stem)
    # one BLAS thread throughout: on the 2-core machines this is built for, a threaded
    # BLAS made even the 100-item covariance check 40-70x slower under load (measured;
    # DEVELOPERS.md, "Speed")
    with one_blas_thread():
        result = _checked(study, fit_only)
    for model in result.models:
        for category, text in classified_warnings(model.estimate, model.std):
            warnings.warn(f"model '{model.name}': {text}", category, stacklevel=2)
    if out is not None:
        say(f"writing the report into '{out}'")
        write_outputs(result, Path(out))
    return result


def _checked(study: Study, fit_only: bool = False) -> CheckResult:
    """The stages of :func:`check`, from reading the data to the result."""
    say(f"reading '{study.data.file.name}'")
    data = read_items(study)
    say(f"screening {len(data.items)} items in {data.n_rows} rows")
    complete = complete_rows(np.asarray(data.values))
    # Mardia's skewness, the n²p/2 products of the screen, is summed on a second thread
    # while the method is chosen (from the kurtosis) and the models are fitted: the
    # 100-item check took 40 ms instead of 45 (measured; DEVELOPERS.md, "Speed")
    # An error (or an interrupt) in those stages sets `stop`, which ends the sum at its next
    # block, so that the message is not held back until the sum is done
    stop = threading.Event()
    with ThreadPoolExecutor(max_workers=1) as pool:
        try:
            screening = screen(data, complete, pool, stop)
            choice = choose_method(study, data, screening)
            rows = _rows_used(study, data, choice)
            n_used = int(rows.sum())
            models = []
            for k, spec in enumerate(study.models, start=1):
                say(f"model '{spec.name}' ({k} of {len(study.models)}): fitting")
                models.append(_fit_placed(study, spec, data, rows, choice, complete, fit_only))
        except BaseException:
            stop.set()
            raise
    screening = screening.resolved()       # plain data again (a result can be pickled)
    models = tuple(models)
    extra = {"method": choice.to_dict()}
    extra.update(compare_models(study.models, [m.comparison_keys() for m in models],
                                {m.name: m.fitted for m in models
                                 if isinstance(m.fitted, DwlsModel)}))
    if study.groups is not None and not fit_only:
        spec = next((m for m in study.models if m.first), study.models[0])
        say(f"model '{spec.name}': checking invariance across the groups of "
            f"'{study.groups.column}'")
        extra.update(_invariance(study, data, spec, choice))
    dropped = {"no answer to any item" if choice.missing_handling != LISTWISE
               else "incomplete answers": int(data.n_rows - n_used)}
    return CheckResult(study, data, screening, models, n_used, dropped,
                       _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC"),
                       extra, missing_data_summary(data), choice,
                       _reanalysis_keys(study, data, choice, complete, screening.distances),
                       fit_only)


def _invariance(study: Study, data: ItemData, spec, choice) -> dict:
    """The invariance keys; a mixed study is checked by robust ML on the items as
    they are (invariance of its thresholds and correlations is not available), and
    the setup says so."""
    if choice.estimator != MIXED:
        return invariance_keys(study, data, spec, choice)
    keys = invariance_keys(study, data, spec, dataclasses.replace(choice, estimator=ROBUST))
    keys["invariance_setup"]["method_note"] = (
        "The items are treated as continuous here (robust ML): invariance for models that mix "
        "ordinal and continuous items is not available yet.")
    return keys


def _reanalysis_keys(study: Study, data: ItemData, choice, complete: CompleteRows,
                     distances: np.ndarray | None) -> dict:
    """Outlier screening, the item correlation matrix and repeated ids
    (reporting checklist lines 11, 12 and 8), under ``data``; ``complete``:
    its complete rows and their moments; ``distances``: their squared
    Mahalanobis distances when the screen computed them."""
    values = np.asarray(data.values)
    saturated = None
    if choice.missing_handling != LISTWISE and np.isnan(values).any():
        saturated = saturated_covariance(values, data.items, data.file.name)
    found = mahalanobis_outliers(values, data.row_ids, complete, distances)
    correlations = item_correlations(values, data.items, saturated, complete)
    return {"outliers": found.to_dict() if found else None, "correlations": correlations,
            "repeated_ids": repeated_ids(data.row_ids, study.data.id_column)}


def _rows_used(study: Study, data: ItemData, choice) -> np.ndarray:
    """Rows that enter estimation: complete rows for listwise deletion,
    rows with at least one answer otherwise."""
    values = np.asarray(data.values)
    if choice.missing_handling == LISTWISE:
        rows = ~np.isnan(values).any(axis=1)
    else:
        rows = ~np.isnan(values).all(axis=1)
    p_max = max(len(m.items) for m in study.models)
    n_used = int(rows.sum())
    if n_used < p_max + 1:
        raise StudyError(
            f"{study.data.place}: only {n_used} of {data.n_rows} rows can be used "
            f"({'complete rows, listwise deletion' if choice.missing_handling == LISTWISE else 'rows with any answer'}), "
            f"fewer than the {p_max + 1} needed for {p_max} items. Check the missing-value codes "
            "under data: missing:, or drop items that many people left unanswered.")
    return rows


def _fit_placed(study: Study, spec, data: ItemData, rows: np.ndarray, choice,
                complete: CompleteRows, fit_only: bool) -> ModelResult:
    """:func:`_fit_model`; a problem the estimation core finds (it knows no files)
    is said at the model's place in the model file."""
    try:
        return _fit_model(study, spec, data, rows, choice, complete, fit_only)
    except StudyError as exc:
        if str(exc).startswith((study.path.name, data.file.name)):
            raise
        raise StudyError(f"{spec.place}: in model '{spec.name}': {exc}") from None


def _fit_model(study: Study, spec, data: ItemData, rows: np.ndarray, choice,
               complete: CompleteRows, fit_only: bool) -> ModelResult:
    """One rival model by the chosen method, with its local-fit and scale-quality
    keys unless ``fit_only``.  ``complete`` holds the rows answering every
    item and their moments: for a model on every item (columns in the data's
    order) they are its own complete rows, which are then not found again."""
    columns = [data.items.index(i) for i in spec.items]
    values = np.asarray(data.values)
    every_item = columns == list(range(values.shape[1]))
    if rows.all() and every_item:
        x = values                        # no copy of a large file
    else:
        x = values[np.ix_(rows, columns)]
    if choice.estimator in (ORDINAL, MIXED):
        model = (evaluate_ordinal(spec, x, spec.items, study.scale, study.collapse_sparse)
                 if choice.estimator == ORDINAL else
                 evaluate_mixed(spec, x, spec.items, choice.continuous_items, study.scale,
                                study.collapse_sparse))
        if fit_only:
            return model
        analysed = _merged_sparse_categories(study, spec, choice, x)
        complete_answers = analysed[~np.isnan(analysed).any(axis=1)]

        def refit(reduced_spec, answers, columns, start_from):
            # the DWLS route computes its own start values (``start_from`` unused);
            # the refinement path refits by the model's own route on the same answers
            # (pairwise, categories merged as before), so its steps' fit stays comparable
            # with step 0; the alphas it reports come from ``complete_answers``.  The refits
            # read their moments off the model's (exact on the same rows)
            if choice.estimator == ORDINAL:
                return refit_ordinal(reduced_spec, model.fitted.moments, x[:, columns],
                                     reduced_spec.items, study.scale, study.collapse_sparse)
            return refit_mixed(reduced_spec, model.fitted.moments, x[:, columns],
                               reduced_spec.items, choice.continuous_items, study.scale,
                               study.collapse_sparse)

        model.extra.update(quality_keys(model, study, complete_answers, fit=refit))
        return model
    own = (complete if every_item else complete_rows(x)).moments   # of x's complete rows
    _check_sample_covariance(spec, own.cov if own.n > len(columns) else
                             saturated_covariance(x, spec.items, data.file.name))
    model = evaluate_answers(spec, x, choice, data.file.name, moments=own)
    if fit_only:
        return model
    saturated = None
    if model.estimate.method.endswith("fiml"):
        saturated = saturated_model(x, spec.items, data.file.name)
    observed = None if saturated is None else saturated[1].cov
    # the refinement path refits by the model's route; its trial removals are judged
    # by their fit alone (``trial=True``: no standard errors or robust corrections)
    if np.isnan(x).any():
        def refit(reduced_spec, answers, columns, start_from, trial=False):
            return evaluate_answers(reduced_spec, answers[:, columns], choice, data.file.name,
                                    start_from=start_from, trial=trial)

        def estimates(reduced_spec, answers, columns):
            # omega if dropped needs only the solution: warm-started, no SEs or indices
            if observed is None:                 # listwise: complete rows only
                return refit(reduced_spec, answers, columns, model.estimate).estimate
            return fiml_point_estimate(reduced_spec, answers[:, columns], data.file.name,
                                       model.estimate, observed[np.ix_(columns, columns)])
    else:
        # complete data (x has no gap, so ``own`` are its moments): the refits of the
        # refinement path and of omega-if-dropped need only the ML point estimates and
        # normal-theory fit, whose sufficient statistics are the moments, so large
        # files are not copied per refit
        def refit(reduced_spec, answers, columns, start_from, trial=False):
            return evaluate_moments(reduced_spec,
                                    moments_subset(own, spec.items, reduced_spec.items),
                                    start_from=start_from, trial=trial)

        def estimates(reduced_spec, answers, columns):
            # omega if dropped needs only the solution: warm-started, no SEs or indices
            return point_estimate(reduced_spec,
                                  moments_subset(own, spec.items, reduced_spec.items),
                                  start_from=model.estimate)

    model.extra.update(quality_keys(model, study, x, fit=refit,
                                    trial_fit=functools.partial(refit, trial=True),
                                    saturated=saturated))
    model.extra.update(scale_quality_keys(model, study, x, estimates=estimates))
    return model


def _merged_sparse_categories(study: Study, spec, choice, x: np.ndarray) -> np.ndarray:
    """The answers of an ordinal or mixed model with sparse categories merged as
    its moments merged them (the model file's ``collapse_sparse``, by the same
    function on the same answers), so that the refinement path's refits and
    alphas see the categories the model was fitted to; ``x`` itself if
    nothing is merged."""
    if not study.collapse_sparse:
        return x
    continuous = set(choice.continuous_items)
    columns = [j for j, item in enumerate(spec.items) if item not in continuous]
    merged = x.copy()
    merged[:, columns], _ = collapse_sparse_columns(
        x[:, columns], [spec.items[j] for j in columns], scales=[study.scale] * len(columns))
    return merged


def _check_sample_covariance(spec, cov: np.ndarray) -> None:
    """A singular sample covariance matrix: name the linearly dependent items.

    ``cov`` is the covariance of the complete rows, or, when fewer rows than
    items are complete (planned missingness), the saturated model's ML
    covariance (EM), whose reading of the answers refuses items never answered
    together."""
    correlation = cov / np.outer(np.sqrt(np.diag(cov)), np.sqrt(np.diag(cov)))
    factored = cholesky_inverse(correlation)
    if factored is not None and condition_bound(correlation, factored[1]) > _SINGULAR:
        return                                      # well conditioned: no eigendecomposition
    values, vectors = np.linalg.eigh(correlation)
    if values[0] > _SINGULAR * values[-1]:
        return
    weights = vectors[:, 0]
    involved = [spec.items[i] for i in np.nonzero(np.abs(weights) > 0.05)[0]]
    raise StudyError(
        f"{spec.place}: the items of model '{spec.name}' are linearly dependent in the data "
        f"(their covariance matrix is singular): {', '.join(repr(i) for i in involved)} add up "
        "to a constant combination, e.g. one is a total or a copy of the others. Remove one "
        "of them from the model.")
