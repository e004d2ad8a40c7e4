"""Local worker processes for the CPU-bound part of batch tasks.

Prefect's default task runner runs tasks in threads of the flow process, and numpy-heavy Python
code holds the GIL most of the time, so two batch tasks in two threads use about one core.
:func:`local_workers` starts a small pool of processes for one flow run
and hands out a *token* (a plain string); a task that receives the token runs its plain function
in the pool with :func:`run_local`, one whole batch per call, and returns the result as usual.
Tasks run by another runner (a Dask worker, another process) do not find the token and run the
function in place, so the token is always safe to pass.

A command that is about to run a flow can start the workers ahead of it
(:func:`start_spare_workers`, while the embedded Prefect server starts and a core would otherwise
wait); the flow's :func:`local_workers` then takes them over instead of starting its own.

Results do not depend on where a batch runs: every computation is seeded by its inputs.
"""

from __future__ import annotations

import atexit
import concurrent.futures as cf
import contextlib
import multiprocessing
import os
import signal
import sys
import threading
import uuid
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures.process import BrokenProcessPool
from typing import Any, TypeVar

from fitaudit.core.exceptions import FitauditError

from .memory import collector_paused, release_freed_memory

__all__ = [
    "local_workers",
    "start_spare_workers",
    "stop_spare_workers",
    "run_local",
    "map_local",
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
_SPARE: list[tuple[int, cf.ProcessPoolExecutor]] = []  # at most one pool started ahead of a run: (processes, pool)


class WorkersStopped(FitauditError):
    """A batch could not finish because its run was interrupted and the worker processes stopped."""


def default_processes() -> int:
    """Worker processes for a local run: the CPUs this process may use."""
    try:
        return len(os.sched_getaffinity(0))
    except AttributeError:  # not on Linux
        return os.cpu_count() or 1


_TURN: Any = None  # in a worker of a spare pool: the lock its workers' imports take in turn


def _set_turn(lock: Any) -> None:
    """Worker initialiser of a spare pool: keep the pool's lock for :func:`_warm`."""
    global _TURN
    _TURN = lock


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
    with _TURN if _TURN is not None else contextlib.nullcontext(), collector_paused():
        import fitaudit.tasks.audit.work  # noqa: F401
        import fitaudit.tasks.outcomes  # noqa: F401
        import fitaudit.tasks.report  # noqa: F401
        from fitaudit.core._scipy import warm_imports

        warm_imports()  # the scipy modules the fits use, which core imports on first use
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


def _start_pool(processes: int, in_turn: bool = False) -> cf.ProcessPoolExecutor:
    """A ``spawn`` pool of ``processes`` workers, each started now and importing the work's modules
    (with ``in_turn``, one worker's imports after another's)."""
    ctx = multiprocessing.get_context("spawn")
    turn = dict(initializer=_set_turn, initargs=(ctx.Lock(),)) if in_turn else {}
    pool = cf.ProcessPoolExecutor(max_workers=processes, mp_context=ctx, **turn)
    with _main_module_hidden(), _single_threaded_blas():
        for _ in range(processes):  # each submit starts one worker while no worker is idle
            pool.submit(_warm)
    return pool


def start_spare_workers(processes: int | None = None) -> None:
    """Start ``processes`` local workers (default: one per CPU) now, for the next
    :func:`local_workers` of the same number to take over.

    A command calls it while the embedded Prefect server starts: the server's imports keep one
    core busy for seconds and the command's own imports end sooner, so the workers' imports (about
    0.6 CPU s each) run on a core that would otherwise wait, instead of beside the run's first
    stages.  At most one spare pool exists; one that no run takes is stopped by
    :func:`stop_spare_workers`, or at the latest when the process exits.  Fewer than two
    processes: nothing is started (a run computes in place).
    """
    processes = default_processes() if processes is None else int(processes)
    if processes < 2:
        return
    with _POOLS_LOCK:
        if _SPARE:
            return
        _SPARE.append((processes, _start_pool(processes, in_turn=True)))


def stop_spare_workers() -> None:
    """Stop the spare workers of :func:`start_spare_workers` if no run took them over (else nothing)."""
    with _POOLS_LOCK:
        spare = _SPARE.pop() if _SPARE else None
    if spare is not None:
        spare[1].shutdown(wait=True, cancel_futures=True)


atexit.register(stop_spare_workers)  # a spare pool no run took (nothing otherwise)


def submit_to_spare(fn: Callable[..., T], *args: Any) -> cf.Future | None:
    """``fn(*args)`` on a worker of the spare pool (:func:`start_spare_workers`), which stays spare
    for the run to take over; None when there is no spare pool (the caller computes in place).

    For a run's first stages, before it knows how many workers its batches need: the workers are
    idle then.  As for :func:`run_local`, ``fn`` lives in a module that imports neither Prefect,
    pyarrow nor pandas; the caller takes the result before the run takes the pool over.
    """
    with _POOLS_LOCK:
        pool = _SPARE[0][1] if _SPARE else None
        if pool is None:
            return None
        try:
            return pool.submit(_run_and_release, fn, *args)
        except RuntimeError:  # the pool is shutting down (the process is exiting)
            return None


def _take_spare(processes: int) -> cf.ProcessPoolExecutor | None:
    """The spare pool if it has ``processes`` workers, removed from the spares; None otherwise (a
    spare of another size is stopped: the run starts its own)."""
    with _POOLS_LOCK:
        spare = _SPARE.pop() if _SPARE else None
    if spare is None:
        return None
    if spare[0] == processes:
        return spare[1]
    spare[1].shutdown(wait=False, cancel_futures=True)
    return None


@contextlib.contextmanager
def local_workers(processes: int) -> Iterator[str | None]:
    """A pool of ``processes`` worker processes for the duration of the block; yields its token.

    Yields None (run everything in place) when ``processes`` < 2.  The workers are started with
    ``spawn`` (the flow process has threads, so ``fork`` would be unsafe) and a single-threaded
    BLAS, begin importing fitaudit right away and are shut down when the block ends, also on error.
    Workers of the same number started ahead by :func:`start_spare_workers` are taken over instead.
    """
    if processes < 2:
        stop_spare_workers()  # started for a run that computes in place after all
        yield None
        return
    token = f"fitaudit-workers-{uuid.uuid4().hex}"
    pool = _take_spare(processes) or _start_pool(processes)
    with _POOLS_LOCK:
        _POOLS[token] = pool
    try:
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
    return map_local(token, fn, [args])[0]


def map_local(token: str | None, fn: Callable[..., T], calls: Sequence[Sequence[Any]]) -> list[T]:
    """``[fn(*args) for args in calls]``: handed to the pool named by ``token`` all at once (so its
    workers share them), or computed in place, one after another, when this process holds no such
    pool; the results in the order of ``calls`` either way (as :func:`run_local`)."""
    with _POOLS_LOCK:
        pool = _POOLS.get(token) if token else None
        stopped = token in _STOPPED
    if stopped:
        raise WorkersStopped("the run was interrupted; its worker processes were stopped")
    if pool is None:
        return [fn(*args) for args in calls]
    try:
        futures = [pool.submit(_run_and_release, fn, *args) for args in calls]
        return [future.result() for future in futures]
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
