"""The per-pattern inverses and log-determinants of full-information ML.

Outside reference: numpy's ``np.linalg.inv`` and ``np.linalg.slogdet`` of
each pattern's observed block ``Σ_oo``, computed directly in the test.
Tolerance 1e-12 relative to the largest entry of ``Σ_oo⁻¹`` (the Σ here have
condition numbers below 1e3, so both sides agree to about 1e-13) and 1e-12
absolute on log-determinants.
"""

from __future__ import annotations

import numpy as np

from scalewright.estimate.normal import SCHUR_MAX_MISSING, embedded_inverse

P = 12


def random_sigma(rng, p: int = P) -> np.ndarray:
    """A positive definite Σ: a one-factor structure plus unique variances."""
    loadings = rng.uniform(0.4, 0.9, p)
    return np.outer(loadings, loadings) + np.diag(rng.uniform(0.3, 0.8, p))


def patterns(rng, missing_counts, p: int = P) -> np.ndarray:
    observed = np.ones((len(missing_counts), p), dtype=bool)
    for row, m in zip(observed, missing_counts):
        row[rng.choice(p, m, replace=False)] = False
    return observed


def assert_matches_numpy(sigma, observed, v, logdet):
    assert v.shape == (len(observed), P, P) and logdet.shape == (len(observed),)
    for k, o in enumerate(observed):
        block = sigma[np.ix_(o, o)]
        inverse = np.linalg.inv(block)                     # numpy, directly
        sign, direct_logdet = np.linalg.slogdet(block)     # numpy, directly
        assert sign == 1.0
        scale = np.abs(inverse).max()
        np.testing.assert_allclose(v[k][np.ix_(o, o)] / scale, inverse / scale, rtol=0, atol=1e-12)
        assert not v[k][~o].any() and not v[k][:, ~o].any()      # zero outside the observed items
        assert abs(logdet[k] - direct_logdet) < 1e-12


def test_inverses_match_numpy_for_none_one_few_and_many_missing_items():
    rng = np.random.default_rng(11)
    counts = [0, 1, 1, 2, 3, 3, 5, 8, 9, 11]
    assert 8 > SCHUR_MAX_MISSING * P >= 3       # both routes are taken (the last three: direct)
    for _ in range(5):
        sigma = random_sigma(rng)
        observed = patterns(rng, rng.permutation(counts))
        assert_matches_numpy(sigma, observed, *embedded_inverse(sigma, observed))


def test_nearly_collinear_missing_items_keep_full_accuracy():
    # Items 0 and 1 correlate 1 − 1e-10: Σ has condition ≈ 1e10, but a pattern
    # missing both observes a well-conditioned Σ_oo, which the Schur complement
    # of Σ⁻¹ would get only to ≈ 1e-7; the direct route must be taken.
    rng = np.random.default_rng(12)
    sigma = random_sigma(rng)
    sigma[:2, :] = sigma[[0], :]
    sigma[:, :2] = sigma[:, [0]]
    sigma[1, 1] += 2e-10 * sigma[0, 0]
    assert np.linalg.cond(sigma) > 1e8
    observed = np.ones((3, P), dtype=bool)
    observed[0, :2] = False
    observed[1, [0, 1, 5]] = False
    observed[2, 1] = False
    assert_matches_numpy(sigma, observed, *embedded_inverse(sigma, observed))


def test_sigma_not_positive_definite():
    # Items 0 and 1 "correlate" 1.2: Σ is not positive definite, yet every Σ_oo
    # that leaves out item 0 or item 1 is, and those patterns still get their
    # inverses; one pattern that observes both makes the whole answer None.
    rng = np.random.default_rng(13)
    sigma = np.eye(P) * 0.5 + 0.5
    sigma[0, 1] = sigma[1, 0] = 1.2
    assert np.linalg.eigvalsh(sigma)[0] < 0
    observed = patterns(rng, [1, 2, 3, 7])
    observed[[0, 2], 0] = False
    observed[[1, 3], 1] = False
    assert_matches_numpy(sigma, observed, *embedded_inverse(sigma, observed))
    both = np.vstack([observed, np.ones(P, dtype=bool)])
    assert embedded_inverse(sigma, both) is None
    assert embedded_inverse(sigma, both[[-1]]) is None
