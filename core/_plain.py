"""The one JSON conversion of records, map members and canonical JSON, and its fast-path test.

:func:`plain_data` turns nested results (dicts, lists, tuples, numpy scalars and arrays) into plain
Python data for strict JSON.  Its three callers differ only in how they write the non-finite floats
and in what they do with other objects:

* ``core/results.py`` (records, the default): NaN as ``None``, infinities as ``"inf"``/``"-inf"``;
* ``core/divergence.py`` (a map's statistics and members): NaN kept, infinities as strings; its
  ``alpha_max``/``beta_max``: NaN as ``None``, infinities kept;
* ``tasks/_io.py`` ``json_ready`` (canonical JSON): NaN as ``"nan"`` and ``strict``: paths and
  dates as strings, anything else JSON cannot hold a ``TypeError``.

A list whose elements need no conversion (:func:`all_plain`) is copied whole: the render stage's
hot path.
"""

from __future__ import annotations

import datetime as _dt
import math
import pathlib
import sys
from typing import Any

__all__ = ["KEEP", "PLAIN_TYPES", "all_plain", "plain_data"]

#: Types that every JSON conversion returns unchanged (a finite ``float`` too).
PLAIN_TYPES = frozenset({str, int, bool, type(None)})


class _Keep:
    """The type of :data:`KEEP`."""

    __slots__ = ()

    def __repr__(self) -> str:
        return "KEEP"


#: As ``nan`` or ``inf`` of :func:`plain_data`: leave those floats as they are.
KEEP = _Keep()


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


def plain_data(value: Any, *, nan: Any = None, inf: Any = ("inf", "-inf"), strict: bool = False) -> Any:
    """``value`` as plain Python data for strict JSON (numpy -> Python, non-finite floats replaced).

    Dicts become dicts with ``str`` keys, lists and tuples lists, numpy arrays nested lists, numpy
    floats, integers and booleans Python ``float``, ``int`` and ``bool``; ``str``, ``int`` (``bool``
    too) and ``None`` are returned as they are.

    Parameters
    ----------
    value : Any
        The data to convert (not modified).
    nan : Any, default None
        What a NaN becomes; :data:`KEEP` leaves the float.
    inf : pair or KEEP, default ("inf", "-inf")
        What ``+inf`` and ``-inf`` become; :data:`KEEP` leaves the floats.
    strict : bool, default False
        False: other objects are returned as they are, and a float subclass (``numpy.float64``)
        becomes a ``float``.  True (canonical JSON): float subclasses are kept (``json`` writes
        them as floats), paths become POSIX strings, dates and datetimes ISO strings, other objects
        with ``tolist`` or ``item`` (not ``bytes``) their result, and anything else raises
        ``TypeError``.

    Returns
    -------
    Any
        New containers throughout; the leaves described above.

    Examples
    --------
    >>> import numpy as np
    >>> x = {"a": (1.5, float("nan")), 2: np.array([np.inf, -np.inf]), "n": np.int64(3)}
    >>> plain_data(x)  # records (core/results.py)
    {'a': [1.5, None], '2': ['inf', '-inf'], 'n': 3}
    >>> plain_data(x, nan="nan", strict=True)  # canonical JSON (tasks/_io.py json_ready)
    {'a': [1.5, 'nan'], '2': ['inf', '-inf'], 'n': 3}
    >>> plain_data([0.5, float("nan"), float("inf")], nan=KEEP)  # map statistics (core/divergence.py)
    [0.5, nan, 'inf']
    >>> plain_data([0.5, float("nan"), float("inf")], inf=KEEP)  # alpha_max, beta_max
    [0.5, None, inf]
    >>> type(plain_data(np.float64(2.5))), type(plain_data(np.float64(2.5), strict=True))
    (<class 'float'>, <class 'numpy.float64'>)
    >>> import pathlib
    >>> plain_data(pathlib.PurePosixPath("a/b")), plain_data(pathlib.PurePosixPath("a/b"), strict=True)
    (PurePosixPath('a/b'), 'a/b')
    >>> plain_data({1, 2}, strict=True)
    Traceback (most recent call last):
    TypeError: cannot serialise set to JSON
    """
    positive, negative = (None, None) if inf is KEEP else inf
    # numpy is looked up, not imported: a numpy value means numpy is loaded, and commands that convert
    # only plain data (verify, signoff, promote: canonical JSON) must not load it (tests/test_startup.py)
    np = sys.modules.get("numpy")

    def nonfinite(f: float) -> Any:
        if math.isnan(f):
            return f if nan is KEEP else nan
        if inf is KEEP:
            return f
        return positive if f > 0 else negative

    def convert(v: Any) -> Any:
        if isinstance(v, float):  # numpy.float64 too
            f = v if strict else float(v)
            return f if math.isfinite(f) else nonfinite(f)
        if isinstance(v, (str, int)) or v is None:  # bool is an int
            return v
        if isinstance(v, dict):
            return {str(k): convert(x) for k, x in v.items()}
        if isinstance(v, (list, tuple)):
            return list(v) if all_plain(v) else [convert(x) for x in v]
        if np is not None:
            if isinstance(v, np.ndarray):
                if v.dtype.kind in "biu" or (v.dtype.kind == "f" and np.isfinite(v).all()):
                    return v.tolist()  # already plain: Python ints, bools or finite floats
                return convert(v.tolist())
            if isinstance(v, np.floating):
                return convert(float(v))
            if isinstance(v, np.integer):
                return int(v)
            if isinstance(v, np.bool_):
                return bool(v)
        if not strict:
            return v
        if hasattr(v, "tolist") and not isinstance(v, bytes):
            return convert(v.tolist())
        if isinstance(v, pathlib.PurePath):
            return v.as_posix()
        if isinstance(v, (_dt.date, _dt.datetime)):
            return v.isoformat()
        if hasattr(v, "item"):
            return convert(v.item())
        raise TypeError(f"cannot serialise {type(v).__name__} to JSON")

    return convert(value)
