"""Start-up time of the commands that need no Prefect: ``--help``, ``registry check``, ``verify``,
``signoff`` and ``promote``, each against Python's own start-up (``python -c pass``) in the same run.

Every command runs in a fresh child process (the way a user starts it: ``from fitaudit.flows.cli
import main``), from an empty working folder (the command writes its Prefect settings there), and
the children alternate with ``python -c pass`` within each repeat, so a busy machine slows both
alike; the table gives medians.  ``registry check`` reads the annotated example registry;
``verify``, ``signoff`` and ``promote`` work on an empty archive folder, where ``signoff`` and
``promote`` refuse (no such run, no such version) after loading everything a successful call
loads (their imports come first).  Goal: each command under 0.5 s wall time.

The children run with Python's bytecode cache on (``PYTHONDONTWRITEBYTECODE`` removed from their
environment) after one warm-up call of each command, as after a ``pip install`` or any first run:
with the cache off every module of fitaudit is compiled from source at each start (about 0.13 s
for ``registry check``), which no user pays twice.

``python -m bench.startup [--repeats N]`` prints the table.
"""

from __future__ import annotations

import argparse
import os
import pathlib
import statistics
import subprocess
import sys
import tempfile
import time

from .harness import REPO

GOAL_S = 0.5
_ENTRY = "import sys; from fitaudit.flows.cli import main; sys.exit(main())"


def _commands(archive: str) -> dict[str, list[str]]:
    registry = str(REPO / "examples" / "registry.yaml")
    return {
        "fitaudit --help": ["--help"],
        "fitaudit registry check": ["registry", "check", registry],
        "fitaudit verify": ["verify", archive],
        "fitaudit signoff": ["signoff", archive, "no-such-run", "--name", "A. Reviewer", "--role", "bench"],
        "fitaudit promote": ["promote", archive, "no-such-model", "2", "--by", "A. Reviewer", "--note", "bench"],
    }


def _env() -> dict:
    """The caller's environment with the bytecode cache on (see the module docstring)."""
    return {k: v for k, v in os.environ.items() if k != "PYTHONDONTWRITEBYTECODE"}


def _wall(argv: list[str], cwd: str, env: dict | None = None) -> float:
    t0 = time.perf_counter()
    subprocess.run(argv, cwd=cwd, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, check=False)
    return time.perf_counter() - t0


def measure(repeats: int = 5) -> list[dict]:
    """Median wall time of each command and of ``python -c pass``, measured alternately."""
    with tempfile.TemporaryDirectory(prefix="fitaudit-startup-") as tmp:
        work = pathlib.Path(tmp, "cwd")
        archive = pathlib.Path(tmp, "archive")
        work.mkdir()
        archive.mkdir()
        commands = _commands(str(archive))
        env = _env()
        for args in commands.values():  # warm the file and bytecode caches
            _wall([sys.executable, "-c", _ENTRY, *args], str(work), env)
        times: dict[str, list[float]] = {name: [] for name in commands}
        python: list[float] = []
        for _ in range(repeats):
            for name, args in commands.items():
                python.append(_wall([sys.executable, "-c", "pass"], str(work), env))
                times[name].append(_wall([sys.executable, "-c", _ENTRY, *args], str(work), env))
    base = statistics.median(python)
    return [
        {
            "command": name,
            "seconds": statistics.median(t),
            "python_seconds": base,
            "ratio": statistics.median(t) / base,
            "met": statistics.median(t) < GOAL_S,
        }
        for name, t in times.items()
    ]


def main(quick: bool = False) -> list[dict]:
    """Rows for the benchmark table (``python -m bench``)."""
    rows = []
    for r in measure(repeats=3 if quick else 7):
        rows.append(
            {
                "benchmark": "Command start-up",
                "size": r["command"],
                "measured": (
                    f"{r['seconds']:.2f} s wall; python -c pass {r['python_seconds']:.3f} s (median, alternating)"
                ),
                "ratio": r["ratio"],
                "ratio_text": f"{r['ratio']:.1f}x Python's start-up",
                "goal": f"< {GOAL_S} s",
                "met": r["met"],
            }
        )
    return rows


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=5)
    n = parser.parse_args().repeats
    print(f"{'command':28s} {'wall s':>8s} {'python s':>9s} {'ratio':>7s}  goal < {GOAL_S} s")
    for r in measure(repeats=n):
        print(
            f"{r['command']:28s} {r['seconds']:8.3f} {r['python_seconds']:9.3f} {r['ratio']:7.1f}  "
            f"{'met' if r['met'] else 'missed'}"
        )
