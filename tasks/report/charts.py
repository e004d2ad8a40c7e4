"""The report's SVG charts: geometry as plain dictionaries, and their SVG text.

A chart view is a dict of the chart's id, size, title and description and its shapes (``grid``,
``rects``, ``lines``, ``polylines``, ``paths``, ``circles``, ``texts``) in pixel coordinates; a
heat map's cells are ``cells``, pairs of a rectangle's SVG text up to its class (the same for
every map of a grid's size, :func:`_heat_geometry`) and the class.
The builders here (divergence heat map, residual histogram, Q-Q plot, autocorrelations, history
of the standardised maximum) return such views with their data tables; the run view builds its
small charts with :func:`new_chart` and :class:`Scale`.  :func:`svg_element` writes a view as an
inline ``<svg>`` element (the ``svg`` filter of :mod:`fitaudit.tasks.report.render`).  No Jinja2
here: text values are escaped as autoescape would (:func:`~fitaudit.tasks.report.text.escaped`).
"""

from __future__ import annotations

import bisect
import functools
import math
from collections.abc import Mapping, Sequence
from typing import Any

import markupsafe

from fitaudit.core.divergence import CLASSICAL_MEMBER_LABELS

from .labels import MEMBER_POINTS
from .text import coord, escaped, format_number, to_float

#: Upper edges of the heat-map classes of T / critical value (class ``h1`` .. ``h8``); 1 is the gate.
HEAT_BINS: tuple[float, ...] = (0.25, 0.5, 0.75, 1.0, 1.5, 2.0, 4.0)


def svg_element(c: Mapping[str, Any]) -> markupsafe.Markup:
    """The SVG element of a chart view (Jinja filter ``svg``; geometry computed by the view builders).

    Written out here rather than by a template macro: a model page draws several hundred shapes,
    and a macro call per attribute made charts most of a page's rendering time.  Every text value
    is escaped as autoescape would; coordinates pass through :func:`coord`.
    """
    esc, px, word = escaped, coord, _escaped_word
    cell_px = _CoordText().__getitem__  # rectangles: a heat map's cells repeat a few dozen coordinates
    cid = esc(c["id"])

    def line(g: Mapping[str, Any]) -> str:
        return (
            f'<line x1="{px(g["x1"])}" y1="{px(g["y1"])}" x2="{px(g["x2"])}" y2="{px(g["y2"])}" '
            f'class="{word(g["cls"])}"/>'
        )

    out = [
        f'<svg class="chart {esc(c["cls"])}" role="img" aria-labelledby="{cid}-t {cid}-d" '
        f'viewBox="0 0 {px(c["w"])} {px(c["h"])}" width="{px(c["w"])}" height="{px(c["h"])}">\n'
        f'<title id="{cid}-t">{esc(c["title"])}</title>\n<desc id="{cid}-d">{esc(c["desc"])}</desc>\n',
        "".join(map(line, c["grid"])),
        "\n",
        "".join(f'{_rect_open(r["x"], r["y"], r["w"], r["h"], cell_px)}{word(r["cls"])}"/>' for r in c["rects"]),
        "".join(f'{prefix}{word(cls)}"/>' for prefix, cls in c.get("cells", ())),
        "\n",
        "".join(map(line, c["lines"])),
        "\n",
        "".join(f'<polyline points="{esc(p["points"])}" class="{esc(p["cls"])}"/>' for p in c["polylines"]),
        "\n",
        "".join(f'<path d="{esc(p["d"])}" class="{esc(p["cls"])}"/>' for p in c["paths"]),
        "\n",
        "".join(
            f'<circle cx="{px(o["cx"])}" cy="{px(o["cy"])}" r="{px(o["r"])}" class="{word(o["cls"])}"/>'
            for o in c["circles"]
        ),
        "\n",
        "".join(
            f'<text x="{px(t["x"])}" y="{px(t["y"])}" text-anchor="{word(t["anchor"])}" '
            f'class="{word(t["cls"])}">{esc(t["text"])}</text>'
            for t in c["texts"]
        ),
        "\n</svg>\n",
    ]
    return markupsafe.Markup("".join(out))


def _rect_open(x: float, y: float, w: float, h: float, px=coord) -> str:
    """A ``<rect>`` element's text up to its class value (``px`` formats the coordinates)."""
    return f'<rect x="{px(x)}" y="{px(y)}" width="{px(w)}" height="{px(h)}" class="'


class _CoordText(dict):
    """:func:`coord` of each value, formatted once per chart: a heat map's cells share a few dozen
    coordinates between several hundred rectangles (a lookup that misses costs about three
    :func:`coord` calls, so only the rectangles use it).  Zero is never kept: 0.0 and -0.0 are
    equal keys but print ``0`` and ``-0``."""

    def __missing__(self, x: float) -> str:
        text = coord(x)
        if x:
            self[x] = text
        return text


@functools.lru_cache(maxsize=64)
def _escaped_word(word: str) -> str:
    """A class name or anchor, escaped once: a chart repeats a few of them hundreds of times."""
    return escaped(word)


class Scale:
    """Linear map from data [lo, hi] to pixels [p0, p1]."""

    def __init__(self, lo: float, hi: float, p0: float, p1: float):
        if not hi > lo:
            hi = lo + 1.0
        self.lo, self.hi, self.p0, self.p1 = lo, hi, p0, p1

    def __call__(self, v: float) -> float:
        return self.p0 + (v - self.lo) / (self.hi - self.lo) * (self.p1 - self.p0)


def _nice_ticks(lo: float, hi: float, count: int = 5) -> list[float]:
    """Round tick values covering [lo, hi] (steps of 1, 2 or 5 times a power of ten)."""
    span = hi - lo
    if not span > 0:
        return [lo]
    raw = span / max(count - 1, 1)
    mag = 10 ** math.floor(math.log10(raw))
    step = next(m * mag for m in (1, 2, 5, 10) if m * mag >= raw)
    first = math.ceil(lo / step - 1e-9) * step
    ticks, t = [], first
    while t <= hi + 1e-9 * step:
        ticks.append(0.0 if abs(t) < 1e-12 * step else round(t, 10))
        t += step
    return ticks


def new_chart(chart_id: str, width: float, height: float, title: str, desc: str) -> dict:
    return {
        "id": chart_id,
        "cls": "plot",
        "w": width,
        "h": height,
        "title": title,
        "desc": desc,
        "grid": [],
        "rects": [],
        "lines": [],
        "polylines": [],
        "paths": [],
        "circles": [],
        "texts": [],
    }


def _axes(
    chart: dict, x: Scale, y: Scale, xticks: Sequence[float], yticks: Sequence[float], xlabel: str, ylabel: str
) -> None:
    """Frame, ticks, gridlines and axis titles."""
    left, right, bottom, top = x.p0, x.p1, y.p0, y.p1
    for t in yticks:
        py = y(t)
        chart["grid"].append({"x1": left, "y1": py, "x2": right, "y2": py, "cls": "gl"})
        chart["texts"].append({"x": left - 4, "y": py + 3.5, "text": format_number(t, 2), "cls": "tk", "anchor": "end"})
    for t in xticks:
        px = x(t)
        chart["lines"].append({"x1": px, "y1": bottom, "x2": px, "y2": bottom + 4, "cls": "ax"})
        chart["texts"].append({"x": px, "y": bottom + 15, "text": format_number(t, 2), "cls": "tk", "anchor": "middle"})
    chart["lines"].append({"x1": left, "y1": bottom, "x2": right, "y2": bottom, "cls": "ax"})
    chart["lines"].append({"x1": left, "y1": bottom, "x2": left, "y2": top, "cls": "ax"})
    chart["texts"].append({"x": (left + right) / 2, "y": bottom + 30, "text": xlabel, "cls": "lb", "anchor": "middle"})
    chart["texts"].append({"x": left - 34, "y": top - 6, "text": ylabel, "cls": "lb", "anchor": "start"})


def _heat_class(v: float) -> str:
    """``h1`` .. ``h8``: one more than the number of edges of :data:`HEAT_BINS` below ``v``."""
    return _HEAT_CLASSES[bisect.bisect_left(HEAT_BINS, v)]


#: A heat map's cell width and height and its grid's left and top edges, in pixels.
_HEAT_CELL = (40.0, 18.0, 178.0, 16.0)


@functools.lru_cache(maxsize=8)
def _heat_geometry(na: int, nb: int) -> tuple[tuple[str, ...], tuple[tuple[str, str, str, str], ...]]:
    """What every heat map of ``na`` alphas and ``nb`` betas draws alike, made once: each cell's
    ``<rect`` text up to its class, and each cell's four sides (top, bottom, left, right) as path
    segments; both row-major with the first alpha at the bottom (a model page draws two maps of
    the grid's 150-odd cells)."""
    cw, ch, left, top = _HEAT_CELL
    prefixes, sides = [], []
    for i in range(na):
        y0 = top + (na - 1 - i) * ch
        for j in range(nb):
            x0 = left + j * cw
            prefixes.append(_rect_open(x0, y0, cw, ch))
            sides.append(
                (
                    f"M{coord(x0)} {coord(y0)}H{coord(x0 + cw)}",
                    f"M{coord(x0)} {coord(y0 + ch)}H{coord(x0 + cw)}",
                    f"M{coord(x0)} {coord(y0)}V{coord(y0 + ch)}",
                    f"M{coord(x0 + cw)} {coord(y0)}V{coord(y0 + ch)}",
                )
            )
    return tuple(prefixes), tuple(sides)


def heatmap(check: Mapping[str, Any], chart_id: str, label: str) -> dict:
    """The divergence map as a heat map of T / critical value, with its data table (a row per
    alpha: its text and its cells as ``(text, fails)`` pairs)."""
    dmap = check["map"]
    alphas = [float(a) for a in dmap["alphas"]]
    betas = [float(b) for b in dmap["betas"]]
    grid = check.get("scaled_grid") or [[None] * len(betas) for _ in alphas]
    infinite = dmap.get("infinite") or [[False] * len(betas) for _ in alphas]
    na, nb = len(alphas), len(betas)
    cw, ch, left, top = _HEAT_CELL
    width, height = left + nb * cw + 12, top + na * ch + 46
    values = [[to_float(grid[i][j]) for j in range(nb)] for i in range(na)]
    alpha_text, beta_text = [format_number(a) for a in alphas], [format_number(b) for b in betas]
    fail = [
        [v is not None and not bool(infinite[i][j]) and v > 1.0 for j, v in enumerate(row)]
        for i, row in enumerate(values)
    ]

    xs = [left + j * cw for j in range(nb)]  # left edge of each column (beta)
    ys = [top + (na - 1 - i) * ch for i in range(na)]  # top edge of each row (alpha, the first at the bottom)

    n_fail = sum(map(sum, fail))
    n_inf = sum(bool(infinite[i][j]) for i in range(na) for j in range(nb))
    finite = [v for i, row in enumerate(values) for j, v in enumerate(row) if v is not None and not infinite[i][j]]
    largest = max(finite) if finite else None
    desc = (
        f"{label}: T divided by its critical value at {na} values of alpha ({alpha_text[0]} to "
        f"{alpha_text[-1]}, rows) and {nb} values of beta ({beta_text[0]} to "
        f"{beta_text[-1]}, columns). "
        f"{n_fail} of {na * nb} points exceed 1 (the check fails there); {n_inf} are infinite (an empty cell); "
        f"the largest finite value is {format_number(largest)}."
    )
    chart = new_chart(chart_id, width, height, f"Divergence map of the {label.lower()}", desc)
    chart["cls"] = "heat"
    prefixes, sides = _heat_geometry(na, nb)
    classes: list[str] = []
    rows_table, texts = [], chart["texts"]
    for i, (y0, row, row_inf, row_fail) in enumerate(zip(ys, values, infinite, fail)):
        row_cells = []
        for x0, v, is_inf, failing in zip(xs, row, row_inf, row_fail):
            if is_inf:
                cls, shown = "hinf", "∞"
                texts.append({"x": x0 + cw / 2, "y": y0 + ch / 2 + 4, "text": "∞", "cls": "sym", "anchor": "middle"})
            elif v is None:
                cls, shown = "hna", "n/a"
                texts.append({"x": x0 + cw / 2, "y": y0 + ch / 2 + 4, "text": "–", "cls": "sym", "anchor": "middle"})
            else:
                cls, shown = _heat_class(v), format_number(v)
            classes.append(cls)
            row_cells.append((shown, failing))
        rows_table.append({"alpha": alpha_text[i], "cells": row_cells})
    chart["cells"] = list(zip(prefixes, classes))
    # edge of the failing region: every side of a failing cell that borders a non-failing one
    segments = []
    for i in range(na):
        for j in range(nb):
            if not fail[i][j]:
                continue
            cell_top, cell_bottom, cell_left, cell_right = sides[i * nb + j]
            if i + 1 >= na or not fail[i + 1][j]:
                segments.append(cell_top)
            if i == 0 or not fail[i - 1][j]:
                segments.append(cell_bottom)
            if j == 0 or not fail[i][j - 1]:
                segments.append(cell_left)
            if j + 1 >= nb or not fail[i][j + 1]:
                segments.append(cell_right)
    # a frame around the grid: the lightest cells need no contrast with the page to be seen as part of the map
    chart["paths"].append(
        {
            "d": f"M{coord(left)} {coord(top)}H{coord(left + nb * cw)}V{coord(top + na * ch)}H{coord(left)}Z",
            "cls": "frame",
        }
    )
    if segments:
        chart["paths"].append({"d": "".join(segments), "cls": "edge"})
    # axes: alpha ticks on the left, beta ticks below
    for i in range(na):
        if i % 2 == 0 or na <= 9:
            chart["texts"].append(
                {"x": left - 5, "y": ys[i] + ch / 2 + 4, "text": alpha_text[i], "cls": "tk", "anchor": "end"}
            )
    for j in range(nb):
        if j % 2 == 0 or nb <= 5:
            chart["texts"].append(
                {
                    "x": xs[j] + cw / 2,
                    "y": top + na * ch + 14,
                    "text": beta_text[j],
                    "cls": "tk",
                    "anchor": "middle",
                }
            )
    chart["texts"].append(
        {
            "x": left + nb * cw / 2,
            "y": top + na * ch + 32,
            "text": "β (weight of the data in the scaling mean)",
            "cls": "lb",
            "anchor": "middle",
        }
    )
    chart["texts"].append({"x": left - 30, "y": top - 4, "text": "α", "cls": "lb", "anchor": "middle"})
    # classical members (model scaling = beta 0 of a geometric or power grid) and the maximum
    members_marked = []
    scaling = dmap.get("scaling")
    if scaling in ("geometric", "power", "model") and betas and abs(betas[0]) < 1e-12 and na > 1:
        step = (alphas[-1] - alphas[0]) / (na - 1)
        for name, (a, _b) in MEMBER_POINTS.items():
            if not alphas[0] - 1e-9 <= a <= alphas[-1] + 1e-9:
                continue
            pos = (a - alphas[0]) / step
            cy = top + (na - 1 - pos) * ch + ch / 2
            cx = xs[0] + cw / 2
            chart["circles"].append({"cx": cx, "cy": cy, "r": 4.5, "cls": "mem"})
            chart["lines"].append({"x1": left - 50, "y1": cy, "x2": left - 38, "y2": cy, "cls": "lead"})
            chart["texts"].append(
                {"x": left - 53, "y": cy + 3.5, "text": CLASSICAL_MEMBER_LABELS[name], "cls": "mt", "anchor": "end"}
            )
            members_marked.append(name)
    a_max, b_max = to_float(check.get("alpha_max")), to_float(check.get("beta_max"))
    max_point = None
    if a_max is not None and b_max is not None:
        i = min(range(na), key=lambda k: abs(alphas[k] - a_max))
        j = min(range(nb), key=lambda k: abs(betas[k] - b_max))
        cx, cy = xs[j] + cw / 2, ys[i] + ch / 2
        chart["paths"].append(
            {
                "d": f"M{coord(cx)} {coord(cy - 7)}L{coord(cx + 7)} {coord(cy)}"
                f"L{coord(cx)} {coord(cy + 7)}L{coord(cx - 7)} {coord(cy)}Z",
                "cls": "mx",
            }
        )
        max_point = {"alpha": format_number(a_max), "beta": format_number(b_max)}
    return {
        "chart": chart,
        "table": {"betas": beta_text, "rows": rows_table},
        "n_fail": n_fail,
        "n_inf": n_inf,
        "n_points": na * nb,
        "largest": largest,
        "max_point": max_point,
        "members_marked": [CLASSICAL_MEMBER_LABELS[m] for m in members_marked],
        "bins": _HEAT_LEGEND,
        "scale_words": HEAT_SCALE_WORDS,
    }


def heat_legend() -> list[dict]:
    """The heat map's classes for its legend: class name, range of T / critical value in words, and
    whether the check fails there."""
    edges = (None,) + HEAT_BINS + (None,)
    out = []
    for k in range(len(HEAT_BINS) + 1):
        lo, hi = edges[k], edges[k + 1]
        if lo is None:
            text = f"≤ {format_number(hi)}"
        elif hi is None:
            text = f"> {format_number(lo)}"
        else:
            text = f"{format_number(lo)} – {format_number(hi)}"
        out.append({"cls": f"h{k + 1}", "text": text, "fails": lo is not None and lo >= 1.0})
    return out


#: The legend of every heat map (built once: the classes are fixed; templates only read it).
_HEAT_LEGEND = heat_legend()
_HEAT_CLASSES = tuple(f"h{k + 1}" for k in range(len(HEAT_BINS) + 1))

#: How the heat map's colours read, for its legend.
HEAT_SCALE_WORDS = (
    "Blues below the critical value, orange to red above it; the further from the critical value, the darker "
    "(in greyscale too), and the heavy outline marks where the check fails."
)


def histogram(check: Mapping[str, Any], chart_id: str, label: str) -> dict | None:
    plots = check.get("plots") or {}
    edges, counts = plots.get("hist_edges"), plots.get("hist_counts")
    if not edges or not counts:
        return None
    density = plots.get("hist_density")
    edge_text = [format_number(e) for e in edges]
    total = sum(counts) or 1
    observed = [c / (total * (edges[k + 1] - edges[k])) for k, c in enumerate(counts)]
    theory = [to_float(d) or 0.0 for d in density] if density else None
    top_value = max(observed + (theory or [])) * 1.1 or 1.0
    width, height = 420.0, 230.0
    x = Scale(edges[0], edges[-1], 48, width - 12)
    y = Scale(0.0, top_value, height - 42, 18)
    desc = (
        f"{label}: observed density of the {total} standardised residuals in {len(counts)} bins from "
        f"{edge_text[0]} to {edge_text[-1]}"
        + (
            ", with the density of the noise law as a line."
            if theory
            else "; the noise law is discrete, so no density is drawn."
        )
    )
    chart = new_chart(chart_id, width, height, f"Residual histogram of the {label.lower()}", desc)
    _axes(
        chart,
        x,
        y,
        _nice_ticks(edges[0], edges[-1], 6),
        _nice_ticks(0.0, top_value, 4),
        "standardised residual",
        "density",
    )
    for k, d in enumerate(observed):
        if d > 0:
            x0, x1 = x(edges[k]), x(edges[k + 1])
            chart["rects"].append(
                {"x": x0 + 0.5, "y": y(d), "w": max(x1 - x0 - 1, 0.5), "h": y(0) - y(d), "cls": "bar"}
            )
    centres = [(edges[k] + edges[k + 1]) / 2 for k in range(len(counts))]
    if theory:
        chart["polylines"].append(
            {"points": " ".join(f"{coord(x(c))},{coord(y(d))}" for c, d in zip(centres, theory)), "cls": "ref"}
        )
    rows = [
        {
            "bin": f"{edge_text[k]} to {edge_text[k + 1]}",
            "count": counts[k],
            "observed": format_number(observed[k]),
            "noise": format_number(theory[k]) if theory else "n/a",
        }
        for k in range(len(counts))
        if counts[k] or (theory and theory[k] > 1e-3)
    ]
    return {"chart": chart, "rows": rows, "has_density": bool(theory)}


def qq_plot(check: Mapping[str, Any], chart_id: str, label: str) -> dict | None:
    plots = check.get("plots") or {}
    theo, samp = plots.get("qq_theoretical"), plots.get("qq_sample")
    if not theo or not samp:
        return None
    pairs = [
        (a, b)
        for a, b in zip((to_float(t) for t in theo), (to_float(s) for s in samp))
        if a is not None and b is not None and math.isfinite(a) and math.isfinite(b)
    ]
    if not pairs:
        return None
    lo = min(min(p) for p in pairs)
    hi = max(max(p) for p in pairs)
    pad = 0.05 * (hi - lo or 1.0)
    lo, hi = lo - pad, hi + pad
    width, height = 300.0, 260.0
    x = Scale(lo, hi, 48, width - 12)
    y = Scale(lo, hi, height - 42, 18)
    desc = (
        f"{label}: {len(pairs)} quantiles of the standardised residuals against the quantiles of the noise law; "
        "points on the dashed diagonal mean agreement."
    )
    chart = new_chart(chart_id, width, height, f"Q-Q plot of the {label.lower()}", desc)
    ticks = _nice_ticks(lo, hi, 5)
    _axes(chart, x, y, ticks, ticks, "noise-law quantile", "residual quantile")
    chart["lines"].append({"x1": x(lo), "y1": y(lo), "x2": x(hi), "y2": y(hi), "cls": "ref"})
    for a, b in pairs:
        chart["circles"].append({"cx": x(a), "cy": y(b), "r": 2.6, "cls": "pt"})
    rows = [(format_number(a), format_number(b)) for a, b in pairs]  # (noise-law quantile, residual quantile)
    return {"chart": chart, "rows": rows}


def acf_plot(check: Mapping[str, Any], chart_id: str, label: str) -> dict | None:
    plots = check.get("plots") or {}
    values = [to_float(r) for r in (plots.get("acf") or [])]
    band = to_float(plots.get("acf_band"))
    if not values:
        return None
    lim = max([abs(v) for v in values if v is not None] + ([band] if band else []) + [0.2]) * 1.15
    width, height = 420.0, 220.0
    lags = len(values)
    x = Scale(0.0, lags + 1.0, 48, width - 12)
    y = Scale(-lim, lim, height - 42, 18)
    outside = sum(1 for v in values if v is not None and band is not None and abs(v) > band)
    desc = f"{label}: autocorrelations of the residuals at lags 1 to {lags}" + (
        f"; dashed lines at ±{format_number(band)} (approximate 95 % band). {outside} of {lags} lags fall outside it."
        if band
        else "."
    )
    chart = new_chart(chart_id, width, height, f"Residual autocorrelations of the {label.lower()}", desc)
    _axes(chart, x, y, _nice_ticks(1.0, float(lags), 6), _nice_ticks(-lim, lim, 5), "lag", "autocorrelation")
    chart["lines"].append({"x1": x(0), "y1": y(0), "x2": x(lags + 1), "y2": y(0), "cls": "ax"})
    if band:
        for b in (band, -band):
            chart["lines"].append({"x1": x(0), "y1": y(b), "x2": x(lags + 1), "y2": y(b), "cls": "ref"})
    rows = []
    for k, v in enumerate(values, start=1):
        if v is None:
            continue
        chart["lines"].append({"x1": x(k), "y1": y(0), "x2": x(k), "y2": y(v), "cls": "stem"})
        chart["circles"].append({"cx": x(k), "cy": y(v), "r": 2.8, "cls": "pt"})
        rows.append({"lag": k, "value": format_number(v), "outside": band is not None and abs(v) > band})
    return {"chart": chart, "rows": rows, "band": format_number(band) if band else "n/a"}


def history_chart(points: Sequence[dict], chart_id: str) -> dict | None:
    """The standardised maximum over past audits, each point drawn as its verdict symbol."""
    shown = list(points[-26:])
    values = [p["r"] for p in shown if p["r"] is not None]
    if not values:
        return None
    width, height = 460.0, 210.0
    hi = max(values) * 1.15 or 1.0
    x = Scale(-0.5, len(shown) - 0.5, 48, width - 12)
    y = Scale(0.0, hi, height - 46, 18)
    desc = (
        f"Standardised maximum R of the deciding check at {len(values)} audits from {shown[0]['as_of']} "
        f"to {shown[-1]['as_of']}; "
        f"each point is drawn as the symbol of that audit's verdict."
    )
    chart = new_chart(chart_id, width, height, "History of the standardised maximum", desc)
    _axes(chart, x, y, [], _nice_ticks(0.0, hi, 4), "audit (as-of date)", "R")
    every = max(1, math.ceil(len(shown) / 6))
    for k, p in enumerate(shown):
        if k % every == 0 or k == len(shown) - 1:
            chart["texts"].append({"x": x(k), "y": y(0) + 15, "text": p["as_of"], "cls": "tk", "anchor": "middle"})
    run = []
    for k, p in enumerate(shown):
        if p["r"] is None:
            if len(run) > 1:
                chart["polylines"].append({"points": " ".join(run), "cls": "line"})
            run = []
            continue
        run.append(f"{coord(x(k))},{coord(y(p['r']))}")
        chart["texts"].append(
            {"x": x(k), "y": y(p["r"]) + 5, "text": p["status"]["symbol"], "cls": "glyph", "anchor": "middle"}
        )
    if len(run) > 1:
        chart["polylines"].insert(0, {"points": " ".join(run), "cls": "line"})
    return {"chart": chart}
