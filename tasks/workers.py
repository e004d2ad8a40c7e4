"""Local worker processes for the CPU-bound part of batch tasks.

Prefect's default task runner runs tasks in threads of the flow process, and numpy-heavy Python
code holds the GIL most of the time, so two batch tasks in two threads use about one core.
:func:`local_workers` starts a small pool of processes for one flow run
and hands out a *token* (a plain string); a task that receives the token runs its plain function
in the pool with :func:`run_local`, one whole batch per call, and returns the result as usual.
Tasks run by another runner (a Dask worker, another process) do not find the token and run the
function in place, so the token is always safe to pass.

Results do not depend on where a batch runs: every computation is seeded by its inputs.
"""

from __future__ import annotations

import concurrent.futures as cf
import contextlib
import multiprocessing
import os
import signal
import sys
import threading
import uuid
from collections.abc import Callable, Iterator
from concurrent.futures.process import BrokenProcessPool
from typing import Any, TypeVar

from fitaudit.core.exceptions import FitauditError

from .memory import collector_paused, release_freed_memory

__all__ = [
    "local_workers",
    "run_local",
    "run_in_child",
    "WorkersStopped",
    "default_processes",
    "time_limit",
    "TimeLimitExceeded",
    "can_limit_time",
]

T = TypeVar("T")

_BLAS_THREADS = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")
_POOLS: dict[str, cf.ProcessPoolExecutor] = {}
_POOLS_LOCK = threading.Lock()
_STOPPED: set[str] = set()  # tokens of pools stopped because their run was interrupted


class WorkersStopped(FitauditError):
    """A batch could not finish because its run was interrupted and the worker processes stopped."""


def default_processes() -> int:
    """Worker processes for a local run: the CPUs this process may use."""
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        return os.cpu_count() or 1


def _warm() -> int:
    """Import the work's modules in a fresh worker (so the first batch does not pay for it), with
    the garbage collector paused and what they made frozen
    (:func:`~fitaudit.tasks.memory.collector_paused`).

    Only the plain functions' modules: the audit's (:mod:`fitaudit.tasks.audit.work`) and the
    records' and pages' (:mod:`fitaudit.tasks.outcomes`, :mod:`fitaudit.tasks.report`), and the
    scipy modules that core imports when a computation first needs them.  None of
    them imports Prefect, pyarrow or pandas, so a worker holds numpy, scipy, pydantic and Jinja2
    but not the flow's libraries (tests/test_startup.py checks).
    """
    # what the imports make lives as long as the worker: the collector need not walk it, then or later
    with collector_paused():
        import fitaudit.tasks.audit.work  # noqa: F401
        import fitaudit.tasks.outcomes  # noqa: F401
        import fitaudit.tasks.report  # noqa: F401
        from fitaudit.core._scipy import import_all

        import_all()  # the scipy modules the fits use, which core imports on first use
    return os.getpid()


def _run_and_release(fn: Callable[..., T], *args: Any) -> T:
    """``fn(*args)`` in a worker, then the memory it freed back to the operating system.

    A batch's peak (the null tables' simulations, the candidate search) is freed when it ends, but
    glibc's ``malloc`` keeps the pages: without :func:`~fitaudit.tasks.memory.release_freed_memory`
    an idle worker stays near its last peak (about 70 MB above its working size after a candidate
    search), which adds to the process tree's peak while the other worker and the flow work.
    Frees nothing in use, so the result does not depend on it.
    """
    try:
        return fn(*args)
    finally:
        release_freed_memory()


@contextlib.contextmanager
def _main_module_hidden() -> Iterator[None]:
    """Start processes without re-running the caller's script in them.

    A ``spawn`` child imports the parent's ``__main__`` module (by file or module name) before it
    runs anything; a script that calls the audit flow at top level, without an
    ``if __name__ == "__main__":`` guard, would then start a second audit in every worker.  The
    workers only run functions of fitaudit's own modules, so they need no ``__main__``: while they
    start, the main module shows neither a file nor a module spec.
    """
    main = sys.modules.get("__main__")
    saved = {
        name: main.__dict__[name] for name in ("__file__", "__spec__") if main is not None and name in main.__dict__
    }
    try:
        if main is not None:
            main.__dict__.pop("__file__", None)
            main.__dict__["__spec__"] = None
        yield
    finally:
        if main is not None:
            main.__dict__.update(saved)
            if "__spec__" not in saved:
                main.__dict__.pop("__spec__", None)


@contextlib.contextmanager
def _single_threaded_blas() -> Iterator[None]:
    """Start processes whose BLAS uses one thread (unless the caller chose otherwise).

    The audit runs thousands of small fits; a threaded BLAS only adds contention (an exponential
    smoothing fit took 7x longer with OpenBLAS's default threads on a 2-core machine).  The
    variables are read when a worker loads numpy, so they are set while the workers start.
    """
    added = [name for name in _BLAS_THREADS if name not in os.environ]
    try:
        for name in added:
            os.environ[name] = "1"
        yield
    finally:
        for name in added:
            os.environ.pop(name, None)


@contextlib.contextmanager
def local_workers(processes: int) -> Iterator[str | None]:
    """A pool of ``processes`` worker processes for the duration of the block; yields its token.

    Yields None (run everything in place) when ``processes`` < 2.  The workers are started with
    ``spawn`` (the flow process has threads, so ``fork`` would be unsafe) and a single-threaded
    BLAS, begin importing fitaudit right away and are shut down when the block ends, also on error.
    """
    if processes < 2:
        yield None
        return
    pool = cf.ProcessPoolExecutor(max_workers=processes, mp_context=multiprocessing.get_context("spawn"))
    token = f"fitaudit-workers-{uuid.uuid4().hex}"
    with _POOLS_LOCK:
        _POOLS[token] = pool
    try:
        with _main_module_hidden(), _single_threaded_blas():
            for _ in range(processes):  # each submit starts one worker while no worker is idle
                pool.submit(_warm)
        yield token
    except BaseException as exc:
        if not isinstance(
            exc, Exception
        ):  # interrupted (SIGTERM, Ctrl-C): stop the batches now rather than finish them
            with _POOLS_LOCK:
                _STOPPED.add(token)
            for process in list((getattr(pool, "_processes", None) or {}).values()):
                process.terminate()
        raise
    finally:
        with _POOLS_LOCK:
            _POOLS.pop(token, None)
        pool.shutdown(wait=True, cancel_futures=True)


def run_local(token: str | None, fn: Callable[..., T], *args: Any) -> T:
    """``fn(*args)`` in the pool named by ``token`` if this process holds it, else in place.

    ``fn`` and ``args`` must be picklable (module-level functions, plain data).  A worker imports
    ``fn``'s module to run it: keep such functions in modules that import neither Prefect, pyarrow
    nor pandas (``tasks/audit/work.py``, ``tasks/outcomes.py``; tests/test_startup.py).  In a
    worker, the memory the call freed is returned to the system after it (:func:`_run_and_release`).
    """
    with _POOLS_LOCK:
        pool = _POOLS.get(token) if token else None
        stopped = token in _STOPPED
    if stopped:
        raise WorkersStopped("the run was interrupted; its worker processes were stopped")
    if pool is None:
        return fn(*args)
    try:
        return pool.submit(_run_and_release, fn, *args).result()
    except (BrokenProcessPool, cf.CancelledError):  # a call still queued when the pool shut down is cancelled
        if token in _STOPPED:
            raise WorkersStopped("the run was interrupted; its worker processes were stopped") from None
        raise


def run_in_child(fn: Callable[..., T], *args: Any) -> T:
    """``fn(*args)`` in a fresh ``spawn`` process of its own; its result (or exception) comes back pickled.

    For work whose temporary memory the long-lived flow process should never hold: CPython
    returns freed memory to the system only when whole arenas empty, and the objects a job keeps
    end up scattered among the ones it freed.  The child's imports cost about a third of a second.
    """
    with _main_module_hidden(), _single_threaded_blas():
        with cf.ProcessPoolExecutor(max_workers=1, mp_context=multiprocessing.get_context("spawn")) as pool:
            return pool.submit(fn, *args).result()


class TimeLimitExceeded(BaseException):
    """Raised by :func:`time_limit` when its time is up.

    A ``BaseException`` (like ``KeyboardInterrupt``), so that a user's ``except Exception`` inside
    a mean function cannot swallow it and keep the model running.
    """

    def __init__(self, seconds: float):
        super().__init__(f"time limit of {seconds:g} s reached")
        self.seconds = seconds


def can_limit_time() -> bool:
    """True where :func:`time_limit` is enforced: the main thread of a process on a system with
    ``SIGALRM`` (a local worker process, or a run in a plain script), not task threads or Dask."""
    return hasattr(signal, "setitimer") and threading.current_thread() is threading.main_thread()


@contextlib.contextmanager
def time_limit(seconds: float | None) -> Iterator[bool]:
    """Raise :class:`TimeLimitExceeded` in the block after ``seconds`` of wall time.

    Uses an interval timer (``signal.setitimer``) and a ``SIGALRM`` handler, so it interrupts
    Python code, including a user's mean function that never returns; C code that never returns
    to the interpreter is not interrupted.  Enforced only where :func:`can_limit_time`; elsewhere,
    and for ``seconds`` of 0 or None, the block runs unlimited.  Yields whether the limit is on.
    """
    if not seconds or seconds <= 0 or not can_limit_time():
        yield False
        return

    def on_alarm(signum, frame):
        raise TimeLimitExceeded(seconds)

    previous = signal.signal(signal.SIGALRM, on_alarm)
    signal.setitimer(signal.ITIMER_REAL, seconds)
    try:
        yield True
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, previous)
