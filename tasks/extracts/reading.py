"""Reading the series of a source in one scan, with the disagreements between files reported per series."""

from __future__ import annotations

import os
from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.dataset as ds

from ..registry import SourceEntry
from ..uris import filter_expression
from . import stores
from .conversion import _NULL_KEY, _as_ns, _filter, _to_float, _to_keys, _to_seconds, _to_time
from .formatting import _NS, _SHOW, _iso, _listing
from .records import SeriesData, SeriesProblem
from .stores import _dataset, _File, _inspect_files, _Location, _relative
from .validation import series_problems

__all__ = ["read_series"]


@dataclass
class _Chunk:
    """Rows read from one file (or from the unified scan), normalised."""

    file: str  # relative path, "" for the unified scan
    keys: tuple[np.ndarray, list[str]]  # each row's key code and the keys' texts (conversion._to_keys)
    time: np.ndarray | None
    time_kind: str
    columns: dict  # name -> float64 array, or None when the column is missing/unusable here
    problems: list  # (column, kind, message) applying to every key in the chunk


def _normalise(
    table: pa.Table, src: SourceEntry, columns: list[str], file: str, where: str, times: frozenset = frozenset()
) -> _Chunk:
    keys = _to_keys(table[src.key])
    time, kind, why = _to_time(table[src.time])
    problems = []
    if why:
        problems.append((src.time, "column-type", f"time column {src.time!r} {why}{where}"))
    values = {}
    for name in columns:
        if name not in table.column_names:
            values[name] = None
            problems.append(
                (
                    name,
                    "missing-column",
                    f"column {name!r} is missing{where}; available columns: "
                    f"{_listing(c for c in table.column_names if not c.startswith('__'))}",
                )
            )
            continue
        array, why = _to_seconds(table[name]) if name in times else _to_float(table[name])
        values[name] = array
        if why:
            problems.append((name, "column-type", f"column {name!r} {why}{where}"))
    return _Chunk(file, keys, time, kind, values, problems)


def _agree(files: list[_File], needed: list[str]) -> bool:
    """True when every readable file has every needed column with one type per column."""
    types: dict[str, pa.DataType] = {}
    for f in files:
        for name in needed:
            if name not in f.schema.names:
                return False
            t = f.schema.field(name).type
            if types.setdefault(name, t) != t:
                return False
    return True


def _scan_unified(
    loc: _Location, files: list[_File], src: SourceEntry, keys, columns, start, end, times: frozenset = frozenset()
) -> list[_Chunk]:
    needed = [src.key, src.time] + [c for c in columns if c not in (src.key, src.time)]
    dataset = _dataset(loc, [f.path for f in files])
    table = dataset.to_table(
        columns=needed + ["__fragment_index", "__batch_index"], filter=_filter(files[0].schema, src, keys, start, end)
    )
    order = pc.sort_indices(table, sort_keys=[("__fragment_index", "ascending"), ("__batch_index", "ascending")])
    return [_normalise(table.take(order), src, columns, "", "", times)]


def _scan_file(
    loc: _Location, f: _File, src: SourceEntry, keys, columns, start, end, times: frozenset = frozenset()
) -> _Chunk | None:
    """Read one file on its own (None when it lacks the key or time column)."""
    if src.key not in f.schema.names or src.time not in f.schema.names:
        return None  # reported by the caller as a file whose rows cannot be attributed
    rel = _relative(loc, f.path)
    present = [c for c in dict.fromkeys([src.key, src.time, *columns]) if c in f.schema.names]
    table = _dataset(loc, [f.path]).to_table(columns=present, filter=_filter(f.schema, src, keys, start, end))
    return _normalise(table, src, columns, rel, f" in file {rel!r}", times)


def read_series(
    source: SourceEntry,
    keys: Iterable[Any],
    columns: Iterable[str],
    *,
    start: Any = None,
    end: Any = None,
    base_dir: str | os.PathLike | None = None,
    io_errors: str = "skip",
    times: Iterable[str] = (),
) -> dict[str, SeriesData]:
    """Read the series ``keys`` of a source in one scan and validate each.

    Parameters
    ----------
    source : SourceEntry
        The registry's source entry.
    keys : iterable
        Series keys (compared as text with the key column; integer key columns are matched too).
    columns : iterable of str
        Value and exogenous columns to read (float64); the key and time columns are always read.
    start, end : str, date, datetime or numpy.datetime64, optional
        Inclusive time range (UTC; aware datetimes are converted).
    base_dir : path-like, optional
        Folder that a relative ``source.uri`` resolves against (the registry's folder).
    io_errors : {"skip", "raise"}
        What an ``OSError`` while reading a file does: ``"skip"`` names the file as unreadable and
        goes on with the others; ``"raise"`` lets it propagate, so that a caller can retry a
        transient failure (a network file system, an object store).  Corrupt files that pyarrow
        reports as invalid data are always skipped and named.
    times : iterable of str
        Columns of ``columns`` that hold time stamps (the issue times of forecasts): read as
        seconds since 1970-01-01 UTC (float64, NaN for a missing time; time-zone-aware stamps
        converted to UTC, naive ones taken as UTC); any other type is a ``column-type`` problem.

    Returns
    -------
    dict
        ``{key: SeriesData}`` for every requested key, in the order given; a key absent from the
        source comes back empty with a ``missing-series`` problem.

    Raises
    ------
    ExtractError
        When the source as a whole cannot be read (path missing, no readable Parquet file, key or
        time column absent from every file).
    OSError
        With ``io_errors="raise"``, when a file of the source cannot be read.
    """
    src = source
    keys = [str(k) for k in dict.fromkeys(keys)]
    columns = [c for c in dict.fromkeys(columns) if c not in (src.key, src.time)]
    times = frozenset(times)
    start_ns, end_ns = _as_ns(start, "start"), _as_ns(end, "end")
    loc = stores._locate(src, base_dir, io_errors)
    files = _inspect_files(loc)
    readable = [f for f in files if f.schema is not None]
    skipped = [(_relative(loc, f.path), f.reason) for f in files if f.schema is None]
    for role, name in (("key", src.key), ("time", src.time)):
        if not any(name in f.schema.names for f in readable):
            available = _listing(dict.fromkeys(n for f in readable for n in f.schema.names))
            raise loc.fail(
                f"the {role} column {name!r} is in none of the files (available columns: {available})",
                f"set sources.{src.name}.{role} in the registry to the right column",
            )
    for f in readable:
        if src.key not in f.schema.names or src.time not in f.schema.names:
            skipped.append(
                (_relative(loc, f.path), f"has no {src.key!r} or {src.time!r} column, so its rows cannot be attributed")
            )
    _check_row_filter(loc, readable)
    needed = [src.key, src.time] + columns
    chunks = None
    if _agree(readable, needed):
        try:
            chunks = _scan_unified(loc, readable, src, keys, columns, start_ns, end_ns, times)
        except (pa.ArrowException, OSError) as exc:
            loc.pass_io_error(exc)
            chunks = None  # a file that looked fine fails mid-read: fall back to file by file
    if chunks is None:
        chunks, more_skipped = _scan_file_by_file(loc, readable, src, keys, columns, start_ns, end_ns, times)
        skipped += more_skipped
    missing_everywhere = [c for c in columns if not any(c in f.schema.names for f in readable)]
    return _assemble(src, loc, readable, chunks, keys, columns, start_ns, end_ns, skipped, missing_everywhere)


def _check_row_filter(loc: _Location, readable: list[_File]) -> None:
    """Refuse a row filter that names a column no file has or compares a column with a value of
    another type (an :class:`ExtractError` naming the term and the fix)."""
    src = loc.source
    for column, op, value in src.filter:
        files = [f for f in readable if column in f.schema.names]
        if not files:
            available = _listing(dict.fromkeys(n for f in readable for n in f.schema.names))
            raise loc.fail(
                f"the filter column {column!r} is in none of the files (available columns: {available})",
                f"correct sources.{src.name}.filter in the registry",
            )
        try:
            ds.dataset([], schema=files[0].schema).scanner(filter=filter_expression([(column, op, value)]), columns=[])
        except (pa.ArrowException, TypeError, ValueError) as exc:
            raise loc.fail(
                f"the filter term [{column}, {op}, {value!r}] does not apply to column {column!r} of type "
                f"{files[0].schema.field(column).type} ({exc})",
                f"give sources.{src.name}.filter a value of the column's type",
            ) from None


def _scan_file_by_file(
    loc, readable, src, keys, columns, start, end, times: frozenset = frozenset()
) -> tuple[list[_Chunk], list[tuple[str, str]]]:
    """Chunks of the files read one by one, and the files that failed while being read."""
    chunks, skipped = [], []
    for f in readable:
        try:
            chunk = _scan_file(loc, f, src, keys, columns, start, end, times)
        except (pa.ArrowException, OSError) as exc:
            loc.pass_io_error(exc)
            skipped.append((_relative(loc, f.path), f"failed while reading ({str(exc).splitlines()[0]})"))
            continue
        if chunk is not None:
            chunks.append(chunk)
    return chunks, skipped


def _assemble(
    src, loc, readable, chunks, keys, columns, start, end, skipped, missing_everywhere
) -> dict[str, SeriesData]:
    exogenous = set(src.exogenous)
    per_key: dict[str, list[tuple[_Chunk, np.ndarray]]] = {k: [] for k in keys}
    for chunk in chunks:
        for key, rows in _rows_by_key(*chunk.keys, keys).items():
            per_key[key].append((chunk, rows))
    missing = [k for k in keys if not per_key[k]]
    skipped_paths = {path for path, _ in skipped}
    usable = [f for f in readable if _relative(loc, f.path) not in skipped_paths]
    present_keys = _present_keys(loc, usable, src) if missing else []
    out = {}
    for key in keys:
        if not per_key[key]:
            out[key] = _missing_series(src, loc, key, present_keys, skipped, start, end)
            continue
        out[key] = _series_from_chunks(
            src, key, per_key[key], columns, exogenous, start, end, missing_everywhere, readable
        )
    return out


def _rows_by_key(codes: np.ndarray, names: list[str], wanted: list[str]) -> dict[str, np.ndarray]:
    """Row positions (in stored order) of each wanted key present in a chunk, from its rows' key
    ``codes`` (indices into ``names``)."""
    if not codes.size:
        return {}
    order = np.argsort(codes, kind="stable")
    bounds = np.searchsorted(codes[order], np.arange(len(names) + 1))
    code = {k: i for i, k in enumerate(names)}
    return {k: order[bounds[code[k]] : bounds[code[k] + 1]] for k in wanted if k in code}


def _series_from_chunks(src, key, parts, columns, exogenous, start, end, missing_everywhere, readable) -> SeriesData:
    prefix = f"source {src.name!r}, series {key!r}: "
    problems: list[SeriesProblem] = []
    seen: set[tuple[str | None, str]] = set()
    times, values = [], {c: [] for c in columns}
    kinds: dict[str, list[str]] = {}
    for chunk, rows in parts:
        for column, kind, message in chunk.problems:
            if column in missing_everywhere:
                continue
            if (column, message) not in seen:
                seen.add((column, message))
                whole = column in (src.time,)
                problems.append(
                    SeriesProblem(key, kind, "error", prefix + message + _fix(kind), None if whole else column)
                )
        if chunk.time is None:
            continue
        t = chunk.time[rows]
        keep = ~np.isnat(t)
        if start is not None:
            keep &= t >= start
        if end is not None:
            keep &= t <= end
        nat = int(np.isnat(t).sum())
        if nat:
            problems.append(
                SeriesProblem(
                    key,
                    "null-time",
                    "error",
                    prefix
                    + f"{nat} row(s) have no timestamp"
                    + (f" in file {chunk.file!r}" if chunk.file else "")
                    + "; every row needs a timestamp",
                )
            )
        times.append(t[keep])
        kinds.setdefault(chunk.time_kind, []).append(chunk.file)
        for c in columns:
            col = chunk.columns.get(c)
            values[c].append(col[rows][keep] if col is not None else np.full(int(keep.sum()), np.nan))
    if "aware" in kinds and "naive" in kinds:
        problems.append(
            SeriesProblem(
                key,
                "mixed-timezones",
                "error",
                prefix
                + f"its rows come from files with time-zone-aware timestamps ({_listing(kinds['aware'][:_SHOW])}) and "
                f"from files with naive timestamps ({_listing(kinds['naive'][:_SHOW])}); naive times would be taken as "
                "UTC and may be shifted. Fix: write every file with UTC timestamps (or all naive in one agreed zone).",
            )
        )
    time = np.concatenate(times) if times else np.empty(0, _NS)
    data = {c: (np.concatenate(v) if v else np.empty(0)) for c, v in values.items()}
    for c in missing_everywhere:
        available = _listing(dict.fromkeys(n for f in readable for n in f.schema.names))
        problems.append(
            SeriesProblem(
                key,
                "missing-column",
                "error",
                prefix + f"column {c!r} is in none of the files; "
                f"available columns: {available}. Fix: correct the column name in the registry or add "
                "the column to the extract.",
                c,
            )
        )
        data.pop(c, None)
    flagged = {p.column for p in problems if p.column is not None}  # rows already explained
    clean = {c: v for c, v in data.items() if c not in flagged}
    problems += series_problems(
        key, time, clean, src.frequency, source=src.name, exogenous=exogenous, holidays=src.holidays
    )
    return SeriesData(src.name, key, time, data, tuple(problems))


def _fix(kind: str) -> str:
    return {
        "missing-column": (
            ". Fix: add the column to every file of the extract, or remove it from the models that use it."
        ),
        "column-type": ". Fix: write the column with a numeric (or, for time, timestamp) type in every file.",
    }.get(kind, ".")


def _present_keys(loc: _Location, readable: list[_File], src: SourceEntry) -> list[str]:
    found: set[str] = set()
    for f in readable:
        if src.key not in f.schema.names:
            continue
        try:
            _, names = _to_keys(_dataset(loc, [f.path]).to_table(columns=[src.key])[src.key])
        except (pa.ArrowException, OSError) as exc:
            loc.pass_io_error(exc)
            continue
        found.update(k for k in names if k != _NULL_KEY)
    return sorted(found)


def _missing_series(src, loc, key, present, skipped, start, end) -> SeriesData:
    shown = _listing(present[:10]) + (f" (first 10 of {len(present)})" if len(present) > 10 else "")
    if key in present and (start is not None or end is not None):
        span = (
            f"{_iso(start) if start is not None else 'the first row'} and "
            f"{_iso(end) if end is not None else 'the last row'}"
        )
        what = f"has no rows between {span}"
        fix = "check the as-of date and the windows, or refresh the extract"
    elif key in present:
        what = "has no rows with a usable timestamp"
        fix = "give every row a timestamp in the extract"
    else:
        what = f"is not in source {src.name!r} ({src.uri}); keys present: {shown or 'none'}"
        fix = "correct the model's 'series' in the registry, or add the series to the extract"
    if skipped:
        what += "; these files could not be read and may hold it: " + "; ".join(f"{p}: {r}" for p, r in skipped[:_SHOW])
        fix = "repair or rewrite the unreadable files, or " + fix
    message = f"source {src.name!r}, series {key!r}: {what}. Fix: {fix}."
    return SeriesData(src.name, key, np.empty(0, _NS), {}, (SeriesProblem(key, "missing-series", "error", message),))
