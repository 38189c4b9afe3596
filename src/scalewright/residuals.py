"""Local misfit: residual correlations (observed minus model-implied) and
standardized residuals, with the largest listed and flagged.

For items ``i, j`` with sample covariance ``s_ij`` and implied covariance
``σ̂_ij``:

* residual correlation ``r_ij − σ̂_ij / √(σ̂_ii σ̂_jj)``, with ``r`` the sample
  correlation: the size a reader can judge without knowing the answer scale.
  Entries beyond ``|.10|`` are flagged (common practice, no source).
* standardized residual ``(s_ij − σ̂_ij) / SE(s_ij − σ̂_ij)``, a z statistic.
  Under the model and normality, with ``S`` the ML (÷n) covariance,
  ``Var(s_ij) = (σ_ii σ_jj + σ_ij²)/n`` and, because ML is efficient,
  ``Cov(s, σ̂) = Var(σ̂)``, so

      Var(s_ij − σ̂_ij) = (σ_ii σ_jj + σ_ij²)/n − Δ_ij acov(θ̂) Δ_ijᵀ,

  with ``Δ_ij = ∂σ_ij/∂θ`` (Browne 1984, the asymptotic covariance of the
  residuals of an efficient estimator; Bollen 1989 on normalized versus
  standardized residuals).  Dividing by the first term
  alone (the "normalized" residual) understates the size of the z values.
  ``Δ_ij`` comes from the rank-two cell derivatives,
  ``Δ_ij,c = a_ic b_jc + b_ic a_jc``.  Where the model reproduces a
  covariance by construction (a freed residual covariance) the variance is
  zero and no z is reported.

Under robust ML (non-normal complete data) the shortcut fails too: the
estimate is not efficient and ``Var(s_ij)`` is not the normal-theory one.
The z values then use ``Var(s − σ̂) = P Γ Pᵀ / N`` with
``P = I − Δ(ΔᵀWΔ)⁻¹ΔᵀW``, ``W`` the normal-theory weight and ``Γ`` the
distribution-free covariance of the sample covariances (Browne 1984),
accumulated from the cases for the listed pairs only (:func:`_robust_standardized`).

With missing answers (FIML) the observed matrix is the saturated model's
(EM), and the z values use ``Var(ŝ − σ̂) = Var(ŝ) − Var(σ̂)`` (nested ML
estimates, the model's efficient under the model; Hausman 1978) with
``Var(ŝ)`` from the saturated model's observed information
(:func:`_fiml_standardized`); under robust FIML, where neither estimate is
efficient, from the casewise scores of both (:func:`_robust_fiml_standardized`);
up to :data:`FIML_Z_MAX_ITEMS` items.  For the ordinal and mixed routes (DWLS) the
residuals are taken against the correlations the model was fitted to
(polychoric, polyserial, Pearson), and the z values use the DWLS residual
variance ``diag((I − ΔH⁻¹ΔᵀW) Γ (I − ΔH⁻¹ΔᵀW)ᵀ)``
(:func:`scalewright.estimate.dwls.residual_variances`; DWLS is not
efficient, so the shortcut above does not apply).  The JSON's ``observed``
says which correlations were observed.

References
----------
Browne, M. W. (1984). Asymptotically distribution-free methods for the
analysis of covariance structures. British Journal of Mathematical and
Statistical Psychology 37, 62–83.
Bollen, K. A. (1989). Structural Equations with Latent Variables. Wiley.
Hausman, J. A. (1978). Specification tests in econometrics. Econometrica 46,
1251–1271.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from scalewright.blas import one_blas_thread
from scalewright.estimate.dwls import residual_variances
from scalewright.estimate.fiml import (missing_patterns, observed_information,
                                       pattern_jacobian, saturated_information,
                                       saturated_score_chunks)
from scalewright.estimate.result import Estimate
from scalewright.estimate.robust import casewise_scores, expected_information, incidence
from scalewright.estimate.spd_inverse import spd_inverse
from scalewright.layout import cell_derivatives

#: residual correlations at least this large are flagged (common practice, no source)
FLAG_AT = 0.10

#: at least this many pairs are listed even when fewer are flagged
LIST_AT_LEAST = 10

#: a residual variance below this share of Var(s_ij) counts as zero (reproduced by construction)
_REPRODUCED = 1e-8

#: ``Estimate.method`` of a robust ML estimate on complete data (sandwich ``acov``)
ROBUST_ML = "robust-ml"

#: ``Estimate.method`` of a normal-theory and of a robust FIML estimate
FIML, ROBUST_FIML = "fiml", "robust-fiml"

#: FIML z values need the saturated information (p* × p*, p* = p(p+3)/2), whose
#: construction holds p² × p* numbers (10 MB at 40 items, 400 MB at 100) and whose
#: solve costs p*³/3: a judgement call on memory and time, no source
FIML_Z_MAX_ITEMS = 40

#: why an unidentified model has no z values
UNIDENTIFIED = "the model is not identified (its information matrix is singular)"

#: how the z values were computed (the JSON's ``standardized_basis``; module docstring)
Z_NORMAL, Z_DISTRIBUTION_FREE, Z_DWLS, Z_FIML, Z_ROBUST_FIML = (
    "normal", "distribution-free", "dwls", "fiml", "robust-fiml")
Z_BASES = (Z_NORMAL, Z_DISTRIBUTION_FREE, Z_DWLS, Z_FIML, Z_ROBUST_FIML)

#: what the observed correlations of each route are (the JSON's ``observed``)
SAMPLE = "sample correlations"
SATURATED = "correlations of the saturated model fitted to the incomplete answers (EM)"
POLYCHORIC = "polychoric correlations"
MIXED = "polychoric, polyserial and Pearson correlations"


@dataclass(frozen=True)
class ResidualCorrelations:
    """Residual correlations and standardized residuals of one group."""

    items: tuple[str, ...]
    matrix: np.ndarray               # p × p, observed minus implied correlation
    standardized: np.ndarray | None  # p × p z values (NaN where undefined), None without acov
    threshold: float
    observed: str                    # what the observed correlations are, in words
    z_note: str | None = None        # why there are no z values, when there are none
    z_basis: str | None = None       # how the z values were computed (one of Z_BASES)

    def largest(self, at_least: int = LIST_AT_LEAST) -> list[dict]:
        """Every pair at or beyond the threshold, and at least ``at_least``
        pairs, largest absolute residual correlation first."""
        out = []
        for i, j in zip(*listed_pairs(self.matrix, self.threshold, at_least)):
            z = None if self.standardized is None else self.standardized[i, j]
            value = self.matrix[i, j]
            out.append({"a": self.items[i], "b": self.items[j], "value": float(value),
                        "standardized": float(z) if z is not None and np.isfinite(z) else None,
                        "flagged": bool(abs(value) >= self.threshold)})
        return out

    def to_dict(self) -> dict:
        """``largest``, ``threshold``, the number flagged, and the matrix
        (rounded to 4 decimals, for a heat map)."""
        largest = self.largest()
        return {"threshold": self.threshold,
                "observed": self.observed,
                "standardized_not_computed": self.z_note,
                "standardized_basis": self.z_basis if self.standardized is not None else None,
                "n_flagged": sum(entry["flagged"] for entry in largest),
                "largest": largest,
                "items": list(self.items),
                "matrix": np.round(self.matrix, 4).tolist()}


def listed_pairs(matrix: np.ndarray, threshold: float,
                 at_least: int = LIST_AT_LEAST) -> tuple[np.ndarray, np.ndarray]:
    """Rows and columns (``i < j``) of the pairs listed: every one at or beyond
    ``threshold`` and at least ``at_least``, largest absolute value first."""
    rows, cols = np.triu_indices(len(matrix), k=1)
    values = np.abs(matrix[rows, cols])
    order = np.argsort(-values, kind="stable")
    order = order[:max(int(np.count_nonzero(values >= threshold)), at_least)]
    return rows[order], cols[order]


def residual_correlations(estimate: Estimate, group: int = 0, threshold: float = FLAG_AT,
                          answers: np.ndarray | None = None,
                          saturated: tuple | None = None) -> ResidualCorrelations:
    """Residual correlations and standardized residuals of one group of an
    estimate (formulas per route in the module docstring).

    Parameters
    ----------
    estimate : Estimate
        Without ``saturated`` its ``blocks`` must hold
        the group's data as one complete block, whose covariance is then the
        observed one; a DWLS estimate brings its own correlations.
    group : int
        Index of the group (``layout.patterns``).
    threshold : float
        Absolute residual correlation from which a pair is flagged.
    answers : ndarray, optional
        The answers the estimate was fitted to (columns in ``layout.items``
        order, NaN = missing; under robust ML its complete rows are used);
        needed for the z values of a robust estimate, which come from the
        cases: the casewise deviations under robust ML
        (``method == "robust-ml"``, :func:`_robust_standardized`), the
        casewise scores under robust FIML (``"robust-fiml"``,
        :func:`_robust_fiml_standardized`), only for the pairs listed.
        Without them a robust estimate gets no z values.
    saturated : (PatternMoments, Saturated), optional
        With missing answers (FIML): the pattern moments and the saturated
        model fitted to them by EM, whose covariance is the observed one; a
        FIML estimate (``method == "fiml"``) of at most
        :data:`FIML_Z_MAX_ITEMS` items also gets z values
        (:func:`_fiml_standardized`).

    Raises
    ------
    ValueError
        When the group's data are split into missing-data blocks and
        ``saturated`` is not given.
    """
    mats = estimate.matrices(group)
    sigma = mats.implied_cov
    items = tuple(estimate.layout.items)
    threshold = float(threshold)
    if estimate.dwls_data is not None:
        return _dwls_residuals(estimate, _correlation(sigma), threshold)
    if saturated is not None:
        moments, fitted = saturated
        matrix = _correlation(fitted.cov) - _correlation(sigma)
        standardized, note = None, _fiml_z_note(estimate, answers)
        if note is None:
            pairs = listed_pairs(matrix, threshold)
            try:
                with one_blas_thread():
                    standardized = (
                        _fiml_standardized(estimate, moments, fitted, *pairs)
                        if estimate.method == FIML else
                        _robust_fiml_standardized(estimate, moments, fitted, answers, *pairs))
            except np.linalg.LinAlgError:
                note = "the saturated model's information matrix is singular"
        return ResidualCorrelations(items, matrix, standardized, threshold, SATURATED, note,
                                    Z_FIML if estimate.method == FIML else Z_ROBUST_FIML)
    blocks = [b for b in estimate.blocks if b.group == group]
    if len(blocks) != 1 or len(blocks[0].observed) != estimate.layout.p:
        raise ValueError("residual correlations need the group's complete-data covariance; "
                         "with missing-data blocks pass the saturated model")
    block = blocks[0]
    matrix = _correlation(block.cov) - _correlation(sigma)
    standardized, note, basis = None, None, Z_NORMAL
    if estimate.acov is None:
        note = UNIDENTIFIED
    elif estimate.method == ROBUST_ML:
        basis = Z_DISTRIBUTION_FREE
        if answers is None:
            note = "the answers behind the robust estimate were not given"
        else:
            complete = ~np.isnan(answers).any(axis=1)
            with one_blas_thread():
                standardized = _robust_standardized(
                    estimate, answers if complete.all() else answers[complete],
                    *listed_pairs(matrix, threshold))
    else:
        with one_blas_thread():
            standardized = _standardized(estimate, group, block.cov - sigma, sigma, block.n)
    return ResidualCorrelations(items, matrix, standardized, threshold, SAMPLE, note, basis)


def _fiml_z_note(estimate: Estimate, answers: np.ndarray | None) -> str | None:
    """Why a FIML estimate gets no z values (None when it gets them)."""
    if estimate.acov is None:
        return UNIDENTIFIED
    if estimate.method not in (FIML, ROBUST_FIML):
        return "against the saturated model they are computed for FIML estimates only"
    if estimate.method == ROBUST_FIML and answers is None:
        return "the answers behind the robust estimate were not given"
    if estimate.layout.p > FIML_Z_MAX_ITEMS:
        return (f"with missing answers they are computed for at most {FIML_Z_MAX_ITEMS} items "
                f"(the saturated model's information matrix grows with the fourth power of "
                f"the number of items)")
    return None


def _fiml_standardized(estimate: Estimate, moments, saturated, rows: np.ndarray,
                       cols: np.ndarray) -> np.ndarray:
    """z values of the covariance residuals ``ŝ_jl − σ̂_jl`` of a FIML
    estimate against the saturated (EM) covariance ``Ŝ``, for the pairs
    ``(rows[k], cols[k])`` only (NaN elsewhere).

    Both are ML estimates from the same likelihood, the model's efficient
    when the model holds, so ``Cov(β̂_sat, β(θ̂)) = Var(β(θ̂))`` (Hausman
    1978) and

        Var(ŝ_jl − σ̂_jl) = [A_β⁻¹]_kk / N − Δ_k acov(θ̂) Δ_kᵀ,

    with ``A_β`` the observed information per case of the saturated
    parameters ``β = (vech Σ, μ)`` at ``(μ̂, Ŝ)``
    (:func:`scalewright.estimate.fiml.saturated_information`; observed, as
    the expected one is not consistent under MAR) and ``Δ_k = ∂σ_jl/∂θ``.
    Without missing answers the first term is the familiar
    ``(s_jj s_ll + s_jl²)/N``."""
    layout = estimate.layout
    pattern = layout.patterns[0]
    p = layout.p
    k, to_saturated = _saturated_inverse_columns(moments, saturated, rows, cols)
    n = float(moments.counts.sum())
    var_saturated = to_saturated[k, np.arange(len(k))] / n
    delta = pattern_jacobian(pattern, estimate.theta, layout.n_params)[k]
    var = var_saturated - np.einsum("ka,ab,kb->k", delta, estimate.acov, delta)
    sigma = pattern.matrices(estimate.theta).implied_cov
    ok = var > _REPRODUCED * var_saturated
    z_values = np.full(len(k), np.nan)
    z_values[ok] = (saturated.cov - sigma)[rows[ok], cols[ok]] / np.sqrt(var[ok])
    out = np.full((p, p), np.nan)
    out[rows, cols] = out[cols, rows] = z_values
    return out


def _correlation(cov: np.ndarray) -> np.ndarray:
    sd = np.sqrt(np.diag(cov))
    return cov / np.outer(sd, sd)


def _robust_standardized(estimate: Estimate, x: np.ndarray, rows: np.ndarray,
                         cols: np.ndarray) -> np.ndarray:
    """z values of the covariance residuals of a robust ML estimate, for the
    pairs ``(rows[k], cols[k])`` only (NaN elsewhere; module docstring).

    With the centred case ``c_i``, its deviation ``e_ik = c_ij c_il − s_jl``
    for pair ``k = (j, l)``, its score ``g_i`` and the expected information
    per case ``I`` (:mod:`scalewright.estimate.robust`), the ML estimate
    moves by ``θ̂ − θ ≈ I⁻¹ ḡ``, so the residual is the mean of
    ``u_ik = e_ik − Δ_k I⁻¹ g_i`` and ``Var(s_jl − σ̂_jl) = (1/N²) Σ_i u_ik²``:
    the diagonal of ``(1/N) PΓPᵀ`` with ``P = I − Δ(ΔᵀWΔ)⁻¹ΔᵀW`` and the
    distribution-free ``Γ`` (Browne 1984), without forming ``Γ``."""
    layout = estimate.layout
    pattern = layout.patterns[0]
    mats = pattern.matrices(estimate.theta)
    sigma = mats.implied_cov
    n = len(x)
    mean = x.mean(axis=0)
    s = np.cov(x, rowvar=False, bias=True)
    a, b, _ = cell_derivatives(pattern, mats)
    inc = incidence(pattern, layout.n_params)
    info = inc.T @ expected_information(a, b, spd_inverse(sigma)) @ inc
    delta = (a[rows] * b[cols] + b[rows] * a[cols]) @ inc           # ∂σ_k/∂θ, K × q
    move = np.linalg.solve(info, delta.T)                            # I⁻¹Δ_Kᵀ, q × K
    squares = np.zeros(len(rows))
    for c, g in casewise_scores(layout, estimate.theta, x, mean, s):
        u = c[:, rows] * c[:, cols] - s[rows, cols] - g @ move
        squares += np.einsum("ik,ik->k", u, u)
    var = squares / n ** 2
    out = np.full(sigma.shape, np.nan)
    ok = var > _REPRODUCED * np.maximum(s[rows, rows] * s[cols, cols] / n, np.finfo(float).tiny)
    z_values = np.where(ok, (s - sigma)[rows, cols] / np.sqrt(np.where(ok, var, 1.0)), np.nan)
    out[rows, cols] = out[cols, rows] = z_values
    return out


def _robust_fiml_standardized(estimate: Estimate, moments, saturated, x: np.ndarray,
                              rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
    """z values of the covariance residuals ``ŝ_jl − σ̂_jl`` of a robust
    (Yuan–Bentler) FIML estimate, for the pairs ``(rows[k], cols[k])`` only.

    Neither estimate is efficient when the answers are not normal, so the
    variance of the difference is taken from the cases (Yuan & Bentler 2000
    for the two estimators' casewise expansions): with ``s_i`` the casewise
    scores of ``β = (vech Σ, μ)`` (at the saturated estimate for ``Ŝ``, at
    the implied moments for the model), ``A_β`` the saturated model's
    observed information and ``Ã_θ`` the model's, both per case,

        β̂ − β ≈ A_β⁻¹ s̄,   θ̂ − θ ≈ Ã_θ⁻¹ Δᵀ s̄,

    so the residual is the mean of ``u_ik = (A_β⁻¹ s_i)_k − Δ_k Ã_θ⁻¹ Δᵀ s_i``
    and ``Var(ŝ_jl − σ̂_jl) = (1/N²) Σ_i (u_ik − ū_k)²``."""
    layout = estimate.layout
    pattern = layout.patterns[0]
    p = layout.p
    k, to_saturated = _saturated_inverse_columns(moments, saturated, rows, cols)
    delta = pattern_jacobian(pattern, estimate.theta, layout.n_params)
    observed = observed_information(pattern, layout.n_params, estimate.theta, moments).observed
    to_model = delta @ np.linalg.solve(observed, delta[k].T)        # Δ Ã_θ⁻¹ Δ_kᵀ, p* × K
    mats = pattern.matrices(estimate.theta)
    patterns = missing_patterns(x, tuple(layout.items), "the data file")
    sums, squares, n = np.zeros(len(k)), np.zeros(len(k)), 0
    for at_saturated, at_model in zip(
            saturated_score_chunks(x, patterns, saturated.mean, saturated.cov),
            saturated_score_chunks(x, patterns, mats.implied_mean, mats.implied_cov)):
        u = at_saturated @ to_saturated - at_model @ to_model
        sums += u.sum(axis=0)
        squares += np.einsum("ik,ik->k", u, u)
        n += len(u)
    var = (squares - sums * sums / n) / n ** 2
    sigma = mats.implied_cov
    ok = var > _REPRODUCED * np.abs(to_saturated[k, np.arange(len(k))]) / n
    z_values = np.full(len(k), np.nan)
    z_values[ok] = (saturated.cov - sigma)[rows[ok], cols[ok]] / np.sqrt(var[ok])
    out = np.full((p, p), np.nan)
    out[rows, cols] = out[cols, rows] = z_values
    return out


def _saturated_inverse_columns(moments, saturated, rows: np.ndarray,
                               cols: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The ``vech`` positions ``k`` of the pairs and the columns ``A_β⁻¹ E_k``
    (``p* × K``) of the inverse of the saturated model's observed information
    per case at its estimate (:func:`scalewright.estimate.fiml.saturated_information`)."""
    info, _, _ = saturated_information(moments, saturated.mean, saturated.cov)
    k = _vech_positions(len(saturated.mean))[rows, cols]
    unit = np.zeros((len(info), len(k)))
    unit[k, np.arange(len(k))] = 1.0
    return k, np.linalg.solve(info, unit)


def _vech_positions(p: int) -> np.ndarray:
    """``p × p`` array: the position of each pair in ``vech`` (``np.tril_indices`` order)."""
    vech_rows, vech_cols = np.tril_indices(p)
    position = np.empty((p, p), dtype=np.intp)
    position[vech_rows, vech_cols] = position[vech_cols, vech_rows] = np.arange(len(vech_rows))
    return position


def _dwls_residuals(estimate: Estimate, implied: np.ndarray,
                    threshold: float) -> ResidualCorrelations:
    """Residuals of a DWLS fit against the correlations it was fitted to,
    with z values from :func:`scalewright.estimate.dwls.residual_variances`
    (none when the model is not identified)."""
    data = estimate.dwls_data
    p = estimate.layout.p
    rows, cols = np.triu_indices(p, 1)
    residual = data.r - implied[rows, cols]
    matrix = np.zeros((p, p))
    matrix[rows, cols] = matrix[cols, rows] = residual
    standardized = None
    if estimate.acov is not None:
        with one_blas_thread():
            var = residual_variances(estimate.layout, estimate.theta, data.gamma)
        z = np.full(len(rows), np.nan)
        ok = var > _REPRODUCED * np.diag(data.gamma)
        z[ok] = residual[ok] / np.sqrt(var[ok])
        standardized = np.full((p, p), np.nan)
        standardized[rows, cols] = standardized[cols, rows] = z
    observed = POLYCHORIC if estimate.method == "dwls" else MIXED
    return ResidualCorrelations(tuple(estimate.layout.items), matrix, standardized, threshold,
                                observed, None if standardized is not None else UNIDENTIFIED,
                                Z_DWLS)


def _standardized(estimate: Estimate, group: int, residual: np.ndarray, sigma: np.ndarray,
                  n: int) -> np.ndarray:
    """z values of the covariance residuals (formula in the module docstring)."""
    layout = estimate.layout
    pattern = layout.patterns[group]
    a, b, _ = cell_derivatives(pattern, estimate.matrices(group))
    rows, cols = np.triu_indices(layout.p)
    delta_cells = a[rows]                                         # ∂σ_ij/∂cell, in place
    delta_cells *= b[cols]                                        # (each fresh 5050 × 245
    other = b[rows]                                               # temporary costs more
    other *= a[cols]                                              # than its arithmetic)
    delta_cells += other
    params = pattern.cell_params
    if pattern.cells_are_parameters and len(params) == layout.n_params:
        delta = delta_cells                       # cell c is parameter c
    elif len(np.unique(params)) == len(params):   # one cell per parameter: a plain scatter
        delta = np.zeros((len(rows), layout.n_params))
        delta[:, params] = delta_cells            # (np.add.at took 24 ms at 100 items)
    else:                                         # cells sharing a parameter add up
        delta = np.zeros((len(rows), layout.n_params))
        np.add.at(delta.T, params, delta_cells.T)
    spread = delta @ estimate.acov
    spread *= delta
    var_fitted = spread.sum(axis=1)
    var_sample = (sigma[rows, rows] * sigma[cols, cols] + sigma[rows, cols] ** 2) / n
    var = var_sample - var_fitted
    z = np.full(len(rows), np.nan)
    ok = var > _REPRODUCED * var_sample
    z[ok] = residual[rows[ok], cols[ok]] / np.sqrt(var[ok])
    out = np.full((layout.p, layout.p), np.nan)
    out[rows, cols] = z
    out[cols, rows] = z
    return out
