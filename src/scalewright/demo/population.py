"""The known population model behind the invented teacher workplace climate survey.

Everything the demo data were drawn from, as plain numpy arrays and dicts, so
that tests can check that scalewright recovers what was planted.

The model is a common-factor model for *continuous latent responses*
``y*`` (one per item) that are then cut into five answer categories:

.. math::

    y^*_{ij} = \\nu_{jg} + \\sum_k \\lambda_{jk} \\eta_{ik} + \\varepsilon_{ij},
    \\qquad \\eta_i \\sim N(0, \\Phi), \\quad \\varepsilon_i \\sim N(0, \\Theta),

    x_{ij} = 1 + \\#\\{c : y^*_{ij} > \\tau_{jc}\\}, \\quad c = 1, \\dots, 4,

with :math:`\\Phi` the construct correlation matrix (unit construct variances)
and :math:`\\Theta = I - \\mathrm{diag}(\\Lambda\\Phi\\Lambda^\\top)` plus the
planted residual covariance, so every latent response has variance one within
a school phase and the loadings are standardized.  The intercept
:math:`\\nu_{jg}` is zero except for ``NONINVARIANT_ITEM`` among secondary
teachers, where it is ``INTERCEPT_SHIFT``.  This is the latent-response
(threshold) formulation of ordinal factor analysis of Muthén (1984).

Everything is on the *raw answer* scale, as the teachers answered: the two
reverse-keyed items have negative loadings on their construct.
``KEYED_LOADINGS`` and ``latent_response_covariance(keyed=True)`` give the
same model after reverse keying (answer ``x`` recoded as ``6 - x``, which flips
the sign of ``y*``).

References
----------
Muthén, B. (1984). A general structural equation model with dichotomous,
ordered categorical, and continuous latent variable indicators.
Psychometrika, 49, 115-132.
"""

import numpy as np
from scipy.special import ndtr

SEED = 20240917
"""Seed of ``numpy.random.default_rng`` for the committed demo data."""

N = 420
"""Number of teachers in the committed demo data."""

CONSTRUCTS = {
    "workload": ["wl1", "wl2", "wl3", "wl4", "wl5", "wl6"],
    "support": ["cs1", "cs2", "cs3", "cs4", "cs5", "cs6"],
    "autonomy": ["ca1", "ca2", "ca3", "ca4", "ca5", "ca6"],
}
"""The hypothesised structure: construct -> its items (as in the model file)."""

ITEMS = [item for items in CONSTRUCTS.values() for item in items]
"""The 18 items in the column order of the data file and of every matrix here."""

REVERSED = ("cs4", "ca5")
"""Items whose raw answers run opposite to their construct."""

CROSS_LOADING = ("wl6", "support")
"""(item, construct): the workload item that also loads on collegial support."""

NOWHERE_ITEM = "ca6"
"""The item that fits nowhere: standardized loading 0.15 on its construct."""

CORRELATED_PAIR = ("cs2", "cs5")
"""Two items with near-identical wording whose residuals correlate."""

RESIDUAL_CORRELATIONS = {CORRELATED_PAIR: 0.35}
"""Planted residual correlations, as correlations of the residuals ``ε``."""

NONINVARIANT_ITEM = "wl4"
"""The item whose intercept differs between primary and secondary teachers."""

INTERCEPT_SHIFT = 0.5
"""Secondary minus primary intercept of ``NONINVARIANT_ITEM``, in latent-response SDs."""

PHASES = ("primary", "secondary")
"""Values of the ``phase`` column; the intercept shift applies to the second."""

SCHOOLS = {"primary": np.arange(1, 15), "secondary": np.arange(15, 25)}
"""School codes by phase: 14 primary and 10 secondary schools (codes 1-24)."""

MISSING_CODE = -9
"""The code written for a "no answer" cell."""

MISSING_RATE = 0.03
"""Share of answers left empty, completely at random."""

MISSING_CODE_RATE = 0.01
"""Share of answers written as ``MISSING_CODE``, completely at random."""

_LOADING_ROWS = {
    # item: (workload, support, autonomy), standardized, raw answer scale
    "wl1": (0.75, 0.0, 0.0),
    "wl2": (0.72, 0.0, 0.0),
    "wl3": (0.70, 0.0, 0.0),
    "wl4": (0.65, 0.0, 0.0),
    "wl5": (0.68, 0.0, 0.0),
    "wl6": (0.55, 0.35, 0.0),   # CROSS_LOADING
    "cs1": (0.0, 0.78, 0.0),
    "cs2": (0.0, 0.70, 0.0),
    "cs3": (0.0, 0.74, 0.0),
    "cs4": (0.0, -0.62, 0.0),   # reverse-keyed
    "cs5": (0.0, 0.68, 0.0),
    "cs6": (0.0, 0.66, 0.0),
    "ca1": (0.0, 0.0, 0.72),
    "ca2": (0.0, 0.0, 0.70),
    "ca3": (0.0, 0.0, 0.75),
    "ca4": (0.0, 0.0, 0.66),
    "ca5": (0.0, 0.0, -0.58),   # reverse-keyed
    "ca6": (0.0, 0.0, 0.15),    # NOWHERE_ITEM
}

LOADINGS = np.array([_LOADING_ROWS[item] for item in ITEMS])
"""18 x 3 standardized loadings of the raw latent responses (rows ``ITEMS``,
columns ``CONSTRUCTS`` in order), including the cross-loading."""

KEYING = np.where(np.isin(ITEMS, REVERSED), -1.0, 1.0)
"""+1 for items as answered, -1 for reverse-keyed items (one entry per item)."""

KEYED_LOADINGS = KEYING[:, None] * LOADINGS
"""``LOADINGS`` after reverse keying: all primary loadings positive."""

FACTOR_CORRELATIONS = np.array([
    # workload support autonomy
    [1.00, -0.35, -0.30],
    [-0.35, 1.00, 0.45],
    [-0.30, 0.45, 1.00],
])
"""3 x 3 construct correlations (construct variances are one)."""

_THRESHOLD_ROWS = {
    # four cut points on the latent-response scale of a primary teacher;
    # most items pile up at 4-5 (agree), the reverse-keyed ones at 1-2
    "wl1": (-2.0, -1.3, -0.6, 0.5),
    "wl2": (-1.8, -1.1, -0.4, 0.7),
    "wl3": (-1.9, -1.2, -0.5, 0.6),
    "wl4": (-1.5, -0.8, 0.0, 0.9),
    "wl5": (-2.1, -1.4, -0.7, 0.4),
    "wl6": (-1.4, -0.6, 0.2, 1.1),
    "cs1": (-2.2, -1.5, -0.7, 0.4),
    "cs2": (-2.0, -1.4, -0.6, 0.6),
    "cs3": (-1.9, -1.2, -0.4, 0.7),
    "cs4": (-0.5, 0.4, 1.1, 1.9),
    "cs5": (-2.1, -1.4, -0.5, 0.6),
    "cs6": (-1.7, -1.0, -0.2, 0.9),
    "ca1": (-2.0, -1.3, -0.5, 0.5),
    "ca2": (-1.3, -0.5, 0.3, 1.2),
    "ca3": (-1.2, -0.4, 0.4, 1.3),
    "ca4": (-1.4, -0.6, 0.2, 1.1),
    "ca5": (-0.8, 0.0, 0.7, 1.5),
    "ca6": (-1.0, -0.3, 0.4, 1.1),
}

THRESHOLDS = np.array([_THRESHOLD_ROWS[item] for item in ITEMS])
"""18 x 4 increasing cut points of the raw latent responses for a primary
teacher; answer ``c`` is given when ``y*`` lies between cut ``c - 1`` and ``c``."""


def intercepts(phase):
    """Latent-response intercepts of every item in one school phase.

    Parameters
    ----------
    phase : {"primary", "secondary"}

    Returns
    -------
    numpy.ndarray
        Length-18 vector: zero, except ``INTERCEPT_SHIFT`` for
        ``NONINVARIANT_ITEM`` among secondary teachers.
    """
    shifted = (np.array(ITEMS) == NONINVARIANT_ITEM) & (phase == PHASES[1])
    return np.where(shifted, INTERCEPT_SHIFT, 0.0)


def residual_covariance():
    """Covariance matrix :math:`\\Theta` of the residuals ``ε``.

    :math:`\\theta_{jj} = 1 - (\\Lambda\\Phi\\Lambda^\\top)_{jj}` so that every
    latent response has unit variance; each planted pair gets
    :math:`\\theta_{jk} = r_{jk}\\sqrt{\\theta_{jj}\\theta_{kk}}` with ``r`` from
    ``RESIDUAL_CORRELATIONS``.

    Returns
    -------
    numpy.ndarray
        18 x 18 residual covariance matrix (raw answer scale).
    """
    unique = 1.0 - np.einsum("jk,kl,jl->j", LOADINGS, FACTOR_CORRELATIONS, LOADINGS)
    pairs = np.array([[ITEMS.index(a), ITEMS.index(b)] for a, b in RESIDUAL_CORRELATIONS])
    values = np.array(list(RESIDUAL_CORRELATIONS.values()))
    theta = np.diag(unique)
    covariances = values * np.sqrt(unique[pairs[:, 0]] * unique[pairs[:, 1]])
    theta[pairs[:, 0], pairs[:, 1]] = covariances
    theta[pairs[:, 1], pairs[:, 0]] = covariances
    return theta


def latent_response_covariance(keyed=False):
    """Population covariance of the 18 continuous latent responses.

    :math:`\\Sigma = \\Lambda\\Phi\\Lambda^\\top + \\Theta`, the covariance
    structure of the common-factor model (Bollen 1989, ch. 7).  It is
    the same in both school phases (only a mean differs) and, since every
    diagonal entry is one, it is also the latent-response (polychoric)
    correlation matrix.

    Parameters
    ----------
    keyed : bool, default False
        If True, give the covariance after reverse keying (rows and columns of
        ``REVERSED`` items change sign).

    Returns
    -------
    numpy.ndarray
        18 x 18 matrix, rows and columns in ``ITEMS`` order.

    References
    ----------
    Bollen, K. A. (1989). Structural Equations with Latent Variables. Wiley.
    """
    sigma = LOADINGS @ FACTOR_CORRELATIONS @ LOADINGS.T + residual_covariance()
    signs = KEYING if keyed else np.ones(len(ITEMS))
    return signs[:, None] * sigma * signs[None, :]


def category_probabilities(phase):
    """Population probability of each answer 1-5 for every item, in one phase.

    :math:`P(x_j = c) = \\Phi(\\tau_{jc} - \\nu_{jg}) - \\Phi(\\tau_{j,c-1} - \\nu_{jg})`
    with :math:`\\tau_{j0} = -\\infty`, :math:`\\tau_{j5} = +\\infty` and
    :math:`\\Phi` the standard normal distribution function (Muthén 1984),
    before any answer is set missing.

    Parameters
    ----------
    phase : {"primary", "secondary"}

    Returns
    -------
    numpy.ndarray
        18 x 5 matrix of probabilities (raw answer scale); rows sum to one.
    """
    shifted = THRESHOLDS - intercepts(phase)[:, None]
    cumulative = np.hstack([np.zeros((len(ITEMS), 1)), ndtr(shifted), np.ones((len(ITEMS), 1))])
    return np.diff(cumulative, axis=1)
