"""The normal-theory ML engine against semopy (an independent ML engine) on
the same data, and against statistical theory.

Tolerance for estimates and standard errors: 1e-4 relative.  semopy is run
with ``options={"ftol": 1e-12}`` (its default stops early; see
shared/design/environment.md), so both engines sit at the same optimum and
the remaining differences are optimiser noise far below 1e-4.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import semopy
from numpy.testing import assert_allclose

from conftest import HS_CONSTRUCTS, HS_ITEMS, HS_SEMOPY, make_spec, simulate_cfa
from scalewright.evaluate import evaluate_normal

RTOL = 1e-4   # estimates and SEs against another ML engine


def semopy_fit(description, data):
    model = semopy.Model(description)
    model.fit(data, options={"ftol": 1e-12})
    return model, model.inspect(std_est=True)


def semopy_rows(table, op):
    rows = table[table["op"] == op]
    return {(r.lval, r.rval): r for r in rows.itertuples()}


def ours_by_label(result):
    est = result.estimate
    return {(p.kind, p.a, p.b): (v, s) for p, v, s in zip(est.layout.params, est.theta, est.se)}


def test_marker_estimates_and_se_match_semopy(hs_data, hs_x):
    result = evaluate_normal(make_spec(HS_CONSTRUCTS, identification="marker"), hs_x)
    _, table = semopy_fit(HS_SEMOPY, hs_data[list(HS_ITEMS)])
    ours = ours_by_label(result)
    checked = 0
    for (item, factor), row in semopy_rows(table, "~").items():
        if row.Estimate == 1.0 and row._6 == "-":      # semopy's fixed marker loading
            continue
        est, se = ours[("loading", factor, item)]
        assert_allclose(est, row.Estimate, rtol=RTOL)
        assert_allclose(se, float(row._6), rtol=RTOL)
        checked += 1
    for (a, b), row in semopy_rows(table, "~~").items():
        key = ("residual_covariance", a, b) if a in HS_ITEMS else None
        if key is None:
            key = next(k for k in ours if k[0] == "factor_covariance" and {k[1], k[2]} == {a, b})
        est, se = ours[key]
        assert_allclose(est, row.Estimate, rtol=RTOL)
        assert_allclose(se, float(row._6), rtol=RTOL)
        checked += 1
    assert checked == 6 + 6 + 9       # free loadings, latent (co)variances, residual variances


def test_standardized_loadings_match_semopy_and_do_not_depend_on_scaling(hs_data, hs_x):
    marker = evaluate_normal(make_spec(HS_CONSTRUCTS, identification="marker"), hs_x)
    unit = evaluate_normal(make_spec(HS_CONSTRUCTS), hs_x)
    _, table = semopy_fit(HS_SEMOPY, hs_data[list(HS_ITEMS)])
    semopy_std = {(item, f): r._5 for (item, f), r in semopy_rows(table, "~").items()}
    for result in (marker, unit):
        for row in result.to_dict()["loadings"]:
            assert_allclose(row["std_estimate"], semopy_std[(row["item"], row["construct"])],
                            rtol=RTOL)
    # the two scalings are the same model: same chi-square (theory: reparametrisation)
    assert_allclose(marker.fit.chi_square, unit.fit.chi_square, rtol=1e-9)


def test_items_in_wildly_different_units_give_the_same_fit_and_standardized_solution(hs_x):
    # theory: normal-theory ML is scale invariant, so rescaling item i by c_i leaves χ² and the
    # standardized solution unchanged and multiplies loadings and their SEs by c_i. Items
    # measured in units 10⁸ apart (variances 10¹⁶ apart) are legal input; on these data
    # semopy 2.3.11 stops at χ² = 1152 instead of 85.3, so the check is against theory
    scales = np.array([1e-4, 1.0, 1e4, 1e-2, 1.0, 1e3, 1e2, 1.0, 1e-3])
    plain = evaluate_normal(make_spec(HS_CONSTRUCTS), hs_x).to_dict()
    scaled = evaluate_normal(make_spec(HS_CONSTRUCTS), hs_x * scales).to_dict()
    assert scaled["converged"]
    assert_allclose(scaled["fit"]["chi_square"], plain["fit"]["chi_square"], rtol=1e-8)
    factor = dict(zip(HS_ITEMS, scales))
    for a, b in zip(plain["loadings"], scaled["loadings"]):
        assert_allclose(b["std_estimate"], a["std_estimate"], rtol=RTOL)
        assert_allclose(b["estimate"], a["estimate"] * factor[a["item"]], rtol=RTOL)
        assert_allclose(b["se"], a["se"] * factor[a["item"]], rtol=RTOL)


def test_items_in_units_far_apart_leave_no_numerical_warnings_on_the_console(tmp_path, hs_data):
    # the same rescaled items through a whole robust check: the inverses of the implied
    # covariance and of the information are by Cholesky (spd_inverse), which, unlike an
    # LU inverse with its condition estimate, does not print scipy's LinAlgWarning for
    # a matrix that is only badly scaled
    import warnings

    from scipy.linalg import LinAlgWarning

    import scalewright

    scales = np.array([1e-4, 1.0, 1e4, 1e-2, 1.0, 1e3, 1e2, 1.0, 1e-3])
    (hs_data[list(HS_ITEMS)] * scales).to_csv(tmp_path / "units.csv", index=False)
    (tmp_path / "units.yaml").write_text(
        "study: Units\ndata:\n  file: units.csv\nestimation:\n  method: robust\nmodels:\n"
        "  three:\n    constructs:\n      visual: [x1, x2, x3]\n      textual: [x4, x5, x6]\n"
        "      speed: [x7, x8, x9]\n")
    with warnings.catch_warnings():
        warnings.simplefilter("error", LinAlgWarning)
        result = scalewright.check(tmp_path / "units.yaml")
    assert result.models[0].converged


def test_published_standardized_loadings_and_correlations(hs_x):
    # shared/design/references.md [computed with semopy 2.3.11], three decimals
    result = evaluate_normal(make_spec(HS_CONSTRUCTS), hs_x).to_dict()
    std = [round(r["std_estimate"], 3) for r in result["loadings"]]
    assert std == [0.772, 0.424, 0.581, 0.852, 0.855, 0.838, 0.570, 0.723, 0.665]
    corr = {(r["a"], r["b"]): r["estimate"] for r in result["construct_correlations"]}
    assert_allclose([corr[("visual", "textual")], corr[("visual", "speed")],
                     corr[("textual", "speed")]], [0.459, 0.471, 0.283], atol=5e-4)


def test_correlation_se_is_invariant_to_the_scaling(hs_x):
    # theory: ML is invariant under reparametrisation, so the delta-method SE of
    # a construct correlation in the marker scaling (whose covariance matrix of
    # estimates matches semopy above) equals the SE of the same correlation
    # estimated directly as a free parameter under unit-variance scaling
    marker = evaluate_normal(make_spec(HS_CONSTRUCTS, identification="marker"), hs_x)
    unit = evaluate_normal(make_spec(HS_CONSTRUCTS), hs_x)
    direct = {frozenset((p.a, p.b)): (v, s) for p, v, s in
              zip(unit.estimate.layout.params, unit.estimate.theta, unit.estimate.se)
              if p.kind == "factor_covariance"}
    rows = marker.to_dict()["construct_correlations"]
    assert len(rows) == 3
    for row in rows:
        value, se = direct[frozenset((row["a"], row["b"]))]
        assert_allclose(row["estimate"], value, rtol=1e-6)
        assert_allclose(row["se"], se, rtol=1e-6)    # exact Jacobian (modelresult._correlation_se)


def test_cross_loading_and_residual_covariance_match_semopy(hs_data, hs_x):
    spec = make_spec(HS_CONSTRUCTS, identification="marker", cross_loadings={"visual": ["x9"]},
                     residual_covariances=[("x2", "x3")])
    result = evaluate_normal(spec, hs_x)
    model, table = semopy_fit(HS_SEMOPY + "\nvisual =~ x9\nx2 ~~ x3", hs_data[list(HS_ITEMS)])
    ours = ours_by_label(result)
    loading = semopy_rows(table, "~")[("x9", "visual")]
    assert_allclose(ours[("loading", "visual", "x9")][0], loading.Estimate, rtol=RTOL)
    assert_allclose(ours[("loading", "visual", "x9")][1], float(loading._6), rtol=RTOL)
    rc = [r for r in table[table["op"] == "~~"].itertuples() if {r.lval, r.rval} == {"x2", "x3"}][0]
    assert_allclose(ours[("residual_covariance", "x2", "x3")][0], rc.Estimate, rtol=RTOL)
    stats = semopy.calc_stats(model).T["Value"]
    assert_allclose(result.fit.chi_square, stats["chi2"], rtol=RTOL)
    assert result.fit.df == int(stats["DoF"]) == 22


def test_higher_order_over_three_constructs_has_the_correlated_models_fit(hs_x):
    # theory: with three first-order constructs the higher-order part is just
    # identified, so the implied covariance (and chi-square) equals the
    # correlated three-construct model's
    corr = evaluate_normal(make_spec(HS_CONSTRUCTS), hs_x)
    for ident in ("unit-variance", "marker"):
        ho = evaluate_normal(make_spec(HS_CONSTRUCTS, higher_order={"g": ["visual", "textual", "speed"]},
                                       identification=ident), hs_x)
        assert ho.converged
        assert ho.fit.df == corr.fit.df
        assert_allclose(ho.fit.chi_square, corr.fit.chi_square, rtol=1e-7)
        assert_allclose(ho.estimate.matrices().implied_cov, corr.estimate.matrices().implied_cov,
                        rtol=1e-5)


def test_higher_order_paths_match_semopy():
    # four first-order constructs make the higher-order part testable; data
    # simulated (seeded) from a higher-order population, fitted by both engines
    rng = np.random.default_rng(44)
    gamma = np.array([0.8, 0.7, 0.6, 0.75])
    phi = np.outer(gamma, gamma)
    np.fill_diagonal(phi, 1.0)
    lam = np.zeros((12, 4))
    for j in range(4):
        lam[3 * j:3 * j + 3, j] = [0.7, 0.6, 0.65]
    x, _ = simulate_cfa(rng, lam, phi, 1000)
    names = [f"i{k}" for k in range(1, 13)]
    constructs = {c: tuple(names[3 * j:3 * j + 3]) for j, c in enumerate("abcd")}
    spec = make_spec(constructs, higher_order={"g": list(constructs)}, identification="marker")
    result = evaluate_normal(spec, x)
    desc = "\n".join(f"{c} =~ " + " + ".join(its) for c, its in constructs.items())
    model, table = semopy_fit(desc + "\ng =~ a + b + c + d", pd.DataFrame(x, columns=names))
    stats = semopy.calc_stats(model).T["Value"]
    assert result.converged and not result.warnings
    assert result.fit.df == int(stats["DoF"]) == 50
    assert_allclose(result.fit.chi_square, stats["chi2"], rtol=RTOL)
    paths = {(r["higher"], r["construct"]): r for r in result.to_dict()["higher_order_paths"]}
    checked = 0
    for (lval, rval), row in semopy_rows(table, "~").items():
        if rval == "g" and row._6 != "-":
            assert_allclose(paths[("g", lval)]["estimate"], row.Estimate, rtol=RTOL)
            assert_allclose(paths[("g", lval)]["se"], float(row._6), rtol=RTOL)
            checked += 1
    assert checked == 3


def test_bifactor_matches_semopy_with_orthogonal_factors():
    # data simulated (seeded) from the bifactor population of references.md
    # (general .6, specific .4 and .3), a third specific factor at .35; both
    # engines scale every factor by its first item, all factors uncorrelated
    rng = np.random.default_rng(5)
    lam = np.zeros((9, 4))
    lam[:, 0] = 0.6
    lam[0:3, 1], lam[3:6, 2], lam[6:9, 3] = 0.4, 0.3, 0.35
    x, _ = simulate_cfa(rng, lam, np.eye(4), 2000)
    names = [f"i{k}" for k in range(1, 10)]
    constructs = {"a": tuple(names[0:3]), "b": tuple(names[3:6]), "c": tuple(names[6:9])}
    result = evaluate_normal(make_spec(constructs, general="g", identification="marker"), x)
    desc = ("g =~ " + " + ".join(names) + "\n"
            + "\n".join(f"{c} =~ " + " + ".join(its) for c, its in constructs.items())
            + "\ng ~~ 0*a\ng ~~ 0*b\ng ~~ 0*c\na ~~ 0*b\na ~~ 0*c\nb ~~ 0*c")
    model, table = semopy_fit(desc, pd.DataFrame(x, columns=names))
    stats = semopy.calc_stats(model).T["Value"]
    assert result.converged and not result.warnings
    assert result.fit.df == int(stats["DoF"]) == 18
    assert_allclose(result.fit.chi_square, stats["chi2"], rtol=RTOL)
    ours = ours_by_label(result)
    checked = 0
    for (item, factor), row in semopy_rows(table, "~").items():
        if row._6 != "-":
            assert_allclose(ours[("loading", factor, item)][0], row.Estimate, rtol=RTOL)
            assert_allclose(ours[("loading", factor, item)][1], float(row._6), rtol=RTOL)
            checked += 1
    assert checked == 8 + 6


def test_bifactor_on_holzinger_swineford_is_reported_as_not_converging(hs_x):
    # the nine tests do not support a bifactor structure (the 'visual' specific
    # factor collapses and x3's residual variance runs negative): the engine must
    # say so rather than print numbers as if they were an answer
    result = evaluate_normal(make_spec(HS_CONSTRUCTS, general="g"), hs_x)
    assert not result.converged
    assert result.warnings[0].startswith("The estimation did not converge")


def test_saturated_model_reproduces_the_sample_covariance(hs_x):
    # theory: three items on one construct leave df = 0, so Σ̂ = S and χ² = 0
    x = hs_x[:, :3]
    result = evaluate_normal(make_spec({"visual": ("x1", "x2", "x3")}), x)
    s = np.cov(x, rowvar=False, bias=True)
    assert result.fit.df == 0
    assert_allclose(result.estimate.matrices().implied_cov, s, rtol=1e-8)
    assert abs(result.fit.chi_square) < 1e-8


def test_mean_chi_square_under_a_true_model_is_near_df():
    # theory: under a correct model the LR statistic is asymptotically χ²(df);
    # with N = 500 and 200 samples the mean's Monte Carlo SE is √(2·df/200)
    rng = np.random.default_rng(20261201)
    lam = np.zeros((9, 3))
    lam[0:3, 0] = [0.7, 0.6, 0.8]
    lam[3:6, 1] = [0.5, 0.7, 0.6]
    lam[6:9, 2] = [0.8, 0.7, 0.5]
    phi = np.array([[1, 0.3, 0.4], [0.3, 1, 0.2], [0.4, 0.2, 1]])
    spec = make_spec({"a": ("i1", "i2", "i3"), "b": ("i4", "i5", "i6"), "c": ("i7", "i8", "i9")})
    chis = []
    for _ in range(200):
        x, _ = simulate_cfa(rng, lam, phi, 500)
        chis.append(evaluate_normal(spec, x).fit.chi_square)
    df = 24
    assert abs(np.mean(chis) - df) / df < 0.05
    rejection = np.mean(np.array(chis) > 36.415)      # scipy.stats.chi2.ppf(.95, 24)
    assert 0.02 <= rejection <= 0.10


def test_estimates_approach_population_values_as_n_grows():
    # theory: ML is consistent, errors shrink like 1/√N
    rng = np.random.default_rng(7)
    lam = np.zeros((6, 2))
    lam[0:3, 0] = [0.8, 0.7, 0.6]
    lam[3:6, 1] = [0.5, 0.6, 0.7]
    phi = np.array([[1, 0.4], [0.4, 1]])
    spec = make_spec({"a": ("i1", "i2", "i3"), "b": ("i4", "i5", "i6")})
    errors = []
    for n in (250, 4000, 64000):
        x, _ = simulate_cfa(rng, lam, phi, n)
        d = evaluate_normal(spec, x).to_dict()
        est = np.array([r["estimate"] for r in d["loadings"]])
        errors.append(np.max(np.abs(est - lam[lam != 0])))
    assert errors[2] < errors[0]
    assert errors[2] < 0.02     # ~4 SE at N = 64,000 (SE ≈ 0.004)


def test_heywood_case_is_the_unbounded_optimum_and_is_reported(hs_data, hs_x):
    # with x7~~x8 freed the ML optimum has a negative residual variance for x8;
    # semopy bounds variances at zero and stops at a higher chi-square (52.286,
    # computed with semopy 2.3.11, ftol 1e-12), ours is the unbounded minimum
    spec = make_spec(HS_CONSTRUCTS, identification="marker", cross_loadings={"visual": ["x9"]},
                     residual_covariances=[("x7", "x8")])
    result = evaluate_normal(spec, hs_x)
    model, _ = semopy_fit(HS_SEMOPY + "\nvisual =~ x9\nx7 ~~ x8", hs_data[list(HS_ITEMS)])
    bounded = semopy.calc_stats(model).T["Value"]["chi2"]
    assert result.converged
    assert result.fit.chi_square < bounded
    assert any("'x8' has a negative residual variance" in w for w in result.warnings)


def test_negative_residual_variance_is_reported_not_hidden():
    # theory: for one factor, λ1² = r12·r13/r23; with r12 = r13 = .8 and r23 = .5
    # that is 1.28 > 1, so the ML solution has a negative residual variance for i1
    rng = np.random.default_rng(3)
    cov = np.array([[1.0, 0.8, 0.8, 0.4], [0.8, 1.0, 0.5, 0.3],
                    [0.8, 0.5, 1.0, 0.3], [0.4, 0.3, 0.3, 1.0]])
    x = rng.multivariate_normal(np.zeros(4), cov, size=2000)
    result = evaluate_normal(make_spec({"a": ("i1", "i2", "i3", "i4")}), x)
    heywood = [w for w in result.warnings if "negative residual variance" in w]
    assert heywood and "'i1'" in heywood[0]
    assert result.to_dict()["residual_variances"][0]["estimate"] < 0


TWO_ITEM_CONSTRUCTS = make_spec({"a": ("i1", "i2"), "b": ("i3", "i4")})


def _uncorrelated_pairs(seed: int, centred: bool) -> np.ndarray:
    """Two two-item constructs whose items' cross-covariances are removed by
    regression: exactly zero when the columns are centred first, sampling
    noise of the means' size otherwise."""
    lam = np.zeros((4, 2))
    lam[0:2, 0] = [0.7, 0.7]
    lam[2:4, 1] = [0.6, 0.6]
    x, _ = simulate_cfa(np.random.default_rng(seed), lam, np.eye(2), 1000)
    if centred:
        x -= x.mean(axis=0)
    x[:, 2:] -= x[:, :2] @ np.linalg.lstsq(x[:, :2], x[:, 2:], rcond=None)[0]
    return x


def test_unidentified_model_names_the_construct():
    # two two-item constructs that do not correlate at all in the sample: each
    # has two loadings to explain one covariance, so the information matrix is
    # singular (theory: Bollen 1989, p. 244, the two-indicator rule fails)
    result = evaluate_normal(TWO_ITEM_CONSTRUCTS, _uncorrelated_pairs(11, centred=True))
    text = " ".join(result.warnings)
    assert "not identified" in text
    assert "'a'" in text or "'b'" in text
    assert np.all(np.isnan(result.estimate.se))


def test_nearly_unidentified_model_is_named_but_keeps_its_standard_errors():
    # the same two-item constructs correlating only by sampling noise
    result = evaluate_normal(TWO_ITEM_CONSTRUCTS, _uncorrelated_pairs(12, centred=False))
    text = " ".join(result.warnings)
    assert "nearly singular" in text and ("'a'" in text or "'b'" in text)


def test_secant_correction_satisfies_the_secant_equation_and_folds_without_change():
    # Dennis, Gay & Welsch (1981): after the structured BFGS update, B = I + C maps the
    # last step s to the gradient change y (the secant equation); folding the rank-one
    # terms into a matrix must not change C
    from scalewright.estimate.fisher import _MAX_TERMS, _Correction
    rng = np.random.default_rng(81)
    q = 12
    root = rng.normal(size=(q, q))
    info = root @ root.T + q * np.eye(q)
    correction = _Correction()
    dense = np.zeros((q, q))
    for _ in range(_MAX_TERMS // 2 + 3):           # enough updates to fold at least once
        s = rng.normal(size=q)
        y = (info + np.eye(q)) @ s + 0.1 * rng.normal(size=q)
        if y @ s <= 0:
            continue
        correction = correction.updated(info, s, y)
        b = info + dense
        bs = b @ s
        dense = dense - np.outer(bs, bs) / (s @ bs) + np.outer(y, y) / (y @ s)
        np.testing.assert_allclose(correction.added_to(info) @ s, y, rtol=1e-9, atol=1e-9)
        np.testing.assert_allclose(correction.added_to(info), info + dense, rtol=1e-9, atol=1e-9)
    assert correction.base is not None


def test_information_inverse_and_its_identification_verdict_follow_the_eigenvalues():
    # the verdict is defined by the eigenvalue ratio of the unit-diagonal information
    # (numpy's eigvalsh is the reference); the norm bound that spares the
    # eigendecomposition must never change it, nor the inverse (numpy's inv)
    from scalewright.estimate.result import NEARLY_SINGULAR, SINGULAR, invert_information
    rng = np.random.default_rng(29)
    basis, _ = np.linalg.qr(rng.normal(size=(40, 40)))
    scales = rng.uniform(0.5, 3.0, 40)
    for smallest in (1e-2, 1e-5, 3e-7, 5e-8, 1e-12):
        values = np.linspace(1.0, 2.0, 40)
        values[0] = smallest
        info = (basis * values) @ basis.T * np.outer(scales, scales)
        d = np.sqrt(np.diag(info))
        spectrum = np.linalg.eigvalsh(info / np.outer(d, d))
        ratio = spectrum[0] / spectrum[-1]
        acov, involved = invert_information(info, 50)
        if ratio < SINGULAR:
            assert acov is None and involved
            continue
        assert_allclose(acov, np.linalg.inv(info) / 50, rtol=1e-6 if ratio > 1e-6 else 1e-3)
        assert bool(involved) == (ratio < NEARLY_SINGULAR)


def test_the_engine_pins_blas_to_one_thread_whatever_its_caller_set(hs_x, monkeypatch):
    # a threaded BLAS made the engine's small products several times slower on a
    # 2-core machine (benchmarks/bench_engine.py, unpinned): fit_normal pins it itself
    from threadpoolctl import threadpool_info, threadpool_limits
    import scalewright.estimate.normal as normal
    from scalewright.specify import build_layout
    seen = []
    optimiser = normal.fisher_scoring

    def watched(*args, **kwargs):
        seen.append({lib["num_threads"] for lib in threadpool_info() if lib["user_api"] == "blas"})
        return optimiser(*args, **kwargs)
    monkeypatch.setattr(normal, "fisher_scoring", watched)
    blocks = normal.complete_data_blocks(hs_x)
    with threadpool_limits(limits=2, user_api="blas"):
        normal.fit_normal(build_layout(make_spec(HS_CONSTRUCTS), blocks[0].cov), blocks)
        after = {lib["num_threads"] for lib in threadpool_info() if lib["user_api"] == "blas"}
    assert seen == [{1}] and after == {2}


@pytest.mark.parametrize("seed", range(6))
def test_random_models_match_semopy(seed):
    # outside reference: semopy 2.3.11 (ftol 1e-12) on seeded simulated data from random
    # correlated-constructs models (2-4 constructs of 3-5 items, items in arbitrary units,
    # now and then a cross-loading and a residual covariance across constructs), marker
    # identification as semopy's default; estimates and SEs within RTOL of the larger of
    # the estimate and its SE (a residual covariance near zero has no relative error to
    # speak of), chi-square within 1e-6
    rng = np.random.default_rng(1000 + seed)
    m, per = int(rng.integers(2, 5)), int(rng.integers(3, 6))
    _check_random_model_against_semopy(rng, seed, m, per, int(rng.choice([150, 400, 2000])))


@pytest.mark.parametrize("seed, m, per", [(0, 4, 12), (1, 5, 10)])
def test_random_models_of_many_items_match_semopy(seed, m, per):
    # outside reference: semopy 2.3.11 as above, for 48 and 50 items, where the implied
    # covariance is inverted through its factor structure (estimate/factor_inverse.py)
    # and cold fits end with chord steps (estimate/fisher.py)
    from scalewright.estimate import factor_inverse
    assert factor_inverse.applies(m * per, m, diagonal_residuals=True)
    rng = np.random.default_rng(2000 + seed)
    _check_random_model_against_semopy(rng, seed + 1, m, per, 1000, residual_pairs=False)


def _check_random_model_against_semopy(rng, seed, m, per, n, residual_pairs=True):
    """The random model of ``test_random_models_match_semopy`` with ``m`` constructs
    of ``per`` items and ``n`` cases; odd seeds add a cross-loading, seeds divisible
    by 3 a residual covariance (when ``residual_pairs``)."""
    items = [f"v{k}" for k in range(m * per)]
    constructs = {f"F{j}": tuple(items[j * per:(j + 1) * per]) for j in range(m)}
    loadings = np.zeros((m * per, m))
    for j in range(m):
        loadings[j * per:(j + 1) * per, j] = rng.uniform(0.4, 0.85, per)
    cross = {}
    if seed % 2:
        i = int(rng.integers(0, m * per))
        loadings[i, (i // per + 1) % m] = 0.3
        cross = {f"F{(i // per + 1) % m}": (items[i],)}
    phi = np.full((m, m), rng.uniform(0.1, 0.6))
    np.fill_diagonal(phi, 1.0)
    x, _ = simulate_cfa(rng, loadings, phi, n)
    x = x * rng.uniform(0.5, 3.0, m * per) + rng.uniform(-2.0, 5.0, m * per)
    residual = ((items[0], items[per]),) if seed % 3 == 0 and residual_pairs else ()
    result = evaluate_normal(make_spec(constructs, cross_loadings=cross,
                                       residual_covariances=residual,
                                       identification="marker"), x)
    description = "\n".join(f"{f} =~ " + " + ".join(its + cross.get(f, ()))
                            for f, its in constructs.items())
    description += "".join(f"\n{a} ~~ {b}" for a, b in residual)
    model, table = semopy_fit(description, pd.DataFrame(x, columns=items))
    ours = ours_by_label(result)
    checked = 0
    for row in table.itertuples():
        if row.op == "~":
            key = ("loading", row.rval, row.lval)
        elif row.op == "~~":
            kind = "residual_covariance" if row.lval in items else "factor_covariance"
            key = next((k for k in ((kind, row.lval, row.rval), (kind, row.rval, row.lval))
                        if k in ours), None)
        else:
            continue
        if key not in ours:                      # semopy's fixed marker loading
            assert row.op == "~" and row.Estimate == 1.0
            continue
        est, se = ours[key]
        scale = max(abs(row.Estimate), float(row._6))
        assert abs(est - row.Estimate) <= RTOL * scale
        assert abs(se - float(row._6)) <= RTOL * float(row._6)
        checked += 1
    assert checked == len(result.estimate.theta)
    chi_square = float(semopy.calc_stats(model)["chi2"].iloc[0])
    assert_allclose(result.fit.chi_square, chi_square, rtol=1e-6)


def test_the_condition_bound_never_exceeds_the_eigenvalue_ratio():
    # theory: λ_min/λ_max ≥ 1/(‖A‖₁‖A⁻¹‖₁) (a norm bounds the spectral radius; Horn &
    # Johnson 2013, ch. 5); outside reference for the ratio: numpy's eigvalsh
    from scalewright.estimate.spd_inverse import condition_bound
    rng = np.random.default_rng(7)
    for scale in (1e-12, 1e-6, 1e-2, 1.0):
        a = rng.normal(size=(12, 12))
        a = a @ a.T + scale * np.eye(12)
        values = np.linalg.eigvalsh(a)
        assert condition_bound(a, np.linalg.inv(a)) <= values[0] / values[-1] * (1 + 1e-9)
