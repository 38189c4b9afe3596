"""What the check is doing now, for the long stages a researcher would
otherwise wait through in silence (a 100-item rival that misfits can spend
half a minute on its refinement path).

The stages say it through the standard :mod:`logging` logger
``scalewright.progress`` at level INFO; nothing is shown unless someone
listens.  The command line listens when its error stream is a terminal
(:func:`show_on`): one status line, rewritten by each message and erased
(:func:`clear`) before the results or an error message are printed.  Piped
output, scripts and tests see only the results and the one-paragraph
messages on errors.
"""

from __future__ import annotations

import logging
import shutil
from typing import TextIO

LOGGER = logging.getLogger("scalewright.progress")

#: ANSI: carriage return, then erase to the end of the line
_ERASE = "\r\x1b[K"


def say(message: str) -> None:
    """Tell whoever listens what the check is doing now."""
    LOGGER.info(message)


class StatusLine(logging.Handler):
    """One line on a terminal, rewritten by each message (cut to the
    terminal's width, so that it never wraps) and erased by :meth:`clear`."""

    def __init__(self, stream: TextIO):
        super().__init__(logging.INFO)
        self.stream = stream
        self.shown = False

    def emit(self, record: logging.LogRecord) -> None:
        width = max(shutil.get_terminal_size().columns - 1, 20)
        self.stream.write(_ERASE + ("… " + record.getMessage())[:width])
        self.stream.flush()
        self.shown = True

    def clear(self) -> None:
        if self.shown:
            self.stream.write(_ERASE)
            self.stream.flush()
            self.shown = False


def show_on(stream: TextIO) -> StatusLine:
    """Show the progress messages as a status line on ``stream`` (a terminal)."""
    handler = StatusLine(stream)
    LOGGER.addHandler(handler)
    LOGGER.setLevel(logging.INFO)
    return handler


def stop(handler: StatusLine) -> None:
    """Erase the status line and stop showing progress on it."""
    handler.clear()
    LOGGER.removeHandler(handler)


def clear() -> None:
    """Erase the status line, if one is shown, before other output."""
    for handler in LOGGER.handlers:
        if isinstance(handler, StatusLine):
            handler.clear()
