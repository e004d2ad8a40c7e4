"""Fleet throughput and orchestration share: the full audit against the by-hand peer.

The fleet (``bench/fleet_data.py``: 1,000 daily series of 730 days, 80 % seasonal ARIMA with an
exogenous input, 20 % Holt-Winters, every model with a production version) goes through
``audit_flow`` on the embedded Prefect server in a fresh child process: production and refit
checks, simulated calibration, fleet rules, candidate search, report, archive, events and
artifacts.  The peer (``bench/peer.py``) runs in the parent on a random subset and is
extrapolated per series.

*Throughput* counts the embedded server's start-up and the flow call (not the Python imports,
which the peer does not pay either).  *Orchestration share* is the part of the flow call spent
outside fitaudit's own work functions (staging, calibration, audits, fleet rules, candidate
search, results document, rendering, archive writing; timed with
:class:`~bench.harness.WorkClock`), i.e. inside Prefect: task and flow run bookkeeping, state
changes, the API round trips, events and artifacts.
"""

from __future__ import annotations

import argparse
import pathlib
import tempfile
import time

from fitaudit.core.vocabulary import VERDICTS

from .fleet_data import AS_OF, fleet_series, model_ids, write_fleet
from .harness import WorkClock, child_env, run_child, warm_prefect_home, write_result
from .peer import measure_peer

__all__ = ["main", "WORK_FUNCTIONS", "audit_in_child"]

GOAL_RATIO = 20.0
GOAL_SHARE = 0.10

#: fitaudit's own work, as called by the flow and its tasks (module, function).  ``run_local``
#: is where a batch task hands its plain function (audit, candidate search, records and pages)
#: to the local worker processes, or runs it in place.
WORK_FUNCTIONS = (
    ("fitaudit.tasks.registry", "load_registry"),
    ("fitaudit.flows.audit", "recover"),
    ("fitaudit.flows.audit", "require_intact"),
    ("fitaudit.flows.audit", "load_history"),
    ("fitaudit.tasks.batches", "stage_inputs"),
    ("fitaudit.tasks.audit", "calibration_for"),
    ("fitaudit.tasks.audit", "run_local"),
    ("fitaudit.flows.audit", "finalize"),
    ("fitaudit.tasks.publish", "run_local"),
    ("fitaudit.flows.audit", "results_head"),
    ("fitaudit.flows.audit", "results_summary"),
    ("fitaudit.flows.audit", "package_versions"),
    ("fitaudit.flows.audit", "code_commit"),
    ("fitaudit.flows.audit", "publish_staged"),
    ("fitaudit.flows.audit", "render_archive_index_file"),
)


def audit_in_child(registry: str, archive: str, models: list[str] | None = None, dask_workers: int = 0) -> dict:
    """Run the audit flow in this (child) process and time it; returns timings and counts."""
    from fitaudit.flows import _env

    _env.configure_prefect()
    clock = WorkClock()
    for module, name in WORK_FUNCTIONS:
        clock.patch(module, name)
    from prefect.client.orchestration import get_client

    from fitaudit.flows.audit import audit_flow

    flow_fn = audit_flow
    if dask_workers:
        from prefect_dask import DaskTaskRunner

        runner = DaskTaskRunner(
            cluster_class="distributed.LocalCluster",
            cluster_kwargs={
                "n_workers": dask_workers,
                "threads_per_worker": 1,
                "processes": True,
                "dashboard_address": None,
            },
        )
        flow_fn = audit_flow.with_options(task_runner=runner)
    t0 = time.perf_counter()
    with get_client(sync_client=True) as client:  # starts the embedded server (or reaches the real one)
        client.hello()
    t1 = time.perf_counter()
    result = flow_fn(registry=registry, as_of=AS_OF, archive=archive, models=models)
    t2 = time.perf_counter()
    work = clock.covered(t1, t2)
    return {
        "server_start_s": t1 - t0,
        "flow_s": t2 - t1,
        "work_s": work,
        "orchestration_s": (t2 - t1) - work,
        "work_by_function_s": clock.by_label(),
        "counts": result["counts"],
        "flow_timings": result["timings"],
        "report": result["report"],
    }


def _fleet_rows(n: int, ours: dict, peer: dict) -> list[dict]:
    ours_s = ours["server_start_s"] + ours["flow_s"]
    ours_rate = n / ours_s
    ratio = ours_rate / peer["series_per_second"]
    share = ours["orchestration_s"] / ours["flow_s"]
    c = ours["counts"]
    verdicts = ", ".join(f"{c[v]} {v}" for v in VERDICTS if c.get(v))
    fam = ", ".join(f"{k} {v:.2f} s" for k, v in sorted(peer["per_family_s"].items()))
    return [
        {
            "benchmark": "Fleet throughput",
            "size": f"{n} series x 730 days ({verdicts})",
            "measured": f"fitaudit {ours_rate:.2f} series/s ({ours_s:.1f} s incl. {ours['server_start_s']:.1f} s server start); "
            f"peer {peer['series_per_second']:.3f} series/s ({peer['seconds_per_series']:.2f} s/series: {fam}; "
            f"{peer['subset']} random series, extrapolated)",
            "ratio": ratio,
            "ratio_text": f"{ratio:.1f}x",
            "goal": f">= {GOAL_RATIO:.0f}x the peer's series/s",
            "met": ratio >= GOAL_RATIO,
            "details": {"ours": ours, "peer": peer},
        },
        {
            "benchmark": "Orchestration share",
            "size": f"the same {n}-series flow run",
            "measured": f"{ours['orchestration_s']:.1f} s of {ours['flow_s']:.1f} s flow wall time outside fitaudit's work functions "
            f"(server start-up {ours['server_start_s']:.1f} s not included)",
            "ratio": share,
            "ratio_text": f"{100 * share:.1f} %",
            "goal": f"<= {100 * GOAL_SHARE:.0f} %",
            "met": share <= GOAL_SHARE,
            "details": {"work_by_function_s": ours["work_by_function_s"]},
        },
    ]


def main(quick: bool = False) -> list[dict]:
    """Generate the fleet, time the peer on a subset and the audit flow on all of it."""
    n = 200 if quick else 1000
    subset = 10 if quick else 50
    with tempfile.TemporaryDirectory(prefix="fitaudit-bench-fleet-") as tmp:
        root = pathlib.Path(tmp)
        paths = write_fleet(root / "fleet", n)
        home = root / "prefect-home"
        warm_prefect_home(home)
        peer = measure_peer(fleet_series(n), paths.data + "/fleet", subset)
        ours = run_child("bench.fleet", ["--registry", paths.registry, "--archive", paths.archive], child_env(home))
    return _fleet_rows(n, ours, peer)


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
