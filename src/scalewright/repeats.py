"""Rows that share an id: the same person twice, or people who answered
more than once.

An id column (``data: id:``) names each person's row.  When ids repeat,
either rows were duplicated (two files merged, an export run twice) or the
data hold repeated answers of the same people (waves, several classes
rated by one teacher).  Either way the rows are not independent, which the
likelihood, its standard errors and its tests assume, so the report says so
beside checklist line 8 (clustered or non-independent answers); scalewright
does not model the dependence itself.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from scalewright.studyfile import format_code

#: repeated ids listed by name (the count covers all of them)
SHOWN = 5


def repeated_ids(row_ids: np.ndarray | None, column: str | None) -> dict | None:
    """The ids that appear in more than one row (rows counted from 1 after the
    header), or None without an id column or without repeats.  Empty ids are
    not compared."""
    if row_ids is None or column is None:
        return None
    ids = pd.Series(row_ids, dtype=object)
    present = ids.notna() & (ids.astype(str).str.strip() != "")
    counts = ids[present].value_counts(sort=False)
    repeated = counts[counts > 1]
    if repeated.empty:
        return None
    rows = {key: (np.flatnonzero((ids == key).to_numpy() & present.to_numpy()) + 1).tolist()
            for key in repeated.index[:SHOWN]}
    n_rows = int(repeated.sum())
    examples = [{"id": _shown(key), "rows": where} for key, where in rows.items()]
    listing = "; ".join(f"{e['id']} in rows {', '.join(map(str, e['rows']))}" for e in examples)
    more = f" and {len(repeated) - SHOWN} more" if len(repeated) > SHOWN else ""
    return {
        "column": column, "n_ids_repeated": int(len(repeated)), "n_rows": n_rows,
        "examples": examples,
        "note": (f"The id column '{column}' gives {len(repeated)} "
                 f"id{'s' if len(repeated) > 1 else ''} to more than one row ({n_rows} rows: "
                 f"{listing}{more}). If rows were duplicated, remove the copies; if people "
                 "answered more than once, their answers are not independent, which the "
                 "standard errors and tests assume: say how this was handled under "
                 "about: clustering: in the model file."),
    }


def _shown(key) -> str:
    """An id as the file writes it (3 rather than 3.0)."""
    if isinstance(key, (str, int, float, np.integer, np.floating)) and not isinstance(key, bool):
        return format_code(key)
    return str(key)
