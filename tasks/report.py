"""The HTML report of an audit run (docs/architecture.md §4).

:func:`render_run` turns the results document (:func:`fitaudit.tasks.results.build_results`, the
machine-readable twin ``results.json``) and the run's metadata into self-contained pages:

``index.html``
    The run page: summary counts first, the expected number of false flags, the exceptions
    (most severe first, one reason each), movement against the previous audit, and every model's
    status over its last eight audits.
``models/<safe_id>.html``
    One page per model: verdict and reasons, the two checks side by side, the divergence map as a
    heat map of T / critical value, residual histogram, Q-Q plot, autocorrelations, parameters,
    change point, candidates, history, data lineage and settings.
``method.html``
    What the statistics mean, with formulas and references, the run's thresholds and the cautions.

:func:`render_archive_index` renders the archive's list of runs.  All pages use inline CSS and
SVG only (no scripts, fonts, images or external links), show every status by symbol and word as
well as colour, give each chart a data table, and print on A4.

This is the only module of fitaudit that imports Jinja2.  Templates receive plain view
dictionaries built here (chart geometry included) and only format them; user-supplied text is
escaped by autoescape and its bidirectional and control characters are made visible.
"""

from __future__ import annotations

import functools
import math
import unicodedata
from collections.abc import Iterable, Mapping, Sequence
from typing import Any

import jinja2
import markupsafe

from fitaudit.core.divergence import CLASSICAL_MEMBER_LABELS, CLASSICAL_MEMBERS
from fitaudit.core.exceptions import InputError
from fitaudit.core.verdict import CAUTION_PREFIX, owner_action
from fitaudit.core.vocabulary import ADJUSTMENT_LABELS, VERDICTS

from .registry import SAFE_ID
from .registry.schema import DaysToAct
from .results import SEVERITY, is_forecast_record

__all__ = [
    "STATUS",
    "HEAT_BINS",
    "CAUTION",
    "environment",
    "render_run",
    "page_context",
    "render_model_page",
    "render_index_page",
    "render_method_page",
    "render_archive_index",
    "record_action",
    "days_to_act",
]

_SYMBOLS = {"pass": "✓", "refit": "↻", "respecify": "⚑", "insufficient": "◌", "error": "✕"}
#: Status symbol and word for each verdict (colour is never the only signal, WCAG 2.1 SC 1.4.1).
STATUS: dict[str, tuple[str, str]] = {v: (_SYMBOLS[v], v) for v in VERDICTS}

#: Upper edges of the heat-map classes of T / critical value (class ``h1`` .. ``h8``); 1 is the gate.
HEAT_BINS: tuple[float, ...] = (0.25, 0.5, 0.75, 1.0, 1.5, 2.0, 4.0)

CAUTION = (
    "A passing audit is statistical evidence, not proof that a model is fit for its use. "
    "Decisions to keep, refit or retire a model follow the organisation's model-risk policy, "
    "applicable regulation and the judgement of qualified reviewers."
)

_MOVEMENT = {
    "new": "new exception",
    "persisting": "persisting",
    "resolved": "resolved",
    "steady": "still passing",
    "first": "first audit",
}
#: (alpha, beta) of the classical members (model scaling, i.e. beta = 0 on a geometric grid).
_MEMBER_POINTS = {name: (alpha, beta) for name, (alpha, beta, _scaling) in CLASSICAL_MEMBERS.items()}
_HISTORY_CELLS = 8
_SHORT_TEXT = 160
_REQUIRED_META = ("run_id", "started_utc", "finished_utc", "operator", "tool_version", "code_commit", "prefect_version")
_VISIBLE_CONTROLS = {0x061C, 0x200E, 0x200F, 0x2028, 0x2029} | set(range(0x202A, 0x202F)) | set(range(0x2066, 0x206A))


# ----------------------------------------------------------------------------------------------
# Jinja environment and formatting filters
# ----------------------------------------------------------------------------------------------
def _float(x: Any) -> float | None:
    """A number from the document (None, numbers, or the strings "inf", "-inf", "nan")."""
    if x is None or isinstance(x, bool):
        return None
    if isinstance(x, str):
        try:
            x = float(x)
        except ValueError:
            return None
    try:
        v = float(x)
    except (TypeError, ValueError):
        return None
    return None if math.isnan(v) else v


def _format_number(x: Any, digits: int = 3) -> str:
    """A number with ``digits`` significant figures (Jinja filter ``num``).

    Fixed notation without trailing zeros, scientific below 1e-4 and from 1e6 on; integers print
    whole, missing values (None, NaN) as ``n/a`` and infinities (also the document's ``"inf"``) as
    ``∞``.
    """
    if isinstance(x, int) and not isinstance(x, bool):
        return str(x)
    v = _float(x)
    if v is None:
        return "n/a"
    if math.isinf(v):
        return "∞" if v > 0 else "-∞"
    if v == 0:
        return "0"
    a = abs(v)
    if a < 1e-4 or a >= 1e6:
        return f"{v:.{digits - 1}e}"
    decimals = max(0, digits - 1 - math.floor(math.log10(a)))
    text = f"{v:.{decimals}f}"
    if "." in text:
        text = text.rstrip("0").rstrip(".")
    return "0" if float(text) == 0 else text


def _format_p(p: Any) -> str:
    """A p-value with three decimals, ``< 0.001`` below that, ``n/a`` when missing (filter ``p``).

    Three decimals match the resolution of the default 999 simulated replicates, whose smallest
    p-value is 1 / 1000.
    """
    v = _float(p)
    if v is None:
        return "n/a"
    return "< 0.001" if v < 0.001 else f"{v:.3f}"


def _coord(x: float) -> str:
    """An SVG coordinate with at most one decimal."""
    text = f"{x:.1f}"
    return text[:-2] if text.endswith(".0") else text


def _count(x: Any) -> str:
    return "n/a" if x is None else str(x)


def _svg(c: Mapping[str, Any]) -> markupsafe.Markup:
    """The SVG element of a chart view (Jinja filter ``svg``; geometry computed by the view builders).

    Written out here rather than by a template macro: a model page draws several hundred shapes,
    and a macro call per attribute made charts most of a page's rendering time.  Every text value
    is escaped as autoescape would; coordinates pass through :func:`_coord`.
    """
    esc, px = markupsafe.escape, _coord
    cid = esc(c["id"])

    def line(g: Mapping[str, Any]) -> str:
        return f'<line x1="{px(g["x1"])}" y1="{px(g["y1"])}" x2="{px(g["x2"])}" y2="{px(g["y2"])}" class="{esc(g["cls"])}"/>'

    out = [
        f'<svg class="chart {esc(c["cls"])}" role="img" aria-labelledby="{cid}-t {cid}-d" viewBox="0 0 {px(c["w"])} {px(c["h"])}" '
        f'width="{px(c["w"])}" height="{px(c["h"])}">\n<title id="{cid}-t">{esc(c["title"])}</title>\n<desc id="{cid}-d">{esc(c["desc"])}</desc>\n',
        "".join(map(line, c["grid"])),
        "\n",
        "".join(
            f'<rect x="{px(r["x"])}" y="{px(r["y"])}" width="{px(r["w"])}" height="{px(r["h"])}" class="{esc(r["cls"])}"/>'
            for r in c["rects"]
        ),
        "\n",
        "".join(map(line, c["lines"])),
        "\n",
        "".join(f'<polyline points="{esc(p["points"])}" class="{esc(p["cls"])}"/>' for p in c["polylines"]),
        "\n",
        "".join(f'<path d="{esc(p["d"])}" class="{esc(p["cls"])}"/>' for p in c["paths"]),
        "\n",
        "".join(
            f'<circle cx="{px(o["cx"])}" cy="{px(o["cy"])}" r="{px(o["r"])}" class="{esc(o["cls"])}"/>'
            for o in c["circles"]
        ),
        "\n",
        "".join(
            f'<text x="{px(t["x"])}" y="{px(t["y"])}" text-anchor="{esc(t["anchor"])}" class="{esc(t["cls"])}">{esc(t["text"])}</text>'
            for t in c["texts"]
        ),
        "\n</svg>\n",
    ]
    return markupsafe.Markup("".join(out))


@functools.lru_cache(maxsize=1)
def environment() -> jinja2.Environment:
    """The report's Jinja2 environment (built once and cached).

    Returns
    -------
    jinja2.Environment
        Templates from the ``fitaudit.templates`` package (``PackageLoader``); autoescape on for
        ``.html`` and ``.j2`` names and by default for every other name and string template;
        ``StrictUndefined``, so a missing name raises instead of printing nothing; the filters
        ``num``, ``p``, ``px``, ``count`` and ``svg``.
    """
    env = jinja2.Environment(
        loader=jinja2.PackageLoader("fitaudit.templates", "."),
        autoescape=jinja2.select_autoescape(enabled_extensions=("html", "j2"), default_for_string=True, default=True),
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
        keep_trailing_newline=True,
    )
    env.filters.update(num=_format_number, p=_format_p, px=_coord, count=_count, svg=_svg)
    return env


def _render(template: str, context: Mapping[str, Any]) -> bytes:
    return environment().get_template(template).render(**context).encode("utf-8")


# ----------------------------------------------------------------------------------------------
# Small view helpers
# ----------------------------------------------------------------------------------------------
def _text(value: Any, limit: int | None = None) -> str:
    """User text made safe to show: bidi/control characters visible as ``[U+XXXX]``, long text cut.

    Escaping of ``<``, ``&`` and quotes is left to autoescape; this guards what escaping cannot:
    direction overrides that reorder the rest of a line, and invisible controls.
    """
    if value is None:
        return ""
    text = str(value)
    cut = 0
    if limit is not None and len(text) > limit:
        cut, text = len(text) - limit, text[:limit]
    out = []
    for ch in text:
        code = ord(ch)
        if code in _VISIBLE_CONTROLS or (unicodedata.category(ch) == "Cc" and ch not in "\t\n"):
            out.append(f"[U+{code:04X}]")
        else:
            out.append(ch)
    shown = "".join(out)
    return f"{shown}… (+{cut} characters)" if cut else shown


def _status(verdict: str) -> dict:
    symbol, word = STATUS[verdict]
    return {"key": verdict, "symbol": symbol, "word": word}


def _deciding_check(audit: Mapping[str, Any] | None) -> Mapping[str, Any] | None:
    """The check whose outcome decides the verdict: production when present, else refit."""
    if not audit:
        return None
    return audit.get("production") if audit.get("production") is not None else audit.get("refit")


def _ok(check: Mapping[str, Any] | None) -> bool:
    return bool(check) and check.get("status") == "ok"


def _value_text(value: Any) -> str:
    """A settings/lineage value as short text."""
    if value is None:
        return "—"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, (int, float)):
        return _format_number(value, 4)
    if isinstance(value, (list, tuple)):
        if not value:
            return "none"
        if all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in value) and len(value) > 8:
            return f"{len(value)} values from {_format_number(value[0], 4)} to {_format_number(value[-1], 4)}"
        return ", ".join(_value_text(v) for v in value[:20]) + (
            f", … ({len(value) - 20} more)" if len(value) > 20 else ""
        )
    if isinstance(value, Mapping):
        return "; ".join(f"{_text(k)}: {_value_text(v)}" for k, v in value.items())
    return _text(value)


def _kv_rows(mapping: Mapping[str, Any] | None, prefix: str = "", limit: int = 200) -> list[dict]:
    """Flatten nested mappings (and lists of mappings) into ``{"key", "value"}`` rows."""
    rows: list[dict] = []
    for key, value in (mapping or {}).items():
        name = f"{prefix}{key}"
        if isinstance(value, Mapping) and value:
            rows.extend(_kv_rows(value, f"{name}.", limit))
        elif isinstance(value, (list, tuple)) and value and all(isinstance(v, Mapping) for v in value):
            for i, item in enumerate(value[:20]):
                rows.extend(_kv_rows(item, f"{name}[{i}].", limit))
            if len(value) > 20:
                rows.append({"key": _text(f"{name}[…]"), "value": f"{len(value) - 20} more entries"})
        else:
            rows.append({"key": _text(name, _SHORT_TEXT), "value": _value_text(value)})
        if len(rows) >= limit:
            rows = rows[:limit] + [{"key": "…", "value": "further entries omitted"}]
            break
    return rows


# ----------------------------------------------------------------------------------------------
# SVG charts: geometry computed here, drawn by the ``svg`` filter (_svg)
# ----------------------------------------------------------------------------------------------
class _Scale:
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


def _chart(chart_id: str, width: float, height: float, title: str, desc: str) -> dict:
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
    chart: dict, x: _Scale, y: _Scale, xticks: Sequence[float], yticks: Sequence[float], xlabel: str, ylabel: str
) -> None:
    """Frame, ticks, gridlines and axis titles."""
    left, right, bottom, top = x.p0, x.p1, y.p0, y.p1
    for t in yticks:
        py = y(t)
        chart["grid"].append({"x1": left, "y1": py, "x2": right, "y2": py, "cls": "gl"})
        chart["texts"].append(
            {"x": left - 4, "y": py + 3.5, "text": _format_number(t, 2), "cls": "tk", "anchor": "end"}
        )
    for t in xticks:
        px = x(t)
        chart["lines"].append({"x1": px, "y1": bottom, "x2": px, "y2": bottom + 4, "cls": "ax"})
        chart["texts"].append(
            {"x": px, "y": bottom + 15, "text": _format_number(t, 2), "cls": "tk", "anchor": "middle"}
        )
    chart["lines"].append({"x1": left, "y1": bottom, "x2": right, "y2": bottom, "cls": "ax"})
    chart["lines"].append({"x1": left, "y1": bottom, "x2": left, "y2": top, "cls": "ax"})
    chart["texts"].append({"x": (left + right) / 2, "y": bottom + 30, "text": xlabel, "cls": "lb", "anchor": "middle"})
    chart["texts"].append({"x": left - 34, "y": top - 6, "text": ylabel, "cls": "lb", "anchor": "start"})


def _heat_class(v: float) -> str:
    return "h" + str(1 + sum(v > edge for edge in HEAT_BINS))


def _heatmap(check: Mapping[str, Any], chart_id: str, label: str) -> dict:
    """The divergence map as a heat map of T / critical value, with its data table."""
    dmap = check["map"]
    alphas = [float(a) for a in dmap["alphas"]]
    betas = [float(b) for b in dmap["betas"]]
    grid = check.get("scaled_grid") or [[None] * len(betas) for _ in alphas]
    infinite = dmap.get("infinite") or [[False] * len(betas) for _ in alphas]
    na, nb = len(alphas), len(betas)
    cw, ch, left, top = 40.0, 18.0, 178.0, 16.0
    width, height = left + nb * cw + 12, top + na * ch + 46
    values = [[_float(grid[i][j]) for j in range(nb)] for i in range(na)]
    fail = [
        [v is not None and not bool(infinite[i][j]) and v > 1.0 for j, v in enumerate(row)]
        for i, row in enumerate(values)
    ]

    def cell_x(j: int) -> float:
        return left + j * cw

    def cell_y(i: int) -> float:
        return top + (na - 1 - i) * ch

    n_fail = sum(map(sum, fail))
    n_inf = sum(bool(infinite[i][j]) for i in range(na) for j in range(nb))
    finite = [v for i, row in enumerate(values) for j, v in enumerate(row) if v is not None and not infinite[i][j]]
    largest = max(finite) if finite else None
    desc = (
        f"{label}: T divided by its critical value at {na} values of alpha ({_format_number(alphas[0])} to "
        f"{_format_number(alphas[-1])}, rows) and {nb} values of beta ({_format_number(betas[0])} to {_format_number(betas[-1])}, columns). "
        f"{n_fail} of {na * nb} points exceed 1 (the check fails there); {n_inf} are infinite (an empty cell); "
        f"the largest finite value is {_format_number(largest)}."
    )
    chart = _chart(chart_id, width, height, f"Divergence map of the {label.lower()}", desc)
    chart["cls"] = "heat"
    rows_table = []
    for i in range(na):
        row_cells = []
        for j in range(nb):
            v = values[i][j]
            x0, y0 = cell_x(j), cell_y(i)
            if infinite[i][j]:
                cls, shown = "hinf", "∞"
                chart["texts"].append(
                    {"x": x0 + cw / 2, "y": y0 + ch / 2 + 4, "text": "∞", "cls": "sym", "anchor": "middle"}
                )
            elif v is None:
                cls, shown = "hna", "n/a"
                chart["texts"].append(
                    {"x": x0 + cw / 2, "y": y0 + ch / 2 + 4, "text": "–", "cls": "sym", "anchor": "middle"}
                )
            else:
                cls, shown = _heat_class(v), _format_number(v)
            chart["rects"].append({"x": x0, "y": y0, "w": cw, "h": ch, "cls": cls})
            row_cells.append({"text": shown, "fail": fail[i][j]})
        rows_table.append({"alpha": _format_number(alphas[i]), "cells": row_cells})
    # edge of the failing region: every side of a failing cell that borders a non-failing one
    segments = []
    for i in range(na):
        for j in range(nb):
            if not fail[i][j]:
                continue
            x0, y0 = cell_x(j), cell_y(i)
            if i + 1 >= na or not fail[i + 1][j]:
                segments.append(f"M{_coord(x0)} {_coord(y0)}H{_coord(x0 + cw)}")
            if i == 0 or not fail[i - 1][j]:
                segments.append(f"M{_coord(x0)} {_coord(y0 + ch)}H{_coord(x0 + cw)}")
            if j == 0 or not fail[i][j - 1]:
                segments.append(f"M{_coord(x0)} {_coord(y0)}V{_coord(y0 + ch)}")
            if j + 1 >= nb or not fail[i][j + 1]:
                segments.append(f"M{_coord(x0 + cw)} {_coord(y0)}V{_coord(y0 + ch)}")
    # a frame around the grid: the lightest cells need no contrast with the page to be seen as part of the map
    chart["paths"].append(
        {
            "d": f"M{_coord(left)} {_coord(top)}H{_coord(left + nb * cw)}V{_coord(top + na * ch)}H{_coord(left)}Z",
            "cls": "frame",
        }
    )
    if segments:
        chart["paths"].append({"d": "".join(segments), "cls": "edge"})
    # axes: alpha ticks on the left, beta ticks below
    for i, a in enumerate(alphas):
        if i % 2 == 0 or na <= 9:
            chart["texts"].append(
                {"x": left - 5, "y": cell_y(i) + ch / 2 + 4, "text": _format_number(a), "cls": "tk", "anchor": "end"}
            )
    for j, b in enumerate(betas):
        if j % 2 == 0 or nb <= 5:
            chart["texts"].append(
                {
                    "x": cell_x(j) + cw / 2,
                    "y": top + na * ch + 14,
                    "text": _format_number(b),
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
        for name, (a, _b) in _MEMBER_POINTS.items():
            if not alphas[0] - 1e-9 <= a <= alphas[-1] + 1e-9:
                continue
            pos = (a - alphas[0]) / step
            cy = top + (na - 1 - pos) * ch + ch / 2
            cx = cell_x(0) + cw / 2
            chart["circles"].append({"cx": cx, "cy": cy, "r": 4.5, "cls": "mem"})
            chart["lines"].append({"x1": left - 50, "y1": cy, "x2": left - 38, "y2": cy, "cls": "lead"})
            chart["texts"].append(
                {"x": left - 53, "y": cy + 3.5, "text": CLASSICAL_MEMBER_LABELS[name], "cls": "mt", "anchor": "end"}
            )
            members_marked.append(name)
    a_max, b_max = _float(check.get("alpha_max")), _float(check.get("beta_max"))
    max_point = None
    if a_max is not None and b_max is not None:
        i = min(range(na), key=lambda k: abs(alphas[k] - a_max))
        j = min(range(nb), key=lambda k: abs(betas[k] - b_max))
        cx, cy = cell_x(j) + cw / 2, cell_y(i) + ch / 2
        chart["paths"].append(
            {
                "d": f"M{_coord(cx)} {_coord(cy - 7)}L{_coord(cx + 7)} {_coord(cy)}L{_coord(cx)} {_coord(cy + 7)}L{_coord(cx - 7)} {_coord(cy)}Z",
                "cls": "mx",
            }
        )
        max_point = {"alpha": _format_number(a_max), "beta": _format_number(b_max)}
    return {
        "chart": chart,
        "table": {"betas": [_format_number(b) for b in betas], "rows": rows_table},
        "n_fail": n_fail,
        "n_inf": n_inf,
        "n_points": na * nb,
        "largest": largest,
        "max_point": max_point,
        "members_marked": [CLASSICAL_MEMBER_LABELS[m] for m in members_marked],
        "bins": _heat_legend(),
        "scale_words": HEAT_SCALE_WORDS,
    }


def _heat_legend() -> list[dict]:
    edges = (None,) + HEAT_BINS + (None,)
    out = []
    for k in range(len(HEAT_BINS) + 1):
        lo, hi = edges[k], edges[k + 1]
        if lo is None:
            text = f"≤ {_format_number(hi)}"
        elif hi is None:
            text = f"> {_format_number(lo)}"
        else:
            text = f"{_format_number(lo)} – {_format_number(hi)}"
        out.append({"cls": f"h{k + 1}", "text": text, "fails": lo is not None and lo >= 1.0})
    return out


#: How the heat map's colours read, for its legend.
HEAT_SCALE_WORDS = (
    "Blues below the critical value, orange to red above it; the further from the critical value, the darker "
    "(in greyscale too), and the heavy outline marks where the check fails."
)


def _histogram(check: Mapping[str, Any], chart_id: str, label: str) -> dict | None:
    plots = check.get("plots") or {}
    edges, counts = plots.get("hist_edges"), plots.get("hist_counts")
    if not edges or not counts:
        return None
    density = plots.get("hist_density")
    total = sum(counts) or 1
    observed = [c / (total * (edges[k + 1] - edges[k])) for k, c in enumerate(counts)]
    theory = [_float(d) or 0.0 for d in density] if density else None
    top_value = max(observed + (theory or [])) * 1.1 or 1.0
    width, height = 420.0, 230.0
    x = _Scale(edges[0], edges[-1], 48, width - 12)
    y = _Scale(0.0, top_value, height - 42, 18)
    desc = (
        f"{label}: observed density of the {total} standardised residuals in {len(counts)} bins from "
        f"{_format_number(edges[0])} to {_format_number(edges[-1])}"
        + (
            ", with the density of the noise law as a line."
            if theory
            else "; the noise law is discrete, so no density is drawn."
        )
    )
    chart = _chart(chart_id, width, height, f"Residual histogram of the {label.lower()}", desc)
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
            {"points": " ".join(f"{_coord(x(c))},{_coord(y(d))}" for c, d in zip(centres, theory)), "cls": "ref"}
        )
    rows = [
        {
            "bin": f"{_format_number(edges[k])} to {_format_number(edges[k + 1])}",
            "count": counts[k],
            "observed": _format_number(observed[k]),
            "noise": _format_number(theory[k]) if theory else "n/a",
        }
        for k in range(len(counts))
        if counts[k] or (theory and theory[k] > 1e-3)
    ]
    return {"chart": chart, "rows": rows, "has_density": bool(theory)}


def _qq(check: Mapping[str, Any], chart_id: str, label: str) -> dict | None:
    plots = check.get("plots") or {}
    theo, samp = plots.get("qq_theoretical"), plots.get("qq_sample")
    if not theo or not samp:
        return None
    pairs = [
        (a, b)
        for a, b in zip((_float(t) for t in theo), (_float(s) for s in samp))
        if a is not None and b is not None and math.isfinite(a) and math.isfinite(b)
    ]
    if not pairs:
        return None
    lo = min(min(p) for p in pairs)
    hi = max(max(p) for p in pairs)
    pad = 0.05 * (hi - lo or 1.0)
    lo, hi = lo - pad, hi + pad
    width, height = 300.0, 260.0
    x = _Scale(lo, hi, 48, width - 12)
    y = _Scale(lo, hi, height - 42, 18)
    desc = f"{label}: {len(pairs)} quantiles of the standardised residuals against the quantiles of the noise law; points on the dashed diagonal mean agreement."
    chart = _chart(chart_id, width, height, f"Q-Q plot of the {label.lower()}", desc)
    ticks = _nice_ticks(lo, hi, 5)
    _axes(chart, x, y, ticks, ticks, "noise-law quantile", "residual quantile")
    chart["lines"].append({"x1": x(lo), "y1": y(lo), "x2": x(hi), "y2": y(hi), "cls": "ref"})
    for a, b in pairs:
        chart["circles"].append({"cx": x(a), "cy": y(b), "r": 2.6, "cls": "pt"})
    rows = [{"theoretical": _format_number(a), "sample": _format_number(b)} for a, b in pairs]
    return {"chart": chart, "rows": rows}


def _acf(check: Mapping[str, Any], chart_id: str, label: str) -> dict | None:
    plots = check.get("plots") or {}
    values = [_float(r) for r in (plots.get("acf") or [])]
    band = _float(plots.get("acf_band"))
    if not values:
        return None
    lim = max([abs(v) for v in values if v is not None] + ([band] if band else []) + [0.2]) * 1.15
    width, height = 420.0, 220.0
    lags = len(values)
    x = _Scale(0.0, lags + 1.0, 48, width - 12)
    y = _Scale(-lim, lim, height - 42, 18)
    outside = sum(1 for v in values if v is not None and band is not None and abs(v) > band)
    desc = f"{label}: autocorrelations of the residuals at lags 1 to {lags}" + (
        f"; dashed lines at ±{_format_number(band)} (approximate 95 % band). {outside} of {lags} lags fall outside it."
        if band
        else "."
    )
    chart = _chart(chart_id, width, height, f"Residual autocorrelations of the {label.lower()}", desc)
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
        rows.append({"lag": k, "value": _format_number(v), "outside": band is not None and abs(v) > band})
    return {"chart": chart, "rows": rows, "band": _format_number(band) if band else "n/a"}


def _history_chart(points: Sequence[dict], chart_id: str) -> dict | None:
    """The standardised maximum over past audits, each point drawn as its verdict symbol."""
    shown = list(points[-26:])
    values = [p["r"] for p in shown if p["r"] is not None]
    if not values:
        return None
    width, height = 460.0, 210.0
    hi = max(values) * 1.15 or 1.0
    x = _Scale(-0.5, len(shown) - 0.5, 48, width - 12)
    y = _Scale(0.0, hi, height - 46, 18)
    desc = (
        f"Standardised maximum R of the deciding check at {len(values)} audits from {shown[0]['as_of']} to {shown[-1]['as_of']}; "
        f"each point is drawn as the symbol of that audit's verdict."
    )
    chart = _chart(chart_id, width, height, "History of the standardised maximum", desc)
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
        run.append(f"{_coord(x(k))},{_coord(y(p['r']))}")
        chart["texts"].append(
            {"x": x(k), "y": y(p["r"]) + 5, "text": p["status"]["symbol"], "cls": "glyph", "anchor": "middle"}
        )
    if len(run) > 1:
        chart["polylines"].insert(0, {"points": " ".join(run), "cls": "line"})
    return {"chart": chart}


# ----------------------------------------------------------------------------------------------
# The run page
# ----------------------------------------------------------------------------------------------
def _meta_view(meta: Mapping[str, Any]) -> dict:
    if not isinstance(meta, Mapping):
        raise InputError(f"render_run: meta must be a dict of run metadata; got {type(meta).__name__}")
    missing = [k for k in _REQUIRED_META if meta.get(k) in (None, "")]
    if missing:
        raise InputError(
            f"render_run: meta lacks {', '.join(missing)}; pass every one of {', '.join(_REQUIRED_META)} (archive_head and previous_run_id are optional)"
        )
    view = {k: _text(meta[k], _SHORT_TEXT) for k in _REQUIRED_META}
    view["archive_head"] = _text(meta.get("archive_head")) or None
    view["previous_run_id"] = _text(meta.get("previous_run_id")) or None
    view["previous_as_of"] = _text(meta.get("previous_as_of")) or None
    scope = meta.get("scope") if isinstance(meta.get("scope"), Mapping) else {}
    view["scope"] = {
        "models_requested": scope.get("models_requested") if isinstance(scope.get("models_requested"), int) else None,
        "registry_models": scope.get("registry_models") if isinstance(scope.get("registry_models"), int) else None,
        "unreadable_sources": [str(u) for u in scope.get("unreadable_sources") or ()],
    }
    view["fleet_trend"] = [
        {"as_of": _text(t.get("as_of")), "passed": int(t["passed"]), "registered": int(t["registered"])}
        for t in meta.get("fleet_trend") or ()
        if isinstance(t, Mapping)
        and isinstance(t.get("passed"), int)
        and isinstance(t.get("registered"), int)
        and t["registered"] > 0
    ]
    view["history_problems"] = [
        {k: _text(p.get(k)) for k in ("run_id", "as_of", "problem")}
        for p in meta.get("history_problems") or ()
        if isinstance(p, Mapping)
    ]
    return view


def _check_models(models: Sequence[Mapping[str, Any]]) -> None:
    seen: dict[str, str] = {}
    for k, m in enumerate(models):
        safe = m.get("safe_id")
        if not isinstance(safe, str) or not SAFE_ID.match(safe):
            raise InputError(
                f"render_run: model #{k} (id {str(m.get('id'))[:80]!r}) has safe_id {str(safe)[:80]!r}, which is not a safe file name "
                f"(pattern {SAFE_ID.pattern}); build the record with fitaudit.tasks.results.model_record from the registry's safe_id"
            )
        if safe.lower() in seen:
            raise InputError(
                f"render_run: models {seen[safe.lower()]!r} and {str(m.get('id'))[:80]!r} share the file name {safe!r} (case-insensitively); safe ids must be unique"
            )
        if m.get("verdict") not in STATUS:
            raise InputError(
                f"render_run: model {str(m.get('id'))[:80]!r} has verdict {m.get('verdict')!r}; expected one of {', '.join(STATUS)}"
            )
        seen[safe.lower()] = str(m.get("id"))[:80]


def _model_link(m: Mapping[str, Any], prefix: str = "models/") -> dict:
    return {"id": _text(m["id"], _SHORT_TEXT), "href": f"{prefix}{m['safe_id']}.html", "safe_id": m["safe_id"]}


def _summary_view(doc: Mapping[str, Any]) -> dict:
    s = doc["summary"]
    counts = [{"key": v, "status": _status(v), "value": s[v]} for v in STATUS]
    total = sum(c["value"] for c in counts)
    registered = s["registered"]
    width = 640.0
    segments, x0 = [], 0.0
    for c in counts:
        if c["value"] and registered:
            w = width * c["value"] / registered
            segments.append({"x": x0, "w": w, "cls": f"f-{c['key']}", "key": c["key"]})
            x0 += w
    adj = s.get("adjustment") or {}
    method = ADJUSTMENT_LABELS.get(adj.get("method"), _text(adj.get("method")))
    bar = _chart(
        "summary-bar",
        width,
        28.0,
        "Verdicts of the registered models",
        "Share of each verdict among the registered models: "
        + "; ".join(f"{c['status']['word']} {c['value']}" for c in counts)
        + ".",
    )
    bar["cls"] = "stack"
    for seg in segments:
        bar["rects"].append({"x": seg["x"], "y": 2.0, "w": max(seg["w"] - 1.5, 0.5), "h": 24.0, "cls": seg["cls"]})
    return {
        "false_flags": _false_flag_sentence(
            s["checks"],
            _float(s.get("expected_false_flags_unadjusted")),
            _float(adj.get("level")),
            adj.get("method"),
            method,
            _float(adj.get("q")),
        ),
        "counts": counts,
        "registered": registered,
        "audited": s["audited"],
        "reconciles": total == registered,
        "checks": s["checks"],
        "expected_false_flags": _float(s.get("expected_false_flags_unadjusted")),
        "level": _float(adj.get("level")),
        "method": method,
        "method_key": adj.get("method"),
        "q": _float(adj.get("q")),
        "bar": bar,
    }


def _false_flag_sentence(
    checks: int, expected: float | None, level: float | None, key: str | None, method: str, q: float | None
) -> str:
    """The expected number of false flags if every model were healthy, and what the adjustment does."""
    text = (
        f"This run scored {checks} checks (the production and refit checks that ran). If every model were healthy, "
        f"about {_format_number(expected)} of them would still fail at the {_format_number(level)} level before any adjustment."
    )
    if key in ("bh", "by"):
        text += (
            f" Verdicts use p-values adjusted across the run with the {method} procedure at q = {_format_number(q)}, which keeps the "
            f"expected share of false flags among the flagged checks at or below {_format_number(None if q is None else 100 * q)} %"
            + (
                ", whatever the dependence between the tests."
                if key == "by"
                else " (for independent or positively dependent tests)."
            )
        )
    elif key == "bonferroni":
        text += f" Verdicts use Bonferroni-adjusted p-values at {_format_number(q)}, which keeps the chance of any false flag in the run at or below {_format_number(q)}."
    else:
        text += (
            " Verdicts use unadjusted p-values, so about that many false flags are to be expected among the exceptions."
        )
    return text


def days_to_act(policy: Mapping[str, Any] | None) -> DaysToAct:
    """The policy's days to act per tier (the schema's defaults for a policy written without them)."""
    given = (policy or {}).get("days_to_act")
    try:
        return DaysToAct.model_validate(dict(given)) if isinstance(given, Mapping) else DaysToAct()
    except ValueError:
        return DaysToAct()


def record_action(m: Mapping[str, Any], policy: Mapping[str, Any] | None, as_of: str) -> dict:
    """What the owner of a model record should do, and by when (:func:`fitaudit.core.verdict.owner_action`).

    The deadline is the as-of date plus the policy's days to act for the model's tier; a refit
    whose check passes with a caution (narrow, or strong reported-only diagnostics) asks for a
    review before approval.  Forecasts made elsewhere (:data:`FORECAST_ACTIONS`) are re-estimated by
    their owner: fitaudit refitted nothing to approve.
    """
    policy = policy or {}
    action = owner_action(
        m["verdict"],
        escalated=bool(m.get("escalated")),
        as_of=as_of,
        days=days_to_act(policy).for_tier(m.get("tier")),
        refit_policy=str(policy.get("refit_policy", "approval")),
        refittable=not is_forecast_record(m),
    )
    if is_forecast_record(m) and m["verdict"] in FORECAST_ACTIONS:  # forecasts made elsewhere: nothing was refitted
        return {**action, "action": FORECAST_ACTIONS[m["verdict"]]}
    if m["verdict"] == "refit" and any(str(r).startswith(CAUTION_PREFIX) for r in m.get("reasons") or ()):
        action["action"] += " The refit check passes with a caution (see the reasons): review it before approving."
    return action


def _tier_legend(policy: Mapping[str, Any] | None) -> str:
    days = days_to_act(policy)
    return (
        "Tier is the model's materiality under the policy, from 1 (most material) to 3. The owner has "
        f"{days.tier_1} days to act on an exception of a tier-1 model, {days.tier_2} of tier 2 and {days.tier_3} of tier 3, "
        "counted from the as-of date; an entry the registry rejected (no tier) gets the shortest."
    )


def _exceptions_view(
    models: Sequence[Mapping[str, Any]], policy: Mapping[str, Any] | None = None, as_of: str = ""
) -> list[dict]:
    rows = []
    for m in sorted(
        (m for m in models if m["verdict"] != "pass"),
        key=lambda m: (m.get("severity", SEVERITY[m["verdict"]]), m["id"]),
    ):
        exc = m.get("exception") or {}
        action = record_action(m, policy, as_of) if as_of else {"action": "", "due": None}
        rows.append(
            {
                "action": _text(action["action"]),
                "due": _text(action["due"]) or None,
                "link": _model_link(m),
                "status": _status(m["verdict"]),
                "owner": _text(m.get("owner"), _SHORT_TEXT),
                "tier": _text(m.get("tier")),
                "since": _text(exc.get("first_seen")),
                "consecutive": exc.get("consecutive"),
                "movement": _MOVEMENT.get(m.get("movement"), _text(m.get("movement"))),
                "escalated": bool(m.get("escalated")),
                "reason": _text(m["reasons"][0], 600) if m.get("reasons") else "No reason was recorded.",
            }
        )
    return rows


def _watch_view(models: Sequence[Mapping[str, Any]]) -> list[dict]:
    """Passing models whose reasons carry a caution (a narrow pass, strong reported-only diagnostics)."""
    rows = []
    for m in models:
        notes = [str(r) for r in m.get("reasons") or () if str(r).startswith(CAUTION_PREFIX)]
        if m["verdict"] == "pass" and notes:
            rows.append(
                {
                    "link": _model_link(m),
                    "owner": _text(m.get("owner"), _SHORT_TEXT),
                    "notes": [_text(n, 600) for n in notes],
                }
            )
    return rows


def _trend_view(trend: Sequence[Mapping[str, Any]], summary: Mapping[str, Any], as_of: str) -> dict | None:
    """The share of passing models at the last audits and now, as one line of text and a small chart."""
    registered = summary.get("registered") or 0
    points = [dict(t) for t in trend] + (
        [{"as_of": as_of, "passed": summary.get("pass", 0), "registered": registered}] if registered else []
    )
    if len(points) < 2:
        return None
    for p in points:
        p["share"] = 100.0 * p["passed"] / p["registered"]
    text = " → ".join(f"{p['as_of']} {p['share']:.0f} %" for p in points)
    width, height, pad = 180.0, 28.0, 4.0
    x = _Scale(0, len(points) - 1, pad, width - pad)
    y = _Scale(0.0, 100.0, height - pad, pad)
    chart = _chart(
        "fleet-trend",
        width,
        height,
        "Share of passing models over the last audits",
        "Share of the registered models that passed, per audit: "
        + "; ".join(f"{p['as_of']}: {p['passed']} of {p['registered']} ({p['share']:.0f} %)" for p in points)
        + ".",
    )
    chart["cls"] = "spark"
    chart["lines"].append({"x1": pad, "y1": y(100.0), "x2": width - pad, "y2": y(100.0), "cls": "gl"})
    chart["polylines"].append(
        {"points": " ".join(f"{_coord(x(k))},{_coord(y(p['share']))}" for k, p in enumerate(points)), "cls": "line"}
    )
    chart["circles"].extend({"cx": x(k), "cy": y(p["share"]), "r": 2.2, "cls": "pt"} for k, p in enumerate(points))
    first, last = points[0], points[-1]
    change = last["share"] - first["share"]
    direction = (
        "unchanged" if abs(change) < 0.5 else f"{'up' if change > 0 else 'down'} {abs(change):.0f} percentage points"
    )
    return {"text": text, "chart": chart, "summary": f"{direction} since {first['as_of']}", "count": len(points)}


def _scope_view(meta: Mapping[str, Any], summary: Mapping[str, Any]) -> str | None:
    """A sentence when p-values were adjusted over a partial run (some models only, or unreadable sources)."""
    scope = meta.get("scope") or {}
    requested, total, unreadable = (
        scope.get("models_requested"),
        scope.get("registry_models"),
        list(scope.get("unreadable_sources") or ()),
    )
    if not requested and not unreadable:
        return None
    parts = []
    if requested:
        parts.append(
            f"only {requested} of the registry's {total} models were audited (--models)"
            if total
            else f"only {requested} models were audited (--models)"
        )
    if unreadable:
        parts.append(
            "the models of the source(s) "
            + ", ".join(_text(u, 80) for u in unreadable)
            + " have no checks, because the sources could not be read"
        )
    return (
        f"This is a partial run: {' and '.join(parts)}. The p-values were adjusted over the {summary.get('checks', 0)} checks that ran, "
        "not over a full run's, so the same model can pass in the full run and be flagged in this one (or the reverse)."
    )


def _history_problems_view(meta: Mapping[str, Any]) -> list[str]:
    """One sentence per earlier audit run whose results could not be used as history."""
    out = []
    for p in meta.get("history_problems") or ():
        if isinstance(p, Mapping):
            out.append(
                f"The audit of {_text(p.get('as_of'), 40)} (run {_text(p.get('run_id'), 80)}) was left out of the models' "
                f"history: {_text(p.get('problem'), 300)}"
            )
    return out


def _movement_view(doc: Mapping[str, Any], models: Sequence[Mapping[str, Any]]) -> dict:
    moves = doc["summary"].get("movement") or {}
    groups = []
    for key in ("new", "persisting", "resolved"):
        members = [dict(_model_link(m), status=_status(m["verdict"])) for m in models if m.get("movement") == key]
        groups.append({"key": key, "label": _MOVEMENT[key], "count": moves.get(key, len(members)), "models": members})
    return {"groups": groups, "steady": moves.get("steady", 0), "first": moves.get("first", 0)}


def _status_row(m: Mapping[str, Any], as_of: str) -> dict:
    past = [h for h in (m.get("history") or []) if h.get("verdict") in STATUS][-(_HISTORY_CELLS - 1) :]
    cells = [None] * (_HISTORY_CELLS - 1 - len(past))
    cells += [{"status": _status(h["verdict"]), "as_of": _text(h.get("as_of"))} for h in past]
    cells.append({"status": _status(m["verdict"]), "as_of": _text(as_of)})
    check = _deciding_check(m.get("audit"))
    ok = _ok(check)
    return {
        "link": _model_link(m),
        "owner": _text(m.get("owner"), 60),
        "status": _status(m["verdict"]),
        "movement": _MOVEMENT.get(m.get("movement"), _text(m.get("movement"))),
        "cells": cells,
        "r_max": check.get("r_max") if ok else None,
        "p_value": check.get("p_value") if ok else None,
        "p_adjusted": check.get("p_adjusted") if ok else None,
    }


# ----------------------------------------------------------------------------------------------
# The model page
# ----------------------------------------------------------------------------------------------
_RESIDUAL_TYPE = {
    "production": "one-step forecast errors of the frozen production parameters over the audit window",
    "refit": "in-sample one-step innovations of the model re-estimated on the fit window",
}


def _rule_view(policy: Mapping[str, Any] | None) -> dict:
    """The run's decision rule in words: how p-values become verdicts under the policy."""
    policy = policy or {}
    method = policy.get("multiple_testing", "bh")
    q = _float(policy.get("fdr_q"))
    return {
        "method": method,
        "label": ADJUSTMENT_LABELS.get(method, _text(method)),
        "q": q,
        "adjusted": method != "none",
    }


def _floor_text(c: Mapping[str, Any]) -> str | None:
    cal = c.get("calibration") or {}
    b = cal.get("replicates")
    if cal.get("method") in ("simulated", "bootstrap") and isinstance(b, int) and b > 0:
        return f"p ≥ {_format_number(1 / (b + 1))} (1 / ({b} + 1): the smallest possible with {b} simulations)"
    return None


def _p_with_floor(c: Mapping[str, Any]) -> str:
    p = _float(c.get("p_distribution"))
    cal = c.get("calibration") or {}
    b = cal.get("replicates")
    if (
        p is not None
        and cal.get("method") in ("simulated", "bootstrap")
        and isinstance(b, int)
        and b > 0
        and p <= (1 / (b + 1)) * (1 + 1e-9)
    ):
        return f"{_format_p(p)} (the smallest possible with {b} simulations: the true p-value may be smaller)"
    return _format_p(p)


def _gate_threshold(c: Mapping[str, Any]) -> str:
    level = _float(c.get("settings_level"))
    return (
        "n/a"
        if level is None
        else f"fails at p ≤ {_format_number(level / 2)} (level {_format_number(level)} split over the two gates)"
    )


def _plain_effects(c: Mapping[str, Any]) -> str:
    """The errors' sizes in plain units (production check)."""
    e = c.get("effects") or {}
    parts = []
    ratio = _float(e.get("variance_ratio"))
    if ratio is not None:
        parts.append(
            f"errors {_format_number(ratio, 2)} times as variable as the production model assumes (variance ratio)"
        )
    for sizes, when in ((e, ""), (e.get("since") or {}, (e.get("since") or {}).get("date"))):
        pct, sd = _float(sizes.get("bias_pct")), _float(sizes.get("bias_sd"))
        if pct is None and sd is None:
            continue
        since = f" since {_text(when)}" if when else " over the window"
        if pct is not None:
            side = "high" if pct > 0 else "low"
            parts.append(
                f"forecasts {_format_number(abs(pct), 2)} % too {side}{since}"
                + (f" ({_format_number(abs(sd), 2)} standard deviations)" if sd is not None else "")
            )
        else:
            side = "high" if sd < 0 else "low"
            parts.append(f"forecasts {_format_number(abs(sd), 2)} standard deviations too {side}{since}")
    return "; ".join(parts) or "n/a"


def _check_rows(
    production: Mapping[str, Any] | None, refit: Mapping[str, Any] | None, policy: Mapping[str, Any] | None = None
) -> list[dict]:
    """The side-by-side table of the two checks: one row per quantity, one cell per check."""
    checks = [production, refit]
    rule = _rule_view(policy)

    def cell(check, fn):
        if check is None:
            return "not run (no production version)"
        if not _ok(check):
            return "—"
        try:
            return fn(check)
        except (KeyError, TypeError):
            return "n/a"

    def noise_text(c):
        noise = c.get("noise") or {}
        parts = [
            f"{k} {_format_number(noise.get(k), 4)}" for k in ("loc", "scale", "shape") if noise.get(k) is not None
        ]
        est = noise.get("estimated") or []
        return (
            f"{_text(noise.get('law'))}: "
            + ", ".join(parts)
            + (f" (estimated: {', '.join(map(str, est))})" if est else " (fixed)")
        )

    def lb_text(d):
        return f"Q {_format_number(d.get('statistic'))} on {d.get('lags')} lags, df {d.get('df')}"

    def gate_text(c):
        gate = c.get("gate") or {}
        members = ", ".join(_member_label(a, b) for a, b in gate.get("members") or [])
        parts = ", ".join(f"{_text(p.get('kind'))} ({p.get('cells')} cells)" for p in gate.get("partitions") or [])
        return f"{members} on {parts}" if members else "n/a"

    def deciding_text(c):
        d = (c.get("gate") or {}).get("deciding") or {}
        if not d:
            return "n/a"
        sentence = _text(d.get("sentence"))
        return f"{sentence[:1].upper()}{sentence[1:]} ({_text(d.get('kind'))} cells)"

    def partition_text(c):
        rows = (c.get("gate") or {}).get("partitions") or []
        return "; ".join(f"{_text(p.get('kind'))} {_format_number(p.get('standardised'))}" for p in rows) or "n/a"

    def window_text(c):
        w, e = c.get("window") or {}, c.get("effects") or {}
        if e.get("start") and e.get("end"):
            return f"{_text(e['start'])} to {_text(e['end'])} ({w.get('length', c.get('n'))} observations)"
        return (
            f"observations {w.get('first')}–{w.get('last')} of the series ({w.get('length')} observations)"
            if w
            else "n/a"
        )

    def reference_text(c):
        cal = c.get("calibration") or {}
        method, b = cal.get("method"), cal.get("replicates")
        law = _text((c.get("noise") or {}).get("law"))
        if method == "simulated":
            how = (
                "with its noise parameters re-estimated in each"
                if c.get("kind") == "refit"
                else "with the frozen production parameters"
            )
            return f"{_count(b)} simulated data sets of {c.get('n')} residuals from the {law} law, {how}"
        if method == "bootstrap":
            return f"{_count(b)} parametric bootstrap series of the fitted model, each refitted and rescored"
        return f"chi-square({_count(c.get('cells'))} − 1) limits (asymptotic screen)"

    def adjusted_text(c):
        if not rule["adjusted"]:
            return "not adjusted (the run's rule: each gate on its own level)"
        p = _float(c.get("p_adjusted"))
        if p is None or rule["q"] is None:
            return _format_p(p)
        verdict = "fails" if p <= rule["q"] else "passes"
        return f"{_format_p(p)} (the run's rule: the check fails at ≤ q = {_format_number(rule['q'])}, {rule['label']}; it {verdict})"

    def status_text(c):
        if c is None:
            return "not run (no production version)"
        if c.get("status") == "ok":
            return "ran"
        return _text(c.get("status", "n/a")) + (f": {_text(c.get('message'))}" if c.get("message") else "")

    rows = [
        {"label": "Status", "key": "status", "cells": [status_text(c) for c in checks]},
        {
            "label": "Residual type",
            "key": "residual_type",
            "cells": [("—" if c is None else _RESIDUAL_TYPE.get(c.get("kind"), "n/a")) for c in checks],
        },
    ]
    specs = [
        ("Window", "window", window_text),
        (
            "In plain words",
            "plain",
            lambda c: (
                _plain_effects(c) if c.get("kind") == "production" else "residuals of the model refitted to these data"
            ),
        ),
        ("Residuals n", "n", lambda c: str(c["n"])),
        ("Cells s", "cells", lambda c: str(c["cells"])),
        ("Estimated noise parameters k", "k", lambda c: str(c["k"])),
        ("Noise law", "noise", noise_text),
        ("Calibration", "calibration", lambda c: _text((c.get("calibration") or {}).get("method"))),
        ("Replicates", "replicates", lambda c: _count((c.get("calibration") or {}).get("replicates"))),
        ("Null reference", "reference", reference_text),
        ("Distribution gate: members on partitions", "gate", gate_text),
        ("Largest statistic of the map T_max (equiprobable cells)", "t_max", lambda c: _format_number(c.get("t_max"))),
        ("Standardised maximum R of the gate", "r_max", lambda c: _format_number(c.get("r_max"))),
        ("Largest standardised value per partition", "partitions", partition_text),
        ("Cells that depart most", "deciding", deciding_text),
        (
            "Deciding point (α, β)",
            "argmax",
            lambda c: f"α {_format_number(c.get('alpha_max'))}, β {_format_number(c.get('beta_max'))}",
        ),
        (
            "T there / its critical value",
            "t_at_max",
            lambda c: f"{_format_number(c.get('t_at_max'))} / {_format_number(c.get('critical_value'))}",
        ),
        ("p, distribution gate", "p_distribution", _p_with_floor),
        (
            "Smallest possible p of the distribution gate",
            "floor",
            lambda c: _floor_text(c) or "none: the p-value is not simulated",
        ),
        ("Ljung-Box", "ljung_box", lambda c: lb_text(c.get("ljung_box") or {})),
        ("p, independence gate (Ljung-Box)", "p_independence", lambda c: _format_p(c.get("p_independence"))),
        ("Threshold of each gate (unadjusted)", "gate_threshold", _gate_threshold),
        (
            "McLeod-Li (squared residuals, reported)",
            "mcleod_li",
            lambda c: lb_text(c.get("mcleod_li") or {}) + f", p {_format_p((c.get('mcleod_li') or {}).get('p_value'))}",
        ),
        ("p, check (Bonferroni over the two gates)", "p_value", lambda c: _format_p(c.get("p_value"))),
        ("p, adjusted across the run", "p_adjusted", adjusted_text),
        ("Effect: T_max / 2n", "effect_divergence", lambda c: _format_number(c.get("effect_divergence"))),
        ("Effect: largest |autocorrelation|", "effect_acf", lambda c: _format_number(c.get("effect_acf"))),
    ]
    for label, key, fn in specs:
        rows.append({"label": label, "key": key, "cells": [cell(c, fn) for c in checks]})
    return rows


def _member_label(alpha: float, beta: float) -> str:
    """A gate member in words: its classical name when it has one, else its (alpha, beta)."""
    for name, (a, b, _) in CLASSICAL_MEMBERS.items():
        if math.isclose(a, alpha, abs_tol=1e-9) and math.isclose(b, beta, abs_tol=1e-9):
            return CLASSICAL_MEMBER_LABELS.get(name, name)
    return f"α {_format_number(alpha)}, β {_format_number(beta)}"


def _members_rows(check: Mapping[str, Any]) -> list[dict]:
    rows = []
    for name, entry in (check.get("members") or {}).items():
        a, b = _MEMBER_POINTS.get(name, (None, None))
        rows.append(
            {
                "name": CLASSICAL_MEMBER_LABELS.get(name, _text(name)),
                "alpha": "5/3" if name == "cressie-read-2/3" else _format_number(a),
                "beta": _format_number(b),
                "statistic": _format_number((entry or {}).get("statistic")),
                "p": _format_p((entry or {}).get("p_value_chi2")),
            }
        )
    return rows


def _check_view(check: Mapping[str, Any] | None, kind: str, label: str | None = None) -> dict | None:
    if not _ok(check):
        return None
    label = label or {"production": "Production check", "refit": "Refit check"}[kind]
    n = check.get("n") or 0
    s = check.get("cells") or 0
    counts = check.get("counts") or []
    return {
        "kind": kind,
        "label": label,
        "map": _heatmap(check, f"map-{kind}", label) if check.get("map") else None,
        "hist": _histogram(check, f"hist-{kind}", label),
        "qq": _qq(check, f"qq-{kind}", label),
        "acf": _acf(check, f"acf-{kind}", label),
        "members": _members_rows(check),
        "cells": [
            {"cell": k + 1, "observed": c, "expected": _format_number(n / s if s else None)}
            for k, c in enumerate(counts)
        ],
    }


def _params_rows(audit: Mapping[str, Any]) -> list[dict]:
    prod = audit.get("production_params") or {}
    fitted = (audit.get("fitted") or {}).get("params") or {}
    names = list(prod) + [k for k in fitted if k not in prod]
    rows = []
    for name in names:
        a, b = _float(prod.get(name)), _float(fitted.get(name))
        rows.append(
            {
                "name": _text(name, _SHORT_TEXT),
                "production": _format_number(a, 4) if name in prod else "—",
                "refit": _format_number(b, 4) if name in fitted else "—",
                "change": _format_number(b - a, 3)
                if a is not None and b is not None and math.isfinite(a) and math.isfinite(b)
                else "—",
            }
        )
    return rows


def _change_view(audit: Mapping[str, Any]) -> dict | None:
    change = audit.get("change")
    if not change:
        return None
    before, after = change.get("before") or [], change.get("after") or []
    production = audit.get("production") or {}
    return {
        "index": change.get("index"),
        "statistic": _format_number(change.get("statistic")),
        "p": _format_p(change.get("p_value")),
        "permutations": change.get("permutations"),
        "cells": change.get("cells"),
        "window": production.get("window") or {},
        "date": _text(((production.get("effects") or {}).get("since") or {}).get("date")) or None,
        "window_dates": (
            _text((production.get("effects") or {}).get("start")) or None,
            _text((production.get("effects") or {}).get("end")) or None,
        ),
        "rows": [
            {"cell": k + 1, "before": _format_number(b), "after": _format_number(a)}
            for k, (b, a) in enumerate(zip(before, after))
        ],
    }


_CANDIDATE_COLUMNS = {
    "spec_text": "Specification",
    "noise": "Noise law",
    "verdict": "Verdict",
    "passed": "Map passes",
    "scaled_max": "Largest T / critical value",
    "r_max": "R",
    "p_value": "p",
    "aic": "AIC",
    "reason": "Reason",
}


def _candidate_cell(key: str, value: Any) -> str:
    if key == "verdict" and value in STATUS:
        return " ".join(STATUS[value])
    if key == "p_value":
        return _format_p(value)
    return _value_text(value)


def _candidates_view(candidates: Sequence[Mapping[str, Any]] | None) -> dict | None:
    """The candidate list as a table: known fields first, in a fixed order, then any others."""
    if candidates is None:
        return None
    present = {k for c in candidates for k in c}
    keys = [k for k in _CANDIDATE_COLUMNS if k in present]
    keys += sorted(k for k in present if k not in _CANDIDATE_COLUMNS and not (k == "spec" and "spec_text" in present))
    return {
        "columns": [_CANDIDATE_COLUMNS.get(k) or _text(k.replace("_", " "), 60) for k in keys],
        "rows": [[_candidate_cell(k, c.get(k)) for k in keys] for c in candidates],
    }


def _history_view(m: Mapping[str, Any], as_of: str) -> dict:
    points = []
    for h in m.get("history") or []:
        if h.get("verdict") in STATUS:
            points.append(
                {
                    "as_of": _text(h.get("as_of")),
                    "status": _status(h["verdict"]),
                    "r": _float(h.get("r_max")),
                    "p": h.get("p_value"),
                    "current": False,
                }
            )
    check = _deciding_check(m.get("audit"))
    ok = _ok(check)
    points.append(
        {
            "as_of": _text(as_of),
            "status": _status(m["verdict"]),
            "r": _float(check.get("r_max")) if ok else None,
            "p": check.get("p_value") if ok else None,
            "current": True,
        }
    )
    return {"points": points, "chart": _history_chart(points, "history-r")}


def _noise_text(noise: Any) -> str:
    """``normal`` or ``student-t (shape 5)`` from the registry's ``{"law", "shape"}``."""
    if isinstance(noise, Mapping):
        shape = noise.get("shape")
        return _text(noise.get("law")) + ("" if shape is None else f" (shape {_format_number(shape, 4)})")
    return _text(noise)


_LINEAGE_LABELS = {
    "source": "Source",
    "series": "Series key",
    "value": "Target column",
    "exogenous": "Input columns",
    "extract_digest": "Extract SHA-256 (all files read)",
    "extract_rows": "Rows in the extract",
    "extract_files": "Files in the extract",
    "rows_loaded": "Observations of this series loaded",
    "first": "First observation used",
    "last": "Last observation used",
    "fit_window": "Fit window (observations)",
    "audit_window": "Audit window (observations)",
    "audit_first": "First observation of the audit window",
}
_SETTING_LABELS = {
    "level": "Level of each check",
    "calibration": "Calibration",
    "replicates": "Simulated data sets per null table",
    "bootstrap_replicates": "Bootstrap replicates",
    "seed": "Seed of every simulation",
    "audit_window": "Audit window (observations)",
    "fit_window": "Fit window (observations)",
    "lb_lags": "Ljung-Box lags",
    "change_permutations": "Permutations of the change search",
    "locate_change": "Locate a change when the production check fails",
    "practical_divergence": "Practical threshold of T_max / 2n",
    "practical_acf": "Practical threshold of the largest |autocorrelation|",
    "alphas": "α grid of the map",
    "betas": "β grid of the map",
    "scaling": "Scaling mean",
    "partitions": "Partitions of the distribution gate",
    "gate_members": "Members of the distribution gate",
    "r": "Critical value r of the standardised maximum",
    "days_to_act": "Days to act on an exception",
    "persistence": "Escalation: refits in the last audits",
    "multiple_testing": "p-value adjustment across the run",
    "fdr_q": "Level q of the adjusted p-values",
    "refit_policy": "Promotion of refitted parameters",
    "justification": "Justification",
    "approved_by": "Approved by",
}
_NONE_MEANS = {
    "fit_window": "the whole series loaded",
    "lb_lags": "automatic (min(10, n/5), or twice the season)",
    "r": "simulated for each table",
    "practical_divergence": "none",
    "practical_acf": "none",
}


def _labelled_rows(
    mapping: Mapping[str, Any] | None, labels: Mapping[str, str], skip: Sequence[str] = ()
) -> list[dict]:
    """Key-value rows for a reviewer: known keys in words, registry bookkeeping (line numbers) left out."""
    rows = []
    for key, value in (mapping or {}).items():
        if key in skip or key == "line":
            continue
        label = labels.get(key) or _text(str(key).replace("_", " "), 80).capitalize()
        if key == "gate_members" and isinstance(value, (list, tuple)):
            shown = ", ".join(_member_label(float(a), float(b)) for a, b in value)
        elif key == "persistence" and isinstance(value, Mapping):
            shown = f"{value.get('k')} of the last {value.get('n')} audits with a refit escalate to respecify"
        elif key == "days_to_act" and isinstance(value, Mapping):
            shown = ", ".join(f"tier {str(t).rsplit('_', 1)[-1]}: {d} days" for t, d in value.items())
        elif key == "multiple_testing":
            shown = ADJUSTMENT_LABELS.get(value, _text(value))
        elif value is None and key in _NONE_MEANS:
            shown = _NONE_MEANS[key]
        else:
            shown = _value_text(value)
        rows.append({"key": label, "value": shown})
    return rows


def _tier_text(tier: Any) -> str:
    if isinstance(tier, int) and not isinstance(tier, bool):
        return f"{tier} (materiality: 1 most material, 3 least)"
    return "not recorded"


#: What a forecast entry's page says first: fitaudit audited stated forecasts and refitted nothing.
NOT_REFITTED_PAGE = (
    "This model was not refitted by fitaudit; its forecasts were audited against their stated uncertainty."
)
_FORECAST_CHECK = "Forecast check"
#: What the owner of forecasts made elsewhere should do after a failing audit (fitaudit refits nothing).
FORECAST_ACTIONS = {
    "refit": "Re-estimate the model that issues these forecasts so that they match their stated uncertainty again "
    "(fitaudit does not refit it); the next audit checks the new forecasts.",
    "respecify": "The forecasts failed audit after audit: review how they are made (the method, not only its parameters) "
    "and have the change validated.",
}
_FORECAST_RESIDUALS = (
    "normal scores of the PIT values: each actual of the audit window under the predictive distribution stated "
    "for it before it was observed"
)


def _accuracy_rows(acc: Mapping[str, Any]) -> list[dict]:
    """A forecast audit's accuracy figures in words (reported beside calibration, never a verdict)."""
    if not acc:
        return []
    rows = []
    if acc.get("error"):
        rows.append({"key": "Accuracy", "value": _text(acc["error"], 600)})
    if "mase" in acc:
        value = (
            _format_number(acc.get("mase"))
            if acc.get("mase") is not None
            else f"n/a ({_text(acc.get('mase_note'), 400)})"
        )
        rows.append(
            {
                "key": "Mean absolute scaled error (MASE)",
                "value": (
                    f"{value}: mean absolute error of the point forecast ({_text(acc.get('point'))}) over that of the one-step "
                    f"seasonal naive forecast in the {_text(acc.get('mase_scale_from'))}; below 1 is better than the naive forecast "
                    "(Hyndman and Koehler 2006)"
                ),
            }
        )
    if "mae" in acc:
        rows.append({"key": "Mean absolute error", "value": _format_number(acc.get("mae"), 4)})
    if "crps" in acc:
        rows.append(
            {
                "key": "Continuous ranked probability score (CRPS, mean)",
                "value": (
                    f"{_format_number(acc.get('crps'), 4)} ({_text(acc.get('crps_method'))}; smaller is better, in the units of the series)"
                ),
            }
        )
    if "crps_naive" in acc:
        rows.append(
            {
                "key": "CRPS of the naive forecast",
                "value": (
                    f"{_format_number(acc.get('crps_naive'), 4)} ({_text(acc.get('naive'), 600)})"
                    if acc.get("crps_naive") is not None
                    else f"n/a ({_text(acc.get('naive'), 600)})"
                ),
            }
        )
    if "crps_skill" in acc:
        rows.append(
            {
                "key": "CRPS skill",
                "value": (
                    f"{_format_number(acc.get('crps_skill'))} (1 − CRPS / CRPS of the naive forecast: above 0 the stated distributions "
                    "beat the naive one, 0 ties, below 0 loses)"
                ),
            }
        )
    return rows


def _forecast_rows(check: Mapping[str, Any]) -> dict[str, str]:
    """What some rows of the checks table mean for a forecast check, by row key."""
    noise = check.get("noise") or {}
    mean, sd = _float(noise.get("score_mean")), _float(noise.get("score_sd"))
    scores = (
        f"mean {_format_number(mean, 2)} and standard deviation {_format_number(sd, 2)} (0 and 1 when the stated laws are "
        "right: a positive mean means forecasts too low, a standard deviation above 1 a stated uncertainty too narrow)"
        if mean is not None and sd is not None
        else "n/a"
    )
    cal = check.get("calibration") or {}
    return {
        "residual_type": _FORECAST_RESIDUALS,
        "plain": f"the normal scores have {scores}",
        "k": "0 (nothing is estimated: the predictive laws were stated before the data)",
        "noise": f"standard normal scores of the PIT values (stated: {_text(noise.get('stated'))})",
        "reference": (
            f"{_count(cal.get('replicates'))} simulated sets of {check.get('n')} independent uniform PIT values (the stated laws "
            "are fixed before the data, so this null is exact)"
            if cal.get("method") == "simulated"
            else _text(cal.get("method"))
        ),
    }


def _forecast_view(m: Mapping[str, Any], view: dict) -> dict | None:
    """A forecast entry's page (forecasts made elsewhere): the statement audited, the accuracy, one
    check in place of two, and what the model's identity rows mean for it; None for a fitted model.

    Adjusts ``view`` (from :func:`_model_view`) in place: the identity rows name the statement and
    the stated law, the checks table has one column, the charts are labelled as the forecast check.
    """
    stated = m.get("forecasts")
    if stated is None:
        return None
    audit = m.get("audit") or {}
    levels = sorted(float(k) for k in (stated.get("quantiles") or {}))
    law = (
        "predictive quantiles at levels " + ", ".join(_format_number(x) for x in levels)
        if levels
        else _noise_text(stated.get("noise") or {"law": "normal", "shape": None})
    )
    replace = {
        "Model spec": ("Forecasts stated", _text(m.get("spec_text"))),
        "Noise law": ("Stated predictive law", law),
        "Production version": (
            "Production version",
            "none: the forecasts are made elsewhere and fitaudit holds no parameters of the model",
        ),
    }
    view["identity"] = [
        {"key": replace[r["key"]][0], "value": replace[r["key"]][1]} if r["key"] in replace else r
        for r in view["identity"]
    ]
    if view.get("audit"):
        production = audit.get("production")
        said = _forecast_rows(production) if _ok(production) else {}
        rows = []
        for r in view["audit"]["check_rows"]:
            cells = r["cells"][:1]
            if r["key"] in said:
                cells = [said[r["key"]]]
            rows.append({**r, "cells": cells})
        view["audit"]["check_rows"] = rows
        view["audit"]["checks"] = [c for c in (_check_view(production, "production", _FORECAST_CHECK),) if c]
    return {
        "note": NOT_REFITTED_PAGE,
        "statement": _kv_rows(stated),
        "accuracy": _accuracy_rows(audit.get("accuracy") or {}),
        "label": _FORECAST_CHECK,
    }


def _model_view(m: Mapping[str, Any], as_of: str, policy: Mapping[str, Any] | None = None) -> dict:
    audit = m.get("audit")
    pv = m.get("production_version")
    exc = m.get("exception")
    view = {
        "id": _text(m["id"]),
        "id_short": _text(m["id"], _SHORT_TEXT),
        "safe_id": m["safe_id"],
        "status": _status(m["verdict"]),
        "reasons": [_text(r, 4000) for r in m.get("reasons") or []],
        "escalated": bool(m.get("escalated")),
        "movement": _MOVEMENT.get(m.get("movement"), _text(m.get("movement"))),
        "exception": {"first_seen": _text(exc.get("first_seen")), "consecutive": exc.get("consecutive")}
        if exc
        else None,
        "identity": [
            {"key": "Model id", "value": _text(m["id"])},
            {"key": "Owner", "value": _text(m.get("owner"))},
            {"key": "Tier", "value": _tier_text(m.get("tier"))},
            {"key": "Description", "value": _text(m.get("description"))},
            {"key": "Source / series", "value": f"{_text(m.get('source'))} / {_text(m.get('series'))}"},
            {"key": "Model spec", "value": _text(m.get("spec_text"))},
            {"key": "Noise law", "value": _noise_text(m.get("noise"))},
            {
                "key": "Production version",
                "value": (
                    f"{_text(pv.get('version'))} (SHA-256 {_text(pv.get('sha256'))}, created {_text(pv.get('created_at'))})"
                    if pv
                    else "none"
                ),
            },
            {"key": "Last validated", "value": _text(m.get("last_validated")) or "—"},
        ],
        "action": record_action(m, policy, as_of) if m["verdict"] != "pass" else None,
        "lineage": _labelled_rows(m.get("lineage"), _LINEAGE_LABELS),
        "settings": _labelled_rows(m.get("settings"), _SETTING_LABELS),
        "history": _history_view(m, as_of),
        "candidates": _candidates_view(m.get("candidates")),
        "audit": None,
    }
    if audit:
        production, refit = audit.get("production"), audit.get("refit")
        view["audit"] = {
            "has_production": production is not None,
            "check_rows": _check_rows(production, refit, policy),
            "checks": [c for c in (_check_view(production, "production"), _check_view(refit, "refit")) if c],
            "params": _params_rows(audit),
            "fitted": {k: (audit.get("fitted") or {}).get(k) for k in ("loglik", "aic", "bic", "nobs", "converged")},
            "fit_message": _text((audit.get("fitted") or {}).get("message")).rstrip("."),
            "change": _change_view(audit),
        }
    view["forecast"] = _forecast_view(m, view)
    return view


# ----------------------------------------------------------------------------------------------
# Public entry points
# ----------------------------------------------------------------------------------------------
def page_context(doc: Mapping[str, Any], meta: Mapping[str, Any]) -> dict:
    """What every page of a run shows besides its own content: run metadata, as-of date, registry.

    ``doc`` needs only the document's ``schema``, ``schema_version`` and ``run`` (see
    :func:`render_run`; :func:`fitaudit.tasks.results.results_head`).

    Raises
    ------
    InputError
        When ``meta`` lacks a field.
    """
    return {
        "meta": _meta_view(meta),
        "as_of": _text(doc["run"]["as_of"]),
        "caution": CAUTION,
        "statuses": [_status(v) for v in STATUS],
        "registry": {
            "path": _text((doc["run"].get("registry") or {}).get("path")),
            "sha256": _text((doc["run"].get("registry") or {}).get("sha256")),
        },
        "schema": f"{_text(doc.get('schema'))} v{_text(doc.get('schema_version'))}",
        "policy_doc": dict(doc["run"].get("policy") or {}),
    }


def render_model_page(m: Mapping[str, Any], context: Mapping[str, Any], as_of: str) -> bytes:
    """``models/<safe_id>.html`` of one model record (``context`` from :func:`page_context`)."""
    return _render("model.html.j2", {**context, "root": "../", "m": _model_view(m, as_of, context.get("policy_doc"))})


def render_index_page(doc: Mapping[str, Any], context: Mapping[str, Any]) -> bytes:
    """``index.html``: summary, exceptions, movement and every model's status row.

    ``doc["models"]`` may hold :func:`fitaudit.tasks.results.light_record` views instead of the
    full records (the page shows only their headline numbers); they are checked as in
    :func:`render_run`.
    """
    models = doc["models"]
    _check_models(models)
    as_of = context["as_of"]
    return _render(
        "run.html.j2",
        {
            **context,
            "root": "",
            "summary": _summary_view(doc),
            "scope": _scope_view(context["meta"], doc["summary"]),
            "history_problems": _history_problems_view(context["meta"]),
            "exceptions": _exceptions_view(models, doc["run"].get("policy"), as_of),
            "tier_legend": _tier_legend(doc["run"].get("policy")),
            "watch": _watch_view(models),
            "trend": _trend_view(context["meta"]["fleet_trend"], doc["summary"], as_of),
            "movement": _movement_view(doc, models),
            "rows": [_status_row(m, as_of) for m in models],
            "history_cells": _HISTORY_CELLS,
        },
    )


def render_method_page(doc: Mapping[str, Any], context: Mapping[str, Any]) -> bytes:
    """``method.html``: the statistics explained, with the run's policy."""
    return _render(
        "method.html.j2",
        {
            **context,
            "root": "",
            "policy": _labelled_rows(doc["run"].get("policy"), _SETTING_LABELS),
            "heat_bins": _heat_legend(),
            "heat_words": HEAT_SCALE_WORDS,
        },
    )


def render_run(doc: dict, meta: dict) -> dict[str, bytes]:
    """Render every page of an audit run.

    Parameters
    ----------
    doc : dict
        The results document (:func:`fitaudit.tasks.results.build_results`, JSON-ready).
    meta : dict
        Run metadata not in the document: ``run_id``, ``started_utc``, ``finished_utc``,
        ``operator``, ``tool_version``, ``code_commit``, ``prefect_version`` and, optionally,
        ``archive_head`` (the chain hash before this run) and ``previous_run_id``.

    Returns
    -------
    dict of str to bytes
        ``index.html``, ``method.html`` and ``models/<safe_id>.html`` for every model, UTF-8.

    Raises
    ------
    InputError
        When ``meta`` lacks a field, or a model's ``safe_id`` is not a safe, unique file name.

    Notes
    -----
    The audit flow renders the same pages piecewise (:func:`render_model_page` per model as its
    record is made, :func:`render_index_page` from light records), so that a large run never
    holds every page or every full record at once.
    """
    context = page_context(doc, meta)
    pages: dict[str, bytes] = {}
    pages["index.html"] = render_index_page(doc, context)
    pages["method.html"] = render_method_page(doc, context)
    for m in doc["models"]:
        pages[f"models/{m['safe_id']}.html"] = render_model_page(m, context, doc["run"]["as_of"])
    return pages


def render_archive_index(runs: Iterable[Mapping[str, Any]]) -> bytes:
    """Render the archive's index page.

    Parameters
    ----------
    runs : iterable of dict
        :func:`fitaudit.tasks.archive.list_runs` output: ``run_id``, ``path``, ``as_of``, ``time``,
        ``seq``, ``counts`` (the manifest's verdict counts, or None), ``purged``, ``signoffs`` and
        ``manifest_sha256``.

    Returns
    -------
    bytes
        The UTF-8 page (to be written as ``<archive>/index.html``): one row per run, newest first,
        with its counts, sign-offs and a relative link ``runs/<YYYY>/<run-id>/index.html``; purged
        runs and paths not of that form get no link.
    """
    rows = []
    for r in sorted(runs, key=lambda r: r.get("seq") or 0, reverse=True):
        path = str(r.get("path") or "")
        parts = path.split("/")
        linkable = (
            len(parts) == 3
            and parts[0] == "runs"
            and len(parts[1]) == 4
            and parts[1].isdigit()
            and bool(SAFE_ID.match(parts[2]))
            and not r.get("purged")
        )
        counts = r.get("counts") if isinstance(r.get("counts"), Mapping) else {}
        rows.append(
            {
                "run_id": _text(r.get("run_id"), _SHORT_TEXT),
                "href": f"{path}/index.html" if linkable else None,
                "as_of": _text(r.get("as_of")),
                "time": _text(r.get("time")),
                "registered": counts.get("registered"),
                "counts": [counts.get(v) for v in STATUS],
                "purged": bool(r.get("purged")),
                "signoffs": [
                    f"{_text(s.get('name'), 80)} ({_text(s.get('role'), 80)}, {_text(s.get('time'))})"
                    for s in r.get("signoffs") or []
                ],
                "manifest": _text(r.get("manifest_sha256"))[:16],
            }
        )
    return _render(
        "archive_index.html.j2",
        {"runs": rows, "caution": CAUTION, "statuses": [_status(v) for v in STATUS], "root": ""},
    )
