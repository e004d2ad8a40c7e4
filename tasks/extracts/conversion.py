"""Arrow columns to numpy (time, values, keys) and the pushed-down scan filter."""

from __future__ import annotations

import datetime as _dt
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.dataset as ds

from fitaudit.core.exceptions import InputError

from ..registry import SourceEntry
from ..uris import filter_expression
from .formatting import _NS

__all__: list[str] = []

_NULL_KEY = "\x00null"  # stands for a null key; registry keys cannot contain NUL


def _plain_type(t: pa.DataType) -> pa.DataType:
    return t.value_type if pa.types.is_dictionary(t) else t


def _to_time(column: pa.ChunkedArray | pa.Array) -> tuple[np.ndarray | None, str, str]:
    """(UTC-naive datetime64[ns] or None, "aware"/"naive", error message)."""
    t = _plain_type(column.type)
    if pa.types.is_dictionary(column.type):
        column = column.cast(t)
    if pa.types.is_timestamp(t):
        kind = "aware" if t.tz else "naive"
    elif pa.types.is_date(t):
        kind = "naive"
    else:
        return None, "", f"has type {t}; expected a timestamp or date column (write it as a Parquet timestamp)"
    try:
        values = column.cast(pa.timestamp("ns"))  # a time-zone-aware column keeps its UTC instants
    except pa.ArrowInvalid as exc:
        return None, kind, f"holds timestamps outside the years 1677-2262 that numpy can represent ({exc})"
    return np.asarray(values.to_numpy(zero_copy_only=False), dtype=_NS), kind, ""


def _to_float(column: pa.ChunkedArray | pa.Array) -> tuple[np.ndarray | None, str]:
    """(float64 values with NaN for nulls, or None and the reason)."""
    t = _plain_type(column.type)
    if pa.types.is_dictionary(column.type):
        column = column.cast(t)
    if pa.types.is_null(t):
        return np.full(len(column), np.nan), ""
    if pa.types.is_integer(t) or pa.types.is_floating(t) or pa.types.is_decimal(t):
        return np.asarray(column.cast(pa.float64()).to_numpy(zero_copy_only=False), dtype=float), ""
    return None, f"has type {t}; expected a numeric column (integer or floating point)"


def _to_seconds(column: pa.ChunkedArray | pa.Array) -> tuple[np.ndarray | None, str]:
    """(seconds since 1970-01-01 UTC as float64 with NaN for nulls, or None and the reason)."""
    t = _plain_type(column.type)
    if pa.types.is_null(t):
        return np.full(len(column), np.nan), ""
    stamps, _kind, why = _to_time(column)
    if stamps is None:
        return None, why
    seconds = stamps.astype("int64") / 1e9
    seconds[np.isnat(stamps)] = np.nan
    return seconds, ""


def _to_keys(column: pa.ChunkedArray | pa.Array) -> tuple[np.ndarray, list[str]]:
    """Keys as text, dictionary-encoded by Arrow: each row's code (an index into the texts) and the
    distinct texts; a null key becomes :data:`_NULL_KEY` (never a registered series).

    Codes, not a numpy array of Python strings: grouping 730,000 rows by key then sorts small
    integers (10 ms) instead of strings (340 ms).
    """
    t = _plain_type(column.type)
    if pa.types.is_dictionary(column.type):
        column = column.cast(t)
    text = pc.fill_null(column.cast(pa.string()), _NULL_KEY)
    encoded = (text.combine_chunks() if isinstance(text, pa.ChunkedArray) else text).dictionary_encode()
    return encoded.indices.to_numpy(zero_copy_only=False), encoded.dictionary.to_pylist()


def _key_values(t: pa.DataType, keys: list[str]) -> pa.Array | None:
    """The requested keys in the key column's type (None: filter after reading instead)."""
    t = _plain_type(t)
    if pa.types.is_string(t) or pa.types.is_large_string(t):
        return pa.array(keys, type=t)
    if pa.types.is_integer(t):
        ints = []
        for k in keys:
            try:
                ints.append(int(k))
            except ValueError:
                continue
        try:
            return pa.array(ints, type=t)
        except (pa.ArrowInvalid, OverflowError):
            return None
    return None


def _time_bound(t: pa.DataType, bound: np.datetime64, upper: bool) -> pa.Scalar | None:
    """A bound in the time column's own type (rounded outwards), or None when not a timestamp."""
    if not pa.types.is_timestamp(t):
        return None
    per_unit = {"s": 10**9, "ms": 10**6, "us": 10**3, "ns": 1}[t.unit]
    ns = int(bound.astype("datetime64[ns]").astype(np.int64))
    value = -(-ns // per_unit) if upper else ns // per_unit
    return pa.scalar(value, type=t)


def _filter(schema: pa.Schema, src: SourceEntry, keys: list[str], start, end) -> ds.Expression | None:
    expr = filter_expression(src.filter)  # the source's own row filter (None: every row)
    values = _key_values(schema.field(src.key).type, keys)
    if values is not None:
        term = pc.field(src.key).isin(values)
        expr = term if expr is None else expr & term
    time_type = _plain_type(schema.field(src.time).type)
    for bound, upper in ((start, False), (end, True)):
        if bound is None:
            continue
        scalar = _time_bound(time_type, bound, upper)
        if scalar is None:
            continue
        term = pc.field(src.time) <= scalar if upper else pc.field(src.time) >= scalar
        term = term | pc.field(src.time).is_null()  # rows without a timestamp reach validation (null-time)
        expr = term if expr is None else expr & term
    return expr


def _as_ns(value: Any, name: str) -> np.datetime64 | None:
    """A UTC-naive datetime64[ns] from a str/date/datetime/np.datetime64 (aware ones go to UTC)."""
    if value is None:
        return None
    if isinstance(value, str):
        try:
            value = _dt.datetime.fromisoformat(value)
        except ValueError:
            raise InputError(f"{name}={value!r} is not an ISO 8601 date or time (e.g. 2026-06-30)") from None
    if isinstance(value, _dt.datetime) and value.tzinfo is not None:
        value = value.astimezone(_dt.UTC).replace(tzinfo=None)
    return np.datetime64(value, "ns")
