"""Item screening and Mardia's multivariate skewness and kurtosis.

Outside references: numpy, pandas and scipy.stats recompute the item
statistics in each test; Mardia's statistics are checked against the direct
O(n^2) definition (Mardia 1970), against scipy for one item, against a
published worked example (recalled), against the affine invariance Mardia
proved, and by seeded simulation from a multivariate normal model.
"""

import json
import math
import tracemalloc
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from scalewright import screening
from scalewright.itemdata import ItemData
from scalewright.screening import Mardia, Screening, mardia_statistics, screen

# Fisher's iris data, species setosa (n = 50): sepal length, sepal width, petal length,
# petal width in cm, each as two digits without the decimal point (Fisher 1936, Annals of
# Eugenics 7:179-188; measurements by Anderson 1935).
SETOSA = """
51351402 49301402 47321302 46311502 50361402 54391704 46341403 50341502 44291402 49311501
54371502 48341602 48301401 43301101 58401202 57441504 54391304 51351403 57381703 51381503
54341702 51371504 46361002 51331705 48341902 50301602 50341604 52351502 52341402 47321602
48311602 54341504 52411501 55421402 49311502 50321202 55351302 49361401 44301302 51341502
50351303 45231303 44321302 50351606 51381904 48301403 51381602 46321402 53371502 50331402
"""


def setosa() -> np.ndarray:
    rows = SETOSA.split()
    return np.array([[int(r[k:k + 2]) / 10 for k in range(0, 8, 2)] for r in rows])


def item_data(values: np.ndarray, items=None) -> ItemData:
    items = tuple(items or (f"q{j + 1}" for j in range(values.shape[1])))
    return ItemData(file=Path("answers.csv"), sha256="", n_rows=values.shape[0], items=items,
                    values=values, group=None, row_ids=None, columns=items)


def likert_with_holes(n=300, p=5, seed=11) -> np.ndarray:
    rng = np.random.default_rng(seed)
    latent = rng.normal(size=(n, 1)) + rng.normal(size=(n, p))
    values = np.clip(np.round(3 + latent + rng.exponential(0.7, size=(n, p))), 1, 5)
    values[rng.random((n, p)) < 0.05] = np.nan
    return values


def brute_force_mardia(x: np.ndarray) -> tuple[float, float]:
    """b1,p and b2,p straight from Mardia's (1970) definitions, with the n x n matrix."""
    n = x.shape[0]
    d = x - x.mean(axis=0)
    g = d @ np.linalg.inv(d.T @ d / n) @ d.T
    return float((g ** 3).sum() / n ** 2), float((np.diag(g) ** 2).mean())


# --------------------------------------------------------------------------- item statistics

@pytest.fixture
def likert():
    values = likert_with_holes()
    return values, screen(item_data(values))


def test_item_mean_sd_min_max_match_numpy_and_pandas(likert):
    values, result = likert
    frame = pd.DataFrame(values)
    for j, item in enumerate(result.items):
        # rtol 1e-12: the same arithmetic, only the order of the sums may differ
        np.testing.assert_allclose(item.mean, np.nanmean(values[:, j]), rtol=1e-12)
        np.testing.assert_allclose(item.sd, frame[j].std(), rtol=1e-12)  # pandas: ddof=1
        np.testing.assert_allclose(item.sd, np.nanstd(values[:, j], ddof=1), rtol=1e-12)
        assert (item.min, item.max) == (np.nanmin(values[:, j]), np.nanmax(values[:, j]))
        assert item.n == frame[j].count()


def test_skewness_and_kurtosis_are_scipys_moment_estimators(likert):
    values, result = likert
    for j, item in enumerate(result.items):
        # scipy.stats with bias=True gives g1 and g2 (Joanes & Gill 1998); rtol 1e-10 for
        # rounding in the third and fourth powers
        np.testing.assert_allclose(item.skewness, stats.skew(values[:, j], bias=True,
                                                             nan_policy="omit"), rtol=1e-10)
        np.testing.assert_allclose(item.excess_kurtosis,
                                   stats.kurtosis(values[:, j], fisher=True, bias=True,
                                                  nan_policy="omit"), rtol=1e-10)


def test_skewness_is_not_the_adjusted_estimator(likert):
    # the chosen convention must be distinguishable from the adjusted G1 (bias=False)
    values, result = likert
    adjusted = stats.skew(values[:, 0], bias=False, nan_policy="omit")
    assert not math.isclose(result.items[0].skewness, adjusted, rel_tol=1e-6)


def test_frequencies_and_distinct_values_match_pandas_value_counts(likert):
    values, result = likert
    for j, item in enumerate(result.items):
        counts = pd.Series(values[:, j]).value_counts()
        assert item.frequencies == {float(k): int(v) for k, v in counts.items()}
        assert item.n_distinct == counts.size


def test_frequencies_are_left_out_above_15_distinct_values():
    values = np.arange(16, dtype=float)[:, None].repeat(2, axis=1)
    values[:, 1] = values[:, 1] % 15
    result = screen(item_data(values))
    assert result.items[0].n_distinct == 16 and result.items[0].frequencies == {}
    assert result.items[1].n_distinct == 15 and len(result.items[1].frequencies) == 15



def test_frequencies_are_left_out_for_answers_that_are_not_whole_numbers():
    # answer counts describe categories; a continuous score with a few distinct
    # values (2.2333 beside 2.23333, say) has no categories to count
    x = np.column_stack([np.tile([2.2333, 2.23333, 3.5, 4.0], 25), np.tile([1.0, 2, 3, 4], 25)])
    result = screen(item_data(x))
    assert result.items[0].n_distinct == 4 and result.items[0].frequencies == {}
    # the counts are those built in: np.tile repeats each of 1, 2, 3, 4 twenty-five times
    assert result.items[1].frequencies == {1.0: 25, 2.0: 25, 3.0: 25, 4.0: 25}

def test_percent_missing_is_a_percentage_of_all_rows(likert):
    values, result = likert
    for j, item in enumerate(result.items):
        np.testing.assert_allclose(item.pct_missing, 100 * np.isnan(values[:, j]).mean(),
                                   rtol=1e-12)


def test_undefined_statistics_are_nan_and_none_in_the_dict():
    values = np.array([[3.0, 1.0], [3.0, 2.0], [3.0, 4.0], [3.0, 5.0]])  # first item constant
    result = screen(item_data(values))
    assert math.isnan(result.items[0].skewness) and math.isnan(result.items[0].excess_kurtosis)
    assert result.items[0].sd == 0.0
    entry = result.to_dict()["items"][0]
    assert entry["skewness"] is None and entry["excess_kurtosis"] is None


def test_to_dict_is_json_with_text_answer_keys(likert):
    _, result = likert
    out = result.to_dict()
    json.dumps(out, allow_nan=False)  # raises on NaN or non-JSON types
    assert set(out["items"][0]["frequencies"]) <= {"1", "2", "3", "4", "5"}
    assert out["mardia"]["p"] == 5 and out["n_complete"] == result.n_complete


# --------------------------------------------------------------------------- Mardia

@pytest.mark.parametrize("n, p", [(30, 2), (120, 5), (400, 9), (60, 20), (250, 30)])
def test_mardia_matches_the_direct_double_sum(n, p):
    # the first three take the third-moment tensor route, the last two (3n < 2p²) the
    # route through the n x n matrix of z_i'z_j
    rng = np.random.default_rng(n + p)
    x = rng.exponential(size=(n, p)) @ rng.normal(size=(p, p))  # skewed, correlated
    result = mardia_statistics(x)
    b1, b2 = brute_force_mardia(x)
    # rtol 1e-9: two exact algebraic routes to the same sums, differing only in rounding
    np.testing.assert_allclose(result.skewness, b1, rtol=1e-9)
    np.testing.assert_allclose(result.kurtosis, b2, rtol=1e-9)


def test_mardia_blocks_of_rows_add_up_to_the_whole(monkeypatch):
    rng = np.random.default_rng(5)
    x = rng.gamma(2.0, size=(257, 4))
    monkeypatch.setattr(screening, "_CHUNK_CELLS", 4 * 10)  # blocks of 10 rows, last one short
    result = mardia_statistics(x)
    b1, b2 = brute_force_mardia(x)
    np.testing.assert_allclose([result.skewness, result.kurtosis], [b1, b2], rtol=1e-9)


def test_mardia_blocks_of_rows_add_up_to_the_whole_on_the_pairs_route(monkeypatch):
    rng = np.random.default_rng(6)
    x = rng.gamma(2.0, size=(97, 24))                   # 3n < 2p²: the n x n route
    monkeypatch.setattr(screening, "_CHUNK_CELLS", 97 * 10)  # blocks of 10 rows, last one short
    result = mardia_statistics(x)
    b1, b2 = brute_force_mardia(x)
    np.testing.assert_allclose([result.skewness, result.kurtosis], [b1, b2], rtol=1e-9)


@pytest.mark.parametrize("n, p", [(400, 5), (60, 12)])    # the tensor and the n x n route
def test_screen_distances_are_the_mahalanobis_distances_the_outlier_screen_uses(n, p):
    # outside reference: scipy's Mahalanobis distance with the ML covariance (÷n) of the
    # complete rows; the outlier screen given the screen's distances flags what it
    # flags on its own
    from scipy.spatial.distance import mahalanobis
    from scalewright.outliers import mahalanobis_outliers
    rng = np.random.default_rng(p)
    x = rng.gamma(2.0, size=(n, p))
    x[3, 1] = np.nan
    x[7] = 12.0 * (-1) ** np.arange(p)            # planted far from the rest
    result = screen(item_data(x))
    rows = x[~np.isnan(x).any(axis=1)]
    vi = np.linalg.inv(np.cov(rows, rowvar=False, bias=True))
    reference = [mahalanobis(r, rows.mean(axis=0), vi) ** 2 for r in rows]
    np.testing.assert_allclose(result.distances, reference, rtol=1e-9)
    reused, own = mahalanobis_outliers(x, distances=result.distances), mahalanobis_outliers(x)
    assert (reused.n_checked, reused.n_flagged) == (own.n_checked, own.n_flagged) and own.n_flagged
    assert [row for row, _, _ in reused.largest] == [row for row, _, _ in own.largest]
    np.testing.assert_allclose([d2 for _, d2, _ in reused.largest],
                               [d2 for _, d2, _ in own.largest], rtol=1e-9)


def test_mardia_tests_follow_the_stated_formulas():
    x = np.random.default_rng(9).gamma(3.0, size=(150, 3))
    m = mardia_statistics(x)
    n, p = 150, 3
    b1, b2 = brute_force_mardia(x)
    # Mardia (1970): n b1 / 6 ~ chi2 on p(p+1)(p+2)/6 df; Mardia (1974): b2 has mean
    # p(p+2)(n-1)/(n+1) and variance 8p(p+2)(n-3)(n-p-1)(n-p+1)/((n+1)^2(n+3)(n+5))
    assert m.skewness_df == p * (p + 1) * (p + 2) / 6 == 10
    np.testing.assert_allclose(m.skewness_chi2, n * b1 / 6, rtol=1e-9)
    np.testing.assert_allclose(m.skewness_p, stats.chi2.sf(n * b1 / 6, 10), rtol=1e-8)
    mean = p * (p + 2) * (n - 1) / (n + 1)
    variance = 8 * p * (p + 2) * (n - 3) * (n - p - 1) * (n - p + 1) / ((n + 1) ** 2 * (n + 3) * (n + 5))
    z = (b2 - mean) / math.sqrt(variance)
    np.testing.assert_allclose(m.kurtosis_z, z, rtol=1e-9)
    np.testing.assert_allclose(m.kurtosis_p, 2 * stats.norm.sf(abs(z)), rtol=1e-8)


def test_mardia_with_one_item_is_squared_skewness_and_kurtosis_plus_three():
    x = np.random.default_rng(2).lognormal(size=(500, 1))
    m = mardia_statistics(x)
    # for p = 1, b1,1 = g1^2 and b2,1 = g2 + 3 (Mardia 1970); g1, g2 from scipy with bias=True
    np.testing.assert_allclose(m.skewness, stats.skew(x[:, 0], bias=True) ** 2, rtol=1e-10)
    np.testing.assert_allclose(m.kurtosis, stats.kurtosis(x[:, 0], bias=True) + 3, rtol=1e-10)


def test_mardia_on_iris_setosa_matches_the_published_example():
    # Worked example on Fisher's iris setosa (n = 50, p = 4): skewness statistic n b1/6 =
    # 25.6643 (p = .1772 on 20 df), kurtosis z = 1.2950 (p = .1953); Korkmaz, Goksuluk &
    # Zararsiz (2014), from memory -- tolerance 1e-4 absolute, looser than the printed digits.
    # That source centres b2 at p(p+2) with variance 8p(p+2)/n (Mardia 1970), so b2 is
    # recovered from its z; this module's z uses the exact moments (Mardia 1974) instead.
    m = mardia_statistics(setosa())
    assert (m.n, m.p, m.skewness_df) == (50, 4, 20)
    np.testing.assert_allclose([m.skewness_chi2, m.skewness_p], [25.6643, 0.1772], atol=1e-4)
    b2_published = 4 * 6 + 1.2950 * math.sqrt(8 * 4 * 6 / 50)
    np.testing.assert_allclose(m.kurtosis, b2_published, atol=1e-3)


@pytest.mark.parametrize("n, p", [(120, 40), (60, 5)])
def test_mardia_kurtosis_test_holds_its_level_in_normal_samples(n, p):
    # Statistical theory: under multivariate normality the kurtosis z is centred at 0 with
    # unit variance (Mardia 1974), so a 5% test rejects 5% of normal samples.  With the
    # large-sample moments (Mardia 1970) z would sit near -2.6 at n = 120, p = 40, and
    # the test would reject most normal samples.  400 seeded samples: the rate's binomial
    # SD is 0.011, so [0.02, 0.09] fails a biased test and passes a correct one.
    rng = np.random.default_rng(1974)
    z = np.array([mardia_statistics(rng.standard_normal((n, p))).kurtosis_z for _ in range(400)])
    assert abs(z.mean()) < 0.15 and 0.85 < z.std() < 1.15
    assert 0.02 <= np.mean(np.abs(z) > stats.norm.ppf(0.975)) <= 0.09


def test_mardia_is_unchanged_by_affine_rescaling_of_the_items():
    # b1,p and b2,p are invariant under x -> A x + c for nonsingular A (Mardia 1970)
    rng = np.random.default_rng(4)
    x = rng.exponential(size=(200, 4))
    a = rng.normal(size=(4, 4)) + 3 * np.eye(4)
    before, after = mardia_statistics(x), mardia_statistics(x @ a.T + rng.normal(size=4) * 10)
    # rtol 1e-8: A has condition number of a few, so rounding grows only a little
    np.testing.assert_allclose([after.skewness, after.kurtosis],
                               [before.skewness, before.kurtosis], rtol=1e-8)


def test_mardia_needs_at_least_p_plus_two_rows():
    x = np.random.default_rng(1).normal(size=(6, 5))
    assert mardia_statistics(x) is None
    assert isinstance(mardia_statistics(np.vstack([x, x[:1] + 1])), Mardia)


def test_mardia_is_none_when_an_item_copies_another():
    x = np.random.default_rng(1).normal(size=(100, 3))
    assert mardia_statistics(np.column_stack([x, x[:, 0]])) is None


def test_screen_runs_mardia_on_the_complete_rows_only(likert):
    values, result = likert
    complete = ~np.isnan(values).any(axis=1)
    assert result.n_complete == complete.sum() == result.mardia.n
    b1, b2 = brute_force_mardia(values[complete])
    np.testing.assert_allclose([result.mardia.skewness, result.mardia.kurtosis], [b1, b2],
                               rtol=1e-9)


def test_screen_gives_no_mardia_when_too_few_rows_are_complete():
    values = likert_with_holes(n=40, p=5)
    values[:36, 0] = np.nan  # four complete rows at most, p + 2 = 7 needed
    result = screen(item_data(values))
    assert isinstance(result, Screening) and result.mardia is None
    assert result.to_dict()["mardia"] is None


def test_mardia_memory_does_not_grow_with_blocks_of_rows(monkeypatch):
    from scalewright import outliers               # its blocks give the distances
    monkeypatch.setattr(screening, "_CHUNK_CELLS", 100_000)  # 0.8 MB blocks
    monkeypatch.setattr(outliers, "_CHUNK_CELLS", 100_000)
    x = np.random.default_rng(0).normal(size=(200_000, 5))
    tracemalloc.start()
    mardia_statistics(x)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    # one centred copy of the data (8 MB) plus a few blocks; the n x n matrix would be 320 GB
    assert peak < 1.5 * x.nbytes


# --------------------------------------------------------------------------- under normality

def simulate(n: int, p: int, reps: int, seed: int) -> list[Mardia]:
    rng = np.random.default_rng(seed)
    sigma = 0.5 * np.eye(p) + 0.5  # equicorrelated items, r = .5
    chol = np.linalg.cholesky(sigma)
    return [mardia_statistics(rng.normal(size=(n, p)) @ chol.T) for _ in range(reps)]


def test_under_normality_the_tests_reject_about_five_percent():
    results = simulate(n=500, p=4, reps=400, seed=20240601)
    skew_rate = np.mean([m.skewness_p < 0.05 for m in results])
    kurt_rate = np.mean([m.kurtosis_p < 0.05 for m in results])
    # nominal .05; with 400 replications the binomial SD is .011, and the asymptotic tests run
    # a little conservative at n = 500, so accept .02 to .09
    assert 0.02 <= skew_rate <= 0.09
    assert 0.02 <= kurt_rate <= 0.09


def test_under_normality_mean_kurtosis_matches_its_exact_expectation():
    n, p, reps = 200, 3, 400
    b2 = np.array([m.kurtosis for m in simulate(n, p, reps, seed=7)])
    # E[b2,p] = p(p+2)(n-1)/(n+1) for normal data (Mardia 1970); within 3 simulation SEs
    exact = p * (p + 2) * (n - 1) / (n + 1)
    assert abs(b2.mean() - exact) < 3 * b2.std(ddof=1) / math.sqrt(reps)


def test_skewed_answers_are_detected():
    rng = np.random.default_rng(3)
    x = rng.chisquare(3, size=(300, 4)) + rng.normal(size=(300, 1))
    m = mardia_statistics(x)
    assert m.skewness_p < 1e-6 and m.kurtosis_p < 1e-3


@pytest.mark.parametrize("n, p", [(400, 5), (60, 12)])    # the tensor and the n x n route
def test_a_skewness_summed_on_another_thread_is_the_one_summed_here(n, p):
    # the check sums Mardia's skewness on a second thread (screen(..., pool)); the
    # statistics, read after the pool is closed, are the same numbers to the last bit
    from concurrent.futures import Future, ThreadPoolExecutor
    x = np.random.default_rng(n).gamma(2.0, size=(n, p))
    here = screen(item_data(x))
    with ThreadPoolExecutor(max_workers=1) as pool:
        there = screen(item_data(x), pool=pool)
        assert isinstance(there.mardia.cube_sum, Future)
        assert there.mardia.kurtosis_p == here.mardia.kurtosis_p   # at once, not waited for
    assert there.to_dict() == here.to_dict()
    b1, _ = brute_force_mardia(x)
    np.testing.assert_allclose(there.mardia.skewness, b1, rtol=1e-9)


def test_a_set_stop_flag_ends_either_skewness_route_without_a_number():
    # screen(..., stop): the check sets the flag when a later stage fails, and the sum
    # on the second thread then gives up at its next block instead of finishing
    import threading
    from scalewright.screening import _pair_cube_sum, _tensor_cube_sum
    x = np.random.default_rng(5).standard_normal((5, 200))
    stop = threading.Event()
    assert np.isfinite(_pair_cube_sum(x, stop)) and np.isfinite(_tensor_cube_sum(x, np.eye(5), stop))
    stop.set()
    assert math.isnan(_pair_cube_sum(x, stop)) and math.isnan(_tensor_cube_sum(x, np.eye(5), stop))
