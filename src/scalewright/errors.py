"""Everything scalewright raises or warns about, in one place.

``StudyError`` is the one exception for problems the user can fix (a model
file, a data file, a model that cannot be estimated as written).  Its message
is a single paragraph that names the file, line, item or construct and says
what to do; the command line turns it into exit code 2 without a traceback.
Anything else that escapes is a bug in scalewright and is reported as such.

Warnings are a small tree under ``ScalewrightWarning`` so that a notebook user
can filter them by kind; every warning also ends up, in words, in the
``warnings`` list of the model's results.
"""


class StudyError(Exception):
    """A problem with the study that the user can fix; the message says how."""


class ScalewrightWarning(UserWarning):
    """Base class of every warning scalewright emits."""


class ConvergenceWarning(ScalewrightWarning):
    """The optimiser stopped before the convergence criterion was met."""


class ImproperSolutionWarning(ScalewrightWarning):
    """A negative variance, a standardized loading beyond 1, or a latent
    correlation matrix that is not positive definite."""


class IdentificationWarning(ScalewrightWarning):
    """The information matrix is singular: some parameter is not identified."""
