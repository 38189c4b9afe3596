"""Robust maximum likelihood for complete, continuous but non-normal items.

The ML estimates stay; what changes is their uncertainty and the test of fit.

Sandwich standard errors (Huber 1967; White 1982).  With ``g_i`` the score
of case ``i`` (the derivative of its log-likelihood) and ``I`` the expected
information per case,

    acov(θ̂) = I⁻¹ B I⁻¹ / N,        B = (1/N) Σ_i g_i g_iᵀ.

With the rank-two cell derivatives ``∂Σ/∂c = a bᵀ + b aᵀ`` of
:func:`scalewright.layout.cell_derivatives`, ``V = Σ̂⁻¹``, the centred case
``c_i = x_i − x̄`` and ``z_i = V c_i``, the score of cell ``c`` is

    g_ic = (z_iᵀa)(z_iᵀb) − aᵀ V S V b,

the centred casewise version of the ML gradient, so the scores cost
``O(N p c)`` and never a ``p* × p*`` array.

Scaled statistics (Satorra & Bentler 1994).  With ``Γ`` the asymptotic
covariance of ``√N vech(S)``, ``W = ½ Dᵀ(V⊗V)D`` the normal-theory weight,
``Δ = ∂vech Σ/∂θ`` and ``U = W − WΔ(ΔᵀWΔ)⁻¹ΔᵀW``, the ML statistic ``T`` is
asymptotically a mixture of χ²₁ with the eigenvalues of ``UΓ`` as weights:

* mean-scaled:        T_SB = T / c,  c = tr(UΓ)/df, on df degrees of freedom;
* mean-and-variance adjusted:  T_adj = T · d*/tr(UΓ) on
  d* = tr(UΓ)²/tr((UΓ)²) degrees of freedom (not an integer).

Neither trace needs ``Γ`` or ``U``.  Write ``Γ̂ = (1/N) Σ e_i e_iᵀ`` with
``e_i = vech(c_i c_iᵀ − S)``.  Since ``ΔᵀW e_i = g_i`` and ``ΔᵀWΔ = I``,

    tr(UΓ) = (1/N) Σ_i e_iᵀ W e_i − tr(I⁻¹B),   e_iᵀ W e_i = ½ tr((V E_i)²),

with ``E_i = c_i c_iᵀ − S``, and ``½ tr((VE_i)²) = ½ (c_iᵀVc_i)² − c_iᵀVSVc_i
+ ½ tr((VS)²)``: a casewise norm, ``O(N p²)``.  The variance term
``tr((UΓ)²)`` is a sum over *pairs* of cases and has no casewise form;
:mod:`scalewright.estimate.variance_trace` computes it exactly from the
casewise scores and the pairwise products of the whitened cases (or their
Gram matrix, whichever is cheaper), without the raw fourth-moment matrix or
``U``.

Robust fit indices use the scaling factors ``c`` (model) and ``c_B``
(baseline): Brosseau-Liard, Savalei & Li (2012) for RMSEA and Brosseau-Liard
& Savalei (2014) for CFI and TLI; see :func:`robust_fit_indices`.

References
----------
Huber, P. J. (1967). The behavior of maximum likelihood estimates under
nonstandard conditions. Proc. Fifth Berkeley Symposium 1, 221–233.
White, H. (1982). Maximum likelihood estimation of misspecified models.
Econometrica 50, 1–25.
Satorra, A. & Bentler, P. M. (1994). Corrections to test statistics and
standard errors in covariance structure analysis. In von Eye & Clogg (eds.),
Latent Variables Analysis, 399–419. Sage.
Brosseau-Liard, P. E., Savalei, V. & Li, L. (2012). An investigation of the
sample performance of two nonnormality corrections for RMSEA. Multivariate
Behavioral Research 47, 904–930.
Brosseau-Liard, P. E. & Savalei, V. (2014). Adjusting incremental fit
indices for nonnormality. Multivariate Behavioral Research 49, 460–470.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass

import numpy as np
from scipy import stats

from scalewright.estimate.spd_inverse import spd_inverse
from scalewright.estimate.variance_trace import variance_trace
from scalewright.indices import comparative_fit, rmsea, rmsea_interval
from scalewright.layout import (RESIDUAL_COV, Cells, Layout, Matrices, Param, Pattern,
                                cell_derivatives)

#: cases per chunk of the casewise scores and norms
CHUNK = 8192


@dataclass(frozen=True)
class RobustTest:
    """Scaled and adjusted versions of the likelihood-ratio statistic ``T``.

    ``trace`` and ``trace_squared`` are ``tr(UΓ)`` and ``tr((UΓ)²)``;
    ``scaling_factor`` is ``c = tr(UΓ)/df``.  ``variance_rows`` is the size
    of the seeded random subsample ``tr((UΓ)²)`` came from, ``None`` when it
    used every row (JSON ``adjusted_subsample_rows``).
    """

    chi_square: float
    df: int
    trace: float
    trace_squared: float
    variance_rows: int | None = None

    @property
    def scaling_factor(self) -> float:
        return self.trace / self.df if self.df > 0 else float("nan")

    @property
    def chi_square_scaled(self) -> float:
        return self.chi_square / self.scaling_factor if self.df > 0 else float("nan")

    @property
    def df_adjusted(self) -> float:
        return self.trace ** 2 / self.trace_squared if self.df > 0 else float("nan")

    @property
    def chi_square_adjusted(self) -> float:
        return self.chi_square * self.df_adjusted / self.trace if self.df > 0 else float("nan")

    def to_dict(self) -> dict:
        scaled, adjusted = self.chi_square_scaled, self.chi_square_adjusted
        return {
            "chi_square_scaled": _num(scaled),
            "scaling_factor": _num(self.scaling_factor),
            "p_value_scaled": _num(stats.chi2.sf(scaled, self.df)) if self.df > 0 else None,
            "chi_square_adjusted": _num(adjusted),
            "df_adjusted": _num(self.df_adjusted),
            "p_value_adjusted": _num(stats.chi2.sf(adjusted, self.df_adjusted))
            if self.df > 0 else None,
            "adjusted_subsample_rows": self.variance_rows,
        }


@dataclass(frozen=True)
class RobustML:
    """Sandwich covariance of θ̂ and the robust test of one model; ``notes``
    are sentences the report must carry (a subsampled variance trace)."""

    acov: np.ndarray
    test: RobustTest
    notes: tuple[str, ...] = ()

    @property
    def se(self) -> np.ndarray:
        return np.sqrt(np.clip(np.diag(self.acov), 0.0, None))


def _num(x) -> float | None:
    x = float(x)
    return x if np.isfinite(x) else None


def incidence(pattern: Pattern, n_params: int) -> np.ndarray:
    """``cells × parameters`` 0/1 matrix: column sums over cells that share a parameter."""
    params = pattern.cell_params
    out = np.zeros((len(params), n_params))
    out[np.arange(len(params)), params] = 1.0
    return out


def expected_information(a: np.ndarray, b: np.ndarray, v: np.ndarray) -> np.ndarray:
    """Cell-by-cell expected information per case, ``½ tr(V∂Σ_c V∂Σ_d)``
    = ``(AᵀVA)∘(BᵀVB) + (AᵀVB)∘(AᵀVB)ᵀ`` (see :mod:`scalewright.estimate.normal`)."""
    va, vb = v @ a, v @ b
    r = a.T @ vb
    return (a.T @ va) * (b.T @ vb) + r * r.T


def _single_pattern(layout: Layout) -> Pattern:
    if len(layout.patterns) != 1 or layout.has_means:
        raise ValueError("robust ML for complete data takes a one-group layout without "
                         "a mean structure")
    return layout.patterns[0]


def casewise_scores(layout: Layout, theta: np.ndarray, x: np.ndarray,
                    mean: np.ndarray | None = None, cov: np.ndarray | None = None
                    ) -> Iterator[tuple[np.ndarray, np.ndarray]]:
    """The centred cases ``c_i = x_i − x̄`` and their scores ``g_i`` (``q``)
    under a covariance-structure model on complete data ``x`` (columns in
    ``layout.items`` order), ``CHUNK`` cases at a time, so that the ``N × q``
    score matrix is never held whole.

    ``g_ic = (z_iᵀa_c)(z_iᵀb_c) − a_cᵀVSVb_c`` with ``z_i = V c_i``; the
    scores sum to ``−N ∇f(θ)``, i.e. to zero at the ML estimate.
    """
    pattern = _single_pattern(layout)
    mats = pattern.matrices(theta)
    v = spd_inverse(mats.implied_cov)
    mean = x.mean(axis=0) if mean is None else mean
    s = np.cov(x, rowvar=False, bias=True) if cov is None else cov
    a, b, _ = cell_derivatives(pattern, mats)
    inc = incidence(pattern, layout.n_params)
    shift = np.einsum("ic,ic->c", a, v @ s @ v @ b)
    for start in range(0, len(x), CHUNK):
        c = x[start:start + CHUNK] - mean
        z = c @ v
        yield c, ((z @ a) * (z @ b) - shift) @ inc


def score_cross_products(layout: Layout, theta: np.ndarray, x: np.ndarray,
                         mean: np.ndarray | None = None, cov: np.ndarray | None = None
                         ) -> np.ndarray:
    """``Σ_i g_i g_iᵀ`` (``q × q``) of the scores of :func:`casewise_scores`."""
    out = np.zeros((layout.n_params, layout.n_params))
    for _, g in casewise_scores(layout, theta, x, mean, cov):
        out += g.T @ g
    return out


def robust_ml(layout: Layout, theta: np.ndarray, x: np.ndarray, chi_square: float,
              *, adjusted: bool = True) -> RobustML:
    """Sandwich standard errors and the Satorra–Bentler statistics of an ML fit.

    Parameters
    ----------
    layout, theta
        The model (one group, no mean structure) and its ML estimates.
    x : ndarray, N × p
        The complete data, columns in ``layout.items`` order.
    chi_square : float
        The ML statistic ``T = 2(ℓ_sat − ℓ)``.
    adjusted : bool
        Also compute ``tr((UΓ)²)`` for the mean-and-variance adjusted
        statistic (:func:`scalewright.estimate.variance_trace.variance_trace`:
        exact on every row up to its stated budget, beyond it from a seeded
        subsample, which ``notes`` then says); when False, ``trace_squared``
        is NaN.

    Returns
    -------
    RobustML

    References
    ----------
    Satorra & Bentler (1994); Huber (1967); White (1982) — see the module docstring.
    """
    pattern = _single_pattern(layout)
    n, p = x.shape
    mats = pattern.matrices(theta)
    v = spd_inverse(mats.implied_cov)
    mean = x.mean(axis=0)
    s = np.cov(x, rowvar=False, bias=True)
    a, b, _ = cell_derivatives(pattern, mats)
    inc = incidence(pattern, layout.n_params)
    info = inc.T @ expected_information(a, b, v) @ inc
    info_inv = spd_inverse(info)
    meat = score_cross_products(layout, theta, x, mean, s) / n
    acov = info_inv @ meat @ info_inv / n
    trace = _mean_case_norm(x, mean, v, s) - float(np.sum(info_inv * meat))
    trace_squared, rows, notes = float("nan"), None, ()
    if adjusted:
        variance = variance_trace(x, mean, s, v, a, b, inc, info)
        trace_squared = variance.value
        if variance.subsample:
            rows, notes = variance.rows, (variance.note(p),)
    return RobustML(acov, RobustTest(float(chi_square), layout.df(), float(trace),
                                     float(trace_squared), rows), notes)


def _mean_case_norm(x, mean, v, s) -> float:
    """``(1/N) Σ_i ½ tr((V E_i)²)`` with ``E_i = c_i c_iᵀ − S``, by the casewise identity
    ``½(c_iᵀVc_i)² − c_iᵀVSVc_i + ½ tr((VS)²)``."""
    vsv = v @ s @ v
    vs = v @ s
    total = 0.0
    for start in range(0, len(x), CHUNK):
        c = x[start:start + CHUNK] - mean
        q = np.einsum("ij,ij->i", c @ v, c)
        r = np.einsum("ij,ij->i", c @ vsv, c)
        total += float(np.sum(0.5 * q * q - r))
    return total / len(x) + 0.5 * float(np.sum(vs * vs.T))


def independence_layout(items: tuple[str, ...], variances: np.ndarray,
                        name: str = "independence") -> Layout:
    """The baseline model: every item has its own free variance, all
    covariances are zero (Bentler 1990)."""
    p = len(items)
    empty = Cells.from_triples([])
    fixed = Matrices(np.zeros((p, 0)), np.zeros((0, 0)), np.zeros((0, 0)), np.zeros((p, p)),
                     np.zeros(p), np.zeros(0))
    residuals = Cells.from_triples([(i, i, i) for i in range(p)])
    pattern = Pattern(fixed, empty, empty, empty, residuals, empty, empty)
    params = tuple(Param(RESIDUAL_COV, it, it) for it in items)
    return Layout(name=name, items=tuple(items), factors=(), kinds=(), primary={},
                  patterns=(pattern,), params=params, start=np.asarray(variances, float))


def baseline_test(x: np.ndarray, items: tuple[str, ...]) -> RobustTest:
    """The robust test of the independence model on complete data ``x``
    (its ML estimates are the item variances, divisor N)."""
    s = np.cov(x, rowvar=False, bias=True)
    variances = np.diag(s).copy()
    layout = independence_layout(items, variances)
    chi2 = len(x) * (np.sum(np.log(variances)) - np.linalg.slogdet(s)[1])
    return robust_ml(layout, variances, x, chi2, adjusted=False).test


def robust_fit_indices(model: RobustTest, baseline: RobustTest, n: int,
                       groups: int = 1) -> dict:
    """Robust CFI, TLI and RMSEA (with its 90% interval).

    With ``c`` and ``c_B`` the scaling factors of the model and the baseline,
    the population-corrected versions replace ``T − df`` by
    ``T − c·df = c(T_SB − df)`` (Brosseau-Liard & Savalei 2014):

        CFI_r = 1 − max(T − c·df, 0) / max(T − c·df, T_B − c_B·df_B, 0)
        TLI_r = 1 − [(T − c·df)/df] / [(T_B − c_B·df_B)/df_B]

    and (Brosseau-Liard, Savalei & Li 2012)

        RMSEA_r = √(max(T − c·df, 0) / (df (N − 1))) = √c · RMSEA(T_SB),

    whose 90% interval is the interval of RMSEA computed from ``T_SB``,
    multiplied by ``√c``.

    References
    ----------
    Brosseau-Liard, Savalei & Li (2012); Brosseau-Liard & Savalei (2014).
    """
    c, c_b = model.scaling_factor, baseline.scaling_factor
    t_sb, tb_sb = model.chi_square_scaled, baseline.chi_square_scaled
    # comparative_fit(T*, df, T_B*, df_B) with T* = c(T_SB − df) + df reproduces both formulas
    cfi, _ = comparative_fit(c * (t_sb - model.df), 0.0, c_b * (tb_sb - baseline.df), 0.0)
    tli = 1.0 - (c * (t_sb - model.df) / model.df) / (c_b * (tb_sb - baseline.df) / baseline.df) \
        if model.df > 0 else float("nan")
    lo, hi = rmsea_interval(t_sb, model.df, n, 0.90, groups)
    return {"cfi_robust": _num(cfi), "tli_robust": _num(tli),
            "rmsea_robust": _num(np.sqrt(c) * rmsea(t_sb, model.df, n, groups)),
            "rmsea_robust_ci90": [_num(np.sqrt(c) * lo), _num(np.sqrt(c) * hi)]}
