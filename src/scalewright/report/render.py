"""Render the result dict as one self-contained HTML file.

Templates only format numbers that are already in the dict; they never
compute statistics.  Autoescaping is on for every template, so any text the
user wrote (study title, item wording, construct names) is shown as text.
"""

from __future__ import annotations

from importlib import resources

import jinja2

from scalewright.report import formatting


def _environment() -> jinja2.Environment:
    env = jinja2.Environment(
        loader=jinja2.PackageLoader("scalewright.report", "templates"),
        autoescape=True, undefined=jinja2.StrictUndefined,
        trim_blocks=True, lstrip_blocks=True)
    env.filters.update(formatting.FILTERS)
    return env


def render_html(report: dict) -> str:
    """The report as a string of HTML (inline CSS, no scripts, no network)."""
    css = resources.files("scalewright.report").joinpath("report.css").read_text(encoding="utf-8")
    template = _environment().get_template("report.html.j2")
    return template.render(r=report, css=css)
