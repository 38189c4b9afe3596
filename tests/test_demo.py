"""Tests of the invented demo study: its generator, model file and population model.

Check values come from three places, named beside each check:
- statistical theory: moments of a large seeded sample from the generator
  converge to those implied by ``population.py``; tolerances are 5 standard
  errors per entry (for ~200 entries the chance that any correct entry fails
  is about 1e-4 under the normal approximation, and the seed is fixed);
- algebra on the population model (tight tolerance, rounding only);
- the task specification of the demo scenario (what was to be planted).
Whether scalewright *finds* what was planted is tested with the engine.
"""

from importlib import resources
from pathlib import Path

import numpy as np
import pytest
import yaml

from scalewright.demo import population as pop
from scalewright.demo import write_demo
from scalewright.demo.generate import (
    DATA_FILE,
    MODEL_FILE,
    demo_table,
    draw_latent_responses,
)
from scalewright.errors import StudyError

MODELS = Path(__file__).resolve().parents[1] / "models"
LARGE_N = 200_000
LARGE_SEED = 7  # any seed other than population.SEED: a sample independent of the demo
Z = 5.0  # tolerance in standard errors, see module docstring


def _index(item):
    return pop.ITEMS.index(item)


def _construct_index(construct):
    return list(pop.CONSTRUCTS).index(construct)


@pytest.fixture(scope="module")
def template():
    text = resources.files("scalewright.demo").joinpath(MODEL_FILE).read_text(encoding="utf-8")
    return yaml.safe_load(text)


@pytest.fixture(scope="module")
def large_table():
    return demo_table(n=LARGE_N, seed=LARGE_SEED)


# --- the generator and the files it writes -----------------------------------

def test_write_demo_twice_gives_identical_bytes(tmp_path):
    first = write_demo(tmp_path / "a")
    second = write_demo(tmp_path / "b")
    assert first.read_bytes() == second.read_bytes()
    assert (first.parent / DATA_FILE).read_bytes() == (second.parent / DATA_FILE).read_bytes()


def test_committed_models_equal_fresh_output(tmp_path):
    write_demo(tmp_path)
    for name in (DATA_FILE, MODEL_FILE):
        assert (MODELS / name).read_bytes() == (tmp_path / name).read_bytes(), name


def test_write_demo_returns_the_model_file_path(tmp_path):
    assert write_demo(tmp_path / "new") == tmp_path / "new" / MODEL_FILE


def test_write_demo_refuses_to_replace_an_existing_data_file(tmp_path):
    (tmp_path / DATA_FILE).write_text("mine\n")
    with pytest.raises(StudyError, match=r"holds teacher-climate\.csv.*overwrite=True"):
        write_demo(tmp_path)
    assert (tmp_path / DATA_FILE).read_text() == "mine\n"


def test_write_demo_with_overwrite_replaces_existing_files(tmp_path):
    (tmp_path / DATA_FILE).write_text("mine\n")
    (tmp_path / MODEL_FILE).write_text("mine\n")
    write_demo(tmp_path, overwrite=True)
    assert (tmp_path / DATA_FILE).read_bytes() == (MODELS / DATA_FILE).read_bytes()
    assert (tmp_path / MODEL_FILE).read_bytes() == (MODELS / MODEL_FILE).read_bytes()


def test_write_demo_rejects_a_file_given_as_folder(tmp_path):
    target = tmp_path / "notes.txt"
    target.write_text("x")
    with pytest.raises(StudyError, match=r"notes\.txt': it is a file, not a folder"):
        write_demo(target)


def test_committed_data_file_is_smaller_than_60_kb():
    # limit from the task specification
    assert (MODELS / DATA_FILE).stat().st_size < 60_000


def test_demo_table_has_the_specified_columns_and_values():
    # task specification: id, school 1-24, phase, 18 items; answers 1-5, -9 or empty
    table = demo_table()
    assert list(table.columns) == ["teacher_id", "school", "phase", *pop.ITEMS]
    assert len(table) == pop.N and table["teacher_id"].is_unique
    assert set(table["school"]) <= set(range(1, 25))
    assert set(table["phase"]) == set(pop.PHASES)
    answers = table[pop.ITEMS].to_numpy(dtype=float, na_value=np.nan)
    assert set(np.unique(answers[~np.isnan(answers)])) == {pop.MISSING_CODE, 1, 2, 3, 4, 5}


# --- the generator draws from the population model (statistical theory) ------

def test_latent_covariance_matches_large_sample_within_phases():
    rng = np.random.default_rng(LARGE_SEED)
    secondary = np.arange(LARGE_N) % 2 == 1
    latent = draw_latent_responses(rng, secondary)
    centred = latent.copy()
    centred[secondary] -= latent[secondary].mean(axis=0)
    centred[~secondary] -= latent[~secondary].mean(axis=0)
    sample = centred.T @ centred / (LARGE_N - 2)  # pooled within-phase covariance
    sigma = pop.latent_response_covariance()
    # Var(s_jk) = (sigma_jk^2 + sigma_jj sigma_kk) / (n - 1) for normal data
    # (Wishart moments; Anderson 2003, An Introduction to Multivariate Statistical Analysis, 3rd ed., ch. 7)
    se = np.sqrt((sigma**2 + np.outer(np.diag(sigma), np.diag(sigma))) / (LARGE_N - 2))
    assert np.all(np.abs(sample - sigma) < Z * se)


def test_latent_phase_mean_difference_matches_intercept_shift():
    rng = np.random.default_rng(LARGE_SEED)
    secondary = np.arange(LARGE_N) % 2 == 1
    latent = draw_latent_responses(rng, secondary)
    difference = latent[secondary].mean(axis=0) - latent[~secondary].mean(axis=0)
    expected = pop.intercepts("secondary") - pop.intercepts("primary")
    # SE of a difference of two independent means, unit variances, n/2 per phase
    se = np.sqrt(2 * 2 / LARGE_N)
    assert np.all(np.abs(difference - expected) < Z * se)


@pytest.mark.parametrize("phase", pop.PHASES)
def test_answer_proportions_match_population_category_probabilities(large_table, phase):
    rows = large_table[large_table["phase"] == phase]
    answers = rows[pop.ITEMS].to_numpy(dtype=float, na_value=np.nan)
    answered = np.isin(answers, [1, 2, 3, 4, 5])
    counts = (answers[:, :, None] == np.arange(1, 6)).sum(axis=0)
    n_answered = answered.sum(axis=0)[:, None]
    expected = pop.category_probabilities(phase)
    # binomial SE of a proportion; missingness is independent of the answer
    se = np.sqrt(expected * (1 - expected) / n_answered)
    assert np.all(np.abs(counts / n_answered - expected) < Z * se)


def test_missing_shares_match_population_rates(large_table):
    answers = large_table[pop.ITEMS]
    cells = answers.size
    for share, rate in [(answers.isna().to_numpy().mean(), pop.MISSING_RATE),
                        ((answers == pop.MISSING_CODE).to_numpy(na_value=False).mean(), pop.MISSING_CODE_RATE)]:
        # binomial SE over all cells
        assert abs(share - rate) < Z * np.sqrt(rate * (1 - rate) / cells)


def test_phases_are_about_half_each(large_table):
    share = (large_table["phase"] == "secondary").mean()
    # task specification "about half each"; binomial SE with p = 0.5
    assert abs(share - 0.5) < Z * np.sqrt(0.25 / LARGE_N)


# --- what was planted, in the population model (algebra and specification) ---

def test_latent_responses_have_unit_variance():
    # standardized loadings require Var(y*) = 1; algebra, rounding tolerance
    np.testing.assert_allclose(np.diag(pop.latent_response_covariance()), 1.0, atol=1e-12)


def test_latent_response_covariance_is_positive_definite():
    assert np.linalg.eigvalsh(pop.latent_response_covariance()).min() > 0.1


def test_only_reverse_keyed_items_correlate_negatively_with_their_construct():
    # Corr(y*_j, eta_k) = (Lambda Phi)_jk since Var(y*) = Var(eta) = 1
    own = [_construct_index(c) for c, items in pop.CONSTRUCTS.items() for _ in items]
    raw = (pop.LOADINGS @ pop.FACTOR_CORRELATIONS)[np.arange(len(pop.ITEMS)), own]
    negative = {item for item, r in zip(pop.ITEMS, raw) if r < 0}
    assert negative == set(pop.REVERSED)


def test_keyed_items_all_correlate_positively_with_their_construct():
    own = [_construct_index(c) for c, items in pop.CONSTRUCTS.items() for _ in items]
    keyed = (pop.KEYED_LOADINGS @ pop.FACTOR_CORRELATIONS)[np.arange(len(pop.ITEMS)), own]
    assert np.all(keyed > 0)


def test_keyed_covariance_flips_sign_of_reversed_rows_only():
    raw, keyed = pop.latent_response_covariance(), pop.latent_response_covariance(keyed=True)
    np.testing.assert_allclose(keyed, np.outer(pop.KEYING, pop.KEYING) * raw, atol=1e-15)
    assert sorted(np.array(pop.ITEMS)[pop.KEYING < 0]) == sorted(pop.REVERSED)


def test_nowhere_item_loads_weakly_on_its_construct_and_nowhere_else():
    row = pop.LOADINGS[_index(pop.NOWHERE_ITEM)]
    construct = next(c for c, items in pop.CONSTRUCTS.items() if pop.NOWHERE_ITEM in items)
    # task specification: standardized loading about .15 on its own construct
    assert row[_construct_index(construct)] == pytest.approx(0.15, abs=0.05)
    assert np.count_nonzero(row) == 1
    # explained variance of its latent response: lambda' Phi lambda
    assert row @ pop.FACTOR_CORRELATIONS @ row < 0.05


def test_other_items_load_at_least_055_on_their_construct():
    others = [i for i, item in enumerate(pop.ITEMS) if item != pop.NOWHERE_ITEM]
    own = [_construct_index(c) for c, items in pop.CONSTRUCTS.items() for _ in items]
    primary = np.abs(pop.LOADINGS[np.arange(len(pop.ITEMS)), own])[others]
    assert primary.min() >= 0.55


def test_cross_loading_item_loads_about_035_on_its_second_construct():
    item, second = pop.CROSS_LOADING
    # task specification: standardized ~.35 on the second construct
    assert pop.LOADINGS[_index(item), _construct_index(second)] == pytest.approx(0.35, abs=0.05)
    assert item not in pop.CONSTRUCTS[second]


def test_no_item_other_than_the_cross_loading_one_has_two_loadings():
    two = np.array(pop.ITEMS)[np.count_nonzero(pop.LOADINGS, axis=1) > 1]
    assert list(two) == [pop.CROSS_LOADING[0]]


def test_correlated_pair_has_residual_correlation_about_035_and_no_other_pair_does():
    common = pop.LOADINGS @ pop.FACTOR_CORRELATIONS @ pop.LOADINGS.T
    theta = pop.latent_response_covariance() - common
    residual_correlation = theta / np.sqrt(np.outer(np.diag(theta), np.diag(theta)))
    a, b = (_index(item) for item in pop.CORRELATED_PAIR)
    # task specification: ~.35 residual correlation
    assert residual_correlation[a, b] == pytest.approx(0.35, abs=1e-12)
    off = residual_correlation - np.eye(len(pop.ITEMS))
    off[[a, b], [b, a]] = 0.0
    np.testing.assert_allclose(off, 0.0, atol=1e-12)


def test_construct_correlations_are_as_specified():
    # task specification: workload-support -.35, workload-autonomy -.30, support-autonomy .45
    phi = pop.FACTOR_CORRELATIONS
    w, s, a = (_construct_index(c) for c in ("workload", "support", "autonomy"))
    assert (phi[w, s], phi[w, a], phi[s, a]) == (-0.35, -0.30, 0.45)
    np.testing.assert_array_equal(phi, phi.T)
    np.testing.assert_array_equal(np.diag(phi), 1.0)


def test_several_items_pile_up_at_agree_or_disagree_end():
    probabilities = pop.category_probabilities("primary")
    agree = probabilities[:, 3:].sum(axis=1)
    # task specification: several items pile up at 4-5; here "several" = at least a third
    assert np.count_nonzero(agree > 0.6) >= 6
    # skewness of the answer distribution, sum_c p_c (c - mu)^3 / sd^3; |skew| > 0.5 is
    # "moderately skewed" (common practice, no source)
    c = np.arange(1, 6)
    mu = probabilities @ c
    centred = c[None, :] - mu[:, None]
    skew = (probabilities * centred**3).sum(axis=1) / (probabilities * centred**2).sum(axis=1) ** 1.5
    assert np.count_nonzero(np.abs(skew) > 0.5) >= 6


def test_noninvariant_item_is_the_only_one_whose_expected_answer_differs_by_phase():
    c = np.arange(1, 6)
    difference = pop.category_probabilities("secondary") @ c - pop.category_probabilities("primary") @ c
    changed = np.array(pop.ITEMS)[np.abs(difference) > 1e-12]
    assert list(changed) == [pop.NONINVARIANT_ITEM]
    # a shift of 0.5 latent SD moves the expected answer up by a clearly visible amount
    assert difference[_index(pop.NONINVARIANT_ITEM)] > 0.3


def test_category_probabilities_sum_to_one_and_thresholds_increase():
    for phase in pop.PHASES:
        np.testing.assert_allclose(pop.category_probabilities(phase).sum(axis=1), 1.0, atol=1e-12)
    assert np.all(np.diff(pop.THRESHOLDS, axis=1) > 0)


# --- the model file template --------------------------------------------------

def test_model_file_declares_the_population_items_keys_and_groups(template):
    assert list(template["items"]["wording"]) == pop.ITEMS
    assert sorted(template["items"]["reverse"]) == sorted(pop.REVERSED)
    assert template["items"]["scale"] == [1, 5]
    assert template["data"] == {"file": DATA_FILE, "missing": [pop.MISSING_CODE], "id": "teacher_id"}
    assert template["groups"] == {"column": "phase"}


def test_model_file_states_every_about_entry(template):
    expected = {"rationale", "population", "sampling", "exclusions", "sample_size",
                "clustering", "response_format"}
    assert set(template["about"]) == expected
    assert all(text.strip() for text in template["about"].values())


def test_model_file_declares_four_rival_models_with_three_constructs_first(template):
    models = template["models"]
    assert list(models) == ["one-general", "three-constructs", "higher-order", "bifactor"]
    assert [name for name, model in models.items() if model.get("first")] == ["three-constructs"]
    assert models["one-general"]["constructs"] == {"climate": pop.ITEMS}
    assert models["higher-order"]["higher_order"] == {"climate": list(pop.CONSTRUCTS)}
    assert models["bifactor"]["general"] == "climate"
    for name in ("three-constructs", "higher-order", "bifactor"):
        assert models[name]["constructs"] == pop.CONSTRUCTS, name


def test_three_constructs_model_leaves_out_the_planted_cross_loading_and_residual_pair(template):
    # the tool's hints must have something to find
    model = template["models"]["three-constructs"]
    assert set(model) == {"first", "rationale", "constructs"}
    item, second = pop.CROSS_LOADING
    assert item not in model["constructs"][second]
