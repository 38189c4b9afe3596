"""Print the HTML report to PDF through a headless Chromium, when one is
installed.  The page layout comes from the report's print stylesheet
(A4, running header with the study title, page numbers, each model on a new
page); Chromium's own header and footer are switched off.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import tempfile
from pathlib import Path

from scalewright.errors import StudyError

#: names a Chromium executable goes by on common systems
BROWSERS = ("chromium", "chromium-browser", "google-chrome", "google-chrome-stable")
#: seconds a print may take before it is given up
TIMEOUT = 120

INSTALL_HINT = ("To print the report to PDF, install Chromium, e.g. on Debian or Ubuntu: "
                "apt-get install chromium (as root). Or open the HTML report in a browser and "
                "print it to PDF; the report's print layout is used either way.")


#: the end of the report's <title>, as Chromium writes it into the PDF's Title (UTF-16BE hex)
_TITLE_MARK = "— structure check".encode("utf-16-be").hex().upper().encode()


def printed_by_scalewright(pdf_path: Path) -> bool:
    """Whether ``pdf_path`` is a file holding a report scalewright printed."""
    if not pdf_path.is_file():
        return False
    with open(pdf_path, "rb") as fh:   # Chromium writes the document information first
        return _TITLE_MARK in fh.read(65536)


def _refuse_foreign(pdf_path: Path) -> None:
    """A StudyError if ``pdf_path`` exists and is not a report scalewright printed."""
    if pdf_path.exists() and not printed_by_scalewright(pdf_path):
        raise StudyError(f"{pdf_path}: this file already exists and is not a report printed by "
                         "scalewright, so it will not be overwritten. Choose another output "
                         "folder with --out, or move the file away.")


def find_browser() -> str | None:
    """Path of a Chromium executable: ``$SCALEWRIGHT_CHROMIUM``, else the first on PATH."""
    configured = os.environ.get("SCALEWRIGHT_CHROMIUM")
    if configured:
        return configured if Path(configured).is_file() else None
    for name in BROWSERS:
        path = shutil.which(name)
        if path:
            return path
    return None


def print_pdf(html_path: Path, pdf_path: Path, browser: str | None = None) -> Path:
    """Print ``html_path`` to ``pdf_path`` with headless Chromium.

    Raises
    ------
    StudyError
        When no Chromium is found (the message says how to install it) or
        when printing fails.
    """
    browser = browser or find_browser()
    if browser is None:
        raise StudyError(f"{pdf_path.name}: no Chromium browser was found, so no PDF was "
                         f"written (the HTML report was). {INSTALL_HINT}")
    html_path, pdf_path = Path(html_path).resolve(), Path(pdf_path).resolve()
    _refuse_foreign(pdf_path)
    with tempfile.TemporaryDirectory(prefix="scalewright-print-") as profile:
        command = [browser, "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
                   "--disable-background-networking", "--disable-component-update",
                   "--disable-sync", "--disable-extensions", f"--user-data-dir={profile}",
                   "--no-pdf-header-footer", f"--print-to-pdf={pdf_path}",
                   html_path.as_uri()]
        try:
            done = subprocess.run(command, capture_output=True, text=True, timeout=TIMEOUT,
                                  stdin=subprocess.DEVNULL)
        except subprocess.TimeoutExpired:
            raise StudyError(f"{pdf_path.name}: printing with {browser} took longer than "
                             f"{TIMEOUT} s and was stopped. Open the HTML report in a browser "
                             "and print it to PDF instead.") from None
    if done.returncode != 0 or not pdf_path.is_file() or pdf_path.stat().st_size == 0:
        last = (done.stderr or "").strip().splitlines()[-1:] or ["no message"]
        raise StudyError(f"{pdf_path.name}: {browser} could not print the report (exit code "
                         f"{done.returncode}: {last[0]}). Open the HTML report in a browser "
                         "and print it to PDF instead.")
    return pdf_path
