"""The path diagram of one fitted model, drawn as inline SVG.

Layout (chosen to stay legible from 3 to 60+ items): the items stand in one
column, grouped by their construct; each construct stands to the left of its
items, at their middle; higher-order factors stand further left, a bifactor
general factor to the right.  Arrows carry the standardized loadings and
paths; curved double-headed arrows on the left are construct correlations,
on the right residual correlations.  The row height shrinks with the number
of items so that a 60-item model still fits a printed page.

Meaning never rests on colour: negative values are dashed and carry a minus
sign, line width grows with size, and every number is written out.  All
user text is escaped.
"""

from __future__ import annotations

from html import escape

from scalewright.report.formatting import coef

#: beyond this many constructs the correlation arcs would tangle; the table has them
MAX_ARC_CONSTRUCTS = 5

_GAP = 170          # construct ellipse to item box
_HIGHER_GAP = 170   # higher-order factor to construct
_TOP = 34
_LABEL_OFFSET = 30  # label column distance from the item boxes


def _e(text) -> str:
    return escape(str(text), quote=True)


def _n(x: float) -> str:
    """A coordinate, rounded: determinism and small files."""
    return f"{x:.1f}".rstrip("0").rstrip(".")


def _text_width(text: str, size: float) -> float:
    return 0.58 * size * len(text)


def _stroke(value: float | None) -> str:
    v = 0.0 if value is None else abs(value)
    width = 0.7 + 2.0 * min(v, 1.0)
    dash = ' stroke-dasharray="5 3"' if value is not None and value < 0 else ""
    return f'stroke-width="{_n(width)}"{dash}'


def _label(x: float, y: float, value, size: float, anchor: str = "middle") -> str:
    return (f'<text x="{_n(x)}" y="{_n(y + size * 0.35)}" font-size="{_n(size)}" '
            f'text-anchor="{anchor}" class="lab">{_e(coef(value, 2))}</text>')


def _ellipse(cx, cy, rx, ry, name, size, css) -> str:
    return (f'<ellipse cx="{_n(cx)}" cy="{_n(cy)}" rx="{_n(rx)}" ry="{_n(ry)}" class="{css}"/>'
            f'<text x="{_n(cx)}" y="{_n(cy + size * 0.35)}" font-size="{_n(size)}" '
            f'text-anchor="middle" class="name">{_e(name)}</text>')


def path_diagram(model: dict, figure_id: str) -> str:
    """SVG markup of the path diagram of ``model`` (a model result dict).

    ``figure_id`` makes the marker ids unique within the report.
    """
    kinds = {c["name"]: c["kind"] for c in model["constructs"]}
    first_order = [c for c, k in kinds.items() if k == "construct"]
    highers = [c for c, k in kinds.items() if k == "higher"]
    general = next((c for c, k in kinds.items() if k == "general"), None)
    loadings = [r for r in model["loadings"] if r["construct"] in kinds]
    own = {}
    for r in loadings:
        if r.get("primary") and kinds[r["construct"]] == "construct":
            own.setdefault(r["item"], r["construct"])
    order = [i for c in first_order for i in model["items"] if own.get(i) == c]
    order += [i for i in model["items"] if i not in own]

    p = len(order)
    groups = len(first_order)
    row = max(13.0, min(22.0, 880.0 / max(p + groups, 1)))
    font = 11.0 if row >= 18 else 9.5
    small = font - 1.5
    item_w = max(44.0, max((_text_width(i, font) for i in order), default=0) + 16)
    item_h = row * 0.78

    ys, y = {}, _TOP + 10
    previous = None
    for item in order:
        if previous is not None and own.get(item) != own.get(previous):
            y += row * 0.6
        ys[item] = y
        y += row
        previous = item
    bottom = y

    paths = model.get("higher_order_paths") or []
    explained = {r["construct"] for r in paths}
    arcs = [r for r in model.get("construct_correlations") or []
            if r["a"] in kinds and r["b"] in kinds and r["a"] not in explained
            and r["b"] not in explained and kinds[r["a"]] != "general"
            and kinds[r["b"]] != "general"]
    drawn_arcs = len({a for r in arcs for a in (r["a"], r["b"])}) <= MAX_ARC_CONSTRUCTS

    rx = {c: max(34.0, _text_width(c, font) / 2 + 14) for c in kinds}
    ry = max(11.0, row * 0.62)
    construct_x_right = max((2 * rx[c] for c in first_order), default=0)
    corr_room = 30 + 0.22 * (bottom - _TOP) if drawn_arcs and arcs else 10.0
    higher_room = (_HIGHER_GAP + 2 * max((rx[h] for h in highers), default=0)) if highers else 0
    left = 14 + corr_room + higher_room
    cx = left + construct_x_right / 2
    item_x = cx + construct_x_right / 2 + _GAP
    res_pairs = model.get("residual_covariances") or []
    res_room = 26.0 + (40.0 if res_pairs else 0)
    gx = item_x + item_w + res_room + (170 if general else 0)
    width = gx + (rx[general] + 16 if general else 16)

    cy = {}
    for c in first_order:
        members = [ys[i] for i in order if own.get(i) == c]
        cy[c] = sum(members) / len(members) + item_h / 2 if members else _TOP
    for h in highers:
        below = [cy[r["construct"]] for r in paths if r["higher"] == h and r["construct"] in cy]
        cy[h] = sum(below) / len(below) if below else _TOP
    hx = cx - construct_x_right / 2 - _HIGHER_GAP - max((rx[h] for h in highers), default=0)
    if general:
        cy[general] = (_TOP + bottom) / 2

    out = []
    mid = f"{figure_id}-arrow"
    out.append(f'<defs><marker id="{mid}" viewBox="0 0 10 10" refX="9" refY="5" '
               'markerWidth="7" markerHeight="7" markerUnits="userSpaceOnUse" orient="auto-start-reverse">'
               '<path d="M0,1 L10,5 L0,9 z" class="head"/></marker></defs>')
    out.append(f'<text x="8" y="16" font-size="{_n(font)}" class="caption">'
               f'Path diagram: {_e(model["name"])}</text>')

    # items
    for item in order:
        out.append(f'<rect x="{_n(item_x)}" y="{_n(ys[item])}" width="{_n(item_w)}" '
                   f'height="{_n(item_h)}" rx="2" class="item"/>'
                   f'<text x="{_n(item_x + item_w / 2)}" y="{_n(ys[item] + item_h / 2 + font * 0.35)}" '
                   f'font-size="{_n(font)}" text-anchor="middle" class="name">{_e(item)}</text>')

    # loadings of first-order constructs (own and cross) and of the general factor
    for r in loadings:
        c, item, value = r["construct"], r["item"], r.get("std_estimate")
        if item not in ys:
            continue
        ty = ys[item] + item_h / 2
        if kinds[c] == "construct":
            x0, y0, x1 = cx + rx[c] * 0.98, cy[c], item_x
        elif kinds[c] == "general":
            x0, y0, x1 = gx - rx[c] * 0.98, cy[c], item_x + item_w
        else:
            continue
        cross = kinds[c] == "construct" and own.get(item) != c
        if cross:   # ends lower on the item and is labelled further out, apart from the own loading
            ty += item_h * 0.3
        out.append(f'<line x1="{_n(x0)}" y1="{_n(y0)}" x2="{_n(x1)}" y2="{_n(ty)}" '
                   f'class="{"cross" if cross else "load"}" {_stroke(value)} '
                   f'marker-end="url(#{mid})"/>')
        # labels stand in a column near the items, where the lines are a row apart
        lx = x1 - (_LABEL_OFFSET * (2.4 if cross else 1.0)) * (1 if x1 > x0 else -1)
        t = (lx - x0) / (x1 - x0)
        out.append(_label(lx, y0 + t * (ty - y0), value, small))

    # higher-order paths
    for r in paths:
        h, c = r["higher"], r["construct"]
        if h not in cy or c not in cy:
            continue
        x0, y0, x1, y1 = hx + rx[h] * 0.98, cy[h], cx - rx[c], cy[c]
        out.append(f'<line x1="{_n(x0)}" y1="{_n(y0)}" x2="{_n(x1)}" y2="{_n(y1)}" class="load" '
                   f'{_stroke(r.get("std_estimate"))} marker-end="url(#{mid})"/>')
        out.append(_label(x0 + 0.7 * (x1 - x0), y0 + 0.7 * (y1 - y0), r.get("std_estimate"), small))

    # construct correlations, between latent variables no path explains
    if drawn_arcs:
        for r in arcs:
            a, b = r["a"], r["b"]
            xa = (hx if kinds[a] == "higher" else cx) - rx[a]
            xb = (hx if kinds[b] == "higher" else cx) - rx[b]
            ya, yb = cy[a], cy[b]
            bulge = 24 + 0.22 * abs(yb - ya)
            xm = min(xa, xb) - bulge
            out.append(f'<path d="M{_n(xa)},{_n(ya)} C{_n(xm)},{_n(ya)} {_n(xm)},{_n(yb)} '
                       f'{_n(xb)},{_n(yb)}" class="corr" fill="none" {_stroke(r["estimate"])} '
                       f'marker-start="url(#{mid})" marker-end="url(#{mid})"/>')
            out.append(_label(xm + 0.25 * (min(xa, xb) - xm), (ya + yb) / 2, r["estimate"], small))

    # residual correlations, on the right of the items
    for r in res_pairs:
        a, b = r["a"], r["b"]
        if a not in ys or b not in ys:
            continue
        xa = item_x + item_w
        ya, yb = ys[a] + item_h / 2, ys[b] + item_h / 2
        bulge = 16 + 0.18 * abs(yb - ya)
        out.append(f'<path d="M{_n(xa)},{_n(ya)} C{_n(xa + bulge)},{_n(ya)} {_n(xa + bulge)},'
                   f'{_n(yb)} {_n(xa)},{_n(yb)}" class="corr" fill="none" '
                   f'{_stroke(r.get("std_estimate"))} marker-start="url(#{mid})" '
                   f'marker-end="url(#{mid})"/>')
        out.append(_label(xa + 0.75 * bulge + 2, (ya + yb) / 2, r.get("std_estimate"), small,
                          "start"))

    # latent variables last, so that they sit above the lines
    for c in first_order:
        out.append(_ellipse(cx, cy[c], rx[c], ry, c, font, "latent"))
    for h in highers:
        out.append(_ellipse(hx, cy[h], rx[h], ry, h, font, "latent higher"))
    if general:
        out.append(_ellipse(gx, cy[general], rx[general], ry, general, font, "latent general"))

    height = bottom + 12
    note = ("" if drawn_arcs or not arcs else
            " Construct correlations are not drawn (too many to read); see the table.")
    desc = (f"Path diagram of the model {model['name']}: {len(first_order)} constructs, "
            f"{p} items; standardized estimates on the arrows.{note}")
    return (f'<svg xmlns="http://www.w3.org/2000/svg" class="diagram" role="img" '
            f'viewBox="0 0 {_n(width)} {_n(height)}" width="{_n(width)}" height="{_n(height)}" '
            f'aria-label="{_e(desc)}"><title>{_e(desc)}</title>' + "".join(out) + "</svg>")


def arcs_omitted(model: dict) -> bool:
    """True when the diagram leaves construct correlations to the table."""
    kinds = {c["name"]: c["kind"] for c in model["constructs"]}
    explained = {r["construct"] for r in model.get("higher_order_paths") or []}
    names = {x for r in model.get("construct_correlations") or []
             for x in (r["a"], r["b"]) if x not in explained and kinds.get(x) != "general"}
    return len(names) > MAX_ARC_CONSTRUCTS
