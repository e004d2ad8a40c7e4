"""Simulated null tables kept between runs, in ``<archive>/.tables/``.

A null table is a deterministic function of its key, the seed and the code that simulates it
(docs/method.md §7.7), so a fleet audited every week needs the same tables every week: the
normal law's refit tables for each residual count, the production window's table, and the
student-t tables at the grid of estimated shapes the candidate search meets.  A
:class:`FolderTableStore` passed to :class:`~fitaudit.core.calibration.CalibrationCache` keeps
each table built in a run as one ``.npz`` file and hands it to later runs instead of
simulating it again.

A kept table is used only by the same code: its file name and its contents carry a digest of
fitaudit's ``core`` sources, of the numpy and scipy versions and of the machine type
(:func:`code_digest`), so any change to the simulation makes the old files unused.  The files
are a cache, not evidence: deleting the folder, or the setting ``reuse_null_tables = false``,
makes every run simulate its tables again, with identical results.  Written with ``numpy.savez``
and read with ``allow_pickle=False``: a file holds arrays and one JSON text, never code.
"""

from __future__ import annotations

import dataclasses
import functools
import hashlib
import io
import json
import os
import pathlib
import platform
import socket
import sys
import time
import zipfile

import numpy as np

from fitaudit.core.calibration import NullTable, StatisticTable

from ._io import claim, write_replacing

__all__ = ["TABLE_FOLDER", "FolderTableStore", "ClaimedTableStore", "archive_tables", "code_digest"]

#: The store's folder under the archive root (private; a cache, not evidence).
TABLE_FOLDER = ".tables"

#: What reading an absent, damaged or foreign file raises (numpy's loader, the zip reader, the JSON text).
_UNREADABLE = (OSError, EOFError, ValueError, KeyError, TypeError, AttributeError, zipfile.BadZipFile)

#: The table classes a file may hold, by the name its JSON text gives; every field but ``key``
#: and ``method`` is an array (or None, which is not written).
_KINDS = {"null": NullTable, "statistic": StatisticTable}


def _arrays(table_class: type) -> list[str]:
    return [f.name for f in dataclasses.fields(table_class) if f.name not in ("key", "method")]


@functools.cache
def code_digest() -> str:
    """SHA-256 of what a simulated table depends on besides its key: every source file of
    ``fitaudit.core`` (path and bytes, in path order), the numpy and scipy versions (their random
    streams and special functions), the Python version and the machine type."""
    import scipy

    import fitaudit.core

    root = pathlib.Path(fitaudit.core.__file__).parent
    h = hashlib.sha256()
    for path in sorted(root.rglob("*.py")):
        h.update(path.relative_to(root).as_posix().encode() + b"\0" + path.read_bytes() + b"\0")
    python = "{}.{}".format(*sys.version_info[:2])
    h.update(f"numpy {np.__version__} scipy {scipy.__version__} python {python} {platform.machine()}".encode())
    return h.hexdigest()


@dataclasses.dataclass(frozen=True)
class FolderTableStore:
    """A :class:`~fitaudit.core.calibration.TableStore` of one ``.npz`` file per table in ``folder``.

    Plain data (a path), so a cache that holds it pickles to worker processes, which then read
    and write the same folder; a file is written to a temporary name and renamed, so a reader
    never sees half of one, and two processes that build the same table write equal tables.
    A file that is missing, unreadable or written by other code is not used (:meth:`load` returns
    None and the table is simulated); a folder that cannot be written only loses the saving.
    """

    folder: pathlib.Path

    def name(self, key: tuple) -> str:
        """The name of the file kept for ``key`` by this code, without its suffix."""
        return hashlib.sha256(f"{code_digest()}\0{key!r}".encode()).hexdigest()[:40]

    def _path(self, key: tuple) -> pathlib.Path:
        return self.folder / f"{self.name(key)}.npz"

    def load(self, key: tuple) -> NullTable | StatisticTable | None:
        """The table kept for ``key`` by this code, or None."""
        try:
            with np.load(self._path(key), allow_pickle=False) as data:
                meta = json.loads(str(data["meta"]))
                if meta.get("key") != repr(key) or meta.get("code") != code_digest():
                    return None
                table_class = _KINDS[meta["kind"]]
                arrays = {name: data[name] if name in data.files else None for name in _arrays(table_class)}
                return table_class(key=key, method=meta["method"], **arrays)
        except _UNREADABLE:
            return None

    def save(self, key: tuple, table: NullTable | StatisticTable) -> None:
        """Keep ``table`` under ``key`` (a table of another class, or an unwritable folder: nothing kept)."""
        kind = next((name for name, cls in _KINDS.items() if type(table) is cls), None)
        if kind is None:
            return
        meta = json.dumps({"key": repr(key), "code": code_digest(), "kind": kind, "method": table.method})
        arrays = {name: getattr(table, name) for name in _arrays(type(table)) if getattr(table, name) is not None}
        data = io.BytesIO()
        np.savez(data, meta=np.array(meta), **arrays)
        try:
            self.folder.mkdir(parents=True, exist_ok=True)
            write_replacing(self._path(key), data.getvalue())
        except OSError:
            return

    def release(self, key: tuple) -> None:
        """Nothing: no other process waits for this store's tables."""


#: How long a process waits for a table another one claimed before it builds the table itself.
CLAIM_WAIT_S = 600.0


@dataclasses.dataclass(frozen=True)
class ClaimedTableStore:
    """A :class:`FolderTableStore` shared by processes that build tables at the same time (the
    candidate search's lanes), so that each table is simulated by one of them.

    A process that misses a table claims its name in the folder ``claims`` before it builds it
    (an ``O_EXCL`` file naming its host and process) and marks it done once the table is saved
    (or the build failed: :meth:`release`); a process that finds the name claimed waits for the
    mark and reads the table instead of simulating it again.  It builds the table itself when the
    claimant's process is gone (same host) or after :data:`CLAIM_WAIT_S`, so a lost claimant costs
    time, never a result: a table is a deterministic function of its key and the seed.  (Two lanes
    whose models estimate the same student-t shape each simulated its table, about 0.35 s, twice
    in the fleet benchmark's twelve such tables.)
    """

    store: FolderTableStore
    claims: pathlib.Path

    def load(self, key: tuple) -> NullTable | StatisticTable | None:
        """The kept table; None when this call claimed it (the caller builds and saves it)."""
        table = self.store.load(key)
        if table is not None:
            return table
        name = self.store.name(key)
        try:
            self.claims.mkdir(parents=True, exist_ok=True)
            if claim(self.claims, name, f"{socket.gethostname()} {os.getpid()}"):
                return None
        except OSError:  # no claims folder: build here, as without claims
            return None
        self._wait(name)
        return self.store.load(key)

    def save(self, key: tuple, table: NullTable | StatisticTable) -> None:
        """Keep the table, then mark its claim done."""
        self.store.save(key, table)
        self.release(key)

    def release(self, key: tuple) -> None:
        """Mark the claim of ``key`` done: the processes waiting for it read the store (or build)."""
        try:
            claim(self.claims, f"{self.store.name(key)}.done")
        except OSError:
            return

    def _wait(self, name: str) -> None:
        done = self.claims / f"{name}.done"
        deadline = time.monotonic() + CLAIM_WAIT_S
        while not done.exists() and time.monotonic() < deadline:
            if not _claimant_alive(self.claims / name):
                return
            time.sleep(0.005)


def _claimant_alive(path: pathlib.Path) -> bool:
    """False when the claim at ``path`` names a process of this host that is gone; True otherwise
    (another host's, or a claim whose text is not written yet)."""
    try:
        host, pid = path.read_text().split()
    except (OSError, ValueError):
        return True
    if host != socket.gethostname():
        return True
    try:
        os.kill(int(pid), 0)
    except ProcessLookupError:
        return False
    except (PermissionError, ValueError):
        return True
    return True


def archive_tables(archive_root: str | os.PathLike, reuse: bool = True) -> FolderTableStore | None:
    """The store in ``<archive_root>/.tables``, or None when ``reuse`` is false (the setting
    ``reuse_null_tables``: every table is then simulated in every run)."""
    return FolderTableStore(pathlib.Path(archive_root) / TABLE_FOLDER) if reuse else None
