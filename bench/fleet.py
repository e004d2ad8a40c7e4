"""Fleet throughput and orchestration share: the full audit against the by-hand peer.

The fleet (``bench/fleet_data.py``: 1,000 daily series of 730 days, 80 % seasonal ARIMA with an
exogenous input, 20 % Holt-Winters, every model with a production version) goes through
``audit_flow`` on the embedded Prefect server in a fresh child process: production and refit
checks, simulated calibration, fleet rules, candidate search, report, archive, events and
artifacts.  The peer (``bench/peer.py``) runs in the parent on a random subset and is
extrapolated per series.

*Throughput* counts the embedded server's start-up and the flow call.  The server is launched as
``fitaudit run`` launches it, after the registry is read (not timed) and before the flow's modules
are imported, and its start-up is timed from the launch to its first answer: the imports and the
start of the local worker processes run meanwhile and are inside that time.

*Orchestration share* is the part of the flow call spent outside fitaudit's own work functions
(staging, calibration, audits, fleet rules, candidate search, results document, rendering,
archive writing; timed with :class:`~bench.harness.WorkClock`), i.e. inside Prefect: task and
flow run bookkeeping, state changes, the API round trips, events and artifacts.

*Fit-bound ratio* is the fleet's wall time (server start and flow, as for the throughput) over the
time of the fleet's model fits alone, measured in the same run by :func:`fit_time`: each
series' model fitted as the audit's refit check fits it (on the registry's fit window, here the
whole 730 days) plus the production filter (the one-step errors of the production parameters),
one series after another in the parent process, divided by the number of worker processes the
flow uses (one per CPU): the time the fits alone would take if split evenly over the flow's
workers, with nothing else to do.

The first run is made :data:`FIRST_RUNS` times, each into its own copy of the fresh archive, and
every figure is the median run's (:func:`median_run`): one run's time moves by a second or two on
a shared machine.

*Tables kept* is a further run of the same fleet, into a copy of the fresh archive that holds the
``.tables`` folder a first run left (as next week's run finds it, docs/architecture.md §2.4):
the same work, but the null tables are read instead of simulated.  Its results must equal each
first run's byte for byte; goal 1 is judged on the first runs, which simulate every table.

*CPU use* is the CPU time of the same run, per process (the flow process, the worker processes,
the Prefect server; :class:`~bench.harness.CpuSnapshot`), set against the CPU that goal 1's wall
time allows on this machine's cores: a run that keeps every core busy can only get faster by
doing less work.
"""

from __future__ import annotations

import argparse
import importlib
import json
import os
import pathlib
import shutil
import tempfile
import time
import warnings

from fitaudit.core.vocabulary import VERDICTS

from .fleet_data import AS_OF, FleetSeries, fleet_series, model_ids, write_fleet
from .harness import (
    CPU_SAMPLE_S,
    CpuSnapshot,
    CpuTimeline,
    WorkClock,
    child_env,
    cpu_used,
    idle_phases,
    run_child,
    warm_prefect_home,
    write_result,
)

__all__ = ["main", "WORK_FUNCTIONS", "audit_in_child", "fit_time"]

GOAL_RATIO = 20.0
GOAL_SHARE = 0.10
GOAL_FIT_BOUND = 3.0
#: First runs of the fleet (one with ``--quick``): the figures are the median run's (:func:`median_run`).
FIRST_RUNS = 3

#: fitaudit's own work, as called by the flow and its tasks (module, function).  ``run_local``
#: is where a batch task hands its plain function (audit, candidate search, records and pages)
#: to the local worker processes, or runs it in place.  A function is listed at each module that
#: calls it by its global name (the flow module before its @tasks moved to fitaudit.tasks, and
#: the task modules after, and the audit stage's ``task`` module since its @tasks moved apart from
#: the plain functions); :func:`audit_in_child` patches the entries that exist and refuses to run
#: when a function exists at none of them.
WORK_FUNCTIONS = (
    ("fitaudit.tasks.registry", "load_registry"),
    ("fitaudit.flows.audit", "recover"),
    ("fitaudit.tasks.archive_tasks", "recover"),
    ("fitaudit.flows.audit", "require_intact"),
    ("fitaudit.tasks.archive_tasks", "require_intact"),
    ("fitaudit.flows.audit", "load_history"),
    ("fitaudit.tasks.publish", "load_history"),
    ("fitaudit.tasks.batches", "stage_inputs"),
    ("fitaudit.tasks.audit", "calibration_for"),
    ("fitaudit.tasks.audit.task", "calibration_for"),
    ("fitaudit.tasks.audit", "run_local"),
    ("fitaudit.tasks.audit.task", "run_local"),
    ("fitaudit.flows.audit", "finalize"),
    ("fitaudit.tasks.audit", "finalize"),
    ("fitaudit.tasks.audit.task", "finalize"),
    ("fitaudit.tasks.publish", "run_local"),
    ("fitaudit.flows.audit", "results_head"),
    ("fitaudit.flows.audit", "results_summary"),
    ("fitaudit.flows.audit", "package_versions"),
    ("fitaudit.flows.audit", "code_commit"),
    ("fitaudit.flows.audit", "publish_staged"),
    ("fitaudit.tasks.publish", "publish_staged"),
    ("fitaudit.flows.audit", "render_archive_index_file"),
    ("fitaudit.tasks.publish", "render_archive_index_file"),
)


def _patch_work_functions(clock: WorkClock) -> None:
    """Time every existing entry of :data:`WORK_FUNCTIONS`; raise if a function exists at none."""
    found = set()
    for module, name in WORK_FUNCTIONS:
        try:
            present = hasattr(importlib.import_module(module), name)
        except ModuleNotFoundError:
            present = False
        if present:
            clock.patch(module, name)
            found.add(name)
    missing = sorted({name for _, name in WORK_FUNCTIONS} - found)
    if missing:
        raise RuntimeError(
            f"bench/fleet.py: work functions not found at any listed module: {missing}; update WORK_FUNCTIONS"
        )


def audit_in_child(registry: str, archive: str, models: list[str] | None = None, dask_workers: int = 0) -> dict:
    """Run the audit flow in this (child) process and time it; returns timings and counts."""
    from fitaudit.flows import _env
    from fitaudit.tasks.registry import load_registry

    _env.configure_prefect()
    # as `fitaudit run` does: the registry read before anything starts (not timed); then the embedded
    # server launched, the flow's imports and the start of its worker processes while it starts, and
    # its runs without heartbeats (a configured server, as for the Dask runs, keeps Prefect's settings)
    audited = len(set(models)) if models else len(load_registry(registry).models)
    clock = WorkClock()
    timeline = CpuTimeline()
    cpu0 = CpuSnapshot.now()
    t0 = time.perf_counter()
    from fitaudit.flows.server import command_imports, embedded_server

    def prepare() -> None:  # the command's imports and workers, then the timers around the work functions
        command_imports("fitaudit.flows.audit")
        if not dask_workers:  # the Dask runs' flow uses no local worker processes
            from fitaudit.flows.audit import start_workers_early

            start_workers_early(audited)
        _patch_work_functions(clock)

    with timeline, embedded_server(prepare):
        from prefect.client.orchestration import get_client

        from fitaudit.flows.audit import audit_flow

        flow_fn = audit_flow
        if dask_workers:
            from fitaudit.flows.runners import dask_runner

            flow_fn = audit_flow.with_options(task_runner=dask_runner(f"local:{dask_workers}"))  # as --dask local:N
        with get_client(sync_client=True) as client:  # the first answer of the embedded server (or the real one)
            client.hello()
        t1 = time.perf_counter()
        cpu1 = CpuSnapshot.now()
        result = flow_fn(registry=registry, as_of=AS_OF, archive=archive, models=models)
        t2 = time.perf_counter()
        cpu2 = CpuSnapshot.now()
    work = clock.covered(t1, t2)
    path = pathlib.Path(result["report"]).parent / "manifest.json"
    manifest = json.loads(path.read_text()) if path.is_file() else {}
    return {
        "batches": manifest.get("batches"),
        "server_start_s": t1 - t0,
        "flow_s": t2 - t1,
        "work_s": work,
        "orchestration_s": (t2 - t1) - work,
        "work_by_function_s": clock.by_label(),
        # CPU seconds: while the server starts (this process's imports, the server), and during the
        # flow (this process, the server, the worker processes or Dask cluster the flow started)
        "cpu_s": {
            "server_start": {k: v for k, v in cpu_used(cpu0, cpu1).items() if k != "lasting"},
            "flow": cpu_used(cpu1, cpu2),
        },
        # idle core-seconds per phase, from the process tree's CPU sampled every CPU_SAMPLE_S seconds
        "cpu_phases": idle_phases(timeline.samples, t0, t1, t2, os.cpu_count() or 1, batch_span(clock)),
        "counts": result["counts"],
        "tables": {k: manifest.get(k) for k in ("calibration_tables", "calibration_tables_reused")},
        "flow_timings": result["timings"],
        "report": result["report"],
    }


def batch_span(clock: WorkClock) -> tuple[float, float] | None:
    """From the start of the flow's first call of ``run_local`` (the batch work it hands to the worker
    processes: audit, candidate search, records and pages) to the end of its last; None without one."""
    calls = [(a, b) for a, b, label in clock.intervals if label.endswith(".run_local")]
    return (min(a for a, _ in calls), max(b for _, b in calls)) if calls else None


def fit_time(series: list[FleetSeries], workers: int | None = None) -> dict:
    """Seconds of the fleet's model fits alone, as the audit does them, one series after another.

    Per series: the refit (``model.fit`` on the whole series, the benchmark registry's fit window,
    without standard errors, as :func:`fitaudit.core.checks.refit_model`)
    and the production filter (``model.production_errors`` with the generating parameters, the
    promoted production version).  One warm-up fit comes first (it imports scipy's modules).
    ``fit_bound_s`` is the sequential time over ``workers`` (default: the flow's worker
    processes, one per CPU).
    """
    from fitaudit.core.models import model_from_dict
    from fitaudit.tasks.workers import default_processes

    workers = workers or default_processes()
    per_family: dict[str, float] = {}
    counts: dict[str, int] = {}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # convergence warnings: the audit reports them, here only time counts
        first = series[0]
        model_from_dict(first.spec).fit(first.y, first.exog or None, standard_errors=False)
        for s in series:
            model = model_from_dict(s.spec)
            exog = s.exog or None
            t0 = time.perf_counter()
            model.fit(s.y, exog, standard_errors=False)  # as the audit's refit_model
            model.production_errors(s.y, s.params, exog)
            elapsed = time.perf_counter() - t0
            family = s.spec["family"]
            per_family[family] = per_family.get(family, 0.0) + elapsed
            counts[family] = counts.get(family, 0) + 1
    sequential = sum(per_family.values())
    return {
        "sequential_s": sequential,
        "workers": workers,
        "fit_bound_s": sequential / workers,
        "per_family_ms": {k: 1e3 * v / counts[k] for k, v in per_family.items()},
        "counts": counts,
    }


def _fit_bound_row(n: int, ours: dict, fits: dict) -> dict:
    wall = _wall(ours)
    ratio = wall / fits["fit_bound_s"]
    fam = ", ".join(f"{k} {v:.1f} ms" for k, v in sorted(fits["per_family_ms"].items()))
    return {
        "benchmark": "Fit-bound ratio",
        "size": f"the same {n}-series run",
        "measured": f"fleet wall time {wall:.1f} s (flow {ours['flow_s']:.1f} s + server start "
        f"{ours['server_start_s']:.1f} s) over the fits alone {fits['fit_bound_s']:.1f} s (refit and production "
        f"filter of every series, {fits['sequential_s']:.1f} s one after another in one process, split over the "
        f"flow's {fits['workers']} worker processes; per series: {fam}); flow alone "
        f"{ours['flow_s'] / fits['fit_bound_s']:.1f}x",
        "ratio": ratio,
        "ratio_text": f"{ratio:.1f}x",
        "goal": f"<= {GOAL_FIT_BOUND:.0f}x",
        "met": ratio <= GOAL_FIT_BOUND,
        "details": {"fits": fits},
    }


def _fleet_rows(n: int, ours: dict, peer: dict, runs: list[dict]) -> list[dict]:
    ours_s = _wall(ours)
    spread = (
        f"; the median of {len(runs)} runs of {', '.join(f'{_wall(r):.1f}' for r in runs)} s" if len(runs) > 1 else ""
    )
    ours_rate = n / ours_s
    ratio = ours_rate / peer["series_per_second"]
    share = ours["orchestration_s"] / ours["flow_s"]
    cores = os.cpu_count() or 1
    c = ours["counts"]
    verdicts = ", ".join(f"{c[v]} {v}" for v in VERDICTS if c.get(v))
    fam = ", ".join(f"{k} {v:.2f} s" for k, v in sorted(peer["per_family_s"].items()))
    return [
        {
            "benchmark": "Fleet throughput",
            "size": f"{n} series x 730 days ({verdicts})",
            "measured": f"fitaudit {ours_rate:.2f} series/s ({ours_s:.1f} s incl. {ours['server_start_s']:.1f} s "
            f"server start{spread}); peer {peer['series_per_second']:.3f} series/s "
            f"({peer['seconds_per_series']:.2f} s/series: "
            f"{fam}; {peer['subset']} random series, extrapolated); per core {ratio / cores:.1f}x (fitaudit on "
            f"{cores} cores, the peer on one)",
            "ratio": ratio,
            "ratio_text": f"{ratio:.1f}x",
            "goal": f">= {GOAL_RATIO:.0f}x the peer's series/s",
            "met": ratio >= GOAL_RATIO,
            "details": {"ours": ours, "peer": peer, "first_runs_s": [_wall(r) for r in runs]},
        },
        {
            "benchmark": "Orchestration share",
            "size": f"the same {n}-series flow run",
            "measured": f"{ours['orchestration_s']:.1f} s of {ours['flow_s']:.1f} s flow wall time outside fitaudit's "
            f"work functions (server start-up {ours['server_start_s']:.1f} s not included)",
            "ratio": share,
            "ratio_text": f"{100 * share:.1f} %",
            "goal": f"<= {100 * GOAL_SHARE:.0f} %",
            "met": share <= GOAL_SHARE,
            "details": {"work_by_function_s": ours["work_by_function_s"]},
        },
    ]


def _kept_row(n: int, ours: dict, kept: dict, peer: dict, same: bool) -> dict:
    """The second run, with the first run's null tables kept (no goal: goal 1 is judged on the first)."""
    wall = _wall(kept)
    ratio = n / wall / peer["series_per_second"]
    t0, t1 = ours["flow_timings"], kept["flow_timings"]
    stages = ", ".join(
        f"{name} {t0[key]:.1f} -> {t1[key]:.1f} s"
        for name, key in (("null tables", "calibration_s"), ("candidate search", "candidates_s"))
        if key in t0 and key in t1
    )
    tables = kept.get("tables") or {}
    return {
        "benchmark": "Fleet throughput, tables kept",
        "size": f"the same {n} series, run again into a fresh archive holding a first run's .tables",
        "measured": f"{n / wall:.2f} series/s ({wall:.1f} s incl. {kept['server_start_s']:.1f} s server start); "
        f"flow {ours['flow_s']:.1f} -> {kept['flow_s']:.1f} s ({stages}); "
        f"{tables.get('calibration_tables_reused')} of the run's {tables.get('calibration_tables')} shared tables "
        f"reused; results.json {'identical to' if same else 'DIFFERENT from'} each first run's",
        "ratio": ratio,
        "ratio_text": f"{ratio:.1f}x",
        "goal": "none (goal 1 is judged on the first runs); results identical",
        "met": None if same else False,
        "details": {"kept": kept, "same_results": same},
    }


def _results_bytes(run: dict) -> bytes:
    return (pathlib.Path(run["report"]).parent / "results.json").read_bytes()


#: The flow's phases of :func:`bench.harness.idle_phases`, as the CPU row names them.
_PHASE_TEXT = {
    "before_batches": "before the batch stages",
    "batches": "during them",
    "after_batches": "after them",
}


def _idle_text(phases: dict) -> str:
    """The idle core-seconds of :func:`bench.harness.idle_phases`, for the CPU row ("" without them)."""
    if not phases:
        return ""
    flow = {k: v["idle_core_s"] for k, v in phases.items() if k != "server_start"}
    parts = ", ".join(f"{_PHASE_TEXT[k]} {v:.1f}" for k, v in flow.items())
    return (
        f"; idle core-seconds (sampled every {CPU_SAMPLE_S:g} s): server start "
        f"{phases['server_start']['idle_core_s']:.1f}, flow {sum(flow.values()):.1f} ({parts})"
    )


def _cpu_row(n: int, ours: dict, peer: dict) -> dict:
    """Where the run's CPU seconds went, against the CPU that goal 1's wall time allows."""
    cores = os.cpu_count() or 1
    start, flow = ours["cpu_s"]["server_start"], ours["cpu_s"]["flow"]
    used = sum(start.values()) + sum(flow.values())
    allowed_s = n / (GOAL_RATIO * peer["series_per_second"])  # goal 1's wall time for the whole run
    budget = cores * allowed_s
    busy = sum(flow.values()) / ours["flow_s"]
    phases = ours.get("cpu_phases") or {}
    return {
        "benchmark": "CPU use",
        "size": f"the same {n}-series run",
        "measured": f"flow {ours['flow_s']:.1f} s: worker processes {flow['passing']:.1f}, flow process "
        f"{flow['own']:.1f}, Prefect server {flow['lasting']:.1f} CPU s ({sum(flow.values()):.1f} CPU s, "
        f"{busy:.2f} of {cores} cores busy on average); server start {ours['server_start_s']:.1f} s: "
        f"{sum(start.values()):.1f} CPU s (the command's imports {start['own']:.1f}, the server "
        f"{start['passing']:.1f}); "
        f"goal 1 allows {allowed_s:.1f} s, at most {budget:.1f} CPU s on {cores} cores{_idle_text(phases)}",
        "ratio": used / budget,
        "ratio_text": f"{used:.1f} CPU s, {used / budget:.1f}x goal 1's",
        "goal": "a reading of goal 1 (no goal of its own)",
        "met": None,
        "details": {
            "cpu_s": ours["cpu_s"],
            "flow_s": ours["flow_s"],
            "allowed_s": allowed_s,
            "cores": cores,
            "phases": phases,
            "sample_s": CPU_SAMPLE_S,
            "server_start_s": ours["server_start_s"],
        },
    }


def main(quick: bool = False) -> list[dict]:
    """Generate the fleet, time the peer on a subset and the audit flow on all of it."""
    # imported here: the peer loads statsmodels (about 20 MB), which the audit's child (also
    # bench.memory's) must not carry
    from .peer import measure_peer

    n = 200 if quick else 1000
    subset = 10 if quick else 50
    with tempfile.TemporaryDirectory(prefix="fitaudit-bench-fleet-") as tmp:
        root = pathlib.Path(tmp)
        paths = write_fleet(root / "fleet", n)
        home = root / "prefect-home"
        warm_prefect_home(home)
        series = fleet_series(n)
        peer = measure_peer(series, paths.data + "/fleet", subset)
        fits = fit_time(series)
        fresh = pathlib.Path(paths.archive)  # never run into: every run gets its own copy
        runs = []
        for i in range(1 if quick else FIRST_RUNS):  # each into its own copy of the fresh archive
            archive = root / f"archive-{i}"
            shutil.copytree(fresh, archive)
            runs.append(
                run_child("bench.fleet", ["--registry", paths.registry, "--archive", str(archive)], child_env(home))
            )
        ours = median_run(runs)
        # next week's run: the fresh archive with the tables a first run kept
        again = root / "archive-again"
        shutil.copytree(fresh, again)
        shutil.copytree(root / "archive-0" / ".tables", again / ".tables")
        kept = run_child("bench.fleet", ["--registry", paths.registry, "--archive", str(again)], child_env(home))
        same = all(_results_bytes(run) == _results_bytes(kept) for run in runs)
    rows = _fleet_rows(n, ours, peer, runs) + [_kept_row(n, ours, kept, peer, same)]
    return rows + [_fit_bound_row(n, ours, fits), _cpu_row(n, ours, peer)]


def _wall(run: dict) -> float:
    """A fleet run's end-to-end time: the embedded server's start and the flow call."""
    return run["server_start_s"] + run["flow_s"]


def median_run(runs: list[dict]) -> dict:
    """The run whose end-to-end time is the median of ``runs`` (an odd number of them): every figure
    of the fleet's rows comes from that one run, so its stages add up.

    >>> [r["flow_s"] for r in [median_run([{"server_start_s": 3, "flow_s": f} for f in (19, 21, 18)])]]
    [19]
    """
    return sorted(runs, key=_wall)[len(runs) // 2]


def _child(argv: list[str] | None = None) -> None:
    p = argparse.ArgumentParser()
    p.add_argument("--child", action="store_true")
    p.add_argument("--registry", required=True)
    p.add_argument("--archive", required=True)
    p.add_argument("--models", type=int, default=0, help="audit only the fleet's first N models")
    p.add_argument("--dask", type=int, default=0, help="Dask LocalCluster worker processes (0: default runner)")
    p.add_argument("--result", required=True)
    args = p.parse_args(argv)
    models = model_ids(args.models) if args.models else None
    write_result(args.result, audit_in_child(args.registry, args.archive, models, args.dask))


if __name__ == "__main__":
    _child()
