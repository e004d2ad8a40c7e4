"""Give freed memory back to the operating system after a stage that allocates a lot at once.

Two allocators keep memory a process has freed, so that its resident set stays at the stage's peak
for the rest of the run:

* pyarrow's memory pool (mimalloc or jemalloc) keeps the pages of freed buffers for reuse: after
  staging's scans of the extracts (:func:`fitaudit.tasks.batches.stage_inputs`) about 110 MB
  per 1,000 daily series of two years, with nothing allocated in the pool any more;
* glibc's ``malloc`` keeps freed blocks of its heap and arenas (numpy's temporaries: the
  simulations of the null tables, the staged arrays) until ``malloc_trim`` returns them.

:func:`release_freed_memory` asks both to return what they hold unused.  It frees nothing that is
in use, so no result depends on it; it only lowers the resident set the later stages start from.
"""

from __future__ import annotations

import ctypes
import sys

__all__ = ["release_freed_memory"]


def release_freed_memory() -> dict[str, bool]:
    """Return freed memory of pyarrow's pool and of glibc's heap to the operating system.

    pyarrow's pool is released only when pyarrow is already imported (this function never imports
    it); ``malloc_trim(0)`` (glibc, Linux only) returns the free pages of every ``malloc`` arena.
    Safe to call from any thread: both take their allocator's locks.

    Returns
    -------
    dict
        ``{"pyarrow": bool, "malloc_trim": bool}``: which of the two were asked.
    """
    done = {"pyarrow": False, "malloc_trim": False}
    pa = sys.modules.get("pyarrow")
    if pa is not None and hasattr(pa, "default_memory_pool"):
        pa.default_memory_pool().release_unused()
        done["pyarrow"] = True
    trim = _malloc_trim()
    if trim is not None:
        trim(0)
        done["malloc_trim"] = True
    return done


def _malloc_trim():
    """glibc's ``malloc_trim``, or None (another C library, another system)."""
    if not sys.platform.startswith("linux"):
        return None
    try:
        return ctypes.CDLL(None).malloc_trim
    except (OSError, AttributeError):
        return None
