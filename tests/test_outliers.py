"""Mahalanobis outlier screening and the item correlation matrix."""

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import stats
from scipy.spatial.distance import mahalanobis

from scalewright.outliers import item_correlations, mahalanobis_outliers


def test_distances_match_scipy_and_the_planted_row_is_flagged():
    rng = np.random.default_rng(4)
    x = rng.multivariate_normal(np.zeros(4), np.eye(4) + 0.4, size=500)
    x[17] = [6, -6, 6, -6]                       # planted far from the rest
    found = mahalanobis_outliers(x, row_labels=[f"r{i}" for i in range(500)])
    # scipy's Mahalanobis distance with the ML covariance (÷n), as the module defines it
    vi = np.linalg.inv(np.cov(x, rowvar=False, bias=True))
    d2 = mahalanobis(x[17], x.mean(axis=0), vi) ** 2
    assert found.largest[0][0] == "r17"
    assert_allclose(found.largest[0][1], d2, rtol=1e-10)
    assert_allclose(found.threshold, stats.chi2.ppf(0.999, 4), rtol=1e-12)
    assert found.n_flagged >= 1


def test_flag_rate_under_normality_is_near_the_level():
    # theory: D² ≈ χ²_p under normality, so about 0.1% of rows pass the .999 quantile
    rng = np.random.default_rng(5)
    x = rng.standard_normal((200_000, 5))
    found = mahalanobis_outliers(x)
    assert found.n_flagged / 200_000 == pytest.approx(0.001, abs=0.0004)


def test_rows_with_missing_answers_are_skipped_and_labels_kept():
    rng = np.random.default_rng(6)
    x = rng.standard_normal((50, 3))
    x[3, 1] = np.nan
    x[10] = [9, 9, -9]
    found = mahalanobis_outliers(x)
    assert found.n_checked == 49
    assert found.largest[0][0] == 11             # 1-based data row number


def test_correlations_from_complete_rows_match_numpy():
    rng = np.random.default_rng(7)
    x = rng.multivariate_normal(np.zeros(3), [[1, .5, .2], [.5, 1, .3], [.2, .3, 1]], size=300)
    out = item_correlations(x, ["a", "b", "c"])
    assert_allclose(out["matrix"], np.corrcoef(x, rowvar=False), atol=5e-5)   # rounded to 4
