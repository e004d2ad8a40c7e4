"""Writing a run: staged files published atomically (``RunWriter``), and a run's locked scratch folder."""

from __future__ import annotations

import dataclasses
import datetime as _dt
import fcntl
import os
import pathlib
import secrets
import shutil
from typing import Any

from fitaudit.core.exceptions import InputError

from .._io import canonical_json, link_once, sha256_bytes, write_once, write_once_chunks
from .chain import _append_locked, _settle_append
from .durable import _fsync_dir, _fsync_files, _fsync_tree, _mkdirs, _remove_journal, _step, _write_journal
from .layout import (
    _MANIFEST,
    _REPORT,
    _RUNS,
    _STAGING,
    _WORK,
    MANIFEST_SCHEMA_VERSION,
    _as_date,
    _as_of_from_run_id,
    _check_name,
    _rel,
    _root,
    _split_relpath,
)
from .lock import _archive_lock
from .problems import ArchiveError
from .records import _intact_runs


@dataclasses.dataclass(frozen=True)
class PublishedRun:
    """A run made visible by :meth:`RunWriter.finish`."""

    run_id: str
    path: pathlib.Path
    manifest_sha256: str
    seq: int


class RunWriter:
    """Writes one run into a private staging folder and publishes it atomically with :meth:`finish`.

    Use as a context manager (``with open_run(...) as run:``); leaving the block without ``finish``
    (or with an exception) discards the staging folder.  Files are written once and never replaced.
    """

    def __init__(
        self, root: pathlib.Path, run_id: str, year: int, as_of: _dt.date, staging: pathlib.Path, lock_fd: int
    ):
        self.run_id = run_id
        self.as_of = as_of
        self.path = root / _RUNS / f"{year:04d}" / run_id
        self._root = root
        self._staging = staging
        self._lock_fd: int | None = lock_fd
        self._files: dict[str, dict[str, Any]] = {}
        self._folders: set[str] = set()  # the folders of the files claimed, so a file never takes a folder's name

    def __enter__(self) -> RunWriter:
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        if self._lock_fd is None:
            return
        self.abort()
        if exc_type is None:
            raise ArchiveError(
                f"run {self.run_id} was not finished; call finish(manifest) inside the with-block. "
                "Its staged files were discarded"
            )

    def _check_open(self) -> None:
        if self._lock_fd is None:
            raise ArchiveError(f"run {self.run_id} is already finished or aborted; open a new run")

    def write_bytes(self, relpath: str, data: bytes) -> None:
        """Write one file of the run; ``relpath`` is relative (``"models/m1.html"``), never reused.

        Raises
        ------
        InputError
            Unsafe path (absolute, ``..``, NUL, segments not matching ``SAFE_NAME``), ``manifest.json``,
            a path already written, or data that is not bytes.
        """
        parts = self._claim(relpath)
        key = "/".join(parts)
        if not isinstance(data, (bytes, bytearray, memoryview)):
            raise InputError(f"data for {key!r} must be bytes; use write_text or write_json for {type(data).__name__}")
        data = bytes(data)
        write_once(self._staging.joinpath(*parts), data, sync=False)  # synced together by finish()
        self._record(key, sha256_bytes(data), len(data))
        _step("file-written")

    def write_file(self, relpath: str, source: str | os.PathLike) -> None:
        """Write one file of the run from a finished file (a staged model page), which must not
        change afterwards: linked into the run, not copied (:func:`~fitaudit.tasks._io.link_once`;
        see :meth:`write_bytes`)."""
        parts = self._claim(relpath)
        data = link_once(source, self._staging.joinpath(*parts))  # synced together by finish()
        self._record("/".join(parts), sha256_bytes(data), len(data))
        _step("file-written")

    def write_chunks(self, relpath: str, chunks) -> None:
        """Write one file from an iterable of bytes pieces, never holding it whole (see :meth:`write_bytes`)."""
        parts = self._claim(relpath)
        sha, size = write_once_chunks(self._staging.joinpath(*parts), (bytes(c) for c in chunks), sync=False)
        self._record("/".join(parts), sha, size)
        _step("file-written")

    def _claim(self, relpath: str) -> tuple[str, ...]:
        """The checked path segments of a file about to be written (see :meth:`write_bytes`)."""
        self._check_open()
        parts = _split_relpath(relpath)
        key = "/".join(parts)
        if key == _MANIFEST:
            raise InputError(f"{_MANIFEST} is written by finish(); pass the manifest's fields there")
        clash = [p for p in ("/".join(parts[:k]) for k in range(1, len(parts) + 1)) if p in self._files]
        if clash or key in self._folders:
            raise InputError(
                f"{key!r} in run {self.run_id} was already written (or clashes with a file or folder of that name); "
                "files are never overwritten"
            )
        return parts

    def _record(self, key: str, sha256: str, size: int) -> None:
        """Enter a file just written in the manifest's list, and its folders in :attr:`_folders`."""
        self._files[key] = {"sha256": sha256, "size": size}
        parts = key.split("/")
        self._folders.update("/".join(parts[:k]) for k in range(1, len(parts)))

    def write_text(self, relpath: str, text: str) -> None:
        """Write ``text`` encoded as UTF-8 (see :meth:`write_bytes`)."""
        if not isinstance(text, str):
            raise InputError(f"text for {relpath!r} must be a str; got {type(text).__name__}")
        self.write_bytes(relpath, text.encode("utf-8"))

    def write_json(self, relpath: str, obj: Any) -> None:
        """Write ``obj`` as canonical JSON (sorted keys, indent 2; see :meth:`write_bytes`)."""
        try:
            data = canonical_json(obj, indent=2)
        except (TypeError, ValueError) as exc:
            raise InputError(f"{relpath!r} of run {self.run_id} cannot be written as JSON: {exc}") from exc
        self.write_bytes(relpath, data)

    def abort(self) -> None:
        """Discard the staged files (nothing becomes visible)."""
        if self._lock_fd is None:
            return
        shutil.rmtree(self._staging, ignore_errors=True)
        self._release()

    def _release(self) -> None:
        os.close(self._lock_fd)
        self._lock_fd = None

    def finish(self, manifest: dict) -> PublishedRun:
        """Write ``manifest.json``, publish the run folder atomically and append its chain entry.

        Parameters
        ----------
        manifest : dict
            The caller's fields (run id, UTC start/end, operator, tool and package versions, registry
            hash, input fingerprints, seeds, timings, ``counts``, ...).  ``run_id`` and ``as_of`` are
            added (or must agree); ``schema_version`` and ``files`` (``{relpath: {"sha256", "size"}}``
            for every other file) are added and may not be given.

        Returns
        -------
        PublishedRun
            Run id, final folder, SHA-256 of ``manifest.json`` and the chain entry's ``seq``.
        """
        self._check_open()
        if not isinstance(manifest, dict):
            raise InputError(f"manifest of run {self.run_id} must be a dict; got {type(manifest).__name__}")
        reserved = sorted({"files", "schema_version"} & set(manifest))
        if reserved:
            raise InputError(f"manifest of run {self.run_id} may not set {reserved}; finish() adds them")
        for key, value in (("run_id", self.run_id), ("as_of", self.as_of.isoformat())):
            if key in manifest and manifest[key] != value:
                raise InputError(f"manifest {key} {manifest[key]!r} differs from the run's {value!r}")
        full = {
            **manifest,
            "run_id": self.run_id,
            "as_of": self.as_of.isoformat(),
            "schema_version": MANIFEST_SCHEMA_VERSION,
            "files": dict(sorted(self._files.items())),
        }
        try:
            data = canonical_json(full, indent=2)
        except (TypeError, ValueError) as exc:
            raise InputError(f"manifest of run {self.run_id} cannot be written as JSON: {exc}") from exc
        # every file durable before the manifest that lists it, then the manifest and the folders
        _fsync_files(self._staging.joinpath(*name.split("/")) for name in self._files)
        write_once(self._staging / _MANIFEST, data)
        _fsync_tree(self._staging)
        _step("staged")
        payload = {
            "run_id": self.run_id,
            "path": _rel(self._root, self.path),
            "as_of": self.as_of.isoformat(),
            "manifest_sha256": sha256_bytes(data),
            "report_sha256": self._files.get(_REPORT, {}).get("sha256"),
        }
        with _archive_lock(self._root):
            entry = self._publish_locked(payload)
        self._release()
        return PublishedRun(self.run_id, self.path, payload["manifest_sha256"], entry["seq"])

    def _publish_locked(self, payload: dict) -> dict:
        _settle_append(self._root)
        _, runs = _intact_runs(self._root)
        if self.run_id in runs or self.path.exists():
            raise ArchiveError(f"run {self.run_id} is already published; open a run with a new id (new_run_id())")
        journal = f"run-{self.run_id}.json"
        _mkdirs(self._root, self.path.parent.relative_to(self._root).as_posix())
        _write_journal(self._root, journal, {"staging": self._staging.name, "payload": payload})
        _step("journal-written")
        try:
            os.rename(self._staging, self.path)
        except OSError as exc:
            _remove_journal(self._root, journal)
            raise ArchiveError(f"could not move run {self.run_id} into {self.path}: {exc}") from exc
        _fsync_dir(self.path.parent)
        _fsync_dir(self._staging.parent)
        _step("renamed")
        try:
            entry = _append_locked(self._root, "run", payload)
        except Exception as exc:
            raise ArchiveError(
                f"run {self.run_id} was published but its chain entry could not be appended ({exc}); call recover()"
            ) from exc
        _step("run-appended")
        _remove_journal(self._root, journal)
        _step("journal-removed")
        return entry


def open_run(archive_root: str | os.PathLike, run_id: str, year: int, *, as_of: _dt.date | None = None) -> RunWriter:
    """Start writing run ``run_id``, to be published as ``<archive>/runs/<year>/<run_id>/``.

    Parameters
    ----------
    archive_root : path
        The archive folder (created if missing).
    run_id : str
        Matches ``SAFE_NAME``; unique in the archive (use :func:`new_run_id`).
    year : int
        The four-digit year folder.
    as_of : datetime.date, optional
        The audit's as-of date (used by retention); by default read from the run id's leading
        ``YYYYMMDD-``.

    Returns
    -------
    RunWriter
    """
    root = _root(archive_root)
    _check_name(run_id, "run id")
    if isinstance(year, bool) or not isinstance(year, int) or not 1000 <= year <= 9999:
        raise InputError(f"year must be a four-digit int; got {year!r}")
    as_of = _as_of_from_run_id(run_id) if as_of is None else _as_date(as_of, "as_of")
    with _archive_lock(root):  # recover() scans .staging under this lock: it never sees an unlocked new folder
        _settle_append(root)
        _, runs = _intact_runs(root)
        if run_id in runs or (root / _RUNS / f"{year:04d}" / run_id).exists():
            raise ArchiveError(f"run {run_id} is already published; open a run with a new id (new_run_id())")
        staging = _mkdirs(root, _STAGING) / f"{run_id}.{secrets.token_hex(4)}"
        staging.mkdir()
        fd = os.open(staging, os.O_RDONLY | os.O_DIRECTORY)
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    return RunWriter(root, run_id, year, as_of, staging, fd)


class WorkFolder:
    """A run's scratch folder ``<archive>/.work/<run-id>/``, locked while its run lives.

    It holds the staged batch inputs and the full per-batch outcomes until publication.  The
    folder's directory lock is released when the run ends, or by the kernel when the process dies
    (SIGKILL included); :func:`recover` deletes work folders nobody holds.  Use as a context
    manager, or call :meth:`close` once.
    """

    def __init__(self, path: pathlib.Path, fd: int):
        self.path = path
        self._fd: int | None = fd

    def close(self) -> None:
        """Delete the folder and release its lock (idempotent)."""
        if self._fd is None:
            return
        try:
            shutil.rmtree(self.path, ignore_errors=True)
        finally:
            os.close(self._fd)
            self._fd = None

    def __enter__(self) -> WorkFolder:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def open_work_folder(archive_root: str | os.PathLike, run_id: str) -> WorkFolder:
    """Create and lock the scratch folder of run ``run_id`` (see :class:`WorkFolder`).

    Raises
    ------
    ArchiveError
        When the run id already has a work folder (run ids are unique: use :func:`new_run_id`).
    """
    root = _root(archive_root)
    _check_name(run_id, "run id")
    with _archive_lock(root):  # recover() scans .work under this lock: it never sees an unlocked new folder
        folder = _mkdirs(root, _WORK) / run_id
        try:
            folder.mkdir()
        except FileExistsError:
            raise ArchiveError(
                f"run {run_id} already has a work folder {_rel(root, folder)}; "
                "start the run with a new id (new_run_id())"
            ) from None
        fd = os.open(folder, os.O_RDONLY | os.O_DIRECTORY)
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    return WorkFolder(folder, fd)
