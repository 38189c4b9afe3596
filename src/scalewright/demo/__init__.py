"""The invented demo study: a teacher workplace climate survey.

``write_demo(folder)`` writes its data file and model file; the population
model the data were drawn from is in :mod:`scalewright.demo.population`.
No real people, places or data are involved.
"""

from scalewright.demo.generate import write_demo

__all__ = ["write_demo"]
