"""scalewright: check that a questionnaire's hypothesised structure holds."""

from scalewright.errors import StudyError

__version__ = "0.1.0"

__all__ = ["StudyError", "__version__"]
