"""Holzinger & Swineford (1939) by school, as a two-group ML fit written out
here, independent of the engine: the outside reference for the invariance
steps, score tests, latent comparisons and robust multi-sample statistics
(tests/test_reported_numbers.py, tests/test_invariance.py).
"""

from __future__ import annotations

import numpy as np
import semopy
from scipy import linalg

import holzinger as hz

SCHOOLS = ("Grant-White", "Pasteur")


def duplication(p):
    """D with vec(A) = D vech(A) for symmetric A (Magnus & Neudecker 1999)."""
    rows, cols = np.tril_indices(p)
    d = np.zeros((p * p, len(rows)))
    d[rows * p + cols, np.arange(len(rows))] = 1.0
    d[cols * p + rows, np.arange(len(rows))] = 1.0
    return d


class TwoGroupReference:
    """ML of the Holzinger–Swineford three-factor model in the two schools,
    written out here: unit-variance scaling in the reference group
    (Grant-White: latent variances 1, means 0), loadings equal, intercepts
    equal except ``free_intercepts`` (and, when any intercept is equal, the
    other group's latent means free), residual variances per group. The
    discrepancy Σ_g n_g[log|Σ_g| + tr(Σ_g⁻¹(S_g + r_g r_gᵀ))] is minimised by
    Fisher scoring with the moments' Jacobian by central differences (exact up
    to rounding: the moments are polynomials of degree two); the covariance
    of the estimates is the inverse expected information (Σ_g n_g ...)⁻¹."""

    P = 9

    def __init__(self, shared_intercepts: bool, free_intercepts=(), targets=None):
        """``targets``: per group the (mean, ÷n covariance) the model is fitted to,
        by default the school's sample moments (Satorra & Bentler 2010 fit the
        less constrained model to a constrained model's implied moments)."""
        frame = semopy.examples.holzinger39.get_data()
        self.groups = [frame[frame.school == s][hz.ITEMS].to_numpy(float) for s in SCHOOLS]
        self.targets = targets or [(x.mean(axis=0), np.cov(x, rowvar=False, bias=True))
                                   for x in self.groups]
        self.shared = shared_intercepts
        self.free = [hz.ITEMS.index(i) for i in free_intercepts]
        self.factor_of = np.repeat(np.arange(3), 3)
        self.lower = np.tril_indices(3, -1)
        n_nu = self.P + len(self.free) if shared_intercepts else 2 * self.P
        # λ (9), ν, ref correlations (3), other group: Φ lower with diagonal (6), κ (3), Θ (18)
        self.sizes = [9, n_nu, 3, 6, 3 if shared_intercepts else 0, 18]
        self.theta = self.fit()

    def unpack(self, t):
        lam_v, nu_v, r_ref, phi_v, kappa_v, th_v = np.split(t, np.cumsum(self.sizes)[:-1])
        lam = np.zeros((self.P, 3))
        lam[np.arange(self.P), self.factor_of] = lam_v
        if self.shared:
            nu = [nu_v[:self.P].copy(), nu_v[:self.P].copy()]
            nu[1][self.free] = nu_v[self.P:]
        else:
            nu = [nu_v[:self.P], nu_v[self.P:]]
        phi_ref = np.eye(3)
        phi_ref[self.lower] = phi_ref[self.lower[::-1]] = r_ref
        phi_other = np.zeros((3, 3))
        phi_other[np.tril_indices(3)] = phi_v
        phi_other = phi_other + np.tril(phi_other, -1).T
        kappa = [np.zeros(3), kappa_v if self.shared else np.zeros(3)]
        phis = [phi_ref, phi_other]
        sigmas = [lam @ phis[g] @ lam.T + np.diag(th_v[9 * g:9 * g + 9]) for g in (0, 1)]
        mus = [nu[g] + lam @ kappa[g] for g in (0, 1)]
        return sigmas, mus, phis, kappa

    def moments(self, t):
        sigmas, mus, _, _ = self.unpack(t)
        return np.concatenate([np.concatenate([s.ravel(), m]) for s, m in zip(sigmas, mus)])

    def jacobian(self, f, t, h=1e-3):
        cols = [(f(t + e) - f(t - e)) / (2 * h) for e in np.eye(len(t)) * h]
        return np.stack(cols, axis=-1)

    def pieces(self, t):
        """Gradient of the discrepancy and expected information, per group summed."""
        sigmas, mus, _, _ = self.unpack(t)
        jac = self.jacobian(self.moments, t)
        grad, info, start = np.zeros(len(t)), np.zeros((len(t), len(t))), 0
        for x, (mean, cov), sigma, mu in zip(self.groups, self.targets, sigmas, mus):
            n, p = x.shape
            v = np.linalg.inv(sigma)
            r = mean - mu
            s = cov + np.outer(r, r)
            d_sigma = jac[start:start + p * p]
            d_mu = jac[start + p * p:start + p * p + p]
            start += p * p + p
            grad += n * (d_sigma.T @ (v - v @ s @ v).ravel() - 2 * d_mu.T @ v @ r)
            info += n * (d_sigma.T @ np.kron(v, v) @ d_sigma + 2 * d_mu.T @ v @ d_mu)
        return grad, info / 2

    def fit(self):
        t = np.concatenate([np.full(9, 0.8), np.concatenate([x.mean(axis=0) for x in self.groups])
                            if not self.shared else self.groups[0].mean(axis=0),
                            np.full(len(self.free), 0.0), np.full(3, 0.3),
                            [1, 0.3, 1, 0.3, 0.3, 1], np.zeros(3 if self.shared else 0),
                            np.full(18, 0.5)])
        if self.shared:
            t[9 + 9:9 + 9 + len(self.free)] = self.groups[1].mean(axis=0)[self.free]
        for _ in range(200):
            grad, info = self.pieces(t)
            step = np.linalg.solve(info, grad) / 2
            t = t - step
            if np.max(np.abs(step)) < 1e-11:
                break
        self.grad, info = self.pieces(t)
        self.acov = np.linalg.inv(info)
        return t

    def chi_square(self):
        sigmas, mus, _, _ = self.unpack(self.theta)
        total = 0.0
        for x, sigma, mu in zip(self.groups, sigmas, mus):
            n, p = x.shape
            s = np.cov(x, rowvar=False, bias=True)
            r = x.mean(axis=0) - mu
            total += n * (np.linalg.slogdet(sigma)[1] + np.trace(np.linalg.solve(sigma, s))
                          + r @ np.linalg.solve(sigma, r) - np.linalg.slogdet(s)[1] - p)
        return total

    def value_and_se(self, f):
        jac = self.jacobian(lambda t: f(*self.unpack(t)), self.theta, h=1e-6)
        return f(*self.unpack(self.theta)), np.sqrt(np.einsum("ik,kl,il->i", jac, self.acov,
                                                              jac))


def two_group_robust_pieces(fitted: TwoGroupReference):
    """Satorra (1993) multi-sample traces and the sandwich covariance, from the
    textbook matrices: per group the moments (μ, vech Σ), normal-theory weight
    W_g = diag(Σ⁻¹, ½Dᵀ(Σ⁻¹⊗Σ⁻¹)D), Γ̂_g the covariance of
    (x_i − x̄, vech((x_i − x̄)(x_i − x̄)ᵀ)); stacked with group shares
    w_g = n_g/N as W = diag(w_g W_g), Γ = diag(Γ̂_g / w_g);
    U = W − WΔ(ΔᵀWΔ)⁻¹ΔᵀW, and acov = (ΔᵀWΔ)⁻¹ΔᵀWΓWΔ(ΔᵀWΔ)⁻¹/N
    (Satorra & Bentler 1994)."""
    p = TwoGroupReference.P
    rows, cols = np.tril_indices(p)
    vech = rows * p + cols
    sigmas, _, _, _ = fitted.unpack(fitted.theta)
    jac = fitted.jacobian(fitted.moments, fitted.theta)
    n_total = sum(len(x) for x in fitted.groups)
    deltas, weights, gammas, start = [], [], [], 0
    for x, sigma in zip(fitted.groups, sigmas):
        share = len(x) / n_total
        deltas.append(np.vstack([jac[start + p * p:start + p * p + p], jac[start:][vech]]))
        start += p * p + p
        v = np.linalg.inv(sigma)
        w = np.zeros((p + len(vech),) * 2)
        w[:p, :p] = v
        w[p:, p:] = 0.5 * duplication(p).T @ np.kron(v, v) @ duplication(p)
        c = x - x.mean(axis=0)
        d = np.hstack([c, (c[:, :, None] * c[:, None, :])[:, rows, cols]])
        weights.append(share * w)
        gammas.append(np.cov(d, rowvar=False, bias=True) / share)
    delta, w, gamma = np.vstack(deltas), linalg.block_diag(*weights), linalg.block_diag(*gammas)
    bread = np.linalg.inv(delta.T @ w @ delta)
    u = w - w @ delta @ bread @ delta.T @ w
    ug = u @ gamma
    acov = bread @ delta.T @ w @ gamma @ w @ delta @ bread / n_total
    return np.trace(ug), np.trace(ug @ ug), acov
