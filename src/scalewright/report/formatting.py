"""Number formatting for tables, at the usual reporting precision
(APA 7th ed., sec. 6.36: two or three decimals; p < .001)."""

from __future__ import annotations

import math


def _missing(x) -> bool:
    return x is None or (isinstance(x, float) and not math.isfinite(x))


def dec(x, places: int = 3) -> str:
    """A number with ``places`` decimals, '–' when missing."""
    if _missing(x):
        return "–"
    return f"{x:.{places}f}".replace("-", "−")


def coef(x, places: int = 3) -> str:
    """A coefficient bounded by 1 (correlation, CFI, p) without the leading zero."""
    if _missing(x):
        return "–"
    s = f"{x:.{places}f}"
    s = s.replace("0.", ".", 1) if s.startswith(("0.", "-0.")) else s
    return s.replace("-", "−")


def pval(x) -> str:
    """p-values: '< .001' below .001, else three decimals without the leading zero."""
    if _missing(x):
        return "–"
    if x < 0.001:
        return "< .001"
    return coef(x, 3)


def count(x) -> str:
    if _missing(x):
        return "–"
    return f"{int(x):,}".replace(",", "\u202f")


FILTERS = {"dec": dec, "coef": coef, "pval": pval, "count": count}
