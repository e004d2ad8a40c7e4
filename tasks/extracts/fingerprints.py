"""Fingerprints: what a source held when it was read, for the manifest, with a cache of file digests."""

from __future__ import annotations

import hashlib
import json
import os
import pathlib
import time as _time

import numpy as np
import pyarrow as pa
import pyarrow.fs as pafs

from .._io import canonical_json, sha256_bytes, sha256_file, write_replacing
from ..registry import SourceEntry
from . import stores
from .conversion import _to_time
from .formatting import _iso
from .records import ExtractFingerprint, FileFingerprint
from .stores import _dataset, _File, _inspect_files, _Location, _relative

__all__ = ["RACY_SECONDS", "FingerprintCache", "fingerprint_source"]


#: A file whose modification time is this close to the moment it was hashed is not cached.
RACY_SECONDS = 2.0


class FingerprintCache:
    """SHA-256 digests of source files by version, in one JSON file.

    A file's version is its path, size and modification time; on an object store that gives one
    (an S3 ``ETag`` and ``VersionId``; an fsspec file system's ``ETag``/``VersionId``/``generation``),
    its path, size and that version tag instead, which changes with every write, so that no racy
    window applies.

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
        self._current: set[str] = set()  # entries checked against the file's version in this run
        try:
            data = json.loads(self.path.read_text(encoding="utf-8"))
            self._entries = {k: v for k, v in data.get("files", {}).items() if isinstance(v, dict)}
        except (OSError, ValueError, AttributeError):
            self._entries = {}

    @staticmethod
    def _key(fs: pafs.FileSystem, path: str) -> str:
        return f"{fs.type_name}:{path}"

    def get(
        self, fs: pafs.FileSystem, path: str, size: int, mtime_ns: int | None, version: str | None = None
    ) -> str | None:
        """The cached digest of this version of the file (by ``version`` when given), or None."""
        entry = self._entries.get(self._key(fs, path))
        same = (
            entry.get("version") == version
            if version is not None and entry
            else mtime_ns is not None and entry and entry.get("mtime_ns") == mtime_ns
        )
        if same and entry.get("size") == size:
            self._current.add(self._key(fs, path))
            self.hits += 1
            return entry.get("sha256")
        self.misses += 1
        return None

    def put(
        self,
        fs: pafs.FileSystem,
        path: str,
        size: int,
        mtime_ns: int | None,
        sha256: str,
        hashed_at: float,
        version: str | None = None,
    ) -> None:
        """Remember a digest (without a ``version``: not for a file without a modification time or
        modified too recently)."""
        if version is not None and sha256:
            self._entries[self._key(fs, path)] = {"size": size, "version": version, "sha256": sha256}
            self._current.add(self._key(fs, path))
            self._changed = True
            return
        if mtime_ns is None or not sha256 or hashed_at - mtime_ns / 1e9 < RACY_SECONDS:
            return
        self._entries[self._key(fs, path)] = {"size": size, "mtime_ns": mtime_ns, "sha256": sha256}
        self._current.add(self._key(fs, path))
        self._changed = True

    def span(self, fs: pafs.FileSystem, path: str, column: str) -> list[int] | None:
        """The cached first and last timestamp (ns) of ``column`` in a file whose digest this run took
        from the cache or stored (``[]``: no usable timestamp), or None when not cached."""
        key = self._key(fs, path)
        if key not in self._current:
            return None
        span = self._entries[key].get("spans", {}).get(column)
        return list(span) if isinstance(span, list) else None

    def put_span(self, fs: pafs.FileSystem, path: str, column: str, span: list[int]) -> None:
        """Remember the time range of ``column`` beside the file's digest (only for a current entry)."""
        key = self._key(fs, path)
        if key in self._current:
            self._entries[key].setdefault("spans", {})[column] = list(span)
            self._changed = True

    def save(self) -> None:
        """Write the cache (atomically: a temporary file renamed over it) when it changed."""
        if not self._changed:
            return
        self.path.parent.mkdir(parents=True, exist_ok=True)
        write_replacing(self.path, canonical_json({"files": self._entries}))
        self._changed = False


def _mtimes(loc: _Location, paths: list[str]) -> dict[str, int | None]:
    """Modification time (ns) of each file, None where the file system gives none."""
    try:
        infos = loc.fs.get_file_info(paths)
    except (pa.ArrowException, OSError):
        return dict.fromkeys(paths)
    return {p: (None if i.mtime_ns is None else int(i.mtime_ns)) for p, i in zip(paths, infos)}


def _versions(loc: _Location, paths: list[str]) -> dict[str, str | None]:
    """An object store's version tag of each file (``VersionId/ETag``), None where it gives none."""
    if not loc.remote:
        return {}
    out: dict[str, str | None] = {}
    for path in paths:
        try:
            out[path] = _object_version(loc.fs, path)
        except (pa.ArrowException, OSError) as exc:
            loc.pass_io_error(exc)
            out[path] = None
    return out


def _object_version(fs: pafs.FileSystem, path: str) -> str | None:
    handler = getattr(fs, "handler", None)
    if isinstance(handler, pafs.FSSpecHandler):  # s3fs, gcsfs, ...: their info() (cached listing or a HEAD)
        info = handler.fs.info(path)
        tags = [info.get(k) for k in ("VersionId", "ETag", "etag", "generation")]
    else:  # pyarrow's own: the object's metadata (one HEAD request, no bytes)
        with fs.open_input_file(path) as f:
            meta = f.metadata() or {}
        tags = [meta.get(k) for k in ("VersionId", "ETag")]
    tags = [t.decode() if isinstance(t, bytes) else str(t) for t in tags if t]
    return "/".join(tags) or None


def _hash_file(loc: _Location, path: str) -> str:
    if isinstance(loc.fs, pafs.LocalFileSystem):
        return sha256_file(path)
    digest = hashlib.sha256()
    with loc.fs.open_input_stream(path) as stream:
        while chunk := stream.read(1 << 20):
            digest.update(chunk)
    return digest.hexdigest()


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
    loc = stores._locate(source, base_dir, io_errors)
    files = _inspect_files(loc)
    mtimes = _mtimes(loc, [f.path for f in files]) if cache is not None else {}
    versions = _versions(loc, [f.path for f in files]) if cache is not None else {}
    prints, listing, unreadable = [], [], []
    for f in files:
        version = versions.get(f.path)
        digest = cache.get(loc.fs, f.path, f.size, mtimes.get(f.path), version) if cache is not None else None
        if digest is None:
            try:
                hashed_at = _time.time()
                digest = _hash_file(loc, f.path)
                if cache is not None:
                    cache.put(loc.fs, f.path, f.size, mtimes.get(f.path), digest, hashed_at, version)
            except OSError as exc:
                loc.pass_io_error(exc)
                digest = ""  # the bytes cannot even be read
        prints.append(FileFingerprint(f.path, f.size, digest))
        listing.append([_relative(loc, f.path), f.size, digest])
        if f.schema is None or not digest:
            unreadable.append(f.path)
    readable = [f for f in files if f.schema is not None]
    columns = tuple(dict.fromkeys(n for f in readable for n in f.schema.names))
    time_min, time_max = _time_range(loc, readable, source.time, unreadable, cache)
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
    loc: _Location,
    readable: list[_File],
    time_column: str,
    failed: list[str],
    cache: FingerprintCache | None = None,
) -> tuple[str | None, str | None]:
    """First and last timestamp over the readable files; files whose time column fails to read go to ``failed``.

    A file's own range is kept in the cache beside its digest (it follows from the same bytes),
    so that a file whose digest came from the cache is not read again."""
    lows, highs = [], []
    for f in readable:
        if time_column not in f.schema.names:
            continue
        span = cache.span(loc.fs, f.path, time_column) if cache is not None else None
        if span is None:
            try:
                t, _, why = _to_time(_dataset(loc, [f.path]).to_table(columns=[time_column])[time_column])
            except (pa.ArrowException, OSError) as exc:
                loc.pass_io_error(exc)
                failed.append(f.path)
                continue
            if t is None or why:
                span = []  # a time column of the wrong type: reported when the series are read
            else:
                t = t[~np.isnat(t)]
                span = [int(t.min().astype(np.int64)), int(t.max().astype(np.int64))] if t.size else []
            if cache is not None:
                cache.put_span(loc.fs, f.path, time_column, span)
        if span:
            lows.append(np.datetime64(span[0], "ns"))
            highs.append(np.datetime64(span[1], "ns"))
    if not lows:
        return None, None
    return _iso(min(lows), full=True), _iso(max(highs), full=True)
