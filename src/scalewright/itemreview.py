"""Item review and the refinement path: which items a researcher should look
at, and what the model would look like without them; :func:`quality_keys`
gathers these with the modification hints and residual correlations into the
per-model JSON keys.

An item is flagged when

* ``weak_loading``: its standardized loading on its own construct (and, in a
  bifactor model, on the general factor) is below the salience threshold
  (``estimation: salience``, default .40; common practice, no source);
* ``cross_loading``: it loads substantially on a second construct, i.e. an
  estimated cross-loading, or a suggested one (modification index at or above
  ``estimation: hint_threshold``) whose standardized size (EPC) reaches the
  salience threshold;
* ``residual_pair``: its residual covaries with another item's enough to
  account for .10 or more of the two items' correlation, ``|θ_ij| / √(σ̂_ii σ̂_jj)
  ≥ .10`` — the size at which a residual correlation is flagged (common
  practice, no source) — either estimated in the model or suggested by a
  modification index at or above the hint threshold whose EPC has that size.
  On this scale, rather than as a correlation of the residuals themselves, the
  smaller indices that one omitted residual covariance induces among the
  other items of its construct mostly stay below the threshold.

The refinement path refits the model without each flagged item in turn and
keeps the removal that improves both fit (CFI) and the reliability (Cronbach's
alpha) of the item's construct the most; when no removal improves both, the
one that improves fit most, else reliability most.  It repeats until no item
is flagged, no removal improves either, every flagged item sits in a
construct with three items (a construct measured by fewer than three items is
not identified on its own: three-indicator rule, Bollen 1989, ch. 7), or it
has removed more than a quarter of the model's items and at least five
(:func:`removal_limit`).  So many removals say that the structure misfits
(items of distinct constructs forced onto one, say), which no shortening
repairs; going on would only spend the minutes a misfitting 100-item rival
takes on a path to a model nobody proposed.  The path is a suggestion; the
model is never changed.

References
----------
Bollen, K. A. (1989). Structural Equations with Latent Variables. Wiley.
Cronbach, L. J. (1951). Coefficient alpha and the internal structure of
tests. Psychometrika 16, 297–334.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from functools import cached_property
from types import SimpleNamespace
from typing import Callable

import numpy as np
import pandas as pd

from scalewright.errors import StudyError
from scalewright.evaluate import refit_columns
from scalewright.hints import ScoreTests, modification_hint_keys
from scalewright.hints_dwls import score_tests_for
from scalewright.layout import CONSTRUCT, GENERAL, LOADING, RESIDUAL_COV
from scalewright.modelresult import ModelResult
from scalewright.progress import say
from scalewright.reliability import cronbach_alpha
from scalewright.residuals import FLAG_AT, residual_correlations

WEAK, CROSS, PAIR = "weak_loading", "cross_loading", "residual_pair"

#: fewest items a construct keeps on the refinement path (three-indicator rule, Bollen 1989)
MIN_ITEMS = 3

NOTE = (
    "A suggestion for you to judge, not a change: no item was removed from your model. "
    "Each step refits the model without one flagged item and keeps the removal that "
    "improves both the fit (CFI) and the reliability (Cronbach's alpha) of that item's "
    "construct the most. Dropping items narrows what a scale measures: keep an item whose "
    "content the construct needs, revise rather than drop where you can, and confirm a "
    "shortened scale on new data.")


#: share of a model's items beyond which the refinement path's removals point to the
#: structure rather than to single items (a judgement call; no published rule)
MANY_REMOVED = 0.25
#: removals the path may always make, however short the scale (a judgement call)
FEW_REMOVED = 5


def removal_limit(n_items: int) -> int:
    """Removals after which the refinement path stops: more than
    :data:`MANY_REMOVED` of the items, and at least :data:`FEW_REMOVED`."""
    return max(FEW_REMOVED, math.floor(MANY_REMOVED * n_items) + 1)


@dataclass(frozen=True)
class Settings:
    """Thresholds of the review (the model file's ``estimation:`` section)."""

    salience: float = 0.40
    hint_threshold: float = 10.0
    residual_threshold: float = FLAG_AT

    @classmethod
    def from_study(cls, study) -> "Settings":
        return cls(salience=study.estimation.salience,
                   hint_threshold=study.estimation.hint_threshold)


@dataclass(frozen=True)
class Flag:
    """One reason to look at an item: ``other`` is a construct or an item."""

    kind: str
    other: str | None
    value: float
    text: str


@dataclass(frozen=True)
class ItemReview:
    """The flags of one item."""

    item: str
    flags: tuple[Flag, ...]

    @property
    def kinds(self) -> tuple[str, ...]:
        return tuple(dict.fromkeys(f.kind for f in self.flags))

    def to_dict(self) -> dict:
        return {"item": self.item, "flags": list(self.kinds),
                "details": [{"flag": f.kind, "with": f.other, "value": f.value, "text": f.text}
                            for f in self.flags]}


def review_items(result: ModelResult, tests: ScoreTests | None,
                 settings: Settings = Settings()) -> list[ItemReview]:
    """The flagged items of one fitted model, in the model's item order.

    Parameters
    ----------
    result : ModelResult
        The fitted model (its standardized solution, first group).
    tests : ScoreTests or None
        Its modification indices (:func:`scalewright.hints_dwls.score_tests_for`:
        under ML or DWLS, as the model was fitted);
        ``None`` when they could not be computed, and then only estimated
        loadings and residual covariances are reviewed.
    settings : Settings
        The thresholds.
    """
    layout = result.estimate.layout
    flags: dict[str, list[Flag]] = {item: [] for item in layout.items}
    _weak(result, settings, flags)
    _estimated_cross(result, settings, flags)
    _estimated_pairs(result, settings, flags)
    if tests is not None:
        _suggested(result, tests, settings, flags)
    return [ItemReview(item, tuple(f)) for item, f in flags.items() if f]


def _weak(result: ModelResult, settings: Settings, flags: dict) -> None:
    layout, std = result.estimate.layout, result.std.loadings
    col = {f: j for j, f in enumerate(layout.factors)}
    general = [j for j, kind in enumerate(layout.kinds) if kind == GENERAL]
    for i, item in enumerate(layout.items):
        own = layout.primary[item]
        value = float(std[i, col[own]])
        if max([abs(value)] + [abs(std[i, j]) for j in general]) >= settings.salience:
            continue
        text = (f"standardized loading {value:.2f} on {own}, below the salience threshold "
                f"{settings.salience:.2f}")
        text += "".join(f" (and {std[i, j]:.2f} on the general factor {layout.factors[j]})"
                        for j in general)
        flags[item].append(Flag(WEAK, own, value, text))


def _estimated_cross(result: ModelResult, settings: Settings, flags: dict) -> None:
    layout, std = result.estimate.layout, result.std.loadings
    for prm in result.estimate.layout.params:
        if prm.kind != LOADING or layout.primary[prm.b] == prm.a \
                or layout.kinds[layout.factors.index(prm.a)] != CONSTRUCT:
            continue
        value = float(std[layout.items.index(prm.b), layout.factors.index(prm.a)])
        if abs(value) >= settings.salience:
            flags[prm.b].append(Flag(CROSS, prm.a, value,
                                     f"estimated standardized cross-loading {value:.2f} on "
                                     f"{prm.a}, at or beyond the salience threshold "
                                     f"{settings.salience:.2f}"))


def _estimated_pairs(result: ModelResult, settings: Settings, flags: dict) -> None:
    layout = result.estimate.layout
    mats = result.estimate.matrices()
    sd = np.sqrt(np.diag(mats.implied_cov))
    for prm in layout.params:
        if prm.kind != RESIDUAL_COV or prm.a == prm.b:
            continue
        i, k = layout.items.index(prm.a), layout.items.index(prm.b)
        share = float(mats.residuals[i, k] / (sd[i] * sd[k]))
        if abs(share) >= settings.residual_threshold:
            corr = _defined(" (residual correlation {:.2f})",
                            result.std.residual_correlations[i, k])
            for item, other in ((prm.a, prm.b), (prm.b, prm.a)):
                flags[item].append(Flag(
                    PAIR, other, share,
                    f"its estimated residual covariance with '{other}' {_moves(share)} their "
                    f"model-implied correlation by {abs(share):.2f}{corr}"))


def _suggested(result: ModelResult, tests: ScoreTests, settings: Settings, flags: dict) -> None:
    layout = result.estimate.layout
    for k in np.argsort(-tests.mi, kind="stable"):
        if tests.mi[k] < settings.hint_threshold:
            break
        item, col = layout.items[tests.row[k]], tests.col[k]
        if tests.kind[k] == LOADING:
            construct, std = layout.factors[col], float(tests.std_epc[k])
            if layout.kinds[col] == CONSTRUCT and abs(std) >= settings.salience:
                flags[item].append(Flag(
                    CROSS, construct, std,
                    f"a loading on {construct} is suggested (modification index "
                    f"{tests.mi[k]:.1f}, expected standardized loading {std:.2f})"))
            continue
        sigma = result.estimate.matrices(tests.group[k]).implied_cov
        share = float(tests.epc[k] / np.sqrt(sigma[tests.row[k], tests.row[k]] * sigma[col, col]))
        if abs(share) < settings.residual_threshold:
            continue
        for a, b in ((item, layout.items[col]), (layout.items[col], item)):
            flags[a].append(Flag(
                PAIR, b, share,
                f"freeing its residual covariance with '{b}' would {_moves(share, False)} their "
                f"model-implied correlation by about {abs(share):.2f} (modification index "
                f"{tests.mi[k]:.1f}"
                f"{_defined(', residual correlation about {:.2f}', tests.std_epc[k])})"))


def _defined(template: str, value: float) -> str:
    """`template` filled with `value`, or nothing where the value is undefined: a
    residual correlation has no value when a residual variance is negative."""
    return template.format(value) if np.isfinite(value) else ""


def _moves(share: float, present: bool = True) -> str:
    if share >= 0:
        return "raises" if present else "raise"
    return "lowers" if present else "lower"


# --------------------------------------------------------------------------- refinement

@dataclass(frozen=True)
class Step:
    """The model after one removal (``removed`` is None for the model as specified)."""

    removed: str | None
    reason: str
    fit: dict
    reliability: dict
    flagged: tuple[str, ...]
    tried: tuple[dict, ...]

    def to_dict(self) -> dict:
        return {"removed": self.removed, "reason": self.reason, "fit": self.fit,
                "reliability": self.reliability, "flagged": list(self.flagged),
                "tried": list(self.tried)}


@dataclass(frozen=True)
class Refinement:
    steps: tuple[Step, ...]
    stopped: str
    n_items: int
    note: str = NOTE

    @property
    def structure_note(self) -> str | None:
        """A caution when the path removes more than :data:`MANY_REMOVED` of the
        model's items: so many removals say that the structure misfits (items of
        distinct constructs forced onto one, say), which no shortening repairs."""
        removed = len(self.steps) - 1
        if removed <= MANY_REMOVED * self.n_items:
            return None
        return (f"The path removes {removed} of the model's {self.n_items} items "
                f"({removed / self.n_items:.0%}). When so many items have to go, the model's "
                "structure is the likely problem rather than single items (for instance, "
                "items of distinct constructs forced onto one): compare it with rival "
                "structures before shortening a scale.")

    def to_dict(self) -> dict:
        return {"steps": [s.to_dict() for s in self.steps], "stopped": self.stopped,
                "note": self.note, "structure_note": self.structure_note}


@dataclass(frozen=True)
class _State:
    """One step of the refinement path: the model, its fit and alphas, and
    (computed when first asked for) the review of its items, whose score
    tests are the costliest part."""

    spec: object
    result: ModelResult
    reliability: dict
    settings: Settings
    given_review: list | None = None

    @cached_property
    def review(self) -> list:
        if self.given_review is not None:
            return self.given_review
        try:
            tests = score_tests_for(self.result.estimate)
        except ValueError:
            tests = None
        return review_items(self.result, tests, self.settings)


def refinement_path(spec, x: np.ndarray, settings: Settings = Settings(), *,
                    result: ModelResult | None = None, review: list | None = None,
                    max_steps: int | None = None, fit: Callable = refit_columns,
                    trial_fit: Callable | None = None) -> Refinement:
    """Remove flagged items one at a time, refitting after each removal.

    Parameters
    ----------
    spec : ModelSpec or namespace with the same fields
        The model as specified; never modified.
    x : ndarray, n × p
        Answers, columns in ``spec.items`` order (after reverse keying); alpha
        uses their pairwise-complete covariance.
    settings : Settings
        Thresholds of the item review.
    result : ModelResult, optional
        The fit of ``spec`` on ``x`` if already at hand.
    review : list of ItemReview, optional
        ``review_items`` of ``result`` under ``settings`` if already at hand
        (it needs the score tests, the costliest part of a step).
    max_steps : int, optional
        Stop after this many removals (no limit by default).
    fit : callable
        ``fit(spec, x, columns, start_from) -> ModelResult`` (see
        :func:`scalewright.evaluate.refit_columns`), the estimator the model
        was fitted with (normal-theory ML on complete data by default);
        ``start_from`` is the estimate of the model one item larger (None
        for the model as specified), from which a fit may start.
    trial_fit : callable, optional
        ``fit`` without what the comparison of trial removals does not use
        (standard errors, robust corrections).  Either way only the trials'
        fit indices and alphas are kept (:class:`_Trial`), and the removal
        chosen is refitted by ``fit``, from which its step and the next
        review come.

    Returns
    -------
    Refinement
        Step 0 is the model as specified; each further step names the item
        removed, why, the fit and the alpha of every construct after it, and
        the removals that were tried.
    """
    column = {item: j for j, item in enumerate(spec.items)}
    # pairwise complete; pandas' pairwise route takes 3 s at 1,000,000 x 50, np.cov 1 s
    cov = pd.DataFrame(x).cov().to_numpy() if np.isnan(x).any() else np.cov(x, rowvar=False)
    if result is not None and review is not None:
        state = _State(spec, result, _alphas(spec, cov, column), settings, list(review))
    else:
        state = _state(spec, result or fit(spec, x, [column[i] for i in spec.items], None), cov,
                       column, settings)
    steps = [Step(None, "the model as specified", _fit(state.result), state.reliability,
                  tuple(r.item for r in state.review), ())]
    while True:
        if max_steps is not None and len(steps) > max_steps:
            stopped = f"Stopped after {max_steps} removal(s), the limit asked for."
            break
        if not state.review:
            stopped = "No item is flagged."
            break
        removed = len(steps) - 1
        if removed >= removal_limit(len(spec.items)):
            stopped = (f"Stopped after {removed} removals (more than a quarter of the "
                       f"model's {len(spec.items)} items, and at least five) with "
                       f"{len(state.review)} items still flagged: shortening does not repair "
                       "a structure that misfits.")
            break
        removable = [r for r in state.review if _room(state.spec, r.item)]
        if not removable:
            stopped = (f"Every flagged item belongs to a construct with only {MIN_ITEMS} items; "
                       "with fewer, a construct is identified only through its correlations "
                       "with the others and its reliability is fragile (three-indicator rule, "
                       "Bollen 1989).")
            break
        say(f"model '{spec.name}': refinement path, step {len(steps)}: refitting without "
            f"each of {len(removable)} flagged item{'s' if len(removable) > 1 else ''}")
        trials = [_trial(state, r, x, cov, column, trial_fit or fit)
                  for r in removable]
        fitted = [t for t in trials if t[1] is not None]
        if not fitted:
            stopped = ("No model without one of the flagged items could be estimated: "
                       + "; ".join(f"without '{r.item}': {why}" for r, _, why in trials) + ".")
            break
        chosen, why = _choose(state, fitted)
        if chosen is None:
            stopped = "No removal of a flagged item improves the fit or the reliability."
            break
        review, kept = chosen
        new_state = _state(kept.spec, fit(kept.spec, x, [column[i] for i in kept.spec.items],
                                          state.result.estimate), cov, column, settings)
        steps.append(Step(review.item, _reason(review, state, new_state, why),
                          _fit(new_state.result), new_state.reliability,
                          tuple(r.item for r in new_state.review),
                          tuple(_tried(t, state) for t in trials)))
        state = new_state
    return Refinement(tuple(steps), stopped, len(spec.items))


def _state(spec, result: ModelResult, cov: np.ndarray, column: dict, settings: Settings) -> _State:
    return _State(spec, result, _alphas(spec, cov, column), settings)


def _alphas(spec, cov: np.ndarray, column: dict) -> dict:
    """Cronbach's alpha of each construct's items (None for a one-item construct)."""
    out = {}
    for construct, items in spec.constructs.items():
        idx = [column[i] for i in items]
        out[construct] = float(cronbach_alpha(cov[np.ix_(idx, idx)])) if len(idx) > 1 else None
    return out


def _fit(result: ModelResult) -> dict:
    f = result.fit
    return {"cfi": float(f.cfi), "rmsea": float(f.rmsea), "srmr": float(f.srmr),
            "chi_square": float(f.chi_square), "df": int(f.df)}


def _room(spec, item: str) -> bool:
    return all(len(items) > MIN_ITEMS for items in spec.constructs.values() if item in items)


def without_item(spec, item: str):
    """A copy of ``spec`` without ``item`` in its constructs, cross-loadings and
    residual covariances (a ``ModelSpec`` through ``dataclasses.replace``)."""
    changes = {
        "constructs": {c: tuple(i for i in its if i != item) for c, its in spec.constructs.items()},
        "cross_loadings": {c: tuple(i for i in its if i != item)
                           for c, its in spec.cross_loadings.items()
                           if any(i != item for i in its)},
        "residual_covariances": tuple(pair for pair in spec.residual_covariances
                                      if item not in pair),
    }
    if dataclasses.is_dataclass(spec):
        return dataclasses.replace(spec, **changes)
    copy = SimpleNamespace(**vars(spec))
    vars(copy).update(changes, items=tuple(i for i in spec.items if i != item))
    return copy


@dataclass(frozen=True)
class _Trial:
    """A trial removal as the choice reads it: the reduced model, its fit
    indices and alphas.  Not the fitted model, which on the ordinal route
    holds the casewise influence of every polychoric correlation: kept for
    every trial of a step, a 48-item path held 2 GB.  The removal chosen is
    refitted in full."""

    spec: object
    fit: object               # FitIndices
    reliability: dict


def _trial(state: _State, review: ItemReview, x, cov, column, fit):
    """Refit without one item: (review, _Trial or None, why not)."""
    spec = without_item(state.spec, review.item)
    keep = [column[i] for i in spec.items]
    try:
        result = fit(spec, x, keep, state.result.estimate)
    except StudyError as exc:
        return review, None, str(exc)
    if not result.converged:
        return review, None, "the estimation did not converge"
    return review, _Trial(spec, result.fit, _alphas(spec, cov, column)), None


def _gains(state: _State, review: ItemReview, new: _Trial) -> tuple[float, float]:
    """Change in CFI and in the alpha of the item's construct."""
    construct = state.result.estimate.layout.primary[review.item]
    before, after = state.reliability.get(construct), new.reliability.get(construct)
    alpha_gain = after - before if before is not None and after is not None else 0.0
    return new.fit.cfi - state.result.fit.cfi, alpha_gain


def _choose(state: _State, trials: list):
    """The removal that improves fit and reliability most (see module docstring)."""
    scored = [(_gains(state, review, new), review, new) for review, new, _ in trials]
    both = [s for s in scored if s[0][0] > 0 and s[0][1] > 0]
    if both:
        (_, _), review, new = max(both, key=lambda s: s[0][0])
        return (review, new), "both"
    fit_only = [s for s in scored if s[0][0] > 0]
    if fit_only:
        _, review, new = max(fit_only, key=lambda s: s[0][0])
        return (review, new), "fit"
    reliability_only = [s for s in scored if s[0][1] > 0]
    if reliability_only:
        _, review, new = max(reliability_only, key=lambda s: s[0][1])
        return (review, new), "reliability"
    return None, None


def _reason(review: ItemReview, state: _State, new: _State, why: str) -> str:
    construct = state.result.estimate.layout.primary[review.item]
    flags = "; ".join(f.text for f in review.flags)
    before, after = state.reliability.get(construct), new.reliability.get(construct)
    alpha = (f", alpha of {construct} {before:.2f} → {after:.2f}"
             if before is not None and after is not None else "")
    choice = {"both": "of the flagged items, its removal improves fit and reliability most",
              "fit": "no removal improves both fit and reliability; this one improves fit most",
              "reliability": "no removal improves fit; this one improves reliability most"}[why]
    return (f"'{review.item}': {flags}. Without it CFI {state.result.fit.cfi:.3f} → "
            f"{new.result.fit.cfi:.3f}{alpha}; {choice}.")


def _tried(trial, state: _State) -> dict:
    review, new, failure = trial
    if new is None:
        return {"item": review.item, "failed": failure}
    fit_gain, alpha_gain = _gains(state, review, new)
    return {"item": review.item, "cfi": float(new.fit.cfi),
            "rmsea": float(new.fit.rmsea), "cfi_change": float(fit_gain),
            "alpha_change": float(alpha_gain)}


# --------------------------------------------------------------------------- all keys

def quality_keys(model_result: ModelResult, study, x: np.ndarray, *,
                 max_steps: int | None = None, fit: Callable = refit_columns,
                 trial_fit: Callable | None = None, saturated: tuple | None = None) -> dict:
    """The per-model JSON keys of local fit and item quality.

    Parameters
    ----------
    model_result : ModelResult
        One rival model, fitted by any route (the hints follow its estimator).
    study : Study
        The study (item wording, thresholds, the model's specification).
    x : ndarray, n × p
        The answers the model was fitted to, columns in the model's item order.
    max_steps : int, optional
        Limit of the refinement path.
    fit : callable
        ``fit(spec, x, columns, start_from) -> ModelResult`` (see
        :func:`refinement_path`) for the refits of the refinement path.
    trial_fit : callable, optional
        A cheaper ``fit`` for its trial removals (see :func:`refinement_path`).
    saturated : (PatternMoments, Saturated), optional
        The pattern moments and the saturated model (EM) when the data have
        missing-data blocks (see :func:`scalewright.residuals.residual_correlations`).

    Returns
    -------
    dict
        ``modification_hints``, ``modification_hint_notes``,
        ``residual_correlations``, ``item_review`` (empty when the model did not
        converge), ``refinement``.
    """
    settings = Settings.from_study(study)
    spec = study.model(model_result.name)
    estimate = model_result.estimate
    wording = {name: item.wording for name, item in study.items.items()}
    try:
        tests = score_tests_for(estimate)
    except ValueError:
        tests = None
    out = modification_hint_keys(estimate, wording, settings.hint_threshold, tests=tests,
                                 compute=score_tests_for)
    try:
        out["residual_correlations"] = residual_correlations(
            estimate, threshold=settings.residual_threshold, saturated=saturated,
            answers=x).to_dict()
    except ValueError as exc:
        out["residual_correlations"] = {"not_computed": str(exc)}
    if model_result.converged:
        review = review_items(model_result, tests, settings)
        out["item_review"] = [r.to_dict() for r in review]
        out["refinement"] = refinement_path(spec, x, settings, result=model_result,
                                            review=review, max_steps=max_steps,
                                            trial_fit=trial_fit,
                                            fit=fit).to_dict()
    else:
        # flags read off a point that is not the estimate (loadings beyond 1, a
        # "correlation" raised by 34565) would be advice without a basis
        out["item_review"] = []
        out["refinement"] = {"steps": [], "stopped": "The model as specified did not converge, "
                             "so no item was reviewed and no refinement path was computed.",
                             "note": NOTE, "structure_note": None}
    return out
