"""Rival models side by side: fit, information criteria, BIC weights and
chi-square difference tests between nested models.

Input is what the check already has: the model specifications
(:class:`~scalewright.studyfile.ModelSpec`, or any object with the same
fields) and each model's result dict (``ModelResult.to_dict()``).  Output is
plain JSON-able data under the key ``comparison``.

Which pairs are nested
----------------------
A model R is *nested* in a model G when every covariance structure R can
produce, G can produce too, so that R is G with some parameters fixed or
constrained.  Pairs come from two places:

* **declared** in the model file (``nested_in: [G]`` under model R), and
* **detected** by comparing the two specifications, for the common cases:

  1. *dropped paths*: same constructs (the same item sets), same
     higher-order and general factors, and R's cross-loadings and residual
     covariances are a proper subset of G's.  R is G with those parameters
     fixed at zero.
  2. *merged constructs*: neither model has a higher-order or general
     factor, and every construct of R is the union of whole constructs of G
     (at least one R construct joins two or more).  R is G with the
     correlations of the joined constructs fixed at one.  Cross-loadings of
     G that fall inside a joined construct are absorbed; the remaining ones
     and the residual covariances of R must be among G's.
  3. *higher-order*: R adds higher-order factors over the first-order
     constructs of G, which has freely correlated constructs and the same
     items, cross-loadings (or more) and residual covariances (or more).
     The higher-order factors only constrain the construct correlations.
  4. *higher-order in bifactor*: R has one higher-order factor over all its
     constructs, G is the bifactor model with the same constructs as
     specific factors; R is G with each item's general loading proportional
     to its specific loading (Yung, Thissen & McLeod 1999).

What the detection proves, and what not
----------------------------------------
It proves, from the specifications alone, that R's set of implied covariance
matrices is contained in G's, whichever scaling (unit variance or marker) was
chosen.  It checks, from the fits, that both models were fitted to the same
rows (same N) and that R has at least as many degrees of freedom as G.  It
does **not** prove that the difference statistic follows its chi-square
reference distribution: when constructs are merged the constraint (a
correlation of one) lies on the edge of the parameter space and the
reference distribution is a mixture of chi-squares with fewer degrees of
freedom, so the reported p-value is conservative (Self & Liang 1987); when
the difference in df is zero the two models are equivalent (same fit) and
nothing can be tested.  It does not detect every nesting (equality
constraints, re-parametrisations, a one-factor model inside a bifactor model,
where fixing all loadings of a specific factor at zero leaves its variance
unidentified); a general numerical check exists (Bentler & Satorra 2010) and
is not made here.  A declared pair that the detection does not confirm is
tested as declared, and the test says so.

Which difference test
---------------------
Plain ML: the likelihood-ratio difference (Steiger, Shapiro & Browne 1985);
robust ML (fits with a scaling factor): the Satorra & Bentler (2001) scaled
difference; DWLS (ordinal or mixed items): Satorra's (2000) adjusted
difference test applied to DWLS, which Asparouhov & Muthén (2006) describe
for robust WLS estimators, scaled and shifted on the difference in df
(Asparouhov & Muthén 2010; :mod:`scalewright.dwls_difference`, shared with
the ordinal invariance steps); it needs the two fits themselves, not only
their statistics.  Each test row names the test it used.

References
----------
Asparouhov, T. & Muthén, B. (2006). Robust chi square difference testing
with mean and variance adjusted test statistics. Technical note 10.
Asparouhov, T. & Muthén, B. (2010). Simple second order chi-square
correction. Technical appendix.
Bentler, P. M. & Satorra, A. (2010). Testing model nesting and equivalence.
Psychological Methods 15, 111–123.
Raftery, A. E. (1995). Bayesian model selection in social research.
Sociological Methodology 25, 111–163.
Satorra, A. (2000). Scaled and adjusted restricted tests in multi-sample
analysis of moment structures. In Heijmans, Pollock & Satorra (eds.),
Innovations in Multivariate Statistical Analysis, 233–247. Kluwer.
Satorra, A. & Bentler, P. M. (2001). A scaled difference chi-square test
statistic for moment structure analysis. Psychometrika 66, 507–514.
Self, S. G. & Liang, K.-Y. (1987). Asymptotic properties of maximum
likelihood estimators and likelihood ratio tests under nonstandard
conditions. Journal of the American Statistical Association 82, 605–610.
Steiger, J. H., Shapiro, A. & Browne, M. W. (1985). On the multivariate
asymptotic distribution of sequential chi-square statistics.
Psychometrika 50, 253–264.
Wagenmakers, E.-J. & Farrell, S. (2004). AIC model selection using Akaike
weights. Psychonomic Bulletin & Review 11, 192–196.
Yung, Y.-F., Thissen, D. & McLeod, L. D. (1999). On the relationship between
the higher-order factor model and the hierarchical factor model.
Psychometrika 64, 113–128.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping, Sequence

import numpy as np
from scipy import stats

from scalewright.dwls_difference import DWLS_DIFFERENCE, nested_dwls_test
from scalewright.estimate.dwls import DwlsModel

DECLARED = "declared"
DROPPED_PATHS = "dropped paths"
MERGED_CONSTRUCTS = "merged constructs"
HIGHER_ORDER = "higher-order"
HIGHER_IN_BIFACTOR = "higher-order in bifactor"

#: fit keys copied into a comparison row when the model's fit has them
ROW_FIT_KEYS = ("chi_square", "df", "p_value", "cfi", "tli", "rmsea", "rmsea_ci90", "srmr",
                "aic", "bic", "chi_square_scaled", "scaling_factor", "cfi_robust",
                "tli_robust", "rmsea_robust", "rmsea_robust_ci90")

#: a negative chi-square difference smaller than this (relative) is rounding
_NEGATIVE_TOLERANCE = 1e-6
_STOPPED_EARLY = ("the restricted model fits better than the general one, which is "
                  "impossible at the optimum: one of the two fits probably stopped early")

#: the test each nested-test row names (key ``test``)
LIKELIHOOD_RATIO = "likelihood-ratio difference (Steiger, Shapiro & Browne 1985)"
SCALED_DIFFERENCE = "scaled difference (Satorra & Bentler 2001)"


@dataclass(frozen=True)
class Nesting:
    """One pair (restricted, general) found nested, and how we know."""

    restricted: str
    general: str
    kind: str            # DECLARED or one of the detected kinds
    how_detected: str    # one sentence for the reader
    boundary: bool       # the constraint lies on the edge of the parameter space


@dataclass(frozen=True)
class _Structure:
    """A specification reduced to what nesting depends on, names removed:
    constructs are identified by their item sets."""

    items: frozenset
    blocks: dict          # frozenset of items -> construct name
    own: dict             # item -> frozenset (its construct's items)
    cross: frozenset      # of (block, item)
    residual: frozenset   # of frozenset({a, b})
    higher: frozenset     # of frozenset of blocks, one per higher-order factor
    general: bool


def _structure(spec) -> _Structure:
    blocks = {frozenset(items): name for name, items in spec.constructs.items()}
    block_of = {name: frozenset(items) for name, items in spec.constructs.items()}
    own = {item: block for block in blocks for item in block}
    cross = frozenset((block_of[c], item) for c, items in spec.cross_loadings.items()
                      for item in items)
    residual = frozenset(frozenset(pair) for pair in spec.residual_covariances)
    higher = frozenset(frozenset(block_of[c] for c in cs) for cs in spec.higher_order.values())
    return _Structure(frozenset(own), blocks, own, cross, residual, higher,
                      bool(spec.general))


def _key(s: _Structure) -> tuple:
    """The structure without construct names: equal keys, same model."""
    return (frozenset(s.blocks), s.cross, s.residual, s.higher, s.general)


def _names(blocks: dict, keys) -> str:
    return ", ".join(f"'{blocks[k]}'" for k in keys)


def _path_words(r: _Structure, g: _Structure, names: dict) -> list[str]:
    """What G frees that R fixes at zero: cross-loadings and residual covariances."""
    words = [f"the cross-loading of '{item}' on '{names[block]}'"
             for block, item in sorted(g.cross - r.cross, key=lambda x: (names[x[0]], x[1]))]
    words += [f"the residual covariance of '{a}' and '{b}'"
              for a, b in sorted(tuple(sorted(pair)) for pair in g.residual - r.residual)]
    return words


def detect_nesting(restricted, general) -> Nesting | None:
    """Is model ``restricted`` nested in model ``general``, by one of the
    four common cases in the module docstring?  ``None`` when no case applies.

    Parameters
    ----------
    restricted, general : ModelSpec
        Objects with ``name``, ``constructs``, ``cross_loadings``,
        ``residual_covariances``, ``higher_order`` and ``general``.
    """
    r, g = _structure(restricted), _structure(general)
    if r.items != g.items or _key(r) == _key(g):
        return None
    extra_paths = r.cross <= g.cross and r.residual <= g.residual
    same_blocks = set(r.blocks) == set(g.blocks)
    dropped = _path_words(r, g, g.blocks)
    tail = f", and fixes at zero {_and(dropped)}" if dropped else ""
    pair = (restricted.name, general.name)

    if same_blocks and r.higher == g.higher and r.general == g.general and extra_paths:
        return Nesting(*pair, DROPPED_PATHS,
                       f"same constructs; '{restricted.name}' fixes at zero {_and(dropped)} "
                       f"that '{general.name}' estimates", False)
    if r.higher or g.higher or r.general or g.general:
        if (same_blocks and r.higher and not g.higher and not r.general and not g.general
                and extra_paths):
            under = sorted(restricted.higher_order)
            return Nesting(*pair, HIGHER_ORDER,
                           f"same constructs; '{restricted.name}' explains the correlations of "
                           f"its constructs by the higher-order factor{'s' * (len(under) > 1)} "
                           f"{', '.join(repr(h) for h in under)} where '{general.name}' leaves "
                           f"them free{tail}", False)
        if (same_blocks and len(r.higher) == 1 and next(iter(r.higher)) == set(r.blocks)
                and not r.general and g.general and not g.higher and extra_paths):
            return Nesting(*pair, HIGHER_IN_BIFACTOR,
                           f"the higher-order model '{restricted.name}' is the bifactor model "
                           f"'{general.name}' with each item's general loading proportional to "
                           f"its specific loading (Yung, Thissen & McLeod 1999){tail}", False)
        return None
    merged = _merged(r, g)
    if merged is None:
        return None
    joined, absorbed = merged
    mapped = frozenset((r.own[item], item) for _, item in g.cross) - absorbed
    if not (r.cross <= mapped and r.residual <= g.residual):
        return None
    groups = "; ".join(f"'{r.blocks[target]}' joins {_names(g.blocks, sources)}"
                       for target, sources in joined)
    rest = [f"the cross-loading of '{item}' on '{r.blocks[block]}'"
            for block, item in sorted(mapped - r.cross, key=lambda x: (r.blocks[x[0]], x[1]))]
    rest += [f"the residual covariance of '{a}' and '{b}'"
             for a, b in sorted(tuple(sorted(p)) for p in g.residual - r.residual)]
    more = f", and fixes at zero {_and(rest)}" if rest else ""
    return Nesting(*pair, MERGED_CONSTRUCTS,
                   f"constructs merged: {groups} (their correlations fixed at 1){more}", True)


def _merged(r: _Structure, g: _Structure):
    """If every R construct is a union of whole G constructs, with at least
    one union of two or more: the unions and G's absorbed cross-loadings."""
    joined = []
    for target in sorted(r.blocks, key=r.blocks.get):
        sources = sorted((b for b in g.blocks if b <= target), key=g.blocks.get)
        if frozenset().union(*sources) != target:
            return None
        if len(sources) > 1:
            joined.append((target, sources))
    if not joined:
        return None
    absorbed = frozenset((r.own[item], item) for block, item in g.cross
                         if r.own[item] >= block)
    return joined, absorbed


def _and(words: list[str]) -> str:
    return words[0] if len(words) == 1 else ", ".join(words[:-1]) + " and " + words[-1]


def nested_pairs(specs: Sequence) -> list[Nesting]:
    """Every nested pair among ``specs``: declared (``nested_in``) and detected.

    A declared pair that the detection confirms keeps the detected kind and
    says it was declared too; a declared pair the detection cannot confirm is
    kept as declared, with that said.
    """
    out = []
    for restricted in specs:
        declared = tuple(getattr(restricted, "nested_in", ()) or ())
        for general in specs:
            if general is restricted:
                continue
            found = detect_nesting(restricted, general)
            if general.name in declared:
                where = getattr(restricted, "place", None)
                at = f" ({where})" if where else ""
                if found is None:
                    out.append(Nesting(restricted.name, general.name, DECLARED,
                                       f"declared in the model file{at}; scalewright could not "
                                       "confirm the nesting from the two specifications, so the "
                                       "test holds only if the declaration is right", False))
                else:
                    out.append(Nesting(found.restricted, found.general, found.kind,
                                       f"declared in the model file{at} and confirmed: "
                                       f"{found.how_detected}", found.boundary))
            elif found is not None:
                out.append(found)
    return out


def chi_square_difference(restricted_fit: dict, general_fit: dict) -> dict:
    """Likelihood-ratio (chi-square) difference test of a nested pair fitted by ML.

    Plain ML: ``T_d = T_R − T_G`` on ``df_R − df_G`` degrees of freedom
    (Steiger, Shapiro & Browne 1985).  When both fits carry a mean-scaled
    statistic (``chi_square_scaled`` and ``scaling_factor``) the
    Satorra–Bentler (2001) scaled difference is used instead:

    .. math:: c_d = (d_R c_R − d_G c_G) / (d_R − d_G), \\qquad
              T_d = (T_R − T_G) / c_d

    with ``T`` the unscaled statistics and ``c`` the scaling factors.  When
    ``c_d ≤ 0`` the 2001 statistic is undefined; the 2010 correction needs
    a refit and is not made here (the row says so).  DWLS fits are compared
    by :func:`dwls_difference_row` (their statistics alone do not suffice).

    Returns
    -------
    dict
        ``chi_square``, ``df``, ``p_value`` (``None`` when not computed),
        ``scaled`` (bool), ``scaling_factor`` (``c_d`` or ``None``), ``test``
        (:data:`LIKELIHOOD_RATIO` or :data:`SCALED_DIFFERENCE`) and ``note``
        (``None`` or one sentence).

    Raises
    ------
    ValueError
        For fits of the ordinal (DWLS) route.
    """
    if _is_dwls(restricted_fit) or _is_dwls(general_fit):
        raise ValueError("DWLS fits are compared by dwls_difference_row")
    df = int(restricted_fit["df"]) - int(general_fit["df"])
    t_r, t_g = float(restricted_fit["chi_square"]), float(general_fit["chi_square"])
    c_r, c_g = restricted_fit.get("scaling_factor"), general_fit.get("scaling_factor")
    scaled = c_r is not None and c_g is not None
    out = _untestable(df, t_r, t_g, SCALED_DIFFERENCE if scaled else LIKELIHOOD_RATIO)
    if out["note"] is not None:
        return out
    if scaled:
        c_d = (restricted_fit["df"] * c_r - general_fit["df"] * c_g) / df
        out.update(scaled=True, scaling_factor=float(c_d))
        if c_d <= 0:
            out["note"] = ("the scaled difference is not defined here (negative scaling "
                           "factor); the correction of Satorra & Bentler (2010) needs a refit")
            return out
        diff = (t_r - t_g) / c_d
    else:
        diff = t_r - t_g
    if diff < -_NEGATIVE_TOLERANCE * max(1.0, t_r):
        out["note"] = _STOPPED_EARLY
        return out
    diff = max(diff, 0.0)
    out.update(chi_square=float(diff), p_value=float(stats.chi2.sf(diff, df)))
    return out


def _is_dwls(fit: dict) -> bool:
    """A fit of the ordinal route: it keeps its unadjusted statistic apart."""
    return "chi_square_unadjusted" in fit


def _untestable(df: int, t_r: float, t_g: float, test: str) -> dict:
    """The row before testing; its ``note`` is set when ``df`` rules the test out."""
    out = {"chi_square": None, "df": df, "p_value": None, "scaled": False,
           "scaling_factor": None, "test": test, "note": None}
    if df < 0:
        out["note"] = ("the model said to be restricted has fewer degrees of freedom than the "
                       "other, so it cannot be nested in it; check 'nested_in'")
    elif df == 0:
        out["note"] = ("the two models have the same degrees of freedom: they are equivalent "
                       "here (same fit), so there is nothing to test")
        out["chi_square"] = t_r - t_g
    return out


def dwls_difference_row(restricted: DwlsModel, general: DwlsModel, restricted_name: str,
                        general_name: str) -> dict:
    """The DWLS difference test (Satorra 2000) of a nested pair fitted by
    DWLS (:func:`scalewright.dwls_difference.nested_dwls_test`), as a
    comparison row: ``chi_square`` is the scaled-and-shifted difference on
    ``df`` = the difference in degrees of freedom, ``chi_square_unadjusted``
    is ``T_d = T_R − T_G``, ``scaling_factor`` is ``tr(MΓ)/df``,
    ``shift_scale`` and ``shift`` are ``a`` and ``b``.
    """
    df = restricted.fit.test.df - general.fit.test.df
    t_r, t_g = restricted.fit.test.chi_square, general.fit.test.chi_square
    out = _untestable(df, t_r, t_g, DWLS_DIFFERENCE)
    if out["note"] is not None:
        return out
    if t_r - t_g < -_NEGATIVE_TOLERANCE * max(1.0, t_r):
        out["note"] = _STOPPED_EARLY
        return out
    found = nested_dwls_test(restricted, general)
    if not found.nested:
        out["note"] = (f"'{general_name}' does not reproduce the correlations implied by "
                       f"'{restricted_name}' (largest difference {found.reproduction_gap:.2g}): "
                       "the two are not nested, or that refit stopped early, and the test does "
                       "not apply")
        return out
    out.update(found.to_dict())
    return out


def bic_weights(bic: Sequence[float]) -> np.ndarray:
    """BIC-based model weights, the approximate posterior probabilities of
    the models under equal prior odds:

    .. math:: w_i = \\exp(−Δ_i/2) / \\sum_j \\exp(−Δ_j/2), \\qquad Δ_i = BIC_i − \\min BIC

    (Raftery 1995; Wagenmakers & Farrell 2004).
    """
    bic = np.asarray(bic, dtype=float)
    rel = np.exp(-0.5 * (bic - bic.min()))
    return rel / rel.sum()


def _declared(spec) -> dict:
    """What the researcher wrote about a model: first specified, why, changes."""
    changes = getattr(spec, "changes", ()) or ()
    return {"first": bool(getattr(spec, "first", False)),
            "rationale": getattr(spec, "rationale", None),
            "changes": [{"change": c.change, "cue": c.cue, "reason": c.reason} for c in changes]}


def _comparable(model: dict) -> tuple:
    """Models whose likelihoods are on the same data: same item set and N."""
    return (frozenset(model.get("items", ())), model.get("n_used"))


def compare_models(specs: Sequence, models: Sequence[dict],
                   dwls_models: Mapping[str, DwlsModel] | None = None) -> dict:
    """Rival models side by side.

    Parameters
    ----------
    specs : sequence of ModelSpec
        The models as written in the model file (for nesting and ``first``).
    models : sequence of dict
        ``ModelResult.to_dict()`` of the same models (matched by ``name``),
        or the part of it the comparison reads (``ModelResult.comparison_keys()``).
    dwls_models : mapping of name to DwlsModel, optional
        The fits of the ordinal route (``ModelResult.fitted``), which the
        DWLS difference test needs; a DWLS pair without them is not tested.

    Returns
    -------
    dict
        ``{"comparison": {"models": [row, ...], "nested_tests": [...],
        "bic_weights": {name: weight}}}``.  A row holds the model's fit
        indices (:data:`ROW_FIT_KEYS` that it has), what the model file says
        of it (``first``, ``rationale``, ``changes`` as a list of ``{change,
        cue, reason}``), ``converged``, ``n_used``, ``delta_bic`` and
        ``bic_weight``; BIC weights are computed
        among converged models fitted to the same items and rows as the
        first such model (others get ``None``).  Each nested test holds
        ``restricted``, ``general``, ``chi_square``, ``df``, ``p_value``,
        ``how_detected``, ``kind``, ``boundary``, ``scaled``,
        ``scaling_factor``, ``test`` (which difference test) and ``note``;
        a DWLS test also ``chi_square_unadjusted``, ``shift_scale`` and
        ``shift`` (:func:`dwls_difference_row`).
    """
    by_name = {m["name"]: m for m in models}
    spec_of = {s.name: s for s in specs}
    converged = [m for m in models if m["converged"] and m["fit"].get("bic") is not None]
    pool = [m for m in converged if _comparable(m) == _comparable(converged[0])] if converged else []
    weights = dict(zip((m["name"] for m in pool), bic_weights([m["fit"]["bic"] for m in pool])
                       if pool else ()))
    best_bic = min((m["fit"]["bic"] for m in pool), default=None)
    rows = []
    for m in models:
        row = {"name": m["name"], **_declared(spec_of.get(m["name"])),
               "converged": bool(m["converged"]), "estimator": m.get("estimator"),
               "n_used": m.get("n_used")}
        row.update({k: m["fit"][k] for k in ROW_FIT_KEYS if k in m["fit"]})
        in_pool = m["name"] in weights
        row["delta_bic"] = float(m["fit"]["bic"] - best_bic) if in_pool else None
        row["bic_weight"] = float(weights[m["name"]]) if in_pool else None
        rows.append(row)
    tests = []
    for nest in nested_pairs(specs):
        r, g = by_name[nest.restricted], by_name[nest.general]
        test = {"restricted": nest.restricted, "general": nest.general,
                "how_detected": nest.how_detected, "kind": nest.kind,
                "boundary": nest.boundary}
        df = int(r["fit"]["df"]) - int(g["fit"]["df"])
        not_tested = dict(chi_square=None, df=df, p_value=None, scaled=False,
                          scaling_factor=None, test=None)
        dwls = _is_dwls(r["fit"]) or _is_dwls(g["fit"])
        fitted = dwls_models or {}
        if not (r["converged"] and g["converged"]):
            failed = nest.restricted if not r["converged"] else nest.general
            test.update(not_tested, note=f"not tested: model '{failed}' did not converge")
        elif r.get("n_used") != g.get("n_used"):
            test.update(not_tested,
                        note=f"not tested: the models used different numbers of rows "
                             f"({r.get('n_used')} and {g.get('n_used')})")
        elif dwls and not (nest.restricted in fitted and nest.general in fitted):
            test.update(not_tested, note="not tested: the DWLS difference test needs the two "
                                         "fitted models, not only their statistics")
        elif dwls:
            test.update(dwls_difference_row(fitted[nest.restricted], fitted[nest.general],
                                            nest.restricted, nest.general))
        else:
            test.update(chi_square_difference(r["fit"], g["fit"]))
            if nest.boundary and test["p_value"] is not None:
                test["note"] = ("merging constructs fixes their correlations at 1, the edge of "
                                "the parameter space, so this p-value is conservative "
                                "(Self & Liang 1987)")
        tests.append(test)
    return {"comparison": {"models": rows, "nested_tests": tests,
                           "bic_weights": {k: float(v) for k, v in weights.items()}}}
