"""Read the item answers named by a :class:`~scalewright.studyfile.Study`.

One job: open the data file the model file names, take the item, id and
grouping columns, turn missing-answer codes into NaN, check the answers
(numbers only, inside the response range, not constant, not all missing),
apply reverse keying and return one float64 matrix in :class:`ItemData`.

The user's file is only ever opened for reading.  Large text files are parsed
in one pass by pyarrow's CSV reader, reading only the needed columns, and the
answers are copied column by column into a single preallocated float64 array.
"""

from __future__ import annotations

import csv
import difflib
import hashlib
import itertools
import os
import zipfile
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import openpyxl
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pyreadstat

from scalewright.errors import StudyError
from scalewright.studyfile import Place, Study, format_code

_CHUNK = 1 << 20  # bytes per read when hashing the data file
_SHOW = 5  # example cells quoted in a message
_MANY_GROUPS = 10  # more groups than this must be confirmed with allow_many: true
_CELLS_AT_ONCE = 1 << 21  # cells of numeric item columns converted to float per step (16 MB)
#: the cells a text file's reader takes as not available: pandas' CSV readers' marks
#: (its ``na_values`` default), so that a file reads as it did through pandas
NOT_AVAILABLE = ("", "#N/A", "#N/A N/A", "#NA", "-1.#IND", "-1.#QNAN", "-NaN", "-nan", "1.#IND",
                 "1.#QNAN", "<NA>", "N/A", "NA", "NULL", "NaN", "None", "n/a", "nan", "null")
#: what the readers raise for a file they cannot read (also caught by ``draft``)
READ_ERRORS = (OSError, ValueError, pa.ArrowException, pyreadstat.ReadstatError,
                zipfile.BadZipFile, KeyError)


@dataclass(frozen=True)
class ItemData:
    """The answers to the study's items, ready for screening and estimation.

    ``values`` is read-only: rows are people in file order, columns are
    ``items`` in ``study.items`` order, NaN marks a missing answer, and reverse
    keying has been applied.  ``group`` holds the group label of each row (None
    where the grouping column is missing; ``n_group_missing`` counts those).
    """

    file: Path
    sha256: str
    n_rows: int
    items: tuple[str, ...]
    values: np.ndarray
    group: np.ndarray | None
    row_ids: np.ndarray | None
    columns: tuple[str, ...]
    n_group_missing: int = 0

    def complete_rows(self) -> np.ndarray:
        """Boolean mask of the rows that answered every item."""
        return ~np.isnan(self.values).any(axis=1)


def read_items(study: Study) -> ItemData:
    """Read, recode and check the study's item columns.

    Missing-answer codes (``data: missing``): a numeric code matches a cell
    numerically (-9 matches -9.0); a text code matches a cell as stripped text,
    and a text code that reads as a number ('-9') also matches numerically.
    Empty cells, and the usual not-available marks of the CSV reader (NA, N/A,
    NaN, null), are missing too; in .sav files the user-defined missing values
    are missing.  Reverse keying maps x to low + high - x with ``scale: [low,
    high]``.

    Parameters
    ----------
    study : Study

    Returns
    -------
    ItemData

    Raises
    ------
    StudyError
        When the file is missing, unreadable or not UTF-8 text, an item or the
        grouping column is absent or its name is repeated in the header, an
        item column holds text or an infinite or overflowing value, answers lie
        outside the response
        range, an item is constant or has no answers, or there are more than
        10 groups without ``allow_many: true``.
    """
    source = _Source(study)
    source.require_file()
    # the file is hashed on a second thread while it is parsed: hashlib lets go of
    # the interpreter, and the parse of a 2000 x 100 CSV took 9-10 ms beside it
    # against 14 ms after the hash (measured; DEVELOPERS.md, "Speed")
    with ThreadPoolExecutor(max_workers=1) as pool:
        digest = pool.submit(source.sha256)
        columns = source.columns()
        source.require(columns)
        read = source.read(columns)
        digest = digest.result()
    n_rows = read.n_rows
    if n_rows == 0:
        source.fail(f"the data file '{source.shown}' has column names but no rows of answers",
                    "Check that the right file is named")
    frame = read.frame
    row_ids = None
    if study.data.id_column is not None:
        row_ids = frame[columns[study.data.id_column]].to_numpy()
    codes = _Codes(study.data.missing)
    items = tuple(study.items)
    values = read.numbers
    if values is None:
        values = _item_values(frame, [columns[item] for item in items], items, codes, source,
                              row_ids)
    group, n_group_missing = (None, 0) if study.groups is None else \
        _groups(frame[columns[study.groups.column]], codes, source)
    del frame, read
    codes.apply(values)
    _check_answers(values, items, source, row_ids)
    if study.scale is not None:
        low, high = study.scale
        reverse = [j for j, item in enumerate(items) if study.items[item].reverse]
        values[:, reverse] = low + high - values[:, reverse]
    values.flags.writeable = False
    return ItemData(file=study.data.file, sha256=digest, n_rows=n_rows, items=items,
                    values=values, group=group, row_ids=row_ids,
                    columns=tuple(columns), n_group_missing=n_group_missing)


def _item_values(frame: pd.DataFrame, labels: list, items: tuple, codes: _Codes,
                 source: _Source, row_ids) -> np.ndarray:
    """The item columns of a data frame as one float64 matrix (numeric codes
    are applied later, on the whole matrix); a text column is read by
    :func:`_numbers`, which names any cell that is not a number."""
    n_rows = len(frame)
    values = np.empty((n_rows, len(items)), dtype=np.float64)
    # the dtypes as a plain dict, once: indexing the dtypes Series cost ~10 µs a column
    kinds = dict(zip(frame.columns, frame.dtypes))
    numeric = [j for j, label in enumerate(labels) if kinds[label].kind in "iufb"]
    # numeric columns in slices: one conversion per slice (a column-by-column loop
    # spent 150 of 180 ms at 2000 x 100 in pandas' indexing), all at once for small
    # files, and the temporary float copy bounded by _CELLS_AT_ONCE on large ones
    width = max(1, _CELLS_AT_ONCE // max(n_rows, 1))
    for lo in range(0, len(numeric), width):
        part = numeric[lo:lo + width]
        values[:, part] = frame[[labels[j] for j in part]].to_numpy(dtype=np.float64,
                                                                    na_value=np.nan)
    for j in sorted(set(range(len(items))) - set(numeric)):
        values[:, j] = _numbers(frame[labels[j]], items[j], codes, source, row_ids)
    return values


# --------------------------------------------------------------------------- the file

class _Source:
    """The data file of a study: messages, header, reading."""

    def __init__(self, study: Study):
        self.study = study
        self.path = study.data.file
        self.suffix = self.path.suffix.lower()
        try:
            self.shown = os.path.relpath(self.path, study.path.parent)
        except ValueError:  # another drive on Windows
            self.shown = str(self.path)
        if self.shown.startswith(".."):
            self.shown = str(self.path)
        self.place = study.place_of("data", "file")

    def fail(self, problem: str, fix: str, place: Place | None = None):
        end = "" if fix.endswith((".", "?")) else "."
        raise StudyError(f"{place or self.place}: {problem}. {fix}{end}")

    def require_file(self):
        """Fail unless the data file is a file this process can open for reading."""
        if not self.path.is_file():
            where = "a folder" if self.path.is_dir() else "not found"
            self.fail(f"the data file '{self.shown}' is {where} (looked for {self.path})",
                      "Check the name under data: file:; a relative path is read from the "
                      "folder of the model file")
        try:
            with open(self.path, "rb"):
                pass
        except OSError as exc:
            self._cannot_read(exc)

    def sha256(self) -> str:
        """SHA-256 of the file's bytes, read in 1 MiB chunks."""
        digest = hashlib.sha256()
        try:
            with open(self.path, "rb") as handle:
                for chunk in iter(lambda: handle.read(_CHUNK), b""):
                    digest.update(chunk)
        except OSError as exc:
            self._cannot_read(exc)
        return digest.hexdigest()

    def _cannot_read(self, exc: OSError):
        self.fail(f"the data file '{self.shown}' cannot be read ({exc.strerror})",
                  "Check the file's permissions and that no other program locks it")

    # header ------------------------------------------------------------------
    def columns(self) -> dict[str, object]:
        """Every column of the file: name as text -> the label the reader uses."""
        try:
            if self.suffix in (".csv", ".tsv", ".txt"):
                labels = self._text_header()
            elif self.suffix == ".xlsx":
                labels = pd.read_excel(self.path, sheet_name=self._sheet(), nrows=0,
                                       engine="openpyxl").columns
            elif self.suffix == ".parquet":
                labels = pq.read_schema(self.path).names
            else:
                labels = self._stat_reader()(self.path, metadataonly=True)[1].column_names
        except pd.errors.EmptyDataError:
            self.fail(f"the data file '{self.shown}' is empty",
                      "Name a file with a header row of column names and one row per person")
        except (*READ_ERRORS, csv.Error) as exc:
            self._unreadable(exc)
        columns = {str(label): label for label in labels}
        if self.suffix == ".csv" and len(columns) == 1:
            (name,) = columns
            for sep, word in ((";", "semicolons"), ("\t", "tabs")):
                if sep in name:
                    self.fail(f"the data file '{self.shown}' has a single column "
                              f"('{name[:40]}'): its columns seem separated by {word}, "
                              f"not commas", "Save it with commas, or rename it to .txt so "
                                             "that the separator is detected")
        return columns

    def _text_header(self) -> list[str]:
        """The header row of a text file: its first line that is not empty,
        split by the csv module (quotes and a byte-order mark removed, as the
        CSV reader removes them); an empty name becomes 'Unnamed: k' (k from
        0).  A name written twice is one column in :meth:`columns`; the
        repeated-name check (:meth:`require`) reads the header as written.  A few microseconds, where asking the
        pandas reader for zero rows took 3-7 ms at 100 columns."""
        with open(self.path, encoding="utf-8-sig", newline="") as handle:
            first = next((row for row in csv.reader(handle, delimiter=self._separator())
                          if row), None)
        if first is None:
            raise pd.errors.EmptyDataError("no header row")
        return [name if name != "" else f"Unnamed: {k}" for k, name in enumerate(first)]

    def _separator(self) -> str:
        if self.suffix == ".csv":
            return ","
        if self.suffix == ".tsv":
            return "\t"
        with open(self.path, encoding="utf-8", errors="replace", newline="") as handle:
            sample = handle.read(64 * 1024)
        try:
            return csv.Sniffer().sniff(sample, delimiters=",\t;| ").delimiter
        except csv.Error:
            self.fail(f"the columns of the text file '{self.shown}' are not separated by "
                      f"commas, tabs, semicolons, bars or spaces in a consistent way",
                      "Save the data as .csv (comma-separated) and name that file")

    def _sheet(self):
        sheet = self.study.data.sheet
        if sheet is None:
            return 0
        names = self._sheet_names()
        if sheet not in names:
            close = difflib.get_close_matches(sheet, names, n=1)
            hint = f"Did you mean '{close[0]}'? " if close else ""
            self.fail(f"the workbook '{self.shown}' has no sheet called '{sheet}'",
                      f"{hint}Its sheets are: {', '.join(names)}",
                      self.study.place_of("data", "sheet"))
        return sheet

    def _sheet_names(self) -> list[str]:
        try:
            book = openpyxl.load_workbook(self.path, read_only=True)
        except READ_ERRORS as exc:
            self._unreadable(exc)
        names = book.sheetnames
        book.close()
        return names

    def _other_sheets(self) -> str:
        """A hint when the first sheet of a workbook was read by default and there are others."""
        if self.suffix != ".xlsx" or self.study.data.sheet is not None:
            return ""
        names = self._sheet_names()
        if len(names) < 2:
            return ""
        others = ", ".join(f"'{name}'" for name in names[1:])
        return (f" Only the workbook's first sheet, '{names[0]}', was read; to read another "
                f"({others}), name it with sheet: under data:.")

    def _stat_reader(self):
        return pyreadstat.read_sav if self.suffix == ".sav" else pyreadstat.read_dta

    def _unreadable(self, exc: Exception):
        if isinstance(exc, UnicodeDecodeError):
            self.fail(f"the data file '{self.shown}' is not UTF-8 text (byte "
                      f"0x{exc.object[exc.start]:02x} is not UTF-8)",
                      "Save it as UTF-8 text (in a spreadsheet program: CSV UTF-8), or as .xlsx")
        reason = " ".join(str(exc).split())[:200] or "no reason given"
        self.fail(f"the data file '{self.shown}' could not be read as a {self.suffix} file "
                  f"({reason})",
                  "Check that it opens in the program that wrote it, that its extension "
                  "matches its format and that text files are saved as UTF-8")

    def header(self) -> list[str]:
        """The column names exactly as the file writes them, one per column, so
        that positions count from the first column (the readers rename a
        repeated name, e.g. to 'q1.1'); only text files and workbooks can
        repeat one."""
        try:
            if self.suffix in (".csv", ".tsv", ".txt"):
                return self._text_header()
            rows = self._leading_rows(1)
        except pd.errors.EmptyDataError:
            return []
        except (*READ_ERRORS, csv.Error) as exc:
            self._unreadable(exc)
        return rows[0] if rows else []

    def _header_row_below(self, names: list[str], rows: int = 10) -> int | None:
        """The row (2 to ``rows``, counted from 1) of a text file or workbook
        that holds at least half of ``names`` as cells, when a title or a note
        sits above the header row; None when there is none."""
        try:
            lines = self._leading_rows(rows)
        except (*READ_ERRORS, csv.Error):
            return None
        wanted = set(names)
        for number, cells in enumerate(lines[1:], start=2):
            if 2 * len(wanted & {c.strip() for c in cells}) >= len(wanted):
                return number
        return None

    def _leading_rows(self, rows: int) -> list[list[str]]:
        """The first ``rows`` rows of a text file or workbook as written, each
        the list of its cells as text, an empty cell as '' (rows may differ in
        length); nothing for the other formats, whose headers cannot repeat a
        name."""
        if self.suffix in (".csv", ".tsv", ".txt"):
            with open(self.path, encoding="utf-8-sig", newline="") as handle:
                return list(itertools.islice(csv.reader(handle, delimiter=self._separator()),
                                             rows))
        if self.suffix == ".xlsx":
            frame = pd.read_excel(self.path, sheet_name=self._sheet(), header=None, nrows=rows,
                                  dtype=str, engine="openpyxl")
            return [["" if pd.isna(v) else str(v) for v in row] for row in frame.to_numpy()]
        return []

    # columns present ---------------------------------------------------------
    def require(self, columns: dict[str, object]):
        """Every item, the id column and the grouping column must be columns of the file."""
        study = self.study
        positions: dict[str, list[int]] = {}           # name as written -> its columns
        for k, written in enumerate(self.header(), start=1):
            positions.setdefault(written, []).append(k)
        for name in dict.fromkeys([*study.items, study.data.id_column,
                                   study.groups and study.groups.column]):
            where = positions.get(name, [])
            if len(where) > 1:
                self.fail(f"the column name '{name}' appears {len(where)} times in the header of "
                          f"the data file '{self.shown}' (columns "
                          f"{', '.join(map(str, where[:-1]))} and {where[-1]}), so it is not "
                          f"clear which column holds its answers",
                          "Rename or delete the extra columns in the data file")
        folded = {name.strip().casefold(): name for name in columns}
        absent = [item for item in study.items if item not in columns]
        if absent:
            parts = []
            for item in absent:
                use = _first_use(study, item)
                hint = _close_column(item, columns, folded)
                parts.append(f"'{item}' ({use}{'; did you mean ' + repr(hint) + '?' if hint else ''})")
            listing = "" if any(_close_column(i, columns, folded) for i in absent) else \
                f" The file's columns are: {_listing(columns)}."
            what = "the item" if len(absent) == 1 else f"{len(absent)} items:"
            lower = self._header_row_below(absent)
            fix = (f"{'Its name is' if len(absent) == 1 else 'Their names are'} in row {lower} "
                   f"of the file, below other text: delete the "
                   f"row{'s' if lower > 2 else ''} above them, so that the file starts with the "
                   f"column names" if lower else
                   f"Use the column names exactly as written in the file's header, or "
                   f"rename the columns.{listing}{self._other_sheets()}")
            self.fail(f"{what} {', '.join(parts)} {'is' if len(absent) == 1 else 'are'} not "
                      f"{'a column' if len(absent) == 1 else 'columns'} of the data file "
                      f"'{self.shown}'", fix)
        for keys, column, role in ((("data", "id"), study.data.id_column, "id column"),
                                   (("groups", "column"),
                                    study.groups and study.groups.column, "grouping column")):
            if column is not None and column not in columns:
                hint = _close_column(column, columns, folded)
                self.fail(f"the {role} '{column}' is not a column of the data file "
                          f"'{self.shown}'",
                          f"Did you mean '{hint}'?" if hint else
                          f"The file's columns are: {_listing(columns)}",
                          study.place_of(*keys))

    # reading -----------------------------------------------------------------
    def read(self, columns: dict[str, object]) -> _Read:
        study = self.study
        named = [name for name in (study.data.id_column, study.groups and study.groups.column)
                 if name]
        items = [columns[name] for name in study.items]
        others = [columns[name] for name in named]
        try:
            if self.suffix in (".csv", ".tsv", ".txt"):
                return _read_text(self.path, self._separator(), items, others)
            if self.suffix == ".xlsx":
                chosen = {*study.items, *named}
                frame = pd.read_excel(self.path, sheet_name=self._sheet(), engine="openpyxl",
                                      usecols=lambda label: str(label) in chosen)
            elif self.suffix == ".parquet":
                frame = pd.read_parquet(self.path, columns=items + others)
            else:
                frame = self._stat_reader()(self.path, usecols=items + others,
                                            apply_value_formats=False)[0]
        except READ_ERRORS as exc:
            self._unreadable(exc)
        return _Read(frame, None, len(frame))


@dataclass(frozen=True)
class _Read:
    """The wanted columns of the data file as read: ``numbers`` holds the item
    columns already parsed as float64 (study order), or is None when the
    items are columns of ``frame``, which holds every other wanted column."""

    frame: pd.DataFrame
    numbers: np.ndarray | None
    n_rows: int


def _read_text(path: Path, separator: str, items: list[str], others: list[str]) -> _Read:
    """The ``items`` and ``others`` columns of a UTF-8 text file, parsed by
    pyarrow's CSV reader as pandas' pyarrow engine parses it (pandas'
    not-available marks are missing, an empty field is missing, a column with
    nothing but missing cells is float64), called directly: pandas' wrapper
    added 4-6 ms to the 9 ms read of a 2000 × 100 file.  A row with too few or
    too many fields is an error (``pa.ArrowInvalid``), as it is there.

    The item columns are first parsed straight to float64 and copied into
    one matrix: inferring each column's type, and the data frame, made that
    read 12 ms instead of 7.  A cell that is not a number fails that parse,
    and the file is then read again with every column's type inferred, so
    that :func:`read_items` can name the cell (a text column).  Without id or
    grouping columns, only an empty cell is taken as missing in that parse:
    matching every cell against the other marks cost 1 ms of the 7, and a
    cell holding one of them ('NA') fails the number parse, so such a file is
    read by the second parse, with every mark (pandas' 'nan' and 'NaN' read
    as the number NaN, which is missing too)."""
    try:
        table = _parse_text(path, separator, [*items, *others], dict.fromkeys(items, pa.float64()),
                            NOT_AVAILABLE if others else ("",))
    except pa.ArrowInvalid:
        table = _parse_text(path, separator, [*items, *others], {}, NOT_AVAILABLE)
        return _Read(table.to_pandas(), None, table.num_rows)
    numbers = np.empty((table.num_rows, len(items)))
    for j, label in enumerate(items):
        numbers[:, j] = table.column(label).to_numpy()
    return _Read(table.select(list(dict.fromkeys(others))).to_pandas(), numbers, table.num_rows)


def _parse_text(path: Path, separator: str, labels: list[str], types: dict,
                missing: tuple[str, ...]) -> pa.Table:
    """pyarrow's parse of the ``labels`` columns (``types``: the columns whose
    type is given rather than inferred; ``missing``: the cells read as
    missing); a column of missing cells only is float64."""
    table = pacsv.read_csv(
        path, parse_options=pacsv.ParseOptions(delimiter=separator),
        convert_options=pacsv.ConvertOptions(include_columns=list(dict.fromkeys(labels)),
                                             column_types=types, null_values=list(missing),
                                             strings_can_be_null=True))
    for k, kind in enumerate(table.schema.types):
        if pa.types.is_null(kind):
            table = table.set_column(k, table.schema.field(k).with_type(pa.float64()),
                                     table.column(k).cast(pa.float64()))
    return table


def _first_use(study: Study, item: str) -> str:
    """Where an item is used, in words: "construct 'support' in model 'm1'"."""
    for m in study.models:
        for construct, items in m.constructs.items():
            if item in items:
                return f"construct '{construct}' in model '{m.name}'"
    return "named under items: wording"


def _item_place(study: Study, item: str) -> Place:
    for m in study.models:
        for construct, items in m.constructs.items():
            if item in items:
                return study.place_of("models", m.name, "constructs", construct,
                                      items.index(item))
    return study.place_of("items", "wording", item)


def _close_column(name: str, columns, folded: dict) -> str | None:
    """A column that differs only in case/spaces, else the closest by difflib."""
    if name.strip().casefold() in folded:
        return folded[name.strip().casefold()]
    close = difflib.get_close_matches(name, list(columns), n=1)
    return close[0] if close else None


def _listing(columns, limit: int = 30) -> str:
    names = list(columns)
    more = f" and {len(names) - limit} more" if len(names) > limit else ""
    return ", ".join(names[:limit]) + more


def _rows(rows: np.ndarray, row_ids, shown_values=None) -> str:
    """"data row 4 (id T12): 'n/a'" for the first few rows (1-based, counted after the header)."""
    parts = []
    for k, row in enumerate(rows[:_SHOW]):
        who = f" (id {format_code(row_ids[row]) if _is_number(row_ids[row]) else row_ids[row]})" \
            if row_ids is not None else ""
        value = "" if shown_values is None else f": {shown_values[k]}"
        parts.append(f"data row {row + 1}{who}{value}")
    return "; ".join(parts)


def _is_number(value) -> bool:
    return isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, bool)


# --------------------------------------------------------------------------- recoding

class _Codes:
    """The missing-answer codes, split into numeric and text codes."""

    def __init__(self, codes: tuple):
        self.text = {c.strip() for c in codes if isinstance(c, str)}
        numeric = [float(c) for c in codes if not isinstance(c, str)]
        numeric += [float(c) for c in self.text if _reads_as_number(c)]
        self.numeric = np.array(sorted(set(numeric)), dtype=np.float64)

    def apply(self, values: np.ndarray):
        """Set the cells equal to a numeric code to NaN, in place."""
        if self.numeric.size:
            values[np.isin(values, self.numeric)] = np.nan

    def matches(self, value) -> bool:
        """Whether one value (a group value) is a missing-answer code."""
        if isinstance(value, str):
            value = value.strip()
            if value in self.text:
                return True
            if not _reads_as_number(value):
                return False
        return bool(np.isin(float(value), self.numeric))


def _reads_as_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def _numbers(column: pd.Series, item: str, codes: _Codes, source: _Source, row_ids) -> np.ndarray:
    """One text (object) item column as float64 (numeric codes are applied
    later, on the whole matrix)."""
    cells = column.to_numpy(dtype=object)
    present = ~pd.isna(cells)
    text = pd.Series(cells[present], dtype=object).astype(str).str.strip()
    numbers = pd.to_numeric(text, errors="coerce").to_numpy(dtype=np.float64, copy=True)
    is_code = text.isin(codes.text).to_numpy()
    numbers[is_code] = np.nan
    bad = np.isnan(numbers) & ~is_code & (text != "").to_numpy()
    if bad.any():
        rows = np.flatnonzero(present)[bad]
        found = text.to_numpy()[bad]
        distinct = list(dict.fromkeys(found))
        count = int(bad.sum())
        fix = "Recode the answers as numbers"
        if _decimal_commas(found):
            fix = ("These are numbers written with a decimal comma, which scalewright does not "
                   "read: save the data with decimal points (e.g. 3.5, not 3,5)")
        elif len(distinct) <= 3 and not any(ch.isdigit() for value in distinct for ch in value):
            shown = " or ".join(repr(v) for v in distinct)
            written = [repr(c) if isinstance(c, str) else format_code(c)
                       for c in source.study.data.missing]
            example = ", ".join([*written, *map(repr, distinct)])
            fix = (f"If {shown} means 'no answer', add it to missing: under data: (e.g. missing: "
                   f"[{example}]); otherwise recode the answers as numbers")
        source.fail(f"in the data file '{source.shown}', the item column '{item}' holds text in "
                    f"{count} cell{'s' if count > 1 else ''} "
                    f"({_rows(rows, row_ids, [repr(v) for v in found])})", fix)
    out = np.full(len(cells), np.nan)
    out[present] = numbers
    return out


def _decimal_commas(found: np.ndarray) -> bool:
    """Whether every text cell reads as a number once its one comma is a point ('3,5')."""
    text = pd.Series(found, dtype=object)
    one_comma = text.str.count(",").eq(1)
    points = pd.to_numeric(text.str.replace(",", ".", regex=False), errors="coerce")
    return bool(one_comma.all() and points.notna().all())


def _refuse_cells(cells: np.ndarray, values: np.ndarray, items: tuple, source: _Source,
                  row_ids, what: str, shown, fix: str) -> None:
    """Fail at the first item with a marked cell, naming it, how many cells and
    the first rows (``shown`` writes a value)."""
    if not cells.any():
        return
    j = int(np.flatnonzero(cells.any(axis=0))[0])
    rows = np.flatnonzero(cells[:, j])
    source.fail(f"in the data file '{source.shown}', the item '{items[j]}' holds {what} in "
                f"{rows.size} cell{'s' if rows.size > 1 else ''} "
                f"({_rows(rows, row_ids, [shown(v) for v in values[rows[:_SHOW], j]])})", fix)


def _check_answers(values: np.ndarray, items: tuple, source: _Source, row_ids):
    """Answers inside the response range; no constant or empty item."""
    study = source.study
    _refuse_cells(np.isinf(values), values, items, source, row_ids, "an infinite value",
                  format_code, "Replace it with the answer given, or leave the cell empty if "
                               "there was none")
    # beyond this size the sum of squares over the rows overflows float64
    with np.errstate(invalid="ignore"):
        huge = np.abs(values) > np.sqrt(np.finfo(np.float64).max / max(values.shape[0], 1))
    _refuse_cells(huge, values, items, source, row_ids, "a value too large to compute with",
                  lambda v: f"{v:.3g}", "Correct the cell; giving the response range with "
                                        "scale: under items: catches such values as answers "
                                        "outside the range")
    if study.scale is not None:
        low, high = study.scale
        with np.errstate(invalid="ignore"):
            outside = (values < low) | (values > high)
        counts = outside.sum(axis=0)
        if counts.any():
            j = int(np.flatnonzero(counts)[0])
            rows = np.flatnonzero(outside[:, j])
            others = [f"'{items[k]}' {counts[k]}" for k in np.flatnonzero(counts)[1:]]
            also = f"; other items with such answers: {', '.join(others)}" if others else ""
            source.fail(f"in the data file '{source.shown}', the item '{items[j]}' has "
                        f"{counts[j]} answer{'s' if counts[j] > 1 else ''} outside the response "
                        f"range {format_code(low)} to {format_code(high)} given by scale: on "
                        f"line {study.place_of('items', 'scale').line} "
                        f"({_rows(rows, row_ids, [format_code(v) for v in values[rows[:_SHOW], j]])}"
                        f"{also})",
                        "If these are missing-answer codes, add them to missing: under data:; "
                        "otherwise correct the data or the scale",
                        study.place_of("items", "scale"))
    answered = (~np.isnan(values)).sum(axis=0)
    for j in np.flatnonzero(answered == 0):
        source.fail(f"in the data file '{source.shown}', the item '{items[j]}' has no answers: "
                    f"all {values.shape[0]} cells are empty or missing-answer codes",
                    "Check the column in the data file, or remove the item from the models",
                    _item_place(study, items[j]))
    with np.errstate(invalid="ignore"):
        constant = np.nanmin(values, axis=0) == np.nanmax(values, axis=0)
    for j in np.flatnonzero(constant):
        value = float(np.nanmin(values[:, j]))
        source.fail(f"in the data file '{source.shown}', everyone who answered the item "
                    f"'{items[j]}' gave the same answer ({format_code(value)}; "
                    f"{answered[j]} answer{'s' if answered[j] > 1 else ''})",
                    "An item without variation carries no information: remove it from the "
                    "models, or check that the right column was exported",
                    _item_place(study, items[j]))


def _groups(column: pd.Series, codes: _Codes, source: _Source) -> tuple[np.ndarray, int]:
    """Group label per row (None where missing) and the number of rows without a group."""
    spec = source.study.groups
    where = source.study.place_of("groups", "column")
    index, uniques = pd.factorize(column, use_na_sentinel=True)
    given = {format_code(value): label for value, label in spec.labels.items()}
    names = []
    for value in uniques:
        if codes.matches(value):
            names.append(None)
            continue
        key = format_code(value)
        if spec.labels and key not in given:
            count = int((index == len(names)).sum())
            source.fail(f"the grouping column '{spec.column}' holds the value '{key}' "
                        f"({count} row{'s' if count > 1 else ''}), which has no label under "
                        f"groups: labels", f"Add a label for it, e.g. {key}: name, or add it to "
                                           f"missing: under data: if it means 'no answer'",
                        source.study.place_of("groups", "labels"))
        names.append(given.get(key, key))
    table = np.array([*names, None], dtype=object)  # index -1 (missing cell) -> None
    group = table[index]
    missing = pd.isna(group)
    present = sorted({name for name in names if name is not None})
    if len(present) > _MANY_GROUPS and not spec.allow_many:
        source.fail(f"the grouping column '{spec.column}' has {len(present)} different values "
                    f"(e.g. {', '.join(present[:5])})",
                    "More than 10 groups is unusual for a group comparison; check the column, "
                    "or confirm with allow_many: true under groups:", where)
    if spec.reference is not None and spec.reference not in present:
        source.fail(f"the reference group '{spec.reference}' does not occur in the grouping "
                    f"column '{spec.column}'", f"The groups found are: {', '.join(present)}",
                    source.study.place_of("groups", "reference"))
    return group, int(missing.sum())
