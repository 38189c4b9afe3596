"""Model-based reliability of a unit-weighted sum score: McDonald's omega and
Hancock & Mueller's coefficient H.

Omega is computed from the fitted matrices (contract with the engine):

* ``loadings`` Λ, shape (p, m), unstandardized, one column per latent variable
  (higher-order factors have all-zero columns);
* ``latent_cov`` Φ*, shape (m, m), the model-implied covariance of *all*
  latent variables (for higher-order models ``(I−B)⁻¹Ψ(I−B)⁻ᵀ``);
* ``residual_cov`` Θ, shape (p, p), including any residual covariances.

so that the model-implied item covariance is ``Σ̂ = ΛΦ*Λᵀ + Θ``.
:func:`contract_matrices` turns the three into the engine's
:class:`~scalewright.layout.Matrices`, e.g. for
:func:`scalewright.standardize.standardize`.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Sequence

import numpy as np

from scalewright.coefficient_types import Note, Record, as_index
from scalewright.layout import Matrices


def contract_matrices(loadings: np.ndarray, latent_cov: np.ndarray,
                      residual_cov: np.ndarray) -> Matrices:
    """Λ, Φ* and Θ as the engine's matrices, with ``B = 0`` and ``Ψ = Φ*``
    (so that ``Matrices.latent_cov`` is Φ*) and no mean structure.

    A higher-order model keeps its Φ* = (I−B)⁻¹Ψ(I−B)⁻ᵀ; only the implied
    moments and the standardized loadings, latent correlations and residual
    variances of the result are meaningful (its ``paths`` are zero).
    """
    loadings, latent_cov, residual_cov = (np.asarray(a, dtype=float)
                                          for a in (loadings, latent_cov, residual_cov))
    p, m = loadings.shape
    return Matrices(loadings=loadings, paths=np.zeros((m, m)), disturbances=latent_cov,
                    residuals=residual_cov, intercepts=np.zeros(p), latent_means=np.zeros(m))


def explained_variance(weights: np.ndarray, loadings: np.ndarray, latent_cov: np.ndarray,
                       columns: Sequence[int]) -> np.ndarray:
    """Variance of weighted sum scores that is linearly explained by a set of
    latent variables.

    For weights ``w`` and latent variables ``F_C`` (columns ``C``), with
    ``a = wᵀΛΦ*[:, C]`` the covariance of the score with ``F_C``:

    .. math:: V_C(w) = a\\,\\Phi^*_{CC}{}^{-1} a^\\top

    which is ``R²(score on F_C) · Var(common part)``.  With a single column
    and no cross-loadings it reduces to ``(wᵀλ_c)² φ_cc``.

    Parameters
    ----------
    weights : array_like, shape (p,) or (p, r)
        One weight vector per column (0/1 for a unit-weighted sum).
    loadings, latent_cov : array_like
        Λ (p, m) and Φ* (m, m).
    columns : sequence of int
        The latent variables ``C``.

    Returns
    -------
    ndarray, shape (r,) (or a 0-d array for a single weight vector)

    References
    ----------
    McDonald, R. P. (1999). *Test theory: A unified treatment*. Erlbaum,
    ch. 6 (variance of a composite explained by common factors).
    """
    weights = np.asarray(weights, dtype=float)
    columns = as_index(columns, latent_cov.shape[0], "latent columns")
    cov_with = weights.T @ loadings @ latent_cov[:, columns]          # (r, |C|)
    solved = np.linalg.solve(latent_cov[np.ix_(columns, columns)], cov_with.T).T
    return np.sum(solved * cov_with, axis=-1)


@dataclass(frozen=True)
class OmegaResult(Record):
    """Omega coefficients of one construct's unit-weighted sum score.

    Attributes
    ----------
    omega_total : float
        Common variance of the sum (all common factors) over its
        model-implied variance ``1ᵀΣ̂1``.
    omega_construct : float
        Variance of the sum explained by the target construct alone over
        ``1ᵀΣ̂1``; equals ``omega_total`` when the items load on the
        construct only.
    omega_total_observed : float
        Common variance over the observed variance ``1ᵀS1``; NaN when no
        sample covariance was given.
    """

    construct: str
    items: tuple[str, ...]
    omega_total: float
    omega_construct: float
    omega_total_observed: float
    common_variance: float
    construct_variance: float
    implied_total_variance: float
    observed_total_variance: float
    notes: tuple[Note, ...]


def omega_total(loadings: np.ndarray, latent_cov: np.ndarray, residual_cov: np.ndarray,
                items: Sequence[int], factor: int, *, item_names: Sequence[str],
                construct: str, sample_cov: np.ndarray | None = None) -> OmegaResult:
    """McDonald's omega for the unit-weighted sum of ``items``.

    With ``w`` the 0/1 vector of the construct's items and
    ``Σ̂ = ΛΦ*Λᵀ + Θ``:

    .. math::
        \\omega_{total} = \\frac{w^\\top \\Lambda\\Phi^*\\Lambda^\\top w}{w^\\top\\hat\\Sigma w},
        \\qquad
        \\omega_{construct} = \\frac{(w^\\top\\Lambda\\Phi^*_{\\cdot c})^2/\\phi^*_{cc}}{w^\\top\\hat\\Sigma w}

    *Numerator.*  ``omega_total`` counts all common variance of the sum,
    including variance from other constructs its items cross-load on: it is
    the reliability of the sum score as a measure of whatever the common
    factors measure (McDonald 1999).  ``omega_construct`` counts only the
    variance of the sum predictable from the target construct, i.e.
    ``ρ²(sum, F_c)·1ᵀΣ̂1``: the reliability of the sum *as a measure of this
    construct*.  Without cross-loadings the two are equal,
    ``(Σλ)²φ_cc / 1ᵀΣ̂1``.

    *Denominator.*  The model-implied variance ``1ᵀΣ̂1`` keeps numerator and
    denominator on the same model and makes omega bounded by 1; it contains
    the residual covariances among the items, which are treated as error
    because they are not shared through the construct (Raykov 2001).  When
    ``sample_cov`` is given, ``omega_total_observed`` uses the observed sum
    variance ``1ᵀS1`` instead (it differs from the implied version by the
    model's misfit in the sum).

    Parameters
    ----------
    loadings, latent_cov, residual_cov : ndarray
        Λ (p, m), Φ* (m, m) and Θ (p, p) of the fitted model.
    items : sequence of int
        Rows of the items in the construct's sum score.
    factor : int
        Column of the target construct.
    item_names : sequence of str
        Names of the items in ``items``, same order.
    construct : str
        Name of the construct, for notes.
    sample_cov : ndarray, optional
        Observed covariance matrix S (p, p).

    Notes
    -----
    A note ``"two_items"`` is attached for a construct with two items: its
    loadings are then identified only through the other constructs, and
    omega rests on them.

    References
    ----------
    McDonald, R. P. (1999). *Test theory: A unified treatment*. Erlbaum.
    Raykov, T. (2001). Bias of coefficient alpha for fixed congeneric
    measures with correlated errors. *Applied Psychological Measurement*,
    25, 69–76.
    """
    loadings, latent_cov, residual_cov = (np.asarray(a, dtype=float)
                                          for a in (loadings, latent_cov, residual_cov))
    p = loadings.shape[0]
    rows = as_index(items, p, "items")
    if len(item_names) != rows.size:
        raise ValueError(f"{len(item_names)} item names for {rows.size} items")
    w = np.zeros(p)
    w[rows] = 1.0
    common = float(w @ loadings @ latent_cov @ loadings.T @ w)
    implied_total = common + float(w @ residual_cov @ w)
    own = float(explained_variance(w, loadings, latent_cov, [factor]))
    observed_total = np.nan if sample_cov is None else float(w @ np.asarray(sample_cov) @ w)
    return OmegaResult(construct=construct, items=tuple(item_names),
                       omega_total=common / implied_total,
                       omega_construct=own / implied_total,
                       omega_total_observed=common / observed_total,
                       common_variance=common, construct_variance=own,
                       implied_total_variance=implied_total,
                       observed_total_variance=observed_total,
                       notes=two_item_notes(construct, item_names))


def two_item_notes(construct: str, item_names: Sequence[str]) -> tuple[Note, ...]:
    """A ``"two_items"`` note for a construct measured by two items, else none."""
    if len(item_names) != 2:
        return ()
    return (Note(code="two_items", subject=construct, items=tuple(item_names), message=(
        f"Construct '{construct}' has only two items ('{item_names[0]}', '{item_names[1]}'). "
        "Its loadings are identified only through its correlations with other constructs, so "
        "omega rests on few numbers here and can change a lot with small changes in the data; "
        "report it with that caution, or add items to the construct.")),)


def coefficient_h(standardized_loadings: np.ndarray) -> float:
    """Coefficient H (maximal reliability) of a factor from its standardized
    loadings.

    .. math:: H = \\Bigl(1 + \\Bigl[\\sum_i \\frac{\\lambda_i^2}{1-\\lambda_i^2}\\Bigr]^{-1}\\Bigr)^{-1}

    H is the reliability of the optimally weighted sum of the items, the
    squared correlation between the factor and that composite; its variance
    reference is the factor's (unit) variance, so it does not depend on the
    unit-weighted sum.  Returns NaN when a standardized loading is 1 or more
    in absolute value (an improper solution), where H is not defined.

    References
    ----------
    Hancock, G. R., & Mueller, R. O. (2001). Rethinking construct
    reliability within latent variable systems. In R. Cudeck et al. (Eds.),
    *Structural equation modeling: Present and future* (pp. 195–216).
    """
    lam2 = np.asarray(standardized_loadings, dtype=float) ** 2
    if np.any(lam2 >= 1.0):
        return float("nan")
    return float(1.0 / (1.0 + 1.0 / np.sum(lam2 / (1.0 - lam2))))
