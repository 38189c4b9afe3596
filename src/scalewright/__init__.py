"""scalewright: check that a questionnaire's hypothesised structure holds.

>>> import scalewright
>>> result = scalewright.check("models/teacher-climate.yaml")      # doctest: +SKIP
>>> result.to_dict()["models"][0]["fit"]["cfi"]                     # doctest: +SKIP
"""

__version__ = "0.1.0"

from scalewright.allocator import keep_arrays_on_heap  # noqa: E402

keep_arrays_on_heap()

from scalewright.errors import (ConvergenceWarning, IdentificationWarning,  # noqa: E402
                                ImproperSolutionWarning, ScalewrightWarning, StudyError)
from scalewright.api import CheckResult, check  # noqa: E402
from scalewright.studyfile import Study, load_study  # noqa: E402

__all__ = ["CheckResult", "ConvergenceWarning", "IdentificationWarning",
           "ImproperSolutionWarning", "ScalewrightWarning", "Study", "StudyError",
           "__version__", "check", "load_study"]
