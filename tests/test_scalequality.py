"""The per-model keys reliability, validity, bifactor and higher_order.

Outside references: design/references.md (Holzinger & Swineford values computed
with pingouin and semopy), pingouin recomputed here (alpha and its Feldt
interval), semopy 2.3.11 fits with ftol 1e-12 (omega of the model refitted
without an item), exact population covariances (the ML solution then *is* the
population, so the coefficients follow from the published formulas computed
here), seeded simulation (coverage of the omega interval) and the demo study's
population model (src/scalewright/demo/population.py).
"""

from __future__ import annotations

import dataclasses
import json
import textwrap
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pingouin
import pytest
import semopy
from numpy.testing import assert_allclose
from scipy import optimize, stats

import holzinger as hz
import scalewright
from scalewright.demo import population
from scalewright.evaluate import evaluate_normal
from scalewright.itemdata import read_items
from scalewright.scalequality import omega_interval, omega_standard_errors, scale_quality_keys
from scalewright.standardize import delta_method_se
from scalewright.studyfile import load_study

DEMO = Path(__file__).resolve().parents[1] / "models" / "teacher-climate.yaml"
NAMES = list(hz.CONSTRUCTS)

HS_FILE = """\
study: Holzinger and Swineford (1939)
data:
  file: hs.csv
models:
  three:
    constructs:
      visual: [x1, x2, x3]
      textual: [x4, x5, x6]
      speed: [x7, x8, x9]
  two-item:
    constructs:
      visual: [x1, x2]
      textual: [x4, x5, x6]
      speed: [x7, x8, x9]
"""


@pytest.fixture(scope="module")
def hs_study(tmp_path_factory):
    folder = tmp_path_factory.mktemp("hs")
    hz.data().to_csv(folder / "hs.csv", index=False)
    path = folder / "hs.yaml"
    path.write_text(HS_FILE, encoding="utf-8")
    return load_study(path)


def keys_of(study, name, x):
    spec = study.model(name)
    columns = [hz.ITEMS.index(i) for i in spec.items]
    result = evaluate_normal(spec, x[:, columns])
    return result, scale_quality_keys(result, study, x[:, columns])


@pytest.fixture(scope="module")
def hs_keys(hs_study):
    return keys_of(hs_study, "three", hz.data().to_numpy(float))


def by_construct(keys):
    return {row["construct"]: row for row in keys["reliability"]}


# --------------------------------------------------------------------------- Holzinger–Swineford

@pytest.mark.parametrize("construct", NAMES)
def test_alpha_and_feldt_interval_match_pingouin(hs_keys, construct):
    row = by_construct(hs_keys[1])[construct]
    alpha, interval = pingouin.cronbach_alpha(hz.data()[hz.CONSTRUCTS[construct]])
    # same formula on the same data: rounding only
    assert_allclose(row["alpha"], alpha, rtol=1e-12)
    # pingouin rounds its Feldt interval to 3 decimals
    assert_allclose(row["alpha_ci95"], interval, atol=5e-4 + 1e-12)


def test_alpha_omega_ave_and_htmt_match_holzinger_references(hs_keys):
    keys = hs_keys[1]
    rows = by_construct(keys)
    # design/references.md [computed with pingouin]: 0.62612 / 0.88271 / 0.68846, 5 decimals
    assert_allclose([rows[c]["alpha"] for c in NAMES], [0.62612, 0.88271, 0.68846], atol=5e-6)
    # design/references.md [computed with semopy + numpy]: .6254 / .8852 / .6877; that
    # fit and ours (ftol 1e-12) differ in the 4th decimal (.62532), hence 2e-4
    assert_allclose([rows[c]["omega"] for c in NAMES], [0.6254, 0.8852, 0.6877], atol=2e-4)
    # design/references.md [computed]: AVE .3710 / .7197 / .4297 from loadings rounded
    # to 3 decimals (textual .7195 unrounded), hence 3e-4
    assert_allclose([keys["validity"]["ave"][c] for c in NAMES], [0.3710, 0.7197, 0.4297],
                    atol=3e-4)
    # design/references.md [computed]: HTMT .4243 .4235 .2896, 4 decimals
    htmt = {(r["a"], r["b"]): r["value"] for r in keys["validity"]["htmt"]}
    assert_allclose([htmt["visual", "textual"], htmt["visual", "speed"],
                     htmt["textual", "speed"]], [0.4243, 0.4235, 0.2896], atol=5e-5)


def semopy_omega(constructs: dict) -> tuple[dict, list[str]]:
    """Omega total of each construct's sum from a semopy fit (ftol 1e-12),
    (wᵀΛΦΛᵀw) / (wᵀΣ̂w) (McDonald 1999), and the items whose residual
    variance semopy left on its zero bound."""
    description = "\n".join(f"{c} =~ {' + '.join(items)}" for c, items in constructs.items())
    model = semopy.Model(description)
    items = [i for its in constructs.values() for i in its]
    model.fit(hz.data()[items], options={"ftol": 1e-12})
    rows, factors = model.names_lambda
    lam, phi, theta = model.mx_lambda, model.mx_psi, model.mx_theta
    out = {}
    for c, its in constructs.items():
        w = np.isin(rows, its).astype(float)
        common = w @ lam @ phi @ lam.T @ w
        out[c] = common / (common + w @ theta @ w)
    # a bound is hit when the variance is zero up to the optimizer's tolerance
    return out, [i for i, v in zip(rows, np.diag(theta)) if v < 1e-8]


def test_omega_equals_omega_of_semopy_fit(hs_keys):
    expected, bounded = semopy_omega(hz.CONSTRUCTS)
    assert bounded == []
    rows = by_construct(hs_keys[1])
    # our ML estimates match semopy's to about 1e-6 (DEVELOPERS.md), so omega does
    assert_allclose([rows[c]["omega"] for c in NAMES], [expected[c] for c in NAMES], atol=1e-5)


def semopy_fit_without(item: str):
    """semopy fit (ftol 1e-12) of the three-factor model without ``item``, and
    omega total of each construct's sum: (wᵀΛΦΛᵀw) / (wᵀΣ̂w), McDonald (1999)."""
    reduced = {c: [i for i in its if i != item] for c, its in hz.CONSTRUCTS.items()}
    return semopy_omega(reduced)


@pytest.mark.parametrize("item", hz.ITEMS)
def test_omega_if_dropped_agrees_with_semopy_fit_without_the_item(hs_keys, item):
    construct = next(c for c, its in hz.CONSTRUCTS.items() if item in its)
    omega, bounded = semopy_fit_without(item)
    row = by_construct(hs_keys[1])[construct]
    [got] = [r["omega_if_dropped"] for r in row["items"] if r["item"] == item]
    if not bounded:
        # two ML fits of the same reduced model, ours and semopy's: our estimates
        # match semopy's to about 1e-6 (DEVELOPERS.md), so 1e-5 for omega
        assert_allclose(got, omega[construct], atol=1e-5)
        return
    # semopy bounds variances at zero and stopped on the bound for these items,
    # so the unbounded ML solution lies beyond it: a negative residual variance,
    # where omega is withheld with a note naming those items
    assert got is None
    [note] = [n for n in row["notes"] if n["code"] == "not_dropped" and n["items"] == [item]]
    assert all(f"'{b}' (-" in note["message"] for b in bounded)
    assert "negative residual variance" in note["message"]


@pytest.mark.parametrize("construct", NAMES)
def test_item_rows_match_pingouin_alpha_without_the_item(hs_keys, construct):
    frame = hz.data()[hz.CONSTRUCTS[construct]]
    for row in by_construct(hs_keys[1])[construct]["items"]:
        rest = frame.drop(columns=row["item"])
        # pingouin's alpha of the remaining items; the corrected item–total
        # correlation is the item's correlation with the sum of the others
        assert_allclose(row["alpha_if_dropped"], pingouin.cronbach_alpha(rest)[0], rtol=1e-10)
        assert_allclose(row["item_total_r"],
                        np.corrcoef(frame[row["item"]], rest.sum(axis=1))[0, 1], rtol=1e-10)


def test_fornell_larcker_uses_the_model_correlations(hs_keys):
    rows = hs_keys[1]["validity"]["fornell_larcker"]
    # design/references.md [computed with semopy]: .459 .471 .283, 3 decimals
    assert [(r["a"], r["b"]) for r in rows] == [("visual", "textual"), ("visual", "speed"),
                                               ("textual", "speed")]
    assert_allclose([r["correlation"] for r in rows], [0.459, 0.471, 0.283], atol=5e-4)
    # Fornell & Larcker (1981) convention: every correlation is below both √AVE here
    assert all(r["convention"]["met"] for r in rows)


def test_keys_survive_a_json_round_trip(hs_keys):
    keys = hs_keys[1]
    assert json.loads(json.dumps(keys, allow_nan=False)) == keys


# --------------------------------------------------------------------------- omega interval

def test_omega_gradient_matches_numerical_delta_method(hs_keys):
    result = hs_keys[0]
    est = result.estimate
    weights = np.zeros((9, 3))
    for k, items in enumerate(hz.CONSTRUCTS.values()):
        weights[[hz.ITEMS.index(i) for i in items], k] = 1.0

    def omega(theta):
        mats = est.layout.patterns[0].matrices(theta)
        common = np.einsum("ik,ij,jk->k", weights,
                           mats.loadings @ mats.latent_cov @ mats.loadings.T, weights)
        return common / np.einsum("ik,ij,jk->k", weights, mats.implied_cov, weights)

    value, se = omega_standard_errors(est, weights)
    assert_allclose(value, omega(est.theta), rtol=1e-12)
    # central differences (step 1e-6) carry a relative error of about 1e-8
    assert_allclose(se, delta_method_se(est.theta, est.acov, omega), rtol=1e-6)


def test_omega_interval_is_inside_the_unit_interval_and_asymmetric():
    # logit-scale Wald interval: both bounds in (0, 1); the upper one is nearer
    # omega than the lower one when omega is above 1/2
    lower, upper = omega_interval(0.95, 0.03)
    assert 0 < lower < 0.95 < upper < 1
    assert upper - 0.95 < 0.95 - lower


@pytest.mark.slow
def test_omega_interval_covers_population_omega_in_simulation():
    # congeneric items .8/.7/.6/.5/.4, θ = 1 − λ²: ω = 3.0² / (9 + 3.1) = 0.743802
    loadings = np.array([0.8, 0.7, 0.6, 0.5, 0.4])
    sigma = np.outer(loadings, loadings) + np.diag(1 - loadings ** 2)
    truth = loadings.sum() ** 2 / sigma.sum()
    items = tuple(f"q{k}" for k in range(1, 6))
    spec = SimpleNamespace(name="one", constructs={"f": items}, cross_loadings={},
                           residual_covariances=(), higher_order={}, general=None,
                           identification="unit-variance", place="sim.yaml", items=items)
    rng = np.random.default_rng(20240917)
    chol = np.linalg.cholesky(sigma)
    replications, n = 300, 200
    estimates, ses, covered = [], [], 0
    for _ in range(replications):
        x = rng.standard_normal((n, 5)) @ chol.T
        est = evaluate_normal(spec, x).estimate
        [omega], [se] = omega_standard_errors(est, np.ones(5))
        lower, upper = omega_interval(omega, se)
        covered += lower <= truth <= upper
        estimates.append(omega)
        ses.append(se)
    # coverage .95; Monte Carlo SE √(.95·.05/300) = .0126; 3.5 SEs
    assert abs(covered / replications - 0.95) < 3.5 * 0.0126
    # the delta-method SE estimates the sampling SD; the SD of 300 draws has a
    # relative SE of about 1/√(2·300) = 4%, so 15% is 3.5 of those
    assert_allclose(np.mean(ses), np.std(estimates, ddof=1), rtol=0.15)


# --------------------------------------------------------------------------- bad input

def test_two_item_construct_gets_reliability_with_fragility_note(hs_study):
    _, keys = keys_of(hs_study, "two-item", hz.data().to_numpy(float))
    row = by_construct(keys)["visual"]
    assert row["n_items"] == 2 and 0 < row["omega"] < 1
    codes = [n["code"] for n in row["notes"]]
    assert "two_items" in codes and "not_dropped" in codes
    fragile = next(n for n in row["notes"] if n["code"] == "two_items")
    assert "omega rests on few numbers" in fragile["message"]
    assert [(r["alpha_if_dropped"], r["omega_if_dropped"]) for r in row["items"]] == [
        (None, None), (None, None)]


def test_items_of_very_different_spread_get_a_note_on_the_raw_sum(hs_study):
    # x3 in tenths of its unit: the raw sum of 'visual' is then mostly x3.  The SDs
    # named are pandas' (ddof = 1) of the complete rows; the other constructs, whose
    # SDs lie within a factor of 2 (common practice, no source), get no such note
    x = hz.data().to_numpy(float)
    x[:, 2] *= 10.0
    _, keys = keys_of(hs_study, "three", x)
    rows = by_construct(keys)
    (note,) = [n for n in rows["visual"]["notes"] if n["code"] == "item_spread"]
    sd = hz.data()[["x1", "x2", "x3"]].std() * [1.0, 1.0, 10.0]
    assert (f"SD {sd.min():.3g} for '{sd.idxmin()}' to {sd.max():.3g} for 'x3'"
            in note["message"])
    assert not [n for r in ("textual", "speed") for n in rows[r]["notes"]
                if n["code"] == "item_spread"]


def test_negative_alpha_points_to_reverse_keying_naming_the_item(hs_study):
    x = hz.data().to_numpy(float)
    x[:, 1] = -x[:, 1]               # x2 as an unrecoded reverse-keyed item would look
    _, keys = keys_of(hs_study, "three", x)
    row = by_construct(keys)["visual"]
    assert row["alpha"] < 0
    [note] = [n for n in row["notes"] if n["code"] == "reverse_keying"]
    assert note["items"] == ["x2"]
    assert "cannot be read as a reliability" in note["message"]
    assert "declare it reverse-keyed in the model file" in note["message"]


def test_missing_answers_reach_the_refits_and_alpha_uses_complete_rows(hs_study):
    x = hz.data().to_numpy(float)
    rng = np.random.default_rng(5)
    x[rng.random(x.shape) < 0.03] = np.nan
    given = []

    def listwise(spec, answers, columns):
        answers = answers[:, columns]
        given.append(np.isnan(answers).any())
        return evaluate_normal(spec, answers[~np.isnan(answers).any(axis=1)])

    result = listwise(hs_study.model("three"), x, list(range(x.shape[1])))
    keys = scale_quality_keys(result, hs_study, x,
                              estimates=lambda *args: listwise(*args).estimate)
    assert all(given)                 # every refit saw the rows with missing answers
    frame = hz.data()[hz.CONSTRUCTS["visual"]].copy()
    frame[np.isnan(x[:, :3])] = np.nan
    # pingouin on the rows that answer x1–x3 (dropped here: with nan_policy="listwise"
    # pingouin would still count all rows in the interval's degrees of freedom)
    alpha, interval = pingouin.cronbach_alpha(frame.dropna())
    row = by_construct(keys)["visual"]
    # same formula on the same rows; pingouin rounds its interval to 3 decimals
    assert_allclose(row["alpha"], alpha, rtol=1e-12)
    assert_allclose(row["alpha_ci95"], interval, atol=5e-4 + 1e-12)
    used = int((~np.isnan(x[:, :3])).all(axis=1).sum())
    [note] = [n for n in row["notes"] if n["code"] == "complete_rows"]
    assert f"use the {used} of 301 rows that answer all its items" in note["message"]


def test_model_without_convergence_keeps_only_data_based_coefficients(hs_study):
    result, _ = keys_of(hs_study, "three", hz.data().to_numpy(float))
    record = dataclasses.replace(result.estimate.record, converged=False)
    stuck = dataclasses.replace(result, estimate=dataclasses.replace(result.estimate,
                                                                      record=record))
    keys = scale_quality_keys(stuck, hs_study, hz.data().to_numpy(float))
    row = by_construct(keys)["visual"]
    assert row["alpha"] is not None and row["omega"] is None and row["coefficient_h"] is None
    assert any(n["code"] == "not_converged" for n in row["notes"])
    assert "ave" not in keys["validity"] and keys["validity"]["htmt"]


def test_singular_information_gives_omega_without_interval(hs_study):
    result, _ = keys_of(hs_study, "three", hz.data().to_numpy(float))
    singular = dataclasses.replace(result, estimate=dataclasses.replace(result.estimate,
                                                                        acov=None))
    row = by_construct(scale_quality_keys(singular, hs_study,
                                          hz.data().to_numpy(float)))["speed"]
    assert row["omega"] is not None and row["omega_ci95"] is None
    assert any(n["code"] == "no_interval" for n in row["notes"])


# --------------------------------------------------------------------------- exact populations

def exact_sample(sigma: np.ndarray, n: int = 400, seed: int = 1) -> np.ndarray:
    """Rows whose ÷N covariance is exactly ``sigma``: the ML solution of a
    correct model then reproduces the population parameters."""
    rng = np.random.default_rng(seed)
    z = rng.standard_normal((n, len(sigma)))
    z -= z.mean(axis=0)
    z = z @ np.linalg.inv(np.linalg.cholesky(z.T @ z / n)).T
    return z @ np.linalg.cholesky(sigma).T


def study_of(tmp_path, model_text: str):
    path = tmp_path / "pop.yaml"
    path.write_text("data:\n  file: pop.csv\nmodels:\n" + textwrap.indent(
        textwrap.dedent(model_text), "  "), encoding="utf-8")
    return load_study(path)


GROUPS = {"a": ["i1", "i2", "i3"], "b": ["i4", "i5", "i6"], "c": ["i7", "i8", "i9"]}


def test_bifactor_keys_recover_population_coefficients(tmp_path):
    # general .6 on all nine items, specific .4 / .3 / .5, θ = 1 − λ²
    general = np.full(9, 0.6)
    specific = np.repeat([0.4, 0.3, 0.5], 3)
    block = np.repeat(np.eye(3), 3, axis=0)                     # items × groups
    lam_s = block * specific[:, None]
    theta = 1 - general ** 2 - specific ** 2
    sigma = np.outer(general, general) + lam_s @ lam_s.T + np.diag(theta)
    study = study_of(tmp_path, """\
        bf:
          general: g
          constructs:
            a: [i1, i2, i3]
            b: [i4, i5, i6]
            c: [i7, i8, i9]
        """)
    x = exact_sample(sigma)
    result = evaluate_normal(study.model("bf"), x)
    keys = scale_quality_keys(result, study, x)
    bf = keys["bifactor"]
    # Zinbarg et al. (2005), Rodriguez, Reise & Haviland (2016), from the population:
    total = sigma.sum()
    group_sq = (lam_s.sum(axis=0) ** 2)
    expected = {"omega_hierarchical": general.sum() ** 2 / total,
                "omega_total": (general.sum() ** 2 + group_sq.sum()) / total,
                "ecv": (general ** 2).sum() / ((general ** 2).sum() + (specific ** 2).sum()),
                "puc": 1 - 9 / 36}
    # the ML solution reproduces the population to the optimizer's tolerance
    assert_allclose([bf[k] for k in expected], list(expected.values()), atol=1e-6)
    subsets = [np.arange(0, 3), np.arange(3, 6), np.arange(6, 9)]
    sub_total = np.array([sigma[np.ix_(r, r)].sum() for r in subsets])
    assert_allclose([s["omega_hierarchical_subscale"] for s in bf["subscales"]],
                    group_sq / sub_total, atol=1e-6)
    # reliability of each subscale sum counts general and specific variance (omega S)
    rows = by_construct(keys)
    assert_allclose([rows[c]["omega"] for c in "abc"],
                    [(general[r].sum() ** 2 + lam_s[r].sum() ** 2) / t
                     for r, t in zip(subsets, sub_total)], atol=1e-6)
    assert keys["validity"]["fornell_larcker"] == []
    assert any(n["code"] == "uncorrelated_by_design" for n in keys["validity"]["notes"])


def test_higher_order_keys_recover_population_coefficients(tmp_path):
    # first-order loadings .7/.6/.5 in each construct, higher-order loadings .8/.6/.7
    lam = np.repeat(np.eye(3), 3, axis=0) * np.tile([0.7, 0.6, 0.5], 3)[:, None]
    gamma = np.array([0.8, 0.6, 0.7])
    phi = np.outer(gamma, gamma)
    np.fill_diagonal(phi, 1.0)
    sigma = lam @ phi @ lam.T
    sigma += np.diag(1 - np.diag(sigma))
    study = study_of(tmp_path, """\
        ho:
          constructs:
            a: [i1, i2, i3]
            b: [i4, i5, i6]
            c: [i7, i8, i9]
          higher_order:
            g: [a, b, c]
        """)
    x = exact_sample(sigma)
    result = evaluate_normal(study.model("ho"), x)
    higher = scale_quality_keys(result, study, x)["higher_order"]
    assert higher["higher"] == "g"
    # R² of each construct on the higher-order factor is γ² (standardized paths)
    assert_allclose([c["variance_explained"] for c in higher["constructs"]], gamma ** 2,
                    atol=1e-6)
    # omega hierarchical of the higher-order factor (Zinbarg, Revelle & Yovel 2007):
    # (Σ_c γ_c Σ_i λ_ic)² / 1ᵀΣ1
    general = (lam @ gamma).sum() ** 2 / sigma.sum()
    assert_allclose(higher["coefficients"]["omega_hierarchical"], general, atol=1e-6)


# --------------------------------------------------------------------------- the demo study

@pytest.fixture(scope="module")
def demo_keys():
    """Every demo model fitted by normal-theory ML to the complete rows, as
    scalewright.api.check fits a study without missing-data handling."""
    study = load_study(DEMO)
    data = read_items(study)
    complete = data.values[data.complete_rows()]
    column = {item: j for j, item in enumerate(data.items)}
    keys = {}
    for spec in study.models:
        x = complete[:, [column[i] for i in spec.items]]
        keys[spec.name] = scale_quality_keys(evaluate_normal(spec, x), study, x)
    return keys


def test_demo_gives_reliability_for_every_construct_of_every_model(demo_keys):
    study = load_study(DEMO)
    for spec in study.models:
        rows = by_construct(demo_keys[spec.name])
        assert list(rows) == list(spec.constructs)
        for construct, row in rows.items():
            assert row["n_items"] == len(spec.constructs[construct])
            assert 0 < row["omega"] < 1 and row["omega_ci95"][0] < row["omega"]
            assert all(r["omega_if_dropped"] is not None for r in row["items"])


def test_demo_nowhere_item_raises_alpha_when_dropped(demo_keys):
    # population.py: ca6 has standardized loading .15 on autonomy, so dropping it
    # raises alpha in the sample (and omega, by the refit)
    item, construct = population.NOWHERE_ITEM, "autonomy"
    assert item in population.CONSTRUCTS[construct]
    row = by_construct(demo_keys["three-constructs"])[construct]
    [dropped] = [r for r in row["items"] if r["item"] == item]
    assert dropped["alpha_if_dropped"] > row["alpha"]
    assert dropped["omega_if_dropped"] > row["omega"]


def test_demo_general_factor_names_the_workload_items_that_run_against_it(demo_keys):
    # population.py: workload correlates −.35 and −.30 with support and autonomy,
    # so under one general factor the five workload items without a cross-loading
    # run against the twelve items of the two resources (wl6 also loads .35 on
    # support, which pulls it towards them)
    [row] = demo_keys["one-general"]["reliability"]
    named = {i for n in row["notes"] if n["code"] in ("loading_direction", "reverse_keying")
             for i in n["items"]}
    assert {"wl1", "wl2", "wl3", "wl4", "wl5"} <= named
    resources = set(population.CONSTRUCTS["support"] + population.CONSTRUCTS["autonomy"])
    assert not named & resources


def test_demo_bifactor_and_higher_order_models_get_their_keys(demo_keys):
    assert "bifactor" in demo_keys["bifactor"] and "higher_order" not in demo_keys["bifactor"]
    assert "higher_order" in demo_keys["higher-order"]
    assert "bifactor" not in demo_keys["three-constructs"]
    bf = demo_keys["bifactor"]["bifactor"]
    assert bf["general"] == "climate" and len(bf["items"]) == 18
    # orthogonal factors: ωS = general share + ωHS for every subscale (Reise 2012)
    for s in bf["subscales"]:
        assert_allclose(s["omega_subscale"], s["general_share"]
                        + s["omega_hierarchical_subscale"], atol=1e-10)
    higher = demo_keys["higher-order"]["higher_order"]
    assert [c["construct"] for c in higher["constructs"]] == ["workload", "support", "autonomy"]
    # the report reads these shapes (report/tables.py)
    assert {"omega_total", "omega_hierarchical", "ecv", "puc", "subscales"} <= set(
        higher["coefficients"])


def test_alpha_without_complete_rows_uses_the_ml_covariance_of_every_answer(tmp_path):
    # a three-form planned-missing design: every pair of items is answered together
    # by someone, nobody answers all items of a construct, so there are no complete
    # rows; alpha then comes from the saturated ML covariance, checked here against
    # the observed-data normal likelihood maximised with scipy (an independent fit)
    rng = np.random.default_rng(11)
    n = 600
    factors = rng.multivariate_normal([0, 0], [[1, 0.4], [0.4, 1]], n)
    x = np.repeat(factors, 3, axis=1) * 0.7 + 0.7 * rng.standard_normal((n, 6))
    form = np.arange(n) % 3
    for k in range(3):
        x[np.ix_(form == k, [k, k + 3])] = np.nan
    items = [f"q{j}" for j in range(1, 7)]
    pd.DataFrame(x, columns=items).to_csv(tmp_path / "answers.csv", index=False)
    (tmp_path / "study.yaml").write_text(
        "data: {file: answers.csv}\nmodels:\n  m:\n    constructs:\n"
        "      a: [q1, q2, q3]\n      b: [q4, q5, q6]\n", encoding="utf-8")
    entry = scalewright.check(tmp_path / "study.yaml").model("m").extra["reliability"][0]

    block = x[:, :3]
    lower = np.tril_indices(3)

    def minus_loglik(theta):
        chol = np.zeros((3, 3))
        chol[lower] = theta[3:]
        cov = chol @ chol.T
        total = 0.0
        for k in range(3):
            seen = [j for j in range(3) if j != k]
            rows = block[form == k][:, seen]
            total -= stats.multivariate_normal(theta[:3][seen], cov[np.ix_(seen, seen)]
                                               ).logpdf(rows).sum()
        return total

    start = np.concatenate([np.nanmean(block, axis=0), np.eye(3)[lower]])
    fit = optimize.minimize(minus_loglik, start, method="BFGS", options={"gtol": 1e-8})
    chol = np.zeros((3, 3))
    chol[lower] = fit.x[3:]
    cov = chol @ chol.T
    alpha = 1.5 * (1 - np.trace(cov) / cov.sum())   # Cronbach (1951), k = 3
    assert entry["alpha"] == pytest.approx(alpha, abs=1e-4)   # scipy ML fit above
    assert any("estimated by EM from every answer" in note["message"] for note in entry["notes"])
