"""Small file helpers shared by the stages: canonical JSON, hashing, write-once and replaced files."""

from __future__ import annotations

import contextlib
import datetime as _dt
import errno
import hashlib
import json
import os
import pathlib
import re
import secrets
import tempfile
from collections.abc import Iterable, Iterator
from typing import Any

from fitaudit.core._plain import plain_data

__all__ = [
    "SAFE_ID",
    "canonical_json",
    "sha256_bytes",
    "sha256_file",
    "write_once",
    "write_once_chunks",
    "write_replacing",
    "utc_now",
    "json_ready",
    "claim",
]

#: Model ids, source names, run ids and other path segments usable as file names: a letter or
#: digit, then up to 127 letters, digits, ``_``, ``.`` or ``-``.  ``\Z`` (not ``$``) so that a
#: trailing newline never matches.  Re-exported as ``fitaudit.tasks.registry.SAFE_ID``; it lives
#: here so that the archive and the parameter store use it without loading the registry schema.
SAFE_ID = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,127}\Z")

_CHUNK = 1 << 20


def json_ready(obj: Any) -> Any:
    """Convert numpy scalars/arrays, tuples, paths and non-finite floats to JSON-safe values.

    Non-finite floats become the strings ``"inf"``, ``"-inf"`` and ``"nan"`` so that files stay
    strict JSON (``allow_nan=False``) and round-trip without loss of meaning; paths become POSIX
    strings, dates ISO strings, and anything JSON cannot hold raises ``TypeError``
    (:func:`fitaudit.core._plain.plain_data` with ``nan="nan", strict=True``).
    """
    return plain_data(obj, nan="nan", strict=True)


def canonical_json(obj: Any, indent: int | None = None, *, str_keys: bool = False) -> bytes:
    """Deterministic UTF-8 JSON: sorted keys, no NaN, fixed separators (hash input).

    ``str_keys=True`` says every dict key in ``obj`` is a string, as in what ``json.loads`` returns
    and in the records of :func:`fitaudit.tasks.outcomes.records`: ``obj`` is written as it is, and
    only when it holds a value JSON cannot write (a non-finite float, a numpy integer or array, a
    path, a date) does it go through :func:`json_ready` first, with the same bytes as a result (the
    chain check writes every line back this way; a record's walk is a third of its writing).  Keys
    of other types would be sorted, and written, differently: ``json`` sorts them before turning
    them into text, :func:`json_ready` after.
    """
    options = {
        "sort_keys": True,
        "ensure_ascii": False,
        "allow_nan": False,
        "indent": indent,
        "separators": (",", ":") if indent is None else (",", ": "),
    }
    try:
        text = json.dumps(obj, **options) if str_keys else None
    except (TypeError, ValueError):  # a value only json_ready turns into JSON
        text = None
    if text is None:
        text = json.dumps(json_ready(obj), **options)
    return text.encode("utf-8") + (b"\n" if indent is not None else b"")


def sha256_bytes(data: bytes) -> str:
    """Hex SHA-256 of bytes."""
    return hashlib.sha256(data).hexdigest()


def sha256_file(path: str | os.PathLike) -> str:
    """Hex SHA-256 of a file, read in 1 MiB chunks."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(_CHUNK), b""):
            h.update(chunk)
    return h.hexdigest()


@contextlib.contextmanager
def _naming(path: pathlib.Path) -> Iterator[None]:
    """Give an ``OSError`` without a file name (a failed ``write`` or ``fsync``: disk full) the path."""
    try:
        yield
    except OSError as exc:
        if exc.filename is None and exc.errno is not None:
            raise OSError(exc.errno, exc.strerror, str(path)) from exc
        raise


def claim(folder: str | os.PathLike, name: str, text: str = "") -> bool:
    """Whether this call is the first to claim ``name`` in ``folder`` (which must exist), writing
    ``text`` into the claim: creating a file is atomic across processes and threads (exactly one
    ``O_EXCL`` creation succeeds)."""
    try:
        fd = os.open(pathlib.Path(folder, name), os.O_CREAT | os.O_EXCL | os.O_WRONLY)
    except FileExistsError:
        return False
    try:
        if text:
            os.write(fd, text.encode())
    finally:
        os.close(fd)
    return True


def write_replacing(path: str | os.PathLike, data: bytes) -> None:
    """Write ``data`` to ``path``, replacing the file there in one step: a temporary sibling
    ``.<name>.<random>.tmp`` is written whole, then renamed over ``path`` (``os.replace``), so a
    reader sees the old file or the new one, never part of one.  The sibling's name is unique, so
    processes and threads writing the same path at once do not clash (the last rename wins); it
    is removed when the write fails.  For derived files that are rewritten (caches, the archive's
    index page, spill files), not for evidence (:func:`write_once`).
    """
    path = pathlib.Path(path)
    tmp = path.with_name(f".{path.name}.{secrets.token_hex(8)}.tmp")
    try:
        with _naming(tmp), open(tmp, "xb") as fh:
            fh.write(data)
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def write_once(path: str | os.PathLike, data: bytes, *, sync: bool = True) -> None:
    """Write ``data`` to a new file; never overwrite an existing one.

    Writes a temporary sibling, fsyncs it, then hard-links it into place (``os.link`` fails if
    the target exists), so readers never see a half-written file.  ``sync=False`` leaves the
    fsync to the caller (:class:`fitaudit.tasks.archive.RunWriter` syncs a run's files together
    before its manifest); readers of the running system still see the file whole.
    """
    path = pathlib.Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp_name = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    tmp = pathlib.Path(tmp_name)
    try:
        with _naming(path), os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            if sync:
                os.fsync(fh.fileno())
        os.link(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)


def link_once(source: str | os.PathLike, path: str | os.PathLike) -> bytes:
    """Give the finished file ``source`` the new name ``path`` as well (a hard link); never
    overwrite an existing one.  Returns the file's bytes (read before the link, for its digest).

    For a file written whole elsewhere on the same file system and not changed afterwards (a
    model page in a run's work folder): the same outcome as :func:`write_once` of its bytes with
    ``sync=False`` (the caller syncs, as :class:`fitaudit.tasks.archive.RunWriter` does), without
    a temporary file, a second write and an unlink (1,000 pages of 50 kB: 0.24 s copied, 0.11 s
    linked).  The file gets :func:`write_once`'s permissions (``0600``).  A source on another
    file system is copied with :func:`write_once` (which links within the target's folder).
    """
    source, path = pathlib.Path(source), pathlib.Path(path)
    data = source.read_bytes()
    path.parent.mkdir(parents=True, exist_ok=True)
    try:
        os.chmod(source, 0o600)
        os.link(source, path)  # FileExistsError (errno EEXIST) is raised below, as write_once raises it
    except OSError as exc:
        if exc.errno != errno.EXDEV:
            raise
        write_once(path, data, sync=False)
    return data


def write_once_chunks(path: str | os.PathLike, chunks: Iterable[bytes], *, sync: bool = True) -> tuple[str, int]:
    """:func:`write_once` for data given in pieces (never all in memory); returns (SHA-256, size)."""
    path = pathlib.Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp_name = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    tmp = pathlib.Path(tmp_name)
    digest, size = hashlib.sha256(), 0
    try:
        with _naming(path), os.fdopen(fd, "wb") as fh:
            for chunk in chunks:
                fh.write(chunk)
                digest.update(chunk)
                size += len(chunk)
            fh.flush()
            if sync:
                os.fsync(fh.fileno())
        os.link(tmp, path)
    finally:
        tmp.unlink(missing_ok=True)
    return digest.hexdigest(), size


def utc_now() -> str:
    """Current UTC time as ISO 8601 with a ``Z`` suffix (seconds precision)."""
    return _dt.datetime.now(_dt.UTC).replace(microsecond=0).isoformat().replace("+00:00", "Z")
