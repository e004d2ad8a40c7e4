"""The archive lock: ``<root>/.lock``, exclusive to change the archive, shared to read it consistently."""

from __future__ import annotations

import contextlib
import fcntl
import os
import pathlib
from collections.abc import Iterator

from .layout import _LOCK


@contextlib.contextmanager
def _archive_lock(root: pathlib.Path, *, shared: bool = False) -> Iterator[None]:
    """Hold ``<root>/.lock`` (exclusive to change the archive, shared to read it consistently).

    A shared lock is taken only when the lock file exists, so verification never writes.
    """
    if shared:
        try:
            fd = os.open(root / _LOCK, os.O_RDONLY)
        except OSError:
            yield
            return
    else:
        root.mkdir(parents=True, exist_ok=True)
        fd = os.open(root / _LOCK, os.O_RDWR | os.O_CREAT, 0o644)
    try:
        fcntl.flock(fd, fcntl.LOCK_SH if shared else fcntl.LOCK_EX)
        yield
    finally:
        os.close(fd)
