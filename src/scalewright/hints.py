"""Modification hints: a score test (modification index) with the expected
parameter change for every loading and residual covariance the model fixes
at zero.

The engine minimises ``f(θ) = −ℓ(θ)/N`` (:mod:`scalewright.estimate.normal`),
with per-case expected information ``I``.  For one candidate parameter ``c``
fixed at zero, with ``F`` the free parameters and everything evaluated at the
fitted (restricted) solution:

    g_c   = ∂f/∂c                                   (gradient; g_F = 0 at the optimum)
    I_c·F = I_cc − I_cF I_FF⁻¹ I_Fc                (information of c net of the free parameters)
    MI    = N g_c² / I_c·F                          (Sörbom 1989; 1-df score test)
    EPC   = −g_c / I_c·F                            (Saris, Satorra & Sörbom 1987)

``MI`` is the Lagrange-multiplier (score) statistic ``S' (N I)⁻¹ S`` of the
model with ``c`` freed, where the score ``S = −N g`` has its one non-zero
entry at ``c`` (``1/I_c·F`` is that entry of the inverse information), so it
estimates the drop in the chi-square if ``c`` were freed.  ``EPC`` is the
one Fisher-scoring step ``−I⁻¹g`` from the restricted solution in the freed
model, i.e. the estimate ``c`` would take, to first order.  Both assume the
model converged (``g_F = 0``).

Fits by DWLS (ordinal and mixed items) have their own tests with the same
candidates and the same :class:`ScoreTests` in :mod:`scalewright.hints_dwls`.

Speed.  Every candidate's derivative ``∂Σ/∂c`` is of rank two,
``a bᵀ + b aᵀ`` (:func:`scalewright.layout.cell_derivatives`): a loading
``Λ[i, j]`` has ``a = e_i, b = G[:, j]`` (``G = ΛAΨAᵀ``) and ``∂μ = e_i κ_j``;
a residual covariance ``Θ[i, k]`` has ``a = e_i, b = e_k``.  With ``V = Σ⁻¹``,
``r = x̄ − μ`` and ``E = V(Σ − S − r rᵀ)V`` per data block (``r = 0`` without a
mean structure),

    g_c      = a_cᵀ E b_c − (∂μ_c)ᵀ V r
    I[c, d]  = (a_cᵀVa_d)(b_cᵀVb_d) + (a_cᵀVb_d)(b_cᵀVa_d) + (∂μ_c)ᵀ V ∂μ_d,

and because every ``a_c`` is a unit vector these are row gathers of the
``p × n`` products ``VA``, ``VB`` and ``GᵀVA``, ``GᵀVB`` of the free cells.
Nothing of size ``p² × (number of candidates)`` is built: 100 items on 10
factors (about 6,000 candidates) take a fraction of a second
(``benchmarks/bench_hints.py``).

References
----------
Sörbom, D. (1989). Model modification. Psychometrika 54, 371–384.
Saris, W. E., Satorra, A. & Sörbom, D. (1987). The detection and correction
of specification errors in structural equation models. Sociological
Methodology 17, 105–129.
Kaplan, D. (1989). Model modification in covariance structure analysis:
application of the expected parameter change statistic. Multivariate
Behavioral Research 24, 285–305 (standardized EPC).
MacCallum, R. C., Roznowski, M. & Necowitz, L. B. (1992). Model modifications
in covariance structure analysis: the problem of capitalization on chance.
Psychological Bulletin 111, 490–504.
Saris, W. E., Satorra, A. & van der Veen, W. M. (2009). Testing structural
equation models or detection of misspecifications? Structural Equation
Modeling 16, 561–582.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy import linalg
from scipy.linalg import blas

from scalewright.blas import one_blas_thread
from scalewright.estimate.normal import NormalFit
from scalewright.estimate.result import Estimate
from scalewright.estimate.spd_inverse import spd_inverse
from scalewright.layout import LOADING, RESIDUAL_COV, Matrices, Pattern, cell_derivatives

#: a candidate whose information net of the free parameters is below this
#: share of its own information is not identified next to them (its index is undefined)
_NOT_IDENTIFIED = 1e-8

#: how the ML route's indices are computed, as the notes name it
METHOD = "score tests under normal-theory maximum likelihood (Sörbom 1989)"

CAUTION = (
    "These hints come from the same answers the model was fitted to. Freeing a "
    "parameter because its index is large capitalises on chance: such changes often fail "
    "to hold in a new sample (MacCallum, Roznowski & Necowitz 1992). Free a parameter "
    "only for a reason about the items or constructs that you would defend without these "
    "numbers, report it as a change from the model specified first, and confirm the "
    "changed model on new data.")

JUDGE_BY_CHANGE = (
    "Judge a hint by its expected change (EPC), not by the index alone: with many "
    "answers a trivial misspecification gives a large index, and with few answers a "
    "large one can give a small index (Saris, Satorra & van der Veen 2009). The "
    "standardized EPC is on the scale of a standardized loading or of a residual "
    "correlation.")


@dataclass(frozen=True)
class ScoreTests:
    """Score tests of every candidate, as parallel arrays.

    ``kind`` is ``"loading"`` or ``"residual_covariance"``; ``row`` is the
    item; ``col`` the factor (loading) or the second item (residual
    covariance); ``group`` indexes ``layout.patterns``.  Candidates that are
    not identified next to the free parameters are left out and counted in
    ``n_undefined``.  ``mi`` is the statistic compared with χ²₁ (and the
    hint threshold); where it is a scaled version of the plain index, as
    under DWLS (:mod:`scalewright.hints_dwls`), ``mi_unscaled`` is the plain
    one.  ``method`` names the tests and ``note`` says what a reader must
    know about the statistic (None when nothing).
    """

    kind: np.ndarray
    group: np.ndarray
    row: np.ndarray
    col: np.ndarray
    mi: np.ndarray
    epc: np.ndarray
    std_epc: np.ndarray
    n_undefined: int
    mi_unscaled: np.ndarray | None = None
    method: str = METHOD
    note: str | None = None

    def __len__(self):
        return len(self.mi)


@dataclass(frozen=True)
class Candidates:
    """Fixed-at-zero cells of one group: loadings first, then residual covariances."""

    lam_rows: np.ndarray
    lam_cols: np.ndarray
    res_rows: np.ndarray   # i > k
    res_cols: np.ndarray

    @property
    def rows(self) -> np.ndarray:
        """Row ``i`` of every candidate: its ``a`` vector is ``e_i``."""
        return np.concatenate([self.lam_rows, self.res_rows])

    def __len__(self):
        return len(self.lam_rows) + len(self.res_rows)


def open_cells(pattern: Pattern) -> Candidates:
    """Loadings and residual covariances that are neither free nor fixed at a non-zero value."""
    p, m = pattern.p, pattern.m
    lam_free = np.zeros((p, m), dtype=bool)
    lam_free[pattern.loadings.rows, pattern.loadings.cols] = True
    lam_open = ~lam_free & (pattern.fixed.loadings == 0.0)
    res_free = np.zeros((p, p), dtype=bool)
    res_free[pattern.residuals.rows, pattern.residuals.cols] = True
    res_free |= res_free.T
    res_open = ~res_free & (pattern.fixed.residuals == 0.0) & np.tri(p, k=-1, dtype=bool)
    lam_rows, lam_cols = np.nonzero(lam_open)
    res_rows, res_cols = np.nonzero(res_open)
    return Candidates(lam_rows, lam_cols, res_rows, res_cols)


def score_tests(estimate: Estimate) -> ScoreTests:
    """Modification index, EPC and standardized EPC of every loading and
    residual covariance fixed at zero, in every group.

    Parameters
    ----------
    estimate : Estimate
        A normal-theory ML estimate with its data ``blocks`` and an
        identified information matrix.

    Returns
    -------
    ScoreTests

    Notes
    -----
    Formulas in the module docstring.  The standardized EPC is the
    completely standardized change (Kaplan 1989): for a loading
    ``EPC·√Φ*_jj / √Σ̂_ii``, for a residual covariance the residual
    correlation ``EPC / √(θ_ii θ_kk)``, both at the restricted solution.

    Raises
    ------
    ValueError
        When the estimate carries no data blocks or its information matrix
        is singular (the model is not identified; no hint is defined).
    """
    if not estimate.blocks:
        raise ValueError("score tests need the data blocks the estimate was fitted to")
    if estimate.acov is None:
        raise ValueError("the information matrix is singular: the model is not identified")
    with one_blas_thread():
        return _score_tests(estimate)


def _score_tests(estimate: Estimate) -> ScoreTests:
    layout = estimate.layout
    objective = NormalFit(layout, estimate.blocks)
    _, _, info_free = objective.value_grad_info(estimate.theta)
    try:
        chol = linalg.cholesky(info_free, lower=True)
    except linalg.LinAlgError as exc:
        raise ValueError("the information matrix of the free parameters is not positive "
                         "definite: the model is not identified") from exc

    parts = [_group_scores(objective, g, pattern, pattern.matrices(estimate.theta))
             for g, pattern in enumerate(layout.patterns)]
    grad = np.concatenate([part[1] for part in parts])
    info_cc = np.concatenate([part[2] for part in parts])
    info_cf = np.vstack([part[3] for part in parts])

    # with I_FF = L Lᵀ: I_cF I_FF⁻¹ I_Fc = ‖L⁻¹I_Fc‖²; one triangular product for all
    # candidates (trmm: half the work of a general product with L⁻¹)
    l_inv = linalg.solve_triangular(chol, np.eye(len(chol)), lower=True, check_finite=False)
    whitened = blas.dtrmm(1.0, l_inv, info_cf.T, side=0, lower=1)
    net = info_cc - np.einsum("qc,qc->c", whitened, whitened)
    defined = net > _NOT_IDENTIFIED * np.abs(info_cc)
    mi = objective.n * grad[defined] ** 2 / net[defined]
    epc = -grad[defined] / net[defined]

    kind = np.concatenate([np.repeat([LOADING, RESIDUAL_COV], [len(c.lam_rows), len(c.res_rows)])
                           for c, *_ in parts])
    group = np.concatenate([np.full(len(c), g) for g, (c, *_) in enumerate(parts)])
    row = np.concatenate([c.rows for c, *_ in parts])
    col = np.concatenate([np.concatenate([c.lam_cols, c.res_cols]) for c, *_ in parts])
    scale = np.concatenate([standardizer(c, pattern.matrices(estimate.theta))
                            for (c, *_), pattern in zip(parts, layout.patterns)])
    return ScoreTests(kind[defined], group[defined], row[defined], col[defined], mi, epc,
                      epc * scale[defined], int(np.count_nonzero(~defined)))


def _group_scores(objective: NormalFit, g: int, pattern: Pattern, mats: Matrices):
    """Gradient, own information and cross-information with the free
    parameters of one group's candidates, summed over the group's blocks."""
    cand = open_cells(pattern)
    q, p, n_total = objective.layout.n_params, pattern.p, objective.n
    i_lam, j_lam, i_res, k_res = cand.lam_rows, cand.lam_cols, cand.res_rows, cand.res_cols
    n_lam, rows = len(i_lam), cand.rows
    sigma, mu = mats.implied_cov, mats.implied_mean
    big_g = mats.loadings @ mats.latent_cov                    # G = ΛAΨAᵀ, p × m
    kappa = mats.total_effects @ mats.latent_means             # κ = Aα
    free = cell_derivatives(pattern, mats)
    params = pattern.cell_params
    # one column per parameter when no two cells of this group share one, else per cell
    by_param = len(np.unique(params)) == len(params)
    if by_param:
        free = tuple(None if x is None else _spread(x, params, q) for x in free)
    a_free, b_free, dmu_free = free

    grad = np.zeros(len(cand))
    info_cc = np.zeros(len(cand))
    info = np.zeros((len(cand), a_free.shape[1]))
    for block in (b for b in objective.blocks if b.group == g):
        o = block.observed
        w = block.n / n_total
        v_o = spd_inverse(sigma[np.ix_(o, o)])
        # r = x̄_b − μ_b (zero without a mean structure, where μ_b = x̄_b)
        r = np.zeros(p)
        if pattern.has_means:
            r[o] = block.mean - mu[o]
        v, e = np.zeros((p, p)), np.zeros((p, p))     # Σ_b⁻¹ and E_b, zero outside the block's items
        v[np.ix_(o, o)] = v_o
        e[np.ix_(o, o)] = v_o @ (sigma[np.ix_(o, o)] - block.cov - np.outer(r[o], r[o])) @ v_o
        va, vb, vg = v @ a_free, v @ b_free, v @ big_g
        gva, gvb, gvg = big_g.T @ va, big_g.T @ vb, big_g.T @ vg
        diag_v = np.diag(v)
        # a_c = e_i, so a_cᵀX is row i of X; b_cᵀX is row j of GᵀX (loading) or row k of X
        info[:n_lam] += w * (va[i_lam] * gvb[j_lam] + vb[i_lam] * gva[j_lam])
        both = va[i_res]                  # in place: each candidates × q temporary of
        both *= vb[k_res]                 # the residual covariances costs more than
        other = vb[i_res]                 # its arithmetic
        other *= va[k_res]
        both += other
        both *= w
        info[n_lam:] += both
        b_v_b = np.concatenate([np.diag(gvg)[j_lam], diag_v[k_res]])
        a_v_b = np.concatenate([vg[i_lam, j_lam], v[i_res, k_res]])
        info_cc += w * (diag_v[rows] * b_v_b + a_v_b ** 2)
        eg = e @ big_g
        grad += w * np.concatenate([eg[i_lam, j_lam], e[i_res, k_res]])
        if pattern.has_means:                          # ∂μ_c = e_i κ_j (loading), 0 (residual)
            vr, vd = v @ r, v @ dmu_free
            grad[:n_lam] -= w * kappa[j_lam] * vr[i_lam]
            info[:n_lam] += w * kappa[j_lam][:, None] * vd[i_lam]
            info_cc[:n_lam] += w * kappa[j_lam] ** 2 * diag_v[i_lam]

    if not by_param:
        incidence = np.zeros((len(params), q))
        incidence[np.arange(len(params)), params] = 1.0
        info = info @ incidence
    return cand, grad, info_cc, info


def _spread(cells: np.ndarray, params: np.ndarray, q: int) -> np.ndarray:
    """Columns of free cells moved to their parameters' columns (``p × q``, zero elsewhere)."""
    out = np.zeros((cells.shape[0], q))
    out[:, params] = cells
    return out


def standardizer(cand: Candidates, mats: Matrices) -> np.ndarray:
    """Factor turning an EPC into its completely standardized size (Kaplan 1989)."""
    sd_latent = np.sqrt(np.clip(np.diag(mats.latent_cov), 0.0, None))
    sd_item = np.sqrt(np.diag(mats.implied_cov))
    theta = np.diag(mats.residuals)
    with np.errstate(divide="ignore", invalid="ignore"):
        lam = sd_latent[cand.lam_cols] / sd_item[cand.lam_rows]
        res = 1.0 / np.sqrt(theta[cand.res_rows] * theta[cand.res_cols])
    return np.concatenate([lam, res])


# --------------------------------------------------------------------------- in words

@dataclass(frozen=True)
class Hint:
    """One modification hint, named in the user's terms."""

    kind: str
    construct: str | None     # loadings
    item: str | None          # loadings
    item_a: str | None        # residual covariances
    item_b: str | None
    group: str | None         # None when the model has one group
    mi: float
    epc: float
    std_epc: float | None
    reading: str
    mi_unscaled: float | None = None   # the plain index where ``mi`` is scaled (DWLS)

    def to_dict(self) -> dict:
        out = {"kind": self.kind}
        if self.kind == LOADING:
            out.update(construct=self.construct, item=self.item)
        else:
            out.update(item_a=self.item_a, item_b=self.item_b)
        out.update(group=self.group, mi=self.mi)
        if self.mi_unscaled is not None:
            out.update(mi_unscaled=self.mi_unscaled)
        out.update(epc=self.epc, std_epc=self.std_epc, reading=self.reading)
        return out


def hints_in_words(tests: ScoreTests, estimate: Estimate, wording: dict | None = None,
                   threshold: float = 10.0) -> list[Hint]:
    """The hints whose modification index reaches ``threshold``, strongest first.

    Parameters
    ----------
    tests : ScoreTests
        From :func:`score_tests`.
    estimate : Estimate
        The estimate the tests belong to (for item and construct names).
    wording : dict, optional
        Item name → the statement as the respondents read it
        (``Study.items[item].wording``); the item name is used where missing.
    threshold : float
        Smallest index listed (``estimation: hint_threshold`` in the model
        file). The 5% critical value of chi-square on 1 df is 3.84.
    """
    layout = estimate.layout
    wording = wording or {}
    several = len(layout.patterns) > 1
    order = np.argsort(-tests.mi, kind="stable")
    order = order[tests.mi[order] >= threshold]
    out = []
    for k in order:
        group = layout.groups[tests.group[k]] if several else None
        std = float(tests.std_epc[k]) if np.isfinite(tests.std_epc[k]) else None
        unscaled = None if tests.mi_unscaled is None else float(tests.mi_unscaled[k])
        item = layout.items[tests.row[k]]
        if tests.kind[k] == LOADING:
            construct = layout.factors[tests.col[k]]
            out.append(Hint(LOADING, construct, item, None, None, group, float(tests.mi[k]),
                            float(tests.epc[k]), std,
                            _loading_reading(_said(item, wording), construct, std, group),
                            unscaled))
        else:
            other = layout.items[tests.col[k]]
            a, b = sorted((item, other), key=layout.items.index)
            out.append(Hint(RESIDUAL_COV, None, None, a, b, group, float(tests.mi[k]),
                            float(tests.epc[k]), std,
                            _pair_reading(_said(a, wording), _said(b, wording), std, group),
                            unscaled))
    return out


def _said(item: str, wording: dict) -> str:
    text = wording.get(item)
    return f"'{text.strip()}'" if text else f"item '{item}'"


def _among(group: str | None) -> str:
    return f" Among '{group}':" if group else ""


def _loading_reading(said: str, construct: str, std: float | None, group: str | None) -> str:
    text = f"{said} may also reflect {construct}"
    if std is not None and std < 0:
        text += f", in reverse (higher answers going with less {construct})"
    if std is not None:
        text += f"; its standardized loading on {construct} would be about {std:.2f}"
    return (_among(group) + " " + text).strip() + "."


def _pair_reading(said_a: str, said_b: str, std: float | None, group: str | None) -> str:
    text = (f"{said_a} and {said_b} may share something their constructs do not explain, "
            "such as similar wording or a common situation")
    if std is not None:
        text += f"; their residuals would correlate about {std:.2f}"
    return (_among(group) + " " + text).strip() + "."


def modification_hint_keys(estimate: Estimate, wording: dict | None = None,
                           threshold: float = 10.0, tests: ScoreTests | None = None,
                           compute: Callable[[Estimate], ScoreTests] = score_tests) -> dict:
    """The JSON keys ``modification_hints`` (list of hint dicts, strongest
    first) and ``modification_hint_notes`` (threshold, counts, caution, the
    tests' ``method`` and, where there is one, their ``statistic`` note) of
    one model; ``tests`` are computed by ``compute`` unless given (a
    ``ValueError`` from it becomes the note ``not_computed``)."""
    notes = {"threshold": float(threshold), "caution": CAUTION, "judging": JUDGE_BY_CHANGE}
    if tests is None:
        try:
            tests = compute(estimate)
        except ValueError as exc:
            notes.update(candidates=0, listed=0,
                         not_computed=f"No hints: {exc}. See the model's warnings.")
            return {"modification_hints": [], "modification_hint_notes": notes}
    hints = hints_in_words(tests, estimate, wording, threshold)
    notes.update(candidates=len(tests) + tests.n_undefined, listed=len(hints),
                 undefined=tests.n_undefined, method=tests.method)
    if tests.note:
        notes["statistic"] = tests.note
    if not estimate.record.converged:
        notes["not_converged"] = ("The estimation did not converge, so these indices are "
                                  "computed at a point that is not the estimate; do not act on them.")
    return {"modification_hints": [h.to_dict() for h in hints], "modification_hint_notes": notes}
