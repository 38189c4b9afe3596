"""Fisher scoring with a secant correction, Newton steps where the exact
Hessian is available, and a backtracking line search.

Each step solves ``H Δ = g(θ)`` and halves the step until the objective
falls by at least a small fraction of the predicted decrease (Armijo's rule;
Nocedal & Wright 2006, ch. 3).  ``H`` is the expected information ``I(θ)``
plus a correction ``C`` kept by the structured BFGS update (Dennis, Gay &
Welsch 1981): after a step ``s`` with gradient change ``y``, the matrix
``B = I(θ_new) + C`` is updated to ``B − BssᵀB/(sᵀBs) + yyᵀ/(yᵀs)`` so that it
satisfies the secant equation ``B s = y``, and ``C = B − I(θ_new)``.  Plain
Fisher scoring (Jennrich & Sampson 1976) converges only linearly when the
model does not fit exactly, because the expected information then differs
from the Hessian by a term proportional to the misfit; the correction learns
that term and restores fast convergence.  The correction is dropped
whenever it makes the matrix indefinite or a full step fails the line
search, so the method never does worse than plain Fisher scoring for long.

Where the objective can give its exact Hessian (normal-theory ML on complete
data without a mean structure, :mod:`scalewright.estimate.exact_hessian`;
DWLS, :mod:`scalewright.estimate.dwls`),
the steps after a full step are Newton steps, which converge quadratically:
at 100 items and 10 constructs three or four iterations instead of six.
The last Newton step's factored Hessian is kept for the next steps (chord
steps) where they are predicted to pay (:func:`_keep_factor`): in a warm
refit (a model one item smaller, started from the larger model's solution)
while each step shrinks the gradient at least fourfold, which at 100-200
items saves most of its Hessians (each costs about two gradients) for one
or two more steps; in a fit from ordinary start values where two chord steps
are predicted to finish, which replaces the last Hessian by a second, cheap
step.

References
----------
Jennrich, R. I. & Sampson, P. F. (1976). Newton-Raphson and related
algorithms for maximum likelihood variance component estimation.
Technometrics 18, 11–17.
Nocedal, J. & Wright, S. J. (2006). Numerical Optimization (2nd ed.). Springer.
Kelley, C. T. (1995). Iterative Methods for Linear and Nonlinear Equations.
SIAM (ch. 5: Newton's method and the chord method).
Dennis, J. E., Gay, D. M. & Welsch, R. E. (1981). An adaptive nonlinear
least-squares algorithm. ACM Transactions on Mathematical Software 7, 348–368.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np
from scipy.linalg import lapack


#: chord steps (Kelley 1995, ch. 5) go on only while each shrinks the largest gradient
#: element at least this much (:func:`_keep_factor`)
CHORD_CONTRACTION = 0.25

#: relative size of the rounding error in an objective value: a few hundred
#: additions of products each off by machine epsilon (common practice, no source)
_ROUNDING = 64 * np.finfo(float).eps


@dataclass(frozen=True)
class OptimizerRecord:
    """How the optimiser ended."""

    converged: bool
    iterations: int
    gradient_norm: float   # largest absolute gradient element at the end
    objective: float
    message: str

    def to_dict(self) -> dict:
        return {"converged": self.converged, "iterations": self.iterations,
                "gradient_norm": self.gradient_norm, "objective": self.objective,
                "message": self.message}


def fisher_scoring(theta0: np.ndarray,
                   value: Callable[[np.ndarray], float],
                   value_grad_info: Callable[[np.ndarray], tuple[float, np.ndarray, np.ndarray]],
                   *, max_iter: int = 500, grad_tol: float = 1e-8, step_tol: float = 1e-11,
                   value_grad_hessian: Callable[[np.ndarray], tuple | None] | None = None,
                   warm: bool = False) -> tuple[np.ndarray, OptimizerRecord]:
    """Minimise ``value`` by Fisher scoring, switching to Newton's method
    where the exact Hessian is available (``value_grad_hessian`` returns
    ``f``, ``g`` and a function computing ``H`` at the same point, or None
    where the Hessian is not available).

    Newton steps are used after a full Fisher or Newton step, i.e. once the
    quadratic model predicts well, and from the first step when ``warm``
    (the start is a nearby solution, e.g. of a model with one more item); a
    Hessian that is not positive definite, or a step the line search had to
    shorten, sends the next iteration back to Fisher scoring.  Near the optimum Newton's method converges
    quadratically where Fisher scoring converges linearly (module docstring).

    Stops when the largest absolute gradient element is below ``grad_tol``
    or the largest step component is below ``step_tol`` (relative to
    ``1 + |θ|``).  ``value`` returns ``inf`` where the model is undefined
    (an implied covariance that is not positive definite); the line search
    then shortens the step.
    """
    theta = np.array(theta0, dtype=float)
    exact = None if value_grad_hessian is None or not warm else value_grad_hessian(theta)
    if exact is None:
        f, grad, info = value_grad_info(theta)
        hessian = None
    else:
        f, grad, hessian = exact
    if not np.isfinite(f):
        return theta, OptimizerRecord(False, 0, float("nan"), f,
                                      "the start values give an implied covariance matrix "
                                      "that is not positive definite")
    correction = _Correction()
    factor, chord = None, False        # the last Newton step's Hessian factor; reuse it next?
    gnorm = _largest(grad)
    for iteration in range(1, max_iter + 1):
        step, took = None, "fisher"
        if hessian is not None:
            if not chord:
                factor = _factor(hessian())
            if factor is not None:
                step, took = _cho_solve(factor, grad), "chord" if chord else "newton"
        if step is None and hessian is not None:   # Hessian not positive definite here
            f, grad, info = value_grad_info(theta)
            correction = _Correction()
        if step is None:
            step = _solve(correction.added_to(info), grad)
        if step is None:          # the corrected matrix lost definiteness: drop the correction
            correction = _Correction()
            step = _solve(info, grad)
        if step is None:
            step = np.linalg.lstsq(info, grad, rcond=None)[0]
        slope = float(grad @ step)
        if slope <= 0:   # information not positive definite here: fall back to the gradient
            step, slope = grad.copy(), float(grad @ grad)
        # near the minimum the predicted decrease falls below the rounding error of f,
        # where Armijo's test is decided by rounding alone: the full step is then taken
        # unless f rises by more than rounding (the steps are quadratically convergent
        # there, so halving them only slows the last iterations down)
        rounding = _ROUNDING * max(1.0, abs(f))
        below_rounding = slope <= rounding
        t = 1.0
        while True:
            candidate = theta - t * step
            f_new = value(candidate)
            if np.isfinite(f_new) and (f_new <= f - 1e-4 * t * slope
                                       or below_rounding and f_new <= f + rounding):
                break
            t *= 0.5
            if t < 1e-10:
                ok = gnorm < 1e-6
                return theta, OptimizerRecord(
                    ok, iteration, gnorm, f,
                    "converged (no further decrease possible)" if ok else
                    "the line search could not decrease the objective")
        s_vec = -t * step
        theta = candidate
        grad_old = grad
        exact = (None if value_grad_hessian is None or t < 1.0
                 else value_grad_hessian(theta))
        if exact is not None:
            f, grad, hessian = exact      # the Hessian is computed only if another step is needed
            correction = _Correction()
        else:
            hessian = None
            f, grad, info = value_grad_info(theta)
            if t < 1.0:           # a shortened step: the correction misled, start it afresh
                correction = _Correction()
            else:
                correction = correction.updated(info, s_vec, grad - grad_old)
        previous, gnorm = gnorm, _largest(grad)
        shrink = gnorm / previous if previous > 0 else 0.0
        chord = exact is not None and _keep_factor(took, shrink, gnorm, grad_tol, warm)
        small_step = np.max(np.abs(t * step) / (1.0 + np.abs(theta)), initial=0.0) < step_tol
        if gnorm < grad_tol or (small_step and gnorm < 1e-6):
            return theta, OptimizerRecord(True, iteration, gnorm, f, "converged")
    return theta, OptimizerRecord(False, max_iter, gnorm, f,
                                  f"stopped after {max_iter} iterations")


def _largest(grad: np.ndarray) -> float:
    """The largest absolute gradient element (0 without parameters)."""
    return float(np.max(np.abs(grad))) if grad.size else 0.0


def _keep_factor(took: str, shrink: float, gnorm: float, grad_tol: float, warm: bool) -> bool:
    """Whether the next step reuses the last Newton step's Hessian factor (a
    chord step) after a step of kind ``took`` shrank the largest gradient
    element by the factor ``shrink`` to ``gnorm``.

    Near the optimum (error ``e``, Hessian Lipschitz constant ``γ``), a Newton
    step from error ``e₀`` leaves ``e₁ ≈ ½γ‖H⁻¹‖e₀²``, and chord steps with
    that step's Hessian then contract the error by ``γ‖H⁻¹‖e₀ = 2 e₁/e₀``
    each (Kelley 1995, ch. 5), so the Newton step's own shrink ``r``
    predicts the chord steps' ``2r``.  A chord step costs one value and one
    gradient; a Newton step costs those plus a Hessian (about two gradients)
    and its factorisation.  A fit from ordinary start values therefore takes
    chord steps only when two of them are predicted to reach ``grad_tol``
    (``gnorm · (2r)² < grad_tol``); a warm refit, whose first Newton step
    starts close, takes them whenever the gradient shrank at least
    :data:`CHORD_CONTRACTION`-fold.  Either keeps them only while each
    shrinks the gradient that much."""
    if took == "chord":
        return shrink <= CHORD_CONTRACTION
    if took != "newton" or shrink > CHORD_CONTRACTION:
        return False
    return warm or gnorm * (2.0 * shrink) ** 2 < grad_tol


@dataclass(frozen=True)
class _Correction:
    """The correction ``C`` of the module docstring as a dense part plus its
    latest rank-one terms, ``C = base + Σ_j sign_j u_j u_jᵀ``.

    Each structured BFGS update adds two rank-one terms; kept as vectors they
    cost ``O(q)`` per update instead of several passes over a ``q × q``
    matrix.  Past :data:`_MAX_TERMS` terms they are folded into ``base``."""

    base: np.ndarray | None = None
    vectors: tuple[np.ndarray, ...] = ()
    signs: tuple[float, ...] = ()

    def added_to(self, info: np.ndarray) -> np.ndarray:
        """``I + C``."""
        out = info if self.base is None else info + self.base
        if self.vectors:
            u = np.column_stack(self.vectors)
            out = out + (u * np.array(self.signs)) @ u.T
        return out

    def times(self, s: np.ndarray) -> np.ndarray:
        """``C s``."""
        out = np.zeros_like(s) if self.base is None else self.base @ s
        for sign, u in zip(self.signs, self.vectors):
            out += sign * (u @ s) * u
        return out

    def updated(self, info: np.ndarray, s: np.ndarray, y: np.ndarray) -> "_Correction":
        """Structured BFGS update after step ``s`` with gradient change ``y``
        (module docstring): ``C − BssᵀB/(sᵀBs) + yyᵀ/(yᵀs)`` with ``B = I + C``."""
        ys = float(y @ s)
        bs = info @ s + self.times(s)
        sbs = float(s @ bs)
        if ys <= 1e-12 * np.linalg.norm(y) * np.linalg.norm(s) or sbs <= 0:
            return self            # no curvature information: keep the old correction
        vectors = self.vectors + (bs / np.sqrt(sbs), y / np.sqrt(ys))
        signs = self.signs + (-1.0, 1.0)
        if len(vectors) <= _MAX_TERMS:
            return _Correction(self.base, vectors, signs)
        folded = _Correction(None, vectors, signs).added_to(
            np.zeros((len(s), len(s))) if self.base is None else self.base)
        return _Correction(folded)


#: rank-one terms of the correction kept as vectors before they are folded into a matrix
_MAX_TERMS = 32


def _factor(matrix: np.ndarray) -> np.ndarray | None:
    """A Cholesky factor of the symmetric ``matrix`` (LAPACK ``potrf``), or None
    when it is not positive definite.

    A symmetric C-ordered matrix is its own transpose, which is
    Fortran-ordered: factoring ``matrix.T`` makes LAPACK's working copy a
    plain copy instead of a transposing one.  Only the factor's lower
    triangle (``uplo="L"``) is meaningful."""
    factor, info = lapack.dpotrf(matrix.T, lower=True, clean=False)
    return factor if info == 0 else None


def _cho_solve(factor: np.ndarray, grad: np.ndarray) -> np.ndarray:
    """``(LLᵀ)⁻¹ grad`` from :func:`_factor`'s ``L`` (LAPACK ``potrs``)."""
    return lapack.dpotrs(factor, grad, lower=True)[0]


def _solve(matrix: np.ndarray, grad: np.ndarray) -> np.ndarray | None:
    """``matrix⁻¹ grad`` by Cholesky, or None when the matrix is not positive definite."""
    factor = _factor(matrix)
    return None if factor is None else _cho_solve(factor, grad)
