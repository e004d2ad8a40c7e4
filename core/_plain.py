"""The one test the JSON conversions share: is a list already plain, so it can be copied whole?

``core/results.py`` (records), ``core/divergence.py`` (map members) and ``tasks/_io.py``
(canonical JSON) each turn numpy values and non-finite floats into strict-JSON values element by
element; a list whose elements need no conversion is copied instead (the render stage's hot path).
"""

from __future__ import annotations

import math

#: Types that every JSON conversion returns unchanged (a finite ``float`` too).
PLAIN_TYPES = frozenset({str, int, bool, type(None)})


def all_plain(values: list | tuple) -> bool:
    """Whether every element is of :data:`PLAIN_TYPES`, or every element is a finite float.

    The floats are tested by their sum, which is finite only if each one is (an infinity stays
    infinite or meets the opposite one and gives NaN, and NaN propagates); a sum that overflows
    answers ``False``, which only costs the element-wise path.

    >>> all_plain([1, "a", None, True]), all_plain([0.5, -2.0]), all_plain([1.0, float("inf")])
    (True, True, False)
    >>> all_plain([1.0, 2]), all_plain([])
    (False, True)
    """
    kinds = set(map(type, values))
    return kinds <= PLAIN_TYPES or (kinds == {float} and math.isfinite(sum(values)))
