"""``python -m bench [--quick] [--only NAME ...] [--out PATH]``: every benchmark, one table.

Runs the micro-benchmarks (divergence map, model fits, command start-up), the fleet audit against the by-hand peer
(throughput and orchestration share), the Dask scale-out and the memory benchmark; prints one
table and writes it, with the machine description and the command, to ``docs/performance.md``.
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import os
import pathlib
import sys
import time
import traceback

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")  # many small fits: a threaded BLAS only adds contention

from . import machine  # noqa: E402
from .harness import REPO  # noqa: E402
from .notes import NOTES  # noqa: E402
from .reading import reading_the_goals  # noqa: E402

BENCHMARKS = ("micro", "fleet", "scaleout", "memory")


def _micro(quick: bool) -> list[dict]:
    from . import divergence_map, fingerprint, fit, gate_cost, startup

    rows = []
    for r in divergence_map.main(quick=quick):
        rows.append(
            {
                "benchmark": "Divergence map (micro)",
                "size": r["size"],
                "measured": (
                    f"fitaudit {r['ours_us_per_member']:.3f} us/member, scipy power_divergence loop "
                    f"{r['peer_us_per_member']:.2f} us/member"
                ),
                "ratio": r["ratio"],
                "ratio_text": f"{r['ratio']:.0f}x",
                "goal": r["goal"],
                "met": r["met"],
            }
        )
    for r in fit.main(quick=quick):
        rows.append(
            {
                "benchmark": "Model fit (micro)",
                "size": f"{r['case']} ({r['fits']} fits)",
                "measured": f"fitaudit {r['ours_ms']:.1f} ms, {r['peer']} {r['peer_ms']:.1f} ms per fit; "
                f"largest log-likelihood shortfall {r['shortfall']:.1e} (largest difference {r['dll_max_abs']:.1e})",
                "ratio": r["ratio"],
                "ratio_text": f"{r['ratio']:.1f}x",
                "goal": ">= 10x, log-likelihood not lower by 0.01",
                "met": r["met"],
            }
        )
    rows += gate_cost.main(quick=quick)
    rows += startup.main(quick=quick)
    rows += fingerprint.main(quick=quick)
    return rows


def _run(name: str, quick: bool) -> list[dict]:
    if name == "micro":
        return _micro(quick)
    module = __import__(f"bench.{name}", fromlist=["main"])
    return module.main(quick=quick)


def _table(rows: list[dict]) -> str:
    lines = ["| benchmark | size | measured | ratio | goal | met |", "| --- | --- | --- | --- | --- | --- |"]
    for r in rows:
        met = "n/a" if r["met"] is None else "yes" if r["met"] else "**no**"
        lines.append(f"| {r['benchmark']} | {r['size']} | {r['measured']} | {r['ratio_text']} | {r['goal']} | {met} |")
    return "\n".join(lines)


#: Readable names of bench/fleet.py's WorkClock labels.
_LABELS = {
    "audit.run_local": "audits and candidate searches",
    "publish.run_local": "records and pages",
    "audit.publish_staged": "archive writing and run page",
    "publish.publish_staged": "archive writing and run page",
    "publish.render_archive_index_file": "archive index page",
    "audit.calibration_for": "null tables",
    "batches.stage_inputs": "staging",
    "registry.load_registry": "registry",
    "audit.finalize": "fleet rules",
}


#: The flow's stage timings shown on the page, in the flow's order.
_STAGES = (
    "stage_s",
    "calibration_s",
    "audit_s",
    "candidates_s",
    "render_s",
    "publish_s",
    "events_s",
)


def _seconds(d: dict, keys: tuple) -> str:
    return ", ".join(f"{k.removesuffix('_s')} {d[k]:.1f} s" for k in keys if k in d)


def _details(rows: list[dict]) -> str:
    """Where the time and memory went, from the benchmarks' raw numbers."""
    out = []
    for r in rows:
        d = r.get("details") or {}
        if "ours" in d:
            ours, peer = d["ours"], d["peer"]
            work = sorted(d["ours"]["work_by_function_s"].items(), key=lambda kv: -kv[1])
            out.append(
                "**Fleet run.** Embedded server start {:.1f} s; flow {:.1f} s, by stage (wall time): {} "
                "(candidates: the null tables the searches share, then the searches, in one lane per worker; "
                "render: the records and model pages of every batch; publish: from the start of render to the end of "
                "the archive writing; events: the verdict events and Prefect artifacts after it). Work summed per "
                "function (two batches at a time, so the sum can exceed the "
                "wall time): {}. "
                "Flow wall time outside them: {:.1f} s. Peer per family: {}; subset {} ({}); "
                "extract read {:.2f} s.".format(
                    ours["server_start_s"],
                    ours["flow_s"],
                    _seconds(ours["flow_timings"], _STAGES),
                    ", ".join(f"{_LABELS.get(k, k)} {v:.1f} s" for k, v in work if v >= 0.05),
                    ours["orchestration_s"],
                    ", ".join(f"{k} {v:.3f} s" for k, v in sorted(peer["per_family_s"].items())),
                    peer["subset"],
                    ", ".join(f"{k} {v}" for k, v in sorted(peer["subset_counts"].items())),
                    peer["read_s"],
                )
            )
        if "one_worker" in d:
            out.append(
                "**Scale-out runs.** 1 worker: flow {:.1f} s ({}); 2 workers: flow {:.1f} s ({}).".format(
                    d["one_worker"]["flow_s"],
                    _seconds(d["one_worker"]["flow_timings"], _STAGES),
                    d["two_workers"]["flow_s"],
                    _seconds(d["two_workers"]["flow_timings"], _STAGES),
                )
            )
            if "projection" in d:
                from .scaleout import describe_projection

                out.append("**Scale-out model.** " + describe_projection(d["projection"]))
        if "runs" in d:
            mib = 2**20
            lines = [
                "| models | flow process peak | Prefect server peak | worker processes peak | process tree peak "
                "| results.json | run time |",
                "| --- | --- | --- | --- | --- | --- | --- |",
            ]
            for run in d["runs"]:
                lines.append(
                    f"| {run['models']:,} | {run['process'] / mib:,.0f} MiB | {run.get('server', 0) / mib:,.0f} MiB | "
                    f"{run.get('workers', 0) / mib:,.0f} MiB | {run['tree'] / mib:,.0f} MiB | "
                    f"{run['results_json_bytes'] / mib:,.1f} MiB | {run['seconds']:.0f} s |"
                )
            out.append("**Memory runs.**\n\n" + "\n".join(lines))
    return "\n\n".join(out)


def _markdown(rows: list[dict], info: dict, command: str, loads: dict, started: str, elapsed: float) -> str:
    machine_rows = "\n".join(f"| {k} | {v} |" for k, v in info.items())
    load_text = "; ".join(f"{name}: {before} -> {after}" for name, (before, after) in loads.items())
    return (
        "# Performance\n\n"
        f"Generated by `{command}` on {started} UTC in {elapsed / 60:.1f} minutes. Every ratio compares two "
        "measurements taken in the same run on the same machine. Regenerate with `make bench` (full sizes) or `make "
        "bench-quick`.\n\n## Results\n\n" + _table(rows) + "\n\n"
        "## Where the time and memory go\n\n" + _details(rows) + "\n\n"
        "## Machine\n\n| item | value |\n| --- | --- |\n" + machine_rows + "\n\n"
        f"Load average (1 min) before -> after each benchmark: {load_text}. The machine is shared: a load above the "
        "number of cores means other processes competed for the CPU during the measurement, which slows both sides of "
        "a ratio but can still bias it (see the notes).\n\n" + NOTES + reading_the_goals(rows)
    )


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(prog="python -m bench", description=__doc__.splitlines()[0])
    p.add_argument("--quick", action="store_true", help="small sizes (a few minutes)")
    p.add_argument("--only", nargs="+", choices=BENCHMARKS, help="run only these benchmarks")
    p.add_argument(
        "--out",
        default=str(REPO / "docs" / "performance.md"),
        help="where to write the table (default docs/performance.md)",
    )
    p.add_argument("--json", help="also write the raw results (and the run's description) as JSON here")
    p.add_argument("--from-json", metavar="PATH", help="write the page from a saved --json file instead of measuring")
    args = p.parse_args(argv)
    if args.from_json:
        run = json.loads(pathlib.Path(args.from_json).read_text())
    else:
        run = _measure(args)
        if args.json:
            pathlib.Path(args.json).write_text(json.dumps(run, indent=2, default=float))
    print(_table(run["rows"]))
    out = pathlib.Path(args.out)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_text(_markdown(run["rows"], run["machine"], run["command"], run["loads"], run["started"], run["elapsed"]))
    print(f"[bench] wrote {out}", file=sys.stderr)
    return 0


def _measure(args: argparse.Namespace) -> dict:
    """Run the benchmarks; the rows plus what the page says about the run."""
    command = (
        "python -m bench" + (" --quick" if args.quick else "") + (f" --only {' '.join(args.only)}" if args.only else "")
    )
    started = dt.datetime.now(dt.UTC).strftime("%Y-%m-%d %H:%M")
    t0 = time.perf_counter()
    rows: list[dict] = []
    loads: dict[str, tuple] = {}
    for name in args.only or BENCHMARKS:
        before = machine.load_average()
        print(f"[bench] {name} ...", file=sys.stderr, flush=True)
        try:
            rows += _run(name, args.quick)
        except Exception as exc:  # one broken benchmark must not lose the others' numbers
            traceback.print_exc()
            rows.append(
                {
                    "benchmark": name,
                    "size": "",
                    "measured": f"failed: {type(exc).__name__}: {str(exc).splitlines()[0][:200]}",
                    "ratio": float("nan"),
                    "ratio_text": "n/a",
                    "goal": "",
                    "met": False,
                }
            )
        after = machine.load_average()
        loads[name] = (f"{before[0]:.1f}" if before else "n/a", f"{after[0]:.1f}" if after else "n/a")
    return {
        "rows": rows,
        "machine": machine.describe(),
        "command": command,
        "loads": loads,
        "started": started,
        "elapsed": time.perf_counter() - t0,
    }


if __name__ == "__main__":
    sys.exit(main())
