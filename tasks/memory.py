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

Python's cyclic garbage collector, too, works on what a process has imported: each of its full
passes walks every tracked object, and after the imports a flow process holds about 400,000 of
them (Prefect, pydantic, pyarrow, scipy), a worker about 200,000.  :func:`freeze_heap` and
:func:`heap_frozen` leave the objects that exist at that moment out of later passes, and
:func:`collector_paused` makes a process's imports without the passes at all.

The first touch of memory can cost more than the work done in it.  numpy and pyarrow's pool ask
Linux for transparent huge pages (2 MiB) for large buffers; on a virtual machine whose host
provides the guest's memory only when the guest first uses it (a microVM, such as the benchmark
machine of docs/performance.md), a huge page the guest had not used before took about 7 ms to
appear, so touching 100 MB of new buffers took 0.3-0.8 s, against 0.04 s in small pages, which
the guest reuses from what it freed recently.  :func:`small_pages` asks for small pages while a
stage that allocates much at once, and only once, runs (staging's scans).
"""

from __future__ import annotations

import contextlib
import ctypes
import gc
import sys
from collections.abc import Iterator

__all__ = ["release_freed_memory", "freeze_heap", "collector_paused", "heap_frozen", "small_pages"]


def freeze_heap() -> int:
    """Leave every object that exists now out of the garbage collector's later passes (``gc.freeze``).

    The objects are still freed by reference counting as before; only a reference cycle among
    them that becomes garbage later stays until :func:`gc.unfreeze`.  Meant for right after a
    process's imports, whose modules, classes and functions live as long as the process: a full
    pass over them took 0.13-0.16 s in the flow process of the benchmark fleet, three times per
    run, and a worker spent 15 % of its rendering time in them.  Returns the number of frozen
    objects (``gc.get_freeze_count()``).
    """
    gc.freeze()
    return gc.get_freeze_count()


@contextlib.contextmanager
def collector_paused() -> Iterator[None]:
    """Run the block (a process's imports) with the cyclic collector paused, then freeze what it
    made (:func:`freeze_heap`) and let the collector resume as it was.

    Imports make hundreds of thousands of long-lived objects and almost no garbage, yet each
    import that allocates enough starts a collection, and the full ones walk everything imported
    so far: 0.3-0.4 s of the embedded Prefect server's 2.1 s of imports, 0.04 s of a worker's 0.62 s,
    on the benchmark machine.
    """
    enabled = gc.isenabled()
    gc.disable()
    try:
        yield
    finally:
        freeze_heap()
        if enabled:
            gc.enable()


@contextlib.contextmanager
def heap_frozen() -> Iterator[int]:
    """:func:`freeze_heap` while inside, ``gc.unfreeze`` on leaving (also on error), so that a
    process running many flows does not keep the cycles each leaves behind.  Yields the number of
    frozen objects."""
    try:
        yield freeze_heap()
    finally:
        gc.unfreeze()


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


#: ``prctl`` options (linux/prctl.h): the process's "no transparent huge pages" flag.
_PR_SET_THP_DISABLE = 41
_PR_GET_THP_DISABLE = 42


@contextlib.contextmanager
def small_pages() -> Iterator[bool]:
    """While inside, memory this process touches for the first time comes in small pages.

    Sets the process's "no transparent huge pages" flag (``prctl(PR_SET_THP_DISABLE)``, Linux
    3.15 and later) and puts back the flag it found on leaving (also on error).  Pages already in
    use keep their size, and nothing but the time of page faults changes: no result depends on it.
    The flag belongs to the whole process (every thread's faults while inside; a child process
    started meanwhile inherits it), so it is meant for a stage that runs alone; when two such
    stages overlap, the first to leave restores the flag early, which costs only time.  Yields
    whether the flag was set (False on another system, or where the kernel refuses).
    """
    prctl = _prctl()
    before = prctl(_PR_GET_THP_DISABLE, 0, 0, 0, 0) if prctl is not None else -1
    if before < 0 or prctl(_PR_SET_THP_DISABLE, 1, 0, 0, 0) != 0:
        yield False
        return
    try:
        yield True
    finally:
        prctl(_PR_SET_THP_DISABLE, before, 0, 0, 0)


def _prctl():
    """The C library's ``prctl`` on Linux, or None."""
    return _linux_libc("prctl")


def _malloc_trim():
    """glibc's ``malloc_trim``, or None (another C library, another system)."""
    return _linux_libc("malloc_trim")


def _linux_libc(name: str):
    """The C library's function ``name`` on Linux, or None (another system, or a C library without it)."""
    if not sys.platform.startswith("linux"):
        return None
    try:
        return getattr(ctypes.CDLL(None), name)
    except (OSError, AttributeError):
        return None
