"""Where a source's files are: its file system (local, or a URI such as ``s3://``), the listing of
its files and their Parquet footers (hive partition columns included), and the dataset over them."""

from __future__ import annotations

import os
import pathlib
from dataclasses import dataclass

import pyarrow as pa
import pyarrow.dataset as ds
import pyarrow.fs as pafs
import pyarrow.parquet as pq

from fitaudit.core.exceptions import InputError

from ..registry import SourceEntry
from .formatting import _SHOW
from .records import ExtractError

__all__: list[str] = []

_IGNORED_PREFIXES = (".", "_")  # as pyarrow.dataset: hidden files, _SUCCESS, _metadata
_IO_FAILURE = "could not be read"  # reason of a file whose bytes failed to load (OSError)


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


def _dataset(loc: _Location, paths: list[str]) -> ds.Dataset:
    if loc.source.partitioning == "hive":
        return ds.dataset(paths, filesystem=loc.fs, format="parquet", partitioning="hive", partition_base_dir=loc.path)
    return ds.dataset(paths, filesystem=loc.fs, format="parquet")
