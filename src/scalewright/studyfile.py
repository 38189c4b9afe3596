"""Read a model file (YAML) into a typed, validated :class:`Study`.

The model file is scalewright's own format: one study per file, the data file
and its missing-answer codes, item details (response range, reverse keying,
wording, ordinal or continuous), estimation settings, an optional grouping
column, and one or more rival models, each naming its constructs and their
items.  The YAML is read with PyYAML's safe loader; the node tree is converted
here so that the line of every key and list entry is recorded and so that a
key written twice in one mapping is an error (the plain loader silently keeps
the last one).

Every problem the user can fix raises :class:`~scalewright.errors.StudyError`
with one message of the shape
``"<file>, line <n>: <what is wrong, with the value found>. <what to do>."``

Checks that need the matrix layout of a model (counting free parameters
against moments, identification) are not made here.
"""

from __future__ import annotations

import datetime as _dt
import difflib
import math
from dataclasses import dataclass, field
from pathlib import Path

import yaml

from scalewright.errors import StudyError

DATA_FORMATS = (".csv", ".tsv", ".txt", ".xlsx", ".parquet", ".sav", ".dta")
TREAT_AS = ("auto", "continuous", "ordinal")
METHODS = ("auto", "normal", "robust", "ordinal")
MISSING_HANDLING = ("auto", "full-information", "listwise")
IDENTIFICATIONS = ("unit-variance", "marker")

TOP_KEYS = ("study", "about", "data", "items", "estimation", "groups", "models")
ABOUT_KEYS = ("rationale", "population", "sampling", "exclusions", "sample_size",
              "clustering", "response_format")
DATA_KEYS = ("file", "missing", "sheet", "id")
ITEMS_KEYS = ("scale", "reverse", "wording", "treat_as", "collapse_sparse")
ESTIMATION_KEYS = ("method", "missing", "identification", "hint_threshold", "salience")
GROUPS_KEYS = ("column", "labels", "reference", "allow_many")
MODEL_KEYS = ("first", "rationale", "changes", "identification", "nested_in", "constructs",
              "residual_covariances", "cross_loadings", "higher_order", "general")
CHANGE_KEYS = ("change", "cue", "reason")

_MERGE_TAG = "tag:yaml.org,2002:merge"
#: the safe loader, in its libyaml (C) build when PyYAML has one: the same safe
#: constructors, about six times faster on a 100-item model file
_SAFE_LOADER = getattr(yaml, "CSafeLoader", yaml.SafeLoader)


# --------------------------------------------------------------------------- the typed result

@dataclass(frozen=True)
class Place:
    """Where something was written in the model file, for messages.

    ``str(place)`` is ``"climate.yaml, line 12"``, or just the file name when
    the line is unknown.
    """

    file: Path
    line: int | None  # 1-based

    def __str__(self) -> str:
        name = Path(self.file).name
        return name if self.line is None else f"{name}, line {self.line}"


@dataclass(frozen=True)
class ItemSpec:
    """One questionnaire item as declared in the model file."""

    name: str
    wording: str | None
    reverse: bool
    treat_as: str  # "auto" | "continuous" | "ordinal"


@dataclass(frozen=True)
class Change:
    """One change from the first-specified model, with its cue and reason."""

    change: str
    cue: str | None
    reason: str | None


@dataclass(frozen=True)
class ModelSpec:
    """One rival model: constructs, their items and the extra paths.

    ``identification`` is resolved: the model's own setting, or else the
    ``estimation:`` default.
    """

    name: str
    constructs: dict[str, tuple[str, ...]]
    cross_loadings: dict[str, tuple[str, ...]]
    residual_covariances: tuple[tuple[str, str], ...]
    higher_order: dict[str, tuple[str, ...]]
    general: str | None
    identification: str
    first: bool
    rationale: str | None
    changes: tuple[Change, ...]
    nested_in: tuple[str, ...]
    place: Place

    @property
    def items(self) -> tuple[str, ...]:
        """Every item the model uses, in first-appearance order.

        Cross-loadings and residual covariances may only name items that are
        listed under a construct, so the construct lists hold them all.
        """
        return tuple(dict.fromkeys(i for items in self.constructs.values() for i in items))


@dataclass(frozen=True)
class DataSpec:
    """The data file and how to read it."""

    file: Path  # absolute, resolved relative to the model file
    missing: tuple  # codes meaning "no answer" (numbers or strings)
    sheet: str | None
    id_column: str | None
    place: Place


@dataclass(frozen=True)
class EstimationSpec:
    """Study-wide estimation settings (all optional in the file)."""

    method: str = "auto"
    missing: str = "auto"
    identification: str = "unit-variance"
    hint_threshold: float = 10.0
    salience: float = 0.40


@dataclass(frozen=True)
class GroupSpec:
    """The grouping column.

    ``labels`` maps a value found in the column to its label.  ``reference``
    is None when the file does not name one; the reference group is then the
    first group label in sorted order, which only the data can tell.
    """

    column: str
    labels: dict
    reference: str | None
    allow_many: bool
    place: Place


@dataclass(frozen=True)
class Study:
    """Everything the model file says, typed and validated.

    ``items`` holds every item used by any model, in the order the models use
    them (models in file order), followed by items named only under
    ``items: wording``.
    """

    title: str
    path: Path  # the model file, absolute
    about: dict[str, str]
    data: DataSpec
    scale: tuple[float, float] | None
    items: dict[str, ItemSpec]
    collapse_sparse: bool
    estimation: EstimationSpec
    groups: GroupSpec | None
    models: tuple[ModelSpec, ...]
    key_lines: dict[tuple, int] = field(default_factory=dict, repr=False, compare=False)

    def model(self, name: str) -> ModelSpec:
        """The model called `name`; a StudyError naming the models otherwise."""
        for m in self.models:
            if m.name == name:
                return m
        names = [m.name for m in self.models]
        raise StudyError(_message(Place(self.path, None),
                                  f"there is no model called '{name}'",
                                  _suggest(name, names, "the models are")))

    def place_of(self, *keys) -> Place:
        """The line of a key path such as ``("models", "m1", "constructs", "support")``.

        When the path itself was not written (an optional key left out), the
        line of the nearest enclosing key is given; the file alone when
        nothing matches.
        """
        return _place(self.path, self.key_lines, tuple(keys))


def format_code(value) -> str:
    """A value from the file or the data as a label: 1.0 -> '1', 2.5 -> '2.5', ' a ' -> 'a'."""
    if isinstance(value, str):
        return value.strip()
    number = float(value)
    return str(int(number)) if number.is_integer() else f"{number:g}"


# --------------------------------------------------------------------------- messages

def _message(place: Place, problem: str, fix: str) -> str:
    end = "" if fix.endswith((".", "?")) else "."
    return f"{place}: {problem}. {fix}{end}"


def _suggest(word: str, choices, lead: str = "the names in use are") -> str:
    """'Did you mean ...?' from difflib (case-insensitive too), else list the choices."""
    choices = [str(c) for c in choices]
    folded = {c.casefold(): c for c in choices}
    close = difflib.get_close_matches(str(word), choices, n=1)
    if not close and str(word).casefold() in folded:
        close = [folded[str(word).casefold()]]
    if not close:
        close = [folded[c] for c in difflib.get_close_matches(str(word).casefold(), list(folded), n=1)]
    if close:
        return f"Did you mean '{close[0]}'?"
    return f"{lead[0].upper()}{lead[1:]}: {', '.join(choices) if choices else '(none)'}"


def _describe(value) -> str:
    """How a YAML value looks to a reader: "the number 5", "a list ([1, five])", ..."""
    if value is None:
        return "nothing"
    if isinstance(value, bool):
        return f"{str(value).lower()} (a yes/no value)"
    if isinstance(value, (int, float)):
        return f"the number {_flow(value)}"
    if isinstance(value, str):
        return f"the text '{value}'"
    if isinstance(value, list):
        return f"a list ({_flow(value)})"
    if isinstance(value, dict):
        return "a set of 'key: value' lines"
    if isinstance(value, _dt.date):
        return f"the date {value.isoformat()}"
    if isinstance(value, bytes):
        return "binary data (a '!!binary' value)"
    return f"a value of a kind model files do not use ({_flow(value)})"


def _flow(value, limit: int = 60) -> str:
    """A value written back the way YAML's flow style shows it: [1, five], {a: 1},
    cut to about `limit` characters."""
    if value is None:
        text = "null"
    elif isinstance(value, bool):
        text = str(value).lower()
    elif isinstance(value, float) and not math.isfinite(value):
        text = ".nan" if math.isnan(value) else ("-.inf" if value < 0 else ".inf")
    elif isinstance(value, (list, tuple, set)):
        text = "[" + ", ".join(_flow(v, limit) for v in value) + "]"
    elif isinstance(value, dict):
        text = "{" + ", ".join(f"{_flow(k, limit)}: {_flow(v, limit)}"
                               for k, v in value.items()) + "}"
    else:
        text = str(value)
    return text if len(text) <= limit else text[:limit - 3] + "..."


def _name(keys: tuple) -> str:
    """A key in words: "'salience'", "entry 2", "model 'm1'"."""
    last = keys[-1]
    if keys[0] == "models" and len(keys) == 2:
        return f"model '{last}'"
    return f"entry {last + 1}" if isinstance(last, int) else f"'{last}'"


def _full(keys: tuple) -> str:
    """A key and where it sits: "'salience' under 'estimation'", "'first' in model 'm1'"."""
    if len(keys) == 1 or (keys[0] == "models" and len(keys) == 2):
        return _name(keys)
    return f"{_name(keys)} {_where(keys[:-1])}"


def _where(keys: tuple) -> str:
    """Where a key sits: "at the top of the file", "under 'data'", "in model 'm1'"."""
    if not keys:
        return "at the top of the file"
    if keys[0] == "models" and len(keys) >= 2:
        inner = [k for k in keys[2:] if isinstance(k, str)]
        return f"under '{inner[-1]}' in model '{keys[1]}'" if inner else f"in model '{keys[1]}'"
    named = [k for k in keys if isinstance(k, str)]
    return f"under '{named[-1]}'"


def _place(file: Path, lines: dict, keys: tuple) -> Place:
    while keys and keys not in lines:
        keys = keys[:-1]
    return Place(file, lines.get(keys) if keys else None)


# --------------------------------------------------------------------------- YAML with lines

def _parse(text: str, path: Path) -> tuple[object, dict[tuple, int]]:
    """Parse YAML text; return plain Python values and the 1-based line of every key path."""
    loader = _SAFE_LOADER(text)
    try:
        node = loader.get_single_node()
        lines: dict[tuple, int] = {}
        value = None if node is None else _plain(loader, node, (), lines, path)
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        where = Place(path, mark.line + 1 if mark else None)
        column = f" at column {mark.column + 1}" if mark else ""
        raise StudyError(_message(
            where, f"the file is not valid YAML{column} ({exc.problem or exc.context})",
            "Check the indentation (spaces, not tabs, the same depth for keys at the same "
            "level), that every key is followed by ':', that lists are closed with ']', and "
            "that text containing ': ' or ' #' is put in quotes")) from exc
    except yaml.YAMLError as exc:
        raise StudyError(_message(Place(path, None), f"the file is not valid YAML ({exc})",
                                  "Check the file's layout against the example model files")) from exc
    finally:
        loader.dispose()
    return value, lines


def _plain(loader, node, keys: tuple, lines: dict, path: Path):
    """Convert a YAML node to Python values, recording lines and refusing duplicate keys."""
    if isinstance(node, yaml.MappingNode):
        out: dict = {}
        for key_node, value_node in node.value:
            line = key_node.start_mark.line + 1
            if key_node.tag == _MERGE_TAG:
                raise StudyError(_message(Place(path, line), "the merge key '<<' is used here",
                                          "Model files do not support '<<'; write the entries out"))
            key = loader.construct_object(key_node, deep=True)
            if isinstance(key, (list, dict)):
                raise StudyError(_message(Place(path, line), f"a key is {_describe(key)}",
                                          "Keys must be single words or numbers"))
            if key in out:
                raise StudyError(_duplicate_key(path, keys, key, lines[keys + (key,)], line))
            lines[keys + (key,)] = line
            out[key] = _plain(loader, value_node, keys + (key,), lines, path)
        return out
    if isinstance(node, yaml.SequenceNode):
        out_list = []
        for index, item in enumerate(node.value):
            lines[keys + (index,)] = item.start_mark.line + 1
            out_list.append(_plain(loader, item, keys + (index,), lines, path))
        return out_list
    return loader.construct_object(node, deep=True)


def _duplicate_key(path: Path, keys: tuple, key, first: int, second: int) -> str:
    if keys == ("models",):
        problem = f"the model name '{key}' is used twice (lines {first} and {second})"
        fix = "Give each model its own name"
    elif keys and keys[-1] == "constructs":
        problem = (f"the construct '{key}' is written twice in model '{keys[1]}' "
                   f"(lines {first} and {second})")
        fix = "Give each construct its own name, or merge the two item lists into one"
    else:
        where = f" under '{keys[-1]}'" if keys and isinstance(keys[-1], str) else ""
        problem = f"the key '{key}' is written twice{where} (lines {first} and {second})"
        fix = "Keep only one of them: the file would otherwise silently use the last one"
    return _message(Place(path, second), problem, fix)


# --------------------------------------------------------------------------- the reader

class _Reader:
    """Typed access to the parsed file, raising StudyError with the key's line."""

    def __init__(self, path: Path, lines: dict[tuple, int]):
        self.path = path
        self.lines = lines

    def place(self, keys: tuple) -> Place:
        return _place(self.path, self.lines, keys)

    def fail(self, keys: tuple, problem: str, fix: str):
        raise StudyError(_message(self.place(keys), problem, fix))

    def section(self, keys: tuple, value, allowed: tuple, example: str) -> dict:
        """A mapping whose keys must all be in `allowed` (a missing section is {})."""
        if value is None:
            return {}
        if not isinstance(value, dict):
            self.fail(keys, f"{_full(keys)} should hold 'key: value' lines, but it is "
                            f"{_describe(value)}", f"Write it like this: {example}")
        for key in value:
            if key not in allowed:
                close = difflib.get_close_matches(str(key), allowed, n=1)
                fix = (f"Did you mean '{close[0]}'?" if close
                       else f"The keys allowed here are: {', '.join(allowed)}")
                self.fail(keys + (key,), f"unknown key '{key}' {_where(keys)}", fix)
        return value

    def text(self, keys: tuple, value, example: str, numbers_ok: bool = False) -> str:
        """A non-empty string (numbers too, as text, where `numbers_ok`)."""
        if numbers_ok and isinstance(value, (int, float)) and not isinstance(value, bool):
            value = format_code(value)
        if numbers_ok and isinstance(value, _dt.date):   # YAML reads 2024-05-01 as a date
            value = value.isoformat()
        if not isinstance(value, str) or not value.strip():
            self.fail(keys, f"{_full(keys)} should be text, but it is {_describe(value)}",
                      f"Write it like this: {example}")
        return value.strip()

    def optional_text(self, keys: tuple, value, example: str) -> str | None:
        return None if value is None else self.text(keys, value, example, numbers_ok=True)

    def flag(self, keys: tuple, value, default: bool) -> bool:
        if value is None:
            return default
        if not isinstance(value, bool):
            self.fail(keys, f"{_full(keys)} should be true or false, but it is {_describe(value)}",
                      f"Write {keys[-1]}: true or {keys[-1]}: false")
        return value

    def number(self, keys: tuple, value, default: float) -> float:
        if value is None:
            return default
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
            kind = "a finite number" if isinstance(value, float) else "a number"
            self.fail(keys, f"{_full(keys)} should be {kind}, but it is {_describe(value)}",
                      f"Write it like this: {keys[-1]}: {default:g}")
        return float(value)

    def choice(self, keys: tuple, value, allowed: tuple, default: str) -> str:
        if value is None:
            return default
        if value not in allowed:
            close = difflib.get_close_matches(str(value), allowed, n=1)
            hint = f"Did you mean '{close[0]}'? " if close else ""
            self.fail(keys, f"{_full(keys)} is {_describe(value)}, which is not one of the "
                            f"allowed values", f"{hint}Use one of: {', '.join(allowed)}")
        return value

    def names(self, keys: tuple, value, what: str, example: str) -> tuple[str, ...]:
        """A list of distinct names (items, constructs or models)."""
        if not isinstance(value, list):
            self.fail(keys, f"{_full(keys)} should be a list of {what} names, but it is "
                            f"{_describe(value)}", f"Write it like this: {example}")
        for index, name in enumerate(value):
            if not isinstance(name, str) or not name.strip():
                article = "an" if what[0] in "aeiou" else "a"
                fix = (f"Write {what} names as text; put a name that looks like a number or "
                       f"yes/no in quotes, e.g. '{_flow(name)}'"
                       if isinstance(name, (int, float)) else
                       f"Write the {what} name there, or remove the empty entry")
                self.fail(keys + (index,), f"entry {index + 1} of {_full(keys)} is "
                                           f"{_describe(name)}, not {article} {what} name", fix)
        seen: dict[str, int] = {}
        for index, name in enumerate(value):
            if name in seen:
                self.fail(keys + (index,), f"the {what} '{name}' is listed twice in "
                                           f"{_full(keys)}", f"List each {what} once")
            seen[name] = index
        return tuple(value)

    def mapping_of_names(self, keys: tuple, value, what: str, example: str) -> dict:
        """A mapping name -> list of names, e.g. construct -> items."""
        if value is None:
            return {}
        if not isinstance(value, dict):
            self.fail(keys, f"{_full(keys)} should hold 'name: [list]' lines, but it is "
                            f"{_describe(value)}", f"Write it like this: {example}")
        out = {}
        for name, entries in value.items():
            if not isinstance(name, str) or not name.strip():
                self.fail(keys + (name,), f"the name {_describe(name)} under {_full(keys)} is "
                                          f"not {'text' if not isinstance(name, str) else 'a name'}",
                          "Use a name that starts with a letter, or put it in quotes")
            out[name] = self.names(keys + (name,), entries, what, example)
        return out


# --------------------------------------------------------------------------- sections

def load_study(path: str | Path) -> Study:
    """Read and validate a model file.

    Parameters
    ----------
    path : str or Path
        The model file (YAML).

    Returns
    -------
    Study

    Raises
    ------
    StudyError
        For anything the user can fix in the file; the message names the file,
        the line, the key, item or construct, the value found and what to do.
    """
    path = Path(path).expanduser().resolve()
    doc, lines = _parse(_read_text(path), path)
    if not isinstance(doc, dict):
        found = "empty" if doc is None else f"{_describe(doc)}"
        raise StudyError(_message(Place(path, 1 if doc is not None else None),
                                  f"the model file should start with 'key: value' lines such as "
                                  f"'study:', 'data:' and 'models:', but its content is {found}",
                                  "See the example model files for the layout"))
    r = _Reader(path, lines)
    r.section((), doc, TOP_KEYS, "study: My study")
    for required, example in (("data", "data: {file: answers.csv}"),
                              ("models", "models: {m1: {constructs: {c1: [q1, q2, q3]}}}")):
        if required not in doc:
            raise StudyError(_message(Place(path, None), f"the model file has no '{required}:' "
                                                         f"section", f"Add one, e.g. {example}"))
    title = path.stem if doc.get("study") is None else \
        r.text(("study",), doc["study"], "study: Teacher workplace climate pilot", numbers_ok=True)
    about = _about(r, doc.get("about"))
    data = _data(r, doc["data"])
    estimation = _estimation(r, doc.get("estimation"))
    models = _models(r, doc["models"], estimation.identification)
    scale, items, collapse = _items(r, doc.get("items"), models)
    _check_names_apart(r, models, items)
    groups = _groups(r, doc.get("groups"), items)
    if data.id_column is not None and data.id_column in items:
        r.fail(("data", "id"), f"the id column '{data.id_column}' is also used as an item",
               "Name a column that identifies the person, not an answer")
    return Study(title=title, path=path, about=about, data=data, scale=scale, items=items,
                 collapse_sparse=collapse, estimation=estimation, groups=groups,
                 models=models, key_lines=lines)


def _read_text(path: Path) -> str:
    where = Place(path, None)
    try:
        return path.read_text(encoding="utf-8-sig")
    except FileNotFoundError:
        raise StudyError(_message(where, f"the model file was not found at {path}",
                                  "Check the file name and the folder")) from None
    except IsADirectoryError:
        raise StudyError(_message(where, f"{path} is a folder, not a model file",
                                  "Give the path of the .yaml file itself")) from None
    except PermissionError:
        raise StudyError(_message(where, f"the model file {path} cannot be read (permission "
                                         f"denied)", "Check the file's permissions")) from None
    except UnicodeDecodeError as exc:
        raise StudyError(_message(where, f"the model file is not UTF-8 text (byte {exc.start})",
                                  "Save it as UTF-8 plain text from your editor")) from None


def _about(r: _Reader, raw) -> dict[str, str]:
    raw = r.section(("about",), raw, ABOUT_KEYS, "about: {rationale: Why these constructs ...}")
    # blank entries (a template's 'sampling:' left empty) count as not given
    return {key: r.text(("about", key), value, f"{key}: a sentence or two", numbers_ok=True)
            for key, value in raw.items() if value is not None}


def _data(r: _Reader, raw) -> DataSpec:
    raw = r.section(("data",), raw, DATA_KEYS, "data: {file: climate.csv, missing: [-9]}")
    if raw.get("file") is None:
        r.fail(("data",), "the 'data:' section does not name the data file",
               "Add a line such as file: climate.csv under data:")
    written = r.text(("data", "file"), raw["file"], "file: climate.csv")
    file = (r.path.parent / Path(written).expanduser()).resolve()
    suffix = file.suffix.lower()
    if suffix not in DATA_FORMATS:
        r.fail(("data", "file"), f"the data file '{written}' has the extension "
                                 f"'{suffix or '(none)'}', which scalewright cannot read",
               f"Save the data as one of {', '.join(DATA_FORMATS)} and name that file here")
    sheet = raw.get("sheet")
    if sheet is not None:
        if suffix != ".xlsx":
            r.fail(("data", "sheet"), f"'sheet: {sheet}' is given, but the data file "
                                      f"'{written}' is not an .xlsx workbook",
                   "Remove the sheet line, or name the .xlsx file")
        sheet = r.text(("data", "sheet"), sheet, "sheet: Sheet1", numbers_ok=True)
    id_column = raw.get("id")
    if id_column is not None:
        id_column = r.text(("data", "id"), id_column, "id: teacher_id")
    return DataSpec(file=file, missing=_missing_codes(r, raw.get("missing")), sheet=sheet,
                    id_column=id_column, place=r.place(("data",)))


def _missing_codes(r: _Reader, raw) -> tuple:
    if raw is None:
        return ()
    codes = raw if isinstance(raw, list) else [raw]
    keys = ("data", "missing")
    for index, code in enumerate(codes):
        here = keys + (index,) if isinstance(raw, list) else keys
        if isinstance(code, bool) or not isinstance(code, (int, float, str)) \
                or (isinstance(code, str) and not code.strip()):
            r.fail(here, f"the missing-answer code {_describe(code)} cannot be used (empty "
                         f"cells are always treated as missing)",
                   "List numbers or text codes, e.g. missing: [-9, 99, 'n/a']; put yes/no "
                   "codes in quotes")
    return tuple(codes)


def _estimation(r: _Reader, raw) -> EstimationSpec:
    keys = ("estimation",)
    raw = r.section(keys, raw, ESTIMATION_KEYS, "estimation: {method: auto}")
    default = EstimationSpec()
    threshold = r.number(keys + ("hint_threshold",), raw.get("hint_threshold"),
                         default.hint_threshold)
    if threshold < 0:
        r.fail(keys + ("hint_threshold",), f"'hint_threshold' is {threshold:g}; a modification "
                                           f"index cannot be negative",
               "Use a value of 0 or more, e.g. hint_threshold: 10")
    salience = r.number(keys + ("salience",), raw.get("salience"), default.salience)
    if not 0 < salience < 1:
        r.fail(keys + ("salience",), f"'salience' is {salience:g}; a standardized loading size "
                                     f"must lie between 0 and 1 (exclusive)",
               "Use a value such as salience: 0.40")
    return EstimationSpec(
        method=r.choice(keys + ("method",), raw.get("method"), METHODS, default.method),
        missing=r.choice(keys + ("missing",), raw.get("missing"), MISSING_HANDLING,
                         default.missing),
        identification=r.choice(keys + ("identification",), raw.get("identification"),
                                IDENTIFICATIONS, default.identification),
        hint_threshold=threshold, salience=salience)


def _groups(r: _Reader, raw, items: dict) -> GroupSpec | None:
    if raw is None:
        return None
    keys = ("groups",)
    raw = r.section(keys, raw, GROUPS_KEYS, "groups: {column: phase}")
    if raw.get("column") is None:
        r.fail(keys, "the 'groups:' section does not name the grouping column",
               "Add a line such as column: phase under groups:")
    column = r.text(keys + ("column",), raw["column"], "column: phase", numbers_ok=True)
    if column in items:
        r.fail(keys + ("column",), f"the grouping column '{column}' is also used as an item",
               "Name a column that says which group each person belongs to")
    labels_raw = raw.get("labels")
    if labels_raw is not None and not isinstance(labels_raw, dict):
        r.fail(keys + ("labels",), f"'labels' should hold 'value: label' pairs, but it is "
                                   f"{_describe(labels_raw)}",
               "Write it like this: labels: {1: primary, 2: secondary}")
    labels = {}
    for value, label in (labels_raw or {}).items():
        if isinstance(value, bool) or value is None:
            r.fail(keys + ("labels", value), f"the group value {_describe(value)} cannot be "
                                             f"labelled", "Put the value in quotes, e.g. 'yes'")
        labels[value] = r.text(keys + ("labels", value), label, "1: primary", numbers_ok=True)
    reference = raw.get("reference")
    if reference is not None:
        reference = r.text(keys + ("reference",), reference, "reference: primary",
                           numbers_ok=True)
        if labels and reference not in labels.values():
            r.fail(keys + ("reference",), f"the reference group '{reference}' is not one of "
                                          f"the labels", _suggest(reference, labels.values(),
                                                                  "the labels are"))
    return GroupSpec(column=column, labels=labels, reference=reference,
                     allow_many=r.flag(keys + ("allow_many",), raw.get("allow_many"), False),
                     place=r.place(keys))


def _items(r: _Reader, raw, models: tuple[ModelSpec, ...]):
    """The 'items:' section, checked against the items the models use."""
    keys = ("items",)
    raw = r.section(keys, raw, ITEMS_KEYS, "items: {scale: [1, 5], reverse: [q4]}")
    scale = None
    if raw.get("scale") is not None:
        value = raw["scale"]
        ok = (isinstance(value, list) and len(value) == 2
              and all(isinstance(v, (int, float)) and not isinstance(v, bool)
                      and math.isfinite(v) for v in value))
        if not ok:
            r.fail(keys + ("scale",), f"'scale' should be the lowest and highest answer, two "
                                      f"numbers, but it is {_describe(value)}",
                   "Write it like this: scale: [1, 5]")
        if not value[0] < value[1]:
            r.fail(keys + ("scale",), f"'scale' is {_flow(value)}: the lowest answer must come "
                                      f"first and be below the highest",
                   "Write the lowest and the highest possible answer, two different numbers, "
                   "e.g. scale: [1, 5]" if value[0] == value[1] else
                   f"Write it as scale: {_flow([value[1], value[0]])}")
        scale = (float(value[0]), float(value[1]))

    wording_raw = raw.get("wording")
    if wording_raw is not None and not isinstance(wording_raw, dict):
        r.fail(keys + ("wording",), f"'wording' should hold 'item: text' lines, but it is "
                                    f"{_describe(wording_raw)}",
               "Write it like this: wording: {q1: I finish schoolwork at home}")
    wording = {}
    for item, text in (wording_raw or {}).items():
        if not isinstance(item, str):
            r.fail(keys + ("wording", item), f"the item name {_describe(item)} under 'wording' "
                                             f"is not text", "Put the item name in quotes")
        wording[item] = r.text(keys + ("wording", item), text, f"{item}: the question as asked",
                               numbers_ok=True)

    used = dict.fromkeys(i for m in models for i in m.items)
    known = list(dict.fromkeys([*used, *wording]))

    def check_known(where: tuple, item: str, role: str):
        if item not in used and item not in wording:
            r.fail(where, f"the item '{item}' is named under '{role}' but no model uses it and "
                          f"it has no wording", _suggest(item, known, "the items in use are"))

    reverse = ()
    if raw.get("reverse") is not None:
        reverse = r.names(keys + ("reverse",), raw["reverse"], "item", "reverse: [wl4, cs2]")
        if reverse and scale is None:
            r.fail(keys + ("reverse",), f"items are marked for reverse keying ({', '.join(reverse)}) "
                                        f"but no response range is given",
                   "Add scale: [lowest, highest] under items:, e.g. scale: [1, 5]; reverse "
                   "keying turns x into lowest + highest - x")
        for index, item in enumerate(reverse):
            check_known(keys + ("reverse", index), item, "reverse")

    treat_raw = raw.get("treat_as")
    treat = {item: "auto" for item in known}
    if isinstance(treat_raw, dict):
        for item, kind in treat_raw.items():
            check_known(keys + ("treat_as", item), str(item), "treat_as")
            treat[item] = r.choice(keys + ("treat_as", item), kind, TREAT_AS, "auto")
    elif treat_raw is not None:
        kind = r.choice(keys + ("treat_as",), treat_raw, TREAT_AS, "auto")
        treat = {item: kind for item in known}

    items = {item: ItemSpec(name=item, wording=wording.get(item), reverse=item in reverse,
                            treat_as=treat[item]) for item in known}
    collapse = r.flag(keys + ("collapse_sparse",), raw.get("collapse_sparse"), False)
    return scale, items, collapse


# --------------------------------------------------------------------------- models

def _models(r: _Reader, raw, default_identification: str) -> tuple[ModelSpec, ...]:
    if not isinstance(raw, dict) or not raw:
        r.fail(("models",), f"'models' should hold at least one named model, but it is "
                            f"{_describe(raw)}",
               "Write it like this: models: {three-constructs: {constructs: {workload: "
               "[wl1, wl2, wl3]}}}")
    models = []
    for name, body in raw.items():
        if not isinstance(name, str) or not name.strip():
            r.fail(("models", name), f"the model name {_describe(name)} is not "
                                     f"{'text' if not isinstance(name, str) else 'a name'}",
                   "Start the name with a letter, or put it in quotes")
        models.append(_model(r, name, body, default_identification))

    firsts = [m for m in models if m.first]
    if len(firsts) > 1:
        r.fail(("models", firsts[1].name, "first"),
               f"models '{firsts[0].name}' and '{firsts[1].name}' are both marked 'first: true'",
               "Only the model specified before seeing the data is 'first'; keep the mark on "
               "that one model")
    names = [m.name for m in models]
    for m in models:
        for index, other in enumerate(m.nested_in):
            where = ("models", m.name, "nested_in", index)
            if other == m.name:
                r.fail(where, f"model '{m.name}' lists itself under 'nested_in'",
                       "Name the less restricted models it is nested in, not the model itself")
            if other not in names:
                r.fail(where, f"model '{m.name}' is said to be nested in '{other}', but there "
                              f"is no model of that name", _suggest(other, names, "the models are"))
    return tuple(models)


def _model(r: _Reader, name: str, raw, default_identification: str) -> ModelSpec:
    keys = ("models", name)
    example = "constructs: {workload: [wl1, wl2, wl3]}"
    raw = r.section(keys, raw, MODEL_KEYS, f"{name}: {{{example}}}")
    if raw.get("constructs") is None:
        r.fail(keys, f"model '{name}' has no 'constructs:'",
               f"Under the model, list each construct with its items, e.g. {example}")
    constructs = r.mapping_of_names(keys + ("constructs",), raw["constructs"], "item",
                                    "workload: [wl1, wl2, wl3]")
    if not constructs:
        r.fail(keys + ("constructs",), f"model '{name}' has no constructs", f"Add at least one, "
                                                                          f"e.g. {example}")
    _check_constructs(r, name, constructs)
    items = list(dict.fromkeys(i for its in constructs.values() for i in its))
    owner = {i: c for c, its in constructs.items() for i in its}

    cross = r.mapping_of_names(keys + ("cross_loadings",), raw.get("cross_loadings"), "item",
                               "support: [wl3]")
    for construct, extra in cross.items():
        where = keys + ("cross_loadings", construct)
        if construct not in constructs:
            r.fail(where, f"'cross_loadings' in model '{name}' names the construct "
                          f"'{construct}', which the model does not define",
                   _suggest(construct, constructs, "the model's constructs are"))
        for index, item in enumerate(extra):
            if item not in owner:
                r.fail(where + (index,), f"the cross-loading item '{item}' on '{construct}' is "
                                         f"not listed under any construct of model '{name}'",
                       f"List it under its main construct first. "
                       f"{_suggest(item, items, 'the items of the model are')}")
            if owner[item] == construct:
                r.fail(where + (index,), f"the item '{item}' is declared as a cross-loading on "
                                         f"'{construct}', which is already its own construct",
                       "Declare cross-loadings only on other constructs")

    residual = _residual_pairs(r, keys, raw.get("residual_covariances"), items)
    higher = r.mapping_of_names(keys + ("higher_order",), raw.get("higher_order"), "construct",
                                "climate: [workload, support]")
    _check_higher_order(r, name, higher, constructs)
    general = raw.get("general")
    if general is not None:
        general = r.text(keys + ("general",), general, "general: climate")
        if general in constructs:
            r.fail(keys + ("general",), f"the general factor '{general}' has the same name as a "
                                        f"construct of model '{name}'",
                   "Give the general factor a name of its own")
        if higher:
            r.fail(keys + ("general",), f"model '{name}' has both a general factor and "
                                        f"'higher_order'", "A model is either bifactor "
                                                           "(general:) or higher-order "
                                                           "(higher_order:); split it into two "
                                                           "rival models")

    changes = _changes(r, keys + ("changes",), raw.get("changes"))
    nested = () if raw.get("nested_in") is None else r.names(
        keys + ("nested_in",), raw["nested_in"], "model", "nested_in: [one-general]")
    return ModelSpec(
        name=name, constructs=constructs, cross_loadings=cross, residual_covariances=residual,
        higher_order=higher, general=general,
        identification=r.choice(keys + ("identification",), raw.get("identification"),
                                IDENTIFICATIONS, default_identification),
        first=r.flag(keys + ("first",), raw.get("first"), False),
        rationale=r.optional_text(keys + ("rationale",), raw.get("rationale"),
                                  "rationale: why this structure"),
        changes=changes, nested_in=nested, place=r.place(keys))


def _check_constructs(r: _Reader, model: str, constructs: dict):
    keys = ("models", model, "constructs")
    first_seen: dict[str, tuple[str, int]] = {}
    for construct, items in constructs.items():
        if len(items) < 2:
            found = f"only '{items[0]}'" if items else "no items"
            r.fail(keys + (construct,), f"the construct '{construct}' in model '{model}' has "
                                        f"{found}", "A construct needs at least two items: add "
                                                    "items to it or merge it with another "
                                                    "construct")
        for index, item in enumerate(items):
            if item in first_seen:
                other, other_index = first_seen[item]
                line_a = r.place(keys + (other, other_index)).line
                line_b = r.place(keys + (construct, index)).line
                r.fail(keys + (construct, index),
                       f"item '{item}' is listed under both '{other}' (line {line_a}) and "
                       f"'{construct}' (line {line_b}) in model '{model}'",
                       "List it under one construct and declare the other under cross_loadings")
            first_seen[item] = (construct, index)


def _residual_pairs(r: _Reader, keys: tuple, raw, items: list) -> tuple[tuple[str, str], ...]:
    if raw is None:
        return ()
    keys = keys + ("residual_covariances",)
    if not isinstance(raw, list):
        r.fail(keys, f"'residual_covariances' should be a list of item pairs, but it is "
                     f"{_describe(raw)}", "Write it like this: residual_covariances: [[cs2, cs3]]")
    pairs: dict[frozenset, int] = {}
    out = []
    for index, pair in enumerate(raw):
        where = keys + (index,)
        if not (isinstance(pair, list) and len(pair) == 2
                and all(isinstance(i, str) for i in pair)):
            r.fail(where, f"entry {index + 1} of 'residual_covariances' in model '{keys[1]}' is "
                          f"{_describe(pair)}, not a pair of item names",
                   "Write each pair as [item, item], e.g. - [cs2, cs3]")
        a, b = pair
        if a == b:
            r.fail(where, f"the residual covariance pair [{a}, {b}] names the same item twice",
                   "A residual covariance links two different items")
        for item in pair:
            if item not in items:
                r.fail(where, f"the residual covariance pair [{a}, {b}] names '{item}', which "
                              f"model '{keys[1]}' does not use",
                       _suggest(item, items, "the items of the model are"))
        key = frozenset(pair)
        if key in pairs:
            r.fail(where, f"the residual covariance pair [{a}, {b}] is listed twice (entries "
                          f"{pairs[key] + 1} and {index + 1})", "List each pair once")
        pairs[key] = index
        out.append((a, b))
    return tuple(out)


def _check_higher_order(r: _Reader, model: str, higher: dict, constructs: dict):
    keys = ("models", model, "higher_order")
    explained: dict[str, str] = {}
    for factor, lower in higher.items():
        where = keys + (factor,)
        if factor in constructs:
            r.fail(where, f"the higher-order factor '{factor}' has the same name as a construct "
                          f"of model '{model}'", "Give the higher-order factor a name of its own")
        if len(lower) < 2:
            r.fail(where, f"the higher-order factor '{factor}' explains only "
                          f"{len(lower)} construct", "List at least two constructs under it, or "
                                                     "drop the higher-order factor")
        for index, construct in enumerate(lower):
            if construct not in constructs:
                r.fail(where + (index,), f"the higher-order factor '{factor}' names "
                                         f"'{construct}', which model '{model}' does not define",
                       _suggest(construct, constructs, "the model's constructs are"))
            if construct in explained:
                r.fail(where + (index,), f"the construct '{construct}' is listed under two "
                                         f"higher-order factors ('{explained[construct]}' and "
                                         f"'{factor}')", "List each construct under one "
                                                         "higher-order factor")
            explained[construct] = factor


def _changes(r: _Reader, keys: tuple, raw) -> tuple[Change, ...]:
    if raw is None:
        return ()
    example = "- {change: freed cs2~~cs3, cue: modification index 24, reason: shared wording}"
    if not isinstance(raw, list):
        r.fail(keys, f"'changes' should be a list of changes, but it is {_describe(raw)}",
               f"Write one line per change: {example}")
    out = []
    for index, entry in enumerate(raw):
        entry = r.section(keys + (index,), entry, CHANGE_KEYS, example)
        if entry.get("change") is None:
            r.fail(keys + (index,), f"entry {index + 1} of 'changes' does not say what was "
                                    f"changed", f"Add change: ..., e.g. {example}")
        out.append(Change(
            change=r.text(keys + (index, "change"), entry["change"], example, numbers_ok=True),
            cue=r.optional_text(keys + (index, "cue"), entry.get("cue"), "cue: what prompted it"),
            reason=r.optional_text(keys + (index, "reason"), entry.get("reason"),
                                   "reason: why it makes sense")))
    return tuple(out)


def _check_names_apart(r: _Reader, models: tuple[ModelSpec, ...], items: dict):
    """Constructs, higher-order and general factors may not share a name with an item."""
    for m in models:
        keys = ("models", m.name)
        factors = [(("constructs", c), c, "construct") for c in m.constructs]
        factors += [(("higher_order", f), f, "higher-order factor") for f in m.higher_order]
        if m.general is not None:
            factors.append((("general",), m.general, "general factor"))
        for sub, factor, kind in factors:
            if factor in items:
                r.fail(keys + sub, f"the {kind} '{factor}' in model '{m.name}' has the same name "
                                   f"as the item '{factor}'",
                       f"Rename the {kind} so that it and the item can be told apart")
