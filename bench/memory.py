"""Peak memory of the audit flow for growing fleets (2,500 / 5,000 / 10,000 models).

One generated extract of 10,000 series (``bench/fleet_data.py``) backs three runs that audit its
first 2,500, 5,000 and 10,000 models.  Each run is a fresh child process (``bench.fleet``'s
child, embedded Prefect server); this process polls the resident set size (RSS) of the child and
of everything it started (the embedded Prefect server, the local worker processes) every 0.2 s.

Reported per run: the peak RSS of the flow process, of the embedded Prefect server (the child
started as ``python -m fitaudit.flows.server_process``), of the local worker processes (every
other descendant, summed per sample) and the peak of the sum over the whole process tree.  The goal is judged on the
process tree, server and workers included; growth per 1,000 models (of the flow process, where
the run's data and results live) is compared with the size of the results themselves
(``results.json`` per 1,000 models).
"""

from __future__ import annotations

import os
import pathlib
import subprocess
import sys
import tempfile
import threading
import time

import psutil

from .fleet_data import write_fleet
from .harness import REPO, child_env, is_embedded_server, warm_prefect_home

__all__ = ["main", "peak_rss"]

GOAL_BYTES = 1.5 * 2**30


def peak_rss(cmd: list[str], env: dict, interval: float = 0.2) -> dict:
    """Run ``cmd`` and poll its memory; returns peak RSS (bytes) of the process, of the Prefect
    server it started, of its other descendants (the worker processes, summed) and of its tree."""
    proc = subprocess.Popen(cmd, cwd=REPO, env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    peaks = {"process": 0, "server": 0, "workers": 0, "tree": 0}
    output: list[str] = []
    reader = threading.Thread(target=lambda: output.extend(proc.stdout), daemon=True)
    reader.start()
    root = psutil.Process(proc.pid)
    while proc.poll() is None:
        try:
            own = root.memory_info().rss
            server = workers = 0
            for child in root.children(recursive=True):
                if _is_server(child):
                    server += _rss(child)
                else:
                    workers += _rss(child)
        except psutil.NoSuchProcess:
            break
        peaks["process"] = max(peaks["process"], own)
        peaks["server"] = max(peaks["server"], server)
        peaks["workers"] = max(peaks["workers"], workers)
        peaks["tree"] = max(peaks["tree"], own + server + workers)
        time.sleep(interval)
    proc.wait()
    reader.join(timeout=5)
    if proc.returncode != 0:
        raise RuntimeError(f"memory benchmark child failed ({proc.returncode}):\n" + "".join(output[-40:]))
    return peaks


def _is_server(p: psutil.Process) -> bool:
    """The embedded Prefect server (:func:`bench.harness.is_embedded_server`)."""
    try:
        return is_embedded_server(p.cmdline())
    except psutil.Error:
        return False


def _rss(p: psutil.Process) -> int:
    try:
        return p.memory_info().rss
    except psutil.NoSuchProcess:
        return 0


def main(quick: bool = False) -> list[dict]:
    """Peak RSS at a quarter, half and all of a 10,000-model fleet (quick: 1,000 models)."""
    total = 1000 if quick else 10000
    sizes = [total // 4, total // 2, total]
    runs = []
    with tempfile.TemporaryDirectory(prefix="fitaudit-bench-memory-") as tmp:
        root = pathlib.Path(tmp)
        paths = write_fleet(root / "fleet", total)
        home = root / "prefect-home"
        warm_prefect_home(home)
        for n in sizes:
            archive = root / f"archive-{n}"
            _copy_params(pathlib.Path(paths.archive), archive)
            out = root / f"result-{n}.json"
            cmd = [
                sys.executable,
                "-m",
                "bench.fleet",
                "--child",
                "--registry",
                paths.registry,
                "--archive",
                str(archive),
                "--models",
                str(n),
                "--result",
                str(out),
            ]
            t0 = time.perf_counter()
            peaks = peak_rss(cmd, child_env(home))
            results_size = _results_size(archive)
            runs.append({"models": n, "seconds": time.perf_counter() - t0, **peaks, "results_json_bytes": results_size})
    return [_row(runs, total)]


def _copy_params(src: pathlib.Path, dst: pathlib.Path) -> None:
    """A copy of the fresh fleet archive: the parameter store and the chain of its promotions, no
    run yet (so no run sees another's history)."""
    import shutil

    shutil.copytree(src, dst)


def _results_size(archive: pathlib.Path) -> int:
    found = list(archive.glob("runs/*/*/results.json"))
    return found[0].stat().st_size if found else 0


def _row(runs: list[dict], total: int) -> dict:
    mib = 2**20
    first, last = runs[0], runs[-1]
    growth = (last["process"] - first["process"]) / (last["models"] - first["models"]) * 1000
    results_per_1000 = last["results_json_bytes"] / last["models"] * 1000
    peak = last["tree"]
    text = "; ".join(
        f"{r['models']:,} models: tree {r['tree'] / mib:,.0f} MiB (flow {r['process'] / mib:,.0f}, "
        f"server {r.get('server', 0) / mib:,.0f}, workers {r.get('workers', 0) / mib:,.0f} MiB)"
        for r in runs
    )
    return {
        "benchmark": "Peak memory",
        "size": f"{total:,}-series extract; runs of " + ", ".join(f"{r['models']:,}" for r in runs) + " models",
        "measured": (
            f"{text}; flow process growth {growth / mib:.1f} MiB per 1,000 models (results.json: "
            f"{results_per_1000 / mib:.1f} MiB per 1,000)"
        ),
        "ratio": peak / GOAL_BYTES,
        "ratio_text": f"{peak / mib:,.0f} MiB",
        "goal": "process tree <= 1.5 GB at 10,000 models; growth no more than the results",
        "met": bool(peak <= GOAL_BYTES and growth <= results_per_1000),
        "details": {"runs": runs},
    }


if __name__ == "__main__":  # pragma: no cover - manual use
    import json

    print(json.dumps(main(quick="--quick" in sys.argv), indent=2, default=float))
    os._exit(0)
