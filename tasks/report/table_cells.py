"""The data tables' runs of number cells as HTML (the Jinja filters ``num_cells`` and ``map_cells``).

A model page holds about a thousand table cells (the divergence map's values, the Q-Q pairs, the
histogram, autocorrelation and cell counts).  Written by a template loop, each cell costs several
template steps and a call of autoescape's ``escape``; these filters write a row's cells in one pass
with the same bytes: the texts are escaped exactly as autoescape escapes them
(:func:`~fitaudit.tasks.report.text.escaped`).  The rows' other parts stay in the template.
"""

from __future__ import annotations

from collections.abc import Iterable
from typing import Any

import markupsafe

from .text import escaped

__all__ = ["map_cells", "num_cells"]


def num_cells(texts: Iterable[Any]) -> markupsafe.Markup:
    """``<td class="n">text</td>`` for each text of a row (Jinja filter ``num_cells``).

    >>> str(num_cells(["1.5", "< 0.001", 3]))
    '<td class="n">1.5</td><td class="n">&lt; 0.001</td><td class="n">3</td>'
    """
    return markupsafe.Markup("".join(f'<td class="n">{escaped(t)}</td>' for t in texts))


def map_cells(cells: Iterable[tuple[Any, bool]]) -> markupsafe.Markup:
    """The divergence map table's cells of one row, ``(text, fails)`` pairs: ``<td class="n">`` or,
    where the check fails, ``<td class="n fail">`` (Jinja filter ``map_cells``).

    >>> str(map_cells([("0.5", False), ("1.2", True)]))
    '<td class="n">0.5</td><td class="n fail">1.2</td>'
    """
    return markupsafe.Markup(
        "".join(
            f'<td class="n fail">{escaped(t)}</td>' if fail else f'<td class="n">{escaped(t)}</td>' for t, fail in cells
        )
    )
