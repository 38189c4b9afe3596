"""The HTML report: rendered with jinja2 (autoescaped) from the result dict."""
