"""Seeded generator of the invented teacher workplace climate survey.

Draws teachers from the population model in :mod:`scalewright.demo.population`
and writes the demo data file and model file.  Only ``numpy.random.default_rng``
is used for randomness, and the data file holds integers only, so the bytes
written are the same on every platform for a given numpy random stream.
"""

from importlib import resources
from pathlib import Path

import numpy as np
import pandas as pd

from scalewright.demo import population as pop
from scalewright.errors import StudyError

DATA_FILE = "teacher-climate.csv"
MODEL_FILE = "teacher-climate.yaml"


def draw_schools(rng, n):
    """Draw each teacher's school code, half of the teachers from each phase.

    Each phase gets probability one half, shared equally among its schools
    (``population.SCHOOLS``).

    Parameters
    ----------
    rng : numpy.random.Generator
    n : int
        Number of teachers.

    Returns
    -------
    numpy.ndarray
        Sorted integer school codes, length ``n``.
    """
    codes = np.concatenate([pop.SCHOOLS[phase] for phase in pop.PHASES])
    weights = np.concatenate([np.full(pop.SCHOOLS[phase].size, 0.5 / pop.SCHOOLS[phase].size)
                              for phase in pop.PHASES])
    return np.sort(rng.choice(codes, size=n, p=weights))


def draw_latent_responses(rng, secondary):
    """Draw continuous latent responses from the population model.

    :math:`y^* = \\nu_g + \\Lambda\\eta + \\varepsilon` with
    :math:`\\eta = L_\\Phi z_1`, :math:`\\varepsilon = L_\\Theta z_2`, where
    :math:`L` are Cholesky factors and :math:`z` independent standard normal
    vectors, so that :math:`\\mathrm{Cov}(y^*) = \\Lambda\\Phi\\Lambda^\\top + \\Theta`.
    The Cholesky factor (unique, unlike an eigen or singular value
    decomposition) keeps the draws identical across linear-algebra libraries.

    Parameters
    ----------
    rng : numpy.random.Generator
    secondary : numpy.ndarray of bool
        One entry per teacher: True for a secondary teacher.

    Returns
    -------
    numpy.ndarray
        ``len(secondary)`` x 18 latent responses on the raw answer scale.
    """
    n = secondary.size
    factor_root = np.linalg.cholesky(pop.FACTOR_CORRELATIONS)
    residual_root = np.linalg.cholesky(pop.residual_covariance())
    constructs = rng.standard_normal((n, len(pop.CONSTRUCTS))) @ factor_root.T
    residuals = rng.standard_normal((n, len(pop.ITEMS))) @ residual_root.T
    means = np.where(secondary[:, None], pop.intercepts(pop.PHASES[1]), pop.intercepts(pop.PHASES[0]))
    return means + constructs @ pop.LOADINGS.T + residuals


def cut_into_answers(latent):
    """Turn latent responses into answers 1-5 with the item thresholds.

    :math:`x_j = 1 + \\#\\{c : y^*_j > \\tau_{jc}\\}` (Muthén 1984).

    Parameters
    ----------
    latent : numpy.ndarray
        n x 18 latent responses.

    Returns
    -------
    numpy.ndarray
        n x 18 integer answers in 1-5.

    References
    ----------
    Muthén, B. (1984). Psychometrika, 49, 115-132.
    """
    return 1 + (latent[:, :, None] > pop.THRESHOLDS[None, :, :]).sum(axis=2)


def blank_some_answers(rng, answers):
    """Make some answers missing, completely at random.

    A cell is left empty with probability ``MISSING_RATE`` and written as
    ``MISSING_CODE`` with probability ``MISSING_CODE_RATE``, independently of
    everything else.

    Parameters
    ----------
    rng : numpy.random.Generator
    answers : numpy.ndarray
        n x 18 integer answers.

    Returns
    -------
    pandas.DataFrame
        n x 18 nullable integers (``pd.NA`` for an empty cell), columns ``ITEMS``.
    """
    u = rng.random(answers.shape)
    coded = np.where(u < pop.MISSING_RATE + pop.MISSING_CODE_RATE, pop.MISSING_CODE, answers)
    table = pd.DataFrame(coded, columns=pop.ITEMS).astype("Int64")
    return table.mask(u < pop.MISSING_RATE)


def demo_table(n=pop.N, seed=pop.SEED):
    """The demo data as written to the data file.

    Parameters
    ----------
    n : int, default ``population.N``
        Number of teachers.
    seed : int, default ``population.SEED``
        Seed of ``numpy.random.default_rng``.

    Returns
    -------
    pandas.DataFrame
        Columns ``teacher_id`` (T001, T002, ...), ``school`` (1-24), ``phase``
        (primary/secondary) and the 18 items, one row per teacher.
    """
    rng = np.random.default_rng(seed)
    school = draw_schools(rng, n)
    secondary = np.isin(school, pop.SCHOOLS[pop.PHASES[1]])
    answers = blank_some_answers(rng, cut_into_answers(draw_latent_responses(rng, secondary)))
    width = len(str(n))
    ids = pd.DataFrame({
        "teacher_id": np.char.add("T", np.char.zfill(np.arange(1, n + 1).astype(str), width)),
        "school": school,
        "phase": np.where(secondary, pop.PHASES[1], pop.PHASES[0]),
    })
    return pd.concat([ids, answers], axis=1)


def write_demo(folder: Path, overwrite: bool = False) -> Path:
    """Write the demo data file and model file into a folder.

    Parameters
    ----------
    folder : pathlib.Path
        Where to write ``teacher-climate.csv`` and ``teacher-climate.yaml``;
        created if it does not exist.
    overwrite : bool, default False
        Replace files of those names that are already there.

    Returns
    -------
    pathlib.Path
        The model file written.

    Raises
    ------
    StudyError
        If ``folder`` is a file, or if either file exists and ``overwrite`` is
        False.
    """
    folder = Path(folder)
    if folder.exists() and not folder.is_dir():
        raise StudyError(
            f"Cannot write the demo study into '{folder}': it is a file, not a folder. "
            "Give the path of a folder (it is created if it does not exist)."
        )
    targets = [folder / DATA_FILE, folder / MODEL_FILE]
    existing = [path.name for path in targets if path.exists()]
    if existing and not overwrite:
        raise StudyError(
            f"Not writing the demo study into '{folder}': it already holds {' and '.join(existing)}, "
            "which would be replaced. Choose another folder or move those files away (from "
            "Python, write_demo(folder, overwrite=True) replaces them)."
        )
    folder.mkdir(parents=True, exist_ok=True)
    with open(targets[0], "w", encoding="utf-8", newline="") as handle:
        demo_table().to_csv(handle, index=False, lineterminator="\n")
    template = resources.files("scalewright.demo").joinpath(MODEL_FILE).read_bytes()
    targets[1].write_bytes(template)
    return targets[1]
