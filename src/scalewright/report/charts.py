"""Small inline SVG charts: answer frequencies per item, the residual
correlation heat map, and BIC weights.

Each chart also states its numbers in text (an ``aria-label`` and a
``<title>``, plus visible labels where room allows), so that nothing depends
on colour or on seeing the picture.  Cells of the heat map are merged into
one ``<path>`` per shade so that a 100-item matrix stays small.
"""

from __future__ import annotations

from html import escape

import numpy as np

from scalewright.report.formatting import coef, count

#: heat-map shades per sign; residual correlations of |.20| and beyond get the darkest
_LEVELS = 6
_FULL_SCALE = 0.20


def _e(text) -> str:
    return escape(str(text), quote=True)


def _n(x: float) -> str:
    return f"{x:.1f}".rstrip("0").rstrip(".")


def _weight(x: float) -> str:
    return "< .001" if x < 0.001 else coef(x, 3)


def _category_key(label: str):
    try:
        return (0, float(label), label)
    except ValueError:
        return (1, 0.0, label)


def frequency_text(frequencies: dict) -> str:
    """``1: 12 · 2: 23 · …`` in category order."""
    return " · ".join(f"{k}: {count(v)}" for k, v in
                      sorted(frequencies.items(), key=lambda kv: _category_key(kv[0])))


def frequency_chart(frequencies: dict) -> str:
    """Bars of answer counts per category, with the categories written below."""
    cats = sorted(frequencies, key=_category_key)
    if not cats:
        return ""
    top = max(frequencies.values()) or 1
    bar, gap, height = 11.0, 3.0, 26.0
    width = len(cats) * (bar + gap) + gap
    parts = []
    for k, c in enumerate(cats):
        h = height * frequencies[c] / top
        x = gap + k * (bar + gap)
        parts.append(f'<rect x="{_n(x)}" y="{_n(height - h)}" width="{_n(bar)}" '
                     f'height="{_n(max(h, 0.5))}" class="bar"><title>{_e(c)}: '
                     f'{_e(count(frequencies[c]))}</title></rect>')
        parts.append(f'<text x="{_n(x + bar / 2)}" y="{_n(height + 9)}" font-size="8" '
                     f'text-anchor="middle">{_e(c)}</text>')
    label = "answers per category: " + frequency_text(frequencies)
    return (f'<svg xmlns="http://www.w3.org/2000/svg" class="freq" role="img" '
            f'aria-label="{_e(label)}" viewBox="0 0 {_n(width)} {_n(height + 11)}" '
            f'width="{_n(width)}" height="{_n(height + 11)}">' + "".join(parts) + "</svg>")


def heat_map(residuals: dict, figure_id: str) -> str:
    """Lower triangle of the residual correlation matrix, shaded by size.

    Positive and negative residuals differ in hue *and* in pattern: negative
    cells are hatched.  Cells at or beyond the flag threshold are outlined.
    """
    items = residuals["items"]
    matrix = residuals["matrix"]
    threshold = residuals.get("threshold") or 0.10
    p = len(items)
    cell = max(4.0, min(24.0, 600.0 / max(p, 1)))
    label_every = 1 if cell >= 9 else max(1, round(9 / cell))
    margin = 8 + max((len(i) for i in items), default=0) * 6.2
    size = margin + p * cell
    values = np.array([[np.nan if v is None else v for v in r] for r in matrix], dtype=float)
    rows, cols = np.tril_indices(p, k=-1)
    v = values[rows, cols]
    keep = np.isfinite(v)
    rows, cols, v = rows[keep], cols[keep], v[keep]
    level = np.minimum(_LEVELS, np.floor(np.abs(v) / _FULL_SCALE * _LEVELS + 0.5)).astype(int)
    sign = np.where(v > 0, 1, -1)
    squares = np.array([f"M{_n(margin + j * cell)},{_n(8 + (i - 1) * cell)}h{_n(cell)}"
                        f"v{_n(cell)}h-{_n(cell)}z" for i, j in zip(rows, cols)], dtype=object)
    shades = {(s, lv): "".join(squares[(sign == s) & (level == lv)])
              for s in (-1, 1) for lv in range(1, _LEVELS + 1)
              if np.any((sign == s) & (level == lv))}
    flagged = "".join(squares[np.abs(v) >= threshold])
    hatch = f"{figure_id}-hatch"
    parts = [f'<defs><pattern id="{hatch}" width="4" height="4" patternUnits="userSpaceOnUse" '
             f'patternTransform="rotate(45)"><line x1="0" y1="0" x2="0" y2="4" class="hatch"/>'
             f'</pattern></defs>']
    for (s, lv), d in sorted(shades.items()):
        parts.append(f'<path d="{d}" class="{"pos" if s > 0 else "neg"} l{lv}"/>')
        if s < 0:
            parts.append(f'<path d="{d}" fill="url(#{hatch})"/>')
    if flagged:
        parts.append(f'<path d="{flagged}" class="flagged" fill="none"/>')
    font = min(10.0, max(6.5, cell * 0.8))
    for k, item in enumerate(items):
        if k % label_every:
            continue
        if k >= 1:
            parts.append(f'<text x="{_n(margin - 4)}" y="{_n(8 + (k - 1) * cell + cell * 0.75)}" '
                         f'font-size="{_n(font)}" text-anchor="end">{_e(item)}</text>')
        if k < p - 1:
            x = margin + k * cell + cell * 0.7
            y = 8 + (p - 1) * cell + 4
            parts.append(f'<text transform="translate({_n(x)},{_n(y)}) rotate(-90)" '
                         f'font-size="{_n(font)}" text-anchor="end">{_e(item)}</text>')
    height = 8 + (p - 1) * cell + margin
    desc = (f"Heat map of residual correlations among {p} items: darker cells are larger; "
            f"hatched cells are negative; outlined cells reach |{coef(threshold, 2)}|. "
            "The largest are listed in the table.")
    return (f'<svg xmlns="http://www.w3.org/2000/svg" class="heat" role="img" '
            f'aria-label="{_e(desc)}" viewBox="0 0 {_n(size)} {_n(height)}" '
            f'width="{_n(size)}" height="{_n(height)}"><title>{_e(desc)}</title>'
            + "".join(parts) + "</svg>")


def heat_legend() -> str:
    """The shade scale of the heat map, from −.20 to +.20."""
    parts = []
    step = 16
    for k, level in enumerate(range(_LEVELS, 0, -1)):
        parts.append(f'<rect x="{k * step}" y="0" width="{step}" height="10" class="neg l{level}"/>')
    for k, level in enumerate(range(1, _LEVELS + 1)):
        parts.append(f'<rect x="{(k + _LEVELS) * step}" y="0" width="{step}" height="10" '
                     f'class="pos l{level}"/>')
    width = 2 * _LEVELS * step
    parts.append(f'<text x="0" y="21" font-size="8">−{coef(_FULL_SCALE, 2)}</text>'
                 f'<text x="{width / 2}" y="21" font-size="8" text-anchor="middle">0</text>'
                 f'<text x="{width}" y="21" font-size="8" text-anchor="end">'
                 f'+{coef(_FULL_SCALE, 2)}</text>')
    return (f'<svg xmlns="http://www.w3.org/2000/svg" class="legend" role="img" '
            f'aria-label="shade scale from −.20 (hatched) to +.20" viewBox="0 0 {width} 23" '
            f'width="{width}" height="23">' + "".join(parts) + "</svg>")


def weight_bars(rows: list[dict]) -> str:
    """Horizontal bars of BIC weights, the value written beside each bar."""
    rows = [r for r in rows if r.get("bic_weight") is not None]
    if not rows:
        return ""
    name_w = max(len(r["name"]) for r in rows) * 6.8 + 10
    bar_w, line = 260.0, 20.0
    parts = []
    for k, r in enumerate(rows):
        y = k * line + 4
        w = bar_w * r["bic_weight"]
        parts.append(f'<text x="{_n(name_w - 6)}" y="{_n(y + 11)}" font-size="11" '
                     f'text-anchor="end">{_e(r["name"])}</text>'
                     f'<rect x="{_n(name_w)}" y="{_n(y)}" width="{_n(bar_w)}" height="14" '
                     f'class="track"/><rect x="{_n(name_w)}" y="{_n(y)}" width="{_n(max(w, 0.5))}" '
                     f'height="14" class="bar"/><text x="{_n(name_w + bar_w + 6)}" '
                     f'y="{_n(y + 11)}" font-size="11">{_e(_weight(r["bic_weight"]))}</text>')
    height = len(rows) * line + 6
    width = name_w + bar_w + 50
    label = "BIC weights: " + ", ".join(f"{r['name']} {_weight(r['bic_weight'])}" for r in rows)
    return (f'<svg xmlns="http://www.w3.org/2000/svg" class="weights" role="img" '
            f'aria-label="{_e(label)}" viewBox="0 0 {_n(width)} {_n(height)}" '
            f'width="{_n(width)}" height="{_n(height)}">' + "".join(parts) + "</svg>")
