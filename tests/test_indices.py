"""Global fit indices against semopy, scipy and the published/computed values
of shared/design/references.md (Holzinger & Swineford 1939, three factors).

Tolerances: 1e-5 relative against values recomputed in the test from the
same fitted matrices (pure algebra and scipy root finding); 1e-4 against
semopy's statistics (another optimiser); the references.md values are given
to six digits, so 5e-6 absolute.
"""

from __future__ import annotations

import numpy as np
import pytest
import semopy
from numpy.testing import assert_allclose
from scipy import optimize, stats

from conftest import HS_CONSTRUCTS, HS_ITEMS, HS_SEMOPY, make_spec
from scalewright.evaluate import evaluate_normal
from scalewright.indices import comparative_fit, rmsea, rmsea_close_fit_p, rmsea_interval


@pytest.fixture(scope="module")
def hs_fit(hs_x):
    return evaluate_normal(make_spec(HS_CONSTRUCTS), hs_x)


@pytest.fixture(scope="module")
def semopy_stats(hs_data):
    model = semopy.Model(HS_SEMOPY)
    model.fit(hs_data[list(HS_ITEMS)], options={"ftol": 1e-12})
    return semopy.calc_stats(model).T["Value"], model


def test_published_values_of_the_three_factor_model(hs_fit):
    # shared/design/references.md [computed with semopy 2.3.11 and numpy]
    f = hs_fit.fit
    assert f.df == 24 and f.baseline_df == 36
    assert f.chi_square == pytest.approx(85.3057, abs=5e-4)    # N·F, references.md
    assert f.baseline_chi_square == pytest.approx(918.852, abs=5e-3)
    assert f.cfi == pytest.approx(0.930559, abs=5e-6)
    assert f.tli == pytest.approx(0.895839, abs=5e-6)
    assert f.rmsea == pytest.approx(0.092275, abs=5e-6)
    assert f.rmsea_ci90[0] == pytest.approx(0.071538, abs=5e-6)
    assert f.rmsea_ci90[1] == pytest.approx(0.113867, abs=5e-6)
    assert f.rmsea_p_close == pytest.approx(0.000648, abs=5e-6)
    assert f.srmr == pytest.approx(0.065205, abs=5e-6)
    assert f.p_value == pytest.approx(8.5e-9, rel=0.01)


def test_chi_square_is_n_times_f_as_semopy_reports_it(hs_fit, semopy_stats):
    # convention: N·F_ML (not (N−1)·F); semopy reports the same statistic
    values, _ = semopy_stats
    assert_allclose(hs_fit.fit.chi_square, values["chi2"], rtol=1e-4)
    assert_allclose(hs_fit.fit.baseline_chi_square, values["chi2 Baseline"], rtol=1e-4)
    assert_allclose(hs_fit.fit.cfi, values["CFI"], rtol=1e-4)
    assert_allclose(hs_fit.fit.tli, values["TLI"], rtol=1e-4)
    assert_allclose(hs_fit.fit.rmsea, values["RMSEA"], rtol=1e-4)   # semopy: n = N − 1


def test_chi_square_equals_n_times_the_ml_discrepancy(hs_fit, hs_x):
    # theory: T = N·[log|Σ̂| + tr(SΣ̂⁻¹) − log|S| − p] with S the ÷N covariance
    s = np.cov(hs_x, rowvar=False, bias=True)
    sigma = hs_fit.estimate.matrices().implied_cov
    f = (np.linalg.slogdet(sigma)[1] + np.trace(s @ np.linalg.inv(sigma))
         - np.linalg.slogdet(s)[1] - 9)
    assert_allclose(hs_fit.fit.chi_square, len(hs_x) * f, rtol=1e-10)


def test_rmsea_interval_inverts_the_noncentral_chi_square():
    # Browne & Cudeck (1993): λ_L with ncx2.cdf(T; df, λ_L) = .95, λ_U with = .05;
    # recomputed here with scipy's own root finder on the same equations
    chi2, df, n = 85.3057, 24, 301
    lo = optimize.brentq(lambda lam: stats.ncx2.cdf(chi2, df, lam) - 0.95, 1e-9, 500)
    hi = optimize.brentq(lambda lam: stats.ncx2.cdf(chi2, df, lam) - 0.05, 1e-9, 500)
    expected = (np.sqrt(lo / (df * (n - 1))), np.sqrt(hi / (df * (n - 1))))
    assert_allclose(rmsea_interval(chi2, df, n), expected, rtol=1e-6)


@pytest.mark.parametrize("chi2, df, n", [(5517.2, 4805, 2000), (120000.0, 4805, 1_000_000),
                                         (3.2, 1, 150), (40.0, 24, 301)])
def test_rmsea_interval_inverts_the_noncentral_chi_square_for_large_models(chi2, df, n):
    # Browne & Cudeck (1993) as above, at the sizes of 100-item models and million-row
    # files: each bound's noncentrality puts ncx2.cdf (scipy) at its tail probability
    lower, upper = rmsea_interval(chi2, df, n)
    for bound, tail in ((lower, 0.95), (upper, 0.05)):
        lam = bound ** 2 * df * (n - 1)
        if lam > 0:
            assert_allclose(stats.ncx2.cdf(chi2, df, lam), tail, rtol=1e-9)
        else:
            assert stats.chi2.cdf(chi2, df) <= tail
    assert upper > lower >= 0


def test_rmsea_interval_lower_bound_is_zero_when_the_fit_is_close():
    # a statistic below the 95th percentile of the central χ² gives λ_L = 0
    assert rmsea_interval(20.0, 24, 301)[0] == 0.0
    assert rmsea(20.0, 24, 301) == 0.0


def test_close_fit_p_uses_the_noncentrality_of_rmsea_05():
    # Browne & Cudeck (1993): p = P(χ²_df(λ₀) ≥ T), λ₀ = .05²·df·(N−1)
    assert_allclose(rmsea_close_fit_p(85.3057, 24, 301),
                    stats.ncx2.sf(85.3057, 24, 0.0025 * 24 * 300), rtol=1e-12)


def test_srmr_from_semopy_implied_covariance(hs_fit, hs_x, semopy_stats):
    # Bentler's SRMR over the p(p+1)/2 elements, recomputed from semopy's Σ̂
    _, model = semopy_stats
    sigma = model.calc_sigma()[0]
    s = np.cov(hs_x, rowvar=False, bias=True)
    d = np.sqrt(np.diag(s))
    resid = ((s - sigma) / np.outer(d, d))[np.tril_indices(9)]
    assert_allclose(hs_fit.fit.srmr, np.sqrt(np.mean(resid ** 2)), rtol=1e-4)


def test_loglik_and_information_criteria_match_scipy(hs_fit, hs_x):
    # ℓ = Σ log φ(x_i; x̄, Σ̂) by scipy; k counts the 21 model parameters and 9 means
    sigma = hs_fit.estimate.matrices().implied_cov
    ll = stats.multivariate_normal(hs_x.mean(axis=0), sigma).logpdf(hs_x).sum()
    f = hs_fit.fit
    assert_allclose(f.loglik, ll, rtol=1e-10)
    assert f.n_params == 30
    assert_allclose(f.aic, -2 * ll + 2 * 30, rtol=1e-10)
    assert_allclose(f.bic, -2 * ll + 30 * np.log(301), rtol=1e-10)
    assert_allclose(f.sabic, -2 * ll + 30 * np.log(303 / 24), rtol=1e-10)


def test_cfi_is_bounded_and_tli_follows_its_formula():
    # Bentler (1990): CFI = 1 when T ≤ df; Tucker & Lewis (1973) by hand
    cfi, tli = comparative_fit(20.0, 24, 918.852, 36)
    assert cfi == 1.0
    assert tli == pytest.approx((918.852 / 36 - 20 / 24) / (918.852 / 36 - 1), rel=1e-12)
