"""``scalewright init DATA_FILE``: draft a model file from a data file's columns.

The draft is a starting point the researcher edits.  Numeric columns with
few distinct whole-number answers are taken as items; items whose names
share a stem before a trailing number (``wl1``, ``wl2`` …) are grouped into
one construct, since questionnaires are usually numbered that way; every
other column is listed in a comment.  The draft never invents what only the
researcher knows (rationale, sample, first-specified model): it leaves
commented places for them.  An existing file is never overwritten.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pandas as pd

from scalewright.errors import StudyError
from scalewright.itemdata import READ_ERRORS
from scalewright.studyfile import DATA_FORMATS

PREVIEW_ROWS = 5000
MAX_ANSWER_CATEGORIES = 11   # a 0–10 rating is the widest scale taken as an item (common practice, no source)
_STEM = re.compile(r"^(.*?)[_\-. ]?(\d+)$")


def draft_model_file(data_file: str | Path, target: str | Path | None = None) -> Path:
    """Write a draft model file for ``data_file``; return its path."""
    data_path = Path(data_file)
    table = _preview(data_path)
    items, others = _split_columns(table)
    if len(items) < 3:
        raise StudyError(
            f"{data_path.name}: found {len(items)} column{'' if len(items) == 1 else 's'} that "
            f"{'looks' if len(items) == 1 else 'look'} like questionnaire "
            "items (numeric, whole-number answers on a short scale). A model needs at least "
            "three; check that the answers are stored as numbers, not as text labels.")
    target = Path(target) if target else data_path.with_suffix(".yaml")
    if target.exists():
        raise StudyError(
            f"{target}: this file already exists and will not be overwritten. Name another "
            "file with --to PATH, or move the existing one away.")
    scale, codes = _scale_and_codes(table[items].to_numpy(float))
    text = _render(data_path, target, items, others, scale, codes, _constructs(items))
    try:
        with open(target, "x", encoding="utf-8") as handle:   # "x": never replace a file
            handle.write(text)
    except OSError as exc:
        raise StudyError(f"{target}: the draft could not be written ({exc.strerror}). Check "
                         "that the folder exists and is writable, or name another file with "
                         "--to PATH.") from None
    return target


def _preview(path: Path) -> pd.DataFrame:
    """The first rows of a data file, for guessing its items."""
    suffix = path.suffix.lower()
    if path.is_dir():
        raise StudyError(f"{path}: this is a folder, not a data file. Give the path of the "
                         "data file itself.")
    if not path.is_file():
        raise StudyError(f"{path}: no such data file. Check the path and the file name.")
    if suffix not in DATA_FORMATS:
        raise StudyError(f"{path.name}: files ending in '{suffix}' cannot be read. Use one of "
                         f"{', '.join(DATA_FORMATS)}.")
    try:
        if suffix in (".csv", ".tsv", ".txt"):
            sep = {".csv": ",", ".tsv": "\t"}.get(suffix)
            return pd.read_csv(path, sep=sep, nrows=PREVIEW_ROWS, engine="python" if sep is None
                               else "c")
        if suffix == ".xlsx":
            return pd.read_excel(path, nrows=PREVIEW_ROWS, engine="openpyxl")
        if suffix == ".parquet":
            return pd.read_parquet(path).head(PREVIEW_ROWS)
        import pyreadstat
        reader = pyreadstat.read_sav if suffix == ".sav" else pyreadstat.read_dta
        return reader(path, row_limit=PREVIEW_ROWS, apply_value_formats=False)[0]
    except pd.errors.EmptyDataError:
        raise StudyError(f"{path.name}: the file is empty. Name a file with a header row of "
                         "column names and one row per person.") from None
    except UnicodeDecodeError as exc:
        raise StudyError(f"{path.name}: the file is not UTF-8 text (byte "
                         f"0x{exc.object[exc.start]:02x} is not UTF-8). "
                         "Save it as UTF-8 text (in a spreadsheet program: CSV UTF-8), or as "
                         ".xlsx.") from None
    except READ_ERRORS as exc:
        reason = " ".join(str(exc).split())[:200] or "no reason given"
        raise StudyError(f"{path.name}: the file could not be read ({reason}). Check that it "
                         "opens in the program that wrote it and that its extension matches "
                         "its format.") from None


def _split_columns(table: pd.DataFrame) -> tuple[list[str], list[str]]:
    items, others = [], []
    for name in table.columns:
        column = pd.to_numeric(table[name], errors="coerce")
        answered = column.dropna()
        numeric = len(answered) >= 0.9 * table[name].notna().sum() > 0
        whole = numeric and np.all(np.mod(answered, 1) == 0)
        few = numeric and 2 <= answered.nunique() <= MAX_ANSWER_CATEGORIES
        (items if whole and few else others).append(str(name))
    return items, others


def _scale_and_codes(values: np.ndarray) -> tuple[tuple[float, float], list[float]]:
    """The answer range and the values that look like missing-answer codes.

    The range is the run of consecutive whole numbers around the median
    answer; values outside it (e.g. -9 or 99 beside answers 1–5) are taken
    as codes for "no answer", to be confirmed by the researcher.
    """
    answered = values[np.isfinite(values)]
    present = set(np.unique(answered).tolist())
    low = high = float(np.median(answered).round())
    while low - 1 in present:
        low -= 1
    while high + 1 in present:
        high += 1
    codes = sorted(v for v in present if v < low or v > high)
    return (low, high), codes


def _constructs(items: list[str]) -> dict[str, list[str]]:
    """Group items by the stem of their names (``wl1``, ``wl2`` → ``wl``)."""
    groups: dict[str, list[str]] = {}
    for item in items:
        match = _STEM.match(item)
        stem = match.group(1) if match and match.group(1) else "construct"
        groups.setdefault(stem, []).append(item)
    leftovers = [i for stem, its in groups.items() if len(its) < 2 for i in its]
    out = {stem: its for stem, its in groups.items() if len(its) >= 2}
    if leftovers:
        out.setdefault("unassigned", []).extend(leftovers)
    if len(out.get("unassigned", [])) == 1:     # a one-item construct is not allowed
        single = out.pop("unassigned")[0]
        next(iter(out.values())).append(single)
    return out


def _render(data_path: Path, target: Path, items, others, scale, codes, constructs) -> str:
    try:
        file_ref = data_path.resolve().relative_to(target.resolve().parent).as_posix()
    except ValueError:
        file_ref = data_path.resolve().as_posix()
    low, high = (_number(v) for v in scale)
    missing = ", ".join(str(_number(c)) for c in codes)
    lines = [
        "# Draft model file written by `scalewright init`. Edit it, then run:",
        f"#   scalewright check {target.name}",
        "# Items were guessed from the columns' names; check every construct below.",
        f"study: {data_path.stem}",
        "",
        "about:   # what only you can say; the report shows which of these are missing",
        "  # rationale: why these constructs and items",
        "  # population: who answered",
        "  # sampling: how they were reached",
        "  # exclusions: who was left out and why",
        "  # sample_size: how the sample size was decided",
        "  # clustering: e.g. people nested in schools, and how that was handled",
        "  # response_format: e.g. five-point agreement scale",
        "",
        "data:",
        f"  file: {_quote(file_ref)}",
        f"  missing: [{missing}]   # codes that mean 'no answer'"
        + ("; guessed from answers outside the scale, check them" if codes else ", e.g. [-9, 99]"),
        "",
        "items:",
        f"  scale: [{low}, {high}]   # lowest and highest possible answer",
        "  reverse: []   # items worded in the opposite direction",
    ]
    if others:
        lines.append(f"  # columns not taken as items: {', '.join(others)}")
    lines += ["", "models:", "  drafted:", "    first: true   # the model you specified "
              "before seeing the data", "    constructs:"]
    for name, its in constructs.items():
        lines.append(f"      {_quote(name)}: [{', '.join(_quote(i) for i in its)}]")
    lines += ["  one-general:   # a rival: every item on one construct", "    constructs:",
              f"      general: [{', '.join(_quote(i) for i in items)}]", ""]
    return "\n".join(lines)


def _number(value: float):
    return int(value) if float(value).is_integer() else float(value)


def _quote(text: str) -> str:
    """A YAML scalar for a column name: plain when safe, single-quoted otherwise."""
    if re.fullmatch(r"[A-Za-z_][A-Za-z0-9_\-.]*", text) and text.lower() not in (
            "yes", "no", "true", "false", "on", "off", "null"):
        return text
    return "'" + text.replace("'", "''") + "'"
