"""Extracts: reading series from Parquet sources, fingerprinting them, validating every series.

A source (see :class:`~fitaudit.tasks.registry.SourceEntry`) is a Parquet file, a folder of
Parquet files, a hive-partitioned folder, or a URI that :func:`pyarrow.fs.FileSystem.from_uri`
understands (``file://``, ``s3://``, ...); relative paths resolve against the registry's folder.
The data are in long format: one row per (series key, timestamp) with the value and exogenous
columns.

:func:`read_series` scans a source once for all the series (keys) its models need, reading only
the needed columns, with the key filter (and the time range, when the time column is a
timestamp) pushed down to the scan.  Files that cannot be read are skipped and named; the other
files go on.  When the files disagree (a column missing in some, different types, time-zone-aware
timestamps in some and naive in others) they are read one by one and the disagreement is reported
on the series it touches.  Timestamps come back as UTC-naive ``datetime64[ns]``; time-zone-aware
timestamps are converted to UTC, naive ones are taken as they are.

Every series is validated by :func:`series_problems`: duplicate timestamps, rows out of time
order (in the order stored: files in path order, rows in file order), timestamps off the declared
frequency's grid and gaps, NaN/inf or missing target values, missing exogenous values, and (on
request) too few observations.  Each problem names the rows (timestamps and row positions) and the
fix; ``error`` problems become that model's ``error`` verdict, ``insufficient`` ones its
``insufficient`` verdict.  Large finite values (1e300) pass: the numerics deal with scale.

:func:`fingerprint_source` records what was read for the manifest: every file's path, size and
SHA-256, the rows, the time range, the columns, and the unreadable files.  With a
:class:`FingerprintCache` (staging keeps one in the archive) a file's SHA-256 is computed once per
version, the version being its path, size and modification time; a file modified within
:data:`RACY_SECONDS` of its hashing is hashed again next time (its timestamp cannot tell a later
write in the same tick apart).
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
import os
import pathlib
import time as _time
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.dataset as ds
import pyarrow.fs as pafs
import pyarrow.parquet as pq

from fitaudit.core.exceptions import FitauditError, InputError

from ._io import canonical_json, sha256_bytes, sha256_file
from .frequencies import FIXED_STEPS, FREQUENCIES, SUBDAILY, calendar_offset, canonical_frequency
from .registry import SourceEntry
from .uris import filter_expression

__all__ = [
    "ExtractError",
    "FileFingerprint",
    "ExtractFingerprint",
    "SeriesProblem",
    "SeriesData",
    "fingerprint_source",
    "FingerprintCache",
    "RACY_SECONDS",
    "read_series",
    "series_problems",
]

_SHOW = 5  # timestamps / keys quoted in one message
_IGNORED_PREFIXES = (".", "_")  # as pyarrow.dataset: hidden files, _SUCCESS, _metadata
_NS = np.dtype("datetime64[ns]")
_IO_FAILURE = "could not be read"  # reason of a file whose bytes failed to load (OSError)
_NULL_KEY = "\x00null"  # stands for a null key; registry keys cannot contain NUL


class ExtractError(FitauditError):
    """A whole source cannot be opened (missing path, no readable file, no key or time column).

    The message names the source, its URI and the fix; every model of the source gets an
    ``error`` verdict with it, the other sources go on.
    """


# --------------------------------------------------------------------------------------------
# results
# --------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class FileFingerprint:
    """One file of a source: its path (as the file system names it), size in bytes and SHA-256."""

    path: str
    size: int
    sha256: str

    def to_dict(self) -> dict:
        """Plain-Python view."""
        return {"path": self.path, "size": self.size, "sha256": self.sha256}


@dataclass(frozen=True)
class ExtractFingerprint:
    """What a source held when it was read (data lineage for the manifest).

    ``rows`` counts the rows of the readable files; ``time_min``/``time_max`` are the UTC
    timestamps (ISO 8601, seconds) over all series; ``unreadable`` lists files that are not
    readable Parquet (they are still hashed); ``digest`` is the SHA-256 of the canonical JSON list
    of ``[relative path, size, sha256]`` of every file, so it depends on content and layout, not
    on where the source folder lives.
    """

    source: str
    uri: str
    files: tuple[FileFingerprint, ...]
    rows: int
    time_min: str | None
    time_max: str | None
    columns: tuple[str, ...]
    unreadable: tuple[str, ...]
    digest: str

    def to_dict(self) -> dict:
        """Plain-Python view."""
        return {
            "source": self.source,
            "uri": self.uri,
            "files": [f.to_dict() for f in self.files],
            "rows": self.rows,
            "time_min": self.time_min,
            "time_max": self.time_max,
            "columns": list(self.columns),
            "unreadable": list(self.unreadable),
            "digest": self.digest,
        }


@dataclass(frozen=True)
class SeriesProblem:
    """A problem with one series.

    ``severity`` is ``"error"`` (the model gets an ``error`` verdict) or ``"insufficient"`` (too
    little data). ``column`` names the column concerned when the problem is about one column
    only, so that a model not using that column is not affected; None means the whole series.
    """

    key: str
    kind: str
    severity: str
    message: str
    column: str | None = None

    def to_dict(self) -> dict:
        """Plain-Python view."""
        return {
            "key": self.key,
            "kind": self.kind,
            "severity": self.severity,
            "message": self.message,
            "column": self.column,
        }


@dataclass(frozen=True)
class SeriesData:
    """One series as read: UTC-naive timestamps, float64 columns, and its problems."""

    source: str
    key: str
    time: np.ndarray
    columns: dict
    problems: tuple[SeriesProblem, ...] = field(default=())

    def problems_for(self, columns: Iterable[str]) -> tuple[SeriesProblem, ...]:
        """The problems that concern a model using ``columns`` (whole-series ones included)."""
        wanted = set(columns)
        return tuple(p for p in self.problems if p.column is None or p.column in wanted)

    def length_problem(self, min_length: int) -> SeriesProblem | None:
        """An ``insufficient`` problem when the series has fewer than ``min_length`` rows."""
        return _too_short(self.key, self.source, len(self.time), min_length)

    def to_dict(self) -> dict:
        """Lineage view: rows and first/last timestamp (no data)."""
        return {
            "source": self.source,
            "key": self.key,
            "rows": int(self.time.size),
            "first": _iso(self.time[0]) if self.time.size else None,
            "last": _iso(self.time[-1]) if self.time.size else None,
            "columns": sorted(self.columns),
            "problems": [p.to_dict() for p in self.problems],
        }


# --------------------------------------------------------------------------------------------
# locating and listing files
# --------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class _Location:
    source: SourceEntry
    fs: pafs.FileSystem
    path: str  # path inside ``fs``
    is_dir: bool
    raise_io: bool = False  # OSError while reading propagates (retried by the caller) instead of skipping the file

    def pass_io_error(self, exc: BaseException) -> None:
        """Re-raise ``exc`` when it is an ``OSError`` and I/O errors propagate (``io_errors="raise"``),
        so that the caller's task retries; otherwise return and let the caller name the file."""
        if self.raise_io and isinstance(exc, OSError):
            raise exc

    def fail(self, what: str, fix: str) -> ExtractError:
        """An ExtractError naming the source, its URI and the resolved path."""
        src = self.source
        return ExtractError(f"source {src.name!r} (uri {src.uri!r}, resolved to {self.path!r}): {what}. Fix: {fix}.")


def _check_io_errors(io_errors: str) -> bool:
    if io_errors not in ("skip", "raise"):
        raise InputError(f"io_errors={io_errors!r}; expected 'skip' or 'raise'")
    return io_errors == "raise"


def _locate(source: SourceEntry, base_dir: str | os.PathLike | None, io_errors: str = "skip") -> _Location:
    raise_io = _check_io_errors(io_errors)
    uri = source.uri
    if "://" in uri:
        try:
            fs, path = pafs.FileSystem.from_uri(uri)
        except (pa.ArrowException, ValueError, OSError) as exc:
            raise ExtractError(
                f"source {source.name!r}: the uri {uri!r} cannot be opened ({exc}). Fix: correct "
                f"sources.{source.name}.uri in the registry (a path, or a URI such as file:///data/x.parquet)."
            ) from None
    else:
        local = pathlib.Path(uri).expanduser()
        if not local.is_absolute():
            local = pathlib.Path(base_dir if base_dir is not None else os.getcwd()) / local
        fs, path = pafs.LocalFileSystem(), os.path.abspath(local)
    try:
        info = fs.get_file_info(path)
    except (pa.ArrowException, OSError) as exc:
        if raise_io and isinstance(exc, OSError):
            raise
        raise _Location(source, fs, path, False).fail(
            f"cannot be inspected ({exc})", "check the path and permissions"
        ) from None
    location = _Location(source, fs, path, info.type == pafs.FileType.Directory, raise_io)
    if info.type == pafs.FileType.NotFound:
        raise location.fail(
            "does not exist", f"correct sources.{source.name}.uri in the registry, or write the extract there"
        )
    return location


def _list_files(loc: _Location) -> list[tuple[str, int]]:
    """``(path, size)`` of the source's files in path order (hidden and ``_`` files skipped)."""
    if not loc.is_dir:
        return [(loc.path, loc.fs.get_file_info(loc.path).size)]
    infos = loc.fs.get_file_info(pafs.FileSelector(loc.path, recursive=True))
    files = []
    for info in infos:
        if info.type != pafs.FileType.File:
            continue
        rel = _relative(loc, info.path)
        if any(part.startswith(_IGNORED_PREFIXES) for part in rel.split("/")):
            continue
        files.append((info.path, info.size))
    if not files:
        raise loc.fail(
            "the folder holds no data files", "write the Parquet extract into it, or point the uri at the right folder"
        )
    return sorted(files)


def _relative(loc: _Location, path: str) -> str:
    if not loc.is_dir:
        return pathlib.PurePosixPath(path.replace(os.sep, "/")).name
    root = loc.path.replace(os.sep, "/").rstrip("/")
    return path.replace(os.sep, "/")[len(root) + 1 :]


#: A file whose modification time is this close to the moment it was hashed is not cached.
RACY_SECONDS = 2.0


class FingerprintCache:
    """SHA-256 digests of source files by version (path, size, modification time), in one JSON file.

    Parameters
    ----------
    path : path-like
        The cache file (staging uses ``<archive>/.fingerprints/cache.json``); created by
        :meth:`save`.  A missing or unreadable file is an empty cache: the cache only saves
        work, it never decides what the manifest says about bytes it has not seen.

    Notes
    -----
    The same trade as ``make`` and ``rsync``: a file rewritten with the same size and
    modification time keeps its old digest.  ``hits`` and ``misses`` count lookups.
    """

    def __init__(self, path: str | os.PathLike):
        self.path = pathlib.Path(path)
        self.hits = 0
        self.misses = 0
        self._changed = False
        try:
            data = json.loads(self.path.read_text(encoding="utf-8"))
            self._entries = {k: v for k, v in data.get("files", {}).items() if isinstance(v, dict)}
        except (OSError, ValueError, AttributeError):
            self._entries = {}

    @staticmethod
    def _key(fs: pafs.FileSystem, path: str) -> str:
        return f"{fs.type_name}:{path}"

    def get(self, fs: pafs.FileSystem, path: str, size: int, mtime_ns: int | None) -> str | None:
        """The cached digest of this version of the file, or None."""
        entry = self._entries.get(self._key(fs, path))
        if mtime_ns is not None and entry and entry.get("size") == size and entry.get("mtime_ns") == mtime_ns:
            self.hits += 1
            return entry.get("sha256")
        self.misses += 1
        return None

    def put(
        self, fs: pafs.FileSystem, path: str, size: int, mtime_ns: int | None, sha256: str, hashed_at: float
    ) -> None:
        """Remember a digest (not for a file without a modification time or modified too recently)."""
        if mtime_ns is None or not sha256 or hashed_at - mtime_ns / 1e9 < RACY_SECONDS:
            return
        self._entries[self._key(fs, path)] = {"size": size, "mtime_ns": mtime_ns, "sha256": sha256}
        self._changed = True

    def save(self) -> None:
        """Write the cache (atomically: a temporary file renamed over it) when it changed."""
        if not self._changed:
            return
        self.path.parent.mkdir(parents=True, exist_ok=True)
        tmp = self.path.with_name(f".{self.path.name}.{os.getpid()}.tmp")
        tmp.write_bytes(canonical_json({"files": self._entries}))
        os.replace(tmp, self.path)
        self._changed = False


def _mtimes(loc: _Location, paths: list[str]) -> dict[str, int | None]:
    """Modification time (ns) of each file, None where the file system gives none."""
    try:
        infos = loc.fs.get_file_info(paths)
    except (pa.ArrowException, OSError):
        return dict.fromkeys(paths)
    return {p: (None if i.mtime_ns is None else int(i.mtime_ns)) for p, i in zip(paths, infos)}


def _hash_file(loc: _Location, path: str) -> str:
    if isinstance(loc.fs, pafs.LocalFileSystem):
        return sha256_file(path)
    digest = hashlib.sha256()
    with loc.fs.open_input_stream(path) as stream:
        while chunk := stream.read(1 << 20):
            digest.update(chunk)
    return digest.hexdigest()


@dataclass(frozen=True)
class _File:
    """A file of the source with its schema (physical columns plus hive partition columns)."""

    path: str
    size: int
    schema: pa.Schema | None  # None when unreadable
    rows: int
    reason: str  # why it is unreadable


def _hive_names(loc: _Location, path: str) -> list[str]:
    if loc.source.partitioning != "hive":
        return []
    parts = _relative(loc, path).split("/")[:-1]
    return [p.split("=", 1)[0] for p in parts if "=" in p]


def _inspect_files(loc: _Location) -> list[_File]:
    """Read every file's footer; unreadable ones carry the reason."""
    files = []
    for path, size in _list_files(loc):
        try:
            meta = pq.read_metadata(path, filesystem=loc.fs)
            schema = meta.schema.to_arrow_schema()
        except (pa.ArrowException, OSError, ValueError) as exc:
            loc.pass_io_error(exc)
            detail = (str(exc).splitlines() or [type(exc).__name__])[0]
            if size == 0:
                reason = "empty file (0 bytes)"
            elif isinstance(exc, OSError):  # an I/O failure (or a footer pyarrow cannot even deserialise)
                reason = f"{_IO_FAILURE} ({detail})"
            else:
                reason = f"not readable as Parquet ({detail})"
            files.append(_File(path, size, None, 0, reason))
            continue
        files.append(_File(path, size, schema, meta.num_rows, ""))
    readable = [f for f in files if f.schema is not None]
    if not readable:
        listing = "; ".join(f"{_relative(loc, f.path)}: {f.reason}" for f in files[:_SHOW])
        io_only = all(f.reason.startswith(_IO_FAILURE) for f in files)
        fix = (
            "check that the storage is reachable and the files readable, then rerun"
            if io_only
            else "rewrite the extract as Parquet (pyarrow.parquet.write_table)"
        )
        raise loc.fail(f"no file can be read ({listing})", fix)
    if loc.source.partitioning == "hive":
        partition_types = _hive_types(loc, [f.path for f in readable])
        files = [_with_partitions(loc, f, partition_types) for f in files]
    return files


def _hive_types(loc: _Location, paths: list[str]) -> dict[str, pa.DataType]:
    dataset = ds.dataset(paths, filesystem=loc.fs, format="parquet", partitioning="hive", partition_base_dir=loc.path)
    return {f.name: f.type for f in dataset.schema}


def _with_partitions(loc: _Location, f: _File, types: dict[str, pa.DataType]) -> _File:
    if f.schema is None:
        return f
    schema = f.schema
    for name in _hive_names(loc, f.path):
        if name not in schema.names and name in types:
            schema = schema.append(pa.field(name, types[name]))
    return _File(f.path, f.size, schema, f.rows, f.reason)


# --------------------------------------------------------------------------------------------
# type conversion
# --------------------------------------------------------------------------------------------
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


def _to_keys(column: pa.ChunkedArray | pa.Array) -> np.ndarray:
    """Keys as text; a null key becomes :data:`_NULL_KEY` (never a registered series)."""
    t = _plain_type(column.type)
    if pa.types.is_dictionary(column.type):
        column = column.cast(t)
    text = pc.fill_null(column.cast(pa.string()), _NULL_KEY)
    return np.asarray(text.to_numpy(zero_copy_only=False), dtype=object)


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


# --------------------------------------------------------------------------------------------
# reading
# --------------------------------------------------------------------------------------------
@dataclass
class _Chunk:
    """Rows read from one file (or from the unified scan), normalised."""

    file: str  # relative path, "" for the unified scan
    keys: np.ndarray
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


def _dataset(loc: _Location, paths: list[str]) -> ds.Dataset:
    if loc.source.partitioning == "hive":
        return ds.dataset(paths, filesystem=loc.fs, format="parquet", partitioning="hive", partition_base_dir=loc.path)
    return ds.dataset(paths, filesystem=loc.fs, format="parquet")


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
    loc = _locate(src, base_dir, io_errors)
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
        for key, rows in _rows_by_key(chunk.keys, keys).items():
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


def _rows_by_key(chunk_keys: np.ndarray, wanted: list[str]) -> dict[str, np.ndarray]:
    """Row positions (in stored order) of each wanted key present in a chunk."""
    if not chunk_keys.size:
        return {}
    unique, inverse = np.unique(chunk_keys, return_inverse=True)
    order = np.argsort(inverse, kind="stable")
    bounds = np.searchsorted(inverse[order], np.arange(unique.size + 1))
    code = {k: i for i, k in enumerate(unique.tolist())}
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
                + f"its rows come from files with time-zone-aware timestamps ({_listing(kinds['aware'][:_SHOW])}) and from "
                f"files with naive timestamps ({_listing(kinds['naive'][:_SHOW])}); naive times would be taken as UTC and may be "
                "shifted. Fix: write every file with UTC timestamps (or all naive in one agreed zone).",
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
        "missing-column": ". Fix: add the column to every file of the extract, or remove it from the models that use it.",
        "column-type": ". Fix: write the column with a numeric (or, for time, timestamp) type in every file.",
    }.get(kind, ".")


def _present_keys(loc: _Location, readable: list[_File], src: SourceEntry) -> list[str]:
    found: set[str] = set()
    for f in readable:
        if src.key not in f.schema.names:
            continue
        try:
            keys = _to_keys(_dataset(loc, [f.path]).to_table(columns=[src.key])[src.key])
        except (pa.ArrowException, OSError) as exc:
            loc.pass_io_error(exc)
            continue
        found.update(k for k in keys if k != _NULL_KEY)
    return sorted(found)


def _missing_series(src, loc, key, present, skipped, start, end) -> SeriesData:
    shown = _listing(present[:10]) + (f" (first 10 of {len(present)})" if len(present) > 10 else "")
    if key in present and (start is not None or end is not None):
        span = f"{_iso(start) if start is not None else 'the first row'} and {_iso(end) if end is not None else 'the last row'}"
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


# --------------------------------------------------------------------------------------------
# validation
# --------------------------------------------------------------------------------------------
def series_problems(
    key: str,
    time: np.ndarray,
    columns: Mapping[str, np.ndarray],
    frequency: str,
    *,
    source: str,
    min_length: int = 0,
    exogenous: Iterable[str] = (),
    holidays: Iterable[str] = (),
) -> list[SeriesProblem]:
    """Validate one series; every problem names the rows concerned and the fix.

    Parameters
    ----------
    key : str
        Series key (for messages).
    time : ndarray of datetime64
        Timestamps in stored order.
    columns : mapping of str to ndarray
        Target and exogenous values aligned with ``time``.
    frequency : str
        A code of :data:`fitaudit.tasks.frequencies.FREQUENCIES` (or an alias of
        :data:`~fitaudit.tasks.frequencies.ALIASES`).
    source : str
        Source name (for messages).
    min_length : int
        Fewest observations a model needs; fewer gives an ``insufficient`` problem.
    exogenous : iterable of str
        Columns that are exogenous inputs (their missing values are reported as such).
    holidays : iterable of str
        ISO dates business days (``B``) skip, as the source declares them.

    Returns
    -------
    list of SeriesProblem
        Kinds: ``too-short`` (insufficient), ``duplicate-time``, ``unsorted``, ``off-grid``,
        ``gap``, ``non-finite``, ``missing-exogenous`` (errors).
    """
    frequency = canonical_frequency(frequency)
    if frequency not in FREQUENCIES:
        raise InputError(f"frequency {frequency!r} is not one of {_listing(FREQUENCIES)}")
    time = np.asarray(time).astype(_NS)
    prefix = f"source {source!r}, series {key!r}: "
    problems = []
    short = _too_short(key, source, time.size, min_length)
    if short is not None:
        problems.append(short)
    checks = (_duplicates(time), _unsorted(time), *_grid_problems(time, frequency, tuple(holidays)))
    problems += [SeriesProblem(key, kind, "error", prefix + message) for kind, message in checks if message]
    exogenous = set(exogenous)
    for name, values in columns.items():
        message = _non_finite(time, np.asarray(values, dtype=float), name, name in exogenous)
        if message:
            kind = "missing-exogenous" if name in exogenous else "non-finite"
            problems.append(SeriesProblem(key, kind, "error", prefix + message, name))
    return problems


def _too_short(key: str, source: str, n: int, min_length: int) -> SeriesProblem | None:
    if n >= min_length:
        return None
    return SeriesProblem(
        key,
        "too-short",
        "insufficient",
        f"source {source!r}, series {key!r}: {n} observation(s), but at least {min_length} are needed for the "
        "registered windows and model orders. Fix: extend the extract's history, or shorten the windows in the registry.",
    )


def _duplicates(time: np.ndarray) -> tuple[str, str]:
    values, counts = np.unique(time, return_counts=True)
    dup = values[counts > 1]
    if not dup.size:
        return "duplicate-time", ""
    shown = []
    for value in dup[:_SHOW]:
        rows = np.flatnonzero(time == value)
        shown.append(f"{_iso(value)} (rows {', '.join(map(str, rows[:_SHOW]))})")
    more = f" and {dup.size - _SHOW} more" if dup.size > _SHOW else ""
    return "duplicate-time", (
        f"{dup.size} timestamp(s) appear more than once: {'; '.join(shown)}{more}. "
        "Fix: keep one row per series and timestamp in the extract."
    )


def _unsorted(time: np.ndarray) -> tuple[str, str]:
    back = np.flatnonzero(time[1:] < time[:-1]) + 1
    if not back.size:
        return "unsorted", ""
    shown = "; ".join(f"row {i} ({_iso(time[i])}) follows row {i - 1} ({_iso(time[i - 1])})" for i in back[:_SHOW])
    return "unsorted", (
        f"{back.size} row(s) out of time order: {shown}. "
        "Fix: sort the extract by series key and time before writing it."
    )


def _grid_problems(time: np.ndarray, frequency: str, holidays: tuple = ()) -> list[tuple[str, str]]:
    """Off-grid timestamps and gaps against the declared frequency (on the sorted distinct times)."""
    t = np.unique(time[~np.isnat(time)])
    if t.size < 2:
        return []
    index, on_grid, to_time = _grid_index(t, frequency, holidays)
    name = f"frequency {frequency!r} ({FREQUENCIES[frequency]}" + (
        f"; {len(holidays)} holiday(s) declared)" if holidays else ")"
    )
    out = []
    off = t[~on_grid]
    if off.size:
        dst = (
            ""
            if frequency in SUBDAILY
            else (
                " (Time-zone-aware local timestamps shift by an hour in UTC across daylight-saving changes: store daily and "
                "coarser data as dates.)"
            )
        )
        out.append(
            (
                "off-grid",
                f"{off.size} timestamp(s) are off the grid of {name}: {_stamps(off)}. "
                f"Fix: align the timestamps to the grid in the extract, or correct the registered frequency.{dst}",
            )
        )
    idx = index[on_grid]
    if idx.size >= 2:
        steps = np.diff(idx)
        holes = np.flatnonzero(steps > 1)
        n_missing = int((steps[holes] - 1).sum())
        if n_missing:
            first = []
            for h in holes:
                first.extend(range(int(idx[h]) + 1, min(int(idx[h + 1]), int(idx[h]) + 1 + _SHOW - len(first))))
                if len(first) >= _SHOW:
                    break
            out.append(
                (
                    "gap",
                    f"{n_missing} timestamp(s) missing against {name}, first: {_stamps(to_time(np.array(first)))}. "
                    "Fix: fill the gaps in the extract (impute and flag the rows), or correct the registered frequency.",
                )
            )
    return out


def _grid_index(t: np.ndarray, frequency: str, holidays: tuple = ()):
    """(grid position of each time, on-grid mask, function from positions back to times)."""
    if frequency in FIXED_STEPS:
        step = FIXED_STEPS[frequency].astype("timedelta64[ns]").astype(np.int64)
        ns = t.astype(np.int64)
        residues, counts = np.unique(ns % step, return_counts=True)
        anchor = int(residues[np.argmax(counts)])
        on_grid = ns % step == anchor
        base = ns[on_grid][0]
        index = (ns - base) // step

        def to_time(positions):
            return (base + positions.astype(np.int64) * step).astype(_NS)

        return index, on_grid, to_time
    # a calendar: pandas' own grid (business days with holidays, anchored weeks, month, quarter and
    # year starts or ends) from the first grid date on or after the first timestamp to the last
    import pandas as pd

    offset = calendar_offset(frequency, holidays)
    first = offset.rollforward(pd.Timestamp(t[0]).normalize())
    grid = pd.date_range(first, pd.Timestamp(t[-1]), freq=offset).as_unit("ns").to_numpy().astype(_NS)
    if not grid.size:
        return np.zeros(t.size, dtype=np.int64), np.zeros(t.size, dtype=bool), lambda positions: grid[positions]
    index = np.searchsorted(grid, t)
    on_grid = grid[np.minimum(index, grid.size - 1)] == t

    def to_time(positions):
        return grid[positions.astype(np.int64)]

    return index, on_grid, to_time


def _non_finite(time: np.ndarray, values: np.ndarray, name: str, exogenous: bool) -> str:
    bad = ~np.isfinite(values)
    if not bad.any():
        return ""
    nan, inf = int(np.isnan(values).sum()), int(np.isinf(values).sum())
    parts = [f"{nan} missing or NaN"] if nan else []
    parts += [f"{inf} infinite"] if inf else []
    rows = np.flatnonzero(bad)
    where = f"at {_stamps(time[rows])} (rows {', '.join(map(str, rows[:_SHOW]))})"
    if exogenous:
        return (
            f"exogenous column {name!r} has {' and '.join(parts)} value(s) {where}. Fix: fill them in the extract, "
            "or remove the column from the model's exogenous inputs."
        )
    return (
        f"column {name!r} has {' and '.join(parts)} value(s) {where}. Fix: impute or remove these rows in the extract "
        "(the audit does not fill values)."
    )


# --------------------------------------------------------------------------------------------
# fingerprint
# --------------------------------------------------------------------------------------------
def fingerprint_source(
    source: SourceEntry,
    base_dir: str | os.PathLike | None = None,
    *,
    io_errors: str = "skip",
    cache: FingerprintCache | None = None,
) -> ExtractFingerprint:
    """Hash every file of a source and summarise what it holds (for the manifest).

    Parameters
    ----------
    source : SourceEntry
        The registry's source entry.
    base_dir : path-like, optional
        Folder that a relative ``source.uri`` resolves against.
    io_errors : {"skip", "raise"}
        As in :func:`read_series` (``"skip"``: a file whose bytes cannot be read is listed as
        unreadable).
    cache : FingerprintCache, optional
        Digests of file versions already hashed (reused; new ones added; the caller saves it).

    Returns
    -------
    ExtractFingerprint

    Raises
    ------
    ExtractError
        When the path does not exist, the folder is empty, or no file is readable Parquet.
    """
    loc = _locate(source, base_dir, io_errors)
    files = _inspect_files(loc)
    mtimes = _mtimes(loc, [f.path for f in files]) if cache is not None else {}
    prints, listing, unreadable = [], [], []
    for f in files:
        digest = cache.get(loc.fs, f.path, f.size, mtimes.get(f.path)) if cache is not None else None
        if digest is None:
            try:
                hashed_at = _time.time()
                digest = _hash_file(loc, f.path)
                if cache is not None:
                    cache.put(loc.fs, f.path, f.size, mtimes.get(f.path), digest, hashed_at)
            except OSError as exc:
                loc.pass_io_error(exc)
                digest = ""  # the bytes cannot even be read
        prints.append(FileFingerprint(f.path, f.size, digest))
        listing.append([_relative(loc, f.path), f.size, digest])
        if f.schema is None or not digest:
            unreadable.append(f.path)
    readable = [f for f in files if f.schema is not None]
    columns = tuple(dict.fromkeys(n for f in readable for n in f.schema.names))
    time_min, time_max = _time_range(loc, readable, source.time, unreadable)
    return ExtractFingerprint(
        source=source.name,
        uri=source.uri,
        files=tuple(prints),
        rows=sum(f.rows for f in readable),
        time_min=time_min,
        time_max=time_max,
        columns=columns,
        unreadable=tuple(sorted(set(unreadable))),
        digest=sha256_bytes(canonical_json(listing)),
    )


def _time_range(
    loc: _Location, readable: list[_File], time_column: str, failed: list[str]
) -> tuple[str | None, str | None]:
    """First and last timestamp over the readable files; files whose time column fails to read go to ``failed``."""
    lows, highs = [], []
    for f in readable:
        if time_column not in f.schema.names:
            continue
        try:
            t, _, why = _to_time(_dataset(loc, [f.path]).to_table(columns=[time_column])[time_column])
        except (pa.ArrowException, OSError) as exc:
            loc.pass_io_error(exc)
            failed.append(f.path)
            continue
        if t is None or why:
            continue
        t = t[~np.isnat(t)]
        if t.size:
            lows.append(t.min())
            highs.append(t.max())
    if not lows:
        return None, None
    return _iso(min(lows), full=True), _iso(max(highs), full=True)


# --------------------------------------------------------------------------------------------
# formatting
# --------------------------------------------------------------------------------------------
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
