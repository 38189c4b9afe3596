"""Number formatting for tables and text, at the usual reporting precision.

Rules (APA Publication Manual, 7th ed., sec. 6.36 and 6.42):

* two or three decimals; statistics that cannot exceed 1 in absolute value
  (correlations, proportions, p-values, CFI, TLI, RMSEA, SRMR, reliability
  coefficients, standardized loadings) without the leading zero;
* exact p-values to three decimals, and ``< .001`` below that;
* the minus sign is the typographic minus (U+2212) in the report, so that a
  negative number never looks like a dash; exports for spreadsheets turn it
  back into ASCII (:func:`plain`).

A missing value (``None``, NaN, infinity) is shown as an en dash.
"""

from __future__ import annotations

import math

MINUS = "\u2212"
DASH = "\u2013"
THIN_SPACE = "\u202f"


def _missing(x) -> bool:
    return x is None or isinstance(x, bool) or (isinstance(x, float) and not math.isfinite(x))


def dec(x, places: int = 3) -> str:
    """A number with ``places`` decimals (leading zero kept): ``−0.412``."""
    if _missing(x):
        return DASH
    s = f"{x:.{places}f}"
    if float(s) == 0.0:
        s = s.lstrip("-")
    return s.replace("-", MINUS)


def coef(x, places: int = 3) -> str:
    """A coefficient bounded by 1 (correlation, CFI, p) without the leading
    zero: ``.930``, ``−.27``; values beyond ±1 (a Heywood case) keep theirs."""
    s = dec(x, places)
    if s.startswith("0."):
        return s[1:]
    if s.startswith(MINUS + "0."):
        return MINUS + s[2:]
    return s


def pval(x) -> str:
    """p-values: ``< .001`` below .001, else three decimals without the leading zero."""
    if _missing(x):
        return DASH
    if x < 0.001:
        return "< .001"
    return coef(x, 3)


def p_equals(x) -> str:
    """A p-value in running text: ``p = .071`` or ``p < .001``."""
    if _missing(x):
        return f"p {DASH}"
    text = pval(x)
    return f"p {text}" if text.startswith("<") else f"p = {text}"


def count(x) -> str:
    """A whole number, thousands separated by a thin space: ``1 060``."""
    if _missing(x):
        return DASH
    return f"{int(round(x)):,}".replace(",", THIN_SPACE).replace("-", MINUS)


def dof(x) -> str:
    """Degrees of freedom: a whole number without a thousands separator,
    ``1212`` (APA Publication Manual, 7th ed., the exceptions to commas in
    numbers; from memory)."""
    if _missing(x):
        return DASH
    return f"{int(round(x))}".replace("-", MINUS)


def interval(pair, places: int = 3, bounded: bool = True) -> str:
    """A confidence interval ``[.033, .062]``."""
    if pair is None or len(pair) != 2 or any(_missing(v) for v in pair):
        return DASH
    f = coef if bounded else dec
    return f"[{f(pair[0], places)}, {f(pair[1], places)}]"


def percent(x, places: int = 1) -> str:
    """A percentage given in percent units: ``4.3%``."""
    return DASH if _missing(x) else f"{dec(x, places)}%"


def plain(text: str) -> str:
    """Text for a spreadsheet: ASCII minus, no thin spaces, no en-dash for missing."""
    text = text.replace(MINUS, "-").replace(THIN_SPACE, "")
    return "" if text == DASH else text


FILTERS = {"dec": dec, "coef": coef, "pval": pval, "count": count, "dof": dof, "interval": interval,
           "percent": percent, "p_equals": p_equals}
