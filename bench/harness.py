"""Helpers shared by the benchmarks: child processes, the Prefect environment, work clocks.

Each heavy measurement runs in a fresh child process (``python -m bench.<module> --child ...``)
so that Prefect's state, memory and imports of one benchmark never leak into another.  A child
writes its result as JSON to a file named by the parent.
"""

from __future__ import annotations

import glob
import importlib
import json
import os
import pathlib
import resource
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Callable, Sequence
from typing import NamedTuple

__all__ = [
    "REPO",
    "child_env",
    "run_child",
    "write_result",
    "WorkClock",
    "warm_prefect_home",
    "CpuSnapshot",
    "cpu_used",
]

REPO = pathlib.Path(__file__).resolve().parents[1]


def child_env(prefect_home: str | os.PathLike, api_url: str | None = None) -> dict:
    """Environment of a benchmark child: the repository on ``sys.path``, a private Prefect home,
    the embedded server (or ``api_url``), and fitaudit's quiet settings."""
    env = {k: v for k, v in os.environ.items() if not k.startswith("PREFECT_")}
    env["PYTHONPATH"] = str(REPO) + (os.pathsep + env["PYTHONPATH"] if env.get("PYTHONPATH") else "")
    env["PREFECT_HOME"] = str(prefect_home)
    if api_url:
        env["PREFECT_API_URL"] = api_url
    else:
        env["PREFECT_SERVER_EPHEMERAL_ENABLED"] = "true"
    return env


def run_child(module: str, args: Sequence[str], env: dict, timeout: float = 7200.0) -> dict:
    """Run ``python -m module --child ... --result FILE`` and return the JSON it wrote.

    Raises ``RuntimeError`` with the child's output tail when it fails.
    """
    with tempfile.TemporaryDirectory(prefix="fitaudit-bench-") as tmp:
        out = pathlib.Path(tmp) / "result.json"
        cmd = [sys.executable, "-m", module, "--child", *map(str, args), "--result", str(out)]
        proc = subprocess.run(cmd, cwd=REPO, env=env, capture_output=True, text=True, timeout=timeout)
        if proc.returncode != 0 or not out.exists():
            tail = "\n".join((proc.stdout + proc.stderr).splitlines()[-40:])
            raise RuntimeError(
                f"benchmark child {module} {' '.join(map(str, args))} failed with code {proc.returncode}:\n{tail}"
            )
        return json.loads(out.read_text())


def write_result(path: str, result: dict) -> None:
    """Write a child's result (the parent reads it with :func:`run_child`)."""
    pathlib.Path(path).write_text(json.dumps(result, indent=2, default=float))


def warm_prefect_home(prefect_home: str | os.PathLike) -> None:
    """Create and migrate the Prefect database of ``prefect_home`` with a one-task flow.

    A user's second run finds a migrated database; timing the first-ever start (migrations)
    would charge a one-off cost to the benchmark.
    """
    code = (
        "from fitaudit.flows import _env; _env.configure_prefect()\n"
        "from prefect import flow, task\n"
        "@task\ndef one(): return 1\n"
        "@flow\ndef warm(): return one()\n"
        "warm()\n"
    )
    proc = subprocess.run(
        [sys.executable, "-c", code], cwd=REPO, env=child_env(prefect_home), capture_output=True, text=True, timeout=600
    )
    if proc.returncode != 0:
        raise RuntimeError(f"warming the Prefect home {prefect_home} failed:\n{proc.stderr[-3000:]}")


class WorkClock:
    """Wall-clock intervals spent inside chosen plain functions (any thread).

    :meth:`patch` replaces ``module.name`` by a timing wrapper; :meth:`covered` returns the
    length of the union of the recorded intervals within a window, so overlapping calls (nested,
    or in two threads at once) count once.
    """

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self.intervals: list[tuple[float, float, str]] = []

    def patch(self, module_name: str, name: str) -> None:
        """Time every call of ``module_name.name`` (raises if it does not exist)."""
        module = importlib.import_module(module_name)
        original: Callable = getattr(module, name)
        label = f"{module_name.rsplit('.', 1)[-1]}.{name}"

        def timed(*args, **kwargs):
            t0 = time.perf_counter()
            try:
                return original(*args, **kwargs)
            finally:
                with self._lock:
                    self.intervals.append((t0, time.perf_counter(), label))

        timed.__wrapped__ = original
        timed.__module__, timed.__qualname__ = (
            module_name,
            name,
        )  # pickled by reference: other processes get the original
        setattr(module, name, timed)

    def covered(self, start: float, end: float) -> float:
        """Seconds of ``[start, end]`` inside at least one recorded interval."""
        spans = sorted((max(a, start), min(b, end)) for a, b, _ in self.intervals if b > start and a < end)
        total, cur_a, cur_b = 0.0, None, None
        for a, b in spans:
            if cur_b is None or a > cur_b:
                if cur_b is not None:
                    total += cur_b - cur_a
                cur_a, cur_b = a, b
            else:
                cur_b = max(cur_b, b)
        if cur_b is not None:
            total += cur_b - cur_a
        return total

    def by_label(self) -> dict[str, float]:
        """Summed seconds per function (nested and concurrent calls each counted)."""
        out: dict[str, float] = {}
        for a, b, label in self.intervals:
            out[label] = out.get(label, 0.0) + (b - a)
        return out


class CpuSnapshot(NamedTuple):
    """CPU seconds (user + system) used so far: by this process, by the children it has waited for,
    and by each child (any depth) still running, by pid."""

    own: float
    waited: float
    running: dict[int, float]

    @classmethod
    def now(cls) -> CpuSnapshot:
        import psutil  # a benchmark dependency (bench.memory): fitaudit itself does not need it

        own, waited = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
        running = {}
        for child in psutil.Process().children(recursive=True):
            try:
                t = child.cpu_times()
            except psutil.Error:  # gone meanwhile: counted as waited for, once its parent reaps it
                continue
            running[child.pid] = t.user + t.system
        return cls(own.ru_utime + own.ru_stime, waited.ru_utime + waited.ru_stime, running)


#: Seconds between two samples of :class:`CpuTimeline` (a sample costs a fraction of a millisecond of CPU).
CPU_SAMPLE_S = 0.2


class CpuTimeline:
    """The process tree's CPU seconds, sampled in a thread every ``interval`` seconds while inside.

    Each sample is ``(time.perf_counter(), this process, the Prefect server, the other children)``,
    cumulative CPU seconds (user + system); the server is the child running Prefect's server
    (:func:`is_embedded_server`), the other children are the worker processes.  A child that has
    ended keeps its last sampled CPU, so up to one interval of each worker's work at its very end
    is missed.
    """

    def __init__(self, interval: float = CPU_SAMPLE_S):
        self.interval = interval
        self.samples: list[tuple[float, float, float, float]] = []
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._sample, name="bench-cpu-timeline", daemon=True)

    def __enter__(self) -> CpuTimeline:
        self._thread.start()
        return self

    def __exit__(self, *exc) -> None:
        self._stop.set()
        self._thread.join()

    def _sample(self) -> None:
        import psutil  # a benchmark dependency (bench.memory): fitaudit itself does not need it

        me = psutil.Process()
        own_cmdline = me.cmdline()
        children: dict[int, tuple[str, float]] = {}  # pid: (role, last CPU seconds seen)
        handles: dict[int, psutil.Process] = {}
        while True:
            mine = me.cpu_times()
            for pid in descendants(me.pid):
                try:
                    child = handles.get(pid) or handles.setdefault(pid, psutil.Process(pid))
                    role = children[pid][0] if pid in children else _role(child, own_cmdline)
                    if role is None:
                        continue
                    t = child.cpu_times()
                except psutil.Error:  # gone meanwhile: its last sample stands
                    continue
                children[pid] = (role, t.user + t.system)
            server = sum(cpu for role, cpu in children.values() if role == "server")
            workers = sum(cpu for role, cpu in children.values() if role == "workers")
            self.samples.append((time.perf_counter(), mine.user + mine.system, server, workers))
            if self._stop.wait(self.interval):
                return


def descendants(pid: int) -> list[int]:
    """The process ids below ``pid``, from Linux's ``/proc/<pid>/task/<tid>/children`` lists (about
    0.1 ms for this run's tree); psutil's ``children(recursive=True)`` elsewhere, which reads every
    process's parent on the machine (about 2 ms a call, 4-5 ms while the run loads the CPU: with a
    sample every 0.2 s, 0.7 CPU s of the measured process's run went to the timeline before)."""
    if not os.path.exists(f"/proc/{pid}/task/{pid}/children"):
        import psutil

        try:
            return [child.pid for child in psutil.Process(pid).children(recursive=True)]
        except psutil.Error:
            return []
    found, todo = [], [pid]
    while todo:
        parent = todo.pop()
        for listing in glob.glob(f"/proc/{parent}/task/*/children"):
            try:
                with open(listing) as handle:
                    kids = [int(x) for x in handle.read().split()]
            except (OSError, ValueError):  # the thread or process ended meanwhile
                continue
            found += kids
            todo += kids
    return found


def is_embedded_server(cmdline: Sequence[str]) -> bool:
    """Whether a command line runs Prefect's embedded server: it names the server's application
    factory (``uvicorn --factory``), however it is launched (:mod:`fitaudit.flows.server_process`)."""
    from fitaudit.flows.server_process import APP_FACTORY

    return APP_FACTORY in cmdline


def _role(child, own_cmdline: list[str]) -> str | None:
    """``server`` (:func:`is_embedded_server`) or ``workers``; None for a child forked but not yet
    running its own program (it still shows this process's command line), which the next sample
    looks at again."""
    cmdline = child.cmdline()
    if cmdline == own_cmdline:
        return None
    return "server" if is_embedded_server(cmdline) else "workers"


def idle_phases(
    samples: Sequence[tuple[float, float, float, float]],
    start: float,
    ready: float,
    end: float,
    cores: int,
    batches: tuple[float, float] | None = None,
) -> dict[str, dict[str, float]]:
    """Wall time, CPU seconds and idle core-seconds (cores x wall - CPU) of a run's phases, from
    :class:`CpuTimeline` samples: ``server_start`` (``start`` to ``ready``, the server's first
    answer), then in the flow (``ready`` to ``end``) ``before_batches``, ``batches`` and
    ``after_batches``.  The batch stages are ``batches`` (their first call handed to the worker
    processes starts, their last ends) when given, else the span in which the worker processes
    used CPU (a worker that checks the archive beside staging makes that span start early).
    Boundaries are read at the samples (the last one at or before each time); a flow without
    batch stages has only ``before_batches``.
    """

    def at(t: float) -> tuple[float, float]:
        """(time, total CPU) of the last sample at or before t (the first sample if none)."""
        chosen = samples[0]
        for sample in samples:
            if sample[0] <= t:
                chosen = sample
        return chosen[0], sum(chosen[1:])

    flow = [s for s in samples if ready <= s[0] <= end]
    if batches is None:
        rising = [s[0] for prev, s in zip(flow, flow[1:]) if s[3] > prev[3]]
        # a worker's CPU rises at the sample after the interval it worked in: that interval starts one sample earlier
        if rising:
            batches = (max((p[0] for p in flow if p[0] < rising[0]), default=ready), rising[-1])
    bounds = {"server_start": (start, ready)}
    if batches is not None:
        first, last = max(batches[0], ready), min(batches[1], end)
        bounds |= {"before_batches": (ready, first), "batches": (first, last), "after_batches": (last, end)}
    else:
        bounds["before_batches"] = (ready, end)
    out = {}
    for name, (a, b) in bounds.items():
        (ta, ca), (tb, cb) = at(a), at(b)
        wall = max(tb - ta, 0.0)
        out[name] = {"wall_s": wall, "cpu_s": cb - ca, "idle_core_s": max(cores * wall - (cb - ca), 0.0)}
    return out


def cpu_used(before: CpuSnapshot, after: CpuSnapshot) -> dict[str, float]:
    """CPU seconds between two snapshots of one process: ``own`` (this process), ``lasting`` (children
    running at both, such as a server) and ``passing`` (children started meanwhile: those waited
    for, and those still running at ``after``).  A child that started before ``before`` and was
    waited for meanwhile would count whole in ``passing``; the benchmarks start none such."""
    lasting = sum(after.running[pid] - cpu for pid, cpu in before.running.items() if pid in after.running)
    started = sum(cpu for pid, cpu in after.running.items() if pid not in before.running)
    return {"own": after.own - before.own, "lasting": lasting, "passing": after.waited - before.waited + started}
