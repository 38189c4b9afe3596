"""Small result records shared by the reliability and validity modules.

Every coefficient function returns a frozen dataclass built from these
pieces.  ``to_dict()`` gives a JSON-able dict (numpy scalars become Python
numbers, tuples become lists, undefined values are ``None`` rather than NaN)
so that the report and the JSON export read the same numbers.

Warnings about a coefficient travel *with* the coefficient as :class:`Note`
records: the report decides how to show them.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import numpy as np


def plain(value):
    """Turn numbers, arrays, containers and dataclass records into JSON-able
    Python data (numpy scalars become Python numbers, tuples and arrays lists,
    records dicts of their fields, NaN ``None``)."""
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        return {f.name: plain(getattr(value, f.name)) for f in dataclasses.fields(value)}
    if isinstance(value, dict):
        return {key: plain(item) for key, item in value.items()}
    if isinstance(value, (list, tuple, np.ndarray)):
        return [plain(item) for item in value]
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        return None if math.isnan(value) else float(value)
    return value


class Record:
    """Mixin: a frozen dataclass that converts itself to JSON-able data."""

    def to_dict(self) -> dict:
        """The record as plain Python data (NaN becomes ``None``); one pass, as
        ``dataclasses.asdict`` would deep-copy every field first."""
        return plain(self)


@dataclass(frozen=True)
class Note(Record):
    """Something the reader of a coefficient should know, as data.

    Attributes
    ----------
    code : str
        Stable machine-readable kind, e.g. ``"reverse_keying"``.
    subject : str
        The construct (or construct pair) the note is about.
    message : str
        One paragraph for the reader: what was found and what to do.
    items : tuple of str
        Items the note names (may be empty).
    """

    code: str
    subject: str
    message: str
    items: tuple[str, ...] = ()


@dataclass(frozen=True)
class Interval(Record):
    """A two-sided confidence interval at ``level`` (e.g. 0.95)."""

    lower: float
    upper: float
    level: float
    method: str


@dataclass(frozen=True)
class Convention(Record):
    """A published rule of thumb a value was compared with.

    ``met`` is True when the value is on the side the convention asks for.
    The wording always calls it a convention: it is a reading aid, not a
    test.
    """

    name: str
    threshold: float
    met: bool
    wording: str
    source: str


def as_index(items, size: int, what: str) -> np.ndarray:
    """Validate a sequence of row/column positions and return it as an array.

    Raises ``ValueError`` (a programming error between engine and this
    module, not something the user can fix) when a position is out of range
    or repeated.
    """
    index = np.asarray(items, dtype=np.intp).reshape(-1)
    if index.size and (index.min() < 0 or index.max() >= size):
        raise ValueError(f"{what} {index.tolist()} out of range for size {size}")
    if np.unique(index).size != index.size:
        raise ValueError(f"{what} {index.tolist()} contains a repeated position")
    return index
