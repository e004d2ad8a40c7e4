"""Where a source's files are: its file system (local, or a URI such as ``s3://``), the listing of
its files and their Parquet footers (hive partition columns included), and the dataset over them.

Object stores: a source may name credentials (a Prefect Block, :mod:`.credentials`) and
``storage_options`` (s3fs's option names).  With ``filesystem: arrow`` (the default) an ``s3://``
source is opened with pyarrow's own ``S3FileSystem``: no extra package, and the AWS SDK's standard
retry strategy (:data:`S3_ATTEMPTS` attempts with exponential backoff) retries transient failures
(connection resets, 5xx answers, throttling) of every request; what still fails is an ``OSError``
that the staging task's Prefect retries take over.  With ``filesystem: fsspec`` the file system is
``fsspec.filesystem(scheme, **options)`` (s3fs, gcsfs, ...; their own clients retry), wrapped in
``pyarrow.fs.FSSpecHandler``.  A refusal (403, AccessDenied) and a missing bucket or object
(404, NoSuchKey) are not transient: each becomes an :class:`~.records.ExtractError` naming the
source, its resolved URI and the fix, never retried.  Secrets never enter a message.
"""

from __future__ import annotations

import os
import pathlib
import re
from dataclasses import dataclass, field
from typing import Any

import pyarrow as pa
import pyarrow.dataset as ds
import pyarrow.fs as pafs
import pyarrow.parquet as pq

from fitaudit.core.exceptions import InputError

from ..registry import SourceEntry
from ..uris import SECRET_OPTIONS, is_object_store
from .formatting import _SHOW
from .records import ExtractError

__all__: list[str] = []

_IGNORED_PREFIXES = (".", "_")  # as pyarrow.dataset: hidden files, _SUCCESS, _metadata
_IO_FAILURE = "could not be read"  # reason of a file whose bytes failed to load (OSError)


#: Attempts of one object store request under pyarrow's AWS standard retry strategy.
S3_ATTEMPTS = 5

#: An object store's refusal (HTTP 403) and its missing bucket or object (HTTP 404), as pyarrow,
#: the AWS SDK and s3fs word them; anything else an object store raises is taken as transient.
_DENIED = re.compile(
    r"ACCESS_DENIED|AccessDenied|InvalidAccessKeyId|INVALID_ACCESS_KEY_ID|SignatureDoesNotMatch|"
    r"SIGNATURE_DOES_NOT_MATCH|Forbidden|HTTP status 403|InvalidToken|ExpiredToken"
)
_MISSING = re.compile(r"NoSuchBucket|NO_SUCH_BUCKET|NoSuchKey|NO_SUCH_KEY|HTTP status 404")


@dataclass(frozen=True)
class _Location:
    source: SourceEntry
    fs: pafs.FileSystem
    path: str  # path inside ``fs``
    is_dir: bool
    raise_io: bool = False  # OSError while reading propagates (retried by the caller) instead of skipping the file
    secrets: tuple[str, ...] = field(default=(), repr=False)  # option values never quoted in a message

    @property
    def remote(self) -> bool:
        """Whether the source is on an object store (its refusals and missing objects are not transient)."""
        return is_object_store(self.source.uri)

    def pass_io_error(self, exc: BaseException) -> None:
        """Re-raise ``exc`` when it is an ``OSError`` and I/O errors propagate (``io_errors="raise"``),
        so that the caller's task retries; otherwise return and let the caller name the file.

        An object store's refusal or missing object raises the source's :class:`ExtractError` at once."""
        if self.remote and isinstance(exc, OSError):
            failure = _store_failure(exc)
            if failure is not None:
                raise self.store_error(failure, exc) from None
        if self.raise_io and isinstance(exc, OSError):
            raise exc

    def fail(self, what: str, fix: str) -> ExtractError:
        """An ExtractError naming the source, its URI and the resolved path."""
        src = self.source
        return ExtractError(
            _scrub(
                f"source {src.name!r} (uri {src.uri!r}, resolved to {self.path!r}): {what}. Fix: {fix}.", self.secrets
            )
        )

    def store_error(self, failure: str, exc: BaseException) -> ExtractError:
        """The ExtractError of an object store's refusal (``"denied"``) or missing object (``"missing"``)."""
        src = self.source
        detail = (str(exc).splitlines() or [type(exc).__name__])[0]
        if failure == "denied":
            who = (
                f"the credentials of Block {src.credentials!r}"
                if src.credentials
                else "the credentials in use (storage_options or the environment)"
            )
            return self.fail(
                f"the object store refused access ({detail})",
                f"give {who} read access to this bucket and prefix (s3:GetObject and s3:ListBucket), or set "
                f"sources.{src.name}.credentials to a Block whose credentials have it",
            )
        return self.fail(
            f"the object store has no such bucket or object ({detail})",
            f"correct sources.{src.name}.uri in the registry (a dated export: check that the as-of date's folder "
            "was written), or write the extract there",
        )


def _store_failure(exc: BaseException) -> str | None:
    """``"denied"``, ``"missing"`` or None (possibly transient) for an object store's error."""
    if isinstance(exc, PermissionError):
        return "denied"
    if isinstance(exc, FileNotFoundError):
        return "missing"
    text = str(exc)
    if _DENIED.search(text):
        return "denied"
    if _MISSING.search(text):
        return "missing"
    return None


def _scrub(text: str, secrets: tuple[str, ...]) -> str:
    for secret in secrets:
        if len(secret) >= 4:
            text = text.replace(secret, "***")
    return text


def _check_io_errors(io_errors: str) -> bool:
    if io_errors not in ("skip", "raise"):
        raise InputError(f"io_errors={io_errors!r}; expected 'skip' or 'raise'")
    return io_errors == "raise"


def store_options(source: SourceEntry) -> dict[str, Any]:
    """A source's object store options: its credentials Block's, then its ``storage_options`` (which win).

    Raises
    ------
    ExtractError
        When the Block cannot be loaded (no such Block, no Prefect API, an unknown Block type).
    """
    options: dict[str, Any] = {}
    if source.credentials:
        from prefect.blocks.core import Block

        from .credentials import block_options  # defines fitaudit's Block type, so that it loads by its slug

        try:
            block = Block.load(source.credentials)
        except Exception as exc:  # noqa: BLE001 - ValueError (no such Block), KeyError (type unknown), HTTP errors
            detail = (str(exc).splitlines() or [type(exc).__name__])[0]
            raise ExtractError(
                f"source {source.name!r} (uri {source.uri!r}): the credentials Block {source.credentials!r} cannot "
                f"be loaded ({type(exc).__name__}: {detail}). Fix: save it on the Prefect server this run uses "
                f"(e.g. ObjectStoreCredentials(access_key_id=..., secret_access_key=...).save(...) from "
                f"fitaudit.tasks.extracts), or correct sources.{source.name}.credentials in the registry."
            ) from None
        options.update(block_options(block))
    options.update(source.storage_options or {})
    return options


def _secret_values(options: dict[str, Any]) -> tuple[str, ...]:
    return tuple(str(v) for k, v in options.items() if k in SECRET_OPTIONS and v)


#: s3fs's option names and the S3FileSystem parameters they stand for (others are passed as written).
_ARROW_S3_NAMES = {
    "key": "access_key",
    "secret": "secret_key",
    "token": "session_token",
    "region_name": "region",
    "anon": "anonymous",
    "aws_access_key_id": "access_key",
    "aws_secret_access_key": "secret_key",
    "aws_session_token": "session_token",
}


def _arrow_s3(options: dict[str, Any]) -> pafs.FileSystem:
    """pyarrow's S3FileSystem from s3fs-style options, retrying transient failures."""
    kwargs: dict[str, Any] = {}
    for name, value in options.items():
        if name == "endpoint_url":
            scheme, sep, rest = str(value).partition("://")
            kwargs["endpoint_override"] = rest.rstrip("/") if sep else scheme
            if sep:
                kwargs["scheme"] = scheme
        elif name == "client_kwargs" and isinstance(value, dict):
            for inner, v in value.items():
                kwargs[_ARROW_S3_NAMES.get(inner, inner)] = v
        else:
            kwargs[_ARROW_S3_NAMES.get(name, name)] = value
    kwargs.setdefault("retry_strategy", pafs.AwsStandardS3RetryStrategy(max_attempts=S3_ATTEMPTS))
    return pafs.S3FileSystem(**kwargs)


def _filesystem(source: SourceEntry, options: dict[str, Any]) -> tuple[pafs.FileSystem, str]:
    """The file system of an object store URI and the path inside it."""
    uri = source.uri
    scheme = uri.partition("://")[0].lower()
    if source.filesystem == "fsspec":
        import fsspec

        fs = fsspec.filesystem(scheme, **options)
        return pafs.PyFileSystem(pafs.FSSpecHandler(fs)), fs._strip_protocol(uri)
    if not source.credentials and source.storage_options is None:
        return pafs.FileSystem.from_uri(uri)  # credentials from the environment, as pyarrow finds them
    if scheme not in ("s3", "s3a"):
        raise ValueError(
            f"pyarrow's file system for {scheme}:// takes no storage_options or credentials here; set "
            f"sources.{source.name}.filesystem to fsspec (with the fsspec package for {scheme}:// installed)"
        )
    return _arrow_s3(options), uri.partition("://")[2]


def _locate(source: SourceEntry, base_dir: str | os.PathLike | None, io_errors: str = "skip") -> _Location:
    raise_io = _check_io_errors(io_errors)
    uri = source.uri
    secrets: tuple[str, ...] = ()
    if "://" in uri:
        options = store_options(source) if is_object_store(uri) else {}
        secrets = _secret_values(options)
        try:
            fs, path = _filesystem(source, options) if is_object_store(uri) else pafs.FileSystem.from_uri(uri)
        except (pa.ArrowException, ValueError, TypeError, OSError, ImportError) as exc:
            raise ExtractError(
                _scrub(
                    f"source {source.name!r}: the uri {uri!r} cannot be opened ({exc}). Fix: correct "
                    f"sources.{source.name}.uri in the registry (a path, or a URI such as file:///data/x.parquet)"
                    + (", and its storage_options" if source.storage_options else "")
                    + ".",
                    secrets,
                )
            ) from None
    else:
        local = pathlib.Path(uri).expanduser()
        if not local.is_absolute():
            local = pathlib.Path(base_dir if base_dir is not None else os.getcwd()) / local
        fs, path = pafs.LocalFileSystem(), os.path.abspath(local)
    probe = _Location(source, fs, path, False, raise_io, secrets)
    try:
        info = fs.get_file_info(path)
    except (pa.ArrowException, OSError) as exc:
        probe.pass_io_error(exc)  # an object store's refusal or missing bucket; or raised for a retry
        raise probe.fail(f"cannot be inspected ({exc})", "check the path and permissions") from None
    location = _Location(source, fs, path, info.type == pafs.FileType.Directory, raise_io, secrets)
    if info.type == pafs.FileType.NotFound:
        raise location.fail(
            "does not exist", f"correct sources.{source.name}.uri in the registry, or write the extract there"
        )
    return location


def _list_files(loc: _Location) -> list[tuple[str, int]]:
    """``(path, size)`` of the source's files in path order (hidden and ``_`` files skipped)."""
    if not loc.is_dir:
        return [(loc.path, loc.fs.get_file_info(loc.path).size)]
    try:
        infos = loc.fs.get_file_info(pafs.FileSelector(loc.path, recursive=True))
    except OSError as exc:
        loc.pass_io_error(exc)  # an object store's refusal to list: the source's error, not retried
        raise
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
