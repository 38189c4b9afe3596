"""Polyserial correlations, the mixed correlation matrix and its sampling covariance.

Outside references:

* an independent maximum likelihood computation written here: the
  bivariate likelihood of a continuous and an ordinal answer (normal density
  of the continuous item times the conditional probability of the ordinal
  category, Olsson, Drasgow & Dorans 1982) from scipy.stats.norm, maximised
  with scipy.optimize;
* semopy's ``polycorr.polyserial_corr`` (semopy 2.3.11);
* an empirical sandwich written here: the two-step estimators stacked as one
  M-estimator (means, SDs, thresholds, correlations), its Jacobian by
  central finite differences of the mean estimating functions and its
  middle by their empirical covariance, ``A⁻¹BA⁻ᵀ/n`` (Huber 1967);
* numpy's Pearson correlation.
"""

from __future__ import annotations

import types

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import optimize
from scipy.stats import multivariate_normal, norm

from scalewright.errors import ScalewrightWarning, StudyError
from scalewright.estimate.mixed import mixed_moments

ITEMS = ("c1", "c2", "o1", "o2")
ORDINAL = (False, False, True, True)
POP = np.array([[1.0, 0.5, 0.4, 0.3],
                [0.5, 1.0, 0.45, 0.35],
                [0.4, 0.45, 1.0, 0.5],
                [0.3, 0.35, 0.5, 1.0]])
CUTS = {2: [-1.0, 0.0, 0.8], 3: [-0.5, 0.3, 1.2, 1.9]}


def _sample(rng, n, missing=0.0):
    """Two continuous items (raw metric: mean 3 / SD 2 and mean −1 / SD 0.5) and two ordinal
    items cut from latent normals with correlations ``POP``."""
    latent = rng.multivariate_normal(np.zeros(4), POP, size=n)
    x = latent.copy()
    x[:, 0] = 3 + 2 * latent[:, 0]
    x[:, 1] = -1 + 0.5 * latent[:, 1]
    for j, cuts in CUTS.items():
        x[:, j] = np.digitize(latent[:, j], cuts) + 1
    x[rng.random(x.shape) < missing] = np.nan
    return x


def _first_step(xc, xo):
    """μ, ÷n SD of the continuous column and thresholds of the ordinal one, each from its
    own answers, and the categories (Olsson, Drasgow & Dorans 1982, two-step estimator)."""
    c = xc[~np.isnan(xc)]
    o = xo[~np.isnan(xo)]
    cats = np.unique(o)
    tau = norm.ppf([np.mean(o <= v) for v in cats[:-1]])
    return c.mean(), c.std(), tau, cats


def _log_p(r, z, k, tau):
    """log P(category k | z) for the standardized continuous answer z: Y* | z ~ N(rz, 1 − r²)."""
    bounds = np.concatenate([[-np.inf], tau, [np.inf]])
    s = np.sqrt(1 - r * r)
    return np.log(norm.cdf((bounds[k + 1] - r * z) / s) - norm.cdf((bounds[k] - r * z) / s))


@pytest.fixture(scope="module")
def with_gaps():
    x = _sample(np.random.default_rng(5), 500, missing=0.1)
    return x, mixed_moments(x, ITEMS, ORDINAL)


# --------------------------------------------------------------------------
# The estimates


def test_polyserial_matches_direct_bivariate_likelihood_maximisation(with_gaps):
    x, moments = with_gaps
    for c in (0, 1):
        for o in (2, 3):
            mu, sd, tau, cats = _first_step(x[:, c], x[:, o])
            both = ~np.isnan(x[:, c]) & ~np.isnan(x[:, o])
            z = (x[both, c] - mu) / sd
            k = np.searchsorted(cats, x[both, o])

            def negative_loglik(r):
                # the full bivariate log-likelihood: normal density of x times P(k | x)
                return -np.sum(norm.logpdf(x[both, c], mu, sd) + _log_p(r, z, k, tau))

            best = optimize.minimize_scalar(negative_loglik, bounds=(-0.99, 0.99),
                                            method="bounded", options={"xatol": 1e-10})
            # both maximise the same likelihood to ~1e-10; 1e-7 leaves room for its flatness
            assert_allclose(moments.raw_correlations[c, o], best.x, rtol=0, atol=1e-7)


def test_pearson_correlation_of_continuous_items_uses_the_rows_answering_both(with_gaps):
    x, moments = with_gaps
    both = ~np.isnan(x[:, 0]) & ~np.isnan(x[:, 1])
    # numpy's Pearson correlation of the pairwise-complete rows: rounding only
    assert_allclose(moments.raw_correlations[0, 1], np.corrcoef(x[both, 0], x[both, 1])[0, 1],
                    rtol=1e-12)


def test_continuous_margins_are_the_mean_and_ml_sd_of_each_items_answers(with_gaps):
    x, moments = with_gaps
    for j, c in enumerate((0, 1)):
        seen = x[~np.isnan(x[:, c]), c]
        assert_allclose([moments.means[j], moments.sds[j]], [seen.mean(), seen.std()],
                        rtol=1e-12)
    assert moments.ordinal_items == ("o1", "o2") and moments.continuous_items == ("c1", "c2")


@pytest.fixture
def semopy_polycorr(monkeypatch):
    """semopy's polycorr module with the scipy function it calls restored.

    semopy 2.3.11 integrates the univariate normal with
    ``scipy.stats.mvn.mvnun``, which scipy 1.17 removed; the stand-in returns
    the same one-dimensional probability from ``norm.cdf``.  Everything else
    (intervals, likelihood, optimiser) is semopy's own code.
    """
    from semopy import polycorr

    def mvnun(lower, upper, means, cov):
        sd = np.sqrt(np.ravel(cov)[0])
        return norm.cdf(upper[0], means[0], sd) - norm.cdf(lower[0], means[0], sd), 0

    monkeypatch.setattr(polycorr, "mvn", types.SimpleNamespace(mvnun=mvnun), raising=False)
    return polycorr


def test_polyserial_matches_semopy(semopy_polycorr):
    x = _sample(np.random.default_rng(8), 250)
    moments = mixed_moments(x, ITEMS, ORDINAL)
    for c, o in ((0, 2), (1, 3)):
        xc = x[:, c]
        # semopy's default standardizes by the variance, (x − mean)/var; its likelihood is
        # the polyserial one when z is standardized by the SD, so z is passed in (÷n SD,
        # the maximum likelihood SD of Olsson, Drasgow & Dorans 1982).
        z = (xc - xc.mean()) / xc.std()
        theirs = semopy_polycorr.polyserial_corr(xc, x[:, o], x_z=z)
        # semopy maximises with minimize_scalar(method="bounded") at scipy's default
        # xatol = 1e-5 and writes ±10 for infinite thresholds (a probability change below
        # 1e-23): within 2e-5 of the maximiser.
        assert_allclose(moments.raw_correlations[c, o], theirs, rtol=0, atol=2e-5)


def test_polyserial_recovers_population_correlation_in_large_sample():
    moments = mixed_moments(_sample(np.random.default_rng(77), 20_000), ITEMS, ORDINAL)
    jj, ll = np.triu_indices(4, 1)
    # a consistent estimator lies within 4 standard errors of the truth
    # (a normal deviate beyond 4 has probability 6e-5)
    assert np.all(np.abs(moments.raw_correlations[jj, ll] - POP[jj, ll])
                  < 4 * moments.correlation_se)


# --------------------------------------------------------------------------
# The sampling covariance against an empirical sandwich


def _jacobian(mean_psi, theta, step=1e-4):
    """∂ mean_psi/∂θ by central differences."""
    return np.column_stack([(mean_psi(theta + step * e) - mean_psi(theta - step * e)) / (2 * step)
                            for e in np.eye(theta.size)])


def _sandwich(psi, theta, n, jac=None):
    """A⁻¹BA⁻ᵀ/n with B = mean ψψᵀ and A = ∂ mean ψ/∂θ (by differences, unless given)."""
    values = psi(theta)
    middle = values.T @ values / n
    jac = _jacobian(lambda t: psi(t).mean(axis=0), theta) if jac is None else jac
    inv = np.linalg.inv(jac)
    return inv @ middle @ inv.T / n


def _score(logp, r, h=1e-5):
    """∂ log p/∂ρ by central differences."""
    return (logp(r + h) - logp(r - h)) / (2 * h)


def test_polyserial_covariance_with_missing_answers_matches_empirical_sandwich(with_gaps):
    # One pair as one M-estimator; a row missing an item contributes zero to that item's
    # equations (pairwise handling), θ = (μ, σ, τ₁…τ₃, ρ).
    x, moments = with_gaps
    n = x.shape[0]
    xc, xo = x[:, 0], x[:, 2]
    seen_c, seen_o = ~np.isnan(xc), ~np.isnan(xo)
    both = seen_c & seen_o
    mu, sd, tau, cats = _first_step(xc, xo)
    k = np.where(seen_o, np.searchsorted(cats, np.where(seen_o, xo, cats[0])), 0)
    c0 = np.where(seen_c, xc, 0.0)

    def psi(t):
        m, s, th, r = t[0], t[1], t[2:5], t[5]
        z = (c0 - m) / s
        score = _score(lambda rr: _log_p(rr, z, k, th), r)
        return np.column_stack([seen_c * (c0 - m), seen_c * ((c0 - m) ** 2 - s * s),
                                *(seen_o * ((k <= c) - norm.cdf(th[c])) for c in range(3)),
                                np.where(both, score, 0.0)])

    reference = _sandwich(psi, np.concatenate([[mu, sd], tau, [moments.raw_correlations[0, 2]]]), n)
    position = 7 + 1        # after the 7 thresholds, pair (c1, o1) is second in triu order
    ours = moments.acov[np.ix_([0, 1, 2, position], [0, 1, 2, position])]
    # same estimator, derivatives analytic here and by finite differences there:
    # the nested differences are good to about 1e-7, so 1e-5 relative
    assert_allclose(ours, reference[np.ix_([2, 3, 4, 5], [2, 3, 4, 5])], rtol=1e-5)


def test_joint_covariance_of_all_kinds_matches_empirical_sandwich(monkeypatch):
    # Complete data, every estimate of the four items as one M-estimator:
    # θ = (μ₁, σ₁, μ₂, σ₂, τ of o1 (3), τ of o2 (4), ρ for the 6 pairs in triu order).
    # Pearson: ψ = z₁z₂ − r; polyserial and polychoric: ψ = ∂log P/∂ρ by differences,
    # the polychoric cell probabilities from scipy's bivariate normal CDF.  The polychoric
    # row of A is taken in expectation, Σ_ab π_ab(θ̂) ∂ψ_ab/∂θ, as the polychoric module
    # does (expected information, Olsson 1979); the other rows from the sample, as the
    # polyserial module does (observed information).
    x = _sample(np.random.default_rng(12), 400)
    # one polyserial pair per block of working arrays, so that the blocks are stitched too
    monkeypatch.setattr("scalewright.estimate.polyserial._BLOCK_CELLS", 400)
    moments = mixed_moments(x, ITEMS, ORDINAL)
    n = x.shape[0]
    codes = [np.searchsorted(np.unique(x[:, j]), x[:, j]) for j in (2, 3)]
    jj, ll = np.triu_indices(4, 1)

    def cells(r, ta, tb):
        ba = np.concatenate([[-np.inf], ta, [np.inf]])
        bb = np.concatenate([[-np.inf], tb, [np.inf]])
        cov = [[1, r], [r, 1]]
        return np.array([[multivariate_normal.cdf([ba[a + 1], bb[b + 1]], cov=cov,
                                                  lower_limit=[ba[a], bb[b]])
                          for b in range(tb.size + 1)] for a in range(ta.size + 1)])

    def psi(t):
        mu, sd = t[[0, 2]], t[[1, 3]]
        taus = [t[4:7], t[7:11]]
        rho = t[11:]
        z = (x[:, :2] - mu) / sd
        cols = [x[:, 0] - mu[0], (x[:, 0] - mu[0]) ** 2 - sd[0] ** 2,
                x[:, 1] - mu[1], (x[:, 1] - mu[1]) ** 2 - sd[1] ** 2]
        for o in range(2):
            cols += [(codes[o] <= c) - norm.cdf(taus[o][c]) for c in range(taus[o].size)]
        for s, (a, b) in enumerate(zip(jj, ll)):
            if b < 2:                                   # two continuous items
                cols.append(z[:, a] * z[:, b] - rho[s])
            elif a < 2:                                 # continuous a, ordinal b
                o = b - 2
                cols.append(_score(lambda r: _log_p(r, z[:, a], codes[o], taus[o]), rho[s]))
            else:                                       # two ordinal items
                cols.append(_score(lambda r: np.log(cells(r, *taus)[codes[0], codes[1]]),
                                   rho[s]))
        return np.column_stack(cols)

    theta = np.concatenate([[moments.means[0], moments.sds[0], moments.means[1], moments.sds[1]],
                            *moments.thresholds, moments.raw_correlations[jj, ll]])
    jac = _jacobian(lambda t: psi(t).mean(axis=0), theta)
    probs = cells(theta[-1], theta[4:7], theta[7:11])

    def expected_polychoric_score(t):
        scores = _score(lambda r: np.log(cells(r, t[4:7], t[7:11])), t[-1])
        return np.array([np.sum(probs * scores)])

    jac[-1] = _jacobian(expected_polychoric_score, theta)[0]
    reference = _sandwich(psi, theta, n, jac)[4:, 4:]
    # finite-difference sandwich against the analytic influence: 1e-5 relative, and
    # absolute 1e-9 for covariances that are near zero
    assert_allclose(moments.acov, reference, rtol=1e-5, atol=1e-9)


# --------------------------------------------------------------------------
# Bad input


def test_continuous_item_constant_within_the_pairs_rows_names_both_items():
    x = _sample(np.random.default_rng(3), 200)
    x[:100, 2] = np.nan                  # o1 answered only in rows 100…199
    x[100:, 0] = 4.0                     # where c1 is constant
    with pytest.raises(StudyError, match=r"Item 'c1' \(continuous\) has the same answer in all "
                                         r"100 rows that also answered 'o1', so the polyserial "
                                         r"correlation of the two is undefined"):
        mixed_moments(x, ITEMS, ORDINAL)


def test_too_few_rows_for_a_polyserial_pair_names_it_and_the_minimum():
    x = _sample(np.random.default_rng(6), 200)
    x[8:, 0] = np.nan                    # c1 answered by 8 rows only
    x[:8, 1] = np.nan                    # … none of which answered c2: Pearson pair empty
    with pytest.raises(StudyError, match=r"pair of continuous items: 'c1' and 'c2' \(0 rows\)"):
        mixed_moments(x, ITEMS, ORDINAL)
    x = _sample(np.random.default_rng(6), 200)
    x[8:, 0] = np.nan
    with pytest.raises(StudyError, match=r"continuous-ordinal pair: 'c1' and 'o1' \(8 rows\); "
                                         r"'c1' and 'o2' \(8 rows\)\. A polyserial correlation "
                                         r"needs at least 10 rows observed on both items"):
        mixed_moments(x[:, [0, 2, 3]], ("c1", "o1", "o2"), (False, True, True))


def test_continuous_item_that_separates_the_categories_reports_correlation_of_one():
    x = _sample(np.random.default_rng(9), 200)
    x[:, 0] = x[:, 2] * 10 + np.random.default_rng(1).random(200)   # c1 computed from o1
    with pytest.raises(StudyError, match=r"polyserial correlation of items 'c1' \(continuous\) "
                                         r"and 'o1' \(ordinal\) reaches \+1"):
        mixed_moments(x, ITEMS, ORDINAL)


def test_copied_continuous_item_is_named():
    x = _sample(np.random.default_rng(10), 200)
    x[:, 1] = 2 * x[:, 0] + 1
    with pytest.raises(StudyError, match=r"Items 'c1' and 'c2' \(continuous\) are perfectly "
                                         r"correlated \(r = \+1\)"):
        mixed_moments(x, ITEMS, ORDINAL)


def test_indefinite_mixed_matrix_is_smoothed_and_named():
    # Pairwise answers that no joint distribution can produce: c1 and c2 agree in one set
    # of rows, c1 and o1 agree in another, c2 and o1 disagree in a third, so the three
    # correlations (about .9, .9 and −.9) form a matrix with a negative eigenvalue.
    rng = np.random.default_rng(13)
    x = np.full((300, 3), np.nan)
    u = rng.standard_normal((3, 100))
    noise = 0.3 * rng.standard_normal((3, 100))
    x[:100, 0], x[:100, 1] = u[0], u[0] + noise[0]
    x[100:200, 0], x[100:200, 2] = u[1], np.digitize(u[1] + noise[1], [-0.5, 0.5]) + 1
    x[200:, 1], x[200:, 2] = u[2], np.digitize(-u[2] + noise[2], [-0.5, 0.5]) + 1
    with pytest.warns(ScalewrightWarning, match=r"The mixed \(polychoric, polyserial and "
                                                r"Pearson\) correlation matrix was not positive "
                                                r"definite") as caught:
        moments = mixed_moments(x, ("c1", "c2", "o1"), (False, False, True))
    assert moments.smoothed and np.linalg.eigvalsh(moments.correlations)[0] > 0
    assert len([w for w in caught if "not positive definite" in str(w.message)]) == 1
