"""Render the result dict as one self-contained HTML file.

The document (sections, numbered tables and figures, generated text) is
built by :mod:`scalewright.report.document`; the template only lays it out.
Autoescaping is on, so any text the user wrote (study title, item wording,
construct names) shows as text.  CSS is inlined, SVG is inline, there is no
script and nothing is fetched from the network.
"""

from __future__ import annotations

from importlib import resources

import jinja2

from scalewright.report import formatting
from scalewright.report.document import Document, build_document, header_facts


def _environment() -> jinja2.Environment:
    env = jinja2.Environment(
        loader=jinja2.PackageLoader("scalewright.report", "templates"),
        autoescape=True, undefined=jinja2.StrictUndefined,
        trim_blocks=True, lstrip_blocks=True)
    env.filters.update(formatting.FILTERS)
    return env


def css_string(text: str) -> str:
    """``text`` as the inside of a CSS string: every character but letters,
    digits and spaces as a six-digit hex escape, so that nothing the user
    wrote can end the string or the style element."""
    return "".join(ch if ch.isascii() and (ch.isalnum() or ch == " ") else f"\\{ord(ch):06x}"
                   for ch in text)


def render_document(report: dict, doc: Document) -> str:
    """The HTML of an already built document."""
    css = resources.files("scalewright.report").joinpath("report.css").read_text(encoding="utf-8")
    template = _environment().get_template("report.html.j2")
    return template.render(r=report, doc=doc, css=css, facts=header_facts(report),
                           page_title=css_string(report["study"]["title"]))


def render_html(report: dict) -> str:
    """The report as a string of HTML (inline CSS and SVG, no scripts, no network)."""
    return render_document(report, build_document(report))
