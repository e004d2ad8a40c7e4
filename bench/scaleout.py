"""Scale-out: the fleet audit on a local Dask cluster with 2 worker processes against 1.

Both runs use prefect-dask's ``DaskTaskRunner`` with a ``distributed.LocalCluster`` (one thread
per worker process) and one real local Prefect server (``fitaudit.flows.server.local_server``;
Dask workers cannot share the embedded one).  Each run is a fresh child process auditing the
same fleet into its own archive.  The speed-up is the ratio of the two flow wall times (cluster
start-up included); the audit stage alone (the batch tasks) is shown as well.
"""

from __future__ import annotations

import os
import pathlib
import shutil
import tempfile

from .fleet_data import write_fleet
from .harness import child_env, run_child, warm_prefect_home

__all__ = ["main"]

GOAL = 1.7


def main(quick: bool = False) -> list[dict]:
    """Audit the fleet with 1 and with 2 Dask worker processes; one result row."""
    from fitaudit.flows.server import local_server

    n = 200 if quick else 1000
    runs = {}
    with tempfile.TemporaryDirectory(prefix="fitaudit-bench-scaleout-") as tmp:
        root = pathlib.Path(tmp)
        paths = write_fleet(root / "fleet", n)
        home = root / "prefect-home"
        warm_prefect_home(home)
        previous = os.environ.get("PREFECT_HOME")
        os.environ["PREFECT_HOME"] = str(home)  # the server's database
        try:
            with local_server(log_path=str(root / "server.log")) as api_url:
                for workers in (1, 2):
                    archive = root / f"archive-{workers}"
                    shutil.copytree(pathlib.Path(paths.archive) / "params", archive / "params")
                    runs[workers] = run_child(
                        "bench.fleet",
                        ["--registry", paths.registry, "--archive", str(archive), "--dask", str(workers)],
                        child_env(home, api_url),
                    )
        finally:
            if previous is None:
                os.environ.pop("PREFECT_HOME", None)
            else:
                os.environ["PREFECT_HOME"] = previous
    one, two = runs[1], runs[2]
    speedup = one["flow_s"] / two["flow_s"]
    audit_speedup = one["flow_timings"]["audit_s"] / two["flow_timings"]["audit_s"]
    return [
        {
            "benchmark": "Scale-out (Dask)",
            "size": f"{n} series, LocalCluster 1 vs 2 worker processes, real Prefect server",
            "measured": f"1 worker {one['flow_s']:.1f} s, 2 workers {two['flow_s']:.1f} s (flow wall time); "
            f"audit stage {one['flow_timings']['audit_s']:.1f} s vs {two['flow_timings']['audit_s']:.1f} s ({audit_speedup:.2f}x)",
            "ratio": speedup,
            "ratio_text": f"{speedup:.2f}x",
            "goal": f">= {GOAL}x",
            "met": speedup >= GOAL,
            "details": {"one_worker": one, "two_workers": two},
        }
    ]
