"""The demo report in a real browser: Debian's Chromium driven by playwright
(never a downloaded browser).

Locally these tests are skipped, with a message, when /usr/bin/chromium is
missing; in CI (environment variable CI set) they fail instead, because
.ci/run installs Chromium.  The PDF checks read page text with pdftotext
(Debian's poppler-utils) under the same rule.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
from pathlib import Path

import pytest

from scalewright.report.pdf import print_pdf
from scalewright.report.render import render_html
from test_report import HOSTILE, demo_report, hostile_report

CHROMIUM = Path("/usr/bin/chromium")
LAUNCH_ARGS = ["--no-sandbox", "--disable-gpu"]

pytestmark = pytest.mark.browser


def _require(available: bool, what: str, install: str) -> None:
    if available:
        return
    message = f"{what} is not installed; install it with: {install}"
    if os.environ.get("CI"):
        pytest.fail(f"{message} (CI must run the browser tests, never skip them)")
    pytest.skip(message)


@pytest.fixture(scope="module")
def browser():
    _require(CHROMIUM.is_file(), "Chromium (/usr/bin/chromium)", "apt-get install -y chromium")
    try:
        from playwright.sync_api import sync_playwright
    except ImportError:
        _require(False, "The Python package playwright", "pip install -e '.[test]'")
    with sync_playwright() as pw:
        instance = pw.chromium.launch(executable_path=str(CHROMIUM), args=LAUNCH_ARGS)
        yield instance
        instance.close()


@pytest.fixture(scope="module")
def demo_html(tmp_path_factory) -> Path:
    """The demo report, rendered from the demo check's result dict."""
    path = tmp_path_factory.mktemp("report") / "teacher-climate.html"
    path.write_text(render_html(demo_report()), encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def hostile_html(tmp_path_factory) -> Path:
    """The demo report with a script as the study title and as an item's wording."""
    path = tmp_path_factory.mktemp("hostile") / "teacher-climate.html"
    path.write_text(render_html(hostile_report()), encoding="utf-8")
    return path


def _open(browser, path: Path):
    """A page with ``path`` loaded; records console errors, requests and dialogs."""
    page = browser.new_page(viewport={"width": 1200, "height": 900})
    seen = {"errors": [], "requests": [], "dialogs": []}
    page.on("console", lambda m: seen["errors"].append(m.text) if m.type == "error" else None)
    page.on("pageerror", lambda e: seen["errors"].append(str(e)))
    page.on("request", lambda r: seen["requests"].append(r.url))
    page.on("dialog", lambda d: (seen["dialogs"].append(d.message), d.dismiss()))
    page.goto(path.as_uri())
    page.wait_for_load_state("load")
    return page, seen


def test_demo_report_loads_without_console_errors_or_network_requests(browser, demo_html):
    page, seen = _open(browser, demo_html)
    assert seen["errors"] == []
    assert seen["requests"] == [demo_html.as_uri()]
    page.close()


def test_every_section_and_every_rival_model_is_visible(browser, demo_html):
    page, _ = _open(browser, demo_html)
    headings = page.locator("h2").all_inner_texts()
    for section in ("Summary", "Study design", "Rival models compared", "The data",
                    "Methods paragraph and references", "Cautions", "Reporting checklist"):
        assert any(section in h for h in headings), section
    for model in ("one-general", "three-constructs", "higher-order", "bifactor"):
        assert any(f"Model ‘{model}’" in h for h in headings), model
        assert page.locator(f"svg.diagram[aria-label*='model {model}:']").count() == 1
    assert page.locator("#comparison table").first.is_visible()
    page.close()


def test_the_method_missing_data_and_scale_quality_blocks_are_visible(browser, demo_html):
    report = demo_report()
    page, _ = _open(browser, demo_html)
    data = page.locator("#data")
    for heading in ("The method chosen for these data", "Missing answers"):
        assert data.locator("h3", has_text=heading).is_visible(), heading
    assert data.locator("li", has_text=report["method"]["reasons"][0][:40]).is_visible()
    assert data.locator("caption", has_text="Most frequent patterns of missing answers").is_visible()
    for caption in ("Item analysis of", "Correlations against √AVE in",
                    "Intercepts, residual variances and R² of"):
        assert page.locator("caption", has_text=caption).first.is_visible(), caption
    assert page.locator("#invariance caption", has_text="Latent means").is_visible()
    page.close()


def test_hostile_wording_renders_as_text_and_runs_nothing(browser, hostile_html):
    page, seen = _open(browser, hostile_html)
    assert page.evaluate("document.scripts.length") == 0
    assert seen["dialogs"] == []
    assert HOSTILE in page.locator("h1").inner_text()
    assert HOSTILE in page.locator("#data").inner_text()
    page.close()


def test_a_screenshot_of_the_summary_shows_the_page(browser, demo_html, tmp_path):
    page, _ = _open(browser, demo_html)
    shot = tmp_path / "summary.png"
    page.screenshot(path=str(shot))
    data = shot.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    width, height = int.from_bytes(data[16:20], "big"), int.from_bytes(data[20:24], "big")
    assert (width, height) == (1200, 900)
    assert len(data) > 20_000   # a blank page compresses to a few hundred bytes
    page.close()


def _page_texts(pdf: Path) -> list[str]:
    _require(shutil.which("pdftotext") is not None, "pdftotext", "apt-get install -y poppler-utils")
    text = subprocess.run(["pdftotext", "-layout", str(pdf), "-"], capture_output=True,
                          text=True, check=True).stdout
    return text.split("\f")[:-1]


@pytest.fixture(scope="module")
def printed(browser, demo_html, tmp_path_factory) -> Path:
    """The demo report printed by scalewright's own --pdf route."""
    return print_pdf(demo_html, tmp_path_factory.mktemp("pdf") / "teacher-climate.pdf",
                     browser=str(CHROMIUM))


def test_printed_page_count_is_sensible(printed):
    pages = len(re.findall(rb"/Type\s*/Page(?![s\w])", printed.read_bytes()))
    # each of the 4 models starts a page, as do data, methods and checklist
    assert 4 + 3 <= pages <= 60


def test_no_path_diagram_is_split_across_pages(printed):
    texts = _page_texts(printed)
    for model in ("one-general", "three-constructs", "higher-order", "bifactor"):
        # the diagram's title is its first line, its figure caption comes after it
        top = [k for k, t in enumerate(texts) if f"Path diagram: {model}" in t]
        assert len(top) == 1, model
        caption = re.search(r"Figure (\d+)\.", texts[top[0]].split(f"Path diagram: {model}")[1])
        assert caption is not None, f"the caption of the {model} diagram is not on its page"


def test_each_model_starts_a_new_page_under_the_running_header(printed):
    texts = _page_texts(printed)
    for model in ("one-general", "three-constructs", "higher-order", "bifactor"):
        (page,) = [t for t in texts if f"Model ‘{model}’" in t]
        lines = [line.strip() for line in page.splitlines() if line.strip()]
        assert lines[0] == "Teacher workplace climate pilot"     # @page running header
        assert re.match(r"\d+ Model ‘" + re.escape(model), lines[1])
