"""Scale-out: the fleet audit on a local Dask cluster with 2 worker processes against 1.

Both runs use prefect-dask's ``DaskTaskRunner`` with a ``distributed.LocalCluster`` (one thread
per worker process) and one real local Prefect server (``fitaudit.flows.server.local_server``;
Dask workers cannot share the embedded one).  Each run is a fresh child process auditing the
same fleet into its own archive.  The speed-up is the ratio of the two flow wall times (cluster
start-up included); the audit stage alone (the batch tasks) is shown as well.

:func:`projection` turns the two runs' stage times into an Amdahl-style model of larger clusters
(the formula and its assumptions are in ``bench/notes.py``); ``python -m bench.scaleout
[--quick]`` prints the measurements and the projection.
"""

from __future__ import annotations

import os
import pathlib
import shutil
import tempfile

from .fleet_data import write_fleet
from .harness import child_env, run_child, warm_prefect_home

__all__ = ["main", "projection"]

GOAL = 1.7
#: Cluster sizes the model projects to.
PROJECTED_WORKERS = (8, 32)


def projection(one: dict, two: dict, workers: tuple[int, ...] = PROJECTED_WORKERS) -> dict:
    """Amdahl-style model of the flow's wall time on ``N`` Dask workers, from the 1- and 2-worker runs.

    ``T(N) = S + A/N + C/min(N, m) + R/N + E``: ``S`` the serial part of the 1-worker run
    (staging, calibration tables, archive writing and run page, and the rest of the flow outside
    the batch stages: registry, history, fleet rules, cluster start), ``A``, ``C``, ``R`` its
    audit, candidate-search and render stages, ``m`` the number of models searched for
    candidates (one search is one task, so at most ``m`` run at once), and ``E`` the 2-worker
    run's batch-stage time beyond this split (scheduler and per-task overhead, and on two cores
    the competition with the flow process, the Prefect server and the scheduler), taken as a
    per-worker constant because every worker runs the same number of batch rounds (at least four
    batches per worker).  ``ideal`` sets ``E = 0``.  Speed-ups are against the measured 1-worker
    flow.
    """
    t1, t2 = one["flow_timings"], two["flow_timings"]
    m = max(1, int(one["counts"].get("respecify", 0)))
    audit, cand, render = t1["audit_s"], t1.get("candidates_s", 0.0), t1["render_s"]
    archive = t1["publish_s"] - t1["render_s"]  # publish_s runs from the start of render to the archive's end
    named = t1["stage_s"] + t1["calibration_s"] + archive
    batch1 = audit + cand + render
    serial = one["flow_s"] - batch1
    batch2 = t2["audit_s"] + t2.get("candidates_s", 0.0) + t2["render_s"]
    excess = max(0.0, batch2 - (audit / 2 + cand / min(2, m) + render / 2))

    def wall(n: int, e: float) -> float:
        return serial + audit / n + cand / min(n, m) + render / n + e

    out = {
        "serial_s": serial,
        "serial_named_s": named,
        "serial_other_s": serial - named,
        "serial_two_s": two["flow_s"] - batch2,
        "audit_s": audit,
        "candidates_s": cand,
        "render_s": render,
        "candidate_models": m,
        "excess_s": excess,
        "batches": [None, one.get("batches"), two.get("batches")],  # by worker count
        "one_worker_s": one["flow_s"],
        "limit": one["flow_s"] / (serial + excess),
        "limit_ideal": one["flow_s"] / serial,
        "projected": {},
    }
    for n in workers:
        t, ti = wall(n, excess), wall(n, 0.0)
        out["projected"][n] = {
            "flow_s": t,
            "speedup": one["flow_s"] / t,
            "ideal_flow_s": ti,
            "ideal_speedup": one["flow_s"] / ti,
        }
    return out


def describe_projection(p: dict) -> str:
    """The model with the measured numbers filled in (for the page and the console)."""
    lines = [
        f"T(N) = S + A/N + C/min(N, m) + R/N + E with S = {p['serial_s']:.1f} s serial (staging, calibration tables "
        f"and archive writing {p['serial_named_s']:.1f} s; registry, history, fleet rules and cluster start "
        f"{p['serial_other_s']:.1f} s; {p['serial_two_s']:.1f} s in the 2-worker run), A = {p['audit_s']:.1f} s audit, "
        f"C = {p['candidates_s']:.1f} s candidate search over m = {p['candidate_models']} models, R = "
        f"{p['render_s']:.1f} s records and pages (1-worker stage times), E = {p['excess_s']:.1f} s (the 2-worker "
        f"run's batch stages beyond A/2 + C/min(2, m) + R/2); batches: {p['batches'][1]} with 1 worker, "
        f"{p['batches'][2]} with 2."
    ]
    for n, q in p["projected"].items():
        lines.append(
            f"{n} workers: {q['flow_s']:.1f} s, {q['speedup']:.1f}x the 1-worker flow ({q['ideal_flow_s']:.1f} s, "
            f"{q['ideal_speedup']:.1f}x with E = 0)."
        )
    lines.append(
        f"Limit for many workers: T(1) / (S + E) = {p['limit']:.1f}x (T(1) / S = {p['limit_ideal']:.1f}x with E = 0)."
    )
    return " ".join(lines)


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
                    # the whole fresh archive: the promotions of the production versions are chain entries
                    shutil.copytree(paths.archive, archive)
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
    model = projection(one, two)
    projected = model["projected"]
    return [
        {
            "benchmark": "Scale-out (Dask)",
            "size": f"{n} series, LocalCluster 1 vs 2 worker processes, real Prefect server",
            "measured": f"1 worker {one['flow_s']:.1f} s, 2 workers {two['flow_s']:.1f} s (flow wall time); "
            f"audit stage {one['flow_timings']['audit_s']:.1f} s vs {two['flow_timings']['audit_s']:.1f} s "
            f"({audit_speedup:.2f}x)",
            "ratio": speedup,
            "ratio_text": f"{speedup:.2f}x",
            "goal": f">= {GOAL}x",
            "met": speedup >= GOAL,
            "details": {"one_worker": one, "two_workers": two, "projection": model},
        },
        {
            "benchmark": "Scale-out model (Dask, on paper)",
            "size": f"{n} series; " + ", ".join(f"{w} workers" for w in projected),
            "measured": "; ".join(
                f"{w} workers {q['flow_s']:.1f} s ({q['ideal_flow_s']:.1f} s without the 2-worker excess)"
                for w, q in projected.items()
            )
            + f"; serial part {model['serial_s']:.1f} s of the 1-worker flow's {one['flow_s']:.1f} s; limit "
            f"{model['limit']:.1f}x (formula under the table)",
            "ratio": projected[max(projected)]["speedup"],
            "ratio_text": ", ".join(f"{q['speedup']:.1f}x" for q in projected.values()) + " over 1 worker",
            "goal": "a model from this run's stage times (no goal)",
            "met": None,
        },
    ]


if __name__ == "__main__":
    import argparse

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="200 series instead of 1,000")
    rows = main(quick=parser.parse_args().quick)
    for r in rows:
        print(f"{r['benchmark']}: {r['measured']} -> {r['ratio_text']}")
    print(describe_projection(rows[0]["details"]["projection"]))
