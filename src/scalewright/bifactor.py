"""How much of a sum score a general factor explains: bifactor and
higher-order coefficients.

A bifactor model has one general factor on which all items load and group
(specific) factors for subsets of items, all uncorrelated.  A higher-order
model has first-order constructs whose correlations come from a
higher-order factor; the Schmid–Leiman transformation rewrites it as a
(constrained) bifactor model, so both share one set of coefficients.

Inputs follow the engine contract described in :mod:`scalewright.omega`
(Λ, Φ* of all latent variables, Θ).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np

from scalewright.coefficient_types import Note, Record, as_index
from scalewright.omega import coefficient_h, contract_matrices, explained_variance
from scalewright.standardize import standardize

#: Factor correlations smaller than this are treated as zero (numerical noise).
_ORTHOGONAL_TOLERANCE = 1e-8


@dataclass(frozen=True)
class SubscaleRow(Record):
    """Coefficients of one group factor's subscale (the items loading on it).

    Attributes
    ----------
    omega_subscale : float
        ωS: common variance of the subscale sum over its total variance.
    omega_hierarchical_subscale : float
        ωHS: variance of the subscale sum due to the group factor beyond the
        general factor, over its total variance.
    general_share : float
        Variance of the subscale sum due to the general factor over its
        total variance (ωS = general_share + ωHS when factors are orthogonal).
    h : float
        Coefficient H of the group factor from its standardized loadings.
    """

    factor: str
    items: tuple[str, ...]
    omega_subscale: float
    omega_hierarchical_subscale: float
    general_share: float
    h: float


@dataclass(frozen=True)
class BifactorResult(Record):
    """General-factor coefficients of the total score and of each subscale."""

    general: str
    items: tuple[str, ...]
    omega_total: float
    omega_hierarchical: float
    relative_omega: float
    ecv: float
    puc: float
    h: float
    subscales: tuple[SubscaleRow, ...]
    notes: tuple[Note, ...]


def bifactor_coefficients(loadings: np.ndarray, latent_cov: np.ndarray, residual_cov: np.ndarray,
                          general: int, groups: Sequence[int], *, factor_names: Sequence[str],
                          item_names: Sequence[str],
                          items: Sequence[int] | None = None) -> BifactorResult:
    """Omega total, omega hierarchical, ωS/ωHS per subscale, ECV, PUC and H.

    With ``w`` the 0/1 vector of the scored items, ``Σ̂ = ΛΦ*Λᵀ + Θ`` and
    ``V_C(w)`` the variance of ``wᵀx`` explained by latent variables ``C``
    (:func:`scalewright.omega.explained_variance`; for orthogonal factors
    ``(wᵀλ_c)²φ_cc`` summed over ``c``):

    .. math::
        \\omega_T = \\frac{w^\\top\\Lambda\\Phi^*\\Lambda^\\top w}{w^\\top\\hat\\Sigma w},\\quad
        \\omega_H = \\frac{V_{g}(w)}{w^\\top\\hat\\Sigma w},\\quad
        \\omega_{HS,s} = \\frac{V_{\\{g,s\\}}(w_s) - V_g(w_s)}{w_s^\\top\\hat\\Sigma w_s}

    .. math::
        ECV = \\frac{\\sum_i \\lambda_{ig}^2}{\\sum_i \\lambda_{ig}^2 + \\sum_s\\sum_i \\lambda_{is}^2},\\quad
        PUC = 1 - \\frac{\\#\\{i<j: i, j \\text{ share a group factor}\\}}{p(p-1)/2}

    (standardized loadings in ECV).  The denominators are the model-implied
    variances of the sum scores, so that the shares of general, group and
    error variance add to one; ``relative_omega = ωH/ωT`` is the share of the
    reliable variance that is general.

    Parameters
    ----------
    loadings, latent_cov, residual_cov : ndarray
        Λ (p, m), Φ* (m, m), Θ (p, p).
    general : int
        Column of the general factor.
    groups : sequence of int
        Columns of the group factors.
    factor_names, item_names : sequence of str
        Names of all columns of Λ and of all rows.
    items : sequence of int, optional
        Rows in the total score; default: every item with a non-zero
        loading on the general factor.

    Notes
    -----
    The coefficients assume uncorrelated general and group factors.  When
    Φ* has correlations among them the variance shares are still computed
    as projections (explained variance), but they overlap; a note with code
    ``"correlated_factors"`` says so.

    References
    ----------
    Zinbarg, R. E., Revelle, W., Yovel, I., & Li, W. (2005). Cronbach's α,
    Revelle's β, and McDonald's ωH. *Psychometrika*, 70, 123–133.
    Reise, S. P. (2012). The rediscovery of bifactor measurement models.
    *Multivariate Behavioral Research*, 47, 667–696.
    Rodriguez, A., Reise, S. P., & Haviland, M. G. (2016). Evaluating
    bifactor models: Calculating and interpreting statistical indices.
    *Psychological Methods*, 21, 137–150.
    Hancock, G. R., & Mueller, R. O. (2001), for H.
    """
    loadings, latent_cov, residual_cov = (np.asarray(a, dtype=float)
                                          for a in (loadings, latent_cov, residual_cov))
    p, m = loadings.shape
    groups = as_index(groups, m, "group factors")
    rows = (np.flatnonzero(loadings[:, general] != 0) if items is None
            else as_index(items, p, "items"))
    in_scope = np.zeros(p, dtype=bool)
    in_scope[rows] = True
    member = (loadings[:, groups] != 0) & in_scope[:, None]          # (p, G)
    weights = np.column_stack([in_scope, member]).astype(float)      # total, then subscales

    implied = loadings @ latent_cov @ loadings.T + residual_cov
    total_var = np.einsum("ir,ij,jr->r", weights, implied, weights)
    common_var = total_var - np.einsum("ir,ij,jr->r", weights, residual_cov, weights)
    general_var = explained_variance(weights, loadings, latent_cov, [general])
    group_var = np.array([explained_variance(weights[:, 1 + j], loadings, latent_cov,
                                             [general, s]) for j, s in enumerate(groups)])
    group_var = group_var - general_var[1:]

    std = standardize(contract_matrices(loadings, latent_cov, residual_cov)).loadings
    general_sq = np.sum(std[rows, general] ** 2)
    ecv = general_sq / (general_sq + np.sum((std[:, groups] * member) ** 2))

    shared = (member.astype(float) @ member.T.astype(float))[np.ix_(rows, rows)] > 0
    n = rows.size
    contaminated = (np.count_nonzero(shared) - np.count_nonzero(np.diag(shared))) / 2
    puc = 1.0 - contaminated / (n * (n - 1) / 2)

    names = np.asarray(item_names)
    subscales = tuple(
        SubscaleRow(factor=factor_names[s], items=tuple(names[member[:, j]].tolist()),
                    omega_subscale=float(common_var[1 + j] / total_var[1 + j]),
                    omega_hierarchical_subscale=float(group_var[j] / total_var[1 + j]),
                    general_share=float(general_var[1 + j] / total_var[1 + j]),
                    h=coefficient_h(std[member[:, j], s]))
        for j, s in enumerate(groups))
    omega_t = common_var[0] / total_var[0]
    omega_h = general_var[0] / total_var[0]
    return BifactorResult(
        general=factor_names[general], items=tuple(names[rows].tolist()),
        omega_total=float(omega_t), omega_hierarchical=float(omega_h),
        relative_omega=float(omega_h / omega_t), ecv=float(ecv), puc=float(puc),
        h=coefficient_h(std[rows, general]), subscales=subscales,
        notes=_correlation_notes(latent_cov, general, groups, factor_names))


def _correlation_notes(latent_cov: np.ndarray, general: int, groups: np.ndarray,
                       factor_names: Sequence[str]) -> tuple[Note, ...]:
    cols = np.concatenate([[general], groups])
    sub = latent_cov[np.ix_(cols, cols)]
    sd = np.sqrt(np.diag(sub))
    corr = sub / np.outer(sd, sd)
    a, b = np.triu_indices(cols.size, k=1)
    off = np.abs(corr[a, b]) > _ORTHOGONAL_TOLERANCE
    if not off.any():
        return ()
    pairs = ", ".join(f"'{factor_names[cols[i]]}'–'{factor_names[cols[j]]}' ({corr[i, j]:.2f})"
                      for i, j in zip(a[off], b[off]))
    return (Note(code="correlated_factors", subject=factor_names[general], message=(
        f"The general and group factors are not all uncorrelated: {pairs}. Omega hierarchical, "
        "omega hierarchical of the subscales and ECV assume uncorrelated factors; here the "
        "variance shares overlap and should be read with caution. Fix these correlations to "
        "zero in the model file to obtain the usual bifactor coefficients.")),)


@dataclass(frozen=True)
class HigherOrderRow(Record):
    """How much of one first-order construct the higher-order factor explains.

    ``loading`` is the standardized higher-order loading (the correlation
    of construct and higher-order factor); ``variance_explained`` is its
    square, ``γ²φ / (γ²φ + ψ)``.
    """

    construct: str
    loading: float
    variance_explained: float


@dataclass(frozen=True)
class HigherOrderResult(Record):
    """Higher-order factor: explained construct variance and the
    coefficients of its Schmid–Leiman (bifactor) form.

    ``schmid_leiman_loadings`` is p × (1 + K): standardized loadings on the
    higher-order factor, then on the residualized constructs, in the order
    of ``constructs``.
    """

    higher: str
    constructs: tuple[HigherOrderRow, ...]
    coefficients: BifactorResult
    schmid_leiman_loadings: np.ndarray


def schmid_leiman(loadings: np.ndarray, latent_cov: np.ndarray, higher: int,
                  constructs: Sequence[int]) -> tuple[np.ndarray, np.ndarray]:
    """Rewrite a higher-order solution as a general factor plus residualized
    constructs.

    With ``γ_c = φ*_ch / φ*_hh`` (regression of construct ``c`` on the
    higher-order factor ``h``) each construct is split into
    ``F_c = γ_c F_h + D_c``.  The latent variables ``(F_h, D_C, others)``
    replace ``(F_h, F_C, others)`` in the same columns:

    .. math::
        \\Lambda^{SL}_{\\cdot h} = \\Lambda_{\\cdot C}\\,\\gamma,\\qquad
        \\Lambda^{SL}_{\\cdot c} = \\Lambda_{\\cdot c},\\qquad
        \\Phi^{SL} = T\\Phi^*T^\\top,\\ T = I - e_C\\gamma^\\top e_h^\\top

    so that ``Λ^{SL}Φ^{SL}Λ^{SLᵀ} = ΛΦ*Λᵀ`` exactly; ``Φ^{SL}_{CC}`` is the
    disturbance covariance Ψ of the constructs, and ``D_c`` is uncorrelated
    with ``F_h``.  Standardizing gives the familiar Schmid–Leiman loadings
    ``λ_ic γ_c`` on the general factor and ``λ_ic √ψ_c`` on the groups.

    Returns
    -------
    loadings, latent_cov : ndarray
        Λ^{SL} (p, m) and Φ^{SL} (m, m).

    References
    ----------
    Schmid, J., & Leiman, J. M. (1957). The development of hierarchical
    factor solutions. *Psychometrika*, 22, 53–61.
    Yung, Y.-F., Thissen, D., & McLeod, L. D. (1999). On the relationship
    between the higher-order factor model and the hierarchical factor
    model. *Psychometrika*, 64, 113–128.
    """
    loadings = np.asarray(loadings, dtype=float)
    latent_cov = np.asarray(latent_cov, dtype=float)
    cols = as_index(constructs, latent_cov.shape[0], "constructs")
    if np.any(loadings[:, higher] != 0):
        raise ValueError(f"column {higher} is not a higher-order factor: items load on it")
    gamma = latent_cov[cols, higher] / latent_cov[higher, higher]
    transform = np.eye(latent_cov.shape[0])
    transform[cols, higher] = -gamma
    sl_loadings = loadings.copy()
    sl_loadings[:, higher] = loadings[:, cols] @ gamma
    return sl_loadings, transform @ latent_cov @ transform.T


def higher_order_coefficients(loadings: np.ndarray, latent_cov: np.ndarray,
                              residual_cov: np.ndarray, higher: int, constructs: Sequence[int], *,
                              factor_names: Sequence[str],
                              item_names: Sequence[str]) -> HigherOrderResult:
    """Variance of each construct explained by the higher-order factor, and
    omega hierarchical of the higher-order factor.

    .. math::
        R^2_c = \\frac{\\phi^{*2}_{ch}}{\\phi^*_{hh}\\,\\phi^*_{cc}}
              = \\frac{\\gamma_c^2\\phi_{hh}}{\\gamma_c^2\\phi_{hh} + \\psi_{cc}},
        \\qquad
        \\omega_{H} = \\frac{(\\mathbf 1^\\top\\Lambda\\Phi^*_{\\cdot h})^2/\\phi^*_{hh}}{\\mathbf 1^\\top\\hat\\Sigma\\mathbf 1}

    The denominator of ``R²_c`` is the construct's total variance (from the
    higher-order factor and its disturbance), that of ω_H the model-implied
    variance of the sum of all the constructs' items.  ωT, ωHS, ECV, PUC and
    H are those of the Schmid–Leiman form (:func:`schmid_leiman`) computed
    by :func:`bifactor_coefficients`.  Correlated disturbances among the
    constructs make the residualized groups correlated; the result then
    carries the ``"correlated_factors"`` note.

    References
    ----------
    Schmid & Leiman (1957); Yung, Thissen & McLeod (1999); Zinbarg, R. E.,
    Revelle, W., & Yovel, I. (2007). Estimating ωh for structures containing
    two group factors. *Applied Psychological Measurement*, 31, 135–157
    (omega hierarchical of a higher-order model).
    """
    loadings, latent_cov = np.asarray(loadings, dtype=float), np.asarray(latent_cov, dtype=float)
    cols = as_index(constructs, latent_cov.shape[0], "constructs")
    sl_loadings, sl_cov = schmid_leiman(loadings, latent_cov, higher, cols)
    r2 = latent_cov[cols, higher] ** 2 / (latent_cov[higher, higher] * latent_cov[cols, cols])
    rows = np.flatnonzero(np.any(loadings[:, cols] != 0, axis=1))
    coefficients = bifactor_coefficients(sl_loadings, sl_cov, residual_cov, higher, cols,
                                         factor_names=factor_names, item_names=item_names,
                                         items=rows)
    std = standardize(contract_matrices(sl_loadings, sl_cov, residual_cov)).loadings
    return HigherOrderResult(
        higher=factor_names[higher],
        constructs=tuple(HigherOrderRow(construct=factor_names[c], variance_explained=float(v),
                                        loading=float(np.sign(latent_cov[c, higher]) * np.sqrt(v)))
                         for c, v in zip(cols, r2)),
        coefficients=coefficients,
        schmid_leiman_loadings=std[:, np.concatenate([[higher], cols])])
