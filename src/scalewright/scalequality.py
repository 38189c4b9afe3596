"""Scale quality of one fitted model, as the per-model JSON keys
``reliability``, ``validity``, ``bifactor`` and ``higher_order``.

This module only assembles: the coefficients are computed by
:mod:`scalewright.reliability` (alpha, Feldt interval, item analysis),
:mod:`scalewright.omega` (omega, H), :mod:`scalewright.validity` (AVE,
composite reliability, Fornell–Larcker, HTMT) and :mod:`scalewright.bifactor`.
Two things are computed here because they need the fitted model rather than
its matrices: the delta-method interval of omega (:func:`omega_standard_errors`)
and omega if an item is dropped, which refits the model without the item.

Data-based coefficients (alpha, item–total correlations, HTMT) use the
sample covariance of the complete rows (of the construct's items for alpha,
of all the model's items for HTMT); model-based ones
(omega, H, AVE, composite reliability, bifactor and higher-order
coefficients) use the fitted matrices and are left out, with a note, when
the model did not converge.
"""

from __future__ import annotations

from typing import Callable, Sequence

import numpy as np
from scipy import special, stats

from scalewright.bifactor import bifactor_coefficients, higher_order_coefficients
from scalewright.coefficient_types import Note, plain
from scalewright.errors import StudyError
from scalewright.estimate.fiml import saturated_covariance
from scalewright.estimate.result import Estimate
from scalewright.evaluate import estimate_columns
from scalewright.itemreview import without_item
from scalewright.layout import CONSTRUCT, GENERAL, HIGHER, cell_derivatives
from scalewright.modelresult import ModelResult
from scalewright.omega import coefficient_h, omega_total
from scalewright.progress import say
from scalewright.reliability import alpha_report, item_analysis
from scalewright.validity import construct_quality, fornell_larcker, htmt


#: level of the alpha and omega intervals (the keys ``alpha_ci95``, ``omega_ci95``)
LEVEL = 0.95

#: item SDs of one construct further apart than this factor get a note on what the
#: raw sum weights (common practice, no source)
SPREAD_RATIO = 2.0


def scale_quality_keys(model_result: ModelResult, study, x: np.ndarray, *,
                       estimates: Callable = estimate_columns) -> dict:
    """The per-model JSON keys of reliability and distinctness.

    Parameters
    ----------
    model_result : ModelResult
        One single-group rival model, fitted to ``x``.
    study : Study
        The study; ``study.model(model_result.name)`` is the model's
        specification, used for the item assignment and for the refits.
    x : ndarray, n × p
        The answers the model was fitted to, after reverse keying, columns in
        ``model_result.estimate.layout.items`` order; missing answers are NaN
        (allowed when ``estimates`` handles them, e.g. full-information ML).
    estimates : callable
        ``estimates(spec, x, columns) -> Estimate`` (see
        :func:`scalewright.evaluate.estimate_columns`): the point estimates
        of the refits behind ``omega_if_dropped``, given the columns of ``x``
        without the dropped item; pass a function of the method that fitted
        ``model_result`` so that omega and omega if dropped come from the
        same method.  Only the solution is used, so the refit need not
        compute standard errors or fit indices.

    Returns
    -------
    dict
        ``reliability``: one entry per construct (first-order constructs and
        the specific factors of a bifactor model, items as listed under the
        construct in the model file) with ``construct``, ``n_items``,
        ``alpha``, ``alpha_ci95`` [lower, upper] (Feldt), ``standardized_alpha``,
        ``omega`` (omega total, :func:`scalewright.omega.omega_total`),
        ``omega_ci95`` (:func:`omega_interval`; ``None`` when the information
        matrix is singular), ``omega_construct`` (the part due to this
        construct alone), ``coefficient_h``, ``items`` (per item ``item``,
        ``item_total_r``, ``alpha_if_dropped``, ``omega_if_dropped``) and
        ``notes`` (reverse keying, items loading in the opposite direction,
        two items, items not dropped, …).

        ``validity``: ``ave`` and ``composite_reliability`` ({construct:
        value}), ``fornell_larcker`` (per pair ``a``, ``b``, ``correlation``,
        ``sqrt_ave_a``, ``sqrt_ave_b``, ``convention``), ``htmt`` (per pair
        ``a``, ``b``, ``value``, ``conventions``), ``conventions``
        ({construct: [AVE and composite-reliability conventions]}) and
        ``notes``.  Every flag is a convention with its source, never a verdict.

        ``bifactor`` (models with a general factor): the
        :class:`~scalewright.bifactor.BifactorResult` as a dict.

        ``higher_order`` (models with a higher-order factor): the
        :class:`~scalewright.bifactor.HigherOrderResult` as a dict
        (``higher``, ``constructs``, ``coefficients``, …); a list of them
        when the model has several higher-order factors.
    """
    spec = study.model(model_result.name)
    x = np.asarray(x, dtype=float)
    est = model_result.estimate
    layout = est.layout
    if x.ndim != 2 or x.shape[1] != layout.p:
        raise ValueError(f"x has shape {x.shape}; model '{layout.name}' has {layout.p} items")
    constructs = [j for j, kind in enumerate(layout.kinds) if kind == CONSTRUCT]
    out = {"reliability": _reliability(model_result, spec, x, constructs, estimates),
           "validity": _validity(model_result, x, constructs)}
    if not model_result.converged:
        return out
    mats = est.matrices()
    lam, phi, theta = mats.loadings, mats.latent_cov, mats.residuals
    general = [j for j, kind in enumerate(layout.kinds) if kind == GENERAL]
    if general:
        out["bifactor"] = bifactor_coefficients(
            lam, phi, theta, general[0], constructs, factor_names=layout.factors,
            item_names=layout.items).to_dict()
    higher = [higher_order_coefficients(
        lam, phi, theta, j, [layout.factors.index(c) for c in spec.higher_order[layout.factors[j]]],
        factor_names=layout.factors, item_names=layout.items).to_dict()
        for j, kind in enumerate(layout.kinds) if kind == HIGHER]
    if higher:
        out["higher_order"] = higher[0] if len(higher) == 1 else higher
    return out


# --------------------------------------------------------------------------- reliability

def _reliability(model_result: ModelResult, spec, x: np.ndarray, constructs: Sequence[int],
                 estimates: Callable) -> list[dict]:
    est = model_result.estimate
    layout = est.layout
    row = {item: i for i, item in enumerate(layout.items)}
    names = [layout.factors[j] for j in constructs]
    members = [list(spec.constructs[name]) for name in names]
    weights = np.zeros((layout.p, len(constructs)))
    for k, items in enumerate(members):
        weights[[row[i] for i in items], k] = 1.0
    converged = model_result.converged
    if converged:
        mats = est.matrices()
        omega, se = omega_standard_errors(est, weights)
    out = []
    for k, (j, name, items) in enumerate(zip(constructs, names, members)):
        rows = [row[i] for i in items]
        block, used, from_em = _item_covariance(x[:, rows], items)
        alpha = alpha_report(block, items, name, n_obs=used, level=LEVEL)
        analysis = item_analysis(block, items, name)
        notes = list(alpha.notes) + _complete_rows_notes(name, used, len(x), from_em)
        notes += _spread_notes(np.sqrt(np.diag(block)), items, name)
        entry = {"construct": name, "n_items": len(items), "alpha": alpha.alpha,
                 "alpha_ci95": [alpha.interval.lower, alpha.interval.upper],
                 "standardized_alpha": alpha.standardized_alpha}
        if converged:
            result = omega_total(mats.loadings, mats.latent_cov, mats.residuals, rows, j,
                                 item_names=items, construct=name)
            interval = omega_interval(omega[k], se[k], LEVEL)
            loadings = model_result.std.loadings[rows, j]
            notes += _direction_notes(loadings, items, name, notes)
            notes += _improper_notes(np.diag(mats.residuals)[rows], items, name)
            notes += result.notes
            if not np.isfinite(se[k]):
                notes.append(_no_interval_note(name))
            dropped, drop_notes = _omega_if_dropped(spec, name, items, x, layout.items, estimates)
            notes += drop_notes
            entry.update(omega=result.omega_total, omega_ci95=interval,
                         omega_construct=result.omega_construct,
                         coefficient_h=coefficient_h(loadings))
        else:
            dropped = [None] * len(items)
            notes.append(_not_converged_note(name, layout.name))
            entry.update(omega=None, omega_ci95=None, omega_construct=None, coefficient_h=None)
        entry["items"] = [{"item": r.item, "item_total_r": r.corrected_item_total,
                           "alpha_if_dropped": r.alpha_if_dropped, "omega_if_dropped": d}
                          for r, d in zip(analysis.rows, dropped)]
        entry["notes"] = [n.to_dict() for n in notes]
        out.append(plain(entry))
    return out


def omega_standard_errors(estimate: Estimate, weights: np.ndarray) -> tuple[np.ndarray,
                                                                           np.ndarray]:
    """Omega total of weighted sum scores and its delta-method standard error.

    For a sum score with weights ``w`` (0/1 for a construct's items),
    ``C(θ) = wᵀΛΦ*Λᵀw`` is its common and ``E(θ) = wᵀΘw`` its error
    variance, and ``ω = C / (C + E)``.  Every free cell of the model
    changes Σ by ``∂Σ/∂cell = a bᵀ + b aᵀ``
    (:func:`scalewright.layout.cell_derivatives`), so

    .. math::
        \\frac{\\partial\\, w^\\top\\Sigma w}{\\partial\\,\\mathrm{cell}} = 2\\,(w^\\top a)(w^\\top b),
        \\qquad
        \\frac{\\partial\\omega}{\\partial\\theta} =
        \\frac{E\\,\\partial C/\\partial\\theta - C\\,\\partial E/\\partial\\theta}{(C+E)^2}

    where Θ cells count towards ``E`` and all others (Λ, B, Ψ) towards
    ``C``; cells that share a parameter add up.  The standard error is
    ``√(J acov Jᵀ)`` (delta method) with the estimate's ``acov``.  The
    gradient is exact, so no numerical differentiation is involved.

    Parameters
    ----------
    estimate : Estimate
        A single-group estimate.
    weights : ndarray, shape (p,) or (p, K)
        One weight vector per sum score.

    Returns
    -------
    omega, se : ndarray, shape (K,)
        ``se`` is NaN when ``acov`` is ``None`` (singular information).

    References
    ----------
    Raykov, T. (2002). Analytic estimation of standard error and confidence
    interval for scale reliability. *Multivariate Behavioral Research*, 37,
    89–103.
    Kelley, K., & Pornprasertmanit, S. (2016). Confidence intervals for
    population reliability coefficients: Evaluation of methods,
    recommendations, and software for composite measures. *Psychological
    Methods*, 21, 69–92.
    """
    w = np.asarray(weights, dtype=float).reshape(estimate.layout.p, -1)
    pattern = estimate.layout.patterns[0]
    mats = estimate.matrices()
    a, b, _ = cell_derivatives(pattern, mats)
    d_sum = 2.0 * (w.T @ a) * (w.T @ b)                            # K × cells
    first_error = len(pattern.loadings) + len(pattern.paths) + len(pattern.disturbances)
    is_error = np.zeros(a.shape[1], dtype=bool)
    is_error[first_error:first_error + len(pattern.residuals)] = True
    incidence = np.zeros((a.shape[1], estimate.theta.size))
    incidence[np.arange(a.shape[1]), pattern.cell_params] = 1.0
    d_error = np.where(is_error, d_sum, 0.0) @ incidence
    d_common = np.where(is_error, 0.0, d_sum) @ incidence
    common = np.einsum("ik,ij,jk->k", w, mats.loadings @ mats.latent_cov @ mats.loadings.T, w)
    error = np.einsum("ik,ij,jk->k", w, mats.residuals, w)
    total = common + error
    omega = common / total
    if estimate.acov is None:
        return omega, np.full(omega.shape, np.nan)
    jac = (error[:, None] * d_common - common[:, None] * d_error) / total[:, None] ** 2
    variance = np.einsum("kq,qr,kr->k", jac, estimate.acov, jac)
    return omega, np.sqrt(np.clip(variance, 0.0, None))


def omega_interval(omega: float, se: float, level: float = 0.95) -> list[float] | None:
    """Delta-method confidence interval for omega on the logit scale.

    .. math::
        \\operatorname{logit}^{-1}\\Bigl(\\operatorname{logit}\\hat\\omega \\pm
        z_{1-c/2}\\,\\frac{SE(\\hat\\omega)}{\\hat\\omega(1-\\hat\\omega)}\\Bigr)

    with ``c = 1 − level``.  The interval is built for ``logit ω`` (standard
    error by the delta method) and transformed back, so that it stays inside
    (0, 1) and is asymmetric near 1 as the sampling distribution of omega is.

    Parameters
    ----------
    omega, se : float
        Omega and its standard error (:func:`omega_standard_errors`).
    level : float
        Confidence level in (0, 1).

    Returns
    -------
    list of float or None
        ``[lower, upper]``; ``None`` when the standard error is not
        available or omega is not inside (0, 1).

    References
    ----------
    Raykov, T. (2002). *Multivariate Behavioral Research*, 37, 89–103.
    Kelley, K., & Pornprasertmanit, S. (2016). *Psychological Methods*, 21,
    69–92 (the logistic-transformed Wald interval among the methods
    compared).
    """
    if not np.isfinite(se) or not 0.0 < omega < 1.0:
        return None
    z = stats.norm.ppf(0.5 + level / 2.0)
    half = z * se / (omega * (1.0 - omega))
    lower, upper = special.expit(special.logit(omega) + np.array([-half, half]))
    return [float(lower), float(upper)]


def _omega_if_dropped(spec, construct: str, items: Sequence[str], x: np.ndarray,
                      columns: Sequence[str], estimates: Callable) -> tuple[list, list[Note]]:
    """Omega total of the construct after refitting the model without each item."""
    if len(items) < 3:
        return [None] * len(items), [Note(
            code="not_dropped", subject=construct, items=tuple(items), message=(
                f"Construct '{construct}' has two items, so no 'omega if dropped' is given: "
                "without either item the construct would have a single item, whose "
                "reliability a factor model cannot separate from its error."))]
    column = {item: j for j, item in enumerate(columns)}
    values, failed = [], []
    say(f"model '{spec.name}': omega of '{construct}' without each of its {len(items)} items")
    for item in items:
        reduced = without_item(spec, item)
        try:
            refit = estimates(reduced, x, [column[i] for i in reduced.items])
        except StudyError as exc:
            values.append(None)
            failed.append((item, f"was refused: {exc}"))
            continue
        mats = refit.matrices()
        negative = np.diag(mats.residuals) < 0
        if not refit.record.converged:
            values.append(None)
            failed.append((item, "did not converge."))
            continue
        if negative.any():
            values.append(None)
            listing = ", ".join(f"'{i}' ({v:.3g})" for i, v in zip(
                np.asarray(refit.layout.items)[negative],
                np.diag(mats.residuals)[negative]))
            failed.append((item, "gives an improper solution with a negative residual variance "
                                 f"({listing}), where omega would count negative error variance "
                                 "as true variance."))
            continue
        kept = list(reduced.constructs[construct])
        rows = [refit.layout.items.index(i) for i in kept]
        values.append(omega_total(mats.loadings, mats.latent_cov, mats.residuals, rows,
                                  refit.layout.factors.index(construct),
                                  item_names=kept, construct=construct).omega_total)
    notes = [Note(code="not_dropped", subject=construct, items=(item,), message=(
        f"Omega if '{item}' is dropped from construct '{construct}' is not given: refitting "
        f"model '{spec.name}' without it {why}"))
        for item, why in failed]
    return values, notes


def _direction_notes(loadings: np.ndarray, items: Sequence[str], construct: str,
                     earlier: Sequence[Note]) -> list[Note]:
    """A note naming the items whose loading runs against the construct's
    other items, unless a reverse-keying note already names them all."""
    majority = 1.0 if loadings.sum() >= 0 else -1.0
    odd = [item for item, value in zip(items, loadings) if value * majority < 0]
    named = {i for note in earlier if note.code == "reverse_keying" for i in note.items}
    if not odd or set(odd) <= named:
        return []
    listing = ", ".join(f"'{item}'" for item in odd)
    return [Note(code="loading_direction", subject=construct, items=tuple(odd), message=(
        f"In construct '{construct}' the item{'s' if len(odd) > 1 else ''} {listing} "
        f"load{'' if len(odd) > 1 else 's'} in the direction opposite to the other items, so "
        "the unweighted sum that alpha and omega describe mixes directions and understates "
        "how well the construct is measured. If worded the other way round, declare "
        f"{'them' if len(odd) > 1 else 'it'} reverse-keyed in the model file and run again; "
        "otherwise check the coding, or whether the construct joins two opposite ones."))]


def _item_covariance(x: np.ndarray, items: Sequence[str]) -> tuple[np.ndarray, int, bool]:
    """The items' covariance for alpha, item analysis and HTMT: that of the rows
    answering every item, or, when there are no more such rows than items (a
    planned-missing design), the saturated model's ML covariance from every
    answer (EM; Dempster, Laird & Rubin 1977).  Returns the matrix, the number of rows
    behind it (complete rows, or rows with any answer) and whether EM gave it."""
    complete = x[~np.isnan(x).any(axis=1)]
    if len(complete) > x.shape[1]:
        return np.cov(complete, rowvar=False), len(complete), False
    answered = x[~np.isnan(x).all(axis=1)]
    return saturated_covariance(answered, tuple(items), "the data file"), len(answered), True


def _spread_notes(sd: np.ndarray, items: Sequence[str], construct: str) -> list[Note]:
    """A note when the construct's items differ much in spread: alpha and omega
    describe the unweighted sum of the raw answers, in which an item counts by
    its SD (the sum's variance is Σ_ij σ_ij), so the widest items dominate."""
    if len(sd) < 2 or not np.all(sd > 0) or sd.max() <= SPREAD_RATIO * sd.min():
        return []
    wide, narrow = items[int(np.argmax(sd))], items[int(np.argmin(sd))]
    return [Note(code="item_spread", subject=construct, message=(
        f"The items of '{construct}' differ in spread (SD {sd.min():.3g} for '{narrow}' to "
        f"{sd.max():.3g} for '{wide}'): alpha and omega describe the plain sum of the raw "
        "answers, in which the widest items count most. If the scale is scored as a sum of "
        "standardized answers, standardized alpha describes that score; if the items were "
        "meant to share one response format, check their coding."))]


def _complete_rows_notes(construct: str, used: int, rows: int, from_em: bool) -> list[Note]:
    if from_em:
        return [Note(code="complete_rows", subject=construct, message=(
            f"Too few rows answer all items of construct '{construct}' for a covariance matrix "
            f"of complete answers, so alpha and the item analysis use the items' covariance "
            f"estimated by EM from every answer, and the interval counts the {used} of {rows} "
            "rows with any answer to them (approximate)."))]
    if used == rows:
        return []
    return [Note(code="complete_rows", subject=construct, message=(
        f"Alpha, its interval and the item analysis of construct '{construct}' use the {used} "
        f"of {rows} rows that answer all its items; the model-based coefficients use every "
        "answer the model was fitted to."))]


def _improper_notes(residual_variances: np.ndarray, items: Sequence[str],
                    construct: str) -> list[Note]:
    """A note when items of the construct have a negative residual variance."""
    negative = residual_variances < 0
    if not negative.any():
        return []
    named = tuple(np.asarray(items)[negative].tolist())
    listing = ", ".join(f"'{i}' ({v:.3g})" for i, v in zip(named, residual_variances[negative]))
    return [Note(code="improper_solution", subject=construct, items=named, message=(
        f"In construct '{construct}' the residual variance of {listing} is negative (a Heywood "
        "case), so omega and H count negative error variance as true variance and overstate "
        "the reliability; see the model's warnings before reporting them."))]


def _no_interval_note(construct: str) -> Note:
    return Note(code="no_interval", subject=construct, message=(
        f"No confidence interval is given for the omega of construct '{construct}': the "
        "model's information matrix is singular, so its parameters have no standard errors "
        "(see the model's warnings on identification)."))


def _not_converged_note(construct: str, model: str) -> Note:
    return Note(code="not_converged", subject=construct, message=(
        f"Model '{model}' did not converge, so the model-based coefficients of construct "
        f"'{construct}' (omega, H, omega if dropped) are not given; alpha and the item "
        "analysis come from the data alone."))


# --------------------------------------------------------------------------- validity

def _validity(model_result: ModelResult, x: np.ndarray, constructs: Sequence[int]) -> dict:
    layout = model_result.estimate.layout
    factors = list(layout.factors)
    primary = np.array([factors.index(layout.primary[i]) if i in layout.primary else -1
                        for i in layout.items])
    cov, used, from_em = _item_covariance(x, layout.items)
    sd = np.sqrt(np.diag(cov))
    ratio = htmt(cov / np.outer(sd, sd), primary, constructs, factors)
    out = {"htmt": [{"a": r.construct_a, "b": r.construct_b, "value": r.htmt,
                     "conventions": [c.to_dict() for c in r.conventions]} for r in ratio.rows],
           "notes": [n.to_dict() for n in ratio.notes]}
    if used < len(x) and ratio.rows:
        out["notes"].append(Note(code="complete_rows", subject=layout.name, message=(
            f"HTMT uses the item correlations estimated by EM from every answer, as too few "
            f"rows answer every item of model '{layout.name}'." if from_em else
            f"HTMT uses the {used} of {len(x)} rows that answer every item of model "
            f"'{layout.name}'.")).to_dict())
    if not model_result.converged:
        out["notes"].append(Note(code="not_converged", subject=layout.name, message=(
            f"Model '{layout.name}' did not converge, so AVE, composite reliability and the "
            "Fornell–Larcker comparison are not given; HTMT comes from the data alone.")
            ).to_dict())
        return plain(out)
    std = model_result.std
    quality = construct_quality(std, primary, constructs, factors, layout.items)
    out["ave"] = {q.construct: q.ave for q in quality}
    out["composite_reliability"] = {q.construct: q.composite_reliability for q in quality}
    out["conventions"] = {q.construct: [c.to_dict() for c in q.conventions] for q in quality}
    if GENERAL in layout.kinds:
        out["fornell_larcker"] = []
        out["notes"].append(Note(code="uncorrelated_by_design", subject=layout.name, message=(
            f"In the bifactor model '{layout.name}' the specific factors are uncorrelated by "
            "design, so the Fornell–Larcker comparison of their correlations says nothing "
            "about their distinctness; see HTMT, which uses the item correlations.")).to_dict())
    else:
        names = [q.construct for q in quality]
        corr = std.latent_correlations[np.ix_(constructs, constructs)]
        out["fornell_larcker"] = [
            {"a": r.construct_a, "b": r.construct_b, "correlation": r.correlation,
             "sqrt_ave_a": r.sqrt_ave_a, "sqrt_ave_b": r.sqrt_ave_b,
             "convention": r.convention.to_dict()}
            for r in fornell_larcker([q.ave for q in quality], corr, names)]
    return plain(out)
