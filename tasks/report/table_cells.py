"""The data tables' rows of number cells as HTML (the Jinja filters ``num_rows`` and ``map_rows``).

A model page holds about a thousand table cells in some two hundred rows (the divergence map's
values, the Q-Q pairs, the histogram and the cell counts).  Written by a template loop, each row
and each cell costs several template steps and a call of autoescape's ``escape``; these filters
write a table's rows in one pass with the same bytes: the texts are escaped exactly as autoescape
escapes them (:func:`~fitaudit.tasks.report.text.escaped`), and each row ends with a newline, as the
loops' rows did.  The tables' captions and headers stay in the template.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from typing import Any

import markupsafe

from .text import escaped

__all__ = ["map_cells", "map_rows", "num_cells", "num_rows"]


def num_cells(texts: Iterable[Any]) -> str:
    """``<td class="n">text</td>`` for each text of a row, escaped.

    >>> num_cells(["1.5", "< 0.001", 3])
    '<td class="n">1.5</td><td class="n">&lt; 0.001</td><td class="n">3</td>'
    """
    return "".join(f'<td class="n">{escaped(t)}</td>' for t in texts)


def map_cells(cells: Iterable[tuple[Any, bool]]) -> str:
    """The divergence map table's cells of one row, ``(text, fails)`` pairs: ``<td class="n">`` or,
    where the check fails, ``<td class="n fail">``, escaped.

    >>> map_cells([("0.5", False), ("1.2", True)])
    '<td class="n">0.5</td><td class="n fail">1.2</td>'
    """
    return "".join(
        f'<td class="n fail">{escaped(t)}</td>' if fail else f'<td class="n">{escaped(t)}</td>' for t, fail in cells
    )


def num_rows(
    rows: Iterable[Any], keys: Sequence[str] | None = None, head: str | None = None, head_class: str = "n"
) -> markupsafe.Markup:
    """Table rows of number cells (Jinja filter ``num_rows``), one ``<tr>...</tr>`` and a newline each.

    Without ``keys`` a row is its cells' texts; with them, a row is a mapping and ``keys`` name its
    cells.  ``head`` names a row's header cell, ``<th scope="row" class="n">`` (``head_class`` "":
    no class).

    >>> str(num_rows([{"cell": 0, "observed": 3, "expected": "2.5"}], ("observed", "expected"), head="cell"))
    '<tr><th scope="row" class="n">0</th><td class="n">3</td><td class="n">2.5</td></tr>\\n'
    >>> str(num_rows([("-1.2", "-1.15")]))
    '<tr><td class="n">-1.2</td><td class="n">-1.15</td></tr>\\n'
    """
    th = '<th scope="row">' if not head_class else f'<th scope="row" class="{escaped(head_class)}">'
    out = []
    for row in rows:
        cells = row if keys is None else [row[k] for k in keys]
        first = "" if head is None else f"{th}{escaped(row[head])}</th>"
        out.append(f"<tr>{first}{num_cells(cells)}</tr>\n")
    return markupsafe.Markup("".join(out))


def map_rows(rows: Iterable[Mapping[str, Any]]) -> markupsafe.Markup:
    """The divergence map table's rows (Jinja filter ``map_rows``): the row's alpha as its header
    cell, then its ``(text, fails)`` cells (:func:`map_cells`), one row and a newline each.

    >>> str(map_rows([{"alpha": "-1", "cells": [("0.5", False), ("1.2", True)]}]))
    '<tr><th scope="row" class="n">-1</th><td class="n">0.5</td><td class="n fail">1.2</td></tr>\\n'
    """
    out = (f'<tr><th scope="row" class="n">{escaped(r["alpha"])}</th>{map_cells(r["cells"])}</tr>\n' for r in rows)
    return markupsafe.Markup("".join(out))
