"""Conventional cutoffs the report compares numbers with, each with its
source, and the marks it shows.

A mark is a reading aid, never a verdict: the report always says that these
cutoffs are conventions, derived from simulations of particular models, and
shows the number itself beside the mark.

References
----------
Hu, L. & Bentler, P. M. (1999). Cutoff criteria for fit indexes in covariance
structure analysis: conventional criteria versus new alternatives.
Structural Equation Modeling 6, 1–55.
Nunnally, J. C. & Bernstein, I. H. (1994). Psychometric Theory, 3rd ed.
McGraw-Hill.
McNeish, D. & Wolf, M. G. (2023). Dynamic fit index cutoffs for confirmatory
factor analysis models. Psychological Methods 28, 61–88.
"""

from __future__ import annotations

from dataclasses import dataclass

from scalewright.report.formatting import coef

HU_BENTLER = "Hu & Bentler (1999)"


@dataclass(frozen=True)
class Cutoff:
    """``index`` should be at least (``above``) or at most ``value``."""

    index: str          # key in the fit dict
    label: str
    value: float
    above: bool
    source: str

    def met(self, x) -> bool | None:
        if x is None:
            return None
        return x >= self.value if self.above else x <= self.value

    @property
    def rule(self) -> str:
        return f"{self.label} {'≥' if self.above else '≤'} {coef(self.value, 2)}"


#: Hu & Bentler (1999), table 5 and text: CFI, TLI ≳ .95, RMSEA ≲ .06, SRMR ≲ .08
FIT_CUTOFFS = (
    Cutoff("cfi", "CFI", 0.95, True, HU_BENTLER),
    Cutoff("tli", "TLI", 0.95, True, HU_BENTLER),
    Cutoff("rmsea", "RMSEA", 0.06, False, HU_BENTLER),
    Cutoff("srmr", "SRMR", 0.08, False, HU_BENTLER),
)

#: a standardized loading of |.40| or more is commonly called salient (common practice, no source)
SALIENCE = 0.40
#: a reliability of .70 is a common minimum for research use (Nunnally & Bernstein 1994)
RELIABILITY_MINIMUM = 0.70
#: the source as written inside parentheses
RELIABILITY_SOURCE = "Nunnally & Bernstein 1994"
#: |residual correlation| ≥ .10 is commonly flagged (common practice, no source)
RESIDUAL_FLAG = 0.10

MEETS, MISSES = "✓", "✗"

#: robust versions of the indices, used in place of the normal-theory ones when present
ROBUST = {"cfi": "cfi_robust", "tli": "tli_robust", "rmsea": "rmsea_robust",
          "rmsea_ci90": "rmsea_robust_ci90"}


def shown_fit(fit: dict) -> dict:
    """The fit indices a table shows: robust versions where the fit has them
    (Brosseau-Liard & Savalei 2014), else the normal-theory ones."""
    return {**fit, **{k: fit[r] for k, r in ROBUST.items() if fit.get(r) is not None}}


def fit_marks(fit: dict) -> dict:
    """Per fit index: ``{"met": bool|None, "symbol": "✓"|"✗"|"", "rule": "CFI ≥ .95"}``."""
    out = {}
    for c in FIT_CUTOFFS:
        met = c.met(fit.get(c.index))
        out[c.index] = {"met": met, "symbol": "" if met is None else (MEETS if met else MISSES),
                        "rule": c.rule}
    return out


def cutoff_note() -> str:
    """The sentence under every table that marks fit indices."""
    rules = ", ".join(c.rule for c in FIT_CUTOFFS)
    return (f"{MEETS} within, {MISSES} outside the conventional cutoffs of {HU_BENTLER}: "
            f"{rules}. These are conventions drawn from simulations of particular models, not "
            "tests; they do not carry over to every model, number of items or sample size "
            "(McNeish & Wolf 2023), and they say nothing about validity.")
