"""The numbers of a whole check's JSON, end to end, against outside references.

Other test files check each computation where it is made; this one runs
``scalewright.check`` on a model file, as a user does, and checks the numbers
the JSON prints (so the wiring between the computations and the keys is
checked too). The data are Holzinger & Swineford (1939), 301 cases, as
semopy ships them; the references are computed in the test:

* semopy 2.3.11 (``ftol = 1e-12``, design/references.md) for the estimates,
  its Fisher information ``calc_fim`` for their covariance matrix, and
  central differences of its model-implied matrices for the delta method;
* pandas, numpy and scipy for sample statistics and distributions;
* published formulas, named beside each check; for the bifactor and
  higher-order coefficients the formulas applied to the JSON's own printed
  estimates of the demo answers (the demo data only supply numbers there;
  those estimates are checked against semopy in test_engine.py);
* for the invariance steps, a two-group likelihood written out in this file
  and maximised by Fisher scoring.

Tolerances: 1e-4 relative against semopy's estimates and what is derived from
them (DEVELOPERS.md: ML estimates and SEs against another engine); 1e-10
for the same formula on the same numbers (rounding only).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pingouin
import pytest
import semopy
from numpy.testing import assert_allclose
from scipy import linalg, optimize, special, stats

import holzinger as hz
import scalewright
from two_groups import TwoGroupReference, duplication, two_group_robust_pieces

#: relative tolerance against semopy (another ML engine, ftol 1e-12)
SEMOPY_RTOL = 1e-4
#: the same formula on the same numbers: rounding only
EXACT = 1e-10

STUDY = """\
study: Holzinger and Swineford (1939)
data:
  file: hs.csv
estimation:
  method: {method}
models:
  three:
    constructs:
      visual: [x1, x2, x3]
      textual: [x4, x5, x6]
      speed: [x7, x8, x9]
  one:
    constructs:
      general: [x1, x2, x3, x4, x5, x6, x7, x8, x9]
"""


def run_check(folder, method: str) -> dict:
    hz.data().to_csv(folder / "hs.csv", index=False)
    path = folder / f"hs-{method}.yaml"
    path.write_text(STUDY.format(method=method), encoding="utf-8")
    return scalewright.check(path).to_dict()


@pytest.fixture(scope="module")
def normal_json(tmp_path_factory):
    return run_check(tmp_path_factory.mktemp("hs-normal"), "normal")


@pytest.fixture(scope="module")
def robust_json(tmp_path_factory):
    return run_check(tmp_path_factory.mktemp("hs-robust"), "robust")


def model(out: dict, name: str = "three") -> dict:
    [found] = [m for m in out["models"] if m["name"] == name]
    return found


# --------------------------------------------------------------------------- semopy reference

class SemopyReference:
    """semopy's marker-scaled fit of the three-factor model, and the delta
    method on its Fisher information: ``f(θ̂)`` with covariance ``J acov Jᵀ``,
    ``J`` by central differences of ``f`` over semopy's parameter vector."""

    def __init__(self):
        self.fit = hz.fit(hz.THREE_FACTOR)
        self.semopy_model = self.fit.model
        self.theta = self.semopy_model.param_vals.copy()
        _, self.acov = self.semopy_model.calc_fim(inverse=True)   # (N I)⁻¹, N = 301

    def matrices(self, theta):
        m = self.semopy_model
        m.update_matrices(theta)
        lam, psi, theta_mat = m.mx_lambda.copy(), m.mx_psi.copy(), m.mx_theta.copy()
        m.update_matrices(self.theta)
        return lam, psi, theta_mat

    def jacobian(self, f, step=1e-6):
        cols = []
        for k in range(len(self.theta)):
            up, down = self.theta.copy(), self.theta.copy()
            up[k] += step
            down[k] -= step
            cols.append((f(*self.matrices(up)) - f(*self.matrices(down))) / (2 * step))
        return np.stack(cols, axis=-1)

    def value_and_se(self, f):
        value = f(*self.matrices(self.theta))
        jac = self.jacobian(f)
        return value, np.sqrt(np.einsum("ik,kl,il->i", jac, self.acov, jac))

    def item(self, name):
        return self.fit.item_names.index(name)

    def factor(self, name):
        return self.fit.factor_names.index(name)


@pytest.fixture(scope="module")
def ref():
    return SemopyReference()


# --------------------------------------------------------------------------- estimates

def test_unit_variance_loadings_and_their_se_match_semopy_by_the_delta_method(normal_json, ref):
    # The check fixes each construct's variance at 1; semopy's marker solution
    # gives the same model (ML is invariant under reparametrisation), with the
    # unit-variance loading λ·√φ and its SE by the delta method on semopy's
    # Fisher information.
    rows = model(normal_json)["loadings"]
    cells = [(ref.item(r["item"]), ref.factor(r["construct"])) for r in rows]

    def unit_loadings(lam, psi, _):
        return np.array([lam[i, f] * np.sqrt(psi[f, f]) for i, f in cells])

    value, se = ref.value_and_se(unit_loadings)
    assert_allclose([r["estimate"] for r in rows], value, rtol=SEMOPY_RTOL)
    assert_allclose([r["se"] for r in rows], se, rtol=SEMOPY_RTOL)
    # Wald z and its two-sided normal p-value (scipy)
    z = np.array([r["estimate"] / r["se"] for r in rows])
    assert_allclose([r["z"] for r in rows], z, rtol=EXACT)
    assert_allclose([r["p_value"] for r in rows], 2 * stats.norm.sf(np.abs(z)), rtol=1e-8)
    # standardized loadings: semopy's standardized solution
    table = ref.fit.estimates[ref.fit.estimates.op == "~"]
    std = {(c, i): v for c, i, v in zip(table.rval, table.lval, table["Est. Std"])}
    assert_allclose([r["std_estimate"] for r in rows],
                    [std[r["construct"], r["item"]] for r in rows], rtol=SEMOPY_RTOL)


def test_construct_correlations_and_their_se_match_semopy_by_the_delta_method(normal_json,
                                                                              ref):
    # r_ab = φ_ab / √(φ_aa φ_bb) of semopy's latent covariance matrix; its SE by the
    # delta method on semopy's Fisher information
    rows = model(normal_json)["construct_correlations"]
    pairs = [(ref.factor(r["a"]), ref.factor(r["b"])) for r in rows]

    def correlations(_, psi, __):
        return np.array([psi[a, b] / np.sqrt(psi[a, a] * psi[b, b]) for a, b in pairs])

    value, se = ref.value_and_se(correlations)
    assert len(rows) == 3
    assert_allclose([r["estimate"] for r in rows], value, rtol=SEMOPY_RTOL)
    assert_allclose([r["se"] for r in rows], se, rtol=SEMOPY_RTOL)
    # unit-variance scaling: the construct covariance is the correlation
    assert_allclose([r["covariance"] for r in rows], value, rtol=SEMOPY_RTOL)
    z = np.array([r["estimate"] / r["se"] for r in rows])
    assert_allclose([r["z"] for r in rows], z, rtol=EXACT)
    assert_allclose([r["p_value"] for r in rows], 2 * stats.norm.sf(np.abs(z)), rtol=1e-8)


def test_residual_variances_and_r_squared_match_semopy(normal_json, ref):
    # residual variances are the same parameters in both scalings: semopy's estimates and
    # SEs directly; standardized θ/σ̂_ii and R² = 1 − θ/σ̂_ii from semopy's Σ̂
    m = model(normal_json)
    idx = [ref.item(r["item"]) for r in m["residual_variances"]]

    def residuals(_, __, theta):
        return np.diag(theta)[idx]

    value, se = ref.value_and_se(residuals)
    rows = m["residual_variances"]
    assert_allclose([r["estimate"] for r in rows], value, rtol=SEMOPY_RTOL)
    assert_allclose([r["se"] for r in rows], se, rtol=SEMOPY_RTOL)
    share = value / np.diag(ref.fit.implied_cov)[idx]
    assert_allclose([r["std_estimate"] for r in rows], share, rtol=SEMOPY_RTOL)
    z = np.array([r["estimate"] / r["se"] for r in rows])
    assert_allclose([r["z"] for r in rows], z, rtol=EXACT)
    assert_allclose([r["p_value"] for r in rows], 2 * stats.norm.sf(np.abs(z)), rtol=1e-8)
    r2 = {r["item"]: r["value"] for r in m["r_squared"]}
    assert_allclose([r2[r["item"]] for r in rows], 1 - share, rtol=SEMOPY_RTOL)


# --------------------------------------------------------------------------- local misfit

def independent_standardized_residuals(ref, robust: bool) -> tuple[np.ndarray, np.ndarray]:
    """Residual correlations and standardized residuals from semopy's fit.

    Residual correlation: pandas' sample correlation minus semopy's implied
    correlation. Standardized residual (s_ij − σ̂_ij)/√Var(s_ij − σ̂_ij), S the
    ÷N covariance, Δ = ∂vech Σ/∂θ by central differences of semopy's Σ(θ)
    (Browne 1984; Bollen 1989):

    * normal theory: Var = (σ_ii σ_jj + σ_ij²)/N − Δ_ij acov(θ̂) Δ_ijᵀ with
      acov semopy's inverse Fisher information;
    * robust ML (distribution-free): Var = diag(PΓ̂Pᵀ)/N with
      P = I − Δ(ΔᵀWΔ)⁻¹ΔᵀW, W = ½Dᵀ(Σ̂⁻¹⊗Σ̂⁻¹)D and Γ̂ the sample covariance
      of vech((x_i − x̄)(x_i − x̄)ᵀ)."""
    x = hz.data().to_numpy(float)
    n, p = x.shape
    s = np.cov(x, rowvar=False, bias=True)
    sigma = ref.fit.implied_cov
    rows, cols = np.tril_indices(p)

    def implied(lam, psi, theta):
        return (lam @ psi @ lam.T + theta)[rows, cols]

    delta = ref.jacobian(implied)
    if robust:
        c = x - x.mean(axis=0)
        gamma = np.cov((c[:, :, None] * c[:, None, :])[:, rows, cols], rowvar=False, bias=True)
        v = np.linalg.inv(sigma)
        w = 0.5 * duplication(p).T @ np.kron(v, v) @ duplication(p)
        proj = np.eye(len(rows)) - delta @ np.linalg.solve(delta.T @ w @ delta, delta.T @ w)
        var = np.einsum("ik,kl,il->i", proj, gamma, proj) / n
    else:
        var = (sigma[rows, rows] * sigma[cols, cols] + sigma[rows, cols] ** 2) / n \
            - np.einsum("ik,kl,il->i", delta, ref.acov, delta)
    z = np.full((p, p), np.nan)
    with np.errstate(invalid="ignore"):      # the diagonal (not a residual pair) may round < 0
        z[rows, cols] = z[cols, rows] = (s - sigma)[rows, cols] / np.sqrt(var)
    sd = np.sqrt(np.diag(sigma))
    return hz.data().corr().to_numpy() - sigma / np.outer(sd, sd), z


@pytest.mark.parametrize("route", ["normal", "robust"])
def test_residual_correlations_and_standardized_residuals_match_semopy(
        route, normal_json, robust_json, ref):
    # the z of each route as residuals.py states it: normal theory for ML, the
    # distribution-free residual variance for robust ML (same ML estimates)
    out = normal_json if route == "normal" else robust_json
    block = model(out)["residual_correlations"]
    corr, z = independent_standardized_residuals(ref, robust=route == "robust")
    # the JSON matrix is rounded to 4 decimals (for the heat map)
    assert_allclose(block["matrix"], corr, atol=5e-5 + 1e-6)
    items = block["items"]
    listed = [(items.index(e["a"]), items.index(e["b"])) for e in block["largest"]]
    assert len(listed) >= 10
    assert_allclose([e["value"] for e in block["largest"]], [corr[i, j] for i, j in listed],
                    atol=1e-5)
    # z inherits the estimates' agreement with semopy (1e-6 relative) and the
    # central differences' error (about 1e-8): 1e-4 relative
    assert_allclose([e["standardized"] for e in block["largest"]], [z[i, j] for i, j in listed],
                    rtol=SEMOPY_RTOL)


def test_standardized_epc_is_the_epc_in_semopy_standard_deviations(normal_json, ref):
    # Kaplan (1989): a loading's EPC times SD(factor)/SD(item) (unit-variance factors, so
    # 1/√σ̂_ii); a residual covariance's EPC over √(θ_ii θ_jj): semopy's Σ̂ and Θ̂
    sd = np.sqrt(np.diag(ref.fit.implied_cov))
    theta = np.diag(ref.fit.residual_cov)
    hints = model(normal_json)["modification_hints"]
    assert {h["kind"] for h in hints} == {"loading", "residual_covariance"}
    for h in hints:
        if h["kind"] == "loading":
            scale = 1.0 / sd[ref.item(h["item"])]
        else:
            scale = 1.0 / np.sqrt(theta[ref.item(h["item_a"])] * theta[ref.item(h["item_b"])])
        assert_allclose(h["std_epc"], h["epc"] * scale, rtol=SEMOPY_RTOL)


# --------------------------------------------------------------------------- fit

def rmsea_bounds(chi2, df, n):
    """Browne & Cudeck (1993): λ_L, λ_U with ncx2.cdf(T; df, λ) = .95, .05 (scipy's
    root finder; λ = 0 where the central cdf is already below the target)."""
    def root(target):
        if stats.chi2.cdf(chi2, df) <= target:
            return 0.0
        return optimize.brentq(lambda lam: stats.ncx2.cdf(chi2, df, lam) - target, 1e-12,
                               10 * chi2 + 100, xtol=1e-14, rtol=1e-14)
    return np.sqrt(np.array([root(0.95), root(0.05)]) / (df * (n - 1)))


@pytest.mark.parametrize("name", ["three", "one"])
def test_fit_block_matches_semopy_and_scipy(normal_json, name):
    fit = model(normal_json, name)["fit"]
    description = hz.THREE_FACTOR if name == "three" else \
        "general =~ " + " + ".join(hz.ITEMS)
    reference = hz.fit(description)
    values = semopy.calc_stats(reference.model).T["Value"]
    x = hz.data().to_numpy(float)
    n, p = x.shape
    # semopy's statistics (N·F_ML, RMSEA with N − 1)
    for ours, theirs in [("chi_square", "chi2"), ("baseline_chi_square", "chi2 Baseline"),
                         ("cfi", "CFI"), ("tli", "TLI"), ("rmsea", "RMSEA")]:
        assert_allclose(fit[ours], values[theirs], rtol=SEMOPY_RTOL)
    assert fit["df"] == values["DoF"] and fit["baseline_df"] == values["DoF Baseline"]
    assert_allclose(fit["p_value"], stats.chi2.sf(fit["chi_square"], fit["df"]), rtol=1e-8)
    # Browne & Cudeck (1993) interval and close-fit p from the printed statistic (scipy)
    assert_allclose(fit["rmsea_ci90"], rmsea_bounds(fit["chi_square"], fit["df"], n),
                    rtol=1e-6)
    assert_allclose(fit["rmsea_p_close"],
                    stats.ncx2.sf(fit["chi_square"], fit["df"], 0.05 ** 2 * fit["df"] * (n - 1)),
                    rtol=1e-6)
    # Bentler's SRMR from semopy's Σ̂ (design/references.md)
    s = np.cov(x, rowvar=False, bias=True)
    d = np.sqrt(np.diag(s))
    resid = ((s - reference.implied_cov) / np.outer(d, d))[np.tril_indices(p)]
    assert_allclose(fit["srmr"], np.sqrt(np.mean(resid ** 2)), rtol=SEMOPY_RTOL)
    # log-likelihood at semopy's Σ̂ and the sample means (scipy); k = free parameters
    # plus the p item means (DEVELOPERS.md); Akaike (1974), Schwarz (1978), Sclove (1987)
    loglik = stats.multivariate_normal(x.mean(axis=0), reference.implied_cov).logpdf(x).sum()
    k = len(reference.model.param_vals) + p
    assert fit["n_params"] == k
    assert_allclose(fit["loglik"], loglik, rtol=1e-8)
    assert_allclose(fit["aic"], -2 * loglik + 2 * k, rtol=1e-8)
    assert_allclose(fit["bic"], -2 * loglik + k * np.log(n), rtol=1e-8)
    assert_allclose(fit["sabic"], -2 * loglik + k * np.log((n + 2) / 24), rtol=1e-8)
    # the optimiser's objective at its optimum: ½[log|Σ̂| + tr(SΣ̂⁻¹)] (estimate/normal.py),
    # from semopy's Σ̂; iterations and gradient norm are the optimiser's own state
    optimizer = model(normal_json, name)["optimizer"]
    objective = 0.5 * (np.linalg.slogdet(reference.implied_cov)[1]
                       + np.trace(np.linalg.solve(reference.implied_cov, s)))
    assert optimizer["converged"] and optimizer["gradient_norm"] < 1e-6
    assert_allclose(optimizer["objective"], objective, rtol=1e-8)


def satorra_bentler_traces(x, sigma, delta):
    """tr(UΓ̂) and tr((UΓ̂)²) from the textbook matrices (Satorra & Bentler 1994):
    Γ̂ the sample covariance of vech((x_i − x̄)(x_i − x̄)ᵀ), W = ½Dᵀ(Σ̂⁻¹⊗Σ̂⁻¹)D,
    U = W − WΔ(ΔᵀWΔ)⁻¹ΔᵀW, Δ = ∂vech Σ/∂θ."""
    p = x.shape[1]
    rows, cols = np.tril_indices(p)
    c = x - x.mean(axis=0)
    gamma = np.cov((c[:, :, None] * c[:, None, :])[:, rows, cols], rowvar=False, bias=True)
    v = np.linalg.inv(sigma)
    dup = duplication(p)
    w = 0.5 * dup.T @ np.kron(v, v) @ dup
    u = w - w @ delta @ np.linalg.solve(delta.T @ w @ delta, delta.T @ w)
    ug = u @ gamma
    return np.trace(ug), np.trace(ug @ ug)


def test_robust_fit_block_matches_textbook_traces_from_semopy(robust_json, ref):
    fit = model(robust_json)["fit"]
    x = hz.data().to_numpy(float)
    n, p = x.shape
    rows, cols = np.tril_indices(p)
    delta = ref.jacobian(lambda lam, psi, theta: (lam @ psi @ lam.T + theta)[rows, cols])
    trace, trace2 = satorra_bentler_traces(x, ref.fit.implied_cov, delta)
    df = fit["df"]
    t_ml = fit["chi_square"]
    # Satorra & Bentler (1994): c = tr(UΓ)/df, T_SB = T/c; d* = tr(UΓ)²/tr((UΓ)²),
    # T_adj = T·d*/tr(UΓ); semopy's Δ and Σ̂ carry its 1e-6 agreement, hence 1e-4
    assert_allclose(fit["scaling_factor"], trace / df, rtol=SEMOPY_RTOL)
    assert_allclose(fit["chi_square_scaled"], t_ml * df / trace, rtol=SEMOPY_RTOL)
    assert_allclose(fit["df_adjusted"], trace ** 2 / trace2, rtol=SEMOPY_RTOL)
    assert_allclose(fit["chi_square_adjusted"], t_ml / trace2 * trace, rtol=SEMOPY_RTOL)
    assert_allclose(fit["p_value_scaled"], stats.chi2.sf(fit["chi_square_scaled"], df),
                    rtol=1e-8)
    assert_allclose(fit["p_value_adjusted"],
                    stats.chi2.sf(fit["chi_square_adjusted"], fit["df_adjusted"]), rtol=1e-8)
    # the baseline (independence) model: Σ_B = diag(S), Δ_B picks the variances
    s = np.cov(x, rowvar=False, bias=True)
    delta_b = (rows == cols)[:, None] * (rows[:, None] == np.arange(p)[None, :])
    trace_b, _ = satorra_bentler_traces(x, np.diag(np.diag(s)), delta_b.astype(float))
    df_b = fit["baseline_df"]
    c, c_b = trace / df, trace_b / df_b
    t_b = fit["baseline_chi_square"]
    # Brosseau-Liard & Savalei (2014): T − c·df in place of T − df
    assert_allclose(fit["cfi_robust"], 1 - (t_ml - c * df) / (t_b - c_b * df_b),
                    rtol=SEMOPY_RTOL)
    assert_allclose(fit["tli_robust"],
                    1 - ((t_ml - c * df) / df) / ((t_b - c_b * df_b) / df_b), rtol=SEMOPY_RTOL)
    # Brosseau-Liard, Savalei & Li (2012): √(max(T − c·df, 0)/(df (N − 1))); its interval
    # is the Browne–Cudeck interval of T_SB times √c (robust.py's stated definition)
    assert_allclose(fit["rmsea_robust"], np.sqrt((t_ml - c * df) / (df * (n - 1))),
                    rtol=SEMOPY_RTOL)
    assert_allclose(fit["rmsea_robust_ci90"],
                    np.sqrt(c) * rmsea_bounds(t_ml / c, df, n), rtol=SEMOPY_RTOL)


# --------------------------------------------------------------------------- scale quality

def test_coefficient_h_standardized_alpha_and_validity_keys_match_independent_computations(
        normal_json, ref):
    m = model(normal_json)
    rows = {r["construct"]: r for r in m["reliability"]}
    validity = m["validity"]
    sigma = ref.fit.implied_cov
    table = ref.fit.estimates[ref.fit.estimates.op == "~"]
    std = {(c, i): v for c, i, v in zip(table.rval, table.lval, table["Est. Std"])}
    for construct, items in hz.CONSTRUCTS.items():
        idx = [ref.item(i) for i in items]
        f = ref.factor(construct)
        lam = ref.fit.loadings[idx, f] * np.sqrt(ref.fit.latent_cov[f, f])
        # Hancock & Mueller (2001): H is the largest reliability of any weighted sum of the
        # construct's items, max_w (wᵀλ)²/(wᵀΣ̂w): the largest generalized eigenvalue of
        # (λλᵀ, Σ̂) from semopy's fit (scipy)
        h = linalg.eigh(np.outer(lam, lam), sigma[np.ix_(idx, idx)], eigvals_only=True)[-1]
        assert_allclose(rows[construct]["coefficient_h"], h, rtol=SEMOPY_RTOL)
        # simple structure: the construct's share of omega is omega itself
        assert_allclose(rows[construct]["omega_construct"], rows[construct]["omega"], rtol=EXACT)
        # standardized alpha (Cronbach 1951): k r̄/(1 + (k − 1) r̄), r̄ from pandas
        corr = hz.data()[items].corr().to_numpy()
        k = len(items)
        rbar = corr[np.triu_indices(k, 1)].mean()
        assert_allclose(rows[construct]["standardized_alpha"], k * rbar / (1 + (k - 1) * rbar),
                        rtol=EXACT)
        # Fornell & Larcker (1981): AVE = mean squared standardized loading and composite
        # reliability (Σλ)²/((Σλ)² + Σ(1 − λ²)), from semopy's standardized solution
        loadings = np.array([std[construct, i] for i in items])
        assert_allclose(validity["ave"][construct], np.mean(loadings ** 2), rtol=SEMOPY_RTOL)
        total = loadings.sum() ** 2
        assert_allclose(validity["composite_reliability"][construct],
                        total / (total + np.sum(1 - loadings ** 2)), rtol=SEMOPY_RTOL)
    for row in validity["fornell_larcker"]:
        assert_allclose(row["sqrt_ave_a"], np.sqrt(validity["ave"][row["a"]]), rtol=EXACT)
        assert_allclose(row["sqrt_ave_b"], np.sqrt(validity["ave"][row["b"]]), rtol=EXACT)
    # HTMT (Henseler, Ringle & Sarstedt 2015): mean cross-construct item correlation over
    # the geometric mean of the mean within-construct correlations, from pandas
    corr = hz.data().corr()
    for row in validity["htmt"]:
        a, b = hz.CONSTRUCTS[row["a"]], hz.CONSTRUCTS[row["b"]]
        within = [corr.loc[c, c].to_numpy()[np.triu_indices(3, 1)].mean() for c in (a, b)]
        assert_allclose(row["value"], corr.loc[a, b].to_numpy().mean() / np.sqrt(np.prod(within)),
                        rtol=EXACT)


# --------------------------------------------------------------------------- comparison

def test_comparison_rows_and_nested_test_follow_from_semopy_statistics(normal_json, robust_json):
    # BIC differences and weights (Raftery 1995; Wagenmakers & Farrell 2004) from the
    # printed BICs with scipy's softmax
    rows = {r["name"]: r for r in normal_json["comparison"]["models"]}
    bic = np.array([rows[n]["bic"] for n in ("three", "one")])
    assert_allclose([rows[n]["delta_bic"] for n in ("three", "one")], bic - bic.min(), atol=1e-9)
    assert_allclose([rows[n]["bic_weight"] for n in ("three", "one")], special.softmax(-bic / 2),
                    rtol=EXACT)
    # the likelihood-ratio difference of the merged model: semopy's two chi-squares
    one = semopy.calc_stats(hz.fit("general =~ " + " + ".join(hz.ITEMS)).model).T["Value"]
    three = semopy.calc_stats(hz.fit(hz.THREE_FACTOR).model).T["Value"]
    [test] = normal_json["comparison"]["nested_tests"]
    assert (test["restricted"], test["general"], test["df"]) == ("one", "three", 3)
    assert_allclose(test["chi_square"], one["chi2"] - three["chi2"], rtol=SEMOPY_RTOL)
    assert_allclose(test["p_value"], stats.chi2.sf(test["chi_square"], 3), rtol=1e-8)
    # robust: Satorra & Bentler (2001) from the printed parts of the two fits,
    # c_d = (d₀c₀ − d₁c₁)/(d₀ − d₁), T_d = (T₀ − T₁)/c_d
    fits = {m["name"]: m["fit"] for m in robust_json["models"]}
    r, g = fits["one"], fits["three"]
    c_d = (r["df"] * r["scaling_factor"] - g["df"] * g["scaling_factor"]) / (r["df"] - g["df"])
    [scaled] = robust_json["comparison"]["nested_tests"]
    assert_allclose(scaled["scaling_factor"], c_d, rtol=1e-10)
    assert_allclose(scaled["chi_square"], (r["chi_square"] - g["chi_square"]) / c_d, rtol=1e-10)
    assert_allclose(scaled["p_value"], stats.chi2.sf(scaled["chi_square"], 3), rtol=1e-8)


# --------------------------------------------------------------------------- data

def test_item_screening_mardia_and_outliers_match_scipy_and_numpy(normal_json):
    data = normal_json["data"]
    frame = hz.data()
    x = frame.to_numpy(float)
    n, p = x.shape
    for row in data["screening"]["items"]:
        col = frame[row["item"]]
        # the moment estimators g1, g2 that screening.py promises: scipy with bias=True
        assert_allclose([row["mean"], row["sd"], row["min"], row["max"]],
                        [col.mean(), col.std(ddof=1), col.min(), col.max()], rtol=1e-12)
        assert_allclose(row["skewness"], stats.skew(col, bias=True), rtol=1e-10)
        assert_allclose(row["excess_kurtosis"], stats.kurtosis(col, bias=True), rtol=1e-10)
        assert row["n"] == n and row["n_distinct"] == col.nunique()
    # Mardia (1970) from the n × n matrix of (x_i − x̄)ᵀS⁻¹(x_j − x̄), S the ÷n covariance
    c = x - x.mean(axis=0)
    g = c @ np.linalg.solve(np.cov(x, rowvar=False, bias=True), c.T)
    b1, b2 = (g ** 3).sum() / n ** 2, (np.diag(g) ** 2).mean()
    mardia = data["screening"]["mardia"]
    assert_allclose([mardia["skewness"], mardia["kurtosis"]], [b1, b2], rtol=1e-10)
    df = p * (p + 1) * (p + 2) / 6
    assert mardia["skewness_df"] == df
    assert_allclose(mardia["skewness_chi2"], n * b1 / 6, rtol=1e-10)
    assert_allclose(mardia["skewness_p"], stats.chi2.sf(n * b1 / 6, df), rtol=1e-8)
    # kurtosis z with the exact normal-sample mean and variance of b2 (Mardia 1974, from
    # memory): E = p(p+2)(n−1)/(n+1), Var = 8p(p+2)(n−3)(n−p−1)(n−p+1)/((n+1)²(n+3)(n+5))
    mean = p * (p + 2) * (n - 1) / (n + 1)
    var = 8 * p * (p + 2) * (n - 3) * (n - p - 1) * (n - p + 1) / ((n + 1) ** 2 * (n + 3) * (n + 5))
    z = (b2 - mean) / np.sqrt(var)
    assert_allclose(mardia["kurtosis_z"], z, rtol=1e-10)
    assert_allclose(mardia["kurtosis_p"], 2 * stats.norm.sf(abs(z)), rtol=1e-8)
    # Mahalanobis D² with the ÷n covariance (outliers.py) and its χ²_p tail (scipy)
    out = data["outliers"]
    assert_allclose(out["threshold"], stats.chi2.ppf(1 - out["level"], p), rtol=1e-12)
    assert out["n_flagged"] == int(np.sum(np.diag(g) > out["threshold"]))
    d2 = np.diag(g)
    for row in out["largest"]:
        assert_allclose(row["d2"], d2[row["row"] - 1], rtol=1e-10)     # rows count from 1
        assert_allclose(row["p_value"], stats.chi2.sf(row["d2"], p), rtol=1e-8)
    # the correlation matrix for reanalysis: pandas
    assert_allclose(data["correlations"]["matrix"], frame.corr().to_numpy(), atol=5e-5 + 1e-9)


# --------------------------------------------------------------------------- invariance

GROUPS_STUDY = STUDY.replace("models:", "groups:\n  column: school\nmodels:")


@pytest.fixture(scope="module")
def groups_json(tmp_path_factory):
    folder = tmp_path_factory.mktemp("hs-groups")
    semopy.examples.holzinger39.get_data().to_csv(folder / "hs.csv", index=False)
    path = folder / "hs-groups.yaml"
    path.write_text(GROUPS_STUDY.format(method="normal"), encoding="utf-8")
    return scalewright.check(path).to_dict()


def test_partial_scalar_step_and_latent_comparisons_match_a_likelihood_written_out(groups_json):
    steps = {s["step"]: s for s in groups_json["invariance"]}
    released = [(r["step"], r["kind"], r["item"]) for r in groups_json["released"]]
    # the commonly reported partial scalar model of these data [from memory]; the search
    # itself is checked in test_invariance.py
    assert released == [("scalar", "intercept", "x3"), ("scalar", "intercept", "x7")]
    metric = TwoGroupReference(shared_intercepts=False)
    scalar = TwoGroupReference(shared_intercepts=True, free_intercepts=("x3", "x7"))
    for ref_fit in (metric, scalar):
        assert np.max(np.abs(ref_fit.grad)) < 1e-6 * 301
    # χ² = Σ_g n_g F_g; the same optimum: 1e-6 relative
    assert steps["metric"]["fit"]["df"] == 2 * 54 - 42 - 6 - 6 == 54
    assert_allclose(steps["metric"]["fit"]["chi_square"], metric.chi_square(), rtol=1e-6)
    assert steps["scalar"]["fit"]["df"] == 2 * 54 - 50
    assert_allclose(steps["scalar"]["fit"]["chi_square"], scalar.chi_square(), rtol=1e-6)
    test = steps["scalar"]["difference_test"]
    assert test["df"] == 4
    assert_allclose(test["chi_square"], scalar.chi_square() - metric.chi_square(), rtol=1e-5)
    assert_allclose(test["p_value"], stats.chi2.sf(test["chi_square"], 4), rtol=1e-8)
    for key in ("cfi", "rmsea", "srmr"):
        assert_allclose(steps["scalar"]["delta"][key],
                        steps["scalar"]["fit"][key] - steps["metric"]["fit"][key], atol=1e-12)
    # latent comparisons in the final scalar model; SEs by the delta method on the inverse
    # expected information (DEVELOPERS.md: complete data); 1e-4 relative (two engines)
    n_ref, n_other = (len(x) for x in scalar.groups)
    order = ["visual", "textual", "speed"]

    def comparisons(sigmas, mus, phis, kappa):
        pooled = (n_ref * np.diag(phis[0]) + n_other * np.diag(phis[1])) / (n_ref + n_other)
        sd = np.sqrt(np.diag(phis[1]))
        corr = phis[1] / np.outer(sd, sd)
        return np.concatenate([kappa[1], kappa[1] / np.sqrt(pooled), np.diag(phis[1]),
                               np.diag(phis[1]) - 1, phis[0][[0, 0, 1], [1, 2, 2]],
                               corr[[0, 0, 1], [1, 2, 2]]])

    value, se = scalar.value_and_se(comparisons)
    means = {r["construct"]: r for r in groups_json["latent_means"]}
    got = [means[c][k] for k in ("estimate", "std_difference") for c in order]
    got_se = [means[c][k] for k in ("se", "std_difference_se") for c in order]
    variances = {r["construct"]: r for r in groups_json["latent_variances"]
                 if r["group"] == "Pasteur"}
    got += [variances[c]["estimate"] for c in order] + [variances[c]["difference"] for c in order]
    got_se += [variances[c]["se"] for c in order] + [variances[c]["difference_se"] for c in order]
    correlations = {(r["group"], r["a"], r["b"]): r for r in groups_json["latent_correlations"]}
    for group in ("Grant-White", "Pasteur"):
        for a, b in (("visual", "textual"), ("visual", "speed"), ("textual", "speed")):
            got.append(correlations[group, a, b]["estimate"])
            got_se.append(correlations[group, a, b]["se"])
    assert_allclose(got, value, rtol=SEMOPY_RTOL)
    assert_allclose(got_se, se, rtol=SEMOPY_RTOL)
    for row in groups_json["latent_means"]:
        assert_allclose(row["z"], row["estimate"] / row["se"], rtol=EXACT)
        assert_allclose(row["p_value"], 2 * stats.norm.sf(abs(row["z"])), rtol=1e-8)


def score_statistic(restricted: TwoGroupReference, freed: tuple[str, ...]) -> float:
    """Score (Lagrange multiplier) statistic of freeing the last intercept of
    ``freed`` in the other group, at the restricted ML estimate (Rao 1948;
    Sörbom 1989): (g/2)ᵀ I⁻¹ (g/2) with g the gradient of −2ℓ and I the
    expected information of the larger model, both at the restricted θ̂."""
    larger = TwoGroupReference.__new__(TwoGroupReference)
    larger.__dict__.update(restricted.__dict__)
    larger.free = [hz.ITEMS.index(i) for i in freed]
    larger.sizes = list(restricted.sizes)
    larger.sizes[1] += 1
    t = restricted.theta
    at = 9 + restricted.sizes[1]                     # after the restricted model's ν block
    theta = np.insert(t, at, t[9 + larger.free[-1]])  # the other group's value = shared one
    grad, info = larger.pieces(theta)
    return float((grad / 2) @ np.linalg.solve(info, grad / 2))


def test_released_intercepts_score_tests_and_refits_match_a_likelihood_written_out(
        groups_json):
    # the search's two releases (scalar step), each from the model before it
    scalar = TwoGroupReference(shared_intercepts=True)
    after_x3 = TwoGroupReference(shared_intercepts=True, free_intercepts=("x3",))
    after_x7 = TwoGroupReference(shared_intercepts=True, free_intercepts=("x3", "x7"))
    first, second = groups_json["released"]
    # score statistics with the expected information (DEVELOPERS.md): two ML optima and
    # one linear solve, 1e-4 relative
    assert_allclose(first["score_test"]["chi_square"], score_statistic(scalar, ("x3",)),
                    rtol=SEMOPY_RTOL)
    assert_allclose(second["score_test"]["chi_square"], score_statistic(after_x3, ("x3", "x7")),
                    rtol=SEMOPY_RTOL)
    # Bonferroni over the constraints tested together: the 9 intercepts, then the 6 whose
    # release keeps two equal intercepts per construct (visual has only x1, x2 left)
    for release, k in ((first, 9), (second, 6)):
        test = release["score_test"]
        assert_allclose(test["p_value"], stats.chi2.sf(test["chi_square"], 1), rtol=1e-8)
        assert_allclose(test["p_adjusted"], min(1.0, k * test["p_value"]), rtol=1e-12)
    # the refits after each release, and the released intercepts per group
    for release, fitted, items in ((first, after_x3, ("x3",)), (second, after_x7, ("x3", "x7"))):
        assert_allclose(release["fit_after"]["chi_square"], fitted.chi_square(), rtol=1e-6)
        t = fitted.theta
        j = hz.ITEMS.index(release["item"])
        nu_other = t[9 + 9 + items.index(release["item"])]
        assert_allclose([release["estimates"]["Grant-White"], release["estimates"]["Pasteur"]],
                        [t[9 + j], nu_other], rtol=SEMOPY_RTOL)


def test_omega_interval_and_item_review_values_follow_from_semopy(normal_json, ref):
    m = model(normal_json)
    rows = {r["construct"]: r for r in m["reliability"]}
    # omega = C/(C + E) of each construct's sum (McDonald 1999) from semopy's matrices, its SE
    # by the delta method on semopy's Fisher information, and the logit-scale Wald interval
    # (Raykov 2002; scalequality.omega_interval's stated definition)
    weights = np.stack([np.isin(hz.ITEMS, items).astype(float)
                        for items in hz.CONSTRUCTS.values()])

    def omegas(lam, psi, theta):
        common = np.einsum("kp,pq,kq->k", weights, lam @ psi @ lam.T, weights)
        return common / (common + np.einsum("kp,pq,kq->k", weights, theta, weights))

    omega, se = ref.value_and_se(omegas)
    half = stats.norm.ppf(0.975) * se / (omega * (1 - omega))
    logit = np.log(omega / (1 - omega))
    interval = special.expit(np.stack([logit - half, logit + half], axis=1))
    for k, construct in enumerate(hz.CONSTRUCTS):
        assert_allclose(rows[construct]["omega"], omega[k], rtol=SEMOPY_RTOL)
        assert_allclose(rows[construct]["omega_ci95"], interval[k], rtol=SEMOPY_RTOL)
    # item review: a suggested residual pair moves the items' implied correlation by
    # EPC/√(σ̂_ii σ̂_jj); a suggested cross-loading's value is the standardized EPC
    sd = np.sqrt(np.diag(ref.fit.implied_cov))
    hints = {(h.get("item_a"), h.get("item_b")): h for h in m["modification_hints"]
             if h["kind"] == "residual_covariance"}
    loadings = {(h["construct"], h["item"]): h for h in m["modification_hints"]
                if h["kind"] == "loading"}
    checked = 0
    for entry in m["item_review"]:
        for detail in entry["details"]:
            if detail["flag"] == "residual_pair":
                pair = (entry["item"], detail["with"])
                hint = hints.get(pair) or hints[pair[::-1]]
                expected = hint["epc"] / (sd[ref.item(pair[0])] * sd[ref.item(pair[1])])
            else:
                assert detail["flag"] == "cross_loading"
                expected = loadings[detail["with"], entry["item"]]["std_epc"]
            assert_allclose(detail["value"], expected, rtol=SEMOPY_RTOL)
            checked += 1
    assert checked == 5      # x7–x8 and x8–x9 (each listed under both items), x9 on visual


HOLES_STUDY = STUDY.replace("  file: hs.csv", "  file: hs.csv\n  missing: [-9]")


def test_missing_data_summary_and_little_test_match_pandas_and_scipy(tmp_path):
    # seeded MCAR holes, written as the missing code -9
    frame = hz.data().copy()
    rng = np.random.default_rng(1939)
    holes = rng.random(frame.shape) < 0.06
    frame = frame.mask(holes, -9)
    frame.to_csv(tmp_path / "hs.csv", index=False)
    path = tmp_path / "hs-holes.yaml"
    path.write_text(HOLES_STUDY.format(method="normal"), encoding="utf-8")
    out = scalewright.check(path).to_dict()
    missing = out["data"]["missing"]
    answered = ~holes
    # counts from pandas / numpy on the same holes
    assert missing["n_rows"] == len(frame) == out["data"]["n_rows"]
    assert missing["n_complete"] == int(answered.all(axis=1).sum())
    assert missing["n_no_answer"] == int((~answered).all(axis=1).sum())
    counts = pd.Series(answered.sum(axis=0), index=hz.ITEMS)
    for row in missing["items"]:
        assert row["n_answered"] == counts[row["item"]]
        assert_allclose(row["rate_missing"], 1 - counts[row["item"]] / len(frame), rtol=1e-12)
    patterns = pd.DataFrame(~answered, columns=hz.ITEMS).value_counts()
    assert missing["n_patterns"] == len(patterns)
    listed = {tuple(p["missing"]): p["n"] for p in missing["patterns"]}
    for key, n in patterns.items():
        names = tuple(item for item, hole in zip(hz.ITEMS, key) if hole)
        if names in listed:
            assert listed[names] == n
    # Little (1988): df = Σ_k p_k − p; the statistic itself is checked against an
    # independent likelihood maximisation in test_mcar.py
    little = missing["little_mcar"]
    assert little["n_patterns"] == len(patterns)
    assert missing["n_no_answer"] == 0      # so every pattern counts
    assert little["df"] == sum(int(np.sum(~np.array(k))) for k in patterns.index) - 9
    assert_allclose(little["p_value"], stats.chi2.sf(little["chi_square"], little["df"]),
                    rtol=1e-8)


# --------------------------------------------------------------------------- general factors

DEMO = Path(__file__).resolve().parents[1] / "models" / "teacher-climate.yaml"
GENERAL_STUDY = """\
study: General-factor structures of the demo answers
data:
  file: {csv}
  missing: [-9]
items:
  scale: [1, 5]
  reverse: [cs4, ca5]
models:
  higher-order:
    constructs: &three
      workload: [wl1, wl2, wl3, wl4, wl5, wl6]
      support: [cs1, cs2, cs3, cs4, cs5, cs6]
      autonomy: [ca1, ca2, ca3, ca4, ca5, ca6]
    higher_order:
      climate: [workload, support, autonomy]
  bifactor:
    general: climate
    constructs: *three
"""


@pytest.fixture(scope="module")
def general_json(tmp_path_factory):
    folder = tmp_path_factory.mktemp("general")
    path = folder / "general.yaml"
    path.write_text(GENERAL_STUDY.format(csv=DEMO.with_suffix(".csv").as_posix()),
                    encoding="utf-8")
    return scalewright.check(path).to_dict()


def test_bifactor_coefficients_follow_the_published_formulas_from_the_printed_estimates(
        general_json):
    # Rodriguez, Reise & Haviland (2016), orthogonal unit-variance factors: for a sum over
    # items I, with A = (Σ_I λ_gen)², B_s = (Σ_{I∩s} λ_s)², E = Σ_I θ: ωT = (A + Σ B_s)/V,
    # ωH = A/V, V = A + Σ B_s + E (model-implied variance of the raw sum); ECV and H from
    # standardized loadings; PUC = share of item pairs in different group factors
    m = model(general_json, "bifactor")
    coefficients = m["bifactor"]
    raw = {}
    std = {}
    for row in m["loadings"]:
        raw.setdefault(row["construct"], {})[row["item"]] = row["estimate"]
        std.setdefault(row["construct"], {})[row["item"]] = row["std_estimate"]
    theta = {r["item"]: r["estimate"] for r in m["residual_variances"]}
    groups = [c for c in raw if c != "climate"]
    items = coefficients["items"]

    def parts(subset):
        general = sum(raw["climate"][i] for i in subset) ** 2
        specific = sum(sum(raw[c].get(i, 0.0) for i in subset) ** 2 for c in groups)
        return general, specific, general + specific + sum(theta[i] for i in subset)

    general, specific, total = parts(items)
    assert_allclose(coefficients["omega_total"], (general + specific) / total, rtol=1e-8)
    assert_allclose(coefficients["omega_hierarchical"], general / total, rtol=1e-8)
    assert_allclose(coefficients["relative_omega"], general / (general + specific), rtol=1e-8)
    gen2 = sum(v ** 2 for v in std["climate"].values())
    spec2 = sum(v ** 2 for c in groups for v in std[c].values())
    assert_allclose(coefficients["ecv"], gen2 / (gen2 + spec2), rtol=1e-8)
    k = len(items)
    assert_allclose(coefficients["puc"],
                    1 - sum(len(std[c]) * (len(std[c]) - 1) for c in groups) / (k * (k - 1)),
                    rtol=1e-12)

    def h(values):      # Hancock & Mueller (2001)
        lam2 = np.asarray(values) ** 2
        return 1 / (1 + 1 / np.sum(lam2 / (1 - lam2)))

    assert_allclose(coefficients["h"], h(list(std["climate"].values())), rtol=1e-8)
    for sub in coefficients["subscales"]:
        g_part = sum(raw["climate"][i] for i in sub["items"]) ** 2
        s_part = sum(raw[sub["factor"]][i] for i in sub["items"]) ** 2
        v = g_part + s_part + sum(theta[i] for i in sub["items"])
        assert_allclose([sub["omega_subscale"], sub["omega_hierarchical_subscale"],
                         sub["general_share"], sub["h"]],
                        [(g_part + s_part) / v, s_part / v, g_part / v,
                         h(list(std[sub["factor"]].values()))], rtol=1e-8)


def test_higher_order_keys_follow_from_the_printed_estimates(general_json):
    # disturbances of the first-order constructs fixed at 1 and the higher-order factor's
    # variance 1 (as the JSON states): Var(F_f) = γ_f² + 1, so the variance explained is
    # γ²/(γ² + 1) and the standardized path γ/√(γ² + 1); ωH of the raw sum (Schmid & Leiman
    # 1957; Zinbarg et al. 2005) = (Σ_i λ_i γ_f(i))² / V with V the implied variance
    m = model(general_json, "higher-order")
    gamma = {r["construct"]: r["estimate"] for r in m["higher_order_paths"]}
    for row in m["higher_order_paths"]:
        g = row["estimate"]
        assert_allclose(row["std_estimate"], g / np.sqrt(g ** 2 + 1), rtol=1e-8)
        assert_allclose(row["z"], g / row["se"], rtol=EXACT)
    for row in m["higher_order"]["constructs"]:
        g = gamma[row["construct"]]
        assert_allclose(row["variance_explained"], g ** 2 / (g ** 2 + 1), rtol=1e-8)
        assert_allclose(row["loading"], g / np.sqrt(g ** 2 + 1), rtol=1e-8)
    lam = {r["item"]: (r["construct"], r["estimate"]) for r in m["loadings"]}
    theta = sum(r["estimate"] for r in m["residual_variances"])
    general = sum(value * gamma[c] for c, value in lam.values()) ** 2
    specific = sum(sum(v for c2, v in lam.values() if c2 == c) ** 2 for c in gamma)
    total = general + specific + theta
    coefficients = m["higher_order"]["coefficients"]
    assert_allclose(coefficients["omega_hierarchical"], general / total, rtol=1e-8)
    assert_allclose(coefficients["omega_total"], (general + specific) / total, rtol=1e-8)


# --------------------------------------------------------------------------- refinement path

MERGED_STUDY = """\
study: Holzinger and Swineford (1939), visual and speed tests as one construct
data:
  file: hs.csv
estimation:
  method: normal
models:
  two:
    constructs:
      visual_speed: [x1, x2, x3, x7, x8, x9]
      textual: [x4, x5, x6]
"""


def test_refinement_steps_and_trials_match_semopy_refits_and_pingouin(tmp_path):
    hz.data().to_csv(tmp_path / "hs.csv", index=False)
    path = tmp_path / "merged.yaml"
    path.write_text(MERGED_STUDY, encoding="utf-8")
    steps = model(scalewright.check(path).to_dict(), "two")["refinement"]["steps"]
    assert len(steps) >= 2 and steps[1]["tried"]
    constructs = {"visual_speed": ["x1", "x2", "x3", "x7", "x8", "x9"],
                  "textual": ["x4", "x5", "x6"]}

    def semopy_stats(kept):
        description = "\n".join(f"{c} =~ {' + '.join(i for i in its if i in kept)}"
                                for c, its in constructs.items())
        fitted = semopy.Model(description)
        fitted.fit(hz.data()[kept], options={"ftol": 1e-12})
        return semopy.calc_stats(fitted).T["Value"]

    def alphas(kept):
        return {c: pingouin.cronbach_alpha(hz.data()[[i for i in its if i in kept]])[0]
                for c, its in constructs.items()}

    kept = list(hz.ITEMS)
    for previous, step in zip([None] + steps[:-1], steps):
        base = list(kept)
        # each trial of a step: the refit without the item, and the changes it brings
        for trial in step["tried"]:
            without = [i for i in base if i != trial["item"]]
            values = semopy_stats(without)
            assert_allclose([trial["cfi"], trial["rmsea"]], [values["CFI"], values["RMSEA"]],
                            rtol=SEMOPY_RTOL)
            assert_allclose(trial["cfi_change"], trial["cfi"] - previous["fit"]["cfi"],
                            atol=1e-12)
            construct = next(c for c, its in constructs.items() if trial["item"] in its)
            assert_allclose(trial["alpha_change"],
                            alphas(without)[construct] - alphas(base)[construct], rtol=1e-8)
        if step["removed"] is not None:
            kept.remove(step["removed"])
        # the step's model: another ML engine on the same reduced data, 1e-4 relative;
        # alpha: pingouin on the same answers
        values = semopy_stats(kept)
        for ours, theirs in [("chi_square", "chi2"), ("cfi", "CFI"), ("rmsea", "RMSEA")]:
            assert_allclose(step["fit"][ours], values[theirs], rtol=SEMOPY_RTOL)
        assert step["fit"]["df"] == values["DoF"]
        now = alphas(kept)
        assert_allclose([step["reliability"][c] for c in constructs],
                        [now[c] for c in constructs], rtol=1e-10)
    assert sum(len(step["tried"]) for step in steps) >= 3


def test_robust_invariance_statistics_and_sandwich_se_match_textbook_matrices(tmp_path):
    semopy.examples.holzinger39.get_data().to_csv(tmp_path / "hs.csv", index=False)
    path = tmp_path / "hs-groups-robust.yaml"
    path.write_text(GROUPS_STUDY.format(method="robust"), encoding="utf-8")
    out = scalewright.check(path).to_dict()
    steps = {s["step"]: s for s in out["invariance"]}
    assert [(r["step"], r["item"]) for r in out["released"]] == [("scalar", "x3"),
                                                                 ("scalar", "x7")]
    for name, fitted in (("metric", TwoGroupReference(shared_intercepts=False)),
                         ("scalar", TwoGroupReference(shared_intercepts=True,
                                                      free_intercepts=("x3", "x7")))):
        fit = steps[name]["fit"]
        trace, trace2, acov = two_group_robust_pieces(fitted)
        df = fit["df"]
        # c = tr(UΓ)/df, T_SB = T/c, d* = tr(UΓ)²/tr((UΓ)²), T_adj = T·d*/tr(UΓ); the same
        # optimum and exact derivatives: 1e-4 relative
        assert_allclose(fit["chi_square"], fitted.chi_square(), rtol=1e-6)
        assert_allclose(fit["scaling_factor"], trace / df, rtol=SEMOPY_RTOL)
        assert_allclose(fit["chi_square_scaled"], fit["chi_square"] * df / trace,
                        rtol=SEMOPY_RTOL)
        assert_allclose(fit["df_adjusted"], trace ** 2 / trace2, rtol=SEMOPY_RTOL)
        assert_allclose(fit["chi_square_adjusted"], fit["chi_square"] * trace / trace2,
                        rtol=SEMOPY_RTOL)
    # configural: the groups share no parameter, so tr(UΓ) is the sum of each school's
    # single-group trace (textbook matrices at semopy's per-school fit)
    frame = semopy.examples.holzinger39.get_data()
    configural = steps["configural"]["fit"]
    traces, baselines = [], []
    for school in ("Grant-White", "Pasteur"):
        x = frame[frame.school == school][hz.ITEMS].to_numpy(float)
        per_school = semopy.Model(hz.THREE_FACTOR)
        per_school.fit(pd.DataFrame(x, columns=hz.ITEMS), options={"ftol": 1e-12})
        theta = per_school.param_vals.copy()
        rows, cols = np.tril_indices(9)

        def implied(t, m=per_school):
            m.update_matrices(t)
            return m.calc_sigma()[0][rows, cols]

        delta = np.stack([(implied(theta + e) - implied(theta - e)) / 2e-6
                          for e in np.eye(len(theta)) * 1e-6], axis=1)
        per_school.update_matrices(theta)
        traces.append(satorra_bentler_traces(x, per_school.calc_sigma()[0], delta)[0])
        s = np.cov(x, rowvar=False, bias=True)
        picks = ((rows == cols)[:, None] * (rows[:, None] == np.arange(9)[None, :])).astype(float)
        baselines.append(satorra_bentler_traces(x, np.diag(np.diag(s)), picks)[0])
    assert_allclose(configural["scaling_factor"], sum(traces) / 48, rtol=SEMOPY_RTOL)
    # robust CFI of every step (Brosseau-Liard & Savalei 2014) with the baseline's scaling
    # from the same textbook traces (independence within each school, 2 × 36 df)
    c_b = sum(baselines) / 72
    for step in steps.values():
        fit = step["fit"]
        c = fit["scaling_factor"]
        assert_allclose(fit["cfi_robust"],
                        1 - max(fit["chi_square"] - c * fit["df"], 0)
                        / (fit["baseline_chi_square"] - c_b * 72), rtol=SEMOPY_RTOL)
    # latent mean differences of the final scalar model with sandwich SEs (delta method)
    fitted.acov = acov
    value, se = fitted.value_and_se(lambda sigmas, mus, phis, kappa: kappa[1])
    means = {r["construct"]: r for r in out["latent_means"]}
    order = ["visual", "textual", "speed"]
    assert_allclose([means[c]["estimate"] for c in order], value, rtol=SEMOPY_RTOL)
    assert_allclose([means[c]["se"] for c in order], se, rtol=SEMOPY_RTOL)
