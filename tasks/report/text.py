"""Numbers and user text as the report prints them.

The number formatters are the Jinja2 filters ``num``, ``p``, ``px`` and ``count`` (registered by
:mod:`fitaudit.tasks.report.render`); the view builders call them directly.  :func:`user_text`
guards what autoescape cannot: it makes bidirectional and control characters visible and cuts
long values.
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping
from typing import Any

import markupsafe

#: How many characters of an id, owner or table key are shown before the rest is cut.
SHORT_TEXT = 160
#: Characters :func:`user_text` shows as ``[U+XXXX]``: the control characters (Unicode category Cc:
#: U+0000-U+001F and U+007F-U+009F) but tab and newline, the Arabic letter mark, the left-to-right and
#: right-to-left marks, the line and paragraph separators, and the bidirectional embeddings, overrides
#: and isolates (U+202A-U+202E, U+2066-U+2069).
_VISIBLE = re.compile(r"[\x00-\x08\x0b-\x1f\x7f-\x9f\u061c\u200e\u200f\u2028\u2029\u202a-\u202e\u2066-\u2069]")


#: The characters autoescape replaces (markupsafe: ``& < > " '``).
_NEEDS_ESCAPE = re.compile(r"[&<>\"']").search


def escaped(value: Any) -> str:
    """``value`` as autoescape writes it: ``str(markupsafe.escape(value))``, with a shortcut for
    plain text that holds none of ``& < > " '`` (a search is a quarter of escape's cost; the
    report's one escape outside the templates: the ``svg`` and table-cell filters).

    >>> escaped("0.123"), escaped("< 0.001"), escaped(7), escaped(markupsafe.Markup("<b>x</b>"))
    ('0.123', '&lt; 0.001', '7', '<b>x</b>')
    """
    if type(value) is str and _NEEDS_ESCAPE(value) is None:
        return value
    return str(markupsafe.escape(value))


def to_float(x: Any) -> float | None:
    """A number from the document (None, numbers, or the strings "inf", "-inf", "nan")."""
    if type(x) is float:  # the common case (a heat map's cells, a chart's points)
        return None if x != x else x
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


def format_number(x: Any, digits: int = 3) -> str:
    """A number with ``digits`` significant figures (Jinja filter ``num``).

    Fixed notation without trailing zeros, scientific below 1e-4 and from 1e6 on; integers print
    whole, missing values (None, NaN) as ``n/a`` and infinities (also the document's ``"inf"``) as
    ``∞``.
    """
    if type(x) is float:  # the common case, as to_float would take it
        if 1e-4 <= abs(x) < 1e6:
            # printf's %g rounds to `digits` significant figures and strips the trailing zeros: the
            # same text as the fixed notation below whenever it does not switch to an exponent (from
            # 10**digits on), at half the cost (a model page prints about a thousand numbers)
            text = "%.*g" % (digits, x)  # noqa: UP031 (a quarter faster than the f-string with a nested width)
            if "e" not in text:
                return text
        elif x != x:
            return "n/a"
        v = x
    elif isinstance(x, int) and not isinstance(x, bool):
        return str(x)
    else:
        v = to_float(x)
        if v is None:
            return "n/a"
    a = abs(v)
    if 1e-4 <= a < 1e6:  # fixed notation, the common case first
        decimals = max(0, digits - 1 - math.floor(math.log10(a)))
        text = f"{v:.{decimals}f}"
        if "." in text:
            text = text.rstrip("0").rstrip(".")
        return "0" if text in _ZERO_TEXT else text  # a value that rounds to zero prints 0, never -0
    if a == math.inf:
        return "∞" if v > 0 else "-∞"
    if v == 0:
        return "0"
    return f"{v:.{digits - 1}e}"


#: Fixed-notation texts of a value that rounds to zero (trailing zeros stripped).
_ZERO_TEXT = frozenset({"0", "-0"})


def format_p(p: Any) -> str:
    """A p-value with three decimals, ``< 0.001`` below that, ``n/a`` when missing (filter ``p``).

    Three decimals match the resolution of the default 999 simulated replicates, whose smallest
    p-value is 1 / 1000.
    """
    v = to_float(p)
    if v is None:
        return "n/a"
    return "< 0.001" if v < 0.001 else f"{v:.3f}"


def coord(x: float) -> str:
    """An SVG coordinate with at most one decimal."""
    return f"{x:.1f}".removesuffix(".0")


def count_text(x: Any) -> str:
    return "n/a" if x is None else str(x)


def user_text(value: Any, limit: int | None = None) -> str:
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
    shown = _VISIBLE.sub(_code_point, text)
    return f"{shown}… (+{cut} characters)" if cut else shown


def _code_point(match: re.Match) -> str:
    return f"[U+{ord(match.group()):04X}]"


def value_text(value: Any) -> str:
    """A settings/lineage value as short text."""
    if value is None:
        return "—"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, (int, float)):
        return format_number(value, 4)
    if isinstance(value, (list, tuple)):
        if not value:
            return "none"
        if all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in value) and len(value) > 8:
            return f"{len(value)} values from {format_number(value[0], 4)} to {format_number(value[-1], 4)}"
        return ", ".join(value_text(v) for v in value[:20]) + (
            f", … ({len(value) - 20} more)" if len(value) > 20 else ""
        )
    if isinstance(value, Mapping):
        return "; ".join(f"{user_text(k)}: {value_text(v)}" for k, v in value.items())
    return user_text(value)


def kv_rows(mapping: Mapping[str, Any] | None, prefix: str = "", limit: int = 200) -> list[dict]:
    """Flatten nested mappings (and lists of mappings) into ``{"key", "value"}`` rows."""
    rows: list[dict] = []
    for key, value in (mapping or {}).items():
        name = f"{prefix}{key}"
        if isinstance(value, Mapping) and value:
            rows.extend(kv_rows(value, f"{name}.", limit))
        elif isinstance(value, (list, tuple)) and value and all(isinstance(v, Mapping) for v in value):
            for i, item in enumerate(value[:20]):
                rows.extend(kv_rows(item, f"{name}[{i}].", limit))
            if len(value) > 20:
                rows.append({"key": user_text(f"{name}[…]"), "value": f"{len(value) - 20} more entries"})
        else:
            rows.append({"key": user_text(name, SHORT_TEXT), "value": value_text(value)})
        if len(rows) >= limit:
            rows = rows[:limit] + [{"key": "…", "value": "further entries omitted"}]
            break
    return rows
