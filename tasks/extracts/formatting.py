"""Formatting of timestamps and listings in the extract messages."""

from __future__ import annotations

from collections.abc import Iterable
from typing import Any

import numpy as np

__all__: list[str] = []

_SHOW = 5  # timestamps / keys quoted in one message
_NS = np.dtype("datetime64[ns]")


def _iso(value: np.datetime64, full: bool = False) -> str:
    """ISO 8601: the date alone for midnight (unless ``full``), else to the second."""
    value = np.datetime64(value, "ns")
    if not full and value == value.astype("datetime64[D]"):
        return str(value.astype("datetime64[D]"))
    return str(value.astype("datetime64[s]"))


def _stamps(values: np.ndarray) -> str:
    shown = ", ".join(_iso(v) for v in values[:_SHOW])
    return shown + (f" (and {values.size - _SHOW} more)" if values.size > _SHOW else "")


def _listing(items: Iterable[Any]) -> str:
    return ", ".join(repr(i) for i in items)
