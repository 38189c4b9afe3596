"""The standard bivariate normal distribution, vectorised over arrays.

Everything here works element-wise on broadcast arrays of limits ``h``, ``k``
and correlations ``rho``; there is no Python loop over points.  The
polychoric estimator evaluates these functions on the threshold grid of every
item pair at once.

References
----------
Drezner, Z., & Wesolowsky, G. O. (1990). On the computation of the bivariate
normal integral. *Journal of Statistical Computation and Simulation*, 35,
101-107.

Genz, A. (2004). Numerical computation of rectangular bivariate and trivariate
normal and t probabilities. *Statistics and Computing*, 14, 251-260.
"""

import numpy as np
from numpy.polynomial.legendre import leggauss
from scipy.special import ndtr

# Gauss-Legendre rule on [-1, 1], shifted to [0, 2] as in Genz (2004).  Genz
# uses 6, 12 or 20 points depending on |rho|; the 20-point rule is used for
# every point here, which is at least as accurate and keeps the code one path.
_NODES, _WEIGHTS = leggauss(20)
_X = 1.0 + _NODES
_TWO_PI = 2.0 * np.pi


def bvn_cdf(h, k, rho):
    """Standard bivariate normal CDF, Phi2(h, k; rho) = P(X < h, Y < k).

    Parameters
    ----------
    h, k : array_like
        Upper limits; ``-inf`` and ``+inf`` are allowed.
    rho : array_like
        Correlation of X and Y, in [-1, 1].

    Returns
    -------
    numpy.ndarray
        Probabilities, broadcast shape of the inputs.

    Notes
    -----
    With X, Y standard normal and corr(X, Y) = rho,
    P(X < h, Y < k) = P(-X > -h, -Y > -k), the upper-orthant probability that
    Genz (2004) computes.  For |rho| < 0.925 the integral is Sheppard's
    formula over theta in [0, arcsin rho] (Drezner & Wesolowsky 1990)::

        Phi2 = Phi(h) Phi(k)
               + 1/(2 pi) int_0^{arcsin rho} exp(-(h^2 + k^2 - 2 h k sin t)
                                              / (2 cos^2 t)) dt

    and for |rho| >= 0.925 the singular part near |rho| = 1 is removed
    analytically before the Gauss-Legendre quadrature (Genz 2004, section 2.3).
    Infinite limits use the margins: Phi2(h, +inf) = Phi(h),
    Phi2(-inf, k) = 0; rho = +1 gives Phi(min(h, k)) and rho = -1 gives
    max(0, Phi(h) + Phi(k) - 1).

    References
    ----------
    Genz, A. (2004). Numerical computation of rectangular bivariate and
    trivariate normal and t probabilities. *Statistics and Computing*, 14,
    251-260.
    """
    h, k, rho = np.broadcast_arrays(
        np.asarray(h, dtype=float), np.asarray(k, dtype=float), np.asarray(rho, dtype=float)
    )
    out = np.empty(h.shape)
    finite = np.isfinite(h) & np.isfinite(k)
    # Margins when a limit is infinite (Genz 2004, section 2 preamble).
    out[~finite] = np.where(
        (h[~finite] == -np.inf) | (k[~finite] == -np.inf),
        0.0,
        np.where(h[~finite] == np.inf, ndtr(k[~finite]), ndtr(h[~finite])),
    )
    out[finite] = _upper_orthant(-h[finite], -k[finite], rho[finite])
    return out


def _upper_orthant(h, k, r):
    """P(X > h, Y > k) for finite 1-d arrays h, k and r (Genz 2004, BVNU)."""
    out = np.empty(h.shape)
    mild = np.abs(r) < 0.925
    out[mild] = _upper_orthant_mild(h[mild], k[mild], r[mild])
    out[~mild] = _upper_orthant_strong(h[~mild], k[~mild], r[~mild])
    return np.clip(out, 0.0, 1.0)


def _upper_orthant_mild(h, k, r):
    """|r| < 0.925: Gauss-Legendre quadrature of Sheppard's integral."""
    hk = h * k
    hs = (h * h + k * k) / 2.0
    half_asin = np.arcsin(r) / 2.0
    sn = np.sin(half_asin[:, None] * _X)
    integrand = np.exp((sn * hk[:, None] - hs[:, None]) / (1.0 - sn * sn))
    return (integrand @ _WEIGHTS) * half_asin / _TWO_PI + ndtr(-h) * ndtr(-k)


def _upper_orthant_strong(h, k, r):
    """|r| >= 0.925: Genz's expansion around |r| = 1 plus quadrature."""
    k = np.where(r < 0, -k, k)
    hk = h * k
    bvn = np.zeros(h.shape)
    inner = np.abs(r) < 1.0
    if inner.any():
        bvn[inner] = _near_singular_part(h[inner], k[inner], hk[inner], r[inner])
    positive = np.where(r > 0, bvn + ndtr(-np.maximum(h, k)), 0.0)
    # r < 0, k negated above: P(X > h, Y > -k) = P(h < X < k) - bvn (Genz 2004).
    gap = np.where(h < 0, ndtr(k) - ndtr(h), ndtr(-h) - ndtr(-k))
    negative = np.where(h >= k, -bvn, gap - bvn)
    return np.where(r > 0, positive, negative)


def _near_singular_part(h, k, hk, r):
    """The integral term of Genz (2004) for 0.925 <= |r| < 1."""
    a_sq = (1.0 - r) * (1.0 + r)
    a = np.sqrt(a_sq)
    b_sq = (h - k) ** 2
    c = (4.0 - hk) / 8.0
    d = (12.0 - hk) / 80.0
    expo = -(b_sq / a_sq + hk) / 2.0
    bvn = a * np.exp(expo) * (1.0 - c * (b_sq - a_sq) * (1.0 - d * b_sq) / 3.0 + c * d * a_sq**2)
    b = np.sqrt(b_sq)
    # exp(-hk/2) overflows for very negative hk, where Phi(-b/a) is zero anyway.
    tail = np.exp(-np.maximum(hk, -100.0) / 2.0) * np.sqrt(_TWO_PI) * ndtr(-b / a) * b
    bvn = bvn - np.where(hk > -100.0, tail * (1.0 - c * b_sq * (1.0 - d * b_sq) / 3.0), 0.0)
    half_a = a / 2.0
    xs = (half_a[:, None] * _X) ** 2
    rs = np.sqrt(1.0 - xs)
    expo_x = -(b_sq[:, None] / xs + hk[:, None]) / 2.0
    sp = 1.0 + c[:, None] * xs * (1.0 + 5.0 * d[:, None] * xs)
    # exp(expo_x) * exp(-(hk/2) xs / (1 + rs)^2) / rs, as one exponent so that
    # neither factor overflows on its own.
    ep = np.exp(expo_x - (hk[:, None] / 2.0) * xs / (1.0 + rs) ** 2) / rs
    integral = (np.exp(expo_x) * sp - ep) @ _WEIGHTS
    return (half_a * integral - bvn) / _TWO_PI


def bvn_pdf(h, k, rho):
    """Standard bivariate normal density phi2(h, k; rho) = dPhi2/drho.

    phi2 = exp(-(h^2 - 2 rho h k + k^2) / (2 (1 - rho^2))) / (2 pi sqrt(1 - rho^2)),
    zero where h or k is infinite.  It is also the derivative of Phi2 with
    respect to rho (Plackett's identity; Olsson 1979, eq. 11).

    References
    ----------
    Olsson, U. (1979). Maximum likelihood estimation of the polychoric
    correlation coefficient. *Psychometrika*, 44, 443-460.
    """
    return _density_parts(h, k, rho)[0]


def bvn_pdf_drho(h, k, rho):
    """Derivative of the bivariate normal density with respect to rho.

    d phi2 / d rho = phi2 * [rho / (1 - rho^2)
                             + (h k (1 - rho^2) - rho (h^2 - 2 rho h k + k^2))
                               / (1 - rho^2)^2],
    differentiating log phi2 = -log(2 pi) - log(1 - rho^2)/2
    - (h^2 - 2 rho h k + k^2) / (2 (1 - rho^2)).  Zero where h or k is infinite.
    """
    density, finite, hf, kf, rf, one_minus, quad = _density_parts(h, k, rho)
    out = np.zeros(density.shape)
    factor = rf / one_minus + (hf * kf * one_minus - rf * quad) / one_minus**2
    out[finite] = density[finite] * factor
    return out


def _density_parts(h, k, rho):
    """φ₂(h, k; ρ) broadcast over the arguments (zero where h or k is infinite),
    with the pieces its derivative reuses."""
    h, k, rho = np.broadcast_arrays(
        np.asarray(h, dtype=float), np.asarray(k, dtype=float), np.asarray(rho, dtype=float)
    )
    density = np.zeros(h.shape)
    finite = np.isfinite(h) & np.isfinite(k)
    hf, kf, rf = h[finite], k[finite], rho[finite]
    one_minus = 1.0 - rf * rf
    quad = hf * hf - 2.0 * rf * hf * kf + kf * kf
    density[finite] = np.exp(-quad / (2.0 * one_minus)) / (_TWO_PI * np.sqrt(one_minus))
    return density, finite, hf, kf, rf, one_minus, quad


def bvn_cdf_dh(h, k, rho):
    """Derivative of Phi2(h, k; rho) with respect to its first limit h.

    dPhi2/dh = phi(h) Phi((k - rho h) / sqrt(1 - rho^2)) (Olsson 1979, eq. 13):
    the density of X at h times P(Y < k | X = h).  Zero where h is infinite;
    phi(h) where k = +inf.  |rho| must be below 1.
    """
    h, k, rho = np.broadcast_arrays(
        np.asarray(h, dtype=float), np.asarray(k, dtype=float), np.asarray(rho, dtype=float)
    )
    out = np.zeros(h.shape)
    finite_h = np.isfinite(h)
    hf, kf, rf = h[finite_h], k[finite_h], rho[finite_h]
    density = np.exp(-hf * hf / 2.0) / np.sqrt(_TWO_PI)
    # (k - rho h)/s is +-inf when k is; ndtr maps those to 1 and 0.
    out[finite_h] = density * ndtr((kf - rf * hf) / np.sqrt(1.0 - rf * rf))
    return out
